"""The parts of the Rydberg fit's uncertainty (``RydbergResult.budget``) and their JSON."""

import dataclasses
import json
import warnings

import numpy as np
import pytest

from benchspec import as_spectrum
from benchspec.analysis.rydberg import BalmerLine, expected_balmer_air_nm, fit_rydberg, rydberg_from_spectrum
from benchspec.cli import main
from benchspec.errors import DegradedResultWarning
from benchspec.io import write_spectrum
from benchspec.physics import air_to_vacuum_nm


def calibrated_hydrogen(rng, *, calibration_sigma_nm):
    """A synthetic H-tube spectrum (invented) at the Bohr-model positions (CODATA R_H, scipy.constants),
    calibrated with a wavelength 1-sigma that grows towards the red, as an extrapolated solution's does."""
    wl = np.arange(380.0, 700.0, 0.4)
    mean = 30 + sum(a * 2000 * np.exp(-0.5 * ((wl - expected_balmer_air_nm(n)) / 0.64) ** 2)
                    for n, a in {3: 1.0, 4: 0.45, 5: 0.2, 6: 0.1}.items())
    spectrum = as_spectrum(wl, rng.poisson(mean).astype(float), uncertainty=np.sqrt(mean))
    cal = calibration_sigma_nm * (1.0 + ((wl - 450.0) / 150.0) ** 2)
    return dataclasses.replace(spectrum, wavelength_uncertainty_nm=cal)


def test_budget_parts_add_up_to_the_stated_uncertainty(rng):
    result = rydberg_from_spectrum(calibrated_hydrogen(rng, calibration_sigma_nm=0.03))
    b = result.budget
    assert np.hypot(b["statistical_per_m"], b["calibration_per_m"]) == pytest.approx(result.uncertainty_per_m, rel=1e-9)
    assert b["unattributed_per_m"] == 0.0
    assert b["total_per_m"] == result.uncertainty_per_m
    assert b["calibration_between_lines"] == "independent"
    assert b["includes"] and b["excludes"]
    for line in result.lines:
        assert np.hypot(line.statistical_uncertainty_nm, line.calibration_uncertainty_nm) == pytest.approx(
            line.wavelength_uncertainty_nm, rel=1e-12)


def test_without_a_calibration_uncertainty_the_budget_is_all_statistics(rng):
    spectrum = dataclasses.replace(calibrated_hydrogen(rng, calibration_sigma_nm=0.03), wavelength_uncertainty_nm=None)
    result = rydberg_from_spectrum(spectrum)
    assert result.budget["calibration_per_m"] == 0.0
    assert result.budget["statistical_per_m"] == pytest.approx(result.uncertainty_per_m, rel=1e-9)


def test_calibration_part_matches_a_monte_carlo_of_the_line_wavelengths(rng):
    # Linear propagation (GUM, JCGM 100:2008 section 5.1) checked by drawing each line's wavelength
    # within its calibration 1-sigma and refitting: the spread of R_H is the calibration part.
    cal = {3: 0.30, 4: 0.02, 5: 0.02, 6: 0.03}
    stat = {3: 0.001, 4: 0.003, 5: 0.004, 6: 0.015}
    lines = []
    for n in cal:
        air = expected_balmer_air_nm(n)
        lines.append(BalmerLine(upper_level=n, name=f"n={n}", air_wavelength_nm=air, vacuum_wavelength_nm=float(air_to_vacuum_nm(air)),
                                wavelength_uncertainty_nm=float(np.hypot(cal[n], stat[n])), expected_air_wavelength_nm=air,
                                fwhm_nm=1.5, snr=100.0, statistical_uncertainty_nm=stat[n], calibration_uncertainty_nm=cal[n]))
    budget = fit_rydberg(lines).budget
    values = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)  # 1% of the draws disagree beyond chance, by design
        for _ in range(4000):
            shifted = [dataclasses.replace(l, vacuum_wavelength_nm=l.vacuum_wavelength_nm + rng.normal(0.0, cal[l.upper_level]))
                       for l in lines]
            values.append(fit_rydberg(shifted).rydberg_per_m)
    # 4000 draws: the sample standard deviation is known to ~1.1% (1/sqrt(2N)); 5% is over 4 sigma
    assert np.std(values, ddof=1) == pytest.approx(budget["calibration_per_m"], rel=0.05)


def test_lines_given_without_parts_are_unattributed():
    lines = [BalmerLine(upper_level=n, name=f"n={n}", air_wavelength_nm=expected_balmer_air_nm(n),
                        vacuum_wavelength_nm=float(air_to_vacuum_nm(expected_balmer_air_nm(n))), wavelength_uncertainty_nm=0.02,
                        expected_air_wavelength_nm=expected_balmer_air_nm(n), fwhm_nm=1.5, snr=50.0) for n in (3, 4, 5)]
    result = fit_rydberg(lines)
    assert result.budget["unattributed_per_m"] == pytest.approx(result.uncertainty_per_m, rel=1e-9)
    assert result.budget["statistical_per_m"] == result.budget["calibration_per_m"] == 0.0


def test_rydberg_json_carries_the_budget_and_keeps_its_keys(capsys, tmp_path, rng):
    path = tmp_path / "hydrogen.csv"
    write_spectrum(calibrated_hydrogen(rng, calibration_sigma_nm=0.03), path)
    assert main(["rydberg", str(path), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert {"rydberg_per_m", "uncertainty_per_m", "lines", "budget"} <= report.keys()
    assert len(report["lines"]) == 4
    budget = report["budget"]
    assert {"statistical_per_m", "calibration_per_m", "unattributed_per_m", "birge_scale", "total_per_m",
            "includes", "excludes"} <= budget.keys()
    assert budget["calibration_per_m"] > budget["statistical_per_m"] > 0
    assert np.hypot(budget["statistical_per_m"], budget["calibration_per_m"]) == pytest.approx(report["uncertainty_per_m"], rel=1e-6)
