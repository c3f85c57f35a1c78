"""Spectrum exports and imports, with provenance, written atomically.

This is an edge module: it is where spectra meet files. Every writer goes
through :func:`atomic_output` (a temporary file in the destination folder,
flushed and synced, then renamed over the destination with ``os.replace``),
so a full disk, a read-only folder or a crash never leaves a half-written
file, and an existing file is never replaced unless ``force=True`` (the
command line's ``--force``).

Formats, chosen by the extension of the destination
---------------------------------------------------
``.csv``
    ``#`` comment lines (human-readable provenance summary, then one
    ``# provenance-json: {...}`` line holding the full provenance as compact
    ASCII JSON, and ``# schema: benchspec.spectrum/1``), then a header row,
    then one row per sample.

    * Calibrated spectrum: ``wavelength_nm,intensity,uncertainty,saturated,pixel``
      (plus ``wavelength_uncertainty_nm`` when the solution has one), rows in
      increasing wavelength.
    * Uncalibrated spectrum: ``pixel,intensity,uncertainty,saturated``; ``pixel``
      is the column index along the dispersion axis of the rectified band
      (0 = first column of the rectified image), rows in the spectrum's order.

    An absorbance, transmittance or reflectance spectrum (``provenance["quantity"]``)
    names its value column after the quantity instead of ``intensity``.
    ``saturated`` is ``0`` or ``1``. Floats are written with Python's shortest
    round-trip representation, so a file read back gives the same numbers
    bit for bit.
``.json``
    One object: ``schema`` (``"benchspec.spectrum"``), ``schema_version`` (1),
    ``units`` (``{"wavelength": "nm", "pixel": "px", "intensity": ...}``),
    ``wavelength_nm`` (array or ``null``), ``wavelength_uncertainty_nm``
    (array or ``null``), ``pixel``, ``intensity``, ``uncertainty``,
    ``saturated`` (array of booleans) and ``provenance`` (object). Exact
    round trip.
``.jdx`` / ``.dx``
    JCAMP-DX 5.01 (IUPAC), ``##DATA TYPE=UV/VIS SPECTRUM``,
    ``##XUNITS=NANOMETERS``, ``##YUNITS=`` from the quantity (``ARBITRARY
    UNITS`` for detector counts and relative intensity, ``ABSORBANCE``,
    ``TRANSMITTANCE``). Evenly spaced axes are written as
    ``##XYDATA=(X++(Y..Y))``, others (a webcam's polynomial solution) as
    ``##XYPOINTS=(XY..XY)``, both in AFFN with full precision, XFACTOR and
    YFACTOR 1. Uncalibrated spectra cannot be written as JCAMP-DX (the
    standard needs a physical x axis). The provenance is in ``$$`` comment
    lines (human-readable) and in user-defined labels
    ``##$BENCHSPEC PROVENANCE n=`` (the JSON, split into chunks); the
    uncertainty, saturation flags and pixel positions are in
    ``##$BENCHSPEC UNCERTAINTY=(Y..Y)``, ``##$BENCHSPEC SATURATED=(Y..Y)``
    and ``##$BENCHSPEC PIXEL=(Y..Y)``, which other readers ignore.
``.png`` / ``.svg`` / ``.pdf``
    A plot (see :mod:`benchspec.plots`), with the provenance in the file's
    metadata. Plots are not read back.

:func:`read_spectrum` reads the three data formats above, plus plain text
spectra from other instruments: two (or more) columns separated by
whitespace, commas, semicolons or tabs, an optional header row, decimal
points (a decimal comma is accepted when the separator is not a comma), x in
nm (or Angstrom / micrometre, converted and recorded in the provenance).

Provenance keys (see :func:`build_provenance`)
----------------------------------------------
``schema``            ``"benchspec.provenance/1"``
``software``          ``{"name": "benchspec", "version": ..., "python": ...}``
``created_utc``       ISO 8601 time of writing, e.g. ``"2026-12-01T19:30:00Z"``
``quantity``          ``"intensity"``, ``"absorbance"``, ``"transmittance"``, ...
``intensity_unit``    ``"counts"``, ``"relative"``, ``"absorbance"``, ...
``frames``            list of ``{"path", "sha256", "role"}`` (role: ``signal``, ``dark``, ``reference``, ...)
``calibration``       ``null`` or ``{"path", "sha256", "lamp", "rms_nm", "rms_px",
                      "line_list_source", "polynomial_order", "verdict"}`` (more keys allowed)
``response``          ``{"applied": false}`` or ``{"applied": true, "method", "reference", "path", "sha256", ...}``
``settings``          the settings used (gamma, stacking, channel weights, aperture, ...)
``source_type``       ``null`` or one of :data:`benchspec.safety.SOURCE_TYPES`
``imported_from``     for imported spectra: ``{"path", "sha256", "format"}``
``notes``             free text, or ``null``
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import hashlib
import io as _io
import json
import math
import os
import platform
import re
import secrets
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

import numpy as np

from . import __version__
from .errors import ExportError, FileFormatError, InputError
from .spectrum import Spectrum

__all__ = [
    "SPECTRUM_SCHEMA",
    "SPECTRUM_SCHEMA_VERSION",
    "PROVENANCE_SCHEMA",
    "DATA_EXTENSIONS",
    "PLOT_EXTENSIONS",
    "SPECTRUM_EXTENSIONS",
    "MAX_TEXT_FILE_BYTES",
    "SERIES_VALUE_DIGITS",
    "SeriesWriter",
    "Table",
    "atomic_output",
    "atomic_write_bytes",
    "atomic_write_text",
    "build_provenance",
    "hash_file",
    "jsonable",
    "read_spectrum",
    "read_table",
    "read_json_file",
    "spectrum_from_dict",
    "spectrum_to_dict",
    "write_json_file",
    "write_spectrum",
    "write_table",
]

SPECTRUM_SCHEMA = "benchspec.spectrum"
SPECTRUM_SCHEMA_VERSION = 1
PROVENANCE_SCHEMA = "benchspec.provenance/1"
DATA_EXTENSIONS = (".csv", ".json", ".jdx", ".dx")
PLOT_EXTENSIONS = (".png", ".svg", ".pdf")
SPECTRUM_EXTENSIONS = DATA_EXTENSIONS + PLOT_EXTENSIONS
#: Text spectra larger than this are refused before reading (a 10^6-sample CSV is ~60 MB).
MAX_TEXT_FILE_BYTES = 256 * 1024 * 1024

_JCAMP_YUNITS = {
    "absorbance": "ABSORBANCE",
    "transmittance": "TRANSMITTANCE",
    "reflectance": "REFLECTANCE",
}
# Quantities whose CSV value column is named after them instead of "intensity".
_NAMED_QUANTITIES = ("absorbance", "transmittance", "reflectance")
# Column names of quantities other than "intensity" that a spectrum table may carry.
_VALUE_COLUMNS = ("intensity", "absorbance", "transmittance", "reflectance", "irradiance", "relative_irradiance", "counts", "signal")


# --------------------------------------------------------------------------- atomic writes


def _describe_os_error(exc: OSError) -> str:
    code = getattr(exc, "errno", None)
    if code == errno.ENOSPC:
        return "the disk is full (no space left on device); free some space or write to another drive"
    if code == getattr(errno, "EDQUOT", -1):
        return "the disk quota is exceeded; free some space or write to another drive"
    if code == errno.EROFS:
        return "the folder is on a read-only file system; write to another folder"
    if code in (errno.EACCES, errno.EPERM) or isinstance(exc, PermissionError):
        return "permission denied (the folder is read-only for you); write to another folder"
    if code == errno.ENAMETOOLONG:
        return "the file name is too long; choose a shorter name"
    if code == errno.ENOENT:
        return "the folder does not exist; create it first or choose another"
    return (exc.strerror or str(exc) or type(exc).__name__).rstrip(".") + "; check the destination"


def _sync_folder(folder: Path) -> None:
    """Flush the folder entry of a rename to disk (POSIX); best effort elsewhere."""
    if not hasattr(os, "O_DIRECTORY"):
        return
    try:
        fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_output(path, *, force: bool = False, binary: bool = False, sync: bool = True) -> Iterator[Any]:
    """Open a temporary file beside ``path``; on success rename it to ``path``.

    Parameters
    ----------
    path : str or Path
        Final destination.
    force : bool
        Replace an existing file. Without it an existing ``path`` raises
        :class:`ExportError` before anything is written.
    binary : bool
        Yield a binary file object instead of a UTF-8 text one.
    sync : bool
        Flush the file to disk before the rename and the folder after it
        (``os.fsync``; default). False: still written under a temporary
        name and renamed, so the file is never seen half-written, but left
        to the OS to flush; a caller writing many files flushes them once at
        the end (see :class:`SeriesWriter`).

    Yields
    ------
    file object
        Write the whole content to it. If the block raises, or the disk
        fills, the temporary file is removed and ``path`` is untouched.

    Raises
    ------
    ExportError
        The destination exists (without ``force``), its folder is missing or
        read-only, or the disk is full.
    """
    path = Path(path)
    if path.is_dir():
        raise ExportError(f"{path} is a folder; give a file name to write")
    if not force and (path.exists() or path.is_symlink()):
        raise ExportError(f"{path} already exists; pass --force to overwrite it, or choose another name")
    folder = path.parent
    if not folder.is_dir():
        raise ExportError(f"cannot write {path}: folder {folder} does not exist; create it first or choose another")
    temp = folder / f".{path.name}.{secrets.token_hex(4)}.tmp"
    fd = None
    try:
        # O_EXCL: the temporary name is ours alone; 0o666 lets the umask decide permissions.
        fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
        handle = os.fdopen(fd, "wb")
        fd = None
        with handle:
            if binary:
                yield handle
            else:
                text = _io.TextIOWrapper(handle, encoding="utf-8", newline="\n")
                try:
                    yield text
                    text.flush()
                finally:
                    text.detach()
            handle.flush()
            if sync:
                os.fsync(handle.fileno())
        if not force and path.exists():  # appeared while we were writing
            raise ExportError(f"{path} was created by someone else while writing; pass --force to overwrite it, or choose another name")
        os.replace(temp, path)
        if sync:
            _sync_folder(folder)
    except OSError as exc:
        raise ExportError(f"could not write {path}: {_describe_os_error(exc)}; nothing was written") from exc
    finally:
        if fd is not None:
            with contextlib.suppress(OSError):
                os.close(fd)
        with contextlib.suppress(OSError):
            if os.path.lexists(temp):
                os.unlink(temp)


def atomic_write_bytes(path, data: bytes, *, force: bool = False, sync: bool = True) -> Path:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_output`); return the path."""
    with atomic_output(path, force=force, binary=True, sync=sync) as handle:
        handle.write(data)
    return Path(path)


