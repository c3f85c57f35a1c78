"""The bench viewer, driven through its real widgets under Xvfb (``xdisplay`` fixture).

Buttons are pressed with ``invoke()``, keys with ``event_generate``; file
dialogs are replaced (the viewer takes them as parameters). Each test tears
its window down. Results shown in the window are compared with the core
calls on the same frames.
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import cv2
import numpy as np
import pytest

from benchspec.errors import SourceError
from benchspec.frames import read_image
from benchspec.safety import GENERAL_CAUTION, SOURCE_TYPES, cautions_for
from benchspec.sources import ArraySource, CameraSource, DemoSource, FolderSource, VideoSource, demo_folder

pytestmark = pytest.mark.gui

tk = pytest.importorskip("tkinter")

DEMO = demo_folder()


def _pump(root, seconds: float) -> None:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        root.update()
        time.sleep(0.005)


def _wait(root, condition, *, timeout: float = 10.0, what: str = "condition") -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        root.update()
        if condition():
            return
        time.sleep(0.005)
    raise AssertionError(f"timed out waiting for {what}")


class Dialogs:
    """Stand-ins for the file dialogs: hand out paths in a tmp dir and record the requests."""

    def __init__(self, folder: Path):
        self.folder = folder
        self.next_save: str | None = None
        self.next_open: str | None = None
        self.asked: list[str] = []

    def save(self, parent, title, default, types):
        self.asked.append(title)
        name = self.next_save or default
        return str(self.folder / name)

    def open(self, parent, title, types, folder=False):
        self.asked.append(title)
        return self.next_open


@pytest.fixture
def make_viewer(xdisplay, tmp_path):
    from benchspec.gui.app import Viewer

    made = []

    def make(source=None, *, light=None, confirm: str | None = "fluorescent", messages=()):
        root = tk.Tk()
        root.geometry("1024x768+0+0")
        dialogs = Dialogs(tmp_path)
        viewer = Viewer(root, source=source, light=light, messages=messages,
                        ask_save_path=dialogs.save, ask_open_path=dialogs.open)
        viewer.dialogs = dialogs
        made.append(viewer)
        _pump(root, 0.05)
        if confirm:
            viewer.light_radios[confirm].invoke()
            viewer.buttons["start"].invoke()
        return viewer

    yield make
    for viewer in made:
        viewer.close()


def _first_frame(viewer, timeout=15.0):
    _wait(viewer.root, lambda: viewer.stats.frames_shown >= 2, timeout=timeout, what="live frames")


def _log(viewer) -> str:
    return "\n".join(viewer.log_lines)


def _wait_log(viewer, text, timeout=15.0):
    _wait(viewer.root, lambda: text in _log(viewer), timeout=timeout, what=repr(text))


def _screenshot(viewer, path: Path, xdisplay: str) -> Path:
    from PIL import ImageGrab

    root = viewer.root
    root.update()
    x, y, w, h = root.winfo_rootx(), root.winfo_rooty(), root.winfo_width(), root.winfo_height()
    image = ImageGrab.grab(bbox=(x, y, x + w, y + h), xdisplay=xdisplay)
    image.save(path)
    return path


def _core_calibration(frames, lamp):
    """The core's calibration of the same frames, called directly (not through the viewer)."""
    from benchspec.pipeline import calibrate_frames

    return calibrate_frames(frames, lamp=lamp)


# --------------------------------------------------------------------------- the main path


