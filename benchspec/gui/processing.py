"""The viewer's one door to the core: every computation the window asks for.

:class:`BenchProcessor` runs on the viewer's worker thread, never on the Tk
thread. It holds the state of a session at the bench (geometry, dark,
calibration, identification) and hands the window small frozen results to
draw. Nothing here imports tkinter; matplotlib only for saving a plot file.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..errors import (
    BenchspecError,
    CalibrationError,
    ExportError,
    FileFormatError,
    FrameError,
    GeometryError,
    IdentificationError,
    InputError,
)
from ..spectrum import Spectrum

__all__ = [
    "BandOverlay",
    "LiveLine",
    "LiveResult",
    "CalibrationSummary",
    "IdentificationSummary",
    "BenchProcessor",
    "prepare_display",
]


# --------------------------------------------------------------------------- results for the window


@dataclass(frozen=True)
class BandOverlay:
    """What to draw on the frame: polylines in frame pixel coordinates (x, y)."""

    band: tuple[np.ndarray, ...]          # outline(s) of the band
    aperture: tuple[np.ndarray, ...]      # top and bottom edge of the extraction aperture
    background: tuple[np.ndarray, ...]    # edges of the background strips
    description: str = ""


@dataclass(frozen=True)
class LiveLine:
    """A line marked on the live spectrum."""

    position: float                 # on the plotted axis (px or nm)
    height: float
    wavelength_nm: float | None
    species: str
    saturated: bool
    reference_nm: float | None = None   # the matched reference line, when the line is identified

    @property
    def label(self) -> str:
        if self.wavelength_nm is None:
            return f"{self.position:.0f} px"
        if self.species and self.reference_nm is not None:
            return f"{self.reference_nm:.1f} {self.species}"
        return f"{self.wavelength_nm:.1f}"


@dataclass(frozen=True)
class LiveResult:
    """One processed frame, ready to draw."""

    frame_index: int
    timestamp_s: float
    display_image: np.ndarray          # uint8 RGB, scaled to the frame view
    display_scale: float               # display px per frame px
    frame_shape: tuple[int, ...]
    axis: np.ndarray                   # pixel or wavelength axis of the spectrum
    axis_is_wavelength: bool
    intensity: np.ndarray
    saturated_columns: int
    peak_fraction: float               # brightest aperture pixel / full scale
    lines: tuple[LiveLine, ...]
    overlay: BandOverlay | None
    held: bool = False                 # a stacked spectrum held on screen, not a live frame
    frames_in_stack: int = 1
    note: str = ""


@dataclass(frozen=True)
class CalibrationSummary:
    """What the wavelength-fit view shows."""

    lamp: str
    rms_px: float
    rms_nm: float
    order: int
    verdict: str
    rows: tuple[dict, ...]             # pixel, wavelength_nm, species, residual_nm, used
    fit_pixel: np.ndarray
    fit_wavelength_nm: np.ndarray
    uncertainty_nm: np.ndarray
    frames_used: int
    message: str = ""
    core: Any = None                   # the core's own result, for saving and tests


@dataclass(frozen=True)
class IdentificationSummary:
    """What the species view shows."""

    verdict: str
    ranked: tuple[dict, ...]           # symbol, score, fraction, lines (explained)
    unexplained: tuple[dict, ...]      # wavelength_nm, ...
    message: str = ""
    core: Any = None

    @property
    def top_symbol(self) -> str | None:
        return self.ranked[0]["symbol"] if self.ranked else None


# --------------------------------------------------------------------------- helpers


def prepare_display(image: np.ndarray, size: tuple[int, int]) -> tuple[np.ndarray, float]:
    """Frame scaled to fit ``size`` (width, height) as uint8 RGB, and the scale used."""
    import cv2

    height, width = image.shape[:2]
    box_w, box_h = max(int(size[0]), 16), max(int(size[1]), 16)
    fit = min(box_w / width, box_h / height)
    view = image
    if view.dtype != np.uint8:
        if view.dtype == np.uint16:
            view = (view >> 8).astype(np.uint8)
        else:
            top = float(np.nanmax(view)) or 1.0
            view = np.clip(view * (255.0 / top), 0, 255).astype(np.uint8)
    # Shrinking by a whole factor with INTER_AREA is ~25x faster than by an
    # arbitrary one; a final linear step only when it would leave much room unused.
    step = int(np.ceil(1.0 / fit)) if fit < 1 else 1
    if step >= 2:
        # a few edge pixels are dropped so the size divides exactly (the fast path)
        view = view[: height - height % step, : width - width % step]
        view = cv2.resize(view, (max(1, width // step), max(1, height // step)), interpolation=cv2.INTER_AREA)
    out_w, out_h = max(1, int(width * fit)), max(1, int(height * fit))
    if out_w > 1.15 * view.shape[1] or fit > 1:
        view = cv2.resize(view, (out_w, out_h), interpolation=cv2.INTER_LINEAR)
    if view.ndim == 2:
        view = cv2.cvtColor(view, cv2.COLOR_GRAY2RGB)
    scale = 1.0 / step if view.shape[1] == width // step else view.shape[1] / width
    return np.ascontiguousarray(view), scale


def _full_scale(image: np.ndarray) -> float:
    if image.dtype == np.uint8:
        return 255.0
    if image.dtype == np.uint16:
        return 65535.0
    return float(np.nanmax(image)) or 1.0


# --------------------------------------------------------------------------- the processor


class BenchProcessor:
    """Geometry, dark, calibration and identification for one bench session.

    Thread use: the viewer's worker thread calls every method; the window
    reads only the frozen results. A lock guards the state so that a save
    requested from another thread sees a consistent calibration.

    Parameters
    ----------
    gamma : str
        Transfer curve of the camera's frames (see :func:`benchspec.frames.linearise`).
    """

    def __init__(self, *, gamma: str = "auto"):
        from ..frames import FramePreparer

        self._lock = threading.RLock()
        self.gamma = gamma
        self._preparer = FramePreparer(gamma=gamma)
        self.geometry = None                 # benchspec.geometry.Geometry
        self._tables = None
        self._row_span = (0, 0)
        self.geometry_shape: tuple[int, ...] | None = None
        self.overlay: BandOverlay | None = None
        self.dark = None                     # StackedFrame of the dark
        self.calibration: CalibrationSummary | None = None
        self.identification: IdentificationSummary | None = None
        self.last_spectrum: Spectrum | None = None
        self._live_lines_cache: tuple[int, tuple[LiveLine, ...]] = (-999, ())
        self.lines_every_n_frames = 6

    # ------------------------------------------------------------------ frames
    def stack(self, images: Sequence[np.ndarray]):
        """The frames stacked into one linear image (``benchspec.frames.stack_frames``), dark subtracted."""
        from ..frames import stack_frames

        if not images:
            raise FrameError("no frames to stack; wait for the source to deliver frames")
        dark = self.dark
        if dark is not None and dark.image.shape != images[0].shape[:2]:
            dark = None  # a dark of another resolution is not applied (the live view says so)
        return stack_frames(list(images), gamma=self.gamma, dark=dark, check=False)

    # ------------------------------------------------------------------ geometry
    def locate(self, linear: np.ndarray, *, saturated=None) -> BandOverlay:
        """Measure the band's geometry in a linear image and use it for live frames from now on."""
        from ..geometry import measure_geometry, remap_tables

        geometry = measure_geometry(linear, saturated=saturated)
        map_x, map_y = remap_tables(geometry)
        # Live frames are linearised only over the rows the band touches.
        top = max(0, int(np.floor(float(map_y.min()))) - 1)
        bottom = min(geometry.frame_height_px, int(np.ceil(float(map_y.max()))) + 2)
        with self._lock:
            self.geometry = geometry
            self.geometry_shape = geometry.frame_shape
            self._tables = (map_x, map_y - np.float32(top))
            self._row_span = (top, bottom)
            self.overlay = _overlay_of(geometry)
            self._live_lines_cache = (-999, ())
            return self.overlay

    def relocate(self, images: Sequence[np.ndarray]) -> str:
        """Measure the band again on the stack of ``images``; a calibration made on the old band is dropped."""
        stacked = self.stack(images)
        self.locate(stacked.image, saturated=stacked.saturated)
        g = self.geometry
        text = (f"band measured on {stacked.n_frames} frame(s): rotation {g.rotation_deg:+.2f} deg, "
                f"{g.n_columns} columns, aperture rows {g.aperture_rows[0]}-{g.aperture_rows[1]}, "
                + ("curvature from %d lines" % g.n_lines_traced if g.curvature_known else "curvature unknown"))
        with self._lock:
            if self.calibration is not None:
                self.calibration = None
                self.identification = None
                text += "; the calibration belonged to the old band: calibrate again"
        return text

    def _ensure_geometry(self, image: np.ndarray, stacked=None) -> None:
        if self.geometry is None or self.geometry_shape != image.shape[:2]:
            if stacked is None:
                linear, saturated = self._preparer.prepare(image)
            else:
                linear, saturated = stacked.image, stacked.saturated
            self.locate(linear, saturated=saturated)

    # ------------------------------------------------------------------ live
    def live(self, image: np.ndarray, *, display_size: tuple[int, int], frame_index: int = 0,
             timestamp_s: float = 0.0, stacked=None) -> LiveResult:
        """The live spectrum of one raw frame (fast path; geometry found once).

        ``stacked`` (a StackedFrame) replaces the raw frame's linear image for a
        held stack; ``image`` is then only what is displayed.
        """
        display, scale = prepare_display(image, display_size)
        try:
            self._ensure_geometry(image, stacked)
        except BenchspecError as exc:
            empty = np.zeros(0)
            return LiveResult(frame_index, timestamp_s, display, scale, image.shape, empty, False, empty,
                              0, float(np.max(image)) / _full_scale(image), (), None, note=str(exc))
        with self._lock:
            pixel, intensity, saturated, peak = self._extract_live(image, stacked)
            axis, is_wl = self._axis(pixel)
            lines = self._live_lines(frame_index, axis, is_wl, intensity, saturated)
            overlay = self.overlay
            note = ""
            if self.dark is not None and self.dark.image.shape != image.shape[:2]:
                note = "the dark was taken at another resolution and is not applied; take a new dark"
        return LiveResult(frame_index, timestamp_s, display, scale, image.shape, axis, is_wl, intensity,
                          int(saturated.sum()), peak, lines, overlay,
                          held=stacked is not None, frames_in_stack=stacked.n_frames if stacked is not None else 1,
                          note=note)

    def _extract_live(self, image, stacked):
        import cv2

        top, bottom = self._row_span
        if stacked is not None:
            linear = stacked.image[top:bottom]
            saturated_px = stacked.saturated[top:bottom]
        else:
            linear, saturated_px = self._preparer.prepare(image[top:bottom])
            if self.dark is not None and self.dark.image.shape == image.shape[:2]:
                linear = cv2.subtract(linear, self.dark.image[top:bottom])
        map_x, map_y = self._tables
        band = cv2.remap(np.ascontiguousarray(linear, dtype=np.float32), map_x, map_y, cv2.INTER_LINEAR,
                         borderMode=cv2.BORDER_CONSTANT, borderValue=0)
        sat_band = cv2.remap(saturated_px.astype(np.uint8), map_x, map_y, cv2.INTER_NEAREST,
                             borderMode=cv2.BORDER_CONSTANT, borderValue=0) > 0
        full = self._preparer.full_scale(image.dtype)
        return _placeholder_extract(band, sat_band, self.geometry, full_scale=full)

    def _axis(self, pixel: np.ndarray) -> tuple[np.ndarray, bool]:
        cal = self.calibration
        if cal is None:
            return pixel, False
        return cal.core.wavelength_nm(pixel), True

    def _live_lines(self, frame_index, axis, is_wl, intensity, saturated) -> tuple[LiveLine, ...]:
        """Line marks, refreshed every few frames (line fitting is the slow part)."""
        last, cached = self._live_lines_cache
        if frame_index >= 0 and 0 <= frame_index - last < self.lines_every_n_frames and cached:
            return cached
        marks = _quick_peaks(axis, intensity, saturated)
        labelled = tuple(self._label(m) if is_wl else m for m in marks)
        self._live_lines_cache = (frame_index, labelled)
        return labelled

    def _label(self, mark: LiveLine) -> LiveLine:
        """Name a mark on the wavelength axis after the reference line it matches (identification first)."""
        known: list[tuple[float, float, str]] = []  # observed, reference, species
        if self.identification is not None:
            for match in self.identification.ranked:
                for line in match.get("lines", ()):
                    known.append((float(line["observed_nm"]), float(line["reference_nm"]), match["symbol"]))
        if self.calibration is not None:
            known += [(row["wavelength_nm"], row["wavelength_nm"], row["species"]) for row in self.calibration.rows]
        species, reference = "", None
        if known:
            observed = np.array([k[0] for k in known])
            nearest = int(np.argmin(np.abs(observed - mark.position)))
            if abs(observed[nearest] - mark.position) <= 1.5:
                _, reference, species = known[nearest]
        return LiveLine(mark.position, mark.height, mark.position, species, mark.saturated, reference)

    # ------------------------------------------------------------------ dark
    def set_dark(self, images: Sequence[np.ndarray]) -> str:
        """Keep the stack of ``images`` as the dark; returns a line for the log."""
        from ..frames import stack_frames

        if not images:
            raise FrameError("no frames for the dark; wait for the source to deliver frames")
        dark = stack_frames(list(images), gamma=self.gamma, check=False)
        with self._lock:
            self.dark = dark
            self._live_lines_cache = (-999, ())
        return (f"dark from {dark.n_frames} frame(s), mean level {float(np.mean(dark.image)):.2f} "
                "(linear counts); it is subtracted from every frame")

    def clear_dark(self) -> None:
        with self._lock:
            self.dark = None

    # ------------------------------------------------------------------ spectrum, calibration, identification
    def spectrum_of(self, images: Sequence[np.ndarray], *, provenance: dict | None = None) -> Spectrum:
        """The spectrum of a stack of frames, on the wavelength axis once calibrated."""
        from ..geometry import rectify
        from ..lines import estimate_noise

        stacked = self.stack(images)
        self._ensure_geometry(images[0], stacked)
        with self._lock:
            band = rectify(stacked.image, self.geometry, saturated=stacked.saturated)
            pixel, intensity, saturated, _ = _placeholder_extract(band.image, band.saturated, self.geometry,
                                                                  full_scale=stacked.full_scale)
            noise = np.full(intensity.size, max(1e-6, estimate_noise(intensity)))
            spectrum = Spectrum(intensity=intensity, uncertainty=noise, pixel=pixel, saturated=saturated,
                                provenance=dict(provenance or {}, frames=len(images)))
            if self.calibration is not None:
                spectrum = _apply_solution(spectrum, self.calibration.core)
            self.last_spectrum = spectrum
            return spectrum

    def calibrate(self, images: Sequence[np.ndarray], *, lamp: str) -> CalibrationSummary:
        """Wavelength calibration of the stack with ``lamp``'s line list."""
        from ..wavecal import calibrate_spectrum

        with self._lock:
            previous, self.calibration = self.calibration, None
        try:
            spectrum = self.spectrum_of(images)
            result = calibrate_spectrum(spectrum, lamp=lamp)
        except BaseException:
            with self._lock:
                self.calibration = previous
            raise
        summary = _calibration_summary(result, lamp=lamp, frames_used=len(images), spectrum=spectrum)
        with self._lock:
            self.calibration = summary
            self.identification = None
            self._live_lines_cache = (-999, ())
        return summary

    def identify(self, images: Sequence[np.ndarray]) -> IdentificationSummary:
        """Species in the (calibrated) spectrum of the stack."""
        from ..identify import identify

        if self.calibration is None:
            raise IdentificationError("identify needs a wavelength axis: calibrate first (with a known lamp) "
                                      "or load a calibration file")
        spectrum = _within(self.spectrum_of(images), 300.0, 1100.0)  # identify's domain
        result = identify(spectrum)
        summary = _identification_summary(result)
        with self._lock:
            self.identification = summary
            self._live_lines_cache = (-999, ())
        return summary

    def forget_calibration(self) -> None:
        with self._lock:
            self.calibration = None
            self.identification = None

    def load_calibration(self, path, *, frame_shape=None) -> CalibrationSummary:
        """Read a calibration file saved earlier; refuse one made for another frame size."""
        raise FileFormatError("loading calibration files needs benchspec.calfile, which is not installed yet")

    # ------------------------------------------------------------------ saving
    def save_frame(self, image: np.ndarray, path: Path) -> str:
        import cv2

        path = Path(path)
        if path.suffix.lower() not in (".png", ".tif", ".tiff"):
            raise ExportError(f"save frames as .png or .tif (lossless), not {path.suffix or 'no extension'!r}")
        bgr = image if image.ndim == 2 else cv2.cvtColor(np.ascontiguousarray(image), cv2.COLOR_RGB2BGR)
        ok, data = cv2.imencode(path.suffix.lower(), bgr)
        if not ok:
            raise ExportError(f"OpenCV could not encode the frame as {path.suffix}")
        from ..io import atomic_write_bytes

        atomic_write_bytes(path, data.tobytes(), force=True)
        return f"frame saved to {path}"

    def save_spectrum(self, images: Sequence[np.ndarray], path, *, source: dict | None = None) -> str:
        """Write the spectrum of ``images`` in the format of ``path``'s extension (benchspec.io)."""
        from ..io import build_provenance, write_spectrum

        spectrum = self.spectrum_of(images)
        calibration = None
        if self.calibration is not None:
            core = self.calibration.core
            calibration = {"rms_nm": core.rms_nm, "rms_px": core.rms_px, "lamp": self.calibration.lamp,
                           "line_list_source": "; ".join(core.line_list_sources), "verdict": core.verdict}
        frames = [{"path": f"live frame {k}", "sha256": _array_sha256(im), "role": "signal"}
                  for k, im in enumerate(images)]
        provenance = build_provenance(frames=frames, calibration=calibration,
                                      settings={"gamma": self.gamma, "dark_frames": self.dark.n_frames if self.dark else 0,
                                                "extraction": "viewer"},
                                      source_type=(source or {}).get("light_source"),
                                      extra={"source": source or {}})
        spectrum = spectrum.with_(provenance=provenance)
        labels = [(l.wavelength_nm, l.label) for l in self._live_lines_cache[1] if l.wavelength_nm is not None]
        written = write_spectrum(spectrum, Path(path), force=True, lines=labels or None)
        return f"spectrum saved to {written}"

    def save_calibration(self, path) -> str:
        if self.calibration is None:
            raise ExportError("no calibration to save: calibrate first (c)")
        from ..io import write_json_file

        written = write_json_file(Path(path), {"calibration": self.calibration.core.to_dict(),
                                               "lamp": self.calibration.lamp}, force=True)
        return f"calibration saved to {written}"

    def save_plot(self, result: LiveResult, path, *, title: str = "") -> str:
        """A plot of the spectrum on screen, written in the format of the extension (benchspec.io)."""
        from ..io import write_spectrum

        path = Path(path)
        if path.suffix.lower() not in (".png", ".svg", ".pdf"):
            raise ExportError(f"save plots as .png, .svg or .pdf, not {path.suffix or 'no extension'!r}")
        order = np.argsort(result.axis)
        noise = np.zeros(result.axis.size)
        kwargs = {"wavelength_nm": result.axis[order]} if result.axis_is_wavelength else {}
        spectrum = Spectrum(intensity=result.intensity[order], uncertainty=noise,
                            pixel=np.arange(result.axis.size, dtype=float)[order] if result.axis_is_wavelength
                            else result.axis[order], **kwargs)
        labels = [(l.wavelength_nm, l.label) for l in result.lines if l.wavelength_nm is not None]
        written = write_spectrum(spectrum, path, force=True, title=title or None, lines=labels or None)
        return f"plot saved to {written}"