def atomic_write_text(path, text: str, *, force: bool = False, sync: bool = True) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically (see :func:`atomic_output`); return the path."""
    return atomic_write_bytes(path, text.encode("utf-8"), force=force, sync=sync)


# --------------------------------------------------------------------------- provenance


def jsonable(value: Any, *, name: str = "value") -> Any:
    """``value`` converted to plain JSON types (numpy scalars and arrays, paths, tuples).

    Raises :class:`InputError` for anything JSON cannot hold (objects, NaN, inf).
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        number = float(value)
        if not math.isfinite(number):
            raise InputError(f"`{name}` holds a non-finite number ({number}); JSON cannot store it, use null")
        return number
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, np.ndarray):
        return [jsonable(item, name=name) for item in value.tolist()]
    if isinstance(value, Mapping):
        out = {}
        for key, item in value.items():
            if not isinstance(key, str):
                raise InputError(f"`{name}` has a non-string key {key!r}; JSON object keys must be strings")
            out[key] = jsonable(item, name=f"{name}.{key}")
        return out
    if isinstance(value, (list, tuple)):
        return [jsonable(item, name=name) for item in value]
    if hasattr(value, "to_dict") and callable(value.to_dict):
        return jsonable(value.to_dict(), name=name)
    raise InputError(f"`{name}` holds a {type(value).__name__}, which is not JSON-serialisable; pass plain numbers, strings, lists or dicts")


def hash_file(path, *, algorithm: str = "sha256") -> str:
    """Hex digest of a file's bytes (SHA-256 by default)."""
    digest = hashlib.new(algorithm)
    if Path(path).exists() and not Path(path).is_file():  # a pipe would block, a device never end
        raise FileFormatError(f"cannot hash {path}: it is not a regular file (a pipe, socket or device)")
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
    except OSError as exc:
        raise FileFormatError(f"cannot read {path} to hash it: {exc.strerror or exc}") from None
    return digest.hexdigest()


def _utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _frame_record(item, role: str) -> dict:
    if isinstance(item, Mapping):
        record = jsonable(item, name="frames")
        record.setdefault("role", role)
        if "sha256" not in record and record.get("path") and Path(record["path"]).is_file():
            record["sha256"] = hash_file(record["path"])
        record.setdefault("sha256", None)
        return record
    path = Path(item)
    return {"path": str(path), "sha256": hash_file(path), "role": role}


def _find_key(obj: Any, names: Sequence[str]) -> Any:
    """First value under any of ``names`` in a nested JSON structure (breadth first)."""
    queue = [obj]
    while queue:
        current = queue.pop(0)
        if isinstance(current, Mapping):
            for name in names:
                value = current.get(name)
                if value is None or isinstance(value, Mapping):
                    continue
                if isinstance(value, list):
                    if value and all(isinstance(v, (str, int, float)) for v in value):
                        return "; ".join(str(v) for v in value)
                    continue
                return value
            queue.extend(v for v in current.values() if isinstance(v, (Mapping, list)))
        elif isinstance(current, list):
            queue.extend(v for v in current if isinstance(v, (Mapping, list)))
    return None


_CALIBRATION_KEYS = {
    "lamp": ("lamp", "lamp_name", "lamps"),
    "rms_nm": ("rms_nm",),
    "rms_px": ("rms_px", "rms_pixels"),
    "line_list_source": ("line_list_source", "line_list_sources", "source_of_line_list", "lines_source"),
    "polynomial_order": ("polynomial_order", "order"),
    "verdict": ("verdict", "quality"),
}


def _calibration_record(calibration) -> dict | None:
    if calibration is None:
        return None
    if isinstance(calibration, (str, os.PathLike)):
        path = Path(calibration)
        content = read_json_file(path, what="calibration file")
        record = {"path": str(path), "sha256": hash_file(path)}
        for key, names in _CALIBRATION_KEYS.items():
            record[key] = jsonable(_find_key(content, names), name=f"calibration.{key}")
        return record
    if hasattr(calibration, "to_dict") and not isinstance(calibration, Mapping):
        calibration = calibration.to_dict()
    if not isinstance(calibration, Mapping):
        raise InputError(f"`calibration` must be a path, a mapping or None, got {type(calibration).__name__}")
    record = jsonable(calibration, name="calibration")
    flat = {key: record[key] for key in record if not isinstance(record[key], (dict, list))}
    out = {"path": record.get("path"), "sha256": record.get("sha256")}
    if out["sha256"] is None and out["path"] and Path(out["path"]).is_file():
        out["sha256"] = hash_file(out["path"])
    for key, names in _CALIBRATION_KEYS.items():
        out[key] = flat.get(key, _find_key(record, names))
    for key, value in record.items():
        out.setdefault(key, value)
    return out


def _response_record(response) -> dict:
    if response is None or response is False:
        return {"applied": False}
    if isinstance(response, (str, os.PathLike)):
        path = Path(response)
        return {"applied": True, "path": str(path), "sha256": hash_file(path) if path.is_file() else None}
    if not isinstance(response, Mapping):
        raise InputError(f"`response` must be a path, a mapping or None, got {type(response).__name__}")
    record = {"applied": True}
    record.update(jsonable(response, name="response"))
    if record.get("path") and "sha256" not in record and Path(record["path"]).is_file():
        record["sha256"] = hash_file(record["path"])
    return record


def build_provenance(
    *,
    frames: Iterable = (),
    dark_frames: Iterable = (),
    reference_frames: Iterable = (),
    calibration=None,
    response=None,
    settings: Mapping[str, Any] | None = None,
    quantity: str = "intensity",
    intensity_unit: str = "counts",
    source_type: str | None = None,
    notes: str | None = None,
    extra: Mapping[str, Any] | None = None,
    created_utc: str | None = None,
) -> dict:
    """The provenance record every export carries, with consistent keys.

    Parameters
    ----------
    frames, dark_frames, reference_frames : iterable of path or mapping
        Frames used. Paths are hashed (SHA-256) now; mappings (e.g. frames
        from a camera, never saved as files) are kept as given and must hold
        at least ``path`` or a description, and ``sha256`` of the pixel data
        where known. The role is ``signal``, ``dark`` or ``reference``.
    calibration : path, mapping or None
        The calibration file (hashed; its RMS, lamp and line-list source are
        looked up inside), or a mapping with the keys listed in the module
        docstring. Extra keys are kept.
    response : path, mapping or None
        The response correction applied; None records that none was.
    settings : mapping, optional
        Every setting that changes the numbers (gamma, stacking, channel
        weights, aperture, ...). JSON values only.
    quantity, intensity_unit : str
        What the ordinate is and its unit (``"counts"``, ``"relative"``,
        ``"absorbance"``...).
    source_type : str, optional
        One of :data:`benchspec.safety.SOURCE_TYPES` (for the report's cautions).
    notes : str, optional
        Free text (the operator's note).
    extra : mapping, optional
        More keys, added at the top level (they may not replace the standard ones).
    created_utc : str, optional
        ISO 8601 time; defaults to now.

    Returns
    -------
    dict
        JSON-serialisable; keys as documented in :mod:`benchspec.io`.
    """
    if source_type is not None:
        from .safety import SOURCE_TYPES

        if source_type not in SOURCE_TYPES:
            raise InputError(f"unknown source type {source_type!r}; choose one of: {', '.join(SOURCE_TYPES)}")
    record = {
        "schema": PROVENANCE_SCHEMA,
        "software": {"name": "benchspec", "version": __version__, "python": platform.python_version()},
        "created_utc": created_utc or _utc_now(),
        "quantity": str(quantity),
        "intensity_unit": str(intensity_unit),
        "frames": [_frame_record(f, "signal") for f in frames]
        + [_frame_record(f, "dark") for f in dark_frames]
        + [_frame_record(f, "reference") for f in reference_frames],
        "calibration": _calibration_record(calibration),
        "response": _response_record(response),
        "settings": jsonable(dict(settings or {}), name="settings"),
        "source_type": source_type,
        "notes": notes,
    }
    for key, value in (extra or {}).items():
        if key in record:
            raise InputError(f"`extra` key {key!r} would replace a standard provenance key; use another name")
        record[key] = jsonable(value, name=f"extra.{key}")
    return record


# --------------------------------------------------------------------------- reading helpers


def _read_bytes(path: Path, what: str) -> bytes:
    try:
        if path.is_dir():
            raise FileFormatError(f"{path} is a folder, not a {what}")
        if path.exists() and not path.is_file():  # a pipe or a device would block or never end
            raise FileFormatError(f"{path} is not a regular file (a pipe, socket or device), not a {what}")
        size = path.stat().st_size
        if size > MAX_TEXT_FILE_BYTES:
            raise FileFormatError(f"{path} is {size / 2**20:.0f} MB, above the {MAX_TEXT_FILE_BYTES // 2**20} MB limit for a {what}")
        with open(path, "rb") as handle:
            data = handle.read(MAX_TEXT_FILE_BYTES + 1)
    except FileNotFoundError:
        raise FileFormatError(f"{path} does not exist; check the name and folder") from None
    except OSError as exc:
        raise FileFormatError(f"cannot read {path}: {exc.strerror or exc}") from None
    if not data.strip():
        raise FileFormatError(f"{path} is empty; it holds no {what}")
    return data


def _decode_text(path: Path, data: bytes, what: str) -> str:
    if b"\x00" in data[:4096]:
        raise FileFormatError(f"{path} is a binary file, not a {what} (wrong file type behind the extension?)")
    if data[:8] == b"\x89PNG\r\n\x1a\n" or data[:3] == b"\xff\xd8\xff" or data[:4] == b"%PDF":
        raise FileFormatError(f"{path} is an image or PDF, not a {what} (wrong file type behind the extension?)")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise FileFormatError(
            f"{path} is not UTF-8 text (byte 0x{data[exc.start]:02x} at offset {exc.start}); save it as UTF-8"
        ) from None
    return text.replace("\r\n", "\n").replace("\r", "\n")


