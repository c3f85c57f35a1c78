"""Absorbance, Beer-Lambert calibration and inverse prediction."""

import numpy as np
import pytest

from benchspec import as_spectrum
from benchspec.analysis.absorbance import (
    absorbance_spectrum,
    band_absorbance,
    fit_beer_lambert,
    molar_absorptivity,
    predict_concentration,
)
from benchspec.errors import AnalysisError, DegradedResultWarning, InputError

WL = np.arange(420.0, 680.0, 0.5)


def lamp_counts(peak=3000.0):
    """An invented halogen-through-webcam blank shape (counts)."""
    return peak * np.exp(-0.5 * ((WL - 550) / 70) ** 2)


def dye_epsilon():
    """An invented dye band: epsilon 1.2e4 L/(mol cm) at 520 nm, 30 nm wide."""
    return 1.2e4 * np.exp(-0.5 * ((WL - 520) / 30) ** 2)


def measured(mean, rng, *, read_noise=2.0):
    sigma = np.sqrt(mean + read_noise**2)
    return as_spectrum(WL, rng.normal(mean, sigma), uncertainty=sigma)


def test_worked_example_epsilon_path_length():
    # Beer-Lambert worked example (A = epsilon l c; numbers chosen for the test):
    # epsilon = 1.5e4 L/(mol cm), l = 1.00 cm, c = 4.0e-5 mol/L -> A = 0.600, T = 10^-0.6 = 0.2512 (25.1%).
    epsilon, path, conc = 1.5e4, 1.0, 4.0e-5
    blank_counts = lamp_counts()
    sample_counts = blank_counts * 10 ** (-epsilon * path * conc)
    noise = np.full(WL.size, 1e-3)
    result = absorbance_spectrum(
        as_spectrum(WL, sample_counts, uncertainty=noise), blank=as_spectrum(WL, blank_counts, uncertainty=noise)
    )
    assert np.allclose(result.absorbance, 0.600, atol=1e-9)
    assert np.allclose(result.transmittance, 0.2512, atol=1e-4)
    # Standards at 1-5 x 1e-5 mol/L give back epsilon = slope / path.
    concentrations = np.array([1, 2, 3, 4, 5]) * 1e-5
    fit = fit_beer_lambert(concentrations, epsilon * path * concentrations, absorbance_uncertainties=np.full(5, 0.002))
    value, err = molar_absorptivity(fit, path_length_cm=path)
    assert value == pytest.approx(epsilon, rel=1e-9)
    assert fit.r_squared == pytest.approx(1.0)
    assert err > 0  # the stated absorbance uncertainty still gives a slope uncertainty


def test_uncertainty_propagation_matches_monte_carlo(rng):
    # var T = [var S + T^2 var R + (1 - T)^2 var D] / (R - D)^2, checked by simulation.
    blank_mean, sample_mean, dark_mean = 2000.0, 500.0, 50.0
    s_sig, r_sig, d_sig = 22.0, 45.0, 5.0
    n = 20000
    t = (rng.normal(sample_mean, s_sig, n) - (d := rng.normal(dark_mean, d_sig, n))) / (rng.normal(blank_mean, r_sig, n) - d)
    wl = np.array([500.0, 501, 502, 503, 504])
    one = lambda v, s: as_spectrum(wl, np.full(5, v), uncertainty=np.full(5, s))
    result = absorbance_spectrum(one(sample_mean, s_sig), blank=one(blank_mean, r_sig), dark=one(dark_mean, d_sig))
    assert result.transmittance_uncertainty[0] == pytest.approx(t.std(), rel=0.05)
    a = -np.log10(t)
    assert result.absorbance_uncertainty[0] == pytest.approx(a.std(), rel=0.05)


def test_dye_dilution_series_recovered_within_uncertainty():
    # Simulated dilution series (invented dye, 1 cm cell): unknowns recovered within their stated
    # uncertainty at the expected rate (68% within 1 sigma, 95% within 2 sigma; 150 series).
    generator = np.random.default_rng(1234)
    standards = np.array([1.0, 2.0, 4.0, 6.0, 8.0]) * 1e-5
    epsilon = dye_epsilon()
    blank_mean = lamp_counts()
    pulls = []
    for _ in range(150):
        blank = measured(blank_mean, generator)
        readings = []
        for c in standards:
            result = absorbance_spectrum(measured(blank_mean * 10 ** (-epsilon * c), generator), blank=blank)
            readings.append(band_absorbance(result, band_nm=(510, 530)))
        fit = fit_beer_lambert(standards, [r.absorbance for r in readings],
                               absorbance_uncertainties=[r.absorbance_uncertainty for r in readings], concentration_unit="mol/L")
        c_true = generator.uniform(1.5e-5, 7.5e-5)
        unknown = band_absorbance(absorbance_spectrum(measured(blank_mean * 10 ** (-epsilon * c_true), generator), blank=blank),
                                  band_nm=(510, 530))
        estimate = predict_concentration(fit, unknown.absorbance, absorbance_uncertainty=unknown.absorbance_uncertainty)
        pulls.append((estimate.concentration - c_true) / estimate.concentration_uncertainty)
    pulls = np.abs(np.array(pulls))
    # The blank is shared by standards and unknown (a correlation the simple formula ignores), so the
    # stated uncertainty may be a little conservative; it must not be optimistic.
    assert 0.62 <= np.mean(pulls < 1) <= 0.85
    assert np.mean(pulls < 2) >= 0.92


