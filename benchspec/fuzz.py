"""Bad inputs for every file reader, and a fuzzing run over them.

A reader may accept a file or refuse it; it may never crash. "Refuse" means
raising a :class:`benchspec.errors.BenchspecError` whose message is one line
that names the file; "crash" is any other exception (``TypeError``,
``RecursionError``, ``MemoryError``, OpenCV's ``cv2.error``...).

What is here
------------
:func:`readers`
    Every file reader of the package, each with valid sample bytes. Readers
    of modules that are not installed (or not written yet) are left out.
:func:`bad_inputs`
    The catalogue of hand-made bad inputs for each reader: empty and
    truncated files, the wrong file type behind the right extension, frames
    whose header claims a huge size (decompression bombs, refused before
    decoding), NaN and inf, wrong schema versions and units, text that is not
    UTF-8, deep nesting, huge (sparse) files.
:func:`check_input`
    Write one input under a path with spaces and non-ASCII characters, read
    it, and classify the outcome (``accepted``, ``refused``, ``crash`` or
    ``bad-message``).
:func:`mutations`
    A hypothesis strategy of inputs made by mutating the valid samples and
    the catalogue (bit flips, cut, duplicated or spliced chunks, numbers
    replaced by NaN, inf or huge values). The tests run a few dozen examples
    per reader; :func:`run` runs it for as long as asked.

The longer run (documented in DEVELOPERS.md)::

    python -m benchspec.fuzz --minutes 10            # all readers, random seed
    python -m benchspec.fuzz --minutes 2 --reader spectrum-csv --seed 7
    python -m benchspec.fuzz --list                  # the catalogue, counted

It needs ``hypothesis`` (the test extra: ``pip install -e ".[test]"``).
Inputs that crash a reader are saved to ``--out-dir`` (default
``fuzz-crashes/``) with the traceback beside them; the exit code is 1 when
anything crashed, else 0.
"""

from __future__ import annotations

import argparse
import functools
import importlib
import json
import os
import random
import re
import struct
import sys
import tempfile
import time
import traceback
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from .errors import BenchspecError

__all__ = [
    "Reader",
    "BadInput",
    "Outcome",
    "readers",
    "bad_inputs",
    "check_input",
    "mutations",
    "png_claiming",
    "run",
    "main",
    "AWKWARD_FOLDER",
    "AWKWARD_STEM",
]

#: Every input is written under this folder and file stem, so each check also
#: tries a path with spaces and non-ASCII characters.
AWKWARD_FOLDER = "bänch dätä 1 – Größe"
AWKWARD_STEM = "spéctrum ñ 1"

# A marker value written into every valid text sample exactly once, so a case
# can replace it with NaN, inf or a huge number.
_MARKER = "123.25"
_NOTE = "Größe µ – bänch"  # non-ASCII text inside every valid text sample


@dataclass(frozen=True)
class Reader:
    """One file reader of the package.

    Attributes
    ----------
    name : str
        Short name, e.g. ``"image-png"``, ``"spectrum-csv"``.
    suffix : str
        Extension of the files it is given.
    read : callable
        ``read(path)`` reads the file (returning anything) or raises.
    valid : bytes
        A valid file for this reader.
    text : bool
        Whether the format is text.
    family : str
        Formats of one family may stand in for each other (a JPEG renamed
        ``.png`` is still an image and may be read).
    """

    name: str
    suffix: str
    read: Callable[[Path], Any]
    valid: bytes
    text: bool
    family: str


@dataclass(frozen=True)
class BadInput:
    """One hand-made bad input.

    Attributes
    ----------
    reader : str
        Name of the :class:`Reader` it is given to.
    case : str
        What is wrong with it (``"empty"``, ``"png-100000x100000"``...).
    data : bytes
        The file's content (for sparse files, the bytes at the start).
    sparse_size : int
        When non-zero, the file is extended (sparsely) to this many bytes.
    must_refuse : bool
        False where reading the file successfully is also right (an image of
        another type behind an image extension, a valid variant).
    """

    reader: str
    case: str
    data: bytes
    sparse_size: int = 0
    must_refuse: bool = True

    @property
    def id(self) -> str:
        return f"{self.reader}/{self.case}"


@dataclass(frozen=True)
class Outcome:
    """What a reader did with one input.

    ``kind`` is ``"accepted"``, ``"refused"`` (a one-line BenchspecError
    naming the file), ``"bad-message"`` (a BenchspecError that spans lines
    or does not name the file) or ``"crash"`` (any other exception).
    """

    kind: str
    message: str = ""
    error_type: str = ""
    traceback: str = ""

    @property
    def ok(self) -> bool:
        return self.kind in ("accepted", "refused")


# --------------------------------------------------------------------------- crafted binary files


def _png_chunk(tag: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", zlib.crc32(tag + data) & 0xFFFFFFFF)


def png_claiming(width: int, height: int, *, bit_depth: int = 8, colour_type: int = 2) -> bytes:
    """A small, well-formed PNG whose header claims ``width`` x ``height`` pixels.

    The image data are a few hundred bytes, so the file is what a
    decompression bomb looks like before it is decoded: a reader must look
    at the header and refuse it, not decode it.
    """
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 4096, 9)
    return b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", idat) + _png_chunk(b"IEND", b"")


def _jpeg_claiming(valid_jpeg: bytes, width: int, height: int) -> bytes:
    """``valid_jpeg`` with its frame header (SOF0/SOF2) patched to claim another size."""
    data = bytearray(valid_jpeg)
    i = 2
    while i + 9 < len(data):
        if data[i] != 0xFF:
            i += 1
            continue
        marker = data[i + 1]
        length = struct.unpack(">H", data[i + 2:i + 4])[0]
        if marker in (0xC0, 0xC1, 0xC2):
            data[i + 5:i + 9] = struct.pack(">HH", height, width)
            return bytes(data)
        i += 2 + length
    raise ValueError("no SOF marker in the JPEG sample")


def _tiff_claiming(width: int, height: int) -> bytes:
    """A minimal little-endian 8-bit grey TIFF whose IFD claims ``width`` x ``height``."""
    entries = [
        (256, 4, 1, width),        # ImageWidth, LONG
        (257, 4, 1, height),       # ImageLength, LONG
        (258, 3, 1, 8),            # BitsPerSample
        (259, 3, 1, 1),            # Compression: none
        (262, 3, 1, 1),            # Photometric: black is zero
        (273, 4, 1, 8 + 2 + 12 * 9 + 4),  # StripOffsets: just after the IFD
        (277, 3, 1, 1),            # SamplesPerPixel
        (278, 4, 1, height),       # RowsPerStrip
        (279, 4, 1, 64),           # StripByteCounts (a lie: the data stop after 64 bytes)
    ]
    ifd = struct.pack("<H", len(entries))
    for tag, kind, count, value in entries:
        if kind == 3:
            ifd += struct.pack("<HHIHH", tag, kind, count, value, 0)
        else:
            ifd += struct.pack("<HHII", tag, kind, count, value)
    ifd += struct.pack("<I", 0)
    return b"II*\x00" + struct.pack("<I", 8) + ifd + bytes(64)


def _bmp_claiming(width: int, height: int) -> bytes:
    """A 24-bit BMP header claiming ``width`` x ``height``, followed by a few bytes of pixels."""
    pixels = bytes(256)
    info = struct.pack("<IiiHHIIiiII", 40, width, height, 1, 24, 0, 0, 2835, 2835, 0, 0)
    header = b"BM" + struct.pack("<IHHI", 14 + len(info) + len(pixels), 0, 0, 14 + len(info))
    return header + info + pixels


def _avi_frames_claiming(valid_avi: bytes, width: int, height: int) -> bytes:
    """``valid_avi`` (MJPG) with the frame header of every JPEG frame patched to claim another size."""
    data = bytearray(valid_avi)
    at = data.find(b"\xff\xc0")
    while at >= 0:
        data[at + 5:at + 9] = struct.pack(">HH", height, width)
        at = data.find(b"\xff\xc0", at + 2)
    return bytes(data)


