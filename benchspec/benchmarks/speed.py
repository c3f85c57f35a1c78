"""Speed of every stage, against two floors the machine sets, on virtual-bench frames.

What is timed
-------------
For each frame size (640x480, 1280x720, 1920x1080) a CFL frame of the virtual
bench (:mod:`benchspec.simulate`, band rotated by 3 degrees, default smile) is
rendered, and each stage is timed on it:

========== ================================================================
decode     :func:`benchspec.frames.read_image` of the frame as a JPEG file
stack      :func:`benchspec.frames.stack_frames` of 8 frames, per frame
linearise  :meth:`benchspec.frames.FramePreparer.prepare` (LUT, channels, saturation)
rectify    :func:`benchspec.geometry.rectify` with precomputed remap tables
extract    box and optimal extraction of the rectified band (:mod:`benchspec.extract`)
lines      :func:`benchspec.lines.find_lines` on the extracted spectrum
calibrate  :func:`benchspec.wavecal.calibrate_lines` from the line table, no first guess;
           also ``from_frame``: :func:`benchspec.pipeline.calibrate_frames` on one
           frame (band, geometry, extraction, lines and solution from scratch);
           both with the search shared with the helper process (:mod:`benchspec.helper`,
           started and ready before the timing) and ``one_process`` without it
identify   :func:`benchspec.identify.identify` on a calibrated He spectrum
live       one new raw frame -> spectrum + lines with the geometry known
           (rectify + extract + lines, and the linearising they need):
           :class:`benchspec.extract.LiveExtractor` (box) and the live line
           finder :func:`benchspec.lines.find_lines_quick`; also timed: the
           spectrum alone, optimal extraction, and the least-squares
           :func:`benchspec.lines.find_lines` instead of the live finder
========== ================================================================

and two floors are measured in the same run, on the same frame:

* **memory pass**: one read pass over the uint8 frame (``ndarray.sum``), the
  least any stage that looks at every pixel can cost;
* **decode only**: ``cv2.imdecode`` of the JPEG bytes, the least a frame from
  a file or an MJPEG webcam costs before any processing.

Every figure is the median of repeated runs (``time.perf_counter``) after a
warm-up call, and each stage is reported with its ratios to both floors.

Batch throughput: a 300-frame 1280x720 Motion-JPEG video is reduced to one
spectrum per frame by :func:`benchspec.pipeline.iter_extract_frames` (what
``benchspec extract --each`` runs: decoding on a second thread, the live
extractor, the calibrated axis), against reading the same video with OpenCV
alone (``cv2.VideoCapture.read``); the bare live extractor on one and on two
threads is timed beside it. One more pass of the pipeline gives the time to
its first spectrum (setting the series up) apart from the rate after it. The
command itself, ``benchspec extract --each VIDEO --calibration CAL.json --out
S.csv`` (a CSV file per frame), is run in the same process (imports done) and
timed the same way, as files per second against the decode-only rate. Memory must
stay bounded for a time series of any length: the growth of the process's
resident memory and of the Python heap (:mod:`tracemalloc`) between frame 100
and frame 300 is reported.

Timings depend on the machine and on what else it runs; the result records
the CPU count, the load average before and after, and the library versions.
No timing is asserted anywhere: the targets are reported as met or missed.
"""

from __future__ import annotations

import contextlib
import gc
import importlib
import os
import platform
import resource
import statistics
import sys
import tempfile
import time
import tracemalloc
import warnings
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np

from .. import helper

__all__ = ["run", "format_report", "SIZES", "STAGES", "TARGETS", "SCHEMA"]

SCHEMA = "benchspec-benchmark-speed/1"
SIZES = ((640, 480), (1280, 720), (1920, 1080))
STAGES = ("decode", "stack", "linearise", "rectify", "extract", "lines", "calibrate", "identify", "live")
#: Issue targets; "live" targets apply at 1280x720.
TARGETS = {
    "live_ms_720p": 2.0,
    "live_memory_ratio_720p": 3.0,
    "live_spectrum_only_ms_720p": 2.0,
    "live_cpu_ms_720p": 2.0,
    "calibrate_ms": 100.0,
    "calibrate_from_frame_ms": 100.0,
    "identify_ms": 50.0,
    "batch_decode_ratio": 0.7,
    "batch_streaming_decode_ratio": 0.7,
}
_STACK_FRAMES = 8
_JPEG_QUALITY = 92  # the virtual bench's default JPEG quality
# Seconds of timed calls per stage at most: slow stages get fewer repeats (at least 3).
_BUDGET_S = {"full": 4.0, "quick": 0.4}


class _Unavailable(Exception):
    """A stage whose module or function is not (yet) in the package."""


# --------------------------------------------------------------------------- timing


def _cpu_s() -> float:
    """CPU seconds of this process (all threads) and of its helper process (benchspec.helper)."""
    return time.process_time() + helper.cpu_seconds()


def _time(fn: Callable[[], Any], *, repeats: int, warmup: int = 1, per: int = 1, budget_s: float | None = None) -> dict:
    """Median (and spread) of ``repeats`` timed calls of ``fn`` after ``warmup`` calls, in ms per ``per`` items.

    With ``budget_s``, slow calls are repeated only as often as fit in that
    many seconds (at least 3 samples). A budget under a second (quick mode)
    skips the warm-up and may keep a single sample.
    """
    quick = budget_s is not None and budget_s < 1.0
    if quick:
        warmup = 0  # quick mode checks that the stages run; its figures are indicative only
    start = time.perf_counter()
    for _ in range(warmup):
        fn()
    warm = (time.perf_counter() - start) / max(warmup, 1)
    samples, cpu_samples = [], []
    if quick:
        start, start_cpu = time.perf_counter(), _cpu_s()
        fn()
        warm = time.perf_counter() - start
        samples.append(warm * 1000.0 / per)
        cpu_samples.append((_cpu_s() - start_cpu) * 1000.0 / per)
    if budget_s is not None and warm > 0:
        repeats = max(3 if not quick else 0, min(repeats - len(samples), int(budget_s / warm)))
    gc_was_enabled = gc.isenabled()
    gc.disable()  # a collection in the middle of one sample is noise, not the stage's cost
    try:
        for _ in range(repeats):
            start, start_cpu = time.perf_counter(), _cpu_s()
            fn()
            samples.append((time.perf_counter() - start) * 1000.0 / per)
            cpu_samples.append((_cpu_s() - start_cpu) * 1000.0 / per)
    finally:
        if gc_was_enabled:
            gc.enable()
    samples.sort()
    return {
        "median_ms": float(statistics.median(samples)),
        "min_ms": float(samples[0]),
        "p90_ms": float(samples[min(len(samples) - 1, int(round(0.9 * (len(samples) - 1))))]),
        # CPU time of the process (all its threads) and of its helper process: steadier than the wall clock on a shared machine
        "median_cpu_ms": float(statistics.median(cpu_samples)),
        "repeats": len(samples),
    }


