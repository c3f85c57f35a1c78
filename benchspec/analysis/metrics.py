"""Figures of merit of a light source: LEDs, lasers and white lamps.

Peak, centroid, FWHM, CIE 1931 chromaticity, dominant wavelength (against
the equal-energy white E, as is usual for LEDs), CCT and Duv for white
sources, and a laser's wavelength against its nominal value.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import AnalysisError, InputError
from ..spectrum import Spectrum
from ._common import positive_uncertainty, require_calibrated, warn_degraded
from .colour import (
    EQUAL_ENERGY_WHITE_XY,
    chromaticity,
    correlated_colour_temperature,
    dominant_wavelength,
)

__all__ = ["SourceMetrics", "LaserCheck", "source_metrics", "laser_check", "WHITE_MIN_SPREAD_NM"]

#: A source counts as white (when not told) only if the central 90% of its
#: energy spans at least this much and it lies within |Duv| <= 0.05 of the
#: Planckian locus; an amber LED can sit near the locus but is narrow
#: (common practice, no source).
WHITE_MIN_SPREAD_NM = 100.0


@dataclass(frozen=True)
class LaserCheck:
    """A laser's measured wavelength against its nominal value."""

    nominal_nm: float
    tolerance_nm: float
    measured_nm: float
    measured_uncertainty_nm: float
    offset_nm: float
    within_tolerance: bool
    label: str = ""


@dataclass(frozen=True)
class SourceMetrics:
    """Figures of a source spectrum; fields that do not apply are None.

    Uncertainties are 1-sigma from the spectrum's noise, with the wavelength
    calibration's uncertainty added in quadrature for wavelength figures.
    ``fwhm_resolution_limited`` is True when the measured width is under
    three samples: the line is narrower than the instrument shows (lasers).
    """

    peak_nm: float
    peak_uncertainty_nm: float
    centroid_nm: float
    centroid_uncertainty_nm: float
    fwhm_nm: float | None
    fwhm_uncertainty_nm: float | None
    fwhm_resolution_limited: bool | None
    dominant_wavelength_nm: float | None
    complementary_wavelength: bool | None
    excitation_purity: float | None
    cie_x: float
    cie_y: float
    cie_x_uncertainty: float
    cie_y_uncertainty: float
    cct_k: float | None
    cct_uncertainty_k: float | None
    duv: float | None
    duv_uncertainty: float | None
    is_white: bool
    energy_spread_nm: float
    visible_coverage_fraction: float
    laser: LaserCheck | None
    cct_method: str | None = None


def _calibration_sigma(spectrum: Spectrum, wavelength: float) -> float:
    if spectrum.wavelength_uncertainty_nm is None:
        return 0.0
    return float(np.interp(wavelength, spectrum.wavelength_nm, spectrum.wavelength_uncertainty_nm))


def _peak(wl, y, sigma):
    """Sub-sample peak: weighted least-squares parabola through the log of the top of the line.

    A parabola in ln(signal) is exact for a Gaussian peak (Caruana's
    method), so a laser line sampled by three pixels is not pulled towards
    the brightest sample. Uses the contiguous samples around the maximum
    above 70% of it (at least the three highest); the vertex uncertainty
    comes from the fit covariance.
    """
    i = int(np.nanargmax(y))
    n = y.size
    lo = hi = i
    # At most 10 samples each side: a white lamp's broad top is not one peak.
    while lo - 1 >= 0 and y[lo - 1] > 0.7 * y[i] and i - lo < 10:
        lo -= 1
    while hi + 1 < n and y[hi + 1] > 0.7 * y[i] and hi - i < 10:
        hi += 1
    lo, hi = max(0, min(lo, i - 1)), min(n - 1, max(hi, i + 1))
    if hi - lo < 2:  # the maximum is at the edge of the spectrum
        return float(wl[i]), float(abs(wl[hi] - wl[lo]) / 2), i
    x0 = wl[i]
    xs, ys, ss = wl[lo : hi + 1] - x0, y[lo : hi + 1], sigma[lo : hi + 1]
    if np.all(ys > 0):
        ys, ss = np.log(ys), ss / ys
    try:
        with np.errstate(all="ignore"):
            coeffs, cov = np.polyfit(xs, ys, 2, w=1 / ss, cov="unscaled")
    except (np.linalg.LinAlgError, ValueError):  # weights that overflow (values near 1e300, zero sigma)
        return float(wl[i]), float((wl[hi] - wl[lo]) / 2), i
    a, b = coeffs[0], coeffs[1]
    if not (np.all(np.isfinite(coeffs)) and np.all(np.isfinite(cov))):
        return float(wl[i]), float((wl[hi] - wl[lo]) / 2), i
    if a >= 0:
        return float(wl[i]), float((wl[hi] - wl[lo]) / 2), i
    vertex = -b / (2 * a)
    grad = np.array([b / (2 * a * a), -1 / (2 * a), 0.0])
    err = float(np.sqrt(max(grad @ cov @ grad, 0.0)))
    if not (xs[0] <= vertex <= xs[-1]):
        return float(wl[i]), float((wl[hi] - wl[lo]) / 2), i
    return float(x0 + vertex), err, i


