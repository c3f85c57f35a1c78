"""The calibration file: geometry + wavelength solution of one setup, as versioned JSON.

A calibration made once (``benchspec calibrate``) is applied to later frames
of the same setup (``benchspec extract``). The file is UTF-8 JSON, written
atomically (temporary file in the same folder, then ``os.replace``) and never
over an existing file unless ``force=True`` (the command line's ``--force``).
Reading validates it against the schema below; anything else is a
:class:`~benchspec.errors.FileFormatError` that names the field.

Schema ``benchspec.calibration/1``
----------------------------------
Top level (all keys required unless marked optional)::

    schema              "benchspec.calibration/1"
    created_utc         ISO 8601 time the calibration was made, e.g. "2026-12-01T19:30:00Z"
    software            {"name": "benchspec", "version": "0.1.0"}
    units               {"wavelength": "nm", "medium": "air", "pixel": "rectified column"}
    geometry            benchspec.geometry.Geometry.to_dict(): frame size, band position,
                        rotation, curvature (tilt/curvature polynomials), aperture and
                        background rows (its own "schema" key is checked too).
                        Optional "curvature_grating": [] or [k, theta_rad, s_x0_px, f_px, sign],
                        the physical curvature shape c(s) = c_0 + k tan(theta + atan(sign
                        (s - s_x0) / f)) taken from a grating-shaped solution; files without
                        it (written before it existed) load as [] (polynomial curvature)
    wavelength_calibration
        solution        {"model": "polynomial", "order": 1-3,
                         "coefficients_nm": [c0, ...],           lambda = sum c_k t^k,
                         "pixel_centre": p0, "pixel_scale": s,   t = (pixel - p0) / s,
                         "covariance_nm2": [[...]],              (order+1) x (order+1),
                         "pixel_range": [first, last]}           rectified columns fitted
                        or, when the grating model fits better (see benchspec.wavecal):
                        {"model": "grating", "parameter_names": ["A_nm", "theta_rad", "x0_px", "f_px"],
                         "parameters": [A, theta, x0, f],        lambda = A sin(theta + atan(sign (pixel - x0) / f)) + B,
                         "sign": 1 | -1, "offset_nm": B,         (B = 0: normal incidence)
                         "covariance": [[...]],                  4 x 4, in the parameters' units,
                         "pixel_centre", "pixel_scale", "pixel_range"}
                        "model" is required; files written before the grating model existed
                        all say "polynomial" and load unchanged.
                        Optional "alternative": the other model family fitted to the same lines
                        (an object of the other form above) with its BIC weight "weight" (0-1);
                        the solution's uncertainty adds weight * (alternative - solution)^2
                        (model averaging). Files without it load with no alternative.
        matches         one object per matched line: pixel, pixel_uncertainty,
                        reference_nm, reference_uncertainty_nm, fitted_nm, residual_nm,
                        residual_px, species, members_nm (blend members), lamp,
                        used_in_fit, anchor, rejected, blended, saturated, snr
                        (null for a manual --pair: no detected line)
        rms_px, rms_nm  weighted RMS residual of the fitted lines
        max_uncertainty_nm   largest 1-sigma of the solution between the outer lines
        verdict         "good" | "fair" | "poor";  verdict_reason: one line
        lamps           lamp names; line_list_sources: "species: source" strings
        coverage_fraction, n_detected, notes
    line_list           the reference lines the matcher could use: [{"wavelength_nm",
                        "relative_intensity", "species", "tolerance_nm"}, ...]
    frames              [{"path", "sha256", "lamp"}, ...]   lamp frames (sha256 of the file;
                        null for frames passed as arrays)
    dark_frames         [{"path", "sha256"}, ...]
    settings            how the frames were turned into a spectrum: gamma, channel,
                        stacking method, extraction method, min_snr, hint, manual pairs,
                        encoding of the frames (lossless, block-coded, video)
    reference_spectrum  intensity of the calibration spectrum per rectified column
                        (n_columns numbers), used to notice a band that moved along
                        the dispersion

Every number must be finite; units other than the ones above are refused.
A future incompatible change will bump the version to ``/2``; readers refuse
versions they do not know.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Mapping, Sequence

from . import __version__
from .errors import ExportError, FileFormatError, InputError
from .geometry import Geometry
from .wavecal import GRATING_PARAMETERS, MatchedLine, WavelengthCalibration

__all__ = ["SCHEMA", "UNITS", "Calibration", "write_calibration", "read_calibration", "calibration_from_dict"]

SCHEMA = "benchspec.calibration/1"
UNITS = {"wavelength": "nm", "medium": "air", "pixel": "rectified column"}
_TOP_KEYS = ("schema", "created_utc", "software", "units", "geometry", "wavelength_calibration", "line_list",
             "frames", "dark_frames", "settings", "reference_spectrum")
_MATCH_KEYS = {
    "pixel": float, "pixel_uncertainty": float, "reference_nm": float, "reference_uncertainty_nm": float,
    "fitted_nm": float, "residual_nm": float, "residual_px": float, "species": str, "members_nm": list, "lamp": str,
    "used_in_fit": bool, "anchor": bool, "rejected": bool, "blended": bool, "saturated": bool, "snr": float,
}


@dataclass(frozen=True)
class Calibration:
    """Geometry and wavelength solution of a setup, with how they were made.

    Attributes
    ----------
    geometry : Geometry
    wavelength : WavelengthCalibration
    frames : tuple of dict
        ``{"path", "sha256", "lamp"}`` per lamp frame.
    dark_frames : tuple of dict
    settings : dict
    line_list : tuple of dict
    reference_spectrum : tuple of float
        Calibration spectrum per rectified column.
    created_utc : str
    software_version : str
    """

    geometry: Geometry
    wavelength: WavelengthCalibration
    frames: tuple = ()
    dark_frames: tuple = ()
    settings: Mapping[str, Any] = field(default_factory=dict)
    line_list: tuple = ()
    reference_spectrum: tuple = ()
    created_utc: str = ""
    software_version: str = __version__

    @property
    def frame_shape(self) -> tuple[int, int]:
        """(height, width) of the frames this calibration applies to."""
        return self.geometry.frame_shape

    @property
    def rms_px(self) -> float:
        return self.wavelength.rms_px

    @property
    def verdict(self) -> str:
        return self.wavelength.verdict

    def to_dict(self) -> dict:
        """The JSON document (see the module docstring for the schema)."""
        return {
            "schema": SCHEMA,
            "created_utc": self.created_utc or _utc_now(),
            "software": {"name": "benchspec", "version": self.software_version},
            "units": dict(UNITS),
            "geometry": self.geometry.to_dict(),
            "wavelength_calibration": self.wavelength.to_dict(),
            "line_list": [dict(entry) for entry in self.line_list],
            "frames": [dict(entry) for entry in self.frames],
            "dark_frames": [dict(entry) for entry in self.dark_frames],
            "settings": dict(self.settings),
            "reference_spectrum": [float(v) for v in self.reference_spectrum],
        }


def _utc_now() -> str:
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


# --------------------------------------------------------------------------- validation


def _fail(origin: str, message: str):
    raise FileFormatError(f"{origin}: {message}; recalibrate (benchspec calibrate) to make a new file")


def _check_finite(value, where: str, origin: str):
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            _fail(origin, f"`{where}` holds a non-finite number ({value})")
        return
    if isinstance(value, Mapping):
        for key, item in value.items():
            _check_finite(item, f"{where}.{key}", origin)
        return
    if isinstance(value, (list, tuple)):
        for k, item in enumerate(value):
            _check_finite(item, f"{where}[{k}]", origin)
        return
    _fail(origin, f"`{where}` has an unsupported value of type {type(value).__name__}")


def _number(value, where: str, origin: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        _fail(origin, f"`{where}` must be a number, got {type(value).__name__}")
    return float(value)


def _numbers(values, where: str, origin: str, *, length: int | None = None) -> list[float]:
    if not isinstance(values, list):
        _fail(origin, f"`{where}` must be a list of numbers")
    out = [_number(v, f"{where}[{k}]", origin) for k, v in enumerate(values)]
    if length is not None and len(out) != length:
        _fail(origin, f"`{where}` must have {length} numbers, has {len(out)}")
    return out


def _validate_solution(solution, origin: str, n_columns: int, name: str, *, nested: bool = False) -> None:
    """Checks of a wavelength solution's object (and of its optional ``alternative``, one level deep)."""
    if not isinstance(solution, Mapping):
        _fail(origin, f"`wavelength_calibration.{name}` must be an object")
    model = solution.get("model")
    if model == "polynomial":
        coefficients = _numbers(solution.get("coefficients_nm"), f"{name}.coefficients_nm", origin)
        if not 2 <= len(coefficients) <= 4:
            _fail(origin, f"`{name}.coefficients_nm` must hold 2-4 numbers (order 1-3), has {len(coefficients)}")
        order = solution.get("order")
        if order != len(coefficients) - 1:
            _fail(origin, f"`{name}.order` is {order!r} but there are {len(coefficients)} coefficients")
        covariance = solution.get("covariance_nm2")
        cov_key = "covariance_nm2"
    elif model == "grating":
        names = solution.get("parameter_names")
        if names != list(GRATING_PARAMETERS):
            _fail(origin, f"`{name}.parameter_names` must be {list(GRATING_PARAMETERS)}, got {names!r}")
        coefficients = _numbers(solution.get("parameters"), f"{name}.parameters", origin, length=len(GRATING_PARAMETERS))
        a_nm, theta_rad, _, f_px = coefficients
        if not a_nm > 0 or not f_px > 0:
            _fail(origin, f"`{name}.parameters` A_nm and f_px must be positive, were {a_nm} and {f_px}")
        if not abs(theta_rad) < math.pi / 2:
            _fail(origin, f"`{name}.parameters` theta_rad must lie within +-pi/2, was {theta_rad}")
        sign = _number(solution.get("sign"), f"{name}.sign", origin)
        if sign not in (1.0, -1.0):
            _fail(origin, f"`{name}.sign` must be 1 or -1, was {sign}")
        _number(solution.get("offset_nm", 0.0), f"{name}.offset_nm", origin)
        covariance = solution.get("covariance")
        cov_key = "covariance"
    else:
        _fail(origin, f"`{name}.model` must be 'polynomial' or 'grating', got {model!r}")
    if not isinstance(covariance, list) or len(covariance) != len(coefficients):
        _fail(origin, f"`{name}.{cov_key}` must be a square list of lists matching the coefficients")
    for k, row in enumerate(covariance):
        _numbers(row, f"{name}.{cov_key}[{k}]", origin, length=len(coefficients))
    scale = _number(solution.get("pixel_scale"), f"{name}.pixel_scale", origin)
    _number(solution.get("pixel_centre"), f"{name}.pixel_centre", origin)
    if not scale > 0:
        _fail(origin, f"`{name}.pixel_scale` must be positive, was {scale}")
    pixel_range = _numbers(solution.get("pixel_range"), f"{name}.pixel_range", origin, length=2)
    if pixel_range[0] < -0.5 or pixel_range[1] > n_columns - 0.5:
        _fail(origin, f"`{name}.pixel_range` {pixel_range} lies outside the geometry's {n_columns} columns")
    alternative = solution.get("alternative")
    if alternative is not None:
        if nested:
            _fail(origin, f"`{name}.alternative` cannot hold another alternative")
        _validate_solution(alternative, origin, n_columns, f"{name}.alternative", nested=True)
        weight = _number(alternative.get("weight"), f"{name}.alternative.weight", origin)
        if not 0.0 <= weight <= 1.0:
            _fail(origin, f"`{name}.alternative.weight` must lie within 0-1, was {weight}")