def _reject_constant(name: str):
    raise ValueError(f"non-finite number {name}")


def _bounded_int(text: str) -> int:
    if len(text.lstrip("-")) > 300:  # beyond any float: 1e300 written out in digits is already absurd for a file
        raise ValueError(f"number {text[:20]}... with {len(text)} digits, too large")
    return int(text)


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):  # 1e999 parses to inf without passing through parse_constant
        raise ValueError(f"number {text[:20]} too large to be finite")
    return value


def read_json_file(path, *, what: str = "JSON file") -> Any:
    """Parse a UTF-8 JSON file strictly (no NaN/Infinity); errors name the file and the place."""
    path = Path(path)
    text = _decode_text(path, _read_bytes(path, what), what)
    try:
        return json.loads(text, parse_constant=_reject_constant, parse_float=_finite_float, parse_int=_bounded_int)
    except json.JSONDecodeError as exc:
        hint = " (truncated?)" if exc.pos >= len(text.rstrip()) - 1 else ""
        raise FileFormatError(f"{path} is not valid JSON{hint}: {exc.msg} at line {exc.lineno} column {exc.colno}") from None
    except ValueError as exc:
        raise FileFormatError(f"{path} holds a {exc}; a {what} may only hold finite numbers") from None
    except RecursionError:
        raise FileFormatError(f"{path} is nested too deeply to be a {what}") from None


def write_json_file(path, obj: Any, *, force: bool = False, indent: int | None = 1) -> Path:
    """Write ``obj`` (made JSON-safe with :func:`jsonable`) atomically as UTF-8 JSON."""
    text = json.dumps(jsonable(obj), indent=indent, ensure_ascii=False, allow_nan=False) + "\n"
    return atomic_write_text(path, text, force=force)


def _finite_array(values, *, path: Path, name: str) -> np.ndarray:
    # JSON numbers only: numpy would also turn "1" and true into 1.0
    numeric_array = isinstance(values, np.ndarray) and values.dtype.kind in "fiu"
    if not numeric_array and (not isinstance(values, (list, tuple)) or not all(type(v) in (int, float) for v in values)):
        raise FileFormatError(f"{path}: `{name}` must be a list of numbers")
    try:
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise FileFormatError(f"{path}: `{name}` must be a list of numbers") from None
    if array.ndim != 1:
        raise FileFormatError(f"{path}: `{name}` must be a flat list of numbers, got shape {array.shape}")
    bad = np.flatnonzero(~np.isfinite(array))
    if bad.size:
        raise FileFormatError(f"{path}: `{name}` has {bad.size} non-finite value(s) (first at sample {bad[0]}); only finite numbers are allowed")
    return array


def _check_increasing(wavelength: np.ndarray, *, path: Path, where: str = "sample") -> None:
    steps = np.diff(wavelength)
    bad = np.flatnonzero(steps <= 0)
    if bad.size:
        i = int(bad[0])
        raise FileFormatError(
            f"{path}: wavelengths are not strictly increasing at {where} {i + 1} "
            f"({float(wavelength[i + 1]):g} nm after {float(wavelength[i]):g} nm); sort the rows and drop repeats"
        )


def _build_spectrum(path: Path, *, wavelength, intensity, uncertainty, pixel, saturated, wavelength_uncertainty, provenance) -> Spectrum:
    n = intensity.size
    if n < 2:
        raise FileFormatError(f"{path} holds {n} sample(s); a spectrum needs at least 2")
    for name, array in (("wavelength_nm", wavelength), ("uncertainty", uncertainty), ("pixel", pixel), ("wavelength_uncertainty_nm", wavelength_uncertainty)):
        if array is not None and array.size != n:
            raise FileFormatError(f"{path}: `{name}` has {array.size} values but `intensity` has {n} (truncated?)")
    if saturated is not None and saturated.size != n:
        raise FileFormatError(f"{path}: `saturated` has {saturated.size} values but `intensity` has {n} (truncated?)")
    if wavelength is not None:
        _check_increasing(wavelength, path=path)
    if uncertainty is not None and np.any(uncertainty < 0):
        raise FileFormatError(f"{path}: `uncertainty` has negative values; uncertainties are 1-sigma and must be >= 0")
    if uncertainty is None:
        values = intensity
        noise = 1.4826 * np.median(np.abs(np.diff(values) - np.median(np.diff(values)))) / np.sqrt(2) if n > 2 else 0.0
        floor = max(1e-12, 1e-3 * float(np.max(np.abs(values))))
        uncertainty = np.full(n, noise if noise > 0 else floor)
    try:
        return Spectrum(
            intensity=intensity,
            uncertainty=uncertainty,
            pixel=pixel if pixel is not None else np.arange(n, dtype=np.float64),
            wavelength_nm=wavelength,
            wavelength_uncertainty_nm=wavelength_uncertainty,
            saturated=saturated,
            provenance=provenance,
        )
    except InputError as exc:
        raise FileFormatError(f"{path}: {exc}") from None


# --------------------------------------------------------------------------- dict form (JSON, sessions)


def spectrum_to_dict(spectrum: Spectrum) -> dict:
    """The JSON object of a spectrum (schema ``benchspec.spectrum`` version 1)."""
    _check_writable(spectrum)
    provenance = jsonable(spectrum.provenance, name="provenance")

    def floats(array):
        return None if array is None else [float(v) for v in array]

    return {
        "schema": SPECTRUM_SCHEMA,
        "schema_version": SPECTRUM_SCHEMA_VERSION,
        "units": {"wavelength": "nm", "pixel": "px", "intensity": provenance.get("intensity_unit", "counts")},
        "wavelength_nm": floats(spectrum.wavelength_nm),
        "wavelength_uncertainty_nm": floats(spectrum.wavelength_uncertainty_nm),
        "pixel": floats(spectrum.pixel),
        "intensity": floats(spectrum.intensity),
        "uncertainty": floats(spectrum.uncertainty),
        "saturated": [bool(v) for v in spectrum.saturated],
        "provenance": provenance,
    }


def spectrum_from_dict(obj: Any, *, source="spectrum") -> Spectrum:
    """Validate a spectrum JSON object (see :func:`spectrum_to_dict`) and build the :class:`Spectrum`.

    ``source`` names the file in error messages.
    """
    path = Path(source) if not isinstance(source, Path) else source
    if not isinstance(obj, Mapping):
        raise FileFormatError(f"{path}: a spectrum must be a JSON object, got {type(obj).__name__}")
    if obj.get("schema") != SPECTRUM_SCHEMA:
        raise FileFormatError(f"{path}: not a benchspec spectrum (schema is {obj.get('schema')!r}, expected {SPECTRUM_SCHEMA!r})")
    version = obj.get("schema_version")
    if version != SPECTRUM_SCHEMA_VERSION or isinstance(version, bool):
        raise FileFormatError(
            f"{path}: spectrum schema version {version!r} is not supported (this benchspec reads version {SPECTRUM_SCHEMA_VERSION}); "
            "upgrade benchspec or re-export the file"
        )
    units = obj.get("units", {})
    if not isinstance(units, Mapping):
        raise FileFormatError(f"{path}: `units` must be an object")
    if units.get("wavelength", "nm") != "nm":
        raise FileFormatError(f"{path}: wavelength unit is {units.get('wavelength')!r}; benchspec spectra are in nm")
    for key in ("intensity", "uncertainty", "pixel"):
        if key not in obj:
            raise FileFormatError(f"{path}: the key `{key}` is missing (truncated or not a spectrum)")
    provenance = obj.get("provenance", {})
    if not isinstance(provenance, Mapping):
        raise FileFormatError(f"{path}: `provenance` must be an object")
    saturated = obj.get("saturated")
    if saturated is not None:
        if not isinstance(saturated, list) or not all(isinstance(v, bool) for v in saturated):
            raise FileFormatError(f"{path}: `saturated` must be a list of true/false")
        saturated = np.array(saturated, dtype=bool)

    def optional(name):
        value = obj.get(name)
        return None if value is None else _finite_array(value, path=path, name=name)

    return _build_spectrum(
        path,
        wavelength=optional("wavelength_nm"),
        intensity=_finite_array(obj["intensity"], path=path, name="intensity"),
        uncertainty=_finite_array(obj["uncertainty"], path=path, name="uncertainty"),
        pixel=_finite_array(obj["pixel"], path=path, name="pixel"),
        saturated=saturated,
        wavelength_uncertainty=optional("wavelength_uncertainty_nm"),
        provenance=dict(provenance),
    )


# --------------------------------------------------------------------------- CSV tables


@dataclass(frozen=True)
class Table:
    """A table read back by :func:`read_table`.

    Attributes
    ----------
    columns : dict of str -> ndarray
        Column name -> values (float64; 0/1 for flag columns; str where a
        column is not numeric), in file order.
    provenance : dict
        The ``# provenance-json:`` comment, or ``{}``.
    comments : tuple of str
        Every ``#`` comment line, without the ``#``.
    path : Path
    """

    columns: dict
    provenance: dict = field(default_factory=dict)
    comments: tuple = ()
    path: Path | None = None

    def __getitem__(self, name: str) -> np.ndarray:
        try:
            return self.columns[name]
        except KeyError:
            raise FileFormatError(f"{self.path}: no column `{name}` (columns: {', '.join(self.columns)})") from None


_SAFE_COLUMN = re.compile(r"^[A-Za-z_][A-Za-z0-9_.\-]*$")


def _format_cell(value) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "1" if value else "0"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return repr(float(value))
    text = str(value)
    if any(c in text for c in ',"\n\r#') or text != text.strip():
        text = '"' + text.replace('"', '""') + '"'
    return text


