"""The capture log: a session folder that keeps every capture and never loses one.

Layout of a session folder::

    SESSION/
      session.json               written once when the session is created
      screen.json                what was on screen (replaced atomically by save_screen)
      captures/
        20261201T193012Z-001/    one folder per capture, created exclusively
          frame-000.png          raw frames: PNG (8- or 16-bit, as given), .npy for float frames,
                                 or the original file's bytes with its extension
          spectrum.json          the spectrum (exact round trip), with its provenance
          spectrum.csv           the same spectrum as a table, for spreadsheets
          calibration.json       the calibration used (a copy), when there was one
          capture.json           the capture's manifest, written LAST

A capture's name is its UTC time plus a counter; the folder is made with an
exclusive ``mkdir``, so two captures in the same second (or two programs
logging to the same session) never collide. Every file is written atomically
(temporary file, then rename), nothing is ever overwritten, and
``capture.json`` is written last: a folder without it is an interrupted
capture, which loading reports (and keeps) instead of failing.

``capture.json`` (schema ``benchspec.capture``, version 1)::

    {"schema": "benchspec.capture", "schema_version": 1, "id": "20261201T193012Z-001",
     "created_utc": "...", "label": "...", "source_type": "fluorescent" | null,
     "files": {"frame-000.png": {"sha256": "...", "role": "frame"}, "spectrum.json": {..., "role": "spectrum"}, ...},
     "metadata": {...}, "view": {...}}

``screen.json`` (schema ``benchspec.screen``, version 1)::

    {"schema": "benchspec.screen", "schema_version": 1, "saved_utc": "...",
     "shown": ["capture id", ...], "active": "capture id" | null, "view": {...}}

Loading validates every manifest against its schema and every file against
its SHA-256; problems are collected in :attr:`Session.problems` (one line
each) rather than raised, so one bad capture never hides the others. A
corrupt ``session.json`` raises :class:`FileFormatError` and changes nothing.
No code runs from data: JSON only, ``numpy.load(allow_pickle=False)``.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import os
import re
import shutil
import tokenize
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from . import __version__
from .errors import ExportError, FileFormatError, InputError
from .io import (
    atomic_write_bytes,
    hash_file,
    jsonable,
    read_json_file,
    spectrum_from_dict,
    write_json_file,
    write_spectrum,
)
from .spectrum import Spectrum

__all__ = [
    "SESSION_SCHEMA",
    "CAPTURE_SCHEMA",
    "SCREEN_SCHEMA",
    "CaptureRecord",
    "Capture",
    "ScreenState",
    "Session",
    "log_capture",
]

SESSION_SCHEMA = "benchspec.session"
CAPTURE_SCHEMA = "benchspec.capture"
SCREEN_SCHEMA = "benchspec.screen"
_VERSION = 1
_CAPTURE_NAME = re.compile(r"^\d{8}T\d{6}Z-\d{3,}$")
_SAFE_FILE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")
_ROLES = ("frame", "dark", "spectrum", "table", "calibration", "attachment")


def _utc_now() -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0)


def _iso(moment: _dt.datetime) -> str:
    return moment.isoformat().replace("+00:00", "Z")


@dataclass(frozen=True)
class CaptureRecord:
    """What ``capture.json`` says about one capture (validated).

    Attributes
    ----------
    id : str
        Folder name: UTC time and counter, e.g. ``20261201T193012Z-001``.
    folder : Path
    created_utc : str
    label : str
    source_type : str or None
    files : dict
        File name -> ``{"sha256", "role"}``.
    metadata : dict
        Camera settings, operator notes, anything the caller gave.
    view : dict
        The display settings at capture time (ranges, mode, labelled lines).
    """

    id: str
    folder: Path
    created_utc: str
    label: str
    source_type: str | None
    files: dict
    metadata: dict = field(default_factory=dict)
    view: dict = field(default_factory=dict)

    def files_with_role(self, role: str) -> list[str]:
        return [name for name, info in self.files.items() if info.get("role") == role]


@dataclass(frozen=True)
class Capture:
    """A capture loaded back: its record, spectrum, raw frames and calibration."""

    record: CaptureRecord
    spectrum: Spectrum | None
    frames: tuple = ()
    calibration: dict | None = None


@dataclass(frozen=True)
class ScreenState:
    """What was on screen: the captures shown (loaded), the active one and the view settings."""

    shown: tuple
    active: str | None
    view: dict
    captures: tuple = ()
    problems: tuple = ()


def _describe(exc: OSError) -> str:
    from .io import _describe_os_error

    return _describe_os_error(exc)


def _check_json_object(path: Path, value: Any, schema: str) -> dict:
    if not isinstance(value, dict):
        raise FileFormatError(f"{path} must hold a JSON object")
    if value.get("schema") != schema:
        raise FileFormatError(f"{path} is not a {schema} file (schema is {value.get('schema')!r})")
    if value.get("schema_version") != _VERSION or isinstance(value.get("schema_version"), bool):
        raise FileFormatError(
            f"{path}: {schema} schema version {value.get('schema_version')!r} is not supported "
            f"(this benchspec reads version {_VERSION}); upgrade benchspec"
        )
    return value


def _validate_capture(path: Path, data: Any, folder: Path) -> CaptureRecord:
    data = _check_json_object(path, data, CAPTURE_SCHEMA)
    if data.get("id") != folder.name:
        raise FileFormatError(f"{path}: id {data.get('id')!r} does not match its folder {folder.name!r} (moved or edited?)")
    for key, kind in (("created_utc", str), ("label", str), ("files", dict), ("metadata", dict), ("view", dict)):
        if not isinstance(data.get(key), kind):
            raise FileFormatError(f"{path}: `{key}` must be a {kind.__name__}")
    source_type = data.get("source_type")
    if source_type is not None and not isinstance(source_type, str):
        raise FileFormatError(f"{path}: `source_type` must be a string or null")
    files = {}
    for name, info in data["files"].items():
        if not _SAFE_FILE.match(name) or name == "capture.json":
            raise FileFormatError(f"{path}: file name {name!r} is not a plain file name inside the capture")
        if not isinstance(info, dict) or not isinstance(info.get("sha256"), str) or info.get("role") not in _ROLES:
            raise FileFormatError(f"{path}: entry for {name!r} needs `sha256` and a `role` in {_ROLES}")
        files[name] = {"sha256": info["sha256"], "role": info["role"]}
    return CaptureRecord(
        id=data["id"], folder=folder, created_utc=data["created_utc"], label=data["label"], source_type=source_type,
        files=files, metadata=data["metadata"], view=data["view"],
    )


def _encode_frame(frame) -> tuple[bytes, str]:
    """Bytes and extension for one raw frame: PNG for 8/16-bit integer images, .npy for floats."""
    import io as _io

    import cv2

    array = np.asarray(frame)
    if array.ndim not in (2, 3) or (array.ndim == 3 and array.shape[2] not in (1, 3, 4)):
        raise InputError(f"a frame must be (H, W), (H, W, 3) or (H, W, 4), got shape {array.shape}")
    if array.dtype in (np.uint8, np.uint16):
        if array.ndim == 3 and array.shape[2] == 3:
            array = cv2.cvtColor(array, cv2.COLOR_RGB2BGR)  # frames are RGB in benchspec, PNG via OpenCV is BGR
        elif array.ndim == 3 and array.shape[2] == 4:
            array = cv2.cvtColor(array, cv2.COLOR_RGBA2BGRA)
        ok, encoded = cv2.imencode(".png", np.ascontiguousarray(array))
        if not ok:  # pragma: no cover - OpenCV always encodes these dtypes
            raise InputError("OpenCV could not encode the frame as PNG")
        return encoded.tobytes(), ".png"
    if array.dtype.kind in "fiu":
        if array.dtype.kind == "f" and not np.all(np.isfinite(array)):
            raise InputError("a float frame holds NaN or inf; clip or mask it before saving")
        buffer = _io.BytesIO()
        np.save(buffer, np.ascontiguousarray(array), allow_pickle=False)
        return buffer.getvalue(), ".npy"
    raise InputError(f"cannot save a frame of dtype {array.dtype}; use uint8, uint16 or float")


def _decode_frame(path: Path):
    if path.exists() and not path.is_file():  # a pipe would block, a device never end
        raise FileFormatError(f"{path} is not a regular file (a pipe, socket or device); the capture is damaged")
    if path.suffix.lower() == ".npy":
        try:
            with open(path, "rb") as handle:
                version = np.lib.format.read_magic(handle)
                reader = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
                shape, _, dtype = reader(handle)
            if dtype.hasobject:
                raise FileFormatError(f"{path}: frame holds Python objects; only numeric frames are loaded")
            if dtype.kind not in "fiu" or dtype.fields is not None:
                raise FileFormatError(f"{path}: frame has dtype {dtype}; only integer or float frames are loaded")
            pixels = int(np.prod(shape)) if shape else 1
            from .frames import MAX_FRAME_PIXELS

            if len(shape) not in (2, 3) or pixels > 4 * MAX_FRAME_PIXELS:
                raise FileFormatError(f"{path}: frame of shape {shape} is not a frame or too large to load")
            array = np.load(path, allow_pickle=False)
        except (ValueError, OSError, EOFError, SyntaxError, tokenize.TokenError) as exc:  # numpy parses the header as a literal
            raise FileFormatError(f"{path} is not a readable .npy frame ({exc})") from None
        return array
    from .frames import read_image

    return read_image(path)


class Session:
    """A capture log in a folder (see the module docstring for the layout).

    Use :meth:`create` or :meth:`open`; both validate what is on disk.

    Attributes
    ----------
    path : Path
    title : str
    created_utc : str
    captures : tuple of CaptureRecord
        Valid captures, oldest first.
    problems : tuple of str
        One line per capture or file that could not be used (nothing is deleted).
    """

    def __init__(self, path: Path, manifest: dict, captures: tuple, problems: tuple):
        self.path = path
        self.manifest = manifest
        self.captures = captures
        self.problems = problems

    # ------------------------------------------------------------------ opening

    @property
    def title(self) -> str:
        return str(self.manifest.get("title", ""))

    @property
    def created_utc(self) -> str:
        return str(self.manifest.get("created_utc", ""))

    @property
    def capture_folder(self) -> Path:
        return self.path / "captures"

    @classmethod
    def create(cls, folder, *, title: str | None = None, exist_ok: bool = False) -> "Session":
        """Make a new session folder (or open it when ``exist_ok`` and it is already a session).

        Raises
        ------
        ExportError
            The folder is already a session (without ``exist_ok``), is a
            non-empty folder that is not a session, or cannot be written.
        """
        folder = Path(folder)
        manifest_path = folder / "session.json"
        if manifest_path.exists():
            if exist_ok:
                return cls.open(folder)
            raise ExportError(f"{folder} is already a session; open it, or choose another folder")
        try:
            folder.mkdir(parents=True, exist_ok=True)
            if any(p.name not in ("captures",) for p in folder.iterdir()):
                raise ExportError(f"{folder} is not empty and is not a session; choose an empty or new folder")
            (folder / "captures").mkdir(exist_ok=True)
        except OSError as exc:
            raise ExportError(f"cannot create session {folder}: {_describe(exc)}") from exc
        manifest = {
            "schema": SESSION_SCHEMA,
            "schema_version": _VERSION,
            "title": " ".join(str(title or folder.name).split()),
            "created_utc": _iso(_utc_now()),
            "software": {"name": "benchspec", "version": __version__},
        }
        write_json_file(manifest_path, manifest)
        return cls.open(folder)

    @classmethod
    def open(cls, folder) -> "Session":
        """Open and validate a session folder; unusable captures are listed in :attr:`problems`.

        Raises
        ------
        FileFormatError
            The folder is not a session, or ``session.json`` is corrupt.
            Nothing is changed on disk.
        """
        folder = Path(folder)
        manifest_path = folder / "session.json"
        if not folder.is_dir():
            raise FileFormatError(f"session folder {folder} does not exist")
        if not manifest_path.exists():
            raise FileFormatError(f"{folder} is not a benchspec session (no session.json); create one with `benchspec session new`")
        try:
            manifest = _check_json_object(manifest_path, read_json_file(manifest_path, what="session manifest"), SESSION_SCHEMA)
        except FileFormatError as exc:
            raise FileFormatError(f"{exc}; the session is unchanged and its captures in {folder / 'captures'} are untouched") from None
        if not isinstance(manifest.get("title", ""), str) or not isinstance(manifest.get("created_utc", ""), str):
            raise FileFormatError(f"{manifest_path}: `title` and `created_utc` must be strings")
        captures, problems = cls._scan(folder / "captures")
        return cls(folder, manifest, tuple(captures), tuple(problems))

    @staticmethod
    def _scan(capture_root: Path) -> tuple[list, list]:
        captures, problems = [], []
        if not capture_root.is_dir():
            return captures, [f"{capture_root} is missing: the session has no captures"]
        def order(path: Path):
            stamp, _, counter = path.name.partition("-")
            return (stamp, int(counter) if counter.isdigit() else -1, path.name)

        for folder in sorted(capture_root.iterdir(), key=order):
            if not folder.is_dir():
                if not folder.name.startswith("."):
                    problems.append(f"{folder}: not a capture folder (ignored)")
                continue
            if folder.name.startswith("."):
                continue
            manifest = folder / "capture.json"
            if not manifest.exists():
                problems.append(f"{folder}: interrupted capture (no capture.json); its files are kept as they are")
                continue
            try:
                record = _validate_capture(manifest, read_json_file(manifest, what="capture manifest"), folder)
            except FileFormatError as exc:
                problems.append(f"{exc} (capture skipped, files kept)")
                continue
            missing = [name for name in record.files if not (folder / name).is_file()]
            if missing:
                problems.append(f"{folder}: missing file(s) {', '.join(missing)} (capture skipped, files kept)")
                continue
            captures.append(record)
        return captures, problems

    def refresh(self) -> "Session":
        """Re-read the folder (e.g. after another program added captures)."""
        return Session.open(self.path)

    # ------------------------------------------------------------------ capturing

    def _new_capture_folder(self, moment: _dt.datetime) -> Path:
        stamp = moment.strftime("%Y%m%dT%H%M%SZ")
        root = self.capture_folder
        try:
            root.mkdir(exist_ok=True)
        except OSError as exc:
            raise ExportError(f"cannot write to session {self.path}: {_describe(exc)}") from exc
        for counter in range(1, 100000):
            folder = root / f"{stamp}-{counter:03d}"
            try:
                folder.mkdir()  # exclusive: fails if the name is taken, so captures never collide
                return folder
            except FileExistsError:
                continue
            except OSError as exc:
                raise ExportError(f"cannot write to session {self.path}: {_describe(exc)}; earlier captures are intact") from exc
        raise ExportError(f"{root}: no free capture name for {stamp}")  # pragma: no cover

    def add_capture(
        self,
        *,
        spectrum: Spectrum | None = None,
        frames: Sequence = (),
        dark_frames: Sequence = (),
        calibration=None,
        metadata: Mapping[str, Any] | None = None,
        view: Mapping[str, Any] | None = None,
        label: str | None = None,
        source_type: str | None = None,
        attachments: Sequence = (),
    ) -> CaptureRecord:
        """Save one capture in a new, never-colliding folder; return its record.

        Parameters
        ----------
        spectrum : Spectrum, optional
            Saved as ``spectrum.json`` (exact) and ``spectrum.csv``.
        frames, dark_frames : sequence of ndarray or path
            Raw frames: arrays (uint8/uint16 -> PNG, float -> .npy) or files,
            copied byte for byte with their extension.
        calibration : mapping, path or object with to_dict, optional
            The calibration used; saved as ``calibration.json``.
        metadata : mapping, optional
            Camera settings, exposure, operator note... (JSON values).
        view : mapping, optional
            What the display showed (ranges, mode, labelled lines...).
        label : str, optional
            A short name shown in lists (default: the spectrum's source or "capture").
        source_type : str, optional
            One of :data:`benchspec.safety.SOURCE_TYPES`.
        attachments : sequence of path
            Other files to keep with the capture (copied).

        Raises
        ------
        ExportError
            The disk is full or the folder read-only: the new capture folder
            is removed again and earlier captures are intact.
        InputError
            A frame or value cannot be saved.
        """
        if spectrum is not None and not isinstance(spectrum, Spectrum):
            raise InputError(f"`spectrum` must be a benchspec Spectrum, got {type(spectrum).__name__}")
        if source_type is not None:
            from .safety import SOURCE_TYPES

            if source_type not in SOURCE_TYPES:
                raise InputError(f"unknown source type {source_type!r}; choose one of: {', '.join(SOURCE_TYPES)}")
        metadata = jsonable(dict(metadata or {}), name="metadata")
        view = jsonable(dict(view or {}), name="view")
        calibration_obj = None
        if calibration is not None:
            if isinstance(calibration, (str, os.PathLike)):
                calibration_obj = read_json_file(calibration, what="calibration file")
            else:
                calibration_obj = jsonable(calibration.to_dict() if hasattr(calibration, "to_dict") and not isinstance(calibration, Mapping) else calibration, name="calibration")
        # Encode everything before touching the disk, so bad input leaves no trace.
        planned: list[tuple[str, str, Any]] = []  # (name, role, bytes or source path)
        for role, items in (("frame", frames), ("dark", dark_frames)):
            for index, frame in enumerate(items):
                prefix = "frame" if role == "frame" else "dark"
                if isinstance(frame, (str, os.PathLike)):
                    source = Path(frame)
                    if not source.is_file():
                        raise InputError(f"frame file {source} does not exist")
                    extension = re.sub(r"[^A-Za-z0-9.]", "", source.suffix.lower()) or ".bin"
                    planned.append((f"{prefix}-{index:03d}{extension}", role, source))
                else:
                    data, extension = _encode_frame(frame)
                    planned.append((f"{prefix}-{index:03d}{extension}", role, data))
        for index, attachment in enumerate(attachments):
            source = Path(attachment)
            if not source.is_file():
                raise InputError(f"attachment {source} does not exist")
            safe = re.sub(r"[^A-Za-z0-9_.\-]", "_", source.name).lstrip(".-_") or f"file{index}"
            planned.append((f"attachment-{index:02d}-{safe}", "attachment", source))
        if label is None:
            label = "capture"
        if source_type is None and spectrum is not None:
            recorded = spectrum.provenance.get("source_type")
            from .safety import SOURCE_TYPES

            source_type = recorded if recorded in SOURCE_TYPES else None
        moment = _utc_now()
        folder = self._new_capture_folder(moment)
        files: dict[str, dict] = {}
        try:
            for name, role, payload in planned:
                target = folder / name
                if isinstance(payload, Path):
                    try:
                        data = payload.read_bytes()
                    except OSError as exc:
                        raise InputError(f"cannot read {payload}: {exc.strerror or exc}") from None
                else:
                    data = payload
                atomic_write_bytes(target, data)
                files[name] = {"sha256": hash_file(target), "role": role}
            if spectrum is not None:
                for name, role in (("spectrum.json", "spectrum"), ("spectrum.csv", "table")):
                    write_spectrum(spectrum, folder / name)
                    files[name] = {"sha256": hash_file(folder / name), "role": role}
            if calibration_obj is not None:
                write_json_file(folder / "calibration.json", calibration_obj)
                files["calibration.json"] = {"sha256": hash_file(folder / "calibration.json"), "role": "calibration"}
            manifest = {
                "schema": CAPTURE_SCHEMA,
                "schema_version": _VERSION,
                "id": folder.name,
                "created_utc": _iso(moment),
                "label": " ".join(str(label).split()),
                "source_type": source_type,
                "software": {"name": "benchspec", "version": __version__},
                "files": files,
                "metadata": metadata,
                "view": view,
            }
            write_json_file(folder / "capture.json", manifest)  # last: the capture now exists
        except BaseException:
            # Remove only what this call created; earlier captures are never touched.
            for name in list(files) + ["capture.json"]:
                with contextlib.suppress(OSError):
                    (folder / name).unlink()
            with contextlib.suppress(OSError):
                for leftover in folder.iterdir():
                    if leftover.name.startswith("."):
                        leftover.unlink()
                folder.rmdir()
            raise
        record = _validate_capture(folder / "capture.json", manifest, folder)
        self.captures = self.captures + (record,)
        return record

    # ------------------------------------------------------------------ loading

    def record(self, capture_id: str) -> CaptureRecord:
        """The record of a capture by id; a unique prefix, "latest", or its number in the session (1 = first,
        as ``session list`` numbers them; up to 3 digits, so that a year such as 2026 is still read as a prefix) also work."""
        if not self.captures:
            raise InputError(f"session {self.path} has no captures yet")
        if capture_id in ("latest", "last"):
            return self.captures[-1]
        exact = [r for r in self.captures if r.id == capture_id]
        if exact:
            return exact[0]
        if capture_id.isdigit() and len(capture_id) <= 3:
            number = int(capture_id)
            if 1 <= number <= len(self.captures):
                return self.captures[number - 1]
            raise InputError(f"capture number {number} is not in session {self.path}: it has {len(self.captures)} "
                             f"capture(s), numbered 1-{len(self.captures)} by `benchspec session list`")
        matches = [r for r in self.captures if r.id.startswith(capture_id)]
        if len(matches) != 1:
            known = ", ".join(r.id for r in self.captures[-5:])
            what = "matches several captures" if matches else "is not a capture of this session"
            raise InputError(f"{capture_id!r} {what}; give its number (`benchspec session list`), its id, "
                             f"or latest; recent captures: {known}")
        return matches[0]

    def load_capture(self, capture_id: str, *, frames: bool = True, verify: bool = True) -> Capture:
        """Load a capture: spectrum, frames (optional) and calibration, checking every file's SHA-256.

        Raises
        ------
        FileFormatError
            A file does not match its recorded hash, or cannot be read.
        """
        record = self.record(capture_id)
        if verify:
            for name, info in record.files.items():
                path = record.folder / name
                if not path.is_file():
                    raise FileFormatError(f"{path} is missing; the capture is incomplete")
                if hash_file(path) != info["sha256"]:
                    raise FileFormatError(f"{path} does not match the hash recorded in capture.json (changed or corrupted since capture)")
        spectrum = None
        if "spectrum.json" in record.files:
            path = record.folder / "spectrum.json"
            spectrum = spectrum_from_dict(read_json_file(path, what="spectrum"), source=path)
        loaded = ()
        if frames:
            loaded = tuple(_decode_frame(record.folder / name) for name in record.files_with_role("frame"))
        calibration = None
        if "calibration.json" in record.files:
            calibration = read_json_file(record.folder / "calibration.json", what="calibration file")
        return Capture(record=record, spectrum=spectrum, frames=loaded, calibration=calibration)

    # ------------------------------------------------------------------ screen state

    def save_screen(self, *, shown: Sequence[str], active: str | None = None, view: Mapping[str, Any] | None = None) -> Path:
        """Record what is on screen (replaces the previous screen state atomically)."""
        ids = {r.id for r in self.captures}
        shown = [str(s) for s in shown]
        unknown = [s for s in shown + ([active] if active else []) if s not in ids]
        if unknown:
            raise InputError(f"capture(s) {', '.join(unknown)} are not in session {self.path}")
        state = {
            "schema": SCREEN_SCHEMA,
            "schema_version": _VERSION,
            "saved_utc": _iso(_utc_now()),
            "shown": shown,
            "active": active,
            "view": jsonable(dict(view or {}), name="view"),
        }
        return write_json_file(self.path / "screen.json", state, force=True)

    def restore_screen(self) -> ScreenState:
        """What was on screen when last saved, with the shown captures loaded.

        Without a saved screen state, the latest capture is shown with its own view.
        Captures that can no longer be loaded are listed in ``problems``.
        """
        path = self.path / "screen.json"
        problems = []
        if path.exists():
            try:
                state = _check_json_object(path, read_json_file(path, what="screen state"), SCREEN_SCHEMA)
                if not isinstance(state.get("shown"), list) or not all(isinstance(s, str) for s in state["shown"]):
                    raise FileFormatError(f"{path}: `shown` must be a list of capture ids")
                if state.get("active") is not None and not isinstance(state.get("active"), str):
                    raise FileFormatError(f"{path}: `active` must be a capture id or null")
                if not isinstance(state.get("view", {}), dict):
                    raise FileFormatError(f"{path}: `view` must be an object")
                shown, active, view = state["shown"], state.get("active"), state.get("view", {})
            except FileFormatError as exc:
                problems.append(f"{exc}; showing the latest capture instead")
                shown, active, view = None, None, None
        else:
            shown, active, view = None, None, None
        if shown is None:
            if not self.captures:
                return ScreenState(shown=(), active=None, view={}, captures=(), problems=tuple(problems))
            latest = self.captures[-1]
            shown, active, view = [latest.id], latest.id, dict(latest.view)
        captures = []
        for capture_id in shown:
            try:
                captures.append(self.load_capture(capture_id, frames=False))
            except (FileFormatError, InputError) as exc:
                listed = f" (listed in {path})" if path.exists() else ""
                problems.append(f"capture {capture_id}{listed}: {exc}")
        kept = tuple(c.record.id for c in captures)
        if active not in kept:
            active = kept[-1] if kept else None
        return ScreenState(shown=kept, active=active, view=dict(view), captures=tuple(captures), problems=tuple(problems))

    def summary_lines(self) -> list[str]:
        """A plain-text listing of the session for the command line."""
        lines = [f"session {self.path}: {self.title!r}, created {self.created_utc}, {len(self.captures)} capture(s)"]
        width = len(str(len(self.captures)))
        for number, record in enumerate(self.captures, 1):
            n_frames = len(record.files_with_role("frame"))
            has = [f"{n_frames} frame(s)"]
            if "spectrum.json" in record.files:
                has.append("spectrum")
            if "calibration.json" in record.files:
                has.append("calibration")
            lines.append(f"  {number:>{width}}  {record.id}  {record.label}  ({', '.join(has)})")
        lines.extend(f"  problem: {p}" for p in self.problems)
        return lines


def log_capture(session_folder, *, title: str | None = None, **capture) -> CaptureRecord:
    """Add a capture to the session in ``session_folder``, creating the session if needed.

    The keyword arguments are those of :meth:`Session.add_capture`.
    """
    session = Session.create(session_folder, title=title, exist_ok=True)
    return session.add_capture(**capture)
