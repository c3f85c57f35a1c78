"""`benchspec extract --response`: response-corrected spectra from the command line."""

import json

import numpy as np
import pytest

from benchspec import demo
from benchspec.cli import main
from benchspec.io import read_spectrum
from benchspec.physics import planck_spectral_radiance


@pytest.fixture(scope="module")
def bench_files(tmp_path_factory):
    folder = demo.demo_folder()
    out = tmp_path_factory.mktemp("extract-response")
    cal = out / "cal.json"
    assert main(["calibrate", *(str(folder / f"cfl_{i}.png") for i in (1, 2, 3)), "--dark", str(folder / "dark.png"),
                 "--lamp", "cfl", "--out", str(cal)]) == 0
    lamp = out / "halogen.csv"
    assert main(["extract", str(folder / "halogen.jpg"), "--calibration", str(cal), "--dark", str(folder / "dark.png"),
                 "--out", str(lamp)]) == 0
    resp = out / "resp.json"
    assert main(["response", str(lamp), "--temperature", "2900", "--out", str(resp)]) == 0
    return folder, out, cal, resp


def test_the_lamp_corrected_by_its_own_response_follows_planck(bench_files):
    # Planck's law (scipy.constants, CODATA): a 2900 K lamp divided by the response measured on it
    # is proportional to B_lambda(2900 K); 2% is the practical's flatness target.
    folder, out, cal, resp = bench_files
    spec = out / "halogen_corrected.csv"
    assert main(["extract", str(folder / "halogen.jpg"), "--calibration", str(cal), "--dark", str(folder / "dark.png"),
                 "--response", str(resp), "--out", str(spec)]) == 0
    corrected = read_spectrum(spec)
    ratio = corrected.intensity / planck_spectral_radiance(corrected.wavelength_nm, 2900.0)
    ratio /= np.median(ratio)
    assert np.max(np.abs(ratio - 1)) < 0.03
    assert corrected.provenance.get("response")


def test_a_bad_response_file_is_refused_before_any_work(bench_files, tmp_path, capsys):
    folder, out, cal, resp = bench_files
    bad = tmp_path / "resp.json"
    bad.write_text(json.dumps({"format": "something else"}))
    target = tmp_path / "x.csv"
    assert main(["extract", str(folder / "led.jpg"), "--calibration", str(cal), "--response", str(bad),
                 "--out", str(target)]) == 2
    assert "resp.json" in capsys.readouterr().err
    assert not target.exists()