def _provenance_comment_lines(provenance: Mapping[str, Any]) -> list[str]:
    """Human-readable summary lines for a provenance record (no leading '#')."""
    lines = []
    software = provenance.get("software") or {}
    if software:
        lines.append(f"software: {software.get('name', 'benchspec')} {software.get('version', '?')}")
    if provenance.get("created_utc"):
        lines.append(f"created_utc: {provenance['created_utc']}")
    if provenance.get("quantity"):
        lines.append(f"quantity: {provenance['quantity']} ({provenance.get('intensity_unit', '?')})")
    for frame in provenance.get("frames") or []:
        if isinstance(frame, Mapping):
            lines.append(f"frame ({frame.get('role', 'signal')}): {frame.get('path')} sha256={frame.get('sha256')}")
    calibration = provenance.get("calibration")
    if isinstance(calibration, Mapping):
        lines.append(
            "calibration: {path} sha256={sha256} lamp={lamp} rms_nm={rms_nm} rms_px={rms_px} line_list_source={src}".format(
                path=calibration.get("path"), sha256=calibration.get("sha256"), lamp=calibration.get("lamp"),
                rms_nm=calibration.get("rms_nm"), rms_px=calibration.get("rms_px"), src=calibration.get("line_list_source"),
            )
        )
    elif "calibration" in provenance:
        lines.append("calibration: none")
    response = provenance.get("response")
    if isinstance(response, Mapping):
        if response.get("applied"):
            detail = " ".join(f"{k}={v}" for k, v in response.items() if k != "applied" and not isinstance(v, (dict, list)))
            lines.append(f"response correction: {detail or 'applied'}")
        else:
            lines.append("response correction: none")
    settings = provenance.get("settings")
    if isinstance(settings, Mapping) and settings:
        lines.append("settings: " + json.dumps(settings, ensure_ascii=True, separators=(",", "=")).strip("{}").replace('"', ""))
    imported = provenance.get("imported_from")
    if isinstance(imported, Mapping):
        lines.append(f"imported_from: {imported.get('path')} ({imported.get('format')}) sha256={imported.get('sha256')}")
    if provenance.get("notes"):
        lines.append(f"notes: {provenance['notes']}")
    return [" ".join(line.split()) for line in lines]


def _table_text(columns: Mapping[str, Any], *, comments: Sequence[str], provenance: Mapping[str, Any] | None, schema: str | None, allow_nan: bool,
                cache: dict | None = None, digits: Mapping[str, int] | None = None) -> str:
    if not columns:
        raise InputError("a table needs at least one column")
    names = list(columns)
    arrays = []
    n = None
    for name in names:
        if not isinstance(name, str) or not _SAFE_COLUMN.match(name):
            raise InputError(f"column name {name!r} must be letters, digits, '_', '.' or '-' (e.g. wavelength_nm)")
        values = np.asarray(columns[name])
        if values.ndim != 1:
            raise InputError(f"column `{name}` must be 1-D, got shape {values.shape}")
        if n is None:
            n = values.size
        elif values.size != n:
            raise InputError(f"column `{name}` has {values.size} rows but `{names[0]}` has {n}; every column needs the same length")
        if values.dtype.kind == "f" and not allow_nan and not np.all(np.isfinite(values)):
            bad = int(np.flatnonzero(~np.isfinite(values))[0])
            raise InputError(f"column `{name}` has a non-finite value at row {bad}; mask or drop it before writing (readers refuse NaN/inf)")
        if digits and name in digits and values.dtype.kind == "f":
            arrays.append(_format_significant(values, digits[name]))
        else:
            arrays.append(_format_column(values) if cache is None else _cached_column(cache, name, values))
    out = _io.StringIO()
    for line in comments:
        for part in str(line).split("\n"):
            out.write(f"# {part}".rstrip() + "\n")
    if provenance is not None:
        for line in _provenance_comment_lines(provenance):
            out.write(f"# {line}\n")
        out.write("# provenance-json: " + json.dumps(jsonable(provenance, name="provenance"), ensure_ascii=True, allow_nan=False, separators=(",", ":")) + "\n")
    if schema:
        out.write(f"# schema: {schema}\n")
    out.write(",".join(names) + "\n")
    if n:
        out.write("\n".join(map(",".join, zip(*arrays))) + "\n")
    return out.getvalue()


def _cached_column(cache: dict, name: str, values: np.ndarray) -> list[str]:
    """The cells of a column, reused from ``cache`` when the column holds the same bytes as last time.

    A time series repeats its wavelength, pixel and wavelength-uncertainty
    columns in every file: formatting them once saves three of the five
    float columns per file. The comparison is of the bytes (so -0.0 and
    0.0, which print differently, are told apart).
    """
    raw = np.ascontiguousarray(values).tobytes()
    hit = cache.get(name)
    if hit is not None and hit[0] == values.dtype.str and hit[1] == raw:
        return hit[2]
    texts = _format_column(values)
    cache[name] = (values.dtype.str, raw, texts)
    return texts


def _format_significant(values: np.ndarray, digits: int) -> list[str]:
    """Float cells with ``digits`` significant digits (``%.{digits}g``), all in one formatting call.

    Nine digits hold every float32 value exactly (read back and rounded to
    float32 it is the same number) and any float64 within a relative 5e-9,
    below float32's own rounding (6e-8); about three times faster than the
    shortest round-trip form of a float64.
    """
    if values.size == 0:
        return []
    text = (f"%.{int(digits)}g\n" * values.size) % tuple(values.astype(float).tolist())
    return text.split("\n")[:-1]


def _format_column(values: np.ndarray) -> list[str]:
    """The cells of one column as text, as :func:`_format_cell` writes each (a column at a time: a
    time series writes thousands of rows per frame)."""
    kind = values.dtype.kind
    if kind == "b":
        return np.where(values, "1", "0").tolist()
    if kind in "iu":
        return list(map(str, values.tolist()))
    if kind == "f":
        return list(map(float.__repr__, values.astype(float).tolist()))
    return [_format_cell(v) for v in values.tolist()]


def write_table(
    path,
    columns: Mapping[str, Any],
    *,
    comments: Sequence[str] = (),
    provenance: Mapping[str, Any] | None = None,
    force: bool = False,
    allow_nan: bool = False,
) -> Path:
    """Write a CSV table atomically: ``#`` comments, provenance, header, rows.

    Parameters
    ----------
    path : str or Path
        Destination (``.csv``).
    columns : mapping of str -> 1-D array-like
        Column name -> values, in the order to write. Floats are written in
        shortest round-trip form, booleans as 0/1, strings quoted when needed.
    comments : sequence of str
        Extra ``#`` lines written first (e.g. a title).
    provenance : mapping, optional
        Written as human-readable ``#`` lines and one ``# provenance-json:`` line.
    force : bool
        Replace an existing file.
    allow_nan : bool
        Write NaN/inf as ``nan``/``inf`` instead of refusing them (the
        benchspec readers refuse such files, so use only for scratch output).

    Returns
    -------
    Path
        The file written.

    Examples
    --------
    An absorbance table::

        write_table("abs.csv", {"wavelength_nm": wl, "absorbance": a, "uncertainty": u},
                    provenance=build_provenance(quantity="absorbance", intensity_unit="absorbance"))
    """
    text = _table_text(columns, comments=comments, provenance=provenance, schema=None, allow_nan=allow_nan)
    return atomic_write_text(path, text, force=force)


def _split_csv_line(line: str) -> list[str]:
    if '"' not in line:
        return [cell.strip() for cell in line.split(",")]
    import csv

    return [cell.strip() for cell in next(csv.reader([line]))]


