"""Frames in: image files, videos and folders; stacking, dark subtraction, linearising.

Reading (the I/O edge of the package)
    :func:`read_image` decodes one PNG, JPEG, TIFF or BMP file (8- or 16-bit,
    colour or mono) with OpenCV from the file's bytes, so paths with
    non-ASCII characters work. The frame's size is read from the header
    (Pillow, lazily) and frames above ``max_pixels`` (default
    :data:`MAX_FRAME_PIXELS`, 50 megapixels) are refused *before* decoding.
    :func:`iter_video` streams the frames of any video OpenCV can open, one at
    a time; :func:`iter_frames` walks files, folders, globs and videos in
    order. Colour frames are returned in **RGB** order.

Stacking (pure)
    :func:`stack_frames` takes any iterable of frames (it never holds more
    than one frame for ``method="mean"``) and returns a frozen
    :class:`StackedFrame`: a linear, single-channel float32 image with a
    per-pixel variance estimate and a saturation mask. :func:`load_stack`
    does the reading and the stacking in one call and records the files'
    SHA-256 hashes.

Per-frame preparation
    :class:`FramePreparer` turns one raw frame into a linear single-channel
    float32 image with look-up tables; stacking and the live path use the
    same object, so a stacked frame and a live frame are linearised alike.

Conventions
-----------
* **Linear units.** Encoded values ``v`` are mapped to linear values
  ``full_scale * f(v / full_scale)``, where ``full_scale`` is the
  saturation code (255 for 8-bit, 65535 for 16-bit unless
  ``saturation_level`` is given). A saturated pixel therefore reads
  ``full_scale`` in linear units too: units stay "DN at full scale".
* **Gamma.** ``"2.2"`` (a pure power law), ``"srgb"`` (the IEC 61966-2-1
  piecewise curve) or ``"1"`` (already linear). The default ``"auto"``
  resolves to ``"srgb"`` for 8-bit input — webcams encode with the sRGB
  transfer curve, which a pure 2.2 power law only approximates and departs
  from most in the shadows, where weak lines and dark samples live (common
  practice, no source) — and to
  ``"1"`` for 16-bit input, which in practice comes from RAW or scientific
  cameras that write linear data. The resolved value is recorded in
  ``StackedFrame.settings["gamma"]``.
* **Channels.** ``channel="mean"`` (default) weights R, G and B equally
  (1/3 each), which keeps every wavelength the sensor sees and keeps
  "full scale" meaning full scale; ``"r"``, ``"g"``, ``"b"`` pick one
  channel; ``"luma"`` uses the Rec. 709 luma weights 0.2126, 0.7152,
  0.0722 (ITU-R BT.709); ``channel_weights=(wr, wg, wb)`` sets any
  weights (they are normalised to sum to 1). Linearising happens per
  channel *before* the channels are combined.
* **Saturation.** A pixel is saturated when any channel of any stacked
  frame is at or above the saturation code.
"""

from __future__ import annotations

import glob as _glob
import hashlib
import io
import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

import cv2
import numpy as np

from .errors import DegradedResultWarning, FileFormatError, FrameError, InputError

__all__ = [
    "MAX_FRAME_PIXELS",
    "IMAGE_SUFFIXES",
    "VIDEO_SUFFIXES",
    "GAMMA_CHOICES",
    "CHANNEL_CHOICES",
    "StackedFrame",
    "FramePreparer",
    "read_image",
    "iter_video",
    "iter_frames",
    "expand_sources",
    "file_sha256",
    "linearise",
    "channel_weights_for",
    "stack_frames",
    "load_stack",
]

#: Frames with more pixels than this are refused before decoding (a 50 MP
#: 16-bit colour frame already needs 300 MB decoded and 600 MB as float32).
MAX_FRAME_PIXELS = 50_000_000

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp")
VIDEO_SUFFIXES = (".mp4", ".avi", ".mov", ".mkv", ".webm", ".m4v", ".mpg", ".mpeg", ".wmv", ".ogv", ".mjpeg", ".mjpg")
GAMMA_CHOICES = ("auto", "2.2", "srgb", "1")
CHANNEL_CHOICES = ("mean", "r", "g", "b", "luma")

# Rec. 709 luma weights (ITU-R BT.709-6, item 3.2), R, G, B.
_LUMA_WEIGHTS = (0.2126, 0.7152, 0.0722)
# Median stacking holds every frame; refuse stacks bigger than this (bytes of float32 frames).
_MEDIAN_MEMORY_BYTES = 1_500_000_000
_GLOB_CHARS = set("*?[")


# --------------------------------------------------------------------------- result


