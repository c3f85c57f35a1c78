"""How fast the viewer runs: frames shown per second and the longest stall of the Tk thread.

Run it (starts Xvfb when there is no display)::

    python -m benchspec.gui.perf [--seconds 10] [--video FILE] [--json]

It opens the real viewer at 1024x768 on a looped 30 fps video (by default a
1280x720 video of the demo CFL frames with fresh noise in every frame, written
to a temporary folder), calibrates it so that the live path runs with the
wavelength axis and line labels on, and then counts for ``--seconds``:

* frames shown per second (frames drawn on screen, each a new processed frame);
* the Tk thread's longest stall: a callback is scheduled every 5 ms and the
  largest gap between two of them, less 5 ms, is the longest time the
  window could not react;
* the median live processing time per frame and how many frames were dropped.

This is a measurement, not a test: speed is reported, never asserted in unit tests.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from .display import start_virtual_display

import numpy as np

__all__ = ["write_test_video", "measure_viewer"]


def write_test_video(path, *, frames: int = 90, fps: float = 30.0, seed: int = 1) -> Path:
    """A 1280x720 MJPG video of the demo CFL frames, each frame with its own noise (demo data)."""
    import cv2

    from ..frames import read_image
    from ..sources import demo_folder

    folder = demo_folder()
    stills = [read_image(p) for p in sorted(folder.glob("cfl_*.png"))]
    if not stills:
        from ..errors import SourceError

        raise SourceError(f"no demo CFL frames in {folder}; regenerate the demo frames first")
    rng = np.random.default_rng(seed)
    height, width = stills[0].shape[:2]
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), fps, (width, height))
    for k in range(frames):
        base = stills[k % len(stills)].astype(np.int16)
        noisy = np.clip(base + rng.integers(-2, 3, size=base.shape, dtype=np.int16), 0, 255).astype(np.uint8)
        writer.write(np.ascontiguousarray(noisy[..., ::-1]))
    writer.release()
    return Path(path)


def _ensure_display() -> subprocess.Popen | None:
    if os.environ.get("DISPLAY"):
        return None
    started = start_virtual_display(base=150)
    if started is None:
        raise RuntimeError("no DISPLAY and no Xvfb; install the Debian package xvfb")
    return started[1]


def measure_viewer(video=None, *, seconds: float = 10.0, calibrate: bool = True, lamp: str = "cfl",
                   size: str = "1024x768", screenshot: str | None = None, settle_s: float = 1.0) -> dict:
    """Run the viewer on a looped, paced video and measure it (see the module notes).

    Returns
    -------
    dict
        ``frames_shown_per_s``, ``source_fps``, ``worst_block_ms``, ``p99_block_ms``,
        ``median_processing_ms``, ``frames_dropped``, ``frames_read``, ``seconds``,
        ``calibrated``, ``frame_size``.
    """
    import tkinter as tk

    from ..sources import VideoSource
    from .app import Viewer

    xvfb = _ensure_display()
    tmp = None
    try:
        if video is None:
            tmp = tempfile.mkdtemp(prefix="benchspec-perf-")
            video = write_test_video(Path(tmp) / "cfl-720p-30fps.avi")
        source = VideoSource(video, loop=True, pace=True)
        info = source.info
        root = tk.Tk()
        root.geometry(size + "+0+0")
        viewer = Viewer(root, source=source)
        viewer.light_radios["fluorescent"].invoke()
        viewer.buttons["start"].invoke()

        def pump_until(condition, timeout):
            end = time.monotonic() + timeout
            while time.monotonic() < end and not condition():
                root.update()
                time.sleep(0.002)
            return condition()

        pump_until(lambda: viewer.stats.frames_shown > 10, 20.0)
        calibrated = False
        if calibrate:
            viewer.lamp.set(lamp)
            viewer.buttons["calibrate"].invoke()
            calibrated = pump_until(lambda: viewer.calibration is not None or "calibrate:" in " ".join(viewer.log_lines), 20.0)
            calibrated = calibrated and viewer.calibration is not None
            pump_until(lambda: viewer.last_result is not None and viewer.last_result.axis_is_wavelength, 5.0)
        pump_until(lambda: False, settle_s)  # let start-up work finish before counting

        gaps: list[float] = []
        beat = {"last": None}
        period_ms = 5

        def heartbeat():
            now = time.perf_counter()
            if beat["last"] is not None:
                gaps.append(now - beat["last"])
            beat["last"] = now
            root.after(period_ms, heartbeat)

        load_before = os.getloadavg()[0]
        start_shown = viewer.stats.frames_shown
        start_skipped = viewer.stats.spectrum_skipped
        start_renders = viewer.stats.full_redraws
        start_read = viewer.worker.frames_read
        start_dropped = viewer.worker.frames.dropped
        started = time.perf_counter()
        root.after(period_ms, heartbeat)
        root.after(int(seconds * 1000), root.quit)
        root.mainloop()
        elapsed = time.perf_counter() - started
        shown = viewer.stats.frames_shown - start_shown
        worker = viewer.worker
        result = {
            "seconds": round(elapsed, 2),
            "frame_size": f"{info.width_px}x{info.height_px}",
            "source_fps": info.frame_rate_hz,
            "frames_read": worker.frames_read - start_read,
            "frames_shown": shown,
            "frames_shown_per_s": round(shown / elapsed, 2),
            "frames_dropped": worker.frames.dropped - start_dropped,
            # frames whose spectrum trace waited for a full plot render (the frame itself was shown)
            "spectrum_updates_skipped": viewer.stats.spectrum_skipped - start_skipped,
            "full_plot_renders": viewer.stats.full_redraws - start_renders,
            "median_processing_ms": round(float(np.median(worker.recent_process_s)) * 1000, 2)
            if worker.recent_process_s else None,
            "worst_block_ms": round(max(0.0, (max(gaps) - period_ms / 1000)) * 1000, 1) if gaps else None,
            "p99_block_ms": round(max(0.0, float(np.percentile(gaps, 99)) - period_ms / 1000) * 1000, 1)
            if gaps else None,
            "calibrated": calibrated,
            "window": size,
            "cpu_count": os.cpu_count(),
            # other programs compete for the same cores: the figures are only comparable at similar load
            "load_average_1min": round(max(load_before, os.getloadavg()[0]), 2),
        }
        if screenshot:
            from PIL import ImageGrab

            root.update()
            x, y = root.winfo_rootx(), root.winfo_rooty()
            ImageGrab.grab(bbox=(x, y, x + root.winfo_width(), y + root.winfo_height()),
                           xdisplay=os.environ["DISPLAY"]).save(screenshot)
        viewer.close()
        return result
    finally:
        if tmp:
            shutil.rmtree(tmp, ignore_errors=True)
        if xvfb is not None:
            xvfb.terminate()
            xvfb.wait(timeout=5)
            os.environ.pop("DISPLAY", None)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchspec.gui.perf", description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=10.0)
    parser.add_argument("--video", default=None, help="a video to play (default: a 720p 30 fps demo video)")
    parser.add_argument("--no-calibrate", action="store_true", help="measure on the pixel axis")
    parser.add_argument("--screenshot", default=None, help="save a PNG of the window at the end")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(argv)
    result = measure_viewer(args.video, seconds=args.seconds, calibrate=not args.no_calibrate,
                            screenshot=args.screenshot)
    if args.json:
        print(json.dumps(result, indent=1))
    else:
        print(f"viewer on a {result['frame_size']} {result['source_fps']:g} fps video, window {result['window']}, "
              f"{'calibrated' if result['calibrated'] else 'pixel axis'}:")
        print(f"  frames shown: {result['frames_shown_per_s']:.1f} per second "
              f"({result['frames_shown']} in {result['seconds']} s; {result['frames_read']} read, "
              f"{result['frames_dropped']} dropped; spectrum trace waited for {result['full_plot_renders']} "
              f"full plot render(s) on {result['spectrum_updates_skipped']} frames)")
        print(f"  live processing: {result['median_processing_ms']} ms per frame (median)")
        print(f"  Tk thread longest stall: {result['worst_block_ms']} ms (99th percentile {result['p99_block_ms']} ms)")
        print(f"  machine: {result['cpu_count']} cores, load average {result['load_average_1min']} during the run")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
