"""A time series of spectra in one NetCDF file, written as it is made.

``benchspec extract --each VIDEO --calibration CAL.json --out RUN.nc`` puts
every frame's spectrum into one file instead of one CSV per frame. An hour
of 30 fps video is 108,000 spectra: as CSV files that is 108,000 files and
about 9 GB of text; here it is one file of about 1.3 GB (1,264 columns), and
writing a frame costs a few microseconds instead of formatting 2,500 floats
and creating a file (on the 2-core build machine, creating one empty file
on its ext4 disk took 0.42 ms of CPU).

The format is NetCDF classic with 64-bit offsets (CDF-2, Unidata's
"NetCDF Classic and 64-bit Offset Format" specification), an open standard
that scipy (:class:`scipy.io.netcdf_file`), xarray, MATLAB's ``ncread``,
R, ncdump and most plotting tools read. It is written here directly (the
header is a few hundred bytes of big-endian integers and names), so the
frames can be streamed with bounded memory: :class:`scipy.io.netcdf_file`
holds a file's data in memory until it is closed.

Layout
------
Dimensions ``frame`` (the record dimension: one record per spectrum) and
``column`` (one per sample of the spectrum, wavelength increasing).

Fixed variables: ``wavelength_nm(column)`` (double, nm in air; absent for
an uncalibrated series), ``pixel(column)`` (double, the rectified band's
column), ``wavelength_uncertainty_nm(column)`` (double, when the solution
gives one).

Record variables: ``intensity(frame, column)`` and
``uncertainty(frame, column)`` (float: the extraction computes in float32,
so nothing is lost), ``saturated(frame, column)`` (byte, 0 or 1),
``frame_index(frame)`` (int, the frame's index in its source file),
``source(frame)`` (int, an index into the global attribute
``sources_json``), ``band_across_px(frame)`` (float, the band's shift across
the dispersion at the last band check; NaN where not measured) and
``band_moved(frame)`` (int, 1 where that check found the setup bumped).

Global attributes: ``title``, ``schema`` (``benchspec.series/1``),
``software``, ``created_utc``, ``closed_utc``, ``complete`` (``"yes"``, or
``"no: "`` and the error that stopped the series), ``quantity``,
``intensity_unit``, ``sources_json`` (JSON list of the frames' sources) and
``provenance_json`` (the first spectrum's provenance as JSON, without the
parts that change from frame to frame).

Safety of the file
------------------
The series is written under a temporary name in the destination folder and
renamed when it is closed, so the destination never holds a half-written
series and is replaced only with ``force``. The number of records in the
header is brought up to date every :data:`RECORD_COUNT_EVERY` records, so
if the process dies the temporary file still reads as the series up to
then. When the series stops on an error, the spectra made so far are kept:
the file is closed with ``complete = "no: ..."`` and renamed into place.
"""

from __future__ import annotations

import json
import math
import os
import secrets
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import ExportError, FileFormatError, InputError
from .spectrum import Spectrum

__all__ = ["SERIES_SCHEMA", "RECORD_COUNT_EVERY", "SeriesFile", "Series", "read_series"]

SERIES_SCHEMA = "benchspec.series/1"

#: records between two updates of the record count in the header (10 s of 30 fps video)
RECORD_COUNT_EVERY = 300

#: header bytes kept free after the first header, so that the final one (with every source's name) fits
_HEADER_RESERVE = 64 * 1024

# NetCDF classic tags and types (specification: NC_DIMENSION, NC_VARIABLE, NC_ATTRIBUTE; nc_type)
_NC_DIMENSION, _NC_VARIABLE, _NC_ATTRIBUTE = 0x0A, 0x0B, 0x0C
_NC_BYTE, _NC_CHAR, _NC_INT, _NC_FLOAT, _NC_DOUBLE = 1, 2, 4, 5, 6
_TYPE_CODES = {_NC_BYTE: ">i1", _NC_INT: ">i4", _NC_FLOAT: ">f4", _NC_DOUBLE: ">f8"}

#: frame-by-frame provenance entries, stored as record variables (or not at all) instead of in provenance_json
_PER_FRAME_KEYS = ("frames", "created_utc", "time_series_index", "band_check")


def _pad(data: bytes) -> bytes:
    return data + b"\0" * (-len(data) % 4)


