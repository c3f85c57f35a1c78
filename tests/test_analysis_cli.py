"""The practicals' commands: JSON keys, files written atomically, one-line errors with exit code 2."""

import json

import numpy as np
import pytest

from benchspec import as_spectrum
from benchspec.analysis.rydberg import expected_balmer_air_nm
from benchspec.cli import main
from benchspec.io import read_table, write_spectrum
from benchspec.physics import planck_spectral_radiance


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def files(tmp_path, rng):
    """Spectrum files of an invented bench: H tube, halogen blank, dye standards, LED, laser, daylight-like."""
    paths = {}

    def save(name, wl, mean, noise=None):
        sigma = np.sqrt(np.maximum(mean, 1.0)) if noise is None else np.full(wl.size, noise)
        path = tmp_path / f"{name}.csv"
        write_spectrum(as_spectrum(wl, rng.normal(mean, sigma), uncertainty=sigma), path)
        paths[name] = str(path)

    wl = np.arange(380.0, 700.0, 0.4)
    h = 30 + sum(a * 2000 * np.exp(-0.5 * ((wl - expected_balmer_air_nm(n)) / 0.64) ** 2)
                 for n, a in {3: 1.0, 4: 0.45, 5: 0.2, 6: 0.1}.items())
    save("hydrogen", wl, h)
    wl = np.arange(400.0, 700.0, 0.5)
    lamp = 2e4 * np.exp(-0.5 * ((wl - 550) / 80) ** 2) * planck_spectral_radiance(wl, 2900) / planck_spectral_radiance(550, 2900)
    save("halogen", wl, lamp)
    epsilon = 1.2e4 * np.exp(-0.5 * ((wl - 520) / 30) ** 2)
    for name, c in {"std1": 1e-5, "std2": 3e-5, "std3": 5e-5, "std4": 7e-5, "unknown": 4e-5}.items():
        save(name, wl, lamp * 10 ** (-epsilon * c))
    save("led", wl, 1000 * np.exp(-0.5 * ((wl - 590) / 7) ** 2), noise=2.0)
    save("laser", wl, 1000 * np.exp(-0.5 * ((wl - 532.3) / 0.5) ** 2), noise=2.0)
    return paths


def test_rydberg_json(capsys, files):
    code, out, err = run(capsys, "rydberg", files["hydrogen"], "--json")
    assert code == 0
    report = json.loads(out)
    assert {"rydberg_per_m", "uncertainty_per_m", "lines", "codata_rydberg_per_m"} <= report.keys()
    assert [l["name"] for l in report["lines"]] == ["H-alpha", "H-beta", "H-gamma", "H-delta"]
    assert abs(report["rydberg_per_m"] - report["codata_rydberg_per_m"]) < 4 * report["uncertainty_per_m"]
    assert "caution" in err  # discharge-tube caution on stderr, stdout stays JSON


def test_rydberg_on_a_lamp_without_hydrogen(capsys, files):
    code, out, err = run(capsys, "rydberg", files["halogen"])
    assert code == 2
    assert "error: no usable Balmer series" in err and "Traceback" not in err
    assert len([l for l in err.splitlines() if "error" in l]) == 1


def test_rydberg_refuses_a_helium_spectrum_and_writes_nothing(capsys, tmp_path, rng):
    # He I on an invented bench, CFL-calibrated; its wavelengths from calibration/lines/He.csv (NIST ASD)
    from test_analysis_rydberg import helium_spectrum

    path = tmp_path / "tube_A.csv"
    write_spectrum(helium_spectrum(rng, nm_per_px=0.5), path)
    plot = tmp_path / "balmer.png"
    code, out, err = run(capsys, "rydberg", str(path), "--json", "--plot", str(plot))
    assert code == 2 and out == "" and not plot.exists()
    errors = [l for l in err.splitlines() if "error" in l]
    assert len(errors) == 1 and "Traceback" not in err
    assert "no usable Balmer series" in errors[0] and "check the tube is hydrogen" in errors[0]


def test_rydberg_caution_is_the_practicals_tube_not_a_claim_about_the_input(capsys, files):
    # The Balmer practical uses a hydrogen discharge tube (kV supply): its caution shows, worded as the
    # practical's source, even for a spectrum that is plainly not a tube's.
    code, _, err = run(capsys, "rydberg", files["led"])
    assert code == 2
    assert "caution (gas-discharge tube, the hydrogen source of this practical): Tube power supplies" in err