def _array_sha256(image: np.ndarray) -> str:
    import hashlib

    return hashlib.sha256(np.ascontiguousarray(image).tobytes()).hexdigest()


def _apply_solution(spectrum: Spectrum, calibration) -> Spectrum:
    """The spectrum on the calibration's wavelength axis (increasing).

    Far outside the matched lines a cubic solution can turn back on itself;
    only the monotonic stretch of columns around the matched lines is kept.
    """
    wavelength = calibration.wavelength_nm(spectrum.pixel)
    keep = _monotonic_span(wavelength, spectrum.pixel, calibration)
    flip = wavelength.size > 1 and wavelength[keep][0] > wavelength[keep][-1]
    order = keep if not flip else keep[::-1]
    uncertainty = calibration.uncertainty_nm(spectrum.pixel)
    return spectrum.with_(intensity=spectrum.intensity[order], uncertainty=spectrum.uncertainty[order],
                          pixel=spectrum.pixel[order], saturated=spectrum.saturated[order],
                          wavelength_nm=wavelength[order], wavelength_uncertainty_nm=uncertainty[order])


def _within(spectrum: Spectrum, low_nm: float, high_nm: float) -> Spectrum:
    """The samples of a calibrated spectrum between ``low_nm`` and ``high_nm``."""
    keep = (spectrum.wavelength_nm >= low_nm) & (spectrum.wavelength_nm <= high_nm)
    if keep.all():
        return spectrum
    if keep.sum() < 16:
        raise IdentificationError(f"the calibrated range {spectrum.wavelength_nm[0]:.0f}-{spectrum.wavelength_nm[-1]:.0f} nm "
                                  f"has almost nothing within {low_nm:g}-{high_nm:g} nm; check the calibration")
    fields = {name: getattr(spectrum, name)[keep] for name in
              ("intensity", "uncertainty", "pixel", "wavelength_nm", "wavelength_uncertainty_nm", "saturated")
              if getattr(spectrum, name) is not None}
    return spectrum.with_(**fields)


