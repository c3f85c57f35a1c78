"""Colour of a spectrum: CIE 1931 chromaticity, CCT and Duv, dominant wavelength,
and display colours of single wavelengths.

The CIE 1931 2-degree colour-matching functions, the CCT methods
(Ohno 2013, Robertson 1968) and the dominant-wavelength construction come
from colour-science, which is tested against the CIE tables; this module
integrates a :class:`~benchspec.spectrum.Spectrum` against them and carries
the uncertainties through.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..errors import AnalysisError, InputError
from ..spectrum import Spectrum
from ._common import positive_uncertainty, require_calibrated

__all__ = [
    "Chromaticity",
    "ColourTemperature",
    "DominantWavelength",
    "cie_1931_cmfs",
    "chromaticity",
    "correlated_colour_temperature",
    "dominant_wavelength",
    "wavelength_to_srgb",
    "EQUAL_ENERGY_WHITE_XY",
    "CCT_MAX_ABS_DUV",
]

#: Chromaticity of the equal-energy white point E (CIE 15).
EQUAL_ENERGY_WHITE_XY = (1.0 / 3.0, 1.0 / 3.0)

#: |Duv| beyond which a CCT is not quoted: ANSI C78.377 tolerances and CIE 15
#: usage both stop at 0.05 from the Planckian locus (from memory).
CCT_MAX_ABS_DUV = 0.05

_CCT_RANGE_K = (1000.0, 100000.0)  # range of colour-science's Ohno 2013 tables

_trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy 2 renamed trapz


@functools.lru_cache(maxsize=1)
def _cmf_table() -> tuple[np.ndarray, np.ndarray]:
    import colour

    cmfs = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"]
    wavelength = np.array(cmfs.wavelengths, dtype=np.float64)
    values = np.array(cmfs.values, dtype=np.float64)
    wavelength.setflags(write=False)
    values.setflags(write=False)
    return wavelength, values


@functools.lru_cache(maxsize=1)
def _fine_cmfs():
    """The CIE 1931 CMFs interpolated to 0.1 nm, so the dominant wavelength is not rounded to 1 nm."""
    import colour

    cmfs = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"]
    return cmfs.copy().interpolate(colour.SpectralShape(360, 830, 0.1))


def cie_1931_cmfs(wavelength_nm) -> np.ndarray:
    """CIE 1931 2-degree colour-matching functions x-bar, y-bar, z-bar at ``wavelength_nm``.

    Linear interpolation of the 1 nm CIE table (360-830 nm, via
    colour-science); zero outside it.

    Returns
    -------
    ndarray, shape (..., 3)
    """
    table_wl, table = _cmf_table()
    wavelength = np.asarray(wavelength_nm, dtype=np.float64)
    out = np.stack([np.interp(wavelength, table_wl, table[:, i], left=0.0, right=0.0) for i in range(3)], axis=-1)
    return out


@dataclass(frozen=True)
class Chromaticity:
    """CIE 1931 tristimulus values and chromaticity of a spectrum.

    X, Y, Z are in the spectrum's intensity units times nm (relative: only
    their ratios matter). Uncertainties are 1-sigma from the per-sample
    noise; the covariance of x and y is ``xy_covariance``.
    """

    X: float
    Y: float
    Z: float
    cie_x: float
    cie_y: float
    cie_x_uncertainty: float
    cie_y_uncertainty: float
    xy_covariance: tuple[tuple[float, float], tuple[float, float]]
    cie_u_1960: float
    cie_v_1960: float
    visible_coverage_fraction: float


def chromaticity(spectrum: Spectrum) -> Chromaticity:
    """CIE 1931 chromaticity of a (response-corrected) spectrum.

    The spectrum is integrated against the CIE 1931 2-degree
    colour-matching functions (trapezoid weights on the spectrum's own
    grid). ``visible_coverage_fraction`` is the share of the y-bar integral
    that falls inside the spectrum's range: below about 0.99 the colour is
    incomplete.

    Raises
    ------
    AnalysisError
        When the spectrum carries no light in the CIE range.
    """
    spectrum = require_calibrated(spectrum)
    wl = spectrum.wavelength_nm
    signal = np.where(np.isfinite(spectrum.intensity), spectrum.intensity, 0.0)
    sigma = positive_uncertainty(spectrum)
    step = np.gradient(wl)  # trapezoid-like weights
    weights = cie_1931_cmfs(wl) * step[:, None]  # (n, 3)
    xyz = weights.T @ signal
    cov_xyz = (weights * sigma[:, None] ** 2).T @ weights
    total = float(np.sum(xyz))
    if not np.isfinite(total) or xyz[1] <= 0 or total <= 0:
        raise AnalysisError(
            f"spectrum ({wl[0]:.0f}-{wl[-1]:.0f} nm) has no light in the CIE 1931 range 360-830 nm "
            "(tristimulus Y <= 0); check the spectrum is calibrated and background-subtracted"
        )
    X, Y, Z = (float(v) for v in xyz)
    x, y = X / total, Y / total
    # Jacobian of (x, y) with respect to (X, Y, Z).
    jac = np.array([[1 - x, -x, -x], [-y, 1 - y, -y]]) / total
    cov_xy = jac @ cov_xyz @ jac.T
    denominator = -2 * x + 12 * y + 3
    table_wl, table = _cmf_table()
    full = _trapezoid(table[:, 1], table_wl)
    inside = (table_wl >= wl[0]) & (table_wl <= wl[-1])
    coverage = float(_trapezoid(table[inside, 1], table_wl[inside]) / full) if np.count_nonzero(inside) > 1 else 0.0
    return Chromaticity(
        X=X,
        Y=Y,
        Z=Z,
        cie_x=x,
        cie_y=y,
        cie_x_uncertainty=float(np.sqrt(max(cov_xy[0, 0], 0.0))),
        cie_y_uncertainty=float(np.sqrt(max(cov_xy[1, 1], 0.0))),
        xy_covariance=((float(cov_xy[0, 0]), float(cov_xy[0, 1])), (float(cov_xy[1, 0]), float(cov_xy[1, 1]))),
        cie_u_1960=4 * x / denominator,
        cie_v_1960=6 * y / denominator,
        visible_coverage_fraction=coverage,
    )


@dataclass(frozen=True)
class ColourTemperature:
    """Correlated colour temperature and distance from the Planckian locus."""

    cct_k: float
    cct_uncertainty_k: float
    duv: float
    duv_uncertainty: float
    method: str


def _uv_to_cct(u: float, v: float, method: str) -> tuple[float, float]:
    import warnings

    import colour

    with warnings.catch_warnings():
        # Far from the locus colour-science warns about its table bounds; we judge
        # the answer ourselves (|Duv| and the 1000-100000 K range) and say so plainly.
        warnings.simplefilter("ignore")
        cct, duv = colour.uv_to_CCT(np.array([u, v]), method=method)
    return float(cct), float(duv)


def correlated_colour_temperature(
    cie_x: float,
    cie_y: float,
    *,
    xy_covariance=None,
    method: str = "Ohno 2013",
    max_abs_duv: float = CCT_MAX_ABS_DUV,
) -> ColourTemperature:
    """CCT and Duv of a chromaticity, on the CIE 1960 (u, v) diagram.

    Parameters
    ----------
    cie_x, cie_y : float
        CIE 1931 chromaticity.
    xy_covariance : 2x2 array-like, optional
        Covariance of (x, y); propagated linearly (numerical Jacobian).
    method : {"Ohno 2013", "Robertson 1968"}
        colour-science's implementation of the published method.
    max_abs_duv : float
        Largest |Duv| for which a CCT is quoted (default 0.05).

    Raises
    ------
    AnalysisError
        When the chromaticity is farther than ``max_abs_duv`` from the
        Planckian locus or outside 1000-100000 K: it has no CCT.

    Notes
    -----
    Ohno, Y. (2013), "Practical use and calculation of CCT and Duv",
    LEUKOS 10(1); Robertson, A. R. (1968), JOSA 58(11).
    """
    if method not in ("Ohno 2013", "Robertson 1968"):
        raise InputError(f"`method` must be 'Ohno 2013' or 'Robertson 1968', was {method!r}")
    x, y = float(cie_x), float(cie_y)
    # Noise can push a spectral colour a hair past the locus (z slightly < 0): allow 0.02.
    if not (0 < x < 1 and 0 < y < 1 and x + y < 1.02):
        raise InputError(f"chromaticity (x, y) = ({x:.4f}, {y:.4f}) is outside the CIE 1931 diagram")

    def uv(xv, yv):
        d = -2 * xv + 12 * yv + 3
        return 4 * xv / d, 6 * yv / d

    cct, duv = _uv_to_cct(*uv(x, y), method)
    if not np.isfinite(cct) or not np.isfinite(duv) or abs(duv) > max_abs_duv or not (_CCT_RANGE_K[0] <= cct <= _CCT_RANGE_K[1]):
        raise AnalysisError(
            f"chromaticity (x, y) = ({x:.4f}, {y:.4f}) has no correlated colour temperature: "
            f"it lies Duv = {duv:+.3f} from the Planckian locus (a CCT is quoted only within +-{max_abs_duv:g}, "
            f"1000-100000 K); the source is not white - use its dominant wavelength instead"
        )
    cct_err = duv_err = 0.0
    if xy_covariance is not None:
        cov = np.asarray(xy_covariance, dtype=np.float64)
        h = 1e-5
        jac = np.empty((2, 2))
        for j, (dx, dy) in enumerate(((h, 0.0), (0.0, h))):
            plus = _uv_to_cct(*uv(x + dx, y + dy), method)
            minus = _uv_to_cct(*uv(x - dx, y - dy), method)
            jac[0, j] = (plus[0] - minus[0]) / (2 * h)
            jac[1, j] = (plus[1] - minus[1]) / (2 * h)
        out = jac @ cov @ jac.T
        cct_err = float(np.sqrt(max(out[0, 0], 0.0)))
        duv_err = float(np.sqrt(max(out[1, 1], 0.0)))
    return ColourTemperature(cct_k=cct, cct_uncertainty_k=cct_err, duv=duv, duv_uncertainty=duv_err, method=method)


@dataclass(frozen=True)
class DominantWavelength:
    """Dominant (or complementary) wavelength against a white point.

    ``complementary`` is True for purples: there the line from the white
    point through the colour meets the purple line, and
    ``dominant_wavelength_nm`` holds the complementary wavelength.
    """

    dominant_wavelength_nm: float
    excitation_purity: float
    complementary: bool
    white_point_xy: tuple[float, float]


def dominant_wavelength(cie_x: float, cie_y: float, *, white_point_xy=EQUAL_ENERGY_WHITE_XY) -> DominantWavelength:
    """Dominant wavelength and excitation purity of a chromaticity (CIE 15 construction).

    The default white point is the equal-energy point E, as is usual for
    LEDs. Uses colour-science's ``dominant_wavelength`` on the CIE 1931
    2-degree observer (interpolated to 0.1 nm).
    """
    import colour

    x, y = float(cie_x), float(cie_y)
    white = np.array(white_point_xy, dtype=np.float64)
    distance = float(np.hypot(x - white[0], y - white[1]))
    if distance < 1e-6:
        raise AnalysisError(
            f"chromaticity ({x:.4f}, {y:.4f}) is the white point itself; it has no dominant wavelength"
        )
    wavelength, on_locus, _ = colour.dominant_wavelength(np.array([x, y]), white, _fine_cmfs())
    wavelength = float(wavelength)
    complementary = wavelength < 0
    # The first point is where the line from the white point through the
    # colour meets the boundary (spectral locus, or purple line for
    # complementary colours); purity is measured to it (CIE 15).
    boundary = np.asarray(on_locus, dtype=np.float64)
    reach = float(np.hypot(boundary[0] - white[0], boundary[1] - white[1]))
    purity = distance / reach if reach > 0 else float("nan")
    return DominantWavelength(
        dominant_wavelength_nm=abs(wavelength),
        excitation_purity=float(min(purity, 1.0)),
        complementary=complementary,
        white_point_xy=(float(white[0]), float(white[1])),
    )


def wavelength_to_srgb(wavelength_nm, *, fade_fraction: float = 0.1) -> np.ndarray:
    """Display colour (sRGB, gamma-encoded, 0-1) of monochromatic light.

    Computed from the CIE 1931 colour-matching functions: XYZ of the
    wavelength -> linear sRGB (IEC 61966-2-1 matrix, via colour-science);
    spectral colours lie outside the sRGB gamut, so negative channels are
    clipped to zero (this keeps 650 nm red rather than pink), then the
    colour is scaled so its largest channel is 1. Near the ends of the visible range the colour fades to
    black in proportion to x-bar + y-bar + z-bar below ``fade_fraction`` of its
    maximum, so that 380 or 780 nm do not look as bright as 550 nm.

    Parameters
    ----------
    wavelength_nm : float or array-like
    fade_fraction : float
        Share of the peak CMF sum below which the colour fades (0 disables).

    Returns
    -------
    ndarray, shape (..., 3)
        R, G, B in 0-1, ready for matplotlib or Tk (multiply by 255).
    """
    import colour

    wavelength = np.asarray(wavelength_nm, dtype=np.float64)
    xyz = cie_1931_cmfs(wavelength)
    matrix = np.asarray(colour.models.RGB_COLOURSPACE_sRGB.matrix_XYZ_to_RGB)
    rgb = xyz @ matrix.T
    total = xyz.sum(axis=-1)
    rgb = np.clip(rgb, 0.0, None)
    peak = rgb.max(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        rgb = np.where(peak[..., None] > 0, rgb / peak[..., None], 0.0)
    if fade_fraction > 0:
        _, table = _cmf_table()
        reference = fade_fraction * float(table.sum(axis=1).max())
        fade = np.clip(total / reference, 0.0, 1.0)
        rgb = rgb * fade[..., None]
    encoded = np.asarray(colour.models.eotf_inverse_sRGB(np.clip(rgb, 0.0, 1.0)))
    return np.clip(encoded, 0.0, 1.0)