def _optional(module: str):
    try:
        return importlib.import_module(f"benchspec.{module}")
    except ModuleNotFoundError as exc:
        if exc.name == f"benchspec.{module}":
            raise _Unavailable(f"benchspec.{module} is not in this version of the package") from None
        raise


def _attribute(module, *names):
    for name in names:
        if hasattr(module, name):
            return getattr(module, name)
    raise _Unavailable(f"{module.__name__} has none of {', '.join(names)}")


# --------------------------------------------------------------------------- scenes


def _bench(width: int, height: int):
    from .. import simulate

    return simulate.Bench().with_(
        camera={"width_px": width, "height_px": height, "rotation_deg": 3.0},
        slit={"height_px": round(height / 4.5)},
        output={"jpeg_quality": _JPEG_QUALITY},
    )


class _Scene:
    """Frames of one size and everything the stages hand each other."""

    def __init__(self, width: int, height: int, *, n_frames: int, folder: Path, budget_s: float):
        from .. import simulate

        self.budget_s = budget_s
        self.width, self.height = width, height
        self.bench = _bench(width, height)
        # row-major RGB, as a decoder or a camera hands frames over (the renderer's own arrays are planar)
        self.frames = [np.ascontiguousarray(simulate.render(self.bench, source="cfl", seed=seed).image)
                       for seed in range(1, n_frames + 1)]
        self.frame = np.ascontiguousarray(self.frames[0])
        ok, encoded = cv2.imencode(".jpg", np.ascontiguousarray(self.frame[:, :, ::-1]),
                                   [cv2.IMWRITE_JPEG_QUALITY, _JPEG_QUALITY])
        if not ok:  # pragma: no cover - OpenCV always has JPEG
            raise RuntimeError("OpenCV could not encode a JPEG")
        self.jpeg = encoded
        self.jpeg_path = folder / f"frame_{width}x{height}.jpg"
        self.jpeg_path.write_bytes(encoded.tobytes())
        self.he_frame = simulate.render(self.bench, source="he", seed=99).image
        self.notes: list[str] = []
        # filled by the stages, in order
        self.stacked = None
        self.geometry = None
        self.tables = None
        self.rectified = None
        self.spectrum = None
        self.line_table = None
        self.calibration = None
        self.noise_model = None
        self.pipeline_calibration = None


def _stack_cfl(scene: _Scene):
    from .. import frames

    return frames.stack_frames(scene.frames)


# --------------------------------------------------------------------------- stages


def _stage_decode(scene: _Scene, repeats: int) -> dict:
    from .. import frames

    return _time(lambda: frames.read_image(scene.jpeg_path), repeats=repeats)


def _stage_stack(scene: _Scene, repeats: int) -> dict:
    from .. import frames

    batch = [scene.frames[i % len(scene.frames)] for i in range(_STACK_FRAMES)]
    result = _time(lambda: frames.stack_frames(batch), repeats=repeats, per=_STACK_FRAMES, budget_s=scene.budget_s)
    result["frames_per_stack"] = _STACK_FRAMES
    scene.stacked = frames.stack_frames(scene.frames)
    return result


def _stage_linearise(scene: _Scene, repeats: int) -> dict:
    from .. import frames

    preparer = frames.FramePreparer()
    return _time(lambda: preparer.prepare(scene.frame), repeats=repeats)


def _measured_geometry(scene: _Scene):
    if scene.geometry is None:
        geometry = _optional("geometry")
        stacked = scene.stacked if scene.stacked is not None else _stack_cfl(scene)
        scene.stacked = stacked
        scene.geometry = geometry.measure_geometry(stacked.image, saturated=stacked.saturated)
        scene.tables = geometry.remap_tables(scene.geometry)
    return scene.geometry


def _stage_rectify(scene: _Scene, repeats: int) -> dict:
    geometry = _optional("geometry")
    g = _measured_geometry(scene)
    stacked = scene.stacked
    scene.rectified = geometry.rectify(stacked.image, g, variance=stacked.variance, saturated=stacked.saturated,
                                       tables=scene.tables)
    from .. import frames

    image, saturated = frames.FramePreparer().prepare(scene.frame)
    result = _time(lambda: geometry.rectify(image, g, saturated=saturated, tables=scene.tables), repeats=repeats)
    result["what"] = "one linear frame with its saturation mask, remap tables precomputed"
    return result


def _noise_model(scene: _Scene, *, single_frame: bool = False):
    extract = _optional("extract")
    if scene.noise_model is None:
        scene.noise_model = extract.estimate_noise_model(scene.stacked, geometry=_measured_geometry(scene))
    if single_frame:
        from dataclasses import replace

        return replace(scene.noise_model, stack_factor=1.0, n_frames=1)
    return scene.noise_model


def _extract_call(scene: _Scene, rectified, method: str, *, single_frame: bool = False):
    extract = _optional("extract")
    return extract.extract(rectified, noise_model=_noise_model(scene, single_frame=single_frame), method=method)


def _stage_extract(scene: _Scene, repeats: int) -> dict:
    if scene.rectified is None:
        raise _Unavailable("needs the rectified band (rectify stage)")
    _noise_model(scene)
    result = {}
    for method in ("box", "optimal"):
        result[method] = _time(lambda: _extract_call(scene, scene.rectified, method), repeats=repeats,
                               budget_s=scene.budget_s)
    scene.spectrum = _extract_call(scene, scene.rectified, "box")
    result.update({k: result["box"][k] for k in ("median_ms", "min_ms", "p90_ms", "median_cpu_ms", "repeats")})
    result["what"] = "box (headline) and optimal (Horne 1986) extraction of the rectified band"
    return result


def _stage_lines(scene: _Scene, repeats: int) -> dict:
    from .. import lines

    if scene.spectrum is None:
        raise _Unavailable("needs the extracted spectrum (extract stage)")
    scene.line_table = lines.find_lines(scene.spectrum)
    result = _time(lambda: lines.find_lines(scene.spectrum), repeats=repeats, budget_s=scene.budget_s)
    result["n_lines"] = len(scene.line_table)
    return result


@contextlib.contextmanager
def _one_process():
    """Calibrations inside run without the helper process (as a one-shot command does)."""
    previous = os.environ.get("BENCHSPEC_HELPER")
    os.environ["BENCHSPEC_HELPER"] = "0"
    try:
        yield
    finally:
        if previous is None:
            del os.environ["BENCHSPEC_HELPER"]
        else:
            os.environ["BENCHSPEC_HELPER"] = previous