def test_metrics_caution_follows_the_source(capsys, files, tmp_path):
    # Laser caution (IEC 60825-1) for one narrow line, told or not; the LED one (IEC 62471) otherwise.
    code, _, err = run(capsys, "metrics", files["laser"])  # FWHM 1.2 nm, far below any LED's
    assert code == 0 and "caution (laser, inferred" in err and "IEC 62471" not in err
    code, _, err = run(capsys, "metrics", files["laser"], "--laser", "dpss-green")
    assert code == 0 and "caution (laser)" in err
    code, _, err = run(capsys, "metrics", files["led"])  # FWHM 16.5 nm
    assert code == 0 and "IEC 62471" in err and "caution (laser" not in err
    # what the spectrum was recorded as comes first
    from benchspec.io import read_spectrum

    led = read_spectrum(files["led"])
    told = tmp_path / "told.csv"
    write_spectrum(as_spectrum(led.wavelength_nm, led.intensity, uncertainty=led.uncertainty,
                               provenance={"source_type": "halogen"}), told)
    code, _, err = run(capsys, "metrics", str(told))
    assert code == 0 and "caution (halogen or incandescent lamp, as recorded with the spectrum)" in err


def test_metrics_json_keys_and_nulls(capsys, files, tmp_path):
    code, out, _ = run(capsys, "metrics", files["led"], "--json", "--plot", str(tmp_path / "led.png"))
    assert code == 0
    report = json.loads(out)
    for key in ("peak_nm", "centroid_nm", "fwhm_nm", "dominant_wavelength_nm", "cie_x", "cie_y", "cct_k", "duv"):
        assert key in report
    assert report["cct_k"] is None and report["duv"] is None  # a coloured LED has no CCT
    assert report["peak_nm"] == pytest.approx(590.0, abs=0.1)
    assert (tmp_path / "led.png").stat().st_size > 1000
    code, out, _ = run(capsys, "metrics", files["laser"], "--laser", "dpss-green", "--json")
    report = json.loads(out)
    assert report["laser"]["within_tolerance"] is True and report["laser"]["nominal_nm"] == 532.0
    code, _, err = run(capsys, "metrics", files["laser"], "--white")  # green: far from the Planckian locus
    assert code == 2 and "correlated colour temperature" in err


def test_response_then_metrics_with_response(capsys, files, tmp_path):
    resp = tmp_path / "RESP.json"
    code, out, _ = run(capsys, "response", files["halogen"], "--temperature", "2900", "--out", str(resp), "--json")
    assert code == 0 and json.loads(out)["valid_range_nm"][0] < 450
    code, _, err = run(capsys, "response", files["halogen"], "--temperature", "2900", "--out", str(resp))
    assert code == 2 and "already exists" in err
    code, out, _ = run(capsys, "metrics", files["halogen"], "--response", str(resp), "--white", "--json")
    assert code == 0
    report = json.loads(out)
    # The halogen corrected by its own response is a 2900 K Planck source (Ohno 2013 CCT).
    assert report["cct_k"] == pytest.approx(2900, abs=60) and report["response_applied"] is True


def test_absorbance_csv(capsys, files, tmp_path):
    out_path = tmp_path / "A.csv"
    code, out, _ = run(capsys, "absorbance", files["std3"], "--blank", files["halogen"], "--out", str(out_path))
    assert code == 0
    header = [l for l in out_path.read_text().splitlines() if not l.startswith("#")][0]
    assert header.startswith("wavelength_nm,absorbance,uncertainty")
    table = read_table(out_path)
    peak = int(np.argmax(table["absorbance"]))
    assert table["wavelength_nm"][peak] == pytest.approx(520, abs=10)
    assert table["absorbance"][peak] == pytest.approx(0.6, abs=0.05)
    code, _, err = run(capsys, "absorbance", files["halogen"], "--blank", files["std4"])
    assert code == 2 and "brighter than the blank" in err


def test_concentration(capsys, files, tmp_path):
    args = ["concentration", "--blank", files["halogen"], "--band", "510", "530", "--unit", "mol/L", "--path-length", "1"]
    for name, c in (("std1", "1e-5"), ("std2", "3e-5"), ("std3", "5e-5"), ("std4", "7e-5")):
        args += ["--standard", f"{files[name]}={c}"]
    code, out, _ = run(capsys, *args, "--unknown", f"flask={files['unknown']}", "--json", "--plot", str(tmp_path / "bl.png"))
    assert code == 0
    report = json.loads(out)
    unknown = report["unknowns"][0]
    assert unknown["label"] == "flask"
    assert abs(unknown["concentration"] - 4e-5) < 3 * unknown["concentration_uncertainty"]
    assert report["fit"]["limit_of_detection"] > 0 and report["fit"]["r_squared"] > 0.999
    code, _, err = run(capsys, "concentration", "--blank", files["halogen"], "--band", "510", "530",
                       "--standard", f"{files['std1']}=1e-5")
    assert code == 2 and "at least 2 standards" in err


