"""Helpers shared by the practicals: input checks and a small Gaussian line fit.

Private to :mod:`benchspec.analysis`; the public functions live in the
sibling modules.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import optimize

from ..errors import DegradedResultWarning, InputError
from ..spectrum import Spectrum

FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def require_calibrated(spectrum, *, name: str = "spectrum") -> Spectrum:
    """Check that ``spectrum`` is a calibrated :class:`Spectrum` with enough finite samples."""
    if not isinstance(spectrum, Spectrum):
        raise InputError(f"`{name}` must be a benchspec Spectrum, got {type(spectrum).__name__}; build one with as_spectrum()")
    if not spectrum.is_calibrated:
        raise InputError(f"`{name}` has no wavelength axis; calibrate it first (benchspec calibrate) or pass a calibrated spectrum")
    if spectrum.size < 5:
        raise InputError(f"`{name}` has {spectrum.size} samples; at least 5 are needed")
    if not np.all(np.isfinite(spectrum.wavelength_nm)):
        raise InputError(f"`{name}` has non-finite wavelengths; drop those samples first")
    return spectrum


def positive_uncertainty(spectrum: Spectrum) -> np.ndarray:
    """The spectrum's 1-sigma uncertainty with zeros and non-finite values replaced by a small floor."""
    sigma = np.array(spectrum.uncertainty, dtype=np.float64)
    good = np.isfinite(sigma) & (sigma > 0)
    scale = np.nanmax(np.abs(spectrum.intensity[np.isfinite(spectrum.intensity)]), initial=1.0)
    floor = np.median(sigma[good]) if np.any(good) else 1e-6 * scale
    sigma[~good] = max(floor, 1e-12)
    return sigma


def sample_step_nm(wavelength_nm: np.ndarray) -> float:
    """Median wavelength step of a spectrum in nm."""
    return float(np.median(np.diff(wavelength_nm)))


def _gauss_linear(x, amplitude, centre, sigma, offset, slope):
    return amplitude * np.exp(-0.5 * ((x - centre) / sigma) ** 2) + offset + slope * (x - centre)


def _gauss_linear_jacobian(x, amplitude, centre, sigma, offset, slope):
    u = (x - centre) / sigma
    g = np.exp(-0.5 * u * u)
    return np.stack(
        [g, amplitude * g * u / sigma - slope, amplitude * g * u * u / sigma, np.ones_like(x), x - centre], axis=1
    )