def _avi_claiming(valid_avi: bytes, width: int, height: int) -> bytes:
    """``valid_avi`` with the sizes in its main header and stream format patched."""
    data = bytearray(valid_avi)
    at = data.find(b"avih")
    if at >= 0:  # MainAVIHeader: width and height are the 9th and 10th DWORDs
        data[at + 8 + 32:at + 8 + 40] = struct.pack("<II", width, height)
    at = data.find(b"strf")
    if at >= 0:  # BITMAPINFOHEADER: biSize, biWidth, biHeight
        data[at + 8 + 4:at + 8 + 12] = struct.pack("<ii", width, height)
    return bytes(data)


# --------------------------------------------------------------------------- valid samples


def _test_frame(*, depth: int = 8, colour: bool = True, width: int = 96, height: int = 64) -> np.ndarray:
    """A small frame with a bright band and two lines (an invented test pattern)."""
    rng = np.random.default_rng(0)
    y, x = np.mgrid[0:height, 0:width]
    band = np.exp(-0.5 * ((y - height / 2) / (height / 8)) ** 2)
    lines = np.exp(-0.5 * ((x - width / 3) / 1.5) ** 2) + 0.6 * np.exp(-0.5 * ((x - 2 * width / 3) / 1.5) ** 2)
    full = 255 if depth == 8 else 65535
    image = full * (0.05 + 0.8 * band * (0.2 + lines)) + rng.normal(0, full * 0.005, band.shape)
    image = np.clip(image, 0, full).astype(np.uint8 if depth == 8 else np.uint16)
    if colour:
        image = np.dstack([image, image, (image * 0.8).astype(image.dtype)])
    return image


def _encode(ext: str, image: np.ndarray) -> bytes:
    import cv2

    ok, buffer = cv2.imencode(ext, image)
    if not ok:  # pragma: no cover - OpenCV always encodes these
        raise RuntimeError(f"OpenCV could not encode a {ext} sample")
    return buffer.tobytes()


def _video_sample(folder: Path) -> bytes:
    import cv2

    path = folder / "sample.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 10.0, (96, 64))
    try:
        if not writer.isOpened():  # pragma: no cover - MJPG/AVI is built into OpenCV
            raise RuntimeError("OpenCV cannot write an MJPG AVI sample")
        for k in range(12):
            frame = _test_frame()
            writer.write(np.roll(frame, k, axis=1)[:, :, ::-1])
    finally:
        writer.release()
    return path.read_bytes()


def _sample_spectrum():
    from .io import build_provenance
    from .spectrum import Spectrum

    n = 40
    wavelength = np.linspace(400.0, 700.0, n)
    intensity = 50.0 + 1000.0 * np.exp(-0.5 * ((wavelength - 546.0) / 3.0) ** 2)
    intensity[7] = float(_MARKER)  # the marker value, once
    uncertainty = np.sqrt(intensity)
    saturated = np.zeros(n, dtype=bool)
    saturated[20] = True
    provenance = build_provenance(settings={"gamma": "2.2"}, notes=_NOTE, created_utc="2026-12-01T19:00:00Z")
    return Spectrum(intensity=intensity, uncertainty=uncertainty, pixel=np.arange(n, dtype=np.float64),
                    wavelength_nm=wavelength, saturated=saturated, provenance=provenance)


def _spectrum_samples(folder: Path) -> dict[str, bytes]:
    from .io import write_spectrum

    spectrum = _sample_spectrum()
    out = {}
    for ext in (".csv", ".json", ".jdx"):
        path = folder / f"sample{ext}"
        write_spectrum(spectrum, path, force=True, title=_NOTE)
        out[ext] = path.read_bytes()
    rows = "\n".join(f"{w:.3f}\t{v:.6g}" for w, v in zip(spectrum.wavelength_nm, spectrum.intensity))
    out[".txt"] = (f"# exported by another instrument; {_NOTE}\nwavelength_nm\tintensity\n" + rows + "\n").encode("utf-8")
    return out


def _table_sample() -> bytes:
    rows = "\n".join(f"{400 + 10 * k},{0.1 * k if k != 3 else float(_MARKER)},{0.01}" for k in range(12))
    return (f"# {_NOTE}\nwavelength_nm,absorbance,uncertainty\n{rows}\n").encode("utf-8")


def _bench_samples() -> dict[str, bytes]:
    from .refdata import read_data_text
    from .simulate import Bench

    template = read_data_text("bench-template.toml")
    toml = f"# {_NOTE}\n" + template
    toml = re.sub(r"(?m)^(\s*rotation_deg\s*=\s*)[-0-9.eE+]+", r"\g<1>" + _MARKER.replace("123", "1"), toml, count=1)
    # keep the marker a valid rotation: 1.25 deg; the NaN cases replace it
    data = Bench().to_dict()
    data["name"] = _NOTE
    data.setdefault("camera", {})["rotation_deg"] = 1.25
    return {".toml": toml.encode("utf-8"), ".json": json.dumps(data, ensure_ascii=False, indent=1).encode("utf-8")}


# --------------------------------------------------------------------------- the readers


def _read_video(path: Path):
    from . import frames

    return [f.shape for f in frames.iter_video(path, max_frames=4)]


def _read_source(path: Path):
    from . import sources

    with sources.open_source(str(path), loop=False, pace=False) as source:
        shapes = []
        for _ in range(3):
            frame = source.read()
            if frame is None:
                break
            shapes.append(frame.image.shape)
        return shapes


def _read_stack(path: Path):
    from . import frames

    return frames.load_stack([path]).shape


@functools.lru_cache(maxsize=1)
def _valid_samples() -> dict[str, bytes]:
    with tempfile.TemporaryDirectory(prefix="benchspec-fuzz-") as scratch:
        folder = Path(scratch)
        samples = {
            "png": _encode(".png", _test_frame()[:, :, ::-1]),
            "png16": _encode(".png", _test_frame(depth=16, colour=False)),
            "jpeg": _encode(".jpg", _test_frame()[:, :, ::-1]),
            "tiff": _encode(".tiff", _test_frame(depth=16)[:, :, ::-1]),
            "bmp": _encode(".bmp", _test_frame()[:, :, ::-1]),
            "avi": _video_sample(folder),
        }
        for ext, data in _spectrum_samples(folder).items():
            samples["spectrum" + ext] = data
        samples["table.csv"] = _table_sample()
        for ext, data in _bench_samples().items():
            samples["bench" + ext] = data
    return samples


def readers() -> list[Reader]:
    """Every file reader of the package, with a valid sample each (see the module notes)."""
    return list(_readers())


@functools.lru_cache(maxsize=1)
def _readers() -> tuple[Reader, ...]:
    from . import frames, io, simulate

    s = _valid_samples()
    found = [
        Reader("image-png", ".png", frames.read_image, s["png"], False, "image"),
        Reader("image-png16", ".png", frames.read_image, s["png16"], False, "image"),
        Reader("image-jpeg", ".jpg", frames.read_image, s["jpeg"], False, "image"),
        Reader("image-tiff", ".tif", frames.read_image, s["tiff"], False, "image"),
        Reader("image-bmp", ".bmp", frames.read_image, s["bmp"], False, "image"),
        Reader("stack-png", ".png", _read_stack, s["png"], False, "image"),
        Reader("video-avi", ".avi", _read_video, s["avi"], False, "video"),
        Reader("source-image", ".png", _read_source, s["png"], False, "image"),
        Reader("source-video", ".avi", _read_source, s["avi"], False, "video"),
        Reader("spectrum-csv", ".csv", io.read_spectrum, s["spectrum.csv"], True, "spectrum"),
        Reader("spectrum-json", ".json", io.read_spectrum, s["spectrum.json"], True, "spectrum"),
        Reader("spectrum-jdx", ".jdx", io.read_spectrum, s["spectrum.jdx"], True, "spectrum"),
        Reader("spectrum-txt", ".txt", io.read_spectrum, s["spectrum.txt"], True, "spectrum"),
        Reader("table-csv", ".csv", io.read_table, s["table.csv"], True, "table"),
        Reader("bench-toml", ".toml", simulate.load_bench, s["bench.toml"], True, "bench"),
        Reader("bench-json", ".json", simulate.load_bench, s["bench.json"], True, "bench"),
    ]
    for reader in _optional_readers():
        found.append(reader)
    return tuple(found)