def _validate_wavelength(data, origin: str, n_columns: int) -> WavelengthCalibration:
    if not isinstance(data, Mapping):
        _fail(origin, "`wavelength_calibration` must be an object")
    for key in ("solution", "matches", "rms_px", "rms_nm", "max_uncertainty_nm", "verdict", "verdict_reason", "lamps",
                "line_list_sources", "coverage_fraction", "n_detected"):
        if key not in data:
            _fail(origin, f"`wavelength_calibration.{key}` is missing")
    _validate_solution(data["solution"], origin, n_columns, "solution")
    if not isinstance(data["matches"], list) or not data["matches"]:
        _fail(origin, "`wavelength_calibration.matches` must be a non-empty list")
    for k, match in enumerate(data["matches"]):
        if not isinstance(match, Mapping):
            _fail(origin, f"`matches[{k}]` must be an object")
        for key, kind in _MATCH_KEYS.items():
            if key not in match:
                _fail(origin, f"`matches[{k}].{key}` is missing")
            value = match[key]
            if key == "snr" and value is None and match.get("species") == "manual":
                continue  # a manual pair has no detected line, so no SNR
            if kind is float and (isinstance(value, bool) or not isinstance(value, (int, float))):
                _fail(origin, f"`matches[{k}].{key}` must be a number")
            if kind is not float and not isinstance(value, kind):
                _fail(origin, f"`matches[{k}].{key}` must be a {kind.__name__}")
        unknown = set(match) - set(_MATCH_KEYS)
        if unknown:
            _fail(origin, f"`matches[{k}]` has unknown field(s) {', '.join(sorted(unknown))}")
        if not 200.0 <= float(match["reference_nm"]) <= 1200.0:
            _fail(origin, f"`matches[{k}].reference_nm` is {match['reference_nm']}, not a wavelength in nm (200-1200)")
    for key in ("lamps", "line_list_sources"):
        if not isinstance(data[key], list) or not all(isinstance(v, str) for v in data[key]):
            _fail(origin, f"`wavelength_calibration.{key}` must be a list of strings")
    if not isinstance(data["verdict_reason"], str):
        _fail(origin, "`wavelength_calibration.verdict_reason` must be a string")
    if data["verdict"] not in ("good", "fair", "poor"):
        _fail(origin, f"`verdict` must be good, fair or poor, got {data['verdict']!r}")
    for key in ("rms_px", "rms_nm", "max_uncertainty_nm", "coverage_fraction"):
        if _number(data[key], key, origin) < 0:
            _fail(origin, f"`{key}` must not be negative")
    try:
        return WavelengthCalibration.from_dict(data)
    except (KeyError, TypeError, ValueError) as exc:
        _fail(origin, f"the wavelength calibration is malformed ({exc})")


