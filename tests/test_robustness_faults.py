"""Faults at the bench: nothing already captured or saved is lost, and the message says what happened.

* a camera that disconnects in the middle of a stack (a fake capture device);
* a video that ends early (a truncated file);
* a disk that fills during a save (``os.fsync`` or a write raising ENOSPC);
* a read-only output folder (``os.open`` raising EACCES or EROFS: root ignores chmod);
* a calibration whose frame size no longer matches the frames.

After each fault the tests check that the files which existed are byte-for-byte
unchanged, that no temporary or half-written file is left behind, and that
the error is a one-line :class:`benchspec.errors.BenchspecError`.
"""

from __future__ import annotations

import errno
import functools
import json
import os
import warnings
from pathlib import Path

import numpy as np
import pytest

from benchspec import fuzz, io, simulate, sources
from benchspec.errors import BenchspecError, DegradedResultWarning, ExportError, FrameError, SourceError
from benchspec.frames import iter_video, load_stack, stack_frames


def _frame(k: int = 0) -> np.ndarray:
    return np.roll(fuzz._test_frame(), 3 * k, axis=1)


def _snapshot(folder: Path) -> dict:
    """Every file under ``folder`` with its bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _one_line(exc: BaseException) -> str:
    message = str(exc)
    assert message and "\n" not in message
    return message


# --------------------------------------------------------------------------- camera and video


class _FakeCamera:
    """An OpenCV-like capture device that is unplugged after ``frames_before_unplug`` frames."""

    def __init__(self, frames_before_unplug: int, *, raise_on_read: bool = False):
        self.left = frames_before_unplug
        self.raise_on_read = raise_on_read
        self.properties: dict = {}
        self.released = False

    def isOpened(self):
        return True

    def set(self, prop, value):
        self.properties[prop] = value
        return True

    def get(self, prop):
        return self.properties.get(prop, 0.0)

    def read(self):
        if self.left <= 0:
            if self.raise_on_read:
                raise OSError(errno.ENODEV, "No such device")  # what V4L2 says when the cable is pulled
            return False, None
        self.left -= 1
        return True, _frame(self.left)[:, :, ::-1].copy()  # OpenCV delivers BGR

    def release(self):
        self.released = True


@pytest.mark.parametrize("raise_on_read", [False, True], ids=["reads-fail", "reads-raise"])
def test_camera_unplugged_mid_stack_keeps_the_frames_already_captured(tmp_path, raise_on_read):
    camera = sources.CameraSource(0, capture_factory=lambda device: _FakeCamera(5, raise_on_read=raise_on_read),
                                  retry_delay_s=0.0, max_failed_reads=3)
    capture = sources.capture_frames(camera, 20)
    assert capture.count == 5 and not capture.complete
    assert "stopped delivering frames after 5 frames" in capture.stop_reason
    assert "kept" in capture.stop_reason and "\n" not in capture.stop_reason
    assert camera.is_lost
    with pytest.raises(SourceError, match="camera 0"):
        camera.read()  # later reads say the same thing, they do not hang or return garbage
    # the five frames are intact and still make a stack, and they can be logged
    stacked = stack_frames(capture.frames)
    assert stacked.n_frames == 5
    from benchspec.session import Session

    session = Session.create(tmp_path / "log")
    record = session.add_capture(frames=list(capture.frames), label="cut short", metadata={"stop_reason": capture.stop_reason})
    loaded = Session.open(tmp_path / "log").load_capture(record.id)
    assert len(loaded.frames) == 5
    for saved, original in zip(loaded.frames, capture.frames):
        np.testing.assert_array_equal(saved, original)
    camera.close()


def test_array_source_failing_mid_stream_keeps_frames():
    def produce(index):
        if index == 7:
            raise OSError(errno.EIO, "Input/output error")
        return _frame(index)

    capture = sources.capture_frames(sources.ArraySource(produce, name="usb camera"), 10)
    assert capture.count == 7
    assert "failed after 7 frames" in capture.stop_reason and "kept" in capture.stop_reason


def _truncated_video(tmp_path: Path, fraction: float) -> Path:
    avi = fuzz._valid_samples()["avi"]  # 12 frames, 96x64, MJPG
    path = tmp_path / "run cut short.avi"
    path.write_bytes(avi[: int(len(avi) * fraction)])
    return path


def test_video_that_ends_early_says_so_and_keeps_its_frames(tmp_path):
    path = _truncated_video(tmp_path, 0.6)
    with pytest.warns(DegradedResultWarning, match=r"ended after 3 of its 12 frames"):
        frames = list(iter_video(path))
    assert len(frames) == 3 and all(f.shape == (64, 96, 3) for f in frames)
    with pytest.warns(DegradedResultWarning, match="truncated"):
        stacked = load_stack(path)
    assert stacked.n_frames == 3
    source = sources.VideoSource(path)
    capture = sources.capture_frames(source, 12)
    assert capture.count == 3
    assert capture.stop_reason == "the video ended after 3 of 12 frames"
    assert any("truncated" in note for note in source.info.notes)


def test_video_cut_before_its_first_frame_is_refused(tmp_path):
    path = _truncated_video(tmp_path, 0.3)
    with pytest.raises(BenchspecError) as info:
        list(iter_video(path))
    assert path.name in _one_line(info.value)
    with pytest.raises(SourceError, match=path.name):
        sources.VideoSource(path)


# --------------------------------------------------------------------------- full disk, read-only folder


def _spectrum():
    return fuzz._sample_spectrum()


@functools.lru_cache(maxsize=1)
def _small_rendered_frame():
    bench = simulate.Bench().with_(camera={"width_px": 160, "height_px": 96}, slit={"height_px": 30.0})
    return simulate.render(bench, seed=1)


def _writers(folder: Path):
    """(name, destination, write(force)) for every writer of the package that saves a user's result."""
    from benchspec.analysis import response

    spectrum = _spectrum()
    resp = response.response_from_dict(json.loads(fuzz._response_sample()))
    rendered = _small_rendered_frame()
    yield "spectrum-csv", folder / "out.csv", lambda force: io.write_spectrum(spectrum, folder / "out.csv", force=force)
    yield "spectrum-json", folder / "out.json", lambda force: io.write_spectrum(spectrum, folder / "out.json", force=force)
    yield "spectrum-jdx", folder / "out.jdx", lambda force: io.write_spectrum(spectrum, folder / "out.jdx", force=force)
    yield "spectrum-png", folder / "plot.png", lambda force: io.write_spectrum(spectrum, folder / "plot.png", force=force)
    yield "table", folder / "table.csv", lambda force: io.write_table(folder / "table.csv", {"wavelength_nm": [400.0, 500.0], "absorbance": [0.1, 0.2]}, force=force)
    yield "json", folder / "result.json", lambda force: io.write_json_file(folder / "result.json", {"a": 1, "note": "x" * 40}, force=force)
    yield "response", folder / "resp.json", lambda force: response.save_response(resp, folder / "resp.json", force=force)
    yield "frame", folder / "frame.png", lambda force: simulate.write_frame(rendered, folder / "frame.png", force=force)
    if writer_available("calibration"):
        from benchspec import calfile

        calibration = calfile.calibration_from_dict(json.loads(fuzz._calibration_sample()))
        yield "calibration", folder / "cal.json", lambda force: calfile.write_calibration(calibration, folder / "cal.json", force=force)
    yield "truth", folder / "frame.truth.json", lambda force: simulate.write_truth({"a": 1, "note": "x" * 40}, folder / "frame.truth.json", force=force)