def _parse_float(text: str, *, path: Path, line_number: int, column: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise FileFormatError(f"{path} line {line_number}: `{column}` value {text!r} is not a number") from None
    if not math.isfinite(value):
        raise FileFormatError(f"{path} line {line_number}: `{column}` is {text!r}; only finite numbers are allowed")
    return value


def _read_csv_lines(path: Path, what: str):
    text = _decode_text(path, _read_bytes(path, what), what)
    comments = []
    header = None
    header_line = 0
    rows = []
    for number, raw in enumerate(text.split("\n"), start=1):
        line = raw.strip()
        if not line:
            continue
        if line.startswith("#"):
            if header is None:
                comments.append(line[1:].strip())
            continue
        if header is None:
            header = _split_csv_line(line)
            header_line = number
            continue
        rows.append((number, _split_csv_line(line)))
    return comments, header, header_line, rows, text


def _comment_value(comments: Sequence[str], key: str) -> str | None:
    prefix = key + ":"
    for comment in comments:
        if comment.startswith(prefix):
            return comment[len(prefix):].strip()
    return None


def _provenance_from_comments(path: Path, comments: Sequence[str]) -> dict:
    raw = _comment_value(comments, "provenance-json")
    if raw is None:
        return {}
    try:
        value = json.loads(raw, parse_constant=_reject_constant, parse_float=_finite_float, parse_int=_bounded_int)
    except (ValueError, RecursionError):
        raise FileFormatError(f"{path}: the `# provenance-json:` line is not valid JSON (truncated or edited?)") from None
    if not isinstance(value, dict):
        raise FileFormatError(f"{path}: the `# provenance-json:` line must hold a JSON object")
    return value


def read_table(path, *, required: Sequence[str] = ()) -> Table:
    """Read a CSV table written by :func:`write_table` (or any simple CSV with a header).

    Raises :class:`FileFormatError` for empty, truncated or non-UTF-8 files,
    ragged rows, NaN/inf, and missing ``required`` columns.
    """
    path = Path(path)
    comments, header, header_line, rows, _ = _read_csv_lines(path, "table")
    return _table_from_lines(path, comments, header, header_line, rows, required=required)


def _table_from_lines(path: Path, comments, header, header_line, rows, *, required: Sequence[str] = ()) -> Table:
    if header is None:
        raise FileFormatError(f"{path} has no header row; expected a line of column names such as wavelength_nm,intensity")
    if len(set(header)) != len(header) or any(not name for name in header):
        raise FileFormatError(f"{path} line {header_line}: the header has empty or repeated column names: {','.join(header)}")
    for name in required:
        if name not in header:
            raise FileFormatError(f"{path}: no column `{name}` (columns: {', '.join(header)})")
    if not rows:
        raise FileFormatError(f"{path} has a header but no data rows (truncated?)")
    cells: list[list[str]] = [[] for _ in header]
    for number, row in rows:
        if len(row) != len(header):
            raise FileFormatError(f"{path} line {number}: {len(row)} fields, expected {len(header)} ({','.join(header)}); the file may be truncated")
        for i, cell in enumerate(row):
            cells[i].append(cell)
    columns = {}
    for name, values in zip(header, cells):
        try:
            array = np.array(values, dtype=np.float64)  # parses each string like float()
        except ValueError:
            columns[name] = np.array(values, dtype=str)
            continue
        bad = np.flatnonzero(~np.isfinite(array))
        if bad.size:
            number = rows[int(bad[0])][0]
            raise FileFormatError(f"{path} line {number}: `{name}` is {values[int(bad[0])]!r}; only finite numbers are allowed")
        columns[name] = array
    return Table(columns=columns, provenance=_provenance_from_comments(path, comments), comments=tuple(comments), path=path)


# --------------------------------------------------------------------------- spectrum CSV


def _check_writable(spectrum: Spectrum) -> None:
    if not isinstance(spectrum, Spectrum):
        raise InputError(f"expected a benchspec Spectrum, got {type(spectrum).__name__}")
    if spectrum.size < 2:
        raise InputError(f"a spectrum needs at least 2 samples to be exported, this one has {spectrum.size}")
    for name in ("intensity", "uncertainty", "pixel", "wavelength_nm", "wavelength_uncertainty_nm"):
        array = getattr(spectrum, name)
        if array is not None and not np.all(np.isfinite(array)):
            bad = int(np.flatnonzero(~np.isfinite(array))[0])
            raise InputError(f"spectrum `{name}` has a non-finite value at sample {bad}; mask or drop it before export")


def _spectrum_csv_text(spectrum: Spectrum, *, cache: dict | None = None, value_digits: int | None = None) -> str:
    columns: dict[str, Any] = {}
    if spectrum.is_calibrated:
        columns["wavelength_nm"] = spectrum.wavelength_nm
    else:
        columns["pixel"] = spectrum.pixel
    quantity = str(spectrum.provenance.get("quantity", "intensity"))
    value_name = quantity if quantity in _NAMED_QUANTITIES else "intensity"
    columns[value_name] = spectrum.intensity
    columns["uncertainty"] = spectrum.uncertainty
    columns["saturated"] = spectrum.saturated
    if spectrum.is_calibrated:
        columns["pixel"] = spectrum.pixel
        if spectrum.wavelength_uncertainty_nm is not None:
            columns["wavelength_uncertainty_nm"] = spectrum.wavelength_uncertainty_nm
    kind = "calibrated" if spectrum.is_calibrated else "uncalibrated (x is the pixel column of the rectified band)"
    return _table_text(
        columns,
        comments=[f"benchspec spectrum, {kind}"],
        provenance=jsonable(spectrum.provenance, name="provenance"),
        schema=f"{SPECTRUM_SCHEMA}/{SPECTRUM_SCHEMA_VERSION}",
        allow_nan=False,
        cache=cache,
        digits=None if value_digits is None else {value_name: value_digits, "uncertainty": value_digits},
    )


_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+([eE][+-]?\d+)?$")


def _read_csv_spectrum(path: Path) -> Spectrum:
    comments, header, header_line, rows, text = _read_csv_lines(path, "spectrum")
    schema = _comment_value(comments, "schema")
    value_names = [h for h in (header or []) if h in _VALUE_COLUMNS]
    structured = bool(header) and ("wavelength_nm" in header or "pixel" in header) and bool(value_names)
    if schema is None and not structured:
        return _read_plain_text(path, text)  # another instrument's CSV
    if schema is not None:
        name, _, version = schema.partition("/")
        if name != SPECTRUM_SCHEMA:
            raise FileFormatError(f"{path}: schema {schema!r} is not a benchspec spectrum; use read_table for other tables")
        if version != str(SPECTRUM_SCHEMA_VERSION):
            raise FileFormatError(
                f"{path}: spectrum schema version {version!r} is not supported (this benchspec reads version {SPECTRUM_SCHEMA_VERSION}); upgrade benchspec"
            )
    if header is None:
        raise FileFormatError(f"{path} has no header row (truncated?)")
    wavelength_names = [h for h in header if h.startswith(("wavelength", "lambda", "wavenumber")) and h != "wavelength_uncertainty_nm"]
    if wavelength_names and wavelength_names != ["wavelength_nm"]:
        raise FileFormatError(f"{path}: column {wavelength_names[0]!r} is not a wavelength in nm; benchspec spectra need a `wavelength_nm` column")
    if not value_names:
        raise FileFormatError(f"{path}: no `intensity` column (columns: {', '.join(header)})")
    value_name = "intensity" if "intensity" in value_names else value_names[0]
    table = _table_from_lines(path, comments, header, header_line, rows, required=(value_name,))
    cols = table.columns
    for name in cols:
        if cols[name].dtype.kind != "f":
            raise FileFormatError(f"{path}: column `{name}` is not numeric")
    saturated = None
    if "saturated" in cols:
        flags = cols["saturated"]
        if not np.all((flags == 0) | (flags == 1)):
            raise FileFormatError(f"{path}: `saturated` must be 0 or 1")
        saturated = flags.astype(bool)
    wavelength = cols.get("wavelength_nm")
    if wavelength is not None:
        steps = np.flatnonzero(np.diff(wavelength) <= 0)
        if steps.size:
            i = int(steps[0])
            raise FileFormatError(
                f"{path} line {rows[i + 1][0]}: wavelengths are not strictly increasing "
                f"({float(wavelength[i + 1]):g} nm after {float(wavelength[i]):g} nm); sort the rows and drop repeats"
            )
    provenance = dict(table.provenance)
    if value_name != "intensity" and not provenance:
        provenance = {"schema": PROVENANCE_SCHEMA, "quantity": value_name, "intensity_unit": value_name}
    return _build_spectrum(
        path,
        wavelength=wavelength,
        intensity=cols[value_name],
        uncertainty=next((cols[n] for n in ("uncertainty", "sigma", "error", "std", "stdev") if n in cols), None),
        pixel=cols.get("pixel"),
        saturated=saturated,
        wavelength_uncertainty=cols.get("wavelength_uncertainty_nm"),
        provenance=provenance,
    )


# --------------------------------------------------------------------------- plain text from other instruments

_X_UNITS = {
    "nm": 1.0,
    "nanometer": 1.0,
    "nanometers": 1.0,
    "nanometre": 1.0,
    "nanometres": 1.0,
    "a": 0.1,
    "å": 0.1,
    "angstrom": 0.1,
    "angstroms": 0.1,
    "um": 1000.0,
    "µm": 1000.0,
    "μm": 1000.0,
    "micron": 1000.0,
    "microns": 1000.0,
    "micrometer": 1000.0,
    "micrometre": 1000.0,
}
_REFUSED_X = ("cm-1", "cm^-1", "1/cm", "wavenumber", "ev", "thz", "hz", "ghz")


def _x_unit_from_header(path: Path, name: str) -> float | None:
    lowered = name.lower().replace("_", " ")
    for refused in _REFUSED_X:
        if refused in lowered.replace(" ", ""):
            raise FileFormatError(f"{path}: the x column {name!r} is not a wavelength in nm (units {refused}); convert it to air wavelength in nm first")
    match = re.search(r"[\(\[]\s*([^\)\]]+?)\s*[\)\]]", name)
    unit = match.group(1).lower() if match else None
    if unit is None:
        for candidate in ("nm", "angstrom", "um", "µm", "micron"):
            if re.search(rf"(^|[^a-z]){candidate}($|[^a-z])", lowered):
                unit = candidate
                break
    if unit is None:
        return None
    if unit not in _X_UNITS:
        raise FileFormatError(f"{path}: x unit {unit!r} is not understood; use nm, Angstrom or micrometres")
    return _X_UNITS[unit]


def _split_plain(line: str, separator: str | None) -> list[str]:
    if separator is None:
        return line.split()
    return [cell.strip() for cell in line.split(separator)]


def _read_plain_text(path: Path, text: str) -> Spectrum:
    lines = [(n, raw.strip()) for n, raw in enumerate(text.split("\n"), start=1)]
    lines = [(n, line) for n, line in lines if line and not line.startswith(("#", "%", "//", ";", "!"))]
    if not lines:
        raise FileFormatError(f"{path} holds only comments; no spectrum rows found")
    # separator from the first line that looks like data
    sample = lines[-1][1] if len(lines) == 1 else lines[min(1, len(lines) - 1)][1]
    if ";" in sample:
        separator = ";"
    elif "," in sample and not (len(sample.split()) >= 2 and all(_DECIMAL_COMMA.match(t) or _NUMBER.match(t) for t in sample.split())):
        separator = ","
    else:
        separator = None
    decimal_comma = separator != ","

    def number(token: str) -> float | None:
        token = token.strip().strip('"')
        if decimal_comma and _DECIMAL_COMMA.match(token):
            token = token.replace(",", ".")
        try:
            return float(token)
        except ValueError:
            return None

    header = None
    start = 0
    first_line = lines[0][1]
    first_cells = _split_plain(first_line, "\t" if (separator is None and "\t" in first_line) else separator)
    if any(number(c) is None for c in first_cells[:2]):
        header = [c.strip().strip('"') for c in first_cells]
        start = 1
    x_scale = 1.0
    value_column = 1
    uncertainty_column = None
    pixel_axis = False
    unit_named = False
    if header is not None:
        if len(header) < 2:
            raise FileFormatError(f"{path}: the header {lines[0][1]!r} has fewer than two columns; need wavelength and intensity")
        pixel_axis = bool(re.match(r"^\s*(pixel|pixels|px|column|col|index)\b", header[0].lower()))
        scale = None if pixel_axis else _x_unit_from_header(path, header[0])
        unit_named = scale is not None
        x_scale = 1.0 if scale is None else scale
        lowered = [h.lower() for h in header]
        for i, name in enumerate(lowered[1:], start=1):
            if any(word in name for word in ("uncert", "error", "sigma", "std")):
                if uncertainty_column is None:
                    uncertainty_column = i
        if value_column == uncertainty_column:
            raise FileFormatError(f"{path}: the second column must be the intensity, not {header[1]!r}")
    data = lines[start:]
    if len(data) < 2:
        raise FileFormatError(f"{path} holds {len(data)} data row(s); a spectrum needs at least 2")
    xs, ys, us = [], [], []
    for n, line in data:
        cells = _split_plain(line, separator)
        if len(cells) < 2:
            raise FileFormatError(f"{path} line {n}: {len(cells)} field(s), need at least two (wavelength and intensity); truncated?")
        x = number(cells[0])
        y = number(cells[value_column])
        if x is None or y is None:
            raise FileFormatError(f"{path} line {n}: {line[:40]!r} is not two numbers (wavelength, intensity)")
        if not (math.isfinite(x) and math.isfinite(y)):
            raise FileFormatError(f"{path} line {n}: non-finite value in {line[:40]!r}; only finite numbers are allowed")
        xs.append(x)
        ys.append(y)
        if uncertainty_column is not None:
            if len(cells) <= uncertainty_column or number(cells[uncertainty_column]) is None:
                raise FileFormatError(f"{path} line {n}: the uncertainty column is missing or not a number")
            u = number(cells[uncertainty_column])
            if not math.isfinite(u):
                raise FileFormatError(f"{path} line {n}: non-finite uncertainty")
            us.append(u)
    x = np.array(xs) * x_scale
    y = np.array(ys)
    u = np.array(us) if uncertainty_column is not None else None
    reversed_order = False
    if x.size > 1 and np.all(np.diff(x) < 0):  # instruments that scan from red to blue
        x, y = x[::-1].copy(), y[::-1].copy()
        u = None if u is None else u[::-1].copy()
        reversed_order = True
    else:
        steps = np.flatnonzero(np.diff(x) <= 0)
        if steps.size:
            i = int(steps[0])
            raise FileFormatError(
                f"{path} line {data[i + 1][0]}: wavelengths are not strictly increasing ({xs[i + 1]!r} after {xs[i]!r}); sort the rows and drop repeats"
            )
    if not pixel_axis and not unit_named and (x[0] < 100 or x[-1] > 20000):
        raise FileFormatError(
            f"{path}: x runs from {x[0]:g} to {x[-1]:g}, which does not look like wavelengths in nm; "
            "add a header naming the unit, e.g. 'wavelength (A),intensity'"
        )
    provenance = {
        "schema": PROVENANCE_SCHEMA,
        "imported_from": {
            "path": str(path),
            "sha256": hash_file(path),
            "format": "plain text" + (f" ({'comma' if separator == ',' else 'semicolon' if separator == ';' else 'whitespace'} separated)"),
            "x_scale_to_nm": x_scale,
            "reversed": reversed_order,
            "header": header,
        },
        "quantity": "intensity",
        "intensity_unit": "as imported",
    }
    if pixel_axis:  # an uncalibrated spectrum: x is the pixel column
        return _build_spectrum(path, wavelength=None, intensity=y, uncertainty=u, pixel=x, saturated=None,
                               wavelength_uncertainty=None, provenance=provenance)
    return _build_spectrum(path, wavelength=x, intensity=y, uncertainty=u, pixel=None, saturated=None, wavelength_uncertainty=None, provenance=provenance)


# --------------------------------------------------------------------------- JCAMP-DX


_JCAMP_LINE_CHARS = 80  # JCAMP-DX 5.01 asks for lines of at most 80 characters


def _pack_cells(cells: Sequence[str], *, first: Sequence[str] = ()) -> list[str]:
    """Join cells with spaces into lines of at most 80 characters (greedy)."""
    lines, current = [], list(first)
    for cell in cells:
        if current and len(" ".join(current + [cell])) > _JCAMP_LINE_CHARS and len(current) > len(first):
            lines.append(" ".join(current))
            current = []
        current.append(cell)
    if current:
        lines.append(" ".join(current))
    return lines


def _jcamp_lines_of_values(values: Sequence[float]) -> list[str]:
    return _pack_cells([repr(float(v)) for v in values])


def _jcamp_comment(text: str) -> list[str]:
    import textwrap

    return ["$$ " + part for part in textwrap.wrap(" ".join(str(text).split()), _JCAMP_LINE_CHARS - 3, break_long_words=True, break_on_hyphens=False)]


def _jcamp_text(spectrum: Spectrum, *, title: str | None, form: str) -> str:
    if not spectrum.is_calibrated:
        raise InputError("JCAMP-DX needs a wavelength axis; this spectrum is uncalibrated. Calibrate it, or export .csv/.json")
    provenance = jsonable(spectrum.provenance, name="provenance")
    x = spectrum.wavelength_nm
    y = spectrum.intensity
    n = x.size
    uniform = n > 1 and np.array_equal(x, np.linspace(x[0], x[-1], n))
    if form == "auto":
        form = "xydata" if uniform else "xypoints"
    if form == "xydata" and not uniform:
        raise InputError("XYDATA=(X++(Y..Y)) needs evenly spaced wavelengths; use jcamp_form='xypoints' (or 'auto')")
    if form not in ("xydata", "xypoints"):
        raise InputError(f"`jcamp_form` must be 'auto', 'xydata' or 'xypoints', got {form!r}")
    quantity = str(provenance.get("quantity", "intensity")).lower()
    yunits = _JCAMP_YUNITS.get(quantity, "ARBITRARY UNITS")
    created = provenance.get("created_utc") or _utc_now()
    try:
        stamp = _dt.datetime.fromisoformat(str(created).replace("Z", "+00:00"))
        longdate = stamp.astimezone(_dt.timezone.utc).strftime("%Y/%m/%d %H:%M:%S +0000")
    except ValueError:
        longdate = _dt.datetime.now(_dt.timezone.utc).strftime("%Y/%m/%d %H:%M:%S +0000")
    title_text = " ".join((title or provenance.get("title") or "benchspec spectrum").split())
    out = [
        f"##TITLE={title_text}",
        "##JCAMP-DX=5.01",
        "##DATA TYPE=UV/VIS SPECTRUM",
        f"##DATA CLASS={'XYDATA' if form == 'xydata' else 'XYPOINTS'}",
        f"##ORIGIN=benchspec {__version__}",
        f"##OWNER={' '.join(str(provenance.get('owner', 'not recorded')).split())}",
        f"##LONGDATE={longdate}",
        f"##SPECTROMETER/DATA SYSTEM=webcam and diffraction grating / benchspec {__version__}",
        f"##$BENCHSPEC SCHEMA={SPECTRUM_SCHEMA}/{SPECTRUM_SCHEMA_VERSION}",
        f"##$BENCHSPEC INTENSITY UNIT={' '.join(str(provenance.get('intensity_unit', 'counts')).split())}",
    ]
    for line in _provenance_comment_lines(provenance):
        out += _jcamp_comment(line)
    blob = json.dumps(provenance, ensure_ascii=True, allow_nan=False, separators=(",", ":"))
    chunks = []
    position = 0
    while position < len(blob):
        end = min(len(blob), position + 52)
        # never start or end a chunk with a space (editors strip them)
        while end < len(blob) and (blob[end - 1] == " " or blob[end] == " "):
            end += 1
        chunks.append(blob[position:end])
        position = end
    out += [f"##$BENCHSPEC PROVENANCE {i + 1}={chunk}" for i, chunk in enumerate(chunks)]
    out.append("##$BENCHSPEC UNCERTAINTY=(Y..Y)")
    out += _jcamp_lines_of_values(spectrum.uncertainty)
    out.append("##$BENCHSPEC PIXEL=(Y..Y)")
    out += _jcamp_lines_of_values(spectrum.pixel)
    out.append("##$BENCHSPEC SATURATED=(Y..Y)")
    flags = "".join("1" if v else "0" for v in spectrum.saturated)
    out += [flags[i : i + 72] for i in range(0, len(flags), 72)]
    if spectrum.wavelength_uncertainty_nm is not None:
        out.append("##$BENCHSPEC WAVELENGTH UNCERTAINTY=(Y..Y)")
        out += _jcamp_lines_of_values(spectrum.wavelength_uncertainty_nm)
    out += [
        "##XUNITS=NANOMETERS",
        f"##YUNITS={yunits}",
        "##XFACTOR=1",
        "##YFACTOR=1",
        f"##FIRSTX={float(x[0])!r}",
        f"##LASTX={float(x[-1])!r}",
        f"##NPOINTS={n}",
        f"##FIRSTY={float(y[0])!r}",
        f"##MINX={float(x.min())!r}",
        f"##MAXX={float(x.max())!r}",
        f"##MINY={float(y.min())!r}",
        f"##MAXY={float(y.max())!r}",
    ]
    if form == "xydata":
        out.append(f"##DELTAX={float((x[-1] - x[0]) / (n - 1))!r}")
        out.append("##XYDATA=(X++(Y..Y))")
        start = 0
        while start < n:
            line = repr(float(x[start]))
            count = 0
            while start + count < n:
                cell = repr(float(y[start + count]))
                if count and len(line) + 1 + len(cell) > _JCAMP_LINE_CHARS:
                    break
                line += " " + cell
                count += 1
            out.append(line)
            start += count
    else:
        out.append("##XYPOINTS=(XY..XY)")
        out += [f"{float(a)!r}, {float(b)!r}" for a, b in zip(x, y)]
    out.append("##END=")
    return "\n".join(out) + "\n"


_ASDF_SQZ = {c: (i, 1) for i, c in enumerate("@ABCDEFGHI")} | {c: (i, -1) for i, c in enumerate("abcdefghi", start=1)}
_ASDF_DIF = {c: (i, 1) for i, c in enumerate("%JKLMNOPQR")} | {c: (i, -1) for i, c in enumerate("jklmnopqr", start=1)}
_ASDF_DUP = {c: i for i, c in enumerate("STUVWXYZs", start=1)}
_AFFN_TOKEN = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


_AFFN_PLAIN = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)")
_EXPONENT_LETTER = re.compile(r"(?<=[\d.])[eE](?=[+-]?\d)")