# Types of the geometry's fields in the file, so a damaged file fails here rather than deep inside rectify.
_GEOMETRY_INTS = ("frame_width_px", "frame_height_px", "n_columns", "n_rows", "centre_row", "n_lines_traced")
_GEOMETRY_NUMBERS = ("rotation_deg", "rotation_uncertainty_deg", "centre_x_px", "centre_y_px", "first_column_s_px",
                     "band_height_px")
_GEOMETRY_NUMBER_LISTS = ("tilt_coefficients", "curvature_coefficients", "curvature_grating", "spatial_profile")
_MAX_SIDE_PX = 20000  # far above any camera frame (common practice, no source)


def _validate_geometry_fields(geometry: Any, origin: str) -> None:
    if not isinstance(geometry, Mapping):
        _fail(origin, "`geometry` must be an object")
    for key in _GEOMETRY_INTS:
        if key in geometry:
            value = geometry[key]
            if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= _MAX_SIDE_PX:
                _fail(origin, f"`geometry.{key}` must be a whole number from 0 to {_MAX_SIDE_PX}, was {value!r}")
    for key in _GEOMETRY_NUMBERS:
        if key in geometry:
            _number(geometry[key], f"geometry.{key}", origin)
    for key in ("rotation_uncertainty_deg", "band_height_px"):
        if key in geometry and not geometry[key] >= 0:
            _fail(origin, f"`geometry.{key}` must not be negative, was {geometry[key]!r}")
    if geometry.get("curvature_rms_px") is not None:
        if _number(geometry["curvature_rms_px"], "geometry.curvature_rms_px", origin) < 0:
            _fail(origin, "`geometry.curvature_rms_px` must not be negative")
    if "curvature_known" in geometry and not isinstance(geometry["curvature_known"], bool):
        _fail(origin, f"`geometry.curvature_known` must be true or false, was {geometry['curvature_known']!r}")
    for key in _GEOMETRY_NUMBER_LISTS:
        if key in geometry:
            _numbers(geometry[key], f"geometry.{key}", origin)
    for key in ("aperture_rows",):
        if key in geometry:
            rows = geometry[key]
            if not isinstance(rows, list) or len(rows) != 2 or not all(type(v) is int for v in rows):
                _fail(origin, f"`geometry.{key}` must be two whole numbers [start, stop], was {rows!r}")
    if "background_rows" in geometry:
        pairs = geometry["background_rows"]
        if not isinstance(pairs, list) or not all(
            isinstance(pair, list) and len(pair) == 2 and all(type(v) is int for v in pair) for pair in pairs
        ):
            _fail(origin, f"`geometry.background_rows` must be a list of [start, stop] pairs, was {pairs!r}")
    if "notes" in geometry and (not isinstance(geometry["notes"], list) or not all(isinstance(v, str) for v in geometry["notes"])):
        _fail(origin, "`geometry.notes` must be a list of strings")
    n_rows, n_columns, centre = geometry.get("n_rows"), geometry.get("n_columns"), geometry.get("centre_row")
    if isinstance(n_rows, int) and isinstance(centre, int) and not 0 <= centre < n_rows:
        _fail(origin, f"`geometry.centre_row` {centre} lies outside the {n_rows} rectified rows")
    if isinstance(n_rows, int) and isinstance(n_columns, int) and n_rows * n_columns > 50_000_000:
        _fail(origin, f"`geometry` asks for a {n_columns}x{n_rows} rectified band, above the 50 MP frame limit")