def writer_available(name: str) -> bool:
    if name == "calibration":
        try:
            import benchspec.calfile  # noqa: F401
        except ImportError:
            return False
    return True


def _disk_full_at_fsync(monkeypatch):
    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)


def _disk_full_while_writing(monkeypatch):
    """File objects opened through os.fdopen raise ENOSPC once 16 bytes have been written."""
    real_fdopen = os.fdopen

    class Filling:
        def __init__(self, handle):
            self._handle = handle
            self._written = 0

        def write(self, data):
            self._written += len(data)
            if self._written > 16:
                raise OSError(errno.ENOSPC, "No space left on device")
            return self._handle.write(data)

        def __getattr__(self, name):
            return getattr(self._handle, name)

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return self._handle.__exit__(*exc)

    monkeypatch.setattr(os, "fdopen", lambda *a, **k: Filling(real_fdopen(*a, **k)))


def _read_only_folder(monkeypatch, folder: Path, code: int):
    real_open = os.open
    real_mkdir = os.mkdir

    def refuse(path, *args, **kwargs):
        if Path(path).resolve().parent == folder.resolve() or Path(path).resolve() == folder.resolve():
            raise PermissionError(code, os.strerror(code), str(path)) if code == errno.EACCES else OSError(code, os.strerror(code), str(path))
        return real_open(path, *args, **kwargs)

    def refuse_mkdir(path, *args, **kwargs):
        if folder.resolve() in Path(path).resolve().parents:
            raise OSError(code, os.strerror(code), str(path))
        return real_mkdir(path, *args, **kwargs)

    monkeypatch.setattr(os, "open", refuse)
    monkeypatch.setattr(os, "mkdir", refuse_mkdir)