def _decode_jcamp_line(line: str) -> tuple[list[float], bool]:
    """Numbers on one XYDATA line, AFFN or ASDF (SQZ, DIF, DUP forms of JCAMP-DX).

    Returns the values and whether the last one was written in DIF form
    (then the next line starts with a Y-check value).
    """
    letters = {c for c in line if c.isalpha() or c in "@%"}
    exponent_only = letters <= {"e", "E"} and len(_EXPONENT_LETTER.findall(line)) == sum(line.count(c) for c in "eE")
    if not letters or exponent_only:
        tokens = _AFFN_TOKEN.findall(line)
        rest = _AFFN_TOKEN.sub(" ", line).replace(",", " ").replace(";", " ").strip()
        if rest:
            raise ValueError(f"unexpected characters {rest[:10]!r}")
        return [float(t) for t in tokens], False
    values: list[float] = []
    last_dif = False
    i = 0
    while i < len(line):
        c = line[i]
        if c in " \t,;":
            i += 1
            continue
        if c in _ASDF_DUP:
            j = i + 1
            digits = str(_ASDF_DUP[c])
            while j < len(line) and line[j].isdigit():
                digits += line[j]
                j += 1
            if not values:
                raise ValueError("DUP code before any value")
            step = values[-1] - values[-2] if last_dif and len(values) > 1 else 0.0
            for _ in range(int(digits) - 1):
                values.append(values[-1] + step)
            i = j
            continue
        if c in _ASDF_SQZ or c in _ASDF_DIF:
            digit, sign = _ASDF_SQZ[c] if c in _ASDF_SQZ else _ASDF_DIF[c]
            j = i + 1
            digits = str(digit)
            while j < len(line) and (line[j].isdigit() or line[j] == "."):
                digits += line[j]
                j += 1
            number = sign * float(digits)
            if c in _ASDF_DIF:
                if not values:
                    raise ValueError("DIF code before any value")
                values.append(values[-1] + number)
                last_dif = True
            else:
                values.append(number)
                last_dif = False
            i = j
            continue
        match = _AFFN_PLAIN.match(line, i)
        if not match:
            raise ValueError(f"unexpected character {c!r}")
        values.append(float(match.group(0)))
        last_dif = False
        i = match.end()
    return values, last_dif