def _monotonic_span(wavelength: np.ndarray, pixel: np.ndarray, calibration) -> np.ndarray:
    """Indices of the longest strictly monotonic run of ``wavelength`` through the matched lines."""
    step = np.diff(wavelength)
    sign = np.sign(np.median(step)) if step.size else 1.0
    good = np.concatenate([[True], step * sign > 0])
    centre = int(np.argmin(np.abs(pixel - np.median([m.pixel for m in calibration.matches] or [pixel.mean()]))))
    low = centre
    while low > 0 and good[low]:
        low -= 1
    high = centre + 1
    while high < wavelength.size and good[high]:
        high += 1
    return np.arange(low, high)


def _calibration_summary(result, *, lamp: str, frames_used: int, spectrum: Spectrum | None = None) -> CalibrationSummary:
    rows = tuple({"pixel": m.pixel, "wavelength_nm": m.reference_nm, "species": m.species,
                  "residual_nm": m.residual_nm, "used": m.used_in_fit} for m in result.matches)
    low, high = result.solution.pixel_range
    grid = np.linspace(low, high, 200)
    return CalibrationSummary(
        lamp=lamp, rms_px=float(result.rms_px), rms_nm=float(result.rms_nm), order=result.solution.order,
        verdict=result.verdict, rows=rows, fit_pixel=grid, fit_wavelength_nm=result.wavelength_nm(grid),
        uncertainty_nm=result.uncertainty_nm(grid), frames_used=frames_used, message=result.verdict_reason,
        core=result)