def test_demo_calibrate_identify_save(make_viewer, tmp_path, xdisplay):
    from benchspec.gui.processing import _within
    from benchspec.identify import identify
    from benchspec.pipeline import extract_frames

    viewer = make_viewer(DemoSource("cfl"))
    _first_frame(viewer)
    assert viewer.lamp.get() == "cfl"  # chosen from the light source
    viewer.stack_count.set(3)
    viewer.buttons["stack"].invoke()  # the three demo CFL frames, stacked and held
    _wait_log(viewer, "band measured on 3 frame(s)")
    _wait(viewer.root, lambda: isinstance(viewer.held, type(viewer.last_result)) and viewer.held.frames_in_stack == 3,
          what="held stack")
    viewer.buttons["calibrate"].invoke()
    _wait_log(viewer, "calibrated with cfl")
    frames = list(viewer.action_frames)
    calibration = _core_calibration(frames, "cfl")
    core = calibration.wavelength
    # what the window shows equals the core's answer on the same frames
    assert f"weighted RMS {core.rms_nm:.3f} nm = {core.rms_px:.3f} px" in viewer.fit_summary.cget("text")
    # and names the model the core chose (a grating solution is not "polynomial order 3")
    assert core.solution.description in viewer.fit_summary.cget("text")
    assert viewer.calibration.rms_px == pytest.approx(core.rms_px, rel=1e-9)
    rows = [viewer.fit_table.item(i, "values") for i in viewer.fit_table.get_children()]
    assert len(rows) == len(core.matches)
    assert [float(r[1]) for r in rows] == pytest.approx([m.reference_nm for m in core.matches], abs=1e-3)
    # the held spectrum switches to a wavelength axis with labelled lines; so does the live one
    assert len(frames) == 3
    _wait(viewer.root, lambda: viewer.last_result is not None and viewer.last_result.axis_is_wavelength,
          what="wavelength axis")
    assert "wavelength" in viewer.spec_axes.get_xlabel()
    labels = [l.label for l in viewer.last_result.lines]
    assert any("Hg" in label for label in labels), labels

    viewer.buttons["identify"].invoke()
    _wait_log(viewer, "identified:")
    # identify's domain is 300-1100 nm; the viewer passes the calibrated spectrum cut to it
    expected = identify(_within(extract_frames(frames, calibration), 300.0, 1100.0))
    shown = [viewer.species_table.item(i, "values") for i in viewer.species_table.get_children()]
    assert shown[0][1] == expected.best.symbol
    assert f"Verdict: {expected.verdict}" in viewer.species_summary.cget("text")

    # save everything through the Save menu (dialogs replaced)
    for index, name in enumerate(["spectrum.csv", "calibration.json", "frame.png", "plot.png"], start=1):
        viewer.dialogs.next_save = name
        viewer.save_menu.invoke(index)
        _wait_log(viewer, f"saved to {tmp_path / name}")
    # and one capture in the session log: frames, spectrum and calibration together
    from benchspec.pipeline import read_calibration
    from benchspec.session import Session

    viewer.dialogs.next_open = str(tmp_path / "session")
    viewer.save_menu.invoke(0)
    _wait_log(viewer, "saved in session")
    session = Session.open(tmp_path / "session")
    (record,) = session.captures
    assert {"spectrum.json", "calibration.json"} <= set(record.files) and record.source_type == "fluorescent"
    assert len(record.files_with_role("frame")) == 3
    assert read_calibration(tmp_path / "calibration.json").wavelength.rms_px == pytest.approx(core.rms_px)
    text = (tmp_path / "spectrum.csv").read_text()
    assert "wavelength_nm" in text and "intensity" in text
    assert cv2.imread(str(tmp_path / "frame.png")).shape == frames[-1].shape
    assert (tmp_path / "plot.png").stat().st_size > 5000
    shot = _screenshot(viewer, tmp_path / "viewer.png", xdisplay)
    shutil.copy(shot, "/tmp/benchspec-viewer.png")
    assert shot.stat().st_size > 10000


