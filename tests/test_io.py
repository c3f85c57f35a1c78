"""Exports and imports: exact round trips, an independent JCAMP-DX reader, bad files, faults."""

from __future__ import annotations

import errno
import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

import benchspec
from benchspec import Spectrum
from benchspec import io as bio
from benchspec.errors import ExportError, FileFormatError, InputError

FIELDS = ("intensity", "uncertainty", "pixel", "wavelength_nm", "wavelength_uncertainty_nm", "saturated")


def _assert_same(a: Spectrum, b: Spectrum) -> None:
    for name in FIELDS:
        x, y = getattr(a, name), getattr(b, name)
        if x is None or y is None:
            assert x is None and y is None, name
        else:
            assert x.dtype == y.dtype and np.array_equal(x, y), name  # bit-for-bit, not approximately
    assert a.provenance == b.provenance


@pytest.fixture
def calibrated(rng):
    """A webcam-like spectrum: a quadratic (not evenly spaced) wavelength solution, awkward floats."""
    pixel = np.arange(640.0)
    wavelength = 379.123456789 + 0.5123 * pixel + 1.7e-5 * pixel**2
    intensity = rng.normal(200.0, 60.0, pixel.size)
    intensity[7] = -3.25e-7  # tiny negative after background subtraction
    intensity[8] = 1.0e17
    intensity[9] = -0.0
    provenance = bio.build_provenance(
        frames=[{"path": "cfl frame 1.png", "sha256": "ab" * 32}],
        calibration={"path": "cal é.json", "rms_nm": 0.041, "rms_px": 0.08, "lamp": "cfl", "line_list_source": "NIST ASD"},
        settings={"gamma": "srgb", "stack": "median", "weights": [0.3, 0.59, 0.11]},
        source_type="fluorescent",
        notes="bench 3, invented school lab \u2028 second line",
    )
    return Spectrum(
        intensity=intensity,
        uncertainty=np.abs(rng.normal(5.0, 1.0, pixel.size)),
        pixel=pixel,
        wavelength_nm=wavelength,
        wavelength_uncertainty_nm=np.full(pixel.size, 0.031),
        saturated=rng.random(pixel.size) > 0.97,
        provenance=provenance,
    )


@pytest.fixture
def uncalibrated(rng):
    return Spectrum(intensity=rng.normal(10, 2, 50), uncertainty=np.full(50, 0.5), pixel=np.arange(50.0) + 12)


# --------------------------------------------------------------------------- round trips


@pytest.mark.parametrize("extension", [".csv", ".json", ".jdx", ".dx"])
def test_round_trip_is_exact(tmp_path, calibrated, extension):
    folder = tmp_path / "dossier élève 2"  # spaces and non-ASCII characters
    folder.mkdir()
    path = bio.write_spectrum(calibrated, folder / f"lampe à gaz{extension}")
    _assert_same(calibrated, bio.read_spectrum(path))


@pytest.mark.parametrize("extension", [".csv", ".json"])
def test_uncalibrated_round_trip(tmp_path, uncalibrated, extension):
    path = bio.write_spectrum(uncalibrated, tmp_path / f"raw{extension}")
    back = bio.read_spectrum(path)
    _assert_same(uncalibrated, back)
    assert not back.is_calibrated


def test_csv_follows_the_extract_contract(tmp_path, calibrated, uncalibrated):
    # Contract of `benchspec extract` (issue 3, part 7): '#' comments, then a header with at least
    # wavelength_nm,intensity,uncertainty,saturated, one row per sample, wavelength increasing.
    text = bio.write_spectrum(calibrated, tmp_path / "s.csv").read_text(encoding="utf-8")
    lines = text.splitlines()
    body = [line for line in lines if not line.startswith("#")]
    assert all(line.startswith("#") for line in lines[: len(lines) - len(body)])
    assert body[0].split(",")[:4] == ["wavelength_nm", "intensity", "uncertainty", "saturated"]
    assert len(body) - 1 == calibrated.size
    wavelengths = [float(row.split(",")[0]) for row in body[1:]]
    assert all(b > a for a, b in zip(wavelengths, wavelengths[1:]))
    assert {row.split(",")[3] for row in body[1:]} <= {"0", "1"}
    raw = bio.write_spectrum(uncalibrated, tmp_path / "u.csv").read_text(encoding="utf-8")
    assert [line for line in raw.splitlines() if not line.startswith("#")][0] == "pixel,intensity,uncertainty,saturated"


