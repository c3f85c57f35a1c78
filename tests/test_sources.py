"""Frame sources: camera (through a fake capture object), video files, folders, demo, arrays.

This machine has no camera, so the camera path is driven by a fake with
OpenCV's VideoCapture methods; videos are written with cv2.VideoWriter in tmp dirs.
"""

from __future__ import annotations

import threading

import cv2
import numpy as np
import pytest

from benchspec.errors import InputError, SourceError
from benchspec.sources import (
    ArraySource,
    CameraSettings,
    CameraSource,
    DemoSource,
    FolderSource,
    VideoSource,
    capture_frames,
    find_cameras,
    open_source,
)


class FakeCapture:
    """Stands in for cv2.VideoCapture: properties, refusals, and a read that can start failing."""

    def __init__(self, *, opened=True, refuse=(), ignore=(), fail_after=None, shape=(48, 64, 3), rng=None):
        self.opened = opened
        self.values = {cv2.CAP_PROP_FRAME_WIDTH: 640.0, cv2.CAP_PROP_FRAME_HEIGHT: 480.0,
                       cv2.CAP_PROP_FPS: 30.0, cv2.CAP_PROP_AUTO_EXPOSURE: 3.0,
                       cv2.CAP_PROP_EXPOSURE: 156.0, cv2.CAP_PROP_GAIN: 4.0,
                       cv2.CAP_PROP_AUTO_WB: 1.0, cv2.CAP_PROP_WB_TEMPERATURE: 4600.0}
        self.refuse = set(refuse)    # set() returns False
        self.ignore = set(ignore)    # set() returns True but the value does not change (common)
        self.fail_after = fail_after
        self.reads = 0
        self.released = False
        self.shape = shape
        self.rng = rng or np.random.default_rng(0)

    def isOpened(self):
        return self.opened

    def set(self, prop, value):
        if prop in self.refuse:
            return False
        if prop not in self.ignore:
            self.values[prop] = float(value)
        return True

    def get(self, prop):
        return self.values.get(prop, 0.0)

    def read(self):
        self.reads += 1
        if self.fail_after is not None and self.reads > self.fail_after:
            return False, None
        bgr = np.zeros(self.shape, np.uint8)
        bgr[..., 0] = 200  # blue in OpenCV's BGR order
        bgr[..., 2] = self.reads % 256
        return True, bgr

    def release(self):
        self.released = True


def _camera(fake, **kwargs):
    return CameraSource(0, capture_factory=lambda device: fake, retry_delay_s=0.0, **kwargs)


def _write_video(path, n_frames, *, size=(160, 120), fps=30.0):
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), fps, size)
    assert writer.isOpened()
    for i in range(n_frames):
        frame = np.full((size[1], size[0], 3), 10, np.uint8)
        frame[:, (i * 7) % size[0]] = 250  # a moving bright column: frames differ
        writer.write(frame)
    writer.release()


# --------------------------------------------------------------------------- camera


def test_camera_locks_settings_and_converts_bgr_to_rgb():
    fake = FakeCapture()
    cam = _camera(fake, settings=CameraSettings(width_px=1280, height_px=720, frame_rate_hz=30, exposure=80))
    info = cam.info
    assert info.kind == "camera"
    assert (info.width_px, info.height_px) == (1280, 720)
    assert info.refused_settings == ()
    assert fake.values[cv2.CAP_PROP_AUTO_EXPOSURE] == 1.0  # V4L2 "manual" menu entry
    assert fake.values[cv2.CAP_PROP_AUTO_WB] == 0.0
    assert fake.values[cv2.CAP_PROP_EXPOSURE] == 80.0
    frame = cam.read()
    assert frame.image[0, 0, 2] == 200  # blue channel is last in RGB
    assert not frame.image.flags.writeable
    assert frame.index == 0 and frame.origin == "camera 0"
    cam.close()
    assert fake.released


def test_camera_reports_refused_and_silently_ignored_settings():
    fake = FakeCapture(refuse={cv2.CAP_PROP_AUTO_WB}, ignore={cv2.CAP_PROP_AUTO_EXPOSURE, cv2.CAP_PROP_FPS})
    cam = _camera(fake, settings=CameraSettings(frame_rate_hz=60))  # the fake stays at 30 fps
    refused = cam.info.refused_settings
    assert set(refused) == {"auto_white_balance", "auto_exposure", "frame_rate_hz"}
    assert any("refused" in note and "auto_white_balance" in note for note in cam.info.notes)
    # it still delivers frames
    assert cam.read() is not None