def test_wavelength_fit_page_is_scaled_to_the_residuals_and_their_error_bars(make_viewer):
    from matplotlib.collections import PolyCollection

    viewer = make_viewer(DemoSource("cfl"))
    _first_frame(viewer)
    viewer.buttons["calibrate"].invoke()
    _wait_log(viewer, "calibrated with cfl", timeout=30)
    core = viewer.calibration.core
    used = [m for m in core.matches if m.used_in_fit]

    def sigma_nm(m):  # the line's 1-sigma as the fit weighs it: reference tolerance and centre (wavecal.MatchedLine)
        return np.hypot(m.reference_uncertainty_nm, m.pixel_uncertainty * abs(float(core.solution.dispersion_nm_per_px(m.pixel))))

    reach = max(abs(m.residual_nm) + sigma_nm(m) for m in used)
    low, high = viewer.fit_axes.get_ylim()
    # every residual and its error bar is inside, and the axis is not stretched far beyond them (it was
    # +-20 nm, the solution's extrapolated uncertainty at 900 nm)
    assert low == pytest.approx(-high) and reach <= high <= 3 * reach
    span = (min(m.reference_nm for m in used), max(m.reference_nm for m in used))
    x_low, x_high = viewer.fit_axes.get_xlim()
    assert x_low < span[0] and x_high > span[1] and x_high - x_low < 1.25 * (span[1] - span[0])
    # the fit's 1-sigma band is drawn between the outermost lines only
    bands = [c for c in viewer.fit_axes.collections if isinstance(c, PolyCollection)]
    assert bands
    for band in bands:
        x = np.concatenate([path.vertices[:, 0] for path in band.get_paths()])
        assert span[0] - 1e-6 <= x.min() and x.max() <= span[1] + 1e-6


def test_a_long_source_name_is_shortened_to_fit_the_header(make_viewer, tmp_path):
    import tkinter.font as tkfont
    from tkinter import ttk

    path = tmp_path / "cfl-720p-30fps-bench-3-morning-session.avi"
    frame = read_image(DEMO / "cfl_1.png")[::2, ::2]
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30.0, (frame.shape[1], frame.shape[0]))
    for _ in range(6):
        writer.write(np.ascontiguousarray(frame[..., ::-1]))
    writer.release()
    viewer = make_viewer(VideoSource(path, loop=True, pace=True))
    _first_frame(viewer)
    root, label = viewer.root, viewer.source_label
    font = tkfont.Font(root=root, font=ttk.Style(root).lookup("Panel.TLabel", "font"))
    _pump(root, 0.2)
    shown = label.cget("text")
    assert font.measure(shown) <= label.winfo_width(), (shown, label.winfo_width())  # nothing is cut off
    assert shown.startswith("video cfl-") and shown.endswith(".avi") and "…" in shown
    assert viewer.source_text == f"video {path.name}"
    root.geometry("1800x900")  # room enough: the whole name
    _wait(root, lambda: label.cget("text") == f"video {path.name}", what="the whole name")
    assert font.measure(label.cget("text")) <= label.winfo_width()


def test_each_source_type_shows_its_cautions_before_capture(make_viewer):
    source = DemoSource("cfl_1")
    viewer = make_viewer(source, confirm=None)
    assert viewer.gate.winfo_ismapped()
    assert str(viewer.buttons["start"].cget("state")) == "disabled"
    for key in SOURCE_TYPES:
        viewer.light_radios[key].invoke()
        shown = viewer.cautions_shown()
        title, items = cautions_for(key)
        assert title in shown
        for item in items:
            assert item in shown
        assert GENERAL_CAUTION in shown  # the reminder to follow local lab-safety rules
        assert viewer.worker is None      # nothing is captured before the cautions are confirmed
    viewer.light_radios["laser"].invoke()
    viewer.buttons["start"].invoke()
    assert viewer.light == "laser" and viewer.worker is not None
    assert not viewer.gate.winfo_ismapped()
    # F1 brings the chooser back and pauses the live view until confirmed again
    viewer.show_light_chooser()
    viewer.root.update()
    assert viewer.gate.winfo_ismapped() and not viewer.light_confirmed


def test_layout_fits_1024x768_and_survives_resizing(make_viewer):
    viewer = make_viewer(DemoSource("cfl_1"))
    _first_frame(viewer)
    root = viewer.root
    for size in ("1024x768", "800x600", "1280x900", "1024x768"):
        root.geometry(size)
        _pump(root, 0.3)
        width = root.winfo_width()
        for name, button in viewer.buttons.items():
            if name == "start":
                continue
            assert button.winfo_ismapped(), name
            assert button.winfo_rootx() + button.winfo_width() <= root.winfo_rootx() + width + 1, (name, size)
    assert viewer.stats.frames_shown > 5