def _read_jcamp(path: Path) -> Spectrum:
    text = _decode_text(path, _read_bytes(path, "JCAMP-DX spectrum"), "JCAMP-DX spectrum")
    labels: dict[str, str] = {}
    blocks: dict[str, list[str]] = {}
    current = None
    data_label = None
    data_lines: list[tuple[int, str]] = []
    provenance_chunks: dict[int, str] = {}
    ended = False
    first_label_seen = False
    for number, raw in enumerate(text.split("\n"), start=1):
        line = raw.rstrip()
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("$$"):
            continue
        if "$$" in line:
            line = line[: line.index("$$")].rstrip()
        if line.startswith("##"):
            if "=" not in line:
                raise FileFormatError(f"{path} line {number}: JCAMP-DX label {line[:30]!r} has no '='")
            name, value = line[2:].split("=", 1)
            # labels compare without spaces, dashes, slashes and underscores (JCAMP-DX 5.01 rule)
            key = re.sub(r"[\s\-/_]", "", name).upper()
            if not first_label_seen:
                if key != "TITLE":
                    raise FileFormatError(f"{path}: a JCAMP-DX file must start with ##TITLE=, found ##{name}=")
                first_label_seen = True
            if key.startswith("$BENCHSPECPROVENANCE"):
                try:
                    provenance_chunks[int(key[len("$BENCHSPECPROVENANCE"):])] = value
                except ValueError:
                    raise FileFormatError(f"{path} line {number}: bad provenance label ##{name}=") from None
                current = None
                continue
            if key == "END":
                ended = True
                break
            labels[key] = value.strip()
            if key in ("XYDATA", "XYPOINTS", "PEAKTABLE"):
                if data_label is not None:
                    raise FileFormatError(f"{path}: more than one data table; benchspec reads single-spectrum JCAMP-DX files")
                data_label = key
                current = None
                continue
            current = key
            blocks[key] = []
            continue
        if not first_label_seen:
            raise FileFormatError(f"{path} does not look like JCAMP-DX (no ##TITLE= at the start); wrong file type behind the extension?")
        if data_label is not None:
            data_lines.append((number, line.strip()))
        elif current is not None:
            blocks[current].append(line.strip())
    if not first_label_seen:
        raise FileFormatError(f"{path} does not look like JCAMP-DX (no ##TITLE= label)")
    if data_label is None:
        raise FileFormatError(f"{path}: no ##XYDATA= or ##XYPOINTS= table (truncated?)")
    if not ended:
        raise FileFormatError(f"{path} ends without ##END= (truncated?)")
    if labels.get("DATATYPE", "").upper().strip() == "LINK":
        raise FileFormatError(f"{path} is a compound (LINK) JCAMP-DX file; export a single spectrum")
    if data_label == "PEAKTABLE":
        raise FileFormatError(f"{path} holds a peak table, not a spectrum")
    schema = labels.get("$BENCHSPECSCHEMA")
    if schema is not None and schema != f"{SPECTRUM_SCHEMA}/{SPECTRUM_SCHEMA_VERSION}":
        raise FileFormatError(f"{path}: spectrum schema {schema!r} is not supported (this benchspec reads {SPECTRUM_SCHEMA}/{SPECTRUM_SCHEMA_VERSION}); upgrade benchspec")
    xunits = labels.get("XUNITS", "").upper().replace(" ", "")
    scales = {"NANOMETERS": 1.0, "NANOMETRES": 1.0, "NM": 1.0, "MICROMETERS": 1000.0, "MICROMETRES": 1000.0, "UM": 1000.0, "MICRONS": 1000.0, "ANGSTROMS": 0.1, "ANGSTROM": 0.1}
    if xunits not in scales:
        raise FileFormatError(f"{path}: ##XUNITS={labels.get('XUNITS', '(missing)')} is not a wavelength unit; benchspec reads NANOMETERS (or MICROMETERS, ANGSTROMS)")
    x_scale = scales[xunits]

    def number_label(key, default=None):
        if key not in labels:
            if default is not None:
                return default
            raise FileFormatError(f"{path}: the required label ##{key}= is missing")
        try:
            value = float(labels[key].replace(",", ".") if labels[key].count(",") == 1 and "." not in labels[key] else labels[key])
        except ValueError:
            raise FileFormatError(f"{path}: ##{key}={labels[key]!r} is not a number") from None
        if not math.isfinite(value):
            raise FileFormatError(f"{path}: ##{key}= is not finite")
        return value

    xfactor = number_label("XFACTOR", 1.0)
    yfactor = number_label("YFACTOR", 1.0)
    declared = labels.get(data_label, "").replace(" ", "").upper()
    if data_label == "XYDATA":
        if declared not in ("(X++(Y..Y))", "(X++(R..R))", "(X++(I..I))"):
            raise FileFormatError(f"{path}: ##XYDATA={labels.get(data_label)} is not supported; expected (X++(Y..Y))")
        firstx = number_label("FIRSTX")
        lastx = number_label("LASTX")
        npoints = number_label("NPOINTS")
        if npoints != int(npoints) or npoints < 2:
            raise FileFormatError(f"{path}: ##NPOINTS={labels['NPOINTS']} must be a whole number >= 2")
        npoints = int(npoints)
        ys: list[float] = []
        previous_dif = False
        for number, line in data_lines:
            try:
                values, ends_dif = _decode_jcamp_line(line)
            except ValueError as exc:
                raise FileFormatError(f"{path} line {number}: cannot decode data ({exc})") from None
            if len(values) < 2:
                raise FileFormatError(f"{path} line {number}: a data line needs an X value and at least one Y (truncated?)")
            line_y = values[1:]
            if previous_dif and ys:  # Y check value: repeats the last Y of the previous line
                if not math.isclose(line_y[0], ys[-1], rel_tol=1e-9, abs_tol=1e-9):
                    raise FileFormatError(f"{path} line {number}: the DIF Y-check failed (the file is corrupt)")
                line_y = line_y[1:]
            previous_dif = ends_dif
            ys.extend(line_y)
        if len(ys) != npoints:
            raise FileFormatError(f"{path}: {len(ys)} Y values but ##NPOINTS={npoints} (truncated?)")
        x = np.linspace(firstx, lastx, npoints)
        y = np.array(ys, dtype=np.float64) * yfactor
    else:
        if declared not in ("(XY..XY)", "(XR..XR)", "(XI..XI)"):
            raise FileFormatError(f"{path}: ##XYPOINTS={labels.get(data_label)} is not supported; expected (XY..XY)")
        values = []
        for number, line in data_lines:
            cells = [c for c in re.split(r"[,;\s]+", line) if c]
            for cell in cells:
                try:
                    values.append(float(cell))
                except ValueError:
                    raise FileFormatError(f"{path} line {number}: {cell!r} is not a number") from None
        if len(values) % 2:
            raise FileFormatError(f"{path}: XYPOINTS holds an odd number of values (truncated?)")
        x = np.array(values[0::2], dtype=np.float64) * xfactor
        y = np.array(values[1::2], dtype=np.float64) * yfactor
        if "NPOINTS" in labels and int(number_label("NPOINTS")) != x.size:
            raise FileFormatError(f"{path}: {x.size} points but ##NPOINTS={labels['NPOINTS']} (truncated?)")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise FileFormatError(f"{path}: the data hold non-finite values; only finite numbers are allowed")
    x = x * x_scale

    def extra_block(key, *, flags=False):
        if key not in blocks:
            return None
        joined = " ".join(blocks[key])
        if flags:
            bits = joined.replace(" ", "")
            if any(c not in "01" for c in bits):
                raise FileFormatError(f"{path}: ##{key}= must hold 0/1 flags")
            return np.array([c == "1" for c in bits], dtype=bool)
        try:
            array = np.array([float(t) for t in joined.split()], dtype=np.float64)
        except ValueError:
            raise FileFormatError(f"{path}: ##{key}= holds something that is not a number") from None
        if not np.all(np.isfinite(array)):
            raise FileFormatError(f"{path}: ##{key}= holds non-finite values")
        return array

    uncertainty = extra_block("$BENCHSPECUNCERTAINTY")
    pixel = extra_block("$BENCHSPECPIXEL")
    saturated = extra_block("$BENCHSPECSATURATED", flags=True)
    wavelength_uncertainty = extra_block("$BENCHSPECWAVELENGTHUNCERTAINTY")
    if provenance_chunks:
        order = sorted(provenance_chunks)
        if order != list(range(1, len(order) + 1)):
            raise FileFormatError(f"{path}: provenance chunks are missing (found {order[:5]}...); the file was edited or truncated")
        try:
            provenance = json.loads("".join(provenance_chunks[i] for i in order), parse_constant=_reject_constant, parse_float=_finite_float, parse_int=_bounded_int)
        except (ValueError, RecursionError):
            raise FileFormatError(f"{path}: the ##$BENCHSPEC PROVENANCE labels do not hold valid JSON (edited or truncated?)") from None
        if not isinstance(provenance, dict):
            raise FileFormatError(f"{path}: the provenance must be a JSON object")
    else:
        provenance = {
            "schema": PROVENANCE_SCHEMA,
            "imported_from": {"path": str(path), "sha256": hash_file(path), "format": "JCAMP-DX", "title": labels.get("TITLE"), "yunits": labels.get("YUNITS")},
            "quantity": {"ABSORBANCE": "absorbance", "TRANSMITTANCE": "transmittance"}.get(labels.get("YUNITS", "").upper(), "intensity"),
            "intensity_unit": labels.get("YUNITS", "as imported").lower(),
        }
    if x.size > 1 and np.all(np.diff(x) < 0) and schema is None:
        order_index = np.arange(x.size)[::-1]
        x, y = x[order_index], y[order_index]
        uncertainty = None if uncertainty is None else uncertainty[order_index]
    return _build_spectrum(
        path, wavelength=x, intensity=y, uncertainty=uncertainty, pixel=pixel, saturated=saturated,
        wavelength_uncertainty=wavelength_uncertainty, provenance=provenance,
    )