def test_inverse_prediction_matches_the_textbook_formula():
    # Miller & Miller, Statistics and Chemometrics for Analytical Chemistry, eq. 5.9 (from memory):
    # s_x0 = (s_y/x / b) sqrt(1/m + 1/n + (y0 - ybar)^2 / (b^2 sum (x - xbar)^2)).
    c = np.array([0.0, 2.0, 4.0, 6.0, 8.0, 10.0])
    a = np.array([0.009, 0.158, 0.301, 0.472, 0.577, 0.739])
    fit = fit_beer_lambert(c, a)
    y0, m = 0.400, 3
    estimate = predict_concentration(fit, y0, replicates=m)
    b, s = fit.slope_per_concentration, fit.residual_sd
    expected = (s / b) * np.sqrt(1 / m + 1 / c.size + (y0 - a.mean()) ** 2 / (b**2 * np.sum((c - c.mean()) ** 2)))
    assert estimate.concentration_uncertainty == pytest.approx(expected, rel=1e-9)
    # ICH Q2(R1): limit of detection 3.3 sigma / slope, quantitation 10 sigma / slope.
    assert fit.limit_of_detection == pytest.approx(3.3 * s / b)
    assert fit.limit_of_quantitation == pytest.approx(10 * s / b)
    assert 0.99 < fit.r_squared < 1.0
    assert fit.degrees_of_freedom == 4


def test_stray_light_caps_the_measurable_absorbance(rng):
    # A dense sample (true A up to 3.6) reads beyond what an 8-bit-like blank can measure.
    blank_mean = lamp_counts(peak=240.0)
    blank = measured(blank_mean, rng)
    with pytest.warns(DegradedResultWarning, match="exceeds what this setup can measure"):
        result = absorbance_spectrum(measured(blank_mean * 10 ** (-dye_epsilon() * 3e-4), rng), blank=blank)
    assert 1.2 < result.peak_max_measurable_absorbance < 2.5  # common practice: 1.5-2 on cheap setups
    assert result.beyond_measurable[np.argmin(np.abs(WL - 520))]
    assert not result.beyond_measurable[np.argmin(np.abs(WL - 660))]


def test_stray_light_given_by_the_user_sets_the_limit(rng):
    blank = as_spectrum(WL, lamp_counts(1e6), uncertainty=np.full(WL.size, 1.0))
    result = absorbance_spectrum(blank, blank=blank, stray_light_fraction=0.01)
    # At the blank's peak the stray limit is log10(1 / (10 * 0.01)) = 1.
    assert result.peak_max_measurable_absorbance == pytest.approx(1.0, abs=1e-3)
    assert result.stray_light_source == "given"


def test_sample_brighter_than_blank_is_an_error(rng):
    blank = measured(lamp_counts(), rng)
    with pytest.raises(AnalysisError, match="brighter than the blank"):
        absorbance_spectrum(measured(1.5 * lamp_counts(), rng), blank=blank)


def test_negative_transmittance_is_an_error(rng):
    dark = measured(np.full(WL.size, 200.0), rng)
    blank = measured(lamp_counts() + 200.0, rng)
    sample = measured(np.full(WL.size, 20.0), rng)  # darker than the dark
    with pytest.raises(AnalysisError, match="negative transmittance"):
        absorbance_spectrum(sample, blank=blank, dark=dark)


def test_zero_or_saturated_blank_is_an_error(rng):
    sample = measured(lamp_counts(), rng)
    zero = as_spectrum(WL, np.zeros(WL.size), uncertainty=np.ones(WL.size))
    with pytest.raises(AnalysisError, match="blank is zero everywhere"):
        absorbance_spectrum(sample, blank=zero)
    clipped = as_spectrum(WL, np.full(WL.size, 255.0), uncertainty=np.ones(WL.size)).with_(saturated=np.ones(WL.size, bool))
    with pytest.raises(AnalysisError, match="blank is saturated"):
        absorbance_spectrum(sample, blank=clipped)


def test_too_few_standards():
    with pytest.raises(AnalysisError, match="at least 2 standards, got 1"):
        fit_beer_lambert([1.0], [0.1])
    with pytest.raises(AnalysisError, match="no degrees of freedom"):
        fit_beer_lambert([1.0, 2.0], [0.1, 0.2])
    with pytest.raises(AnalysisError, match="same concentration"):
        fit_beer_lambert([1.0, 1.0, 1.0], [0.1, 0.11, 0.09])
    # Two standards with measured uncertainties are enough.
    fit = fit_beer_lambert([1.0, 2.0], [0.1, 0.2], absorbance_uncertainties=[0.005, 0.005])
    assert fit.slope_per_concentration == pytest.approx(0.1)
    with pytest.raises(AnalysisError, match="not positive"):
        fit_beer_lambert([1.0, 2.0, 3.0], [0.3, 0.2, 0.1])


def test_band_and_wavelength_reading(rng):
    blank = measured(lamp_counts(), rng)
    result = absorbance_spectrum(measured(lamp_counts() * 10 ** (-dye_epsilon() * 5e-5), rng), blank=blank)
    at = band_absorbance(result, wavelength_nm=520.25)
    band = band_absorbance(result, band_nm=(515, 525))
    assert at.absorbance == pytest.approx(0.6, abs=5 * at.absorbance_uncertainty)
    assert band.absorbance_uncertainty < at.absorbance_uncertainty
    with pytest.raises(InputError, match="exactly one"):
        band_absorbance(result)
    with pytest.raises(InputError, match="outside the spectrum"):
        band_absorbance(result, wavelength_nm=300.0)


def test_extrapolation_is_flagged():
    fit = fit_beer_lambert([1.0, 2.0, 3.0, 4.0], [0.10, 0.21, 0.29, 0.40], concentration_unit="mg/L")
    with pytest.warns(DegradedResultWarning, match="outside the standards' range"):
        estimate = predict_concentration(fit, 0.9)
    assert estimate.outside_calibration_range
    assert predict_concentration(fit, 0.0).below_limit_of_detection