def test_camera_set_exposure_reports_outcome():
    fake = FakeCapture(ignore={cv2.CAP_PROP_EXPOSURE})
    cam = _camera(fake)
    outcome = cam.set_exposure(42)
    assert not outcome.accepted and outcome.reported == 156.0
    fake.ignore.clear()
    assert cam.set_exposure(42).accepted
    with pytest.raises(InputError, match="finite"):
        cam.set_exposure(float("nan"))


def test_no_camera_is_a_source_error():
    with pytest.raises(SourceError, match="no camera at 3"):
        CameraSource(3, capture_factory=lambda d: FakeCapture(opened=False))
    with pytest.raises(SourceError, match="does not exist"):
        CameraSource("/dev/video-not-here")


def test_lost_camera_keeps_frames_captured_before():
    fake = FakeCapture(fail_after=5)
    cam = _camera(fake, max_failed_reads=3)
    capture = capture_frames(cam, 10)
    assert capture.count == 5 and not capture.complete
    assert "stopped delivering frames after 5 frames" in capture.stop_reason
    assert [int(f[0, 0, 0]) for f in capture.frames] == [1, 2, 3, 4, 5]  # the red channel counts reads
    assert cam.is_lost
    with pytest.raises(SourceError, match="stopped delivering"):
        cam.read()


def test_camera_survives_a_single_hiccup():
    class Hiccup(FakeCapture):
        def read(self):
            ok, img = super().read()
            return (False, None) if self.reads == 3 else (ok, img)

    cam = _camera(Hiccup(), max_failed_reads=3)
    assert capture_frames(cam, 6).complete


def test_find_cameras_on_a_machine_without_one_is_quick_and_empty(monkeypatch, tmp_path):
    monkeypatch.setattr("benchspec.sources.Path", lambda p: tmp_path if p == "/dev" else __import__("pathlib").Path(p))
    assert find_cameras() == ()


def test_camera_settings_are_checked():
    with pytest.raises(InputError, match="width_px"):
        CameraSettings(width_px=0)
    with pytest.raises(InputError, match="frame_rate_hz"):
        CameraSettings(frame_rate_hz=0)


# --------------------------------------------------------------------------- video


def test_video_plays_to_the_end_or_loops(tmp_path):
    path = tmp_path / "run.avi"
    _write_video(path, 12)
    with VideoSource(path) as video:
        info = video.info
        assert (info.width_px, info.height_px, info.frame_rate_hz) == (160, 120, 30.0)
        frames = list(video)
    assert len(frames) == 12
    assert frames[-1].timestamp_s == pytest.approx(11 / 30.0)
    assert frames[0].image.shape == (120, 160, 3)
    with VideoSource(path, loop=True) as video:
        looped = [video.read() for _ in range(30)]
    assert all(f is not None for f in looped)
    # the 13th frame is the first one again, and time keeps increasing
    np.testing.assert_array_equal(looped[12].image, looped[0].image)
    assert np.all(np.diff([f.timestamp_s for f in looped]) > 0)


def test_video_capture_cut_short_says_why(tmp_path):
    path = tmp_path / "short.avi"
    _write_video(path, 4)
    capture = capture_frames(VideoSource(path), 10)
    assert capture.count == 4 and "ended after 4 of 10" in capture.stop_reason


def test_bad_videos(tmp_path):
    with pytest.raises(SourceError, match="not found"):
        VideoSource(tmp_path / "missing.avi")
    junk = tmp_path / "junk.avi"
    junk.write_bytes(b"this is not a video" * 10)
    with pytest.raises(SourceError, match="video"):
        source = VideoSource(junk)
        source.read()


def test_paced_video_runs_near_its_frame_rate(tmp_path):
    path = tmp_path / "paced.avi"
    _write_video(path, 6, fps=50.0)
    import time

    start = time.monotonic()
    with VideoSource(path, pace=True) as video:
        assert len(list(video)) == 6
    # 6 frames at 50 fps are due over 5 intervals = 0.1 s (pacing, not a speed claim)
    assert time.monotonic() - start >= 0.09


# --------------------------------------------------------------------------- folder


def test_folder_skips_non_images_and_undecodable_files(tmp_path):
    for i in range(3):
        cv2.imwrite(str(tmp_path / f"f{i}.png"), np.full((20, 30, 3), 40 * i, np.uint8))
    (tmp_path / "notes.txt").write_text("not an image")
    (tmp_path / "fake.png").write_bytes(b"renamed text file")
    cv2.imwrite(str(tmp_path / "g_other_size.png"), np.zeros((10, 10), np.uint8))
    source = FolderSource(tmp_path)
    frames = list(source)
    assert [f.origin for f in frames] == ["f0.png", "f1.png", "f2.png"]
    notes = " | ".join(source.info.notes)
    assert "notes.txt" in notes and "fake.png" in notes and "g_other_size.png" in notes