@dataclass(frozen=True)
class StackedFrame:
    """A stack of frames reduced to one linear, single-channel image.

    Attributes
    ----------
    image : ndarray of float32, shape (H, W)
        Linear signal in "DN at full scale" units (see the module notes),
        dark-subtracted when a dark was given. Read-only.
    variance : ndarray of float32, shape (H, W), or None
        Variance of ``image`` itself (not of a single frame), in DN², from
        the frame-to-frame scatter (plus the dark's variance when a dark was
        subtracted). ``None`` for a single frame, where no scatter exists;
        :func:`benchspec.extract.estimate_noise_model` then falls back to a
        spatial estimate or to given values.
    saturated : ndarray of bool, shape (H, W)
        True where any channel of any frame reached the saturation code.
    n_frames : int
        Number of frames stacked.
    full_scale : float
        Linear value of a saturated pixel (equals the saturation code).
    settings : dict
        How the stack was made (method, gamma as resolved, channel weights,
        saturation code, dark, input bit depth). JSON-serialisable.
    input_files : tuple of str
        The files read, in order (empty when frames were passed as arrays).
    input_sha256 : tuple of str
        SHA-256 hex digest of each file in ``input_files``.
    """

    image: np.ndarray
    variance: np.ndarray | None
    saturated: np.ndarray
    n_frames: int
    full_scale: float
    settings: Mapping[str, Any] = field(default_factory=dict)
    input_files: tuple = ()
    input_sha256: tuple = ()

    def __post_init__(self):
        for name in ("image", "variance", "saturated"):
            value = getattr(self, name)
            if value is not None and value.flags.writeable:
                value = value.copy() if value.base is not None else value
                value.setflags(write=False)
                object.__setattr__(self, name, value)
        object.__setattr__(self, "settings", dict(self.settings))
        object.__setattr__(self, "input_files", tuple(self.input_files))
        object.__setattr__(self, "input_sha256", tuple(self.input_sha256))

    @property
    def shape(self) -> tuple[int, int]:
        """(height, width) of the frame in pixels."""
        return tuple(self.image.shape)

    @property
    def frame_variance(self) -> np.ndarray | None:
        """Estimated variance of one frame (DN²): ``variance`` times the stacking factor's inverse."""
        if self.variance is None:
            return None
        return self.variance / np.float32(self.settings.get("variance_factor", 1.0 / max(self.n_frames, 1)))


# --------------------------------------------------------------------------- reading


def _display(path: Path | str) -> str:
    return str(path)


def _check_file(path: Path) -> None:
    if not path.exists():
        raise FileFormatError(f"{_display(path)}: no such file; check the path and the spelling")
    if path.is_dir():
        raise FileFormatError(f"{_display(path)} is a folder; pass it to iter_frames/load_stack, which read folders")
    if path.stat().st_size == 0:
        raise FileFormatError(f"{_display(path)} is empty (0 bytes); save or copy the frame again")


def _image_size_from_header(handle, path: Path) -> tuple[int, int]:
    """(width, height) from the header only: Pillow opens images lazily and decodes nothing here."""
    from PIL import Image, UnidentifiedImageError

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            with Image.open(handle) as im:
                return int(im.size[0]), int(im.size[1])
    except Image.DecompressionBombError:
        return (1 << 31, 1)  # far above any limit we accept
    except UnidentifiedImageError:
        raise FileFormatError(
            f"{_display(path)} is not a readable image (PNG, JPEG, TIFF or BMP); "
            "check the file type, or export the frame again as PNG"
        ) from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise FileFormatError(
            f"{_display(path)}: image header is damaged ({exc}); export the frame again as PNG"
        ) from None


def _check_complete(data: bytes, path: Path) -> None:
    """Catch truncated PNG/JPEG files, which decoders may return half-grey without an error."""
    if data[:8] == b"\x89PNG\r\n\x1a\n":
        if b"IEND" not in data[-64:]:
            raise FileFormatError(
                f"{_display(path)} is a truncated PNG (no end chunk); copy or save the frame again"
            )
    elif data[:2] == b"\xff\xd8":
        if b"\xff\xd9" not in data.rstrip(b"\x00")[-1024:]:
            raise FileFormatError(
                f"{_display(path)} is a truncated JPEG (no end marker); copy or save the frame again"
            )


def _to_rgb(decoded: np.ndarray) -> np.ndarray:
    if decoded.ndim == 2:
        return decoded
    channels = decoded.shape[2]
    if channels == 1:
        return decoded[:, :, 0]
    if channels == 3:
        return cv2.cvtColor(decoded, cv2.COLOR_BGR2RGB)
    if channels == 4:
        return cv2.cvtColor(decoded, cv2.COLOR_BGRA2RGB)
    raise FileFormatError(f"frame has {channels} channels; benchspec reads mono, RGB or RGBA frames")


def _to_bgr(decoded: np.ndarray) -> np.ndarray:
    """As :func:`_to_rgb`, but colour stays in OpenCV's B, G, R order (no copy for 3 channels)."""
    if decoded.ndim == 3 and decoded.shape[2] == 3:
        return decoded
    if decoded.ndim == 3 and decoded.shape[2] == 4:
        return cv2.cvtColor(decoded, cv2.COLOR_BGRA2BGR)
    return _to_rgb(decoded)


def read_image(path, *, max_pixels: int = MAX_FRAME_PIXELS) -> np.ndarray:
    """Decode one image file.

    Parameters
    ----------
    path : str or os.PathLike
        A PNG, JPEG, TIFF or BMP file; non-ASCII paths work.
    max_pixels : int, keyword-only
        Frames with more pixels are refused before decoding.

    Returns
    -------
    ndarray, shape (H, W) or (H, W, 3), dtype uint8 or uint16
        Mono, or colour in RGB order (an alpha channel is dropped). EXIF
        orientation is ignored on purpose: the pixels stay as the sensor
        wrote them.

    Raises
    ------
    FileFormatError
        Missing, empty, truncated, corrupt or wrong-type file.
    FrameError
        The frame is larger than ``max_pixels`` or of an unsupported depth.
    """
    path = Path(path)
    data = _read_image_bytes(path, max_pixels=max_pixels)
    return _decode_image_bytes(data, path)