def _stage_calibrate(scene: _Scene, repeats: int) -> dict:
    wavecal = _optional("wavecal")
    if scene.line_table is None:
        raise _Unavailable("needs the line table (lines stage)")
    scene.calibration = wavecal.calibrate_lines(scene.line_table, lamp="cfl")
    # The search shares its independent refinements with a helper process (benchspec.helper) in a
    # process that searches more than once; a one-shot `benchspec calibrate` searches alone. Both
    # are timed: the figure with the helper, and `one_process` without it.
    helper_ready = helper.warm()
    result = _time(lambda: wavecal.calibrate_lines(scene.line_table, lamp="cfl"), repeats=repeats, budget_s=scene.budget_s)
    result["helper_process"] = helper_ready
    with _one_process():
        result["one_process"] = _time(lambda: wavecal.calibrate_lines(scene.line_table, lamp="cfl"), repeats=repeats,
                                      budget_s=scene.budget_s)
    result["rms_px"] = float(scene.calibration.rms_px)
    result["n_matched"] = int(scene.calibration.n_used)
    result["verdict"] = str(scene.calibration.verdict)
    try:
        pipeline = _optional("pipeline")
    except _Unavailable as exc:
        result["from_frame"] = {"available": False, "reason": str(exc)}
    else:
        from ..geometry import _DERIVED

        def from_scratch():
            _DERIVED.clear()  # nothing kept from an earlier call (remap tables, noise factors): a new setup
            return pipeline.calibrate_frames(scene.frame, lamp="cfl")

        scene.pipeline_calibration = from_scratch()
        result["from_frame"] = _time(from_scratch, repeats=repeats, budget_s=scene.budget_s)
        result["from_frame"]["what"] = ("pipeline.calibrate_frames on one frame (optimal extraction, its default; "
                                        "the per-geometry cache cleared before each call)")
        with _one_process():
            result["from_frame"]["one_process"] = _time(from_scratch, repeats=repeats, budget_s=scene.budget_s)
    return result


def _he_spectrum(scene: _Scene):
    """The He frame extracted with the CFL geometry and calibrated with the CFL solution."""
    from .. import frames

    geometry = _optional("geometry")
    image, saturated = frames.FramePreparer().prepare(scene.he_frame)
    rectified = geometry.rectify(image, scene.geometry, saturated=saturated, tables=scene.tables)
    spectrum = _extract_call(scene, rectified, "box", single_frame=True)
    wavelength = scene.calibration.wavelength_nm(spectrum.pixel)
    uncertainty = scene.calibration.uncertainty_nm(spectrum.pixel)
    # Keep what a webcam sees (the solution extrapolates wildly beyond it), blue first.
    order = np.argsort(wavelength)
    order = order[(wavelength[order] >= 380.0) & (wavelength[order] <= 760.0)]
    return spectrum.with_(
        intensity=spectrum.intensity[order], uncertainty=spectrum.uncertainty[order], pixel=spectrum.pixel[order],
        saturated=spectrum.saturated[order], wavelength_nm=wavelength[order],
        wavelength_uncertainty_nm=uncertainty[order],
    )


def _stage_identify(scene: _Scene, repeats: int) -> dict:
    identify = _optional("identify")
    if scene.calibration is None:
        raise _Unavailable("needs a wavelength calibration (calibrate stage)")
    spectrum = _he_spectrum(scene)
    first = identify.identify(spectrum)
    result = _time(lambda: identify.identify(spectrum), repeats=repeats, budget_s=scene.budget_s)
    result["verdict"] = str(first.verdict)
    result["top"] = first.matches[0].symbol if first.matches else None
    return result


def _live_extractor(scene: _Scene, *, method: str = "box", full_lines: bool = False):
    """A callable raw frame -> (spectrum, lines) with the geometry known, and what it is.

    The live line finder is :func:`benchspec.lines.find_lines_quick` (where
    the package has it); ``full_lines`` times :func:`benchspec.lines.find_lines`,
    the least-squares finder used for saved spectra, instead.
    """
    from .. import lines

    spectrum_of, what = _live_spectrum(scene, method=method)
    finder = lines.find_lines if full_lines or not hasattr(lines, "find_lines_quick") else lines.find_lines_quick

    def call(frame):
        spectrum = spectrum_of(frame)
        return spectrum, finder(spectrum)

    return call, f"{what} + lines.{finder.__name__}"


def _live_spectrum(scene: _Scene, *, method: str = "box"):
    """A callable raw frame -> spectrum with the geometry known (the live extractor when there is one)."""
    g = _measured_geometry(scene)
    extract = _optional("extract")
    noise_model = _noise_model(scene, single_frame=True)
    if hasattr(extract, "LiveExtractor"):
        live = extract.LiveExtractor(g, noise_model=noise_model, method=method)
        return live.process_raw, f"extract.LiveExtractor.process_raw ({method})"
    # The generic chain the stages above use, one frame at a time.
    from .. import frames

    geometry = _optional("geometry")
    preparer = frames.FramePreparer()

    def chain(frame):
        image, saturated = preparer.prepare(frame)
        rectified = geometry.rectify(image, g, saturated=saturated, tables=scene.tables)
        return _extract_call(scene, rectified, "box", single_frame=True)

    return chain, "FramePreparer.prepare + geometry.rectify + box extraction"


def _stage_live(scene: _Scene, repeats: int) -> dict:
    call, what = _live_extractor(scene)
    frames_cycle = scene.frames
    counter = iter(range(10**9))
    result = _time(lambda: call(frames_cycle[next(counter) % len(frames_cycle)]), repeats=repeats,
                   budget_s=scene.budget_s)
    result["what"] = what
    # where the time goes: the spectrum alone (rectify + extract), without the line fits
    spectrum_of, what_spectrum = _live_spectrum(scene)
    result["spectrum_only"] = _time(lambda: spectrum_of(frames_cycle[next(counter) % len(frames_cycle)]),
                                    repeats=repeats, budget_s=scene.budget_s)
    result["spectrum_only"]["what"] = what_spectrum
    # the same with Horne's optimal extraction (stored profile), and with the least-squares line finder
    for key, kwargs in (("optimal", {"method": "optimal"}), ("full_lines", {"full_lines": True})):
        variant, what_variant = _live_extractor(scene, **kwargs)
        result[key] = _time(lambda: variant(frames_cycle[next(counter) % len(frames_cycle)]), repeats=repeats,
                            budget_s=scene.budget_s)
        result[key]["what"] = what_variant
    return result


