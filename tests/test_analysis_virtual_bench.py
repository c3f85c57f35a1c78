"""Practicals end to end on virtual-bench frames: simulate -> pipeline -> analysis."""

import warnings

import numpy as np
import pytest

from benchspec import simulate
from benchspec.analysis.response import apply_response, compute_response
from benchspec.analysis.rydberg import codata_rydberg_hydrogen_per_m, rydberg_from_spectrum
from benchspec.physics import planck_spectral_radiance

pipeline = pytest.importorskip("benchspec.pipeline")


def frames(bench, source, seeds):
    return [simulate.render(bench, seed=seed, source=source).image for seed in seeds]


@pytest.fixture(scope="module")
def bench_and_calibration():
    bench = simulate.Bench()  # the built-in virtual bench: 1000 lines/mm, 1280x720 webcam, 8-bit gamma-encoded
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        calibration = pipeline.calibrate_frames(frames(bench, "cfl", (1, 2)), lamp="cfl")
    return bench, calibration


def test_rydberg_from_virtual_hydrogen_frames(bench_and_calibration):
    # R_H from rendered H-tube frames lies within its uncertainty of CODATA R_inf/(1 + m_e/m_p) (scipy.constants).
    bench, calibration = bench_and_calibration
    spectrum = pipeline.extract_frames(frames(bench, "h", (11, 12)), calibration)
    result = rydberg_from_spectrum(spectrum)
    assert {"H-alpha", "H-beta", "H-gamma"} <= {l.name for l in result.lines}
    codata, _ = codata_rydberg_hydrogen_per_m()
    assert abs(result.rydberg_per_m - codata) < 2 * result.uncertainty_per_m
    assert result.uncertainty_per_m < 2e-4 * codata  # a webcam gives R_H to better than 0.02%


def test_virtual_halogen_corrected_with_its_response_is_flat(bench_and_calibration):
    # A halogen frame at 2900 K (Planck in the virtual bench), corrected with the response made from
    # another exposure of the same lamp, is flat within 2% over the valid range.
    bench, calibration = bench_and_calibration
    lamp = pipeline.extract_frames(frames(bench, "halogen:2900", (21,)), calibration)
    response = compute_response(lamp, temperature_k=2900.0)
    assert response.valid_range_nm[0] < 450 and response.valid_range_nm[1] > 650
    other = pipeline.extract_frames(frames(bench, "halogen:2900", (31,)), calibration)
    corrected = apply_response(other, response)
    ratio = corrected.intensity / planck_spectral_radiance(corrected.wavelength_nm, 2900.0)
    ratio /= np.median(ratio)
    assert np.all(np.abs(ratio - 1) < 0.02)


def test_absorbance_command_on_demo_frames(tmp_path, capsys):
    # The invented school bench's demo frames: a dye cuvette rendered as absorbance 0.8 at 525 nm
    # (demo_images/recipe.toml, source sample:0.8:525:90) against its water blank, through
    # `benchspec absorbance` with frames, a dark frame and a calibration file.
    from pathlib import Path

    from benchspec.calfile import write_calibration
    from benchspec.cli import main
    from benchspec.io import read_table

    demo = Path(__file__).resolve().parents[1] / "demo_images"
    if not (demo / "dye.jpg").exists():
        pytest.skip("demo frames not in this checkout")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        calibration = pipeline.calibrate_frames([str(demo / "cfl_1.png"), str(demo / "cfl_2.png")], lamp="cfl",
                                                dark=[str(demo / "dark.png")])
    cal_path = tmp_path / "cal.json"
    write_calibration(calibration, cal_path)
    out = tmp_path / "A.csv"
    code = main(["absorbance", str(demo / "dye.jpg"), "--blank", str(demo / "blank.jpg"), "--dark", str(demo / "dark.png"),
                 "--calibration", str(cal_path), "--out", str(out)])
    capsys.readouterr()
    assert code == 0
    table = read_table(out)
    near = np.abs(table["wavelength_nm"] - 525.0) < 5
    assert np.median(table["absorbance"][near]) == pytest.approx(0.8, abs=0.05)