def _read_image_bytes(path: Path, *, max_pixels: int) -> bytes:
    _check_file(path)
    try:
        with open(path, "rb") as handle:
            width, height = _image_size_from_header(handle, path)
            if width * height > max_pixels:
                raise FrameError(
                    f"{_display(path)} is {width}x{height} ({width * height / 1e6:.0f} MP), above the "
                    f"{max_pixels / 1e6:.0f} MP limit; resize or crop the frame, or raise max_pixels"
                )
            handle.seek(0)
            data = handle.read()
    except PermissionError:
        raise FileFormatError(f"{_display(path)}: permission denied; check the file's permissions") from None
    _check_complete(data, path)
    return data


def _decode_image_bytes(data: bytes, path: Path) -> np.ndarray:
    buffer = np.frombuffer(data, dtype=np.uint8)
    decoded = cv2.imdecode(buffer, cv2.IMREAD_UNCHANGED)
    if decoded is None or decoded.size == 0:
        raise FileFormatError(
            f"{_display(path)} could not be decoded (corrupt or unsupported image); export the frame again as PNG"
        )
    if decoded.dtype not in (np.uint8, np.uint16):
        raise FrameError(
            f"{_display(path)} has {decoded.dtype} pixels; benchspec reads 8- or 16-bit frames — "
            "convert it to a 16-bit PNG or TIFF"
        )
    return _to_rgb(decoded)


def iter_video(path, *, max_frames: int | None = None, max_pixels: int = MAX_FRAME_PIXELS,
               bgr: bool = False) -> Iterator[np.ndarray]:
    """Stream the frames of a video, one at a time (memory stays bounded).

    Parameters
    ----------
    path : str or os.PathLike
        Any video OpenCV can open (MP4, AVI, MKV, MOV, ... depending on the
        codecs of the installed OpenCV).
    max_frames : int or None, keyword-only
        Stop after this many frames.
    max_pixels : int, keyword-only
        Refuse videos whose frames are larger.
    bgr : bool, keyword-only
        Colour frames in the decoder's B, G, R order, not converted (a
        full-frame pass saved: about a fifth of the decoding time at
        1280x720); a reader that combines the channels reverses its weights.

    Yields
    ------
    ndarray, shape (H, W, 3) or (H, W), uint8
        Frames in RGB order (B, G, R with ``bgr``); mono videos as (H, W).

    Raises
    ------
    FileFormatError
        The file is missing, empty, cannot be opened or yields no frame.
    """
    path = Path(path)
    _check_file(path)
    if max_frames is not None and max_frames < 1:
        raise InputError(f"`max_frames` must be at least 1, was {max_frames}")
    capture = cv2.VideoCapture(str(path))
    try:
        if not capture.isOpened():
            raise FileFormatError(
                f"{_display(path)} could not be opened as a video; convert it to MP4 (H.264) or to a folder of PNG frames"
            )
        width = int(capture.get(cv2.CAP_PROP_FRAME_WIDTH))
        height = int(capture.get(cv2.CAP_PROP_FRAME_HEIGHT))
        if width * height > max_pixels:
            raise FrameError(
                f"{_display(path)} has {width}x{height} frames, above the {max_pixels / 1e6:.0f} MP limit; "
                "re-encode the video at a lower resolution"
            )
        declared = int(capture.get(cv2.CAP_PROP_FRAME_COUNT) or 0)  # from the container; <= 0 when unknown
        count = 0
        ended_early = False
        while max_frames is None or count < max_frames:
            ok, frame = capture.read()
            if not ok or frame is None:
                ended_early = True
                break
            count += 1
            yield _to_bgr(frame) if bgr else _to_rgb(frame)
        if count == 0:
            raise FileFormatError(
                f"{_display(path)}: no frame could be decoded (unreadable or truncated video); "
                "convert it to MP4 (H.264) or to a folder of PNG frames"
            )
        if ended_early and declared > 0 and count < declared - 1:  # some containers count one frame too many
            warnings.warn(
                f"{_display(path)} ended after {count} of its {declared} frames (truncated or damaged video); "
                f"the {count} frames read are used",
                DegradedResultWarning,
                stacklevel=2,
            )
    finally:
        capture.release()


def _is_video(path: Path) -> bool:
    return path.suffix.lower() in VIDEO_SUFFIXES


def expand_sources(sources) -> list[Path]:
    """The files named by ``sources``, in order.

    Parameters
    ----------
    sources : str, os.PathLike, or a sequence of them
        Image files, video files, folders (their image files, sorted by
        name) and glob patterns (``frames/*.png``, sorted).

    Returns
    -------
    list of Path
        Videos stay single entries (their frames are streamed later).

    Raises
    ------
    FileFormatError
        A file does not exist, a folder holds no image, a glob matches nothing.
    """
    if isinstance(sources, (str, os.PathLike)):
        sources = [sources]
    files: list[Path] = []
    for source in sources:
        text = os.fspath(source)
        path = Path(text)
        if path.is_dir():
            found = sorted(p for p in path.iterdir() if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES)
            if not found:
                raise FileFormatError(
                    f"folder {text} holds no image files ({', '.join(IMAGE_SUFFIXES)}); check the folder"
                )
            files.extend(found)
        elif not path.exists() and _GLOB_CHARS & set(text):
            matched = sorted(Path(p) for p in _glob.glob(text) if Path(p).is_file())
            if not matched:
                raise FileFormatError(f"pattern {text} matches no file; check the folder and the pattern")
            files.extend(matched)
        else:
            _check_file(path)
            files.append(path)
    if not files:
        raise FileFormatError("no frames given; pass image files, a folder, a glob pattern or a video")
    return files