_STAGE_FUNCTIONS = {
    "decode": _stage_decode,
    "stack": _stage_stack,
    "linearise": _stage_linearise,
    "rectify": _stage_rectify,
    "extract": _stage_extract,
    "lines": _stage_lines,
    "calibrate": _stage_calibrate,
    "identify": _stage_identify,
    "live": _stage_live,
}


def _floors(scene: _Scene, repeats: int) -> dict:
    frame = scene.frame
    memory = _time(lambda: frame.sum(), repeats=max(repeats, 20))
    decode = _time(lambda: cv2.imdecode(scene.jpeg, cv2.IMREAD_COLOR), repeats=max(repeats, 20))
    return {
        "memory_pass": dict(memory, what=f"ndarray.sum over the {frame.nbytes / 1e6:.2f} MB uint8 RGB frame"),
        "decode_only": dict(decode, what=f"cv2.imdecode of the {scene.jpeg.size / 1e3:.0f} kB JPEG (quality {_JPEG_QUALITY})"),
    }


def _run_size(width: int, height: int, *, repeats: int, n_frames: int, folder: Path, stages, progress,
              budget_s: float) -> tuple[dict, _Scene]:
    scene = _Scene(width, height, n_frames=n_frames, folder=folder, budget_s=budget_s)
    floors = _floors(scene, repeats)
    memory_ms = floors["memory_pass"]["median_ms"]
    decode_ms = floors["decode_only"]["median_ms"]
    results: dict[str, dict] = {}
    for name in stages:
        if progress:
            progress(f"{width}x{height} {name}")
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                figures = _STAGE_FUNCTIONS[name](scene, repeats)
        except _Unavailable as exc:
            results[name] = {"available": False, "reason": str(exc)}
            continue
        except Exception as exc:  # a stage that fails on this frame is reported, not hidden
            results[name] = {"available": False, "error": f"{type(exc).__name__}: {exc}"}
            continue
        figures["available"] = True
        figures["memory_ratio"] = figures["median_ms"] / memory_ms
        figures["decode_ratio"] = figures["median_ms"] / decode_ms
        memory_cpu = floors["memory_pass"]["median_cpu_ms"]
        decode_cpu = floors["decode_only"]["median_cpu_ms"]
        if memory_cpu > 0 and decode_cpu > 0 and "median_cpu_ms" in figures:
            figures["memory_ratio_cpu"] = figures["median_cpu_ms"] / memory_cpu
            figures["decode_ratio_cpu"] = figures["median_cpu_ms"] / decode_cpu
        results[name] = figures
    size = {
        "width_px": width,
        "height_px": height,
        "floors": floors,
        "stages": results,
        "jpeg_bytes": int(scene.jpeg.size),
    }
    if scene.geometry is not None:
        size["geometry"] = {
            "rotation_deg": float(scene.geometry.rotation_deg),
            "rectified_shape": list(scene.geometry.rectified_shape),
            "aperture_rows": list(scene.geometry.aperture_rows),
        }
    return size, scene


# --------------------------------------------------------------------------- batch


def _write_video(frames_rgb, path: Path, n_frames: int, fps: float = 30.0) -> None:
    height, width = frames_rgb[0].shape[:2]
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), fps, (width, height), True)
    if not writer.isOpened():  # pragma: no cover - MJPG/AVI is built into OpenCV
        raise RuntimeError("OpenCV cannot write an MJPG video")
    try:
        bgr = [np.ascontiguousarray(f[:, :, ::-1]) for f in frames_rgb]
        for i in range(n_frames):
            writer.write(bgr[i % len(bgr)])
    finally:
        writer.release()


def _decode_only(path: Path, cpu: list | None = None) -> tuple[float, int]:
    """(seconds, frames) of reading the video with OpenCV alone; ``cpu`` gets the process CPU seconds appended."""
    capture = cv2.VideoCapture(str(path))
    count = 0
    start = time.perf_counter()
    start_cpu = time.process_time()
    try:
        while True:
            ok, _ = capture.read()
            if not ok:
                break
            count += 1
    finally:
        capture.release()
    if cpu is not None:
        cpu.append(time.process_time() - start_cpu)
    return time.perf_counter() - start, count