def _half_maximum_crossing(wl, y, sigma, start, direction, level, level_sigma):
    """Where the signal first falls below ``level`` walking from ``start``; None if it never does."""
    j = start
    while 0 <= j + direction < y.size:
        nxt = j + direction
        if y[nxt] < level:
            a, b = y[j], y[nxt]
            frac = (a - level) / (a - b)
            crossing = wl[j] + frac * (wl[nxt] - wl[j])
            slope = abs((b - a) / (wl[nxt] - wl[j]))
            noise = np.hypot(0.5 * (sigma[j] + sigma[nxt]), level_sigma)
            return float(crossing), float(noise / slope if slope > 0 else np.inf)
        j = nxt
    return None


def _energy_spread(wl, y):
    positive = np.clip(np.where(np.isfinite(y), y, 0.0), 0.0, None)
    cumulative = np.cumsum(positive)
    if cumulative[-1] <= 0:
        return 0.0
    cumulative = cumulative / cumulative[-1]
    return float(np.interp(0.95, cumulative, wl) - np.interp(0.05, cumulative, wl))


def laser_check(
    measured_nm: float,
    *,
    measured_uncertainty_nm: float,
    nominal_nm: float,
    tolerance_nm: float,
    label: str = "",
) -> LaserCheck:
    """Compare a measured laser wavelength with its nominal value and tolerance.

    ``within_tolerance`` is True when |measured - nominal| <= tolerance.
    """
    if not np.isfinite(nominal_nm) or nominal_nm <= 0:
        raise InputError(f"`nominal_nm` must be a positive wavelength, was {nominal_nm}")
    if not np.isfinite(tolerance_nm) or tolerance_nm < 0:
        raise InputError(f"`tolerance_nm` must be zero or positive, was {tolerance_nm}")
    offset = float(measured_nm - nominal_nm)
    return LaserCheck(
        nominal_nm=float(nominal_nm),
        tolerance_nm=float(tolerance_nm),
        measured_nm=float(measured_nm),
        measured_uncertainty_nm=float(measured_uncertainty_nm),
        offset_nm=offset,
        within_tolerance=bool(abs(offset) <= tolerance_nm),
        label=label,
    )