def fit_gaussian_line(x, y, sigma, *, centre_guess: float, width_guess: float, absorption: bool = False):
    """Least-squares Gaussian on a linear background (Levenberg-Marquardt, analytic Jacobian).

    Returns
    -------
    dict or None
        ``centre``, ``centre_uncertainty``, ``sigma_width``, ``amplitude``,
        ``amplitude_uncertainty``, ``background``, ``reduced_chi2``; None when
        the fit fails, lands outside the window, or has the wrong sign. The
        centre uncertainty is the covariance value scaled by
        sqrt(reduced chi^2) when that exceeds 1 (the usual treatment of a fit
        whose residuals exceed the stated noise).
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    sigma = np.asarray(sigma, dtype=np.float64)
    if x.size < 6:
        return None
    edge = 0.5 * (y[:2].mean() + y[-2:].mean())
    amp0 = (np.min(y) if absorption else np.max(y)) - edge
    if amp0 == 0 or (amp0 > 0) == absorption:
        return None
    p0 = [amp0, centre_guess, max(width_guess, 0.5 * float(np.min(np.diff(x)))), edge, 0.0]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            params, cov = optimize.curve_fit(
                _gauss_linear, x, y, p0=p0, sigma=sigma, absolute_sigma=True, jac=_gauss_linear_jacobian,
                method="lm", maxfev=400,
            )
    except (RuntimeError, ValueError, optimize.OptimizeWarning):
        return None
    if not np.all(np.isfinite(cov)):
        return None
    params[2] = abs(params[2])
    if (params[0] > 0) == absorption or params[2] > (x[-1] - x[0]) or params[2] < 0.1 * float(np.min(np.diff(x))):
        return None
    residual = (y - _gauss_linear(x, *params)) / sigma
    dof = max(x.size - 5, 1)
    reduced_chi2 = float(np.sum(residual**2) / dof)
    scale = np.sqrt(max(reduced_chi2, 1.0))
    centre, centre_err = float(params[1]), float(np.sqrt(cov[1, 1]) * scale)
    if not (x[0] < centre < x[-1]) or not np.isfinite(centre_err):
        return None
    return {
        "centre": centre,
        "centre_uncertainty": centre_err,
        "sigma_width": float(params[2]),
        "amplitude": float(params[0]),
        "amplitude_uncertainty": float(np.sqrt(cov[0, 0]) * scale),
        "background": float(params[3]),
        "reduced_chi2": reduced_chi2,
    }


def parabolic_vertex(x, y, sigma, index: int):
    """Vertex of the parabola through samples ``index-1, index, index+1`` and its 1-sigma.

    Returns (position, uncertainty) in the units of ``x``; None at the ends or
    when the three samples do not form an extremum.
    """
    if index <= 0 or index >= len(y) - 1:
        return None
    y0, y1, y2 = float(y[index - 1]), float(y[index]), float(y[index + 1])
    denom = y0 - 2 * y1 + y2
    if denom == 0:
        return None
    delta = 0.5 * (y0 - y2) / denom
    if abs(delta) > 1:
        return None
    step = 0.5 * (float(x[index + 1]) - float(x[index - 1]))
    d0 = 0.5 / denom - 0.5 * (y0 - y2) / denom**2
    d1 = (y0 - y2) / denom**2
    d2 = -0.5 / denom - 0.5 * (y0 - y2) / denom**2
    err = step * float(np.sqrt((d0 * sigma[index - 1]) ** 2 + (d1 * sigma[index]) ** 2 + (d2 * sigma[index + 1]) ** 2))
    return float(x[index]) + delta * step, err


def interpolate_onto(spectrum: Spectrum, wavelength_nm: np.ndarray, *, name: str):
    """Intensity, uncertainty and saturation of ``spectrum`` on another wavelength grid (linear interpolation).

    Grids that already match are passed through unchanged. Samples outside
    the spectrum's range come back as NaN.
    """
    own = spectrum.wavelength_nm
    if own.size == wavelength_nm.size and np.allclose(own, wavelength_nm, rtol=0, atol=1e-9):
        return np.array(spectrum.intensity), np.array(spectrum.uncertainty), np.array(spectrum.saturated)
    overlap = (wavelength_nm >= own[0]) & (wavelength_nm <= own[-1])
    if not np.any(overlap):
        raise InputError(
            f"`{name}` covers {own[0]:.1f}-{own[-1]:.1f} nm, which does not overlap "
            f"{wavelength_nm[0]:.1f}-{wavelength_nm[-1]:.1f} nm; record both with the same calibration"
        )
    intensity = np.interp(wavelength_nm, own, spectrum.intensity, left=np.nan, right=np.nan)
    uncertainty = np.interp(wavelength_nm, own, spectrum.uncertainty, left=np.nan, right=np.nan)
    saturated = np.interp(wavelength_nm, own, spectrum.saturated.astype(float), left=0, right=0) > 0
    return intensity, uncertainty, saturated


def warn_degraded(message: str) -> None:
    """Issue a :class:`DegradedResultWarning` with a one-line message."""
    warnings.warn(" ".join(message.split()), DegradedResultWarning, stacklevel=3)


def contiguous_runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) index pairs of the True runs of a boolean array (stop exclusive)."""
    mask = np.asarray(mask, dtype=bool)
    if mask.size == 0:
        return []
    padded = np.concatenate([[False], mask, [False]])
    changes = np.flatnonzero(np.diff(padded.astype(np.int8)))
    return [(int(a), int(b)) for a, b in zip(changes[::2], changes[1::2])]