def _rss_mb() -> float:
    """Current resident set size (Linux /proc; the peak from getrusage elsewhere)."""
    try:
        with open("/proc/self/statm") as handle:
            pages = int(handle.read().split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE") / 1e6
    except (OSError, ValueError, IndexError):  # pragma: no cover - not Linux
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e3


def _streaming_runner(scene: _Scene, *, threaded: bool):
    """Video path -> iterator of spectra through the live extractor, optionally decoding on a second thread."""
    from .. import frames

    spectrum_of, what = _live_spectrum(scene)

    def chain(path):
        for frame in frames.iter_video(path):
            yield spectrum_of(frame)

    def two_threads(path):
        from ..pipeline import _decoded_ahead

        for frame in _decoded_ahead(frames.iter_video(path)):
            yield spectrum_of(frame)

    if threaded:
        return two_threads, f"decode thread (frames.iter_video) + {what}"
    return chain, f"frames.iter_video + {what}"


def _rates(runner, path: Path, passes: int = 2, cpu: dict | None = None) -> tuple[float, float, int, int]:
    """(decode-only seconds, runner seconds, frames decoded, items produced), best of ``passes`` interleaved.

    ``runner(path)`` is iterated (an iterator of spectra) or, when it returns an int, taken as the
    count it produced. ``cpu`` (a dict) gets the smallest process CPU seconds of each kind.
    """
    decode_runs, runner_runs, decode_cpu, runner_cpu = [], [], [], []
    count = produced = 0
    for _ in range(passes):
        seconds, count = _decode_only(path, decode_cpu)
        decode_runs.append(seconds)
        start = time.perf_counter()
        start_cpu = time.process_time()
        produced = 0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            items = runner(path)
            if isinstance(items, int):
                produced = items
            else:
                for _item in items:
                    produced += 1
        runner_runs.append(time.perf_counter() - start)
        runner_cpu.append(time.process_time() - start_cpu)
    if cpu is not None:
        cpu.update(decode_s=min(decode_cpu), each_s=min(runner_cpu))
    return min(decode_runs), min(runner_runs), count, produced


def _rate_record(what: str, decode_s: float, each_s: float, count: int, produced: int, cpu: dict | None = None) -> dict:
    record = {
        "available": True,
        "what": what,
        "frames_decoded": count,
        "frames_reduced": produced,
        "decode_only_fps": count / decode_s,
        "each_fps": produced / each_s,
        "decode_only_ms_per_frame": 1000.0 * decode_s / max(count, 1),
        "each_ms_per_frame": 1000.0 * each_s / max(produced, 1),
        "ratio": (produced / each_s) / (count / decode_s),
    }
    if cpu:
        record["decode_only_cpu_ms_per_frame"] = 1000.0 * cpu["decode_s"] / max(count, 1)
        record["each_cpu_ms_per_frame"] = 1000.0 * cpu["each_s"] / max(produced, 1)
    return record


def _batch(scene: _Scene, *, n_frames: int, folder: Path, progress, quick: bool) -> dict:
    path = folder / f"series_{scene.width}x{scene.height}.avi"
    _write_video(scene.frames, path, n_frames)
    result: dict[str, Any] = {"width_px": scene.width, "height_px": scene.height, "frames": n_frames,
                              "video_bytes": path.stat().st_size, "codec": "MJPG (AVI)",
                              "timing": "best of 2 passes over the whole video, interleaved with decode-only passes"}
    _decode_only(path)  # warm-up: the OS cache holds the file and the codec is loaded
    try:
        if progress:
            progress(f"batch {scene.width}x{scene.height} x {n_frames} frames, streaming")
        runner, what = _streaming_runner(scene, threaded=False)
        result["streaming"] = _rate_record(what, *_rates(runner, path))
        if progress:
            progress(f"batch {scene.width}x{scene.height} x {n_frames} frames, two threads")
        threaded, what_threaded = _streaming_runner(scene, threaded=True)
        result["two_threads"] = _rate_record(what_threaded, *_rates(threaded, path))
        result["memory"] = _memory_growth(threaded, path, n_frames)
    except _Unavailable as exc:
        result.update(available=False, reason=str(exc))
        return result
    result["pipeline_each"] = _pipeline_each(scene, folder, path, n_frames=n_frames, progress=progress)
    best = max(("streaming", "two_threads"), key=lambda k: result[k]["ratio"])
    result.update({k: result[best][k] for k in ("what", "frames_decoded", "frames_reduced", "decode_only_fps",
                                                "each_fps", "ratio")})
    result["available"] = True
    result["best"] = best
    return result


def _pipeline_each(scene: _Scene, folder: Path, path: Path, *, n_frames: int, progress) -> dict:
    """``pipeline.iter_extract_frames`` on the batch video: what ``benchspec extract --each`` runs.

    Also its memory growth over the video, and what the list returned by
    ``pipeline.extract_frames(each=True)`` holds per frame (on a short video).
    """
    try:
        pipeline = _optional("pipeline")
    except _Unavailable as exc:
        return {"available": False, "reason": str(exc)}
    calibration = scene.pipeline_calibration
    if calibration is None:
        try:
            calibration = pipeline.calibrate_frames(scene.frame, lamp="cfl")
        except Exception as exc:  # reported, not hidden
            return {"available": False, "error": f"{type(exc).__name__}: {exc}"}
    if progress:
        progress(f"batch {scene.width}x{scene.height} x {n_frames} frames, pipeline.iter_extract_frames")
    streaming = hasattr(pipeline, "iter_extract_frames")

    def runner(p):
        if streaming:
            return pipeline.iter_extract_frames(str(p), calibration)
        return iter(pipeline.extract_frames(str(p), calibration, each=True))

    name = "pipeline.iter_extract_frames" if streaming else "pipeline.extract_frames(each=True)"
    extraction = str(calibration.settings.get("extraction", "optimal"))
    cpu: dict = {}
    record = _rate_record(f"{name} ({extraction} extraction, the calibration's; what extract --each runs)",
                          *_rates(runner, path, passes=2, cpu=cpu), cpu=cpu)
    record["frames"] = n_frames
    record.update(_first_and_rest(runner, path, decode_fps=record["decode_only_fps"]))
    record["memory"] = _memory_growth(runner, path, n_frames)
    # what the returned list holds per frame, extrapolated to an hour at 30 fps
    short = folder / f"series_{scene.width}x{scene.height}_memory.avi"
    count = max(2, min(n_frames, 60) // 3)
    _write_video(scene.frames, short, count)
    gc.collect()
    tracemalloc.start()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            held = pipeline.extract_frames(str(short), calibration, each=True)
        per_frame = tracemalloc.get_traced_memory()[0] / max(len(held), 1)
        del held
    finally:
        tracemalloc.stop()
    record["list_memory_held_per_frame_kb"] = per_frame / 1e3
    record["list_memory_one_hour_30fps_gb"] = per_frame * 30 * 3600 / 1e9
    record["command"] = _command_each(calibration, folder, path, n_frames=n_frames, progress=progress)
    record["command_netcdf"] = _command_each(calibration, folder, path, n_frames=n_frames, progress=progress,
                                             out_name="S.nc")
    return record


def _command_each(calibration, folder: Path, path: Path, *, n_frames: int, progress, out_name: str = "S.csv") -> dict:
    """``benchspec extract --each VIDEO --calibration CAL.json --out S.csv`` (or ``S.nc``), in this process.

    The whole command: reading the calibration file, the series, one CSV per
    frame (each written atomically) and the flush of the series at the end;
    with ``S.nc`` the whole series in one NetCDF file. Interpreter start-up
    and the imports are not in it (they are the same for every command), nor is removing the
    files it wrote, which happens after the timing.
    """
    netcdf = out_name.endswith(".nc")
    try:
        from ..calfile import write_calibration
        from ..cli import main
    except ImportError as exc:
        return {"available": False, "reason": str(exc)}
    cal_path = folder / "series_calibration.json"
    write_calibration(calibration, cal_path, force=True)
    if progress:
        progress(f"batch {n_frames} frames, benchspec extract --each ({'one NetCDF file' if netcdf else 'CSV per frame'})")
    passes = {"count": 0}
    outputs: list[Path] = []  # removed after the timing: deleting the output is not part of the command

    def runner(p):
        out = folder / f"each_{passes['count']}"
        passes["count"] += 1
        out.mkdir()
        outputs.append(out)
        import contextlib
        import io as _stdio

        with contextlib.redirect_stdout(_stdio.StringIO()):
            code = main(["extract", str(p), "--calibration", str(cal_path), "--each", "--out", str(out / out_name)])
        if netcdf:
            from ..series import read_series

            written = read_series(out / out_name).n_frames
        else:
            written = sum(1 for _ in out.glob("S_*.csv"))
        if code != 0:
            raise RuntimeError(f"benchspec extract --each exited with {code}")
        return written

    try:
        cpu: dict = {}
        what = ("benchspec extract --each --out S.nc (the series in one NetCDF file; after the imports)" if netcdf else
                "benchspec extract --each (a CSV per frame, each written atomically, "
                "the series flushed once at the end; after the imports)")
        record = _rate_record(what,
                              *_rates(runner, path, passes=2, cpu=cpu), cpu=cpu)
    except Exception as exc:  # reported, not hidden
        return {"available": False, "error": f"{type(exc).__name__}: {exc}"}
    finally:
        import shutil

        for out in outputs:
            shutil.rmtree(out, ignore_errors=True)
    return record


def _first_and_rest(runner, path: Path, *, decode_fps: float) -> dict:
    """The set-up (time to the first spectrum) apart from the rate after it, in one more pass.

    The first spectrum waits for the series to be set up (noise model,
    extractor, band check); on a short video that dominates the rate.
    """
    start = time.perf_counter()
    first = None
    count = 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _item in runner(path):
            count += 1
            if first is None:
                first = time.perf_counter() - start
    total = time.perf_counter() - start
    if first is None or count < 2 or total <= first:
        return {"first_spectrum_ms": None if first is None else 1000.0 * first}
    rest_fps = (count - 1) / (total - first)
    return {"first_spectrum_ms": 1000.0 * first, "after_first_fps": rest_fps, "after_first_ratio": rest_fps / decode_fps}


def _memory_growth(runner, path: Path, n_frames: int) -> dict:
    """Resident and traced memory at frame 100 (or a third of the way) and at the end."""
    mark = min(100, max(1, n_frames // 3))
    gc.collect()
    tracemalloc.start()
    rss_at_mark = traced_at_mark = None
    count = 0
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _item in runner(path):
                count += 1
                del _item
                if count == mark:
                    gc.collect()
                    rss_at_mark = _rss_mb()
                    traced_at_mark = tracemalloc.get_traced_memory()[0] / 1e6
                    tracemalloc.reset_peak()
        gc.collect()
        rss_end = _rss_mb()
        traced_end, traced_peak = (v / 1e6 for v in tracemalloc.get_traced_memory())
    finally:
        tracemalloc.stop()
    return {
        "from_frame": mark,
        "to_frame": count,
        "rss_growth_mb": rss_end - (rss_at_mark or rss_end),
        "traced_growth_mb": traced_end - (traced_at_mark or traced_end),
        "traced_peak_above_start_mb": traced_peak - (traced_at_mark or traced_peak),
        "rss_at_end_mb": rss_end,
    }


# --------------------------------------------------------------------------- run


def _interpreter_pace(repeats: int = 7) -> float:
    """Median ms of a fixed interpreter-bound workload: how fast this host runs Python right now.

    The memory pass and the decode floors track memory bandwidth and OpenCV's compiled code;
    the calibration and the line fits are mostly small numpy calls driven from Python, whose
    speed on a shared host changes on its own (the same code measured about 3 times slower one
    evening than the day before while one memory pass changed by 1.5 times). Runs are comparable
    by this figure: 20 000 loop iterations of float arithmetic and 2 000 numpy calls on 16 values.
    """
    values = np.linspace(0.0, 1.0, 16)
    samples = []
    for _ in range(repeats):
        start = time.perf_counter()
        total = 0.0
        for k in range(20_000):
            total += (k * 0.5) % 7.0
        for _ in range(2_000):
            total += float(np.sum(values * 1.5))
        samples.append((time.perf_counter() - start) * 1000.0)
    return float(statistics.median(samples))


def _machine() -> dict:
    try:
        load = [round(v, 2) for v in os.getloadavg()]
    except OSError:  # pragma: no cover
        load = None
    return {
        "cpu_count": os.cpu_count(),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "opencv": cv2.__version__,
        "opencv_threads": cv2.getNumThreads(),
        "load_average_1_5_15": load,
        "interpreter_pace_ms": round(_interpreter_pace(), 2),
    }


def _targets(sizes: list[dict], batch: dict | None) -> dict:
    by_size = {(s["width_px"], s["height_px"]): s for s in sizes}
    checks = {}
    reference = by_size.get((1280, 720)) or (sizes[0] if sizes else None)
    label = f"{reference['width_px']}x{reference['height_px']}" if reference else None

    def stage(name):
        figures = reference["stages"].get(name, {}) if reference else {}
        return figures if figures.get("available") else None

    live = stage("live")
    calibrate = stage("calibrate")
    identify = stage("identify")
    checks["live_ms_720p"] = _check(live and live["median_ms"], TARGETS["live_ms_720p"], "<=", "ms", label)
    checks["live_memory_ratio_720p"] = _check(live and live["memory_ratio"], TARGETS["live_memory_ratio_720p"], "<=",
                                              "x memory pass", label)
    spectrum_only = live.get("spectrum_only") if live else None
    checks["live_spectrum_only_ms_720p"] = _check(spectrum_only and spectrum_only["median_ms"],
                                                  TARGETS["live_ms_720p"], "<=", "ms (rectify + extract, no lines)",
                                                  label)
    checks["live_cpu_ms_720p"] = _check(live and live["median_cpu_ms"], TARGETS["live_ms_720p"], "<=",
                                        "ms process CPU, all threads", label)
    checks["calibrate_ms"] = _check(calibrate and calibrate["median_ms"], TARGETS["calibrate_ms"], "<", "ms", label)
    from_frame = calibrate.get("from_frame") if calibrate else None
    checks["calibrate_from_frame_ms"] = _check(
        from_frame["median_ms"] if from_frame and "median_ms" in from_frame else None,
        TARGETS["calibrate_from_frame_ms"], "<", "ms", label)
    checks["identify_ms"] = _check(identify and identify["median_ms"], TARGETS["identify_ms"], "<", "ms", label)
    batch_label = f"{batch['width_px']}x{batch['height_px']}" if batch else None
    each = batch.get("pipeline_each") if batch else None
    checks["batch_decode_ratio"] = _check(each["ratio"] if each and each.get("available") else None,
                                          TARGETS["batch_decode_ratio"], ">=",
                                          "x decode-only rate (pipeline.iter_extract_frames, extract --each)", batch_label)
    ratio = batch["ratio"] if batch and batch.get("available") else None
    checks["batch_streaming_decode_ratio"] = _check(ratio, TARGETS["batch_streaming_decode_ratio"], ">=",
                                                    "x decode-only rate (streaming live extractor)", batch_label)
    return checks


def _check(value, target, relation, unit, size) -> dict:
    if value is None:
        return {"measured": None, "target": target, "relation": relation, "unit": unit, "size": size, "met": None}
    met = {"<=": value <= target, "<": value < target, ">=": value >= target}[relation]
    return {"measured": float(value), "target": target, "relation": relation, "unit": unit, "size": size,
            "met": bool(met)}


def run(quick: bool = False, *, sizes=None, repeats: int | None = None, video_frames: int | None = None,
        stages=STAGES, batch: bool = True, progress: Callable[[str], None] | None = None) -> dict:
    """Run the speed benchmark.

    Parameters
    ----------
    quick : bool
        One size (640x480), few repeats and a 30-frame video: a few seconds,
        for CI. The full run takes a few minutes.
    sizes : sequence of (width, height), optional
        Frame sizes; default :data:`SIZES` (quick: 640x480 only).
    repeats : int, optional
        Timed calls per stage (default 30; quick 5). Slow stages use fewer.
    video_frames : int, optional
        Length of the batch video (default 300; quick 30).
    stages : sequence of str
        Stages to time, from :data:`STAGES`.
    batch : bool
        Also measure the batch throughput and memory.
    progress : callable, optional
        Called with a short message before each step.

    Returns
    -------
    dict
        ``schema``, ``quick``, ``machine`` (CPU count, load before/after,
        versions), ``sizes`` (per size: ``floors`` and ``stages`` with
        ``median_ms``, ``memory_ratio``, ``decode_ratio``), ``batch``
        (frames per second, ratio, memory growth), ``targets`` (each with
        ``measured``, ``target`` and ``met``) and ``seconds``.
    """
    started = time.perf_counter()
    unknown = [s for s in stages if s not in _STAGE_FUNCTIONS]
    if unknown:
        from ..errors import InputError

        raise InputError(f"unknown benchmark stage(s) {', '.join(unknown)}; choose from {', '.join(STAGES)}")
    if sizes is None:
        sizes = ((640, 480),) if quick else SIZES
    repeats = repeats or (5 if quick else 30)
    video_frames = video_frames or (30 if quick else 300)
    n_render = 2 if quick else 4
    machine = _machine()
    results = []
    batch_result = None
    with tempfile.TemporaryDirectory(prefix="benchspec-speed-") as tmp:
        folder = Path(tmp)
        batch_scene = None
        batch_size = (640, 480) if quick else (1280, 720)
        for width, height in sizes:
            size, scene = _run_size(int(width), int(height), repeats=repeats, n_frames=n_render, folder=folder,
                                    stages=stages, progress=progress,
                                    budget_s=_BUDGET_S["quick" if quick else "full"])
            results.append(size)
            if batch_scene is None or (int(width), int(height)) == batch_size:
                batch_scene = scene
        if batch and batch_scene is not None:
            batch_result = _batch(batch_scene, n_frames=video_frames, folder=folder, progress=progress, quick=quick)
    machine["load_average_after"] = [round(v, 2) for v in os.getloadavg()] if hasattr(os, "getloadavg") else None
    return {
        "schema": SCHEMA,
        "benchmark": "speed",
        "quick": bool(quick),
        "machine": machine,
        "sizes": results,
        "batch": batch_result,
        "targets": _targets(results, batch_result),
        "seconds": time.perf_counter() - started,
    }


# --------------------------------------------------------------------------- report


def _cell(figures: dict | None, clock: str = "wall") -> str:
    if not figures or not figures.get("available"):
        return "n/a"
    if clock == "cpu":
        if "memory_ratio_cpu" not in figures:
            return f"{figures['median_cpu_ms']:.2f}"
        return f"{figures['median_cpu_ms']:.2f} ({figures['memory_ratio_cpu']:.1f}x, {figures['decode_ratio_cpu']:.2f}x)"
    return f"{figures['median_ms']:.2f} ({figures['memory_ratio']:.1f}x, {figures['decode_ratio']:.2f}x)"


def _table(sizes: list[dict], clock: str) -> list[str]:
    key = "median_cpu_ms" if clock == "cpu" else "median_ms"
    headers = ["stage"] + [f"{s['width_px']}x{s['height_px']}" for s in sizes]
    rows = [
        ["memory pass"] + [f"{s['floors']['memory_pass'][key]:.2f}" for s in sizes],
        ["decode only"] + [f"{s['floors']['decode_only'][key]:.2f}" for s in sizes],
    ]
    stage_names = [n for n in STAGES if any(n in s["stages"] for s in sizes)]
    subrows = {"extract": [("optimal", "optimal")],
               "calibrate": [("one_process", "in one process"), ("from_frame", "from frame"),
                             ("from_frame.one_process", "from frame, one process")],
               "live": [("spectrum_only", "no lines"), ("optimal", "optimal extraction"),
                        ("full_lines", "with find_lines")]}
    for name in stage_names:
        rows.append([name] + [_cell(s["stages"].get(name), clock) for s in sizes])
        for sub, label in subrows.get(name, []):
            rows.append([f"  {label}"] + [_subcell(s, name, sub, key) for s in sizes])
    widths = [max(len(r[i]) for r in rows + [headers]) for i in range(len(headers))]
    out = ["  ".join(h.ljust(w) for h, w in zip(headers, widths)), "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(row, widths)) for row in rows]
    return out


def _subcell(size: dict, stage: str, key: str, clock_key: str = "median_ms") -> str:
    figures = size["stages"].get(stage) or {}
    sub = figures
    for part in key.split("."):
        sub = sub.get(part) if isinstance(sub, dict) else None
    if not sub or clock_key not in sub:
        return "n/a"
    floors = size["floors"]
    memory, decode = floors["memory_pass"][clock_key], floors["decode_only"][clock_key]
    if not (memory > 0 and decode > 0):
        return f"{sub[clock_key]:.2f}"
    return f"{sub[clock_key]:.2f} ({sub[clock_key] / memory:.1f}x, {sub[clock_key] / decode:.2f}x)"


def _verdict(check: dict | None) -> str:
    if not check or check["measured"] is None:
        return "not measured"
    return "met" if check["met"] else "MISSED"


def _summary(result: dict) -> list[str]:
    """The issue's live and batch targets in two sentences each."""
    out = []
    targets = result["targets"]
    by_size = {(s["width_px"], s["height_px"]): s for s in result["sizes"]}
    size = by_size.get((1280, 720)) or (result["sizes"][0] if result["sizes"] else None)
    live = size["stages"].get("live") if size else None
    if live and live.get("available"):
        memory = size["floors"]["memory_pass"]
        out.append(
            f"live path at {size['width_px']}x{size['height_px']} ({live['what']}): {live['median_ms']:.2f} ms wall = "
            f"{live['memory_ratio']:.1f}x one memory pass ({memory['median_ms']:.2f} ms); process CPU "
            f"{live['median_cpu_ms']:.2f} ms = {live.get('memory_ratio_cpu', float('nan')):.1f}x")
        out.append(f"  target <= {TARGETS['live_ms_720p']:g} ms: {_verdict(targets.get('live_ms_720p'))}; "
                   f"target <= {TARGETS['live_memory_ratio_720p']:g}x memory pass: "
                   f"{_verdict(targets.get('live_memory_ratio_720p'))}")
        for key, label in (("spectrum_only", "spectrum alone"), ("optimal", "with optimal extraction"),
                           ("full_lines", "with the least-squares line finder")):
            sub = live.get(key)
            if sub and "median_ms" in sub:
                out.append(f"  {label}: {sub['median_ms']:.2f} ms wall ({sub['median_ms'] / memory['median_ms']:.1f}x), "
                           f"CPU {sub['median_cpu_ms']:.2f} ms: {sub['what']}")
    batch = result.get("batch") or {}
    each = batch.get("pipeline_each")
    if each and each.get("available"):
        out.append(f"batch ({each['what']}): {each['each_fps']:.0f} fps = {each['ratio']:.2f}x the decode-only rate "
                   f"({each['decode_only_fps']:.0f} fps); target >= {TARGETS['batch_decode_ratio']:g}x: "
                   f"{_verdict(targets.get('batch_decode_ratio'))}")
        command = each.get("command")
        if command and command.get("available"):
            out.append(f"  the command writing a CSV per frame: {command['each_fps']:.0f} files/s = "
                       f"{command['ratio']:.2f}x the decode-only rate")
        netcdf = each.get("command_netcdf")
        if netcdf and netcdf.get("available"):
            out.append(f"  the command writing one NetCDF file (--out S.nc): {netcdf['each_fps']:.0f} spectra/s = "
                       f"{netcdf['ratio']:.2f}x the decode-only rate")
    return out


def format_report(result: dict) -> str:
    """The figures as a table for people: median ms (x memory pass, x decode only)."""
    sizes = result["sizes"]
    out = ["median wall-clock ms per frame (ratio to one memory pass, ratio to decode only)", ""]
    out += _table(sizes, "wall")
    out += ["", "median CPU ms of the process (all threads, and the helper process where the search shares its work; steadier on a shared machine), same ratios", ""]
    out += _table(sizes, "cpu")
    missing = {}
    for s in sizes:
        for name, figures in s["stages"].items():
            if not figures.get("available"):
                missing.setdefault(name, figures.get("reason") or f"failed: {figures.get('error')}")
    for name, reason in missing.items():
        out.append(f"  {name}: not timed ({reason})")
    for s in sizes:
        live = s["stages"].get("live")
        if live and live.get("available"):
            out.append(f"live path at {s['width_px']}x{s['height_px']}: {live['what']}")
            break
    batch = result.get("batch")
    if batch:
        out.append("")
        if batch.get("available"):
            memory = batch["memory"]
            out.append(f"batch, {batch['frames']} frames {batch['width_px']}x{batch['height_px']} {batch['codec']}, "
                       "one spectrum per frame:")
            for key in ("streaming", "two_threads", "pipeline_each"):
                record = batch.get(key)
                if not record:
                    continue
                if not record.get("available"):
                    out.append(f"  {key}: not measured ({record.get('reason') or record.get('error')})")
                    continue
                out.append(
                    f"  {record['each_fps']:6.0f} fps vs decode only {record['decode_only_fps']:4.0f} fps = "
                    f"{record['ratio']:.2f}x over {record['frames_reduced']} frames: {record['what']}"
                )
                if record.get("after_first_fps"):
                    out.append(f"    first spectrum after {record['first_spectrum_ms']:.0f} ms (setting the series up), "
                               f"then {record['after_first_fps']:.0f} fps = {record['after_first_ratio']:.2f}x "
                               "the decode-only rate (one more pass)")
                if "memory" in record:
                    m = record["memory"]
                    out.append(f"    memory from frame {m['from_frame']} to {m['to_frame']}: resident "
                               f"{m['rss_growth_mb']:+.1f} MB, Python heap {m['traced_growth_mb']:+.2f} MB")
                if "list_memory_held_per_frame_kb" in record:
                    out.append(f"    the list of pipeline.extract_frames(each=True) holds "
                               f"{record['list_memory_held_per_frame_kb']:.0f} kB per frame: "
                               f"{record['list_memory_one_hour_30fps_gb']:.1f} GB for an hour at 30 fps")
                if "each_cpu_ms_per_frame" in record:
                    out.append(f"    process CPU {record['each_cpu_ms_per_frame']:.2f} ms per frame (all threads) vs "
                               f"{record['decode_only_cpu_ms_per_frame']:.2f} ms decoding alone")
                for name, unit in (("command", "files/s"), ("command_netcdf", "spectra/s")):
                    command = record.get(name)
                    if command and command.get("available"):
                        out.append(f"  {command['each_fps']:6.0f} {unit} vs decode only {command['decode_only_fps']:4.0f} "
                                   f"fps = {command['ratio']:.2f}x, CPU {command['each_cpu_ms_per_frame']:.2f} ms per frame: "
                                   f"{command['what']}")
                    elif command:
                        out.append(f"  extract --each ({name}): not measured "
                                   f"({command.get('reason') or command.get('error')})")
            out.append(
                f"memory from frame {memory['from_frame']} to {memory['to_frame']}: resident "
                f"{memory['rss_growth_mb']:+.1f} MB, Python heap {memory['traced_growth_mb']:+.2f} MB "
                f"(peak {memory['traced_peak_above_start_mb']:+.1f} MB above frame {memory['from_frame']})"
            )
        else:
            out.append(f"batch: not measured ({batch.get('reason')})")
    out.append("")
    out += _summary(result)
    out.append("")
    out.append("targets:")
    for name, check in result["targets"].items():
        if check["measured"] is None:
            verdict, value = "not measured", "-"
        else:
            verdict = "met" if check["met"] else "MISSED"
            value = f"{check['measured']:.2f}"
        out.append(f"  {name:<30} {value:>8} {check['relation']} {check['target']:g} {check['unit']} "
                   f"({check['size']}): {verdict}")
    machine = result["machine"]
    out.append("")
    out.append(
        f"machine: {machine['cpu_count']} CPUs, load average {machine['load_average_1_5_15']} before, "
        f"{machine.get('load_average_after')} after; Python {machine['python']}, numpy {machine['numpy']}, "
        f"OpenCV {machine['opencv']} ({machine['opencv_threads']} threads); {result['seconds']:.0f} s"
        + (f"; interpreter pace {machine['interpreter_pace_ms']:.1f} ms (a fixed loop of Python arithmetic and "
           "small numpy calls: compare runs by it)" if machine.get("interpreter_pace_ms") is not None else "")
    )
    return "\n".join(out)


if __name__ == "__main__":  # pragma: no cover
    print(format_report(run(quick="--quick" in sys.argv, progress=lambda m: print(m, file=sys.stderr))))