def iter_frames(sources, *, max_frames: int | None = None, max_pixels: int = MAX_FRAME_PIXELS) -> Iterator[np.ndarray]:
    """Stream every frame named by ``sources`` (images, folders, globs, videos), in order.

    Only one decoded frame is alive at a time. See :func:`expand_sources`
    for what ``sources`` accepts and :func:`read_image` for the frames.
    """
    for _, frame in _iter_frames_unchecked(expand_sources(sources), max_frames=max_frames, max_pixels=max_pixels):
        yield frame


def _iter_frames_with_files(files: Sequence[Path], *, max_frames, max_pixels, hashes: dict | None = None):
    first: list = []  # (path, shape, dtype) of the first frame, to name the file that differs

    for path, frame in _iter_frames_unchecked(files, max_frames=max_frames, max_pixels=max_pixels, hashes=hashes):
        if not first:
            first.append((path, frame.shape[:2], frame.dtype))
        elif frame.shape[:2] != first[0][1] or frame.dtype != first[0][2]:
            (h0, w0), (h, w) = first[0][1], frame.shape[:2]
            raise FrameError(
                f"{_display(path)} is {w}x{h} px, {frame.dtype}, but {_display(first[0][0])} is {w0}x{h0} px, "
                f"{first[0][2]}; stack frames from one camera setting only"
            )
        yield path, frame


def _iter_frames_unchecked(files: Sequence[Path], *, max_frames, max_pixels, hashes: dict | None = None):
    count = 0
    for path in files:
        if max_frames is not None and count >= max_frames:
            return
        if _is_video(path):
            remaining = None if max_frames is None else max_frames - count
            if hashes is not None:
                hashes[str(path)] = file_sha256(path)
            for frame in iter_video(path, max_frames=remaining, max_pixels=max_pixels):
                count += 1
                yield path, frame
        else:
            data = _read_image_bytes(path, max_pixels=max_pixels)
            if hashes is not None:
                hashes[str(path)] = hashlib.sha256(data).hexdigest()
            count += 1
            yield path, _decode_image_bytes(data, path)


