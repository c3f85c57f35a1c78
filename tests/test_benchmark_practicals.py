"""The practicals benchmark's Rydberg pull series: width intervals, the redrawn setups, counted failures."""

import numpy as np
import pytest
from scipy import stats

from benchspec import simulate
from benchspec.benchmarks import practicals


def test_width_interval_follows_the_chi_square_law(rng):
    # (n-1) s^2 / sigma^2 ~ chi^2(n-1) for Gaussian samples (Cochran's theorem; scipy.stats.chi2).
    # Coverage check: over many samples of 24 unit-width pulls, the 68% interval holds 1 about 68% of the time.
    hits = 0
    trials = 4000
    for _ in range(trials):
        s = float(np.std(rng.normal(size=24), ddof=1))
        low, high = practicals.width_interval(s, 24)
        hits += low <= 1.0 <= high
    # binomial 1-sigma at 4000 trials is 0.74%; 3% is four of them
    assert hits / trials == pytest.approx(0.68, abs=0.03)


def test_honest_width_range_is_where_unit_pulls_put_their_width(rng):
    low, high = practicals.honest_width_range(24)
    assert low < 1.0 < high
    widths = [np.std(rng.normal(size=24), ddof=1) for _ in range(4000)]
    assert np.mean([(low <= w <= high) for w in widths]) == pytest.approx(0.68, abs=0.03)
    # more seeds, a narrower range
    assert np.subtract(*practicals.honest_width_range(96)[::-1]) < high - low
    assert practicals.width_interval(None, 24) is None and practicals.honest_width_range(1) is None


def test_chi_square_quantiles_used_are_the_textbook_ones():
    # chi^2 with 23 dof: 16% and 84% points 16.35 and 29.64 (scipy.stats.chi2.ppf)
    low, high = practicals.honest_width_range(24)
    assert low == pytest.approx(np.sqrt(stats.chi2.ppf(0.16, 23) / 23))
    assert high == pytest.approx(np.sqrt(stats.chi2.ppf(0.84, 23) / 23))
    assert (low, high) == pytest.approx((np.sqrt(16.347 / 23), np.sqrt(29.641 / 23)), abs=1e-4)


def test_setups_are_repeatable_redrawn_and_within_their_spread():
    spread = practicals.SETUP_SPREAD
    base = simulate.Bench()
    draws = [practicals.draw_setup(k) for k in range(12)]
    again = practicals.draw_setup(5)
    assert again[3] == draws[5][3]
    tilt0 = simulate.camera_tilt_deg(base)
    for k, (bench, source, jpeg, drawn) in enumerate(draws):
        assert source == {"kind": "lamp", "name": "cfl", "lamp_unit": 1 + k}
        assert spread["camera.rotation_deg"][0] <= bench.camera.rotation_deg <= spread["camera.rotation_deg"][1]
        assert abs(bench.camera.tilt_deg - tilt0) <= spread["camera.tilt_change_deg"][1]
        assert 0.95 * 60.0 <= bench.camera.horizontal_fov_deg <= 1.05 * 60.0
        assert spread["slit.smile_px"][0] <= bench.slit.smile_px <= spread["slit.smile_px"][1]
        assert spread["optics.lsf_sigma_px"][0] <= bench.optics.lsf_sigma_px <= spread["optics.lsf_sigma_px"][1]
        assert jpeg is None or spread["jpeg_quality"][0] <= jpeg <= spread["jpeg_quality"][1]
        assert jpeg == drawn["jpeg_quality"]
    # every setup differs from the others where the lines fall on the pixel grid, and both encodings occur
    assert len({round(b.camera.tilt_deg, 6) for b, *_ in draws}) == len(draws)
    assert {j is None for _, _, j, _ in draws} == {True, False}
    # each draws a bench the simulator can render, with the band inside the frame
    bench, source, jpeg, _ = draws[0]
    frame = simulate.as_written(simulate.render(bench, seed=1, source=source), jpeg_quality=jpeg)
    assert frame.shape == (base.camera.height_px, base.camera.width_px, 3)


def test_a_refused_calibration_is_counted_with_its_reason():
    # A halogen lamp offered as the CFL: nothing to match, the calibration refuses, the series says so.
    bench = simulate.Bench()
    series = practicals._rydberg_series(1, lambda k: (bench, "halogen:2900", None, {}))
    assert series["seeds"] == 1 and series["failures"] == 1 and series["pulls"] == 0
    assert series["failed"][0]["stage"] == "calibration" and series["failed"][0]["reason"]
    assert series["pull_width"] is None and series["per_seed"] == []


def test_line_summary_is_the_rms_over_seeds():
    rows = [{"calibration_error_nm": e, "calibration_sigma_nm": s, "centre_error_px": c, "centre_statistical_px": 0.01}
            for e, s, c in ((0.03, 0.02, 0.01), (-0.01, 0.02, -0.03))]
    records = [{"lines_vs_truth": {"H-beta": rows[0], "H-alpha": rows[0]}}, {"lines_vs_truth": {"H-beta": rows[1]}}]
    summary = practicals._summarise_lines(records)
    assert list(summary) == ["H-alpha", "H-beta"]  # by upper level
    beta = summary["H-beta"]
    assert beta["seeds"] == 2
    assert beta["calibration_error_rms_nm"] == pytest.approx(np.sqrt((0.03**2 + 0.01**2) / 2))
    assert beta["calibration_pull_rms"] == pytest.approx(np.sqrt((1.5**2 + 0.5**2) / 2))
    assert beta["centre_error_rms_px"] == pytest.approx(np.sqrt((0.01**2 + 0.03**2) / 2))
    assert summary["H-alpha"]["seeds"] == 1


def test_synthetic_rydberg_pulls_have_unit_width():
    # 40 Poisson spectra of the Balmer lines (NIST ASD air wavelengths via expected_balmer_air_nm) against
    # CODATA R_inf/(1+m_e/m_p) (scipy.constants): honest 1-sigma gives a pull width whose 99% range for
    # 40 unit-Gaussian pulls is about 0.74-1.27 (chi-square with 39 dof).
    from benchspec.benchmarks.practicals import _synthetic_rydberg

    figures = _synthetic_rydberg(40)
    assert figures["seeds"] == 40
    assert 0.74 < figures["pull_width"] < 1.27
    assert abs(figures["pull_mean"]) < 3 / 40 ** 0.5