FAULTS = {
    "disk-full-at-fsync": (lambda mp, folder: _disk_full_at_fsync(mp), r"(?i)disk is full|no space"),
    "disk-full-while-writing": (lambda mp, folder: _disk_full_while_writing(mp), r"(?i)disk is full|no space"),
    "read-only-eacces": (lambda mp, folder: _read_only_folder(mp, folder, errno.EACCES), r"(?i)permission denied|read-only"),
    "read-only-erofs": (lambda mp, folder: _read_only_folder(mp, folder, errno.EROFS), r"(?i)read-only"),
}
WRITER_NAMES = ["spectrum-csv", "spectrum-json", "spectrum-jdx", "spectrum-png", "table", "json", "response", "frame", "truth",
                "calibration"]


@pytest.mark.parametrize("fault", list(FAULTS))
@pytest.mark.parametrize("writer", WRITER_NAMES)
def test_failed_save_leaves_earlier_files_intact(tmp_path, monkeypatch, fault, writer):
    folder = tmp_path / "résultats 1"
    folder.mkdir()
    if not writer_available(writer):
        pytest.skip(f"{writer} writer not available")
    name, destination, write = next(w for w in _writers(folder) if w[0] == writer)
    write(False)  # an earlier, good save
    (folder / "neighbour.txt").write_text("kept\n")
    before = _snapshot(folder)
    install, pattern = FAULTS[fault]
    install(monkeypatch, folder)
    with pytest.raises(ExportError, match=pattern) as info:
        write(True)  # overwrite it (--force) while the disk is full / the folder read-only
    message = _one_line(info.value)
    assert destination.name in message
    monkeypatch.undo()
    assert _snapshot(folder) == before, "a failed save changed or left files behind"


@pytest.mark.parametrize("fault", list(FAULTS))
def test_failed_new_save_writes_nothing(tmp_path, monkeypatch, fault):
    folder = tmp_path / "out"
    folder.mkdir()
    install, pattern = FAULTS[fault]
    install(monkeypatch, folder)
    with pytest.raises(ExportError, match=pattern):
        io.write_spectrum(_spectrum(), folder / "new.csv")
    monkeypatch.undo()
    assert list(folder.iterdir()) == []


@pytest.mark.parametrize("fault", list(FAULTS))
def test_session_capture_fault_keeps_earlier_captures(tmp_path, monkeypatch, fault):
    from benchspec.session import Session

    session = Session.create(tmp_path / "class log")
    first = session.add_capture(spectrum=_spectrum(), frames=[_frame(0), _frame(1)], label="first")
    session.save_screen(shown=[first.id], active=first.id)
    before = _snapshot(session.path)
    install, pattern = FAULTS[fault]
    if fault.startswith("read-only"):  # the whole session folder is read-only: no new capture folder, no new file
        code = errno.EROFS if fault.endswith("erofs") else errno.EACCES
        _read_only_folder(monkeypatch, session.capture_folder, code)
        _read_only_folder(monkeypatch, session.path, code)
    else:
        install(monkeypatch, session.path)
    with pytest.raises(ExportError) as info:
        session.add_capture(spectrum=_spectrum(), frames=[_frame(2)], label="second")
    _one_line(info.value)
    with pytest.raises(ExportError):
        session.save_screen(shown=[first.id], active=first.id, view={"changed": True})
    monkeypatch.undo()
    assert _snapshot(session.path) == before
    reopened = Session.open(session.path)
    assert [r.id for r in reopened.captures] == [first.id]
    assert reopened.problems == ()
    assert len(reopened.load_capture(first.id).frames) == 2