def source_metrics(
    spectrum: Spectrum,
    *,
    white: bool | None = None,
    threshold_fraction: float = 0.02,
    cct_method: str = "Ohno 2013",
    laser_nominal_nm: float | None = None,
    laser_tolerance_nm: float | None = None,
    laser_label: str = "",
) -> SourceMetrics:
    """Peak, centroid, FWHM, chromaticity, dominant wavelength and CCT of a source.

    Parameters
    ----------
    spectrum : Spectrum
        Calibrated, background-subtracted and preferably response-corrected
        emission spectrum (colour figures are only as good as the response
        correction).
    white : bool or None
        True: the source is white; CCT and Duv are required (an error when
        the chromaticity has none) and dominant wavelength and FWHM are not
        reported. False: a coloured source; no CCT. None (default): decided
        from the data (|Duv| <= 0.05 and the central 90% of the energy spread
        over at least 100 nm).
    threshold_fraction : float
        Samples below this fraction of the peak are left out of the centroid
        so that baseline noise far from the line does not pull it.
    cct_method : {"Ohno 2013", "Robertson 1968"}
    laser_nominal_nm, laser_tolerance_nm : float, optional
        Nominal wavelength and tolerance of a laser; the peak is compared
        with them.

    Raises
    ------
    AnalysisError
        No signal above zero; or ``white=True`` and the chromaticity has no
        CCT.
    """
    spectrum = require_calibrated(spectrum)
    if not 0 <= threshold_fraction < 1:
        raise InputError(f"`threshold_fraction` must be in [0, 1), was {threshold_fraction}")
    wl = spectrum.wavelength_nm
    y = np.where(np.isfinite(spectrum.intensity), spectrum.intensity, np.nan)
    sigma = positive_uncertainty(spectrum)
    if not np.any(y > 0):
        raise AnalysisError("spectrum has no signal above zero; check the source is on and the dark frame was subtracted")
    peak_value = float(np.nanmax(y))
    noise = float(np.median(sigma))
    if peak_value < 5 * noise:
        raise AnalysisError(
            f"the brightest sample is only {peak_value / noise:.1f} sigma above zero (need 5); "
            "increase the exposure or stack more frames"
        )
    if np.any(spectrum.saturated & (y > 0.5 * peak_value)):
        warn_degraded("the peak of the source is saturated: peak, FWHM and colour are biased; reduce the exposure")

    peak_nm, peak_err, peak_index = _peak(wl, y, sigma)
    peak_err = float(np.hypot(peak_err, _calibration_sigma(spectrum, peak_nm)))

    use = np.isfinite(y) & (y > threshold_fraction * peak_value)
    weights = np.where(use, y, 0.0)
    total = float(weights.sum())
    centroid = float(np.sum(weights * wl) / total)
    centroid_err = float(np.sqrt(np.sum(((wl - centroid) / total) ** 2 * np.where(use, sigma, 0.0) ** 2)))
    centroid_err = float(np.hypot(centroid_err, _calibration_sigma(spectrum, centroid)))

    colour_point = chromaticity(spectrum)
    spread = _energy_spread(wl, y)
    if colour_point.visible_coverage_fraction < 0.99 and spread > 50:
        warn_degraded(
            f"the spectrum covers only {100 * colour_point.visible_coverage_fraction:.0f}% of the CIE luminosity "
            f"range ({wl[0]:.0f}-{wl[-1]:.0f} nm); chromaticity and CCT of a broad source are then approximate"
        )

    temperature = None
    try:
        temperature = correlated_colour_temperature(
            colour_point.cie_x, colour_point.cie_y, xy_covariance=colour_point.xy_covariance, method=cct_method
        )
    except AnalysisError:
        if white:
            raise
    except InputError as exc:  # noise pushed (x, y) off the diagram: a narrow, faint source
        if white:
            raise AnalysisError(f"no correlated colour temperature: {exc}") from None
    if white is None:
        is_white = temperature is not None and spread >= WHITE_MIN_SPREAD_NM
    else:
        is_white = bool(white)
    if not is_white:
        temperature = None

    fwhm = fwhm_err = limited = None
    if not is_white:
        left = _half_maximum_crossing(wl, y, sigma, peak_index, -1, 0.5 * peak_value, 0.5 * sigma[peak_index])
        right = _half_maximum_crossing(wl, y, sigma, peak_index, +1, 0.5 * peak_value, 0.5 * sigma[peak_index])
        if left is not None and right is not None:
            fwhm = right[0] - left[0]
            fwhm_err = float(np.hypot(left[1], right[1]))
            step = float(np.median(np.diff(wl)))
            limited = bool(fwhm < 3 * step)
        else:
            warn_degraded("the peak does not fall to half maximum inside the spectrum; FWHM is not reported")

    dominant = None
    if not is_white:
        try:
            dominant = dominant_wavelength(colour_point.cie_x, colour_point.cie_y, white_point_xy=EQUAL_ENERGY_WHITE_XY)
        except AnalysisError:
            dominant = None

    laser = None
    if laser_nominal_nm is not None:
        if laser_tolerance_nm is None:
            raise InputError("`laser_tolerance_nm` is needed with `laser_nominal_nm`; give the tolerance from the laser's label or data sheet")
        laser = laser_check(
            peak_nm,
            measured_uncertainty_nm=peak_err,
            nominal_nm=laser_nominal_nm,
            tolerance_nm=laser_tolerance_nm,
            label=laser_label,
        )

    return SourceMetrics(
        peak_nm=peak_nm,
        peak_uncertainty_nm=peak_err,
        centroid_nm=centroid,
        centroid_uncertainty_nm=centroid_err,
        fwhm_nm=None if fwhm is None else float(fwhm),
        fwhm_uncertainty_nm=fwhm_err,
        fwhm_resolution_limited=limited,
        dominant_wavelength_nm=None if dominant is None else dominant.dominant_wavelength_nm,
        complementary_wavelength=None if dominant is None else dominant.complementary,
        excitation_purity=None if dominant is None else dominant.excitation_purity,
        cie_x=colour_point.cie_x,
        cie_y=colour_point.cie_y,
        cie_x_uncertainty=colour_point.cie_x_uncertainty,
        cie_y_uncertainty=colour_point.cie_y_uncertainty,
        cct_k=None if temperature is None else temperature.cct_k,
        cct_uncertainty_k=None if temperature is None else temperature.cct_uncertainty_k,
        duv=None if temperature is None else temperature.duv,
        duv_uncertainty=None if temperature is None else temperature.duv_uncertainty,
        is_white=is_white,
        energy_spread_nm=spread,
        visible_coverage_fraction=colour_point.visible_coverage_fraction,
        laser=laser,
        cct_method=None if temperature is None else temperature.method,
    )