def _int(value: int) -> bytes:
    return struct.pack(">i", value)


def _name(text: str) -> bytes:
    data = text.encode("ascii")
    return _int(len(data)) + _pad(data)


def _attributes(attrs: dict[str, Any]) -> bytes:
    if not attrs:
        return _int(0) + _int(0)  # ABSENT
    out = [_int(_NC_ATTRIBUTE), _int(len(attrs))]
    for key, value in attrs.items():
        if isinstance(value, str):
            data = value.encode("utf-8")
            out += [_name(key), _int(_NC_CHAR), _int(len(data)), _pad(data)]
        elif isinstance(value, (int, np.integer)) and not isinstance(value, bool):
            out += [_name(key), _int(_NC_INT), _int(1), _int(int(value))]
        else:
            out += [_name(key), _int(_NC_DOUBLE), _int(1), struct.pack(">d", float(value))]
    return b"".join(out)


@dataclass
class _Variable:
    name: str
    nc_type: int
    dims: tuple[int, ...]  # dimension ids: 0 = frame (record), 1 = column
    attrs: dict[str, Any]
    count: int  # values per record (record variable) or in all (fixed variable)
    begin: int = 0

    @property
    def record(self) -> bool:
        return bool(self.dims) and self.dims[0] == 0

    @property
    def vsize(self) -> int:
        size = self.count * np.dtype(_TYPE_CODES[self.nc_type]).itemsize
        return size + (-size % 4)


def _header(numrecs: int, n_columns: int, attrs: dict[str, Any], variables: list[_Variable]) -> bytes:
    out = [b"CDF\x02", _int(numrecs),
           _int(_NC_DIMENSION), _int(2), _name("frame"), _int(0), _name("column"), _int(n_columns),
           _attributes(attrs), _int(_NC_VARIABLE), _int(len(variables))]
    for var in variables:
        out += [_name(var.name), _int(len(var.dims))] + [_int(d) for d in var.dims]
        out += [_attributes(var.attrs), _int(var.nc_type), _int(var.vsize), struct.pack(">q", var.begin)]
    return b"".join(out)


def _utc_now() -> str:
    import datetime as _dt

    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _ascii_json(value: Any) -> str:
    from .io import jsonable

    return json.dumps(jsonable(value, name="provenance"), ensure_ascii=True, allow_nan=False, separators=(",", ":"))