def test_json_layout(tmp_path, calibrated):
    obj = json.loads(bio.write_spectrum(calibrated, tmp_path / "s.json").read_text(encoding="utf-8"))
    assert obj["schema"] == "benchspec.spectrum" and obj["schema_version"] == 1
    for key in ("wavelength_nm", "intensity", "uncertainty"):
        assert len(obj[key]) == calibrated.size
    assert isinstance(obj["provenance"], dict) and obj["provenance"]["software"]["version"] == benchspec.__version__


# --------------------------------------------------------------------------- JCAMP-DX against an independent reader


def _jcamp_read(path):
    import jcamp  # the `jcamp` package from PyPI: an independent JCAMP-DX reader

    reader = getattr(jcamp, "jcamp_readfile", None) or jcamp.readfile
    return reader(str(path))


def test_jcamp_xypoints_read_by_independent_reader(tmp_path, calibrated):
    path = bio.write_spectrum(calibrated, tmp_path / "spectre é.jdx")
    text = path.read_text(encoding="utf-8")
    assert "##JCAMP-DX=5.01" in text and "##DATA TYPE=UV/VIS SPECTRUM" in text
    assert "##XYPOINTS=(XY..XY)" in text  # the polynomial axis is not evenly spaced
    assert max(len(line) for line in text.splitlines()) <= 80  # JCAMP-DX line length
    data = _jcamp_read(path)
    assert data["xunits"] == "NANOMETERS" and data["yunits"] == "ARBITRARY UNITS"
    assert data["data type"] == "UV/VIS SPECTRUM"
    # Written with full (shortest round-trip) precision, so the independent reader gets the same numbers.
    np.testing.assert_array_equal(data["x"], calibrated.wavelength_nm)
    np.testing.assert_array_equal(data["y"], calibrated.intensity)


def test_jcamp_xydata_for_even_axis(tmp_path, rng):
    wavelength = np.linspace(400.0, 700.0, 301)
    spectrum = benchspec.as_spectrum(wavelength, rng.normal(1.0, 0.3, 301), provenance=bio.build_provenance(quantity="absorbance", intensity_unit="absorbance"))
    path = bio.write_spectrum(spectrum, tmp_path / "a.dx")
    assert "##XYDATA=(X++(Y..Y))" in path.read_text(encoding="utf-8")
    data = _jcamp_read(path)
    assert data["yunits"] == "ABSORBANCE"
    np.testing.assert_array_equal(data["x"], wavelength)
    np.testing.assert_array_equal(data["y"], spectrum.intensity)
    _assert_same(spectrum, bio.read_spectrum(path))


def test_jcamp_needs_a_wavelength_axis(tmp_path, uncalibrated):
    with pytest.raises(InputError, match="uncalibrated"):
        bio.write_spectrum(uncalibrated, tmp_path / "u.jdx")
    assert not (tmp_path / "u.jdx").exists()


def test_jcamp_compressed_forms_match_the_independent_reader(tmp_path):
    # ASDF compression (SQZ, DIF, DUP) of JCAMP-DX: values 1 2 3 3 2 1 0 -1 -2 -3, the worked example
    # of the JCAMP-DX paper (McDonald & Wilks 1988), here from memory; decoded here and by `jcamp`.
    expected = [1, 2, 3, 3, 2, 1, 0, -1, -2, -3]
    for form, body in {"AFFN": "1 1 2 3 3 2 1 0 -1 -2 -3", "SQZ": "1ABCCBA@abc", "DIF": "1AJJ%jjjjjj", "DIFDUP": "1AJT%jX"}.items():
        path = tmp_path / f"{form}.jdx"
        path.write_text(
            "##TITLE=compression example\n##JCAMP-DX=5.01\n##DATA TYPE=UV/VIS SPECTRUM\n##XUNITS=NANOMETERS\n"
            "##YUNITS=ABSORBANCE\n##XFACTOR=1\n##YFACTOR=1\n##FIRSTX=401\n##LASTX=410\n##NPOINTS=10\n"
            f"##XYDATA=(X++(Y..Y))\n{body.replace('1', '401', 1)}\n##END=\n",
            encoding="ascii",
        )
        ours = bio.read_spectrum(path)
        np.testing.assert_array_equal(ours.intensity, expected, err_msg=form)
        np.testing.assert_array_equal(_jcamp_read(path)["y"], expected, err_msg=form)
        np.testing.assert_array_equal(ours.wavelength_nm, np.arange(401.0, 411.0))
        assert ours.provenance["quantity"] == "absorbance"


