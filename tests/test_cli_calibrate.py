"""``benchspec calibrate``, ``extract`` and ``lines``: outputs, formats and bad inputs (exit 2, one line, no file)."""

import csv
import json

import cv2
import numpy as np
import pytest

from benchspec import simulate
from benchspec.cli import main

BENCH = simulate.Bench().with_(
    camera={"width_px": 960, "height_px": 540, "horizontal_fov_deg": 45.0, "rotation_deg": -5.0},
    slit={"height_px": 120.0},
)


@pytest.fixture(scope="module")
def frames(tmp_path_factory):
    folder = tmp_path_factory.mktemp("frames")
    for name, seed in (("cfl", 1), ("hg", 2), ("ne", 3)):
        rendered = simulate.render(BENCH.with_(source={"kind": "lamp", "name": name}), seed=seed)
        simulate.write_frame(rendered, folder / f"{name}.png")
    small = simulate.render(BENCH.with_(camera={"width_px": 640, "height_px": 360}), seed=4)
    simulate.write_frame(small, folder / "small.png")
    cv2.imwrite(str(folder / "black.png"), np.zeros((540, 960), np.uint8))
    (folder / "truncated.png").write_bytes((folder / "cfl.png").read_bytes()[:2000])
    (folder / "broken.mp4").write_bytes(b"\x00\x00\x00\x18ftypmp42 not really a video")
    return folder


@pytest.fixture(scope="module")
def cal_file(frames, tmp_path_factory):
    out = tmp_path_factory.mktemp("cal") / "bench.json"
    assert main(["calibrate", str(frames / "cfl.png"), "--lamp", "cfl", "--out", str(out)]) == 0
    return out


def run(capsys, *argv):
    code = main(list(argv))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_calibrate_prints_table_rms_and_verdict(cal_file):
    data = json.loads(cal_file.read_text())
    assert data["schema"] == "benchspec.calibration/1"
    assert data["frames"][0]["sha256"] and data["frames"][0]["lamp"] == "cfl"


def test_calibrate_output(capsys, frames, tmp_path):
    out = tmp_path / "again.json"
    code, stdout, _ = run(capsys, "calibrate", str(frames / "cfl.png"), "--out", str(out), "--hint-lines-per-mm", "1000")
    assert code == 0
    assert "reference_nm" in stdout and "RMS" in stdout and "verdict:" in stdout and "435.833" in stdout
    assert out.exists()


def test_extract_writes_the_contract_csv(capsys, frames, cal_file, tmp_path):
    out = tmp_path / "hg.csv"
    code, stdout, _ = run(capsys, "extract", str(frames / "hg.png"), "--calibration", str(cal_file), "--out", str(out))
    assert code == 0
    text = out.read_text().splitlines()
    body = [line for line in text if not line.startswith("#")]
    header = body[0].split(",")
    assert header[:4] == ["wavelength_nm", "intensity", "uncertainty", "saturated"]
    rows = list(csv.reader(body[1:]))
    wavelength = np.array([float(r[0]) for r in rows])
    assert np.all(np.diff(wavelength) > 0)
    assert any("sha256" in line for line in text if line.startswith("#"))


def test_extract_each_writes_a_series(capsys, frames, cal_file, tmp_path):
    out = tmp_path / "series.csv"
    code, stdout, _ = run(capsys, "extract", str(frames / "hg.png"), str(frames / "ne.png"), "--calibration",
                          str(cal_file), "--each", "--out", str(out))
    assert code == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["series_0000.csv", "series_0001.csv"]


def test_extract_each_keeps_an_existing_series_without_force(capsys, frames, cal_file, tmp_path):
    out = tmp_path / "series.csv"
    argv = ["extract", str(frames / "hg.png"), str(frames / "ne.png"), "--calibration", str(cal_file), "--each",
            "--out", str(out)]
    assert run(capsys, *argv)[0] == 0
    first = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    assert sorted(first) == ["series_0000.csv", "series_0001.csv"]
    code, _, stderr = run(capsys, *argv)
    assert code == 2 and len(stderr.strip().splitlines()) == 1 and "Traceback" not in stderr
    assert "series_0000.csv already exists" in stderr and "--force" in stderr
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == first  # nothing overwritten, no temporary file
    assert run(capsys, *argv, "--force")[0] == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["series_0000.csv", "series_0001.csv"]
    # the rewritten files are whole spectra again (header and rows)
    rows = [line for line in (tmp_path / "series_0001.csv").read_text().splitlines() if not line.startswith("#")]
    assert rows[0].split(",")[:4] == ["wavelength_nm", "intensity", "uncertainty", "saturated"]
    assert len(rows) > 100


