"""Colours of the viewer: the palette, and wavelength colours from the CIE 1931 observer.

Wavelength colours come from :func:`benchspec.analysis.colour.wavelength_to_srgb`
when it is installed, otherwise from the CIE 1931 2-degree colour-matching
functions in colour-science (the same method, kept private here).
"""

from __future__ import annotations

import functools

import numpy as np

__all__ = ["PALETTE", "wavelength_hex", "warm_up"]

# The viewer's own look: paper-coloured panels, slate ink, a teal accent and
# a brick-red warning colour. Nothing here stands for a wavelength.
PALETTE = {
    "paper": "#f2efe6",
    "panel": "#e4dfd2",
    "ink": "#1f2b33",
    "muted": "#5d6a71",
    "accent": "#2c6b70",
    "accent_light": "#cfe3e1",
    "warning": "#b2402a",
    "warning_light": "#f5d9cf",
    "good": "#4b7636",
    "frame_bg": "#15191c",
    "band": "#f2c14e",        # overlay: band outline (amber, visible on dark frames)
    "aperture": "#7fd3c8",    # overlay: extraction aperture
    "background": "#c08fd8",  # overlay: background rows
}


def _fallback_srgb(wavelength_nm: np.ndarray) -> np.ndarray:
    """sRGB (0-1, encoded) of monochromatic light from the CIE 1931 2-degree CMFs (colour-science)."""
    import colour

    cmfs = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"]
    grid = np.asarray(cmfs.wavelengths, dtype=float)
    table = np.asarray(cmfs.values, dtype=float)
    xyz = np.stack([np.interp(wavelength_nm, grid, table[:, k], left=0.0, right=0.0) for k in range(3)], axis=-1)
    rgb = np.asarray(colour.XYZ_to_sRGB(xyz, apply_cctf_encoding=False))
    rgb = np.clip(rgb, 0.0, None)  # spectral colours are outside the sRGB gamut
    peak = rgb.max(axis=-1, keepdims=True)
    rgb = np.where(peak > 0, rgb / np.where(peak > 0, peak, 1.0), 0.0)
    total = xyz.sum(axis=-1, keepdims=True)
    rgb = rgb * np.clip(total / (0.1 * table.sum(axis=1).max()), 0.0, 1.0)
    return np.clip(np.asarray(colour.models.eotf_inverse_sRGB(rgb)), 0.0, 1.0)


def _srgb(wavelength_nm) -> np.ndarray:
    try:
        from ..analysis.colour import wavelength_to_srgb
    except ImportError:
        return _fallback_srgb(np.asarray(wavelength_nm, dtype=float))
    return np.asarray(wavelength_to_srgb(wavelength_nm))


_TABLE: dict[int, str] = {}   # tenths of a nm -> "#rrggbb", filled by warm_up()
_TABLE_RANGE = (3000, 11000)   # 300.0-1100.0 nm


def _hex(rgb) -> str:
    # Very dark colours (the ends of the visible range) would vanish on the
    # dark frame view and are hard to see on paper: keep a floor of grey.
    rgb = np.maximum(np.asarray(rgb, dtype=float), 0.25)
    return "#%02x%02x%02x" % tuple(int(round(255 * c)) for c in rgb)


def warm_up() -> None:
    """Compute the colours of 300-1100 nm in 0.1 nm steps at once (slow the first time: it imports
    colour-science). The viewer calls it on a helper thread at start so no click waits for it."""
    tenths = np.arange(*_TABLE_RANGE)
    rgb = _srgb(tenths / 10.0)
    _TABLE.update({int(t): _hex(c) for t, c in zip(tenths, rgb)})


@functools.lru_cache(maxsize=2048)
def _hex_at_tenth_nm(tenths: int) -> str:
    return _hex(_srgb(np.array([tenths / 10.0]))[0])


def wavelength_hex(wavelength_nm: float) -> str:
    """``#rrggbb`` display colour of light at ``wavelength_nm`` (CIE 1931, 0.1 nm steps)."""
    tenths = int(round(float(wavelength_nm) * 10))
    found = _TABLE.get(tenths)
    return found if found is not None else _hex_at_tenth_nm(tenths)
