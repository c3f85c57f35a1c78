"""Balmer lines to the Rydberg constant, checked against CODATA (scipy.constants)."""

import dataclasses
import warnings

import numpy as np
import pytest
from scipy import constants, stats

from benchspec import as_spectrum
from benchspec.analysis.rydberg import (
    BOHR_MODEL_RELATIVE,
    SERIES_REJECTION_PROBABILITY,
    BalmerLine,
    assign_balmer_series,
    codata_rydberg_hydrogen_per_m,
    expected_balmer_air_nm,
    find_balmer_lines,
    fit_rydberg,
    rydberg_from_spectrum,
)
from benchspec.errors import AnalysisError, DegradedResultWarning, InputError
from benchspec.physics import air_to_vacuum_nm

# NIST Atomic Spectra Database, H I Balmer lines, air wavelengths in nm
# (values as listed in the project's design notes, from memory of NIST ASD).
NIST_BALMER_AIR_NM = {3: 656.279, 4: 486.135, 5: 434.047, 6: 410.174}


def hydrogen_spectrum(rng, *, centres, step=0.4, fwhm=1.5, peak=2000.0, background=30.0):
    """A synthetic H-tube spectrum: Gaussian lines with Poisson noise (invented for the test)."""
    wl = np.arange(380.0, 700.0, step)
    mean = np.full(wl.size, background)
    sigma = fwhm / (2 * np.sqrt(2 * np.log(2)))
    for n, amplitude in {3: 1.0, 4: 0.45, 5: 0.2, 6: 0.1}.items():
        mean = mean + peak * amplitude * np.exp(-0.5 * ((wl - centres[n]) / sigma) ** 2)
    counts = rng.poisson(mean).astype(float)
    return as_spectrum(wl, counts, uncertainty=np.sqrt(np.maximum(mean, 1.0)))


def test_codata_rydberg_for_hydrogen():
    # CODATA via scipy.constants: R_H = R_inf / (1 + m_e/m_p).
    r_inf = constants.physical_constants["Rydberg constant"][0]
    ratio = constants.m_e / constants.m_p
    value, err = codata_rydberg_hydrogen_per_m()
    assert value == pytest.approx(r_inf / (1 + ratio), rel=1e-12)
    assert 0 < err < 1e-3
    assert value == pytest.approx(10967758.34, abs=0.05)  # R_H, from memory (CODATA 2018)


def test_expected_lines_match_nist_air_wavelengths():
    # Bohr levels with R_H, converted to air with Edlén 1966, land within 0.015 nm of NIST ASD
    # (the rest is fine structure, far below a webcam's resolution).
    for n, nist in NIST_BALMER_AIR_NM.items():
        assert expected_balmer_air_nm(n) == pytest.approx(nist, abs=0.015)
    # Design notes check value: H-alpha 656.279 nm air is 656.46 nm in vacuum (NIST ASD).
    assert air_to_vacuum_nm(656.279) == pytest.approx(656.46, abs=0.005)


def test_rydberg_from_nist_positioned_lines_agrees_with_codata(rng):
    # Lines placed at the NIST ASD air wavelengths: the fitted R_H is within its uncertainty of CODATA.
    result = rydberg_from_spectrum(hydrogen_spectrum(rng, centres=NIST_BALMER_AIR_NM, step=0.5, fwhm=2.0, peak=800.0))
    assert [l.name for l in result.lines] == ["H-alpha", "H-beta", "H-gamma", "H-delta"]
    assert [l.upper_level for l in result.lines] == [3, 4, 5, 6]
    assert abs(result.difference_sigma) < 2.0
    assert abs(result.relative_difference) < 1e-4
    assert result.rydberg_per_m == pytest.approx(codata_rydberg_hydrogen_per_m()[0], abs=3 * result.uncertainty_per_m)


@pytest.mark.filterwarnings("ignore::benchspec.errors.DegradedResultWarning")  # chance p < 0.01 fits are expected in 300
def test_pull_distribution_has_unit_width():
    # Honest uncertainty: over many seeds (R_H - CODATA) / sigma has mean ~0 and width ~1.
    # Lines at the Bohr positions from the CODATA R_H, so the model is exact and only noise remains.
    centres = {n: expected_balmer_air_nm(n) for n in (3, 4, 5, 6)}
    generator = np.random.default_rng(77)
    results = [rydberg_from_spectrum(hydrogen_spectrum(generator, centres=centres)) for _ in range(300)]
    pulls = np.array([r.difference_sigma for r in results])
    # 300 draws: the standard deviation of a unit normal's sample SD is ~0.04.
    assert 0.88 < pulls.std() < 1.12
    assert abs(pulls.mean()) < 0.2
    # The series assignment leaves out a real line no more often than its stated rate: two tests per
    # line (Bohr wavelength, the other lines' prediction) at SERIES_REJECTION_PROBABILITY each; the
    # count is below the binomial's 99.9th percentile of 300 x 4 x 2 trials.
    left_out = sum(len(r.left_out) for r in results)
    assert left_out <= stats.binom.ppf(0.999, 300 * 4 * 2, SERIES_REJECTION_PROBABILITY)