def _optional_readers() -> list[Reader]:
    """Readers of modules that may not be installed yet (calibration, response, session files)."""
    out: list[Reader] = []
    for make in (_calibration_reader, _response_reader, _session_reader):
        try:
            made = make()
        except (ImportError, AttributeError, NotImplementedError):
            continue
        if made is None:
            continue
        out.extend(made if isinstance(made, list) else [made])
    return out


@functools.lru_cache(maxsize=1)
def _calibration_sample() -> bytes:
    """A valid calibration file of an invented bench: a linear Hg solution on a 300-column band.

    The solution is built directly (not searched for), so the sample does not depend on the
    matcher's heuristics; calfile validates it like any file it reads.
    """
    from . import calfile
    from .geometry import Geometry
    from .refdata import load_lamp
    from .wavecal import MatchedLine, WavelengthCalibration, WavelengthSolution

    n = 300
    first_nm, step_nm = 380.0, 1.1  # linear dispersion (invented bench)
    centre, scale = (n - 1) / 2.0, (n - 1) / 2.0
    coefficients = (first_nm + step_nm * centre, step_nm * scale)
    solution = WavelengthSolution(coefficients=coefficients, covariance=((1e-4, 0.0), (0.0, 1e-4)),
                                  pixel_centre=centre, pixel_scale=scale, pixel_range=(0.0, float(n - 1)))
    matches = []
    for line in load_lamp("hg").lines():
        if line.relative_intensity >= 200 and first_nm + 5 < line.wavelength_nm < first_nm + step_nm * (n - 6):
            pixel = (line.wavelength_nm - first_nm) / step_nm
            matches.append(MatchedLine(
                pixel=pixel, pixel_uncertainty=0.05, reference_nm=line.wavelength_nm, reference_uncertainty_nm=0.005,
                fitted_nm=line.wavelength_nm, residual_nm=0.0, residual_px=0.0, species="Hg",
                members_nm=(line.wavelength_nm,), lamp="hg", used_in_fit=True, anchor=True, rejected=False,
                blended=False, saturated=False, snr=50.0))
    wavelength = WavelengthCalibration(
        solution=solution, matches=tuple(matches), rms_px=0.05, rms_nm=0.055, max_uncertainty_nm=0.02,
        verdict="good", verdict_reason=f"an invented sample ({_NOTE})", lamps=("hg",),
        line_list_sources=("Hg: NIST ASD",), coverage_fraction=0.9, n_detected=len(matches))
    aperture = (16, 81)
    geometry = Geometry(
        frame_width_px=480, frame_height_px=320, rotation_deg=2.5, rotation_uncertainty_deg=0.01,
        centre_x_px=240.0, centre_y_px=160.0, first_column_s_px=-150.0, n_columns=n, n_rows=97, centre_row=48,
        aperture_rows=aperture, background_rows=((4, 12), (85, 93)), band_height_px=18.8,
        tilt_coefficients=(0.0,), curvature_coefficients=(0.002,), curvature_known=True, curvature_rms_px=0.05,
        n_lines_traced=5, spatial_profile=tuple(np.full(65, 1 / 65)), notes=(_NOTE,),
    )
    reference = 20.0 + 500.0 * np.exp(-0.5 * ((np.arange(n) - 150.0) / 2.0) ** 2)
    calibration = calfile.Calibration(
        geometry=geometry, wavelength=wavelength, frames=({"path": f"{_NOTE}.png", "sha256": "0" * 64, "lamp": "hg"},),
        settings={"gamma": "2.2", "marker": float(_MARKER)}, reference_spectrum=tuple(float(v) for v in reference),
        created_utc="2026-12-01T19:00:00Z",
    )
    data = calibration.to_dict()
    calfile.calibration_from_dict(data)  # the sample is valid by the file's own schema
    return json.dumps(data, ensure_ascii=False, indent=1).encode("utf-8")


def _calibration_reader() -> Reader | None:
    from . import calfile

    return Reader("calibration-json", ".json", calfile.read_calibration, _calibration_sample(), True, "calibration")


def _response_sample() -> bytes:
    from .analysis.response import response_from_dict, response_to_dict

    n = 30
    wavelength = np.linspace(400.0, 700.0, n)
    obj = {
        "format": "benchspec-response", "version": 1, "reference": "planck", "temperature_k": 2900.0,
        "smoothing_nm": 10.0, "min_signal_fraction": 0.05,
        "wavelength_nm": [float(w) for w in wavelength],
        "relative_response": [float(v) for v in np.linspace(0.2, 1.0, n)],
        "uncertainty": [0.01] * n, "valid": [True] * n, "provenance": {"notes": _NOTE},
    }
    obj["relative_response"][5] = 0.12325  # a marker-like value, once
    text = json.dumps(response_to_dict(response_from_dict(obj)), ensure_ascii=False, indent=1)
    return text.replace("2900.0", _MARKER, 1).encode("utf-8")


def _response_reader() -> Reader | None:
    from .analysis import response

    return Reader("response-json", ".json", response.load_response, _response_sample(), True, "response")


def _session_folder_for(path: Path) -> Path:
    return path.parent / f"{path.stem} session"


@functools.lru_cache(maxsize=1)
def _session_template() -> Path:
    """A session folder with the sample capture and screen, made once per process and copied per check."""
    import atexit
    import shutil

    from .session import Session

    root = Path(tempfile.mkdtemp(prefix="benchspec-fuzz-session-"))
    atexit.register(shutil.rmtree, root, True)
    folder = root / "session"
    session = Session.create(folder, title=_NOTE)
    record = _fill_capture(session)
    session.save_screen(shown=[record.id], active=record.id, view={"x_range_nm": [400.0, 700.0], "title": _NOTE})
    return folder


def _session_copy_with(path: Path, relative: str) -> Path:
    """A copy of the template session whose file ``relative`` is replaced by ``path`` (linked when huge)."""
    import shutil

    folder = _session_folder_for(path)
    shutil.rmtree(folder, ignore_errors=True)
    shutil.copytree(_session_template(), folder)
    target = folder / relative.format(capture=_session_samples()["capture_id"])
    target.unlink()
    if not path.is_file():  # a pipe or a device: put the same thing in the session
        os.symlink(os.path.realpath(path), target)
    elif path.stat().st_size > 4 * 2**20:
        os.link(path, target)  # keeps a sparse file sparse
    else:
        target.write_bytes(path.read_bytes())
    return folder


def _open_session_with_manifest(path: Path):
    """A session folder whose session.json holds the bytes of ``path``."""
    import shutil

    from .session import Session

    folder = _session_copy_with(path, "session.json")
    try:
        return Session.open(folder)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _open_session_with_capture(path: Path):
    """The sample session whose one capture has the bytes of ``path`` as capture.json; every capture is loaded."""
    import shutil

    from .errors import FileFormatError
    from .session import Session

    folder = _session_copy_with(path, "captures/{capture}/capture.json")
    try:
        session = Session.open(folder)
        if session.problems:
            raise FileFormatError(session.problems[0])
        for record in session.captures:
            session.load_capture(record.id)
        return session
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _open_session_with_screen(path: Path):
    """The sample session whose screen.json holds the bytes of ``path``; the screen is restored."""
    import shutil

    from .errors import FileFormatError
    from .session import Session

    folder = _session_copy_with(path, "screen.json")
    try:
        state = Session.open(folder).restore_screen()
        if state.problems:
            raise FileFormatError(state.problems[0])
        return state
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _read_npy_frame(path: Path):
    from . import session

    return session._decode_frame(path)  # the loader of float frames kept in sessions


def _fill_capture(session):
    """Add the sample capture (the same bytes every time) to ``session``."""
    return session.add_capture(spectrum=_sample_spectrum(), frames=[_test_frame(), np.full((8, 8), float(_MARKER), np.float32)],
                               label=_NOTE, metadata={"exposure_s": 0.033, "note": _NOTE})