def _dif_file(path, second_line):
    path.write_text(
        "##TITLE=y check\n##JCAMP-DX=5.01\n##XUNITS=NANOMETERS\n##YUNITS=ARBITRARY UNITS\n##FIRSTX=500\n##LASTX=504\n"
        f"##NPOINTS=5\n##XYDATA=(X++(Y..Y))\n500 A0JJ\n{second_line}\n##END=\n",
        encoding="ascii",
    )
    return path


def test_jcamp_dif_y_check_across_lines(tmp_path):
    # A line ending in DIF form is followed by a line whose first Y repeats the last Y (JCAMP-DX 5.01 Y-check).
    good = _dif_file(tmp_path / "good.jdx", "502 A2JJ")
    np.testing.assert_array_equal(bio.read_spectrum(good).intensity, [10, 11, 12, 13, 14])
    np.testing.assert_array_equal(_jcamp_read(good)["y"], [10, 11, 12, 13, 14])
    bad = _dif_file(tmp_path / "bad.jdx", "502 A5JJ")
    with pytest.raises(FileFormatError, match="bad.jdx.*Y-check"):
        bio.read_spectrum(bad)


# --------------------------------------------------------------------------- plain text from other instruments


@pytest.mark.parametrize(
    "name, content, wavelength, intensity",
    [
        ("whitespace.txt", "400.0  1.5\n401.0\t2.5\n402.0 3.5\n", [400, 401, 402], [1.5, 2.5, 3.5]),
        ("comma.csv", "wavelength,counts\n400.5,10\n401.5,11\n402.5,12\n", [400.5, 401.5, 402.5], [10, 11, 12]),
        ("semicolon.txt", "Wavelength [nm];Counts\n400,5;10,25\n401,5;11,5\n", [400.5, 401.5], [10.25, 11.5]),
        ("angstrom.dat", "# exported by an invented lab spectrometer\nlambda (A)\tflux\n4000\t1\n4010\t2\n", [400, 401], [1, 2]),
        ("red first.txt", "700,1\n600,2\n500,3\n", [500, 600, 700], [3, 2, 1]),
        ("windows.txt", "450 5\r\n451 6\r\n", [450, 451], [5, 6]),
    ],
)
def test_plain_text_spectra_import(tmp_path, name, content, wavelength, intensity):
    path = tmp_path / name
    path.write_bytes(content.encode("utf-8"))
    spectrum = bio.read_spectrum(path)
    np.testing.assert_allclose(spectrum.wavelength_nm, wavelength, rtol=0, atol=1e-9)
    np.testing.assert_allclose(spectrum.intensity, intensity, rtol=0, atol=1e-12)
    record = spectrum.provenance["imported_from"]
    assert record["path"] == str(path) and record["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert np.all(spectrum.uncertainty > 0)


def test_plain_text_pixel_axis_gives_an_uncalibrated_spectrum(tmp_path):
    path = tmp_path / "raw.txt"
    path.write_text("pixel counts\n10 5\n11 7\n12 6\n", encoding="utf-8")
    spectrum = bio.read_spectrum(path)
    assert not spectrum.is_calibrated
    np.testing.assert_array_equal(spectrum.pixel, [10, 11, 12])


def test_plain_text_uncertainty_column_is_used(tmp_path):
    path = tmp_path / "with sigma.csv"
    path.write_text("wavelength_nm,signal,sigma\n500,10,0.5\n501,11,0.6\n", encoding="utf-8")
    spectrum = bio.read_spectrum(path)
    np.testing.assert_array_equal(spectrum.uncertainty, [0.5, 0.6])


def test_absorbance_table_reads_as_a_spectrum(tmp_path):
    wavelength = np.linspace(450, 650, 21)
    absorbance = np.linspace(0.1, 1.2, 21)
    path = bio.write_table(
        tmp_path / "abs.csv",
        {"wavelength_nm": wavelength, "absorbance": absorbance, "uncertainty": np.full(21, 0.01)},
        provenance=bio.build_provenance(quantity="absorbance", intensity_unit="absorbance"),
    )
    spectrum = bio.read_spectrum(path)
    np.testing.assert_array_equal(spectrum.intensity, absorbance)
    assert spectrum.provenance["quantity"] == "absorbance"
    table = bio.read_table(path, required=("absorbance",))
    np.testing.assert_array_equal(table["wavelength_nm"], wavelength)


def test_table_writer_round_trip_and_checks(tmp_path):
    columns = {"wavelength_nm": [500.0, 501.0], "flag": [True, False], "count": [3, 4], "label": ["Hg, 546", 'a "b"']}
    path = bio.write_table(tmp_path / "t.csv", columns, comments=["a title"])
    table = bio.read_table(path)
    np.testing.assert_array_equal(table["flag"], [1, 0])
    assert list(table["label"]) == ["Hg, 546", 'a "b"']
    with pytest.raises(InputError, match="same length"):
        bio.write_table(tmp_path / "u.csv", {"a": [1.0], "b": [1.0, 2.0]})
    with pytest.raises(InputError, match="non-finite"):
        bio.write_table(tmp_path / "u.csv", {"a": [1.0, np.nan]})
    with pytest.raises(InputError, match="column name"):
        bio.write_table(tmp_path / "u.csv", {"a,b": [1.0]})
    assert not (tmp_path / "u.csv").exists()


# --------------------------------------------------------------------------- bad files: one line naming the file


BAD_FILES = {
    "empty.csv": (b"", "empty"),
    "blank.json": (b" \n\n", "empty"),
    "truncated.json": (b'{"schema": "benchspec.spectrum", "schema_version": 1, "intensity": [1, 2', "not valid JSON"),
    "photo.csv": (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "binary|image"),
    "photo.jdx": (b"\xff\xd8\xff\xe0\x00\x10JFIF", "binary|image"),
    "nan.txt": (b"400 1\n401 nan\n402 3\n", "non-finite"),
    "inf.csv": (b"# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n400,1,1,0\n401,inf,1,0\n", "finite"),
    "infinity.json": (b'{"schema":"benchspec.spectrum","schema_version":1,"intensity":[1,Infinity],"uncertainty":[1,1],"pixel":[0,1]}', "non-finite"),
    "latin1.txt": ("400 1\n401 2\n# r\xe9sum\xe9\n".encode("latin-1"), "not UTF-8"),
    "version.json": (b'{"schema":"benchspec.spectrum","schema_version":99,"intensity":[1,2]}', "version 99"),
    "version.csv": (b"# schema: benchspec.spectrum/2\nwavelength_nm,intensity,uncertainty,saturated\n400,1,1,0\n401,1,1,0\n", "version '2'"),
    "other.json": (b'{"schema":"something.else"}', "not a benchspec spectrum"),
    "units.json": (b'{"schema":"benchspec.spectrum","schema_version":1,"units":{"wavelength":"um"},"intensity":[1,2],"uncertainty":[1,1],"pixel":[0,1]}', "nm"),
    "units.jdx": (b"##TITLE=x\n##JCAMP-DX=5.01\n##XUNITS=1/CM\n##XYPOINTS=(XY..XY)\n400, 1\n401, 2\n##END=\n", "XUNITS"),
    "units.csv": (b"# schema: benchspec.spectrum/1\nwavelength_um,intensity,uncertainty,saturated\n0.4,1,1,0\n0.5,1,1,0\n", "not a wavelength in nm"),
    "wavenumber.txt": (b"wavenumber (cm-1),intensity\n20000,1\n20001,2\n", "not a wavelength"),
    "metres.txt": (b"4.0e-7 1\n5.0e-7 2\n", "does not look like wavelengths"),
    "metres header.txt": (b"wavelength intensity\n4.0e-7 1\n5.0e-7 2\n", "does not look like wavelengths"),
    "shuffled.csv": (b"# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n400,1,1,0\n402,1,1,0\n401,1,1,0\n", "not strictly increasing"),
    "repeated.txt": (b"400 1\n401 1\n401 2\n", "not strictly increasing"),
    "ragged.csv": (b"# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n400,1,1,0\n401,2,1\n", "truncated"),
    "header only.csv": (b"# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n", "no data rows"),
    "words.txt": (b"hello there\nthis is not\na spectrum at all\n", "not two numbers"),
    "one row.txt": (b"500 1\n", "at least 2"),
    "no end.jdx": (b"##TITLE=x\n##JCAMP-DX=5.01\n##XUNITS=NANOMETERS\n##XYPOINTS=(XY..XY)\n400, 1\n401, 2\n", "without ##END"),
    "short.jdx": (b"##TITLE=x\n##JCAMP-DX=5.01\n##XUNITS=NANOMETERS\n##FIRSTX=400\n##LASTX=409\n##NPOINTS=10\n##XYDATA=(X++(Y..Y))\n400 1 2 3\n##END=\n", "NPOINTS"),
    "text.jdx": (b"just some words\n", "JCAMP-DX"),
    "nested.json": (b"[" * 100000, "nested too deeply|not valid JSON"),
    "plot.png": (b"\x89PNG\r\n\x1a\n", "is a plot"),
    "negative sigma.csv": (b"# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n400,1,-1,0\n401,1,1,0\n", "negative"),
    "flags.csv": (b"# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n400,1,1,2\n401,1,1,0\n", "0 or 1"),
    "provenance.csv": (b"# provenance-json: {\"a\":\n# schema: benchspec.spectrum/1\nwavelength_nm,intensity,uncertainty,saturated\n400,1,1,0\n401,1,1,0\n", "provenance"),
}


@pytest.mark.parametrize("name", sorted(BAD_FILES))
def test_bad_files_give_one_line_naming_the_file(tmp_path, name):
    content, pattern = BAD_FILES[name]
    folder = tmp_path / "mes données"
    folder.mkdir()
    path = folder / name
    path.write_bytes(content)
    with pytest.raises(FileFormatError, match=pattern) as info:
        bio.read_spectrum(path)
    message = str(info.value)
    assert str(path) in message and "\n" not in message


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(FileFormatError, match="does not exist"):
        bio.read_spectrum(tmp_path / "nope.csv")
    with pytest.raises(FileFormatError, match="is a folder"):
        bio.read_spectrum(tmp_path)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=400), extension=st.sampled_from([".csv", ".json", ".jdx", ".txt"]))