def test_keyboard_shortcuts_drive_the_viewer(make_viewer):
    viewer = make_viewer(DemoSource("cfl_1"))
    _first_frame(viewer)
    root = viewer.root
    root.focus_force()
    root.update()
    root.event_generate("<space>")
    _wait(root, lambda: viewer.held is not None, what="hold")
    assert viewer.buttons["hold"].cget("text") == "Live"
    root.event_generate("<space>")
    _wait(root, lambda: viewer.held is None, what="live again")
    root.event_generate("<Key-c>")
    _wait_log(viewer, "calibrated with cfl")

    # the classroom flow: calibrate on the desk lamp, then point the same setup at a mystery tube
    scenes = viewer.open_menu.nametowidget(viewer.open_menu.entrycget("Demo scene", "menu"))
    scenes.invoke(scenes.index("tube_A"))
    _wait(root, lambda: viewer.worker.last_frame is not None and viewer.worker.last_frame.origin == "tube_A.jpg",
          what="tube A frames")
    _first_frame(viewer)
    root.event_generate("<Key-i>")
    _wait_log(viewer, "identified:")
    top = viewer.species_table.item(viewer.species_table.get_children()[0], "values")[1]
    assert top == "He"  # demo_images/README.md: tube A is helium (the virtual bench's truth)


def test_stack_and_dark(make_viewer):
    viewer = make_viewer(DemoSource("cfl_1", pace=False))
    _first_frame(viewer)
    viewer.stack_count.set(4)
    viewer.buttons["dark"].invoke()
    _wait_log(viewer, "dark from 4 frame(s)")
    viewer.buttons["clear_dark"].invoke()
    viewer.buttons["stack"].invoke()
    _wait(viewer.root, lambda: len(viewer.held_frames) == 4 and viewer.spectrum_state.cget("text") == "stack of 4",
          what="stack of 4")
    viewer.stack_count.set(0)
    viewer.buttons["stack"].invoke()
    assert "from 1 to 500" in viewer.message.cget("text")


# --------------------------------------------------------------------------- faults and bad input


def test_camera_lost_mid_stream_keeps_frames(make_viewer):
    frame = read_image(DEMO / "cfl_1.png")
    unplug_after = []  # frame index after which the "camera" is unplugged (set once stacking starts)

    def make(index):
        if unplug_after and index >= unplug_after[0]:
            raise OSError("USB device disconnected")
        return frame

    source = ArraySource(make, frame_rate_hz=30, pace=True, name="camera 0")
    viewer = make_viewer(source)
    _first_frame(viewer)
    viewer.stack_count.set(40)
    viewer.buttons["stack"].invoke()  # asks for more frames than the camera will give
    unplug_after.append(source.info.frames_delivered + 8)
    _wait_log(viewer, "source lost")
    _wait_log(viewer, "stack cut short")
    assert "USB device disconnected" in _log(viewer)
    assert "SOURCE LOST" in viewer.frame_canvas.itemcget(viewer._frame_text, "text")
    _wait(viewer.root, lambda: 0 < len(viewer.held_frames) < 40, what="held partial stack")
    kept = len(viewer.held_frames)
    # still usable: calibrate on the frames captured before the loss
    viewer.buttons["calibrate"].invoke()
    _wait_log(viewer, "calibrated with cfl")
    assert len(viewer.action_frames) == kept