def file_sha256(path) -> str:
    """SHA-256 hex digest of a file, read in 1 MB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


# --------------------------------------------------------------------------- linearising


def _resolve_gamma(gamma: str, dtype) -> str:
    gamma = str(gamma).lower()
    if gamma not in GAMMA_CHOICES:
        raise InputError(f"`gamma` must be one of {', '.join(GAMMA_CHOICES)}, was {gamma!r}")
    if gamma == "auto":
        return "srgb" if np.dtype(dtype) == np.uint8 else "1"
    return gamma


def _decode_curve(normalised: np.ndarray, gamma: str) -> np.ndarray:
    """Encoded value in [0, 1] -> linear value in [0, 1]."""
    v = np.clip(normalised, 0.0, None)
    if gamma == "1":
        return v
    if gamma == "2.2":
        return v ** 2.2
    # sRGB decoding, IEC 61966-2-1:1999 (as quoted in its amendments and every colour text).
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def _encode_curve(linear: np.ndarray, gamma: str) -> np.ndarray:
    """Inverse of :func:`_decode_curve`."""
    v = np.clip(linear, 0.0, None)
    if gamma == "1":
        return v
    if gamma == "2.2":
        return v ** (1 / 2.2)
    return np.where(v <= 0.0031308, 12.92 * v, 1.055 * v ** (1 / 2.4) - 0.055)


def linearise(frame, *, gamma: str = "auto", saturation_level: float | None = None) -> np.ndarray:
    """Undo the transfer curve of an encoded frame.

    Parameters
    ----------
    frame : ndarray, uint8 or uint16 (or float, taken as encoded in [0, saturation_level])
    gamma : {"auto", "2.2", "srgb", "1"}, keyword-only
        ``"auto"`` means ``"srgb"`` for uint8 and ``"1"`` otherwise.
    saturation_level : float or None, keyword-only
        The encoded full-scale value; default the dtype's maximum (255, 65535).

    Returns
    -------
    ndarray of float32, same shape
        ``full_scale * f(v / full_scale)``; the input is not modified.
    """
    array = np.asarray(frame)
    resolved = _resolve_gamma(gamma, array.dtype)
    full = _full_scale(array.dtype, saturation_level)
    normalised = array.astype(np.float64) / full
    return (full * _decode_curve(normalised, resolved)).astype(np.float32)


def _full_scale(dtype, saturation_level) -> float:
    if saturation_level is not None:
        if not saturation_level > 0:
            raise InputError(f"`saturation_level` must be positive, was {saturation_level}")
        return float(saturation_level)
    dtype = np.dtype(dtype)
    if dtype.kind == "u":
        return float(np.iinfo(dtype).max)
    raise InputError(
        f"frames of dtype {dtype} need `saturation_level` (their encoded full-scale value); "
        "or pass uint8/uint16 frames"
    )


def channel_weights_for(channel: str = "mean", channel_weights: Sequence[float] | None = None) -> tuple[float, float, float]:
    """The (R, G, B) weights, summing to 1, that combine colour channels.

    ``channel_weights`` (three non-negative numbers, normalised here) wins
    over ``channel``; see the module notes for the named choices.
    """
    if channel_weights is not None:
        weights = np.asarray(channel_weights, dtype=np.float64)
        if weights.shape != (3,) or np.any(weights < 0) or not np.isfinite(weights).all() or weights.sum() <= 0:
            raise InputError(
                f"`channel_weights` must be three non-negative numbers (R, G, B) with a positive sum, was {channel_weights!r}"
            )
        weights = weights / weights.sum()
        return tuple(float(w) for w in weights)
    channel = str(channel).lower()
    named = {
        "mean": (1 / 3, 1 / 3, 1 / 3),
        "r": (1.0, 0.0, 0.0),
        "g": (0.0, 1.0, 0.0),
        "b": (0.0, 0.0, 1.0),
        "luma": _LUMA_WEIGHTS,
    }
    if channel not in named:
        raise InputError(f"`channel` must be one of {', '.join(CHANNEL_CHOICES)}, was {channel!r}")
    return named[channel]


#: An 8-bit frame whose mean step across one of the eight column (or row) phases is this many times
#: the median step of the other seven carries the 8x8 block edges of JPEG (and MJPG video) coding.
#: Measured on the virtual bench (12 setups, seed 5): lossless frames 1.001-1.024, JPEG at quality 95
#: 1.16-1.19 (columns) and 1.37-1.39 (rows), at quality 70 3.8-6.7.
BLOCK_EDGE_RATIO_LIMIT = 1.08


def block_edge_ratio(frame: np.ndarray) -> float:
    """How much larger the pixel steps at one of 8 phases are than at the others (1 for lossless frames).

    The mean absolute step between neighbouring columns is averaged per column
    phase (column index mod 8), and likewise for rows; the ratio is the
    largest phase over the median of the other seven, the larger of the two
    directions. Block transform coding (JPEG, MJPG) leaves its 8x8 grid as
    steps at one phase; above :data:`BLOCK_EDGE_RATIO_LIMIT` a frame is taken
    as block-coded. Every fourth row (column) is read: about 1 ms at 1920x1080.
    """
    a = np.asarray(frame)
    if a.ndim == 3:
        a = a[..., a.shape[2] // 2]  # green of RGB or BGR: the channel with the most signal
    ratio = 1.0
    for view in (a[::4], a[:, ::4].T):
        if view.shape[1] < 32 or view.shape[0] < 1:
            continue
        steps = np.abs(np.diff(view.astype(np.int16), axis=1)).mean(axis=0, dtype=np.float64)
        n = steps.size // 8 * 8
        phases = steps[:n].reshape(-1, 8).mean(axis=0)
        k = int(np.argmax(phases))
        rest = float(np.median(np.delete(phases, k)))
        if rest > 0:
            ratio = max(ratio, float(phases[k]) / rest)
    return ratio


def _encoding_of(frame: np.ndarray) -> tuple[str, float | None]:
    """("block-coded" | "lossless" | "unknown", block-edge ratio or None) of one raw frame."""
    if frame.dtype == np.uint8:
        ratio = block_edge_ratio(frame)
        return ("block-coded" if ratio > BLOCK_EDGE_RATIO_LIMIT else "lossless"), ratio
    if frame.dtype == np.uint16:
        return "lossless", None  # no common 16-bit format is block-coded
    return "unknown", None


def _largest_code(frame: np.ndarray) -> float:
    """The largest value of an integer frame, in one fast pass (``cv2.minMaxLoc`` on its rows)."""
    if frame.ndim == 3 and not (frame.strides[-1] == frame.itemsize and frame.strides[1] == 3 * frame.itemsize):
        return float(frame.max())
    if frame.strides[-1] != frame.itemsize:
        return float(frame.max())
    return float(cv2.minMaxLoc(frame.reshape(frame.shape[0], -1))[1])


class FramePreparer:
    """Raw frame -> (linear single-channel float32 image, saturation mask), fast.

    Built once with the settings; :meth:`prepare` is then a table look-up
    (``cv2.LUT`` for 8-bit frames), one channel-weighting pass and one
    comparison, with no Python loop over pixels. Tables are built per input
    dtype on first use.

    Parameters
    ----------
    gamma, saturation_level : see :func:`linearise`
    channel, channel_weights : see :func:`channel_weights_for`
    dark : ndarray of float32, shape (H, W), or None
        A linear dark image (e.g. ``StackedFrame.image`` of a dark stack)
        subtracted after linearising and combining.
    """

    def __init__(self, *, gamma: str = "auto", channel: str = "mean", channel_weights=None,
                 saturation_level: float | None = None, dark: np.ndarray | None = None):
        if str(gamma).lower() not in GAMMA_CHOICES:
            raise InputError(f"`gamma` must be one of {', '.join(GAMMA_CHOICES)}, was {gamma!r}")
        self.gamma = str(gamma).lower()
        self.weights = channel_weights_for(channel, channel_weights)
        self.channel = "custom" if channel_weights is not None else str(channel).lower()
        self.saturation_level = saturation_level
        self.dark = None if dark is None else np.ascontiguousarray(dark, dtype=np.float32)
        self._tables: dict = {}

    def resolved_gamma(self, dtype) -> str:
        """The gamma actually applied to frames of ``dtype``."""
        return _resolve_gamma(self.gamma, dtype)

    def full_scale(self, dtype) -> float:
        """The saturation code (and linear full scale) for frames of ``dtype``."""
        return _full_scale(dtype, self.saturation_level)

    def _table(self, dtype):
        key = np.dtype(dtype).str
        if key not in self._tables:
            full = self.full_scale(dtype)
            gamma = self.resolved_gamma(dtype)
            n_codes = 256 if np.dtype(dtype) == np.uint8 else 65536
            codes = np.arange(n_codes, dtype=np.float64)
            linear = full * _decode_curve(codes / full, gamma)
            self._tables[key] = linear.astype(np.float32)
        return self._tables[key]

    def prepare_live(self, frame: np.ndarray, *, buffers: dict | None = None) -> tuple[np.ndarray, np.ndarray | None]:
        """As :meth:`prepare`, but the saturation mask is None when no pixel reached the saturation code.

        The usual live frame has nothing clipped: one pass for the largest
        code (``cv2.minMaxLoc`` on the raw bytes) then replaces the
        per-pixel comparison, and the mask is built only when it is needed.

        ``buffers`` (a dict the caller keeps between frames, one per thread)
        holds the intermediate images so that a frame allocates no new
        memory: a fresh multi-megabyte array per frame costs its page faults,
        about as much as the look-up itself. The returned image is then one
        of those buffers, overwritten by the next call.
        """
        frame = np.asarray(frame)
        if frame.dtype == np.uint8 and frame.ndim in (2, 3) and frame.size and (frame.ndim == 2 or frame.shape[2] == 3):
            if frame.strides[-1] != 1 or (frame.ndim == 3 and frame.strides[1] != 3):
                frame = np.ascontiguousarray(frame)
            # a region of a frame is read in place: OpenCV takes rows with a stride, no copy is needed
            rows = frame.reshape(frame.shape[0], -1)
            _, largest, _, _ = cv2.minMaxLoc(rows)
            if largest < self.full_scale(frame.dtype):
                return self._linear(frame, {} if buffers is None else buffers), None
        return self.prepare(frame)

    def _linear(self, frame: np.ndarray, buffers: dict) -> np.ndarray:
        """The linear single-channel image of a checked uint8 frame (no saturation mask), into ``buffers``."""
        shape = frame.shape
        if buffers.get("shape") != shape:
            buffers.clear()
            buffers.update(shape=shape, linear=np.empty(shape, np.float32),
                           image=np.empty(shape[:2], np.float32) if frame.ndim == 3 else None)
        linear = cv2.LUT(frame, self._table(frame.dtype), dst=buffers["linear"])
        if frame.ndim == 3:
            image = cv2.transform(linear, np.asarray(self.weights, dtype=np.float32).reshape(1, 3),
                                  dst=buffers["image"].reshape(shape[0], shape[1], 1))
            image = image.reshape(shape[:2])
        else:
            image = linear
        if self.dark is not None:
            if self.dark.shape != image.shape:
                raise FrameError(
                    f"the dark is {self.dark.shape[1]}x{self.dark.shape[0]} but the frame is "
                    f"{image.shape[1]}x{image.shape[0]}; take the dark with the same camera resolution"
                )
            image = cv2.subtract(image, self.dark, dst=image)
        return image

    def prepare(self, frame: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Linearise, combine channels and subtract the dark of one raw frame.

        Parameters
        ----------
        frame : ndarray, (H, W) or (H, W, 3), uint8 or uint16 (RGB order)

        Returns
        -------
        image : ndarray of float32, shape (H, W)
        saturated : ndarray of bool, shape (H, W)
        """
        frame = np.asarray(frame)
        if frame.ndim == 3 and frame.shape[2] == 4:
            frame = frame[:, :, :3]
        if frame.ndim not in (2, 3) or (frame.ndim == 3 and frame.shape[2] != 3):
            raise FrameError(f"a frame must be (H, W) or (H, W, 3), got shape {frame.shape}")
        if frame.dtype not in (np.uint8, np.uint16):
            raise FrameError(f"frames must be uint8 or uint16 (8- or 16-bit), got {frame.dtype}")
        if frame.size == 0:
            raise FrameError("the frame is empty (0 pixels)")
        full = self.full_scale(frame.dtype)
        table = self._table(frame.dtype)
        if frame.dtype == np.uint8:
            frame = np.ascontiguousarray(frame)
            linear = cv2.LUT(frame, table)
        else:
            linear = table[frame]
        if frame.ndim == 3:
            w = np.asarray(self.weights, dtype=np.float32).reshape(1, 3)
            image = cv2.transform(linear, w)
            if image.ndim == 3:
                image = image[:, :, 0]
            if frame.dtype == np.uint8 and _largest_code(frame) < full:
                saturated = np.zeros(frame.shape[:2], dtype=bool)  # nothing clipped: no per-pixel comparison
            else:
                # one pass: 255 where every channel is below the saturation code
                below = int(math.ceil(full)) - 1
                saturated = cv2.inRange(frame, (0, 0, 0), (below, below, below)) == 0
        else:
            image = linear
            saturated = frame >= full
        if self.dark is not None:
            if self.dark.shape != image.shape:
                raise FrameError(
                    f"the dark is {self.dark.shape[1]}x{self.dark.shape[0]} but the frame is "
                    f"{image.shape[1]}x{image.shape[0]}; take the dark with the same camera resolution"
                )
            image = cv2.subtract(image, self.dark)
        return image, saturated


