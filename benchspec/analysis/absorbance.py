"""Transmittance, absorbance and Beer-Lambert concentration.

T = (S - D) / (R - D) and A = -log10 T for a sample S against a blank
(reference) R with a dark D; the uncertainty of each follows from the
spectra's per-sample noise. A Beer-Lambert calibration A = a + b c is
fitted to standards; unknown concentrations come from its inverse, with
the uncertainty of the fit and of the unknown's own absorbance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import AnalysisError, InputError
from ..spectrum import Spectrum
from ._common import interpolate_onto, positive_uncertainty, require_calibrated, warn_degraded

__all__ = [
    "AbsorbanceSpectrum",
    "BandAbsorbance",
    "BeerLambertFit",
    "ConcentrationEstimate",
    "DEFAULT_STRAY_LIGHT_FRACTION",
    "absorbance_spectrum",
    "band_absorbance",
    "fit_beer_lambert",
    "predict_concentration",
    "molar_absorptivity",
]

#: Stray light as a fraction of the blank's peak signal assumed when the
#: blank has no dark region to measure it from: 0.1-1% is typical of a film
#: grating in front of a webcam (common practice, no source).
DEFAULT_STRAY_LIGHT_FRACTION = 0.002

#: Stray light limits the absorbance once it is 1/10 of the light through
#: the sample: the reading is then low by about 0.04 (log10 1.1) (common
#: practice, no source).
_STRAY_MARGIN = 10.0

#: An absorbance is measurable while the sample's signal is this many noise
#: sigmas above zero (the 3-sigma detection criterion).
_NOISE_MARGIN = 3.0


@dataclass(frozen=True)
class AbsorbanceSpectrum:
    """Transmittance and absorbance on the sample's wavelength grid.

    ``valid`` is False where the blank is too weak, saturated or missing,
    or the sample is saturated; those samples hold NaN.
    ``beyond_measurable`` is True where the absorbance exceeds
    ``max_measurable_absorbance`` at that wavelength (and is more than 3
    sigma above zero), or where no light passed the sample (T <= 0, the
    absorbance is then NaN): stray light or noise, not the sample, sets the
    reading.
    """

    wavelength_nm: np.ndarray
    transmittance: np.ndarray
    transmittance_uncertainty: np.ndarray
    absorbance: np.ndarray
    absorbance_uncertainty: np.ndarray
    valid: np.ndarray
    beyond_measurable: np.ndarray
    max_measurable_absorbance: np.ndarray
    stray_light_fraction: float
    stray_light_source: str

    @property
    def peak_max_measurable_absorbance(self) -> float:
        """The largest measurable absorbance anywhere (where the blank is brightest)."""
        finite = self.max_measurable_absorbance[np.isfinite(self.max_measurable_absorbance)]
        return float(finite.max()) if finite.size else float("nan")


def _estimate_stray_fraction(blank_signal, valid):
    """Stray light from the blank itself: its level where the lamp or camera gives no light.

    Samples under 0.5% of the blank's peak are taken as regions that only
    stray light reaches (an upper bound: some may be real light); with fewer
    than 5 of them the default is used.
    """
    peak = float(np.nanmax(blank_signal[valid])) if np.any(valid) else 0.0
    dark_region = np.isfinite(blank_signal) & (blank_signal < 0.005 * peak)
    if np.count_nonzero(dark_region) >= 5 and peak > 0:
        level = float(np.median(np.clip(blank_signal[dark_region], 0.0, None))) / peak
        return level, "measured from the blank's dark region"
    return DEFAULT_STRAY_LIGHT_FRACTION, "assumed (common practice for a film grating and webcam)"


def absorbance_spectrum(
    sample: Spectrum,
    *,
    blank: Spectrum,
    dark: Spectrum | None = None,
    stray_light_fraction: float | None = None,
    min_blank_snr: float = 10.0,
) -> AbsorbanceSpectrum:
    """Transmittance and absorbance of ``sample`` against ``blank``.

    Parameters
    ----------
    sample, blank : Spectrum
        Calibrated spectra of the light through the sample and through the
        blank (solvent in the same cuvette), same exposure.
    dark : Spectrum, optional
        Spectrum with the lamp blocked, subtracted from both. Omit when the
        spectra are already dark-subtracted.
    stray_light_fraction : float, optional
        Stray light as a fraction of the blank's peak; default: measured from
        the blank where it is below 0.5% of its peak, else 0.002.
    min_blank_snr : float
        Samples where the blank's signal is below this many sigma are invalid.

    Returns
    -------
    AbsorbanceSpectrum

    Raises
    ------
    AnalysisError
        Blank zero or saturated everywhere; sample brighter than blank
        (transmittance above 1 beyond noise) over more than 10% of the
        valid range; sample darker than the dark (negative transmittance)
        over more than 10% of it.

    Notes
    -----
    T = (S - D) / (R - D); var T = [var S + T^2 var R + (1 - T)^2 var D] / (R - D)^2;
    A = -log10 T and sigma_A = sigma_T / (T ln 10).
    The largest measurable absorbance at each wavelength is the smaller of
    log10((R - D) / (3 sigma_S)) (the sample's signal 3 sigma above zero) and
    log10((R - D) / (10 f R_peak)) (stray light, a fraction f of the blank's
    peak, a tenth of the transmitted light).
    """
    sample = require_calibrated(sample, name="sample")
    blank = require_calibrated(blank, name="blank")
    wl = sample.wavelength_nm
    s = np.array(sample.intensity, dtype=np.float64)
    s_sigma = positive_uncertainty(sample)
    r, r_sigma, r_saturated = interpolate_onto(blank, wl, name="blank")
    r_sigma = np.where(np.isfinite(r_sigma) & (r_sigma > 0), r_sigma, np.nanmedian(positive_uncertainty(blank)))
    if dark is not None:
        dark = require_calibrated(dark, name="dark")
        d, d_sigma, _ = interpolate_onto(dark, wl, name="dark")
        d_sigma = np.where(np.isfinite(d_sigma), d_sigma, 0.0)
    else:
        d, d_sigma = np.zeros_like(s), np.zeros_like(s)

    blank_signal = r - d
    blank_noise = np.hypot(r_sigma, d_sigma)
    with np.errstate(invalid="ignore"):
        strong_blank = np.isfinite(blank_signal) & (blank_signal > min_blank_snr * blank_noise)
    if not np.any(np.isfinite(blank_signal) & (blank_signal > 0)):
        raise AnalysisError(
            "the blank is zero everywhere (after the dark is subtracted); check the lamp is on, the cuvette is in the beam "
            "and the blank and dark files are not swapped"
        )
    if np.all(r_saturated | ~strong_blank):
        if np.any(r_saturated):
            raise AnalysisError(
                f"the blank is saturated at {int(np.count_nonzero(r_saturated))} of {r_saturated.size} samples and too weak elsewhere; "
                "reduce the exposure or the lamp brightness and record blank and sample again"
            )
        raise AnalysisError(
            f"the blank is below {min_blank_snr:g} sigma everywhere; increase the exposure or stack more frames"
        )
    valid = strong_blank & ~r_saturated & ~sample.saturated & np.isfinite(s)
    if np.count_nonzero(r_saturated) > 0:
        warn_degraded(
            f"the blank is saturated at {int(np.count_nonzero(r_saturated))} samples; absorbance there is not reported - reduce the exposure"
        )

    with np.errstate(invalid="ignore", divide="ignore"):
        t = (s - d) / blank_signal
        t_var = (s_sigma**2 + t**2 * r_sigma**2 + (1 - t) ** 2 * d_sigma**2) / blank_signal**2
    t_sigma = np.sqrt(t_var)
    t = np.where(valid, t, np.nan)
    t_sigma = np.where(valid, t_sigma, np.nan)

    n_valid = int(np.count_nonzero(valid))
    with np.errstate(invalid="ignore"):
        brighter = valid & (t > 1 + 3 * t_sigma + 0.02)
        negative = valid & (t < -3 * t_sigma)
    if np.count_nonzero(brighter) > 0.1 * n_valid:
        worst = float(np.nanmax(t[brighter]))
        raise AnalysisError(
            f"the sample is brighter than the blank at {int(np.count_nonzero(brighter))} of {n_valid} samples "
            f"(transmittance up to {worst:.2f}); the files may be swapped, or the lamp or exposure changed between them"
        )
    if np.count_nonzero(negative) > 0.1 * n_valid:
        raise AnalysisError(
            f"negative transmittance at {int(np.count_nonzero(negative))} of {n_valid} samples: the sample is darker than the dark; "
            "record the dark with the same exposure, or check the sample and dark files are not swapped"
        )

    if stray_light_fraction is None:
        stray, stray_source = _estimate_stray_fraction(blank_signal, strong_blank)
    else:
        if not 0 <= stray_light_fraction < 1:
            raise InputError(f"`stray_light_fraction` must be in [0, 1), was {stray_light_fraction}")
        stray, stray_source = float(stray_light_fraction), "given"
    blank_peak = float(np.nanmax(blank_signal[valid]))
    sample_floor = np.hypot(s_sigma, d_sigma)
    with np.errstate(invalid="ignore", divide="ignore"):
        noise_limit = np.log10(blank_signal / (_NOISE_MARGIN * sample_floor))
        stray_limit = np.log10(blank_signal / (_STRAY_MARGIN * stray * blank_peak)) if stray > 0 else np.full_like(s, np.inf)
        max_measurable = np.where(valid, np.minimum(noise_limit, stray_limit), np.nan)
        absorbance = np.where(valid & (t > 0), -np.log10(t), np.nan)
        absorbance_sigma = np.where(valid & (t > 0), t_sigma / (t * np.log(10)), np.nan)
        # Beyond: above the limit and clearly above zero (a reading of 0 +- noise at a
        # dim edge is not stray-limited), or no light through the sample at all.
        beyond = valid & (((absorbance > max_measurable) & (absorbance > 3 * absorbance_sigma)) | ~(t > 0))
    if np.any(beyond):
        lo, hi = wl[beyond].min(), wl[beyond].max()
        warn_degraded(
            f"absorbance exceeds what this setup can measure at {int(np.count_nonzero(beyond))} samples ({lo:.0f}-{hi:.0f} nm; "
            f"limit about {np.nanmax(max_measurable):.1f} at best, set by stray light and noise); dilute the sample or use a shorter path"
        )
    return AbsorbanceSpectrum(
        wavelength_nm=wl.copy(),
        transmittance=t,
        transmittance_uncertainty=t_sigma,
        absorbance=absorbance,
        absorbance_uncertainty=absorbance_sigma,
        valid=valid,
        beyond_measurable=beyond,
        max_measurable_absorbance=max_measurable,
        stray_light_fraction=float(stray),
        stray_light_source=stray_source,
    )


@dataclass(frozen=True)
class BandAbsorbance:
    """Mean absorbance over a band (or at one wavelength)."""

    absorbance: float
    absorbance_uncertainty: float
    band_nm: tuple[float, float]
    n_samples: int
    beyond_measurable: bool


def band_absorbance(result: AbsorbanceSpectrum, *, wavelength_nm: float | None = None, band_nm=None) -> BandAbsorbance:
    """Absorbance at one wavelength (linear interpolation) or averaged over a band.

    Give exactly one of ``wavelength_nm`` or ``band_nm=(low, high)``. The
    band mean's uncertainty treats samples as independent.

    Raises
    ------
    AnalysisError
        When the wavelength or band has no valid absorbance.
    """
    if (wavelength_nm is None) == (band_nm is None):
        raise InputError("give exactly one of `wavelength_nm` or `band_nm`")
    wl = result.wavelength_nm
    a, sa = result.absorbance, result.absorbance_uncertainty
    good = np.isfinite(a) & np.isfinite(sa)
    if wavelength_nm is not None:
        w = float(wavelength_nm)
        if not (wl[0] <= w <= wl[-1]):
            raise InputError(f"wavelength {w:g} nm is outside the spectrum ({wl[0]:.1f}-{wl[-1]:.1f} nm)")
        j = int(np.clip(np.searchsorted(wl, w), 1, wl.size - 1))
        i = j - 1
        if not (good[i] and good[j]):
            raise AnalysisError(f"no valid absorbance at {w:g} nm (blank too weak or saturated there); choose another wavelength")
        f = (w - wl[i]) / (wl[j] - wl[i])
        value = (1 - f) * a[i] + f * a[j]
        err = np.hypot((1 - f) * sa[i], f * sa[j])
        return BandAbsorbance(
            absorbance=float(value),
            absorbance_uncertainty=float(err),
            band_nm=(w, w),
            n_samples=2,
            beyond_measurable=bool(result.beyond_measurable[i] or result.beyond_measurable[j]),
        )
    low, high = (float(v) for v in band_nm)
    if not low < high:
        raise InputError(f"`band_nm` must be (low, high) with low < high, was ({low:g}, {high:g})")
    inside = (wl >= low) & (wl <= high)
    use = inside & good
    if not np.any(use):
        raise AnalysisError(f"no valid absorbance in {low:g}-{high:g} nm (outside the spectrum, or blank too weak there)")
    n = int(np.count_nonzero(use))
    if n < np.count_nonzero(inside):
        warn_degraded(f"{int(np.count_nonzero(inside)) - n} samples in {low:g}-{high:g} nm are invalid and left out of the band mean")
    return BandAbsorbance(
        absorbance=float(np.mean(a[use])),
        absorbance_uncertainty=float(np.sqrt(np.sum(sa[use] ** 2)) / n),
        band_nm=(low, high),
        n_samples=n,
        beyond_measurable=bool(np.any(result.beyond_measurable[use])),
    )


@dataclass(frozen=True)
class BeerLambertFit:
    """Straight-line Beer-Lambert calibration A = intercept + slope * c.

    ``slope_per_concentration`` is epsilon * path length in A per
    concentration unit. ``residual_sd`` is s_y/x, the standard deviation
    of the absorbances about the line (n - 2 degrees of freedom); with two
    standards it is the measured absorbance uncertainty instead.
    ``limit_of_detection`` = 3.3 sigma / slope and ``limit_of_quantitation``
    = 10 sigma / slope (ICH Q2(R1)), sigma being ``residual_sd``.
    """

    slope_per_concentration: float
    slope_uncertainty: float
    intercept: float
    intercept_uncertainty: float
    slope_intercept_covariance: float
    r_squared: float
    residual_sd: float
    degrees_of_freedom: int
    limit_of_detection: float
    limit_of_quantitation: float
    concentrations: np.ndarray
    absorbances: np.ndarray
    residuals: np.ndarray
    concentration_unit: str
    through_origin: bool


def fit_beer_lambert(
    concentrations,
    absorbances,
    *,
    absorbance_uncertainties=None,
    through_origin: bool = False,
    concentration_unit: str = "",
) -> BeerLambertFit:
    """Least-squares Beer-Lambert line through standards.

    Parameters
    ----------
    concentrations, absorbances : array-like, shape (n,)
        The standards (n >= 2; n >= 3 when no uncertainties are given).
    absorbance_uncertainties : array-like, optional
        1-sigma of each absorbance; used as sigma when there are too few
        standards to estimate the scatter (and never less than it).
    through_origin : bool
        Fit A = slope * c (no intercept), e.g. when the blank is exact.
    concentration_unit : str
        Unit label carried into results ("mol/L", "mg/L", ...).

    Raises
    ------
    AnalysisError
        Fewer than 2 standards; all at one concentration; too few to
        estimate the scatter without uncertainties; a slope that is not
        positive.

    Notes
    -----
    Ordinary least squares; the standard errors follow from s_y/x (Miller &
    Miller, Statistics and Chemometrics for Analytical Chemistry, ch. 5).
    """
    c = np.asarray(concentrations, dtype=np.float64).ravel()
    a = np.asarray(absorbances, dtype=np.float64).ravel()
    if c.size != a.size:
        raise InputError(f"{c.size} concentrations but {a.size} absorbances; give one absorbance per standard")
    if c.size < 2:
        raise AnalysisError(f"a Beer-Lambert calibration needs at least 2 standards, got {c.size}; measure more standards")
    if not (np.all(np.isfinite(c)) and np.all(np.isfinite(a))):
        raise InputError("concentrations and absorbances must be finite numbers")
    if np.any(c < 0):
        raise InputError("concentrations must not be negative")
    if np.ptp(c) == 0:
        raise AnalysisError("all standards have the same concentration; a calibration needs at least two different ones")
    sigma_measured = None
    if absorbance_uncertainties is not None:
        sigma_measured = np.asarray(absorbance_uncertainties, dtype=np.float64).ravel()
        if sigma_measured.size != c.size or np.any(~np.isfinite(sigma_measured)) or np.any(sigma_measured < 0):
            raise InputError("`absorbance_uncertainties` must be one finite, non-negative value per standard")
    n_params = 1 if through_origin else 2
    dof = c.size - n_params
    if through_origin:
        sxx = float(np.sum(c * c))
        slope = float(np.sum(c * a) / sxx) if sxx > 0 else float("nan")
        intercept = 0.0
        residuals = a - slope * c
    else:
        c_mean, a_mean = c.mean(), a.mean()
        sxx = float(np.sum((c - c_mean) ** 2))
        slope = float(np.sum((c - c_mean) * (a - a_mean)) / sxx) if sxx > 0 else float("nan")
        intercept = float(a_mean - slope * c_mean)
        residuals = a - (intercept + slope * c)
    scatter = float(np.sqrt(np.sum(residuals**2) / dof)) if dof > 0 else float("nan")
    measured = float(np.sqrt(np.mean(sigma_measured**2))) if sigma_measured is not None else None
    if dof > 0 and measured is not None:
        sigma = max(scatter, measured)
    elif dof > 0:
        sigma = scatter
    elif measured is not None and measured > 0:
        sigma = measured
    else:
        raise AnalysisError(
            f"{c.size} standards leave no degrees of freedom to estimate the scatter; "
            "measure at least 3 standards, or give the absorbance uncertainties"
        )
    if not (sxx > 0 and np.isfinite(slope)):  # concentrations so small their squares underflow
        raise AnalysisError("the concentrations are too small or too close together to fit a line; give them in a larger unit")
    if not slope * float(np.ptp(c)) > 1e-9 * max(float(np.max(np.abs(a))), 1e-300):  # a slope that is only rounding noise
        slope = 0.0
    if not slope > 0:
        raise AnalysisError(
            f"the calibration slope is {slope:.3g} A per unit (not positive): absorbance does not rise with concentration; "
            "check the wavelength or band and the standards' labels"
        )
    if through_origin:
        slope_var = sigma**2 / sxx
        intercept_var = 0.0
        covariance = 0.0
    else:
        slope_var = sigma**2 / sxx
        intercept_var = sigma**2 * (1.0 / c.size + c.mean() ** 2 / sxx)
        covariance = -c.mean() * sigma**2 / sxx
    total = float(np.sum((a - a.mean()) ** 2)) if not through_origin else float(np.sum(a**2))
    r_squared = 1.0 - float(np.sum(residuals**2)) / total if total > 0 else float("nan")
    return BeerLambertFit(
        slope_per_concentration=slope,
        slope_uncertainty=float(np.sqrt(slope_var)),
        intercept=intercept,
        intercept_uncertainty=float(np.sqrt(intercept_var)),
        slope_intercept_covariance=float(covariance),
        r_squared=float(r_squared),
        residual_sd=float(sigma),
        degrees_of_freedom=int(dof),
        limit_of_detection=float(3.3 * sigma / slope),
        limit_of_quantitation=float(10.0 * sigma / slope),
        concentrations=c.copy(),
        absorbances=a.copy(),
        residuals=residuals,
        concentration_unit=concentration_unit,
        through_origin=through_origin,
    )


@dataclass(frozen=True)
class ConcentrationEstimate:
    """Concentration of an unknown from its absorbance (inverse prediction)."""

    concentration: float
    concentration_uncertainty: float
    absorbance: float
    absorbance_uncertainty: float
    below_limit_of_detection: bool
    outside_calibration_range: bool
    concentration_unit: str
    label: str = ""


def predict_concentration(
    fit: BeerLambertFit,
    absorbance: float,
    *,
    absorbance_uncertainty: float | None = None,
    replicates: int = 1,
    label: str = "",
) -> ConcentrationEstimate:
    """Concentration of an unknown, c0 = (A0 - intercept) / slope, with its uncertainty.

    The variance combines the unknown's absorbance uncertainty (at least
    s_y/x / sqrt(replicates), the scatter the standards showed) and the fit's
    covariance (delta method). With the scatter term this is the usual
    inverse-prediction formula (Miller & Miller, eq. 5.9).
    """
    if replicates < 1:
        raise InputError(f"`replicates` must be at least 1, was {replicates}")
    a0 = float(absorbance)
    if not np.isfinite(a0):
        raise InputError(f"absorbance of the unknown must be finite, was {absorbance}")
    scatter = fit.residual_sd / np.sqrt(replicates)
    sigma0 = scatter if absorbance_uncertainty is None else max(float(absorbance_uncertainty), scatter)
    b, a = np.float64(fit.slope_per_concentration), np.float64(fit.intercept)
    with np.errstate(over="ignore", invalid="ignore"):  # numpy floats overflow to inf instead of raising
        c0 = (a0 - a) / b
        variance = (sigma0**2 + fit.intercept_uncertainty**2 + c0**2 * fit.slope_uncertainty**2 + 2 * c0 * fit.slope_intercept_covariance) / b**2
    if not (np.isfinite(c0) and np.isfinite(variance)):
        raise AnalysisError(
            f"absorbance {a0:.3g} lies so far outside the calibration that no concentration can be computed; "
            "check the value, dilute the sample or add standards"
        )
    low, high = float(fit.concentrations.min()), float(fit.concentrations.max())
    span = high - low
    outside = bool(c0 < low - 0.05 * span or c0 > high + 0.05 * span)
    if outside:
        warn_degraded(
            f"unknown {label or ''} at {c0:.3g} {fit.concentration_unit} is outside the standards' range "
            f"({low:.3g}-{high:.3g}); extrapolation - dilute it or add a standard"
        )
    return ConcentrationEstimate(
        concentration=float(c0),
        concentration_uncertainty=float(np.sqrt(max(variance, 0.0))),
        absorbance=a0,
        absorbance_uncertainty=float(sigma0),
        below_limit_of_detection=bool(c0 < fit.limit_of_detection),
        outside_calibration_range=outside,
        concentration_unit=fit.concentration_unit,
        label=label,
    )


def molar_absorptivity(fit: BeerLambertFit, *, path_length_cm: float) -> tuple[float, float]:
    """epsilon = slope / path length, with its uncertainty (units: A per concentration unit per cm)."""
    if not path_length_cm > 0:
        raise InputError(f"`path_length_cm` must be positive, was {path_length_cm}")
    return fit.slope_per_concentration / path_length_cm, fit.slope_uncertainty / path_length_cm