def test_fit_reports_residuals_and_chi2(rng):
    centres = {n: expected_balmer_air_nm(n) for n in (3, 4, 5, 6)}
    result = rydberg_from_spectrum(hydrogen_spectrum(rng, centres=centres))
    assert result.degrees_of_freedom == len(result.lines) - 1
    assert all(abs(l.residual_nm) < 5 * l.wavelength_uncertainty_nm for l in result.lines)
    assert result.air_to_vacuum == "Edlén 1966"


def test_mercury_spectrum_has_no_balmer_series(rng):
    # Hg I lines (NIST ASD, from the design notes): 404.656, 435.833, 546.075 nm.
    wl = np.arange(380.0, 700.0, 0.4)
    mean = 30 + sum(1000 * np.exp(-0.5 * ((wl - c) / 0.7) ** 2) for c in (404.656, 546.075, 576.961))
    hg = as_spectrum(wl, rng.poisson(mean).astype(float), uncertainty=np.sqrt(mean))
    with pytest.raises(AnalysisError, match="no usable Balmer series: found 0"):
        rydberg_from_spectrum(hg)


def test_single_line_is_not_enough(rng):
    wl = np.arange(600.0, 700.0, 0.4)
    mean = 30 + 2000 * np.exp(-0.5 * ((wl - 656.28) / 0.7) ** 2)
    spectrum = as_spectrum(wl, rng.poisson(mean).astype(float), uncertainty=np.sqrt(mean))
    assert [l.name for l in find_balmer_lines(spectrum)] == ["H-alpha"]
    with pytest.raises(AnalysisError, match=r"found 1 Balmer line\(s\) \(H-alpha\)"):
        rydberg_from_spectrum(spectrum)
    with pytest.raises(AnalysisError, match="at least 2 Balmer lines"):
        fit_rydberg(find_balmer_lines(spectrum))


def test_uncalibrated_spectrum_is_refused():
    from benchspec import Spectrum

    spectrum = Spectrum(intensity=np.ones(50), uncertainty=np.ones(50), pixel=np.arange(50.0))
    with pytest.raises(InputError, match="no wavelength axis"):
        rydberg_from_spectrum(spectrum)


def test_bohr_model_allowance_covers_the_nist_balmer_lines():
    # NIST ASD air wavelengths (NIST_BALMER_AIR_NM, from memory) against the Bohr formula with CODATA R_H:
    # fine structure and the Lamb shift stay inside the allowance the series assignment adds.
    for n, nist in NIST_BALMER_AIR_NM.items():
        assert abs(nist - expected_balmer_air_nm(n)) <= BOHR_MODEL_RELATIVE * nist


def helium_spectrum(rng, **bench):
    """A He I tube on an invented bench, calibrated from a CFL on the same bench (tests/synthetic_lamp.py).

    The He I wavelengths come from the packaged list calibration/lines/He.csv, which cites NIST ASD
    (its values written there from memory): 388.865 nm lies 0.04 nm from H-zeta, 396.473 nm 0.53 nm
    from H-epsilon and 412.082 nm 1.9 nm from H-delta, all inside the Balmer search windows.
    """
    from synthetic_lamp import cfl_continuum, lamp_lines, render, species_lines

    from benchspec.pipeline import apply_calibration
    from benchspec.wavecal import calibrate_spectrum

    cfl, _ = render(lamp_lines("cfl"), rng=rng, peak_counts=3000, continuum=cfl_continuum, **bench)
    helium, _ = render(species_lines("He"), rng=rng, peak_counts=3000, **bench)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        return apply_calibration(helium, calibrate_spectrum(cfl, lamp="cfl"))


def test_helium_spectrum_is_refused_not_fitted(rng):
    spectrum = helium_spectrum(rng, nm_per_px=0.5)
    candidates = find_balmer_lines(spectrum)
    # He lines fall in at least two Balmer windows: a plain fit would give a number
    assert len(candidates) >= 2
    near_he = {388.865, 396.473, 412.082}  # He I, NIST ASD (calibration/lines/He.csv)
    assert all(min(abs(l.air_wavelength_nm - w) for w in near_he) < 0.5 for l in candidates)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        with pytest.raises(AnalysisError, match=r"no usable Balmer series: H-delta at 412\.\d\d nm lies .* sigma from 410\.18 nm") as info:
            rydberg_from_spectrum(spectrum)
    message = str(info.value)
    assert "\n" not in message and "check the tube is hydrogen" in message and "benchspec identify" in message


