"""Bad files through the command line: one line on stderr, exit code 2, no traceback, nothing written.

Each command that reads a file gets a selection of the catalogue's bad inputs
for that kind of file (see :mod:`benchspec.fuzz`), written under a path with
spaces and non-ASCII characters. ``--debug`` turns the one line back into the
full traceback.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from benchspec import fuzz, io
from benchspec.cli import build_parser, main
from benchspec.errors import BenchspecError

READERS = {reader.name: reader for reader in fuzz.readers()}
CATALOGUE = fuzz.bad_inputs()


def _commands() -> set[str]:
    parser = build_parser()
    for action in parser._subparsers._group_actions:  # the registered command groups
        return set(action.choices)
    return set()


AVAILABLE = _commands()

# (command name, reader whose bad inputs it gets, argv template). {bad} is the bad file,
# {out} a fresh output folder, {frame} a valid frame, {spectrum} a valid spectrum, {cal} a valid calibration.
COMMANDS = [
    ("lines", "spectrum-csv", ["lines", "{bad}"]),
    ("lines", "spectrum-jdx", ["lines", "{bad}"]),
    ("identify", "spectrum-json", ["identify", "{bad}"]),
    ("identify", "spectrum-txt", ["identify", "{bad}"]),
    ("convert", "spectrum-csv", ["convert", "{bad}", "{out}/copy.json"]),
    ("convert", "spectrum-jdx", ["convert", "{bad}", "{out}/copy.csv"]),
    ("report", "spectrum-json", ["report", "{bad}", "--out", "{out}/report.pdf"]),
    ("calibrate", "image-png", ["calibrate", "{bad}", "--lamp", "cfl", "--out", "{out}/cal.json"]),
    ("calibrate", "image-jpeg", ["calibrate", "{bad}", "--lamp", "hg", "--out", "{out}/cal.json"]),
    ("calibrate", "video-avi", ["calibrate", "{bad}", "--lamp", "cfl", "--out", "{out}/cal.json"]),
    ("extract", "image-tiff", ["extract", "{bad}", "--calibration", "{cal}", "--out", "{out}/spectrum.csv"]),
    ("extract", "calibration-json", ["extract", "{frame}", "--calibration", "{bad}", "--out", "{out}/spectrum.csv"]),
    ("simulate", "bench-toml", ["simulate", "--bench", "{bad}", "--out", "{out}/frame.png"]),
    ("simulate", "bench-json", ["simulate", "--bench", "{bad}", "--out", "{out}/frame.png"]),
    ("metrics", "response-json", ["metrics", "{spectrum}", "--response", "{bad}", "--plot", "{out}/metrics.png"]),
    ("session", "session-manifest", ["session", "list", "{session}"]),
    ("extract", "response-json", ["extract", "{frame}", "--calibration", "{cal}", "--response", "{bad}", "--out", "{out}/spectrum.csv"]),
    ("report", "calibration-json", ["report", "{spectrum}", "--calibration", "{bad}", "--out", "{out}/report.pdf"]),
    ("session", "calibration-json", ["session", "add", "{out}/log", "--spectrum", "{spectrum}", "--calibration", "{bad}"]),
]

# A spread of every kind of bad input, the same for each command (deterministic).
_KINDS = ("empty", "whitespace-only", "truncated-50pct", "random-bytes", "wrong-type-pdf", "wrong-type-image-file",
          "wrong-type-spectrum-file", "latin-1-text", "utf-16-text", "number-nan", "number-1e999",
          "huge-sparse-file-300MB", "png-claims-100000x100000", "jpeg-claims-60000x60000", "tiff-claims-100000x100000",
          "avi-frames-claim-12000x12000", "avi-header-only", "schema-version-2", "schema-version-99",
          "schema-schema_version-99", "schema-version-99", "unit-wavelength-um", "xunits-wavenumber", "no-end-label",
          "deeply-nested", "source-number", "width-null", "nan-value", "schema-version-benchspec.calibration-2",
          "unit-medium-vacuum", "nested-geometry.centre_row-string", "schema-key-relative_response-string",
          "schema-key-title-list")


def _selection(reader_name: str) -> list[fuzz.BadInput]:
    cases = [c for c in CATALOGUE if c.reader == reader_name and c.must_refuse and c.case in _KINDS]
    return cases


PARAMS = [
    pytest.param(command, reader, argv, case, id=f"{command}-{case.id}")
    for command, reader, argv in COMMANDS
    if reader in READERS
    for case in _selection(reader)
]


def _valid_files(folder: Path) -> dict:
    folder.mkdir(parents=True, exist_ok=True)
    frame = folder / "frame.png"
    import cv2

    ok, png = cv2.imencode(".png", fuzz._test_frame(width=480, height=320))
    frame.write_bytes(png.tobytes())
    spectrum = folder / "spectrum.csv"
    if not spectrum.exists():
        io.write_spectrum(fuzz._sample_spectrum(), spectrum)
    files = {"frame": frame, "spectrum": spectrum}
    if "calibration-json" in READERS:
        cal = folder / "cal.json"
        cal.write_bytes(READERS["calibration-json"].valid)
        files["cal"] = cal
    return files


def _argv(template, *, bad: Path, out: Path, valid: dict, session: Path | None = None) -> list[str]:
    values = {"bad": str(bad), "out": str(out), "session": str(session) if session else "", **{k: str(v) for k, v in valid.items()}}
    return [part.format(**values) for part in template]


def _prepare(case: fuzz.BadInput, reader: fuzz.Reader, folder: Path) -> tuple[Path, Path | None]:
    bad = fuzz.write_input(folder, reader, case.data, sparse_size=case.sparse_size)
    session = None
    if reader.name == "session-manifest":
        session = fuzz._session_copy_with(bad, "session.json")
    return bad, session


@pytest.mark.parametrize("command,reader_name,template,case", PARAMS)
def test_cli_refuses_bad_file_with_one_line_and_exit_2(tmp_path, capsys, command, reader_name, template, case):
    if command not in AVAILABLE:
        pytest.skip(f"the `{command}` command is not registered yet")
    reader = READERS[reader_name]
    valid = _valid_files(tmp_path / "valid")
    bad, session = _prepare(case, reader, tmp_path)
    out = tmp_path / "out folder ü"
    out.mkdir()
    code = main(_argv(template, bad=bad, out=out, valid=valid, session=session))
    captured = capsys.readouterr()
    err = captured.err.strip().splitlines()
    errors = [line for line in err if ": error: " in line]
    assert code == 2, f"exit code {code}; stderr: {captured.err!r}"
    assert "Traceback" not in captured.err
    assert len(errors) == 1, captured.err
    assert errors[0].startswith(f"benchspec {command}: error: ")
    named = bad.name in errors[0] or bad.stem in errors[0] or (session is not None and session.name in errors[0])
    assert named, f"the message does not name the file: {errors[0]!r}"
    assert list(out.iterdir()) == [], "a refused command wrote something"
    # only warnings and safety cautions may accompany the error line
    assert all(line.startswith(("benchspec", "caution")) for line in err), captured.err


@pytest.mark.parametrize("command,reader_name,template", [c for c in COMMANDS if c[1] in READERS][::3],
                         ids=[f"{c[0]}-{c[1]}" for c in COMMANDS if c[1] in READERS][::3])
def test_debug_shows_the_traceback(tmp_path, command, reader_name, template):
    if command not in AVAILABLE:
        pytest.skip(f"the `{command}` command is not registered yet")
    reader = READERS[reader_name]
    valid = _valid_files(tmp_path / "valid")
    case = next(c for c in CATALOGUE if c.reader == reader_name and c.case == "empty")
    bad, session = _prepare(case, reader, tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    with pytest.raises(BenchspecError):
        main(["--debug", *_argv(template, bad=bad, out=out, valid=valid, session=session)])


def test_cli_selection_is_counted():
    """Every command with a reader gets several kinds of bad input."""
    per_command = {}
    for param in PARAMS:
        per_command.setdefault((param.values[0], param.values[1]), 0)
        per_command[(param.values[0], param.values[1])] += 1
    assert len(PARAMS) >= 100
    for key, count in per_command.items():
        assert count >= 5, key


def test_cli_reads_valid_files_at_awkward_paths(tmp_path, capsys):
    """The good path works too: a spectrum under a folder with spaces and non-ASCII names."""
    if "lines" not in AVAILABLE:
        pytest.skip("the `lines` command is not registered yet")
    reader = READERS["spectrum-csv"]
    path = fuzz.write_input(tmp_path, reader, reader.valid)
    assert main(["lines", str(path), "--json"]) == 0
    printed = capsys.readouterr().out
    assert json.loads(printed) is not None


# --------------------------------------------------------------------------- valid files, pathological content


def _pathological_spectra() -> dict:
    """Spectra that parse but hold what no bench should produce (invented shapes)."""
    from benchspec.spectrum import Spectrum

    wl = np.linspace(400.0, 700.0, 301)
    index = np.arange(301, dtype=float)
    peak = np.exp(-0.5 * ((index - 150) / 2.0) ** 2)

    def make(wavelength, intensity, uncertainty=None):
        intensity = np.asarray(intensity, dtype=float)
        sigma = np.ones(intensity.size) if uncertainty is None else np.asarray(uncertainty, dtype=float)
        return Spectrum(intensity=intensity, uncertainty=sigma, pixel=np.arange(intensity.size, dtype=float),
                        wavelength_nm=None if wavelength is None else np.asarray(wavelength, dtype=float),
                        provenance=io.build_provenance(created_utc="2026-12-01T20:00:00Z"))

    return {
        "constant": make(wl, np.full(301, 5.0)),
        "all-zero-no-noise": make(wl, np.zeros(301), np.zeros(301)),
        "two-samples": make([500.0, 501.0], [1.0, 2.0]),
        "negative": make(wl, -100 * np.abs(np.sin(wl))),
        "near-1e300": make(wl, 1e300 * peak),
        "near-1e-300": make(wl, 1e-300 * peak),
        "uncalibrated": make(None, 100 * peak),
        "far-ultraviolet": make(np.linspace(10.0, 20.0, 301), 100 * peak),
        "mid-infrared": make(np.linspace(5000.0, 6000.0, 301), 100 * peak),
        "single-spike": make(wl, np.where(index == 150, 1e6, 0.0)),
        "one-picometre-wide": make(np.linspace(500.0, 500.001, 301), np.random.default_rng(0).random(301)),
        "zero-uncertainty": make(wl, 100 * peak + 1, np.zeros(301)),
    }


PATHOLOGICAL = _pathological_spectra()
CONTENT_COMMANDS = [["lines", "{f}"], ["lines", "{f}", "--absorption"], ["identify", "{f}"],
                    ["convert", "{f}", "{o}/copy.jdx"], ["metrics", "{f}"], ["metrics", "{f}", "--white"],
                    ["absorbance", "{f}", "--blank", "{f}"], ["rydberg", "{f}"], ["daylight", "{f}"],
                    ["response", "{f}", "--temperature", "2900", "--out", "{o}/response.json"]]


@pytest.mark.parametrize("argv", CONTENT_COMMANDS, ids=[" ".join(c[:1] + [x for x in c[2:3] if x.startswith("--")]) for c in CONTENT_COMMANDS])
@pytest.mark.parametrize("name", list(PATHOLOGICAL))
def test_pathological_content_never_crashes(tmp_path, capsys, name, argv):
    command = argv[0]
    if command not in AVAILABLE:
        pytest.skip(f"the `{command}` command is not registered yet")
    path = tmp_path / f"odd {name}.json"
    io.write_spectrum(PATHOLOGICAL[name], path)
    out = tmp_path / "out"
    out.mkdir()
    code = main([part.format(f=path, o=out) for part in argv])  # an exception here is a crash
    captured = capsys.readouterr()
    assert code in (0, 2), captured.err
    assert "Traceback" not in captured.err
    if code == 2:
        errors = [line for line in captured.err.splitlines() if ": error: " in line]
        assert len(errors) == 1 and errors[0].startswith(f"benchspec {command}: error: ")
        assert list(out.iterdir()) == []


def _pathological_frames() -> dict:
    """Frames that decode but hold no usable spectrum, or odd pixel formats (invented content)."""
    rng = np.random.default_rng(0)
    height, width = 240, 320
    pattern = fuzz._test_frame(width=width, height=height)  # RGB
    return {
        "black.png": np.zeros((height, width, 3), np.uint8),
        "white-saturated.png": np.full((height, width, 3), 255, np.uint8),
        "uniform-grey.png": np.full((height, width, 3), 128, np.uint8),
        "noise-only.png": rng.integers(0, 256, (height, width, 3), dtype=np.uint8),
        "one-pixel.png": np.full((1, 1, 3), 200, np.uint8),
        "one-row.png": (rng.random((1, 2000)) * 255).astype(np.uint8),
        "one-column.png": (rng.random((2000, 1)) * 255).astype(np.uint8),
        "band-touching-edge.png": np.vstack([np.full((20, width), 220, np.uint8), np.full((height - 20, width), 10, np.uint8)]),
        "16-bit-black.png": np.zeros((height, width), np.uint16),
        "16-bit-noise.png": rng.integers(0, 65536, (height, width), dtype=np.uint16),
        "two-lines-only.png": pattern,
        "palette.png": ("P", pattern),
        "grey-alpha.png": ("LA", pattern),
        "rgba.png": ("RGBA", pattern),
        "cmyk.jpg": ("CMYK", pattern),
        "one-bit.png": ("1", pattern),
        "multi-page.tif": ("multi", pattern),
    }


def _write_frame(path: Path, content) -> None:
    import cv2
    from PIL import Image

    if isinstance(content, tuple):
        mode, rgb = content
        image = Image.fromarray(rgb)
        if mode == "multi":
            image.save(path, save_all=True, append_images=[image])
        else:
            image.convert(mode).save(path)
        return
    array = content[:, :, ::-1] if content.ndim == 3 else content
    path.write_bytes(cv2.imencode(path.suffix, array)[1].tobytes())


PATHOLOGICAL_FRAMES = _pathological_frames()


@pytest.mark.parametrize("name", list(PATHOLOGICAL_FRAMES))
def test_pathological_frames_never_crash_calibrate(tmp_path, capsys, name):
    if "calibrate" not in AVAILABLE:
        pytest.skip("the `calibrate` command is not registered yet")
    path = tmp_path / f"frame {name}"
    _write_frame(path, PATHOLOGICAL_FRAMES[name])
    out = tmp_path / "out"
    out.mkdir()
    code = main(["calibrate", str(path), "--lamp", "cfl", "--out", str(out / "cal.json")])
    captured = capsys.readouterr()
    assert code == 2, captured.err  # none of these holds a lamp spectrum to calibrate on
    errors = [line for line in captured.err.splitlines() if ": error: " in line]
    assert len(errors) == 1 and errors[0].startswith("benchspec calibrate: error: ") and "Traceback" not in captured.err
    assert list(out.iterdir()) == []


# --------------------------------------------------------------------------- standards tables (Beer-Lambert)

STANDARDS_TABLES = {
    "same-concentration": "concentration,absorbance\n0.1,0.2\n0.1,0.41\n0.1,0.6\n",
    "one-standard": "concentration,absorbance\n0.1,0.2\n",
    "flat-absorbance": "concentration,absorbance\n0.1,0.2\n0.2,0.2\n0.3,0.2\n",
    "concentrations-1e300": "concentration,absorbance\n1e300,0.2\n2e300,0.4\n3e300,0.6\n",
    "concentrations-1e-300": "concentration,absorbance\n1e-300,0.2\n2e-300,0.4\n3e-300,0.6\n",
    "negative": "concentration,absorbance\n-0.1,-0.2\n-0.2,-0.4\n-0.3,-0.6\n",
    "negative-uncertainty": "concentration,absorbance,uncertainty\n0.1,0.2,-1\n0.2,0.4,-1\n0.3,0.6,-1\n",
    "text-cells": "concentration,absorbance\nlow,0.2\nhigh,0.4\n",
    "wrong-columns": "c,a\n0.1,0.2\n0.2,0.4\n",
    "nan": "concentration,absorbance\n0.1,nan\n0.2,0.4\n0.3,0.6\n",
}


@pytest.mark.parametrize("unknown", ["0.5", "1e308"])
@pytest.mark.parametrize("name", list(STANDARDS_TABLES))
def test_bad_standards_table_is_refused(tmp_path, capsys, name, unknown):
    if "concentration" not in AVAILABLE:
        pytest.skip("the `concentration` command is not registered yet")
    path = tmp_path / f"standards {name}.csv"
    path.write_text(STANDARDS_TABLES[name], encoding="utf-8")
    code = main(["concentration", "--table", str(path), "--unknown-absorbance", unknown])  # an exception is a crash
    captured = capsys.readouterr()
    assert code == 2, captured
    errors = [line for line in captured.err.splitlines() if ": error: " in line]
    assert len(errors) == 1 and "Traceback" not in captured.err


def test_unknown_far_outside_the_calibration_is_refused(tmp_path, capsys):
    if "concentration" not in AVAILABLE:
        pytest.skip("the `concentration` command is not registered yet")
    path = tmp_path / "standards.csv"
    path.write_text("concentration,absorbance\n0.1,0.21\n0.2,0.39\n0.3,0.62\n", encoding="utf-8")
    assert main(["concentration", "--table", str(path), "--unknown-absorbance", "0.5"]) == 0
    capsys.readouterr()
    assert main(["concentration", "--table", str(path), "--unknown-absorbance", "1e308"]) == 2
    assert "outside the calibration" in capsys.readouterr().err


def test_a_reader_that_stops_early_is_not_a_bug(tmp_path):
    # `benchspec lines SPEC.csv | head -3`: the pipe closes while the table is written; the command
    # ends quietly (the Unix convention for a closed pipe, common practice, no source), no "internal error".
    import subprocess
    import sys

    from benchspec.io import write_spectrum
    from benchspec import Spectrum

    pixel = np.arange(4000.0)
    intensity = 10.0 + sum(500.0 * np.exp(-0.5 * ((pixel - c) / 1.5) ** 2) for c in range(20, 4000, 25))
    path = tmp_path / "many.csv"
    write_spectrum(Spectrum(intensity=intensity, uncertainty=np.full(pixel.size, 2.0), pixel=pixel,
                            wavelength_nm=300.0 + 0.2 * pixel), path)
    reader = subprocess.Popen([sys.executable, "-c", "pass"], stdin=subprocess.PIPE)
    reader.wait(timeout=30)  # gone before the first row: every write meets a closed pipe
    writer = subprocess.run([sys.executable, "-c", "from benchspec.cli import run; run()", "lines", str(path)],
                            stdout=reader.stdin, stderr=subprocess.PIPE, text=True, timeout=120)
    reader.stdin.close()
    assert "internal error" not in writer.stderr and "Traceback" not in writer.stderr, writer.stderr
    assert writer.returncode == 0


@pytest.mark.parametrize("argv, fragment", [
    (["cautions", "sun"], "invalid choice: 'sun'"),
    (["calibrate", "frame.png"], "the following arguments are required: --out"),
    (["nosuch"], "invalid choice: 'nosuch'"),
    (["extract", "frame.png", "--calibration"], "expected one argument"),
])
def test_usage_errors_are_one_line_with_exit_2(capsys, argv, fragment):
    """A mistyped command line gets one line (what is wrong, and where the usage is), exit code 2.

    argparse printed its whole usage block first (3-12 lines); the brief asks for one line.
    """
    with pytest.raises(SystemExit) as exit_info:
        main(argv)
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and fragment in err and "--help" in err