def calibration_from_dict(data: Any, *, origin: str = "calibration") -> Calibration:
    """Validate a parsed calibration document and build the :class:`Calibration`.

    Raises
    ------
    FileFormatError
        Wrong or unknown schema version, missing or unknown fields, wrong
        types, non-finite numbers or units other than nm / air / rectified column.
    """
    if not isinstance(data, Mapping):
        _fail(origin, "the file must hold a JSON object")
    schema = data.get("schema")
    if schema != SCHEMA:
        if isinstance(schema, str) and schema.startswith("benchspec.calibration/"):
            raise FileFormatError(
                f"{origin}: calibration schema {schema!r} is not supported by this benchspec (reads {SCHEMA!r}); "
                "recalibrate, or use the benchspec version that wrote it"
            )
        _fail(origin, f"not a benchspec calibration file (schema {schema!r}, expected {SCHEMA!r})")
    missing = [k for k in _TOP_KEYS if k not in data]
    if missing:
        _fail(origin, f"field(s) {', '.join(missing)} missing")
    unknown = sorted(set(data) - set(_TOP_KEYS))
    if unknown:
        _fail(origin, f"unknown field(s) {', '.join(unknown)}")
    _check_finite(data, "calibration", origin)
    units = data["units"]
    if not isinstance(units, Mapping) or dict(units) != UNITS:
        _fail(origin, f"`units` must be {UNITS}, got {units!r}")
    if not isinstance(data["created_utc"], str) or not data["created_utc"]:
        _fail(origin, "`created_utc` must be an ISO 8601 time string")
    software = data["software"]
    if not isinstance(software, Mapping) or not isinstance(software.get("version"), str):
        _fail(origin, "`software` must be an object with a `version` string")
    _validate_geometry_fields(data["geometry"], origin)
    try:
        geometry = Geometry.from_dict(data["geometry"])
    except FileFormatError as exc:
        raise FileFormatError(f"{origin}: {exc}") from None
    wavelength = _validate_wavelength(data["wavelength_calibration"], origin, geometry.n_columns)
    for key in ("line_list", "frames", "dark_frames"):
        value = data[key]
        if not isinstance(value, list) or not all(isinstance(v, Mapping) for v in value):
            _fail(origin, f"`{key}` must be a list of objects")
    for k, line in enumerate(data["line_list"]):
        for key in ("wavelength_nm", "relative_intensity", "species", "tolerance_nm"):
            if key not in line:
                _fail(origin, f"`line_list[{k}].{key}` is missing")
        wavelength_nm = _number(line["wavelength_nm"], f"line_list[{k}].wavelength_nm", origin)
        if not 200.0 <= wavelength_nm <= 1200.0:
            _fail(origin, f"`line_list[{k}].wavelength_nm` is {wavelength_nm}, not a wavelength in nm (200-1200)")
    for k, frame in enumerate(data["frames"]):
        if "path" not in frame or "sha256" not in frame:
            _fail(origin, f"`frames[{k}]` needs `path` and `sha256`")
    if not isinstance(data["settings"], Mapping):
        _fail(origin, "`settings` must be an object")
    reference = _numbers(data["reference_spectrum"], "reference_spectrum", origin)
    if reference and len(reference) != geometry.n_columns:
        _fail(origin, f"`reference_spectrum` has {len(reference)} values but the geometry has {geometry.n_columns} columns")
    return Calibration(
        geometry=geometry,
        wavelength=wavelength,
        frames=tuple(dict(f) for f in data["frames"]),
        dark_frames=tuple(dict(f) for f in data["dark_frames"]),
        settings=dict(data["settings"]),
        line_list=tuple(dict(l) for l in data["line_list"]),
        reference_spectrum=tuple(reference),
        created_utc=data["created_utc"],
        software_version=software["version"],
    )