# --------------------------------------------------------------------------- stacking


def stack_frames(
    frames: Iterable[np.ndarray],
    *,
    method: str = "mean",
    gamma: str = "auto",
    channel: str = "mean",
    channel_weights: Sequence[float] | None = None,
    saturation_level: float | None = None,
    dark: StackedFrame | None = None,
    check: bool = True,
) -> StackedFrame:
    """Stack raw frames into one linear image with a per-pixel variance.

    Parameters
    ----------
    frames : iterable of ndarray
        Raw frames, (H, W) or (H, W, 3) RGB, uint8 or uint16, all the same
        size. An iterator is consumed once; for ``method="mean"`` only one
        frame is held at a time.
    method : {"mean", "median"}, keyword-only
        ``"median"`` rejects flicker and hot pixels; it keeps every frame in
        memory (up to 1.5 GB of float32 frames).
    gamma, saturation_level : see :func:`linearise`
    channel, channel_weights : see :func:`channel_weights_for`
    dark : StackedFrame or None, keyword-only
        A stacked dark (same camera, exposure and settings), subtracted; its
        variance is added to the result's.
    check : bool, keyword-only
        Refuse black, blank and fully saturated stacks (FrameError).

    Returns
    -------
    StackedFrame

    Notes
    -----
    The variance of the mean is ``s² / N`` with ``s²`` the unbiased
    frame-to-frame variance. For the median it is ``(pi / 2) * sigma² / N``
    (the asymptotic variance of the median of normal samples), with
    ``sigma`` from the median absolute deviation (times 1.4826) when N >= 5,
    so the outliers the median rejects do not inflate it.

    Raises
    ------
    FrameError
        No frame, frames of different sizes, a black, blank or saturated stack.
    InputError
        Unknown method, gamma or channel.
    """
    if method not in ("mean", "median"):
        raise InputError(f"`method` must be 'mean' or 'median', was {method!r}")
    preparer = FramePreparer(gamma=gamma, channel=channel, channel_weights=channel_weights,
                             saturation_level=saturation_level)
    n = 0
    shape = None
    dtype = None
    total = None
    total_sq = None
    offset = None
    kept: list[np.ndarray] = []
    saturated = None
    encoded_max = None
    for frame in frames:
        frame = np.asarray(frame)
        image, sat = preparer.prepare(frame)
        if shape is None:
            shape, dtype = image.shape, frame.dtype
            first = image
            saturated = sat.copy()
            encoding, edge_ratio = _encoding_of(frame)
            encoded_max = _largest_code(frame) if frame.dtype in (np.uint8, np.uint16) else float(frame.max())
        else:
            if image.shape != shape:
                raise FrameError(
                    f"frame {n + 1} is {image.shape[1]}x{image.shape[0]} but the first frame is "
                    f"{shape[1]}x{shape[0]}; stack frames from one camera setting only"
                )
            if frame.dtype != dtype:
                raise FrameError(f"frame {n + 1} is {frame.dtype} but the first frame is {dtype}; do not mix bit depths")
            np.logical_or(saturated, sat, out=saturated)
            encoded_max = max(encoded_max, _largest_code(frame) if frame.dtype in (np.uint8, np.uint16)
                              else float(frame.max()))
        n += 1
        if method == "mean" and n > 1:  # sums shifted by the first frame (its own term is 0): accurate variances
            if total is None:
                offset = first.astype(np.float64)
                total = np.zeros(shape, np.float64)
                total_sq = np.zeros(shape, np.float64)
                delta = np.empty(shape, np.float64)  # reused: one work array for the whole stack
            np.subtract(image, offset, out=delta)
            total += delta
            np.multiply(delta, delta, out=delta)
            total_sq += delta
        elif method == "median":
            kept.append(image)
            if len(kept) * image.nbytes > _MEDIAN_MEMORY_BYTES:
                raise InputError(
                    f"median stacking of more than {len(kept) - 1} frames of this size needs over 1.5 GB; "
                    "use method='mean' or stack fewer frames"
                )
    if n == 0:
        raise FrameError("no frames to stack; check the input files")
    full = preparer.full_scale(dtype)
    resolved_gamma = preparer.resolved_gamma(dtype)
    variance = None
    if method == "mean":
        factor = 1.0 / n
        if n > 1:
            frame_var = np.maximum(total_sq - total * total / n, 0.0) / (n - 1)
            variance = (frame_var / n).astype(np.float32)
            image = (offset + total / n).astype(np.float32)
        else:  # one frame is its own mean
            image = np.ascontiguousarray(first, dtype=np.float32)
    else:
        cube = np.stack(kept)
        kept.clear()
        image = np.median(cube, axis=0).astype(np.float32)
        factor = (np.pi / 2) / n
        if n >= 5:
            sigma = 1.4826 * np.median(np.abs(cube - image[None]), axis=0)
            frame_var = sigma.astype(np.float64) ** 2
        elif n > 1:
            frame_var = cube.astype(np.float64).var(axis=0, ddof=1)
        if n > 1:
            variance = (frame_var * factor).astype(np.float32)
        del cube
    scatter_note = None
    if variance is not None and not np.any(variance > 0):
        # Identical frames (a still repeated, a camera returning one buffer) carry no
        # scatter: a zero variance would claim infinite SNR. Fall back to the noise model,
        # as for a single frame.
        variance = None
        scatter_note = "the stacked frames are identical (no frame-to-frame scatter); the noise model is used instead"
    if check:
        _check_usable(image, saturated, full=full, gamma=resolved_gamma, encoded_max=encoded_max)
    settings = {
        "method": method,
        "gamma": resolved_gamma,
        "gamma_requested": preparer.gamma,
        "channel": preparer.channel,
        "channel_weights_rgb": list(preparer.weights),
        "saturation_level": full,
        "input_dtype": np.dtype(dtype).name,
        "encoding": encoding,
        "block_edge_ratio": edge_ratio,
        "variance_factor": factor,
        "dark": None,
    }
    if scatter_note:
        settings["variance_note"] = scatter_note
    if dark is not None:
        if dark.shape != image.shape:
            raise FrameError(
                f"the dark is {dark.shape[1]}x{dark.shape[0]} but the frames are {image.shape[1]}x{image.shape[0]}; "
                "take the dark with the same camera resolution"
            )
        image = image - dark.image
        if variance is not None and dark.variance is not None:
            variance = variance + dark.variance
        _check_dark(image, dark)
        settings["dark"] = {
            "n_frames": dark.n_frames,
            "method": dark.settings.get("method"),
            "files": list(dark.input_files),
            "sha256": list(dark.input_sha256),
        }
    return StackedFrame(image=image, variance=variance, saturated=saturated, n_frames=n,
                        full_scale=full, settings=settings)