class SeriesFile:
    """Stream spectra of one setup into a NetCDF time-series file (see the module docstring).

    Parameters
    ----------
    path : str or Path
        Destination, ``.nc``.
    force : bool, keyword-only
        Replace an existing file (when the series is closed).

    Every spectrum written must share the first one's axis (same columns,
    wavelengths and pixels): one setup, one calibration. Use as a context
    manager; on an exception inside the block the spectra written so far
    are kept and the file says it is incomplete.

    Examples
    --------
    ::

        with SeriesFile("run.nc") as series:
            for spectrum in iter_extract_frames("run.avi", "cal.json"):
                series.write(spectrum)
    """

    def __init__(self, path, *, force: bool = False):
        path = Path(path)
        if path.suffix.lower() != ".nc":
            raise ExportError(f"{path}: a time-series file must end in .nc (NetCDF)")
        if path.is_dir():
            raise ExportError(f"{path} is a folder; give a file name to write")
        if not force and (path.exists() or path.is_symlink()):
            raise ExportError(f"{path} already exists; pass --force to overwrite it, or choose another name")
        if not path.parent.is_dir():
            raise ExportError(f"cannot write {path}: folder {path.parent} does not exist; create it first or choose another")
        self.path = path
        self.force = bool(force)
        self.count = 0
        self._temp = path.parent / f".{path.name}.{secrets.token_hex(4)}.tmp"
        self._handle = None
        self._sources: list[str] = []
        self._source_ids: dict[str, int] = {}
        self._closed = False
        self._pending: list[bytes] = []

    # ------------------------------------------------------------------ layout, on the first spectrum
    def _start(self, spectrum: Spectrum) -> None:
        n = spectrum.size
        if n < 1:
            raise InputError("the spectrum is empty; nothing to write")
        self._axis = (None if spectrum.wavelength_nm is None else np.asarray(spectrum.wavelength_nm, np.float64).copy(),
                      np.asarray(spectrum.pixel, np.float64).copy(),
                      None if spectrum.wavelength_uncertainty_nm is None
                      else np.asarray(spectrum.wavelength_uncertainty_nm, np.float64).copy())
        provenance = dict(spectrum.provenance or {})
        self._quantity = str(provenance.get("quantity", "intensity"))
        unit = str(provenance.get("intensity_unit", "counts"))
        fixed = []
        if self._axis[0] is not None:
            fixed.append(_Variable("wavelength_nm", _NC_DOUBLE, (1,), {"units": "nm", "long_name": "wavelength in air"}, n))
        fixed.append(_Variable("pixel", _NC_DOUBLE, (1,), {"units": "px", "long_name": "column of the rectified band"}, n))
        if self._axis[2] is not None:
            fixed.append(_Variable("wavelength_uncertainty_nm", _NC_DOUBLE, (1,),
                                   {"units": "nm", "long_name": "1-sigma uncertainty of the wavelength solution"}, n))
        records = [
            _Variable("intensity", _NC_FLOAT, (0, 1), {"units": unit, "long_name": self._quantity}, n),
            _Variable("uncertainty", _NC_FLOAT, (0, 1), {"units": unit, "long_name": "1-sigma uncertainty of intensity"}, n),
            _Variable("saturated", _NC_BYTE, (0, 1), {"long_name": "1 where a pixel of the column reached the sensor's maximum"}, n),
            _Variable("frame_index", _NC_INT, (0,), {"long_name": "index of the frame in its source"}, 1),
            _Variable("source", _NC_INT, (0,), {"long_name": "index into the global attribute sources_json"}, 1),
            _Variable("band_across_px", _NC_FLOAT, (0,),
                      {"units": "px", "long_name": "band shift across the dispersion at the last band check (NaN: not measured)"}, 1),
            _Variable("band_moved", _NC_INT, (0,), {"long_name": "1 where the last band check found the setup moved"}, 1),
        ]
        self._variables = fixed + records
        self._records = records
        shared = {k: v for k, v in provenance.items() if k not in _PER_FRAME_KEYS}
        self._attrs = {
            "title": "benchspec time series",
            "schema": SERIES_SCHEMA,
            "software": f"benchspec {(provenance.get('software') or {}).get('version', '')}".strip(),
            "created_utc": _utc_now(),
            "closed_utc": "",
            "complete": "no: still being written (or the process stopped)",
            "quantity": self._quantity,
            "intensity_unit": unit,
            "sources_json": "[]",
            "provenance_json": _ascii_json(shared),
        }
        first = len(_header(0, n, self._attrs, self._variables))
        offset = first + _HEADER_RESERVE
        offset += -offset % 8
        self._data_start = offset
        for var in fixed:
            var.begin = offset
            offset += var.vsize
        self._record_start = offset
        for var in records:  # a record holds each record variable's slab in turn
            var.begin = offset
            offset += var.vsize
        self._record_size = offset - self._record_start
        try:
            fd = os.open(self._temp, os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
            self._handle = os.fdopen(fd, "r+b")
            self._handle.write(_header(0, n, self._attrs, self._variables).ljust(self._data_start, b"\0"))
            for var, values in zip(fixed, [a for a in self._axis if a is not None]):
                self._handle.write(_pad(values.astype(">f8").tobytes()))
        except OSError as exc:
            self._discard()
            from .io import _describe_os_error

            raise ExportError(f"could not write {self.path}: {_describe_os_error(exc)}; nothing was written") from exc

    def _source_id(self, spectrum: Spectrum) -> tuple[int, int]:
        frames = (spectrum.provenance or {}).get("frames") or [{}]
        record = frames[0] if isinstance(frames[0], dict) else {}
        name = str(record.get("path"))
        sid = self._source_ids.get(name)
        if sid is None:
            sid = self._source_ids[name] = len(self._sources)
            self._sources.append(name)
        index = record.get("frame_index")
        return sid, -1 if index is None else int(index)

    # ------------------------------------------------------------------ public
    def write(self, spectrum: Spectrum) -> None:
        """Append one spectrum as the next record."""
        if self._closed:
            raise ExportError("the series file is closed; start a new one")
        if not isinstance(spectrum, Spectrum):
            raise InputError(f"`spectrum` must be a Spectrum, got {type(spectrum).__name__}")
        if self._handle is None:
            self._start(spectrum)
        else:
            self._check_axis(spectrum)
        sid, index = self._source_id(spectrum)
        band = (spectrum.provenance or {}).get("band_check") or {}
        across = band.get("across_px") if band.get("measured") else None
        n = self._axis[1].size
        saturated = (np.zeros(n, ">i1") if spectrum.saturated is None
                     else np.asarray(spectrum.saturated, bool).astype(">i1"))
        self._pending.append(b"".join((
            np.asarray(spectrum.intensity, ">f4").tobytes(),
            np.asarray(spectrum.uncertainty, ">f4").tobytes(),
            _pad(saturated.tobytes()),
            _int(index), _int(sid),
            struct.pack(">f", math.nan if across is None else float(across)),
            _int(1 if band.get("moved") else 0),
        )))
        self.count += 1
        if len(self._pending) >= 32:
            self._flush_pending()
        if self.count % RECORD_COUNT_EVERY == 0:
            self._flush_pending()
            self._write_count()

    def _check_axis(self, spectrum: Spectrum) -> None:
        wavelength, pixel, _ = self._axis
        same = spectrum.size == pixel.size and np.array_equal(np.asarray(spectrum.pixel, float), pixel)
        if same and (wavelength is None) != (spectrum.wavelength_nm is None):
            same = False
        if same and wavelength is not None:
            same = np.array_equal(np.asarray(spectrum.wavelength_nm, float), wavelength)
        if not same:
            raise InputError(f"spectrum {self.count} of the series has another axis than the first (columns or "
                             "wavelengths differ); a series file holds spectra of one setup and calibration")

    def _flush_pending(self) -> None:
        if not self._pending:
            return
        data = b"".join(self._pending)
        self._pending.clear()
        try:
            self._handle.seek(0, os.SEEK_END)
            self._handle.write(data)
        except OSError as exc:
            from .io import _describe_os_error

            raise ExportError(f"could not write {self.path}: {_describe_os_error(exc)}") from exc

    def _write_count(self) -> None:
        self._handle.flush()
        self._handle.seek(4)
        self._handle.write(_int(self.count))
        self._handle.flush()

    def close(self, *, error: BaseException | None = None) -> Path | None:
        """Finish the file and rename it into place; the path, or None when no spectrum was written.

        ``error``: the series stopped on it; the file is kept and says so.
        """
        if self._closed:
            return self.path if self.count else None
        self._closed = True
        if self._handle is None:
            return None
        try:
            self._flush_pending()
            self._attrs["closed_utc"] = _utc_now()
            self._attrs["complete"] = "yes" if error is None else f"no: {type(error).__name__}: {error}"[:2000]
            self._attrs["sources_json"] = json.dumps(self._sources, ensure_ascii=True)
            header = _header(self.count, self._axis[1].size, self._attrs, self._variables)
            if len(header) > self._data_start:  # a very long list of sources: keep the first header's room
                self._attrs["sources_json"] = json.dumps(self._sources[:50] + ["... (list cut short)"], ensure_ascii=True)
                header = _header(self.count, self._axis[1].size, self._attrs, self._variables)
            self._handle.flush()
            self._handle.seek(0)
            self._handle.write(header.ljust(self._data_start, b"\0"))
            self._handle.flush()
            os.fsync(self._handle.fileno())
            self._handle.close()
            self._handle = None
            if not self.force and self.path.exists():
                raise ExportError(f"{self.path} was created by someone else while writing; pass --force to overwrite it, or choose another name")
            os.replace(self._temp, self.path)
        except OSError as exc:
            self._discard()
            from .io import _describe_os_error

            raise ExportError(f"could not write {self.path}: {_describe_os_error(exc)}; nothing was written") from exc
        except BaseException:
            self._discard()
            raise
        from .io import _sync_folder

        _sync_folder(self.path.parent)
        return self.path

    def _discard(self) -> None:
        if self._handle is not None:
            try:
                self._handle.close()
            except OSError:
                pass
            self._handle = None
        try:
            if os.path.lexists(self._temp):
                os.unlink(self._temp)
        except OSError:
            pass

    def __enter__(self) -> "SeriesFile":
        return self

    def __exit__(self, kind, value, traceback) -> None:
        if kind is None:
            self.close()
        elif issubclass(kind, Exception):
            try:  # the spectra already made are kept; the error raised is the one that stopped the series
                self.close(error=value)
            except Exception:
                pass
        else:  # KeyboardInterrupt and the like: keep what there is as well
            try:
                self.close(error=value if value is not None else kind())
            except Exception:
                pass


@dataclass(frozen=True)
class Series:
    """A time series read back from a ``.nc`` file: arrays of shape (n_frames, n_columns) and the shared axis."""

    wavelength_nm: np.ndarray | None
    pixel: np.ndarray
    wavelength_uncertainty_nm: np.ndarray | None
    intensity: np.ndarray
    uncertainty: np.ndarray
    saturated: np.ndarray
    frame_index: np.ndarray
    source: np.ndarray
    band_across_px: np.ndarray
    band_moved: np.ndarray
    sources: list[str]
    provenance: dict
    attributes: dict = field(default_factory=dict)

    @property
    def n_frames(self) -> int:
        return int(self.intensity.shape[0])

    @property
    def complete(self) -> bool:
        return self.attributes.get("complete") == "yes"

    def spectrum(self, k: int) -> Spectrum:
        """Frame ``k`` as a Spectrum, with its provenance (the shared record plus this frame's source)."""
        if not -self.n_frames <= k < self.n_frames:
            raise InputError(f"frame {k} is outside the series (0..{self.n_frames - 1})")
        k = k % self.n_frames
        provenance = dict(self.provenance)
        sid = int(self.source[k])
        provenance["frames"] = [{"path": self.sources[sid] if 0 <= sid < len(self.sources) else None,
                                 "frame_index": int(self.frame_index[k]), "sha256": None, "role": "signal"}]
        provenance["time_series_index"] = k
        return Spectrum(intensity=self.intensity[k].astype(np.float64), uncertainty=self.uncertainty[k].astype(np.float64),
                        pixel=self.pixel, wavelength_nm=self.wavelength_nm,
                        wavelength_uncertainty_nm=self.wavelength_uncertainty_nm,
                        saturated=self.saturated[k].astype(bool), provenance=provenance)


def read_series(path) -> Series:
    """Read a time-series file written by :class:`SeriesFile` (with SciPy's NetCDF reader).

    The whole series is read into memory (about 9 bytes a column a frame:
    1.2 GB for an hour of 30 fps video at 1,264 columns).
    """
    from scipy.io import netcdf_file

    path = Path(path)
    if not path.is_file():
        raise FileFormatError(f"{path} does not exist or is not a file; give a .nc series written by benchspec extract --each")
    try:
        with netcdf_file(path, "r", mmap=False) as handle:
            attrs = {k: (v.decode("utf-8") if isinstance(v, bytes) else v) for k, v in handle._attributes.items()}
            if attrs.get("schema") != SERIES_SCHEMA:
                raise FileFormatError(f"{path} is a NetCDF file but not a benchspec series (schema {attrs.get('schema')!r}); "
                                      f"this reader takes {SERIES_SCHEMA}")
            v = handle.variables

            def get(name, dtype):
                return None if name not in v else np.array(v[name].data, dtype=dtype)

            series = Series(
                wavelength_nm=get("wavelength_nm", np.float64), pixel=get("pixel", np.float64),
                wavelength_uncertainty_nm=get("wavelength_uncertainty_nm", np.float64),
                intensity=get("intensity", np.float32), uncertainty=get("uncertainty", np.float32),
                saturated=get("saturated", np.int8).astype(bool), frame_index=get("frame_index", np.int64),
                source=get("source", np.int64), band_across_px=get("band_across_px", np.float32),
                band_moved=get("band_moved", np.int64).astype(bool),
                sources=json.loads(attrs.get("sources_json", "[]")), provenance=json.loads(attrs.get("provenance_json", "{}")),
                attributes=attrs)
    except FileFormatError:
        raise
    except Exception as exc:  # scipy's reader raises TypeError/ValueError/OSError on damaged files
        raise FileFormatError(f"{path} is not a readable NetCDF series ({type(exc).__name__}: {exc}); "
                              "was it cut short? Read an intact copy") from None
    return series