def test_lines_table_and_json(capsys, frames, cal_file, tmp_path):
    spec = tmp_path / "hg.csv"
    assert main(["extract", str(frames / "hg.png"), "--calibration", str(cal_file), "--out", str(spec)]) == 0
    capsys.readouterr()
    code, stdout, _ = run(capsys, "lines", str(spec))
    assert code == 0 and "centre_nm" in stdout and "emission lines" in stdout
    code, stdout, _ = run(capsys, "lines", str(spec), "--json")
    lines = json.loads(stdout)["lines"]
    centres = np.array([l["centre_nm"] for l in lines])
    assert np.min(np.abs(centres - 546.075)) < 1.0  # Hg I green line, NIST ASD air wavelength
    code, stdout, _ = run(capsys, "lines", str(spec), "--absorption")
    assert code == 0 and "absorption lines" in stdout


def test_lines_beyond_the_calibrations_lines_are_flagged_extrapolated(capsys, frames, cal_file, tmp_path):
    # The spectrum records the span of the lines its calibration was fitted to (and the model); a neon
    # frame's lines beyond that span are flagged, inside it not.
    calibration = json.loads(cal_file.read_text())["wavelength_calibration"]
    used = [m["reference_nm"] for m in calibration["matches"] if m["used_in_fit"]]
    spec = tmp_path / "ne.csv"
    assert main(["extract", str(frames / "ne.png"), "--calibration", str(cal_file), "--out", str(spec)]) == 0
    capsys.readouterr()
    code, stdout, _ = run(capsys, "lines", str(spec), "--json")
    table = json.loads(stdout)
    assert table["calibrated_span_nm"] == pytest.approx([min(used), max(used)])
    low, high = table["calibrated_span_nm"]
    flags = {round(l["centre_nm"], 3): l["extrapolated"] for l in table["lines"]}
    assert flags and all(flag == (not low <= centre <= high) for centre, flag in flags.items())
    # Ne I 703.24 nm (NIST ASD, air) lies beyond a CFL calibration's last line (650 nm)
    assert any(flag and abs(centre - 703.24) < 1.0 for centre, flag in flags.items())
    code, stdout, _ = run(capsys, "lines", str(spec))
    assert "extrapolated" in stdout and "the span of the calibration's lines" in stdout


def test_lines_outside_what_a_webcam_records_are_left_out_and_counted(capsys, tmp_path):
    """A calibrated axis extrapolated to 250-1150 nm: He I lines (NIST ASD air wavelengths, the packaged
    calibration/lines/He.csv) inside, and two peaks at 270 and 1130 nm, where a silicon webcam behind glass
    records no light (common practice, no source): artefacts of the extrapolated columns, as in the demo's
    tube A (82.97 and 276.87 nm). `identify` and the plots ignore 300-1100 nm's outside; `lines` must too.
    """
    from benchspec.identify import WAVELENGTH_RANGE_NM
    from benchspec.io import write_spectrum
    from benchspec.refdata import load_line_list
    from benchspec.spectrum import as_spectrum

    rng = np.random.default_rng(31)
    helium = load_line_list("He")
    strong = helium.wavelength_nm[helium.relative_intensity >= 0.1 * helium.relative_intensity.max()]
    wavelength = np.arange(250.0, 1150.0, 0.25)
    sigma = 1.0 / 2.3548  # 1 nm FWHM
    intensity = sum(np.exp(-0.5 * ((wavelength - centre) / sigma) ** 2) for centre in list(strong) + [270.0, 1130.0])
    noise = 0.005
    spectrum = as_spectrum(wavelength, intensity + rng.normal(0.0, noise, wavelength.size),
                           uncertainty=np.full(wavelength.size, noise))
    spec = write_spectrum(spectrum, tmp_path / "extrapolated.csv")
    low, high = WAVELENGTH_RANGE_NM

    code, stdout, _ = run(capsys, "lines", str(spec), "--json")
    table = json.loads(stdout)
    kept = np.array([l["centre_nm"] for l in table["lines"]])
    assert code == 0 and kept.size and np.all((kept >= low) & (kept <= high))
    assert table["recordable_range_nm"] == [low, high]
    outside = sorted(l["centre_nm"] for l in table["outside_recordable_range"])
    # a fifth of a 0.25 nm sample: the fitted centre of a SNR-200 line is far closer than that
    assert outside == pytest.approx([270.0, 1130.0], abs=0.05)
    for nist_nm in strong:  # every strong He I line is still in the table
        assert np.min(np.abs(kept - nist_nm)) < 0.05

    code, stdout, _ = run(capsys, "lines", str(spec))
    rows = [line for line in stdout.splitlines() if line[:12].strip().replace(".", "").isdigit()]
    centres = np.array([float(row.split()[0]) for row in rows])
    assert code == 0 and np.all((centres >= low) & (centres <= high)) and centres.size == kept.size
    assert f"{kept.size} emission lines" in stdout
    note = [line for line in stdout.splitlines() if "left out" in line]
    assert len(note) == 1 and note[0].startswith("2 more left out") and f"{low:g}-{high:g} nm" in note[0]