@functools.lru_cache(maxsize=1)
def _session_samples() -> dict:
    folder = _session_template()
    capture = next(p for p in (folder / "captures").iterdir() if p.is_dir())
    return {
        "session": (folder / "session.json").read_bytes(),
        "capture": (capture / "capture.json").read_bytes(),
        "screen": (folder / "screen.json").read_bytes(),
        "npy": next(capture.glob("*.npy")).read_bytes(),
        "capture_id": capture.name,
    }


def _session_reader() -> list[Reader]:
    from . import session  # noqa: F401 - only to know it exists

    samples = _session_samples()
    return [
        Reader("session-manifest", ".json", _open_session_with_manifest, samples["session"], True, "session"),
        Reader("session-capture", ".json", _open_session_with_capture, samples["capture"], True, "session"),
        Reader("session-screen", ".json", _open_session_with_screen, samples["screen"], True, "session"),
        Reader("session-npy-frame", ".npy", _read_npy_frame, samples["npy"], False, "npy"),
    ]


# --------------------------------------------------------------------------- the catalogue

# Bytes of other file types, put behind the wrong extension.
_FOREIGN = {
    "pdf": b"%PDF-1.4\n1 0 obj << /Type /Catalog >> endobj\ntrailer << /Root 1 0 R >>\n%%EOF\n",
    "zip": b"PK\x03\x04\x14\x00\x00\x00\x08\x00" + bytes(40) + b"PK\x05\x06" + bytes(18),
    "html": b"<!DOCTYPE html><html><head><title>spectrum</title></head><body>404 not found</body></html>\n",
    "elf": b"\x7fELF\x02\x01\x01" + bytes(57),
    "gzip": zlib.compress(b"wavelength_nm,intensity\n400,1\n") ,
    "utf16-text": "wavelength_nm,intensity\n400,1\n500,2\n".encode("utf-16"),
}


def _truncations(data: bytes) -> list[tuple[str, bytes]]:
    out = []
    seen = set()
    for fraction in (0.05, 0.5, 0.9):
        cut = max(1, int(len(data) * fraction))
        if cut < len(data) and cut not in seen:
            seen.add(cut)
            out.append((f"truncated-{int(fraction * 100)}pct", data[:cut]))
    if len(data) > 2:
        out.append(("last-byte-missing", data.rstrip(b"\n")[:-1]))
    return out


def _common_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    rng = random.Random(f"{r}-random")
    cases = [
        BadInput(r, "empty", b""),
        BadInput(r, "whitespace-only", b"  \n\t\n   \n"),
        BadInput(r, "one-byte", reader.valid[:1], must_refuse=reader.family != "bench"),  # bench: '#' is an empty TOML file
        BadInput(r, "random-bytes", bytes(rng.getrandbits(8) for _ in range(4096))),
        BadInput(r, "nul-bytes", bytes(4096)),
    ]
    for case, data in _truncations(reader.valid):
        # A truncated text file can still be a valid, shorter file (a CSV cut
        # at a row boundary); a truncated binary frame or video must be refused.
        cases.append(BadInput(r, case, data, must_refuse=_truncation_must_refuse(reader, case)))
    for name, data in _FOREIGN.items():
        cases.append(BadInput(r, f"wrong-type-{name}", data))
    # Valid files of the other families behind this reader's extension.
    others = {
        "image": samples["png"], "video": samples["avi"], "spectrum": samples["spectrum.csv"],
        "table": samples["table.csv"], "bench": samples["bench.toml"],
    }
    for family, data in others.items():
        if family == reader.family:
            continue
        if {family, reader.family} <= {"spectrum", "table"}:
            continue  # a table is a CSV and may be read as one
        cases.append(BadInput(r, f"wrong-type-{family}-file", data, must_refuse=_must_refuse_foreign(reader, family)))
    return cases


def _truncation_must_refuse(reader: Reader, case: str) -> bool:
    """Whether a truncated file can be told from a complete one."""
    if reader.family == "image":
        return True  # PNG, JPEG, TIFF and BMP files say how long they are
    if reader.family == "video":
        return case == "truncated-5pct"  # a video cut late still holds its first frames
    # JSON must close its brackets and JCAMP-DX must end with ##END=; a CSV or
    # TOML file cut at a line boundary is a valid, shorter file.
    return reader.suffix in (".json", ".jdx")


def _must_refuse_foreign(reader: Reader, family: str) -> bool:
    if reader.family == "video" and family == "image":
        return False  # OpenCV may open a single image as a one-frame video; reading it is fine
    if reader.name == "bench-json" and family == "spectrum":
        return True
    return True