def test_no_camera_falls_back_to_demo_with_a_message(make_viewer):
    from benchspec.cli.view import choose_source

    source, messages = choose_source(None)  # this machine has no camera
    assert source.kind == "demo" and "no camera found" in messages[0]
    source2, messages2 = choose_source("5")
    assert source2.kind == "demo" and "no camera at 5" in messages2[0]
    source2.close()
    viewer = make_viewer(source, messages=messages)
    assert "no camera found" in _log(viewer)
    _first_frame(viewer)
    assert viewer.open_spec("/dev/video9") is False  # a camera that is not there
    assert "no camera at /dev/video9" in viewer.message.cget("text")
    assert viewer.worker is not None and viewer.worker.running  # the demo keeps running
    frames = viewer.stats.frames_shown
    _wait(viewer.root, lambda: viewer.stats.frames_shown > frames + 2, what="frames after the failure")


def test_camera_that_refuses_settings_is_reported(make_viewer):
    from test_sources import FakeCapture

    fake = FakeCapture(refuse={cv2.CAP_PROP_AUTO_EXPOSURE, cv2.CAP_PROP_AUTO_WB}, shape=(120, 160, 3))
    camera = CameraSource(0, capture_factory=lambda d: fake, retry_delay_s=0.0)
    viewer = make_viewer(camera, confirm="led")
    _wait_log(viewer, "the camera refused: auto_exposure, auto_white_balance")
    assert str(viewer.buttons["exposure"].cget("state")) == "normal"
    viewer.exposure.set(50)
    viewer.buttons["exposure"].invoke()
    _wait_log(viewer, "exposure set to 50")


def test_video_that_ends_keeps_the_last_frame(make_viewer, tmp_path):
    path = tmp_path / "short.avi"
    frame = read_image(DEMO / "cfl_1.png")[::2, ::2]
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30.0, (frame.shape[1], frame.shape[0]))
    for _ in range(6):
        writer.write(np.ascontiguousarray(frame[..., ::-1]))
    writer.release()
    viewer = make_viewer(VideoSource(path, pace=True))
    _wait_log(viewer, "the video ended after 6 frames")
    assert "the video ended" in viewer.message.cget("text")
    viewer.buttons["hold"].invoke()
    _wait(viewer.root, lambda: viewer.held_frames and viewer.held_frames[0].shape == frame.shape, what="hold")
    viewer.buttons["stack"].invoke()
    _wait_log(viewer, "stack cut short")


def test_folder_with_non_images_is_reported(make_viewer, tmp_path):
    folder = tmp_path / "frames"
    folder.mkdir()
    shutil.copy(DEMO / "cfl_1.png", folder / "a.png")
    (folder / "notes.txt").write_text("not a frame")
    (folder / "broken.png").write_bytes(b"a text file renamed .png")
    viewer = make_viewer(FolderSource(folder, loop=True, pace=True))
    _wait_log(viewer, "notes.txt")
    _wait_log(viewer, "skipped broken.png")
    _first_frame(viewer)
    # an empty folder opened later is refused in the window, and the viewer keeps going
    empty = tmp_path / "empty"
    empty.mkdir()
    viewer.dialogs.next_open = str(empty)
    viewer.open_menu.invoke(viewer.open_menu.index("Image folder…"))
    assert "holds no images" in viewer.message.cget("text")
    assert viewer.worker.running


def test_calibration_files_loaded_or_refused(make_viewer, tmp_path):
    from benchspec.pipeline import calibrate_frames, write_calibration

    frames = [read_image(DEMO / f"cfl_{k}.png") for k in (1, 2, 3)]
    good = write_calibration(calibrate_frames(frames, lamp="cfl"), tmp_path / "bench3.json")
    broken = tmp_path / "broken.json"
    broken.write_text('{"schema": "benchspec.calibration/1", "geometry": ')
    # a camera at another resolution: the demo frames at half size
    small = [np.ascontiguousarray(f[::2, ::2]) for f in frames]
    viewer = make_viewer(ArraySource(small, loop=True, frame_rate_hz=20, pace=True, name="camera 1"))
    _first_frame(viewer)
    viewer.dialogs.next_open = str(good)
    viewer.buttons["load_calibration"].invoke()
    _wait_log(viewer, "calibrate: bench3.json was made for 1280x720 px frames")
    assert "this source delivers 640x360 px" in viewer.message.cget("text")
    viewer.dialogs.next_open = str(broken)
    viewer.buttons["load_calibration"].invoke()
    _wait_log(viewer, "broken.json")
    assert viewer.calibration is None
    shown = viewer.stats.frames_shown
    _wait(viewer.root, lambda: viewer.stats.frames_shown > shown + 3, what="frames after the refusals")
    assert not viewer.last_result.axis_is_wavelength  # still the pixel axis: nothing half-applied

    # the same file on a source of the right size is used at once
    viewer.open_source(DemoSource("cfl"))
    _wait(viewer.root, lambda: viewer.worker.last_frame is not None, what="a frame of the new source")
    viewer.dialogs.next_open = str(good)
    viewer.buttons["load_calibration"].invoke()
    _wait_log(viewer, "calibrated with cfl")
    _wait(viewer.root, lambda: viewer.last_result is not None and viewer.last_result.axis_is_wavelength,
          what="wavelength axis from the file")