def test_readers_raise_only_file_format_errors(tmp_path, data, extension):
    path = tmp_path / f"fuzz{extension}"
    path.write_bytes(data)
    try:
        bio.read_spectrum(path)
    except FileFormatError:
        pass


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=st.text(alphabet="0123456789.,;- \n\t#eE+@%ABCJKjkSTnai", max_size=300), extension=st.sampled_from([".csv", ".jdx", ".txt"]))
def test_readers_raise_only_file_format_errors_on_numeric_noise(tmp_path, text, extension):
    path = tmp_path / f"noise{extension}"
    prefix = "##TITLE=x\n##XUNITS=NANOMETERS\n##FIRSTX=400\n##LASTX=500\n##NPOINTS=5\n##XYDATA=(X++(Y..Y))\n" if extension == ".jdx" else ""
    path.write_text(prefix + text, encoding="utf-8")
    try:
        bio.read_spectrum(path)
    except FileFormatError:
        pass


# --------------------------------------------------------------------------- writes: never half-written, never overwritten


def _listing(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_no_overwrite_without_force(tmp_path, calibrated, uncalibrated):
    path = bio.write_spectrum(calibrated, tmp_path / "s.csv")
    before = path.read_bytes()
    with pytest.raises(ExportError, match=r"s\.csv already exists; pass --force"):
        bio.write_spectrum(uncalibrated, path)
    assert path.read_bytes() == before
    bio.write_spectrum(uncalibrated, path, force=True)
    assert not bio.read_spectrum(path).is_calibrated
    assert _listing(tmp_path) == ["s.csv"]


class _FullDisk:
    """A file object that fills the disk after ``budget`` bytes (simulates ENOSPC mid-write)."""

    def __init__(self, handle, budget):
        self._handle, self._budget = handle, budget

    def write(self, data):
        self._budget -= len(data)
        if self._budget < 0:
            raise OSError(errno.ENOSPC, "No space left on device")
        return self._handle.write(data)

    def __getattr__(self, name):
        return getattr(self._handle, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._handle.close()
        return False


@pytest.mark.parametrize("extension", [".csv", ".json", ".jdx", ".png"])
def test_full_disk_leaves_earlier_file_intact(tmp_path, monkeypatch, calibrated, extension):
    path = bio.write_spectrum(calibrated, tmp_path / f"s{extension}")
    before = path.read_bytes()
    real_fdopen = os.fdopen
    monkeypatch.setattr(bio.os, "fdopen", lambda fd, mode: _FullDisk(real_fdopen(fd, mode), 100))
    with pytest.raises(ExportError, match="disk is full.*nothing was written") as info:
        bio.write_spectrum(calibrated.with_(intensity=calibrated.intensity * 2), path, force=True)
    assert str(path) in str(info.value)
    assert path.read_bytes() == before
    assert _listing(tmp_path) == [path.name]  # no temporary file left behind


@pytest.mark.parametrize(
    "target, error, pattern",
    [
        ("open", OSError(errno.EROFS, "Read-only file system"), "read-only file system"),
        ("open", PermissionError(errno.EACCES, "Permission denied"), "permission denied"),
        ("replace", PermissionError(errno.EACCES, "Permission denied"), "permission denied"),
        ("fsync", OSError(errno.EIO, "Input/output error"), "Input/output error"),
    ],
)
def test_read_only_folder_and_io_errors(tmp_path, monkeypatch, calibrated, target, error, pattern):
    # chmod does not stop root, so the refusal is simulated where the OS would raise it.
    keep = bio.write_spectrum(calibrated, tmp_path / "earlier.json")
    before = keep.read_bytes()

    def refuse(*args, **kwargs):
        raise error

    monkeypatch.setattr(bio.os, target, refuse)
    with pytest.raises(ExportError, match=pattern):
        bio.write_spectrum(calibrated, tmp_path / "new.json")
    monkeypatch.undo()
    assert _listing(tmp_path) == ["earlier.json"] and keep.read_bytes() == before


def test_export_errors_are_clear(tmp_path, calibrated):
    with pytest.raises(ExportError, match="folder .* does not exist"):
        bio.write_spectrum(calibrated, tmp_path / "missing" / "s.csv")
    with pytest.raises(ExportError, match="cannot tell the format"):
        bio.write_spectrum(calibrated, tmp_path / "s.xlsx")
    with pytest.raises(ExportError, match="is a folder"):
        bio.atomic_write_text(tmp_path, "x", force=True)
    with pytest.raises(InputError, match="non-finite"):
        bio.write_spectrum(calibrated.with_(intensity=np.full(calibrated.size, np.nan)), tmp_path / "n.csv")
    assert _listing(tmp_path) == []


def test_a_failing_writer_body_leaves_nothing(tmp_path):
    with pytest.raises(RuntimeError):
        with bio.atomic_output(tmp_path / "x.txt") as handle:
            handle.write("half")
            raise RuntimeError("crash in the middle")
    assert _listing(tmp_path) == []


# --------------------------------------------------------------------------- series: a writer thread, one flush at the end


def _series(calibrated, n=5):
    """A time series as the pipeline makes it: the axis repeats, the intensity changes (one sign of zero flips)."""
    spectra = []
    for k in range(n):
        intensity = calibrated.intensity * (1.0 + 0.1 * k)
        intensity[9] = 0.0 if k % 2 else -0.0  # "-0.0" and "0.0" print differently
        spectra.append(calibrated.with_(intensity=intensity))
    spectra[-1] = spectra[-1].with_(wavelength_nm=spectra[-1].wavelength_nm + 0.25)  # the axis changes once
    return spectra


def _assert_series_same(got: Spectrum, expected: Spectrum) -> None:
    for name in ("pixel", "wavelength_nm", "wavelength_uncertainty_nm", "saturated"):
        np.testing.assert_array_equal(getattr(got, name), getattr(expected, name))  # bit for bit
    # intensity and uncertainty with 9 significant digits: within half a unit of the 9th digit (relative
    # 5e-9), below float32's rounding (6e-8; the pipeline computes them in float32); signs of zero kept
    for name in ("intensity", "uncertainty"):
        np.testing.assert_allclose(getattr(got, name), getattr(expected, name), rtol=5e-9, atol=0)
    assert np.array_equal(np.signbit(got.intensity), np.signbit(expected.intensity))
    assert got.provenance == expected.provenance


@pytest.mark.parametrize("threaded", [True, False])
def test_series_writer_writes_what_write_spectrum_writes_to_float32_rounding(tmp_path, monkeypatch, calibrated, threaded):
    spectra = _series(calibrated)
    alone = tmp_path / "alone"
    alone.mkdir()
    for k, spectrum in enumerate(spectra):
        bio.write_spectrum(spectrum, alone / f"s_{k}.csv")
    synced = []
    monkeypatch.setattr(bio.os, "fsync", lambda fd: synced.append(fd))  # no file is flushed one by one
    if hasattr(os, "sync"):
        monkeypatch.setattr(bio.os, "sync", lambda: synced.append("all"))
    series = tmp_path / "series"
    series.mkdir()
    with bio.SeriesWriter(threaded=threaded) as writer:
        for k, spectrum in enumerate(spectra):
            writer.write(spectrum, series / f"s_{k}.csv")
        assert "all" not in synced
    assert writer.written == [series / f"s_{k}.csv" for k in range(len(spectra))]
    # once closed: one flush of everything and one of the folder (POSIX)
    assert synced.count("all") == (1 if hasattr(os, "sync") else 0)
    for k in range(len(spectra)):
        text, reference = (series / f"s_{k}.csv").read_text(), (alone / f"s_{k}.csv").read_text()
        assert text.splitlines()[0] == reference.splitlines()[0]  # the same comments and provenance
        _assert_series_same(bio.read_spectrum(series / f"s_{k}.csv"), spectra[k])
    # float32 values (what the extraction gives) come back as the same float32 numbers
    values32 = spectra[0].intensity.astype(np.float32)
    bio.SeriesWriter(threaded=False).write(spectra[0].with_(intensity=values32), tmp_path / "f32.csv")
    assert np.array_equal(bio.read_spectrum(tmp_path / "f32.csv").intensity.astype(np.float32), values32)
    assert _listing(series) == [f"s_{k}.csv" for k in range(len(spectra))]  # no temporary file left


def test_series_writer_keeps_existing_files_and_earlier_ones_on_errors(tmp_path, monkeypatch, calibrated):
    spectra = _series(calibrated, 4)
    existing = tmp_path / "s_2.csv"
    existing.write_text("an earlier run\n")
    with pytest.raises(ExportError, match=r"s_2\.csv already exists; pass --force"):
        with bio.SeriesWriter() as writer:
            for k, spectrum in enumerate(spectra):
                writer.write(spectrum, tmp_path / f"s_{k}.csv")
    assert existing.read_text() == "an earlier run\n"
    assert _listing(tmp_path) == ["s_0.csv", "s_1.csv", "s_2.csv"]  # nothing after the error
    with bio.SeriesWriter(force=True) as writer:
        writer.write(spectra[2], existing)
    _assert_series_same(bio.read_spectrum(existing), spectra[2])
    # the disk fills during the third file: the first two stay whole, no temporary file is left
    folder = tmp_path / "full"
    folder.mkdir()
    real_fdopen = os.fdopen
    opened = []

    def fdopen(fd, mode):
        opened.append(fd)
        return _FullDisk(real_fdopen(fd, mode), 10**9 if len(opened) < 3 else 100)

    monkeypatch.setattr(bio.os, "fdopen", fdopen)
    writer = bio.SeriesWriter()
    with pytest.raises(ExportError, match="disk is full"):
        for k, spectrum in enumerate(spectra):
            writer.write(spectrum, folder / f"s_{k}.csv")
        writer.close()
    with pytest.raises(ExportError, match="disk is full"):
        writer.close()  # the error stays the writer's answer
    monkeypatch.undo()
    assert _listing(folder) == ["s_0.csv", "s_1.csv"]
    _assert_series_same(bio.read_spectrum(folder / "s_1.csv"), spectra[1])


# --------------------------------------------------------------------------- provenance


def test_build_provenance_keys_and_hashes(tmp_path):
    frame = tmp_path / "frame 1.png"
    frame.write_bytes(b"not really a png, but bytes to hash")
    dark = tmp_path / "dark.png"
    dark.write_bytes(b"dark bytes")
    calibration = tmp_path / "cal.json"
    calibration.write_text(json.dumps({"schema": "x", "solution": {"rms_nm": 0.03, "rms_px": 0.06, "order": 2},
                                       "lamp": "cfl", "line_list": {"line_list_source": "NIST ASD, retrieved 2026"}}), encoding="utf-8")
    record = bio.build_provenance(frames=[frame], dark_frames=[dark], calibration=calibration,
                                  response={"method": "Planck", "reference": "halogen 2856 K"},
                                  settings={"gamma": "srgb", "weights": np.array([0.3, 0.6, 0.1])}, source_type="fluorescent")
    assert set(record) >= {"schema", "software", "created_utc", "frames", "calibration", "response", "settings", "quantity", "intensity_unit"}
    assert record["software"]["version"] == benchspec.__version__
    assert record["frames"][0] == {"path": str(frame), "sha256": hashlib.sha256(frame.read_bytes()).hexdigest(), "role": "signal"}
    assert record["frames"][1]["role"] == "dark"
    cal = record["calibration"]
    assert cal["rms_nm"] == 0.03 and cal["rms_px"] == 0.06 and cal["lamp"] == "cfl"
    assert cal["line_list_source"].startswith("NIST ASD") and cal["sha256"] == hashlib.sha256(calibration.read_bytes()).hexdigest()
    assert record["response"]["applied"] is True and record["response"]["method"] == "Planck"
    assert record["settings"]["weights"] == [0.3, 0.6, 0.1]
    json.dumps(record, allow_nan=False)  # JSON-serialisable
    assert record["created_utc"].endswith("Z")
    assert bio.build_provenance()["response"] == {"applied": False}


def test_build_provenance_rejects_bad_input():
    with pytest.raises(InputError, match="standard provenance key"):
        bio.build_provenance(extra={"frames": []})
    with pytest.raises(InputError, match="unknown source type"):
        bio.build_provenance(source_type="volcano")
    with pytest.raises(InputError, match="non-finite"):
        bio.build_provenance(settings={"gain": float("nan")})
    with pytest.raises(InputError, match="not JSON-serialisable"):
        bio.build_provenance(settings={"thing": object()})


def test_provenance_is_in_every_data_export(tmp_path, calibrated):
    for extension in (".csv", ".jdx"):
        text = bio.write_spectrum(calibrated, tmp_path / f"s{extension}").read_text(encoding="utf-8")
        for fragment in ("cfl frame 1.png", "ab" * 32, "rms_nm=0.041", "NIST ASD", "gamma", benchspec.__version__, "created_utc"):
            assert fragment in text, (extension, fragment)


finite = st.floats(min_value=-1e12, max_value=1e12, allow_nan=False, allow_infinity=False)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(values=st.lists(finite, min_size=2, max_size=40), start=st.floats(200, 900), step=st.floats(0.01, 5.0),
       even=st.booleans())
def test_jcamp_property_independent_reader_agrees(tmp_path, values, start, step, even):
    n = len(values)
    wavelength = np.linspace(start, start + step * (n - 1), n) if even else start + step * np.arange(n) + 1e-3 * np.arange(n) ** 2
    spectrum = benchspec.as_spectrum(wavelength, values)
    path = bio.write_spectrum(spectrum, tmp_path / "p.jdx", force=True)
    data = _jcamp_read(path)
    np.testing.assert_array_equal(data["x"], spectrum.wavelength_nm)
    np.testing.assert_array_equal(data["y"], spectrum.intensity)
    _assert_same(spectrum, bio.read_spectrum(path))


@pytest.mark.parametrize("extension", [".csv", ".json", ".jdx"])
def test_absorbance_spectrum_exports_in_every_format(tmp_path, rng, extension):
    wavelength = 420.0 + 0.31 * np.arange(300.0) + 2e-5 * np.arange(300.0) ** 2
    spectrum = benchspec.as_spectrum(wavelength, rng.uniform(0.0, 1.5, 300), uncertainty=np.full(300, 0.01),
                                     provenance=bio.build_provenance(quantity="absorbance", intensity_unit="absorbance"))
    path = bio.write_spectrum(spectrum, tmp_path / f"abs{extension}")
    if extension == ".csv":
        header = [line for line in path.read_text(encoding="utf-8").splitlines() if not line.startswith("#")][0]
        assert header.startswith("wavelength_nm,absorbance,uncertainty,saturated")
    if extension == ".jdx":
        assert _jcamp_read(path)["yunits"] == "ABSORBANCE"
    _assert_same(spectrum, bio.read_spectrum(path))
