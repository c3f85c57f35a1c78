"""Seeded 1-D spectra of Gaussian lines on a flat background, for the line-finder tests."""

import numpy as np

from benchspec.spectrum import Spectrum

FWHM_PER_SIGMA = 2 * np.sqrt(2 * np.log(2))  # Gaussian FWHM = 2 sqrt(2 ln 2) sigma (textbook)


def gaussian_spectrum(rng, centres, *, sigma=1.5, height=1000.0, n=400, background=20.0, noise=None, clip=None):
    """Gaussian lines at ``centres`` (px) with Poisson-like noise (or a flat ``noise``), clipped at ``clip``."""
    x = np.arange(n, dtype=float)
    truth = background + sum(height * np.exp(-0.5 * ((x - c) / sigma) ** 2) for c in np.atleast_1d(centres))
    sd = np.sqrt(truth) if noise is None else np.full(n, noise)  # Poisson-like noise
    y = truth + rng.normal(0, 1, n) * sd
    saturated = np.zeros(n, bool)
    if clip is not None:
        saturated = y >= clip
        y = np.minimum(y, clip)
    return Spectrum(intensity=y, uncertainty=sd, pixel=x, saturated=saturated)
