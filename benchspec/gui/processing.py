"""The viewer's one door to the core: every computation the window asks for.

:class:`BenchProcessor` runs on the viewer's worker thread, never on the Tk
thread. It holds the state of a session at the bench (geometry, dark,
calibration, identification) and hands the window small frozen results to
draw. Nothing here imports tkinter; matplotlib only for saving a plot file.
"""

from __future__ import annotations

import threading
import time
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
from ..plots import VIEW_RANGE_NM as _VIEW_RANGE_NM  # wavelengths shown on the live axis, as in the plots
from ..safety import SOURCE_TYPES as _SOURCE_TYPES
from ..spectrum import Spectrum

__all__ = [
    "BandOverlay",
    "residual_plot_limits",
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
    """What to draw on the frame: polylines in frame pixel coordinates (x, y), through the
    geometry's own mapping (rotation, tilt and curvature), along pixel edges."""

    band: tuple[np.ndarray, ...]          # closed outline of the band (drawn just outside it)
    aperture: tuple[np.ndarray, ...]      # top and bottom edge of the extraction aperture
    background: tuple[np.ndarray, ...]    # closed outlines of the background strips (shaded)
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
    model: str = ""                    # "order 2 polynomial" or "grating model" (WavelengthSolution.description)


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

    Every stage is a core call: :mod:`benchspec.frames` (stacking, dark,
    linearising), :mod:`benchspec.geometry` (band), :class:`benchspec.extract.LiveExtractor`
    (the live path) and :func:`benchspec.extract.extract_stack`,
    :func:`benchspec.pipeline.calibrate_frames`, :func:`benchspec.pipeline.extract_frames`,
    :func:`benchspec.identify.identify`, :mod:`benchspec.calfile` and :mod:`benchspec.io`.

    Thread use: the viewer's worker thread calls every method; the window
    reads only the frozen results. A lock guards the state so that a save
    requested from another thread sees a consistent calibration.

    Parameters
    ----------
    gamma : str
        Transfer curve of the camera's frames (see :func:`benchspec.frames.linearise`).
    """

    def __init__(self, *, gamma: str = "auto"):
        self._lock = threading.RLock()
        self.gamma = gamma
        self.geometry = None                 # benchspec.geometry.Geometry of the live band
        self.geometry_shape: tuple[int, ...] | None = None
        self.extractor = None                # benchspec.extract.LiveExtractor for that geometry
        self.overlay: BandOverlay | None = None
        self._layer: tuple[tuple, _OverlayLayer] | None = None   # the overlay painted for one display size
        self.dark = None                     # benchspec.frames.StackedFrame of the dark
        self.calibration: CalibrationSummary | None = None
        self.calibration_file = None         # benchspec.calfile.Calibration behind it
        self.identification: IdentificationSummary | None = None
        self.last_spectrum: Spectrum | None = None
        self._columns_kept: tuple[int, int] | None = None
        self._live_lines_cache: tuple[int, tuple[LiveLine, ...]] = (-999, ())
        self.lines_every_n_frames = 1
        self._geometry_failure: tuple[float, BenchspecError] | None = None
        # Lines are named after the calibration lamp's lines only while that lamp is in view
        # (until another source is opened); afterwards only an identification names them.
        self.label_with_lamp = False

    # ------------------------------------------------------------------ frames
    def _dark_for(self, shape) -> Any:
        dark = self.dark
        if dark is not None and tuple(dark.image.shape) != tuple(shape[:2]):
            return None  # a dark of another resolution is not applied (the live view says so)
        return dark

    def stack(self, images: Sequence[np.ndarray]):
        """The frames stacked into one linear image (``benchspec.frames.stack_frames``), dark subtracted."""
        from ..frames import stack_frames

        images = _distinct(images)
        if not images:
            raise FrameError("no frames to stack; wait for the source to deliver frames")
        return stack_frames(list(images), gamma=self.gamma, dark=self._dark_for(images[0].shape), check=False)

    # ------------------------------------------------------------------ geometry
    def _adopt_geometry(self, geometry, stacked) -> None:
        """Use ``geometry`` for live frames: build the live extractor (noise model from ``stacked``)."""
        from ..extract import LiveExtractor, estimate_noise_model
        from ..frames import FramePreparer

        if isinstance(stacked, _NoiseCarrier):
            noise = stacked.noise
        else:
            noise = estimate_noise_model(stacked, geometry=geometry)
        if noise.stack_factor != 1.0:  # the live path sees single frames
            from dataclasses import replace as _replace

            noise = _replace(noise, stack_factor=1.0, n_frames=1)
        dark = self._dark_for(geometry.frame_shape)
        preparer = FramePreparer(gamma=self.gamma, dark=None if dark is None else dark.image)
        extractor = LiveExtractor(geometry, noise_model=noise, method="box", preparer=preparer)
        with self._lock:
            self.geometry = geometry
            self.geometry_shape = geometry.frame_shape
            self.extractor = extractor
            self._noise = noise
            self.overlay = _overlay_of(geometry)
            self._live_lines_cache = (-999, ())

    def locate(self, stacked) -> BandOverlay:
        """Measure the band on a stack (``benchspec.geometry.measure_geometry``) and use it from now on."""
        from ..geometry import measure_geometry

        geometry = measure_geometry(stacked.image, saturated=stacked.saturated)
        self._adopt_geometry(geometry, stacked)
        return self.overlay

    def relocate(self, images: Sequence[np.ndarray]) -> str:
        """Measure the band again on the stack of ``images``; a calibration made on the old band is dropped."""
        stacked = self.stack(images)
        self.locate(stacked)
        g = self.geometry
        text = (f"band measured on {stacked.n_frames} frame(s): rotation {g.rotation_deg:+.2f} deg, "
                f"{g.n_columns} columns, aperture rows {g.aperture_rows[0]}-{g.aperture_rows[1]}, "
                + ("curvature from %d lines" % g.n_lines_traced if g.curvature_known else "curvature unknown"))
        with self._lock:
            if self.calibration is not None:
                self.forget_calibration()
                text += "; the calibration belonged to the old band: calibrate again"
        return text

    def _ensure_geometry(self, image: np.ndarray, stacked=None) -> None:
        if self.geometry is None or self.geometry_shape != image.shape[:2]:
            if self.calibration_file is not None and self.geometry_shape is not None:
                raise FrameError(
                    f"the frame is {image.shape[1]}x{image.shape[0]} px but the calibration was made on "
                    f"{self.geometry_shape[1]}x{self.geometry_shape[0]} px frames; use the camera resolution of "
                    "the calibration, or calibrate again")
            # Without a band (lens cap on, lamp off) every frame would search again: once a second is enough.
            failed = self._geometry_failure
            if stacked is None and failed is not None and time.monotonic() - failed[0] < 1.0:
                raise failed[1]
            try:
                self.locate(stacked if stacked is not None else self.stack([image]))
            except BenchspecError as exc:
                self._geometry_failure = (time.monotonic(), exc)
                raise
            self._geometry_failure = None

    def _refresh_extractor(self) -> None:
        if self.geometry is not None:
            self._adopt_geometry(self.geometry, _NoiseCarrier(self._noise))

    # ------------------------------------------------------------------ live
    def live(self, image: np.ndarray, *, display_size: tuple[int, int], frame_index: int = 0,
             timestamp_s: float = 0.0, stacked=None) -> LiveResult:
        """The live spectrum of one raw frame (``LiveExtractor``; geometry found once).

        ``stacked`` (a StackedFrame) replaces the raw frame for a held stack;
        ``image`` is then only what is displayed.
        """
        display, scale = prepare_display(image, display_size)
        try:
            self._ensure_geometry(image, stacked)
        except BenchspecError as exc:
            empty = np.zeros(0)
            return LiveResult(frame_index, timestamp_s, display, scale, image.shape, empty, False, empty,
                              0, float(np.max(image)) / _full_scale(image), (), None, note=str(exc))
        with self._lock:
            extractor = self.extractor
            if stacked is not None:
                intensity, _variance, saturated = extractor.process_arrays(stacked.image, stacked.saturated)
            else:
                intensity, _variance, saturated = extractor.process_raw_arrays(image)
            x0, y0, x1, y1 = extractor.region
            peak = float(np.max(image[y0:y1, x0:x1])) / _full_scale(image)
            pixel = np.arange(intensity.size, dtype=np.float64)
            intensity = np.asarray(intensity, dtype=np.float64)
            variance = np.asarray(_variance, dtype=np.float64)
            axis, is_wl = pixel, False
            if self.calibration is not None and self._columns_kept is not None:
                start, stop = self._columns_kept
                pixel, intensity, saturated = pixel[start:stop], intensity[start:stop], saturated[start:stop]
                variance = variance[start:stop]
                axis, is_wl = self.calibration.core.wavelength_nm(pixel), True
                # show what a camera can see; far beyond its lines the polynomial is extrapolated
                seen = (axis >= _VIEW_RANGE_NM[0]) & (axis <= _VIEW_RANGE_NM[1])
                if seen.sum() > 16:
                    axis, pixel, intensity, saturated = axis[seen], pixel[seen], intensity[seen], saturated[seen]
                    variance = variance[seen]
            lines = self._live_lines(frame_index, axis, is_wl, intensity, saturated, variance)
            overlay = self.overlay
            display = self._paint_overlay(display, image, scale)
            note = ""
            if self.dark is not None and self._dark_for(image.shape) is None:
                note = "the dark was taken at another resolution and is not applied; take a new dark"
        return LiveResult(frame_index, timestamp_s, display, scale, image.shape, axis, is_wl, intensity,
                          int(np.count_nonzero(saturated)), peak, lines, overlay,
                          held=stacked is not None, frames_in_stack=stacked.n_frames if stacked is not None else 1,
                          note=note)

    def _paint_overlay(self, display: np.ndarray, image: np.ndarray, scale: float) -> np.ndarray:
        """The frame view with the band, aperture and background strips drawn in (antialiased).

        The overlay is rendered once per geometry and display size; each frame is then one blend
        over the pixels it covers. Called with the lock held.
        """
        geometry = self.geometry
        if geometry is None or self.overlay is None:
            return display
        if np.shares_memory(display, image):
            display = display.copy()  # the frame itself is never drawn on
        key = (id(geometry), display.shape[:2], round(float(scale), 9))
        if self._layer is None or self._layer[0] != key:
            overlay = _overlay_of(geometry, outline_margin_px=OVERLAY_OUTLINE_MARGIN_PX / max(scale, 1e-6))
            self._layer = (key, _overlay_layer(overlay, display.shape[:2], scale))
        paint_overlay(display, self._layer[1])
        return display

    def _live_lines(self, frame_index, axis, is_wl, intensity, saturated, variance=None) -> tuple[LiveLine, ...]:
        """Line marks of the spectrum shown.

        Live frames (``frame_index >= 0``) get the live finder,
        ``lines.find_lines_quick`` (well under a millisecond), on every frame,
        refreshed every :attr:`lines_every_n_frames` frames (1: every frame).
        A held spectrum (``frame_index < 0``: a held frame or stack) gets the
        full least-squares ``lines.find_lines`` (10-40 ms), as saved spectra do.
        """
        last, cached = self._live_lines_cache
        if frame_index >= 0 and 0 <= frame_index - last < self.lines_every_n_frames and cached:
            return cached
        marks = _core_marks(axis, is_wl, intensity, saturated, variance, quick=frame_index >= 0)
        if is_wl and marks:
            known = self._known_lines()
            marks = tuple(self._label(m, known) for m in marks)
        self._live_lines_cache = (frame_index, marks)
        return marks

    def _known_lines(self) -> tuple[np.ndarray, list[tuple[float, float, str]]]:
        """(observed nm, [(observed, reference, species)]) the marks are named after: identification first."""
        known: list[tuple[float, float, str]] = []  # observed, reference, species
        if self.identification is not None:
            for match in self.identification.ranked:
                for line in match.get("lines", ()):
                    known.append((float(line["observed_nm"]), float(line["reference_nm"]), match["symbol"]))
        if self.calibration is not None and self.label_with_lamp:
            known += [(row["wavelength_nm"], row["wavelength_nm"], row["species"]) for row in self.calibration.rows]
        return np.array([k[0] for k in known], dtype=float), known

    def _label(self, mark: LiveLine, known=None) -> LiveLine:
        """Name a mark on the wavelength axis after the reference line it matches (``known``: :meth:`_known_lines`)."""
        observed, known = self._known_lines() if known is None else known
        species, reference = "", None
        if known:
            nearest = int(np.argmin(np.abs(observed - mark.position)))
            if abs(observed[nearest] - mark.position) <= 1.5:
                _, reference, species = known[nearest]
        return LiveLine(mark.position, mark.height, mark.position, species, mark.saturated, reference)

    # ------------------------------------------------------------------ dark
    def set_dark(self, images: Sequence[np.ndarray]) -> str:
        """Keep the stack of ``images`` as the dark; returns a line for the log."""
        from ..frames import stack_frames

        images = _distinct(images)
        if not images:
            raise FrameError("no frames for the dark; wait for the source to deliver frames")
        dark = stack_frames(list(images), gamma=self.gamma, check=False)
        with self._lock:
            self.dark = dark
            self._refresh_extractor()
        return (f"dark from {dark.n_frames} frame(s), mean level {float(np.mean(dark.image)):.2f} "
                "(linear counts); it is subtracted from every frame")

    def clear_dark(self) -> None:
        with self._lock:
            self.dark = None
            self._refresh_extractor()

    # ------------------------------------------------------------------ spectrum, calibration, identification
    def spectrum_of(self, images: Sequence[np.ndarray]) -> Spectrum:
        """The spectrum of a stack of frames: ``pipeline.extract_frames`` once calibrated,
        ``extract.extract_stack`` on the pixel axis before."""
        import warnings

        from ..extract import extract_stack
        from ..pipeline import extract_frames

        images = _distinct(images)
        if not images:
            raise FrameError("no frames yet; wait for the source to deliver frames")
        with self._lock:
            calibration = self.calibration_file
        if calibration is not None:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                spectrum = extract_frames(list(images), calibration, dark=self._dark_for(images[0].shape))
            notes = [str(w.message) for w in caught]
            if notes:
                spectrum = spectrum.with_(provenance=dict(spectrum.provenance, viewer_warnings=notes))
        else:
            stacked = self.stack(images)
            self._ensure_geometry(images[0], stacked)
            spectrum = extract_stack(stacked, self.geometry)
        self.last_spectrum = spectrum
        return spectrum

    def calibrate(self, images: Sequence[np.ndarray], *, lamp: str) -> CalibrationSummary:
        """Wavelength calibration of the stack with ``lamp``'s line list (``pipeline.calibrate_frames``)."""
        import warnings

        from ..pipeline import calibrate_frames

        images = _distinct(images)
        if not images:
            raise FrameError("no frames to calibrate on; wait for the source to deliver frames")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            calibration = calibrate_frames(list(images), lamp=lamp, dark=self._dark_for(images[0].shape),
                                           gamma=self.gamma)
        message = " ".join(str(w.message) for w in caught)
        return self._adopt_calibration(calibration, lamp=lamp, frames_used=len(images), images=images,
                                       message=message)

    def _adopt_calibration(self, calibration, *, lamp: str, frames_used: int, images=None, message: str = ""):
        from ..pipeline import apply_calibration

        stacked = self.stack(images) if images else None
        if stacked is not None:
            self._adopt_geometry(calibration.geometry, stacked)
        else:
            self._adopt_geometry(calibration.geometry, _NoiseCarrier(self._default_noise()))
        reference = Spectrum(intensity=np.asarray(calibration.reference_spectrum or np.zeros(calibration.geometry.n_columns)),
                             uncertainty=np.ones(calibration.geometry.n_columns),
                             pixel=np.arange(calibration.geometry.n_columns, dtype=float))
        kept = apply_calibration(reference, calibration).provenance["wavelength_calibration"]["columns_kept"]
        summary = _calibration_summary(calibration.wavelength, lamp=lamp, frames_used=frames_used, message=message)
        with self._lock:
            self.calibration = summary
            self.calibration_file = calibration
            self._columns_kept = (int(kept[0]), int(kept[1]))
            self.label_with_lamp = frames_used > 0  # a loaded file: the lamp is not necessarily in view
            self.identification = None
            self._live_lines_cache = (-999, ())
        return summary

    def _default_noise(self):
        from ..extract import NoiseModel

        return getattr(self, "_noise", None) or NoiseModel(gain_e_per_dn=float("inf"), read_noise_dn=1.0)

    def identify(self, images: Sequence[np.ndarray]) -> IdentificationSummary:
        """Species in the calibrated spectrum of the stack (``identify.identify`` within 300-1100 nm)."""
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

    def source_changed(self) -> None:
        """Another source was opened: the lamp and species names no longer apply to what is seen."""
        with self._lock:
            self.label_with_lamp = False
            self.identification = None
            self._live_lines_cache = (-999, ())

    def forget_calibration(self) -> None:
        with self._lock:
            self.calibration = None
            self.calibration_file = None
            self._columns_kept = None
            self.identification = None
            self._live_lines_cache = (-999, ())

    def load_calibration(self, path, *, frame_shape=None) -> CalibrationSummary:
        """Read a calibration file (``calfile.read_calibration``); refuse one made for another frame size."""
        from ..pipeline import read_calibration

        calibration = read_calibration(Path(path))
        height, width = calibration.geometry.frame_shape
        if frame_shape is not None and tuple(frame_shape[:2]) != (height, width):
            raise FrameError(f"{Path(path).name} was made for {width}x{height} px frames but this source delivers "
                             f"{frame_shape[1]}x{frame_shape[0]} px; switch the camera to {width}x{height} "
                             "or calibrate again")
        lamps = calibration.settings.get("lamps") or list(calibration.wavelength.lamps) or ["?"]
        return self._adopt_calibration(calibration, lamp=",".join(lamps), frames_used=0,
                                       message=f"loaded from {Path(path).name}")

    # ------------------------------------------------------------------ saving
    def save_frame(self, image: np.ndarray, path: Path) -> str:
        import cv2

        from ..io import atomic_write_bytes

        path = Path(path)
        if path.suffix.lower() not in (".png", ".tif", ".tiff"):
            raise ExportError(f"save frames as .png or .tif (lossless), not {path.suffix or 'no extension'!r}")
        bgr = image if image.ndim == 2 else cv2.cvtColor(np.ascontiguousarray(image), cv2.COLOR_RGB2BGR)
        ok, data = cv2.imencode(path.suffix.lower(), bgr)
        if not ok:
            raise ExportError(f"OpenCV could not encode the frame as {path.suffix}")
        atomic_write_bytes(path, data.tobytes(), force=True)
        return f"frame saved to {path}"

    def save_spectrum(self, images: Sequence[np.ndarray], path, *, source: dict | None = None) -> str:
        """Write the spectrum of ``images`` in the format of ``path``'s extension (``io.write_spectrum``)."""
        from ..io import write_spectrum

        spectrum = self.spectrum_of(images)
        provenance = dict(spectrum.provenance)
        provenance.setdefault("frames_in_viewer", [{"sha256_of_pixels": _array_sha256(im)} for im in images])
        provenance["viewer_source"] = dict(source or {})
        spectrum = spectrum.with_(provenance=provenance)
        labels = [(l.reference_nm or l.wavelength_nm, l.label) for l in self._live_lines_cache[1]
                  if l.wavelength_nm is not None]
        written = write_spectrum(spectrum, Path(path), force=True, lines=labels or None)
        return f"spectrum saved to {written}"

    def capture_to_session(self, folder, images: Sequence[np.ndarray], *, source_type: str | None = None,
                           metadata: dict | None = None, label: str | None = None) -> str:
        """Keep the frames, their spectrum and the calibration as one capture (``session.log_capture``)."""
        from ..session import log_capture

        distinct = _distinct(images)
        spectrum = self.spectrum_of(distinct)
        calibration = self.calibration_file
        dark = self.dark
        record = log_capture(
            Path(folder), title="bench viewer session", spectrum=spectrum, frames=distinct,
            calibration=None if calibration is None else calibration.to_dict(),
            metadata=dict(metadata or {}, dark_frames=0 if dark is None else dark.n_frames,
                          calibrated=calibration is not None),
            label=label, source_type=source_type if source_type in _SOURCE_TYPES else None)
        return f"capture {record.id} saved in session {folder} ({len(distinct)} frame(s))"

    def save_calibration(self, path) -> str:
        """Write the calibration file (``calfile.write_calibration``)."""
        from ..pipeline import write_calibration

        if self.calibration_file is None:
            raise ExportError("no calibration to save: calibrate first (c)")
        written = write_calibration(self.calibration_file, Path(path), force=True)
        return f"calibration saved to {written}"

    def save_plot(self, result: LiveResult, path, *, title: str = "") -> str:
        """A plot of the spectrum on screen, written in the format of the extension (``io.write_spectrum``)."""
        from ..io import write_spectrum

        path = Path(path)
        if path.suffix.lower() not in (".png", ".svg", ".pdf"):
            raise ExportError(f"save plots as .png, .svg or .pdf, not {path.suffix or 'no extension'!r}")
        if result.axis.size < 2:
            raise ExportError("no spectrum on screen to plot yet")
        order = np.argsort(result.axis)
        noise = np.zeros(result.axis.size)
        if result.axis_is_wavelength:
            spectrum = Spectrum(intensity=result.intensity[order], uncertainty=noise,
                                pixel=np.arange(result.axis.size, dtype=float)[order],
                                wavelength_nm=result.axis[order])
        else:
            spectrum = Spectrum(intensity=result.intensity[order], uncertainty=noise, pixel=result.axis[order])
        labels = [(l.reference_nm or l.wavelength_nm, l.label) for l in result.lines if l.wavelength_nm is not None]
        written = write_spectrum(spectrum, path, force=True, title=title or None, lines=labels or None)
        return f"plot saved to {written}"


def _distinct(images: Sequence[np.ndarray]) -> list[np.ndarray]:
    """The frames with repeats of the very same array dropped.

    A still (a demo frame, one image file) is delivered again and again as
    the same array; stacking copies of it adds no information and leaves a
    zero frame-to-frame scatter that the noise estimate cannot use.
    """
    seen: set[int] = set()
    kept = []
    for image in images:
        if id(image) not in seen:
            seen.add(id(image))
            kept.append(image)
    return kept


class _NoiseCarrier:
    """Stands in for a stack when only a known noise model is to be reused."""

    def __init__(self, noise):
        self.noise = noise
        self.n_frames = 1


def _array_sha256(image: np.ndarray) -> str:
    import hashlib

    return hashlib.sha256(np.ascontiguousarray(image).tobytes()).hexdigest()


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


def _calibration_summary(result, *, lamp: str, frames_used: int, message: str = "") -> CalibrationSummary:
    # each line's 1-sigma in nm, as the fit weighs it: its reference's tolerance and its centre's
    # uncertainty (floor included) through the local dispersion
    dispersion = np.abs(np.atleast_1d(result.solution.dispersion_nm_per_px(
        np.array([m.pixel for m in result.matches], dtype=float)))) if result.matches else np.zeros(0)
    rows = tuple({"pixel": m.pixel, "wavelength_nm": m.reference_nm, "species": m.species,
                  "residual_nm": m.residual_nm, "used": m.used_in_fit,
                  "uncertainty_nm": float(np.hypot(m.reference_uncertainty_nm, m.pixel_uncertainty * d))}
                 for m, d in zip(result.matches, dispersion))
    low, high = result.solution.pixel_range
    grid = np.linspace(low, high, 400)
    seen = (result.wavelength_nm(grid) >= _VIEW_RANGE_NM[0]) & (result.wavelength_nm(grid) <= _VIEW_RANGE_NM[1])
    if seen.sum() > 8:
        grid = grid[seen]
    return CalibrationSummary(
        lamp=lamp, rms_px=float(result.rms_px), rms_nm=float(result.rms_nm), order=result.solution.order,
        verdict=result.verdict, rows=rows, fit_pixel=grid, fit_wavelength_nm=result.wavelength_nm(grid),
        uncertainty_nm=result.uncertainty_nm(grid), frames_used=frames_used,
        message=" ".join(filter(None, [result.verdict_reason, message])), core=result,
        model=result.solution.description)


def _identification_summary(result) -> IdentificationSummary:
    data = result.to_dict()
    return IdentificationSummary(verdict=data["verdict"], ranked=tuple(data["matches"]),
                                 unexplained=tuple(data["unexplained"]),
                                 message=" ".join(result.notes), core=result)


# --------------------------------------------------------------------------- drawing helpers


def residual_plot_limits(rows) -> tuple[tuple[float, float], float]:
    """The wavelength-fit plot's x range (nm) and y half-range (nm).

    x: the matched lines' span with a margin; y: the largest residual plus its 1-sigma among the
    lines used in the fit (the solution's extrapolated uncertainty beyond the lines, tens of nm at
    the ends of a wide sensor, would flatten every residual onto zero). Rejected lines beyond that
    are drawn at the edge.
    """
    used = [r for r in rows if r.get("used", True)] or list(rows)
    if not used:
        return (_VIEW_RANGE_NM[0], _VIEW_RANGE_NM[1]), 1.0
    wavelengths = np.array([r["wavelength_nm"] for r in rows], dtype=float)
    low, high = float(wavelengths.min()), float(wavelengths.max())
    pad = 0.06 * (high - low) if high > low else 5.0
    reach = max(abs(float(r["residual_nm"])) + float(r.get("uncertainty_nm", 0.0) or 0.0) for r in used)
    return (low - pad, high + pad), max(reach, 1e-4)


def _overlay_of(geometry, *, outline_margin_px: float = 0.0) -> BandOverlay:
    """Frame-coordinate polylines of the band's outline, aperture edges and background strips.

    Row ``r`` covers ``r - 0.5 .. r + 0.5``, so each edge is drawn between rows; the outline stands
    ``outline_margin_px`` (frame px) outside the band, clear of the background strips at its edges.
    """
    columns = np.linspace(-0.5, geometry.n_columns - 0.5, 64)

    def row_line(row: float, cols: np.ndarray = columns) -> np.ndarray:
        x, y = geometry.frame_coordinates(cols, np.full(cols.shape, float(row)))
        return np.column_stack([x, y])

    def outline(first: float, last: float, cols: np.ndarray = columns) -> np.ndarray:
        # along the top edge, down the right end, back along the bottom, up the left end
        ends = np.linspace(first, last, 9)
        right = np.column_stack(geometry.frame_coordinates(np.full(ends.shape, cols[-1]), ends))
        left = np.column_stack(geometry.frame_coordinates(np.full(ends.shape, cols[0]), ends[::-1]))
        return np.vstack([row_line(first, cols), right[1:-1], row_line(last, cols)[::-1], left[1:-1]])

    m = float(outline_margin_px)
    band = outline(-0.5 - m, geometry.n_rows - 0.5 + m,
                   np.linspace(-0.5 - m, geometry.n_columns - 0.5 + m, columns.size))
    a0, a1 = geometry.aperture_rows
    background = tuple(outline(r0 - 0.5, r1 - 0.5) for r0, r1 in geometry.background_rows if r1 > r0)
    curvature = "curvature measured" if geometry.curvature_known else "curvature unknown"
    return BandOverlay(band=(band,), aperture=(row_line(a0 - 0.5), row_line(a1 - 0.5)), background=background,
                       description=f"band at {geometry.rotation_deg:+.2f} deg, {curvature}")


#: The overlay's look on the frame view: colour (RGB 0-255) and opacity of each part. Background strips
#: are a translucent shade (an area), the band outline and the aperture edges thin antialiased lines.
OVERLAY_STYLE = {
    "band": ((0xF2, 0xC1, 0x4E), 1.0),
    "aperture": ((0x7F, 0xD3, 0xC8), 1.0),
    "background": ((0xC0, 0x8F, 0xD8), 0.32),
}
#: How far (display px) the band outline stands outside the band.
OVERLAY_OUTLINE_MARGIN_PX = 2.0


@dataclass(frozen=True)
class _OverlayLayer:
    """The overlay rendered once for one display size: where it covers the frame view and how.

    ``index`` are flat pixel indices, ``keep`` (1 - opacity) and ``add`` (premultiplied colour),
    both in 1/256 steps, so that painting a frame is one integer blend over those pixels only.
    """

    shape: tuple[int, int]
    index: np.ndarray
    keep: np.ndarray
    add: np.ndarray


def _display_points(poly: np.ndarray, scale: float) -> np.ndarray:
    """Frame (x, y) -> display pixel coordinates in 1/16 px (cv2's ``shift=4``); pixel centres on integers."""
    return np.round(((np.asarray(poly, dtype=float) + 0.5) * scale - 0.5) * 16.0).astype(np.int32).reshape(-1, 1, 2)


def _overlay_layer(overlay: BandOverlay, shape: tuple[int, int], scale: float) -> _OverlayLayer:
    import cv2

    height, width = shape
    colour = np.zeros((height, width, 3), np.float32)   # premultiplied
    alpha = np.zeros((height, width), np.float32)

    def over(mask: np.ndarray, rgb, opacity: float) -> None:
        a = mask.astype(np.float32) * (opacity / 255.0)
        colour[:] = colour * (1.0 - a[..., None]) + np.asarray(rgb, np.float32) * a[..., None]
        alpha[:] = a + alpha * (1.0 - a)

    rgb, opacity = OVERLAY_STYLE["background"]
    for strip in overlay.background:
        mask = np.zeros((height, width), np.uint8)
        cv2.fillPoly(mask, [_display_points(strip, scale)], 255, lineType=cv2.LINE_AA, shift=4)
        over(mask, rgb, opacity)
    for name, closed in (("band", True), ("aperture", False)):
        rgb, opacity = OVERLAY_STYLE[name]
        mask = np.zeros((height, width), np.uint8)
        cv2.polylines(mask, [_display_points(poly, scale) for poly in getattr(overlay, name)], closed, 255,
                      thickness=1, lineType=cv2.LINE_AA, shift=4)
        over(mask, rgb, opacity)
    index = np.flatnonzero(alpha.ravel() > 1.0 / 512)
    keep = np.round((1.0 - alpha.ravel()[index]) * 256.0).astype(np.uint32)
    add = np.round(colour.reshape(-1, 3)[index] * 256.0).astype(np.uint32)
    return _OverlayLayer((height, width), index, keep[:, None], add)


def paint_overlay(display: np.ndarray, layer: _OverlayLayer) -> None:
    """Blend the overlay into ``display`` (uint8 RGB of the layer's size) in place."""
    flat = display.reshape(-1, 3)
    pixels = flat[layer.index].astype(np.uint32)
    flat[layer.index] = np.minimum((pixels * layer.keep + layer.add) >> 8, 255).astype(np.uint8)


def _core_marks(axis, is_wl, intensity, saturated, variance, *, max_marks: int = 14,
                quick: bool = False) -> tuple[LiveLine, ...]:
    """The strongest emission lines of a spectrum, by ``lines.find_lines`` (``quick``: ``lines.find_lines_quick``)."""
    import warnings

    from ..errors import LineError
    from ..lines import find_lines, find_lines_quick

    finder = find_lines_quick if quick else find_lines

    if intensity.size < 16 or not np.any(intensity > 0):
        return ()
    order = np.argsort(axis) if is_wl else np.arange(axis.size)
    uncertainty = np.sqrt(np.maximum(variance[order], 1e-12)) if variance is not None else None
    if uncertainty is None or not np.all(np.isfinite(uncertainty)):
        uncertainty = np.full(axis.size, max(1e-6, float(np.std(np.diff(intensity))) / np.sqrt(2)))
    kwargs = {"wavelength_nm": axis[order]} if is_wl else {}
    try:
        spectrum = Spectrum(intensity=intensity[order], uncertainty=uncertainty, pixel=np.arange(axis.size, dtype=float),
                            saturated=saturated[order], **kwargs)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = finder(spectrum, min_snr=10.0, max_lines=max_marks)
    except (LineError, BenchspecError):
        return ()
    marks = []
    for line in table:
        position = line.centre_nm if is_wl and line.centre_nm is not None else float(
            np.interp(line.centre_px, np.arange(axis.size), axis[order]))
        marks.append(LiveLine(float(position), float(line.peak + line.continuum), None, "", bool(line.saturated)))
    marks.sort(key=lambda m: m.position)
    return tuple(marks)