@pytest.mark.parametrize(
    "args, message",
    [
        (["calibrate", "{f}/black.png", "--out", "{t}/x.json"], "black"),
        (["calibrate", "{f}/truncated.png", "--out", "{t}/x.json"], "truncated"),
        (["calibrate", "{f}/broken.mp4", "--out", "{t}/x.json"], "video|read|open"),
        (["calibrate", "{f}/cfl.png", "--lamp", "zz", "--out", "{t}/x.json"], "unknown lamp 'zz'"),
        (["calibrate", "{f}/ne.png", "--lamp", "hg", "--out", "{t}/x.json"], "lamp 'hg'"),
        (["calibrate", "{f}/cfl.png", "--pair", "12", "--out", "{t}/x.json"], "PIXEL=NM"),
        (["calibrate", "{f}/missing.png", "--out", "{t}/x.json"], "does not exist|missing"),
        (["extract", "{f}/small.png", "--calibration", "{c}", "--out", "{t}/x.csv"], "640x360"),
        (["extract", "{f}/hg.png", "--calibration", "{f}/cfl.png", "--out", "{t}/x.csv"], "calibration file|image"),
        (["extract", "{f}/hg.png", "--calibration", "{c}", "--out", "{t}/x.xyz"], "format"),
    ],
)
def test_bad_input_is_one_line_exit_2_and_no_file(capsys, frames, cal_file, tmp_path, args, message):
    argv = [a.format(f=frames, t=tmp_path, c=cal_file) for a in args]
    code, stdout, stderr = run(capsys, *argv)
    assert code == 2
    assert len(stderr.strip().splitlines()) == 1 and "Traceback" not in stderr
    import re

    assert re.search(message, stderr), stderr
    assert list(tmp_path.iterdir()) == []


def test_existing_output_is_not_overwritten(capsys, frames, cal_file, tmp_path):
    out = tmp_path / "cal.json"
    out.write_text("keep")
    code, _, stderr = run(capsys, "calibrate", str(frames / "cfl.png"), "--out", str(out))
    assert code == 2 and "--force" in stderr and out.read_text() == "keep"
    spec = tmp_path / "s.csv"
    spec.write_text("keep")
    code, _, stderr = run(capsys, "extract", str(frames / "hg.png"), "--calibration", str(cal_file), "--out", str(spec))
    assert code == 2 and spec.read_text() == "keep"


def _pixel_of(cal_path, wavelength_nm):
    from benchspec.calfile import read_calibration

    solution = read_calibration(cal_path).wavelength.solution
    grid = np.linspace(*solution.pixel_range, 20001)
    return float(grid[int(np.argmin(np.abs(solution.wavelength_nm(grid) - wavelength_nm)))])


def test_a_manual_pair_is_written_to_the_calibration_file(capsys, frames, cal_file, tmp_path):
    """A 532 nm laser pair where the lamp's lines put 532 nm: the file is written and reads back.

    A manual pair has no detected line, so no SNR: the file holds null there (it held NaN,
    which JSON cannot carry, and the writer refused every --pair). 532 nm: the frequency-doubled
    Nd:YAG green laser (from memory).
    """
    from benchspec.calfile import read_calibration

    pixel = _pixel_of(cal_file, 532.0)
    out = tmp_path / "pair.json"
    code, stdout, err = run(capsys, "calibrate", str(frames / "cfl.png"), "--pair", f"{pixel:.2f}=532.0", "--out", str(out))
    assert code == 0, err
    manual = [m for m in json.loads(out.read_text())["wavelength_calibration"]["matches"] if m["species"] == "manual"]
    assert len(manual) == 1 and manual[0]["snr"] is None
    back = read_calibration(out)
    assert [m.pixel for m in back.wavelength.matches if m.species == "manual"] == [pytest.approx(pixel, abs=0.01)]


def test_a_pair_the_lamp_lines_contradict_is_refused(capsys, frames, cal_file, tmp_path):
    """532 nm given 60 px from where the CFL's lines put it: one line naming the pair, exit 2, no file.

    Before, the pair steered the search to a solution through it and a few loosely known
    phosphor lines, blue on the wrong side, verdict "fair".
    """
    pixel = _pixel_of(cal_file, 532.0) + 60.0
    out = tmp_path / "bad_pair.json"
    code, stdout, err = run(capsys, "calibrate", str(frames / "cfl.png"), "--pair", f"{pixel:.1f}=532.0", "--out", str(out))
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and "disagrees with the lamp 'cfl' lines" in err and "Traceback" not in err
    assert not out.exists()