def test_cli_save_on_full_disk_exits_2_and_keeps_the_old_file(tmp_path, monkeypatch, capsys):
    from benchspec.cli import main

    source = tmp_path / "spectrum.csv"
    io.write_spectrum(_spectrum(), source)
    out = tmp_path / "copy.jdx"
    out.write_text("an earlier export\n")
    _disk_full_at_fsync(monkeypatch)
    code = main(["convert", str(source), str(out), "--force"])
    captured = capsys.readouterr()
    assert code == 2
    assert "Traceback" not in captured.err and captured.err.count("\n") == 1
    assert "disk is full" in captured.err and out.name in captured.err
    assert out.read_text() == "an earlier export\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["copy.jdx", "spectrum.csv"]


def test_cli_simulate_into_read_only_folder_exits_2(tmp_path, monkeypatch, capsys):
    from benchspec.cli import main

    folder = tmp_path / "read only"
    folder.mkdir()
    _read_only_folder(monkeypatch, folder, errno.EROFS)
    code = main(["simulate", "--set", "camera.width_px=160", "--set", "camera.height_px=96",
                 "--set", "slit.height_px=30", "--out", str(folder / "f.png")])
    captured = capsys.readouterr()
    assert code == 2 and "Traceback" not in captured.err
    assert "read-only" in captured.err.lower() and captured.err.count("\n") == 1
    monkeypatch.undo()
    assert list(folder.iterdir()) == []


# --------------------------------------------------------------------------- calibration of another frame size


def test_geometry_of_another_frame_size_is_refused_with_both_sizes():
    geometry_module = pytest.importorskip("benchspec.geometry")
    import test_robustness_properties as model

    geometry = model._model_geometry(3.0, 0.0, 0.004)
    frame = model._model_frame(geometry)
    band = geometry_module.rectify(frame, geometry)
    assert band.image.shape == geometry.rectified_shape
    other = np.zeros((720, 1280), np.float32)  # the camera now runs at another resolution
    with pytest.raises(FrameError) as info:
        geometry_module.rectify(other, geometry)
    message = _one_line(info.value)
    assert "1280x720" in message and "480x320" in message and "recalibrate" in message
    extract = pytest.importorskip("benchspec.extract")
    stacked = stack_frames([np.zeros((720, 1280), np.uint8) + np.uint8(40), np.full((720, 1280), 200, np.uint8)], check=False)
    with pytest.raises(FrameError, match="1280x720"):
        extract.extract_stack(stacked, geometry)


def test_cli_extract_with_calibration_of_another_frame_size(tmp_path, capsys):
    """The camera now runs at 640x480; the calibration was made at 480x320: refused, naming both files and sizes."""
    import cv2

    from benchspec.cli import main

    if "calibration-json" not in {r.name for r in fuzz.readers()}:
        pytest.skip("calfile not available")
    calibration = tmp_path / "bench 3 calibration.json"
    calibration.write_bytes(fuzz._calibration_sample())
    frame = tmp_path / "lamp ü.png"
    frame.write_bytes(cv2.imencode(".png", fuzz._test_frame(width=640, height=480))[1].tobytes())
    out = tmp_path / "spectrum.csv"
    for extra in ([], ["--each"]):
        code = main(["extract", str(frame), "--calibration", str(calibration), "--out", str(out), *extra])
        err = capsys.readouterr().err
        assert code == 2 and "Traceback" not in err and err.count("\n") == 1
        assert "640x480" in err and "480x320" in err
        assert frame.name in err and calibration.name in err
        assert not out.exists()
