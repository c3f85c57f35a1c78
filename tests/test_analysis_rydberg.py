"""Balmer lines to the Rydberg constant, checked against CODATA (scipy.constants)."""

import numpy as np
import pytest
from scipy import constants

from benchspec import as_spectrum
from benchspec.analysis.rydberg import (
    codata_rydberg_hydrogen_per_m,
    expected_balmer_air_nm,
    find_balmer_lines,
    fit_rydberg,
    rydberg_from_spectrum,
)
from benchspec.errors import AnalysisError, InputError
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
    pulls = np.array([rydberg_from_spectrum(hydrogen_spectrum(generator, centres=centres)).difference_sigma for _ in range(300)])
    # 300 draws: the standard deviation of a unit normal's sample SD is ~0.04.
    assert 0.88 < pulls.std() < 1.12
    assert abs(pulls.mean()) < 0.2


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