def _identification_summary(result) -> IdentificationSummary:
    data = result.to_dict()
    return IdentificationSummary(verdict=data["verdict"], ranked=tuple(data["matches"]),
                                 unexplained=tuple(data["unexplained"]),
                                 message=" ".join(result.notes), core=result)


# --------------------------------------------------------------------------- placeholders
# A trivial stand-in for the core geometry and extraction (row sums over the
# brightest rows), used until benchspec.geometry / benchspec.extract exist.


def _grey(image: np.ndarray) -> np.ndarray:
    return image.mean(axis=2, dtype=np.float32) if image.ndim == 3 else image.astype(np.float32)


def _overlay_of(geometry) -> BandOverlay:
    """Frame-coordinate polylines of the band's edges, aperture and background rows."""
    columns = np.linspace(0, geometry.n_columns - 1, 24)

    def row_line(row: float) -> np.ndarray:
        x, y = geometry.frame_coordinates(columns, np.full(columns.shape, float(row)))
        return np.column_stack([x, y])

    top, bottom = row_line(0), row_line(geometry.n_rows - 1)
    outline = np.vstack([top, bottom[::-1], top[:1]])
    a0, a1 = geometry.aperture_rows
    background = tuple(row_line(r) for pair in geometry.background_rows for r in (pair[0], pair[1] - 1))
    curvature = "curvature measured" if geometry.curvature_known else "curvature unknown"
    return BandOverlay(band=(outline,), aperture=(row_line(a0), row_line(a1 - 1)), background=background,
                       description=f"band at {geometry.rotation_deg:+.2f} deg, {curvature}")