def test_concentration_from_a_table(capsys, tmp_path):
    table = tmp_path / "standards.csv"
    table.write_text("concentration,absorbance\n0,0.002\n2,0.161\n4,0.318\n6,0.482\n8,0.640\n")
    code, out, _ = run(capsys, "concentration", "--table", str(table), "--unknown-absorbance", "0.400", "--unit", "mg/L")
    assert code == 0 and "mg/L" in out and "limit of detection" in out


def test_daylight_json(capsys, tmp_path):
    pvlib = pytest.importorskip("pvlib")
    table = pvlib.spectrum.get_reference_spectra()  # ASTM G173-03
    wl = table.index.values.astype(float)
    keep = (wl >= 400) & (wl <= 780)
    path = tmp_path / "sun.csv"
    write_spectrum(as_spectrum(wl[keep], table["global"].values[keep], uncertainty=np.full(keep.sum(), 0.002)), path)
    code, out, err = run(capsys, "daylight", str(path), "--json")
    assert code == 0 and "Never look at the Sun" in err
    lines = json.loads(out)["lines"]
    assert all({"wavelength_nm", "label", "species"} <= l.keys() for l in lines)
    labels = {l["label"] for l in lines}
    assert "C" in labels and "A" in labels


def test_plan_json(capsys, tmp_path):
    code, out, _ = run(capsys, "plan", "--lines-per-mm", "1000", "--width-px", "1280", "--hfov", "60",
                       "--slit-width", "0.1", "--slit-distance", "100", "--json", "--plot", str(tmp_path / "plan.png"))
    assert code == 0
    report = json.loads(out)
    assert report["second_order_overlap_from_nm"] == 760.0
    assert report["slit_resolution_nm"] == pytest.approx(1.0)
    assert len(report["calibration_hint_nm_per_px"]) == 2
    assert (tmp_path / "plan.png").exists()
    code, _, err = run(capsys, "plan", "--lines-per-mm", "1000", "--width-px", "1280", "--hfov", "60", "--order", "2")
    assert code == 2 and "no diffraction angle" in err


def test_frames_need_a_calibration(capsys, tmp_path):
    frame = tmp_path / "lamp.png"
    frame.write_bytes(b"not really a frame")
    code, _, err = run(capsys, "response", str(frame), "--temperature", "2900")
    assert code == 2 and "--calibration" in err


def test_plots_of_every_result(files, tmp_path):
    # Every practical's figure renders (matplotlib only here, never in the core).
    from benchspec.analysis import plots
    from benchspec.analysis.absorbance import absorbance_spectrum
    from benchspec.analysis.daylight import identify_daylight_lines
    from benchspec.analysis.response import compute_response
    from benchspec.io import read_spectrum

    halogen = read_spectrum(files["halogen"])
    figure = plots.response_figure(compute_response(halogen, temperature_k=2900), lamp=halogen)
    plots.save_analysis_figure(figure, tmp_path / "r.svg")
    result = absorbance_spectrum(read_spectrum(files["std4"]), blank=halogen)
    plots.save_analysis_figure(plots.absorbance_figure(result), tmp_path / "a.pdf")
    wl = np.arange(400.0, 700.0, 1.0)
    dips = 1 - 0.3 * np.exp(-0.5 * ((wl - 486.13) / 0.5) ** 2) - 0.3 * np.exp(-0.5 * ((wl - 656.28) / 0.5) ** 2)
    daylight = identify_daylight_lines(as_spectrum(wl, 100 * dips, uncertainty=np.full(wl.size, 0.1)))
    plots.save_analysis_figure(plots.daylight_figure(daylight), tmp_path / "d.png")
    assert all((tmp_path / n).stat().st_size > 1000 for n in ("r.svg", "a.pdf", "d.png"))


def test_core_modules_do_not_import_matplotlib():
    import subprocess
    import sys

    code = ("import sys; import benchspec.analysis.absorbance, benchspec.analysis.colour, benchspec.analysis.daylight, "
            "benchspec.analysis.metrics, benchspec.analysis.planner, benchspec.analysis.response, benchspec.analysis.rydberg; "
            "import benchspec.analysis; print('matplotlib' in sys.modules)")
    assert subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip() == "False"


def test_public_names():
    import benchspec.analysis as analysis

    assert all(hasattr(analysis, name) for name in analysis.__all__)
    assert len(set(analysis.__all__)) == len(analysis.__all__)


@pytest.mark.parametrize("value, sigma, text", [
    (0.03, 0.00039, "0.03000 +- 0.00039"),  # printed "0.03 +- 0.00039" before
    (12345.6, 789.0, "12350 +- 790"),
    (2.0, 1.5, "2.0 +- 1.5"),
])
def test_values_are_printed_to_the_decimal_place_of_their_uncertainty(value, sigma, text):
    """The uncertainty to 2 significant digits and the value to the same decimal place (common practice, no source)."""
    from benchspec.cli.practicals import _value_pm

    assert _value_pm(value, sigma) == text
