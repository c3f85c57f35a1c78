"""Bad inputs for every file reader: refused with one line naming the file, never a crash.

The catalogue lives in :mod:`benchspec.fuzz` (``python -m benchspec.fuzz --list``
counts it). Every input is written under a folder and a file name with spaces
and non-ASCII characters, so each case also checks that such paths work.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from benchspec import frames, fuzz, io, sources
from benchspec.errors import BenchspecError, FileFormatError, FrameError, SourceError

CATALOGUE = fuzz.bad_inputs()
READERS = {reader.name: reader for reader in fuzz.readers()}


@pytest.fixture(scope="module")
def scratch(tmp_path_factory):
    return tmp_path_factory.mktemp("bad inputs")


@pytest.mark.parametrize("case", CATALOGUE, ids=[case.id for case in CATALOGUE])
def test_bad_input_is_refused_cleanly(scratch, case):
    outcome = fuzz.check_input(scratch, case)
    assert outcome.kind != "crash", f"{case.id} crashed the reader:\n{outcome.traceback}"
    assert outcome.kind != "bad-message", f"{case.id}: {outcome.traceback}: {outcome.message!r}"
    if case.must_refuse:
        assert outcome.kind == "refused", f"{case.id} was accepted; it must be refused"
    # reading never writes: the folder holds nothing but what the test wrote (now removed)
    assert list((scratch / fuzz.AWKWARD_FOLDER).iterdir()) == []


def test_catalogue_is_large_and_distinct():
    ids = [case.id for case in CATALOGUE]
    assert len(ids) == len(set(ids))
    assert len(ids) >= 600
    # every reader gets every kind of bad input the issue lists
    for reader in READERS.values():
        cases = {case.case for case in CATALOGUE if case.reader == reader.name}
        assert {"empty", "truncated-50pct", "random-bytes"} <= cases, reader.name
        assert any(c.startswith("wrong-type-") for c in cases), reader.name
        if reader.text:
            assert {"latin-1-text", "utf-16-text", "huge-sparse-file-300MB"} <= cases, reader.name
        if reader.family in ("spectrum", "table", "bench", "response"):
            assert {"number-nan", "number-inf", "number-1e999"} <= cases, reader.name
        if reader.suffix == ".json" and not reader.name.startswith("bench"):
            assert any(c.startswith("schema-") and "version" in c for c in cases), reader.name
        if reader.family == "image":
            assert "png-claims-100000x100000" in cases


@pytest.mark.parametrize("reader", list(READERS.values()), ids=list(READERS))
def test_valid_sample_reads_from_awkward_path(tmp_path, reader):
    """Spaces and non-ASCII characters in folders and names are fine."""
    path = fuzz.write_input(tmp_path, reader, reader.valid)
    assert " " in str(path) and not str(path).isascii()
    outcome = fuzz.classify(reader, path)
    assert outcome.kind == "accepted", outcome.message


def test_valid_spectrum_reads_from_non_utf8_file_name(tmp_path):
    """A Linux file name that is not UTF-8 (surrogate-escaped by Python) still works."""
    reader = READERS["spectrum-csv"]
    name = os.fsdecode(b"spectrum \xff\xfe.csv")
    path = tmp_path / name
    path.write_bytes(reader.valid)
    spectrum = io.read_spectrum(path)
    assert spectrum.intensity.size == 40
    path.write_bytes(b"")
    with pytest.raises(FileFormatError) as info:
        io.read_spectrum(path)
    assert name in str(info.value)


# --------------------------------------------------------------------------- decompression bombs


BOMBS = [
    ("png", fuzz.png_claiming(100_000, 100_000)),
    ("png-just-above-limit", fuzz.png_claiming(7072, 7072)),  # 50.01 MP, below Pillow's own limit
    ("jpeg", [c for c in CATALOGUE if c.id == "image-jpeg/jpeg-claims-60000x60000"][0].data),
    ("tiff", [c for c in CATALOGUE if c.id == "image-tiff/tiff-claims-100000x100000"][0].data),
    ("bmp", [c for c in CATALOGUE if c.id == "image-bmp/bmp-claims-100000x100000"][0].data),
]


@pytest.mark.parametrize("name,data", BOMBS, ids=[b[0] for b in BOMBS])
def test_huge_frames_are_refused_before_decoding(tmp_path, monkeypatch, name, data):
    import cv2

    def no_decoding(*args, **kwargs):
        raise AssertionError("the frame was decoded before its size was checked")

    monkeypatch.setattr(cv2, "imdecode", no_decoding)
    path = tmp_path / f"bomb {name}.png"
    path.write_bytes(data)
    with pytest.raises(FrameError, match=r"MP limit") as info:
        frames.read_image(path)
    assert path.name in str(info.value)
    with pytest.raises(FrameError):
        frames.load_stack([path])
    # the live sources refuse it the same way (FolderSource skips it, then has nothing left)
    with pytest.raises(SourceError, match=path.name) as info:
        sources.open_source(str(path), loop=False, pace=False).read()
    assert "pixel limit" in str(info.value)


def test_pixel_limit_is_documented_and_adjustable(tmp_path):
    assert frames.MAX_FRAME_PIXELS == 50_000_000
    assert "50 megapixels" in frames.__doc__
    path = tmp_path / "small.png"
    path.write_bytes(READERS["image-png"].valid)  # 96 x 64 = 6144 px
    with pytest.raises(FrameError, match="limit"):
        frames.read_image(path, max_pixels=6000)
    assert frames.read_image(path, max_pixels=6144).shape == (64, 96, 3)


def test_truncated_image_is_not_returned_half_grey(tmp_path):
    """A PNG cut short must not decode to a frame whose bottom half is filler."""
    data = READERS["image-png"].valid
    for cut in (len(data) // 2, len(data) - 20, len(data) - 1):
        path = tmp_path / f"cut {cut}.png"
        path.write_bytes(data[:cut])
        with pytest.raises(FileFormatError, match="truncated|decoded|damaged"):
            frames.read_image(path)


def test_messages_say_what_to_try(tmp_path):
    """Spot-check that refusals carry a remedy, not only a diagnosis."""
    path = tmp_path / "photo.png"
    path.write_bytes(b"this is text, not a picture\n")
    with pytest.raises(FileFormatError) as info:
        frames.read_image(path)
    message = str(info.value)
    assert "photo.png" in message and ("export" in message or "check" in message)
    spectrum = tmp_path / "spec.csv"
    spectrum.write_bytes("wavelength_nm,intensity\n400,1\n# Größe\n".encode("latin-1"))
    with pytest.raises(FileFormatError, match="UTF-8"):
        io.read_spectrum(spectrum)


def test_nan_never_reaches_a_spectrum(tmp_path):
    """No reader lets a non-finite number through into a Spectrum."""
    for case in CATALOGUE:
        if not case.case.startswith("number-") or not case.reader.startswith("spectrum"):
            continue
        reader = READERS[case.reader]
        path = fuzz.write_input(tmp_path, reader, case.data)
        try:
            spectrum = io.read_spectrum(path)
        except BenchspecError:
            continue
        for name in ("intensity", "uncertainty", "pixel", "wavelength_nm"):
            values = getattr(spectrum, name)
            assert values is None or np.all(np.isfinite(values)), (case.id, name)


# --------------------------------------------------------------------------- pipes and devices


def _read_in_thread(reader, path, *, timeout_s=20.0):
    """Run the reader in a thread; return its outcome, or 'hung' if it is still blocked after the timeout."""
    import threading

    result = {}

    def target():
        result["outcome"] = fuzz.classify(reader, path)

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    thread.join(timeout_s)
    if thread.is_alive():
        return None
    return result["outcome"]


@pytest.mark.parametrize("reader", list(READERS.values()), ids=list(READERS))
def test_pipe_behind_a_file_name_is_refused_not_waited_on(tmp_path, reader):
    """A named pipe with a spectrum's name must not block the program (nobody will ever write to it)."""
    path = tmp_path / f"pipe{reader.suffix}"
    os.mkfifo(path)
    outcome = _read_in_thread(reader, path)
    if outcome is None:  # unblock the reader before failing
        with open(path, "wb"):
            pass
        pytest.fail(f"{reader.name} blocked on a named pipe")
    assert outcome.kind == "refused", outcome