# --------------------------------------------------------------------------- public entry points


def _extension(path: Path) -> str:
    return path.suffix.lower()


def write_spectrum(
    spectrum: Spectrum,
    path,
    *,
    force: bool = False,
    title: str | None = None,
    lines: Sequence | None = None,
    jcamp_form: str = "auto",
    sync: bool = True,
) -> Path:
    """Write a spectrum in the format given by the extension of ``path``.

    Parameters
    ----------
    spectrum : Spectrum
        The spectrum; its ``provenance`` is written with it (build it with
        :func:`build_provenance`).
    path : str or Path
        Destination: ``.csv``, ``.json``, ``.jdx``/``.dx`` (JCAMP-DX 5.01),
        ``.png``, ``.svg`` or ``.pdf`` (a plot). See the module docstring.
    force : bool
        Replace an existing file (the command line's ``--force``).
    title : str, optional
        Title of the plot, or ``##TITLE=`` of a JCAMP-DX file.
    lines : sequence, optional
        Lines to label on a plot: ``(wavelength_nm, label)`` pairs or
        mappings with ``wavelength_nm`` and ``label``/``species``.
    jcamp_form : {"auto", "xydata", "xypoints"}
        JCAMP-DX table form; "auto" uses XYDATA for evenly spaced axes.
    sync : bool
        Flush the data files (CSV, JSON, JCAMP-DX) to disk before returning
        (default); see :func:`atomic_output`. Plots are always flushed.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    ExportError
        Unknown extension, the file exists (without ``force``), the folder
        is read-only or the disk is full. Nothing is left half-written.
    InputError
        The spectrum has NaN/inf values, or is uncalibrated for JCAMP-DX.
    """
    path = Path(path)
    extension = _extension(path)
    if extension not in SPECTRUM_EXTENSIONS:
        raise ExportError(f"cannot tell the format of {path}: use one of {', '.join(SPECTRUM_EXTENSIONS)}")
    _check_writable(spectrum)
    if not force and (path.exists() or path.is_symlink()):  # fail before any work
        raise ExportError(f"{path} already exists; pass --force to overwrite it, or choose another name")
    if extension == ".csv":
        return atomic_write_text(path, _spectrum_csv_text(spectrum), force=force, sync=sync)
    if extension == ".json":
        text = json.dumps(spectrum_to_dict(spectrum), ensure_ascii=False, allow_nan=False, indent=None) + "\n"
        return atomic_write_text(path, text, force=force, sync=sync)
    if extension in (".jdx", ".dx"):
        return atomic_write_text(path, _jcamp_text(spectrum, title=title, form=jcamp_form), force=force, sync=sync)
    from . import plots  # matplotlib only when a plot is asked for

    return plots.save_spectrum_plot(spectrum, path, force=force, title=title, lines=lines)


#: significant digits of the intensity and uncertainty cells of a series' CSV files (:class:`SeriesWriter`):
#: enough for every float32 value, and within a relative 5e-9 of any float64
SERIES_VALUE_DIGITS = 9


class SeriesWriter:
    """Write the spectra of a time series, one file each; the whole series made durable once, when closed.

    Every file is written as :func:`write_spectrum` writes it: to a
    temporary name in the same folder, then renamed, so no file is ever seen
    half-written, and an existing file is replaced only with ``force``. The
    files are not flushed to disk one by one (on the 2-core build machine an
    ``fsync`` of the file and of its folder took 1-6 ms per file, as long as
    formatting it): :meth:`close` makes the whole series durable at once,
    with one ``os.sync()`` (POSIX; elsewhere one ``fsync`` per file written)
    and one ``fsync`` of each folder. A power cut while the series is being
    written can leave its newest files empty or missing; once :meth:`close`
    has returned, every file is on disk.

    Files are written on the caller's thread; ``threaded=True`` formats and
    writes them on a second thread while the caller makes the next spectrum
    (at most ``depth`` waiting). That was not faster for ``extract --each``
    on the 2-core build machine (300 frames of 720p video at load 2-4,
    alternating runs: median 3.16 s threaded against 3.01 s on the caller's
    thread): the formatting holds Python's interpreter lock, and the
    decoding thread already keeps the second core busy. The columns a series repeats in every file
    (wavelength, pixel, wavelength uncertainty) are formatted once, and the
    CSV files write the intensity and its uncertainty with
    :data:`SERIES_VALUE_DIGITS` significant digits (the extraction computes
    them in float32, which nine digits hold exactly) instead of the
    shortest form that gives back the same float64. The
    first error (disk full, a file that exists without ``force``) is raised
    by the next :meth:`write` or by :meth:`close`; nothing after it is
    written, and the files written before it stay.

    Examples
    --------
    ::

        with SeriesWriter(force=False) as writer:
            for k, spectrum in enumerate(iter_extract_frames("run.avi", "cal.json")):
                writer.write(spectrum, f"run_{k:04d}.csv")
    """

    def __init__(self, *, force: bool = False, depth: int = 4, threaded: bool = False):
        import queue
        import threading

        if depth < 1:
            raise InputError(f"`depth` must be at least 1, was {depth}")
        self.force = bool(force)
        self.written: list[Path] = []
        self._folders: dict[Path, None] = {}
        self._cache: dict = {}
        self._error: BaseException | None = None
        self._closed = False
        self._queue = queue.Queue(maxsize=depth) if threaded else None
        self._thread = None
        if threaded:
            self._thread = threading.Thread(target=self._run, name="benchspec-writer", daemon=True)
            self._thread.start()

    def _write_now(self, spectrum: Spectrum, path: Path) -> None:
        if _extension(path) == ".csv":  # as write_spectrum writes it, with the series' shortcuts
            _check_writable(spectrum)
            if not self.force and (path.exists() or path.is_symlink()):
                raise ExportError(f"{path} already exists; pass --force to overwrite it, or choose another name")
            text = _spectrum_csv_text(spectrum, cache=self._cache, value_digits=SERIES_VALUE_DIGITS)
            atomic_write_text(path, text, force=self.force, sync=False)
        else:
            write_spectrum(spectrum, path, force=self.force, sync=False)
        self.written.append(path)
        self._folders.setdefault(path.parent, None)

    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            if self._error is not None:
                continue  # after an error nothing more is written
            try:
                self._write_now(*item)
            except BaseException as exc:  # raised on the caller's thread
                self._error = exc

    def write(self, spectrum: Spectrum, path) -> None:
        """Queue one spectrum for ``path`` (its extension picks the format, as :func:`write_spectrum`)."""
        if self._closed:
            raise ExportError("the series writer is closed; start a new one")
        if self._error is not None:
            raise self._error
        path = Path(path)
        if self._queue is None:
            try:
                self._write_now(spectrum, path)
            except BaseException as exc:
                self._error = exc
                raise
            return
        self._queue.put((spectrum, path))

    def close(self) -> list[Path]:
        """Wait for the queued files, flush the series to disk; the files written. Raises the first error."""
        if not self._closed:
            self._closed = True
            if self._thread is not None:
                self._queue.put(None)
                self._thread.join()
            self._sync()
        if self._error is not None:
            raise self._error
        return list(self.written)

    def _sync(self) -> None:
        if not self.written:
            return
        try:
            if hasattr(os, "sync"):
                os.sync()
            else:  # pragma: no cover - Windows
                for path in self.written:
                    fd = os.open(path, os.O_RDONLY | getattr(os, "O_BINARY", 0))
                    try:
                        os.fsync(fd)
                    finally:
                        os.close(fd)
        except OSError as exc:
            raise ExportError(f"could not flush the series to disk ({self.written[-1].parent}): "
                              f"{_describe_os_error(exc)}") from exc
        for folder in self._folders:
            _sync_folder(folder)

    def __enter__(self) -> "SeriesWriter":
        return self

    def __exit__(self, kind, value, traceback) -> None:
        if kind is None:
            self.close()
            return
        try:  # the spectra already made are still written and flushed; the first error is the one raised
            self.close()
        except Exception:
            pass


def read_spectrum(path) -> Spectrum:
    """Read a spectrum file: benchspec CSV, JSON or JCAMP-DX, or plain two-column text.

    Parameters
    ----------
    path : str or Path
        ``.csv``, ``.json``, ``.jdx``/``.dx``; any other extension (``.txt``,
        ``.dat``, ``.tsv``...) is read as plain text (x in nm, intensity).

    Returns
    -------
    Spectrum
        Calibrated unless the file is a benchspec CSV/JSON of an uncalibrated
        spectrum. Imported files from other instruments get a provenance with
        ``imported_from`` and estimated uncertainties.

    Raises
    ------
    FileFormatError
        One line naming the file and the problem: missing, empty, truncated,
        not UTF-8, wrong type, NaN/inf, wrong schema version, wrong units,
        wavelengths not increasing.
    """
    path = Path(path)
    extension = _extension(path)
    if extension in PLOT_EXTENSIONS:
        raise FileFormatError(f"{path} is a plot; read the .csv, .json or .jdx export of the spectrum instead")
    if extension == ".json":
        return spectrum_from_dict(read_json_file(path, what="spectrum"), source=path)
    if extension in (".jdx", ".dx", ".jcamp"):
        return _read_jcamp(path)
    if extension == ".csv":
        return _read_csv_spectrum(path)
    text = _decode_text(path, _read_bytes(path, "spectrum"), "spectrum")
    if text.lstrip().startswith("##TITLE") or text.lstrip().startswith("##"):
        return _read_jcamp(path)
    return _read_plain_text(path, text)
