"""Frame sources for live work: a camera, a video file, an image folder, the demo frames.

Every source has the same small interface::

    source = open_source("0")          # or "/dev/video0", "run.avi", "frames/", "demo"
    frame = source.read()              # a Frame (image + timestamp), or None at the end
    for frame in source: ...           # the same, until the end of a finite source
    source.info                        # a SourceInfo: kind, size, rate, refused settings, notes
    source.close()

Images are ``uint8`` (or ``uint16`` for 16-bit files) arrays of shape
(height, width, 3) in RGB order, or (height, width) for monochrome files; they
are read-only. A camera that stops delivering frames, or any source that fails
mid-stream, raises :class:`~benchspec.errors.SourceError`; the frames read
before it are untouched, and :func:`capture_frames` returns them with the
reason the capture stopped.

This module talks to hardware and files, so it sits at the edge of the
package (like ``io``); it never imports tkinter or matplotlib.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np

from .errors import InputError, SourceError

__all__ = [
    "Frame",
    "SettingOutcome",
    "SourceInfo",
    "CameraSettings",
    "FrameSource",
    "CameraSource",
    "VideoSource",
    "FolderSource",
    "DemoSource",
    "ArraySource",
    "Capture",
    "capture_frames",
    "open_source",
    "find_cameras",
    "demo_folder",
    "IMAGE_SUFFIXES",
    "VIDEO_SUFFIXES",
]

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp")
VIDEO_SUFFIXES = (".avi", ".mp4", ".mkv", ".mov", ".m4v", ".webm", ".mjpg", ".mjpeg", ".wmv", ".mpg", ".mpeg")

# Frames above this size are refused before decoding (a decompression-bomb guard):
# 50 megapixels is well above any webcam or DSLR video frame (common practice, no source).
MAX_FRAME_PIXELS = 50_000_000


def _cv2():
    import cv2  # imported lazily: `benchspec --help` should not pay for OpenCV

    return cv2


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Frame:
    """One frame from a source.

    Attributes
    ----------
    image : ndarray, shape (height, width, 3) or (height, width)
        RGB (or monochrome) pixels as delivered, ``uint8`` or ``uint16``; read-only.
    timestamp_s : float
        Seconds since the source was opened (camera: arrival time; video:
        the container's presentation time; folder: index / nominal rate).
    index : int
        0-based count of frames this source has delivered.
    origin : str
        Where the frame came from (file name, ``"camera 0"``...), for provenance.
    """

    image: np.ndarray
    timestamp_s: float
    index: int
    origin: str = ""

    @property
    def height_px(self) -> int:
        return int(self.image.shape[0])

    @property
    def width_px(self) -> int:
        return int(self.image.shape[1])


@dataclass(frozen=True)
class SettingOutcome:
    """What happened when a camera setting was requested."""

    name: str
    requested: float
    reported: float | None
    accepted: bool


@dataclass(frozen=True)
class SourceInfo:
    """A description of a source, for the window title, the log and provenance.

    Attributes
    ----------
    kind : str
        ``"camera"``, ``"video"``, ``"folder"``, ``"demo"`` or ``"array"``.
    name : str
        The device, file or folder, as the user gave it.
    width_px, height_px : int
        Frame size (0 when not known yet).
    frame_rate_hz : float or None
        The rate frames are delivered at (camera: what the driver reports).
    frame_count : int or None
        Frames in a finite source (video, folder); None for a camera.
    looped : bool
        True when a finite source starts again at its end.
    frames_delivered : int
        Frames read so far.
    settings : tuple of SettingOutcome
        Camera settings requested and whether the driver kept them.
    can_set_exposure : bool
        True when :meth:`FrameSource.set_exposure` may work.
    notes : tuple of str
        Things the user should know (skipped files, refused settings, a demo
        still frame repeated...).
    """

    kind: str
    name: str
    width_px: int = 0
    height_px: int = 0
    frame_rate_hz: float | None = None
    frame_count: int | None = None
    looped: bool = False
    frames_delivered: int = 0
    settings: tuple[SettingOutcome, ...] = ()
    can_set_exposure: bool = False
    notes: tuple[str, ...] = ()

    @property
    def refused_settings(self) -> tuple[str, ...]:
        """Names of the camera settings the driver refused."""
        return tuple(s.name for s in self.settings if not s.accepted)

    def describe(self) -> str:
        """One line for people: what the source is and how it runs."""
        size = f"{self.width_px}x{self.height_px}" if self.width_px else "size unknown"
        rate = f", {self.frame_rate_hz:g} fps" if self.frame_rate_hz else ""
        count = f", {self.frame_count} frames" if self.frame_count is not None else ""
        loop = ", looped" if self.looped else ""
        return f"{self.kind} {self.name} ({size}{rate}{count}{loop})"


@dataclass(frozen=True)
class CameraSettings:
    """What to ask a camera for.

    Webcams change exposure, gain and white balance from frame to frame unless
    told not to; a spectrum measured under automatic control is not
    repeatable, so the defaults ask the driver to lock all three (common
    practice, no source).

    Attributes
    ----------
    width_px, height_px : int
        Requested resolution.
    frame_rate_hz : float
        Requested frame rate.
    lock_exposure, lock_gain, lock_white_balance : bool
        Turn the automatic control off.
    exposure, gain, white_balance_k : float or None
        Value to set once locked (driver units for exposure and gain; kelvin
        for white balance); None keeps whatever value the driver has now.
    """

    width_px: int = 1280
    height_px: int = 720
    frame_rate_hz: float = 30.0
    lock_exposure: bool = True
    exposure: float | None = None
    lock_gain: bool = True
    gain: float | None = None
    lock_white_balance: bool = True
    white_balance_k: float | None = None

    def __post_init__(self):
        for name in ("width_px", "height_px"):
            value = getattr(self, name)
            if not (16 <= int(value) <= 10000):
                raise InputError(f"`{name}` must be between 16 and 10000 px, was {value}")
        if not (0.1 <= float(self.frame_rate_hz) <= 1000):
            raise InputError(f"`frame_rate_hz` must be between 0.1 and 1000, was {self.frame_rate_hz}")


# --------------------------------------------------------------------------- interface


class FrameSource:
    """Base of every source: ``read()``, iteration, ``info``, ``close()``.

    Subclasses implement :meth:`_read_image`, returning ``(image, timestamp_s,
    origin)`` or None at the end of a finite source, and raising
    :class:`SourceError` when the source is lost.
    """

    kind = "source"

    def __init__(self, name: str):
        self._name = name
        self._delivered = 0
        self._closed = False
        self._lost: SourceError | None = None
        self._notes: list[str] = []
        self._lock = threading.RLock()

    # -- the interface
    def read(self) -> Frame | None:
        """The next frame, or None when a finite source has ended.

        Raises
        ------
        SourceError
            The source is closed, or stopped delivering frames (a camera
            unplugged, a file that cannot be decoded). Frames read earlier are
            not affected; every later call raises the same error.
        """
        with self._lock:
            if self._closed:
                raise SourceError(f"{self.kind} {self._name} is closed; open the source again")
            if self._lost is not None:
                raise self._lost
            try:
                got = self._read_image()
            except SourceError as exc:
                self._lost = exc
                raise
            if got is None:
                return None
            image, timestamp_s, origin = got
            image = np.asarray(image)
            image.setflags(write=False)
            frame = Frame(image=image, timestamp_s=float(timestamp_s), index=self._delivered, origin=origin)
            self._delivered += 1
            return frame

    def __iter__(self) -> Iterator[Frame]:
        while True:
            frame = self.read()
            if frame is None:
                return
            yield frame

    @property
    def info(self) -> SourceInfo:
        """The current description of the source (a fresh frozen object).

        It may ask the device (a camera's resolution), so it waits for a read
        in progress; use :attr:`notes` where only the notes are needed.
        """
        with self._lock:
            return SourceInfo(kind=self.kind, name=self._name, frames_delivered=self._delivered,
                              notes=tuple(self._notes), **self._info_fields())

    @property
    def notes(self) -> tuple[str, ...]:
        """The notes so far (cheap, and safe to read from another thread: no device call)."""
        return tuple(self._notes)

    @property
    def is_lost(self) -> bool:
        """True once the source has failed (every further read raises)."""
        return self._lost is not None

    def set_exposure(self, value: float) -> SettingOutcome:
        """Set the exposure (driver units); only cameras that allow it support this."""
        raise SourceError(f"exposure cannot be set on a {self.kind} source; it is fixed in the recording")

    def close(self) -> None:
        """Release the device or file; safe to call twice."""
        with self._lock:
            if not self._closed:
                self._closed = True
                self._release()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- for subclasses
    def _read_image(self):  # pragma: no cover - abstract
        raise NotImplementedError

    def _info_fields(self) -> dict[str, Any]:
        return {}

    def _release(self) -> None:
        pass

    def _note(self, text: str) -> None:
        if text not in self._notes:
            self._notes.append(text)


class _Pacer:
    """Deliver frames from files at their nominal rate, as a camera would."""

    def __init__(self, rate_hz: float | None):
        self.interval_s = 1.0 / rate_hz if rate_hz else 0.0
        self.next_s: float | None = None

    def wait(self) -> None:
        if not self.interval_s:
            return
        now = time.monotonic()
        if self.next_s is None or now - self.next_s > self.interval_s:
            self.next_s = now  # start, or fell behind: do not burst to catch up
        elif self.next_s > now:
            time.sleep(self.next_s - now)
        self.next_s += self.interval_s


def _to_rgb(image: np.ndarray) -> np.ndarray:
    """OpenCV's BGR(A) or grey image as RGB or grey."""
    cv2 = _cv2()
    if image.ndim == 2:
        return image
    if image.shape[2] == 4:
        return cv2.cvtColor(image, cv2.COLOR_BGRA2RGB)
    if image.shape[2] == 3:
        return cv2.cvtColor(image, cv2.COLOR_BGR2RGB)
    return image[:, :, 0]


# --------------------------------------------------------------------------- camera


_CAMERA_PROPS = {
    # setting name -> OpenCV property name
    "width_px": "CAP_PROP_FRAME_WIDTH",
    "height_px": "CAP_PROP_FRAME_HEIGHT",
    "frame_rate_hz": "CAP_PROP_FPS",
    "auto_exposure": "CAP_PROP_AUTO_EXPOSURE",
    "exposure": "CAP_PROP_EXPOSURE",
    "gain": "CAP_PROP_GAIN",
    "auto_white_balance": "CAP_PROP_AUTO_WB",
    "white_balance_k": "CAP_PROP_WB_TEMPERATURE",
}


class CameraSource(FrameSource):
    """A camera by index (``0``) or device path (``"/dev/video0"``), through OpenCV.

    Parameters
    ----------
    device : int or str
        Camera index or device path.
    settings : CameraSettings
        Resolution, rate and the automatic controls to lock.
    max_failed_reads : int
        Consecutive failed reads after which the camera counts as lost.
    retry_delay_s : float
        Pause between failed reads (a USB camera may hiccup once).
    capture_factory : callable, optional
        ``capture_factory(device) -> capture`` with OpenCV's ``VideoCapture``
        methods (``isOpened``, ``read``, ``set``, ``get``, ``release``); tests
        pass a fake. Default: ``cv2.VideoCapture``.

    Notes
    -----
    Drivers accept or ignore settings silently, so each one is read back
    after it is set; a setting counts as refused when ``set`` returns False
    or the value read back differs. The V4L2 driver takes 1 for manual
    exposure, other back-ends 0.25; both are tried.
    """

    kind = "camera"

    def __init__(self, device: int | str = 0, *, settings: CameraSettings | None = None,
                 max_failed_reads: int = 8, retry_delay_s: float = 0.05,
                 capture_factory: Callable[[Any], Any] | None = None):
        if isinstance(device, bool) or not isinstance(device, (int, str)):
            raise InputError(f"`device` must be a camera index or a device path, was {device!r}")
        super().__init__(str(device))
        if max_failed_reads < 1:
            raise InputError(f"`max_failed_reads` must be at least 1, was {max_failed_reads}")
        self._settings = settings or CameraSettings()
        self._max_failed = int(max_failed_reads)
        self._retry_delay_s = float(retry_delay_s)
        self._t0 = time.monotonic()
        if capture_factory is None:
            cv2 = _cv2()
            node = device if isinstance(device, str) else f"/dev/video{device}"
            if sys.platform.startswith("linux") and not os.path.exists(node):
                # asking OpenCV would only print driver warnings
                what = f"{device}: the device does not exist" if isinstance(device, str) else \
                    f"{device} ({node} does not exist)"
                raise SourceError(f"no camera at {what}; plug the camera in, or choose another source "
                                  "(e.g. --source demo)")
            backend = cv2.CAP_V4L2 if sys.platform.startswith("linux") else cv2.CAP_ANY
            capture_factory = lambda dev: cv2.VideoCapture(dev, backend)  # noqa: E731
        try:
            self._cap = capture_factory(device)
        except Exception as exc:  # OpenCV raises cv2.error for unusable devices
            raise SourceError(f"camera {device} could not be opened ({exc}); check it is plugged in "
                              "and not used by another program") from None
        if not self._cap.isOpened():
            self._cap.release()
            raise SourceError(f"no camera at {device}; check it is plugged in and not used by another "
                              "program, or choose another source (e.g. --source demo)")
        self._outcomes: dict[str, SettingOutcome] = {}
        self._apply_settings()

    # -- settings
    def _prop(self, name: str) -> int:
        return getattr(_cv2(), _CAMERA_PROPS[name])

    def _try_set(self, name: str, values: tuple[float, ...], *, tolerance: float = 0.01) -> SettingOutcome:
        prop = self._prop(name)
        reported = None
        for value in values:
            try:
                ok = bool(self._cap.set(prop, float(value)))
                reported = float(self._cap.get(prop))
            except Exception:
                ok, reported = False, None
            if ok and reported is not None and abs(reported - value) <= tolerance * max(1.0, abs(value)):
                outcome = SettingOutcome(name, float(value), reported, True)
                break
        else:
            outcome = SettingOutcome(name, float(values[0]), reported, False)
        self._outcomes[name] = outcome
        return outcome

    def _apply_settings(self) -> None:
        s = self._settings
        self._try_set("width_px", (s.width_px,))
        self._try_set("height_px", (s.height_px,))
        self._try_set("frame_rate_hz", (s.frame_rate_hz,), tolerance=0.05)
        if s.lock_exposure:
            self._try_set("auto_exposure", (1.0, 0.25))
            if s.exposure is not None:
                self._try_set("exposure", (s.exposure,))
        if s.lock_gain and s.gain is not None:
            self._try_set("gain", (s.gain,))
        elif s.lock_gain:
            # Writing back the current gain pins it on drivers that tie gain to auto-exposure.
            current = self._safe_get("gain")
            if current is not None:
                self._try_set("gain", (current,))
        if s.lock_white_balance:
            self._try_set("auto_white_balance", (0.0,))
            if s.white_balance_k is not None:
                self._try_set("white_balance_k", (s.white_balance_k,), tolerance=0.02)
        refused = [o.name for o in self._outcomes.values() if not o.accepted]
        if refused:
            self._note("the camera refused: " + ", ".join(refused)
                       + "; spectra may drift as the camera adjusts itself, so keep the light steady "
                       "and check saturation")

    def _safe_get(self, name: str) -> float | None:
        try:
            value = float(self._cap.get(self._prop(name)))
        except Exception:
            return None
        return value if np.isfinite(value) else None

    def set_exposure(self, value: float) -> SettingOutcome:
        """Set the exposure in driver units (manual exposure is requested first)."""
        if not np.isfinite(value):
            raise InputError(f"`value` must be a finite exposure, was {value}")
        with self._lock:
            if self._closed or self._lost is not None:
                raise SourceError(f"camera {self._name} is not running; reopen it to set the exposure")
            if not self._outcomes.get("auto_exposure", SettingOutcome("", 0, None, False)).accepted:
                self._try_set("auto_exposure", (1.0, 0.25))
            outcome = self._try_set("exposure", (float(value),))
        if not outcome.accepted:
            self._note("the camera refused: exposure")
        return outcome

    # -- reading
    def _read_image(self):
        for _attempt in range(self._max_failed):
            try:
                ok, image = self._cap.read()
            except Exception:
                ok, image = False, None
            if ok and image is not None and getattr(image, "size", 0):
                return _to_rgb(np.asarray(image)), time.monotonic() - self._t0, f"camera {self._name}"
            time.sleep(self._retry_delay_s)
        raise SourceError(
            f"camera {self._name} stopped delivering frames after {self._delivered} frames "
            f"({self._max_failed} reads failed in a row); the frames captured so far are kept; "
            "check the cable, then reopen the source"
        )

    def _info_fields(self):
        width = self._safe_get("width_px") if not self._closed else None
        height = self._safe_get("height_px") if not self._closed else None
        rate = self._safe_get("frame_rate_hz") if not self._closed else None
        return dict(width_px=int(width or 0), height_px=int(height or 0), frame_rate_hz=rate or None,
                    settings=tuple(self._outcomes.values()), can_set_exposure=True)

    def _release(self):
        try:
            self._cap.release()
        except Exception:
            pass


def find_cameras(*, max_index: int = 4) -> tuple[str, ...]:
    """Camera devices that open, as source strings (``"0"``, ``"/dev/video2"``...).

    On Linux only existing ``/dev/video*`` nodes are tried, so a machine with
    no camera answers at once.
    """
    found: list[str] = []
    if sys.platform.startswith("linux"):
        nodes = sorted(Path("/dev").glob("video[0-9]*"), key=lambda p: int(p.name[5:]))
        candidates: list[int | str] = [str(p) for p in nodes]
    else:  # pragma: no cover - other systems
        candidates = list(range(max_index))
    for device in candidates[: max_index * 2]:
        try:
            source = CameraSource(device, max_failed_reads=2)
        except SourceError:
            continue
        source.close()
        found.append(str(device))
    return tuple(found)


# --------------------------------------------------------------------------- video


class VideoSource(FrameSource):
    """A video file that OpenCV can decode.

    Parameters
    ----------
    path : str or Path
        The video file.
    loop : bool
        Start again at the end instead of ending.
    pace : bool
        Deliver frames at the file's frame rate (as a camera would) rather
        than as fast as they decode.
    """

    kind = "video"

    def __init__(self, path: str | os.PathLike, *, loop: bool = False, pace: bool = False):
        path = Path(path)
        super().__init__(str(path))
        if not path.is_file():
            raise SourceError(f"video {path} not found; check the path")
        cv2 = _cv2()
        self._cap = cv2.VideoCapture(str(path))
        if not self._cap.isOpened():
            raise SourceError(f"video {path} cannot be decoded by OpenCV; convert it to AVI (MJPG) or MP4 (H.264)")
        self._loop = bool(loop)
        width = int(self._cap.get(cv2.CAP_PROP_FRAME_WIDTH))
        height = int(self._cap.get(cv2.CAP_PROP_FRAME_HEIGHT))
        if width * height > MAX_FRAME_PIXELS:
            self._cap.release()
            raise SourceError(f"video {path} has {width}x{height} frames, above the {MAX_FRAME_PIXELS} pixel limit")
        rate = float(self._cap.get(cv2.CAP_PROP_FPS) or 0.0)
        self._rate = rate if 0.1 <= rate <= 1000 else None
        count = int(self._cap.get(cv2.CAP_PROP_FRAME_COUNT) or 0)
        self._count = count if count > 0 else None
        self._size = (width, height)
        self._pacer = _Pacer(self._rate or 30.0) if pace else _Pacer(None)
        self._position = 0  # frames read since the last restart
        self._laps = 0
        self._time_offset_s = 0.0

    def _read_image(self):
        cv2 = _cv2()
        self._pacer.wait()
        ok, image = self._cap.read()
        if not ok or image is None:
            if self._position == 0:
                raise SourceError(f"video {self._name} delivered no frames; the file may be truncated or empty")
            if self._count is not None and self._position < self._count - 1:
                self._note(f"the video ended after {self._position} of its {self._count} frames; "
                           "the file may be truncated")
            if not self._loop:
                return None
            self._cap.set(cv2.CAP_PROP_POS_FRAMES, 0)
            self._laps += 1
            self._time_offset_s += self._position / (self._rate or 30.0)
            self._position = 0
            ok, image = self._cap.read()
            if not ok or image is None:
                raise SourceError(f"video {self._name} could not be rewound; open it again")
        index = self._position
        self._position += 1
        timestamp = self._time_offset_s + index / (self._rate or 30.0)
        return _to_rgb(image), timestamp, f"{Path(self._name).name}#{index}"

    def _info_fields(self):
        return dict(width_px=self._size[0], height_px=self._size[1], frame_rate_hz=self._rate,
                    frame_count=self._count, looped=self._loop)

    def _release(self):
        self._cap.release()


# --------------------------------------------------------------------------- image folder


def _read_image_file(path: Path) -> np.ndarray:
    """An image file as RGB/grey, 8 or 16 bit; SourceError naming the file if it is not one."""
    cv2 = _cv2()
    try:
        data = np.fromfile(str(path), dtype=np.uint8)  # works with non-ASCII paths, unlike imread
    except OSError as exc:
        raise SourceError(f"{path} cannot be read ({exc.strerror}); check the file's permissions") from None
    if data.size == 0:
        raise SourceError(f"{path} is empty; remove it or capture it again")
    # Check the header before decoding, so a huge image is refused cheaply.
    from PIL import Image  # PIL reads only the header here

    try:
        with Image.open(str(path)) as probe:
            width, height = probe.size
    except Image.DecompressionBombError:  # Pillow's own guard fired: the header claims an enormous frame
        raise SourceError(f"{path} claims a frame far above the {MAX_FRAME_PIXELS} pixel limit; "
                          "it is refused before decoding (a damaged file, or not a camera frame)") from None
    except Exception:
        raise SourceError(f"{path} is not an image PIL or OpenCV can read; remove it from the folder") from None
    if width * height > MAX_FRAME_PIXELS:
        raise SourceError(f"{path} is {width}x{height}, above the {MAX_FRAME_PIXELS} pixel limit")
    image = cv2.imdecode(data, cv2.IMREAD_UNCHANGED)
    if image is None:
        raise SourceError(f"{path} is not an image OpenCV can decode; remove it from the folder")
    if image.dtype not in (np.uint8, np.uint16):
        image = np.clip(image, 0, 65535).astype(np.uint16)
    return _to_rgb(image)


class FolderSource(FrameSource):
    """The images of a folder (or an explicit list of files), in name order.

    Files that are not images are skipped and named in ``info.notes``; a file
    with an image suffix that cannot be decoded is skipped the same way when it
    is reached.

    Parameters
    ----------
    folder : str or Path, or a sequence of paths
        The folder, or the image files to play.
    loop : bool
        Start again after the last image.
    frame_rate_hz : float
        Nominal rate used for timestamps and pacing.
    pace : bool
        Deliver frames at ``frame_rate_hz`` rather than as fast as they decode.
    """

    kind = "folder"

    def __init__(self, folder, *, loop: bool = False, frame_rate_hz: float = 10.0, pace: bool = False):
        if isinstance(folder, (str, os.PathLike)):
            root = Path(folder)
            if not root.is_dir():
                raise SourceError(f"folder {root} not found; check the path")
            entries = sorted(p for p in root.iterdir() if p.is_file() and not p.name.startswith("."))
            name = str(root)
        else:
            entries = [Path(p) for p in folder]
            name = str(entries[0].parent) if entries else "(no files)"
        super().__init__(name)
        if not (0.1 <= frame_rate_hz <= 1000):
            raise InputError(f"`frame_rate_hz` must be between 0.1 and 1000, was {frame_rate_hz}")
        self._files = [p for p in entries if p.suffix.lower() in IMAGE_SUFFIXES]
        skipped = [p.name for p in entries if p.suffix.lower() not in IMAGE_SUFFIXES]
        if skipped:
            shown = ", ".join(skipped[:5]) + (f" and {len(skipped) - 5} more" if len(skipped) > 5 else "")
            self._note(f"skipped {len(skipped)} file(s) that are not images: {shown}")
        if not self._files:
            raise SourceError(f"folder {name} holds no images ({', '.join(IMAGE_SUFFIXES)}); "
                              "choose a folder of frames")
        self._loop = bool(loop)
        self._rate = float(frame_rate_hz)
        self._pacer = _Pacer(self._rate if pace else None)
        self._position = 0
        self._bad: set[Path] = set()
        self._cache: dict[Path, np.ndarray] = {}
        self._size = (0, 0)

    @property
    def files(self) -> tuple[Path, ...]:
        """The image files, in the order they are played."""
        return tuple(self._files)

    def _load(self, path: Path) -> np.ndarray:
        if len(self._files) <= 4:  # small sets are cached; big ones stream from disk
            if path not in self._cache:
                self._cache[path] = _read_image_file(path)
            return self._cache[path]
        return _read_image_file(path)

    def _read_image(self):
        self._pacer.wait()
        tried = 0
        while tried <= len(self._files):
            if self._position >= len(self._files):
                if not self._loop:
                    return None
                self._position = 0
            path = self._files[self._position]
            number = self._position
            self._position += 1
            tried += 1
            if path in self._bad:
                continue
            try:
                image = self._load(path)
            except SourceError as exc:
                self._bad.add(path)
                self._note(f"skipped {path.name}: {exc}")
                continue
            if self._size == (0, 0):
                self._size = (image.shape[1], image.shape[0])
            elif (image.shape[1], image.shape[0]) != self._size:
                self._bad.add(path)
                self._note(f"skipped {path.name}: it is {image.shape[1]}x{image.shape[0]}, the folder's "
                           f"first image is {self._size[0]}x{self._size[1]}")
                continue
            return image, self._delivered / self._rate, path.name
        raise SourceError(f"folder {self._name}: none of its images can be read; "
                          + (self._notes[-1] if self._notes else "check the files"))

    def _info_fields(self):
        return dict(width_px=self._size[0], height_px=self._size[1], frame_rate_hz=self._rate,
                    frame_count=len(self._files), looped=self._loop)


# --------------------------------------------------------------------------- demo


def demo_folder() -> Path:
    """The folder of demo frames made by the virtual bench (``demo_images/`` of the project)."""
    override = os.environ.get("BENCHSPEC_DEMO_IMAGES")
    if override:
        return Path(override)
    return Path(__file__).resolve().parent.parent / "demo_images"


def _scene_name(path: Path) -> str:
    """``cfl_2.png`` -> ``cfl``: numbered frames of one scene share a name."""
    stem = path.stem
    head, sep, tail = stem.rpartition("_")
    return head if sep and tail.isdigit() else stem


class DemoSource(FolderSource):
    """The built-in demo: the frames of one demo scene, repeated like a live camera.

    Numbered frames of a scene (``cfl_1.png``, ``cfl_2.png``...) are played in
    turn, so noise changes from frame to frame as it would on a camera; a
    scene with one frame repeats that still.

    Parameters
    ----------
    scene : str
        A scene name (``"cfl"``, ``"tube_A"``...) or one frame's name
        (``"cfl_1"``); see :attr:`scenes`.
    folder : str or Path, optional
        Where the demo frames are (default :func:`demo_folder`).
    frame_rate_hz : float
        Rate the frames are delivered at.
    pace : bool
        Deliver at ``frame_rate_hz`` (True, as a camera would) or as fast as asked.
    """

    kind = "demo"

    def __init__(self, scene: str = "cfl", *, folder=None, frame_rate_hz: float = 15.0, pace: bool = True):
        root = Path(folder) if folder is not None else demo_folder()
        if not root.is_dir():
            raise SourceError(f"the demo frames are missing ({root} not found); "
                              "regenerate them with `benchspec demo --regenerate` (see demo_images/README.md)")
        all_images = sorted(p for p in root.iterdir() if p.suffix.lower() in IMAGE_SUFFIXES)
        if not all_images:
            raise SourceError(f"the demo folder {root} holds no images; regenerate it (see demo_images/README.md)")
        self._all = all_images
        key = scene.strip().lower()
        chosen = [p for p in all_images if _scene_name(p).lower() == key] or \
                 [p for p in all_images if p.stem.lower() == key]
        if not chosen:
            raise InputError(f"no demo scene {scene!r}; choose one of: " + ", ".join(self._scene_names()))
        super().__init__(chosen, loop=True, frame_rate_hz=frame_rate_hz, pace=pace)
        self._name = f"{scene} ({root.name}, {len(chosen)} frame{'s' if len(chosen) > 1 else ''})"
        self._scene_paths = tuple(chosen)
        if len(chosen) == 1:
            self._note("demo: a still frame of the virtual bench, repeated; noise does not change between frames")
        else:
            self._note(f"demo: {len(chosen)} frames of the virtual bench played in turn")

    def _scene_names(self) -> list[str]:
        names: list[str] = []
        for p in self._all:
            name = _scene_name(p)
            if name not in names:
                names.append(name)
        return names

    @property
    def scenes(self) -> tuple[str, ...]:
        """Names of the demo scenes in the folder (numbered frames share one name)."""
        return tuple(self._scene_names())

    @property
    def scene_paths(self) -> tuple[Path, ...]:
        return self._scene_paths


# --------------------------------------------------------------------------- arrays (tests, scripts)


class ArraySource(FrameSource):
    """Frames from a sequence of arrays (or a callable producing them): for tests and scripts.

    Parameters
    ----------
    frames : sequence of ndarray, or callable ``f(index) -> ndarray``
        The images. A callable may raise :class:`SourceError` (or any
        exception) to stand for a device lost mid-stream.
    loop : bool
        Start again after the last array (sequences only).
    frame_rate_hz : float
        Nominal rate for timestamps and pacing.
    pace : bool
        Deliver at ``frame_rate_hz``.
    count : int, optional
        Number of frames a callable delivers before the end (None: endless).
    """

    kind = "array"

    def __init__(self, frames, *, loop: bool = False, frame_rate_hz: float = 30.0, pace: bool = False,
                 count: int | None = None, name: str = "arrays", can_set_exposure: bool = False):
        super().__init__(name)
        if callable(frames):
            self._make = frames
            self._count = count
        else:
            items = [np.asarray(f) for f in frames]
            if not items:
                raise InputError("`frames` is empty; give at least one image")
            self._make = lambda i: items[i % len(items)]
            self._count = None if loop else len(items)
        self._rate = float(frame_rate_hz)
        self._pacer = _Pacer(self._rate if pace else None)
        self._shape = None
        self._exposure: float | None = None
        self._can_set_exposure = can_set_exposure

    def _read_image(self):
        if self._count is not None and self._delivered >= self._count:
            return None
        self._pacer.wait()
        try:
            image = np.asarray(self._make(self._delivered))
        except SourceError:
            raise
        except Exception as exc:
            raise SourceError(f"{self._name} failed after {self._delivered} frames ({exc}); "
                              "the frames captured so far are kept") from None
        if self._shape is None:
            self._shape = image.shape
        return image, self._delivered / self._rate, f"{self._name}#{self._delivered}"

    def set_exposure(self, value: float) -> SettingOutcome:
        if not self._can_set_exposure:
            return super().set_exposure(value)
        self._exposure = float(value)
        return SettingOutcome("exposure", float(value), float(value), True)

    def _info_fields(self):
        shape = self._shape or (0, 0)
        return dict(width_px=int(shape[1]), height_px=int(shape[0]), frame_rate_hz=self._rate,
                    frame_count=self._count, can_set_exposure=self._can_set_exposure)


# --------------------------------------------------------------------------- capture


@dataclass(frozen=True)
class Capture:
    """Frames captured for a stack; complete or cut short.

    Attributes
    ----------
    frames : tuple of ndarray
        The images captured, in order (never lost when the source fails).
    timestamps_s : ndarray, shape (n,)
        Their timestamps.
    origins : tuple of str
        Where each came from.
    requested : int
        How many frames were asked for.
    stop_reason : str
        ``""`` when complete, else why the capture stopped early.
    """

    frames: tuple[np.ndarray, ...]
    timestamps_s: np.ndarray
    origins: tuple[str, ...]
    requested: int
    stop_reason: str = ""

    @property
    def complete(self) -> bool:
        return len(self.frames) == self.requested

    @property
    def count(self) -> int:
        return len(self.frames)


def capture_frames(source: FrameSource, count: int, *, stop: threading.Event | None = None) -> Capture:
    """Read ``count`` frames from ``source``; stop early, keeping what was read, if it ends or fails.

    Parameters
    ----------
    source : FrameSource
    count : int
        Frames wanted (1-10000).
    stop : threading.Event, optional
        Set it to stop waiting (e.g. the user closed the window).

    Returns
    -------
    Capture
        The frames read; ``stop_reason`` says why there are fewer than asked.
    """
    if not (1 <= int(count) <= 10000):
        raise InputError(f"`count` must be between 1 and 10000 frames, was {count}")
    frames: list[np.ndarray] = []
    times: list[float] = []
    origins: list[str] = []
    reason = ""
    while len(frames) < count:
        if stop is not None and stop.is_set():
            reason = "stopped"
            break
        try:
            frame = source.read()
        except SourceError as exc:
            reason = str(exc)
            break
        if frame is None:
            reason = f"the {source.kind} ended after {len(frames)} of {count} frames"
            break
        frames.append(frame.image)
        times.append(frame.timestamp_s)
        origins.append(frame.origin)
    return Capture(frames=tuple(frames), timestamps_s=np.array(times, dtype=np.float64),
                   origins=tuple(origins), requested=int(count), stop_reason=reason)


# --------------------------------------------------------------------------- opening by name


def open_source(spec: str, *, loop: bool = True, pace: bool = True,
                settings: CameraSettings | None = None) -> FrameSource:
    """Open a source from what the user typed.

    Parameters
    ----------
    spec : str
        ``"demo"`` or ``"demo:SCENE"``; a camera index (``"0"``) or device
        path (``"/dev/video0"``); a video file; an image folder; one image file.
    loop : bool
        Loop video files and folders.
    pace : bool
        Deliver file frames at their nominal rate, like a camera.
    settings : CameraSettings, optional
        For cameras.

    Raises
    ------
    SourceError
        Nothing usable at ``spec``; the message says what was tried.
    """
    text = str(spec).strip()
    if not text:
        raise InputError("`spec` is empty; give a camera index, a device, a video, a folder or 'demo'")
    if text.lower() == "demo" or text.lower().startswith("demo:"):
        scene = text.split(":", 1)[1] if ":" in text else "cfl"
        return DemoSource(scene or "cfl", pace=pace)
    if text.isdigit():
        return CameraSource(int(text), settings=settings)
    if text.startswith("/dev/"):
        return CameraSource(text, settings=settings)
    path = Path(text)
    if path.is_dir():
        return FolderSource(path, loop=loop, pace=pace)
    if path.is_file():
        if path.suffix.lower() in IMAGE_SUFFIXES:
            return FolderSource([path], loop=True, pace=pace)
        return VideoSource(path, loop=loop, pace=pace)
    raise SourceError(f"source {text!r} not found: it is not 'demo', a camera index, a device, "
                      "a video file or a folder; check the path")