def _image_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    cases = [
        BadInput(r, "png-claims-100000x100000", png_claiming(100_000, 100_000)),
        BadInput(r, "png-claims-8000x8000-above-limit", png_claiming(8000, 8000)),
        BadInput(r, "png-claims-60000x1-then-bomb", png_claiming(2_000_000_000, 30)),
        BadInput(r, "png-claims-16bit-rgba-30000x30000", png_claiming(30_000, 30_000, bit_depth=16, colour_type=6)),
        BadInput(r, "png-claims-0x0", png_claiming(0, 0)),
        BadInput(r, "jpeg-claims-60000x60000", _jpeg_claiming(samples["jpeg"], 60_000, 60_000)),
        BadInput(r, "jpeg-claims-9000x9000-above-limit", _jpeg_claiming(samples["jpeg"], 9000, 9000)),
        BadInput(r, "tiff-claims-100000x100000", _tiff_claiming(100_000, 100_000)),
        BadInput(r, "bmp-claims-100000x100000", _bmp_claiming(100_000, 100_000)),
        BadInput(r, "png-bad-crc", _flip(samples["png"], len(samples["png"]) // 2)),
        BadInput(r, "png-no-end-chunk", samples["png"][:-12]),
        BadInput(r, "jpeg-no-end-marker", samples["jpeg"][:-2]),
        BadInput(r, "png-header-only", samples["png"][:33]),
        BadInput(r, "tiff-truncated-ifd", samples["tiff"][:12]),
        # frames.read_image refuses float frames; the live sources clip them to 16 bit
        BadInput(r, "float32-tiff", _encode(".tiff", np.full((16, 16), 0.5, np.float32)), must_refuse=not r.startswith("source")),
        BadInput(r, "svg-text", b'<svg xmlns="http://www.w3.org/2000/svg" width="100000" height="100000"></svg>\n'),
    ]
    for name, data in (("jpeg", samples["jpeg"]), ("png", samples["png"]), ("tiff", samples["tiff"]), ("bmp", samples["bmp"])):
        # another image type behind this extension: reading it by content is right, refusing it is too
        cases.append(BadInput(r, f"other-image-type-{name}", data, must_refuse=False))
    return cases


def _flip(data: bytes, at: int) -> bytes:
    array = bytearray(data)
    array[at] ^= 0xFF
    return bytes(array)


def _video_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    avi = samples["avi"]
    return [
        # header and every frame claim 12000x12000: refused from the header, before any frame is decoded
        BadInput(r, "avi-frames-claim-12000x12000", _avi_claiming(_avi_frames_claiming(avi, 12_000, 12_000), 12_000, 12_000)),
        # only the frames claim it: FFmpeg refuses frames that disagree with the stream
        BadInput(r, "avi-frames-only-claim-9000x9000", _avi_frames_claiming(avi, 9000, 9000)),
        # only the header claims it: the frames decode at their true, small size, which is right
        BadInput(r, "avi-header-only-claims-20000x20000", _avi_claiming(avi, 20_000, 20_000), must_refuse=False),
        BadInput(r, "avi-header-only", avi[:256]),
        BadInput(r, "avi-first-frame-only", avi[: avi.find(b"00dc", avi.find(b"movi")) + 8 + 64]),
        BadInput(r, "riff-not-avi", b"RIFF" + struct.pack("<I", 4096) + b"WAVEfmt " + bytes(4088)),
        BadInput(r, "jpeg-behind-video-extension", samples["jpeg"], must_refuse=False),
    ]


def _replace_once(data: bytes, old: bytes, new: bytes) -> bytes | None:
    return data.replace(old, new, 1) if old in data else None


def _text_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    valid = reader.valid
    text = valid.decode("utf-8")
    cases: list[BadInput] = []
    # Not UTF-8: the same text in legacy encodings (the non-ASCII note makes them invalid UTF-8).
    cases.append(BadInput(r, "latin-1-text", text.encode("latin-1", errors="replace")))
    cases.append(BadInput(r, "cp1252-text", text.encode("cp1252", errors="replace")))
    cases.append(BadInput(r, "utf-16-text", text.encode("utf-16")))
    cases.append(BadInput(r, "utf-32-text", text.encode("utf-32")))
    cases.append(BadInput(r, "stray-0xff-byte", valid[: len(valid) // 2] + b"\xff" + valid[len(valid) // 2:]))
    cases.append(BadInput(r, "nul-in-text", valid[: len(valid) // 3] + b"\x00" + valid[len(valid) // 3:]))
    # Numbers that are not finite, or out of any range.
    marker = _MARKER.encode() if _MARKER.encode() in valid else b"1.25"
    for token in ("nan", "NaN", "inf", "-inf", "Infinity", "1e999", "-1e999"):
        changed = _replace_once(valid, marker, token.encode())
        if changed is not None:
            cases.append(BadInput(r, f"number-{token}", changed))
    changed = _replace_once(valid, marker, b"1" * 400)  # an integer far beyond any float (found by the fuzzer)
    if changed is not None:
        cases.append(BadInput(r, "number-400-digits", changed))
    changed = _replace_once(valid, marker, b"12,3.4")
    if changed is not None:
        cases.append(BadInput(r, "number-garbled", changed))
    # A huge file (sparse: it takes no disk space).
    cases.append(BadInput(r, "huge-sparse-file-300MB", valid[:64], sparse_size=300 * 2**20))
    # Windows line endings and a byte-order mark are fine.
    cases.append(BadInput(r, "crlf-line-endings", valid.replace(b"\n", b"\r\n"), must_refuse=False))
    cases.append(BadInput(r, "utf-8-bom", b"\xef\xbb\xbf" + valid, must_refuse=False))
    return cases


def _spectrum_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    v = reader.valid
    out: list[BadInput] = []

    def add(case: str, data: bytes | None, must_refuse: bool = True):
        if data is not None and data != v:
            out.append(BadInput(r, case, data, must_refuse=must_refuse))

    if r == "spectrum-csv":
        add("schema-version-2", _replace_once(v, b"benchspec.spectrum/1", b"benchspec.spectrum/2"))
        add("schema-other", _replace_once(v, b"# schema: benchspec.spectrum/1", b"# schema: benchspec.calibration/1"))
        add("unit-wavelength-um", _replace_once(v, b"\nwavelength_nm,", b"\nwavelength_um,"))
        add("unit-wavenumber", _replace_once(v, b"\nwavelength_nm,", b"\nwavenumber_cm-1,"))
        add("no-intensity-column", _replace_once(v, b",intensity,", b",brightness,"))
        add("ragged-row", _replace_once(v, b"," + _MARKER.encode() + b",", b"," + _MARKER.encode() + b",1,2,3,"))
        add("negative-uncertainty", re.sub(rb"(\n[0-9.]+,[0-9.e+-]+,)([0-9.]+)", rb"\1-\2", v, count=1))
        add("saturated-flag-2", re.sub(rb"(\n[0-9.]+,[0-9.e+-]+,[0-9.e+-]+,)0", rb"\g<1>2", v, count=1))
        lines = v.split(b"\n")
        data_start = next(i for i, line in enumerate(lines) if line.startswith(b"wavelength_nm")) + 1
        swapped = lines[:]
        swapped[data_start], swapped[data_start + 1] = swapped[data_start + 1], swapped[data_start]
        add("wavelengths-not-increasing", b"\n".join(swapped))
        add("header-only", b"\n".join(lines[:data_start]) + b"\n")
        add("duplicate-column", _replace_once(v, b",uncertainty,", b",intensity,"))
        add("provenance-json-garbled", _replace_once(v, b"# provenance-json: {", b"# provenance-json: {{"))
        add("provenance-json-deep", _replace_once(v, b"# provenance-json: {", b"# provenance-json: " + b"[" * 50000))
        add("one-row", b"\n".join(lines[: data_start + 1]) + b"\n")
    elif r == "spectrum-json":
        obj = json.loads(v)

        def variant(**changes):
            new = dict(obj)
            for key, value in changes.items():
                if value is _DROP:
                    new.pop(key, None)
                else:
                    new[key] = value
            return json.dumps(new, ensure_ascii=False).encode("utf-8")

        add("schema-version-99", variant(schema_version=99))
        add("schema-version-string", variant(schema_version="1"))
        add("schema-missing", variant(schema=_DROP))
        add("schema-other", variant(schema="benchspec.calibration"))
        add("unit-wavelength-um", variant(units={"wavelength": "um", "pixel": "px", "intensity": "counts"}))
        add("units-not-object", variant(units="nm"))
        add("intensity-missing", variant(intensity=_DROP))
        add("intensity-strings", variant(intensity=["1"] * len(obj["intensity"])))
        add("intensity-nested", variant(intensity=[[1, 2]] * len(obj["intensity"])))
        add("intensity-null-element", variant(intensity=[None] + obj["intensity"][1:]))
        add("intensity-too-short", variant(intensity=obj["intensity"][:-3]))
        add("intensity-object", variant(intensity={"a": 1}))
        add("saturated-numbers", variant(saturated=[0] * len(obj["intensity"])))
        add("provenance-list", variant(provenance=[1, 2]))
        add("wavelength-decreasing", variant(wavelength_nm=obj["wavelength_nm"][::-1]))
        add("top-level-list", b"[1, 2, 3]")
        add("top-level-string", b'"spectrum"')
        add("top-level-null", b"null")
        add("deeply-nested", b"[" * 100_000)
        add("huge-exponent", _replace_once(v, _MARKER.encode(), b"1" + b"0" * 5000))
    elif r == "spectrum-jdx":
        add("schema-version-2", _replace_once(v, b"benchspec.spectrum/1", b"benchspec.spectrum/2"))
        add("xunits-wavenumber", re.sub(rb"##XUNITS=[^\n]*", b"##XUNITS=1/CM", v, count=1))
        add("xunits-missing", re.sub(rb"##XUNITS=[^\n]*\n", b"", v, count=1))
        add("no-end-label", re.sub(rb"##END=[^\n]*\n?", b"", v))
        add("no-title", re.sub(rb"##TITLE=[^\n]*\n", b"", v, count=1))
        add("npoints-wrong", re.sub(rb"##NPOINTS=\s*(\d+)", b"##NPOINTS=7", v, count=1))
        add("npoints-huge", re.sub(rb"##NPOINTS=\s*(\d+)", b"##NPOINTS=1e300", v, count=1))
        add("npoints-nan", re.sub(rb"##NPOINTS=\s*(\d+)", b"##NPOINTS=nan", v, count=1))
        add("xfactor-zero", re.sub(rb"##XFACTOR=[^\n]*", b"##XFACTOR=0", v, count=1), must_refuse=False)  # XYDATA's x comes from FIRSTX/LASTX
        add("yfactor-inf", re.sub(rb"##YFACTOR=[^\n]*", b"##YFACTOR=inf", v, count=1))
        add("firstx-text", re.sub(rb"##FIRSTX=[^\n]*", b"##FIRSTX=four hundred", v, count=1))
        add("data-type-link", re.sub(rb"##DATA ?TYPE=[^\n]*", b"##DATA TYPE=LINK", v, count=1))
        add("provenance-chunk-missing", re.sub(rb"##\$BENCHSPEC PROVENANCE 1=[^\n]*\n", b"", v, count=1))
        add("provenance-chunk-garbled", re.sub(rb"(##\$BENCHSPEC PROVENANCE 1=)", rb"\1{{{", v, count=1))
        add("label-without-equals", _replace_once(v, b"##XUNITS", b"##XUNITS-no-equals\n##XUNITS"))
        add("saturated-flags-garbled", re.sub(rb"(##\$BENCHSPEC SATURATED=[^\n]*\n)", rb"\1 2 x\n", v, count=1))
        add("asdf-compressed-garbage", re.sub(rb"(##XY(DATA|POINTS)=[^\n]*\n)", rb"\1 400@@@%%%JJJ\n", v, count=1))
    elif r == "spectrum-txt":
        lines = v.split(b"\n")
        add("unit-wavenumber", _replace_once(v, b"wavelength_nm\t", b"wavenumber_cm-1\t"))
        add("unit-ev", _replace_once(v, b"wavelength_nm\t", b"energy_eV\t"))
        add("one-column", b"\n".join(line.split(b"\t")[0] for line in lines))
        add("text-cells", b"\n".join(lines[:3] + [b"abc\tdef"] + lines[3:]))
        swapped = lines[:]
        swapped[2], swapped[3] = swapped[3], swapped[2]
        add("wavelengths-not-increasing", b"\n".join(swapped))
        add("comments-only", b"# nothing here\n# still nothing\n")
        add("one-row", b"\n".join(lines[:3]) + b"\n")
        add("semicolon-decimal-comma", v.replace(b"\t", b";").replace(b".", b","), must_refuse=False)
    return out


class _Drop:
    pass


_DROP = _Drop()


def _table_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    v = reader.valid
    lines = v.split(b"\n")
    return [
        BadInput(r, "header-only", b"\n".join(lines[:2]) + b"\n"),
        BadInput(r, "comments-only", b"# one\n# two\n"),
        BadInput(r, "ragged-row", b"\n".join(lines[:4] + [b"1,2"] + lines[4:])),
        BadInput(r, "empty-column-name", _replace_once(v, b",absorbance,", b",,")),
        BadInput(r, "repeated-column-name", _replace_once(v, b",absorbance,", b",uncertainty,")),
        BadInput(r, "provenance-json-garbled", b"# provenance-json: {not json\n" + v),
        BadInput(r, "provenance-json-list", b"# provenance-json: [1,2]\n" + v),
    ]


def _bench_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    if reader.suffix == ".json":
        base = json.loads(reader.valid)

        def variant(section, key, value):
            new = json.loads(json.dumps(base))
            if key is None:
                new[section] = value
            else:
                new.setdefault(section, {})[key] = value
            return json.dumps(new, ensure_ascii=False).encode("utf-8")

        return [
            BadInput(r, "unknown-section", variant("lens", None, {"f": 1})),
            BadInput(r, "unknown-field", variant("camera", "zoom", 2)),
            BadInput(r, "section-not-table", variant("camera", None, 5)),
            BadInput(r, "source-number", variant("source", None, 5)),
            BadInput(r, "source-list", variant("source", None, [1, 2])),
            BadInput(r, "source-kind-list", variant("source", None, {"kind": ["lamp"]})),
            BadInput(r, "source-unknown-lamp", variant("source", None, {"kind": "lamp", "name": "unobtainium"})),
            BadInput(r, "width-null", variant("camera", "width_px", None)),
            BadInput(r, "width-string", variant("camera", "width_px", "1280")),
            BadInput(r, "width-bool", variant("camera", "width_px", True)),
            BadInput(r, "width-huge", variant("camera", "width_px", 100_000)),
            BadInput(r, "width-1e300", variant("camera", "width_px", 1e300)),
            BadInput(r, "lines-per-mm-negative", variant("grating", "lines_per_mm", -1000)),
            BadInput(r, "order-zero", variant("grating", "order", 0)),
            BadInput(r, "gamma-list", variant("output", "gamma", [2.2])),
            BadInput(r, "bit-depth-12", variant("output", "bit_depth", 12)),
            BadInput(r, "top-level-list", b"[]"),
            BadInput(r, "deeply-nested", b"[" * 100_000),
        ]
    v = reader.valid
    return [
        BadInput(r, "unknown-section", v + b"\n[lens]\nf = 1\n"),
        BadInput(r, "duplicate-section", v + b"\n[camera]\nwidth_px = 640\n"),
        BadInput(r, "section-not-table", b"camera = 5\n"),
        BadInput(r, "toml-syntax-error", v + b"\n[camera\n"),
        BadInput(r, "huge-integer", b"[camera]\nwidth_px = 99999999999999999999\n"),
        BadInput(r, "nan-value", b"[camera]\nrotation_deg = nan\n"),
        BadInput(r, "inf-value", b"[camera]\nrotation_deg = inf\n"),
        BadInput(r, "string-for-number", b'[camera]\nrotation_deg = "five"\n'),
        BadInput(r, "date-for-number", b"[camera]\nrotation_deg = 1979-05-27\n"),
        BadInput(r, "source-array", b"source = [1, 2]\n"),
        BadInput(r, "deeply-nested-arrays", b"x = " + b"[" * 5000 + b"]" * 5000 + b"\n"),
    ]


def bad_inputs(reader_names: Sequence[str] | None = None) -> list[BadInput]:
    """The catalogue of bad inputs, for every reader (or the named ones).

    Returns
    -------
    list of BadInput
        Each (reader, case) pair is distinct.
    """
    samples = _valid_samples()
    out: list[BadInput] = []
    for reader in readers():
        if reader_names is not None and reader.name not in reader_names:
            continue
        cases = _common_cases(reader, samples)
        if reader.family == "image":
            cases += _image_cases(reader, samples)
        elif reader.family == "video":
            cases += _video_cases(reader, samples)
        if reader.text:
            cases += _text_cases(reader, samples)
        if reader.family == "spectrum":
            cases += _spectrum_cases(reader, samples)
        elif reader.family == "table":
            cases += _table_cases(reader, samples)
        elif reader.family == "bench":
            cases += _bench_cases(reader, samples)
        elif reader.family in _EXTRA_CASES:
            cases += _EXTRA_CASES[reader.family](reader, samples)
        if reader.suffix == ".json":
            cases += _json_schema_cases(reader)
        if reader.name in ("calibration-json", "session-capture"):
            cases += _json_nested_cases(reader)
        seen = set()
        for case in cases:
            if case.case not in seen:
                seen.add(case.case)
                out.append(case)
    return out


def _json_schema_cases(reader: Reader) -> list[BadInput]:
    """Each top-level key of a JSON sample dropped, nulled or given the wrong type; versions changed."""
    try:
        obj = json.loads(reader.valid)
    except ValueError:
        return []
    if not isinstance(obj, dict):
        return []
    r = reader.name
    out: list[BadInput] = []
    optional = {"provenance", "notes", "name", "title", "label", "temperature_k", "smoothing_nm", "min_signal_fraction",
                "software", "wavelength_uncertainty_nm", "saturated", "active", "source_type", "valid_range_nm"}
    # keys with documented defaults: nm; uncalibrated; unknown time; default view
    optional -= {"calibration-json": {"provenance", "notes", "name", "title", "label", "software"}}.get(r, set())
    optional |= {"spectrum-json": {"units", "wavelength_nm"}, "session-manifest": {"created_utc"},
                 "session-screen": {"saved_utc", "view"}}.get(r, set())
    for key, value in obj.items():
        dump = lambda o: json.dumps(o, ensure_ascii=False).encode("utf-8")  # noqa: E731
        if key not in optional and not r.startswith("bench"):
            out.append(BadInput(r, f"schema-key-{key}-missing", dump({k: v for k, v in obj.items() if k != key})))
        for label, wrong in (("null", None), ("string", "x"), ("number", 7), ("list", [1, "a"]), ("object", {"a": [1]}), ("bool", True)):
            if type(wrong) is type(value) or (wrong is None and key in optional):
                continue
            # an object where an object is expected, or a list for a list, is not the wrong type
            out.append(BadInput(r, f"schema-key-{key}-{label}", dump({**obj, key: wrong}),
                                must_refuse=key not in optional and not r.startswith("bench")))
        if key in ("version", "schema_version"):
            for label, wrong in (("99", 99), ("0", 0), ("float", 1.5), ("string", "1")):
                out.append(BadInput(r, f"schema-{key}-{label}", dump({**obj, key: wrong})))
    return out


def _npy_bytes(array: np.ndarray, *, allow_pickle: bool = False) -> bytes:
    import io as _io

    buffer = _io.BytesIO()
    np.save(buffer, array, allow_pickle=allow_pickle)
    return buffer.getvalue()


def _npy_header_claiming(shape: tuple, dtype: str = "<f4") -> bytes:
    header = "{'descr': '%s', 'fortran_order': False, 'shape': %r, }" % (dtype, shape)
    header = header + " " * (118 - len(header)) + "\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode("latin-1") + bytes(256)


def _npy_cases(reader: Reader, samples: dict[str, bytes]) -> list[BadInput]:
    r = reader.name
    v = reader.valid
    return [
        # a pickle inside a .npy: must never be unpickled
        BadInput(r, "object-array-pickle", _npy_bytes(np.array([{"a": 1}, None], dtype=object), allow_pickle=True)),
        BadInput(r, "claims-100000x100000", _npy_header_claiming((100_000, 100_000))),
        BadInput(r, "claims-negative-shape", _npy_header_claiming((-1, 10))),
        BadInput(r, "claims-4-dimensions", _npy_header_claiming((2, 2, 2, 2))),
        BadInput(r, "one-dimensional", _npy_bytes(np.zeros(10, np.float32))),
        BadInput(r, "header-garbled", v.replace(b"'descr'", b"'dexcr'", 1)),
        BadInput(r, "header-code", v.replace(b"'descr': '<f4'", b"'descr': __import__('os').getcwd()", 1)),
        BadInput(r, "bad-magic-version", v[:6] + b"\x09\x00" + v[8:]),
        BadInput(r, "structured-dtype", _npy_bytes(np.zeros((4, 4), dtype=[("a", "<f4"), ("b", "<i4")]))),
        BadInput(r, "header-unclosed", v.replace(b"}", b" ", 1)),
        BadInput(r, "claims-10e30-rows", _npy_header_claiming((10**30, 2))),
        BadInput(r, "claims-float-shape", _npy_header_claiming((1e3, 4.5))),
        BadInput(r, "claims-unknown-dtype", _npy_header_claiming((8, 8), dtype="<q9")),
        BadInput(r, "complex-frame", _npy_bytes(np.zeros((8, 8), np.complex64))),
        BadInput(r, "nan-frame", _npy_bytes(np.full((8, 8), np.nan, np.float32)), must_refuse=False),
    ]


def _json_nested_cases(reader: Reader) -> list[BadInput]:
    """Fields one level down (calibration geometry, solution, matches; capture files) given wrong values."""
    obj = json.loads(reader.valid)
    r = reader.name
    out: list[BadInput] = []
    dump = lambda o: json.dumps(o, ensure_ascii=False).encode("utf-8")  # noqa: E731
    wrong_values = (("null", None), ("string", "x"), ("negative", -1), ("huge", 1e300), ("list", [1]), ("object", {}))
    for top, inner in obj.items():
        if not isinstance(inner, dict):
            continue
        targets = [(top, key) for key in inner]
        if top == "wavelength_calibration" and isinstance(inner.get("solution"), dict):
            targets += [(top, "solution", key) for key in inner["solution"]]
        for path in targets:
            for label, wrong in wrong_values:
                new = json.loads(reader.valid)
                parent = new
                for key in path[:-1]:
                    parent = parent[key]
                original = parent[path[-1]]
                if type(original) is type(wrong) and label not in ("negative", "huge"):
                    continue
                if label in ("negative", "huge") and not isinstance(original, (int, float)):
                    continue
                if label == "huge" and isinstance(original, float):
                    continue  # a large float is odd but not invalid (an RMS, a scale); sizes are ints
                parent[path[-1]] = wrong
                # free text, notes and provenance may hold anything; numbers may be negative where they are offsets
                lenient = bool({"notes", "version", "name", "label", "metadata", "view", "settings", "variable"} & set(path)) or (
                    label in ("negative", "huge") and path[-1] in (
                        "rotation_deg", "centre_x_px", "centre_y_px", "first_column_s_px", "pixel_centre",
                        "rotation_uncertainty_deg", "curvature_rms_px", "n_detected", "evidence_nats")) or (
                    label == "null" and path[-1] == "curvature_rms_px")  # None: curvature unknown
                out.append(BadInput(r, "nested-" + ".".join(path) + f"-{label}", dump(new), must_refuse=not lenient))
    if r == "calibration-json":
        units = json.loads(reader.valid)
        units["units"]["wavelength"] = "um"
        out.append(BadInput(r, "unit-wavelength-um", dump(units)))
        units["units"] = {"wavelength": "nm", "medium": "vacuum", "pixel": "rectified column"}
        out.append(BadInput(r, "unit-medium-vacuum", dump(units)))
        for version in ("benchspec.calibration/2", "benchspec.calibration/0", "benchspec.calibration"):
            changed = json.loads(reader.valid)
            changed["schema"] = version
            out.append(BadInput(r, f"schema-version-{version.replace('/', '-')}", dump(changed)))
    return out


# Catalogue builders of the optional readers (filled in as their modules land).
_EXTRA_CASES: dict[str, Callable[[Reader, dict], list[BadInput]]] = {"npy": _npy_cases}


# --------------------------------------------------------------------------- checking one input


def write_input(folder: Path, reader: Reader, data: bytes, *, sparse_size: int = 0, stem: str = AWKWARD_STEM) -> Path:
    """Write ``data`` as ``<folder>/<AWKWARD_FOLDER>/<stem><suffix>`` and return the path."""
    target = Path(folder) / AWKWARD_FOLDER
    target.mkdir(parents=True, exist_ok=True)
    path = target / f"{stem}{reader.suffix}"
    with open(path, "wb") as handle:
        handle.write(data)
        if sparse_size > len(data):
            handle.truncate(sparse_size)
    return path


def classify(reader: Reader, path: Path) -> Outcome:
    """Read ``path`` with ``reader`` and say what happened (see :class:`Outcome`)."""
    import warnings

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            reader.read(path)
    except BenchspecError as exc:
        message = str(exc)
        if "\n" in message or not message.strip():
            return Outcome("bad-message", message, type(exc).__name__, "message is not one line")
        if path.name not in message and path.stem not in message and str(path) not in message:
            return Outcome("bad-message", message, type(exc).__name__, "message does not name the file")
        return Outcome("refused", message, type(exc).__name__)
    except Exception as exc:  # noqa: BLE001 - anything else is a crash, which is what we look for
        return Outcome("crash", f"{type(exc).__name__}: {exc}"[:500], type(exc).__name__, traceback.format_exc())
    return Outcome("accepted")


def check_input(folder: Path, case: BadInput) -> Outcome:
    """Write one catalogued input under an awkward path in ``folder`` and classify the outcome."""
    reader = _reader_by_name(case.reader)
    path = write_input(folder, reader, case.data, sparse_size=case.sparse_size)
    try:
        return classify(reader, path)
    finally:
        path.unlink(missing_ok=True)


def _reader_by_name(name: str) -> Reader:
    for reader in readers():
        if reader.name == name:
            return reader
    raise KeyError(f"no reader named {name!r}")


# --------------------------------------------------------------------------- mutations (hypothesis)


_NUMBER_TOKEN = re.compile(rb"[-+]?\d+\.?\d*(?:[eE][-+]?\d+)?")
_NASTY_NUMBERS = (b"nan", b"inf", b"-inf", b"1e999", b"-0", b"0", b"-1", b"1e308", b"4294967296", b"1" * 400, b"0x1f", b"1,5", b"")


def _apply(data: bytes, op: tuple, rng: random.Random) -> bytes:
    kind = op[0]
    n = len(data)
    if kind == "flip" and n:
        at = rng.randrange(n)
        return data[:at] + bytes([data[at] ^ (1 << rng.randrange(8))]) + data[at + 1:]
    if kind == "byte" and n:
        at = rng.randrange(n)
        return data[:at] + bytes([op[1]]) + data[at + 1:]
    if kind == "insert":
        at = rng.randrange(n + 1)
        return data[:at] + op[1] + data[at:]
    if kind == "delete" and n:
        at = rng.randrange(n)
        return data[:at] + data[at + rng.randrange(1, 64):]
    if kind == "cut" and n:
        return data[: rng.randrange(n)]
    if kind == "duplicate" and n:
        at = rng.randrange(n)
        chunk = data[at:at + rng.randrange(1, 256)]
        return data[:at] + chunk * rng.randrange(2, 6) + data[at:]
    if kind == "number":
        matches = list(_NUMBER_TOKEN.finditer(data))
        if matches:
            m = matches[rng.randrange(len(matches))]
            return data[:m.start()] + op[1] + data[m.end():]
        return data
    if kind == "splice":
        other = op[1]
        if other:
            cut_a = rng.randrange(n + 1)
            cut_b = rng.randrange(len(other) + 1)
            return data[:cut_a] + other[cut_b:]
        return data
    if kind == "line" and n:
        lines = data.split(b"\n")
        i = rng.randrange(len(lines))
        j = rng.randrange(len(lines))
        action = op[1]
        if action == "drop":
            del lines[i]
        elif action == "swap":
            lines[i], lines[j] = lines[j], lines[i]
        else:
            lines.insert(i, lines[j])
        return b"\n".join(lines)
    return data


def mutations(reader: Reader):
    """A hypothesis strategy of (bytes, description) mutated from the reader's valid sample and catalogue."""
    from hypothesis import strategies as st

    seeds = [reader.valid] + [case.data for case in bad_inputs([reader.name]) if not case.sparse_size][:12]
    foreign = list(_valid_samples().values())
    op = st.one_of(
        st.tuples(st.just("flip")),
        st.tuples(st.just("byte"), st.integers(0, 255)),
        st.tuples(st.just("insert"), st.sampled_from([b"\x00", b"\xff", b"\n", b",", b"#", b"##", b"\"", b"[", b"{", b"=", b"\xc3", b"nan", b"-", b"e"])),
        st.tuples(st.just("delete")),
        st.tuples(st.just("cut")),
        st.tuples(st.just("duplicate")),
        st.tuples(st.just("number"), st.sampled_from(_NASTY_NUMBERS)),
        st.tuples(st.just("splice"), st.sampled_from(foreign)),
        st.tuples(st.just("line"), st.sampled_from(["drop", "swap", "repeat"])),
    )

    @st.composite
    def build(draw):
        seed_index = draw(st.integers(0, len(seeds) - 1))
        ops = draw(st.lists(op, min_size=1, max_size=6))
        rng_seed = draw(st.integers(0, 2**32 - 1))
        rng = random.Random(rng_seed)
        data = seeds[seed_index]
        for item in ops:
            data = _apply(data, item, rng)
            if len(data) > 4 * 2**20:
                data = data[: 4 * 2**20]
        return data, f"seed {seed_index}, ops {[o[0] for o in ops]}, rng {rng_seed}"

    return build()


# --------------------------------------------------------------------------- the long run


def run(*, minutes: float, seed: int | None = None, reader_names: Sequence[str] | None = None,
        out_dir: Path = Path("fuzz-crashes"), batch: int = 200, log=print) -> dict:
    """Fuzz the readers for ``minutes``; return counts per reader and save crashing inputs.

    Returns
    -------
    dict
        ``{"inputs": n, "crashes": n, "bad_messages": n, "per_reader": {...}, "seconds": s}``.
    """
    try:
        from hypothesis import HealthCheck, given, settings
        from hypothesis import seed as fixed_seed
    except ImportError:  # pragma: no cover - depends on the environment
        raise BenchspecError('the fuzzing run needs hypothesis: pip install -e ".[test]"') from None
    chosen = [r for r in readers() if reader_names is None or r.name in reader_names]
    if not chosen:
        raise BenchspecError(f"no reader named {', '.join(reader_names or [])}; `python -m benchspec.fuzz --list` shows them")
    deadline = time.monotonic() + 60.0 * minutes
    totals = {"inputs": 0, "crashes": 0, "bad_messages": 0, "per_reader": {r.name: {"inputs": 0, "crashes": 0, "bad_messages": 0} for r in chosen}}
    master = random.Random(seed)
    started = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="benchspec-fuzz-") as scratch:
        folder = Path(scratch)
        round_number = 0
        while time.monotonic() < deadline:
            reader = chosen[round_number % len(chosen)]
            round_number += 1
            stats = totals["per_reader"][reader.name]

            @fixed_seed(master.getrandbits(64))  # --seed makes the whole run repeatable
            @settings(max_examples=batch, deadline=None, database=None, derandomize=False,
                      suppress_health_check=list(HealthCheck))
            @given(mutations(reader))
            def one(sample):
                if time.monotonic() > deadline:
                    return
                data, description = sample
                path = write_input(folder, reader, data)
                outcome = classify(reader, path)
                stats["inputs"] += 1
                totals["inputs"] += 1
                if outcome.kind in ("crash", "bad-message"):
                    key = "crashes" if outcome.kind == "crash" else "bad_messages"
                    stats[key] += 1
                    totals[key] += 1
                    _save_crash(out_dir, reader, data, outcome, description)
                    log(f"{reader.name}: {outcome.kind}: {outcome.message[:200]}")

            one()
    totals["seconds"] = round(time.monotonic() - started, 1)
    return totals


def _save_crash(out_dir: Path, reader: Reader, data: bytes, outcome: Outcome, description: str) -> None:
    out_dir.mkdir(parents=True, exist_ok=True)
    digest = zlib.crc32(data) & 0xFFFFFFFF
    stem = out_dir / f"{reader.name}-{outcome.kind}-{digest:08x}"
    (stem.with_suffix(reader.suffix)).write_bytes(data)
    stem.with_suffix(".txt").write_text(f"{description}\n{outcome.message}\n{outcome.traceback}\n", encoding="utf-8")


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchspec.fuzz", description="Fuzz benchspec's file readers with hypothesis.")
    parser.add_argument("--minutes", type=float, default=1.0, help="how long to run (default 1)")
    parser.add_argument("--seed", type=int, default=None, help="seed for a repeatable run (default: random)")
    parser.add_argument("--reader", action="append", help="only this reader (repeatable); see --list")
    parser.add_argument("--out-dir", type=Path, default=Path("fuzz-crashes"), help="where crashing inputs are saved")
    parser.add_argument("--list", action="store_true", help="list the readers and count the catalogue of bad inputs, then exit")
    parser.add_argument("--check-catalogue", action="store_true", help="run the catalogue of bad inputs once and report")
    args = parser.parse_args(argv)
    if args.list or args.check_catalogue:
        cases = bad_inputs(args.reader)
        by_reader: dict[str, int] = {}
        for case in cases:
            by_reader[case.reader] = by_reader.get(case.reader, 0) + 1
        for name, count in by_reader.items():
            print(f"{name:16s} {count:4d} bad inputs")
        print(f"{'total':16s} {len(cases):4d} distinct bad inputs")
        if args.check_catalogue:
            bad = 0
            with tempfile.TemporaryDirectory(prefix="benchspec-fuzz-") as scratch:
                for case in cases:
                    outcome = check_input(Path(scratch), case)
                    if not outcome.ok or (case.must_refuse and outcome.kind != "refused"):
                        bad += 1
                        print(f"{case.id}: {outcome.kind} {outcome.message[:200]}")
            print(f"{bad} of {len(cases)} inputs misbehaved")
            return 1 if bad else 0
        return 0
    try:
        totals = run(minutes=args.minutes, seed=args.seed, reader_names=args.reader, out_dir=args.out_dir)
    except BenchspecError as exc:
        print(f"benchspec.fuzz: error: {exc}", file=sys.stderr)
        return 2
    for name, stats in totals["per_reader"].items():
        print(f"{name:16s} {stats['inputs']:7d} inputs  {stats['crashes']:3d} crashes  {stats['bad_messages']:3d} bad messages")
    print(f"total: {totals['inputs']} inputs in {totals['seconds']} s, {totals['crashes']} crashes, "
          f"{totals['bad_messages']} bad messages" + (f"; inputs saved in {args.out_dir}" if totals["crashes"] + totals["bad_messages"] else ""))
    return 1 if totals["crashes"] or totals["bad_messages"] else 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