#: A dark leaves the frames' noise: more than this fraction of pixels 5 sigma below zero after subtracting
#: it means it holds light the frames do not (a lamp frame given as the dark). 5 sigma of Gaussian noise
#: is 3e-7 of pixels. Measured on the demo frames: each of the 12 with its own dark 0-2e-5 (JPEG ones
#: included); five lamp, LED, laser and daylight frames given as another's dark 1.5e-3 to 8e-2.
_DARK_BRIGHTER_FRACTION = 5e-4


def _check_dark(subtracted: np.ndarray, dark: "StackedFrame") -> None:
    """Warn when the dark holds light the frames do not (``subtracted`` = frames - dark)."""
    small = subtracted[::2, ::2]
    noise = float(np.median(np.abs(np.diff(small, axis=1)))) / (0.6745 * math.sqrt(2.0))
    if not noise > 0:
        return
    fraction = float(np.count_nonzero(small < -5.0 * noise)) / small.size
    if fraction > _DARK_BRIGHTER_FRACTION:
        names = ", ".join(Path(f).name for f in dark.input_files if f)[:80] or "the dark"
        warnings.warn(
            f"{names} is brighter than the frames by more than 5 sigma on {100 * fraction:.1f}% of the pixels: it holds "
            "light the frames do not; a dark is taken with the lens capped at the same exposure and gain (check --dark)",
            DegradedResultWarning, stacklevel=3)