def test_clipping_lines_raise_the_warning(make_viewer, tmp_path, xdisplay):
    frame = read_image(DEMO / "cfl_1.png").astype(np.float32)
    bright = np.clip(frame * 4.0, 0, 255).astype(np.uint8)  # four times the exposure: the strong lines clip
    viewer = make_viewer(ArraySource([bright], loop=True, frame_rate_hz=20, pace=True, name="camera 0"))
    _wait(viewer.root, lambda: viewer.clip_warning.cget("text").startswith("CLIPPING"), timeout=20,
          what="clipping warning")
    assert str(viewer.clip_warning.cget("style")) == "Warn.TLabel"
    assert any(line.saturated for line in viewer.last_result.lines)
    _pump(viewer.root, 0.5)
    _screenshot(viewer, tmp_path / "clipping.png", xdisplay)


def test_light_chooser_screenshot(make_viewer, tmp_path, xdisplay):
    viewer = make_viewer(DemoSource("cfl"), confirm=None)
    viewer.light_radios["discharge"].invoke()
    _pump(viewer.root, 0.2)
    shot = _screenshot(viewer, tmp_path / "light-chooser.png", xdisplay)
    shutil.copy(shot, "/tmp/benchspec-viewer-cautions.png")
    assert "several kilovolts" in viewer.cautions_shown()


def test_view_help_prints_the_cautions(capsys):
    from benchspec.cli import main
    from benchspec.safety import format_cautions

    with pytest.raises(SystemExit) as exit_info:
        main(["view", "--help"])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    for block in format_cautions().splitlines():
        assert " ".join(block.split()) in " ".join(out.split())
    assert "Ctrl+Enter" in out


def test_lens_cap_on_says_no_band_and_keeps_running(make_viewer, rng):
    # a lens cap: read noise only
    black = [rng.integers(0, 4, size=(360, 640, 3), dtype=np.uint8) for _ in range(3)]
    viewer = make_viewer(ArraySource(black, loop=True, frame_rate_hz=20, pace=True, name="camera 0"))
    _wait(viewer.root, lambda: "band" in viewer.message.cget("text"), timeout=20, what="no-band message")
    assert any("band" in line and line.startswith("warning") for line in viewer.log_lines)
    viewer.buttons["calibrate"].invoke()
    _wait(viewer.root, lambda: "calibrate:" in _log(viewer), timeout=20, what="calibration refused")
    assert viewer.calibration is None and viewer.worker.running


def test_perf_measurement_runs(xdisplay, tmp_path):
    # a smoke run of the shipped measurement: it must work; its figures are reported, not asserted
    from benchspec.gui.perf import measure_viewer, write_test_video

    video = write_test_video(tmp_path / "clip.avi", frames=12)
    result = measure_viewer(video, seconds=0.5, calibrate=False, settle_s=0.0)
    assert result["frame_size"] == "1280x720" and result["frames_read"] > 0
    assert {"frames_shown_per_s", "worst_block_ms", "p99_block_ms", "median_processing_ms"} <= set(result)
