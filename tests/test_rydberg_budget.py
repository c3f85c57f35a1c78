"""The parts of the Rydberg fit's uncertainty (``RydbergResult.budget``) and their JSON."""

import dataclasses
import json
import warnings

import numpy as np
import pytest

from benchspec import as_spectrum
from benchspec.analysis.rydberg import (
    BalmerLine,
    calibration_covariance_nm2,
    codata_rydberg_hydrogen_per_m,
    expected_balmer_air_nm,
    fit_rydberg,
    rydberg_from_spectrum,
)
from benchspec.cli import main
from benchspec.errors import DegradedResultWarning, InputError
from benchspec.io import write_spectrum
from benchspec.physics import air_to_vacuum_nm
from benchspec.wavecal import WavelengthSolution


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


def balmer_lines(stat):
    """Lines at the Bohr-model positions (CODATA R_H via scipy.constants) with given statistical 1-sigma (nm)."""
    out = []
    for n, s in stat.items():
        air = expected_balmer_air_nm(n)
        out.append(BalmerLine(upper_level=n, name=f"n={n}", air_wavelength_nm=air, vacuum_wavelength_nm=float(air_to_vacuum_nm(air)),
                              wavelength_uncertainty_nm=s, expected_air_wavelength_nm=air, fwhm_nm=1.5, snr=100.0,
                              statistical_uncertainty_nm=s, calibration_uncertainty_nm=0.0))
    return out


def test_covariance_of_a_polynomial_solution_is_its_basis_times_its_covariance():
    # lambda = c0 + c1 t + c2 t^2: var at t is b^T C b with b = (1, t, t^2) (linear propagation, GUM 5.1)
    cov = np.array([[4e-4, 1e-5, -2e-5], [1e-5, 9e-4, 3e-5], [-2e-5, 3e-5, 1e-3]])
    solution = WavelengthSolution(coefficients=(550.0, 300.0, -8.0), covariance=tuple(map(tuple, cov)),
                                  pixel_centre=640.0, pixel_scale=640.0, pixel_range=(0.0, 1279.0))
    pixels = np.array([100.0, 640.0, 1200.0])
    t = (pixels - 640.0) / 640.0
    basis = np.stack([np.ones_like(t), t, t * t], axis=1)
    assert calibration_covariance_nm2(solution, pixels) == pytest.approx(basis @ cov @ basis.T, rel=1e-6)
    assert np.sqrt(np.diag(calibration_covariance_nm2(solution, pixels))) == pytest.approx(solution.uncertainty_nm(pixels), rel=1e-6)


def test_fit_with_a_covariance_states_the_spread_of_correlated_errors(rng):
    # Generalised least squares: errors drawn from the stated covariance (a common offset, a tilt and
    # independent centre noise) give R_H values whose spread is the stated 1-sigma and chi^2 whose
    # mean is the degrees of freedom (Aitken 1935; checked here by Monte Carlo).
    stat = {3: 0.004, 4: 0.003, 5: 0.004, 6: 0.012}
    lines = balmer_lines(stat)
    lam = np.array([l.air_wavelength_nm for l in lines])
    tilt = (lam - 500.0) / 150.0
    calibration = 0.02**2 * np.ones((4, 4)) + 0.03**2 * np.outer(tilt, tilt) + np.diag([0.01, 0.002, 0.002, 0.004]) ** 2
    full = calibration + np.diag([s**2 for s in stat.values()])
    stated = fit_rydberg(lines, calibration_covariance_nm2=calibration)
    assert stated.rydberg_per_m == pytest.approx(codata_rydberg_hydrogen_per_m()[0], rel=1e-9)
    assert stated.budget["calibration_between_lines"] == "covariance of the wavelength solution"
    assert np.hypot(stated.budget["statistical_per_m"], stated.budget["calibration_per_m"]) == pytest.approx(
        stated.uncertainty_per_m, rel=1e-9)
    chol = np.linalg.cholesky(full)
    values, chi2 = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        for _ in range(3000):
            shift = chol @ rng.normal(size=4)
            drawn = [dataclasses.replace(l, vacuum_wavelength_nm=l.vacuum_wavelength_nm + d) for l, d in zip(lines, shift)]
            result = fit_rydberg(drawn, calibration_covariance_nm2=calibration)
            values.append(result.rydberg_per_m)
            chi2.append(result.chi2)
    # 3000 draws: the standard deviation is known to 1.3%, the mean chi^2 (3 dof, variance 6) to 0.045
    assert np.std(values, ddof=1) == pytest.approx(stated.uncertainty_per_m, rel=0.06)
    assert np.mean(chi2) == pytest.approx(3.0, abs=0.2)
    # treating the same errors as independent states a different (here smaller) 1-sigma than their spread
    independent = fit_rydberg([dataclasses.replace(l, wavelength_uncertainty_nm=float(np.sqrt(v)))
                               for l, v in zip(lines, np.diag(full))])
    assert independent.uncertainty_per_m < 0.9 * np.std(values, ddof=1)