def test_folder_with_no_images(tmp_path):
    (tmp_path / "a.txt").write_text("x")
    with pytest.raises(SourceError, match="holds no images"):
        FolderSource(tmp_path)
    with pytest.raises(SourceError, match="not found"):
        FolderSource(tmp_path / "nope")


def test_folder_of_only_broken_images_fails_with_the_reason(tmp_path):
    (tmp_path / "a.png").write_bytes(b"")
    source = FolderSource(tmp_path, loop=True)
    with pytest.raises(SourceError, match="none of its images"):
        source.read()


def test_sixteen_bit_and_grey_images_are_kept(tmp_path):
    cv2.imwrite(str(tmp_path / "deep.png"), np.full((8, 9), 40000, np.uint16))
    frame = FolderSource(tmp_path).read()
    assert frame.image.dtype == np.uint16 and frame.image.shape == (8, 9) and frame.image[0, 0] == 40000


# --------------------------------------------------------------------------- demo, arrays, open


def test_demo_source_plays_a_scene(tmp_path):
    cv2.imwrite(str(tmp_path / "bench_1.png"), np.full((20, 30, 3), 90, np.uint8))
    cv2.imwrite(str(tmp_path / "bench_2.png"), np.full((20, 30, 3), 80, np.uint8))
    cv2.imwrite(str(tmp_path / "tube_a.png"), np.full((20, 30, 3), 10, np.uint8))
    demo = DemoSource("bench", folder=tmp_path, pace=False)
    assert demo.scenes == ("bench", "tube_a")
    assert [demo.read().image[0, 0, 0] for _ in range(4)] == [90, 80, 90, 80]  # numbered frames in turn
    assert "2 frames" in " ".join(demo.info.notes)
    still = DemoSource("tube_a", folder=tmp_path, pace=False)
    assert all(still.read().image[0, 0, 0] == 10 for _ in range(3))
    assert "repeated" in " ".join(still.info.notes)
    assert DemoSource("bench_2", folder=tmp_path, pace=False).read().image[0, 0, 0] == 80  # one frame by name
    with pytest.raises(InputError, match="choose one of: bench, tube_a"):
        DemoSource("laser", folder=tmp_path)
    with pytest.raises(SourceError, match="demo frames are missing"):
        DemoSource(folder=tmp_path / "gone")


def test_array_source_failing_mid_stream_keeps_earlier_frames():
    def make(i):
        if i == 4:
            raise OSError("USB device disconnected")
        return np.full((4, 4), i, np.uint8)

    source = ArraySource(make)
    capture = capture_frames(source, 8)
    assert capture.count == 4 and "USB device disconnected" in capture.stop_reason
    assert [int(f[0, 0]) for f in capture.frames] == [0, 1, 2, 3]


def test_capture_can_be_stopped():
    stop = threading.Event()
    stop.set()
    capture = capture_frames(ArraySource([np.zeros((2, 2))], loop=True), 5, stop=stop)
    assert capture.count == 0 and capture.stop_reason == "stopped"
    with pytest.raises(InputError, match="count"):
        capture_frames(ArraySource([np.zeros((2, 2))]), 0)


def test_exposure_on_files_is_refused(tmp_path):
    cv2.imwrite(str(tmp_path / "a.png"), np.zeros((4, 4), np.uint8))
    with pytest.raises(SourceError, match="exposure cannot be set"):
        FolderSource(tmp_path).set_exposure(10)


def test_closed_source_refuses_reads():
    source = ArraySource([np.zeros((2, 2))])
    source.close()
    source.close()
    with pytest.raises(SourceError, match="closed"):
        source.read()


def test_open_source_by_name(tmp_path):
    video = tmp_path / "clip.avi"
    _write_video(video, 3)
    assert open_source(str(video), pace=False).kind == "video"
    cv2.imwrite(str(tmp_path / "one.png"), np.zeros((4, 4), np.uint8))
    assert open_source(str(tmp_path / "one.png")).kind == "folder"
    (tmp_path / "imgs").mkdir()
    cv2.imwrite(str(tmp_path / "imgs" / "a.png"), np.zeros((4, 4), np.uint8))
    assert open_source(str(tmp_path / "imgs")).kind == "folder"
    with pytest.raises(SourceError, match="not found"):
        open_source(str(tmp_path / "nothing"))
    with pytest.raises(SourceError, match="no camera"):
        open_source("/dev/video77")