@pytest.mark.parametrize("reader", [r for r in READERS.values() if r.text], ids=[n for n, r in READERS.items() if r.text])
def test_endless_device_is_refused(tmp_path, reader):
    """/dev/zero behind a file name: refused, never read to the end (it has none)."""
    path = tmp_path / f"zeros{reader.suffix}"
    path.symlink_to("/dev/zero")
    outcome = _read_in_thread(reader, path)
    assert outcome is not None, f"{reader.name} kept reading /dev/zero"
    assert outcome.kind == "refused", outcome


# --------------------------------------------------------------------------- folders with one bad file


def test_folder_with_one_bad_frame_names_it(tmp_path):
    import cv2

    folder = tmp_path / "séance 2"
    folder.mkdir()
    good = cv2.imencode(".png", fuzz._test_frame()[:, :, ::-1])[1].tobytes()
    for name in ("frame 1.png", "frame 2.png", "frame 4.png"):
        (folder / name).write_bytes(good)
    (folder / "frame 3.png").write_bytes(good[: len(good) // 2])  # copied while still being written
    with pytest.raises(FileFormatError, match="frame 3.png"):
        frames.load_stack(folder)
    # the live folder source skips it, says so, and plays the others
    source = sources.FolderSource(folder)
    shapes = [f.image.shape for f in source]
    assert len(shapes) == 3
    assert any("frame 3.png" in note for note in source.info.notes)


def test_folder_with_frames_of_two_sizes_names_both(tmp_path):
    import cv2

    folder = tmp_path / "mixed"
    folder.mkdir()
    (folder / "a.png").write_bytes(cv2.imencode(".png", fuzz._test_frame())[1].tobytes())
    (folder / "b.png").write_bytes(cv2.imencode(".png", fuzz._test_frame(width=128))[1].tobytes())
    with pytest.raises(FrameError) as info:
        frames.load_stack(folder)
    message = str(info.value)
    assert "b.png is 128x64" in message and "a.png is 96x64" in message