def _check_usable(image: np.ndarray, saturated: np.ndarray, *, full: float, gamma: str, encoded_max: float) -> None:
    """Refuse black, blank and fully saturated stacks (thresholds: common practice, no source)."""
    fraction_saturated = np.count_nonzero(saturated) / max(saturated.size, 1)
    if fraction_saturated > 0.9:
        raise FrameError(
            f"{100 * fraction_saturated:.0f}% of the pixels are saturated; shorten the exposure, "
            "lower the camera gain or dim the lamp"
        )
    if encoded_max <= 0.02 * full:
        raise FrameError(
            f"the frame is black (brightest pixel at {100 * encoded_max / full:.1f}% of full scale); "
            "check the lamp is on, the lens cap is off and the exposure is long enough"
        )
    # Spread in encoded units, so a dim but real band in an 8-bit gamma frame still counts.
    low, high = np.percentile(image[:: max(1, image.shape[0] // 256), :: max(1, image.shape[1] // 256)], [0.5, 99.9])
    spread = float(_encode_curve(np.array([max(high, 0.0) / full]), gamma)[0] - _encode_curve(np.array([max(low, 0.0) / full]), gamma)[0])
    if spread < 0.02:
        raise FrameError(
            f"the frame is blank (uniform to within {100 * spread:.1f}% of full scale); "
            "no spectrum is in view — check the slit, the grating and the camera's aim"
        )


def load_stack(
    sources,
    *,
    method: str = "mean",
    gamma: str = "auto",
    channel: str = "mean",
    channel_weights: Sequence[float] | None = None,
    saturation_level: float | None = None,
    dark=None,
    max_frames: int | None = None,
    max_pixels: int = MAX_FRAME_PIXELS,
) -> StackedFrame:
    """Read frames from files, folders, globs or videos and stack them.

    Parameters
    ----------
    sources : str, os.PathLike or a sequence of them
        See :func:`expand_sources`.
    dark : sources, StackedFrame or None, keyword-only
        Dark frames (read and mean-stacked with the same gamma, channel and
        saturation settings) or an already stacked dark.
    max_frames : int or None
        Stack at most this many frames (e.g. of a long video).
    method, gamma, channel, channel_weights, saturation_level
        See :func:`stack_frames`.

    Returns
    -------
    StackedFrame
        With ``input_files`` and ``input_sha256`` filled in.
    """
    files = expand_sources(sources)
    dark_stack = None
    if dark is not None:
        if isinstance(dark, StackedFrame):
            dark_stack = dark
        else:
            dark_stack = _load_dark(dark, gamma=gamma, channel=channel, channel_weights=channel_weights,
                                    saturation_level=saturation_level, max_pixels=max_pixels)
    hashes: dict[str, str] = {}
    frames = (frame for _, frame in _iter_frames_with_files(files, max_frames=max_frames,
                                                             max_pixels=max_pixels, hashes=hashes))
    stacked = stack_frames(frames, method=method, gamma=gamma, channel=channel, channel_weights=channel_weights,
                           saturation_level=saturation_level, dark=dark_stack)
    if stacked.settings.get("encoding") == "lossless" and any(_is_video(Path(f)) for f in hashes):
        # video codecs other than MJPG smooth their block edges away (deblocking) but are lossy all the same
        from dataclasses import replace

        stacked = replace(stacked, settings={**stacked.settings, "encoding": "video"})
    return _with_files(stacked, hashes)


def _with_files(stacked: StackedFrame, hashes: Mapping[str, str]) -> StackedFrame:
    from dataclasses import replace

    return replace(stacked, input_files=tuple(hashes.keys()), input_sha256=tuple(hashes.values()))


def _load_dark(sources, **kwargs) -> StackedFrame:
    files = expand_sources(sources)
    hashes: dict[str, str] = {}
    frames = (frame for _, frame in _iter_frames_with_files(files, max_frames=None,
                                                             max_pixels=kwargs.pop("max_pixels"), hashes=hashes))
    stacked = stack_frames(frames, method="mean", check=False, **kwargs)
    return _with_files(stacked, hashes)
