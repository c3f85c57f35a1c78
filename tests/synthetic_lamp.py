"""1-D lamp spectra for the line-finding and calibration tests.

Reference wavelengths come from the packaged line lists (NIST ASD for the
atomic species; see each CSV's header). The dispersion is the physical one
of a flat sensor behind a grating: pixel x sees the diffraction angle
beta = beta0 + atan((x - x_centre)/f), and lambda = d sin(beta) (grating
equation, normal incidence), so nm/px varies across the sensor (tan-shaped).
"""

from __future__ import annotations

import numpy as np

from benchspec.refdata import load_lamp, load_line_list
from benchspec.spectrum import Spectrum


def pixel_to_wavelength(x, *, lines_per_mm, focal_px, centre_nm, n_pixels, blue_right=False):
    d_nm = 1e6 / lines_per_mm
    beta0 = np.arcsin(centre_nm / d_nm)
    offset = (np.asarray(x, dtype=float) - (n_pixels - 1) / 2.0)
    if blue_right:
        offset = -offset
    return d_nm * np.sin(beta0 + np.arctan(offset / focal_px))


def wavelength_to_pixel(wavelength_nm, *, lines_per_mm, focal_px, centre_nm, n_pixels, blue_right=False):
    d_nm = 1e6 / lines_per_mm
    beta0 = np.arcsin(centre_nm / d_nm)
    beta = np.arcsin(np.asarray(wavelength_nm, dtype=float) / d_nm)
    offset = focal_px * np.tan(beta - beta0)
    if blue_right:
        offset = -offset
    return offset + (n_pixels - 1) / 2.0


def render(
    lines,
    *,
    rng,
    n_pixels=1280,
    nm_per_px=0.5,
    centre_nm=550.0,
    lines_per_mm=1000.0,
    blue_right=False,
    slit_sigma_px=1.2,
    peak_counts=200.0,
    read_noise=2.0,
    full_well=None,
    continuum=None,
    extra_lines_nm=(),
    extra_fraction=0.3,
):
    """A noisy spectrum of ``lines`` [(wavelength_nm, relative_intensity), ...].

    ``nm_per_px`` sets the focal length so the dispersion at the centre is
    about that value. Returns (Spectrum, truth) where truth holds the exact
    pixel of each rendered line and the pixel->wavelength function.
    """
    d_nm = 1e6 / lines_per_mm
    beta0 = np.arcsin(centre_nm / d_nm)
    focal_px = d_nm * np.cos(beta0) / nm_per_px
    geometry = dict(lines_per_mm=lines_per_mm, focal_px=focal_px, centre_nm=centre_nm, n_pixels=n_pixels,
                    blue_right=blue_right)
    x = np.arange(n_pixels, dtype=float)
    wavelength = pixel_to_wavelength(x, **geometry)
    wl = np.array([w for w, _ in lines] + list(extra_lines_nm), dtype=float)
    strength = np.array([s for _, s in lines] + [extra_fraction * max(s for _, s in lines)] * len(extra_lines_nm), dtype=float)
    inside = (wl > wavelength.min()) & (wl < wavelength.max())
    wl, strength = wl[inside], strength[inside]
    centres = wavelength_to_pixel(wl, **geometry)
    signal = np.zeros(n_pixels)
    scale = peak_counts / strength.max()
    for centre, s in zip(centres, strength):
        signal += s * scale * np.exp(-0.5 * ((x - centre) / slit_sigma_px) ** 2)
    if continuum is not None:
        signal += continuum(wavelength) * peak_counts
    noisy = signal + rng.normal(0, 1, n_pixels) * np.sqrt(read_noise**2 + np.maximum(signal, 0))
    saturated = np.zeros(n_pixels, dtype=bool)
    if full_well is not None:
        saturated = noisy >= full_well
        noisy = np.minimum(noisy, full_well)
    spectrum = Spectrum(intensity=noisy, uncertainty=np.sqrt(read_noise**2 + np.maximum(noisy, 0)), pixel=x,
                        saturated=saturated)
    truth = dict(geometry=geometry, line_wavelength_nm=wl, line_pixel=centres,
                 wavelength_of=lambda p: pixel_to_wavelength(p, **geometry))
    return spectrum, truth


def lamp_lines(name):
    """[(wavelength_nm, relative_intensity)] of a packaged lamp's line lists."""
    return [(l.wavelength_nm, l.relative_intensity) for l in load_lamp(name).lines()]


def species_lines(species):
    return [(l.wavelength_nm, l.relative_intensity) for l in load_line_list(species).lines]


def cfl_continuum(wavelength_nm):
    """A broad Eu2+-like band near 450 nm plus a weak flat floor (demo shape, invented)."""
    return 0.03 * np.exp(-0.5 * ((wavelength_nm - 450.0) / 25.0) ** 2) + 0.005