# --------------------------------------------------------------------------- files


def write_calibration(calibration: Calibration, path, *, force: bool = False) -> Path:
    """Write ``calibration`` as JSON, atomically; refuse to replace a file unless ``force``.

    Raises
    ------
    ExportError
        The file exists (without ``force``), or the folder cannot be written.
    """
    from .io import write_json_file

    if not isinstance(calibration, Calibration):
        raise InputError(f"`calibration` must be a Calibration, got {type(calibration).__name__}")
    path = Path(path)
    if path.suffix.lower() != ".json":
        raise ExportError(f"a calibration file must end in .json, not {path.name!r}")
    if not force and (path.exists() or path.is_symlink()):
        raise ExportError(f"{path} already exists; pass --force to overwrite it, or choose another name")
    document = calibration.to_dict()
    calibration_from_dict(document, origin=str(path))  # never write what we could not read back
    return write_json_file(path, document, force=force, indent=1)


def read_calibration(path) -> Calibration:
    """Read and validate a calibration file (see the module docstring for the schema).

    Raises
    ------
    FileFormatError
        Missing, unreadable, truncated or invalid file.
    """
    from .io import read_json_file

    path = Path(path)
    data = read_json_file(path, what="calibration file")
    return calibration_from_dict(data, origin=str(path))