def test_covariance_input_is_checked():
    lines = balmer_lines({3: 0.004, 4: 0.003, 5: 0.004})
    with pytest.raises(InputError, match="3 x 3"):
        fit_rydberg(lines, calibration_covariance_nm2=np.eye(2))
    with pytest.raises(InputError, match="positive semi-definite"):
        fit_rydberg(lines, calibration_covariance_nm2=-np.eye(3))
    bare = [dataclasses.replace(l, statistical_uncertainty_nm=None) for l in lines]
    with pytest.raises(InputError, match="statistical_uncertainty_nm"):
        fit_rydberg(bare, calibration_covariance_nm2=np.eye(3) * 1e-4)


def test_a_calibration_that_is_not_the_spectrums_is_refused(rng):
    spectrum = calibrated_hydrogen(rng, calibration_sigma_nm=0.03)
    other = WavelengthSolution(coefficients=(500.0, 0.5), covariance=((1e-4, 0.0), (0.0, 1e-6)), pixel_centre=0.0,
                               pixel_scale=1.0, pixel_range=(0.0, 799.0))
    with pytest.raises(InputError, match="not the one that gave this spectrum"):
        rydberg_from_spectrum(spectrum, calibration=other)
    with pytest.raises(InputError, match="must be a Calibration"):
        rydberg_from_spectrum(spectrum, calibration="cal.json")


def test_virtual_bench_hydrogen_with_its_calibrations_covariance():
    # An invented virtual bench: CFL calibration, then H frames through the same setup.
    from benchspec import simulate
    from benchspec.pipeline import calibrate_frames, extract_frames

    bench = simulate.Bench()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        calibration = calibrate_frames([simulate.render(bench, seed=s, source="cfl").image for s in (1000, 1001)], lamp="cfl")
        spectrum = extract_frames([simulate.render(bench, seed=s, source="h").image for s in (100, 101)], calibration)
        result = rydberg_from_spectrum(spectrum, calibration=calibration)
    solution = calibration.wavelength.solution
    order = np.argsort(spectrum.wavelength_nm)
    pixels = np.interp([l.air_wavelength_nm for l in result.lines], spectrum.wavelength_nm[order], spectrum.pixel[order])
    # the covariance's diagonal is the solution's own stated 1-sigma at the lines (either model)
    assert np.sqrt(np.diag(calibration_covariance_nm2(solution, pixels))) == pytest.approx(solution.uncertainty_nm(pixels), rel=1e-4)
    assert len(result.lines) >= 4
    # CODATA R_inf/(1 + m_e/m_p) via scipy.constants, within 3 of the stated sigma
    assert abs(result.difference_sigma) < 3.0
    assert result.budget["calibration_between_lines"] == "covariance of the wavelength solution"