def _placeholder_extract(band, saturated_band, geometry, *, full_scale):
    """Box sum over the aperture rows of a rectified band, minus the mean background row.

    A stand-in for benchspec.extract until its live extractor is wired in.
    """
    low, high = geometry.aperture_rows
    cut = band[low:high]
    signal = cut.sum(axis=0, dtype=np.float64)
    saturated = saturated_band[low:high].any(axis=0)
    rows = [band[a:b] for a, b in geometry.background_rows if b > a]
    if rows:
        signal = signal - np.concatenate(rows, axis=0).mean(axis=0, dtype=np.float64) * (high - low)
    peak = float(cut.max()) / full_scale if cut.size else 0.0
    return np.arange(signal.size, dtype=np.float64), signal, saturated, peak


def _quick_peaks(axis, intensity, saturated, *, max_marks: int = 14) -> tuple[LiveLine, ...]:
    """Marks for the brightest local maxima (display only; the core's line finder measures lines)."""
    from scipy import signal as sps

    if intensity.size < 8:
        return ()
    top = float(np.max(intensity))
    if top <= 0:
        return ()
    noise = 1.4826 * float(np.median(np.abs(np.diff(intensity)))) + 1e-9
    peaks, props = sps.find_peaks(intensity, prominence=max(8 * noise, 0.04 * top), distance=4)
    order = np.argsort(props["prominences"])[::-1][:max_marks]
    marks = []
    for k in sorted(peaks[order]):
        lo, hi = max(0, k - 2), min(intensity.size, k + 3)
        marks.append(LiveLine(float(axis[k]), float(intensity[k]), None, "", bool(saturated[lo:hi].any())))
    return tuple(marks)