def test_one_line_is_not_given_to_several_balmer_levels():
    # A coarse spectrum (1.8 nm per sample) with only He I 388.865 nm (NIST ASD, calibration/lines/He.csv):
    # its search windows for H-epsilon, H-zeta and H-eta all hold that one line; it is one Balmer line
    # at most, the level nearest in units of its 1-sigma (H-zeta, 388.905 nm).
    wl = np.arange(360.0, 700.0, 1.8)
    mean = 30 + 3000 * np.exp(-0.5 * ((wl - 388.865) / 1.9) ** 2)
    spectrum = as_spectrum(wl, mean, uncertainty=np.sqrt(mean))
    assert [l.name for l in find_balmer_lines(spectrum)] == ["H-zeta"]


def line_at(n, *, offset_sigma=0.0, sigma_nm=0.02):
    """A Balmer line offset_sigma of its 1-sigma from the Bohr wavelength (CODATA R_H via scipy.constants)."""
    expected = expected_balmer_air_nm(n)
    air = expected + offset_sigma * sigma_nm
    return BalmerLine(upper_level=n, name=f"n={n}", air_wavelength_nm=air, vacuum_wavelength_nm=float(air_to_vacuum_nm(air)),
                      wavelength_uncertainty_nm=sigma_nm, expected_air_wavelength_nm=expected, fwhm_nm=1.5, snr=100.0,
                      statistical_uncertainty_nm=sigma_nm, calibration_uncertainty_nm=0.0)


def test_a_line_far_from_its_balmer_wavelength_is_left_out_and_warned():
    lines = [line_at(3), line_at(4), line_at(5, offset_sigma=10.0), line_at(6)]
    with pytest.warns(DegradedResultWarning, match="n=5 at .* sigma"):
        kept, left_out = assign_balmer_series(lines)
    assert [l.upper_level for l in kept] == [3, 4, 6] and [l.upper_level for l in left_out] == [5]
    # the other three lines sit at the Bohr wavelengths: their R_H is CODATA's
    assert fit_rydberg(kept).rydberg_per_m == pytest.approx(codata_rydberg_hydrogen_per_m()[0], rel=1e-9)


def test_a_line_off_the_others_series_is_left_out():
    # Each line within 3 sigma of its Bohr wavelength, but n=6 on the opposite side of the others
    # by more than the other lines' prediction allows (leave-one-out), so it is left out.
    lines = [line_at(3, offset_sigma=-2.5), line_at(4, offset_sigma=-2.5), line_at(5, offset_sigma=-2.5),
             line_at(6, offset_sigma=2.8)]
    with pytest.warns(DegradedResultWarning, match="where the other Balmer lines put it"):
        kept, left_out = assign_balmer_series(lines)
    assert [l.upper_level for l in left_out] == [6]


def test_a_coherent_offset_within_the_stated_sigma_is_reported_not_refused():
    # A calibration 2.5 sigma off at every line: each line is still its Balmer line, and the result
    # reports the disagreement with CODATA instead of hiding it behind a refusal.
    lines = [line_at(n, offset_sigma=2.5) for n in (3, 4, 5, 6)]
    kept, left_out = assign_balmer_series(lines)
    assert len(kept) == 4 and not left_out
    assert fit_rydberg(kept).difference_sigma < -4  # 4 lines each 2.5 sigma long: about -5 sigma


def test_two_lines_that_disagree_are_refused():
    # Each within 3.29 sigma of its Bohr wavelength, but on opposite sides: 6.4 sigma apart in all,
    # about 4.5 sigma with both lines' 1-sigma combined, chi^2 about 20 for 1 dof (limit 10.8)
    lines = [line_at(4, offset_sigma=3.2), line_at(5, offset_sigma=-3.2)]
    with pytest.raises(AnalysisError, match=r"do not fit one series .*chi\^2 = .* beyond its 99.9th percentile"):
        assign_balmer_series(lines)


def test_the_viewer_lists_a_left_out_line():
    """The Practicals page says which line the Balmer series check left out (the command did; the page did not)."""
    import dataclasses

    from benchspec.gui.practicals import describe_rydberg

    lines = [line_at(3), line_at(4), line_at(5, offset_sigma=10.0), line_at(6)]
    with pytest.warns(DegradedResultWarning):
        kept, left_out = assign_balmer_series(lines)
    result = dataclasses.replace(fit_rydberg(kept), left_out=left_out)
    text = describe_rydberg(result)
    assert "n=5" in text and "left out" in text
    assert text.count("->2") == 3  # the three fitted lines, each once
