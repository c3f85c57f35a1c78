"""The virtual bench: frames a webcam-and-grating spectrometer would take, rendered from physics.

No camera is needed. A :class:`Bench` describes the grating, the camera, the
slit, the optics, the sensor's noise and the output encoding; a source
describes the light. :func:`render` returns the frame and a *truth* record
(the pixel-to-wavelength mapping along the band, every line's position and the
geometry) that tests and benchmarks compare the pipeline against.

The model
---------
* Light from a point of the slit at vertical angle gamma meets the grating
  with direction cosines (-sin alpha, sin gamma, ...). The grating adds
  m*lambda/d along the dispersion direction (the grating equation,
  m*lambda = d (sin alpha + sin beta)); the vertical cosine is kept (conical
  diffraction). That is what curves every slit image into a "smile" that grows
  towards longer wavelengths.
* A pinhole camera, turned by ``tilt_deg`` about the slit axis, projects each
  ray with focal length f = (width / 2) / tan(fov / 2); the flat sensor makes
  the dispersion nonlinear (x = f tan(beta - tilt)).
* Each line is the slit image: a top-hat along the slit blurred by the
  line-spread function (a Gaussian of ``lsf_sigma_px`` convolved with the
  slit width), integrated over each pixel.
* The sensor multiplies by an RGB (or mono) spectral sensitivity with an IR-cut
  filter, adds stray light and dark current, draws shot noise (Poisson, in
  electrons) and read noise, quantises with the ADC (gain e-/DN), clips at full
  scale, gamma-encodes, and writes 8- or 16-bit PNG/TIFF or JPEG.
* The frame is then rotated by ``rotation_deg`` about the band's centre.

The sensitivities are plausible shapes written for this simulator, not any
camera's datasheet (invented for the virtual bench).
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import tempfile
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Mapping

import numpy as np
from scipy.special import erf

from . import physics
from .errors import BenchFileError, ExportError, InputError
from .refdata import load_lamp, read_data_text

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover
    import tomli as tomllib

__all__ = [
    "GratingSettings",
    "CameraSettings",
    "SlitSettings",
    "OpticsSettings",
    "NoiseSettings",
    "ExposureSettings",
    "OutputSettings",
    "Bench",
    "Rendered",
    "SOURCE_KINDS",
    "load_bench",
    "parse_source",
    "as_written",
    "camera_tilt_deg",
    "render",
    "render_video",
    "write_frame",
    "write_truth",
    "source_spectrum",
]


# --------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class GratingSettings:
    """The grating: groove density, diffraction order and angle of incidence.

    ``second_order_fraction`` is the efficiency of order 2m relative to order m:
    its light overlaps the first order beyond twice the shortest wavelength that
    reaches the sensor (0 leaves it out).
    """

    lines_per_mm: float = 1000.0
    order: int = 1
    incidence_deg: float = 0.0
    second_order_fraction: float = 0.0


@dataclass(frozen=True)
class CameraSettings:
    """The camera: resolution, horizontal field of view, tilt towards the order, frame rotation.

    ``tilt_deg`` is the angle between the camera axis and the grating normal;
    ``None`` points the camera at 550 nm. ``sensor`` is ``"rgb"`` or ``"mono"``.
    ``mosaic`` ``"rggb"`` samples an RGB sensor through a colour-filter mosaic (red at the
    top-left pixel) and rebuilds the three channels by OpenCV's bilinear demosaicing, as a
    webcam does before it encodes a frame; ``"none"`` (default) gives every pixel all three
    channels.
    """

    width_px: int = 1280
    height_px: int = 720
    horizontal_fov_deg: float = 60.0
    tilt_deg: float | None = None
    rotation_deg: float = 0.0
    sensor: str = "rgb"
    ir_cut_nm: float = 670.0
    mosaic: str = "none"


@dataclass(frozen=True)
class SlitSettings:
    """The slit's image on the sensor: its height and width in pixels, the band's row, the smile.

    ``smile_px`` overrides the sag that the grating geometry predicts at the
    band's top and bottom edge at 650 nm; the shape (growing with wavelength)
    is kept. ``centre_row_px`` ``None`` puts the band in the middle.
    """

    height_px: float = 160.0
    width_px: float = 2.0
    centre_row_px: float | None = None
    smile_px: float | None = None


@dataclass(frozen=True)
class OpticsSettings:
    """The line-spread function: Gaussian sigma (px), convolved with the slit width."""

    lsf_sigma_px: float = 0.9


@dataclass(frozen=True)
class NoiseSettings:
    """The sensor's noise model and ADC."""

    gain_e_per_dn: float = 8.0
    adc_bits: int = 10
    read_noise_e: float = 6.0
    dark_current_e_per_s: float = 20.0
    exposure_s: float = 0.033
    hot_pixels: int = 0


@dataclass(frozen=True)
class ExposureSettings:
    """Exposure: the brightest pixel's expected signal as a fraction of full scale (>1 saturates).

    ``stray_light`` is uniform room light as a fraction of full scale.
    ``scale_dn`` fixes the signal scale (DN per unit of source flux) instead
    of ``level``: use it to keep a sample and its blank at one exposure (the
    truth records the scale each frame used).
    """

    level: float = 0.8
    stray_light: float = 0.004
    scale_dn: float | None = None


@dataclass(frozen=True)
class OutputSettings:
    """Encoding of the written frame: ``gamma`` is "1", "2.2" or "srgb"."""

    gamma: str = "2.2"
    bit_depth: int = 8
    jpeg_quality: int = 92


@dataclass(frozen=True)
class Bench:
    """A whole virtual bench. Build one with :func:`load_bench` or ``Bench()`` plus ``with_``."""

    grating: GratingSettings = field(default_factory=GratingSettings)
    camera: CameraSettings = field(default_factory=CameraSettings)
    slit: SlitSettings = field(default_factory=SlitSettings)
    optics: OpticsSettings = field(default_factory=OpticsSettings)
    noise: NoiseSettings = field(default_factory=NoiseSettings)
    exposure: ExposureSettings = field(default_factory=ExposureSettings)
    output: OutputSettings = field(default_factory=OutputSettings)
    source: Mapping[str, Any] = field(default_factory=lambda: {"kind": "lamp", "name": "cfl"})
    name: str = "virtual bench"

    def __post_init__(self):
        if isinstance(self.source, str):
            object.__setattr__(self, "source", parse_source(self.source))
        else:
            object.__setattr__(self, "source", dict(self.source))
        _validate(self)

    def with_(self, **sections) -> "Bench":
        """A copy with whole sections or single fields replaced.

        ``bench.with_(camera={"rotation_deg": 5})`` changes one field;
        ``bench.with_(source={"kind": "laser", "wavelength_nm": 532})`` replaces the source.
        """
        changes = {}
        for name, value in sections.items():
            current = getattr(self, name, None)
            if name == "source":
                changes[name] = parse_source(value) if isinstance(value, str) else dict(value)
            elif dataclasses.is_dataclass(current) and isinstance(value, Mapping):
                changes[name] = _section_from(type(current), name, {**dataclasses.asdict(current), **value})
            else:
                changes[name] = value
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        out = {f.name: (dataclasses.asdict(getattr(self, f.name)) if f.name not in ("source", "name") else getattr(self, f.name)) for f in fields(self)}
        out["source"] = dict(self.source)
        return out


_SECTIONS = {
    "grating": GratingSettings,
    "camera": CameraSettings,
    "slit": SlitSettings,
    "optics": OpticsSettings,
    "noise": NoiseSettings,
    "exposure": ExposureSettings,
    "output": OutputSettings,
}

# field -> (low, high) accepted range, inclusive
_RANGES = {
    "grating.lines_per_mm": (10, 3600),
    "grating.order": (-4, 4),
    "grating.incidence_deg": (-60, 60),
    "grating.second_order_fraction": (0, 1),
    "camera.width_px": (64, 8192),
    "camera.height_px": (48, 8192),
    "camera.horizontal_fov_deg": (5, 150),
    "camera.tilt_deg": (-80, 80),
    "camera.rotation_deg": (-20, 20),
    "camera.ir_cut_nm": (550, 1100),
    "slit.height_px": (4, 4000),
    "slit.width_px": (0, 200),
    "slit.centre_row_px": (0, 8192),
    "slit.smile_px": (-100, 100),
    "optics.lsf_sigma_px": (0.3, 30),
    "noise.gain_e_per_dn": (0.05, 1000),
    "noise.adc_bits": (8, 16),
    "noise.read_noise_e": (0, 1000),
    "noise.dark_current_e_per_s": (0, 1e6),
    "noise.exposure_s": (1e-5, 60),
    "noise.hot_pixels": (0, 100000),
    "exposure.level": (0, 100),
    "exposure.stray_light": (0, 1),
    "exposure.scale_dn": (0, 1e12),
    "output.bit_depth": (8, 16),
    "output.jpeg_quality": (10, 100),
}
_CHOICES = {
    "camera.sensor": ("rgb", "mono"),
    "camera.mosaic": ("none", "rggb"),
    "output.gamma": ("1", "2.2", "srgb"),
    "output.bit_depth": (8, 16),
}


def _section_from(cls, section: str, values: Mapping[str, Any]):
    known = {f.name: f for f in fields(cls)}
    for key in values:
        if key not in known:
            raise BenchFileError(
                f"unknown field '{section}.{key}'; known fields of [{section}]: {', '.join(known)}"
            )
    kwargs = {}
    for key, value in values.items():
        target = known[key]
        default = target.default
        if value is None:
            if default is not None:  # only optional fields may be left empty
                raise BenchFileError(f"'{section}.{key}' cannot be empty (null); give a value or remove the line")
            kwargs[key] = None
            continue
        if key == "gamma":
            value = str(value)
            if value == "1.0":
                value = "1"
        elif isinstance(default, bool) or key in ("sensor", "mosaic"):
            value = str(value)
        elif isinstance(default, int) and not isinstance(default, bool):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            if not isinstance(value, int) or isinstance(value, bool):
                raise BenchFileError(f"'{section}.{key}' must be a whole number, was {value!r}")
        elif isinstance(default, float) or default is None:
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise BenchFileError(f"'{section}.{key}' must be a number, was {value!r}")
            try:
                value = float(value)
            except OverflowError:  # an integer with hundreds of digits
                raise BenchFileError(f"'{section}.{key}' is far too large, was {str(value)[:20]}...") from None
            if not math.isfinite(value):
                raise BenchFileError(f"'{section}.{key}' must be finite, was {value!r}")
        kwargs[key] = value
    return cls(**kwargs)


def _validate(bench: Bench) -> None:
    for section in _SECTIONS:
        settings = getattr(bench, section)
        for f in fields(settings):
            key = f"{section}.{f.name}"
            value = getattr(settings, f.name)
            if value is None:
                continue
            if key in _CHOICES and value not in _CHOICES[key]:
                raise BenchFileError(f"'{key}' was {value!r}; accepted: {', '.join(map(str, _CHOICES[key]))}")
            if key in _RANGES:
                low, high = _RANGES[key]
                if not (low <= value <= high):
                    raise BenchFileError(f"'{key}' was {value!r}; accepted range {low} to {high}")
    if bench.camera.mosaic != "none" and bench.camera.sensor != "rgb":
        raise BenchFileError(f"'camera.mosaic' was {bench.camera.mosaic!r} on a mono sensor; a colour-filter mosaic "
                             "needs camera.sensor = \"rgb\" (or set camera.mosaic = \"none\")")
    if bench.grating.order == 0:
        raise BenchFileError("'grating.order' was 0; zero order carries no spectrum: use 1 (or -1, -2, 2)")
    if bench.output.bit_depth == 16 and bench.noise.adc_bits < 8:
        raise BenchFileError("'noise.adc_bits' must be at least 8")
    _check_source(bench.source)


# --------------------------------------------------------------------------- sources

SOURCE_KINDS = ("lamp", "blackbody", "led", "laser", "daylight", "sample", "flat", "dark")

_SOURCE_FIELDS = {
    "lamp": {"name": None, "lamp_unit": 0},
    "blackbody": {"temperature_k": 2900.0},
    "led": {"peak_nm": None, "fwhm_nm": 25.0, "asymmetry": 1.3},
    "laser": {"wavelength_nm": None},
    "daylight": {"temperature_k": 5778.0},
    "sample": {
        "temperature_k": 2900.0,
        "absorbance": 1.0,
        "absorbance_peak_nm": 520.0,
        "absorbance_fwhm_nm": 80.0,
        "transmittance_file": None,
    },
    "flat": {},
    "dark": {},
}
_SOURCE_RANGES = {
    "temperature_k": (500, 20000),
    "peak_nm": (250, 1100),
    "fwhm_nm": (0.5, 300),
    "asymmetry": (0.2, 5),
    "wavelength_nm": (250, 1100),
    "absorbance": (0, 6),
    "absorbance_peak_nm": (250, 1100),
    "absorbance_fwhm_nm": (1, 500),
    "lamp_unit": (0, 2**31 - 1),
}


def _check_source(source: Mapping[str, Any]) -> None:
    kind = source.get("kind")
    if not isinstance(kind, str) or kind not in _SOURCE_FIELDS:
        raise BenchFileError(f"unknown source kind {kind!r}; accepted: {', '.join(SOURCE_KINDS)}")
    allowed = _SOURCE_FIELDS[kind]
    for key, value in source.items():
        if key == "kind":
            continue
        if key not in allowed:
            raise BenchFileError(
                f"unknown field 'source.{key}' for a {kind} source; known fields: {', '.join(allowed) or '(none)'}"
            )
        if key in _SOURCE_RANGES and value is not None:
            low, high = _SOURCE_RANGES[key]
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not (low <= value <= high):
                raise BenchFileError(f"'source.{key}' was {value!r}; accepted range {low} to {high}")
    for key, default in allowed.items():
        if default is None and key != "transmittance_file" and source.get(key) is None:
            raise BenchFileError(f"a {kind} source needs 'source.{key}'")
    if kind == "lamp":
        try:
            load_lamp(str(source["name"]))
        except InputError as exc:
            raise BenchFileError(f"'source.name': {exc}") from None


def parse_source(text: str) -> dict:
    """Parse a short source description.

    ``"cfl"``, ``"hg"``, ``"ne"``... (a lamp), ``"blackbody:2900"``,
    ``"halogen:2900"``, ``"led:630"`` or ``"led:630:20"`` (peak, FWHM nm),
    ``"laser:532"``, ``"daylight"``, ``"sample:1.2:520:80"`` (peak absorbance,
    band centre and FWHM in nm, seen against a 2900 K lamp), ``"flat"``, ``"dark"``.
    """
    parts = [p.strip() for p in str(text).split(":")]
    kind = parts[0].lower()
    numbers = []
    for p in parts[1:]:
        try:
            numbers.append(float(p))
        except ValueError:
            raise BenchFileError(f"source {text!r}: {p!r} is not a number; e.g. 'led:630:20' or 'laser:532'") from None
    if kind in ("blackbody", "halogen", "incandescent"):
        source = {"kind": "blackbody", "temperature_k": numbers[0] if numbers else 2900.0}
    elif kind == "led":
        if not numbers:
            raise BenchFileError("source 'led' needs a peak wavelength, e.g. 'led:630' or 'led:630:20'")
        source = {"kind": "led", "peak_nm": numbers[0]}
        if len(numbers) > 1:
            source["fwhm_nm"] = numbers[1]
    elif kind == "laser":
        if not numbers:
            raise BenchFileError("source 'laser' needs a wavelength, e.g. 'laser:532'")
        source = {"kind": "laser", "wavelength_nm": numbers[0]}
    elif kind == "daylight":
        source = {"kind": "daylight"}
    elif kind == "sample":
        source = {"kind": "sample"}
        for key, value in zip(("absorbance", "absorbance_peak_nm", "absorbance_fwhm_nm"), numbers):
            source[key] = value
    elif kind in ("flat", "dark"):
        source = {"kind": kind}
    else:
        try:
            load_lamp(kind)
        except InputError:
            from .refdata import available_lamps

            raise BenchFileError(
                f"unknown source {text!r}; use a lamp ({', '.join(available_lamps())}) or "
                "blackbody:T, led:PEAK[:FWHM], laser:NM, daylight, sample:A:PEAK:FWHM, flat, dark"
            ) from None
        source = {"kind": "lamp", "name": kind}
    _check_source(source)
    return source


@dataclass(frozen=True)
class _SourceModel:
    """What a source emits: discrete lines plus a continuum on a wavelength grid."""

    line_wavelength_nm: np.ndarray
    line_strength: np.ndarray
    line_fwhm_nm: np.ndarray
    line_species: tuple[str, ...]
    continuum_nm: np.ndarray | None
    continuum: np.ndarray | None
    uniform: bool = False  # a flat field that fills the whole frame
    dark: bool = False


_GRID = np.arange(340.0, 1050.0, 0.05)


def _fraunhofer_table():
    rows = []
    for raw in read_data_text("fraunhofer.csv").splitlines():
        if raw.startswith("#") or not raw.strip() or raw.startswith("label"):
            continue
        label, wl, species, origin, depth, width = raw.split(",")
        rows.append((float(wl), float(depth), float(width)))
    return rows


def _daylight_transmission(grid_nm: np.ndarray) -> np.ndarray:
    transmission = np.ones_like(grid_nm)
    for wl, depth, width in _fraunhofer_table():
        sigma = width / 2.3548
        transmission *= 1 - depth * np.exp(-0.5 * ((grid_nm - wl) / sigma) ** 2)
    return transmission


def _load_transmittance(path: str) -> tuple[np.ndarray, np.ndarray]:
    try:
        data = np.genfromtxt(path, delimiter=",", comments="#", names=True)
        wl, tr = np.asarray(data["wavelength_nm"], float), np.asarray(data["transmittance"], float)
    except (OSError, ValueError, KeyError) as exc:
        raise BenchFileError(
            f"'source.transmittance_file' {path!r} could not be read ({exc}); "
            "it must be a CSV with columns wavelength_nm,transmittance"
        ) from None
    if wl.size < 2 or not np.all(np.isfinite(wl)) or not np.all(np.isfinite(tr)) or np.any(np.diff(wl) <= 0):
        raise BenchFileError(f"'source.transmittance_file' {path!r}: need increasing, finite wavelength_nm and transmittance")
    return wl, np.clip(tr, 0, 1)


def source_spectrum(source: Mapping[str, Any]) -> _SourceModel:
    """The emission model of a source description (see :func:`parse_source`)."""
    _check_source(source)
    kind = source["kind"]
    empty = np.zeros(0)
    if kind == "lamp":
        lamp = load_lamp(source["name"])
        lines = lamp.lines()
        wl = np.array([l.wavelength_nm for l in lines])
        unit = int(source.get("lamp_unit") or 0)
        if unit:
            # One physical lamp of the type: each line sits at a draw within its listed tolerance
            # (taken as 1 sigma), fixed for that lamp. Real phosphor peaks move by about a nanometre
            # from lamp to lamp (common practice, no source); 0 gives the listed wavelengths.
            wl = wl + np.random.default_rng(unit).normal(0.0, [l.tolerance_nm for l in lines])
        strength = np.array([l.relative_intensity for l in lines], dtype=float)
        # Phosphor and band emission is broad; atomic lines are far narrower than any webcam's LSF.
        width = np.array([2.0 if l.tolerance_nm >= 0.3 else 0.0 for l in lines])
        continuum = None
        if lamp.continuum_fraction > 0:
            # A broad, weak underlying band (halophosphate / Eu2+ emission) peaking near 480 nm.
            continuum = lamp.continuum_fraction * strength.max() * (
                np.exp(-0.5 * ((_GRID - 470.0) / 45.0) ** 2) + 0.5 * np.exp(-0.5 * ((_GRID - 580.0) / 60.0) ** 2)
            ) / 10.0
        return _SourceModel(wl, strength, width, tuple(l.species for l in lines), _GRID if continuum is not None else None, continuum)
    if kind == "laser":
        return _SourceModel(np.array([float(source["wavelength_nm"])]), np.array([1.0]), np.array([0.0]), ("laser",), None, None)
    if kind == "led":
        peak = float(source["peak_nm"])
        fwhm = float(source.get("fwhm_nm", 25.0))
        ratio = float(source.get("asymmetry", 1.3))
        sigma_blue = fwhm / 1.1774 / (1 + ratio) / 1.0
        sigma_blue = fwhm / (1.1774 * (1 + ratio))
        sigma_red = ratio * sigma_blue
        sigma = np.where(_GRID < peak, sigma_blue, sigma_red)
        return _SourceModel(empty, empty, empty, (), _GRID, np.exp(-0.5 * ((_GRID - peak) / sigma) ** 2))
    if kind == "blackbody":
        planck = physics.planck_spectral_radiance(_GRID, float(source.get("temperature_k", 2900.0)))
        return _SourceModel(empty, empty, empty, (), _GRID, planck / planck.max())
    if kind == "daylight":
        planck = physics.planck_spectral_radiance(_GRID, float(source.get("temperature_k", 5778.0)))
        return _SourceModel(empty, empty, empty, (), _GRID, planck / planck.max() * _daylight_transmission(_GRID))
    if kind == "sample":
        planck = physics.planck_spectral_radiance(_GRID, float(source.get("temperature_k", 2900.0)))
        if source.get("transmittance_file"):
            wl, tr = _load_transmittance(str(source["transmittance_file"]))
            transmittance = np.interp(_GRID, wl, tr, left=tr[0], right=tr[-1])
        else:
            a = float(source.get("absorbance", 1.0))
            centre = float(source.get("absorbance_peak_nm", 520.0))
            sigma = float(source.get("absorbance_fwhm_nm", 80.0)) / 2.3548
            transmittance = 10 ** (-a * np.exp(-0.5 * ((_GRID - centre) / sigma) ** 2))
        return _SourceModel(empty, empty, empty, (), _GRID, planck / planck.max() * transmittance)
    if kind == "flat":
        return _SourceModel(empty, empty, empty, (), None, None, uniform=True)
    return _SourceModel(empty, empty, empty, (), None, None, dark=True)


# --------------------------------------------------------------------------- optics


def _sensitivity(bench: Bench, wavelength_nm: np.ndarray) -> np.ndarray:
    """Spectral sensitivity per channel, shape (channels, n): plausible shapes, invented for the simulator."""
    wl = np.asarray(wavelength_nm, dtype=float)
    ir_cut = 1.0 / (1.0 + np.exp((wl - bench.camera.ir_cut_nm) / 8.0))
    silicon = np.clip(np.exp(-0.5 * ((wl - 600.0) / 210.0) ** 2), 0, 1) * (1 / (1 + np.exp(-(wl - 380.0) / 12.0)))
    if bench.camera.sensor == "mono":
        return (silicon * ir_cut)[None, :]
    red = np.exp(-0.5 * ((wl - 600.0) / 38.0) ** 2) + 0.35 * np.exp(-0.5 * ((wl - 700.0) / 60.0) ** 2)
    green = np.exp(-0.5 * ((wl - 535.0) / 40.0) ** 2)
    blue = np.exp(-0.5 * ((wl - 458.0) / 30.0) ** 2) + 0.04
    crosstalk = 0.05
    curves = np.array([red, green, blue])
    curves = (1 - crosstalk) * curves + crosstalk * curves.mean(axis=0, keepdims=True)
    return curves * silicon * ir_cut


@dataclass(frozen=True)
class _Projection:
    focal_px: float
    centre_column_px: float
    band_row_px: float
    tilt_deg: float
    smile_scale: float


def _camera_tilt_deg(bench: Bench) -> float:
    if bench.camera.tilt_deg is not None:
        return float(bench.camera.tilt_deg)
    try:
        return physics.diffraction_angle_deg(
            550.0, lines_per_mm=bench.grating.lines_per_mm, order=bench.grating.order, incidence_deg=bench.grating.incidence_deg
        )
    except InputError:
        raise BenchFileError(
            f"'camera.tilt_deg' cannot default to 550 nm: 550 nm has no diffraction angle in order "
            f"{bench.grating.order} at {bench.grating.lines_per_mm:g} lines/mm; set camera.tilt_deg"
        ) from None


def camera_tilt_deg(bench: Bench) -> float:
    """The camera's tilt towards the order (deg): ``camera.tilt_deg``, or the default that points it at 550 nm."""
    return _camera_tilt_deg(bench)


def _raw_columns(bench: Bench, proj: _Projection, wavelength_nm, row_offset_px):
    """Column of wavelength(s) on rows offset from the band centre, before any smile override.

    Returns NaN where the wavelength has no diffraction angle or misses the lens.
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    dy = np.asarray(row_offset_px, dtype=float)
    k_x = bench.grating.order * wl * bench.grating.lines_per_mm * 1e-6 - math.sin(math.radians(bench.grating.incidence_deg))
    tilt = math.radians(proj.tilt_deg)
    c, s = math.cos(tilt), math.sin(tilt)
    # Solve for the vertical direction cosine that lands on this row (two fixed-point steps suffice).
    k_y = dy / proj.focal_px
    with np.errstate(invalid="ignore"):
        for _ in range(3):
            k_z = np.sqrt(1.0 - k_x**2 - k_y**2)
            z_cam = k_x * s + k_z * c
            k_y = dy * z_cam / proj.focal_px
        k_z = np.sqrt(1.0 - k_x**2 - k_y**2)
        x_cam = k_x * c - k_z * s
        z_cam = k_x * s + k_z * c
        column = proj.centre_column_px + proj.focal_px * x_cam / z_cam
    return np.where(z_cam > 0.05, column, np.nan)


def _columns(bench: Bench, proj: _Projection, wavelength_nm, row_offset_px):
    """Column of wavelength(s) on rows offset from the band centre (canvas coordinates)."""
    centre = _raw_columns(bench, proj, wavelength_nm, 0.0 * np.asarray(row_offset_px, dtype=float))
    if proj.smile_scale == 1.0:
        return _raw_columns(bench, proj, wavelength_nm, row_offset_px)
    raw = _raw_columns(bench, proj, wavelength_nm, row_offset_px)
    return centre + proj.smile_scale * (raw - centre)


def _projection(bench: Bench) -> _Projection:
    cam = bench.camera
    focal = (cam.width_px / 2.0) / math.tan(math.radians(cam.horizontal_fov_deg) / 2.0)
    row = cam.height_px / 2.0 if bench.slit.centre_row_px is None else float(bench.slit.centre_row_px)
    proj = _Projection(focal, cam.width_px / 2.0, row, _camera_tilt_deg(bench), 1.0)
    if bench.slit.smile_px is not None:
        half = bench.slit.height_px / 2.0
        natural = float(_raw_columns(bench, proj, 650.0, half) - _raw_columns(bench, proj, 650.0, 0.0))
        if not np.isfinite(natural) or abs(natural) < 1e-6:
            raise BenchFileError("'slit.smile_px' cannot be applied: 650 nm does not reach the sensor on this bench")
        # The smile is measured as a sag along the direction of increasing wavelength.
        sign = 1.0 if _dispersion_sign(bench, proj) > 0 else -1.0
        proj = dataclasses.replace(proj, smile_scale=float(bench.slit.smile_px) / (natural * sign))
    return proj


def _dispersion_sign(bench: Bench, proj: _Projection) -> float:
    a, b = _raw_columns(bench, proj, np.array([540.0, 560.0]), 0.0)
    return 1.0 if b > a else -1.0


# --------------------------------------------------------------------------- rendering


@dataclass(frozen=True)
class Rendered:
    """A rendered frame and what is true about it.

    Attributes
    ----------
    image : ndarray
        (H, W, 3) RGB or (H, W) mono, uint8 or uint16, gamma-encoded as set in the bench.
    linear : ndarray
        (H, W, C) float32 linear signal in ADC units (DN) before encoding, noise included.
    truth : dict
        JSON-serialisable: geometry, the pixel-to-wavelength mapping along the
        band's centre row (in rectified coordinates) and every rendered line.
    """

    image: np.ndarray
    linear: np.ndarray
    truth: dict


def _rotation_matrix(bench: Bench, proj: _Projection, pad_x: float, pad_y: float, shift_px: float = 0.0) -> np.ndarray:
    """Affine map from padded-canvas coordinates to frame coordinates (2x3)."""
    theta = math.radians(bench.camera.rotation_deg)
    c, s = math.cos(theta), math.sin(theta)
    px, py = proj.centre_column_px, proj.band_row_px
    # frame = R (canvas - pad - pivot) + pivot + shift
    rot = np.array([[c, -s], [s, c]])
    offset = np.array([px, py]) + np.array([shift_px, 0.0]) - rot @ np.array([px + pad_x, py + pad_y])
    return np.hstack([rot, offset[:, None]])


def _noise_free(bench: Bench, model: _SourceModel, proj: _Projection):
    """The noise-free linear canvas (C, Hc, Wc), in arbitrary flux units, and the padding used."""
    cam = bench.camera
    channels = 1 if cam.sensor == "mono" else 3
    theta = abs(math.radians(cam.rotation_deg))
    pad_x = int(math.ceil(cam.height_px * math.sin(theta))) + 8
    pad_y = int(math.ceil(cam.width_px * math.sin(theta))) + 8
    height_c, width_c = cam.height_px + 2 * pad_y, cam.width_px + 2 * pad_x
    canvas = np.zeros((channels, height_c, width_c), dtype=np.float64)
    if model.dark or model.uniform:
        return canvas, pad_x, pad_y
    sigma = bench.optics.lsf_sigma_px
    half = bench.slit.height_px / 2.0
    reach = half + 4 * sigma + 2
    rows = np.arange(max(0, int(proj.band_row_px + pad_y - reach)), min(height_c, int(proj.band_row_px + pad_y + reach) + 1))
    dy = rows - pad_y - proj.band_row_px
    # Slit image along the slit: top-hat blurred by the LSF, integrated over each pixel row.
    root2s = math.sqrt(2) * sigma
    row_weight = 0.5 * (erf((dy + 0.5 + half) / root2s) - erf((dy - 0.5 - half) / root2s))
    row_weight = row_weight * (1.0 - 0.15 * (dy / max(half, 1.0)) ** 2).clip(0.5, 1)  # gentle vignetting along the slit
    slit_var = bench.slit.width_px**2 / 12.0

    if model.line_wavelength_nm.size:
        sens = _sensitivity(bench, model.line_wavelength_nm)  # (C, L)
        flat_index: list[np.ndarray] = []
        flat_weight: list[list[np.ndarray]] = [[] for _ in range(channels)]
        for i, wl in enumerate(model.line_wavelength_nm):
            cols = _columns(bench, proj, wl, dy)  # (R,)
            if not np.all(np.isfinite(cols)):
                continue
            cols = cols + pad_x
            if cols.max() < -20 or cols.min() > width_c + 20:
                continue
            # Intrinsic width in px from the local dispersion.
            dcol = float(np.diff(_columns(bench, proj, np.array([wl - 0.05, wl + 0.05]), 0.0))[0]) / 0.1
            intrinsic_px = model.line_fwhm_nm[i] / 2.3548 * abs(dcol)
            s_tot = math.sqrt(sigma**2 + slit_var + intrinsic_px**2)
            window = int(math.ceil(5 * s_tot)) + 2
            base = np.floor(cols).astype(int)
            offsets = np.arange(-window, window + 1)
            grid = base[:, None] + offsets[None, :]  # (R, K)
            a = (grid - 0.5 - cols[:, None]) / (math.sqrt(2) * s_tot)
            b = (grid + 0.5 - cols[:, None]) / (math.sqrt(2) * s_tot)
            profile = 0.5 * (erf(b) - erf(a)) * row_weight[:, None]
            valid = (grid >= 0) & (grid < width_c)
            flat_index.append((np.broadcast_to(rows[:, None], grid.shape)[valid] * width_c + grid[valid]))
            for ch in range(channels):
                flat_weight[ch].append((model.line_strength[i] * sens[ch, i]) * profile[valid])
        if flat_index:
            index = np.concatenate(flat_index)
            for ch in range(channels):
                canvas[ch] += np.bincount(index, np.concatenate(flat_weight[ch]), minlength=height_c * width_c).reshape(height_c, width_c)

    if model.continuum is not None:
        grid_nm = model.continuum_nm
        sens = _sensitivity(bench, grid_nm)  # (C, N)
        step = float(grid_nm[1] - grid_nm[0])
        kernel_sigma = math.sqrt(sigma**2 + slit_var)
        half_k = int(math.ceil(5 * kernel_sigma)) + 1
        xk = np.arange(-half_k, half_k + 1)
        kernel = 0.5 * (erf((xk + 0.5) / (math.sqrt(2) * kernel_sigma)) - erf((xk - 0.5) / (math.sqrt(2) * kernel_sigma)))
        for j, row in enumerate(rows):
            cols = _columns(bench, proj, grid_nm, np.full(grid_nm.shape, dy[j])) + pad_x
            ok = np.isfinite(cols) & (cols >= 0) & (cols < width_c - 1)
            if not ok.any():
                continue
            c0 = np.floor(cols[ok]).astype(int)
            frac = cols[ok] - c0
            for ch in range(channels):
                weight = model.continuum[ok] * sens[ch, ok] * step * row_weight[j]
                line = np.bincount(c0, weight * (1 - frac), minlength=width_c) + np.bincount(c0 + 1, weight * frac, minlength=width_c + 1)[:width_c]
                canvas[ch, row] += np.convolve(line[:width_c], kernel, mode="same")
    return canvas, pad_x, pad_y


def _warp(canvas: np.ndarray, matrix: np.ndarray, width: int, height: int) -> np.ndarray:
    import cv2

    out = np.empty((canvas.shape[0], height, width), dtype=np.float32)
    for ch in range(canvas.shape[0]):
        out[ch] = cv2.warpAffine(
            canvas[ch].astype(np.float32), matrix, (width, height), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=0
        )
    return np.clip(out, 0, None)


def _check_band_in_frame(bench: Bench, proj: _Projection) -> None:
    cam = bench.camera
    theta = math.radians(cam.rotation_deg)
    half = bench.slit.height_px / 2.0
    span = max(abs(half * math.cos(theta)) + abs(cam.width_px / 2.0 * math.sin(theta)), half)
    top, bottom = proj.band_row_px - span, proj.band_row_px + span
    if top < 0 or bottom > cam.height_px:
        raise BenchFileError(
            f"the band (rows {top:.0f} to {bottom:.0f} px after rotation) falls outside the frame of "
            f"{cam.height_px} rows; lower 'slit.height_px' ({bench.slit.height_px:g}), move 'slit.centre_row_px' "
            f"or reduce 'camera.rotation_deg'"
        )


def _encode(bench: Bench, fraction: np.ndarray) -> np.ndarray:
    """Gamma-encode a linear [0, 1] image to the output bit depth (channels last)."""
    f = np.clip(fraction, 0.0, 1.0)
    gamma = bench.output.gamma
    if gamma == "srgb":
        encoded = np.where(f <= 0.0031308, 12.92 * f, 1.055 * np.power(f, 1 / 2.4) - 0.055)
    elif gamma == "2.2":
        encoded = np.power(f, 1 / 2.2)
    else:
        encoded = f
    top = 255 if bench.output.bit_depth == 8 else 65535
    dtype = np.uint8 if bench.output.bit_depth == 8 else np.uint16
    return np.round(encoded * top).astype(dtype)


def _line_truth(bench, proj, model, pad_x, pad_y, matrix, scale_dn, full_dn):
    cam = bench.camera
    lines = []
    for i, wl in enumerate(model.line_wavelength_nm):
        col = float(_columns(bench, proj, wl, 0.0))
        if not np.isfinite(col) or not (0 <= col < cam.width_px):
            continue
        x, y = matrix @ np.array([col + pad_x, proj.band_row_px + pad_y, 1.0])
        lines.append(
            {
                "wavelength_nm": float(wl),
                "species": model.line_species[i],
                "relative_intensity": float(model.line_strength[i]),
                "rectified_column_px": col,
                "frame_x_px": float(x),
                "frame_y_px": float(y),
            }
        )
    return lines


def _truth(bench: Bench, proj: _Projection, model: _SourceModel, pad_x, pad_y, matrix, scale_dn, full_dn, peak_dn):
    cam = bench.camera
    columns = np.arange(cam.width_px, dtype=float)
    wl_grid = np.arange(300.0, 1100.0, 0.01)
    cols = _columns(bench, proj, wl_grid, 0.0)
    ok = np.isfinite(cols)
    mapping_cols, mapping_wl = [], []
    if ok.sum() > 2:
        c, w = cols[ok], wl_grid[ok]
        order = np.argsort(c)
        c, w = c[order], w[order]
        inside = (columns >= c[0]) & (columns <= c[-1])
        mapping_cols = columns[inside].tolist()
        mapping_wl = np.interp(columns[inside], c, w).tolist()
    half = bench.slit.height_px / 2.0
    sag = float(_columns(bench, proj, 650.0, half) - _columns(bench, proj, 650.0, 0.0))
    sign = _dispersion_sign(bench, proj)
    return {
        "schema": "benchspec-truth/1",
        "bench": bench.to_dict(),
        "geometry": {
            "rotation_deg": float(cam.rotation_deg),
            "pivot_px": [proj.centre_column_px, proj.band_row_px],
            "band_centre_row_px": proj.band_row_px,
            "slit_height_px": float(bench.slit.height_px),
            "slit_image_fwhm_px": 2.3548 * math.sqrt(bench.optics.lsf_sigma_px**2 + bench.slit.width_px**2 / 12.0),
            "smile_px_at_650nm": sag * sign,
            "camera_tilt_deg": proj.tilt_deg,
            "focal_length_px": proj.focal_px,
            "blue_on_left": bool(sign > 0),
            "coordinates": "rectified column = column along the band at its centre row before rotation; "
            "frame = rotation by rotation_deg about pivot_px",
        },
        "mapping": {"rectified_column_px": mapping_cols, "wavelength_nm": mapping_wl},
        "lines": _line_truth(bench, proj, model, pad_x, pad_y, matrix, scale_dn, full_dn),
        "exposure": {
            "full_scale_dn": full_dn,
            "expected_peak_dn": peak_dn,
            "saturated": bool(peak_dn > full_dn),
            "gain_e_per_dn": bench.noise.gain_e_per_dn,
            "scale_dn": scale_dn,
        },
    }


class _Renderer:
    """Everything about a bench that does not change from frame to frame."""

    def __init__(self, bench: Bench):
        self.bench = bench
        cam = bench.camera
        self.proj = _projection(bench)
        _check_band_in_frame(bench, self.proj)
        self.model = source_spectrum(bench.source)
        self._check_source_reaches_sensor()
        self.canvas, self.pad_x, self.pad_y = _noise_free(bench, self.model, self.proj)
        self.second_order = self._second_order_bench()
        if self.second_order is not None:
            extra, _, _ = _noise_free(self.second_order, self.model, self.proj)
            self.canvas += bench.grating.second_order_fraction * extra
        self.full_dn = float(2**bench.noise.adc_bits - 1)
        self.channels = self.canvas.shape[0]
        matrix = _rotation_matrix(bench, self.proj, self.pad_x, self.pad_y)
        self.matrix = matrix
        self.base = _warp(self.canvas, matrix, cam.width_px, cam.height_px) if not (self.model.dark or self.model.uniform) else None
        peak = float(self.base.max()) if self.base is not None else 0.0
        if self.model.uniform:
            self.scale = 1.0
            self.peak_dn = bench.exposure.level * self.full_dn
        elif bench.exposure.scale_dn is not None:
            self.scale = float(bench.exposure.scale_dn)
            self.peak_dn = peak * self.scale
        elif peak > 0:
            self.scale = bench.exposure.level * self.full_dn / peak
            self.peak_dn = bench.exposure.level * self.full_dn
        else:
            self.scale = 0.0
            self.peak_dn = 0.0
        self.truth = _truth(bench, self.proj, self.model, self.pad_x, self.pad_y, matrix, self.scale, self.full_dn, self.peak_dn)
        if self.second_order is not None:
            self.truth["second_order_lines"] = _line_truth(
                self.second_order, self.proj, self.model, self.pad_x, self.pad_y, matrix, self.scale, self.full_dn
            )
        hot_rng = np.random.default_rng(cam.width_px * 7919 + cam.height_px)  # fixed per sensor, not per frame
        count = bench.noise.hot_pixels
        self.hot = (hot_rng.integers(0, cam.height_px, count), hot_rng.integers(0, cam.width_px, count), hot_rng.uniform(0.05, 0.4, count))

    def _second_order_bench(self) -> Bench | None:
        grating = self.bench.grating
        if grating.second_order_fraction <= 0 or abs(2 * grating.order) > 4:
            return None
        return dataclasses.replace(self.bench, grating=dataclasses.replace(grating, order=2 * grating.order))

    def _check_source_reaches_sensor(self):
        bench, model = self.bench, self.model
        if model.dark or model.uniform:
            return
        wl = model.line_wavelength_nm if model.line_wavelength_nm.size else None
        if bench.source["kind"] in ("laser", "led"):
            peak = float(bench.source.get("wavelength_nm") or bench.source.get("peak_nm"))
            try:
                physics.diffraction_angle_deg(
                    peak, lines_per_mm=bench.grating.lines_per_mm, order=bench.grating.order, incidence_deg=bench.grating.incidence_deg
                )
            except InputError as exc:
                raise BenchFileError(f"'source': {exc}") from None
            col = float(_columns(bench, self.proj, peak, 0.0))
            if not (np.isfinite(col) and 0 <= col < bench.camera.width_px):
                raise BenchFileError(
                    f"'source': {peak:g} nm lands outside the sensor (column {col:.0f} of {bench.camera.width_px}); adjust 'camera.tilt_deg'"
                )
        visible = _columns(bench, self.proj, np.array([400.0, 700.0]), 0.0) if wl is None else _columns(bench, self.proj, wl, 0.0)
        if not np.any(np.isfinite(visible) & (visible >= 0) & (visible < bench.camera.width_px)):
            raise BenchFileError(
                "no light of this source lands on the sensor; check 'camera.tilt_deg', 'grating.lines_per_mm' and 'grating.order'"
            )

    def frame(self, rng: np.random.Generator, *, intensity: float = 1.0, shift_px: float = 0.0) -> Rendered:
        bench = self.bench
        cam, noise = bench.camera, bench.noise
        if shift_px and self.base is not None:
            matrix = _rotation_matrix(bench, self.proj, self.pad_x, self.pad_y, shift_px=shift_px)
            signal_dn = _warp(self.canvas, matrix, cam.width_px, cam.height_px) * self.scale
        elif self.base is not None:
            signal_dn = self.base * self.scale
        else:
            signal_dn = np.zeros((self.channels, cam.height_px, cam.width_px), dtype=np.float32)
        signal_dn = signal_dn * intensity
        if self.model.uniform:
            signal_dn = signal_dn + self.peak_dn * intensity
        else:
            signal_dn = signal_dn + bench.exposure.stray_light * self.full_dn * intensity
        gain = noise.gain_e_per_dn
        electrons = signal_dn.astype(np.float64) * gain + noise.dark_current_e_per_s * noise.exposure_s
        hot_r, hot_c, hot_v = self.hot
        if hot_r.size:
            electrons[:, hot_r, hot_c] += hot_v * self.full_dn * gain
        electrons = rng.poisson(np.clip(electrons, 0, None)).astype(np.float64)
        electrons += rng.normal(0.0, noise.read_noise_e, size=electrons.shape) if noise.read_noise_e > 0 else 0.0
        dn = np.clip(np.round(electrons / gain), 0, self.full_dn)
        linear = np.moveaxis(dn, 0, -1).astype(np.float32)
        if cam.mosaic == "rggb" and self.channels == 3:
            linear = _demosaiced_rggb(linear)
        image = _encode(bench, linear / self.full_dn)
        if self.channels == 1:
            image = image[..., 0]
            linear = linear[..., 0]
        return Rendered(image=image, linear=linear, truth=self.truth)


def _demosaiced_rggb(linear: np.ndarray) -> np.ndarray:
    """(H, W, 3) linear DN seen through an RGGB colour-filter mosaic, then rebuilt by bilinear demosaicing.

    Each pixel keeps only its filter's channel (its own noise draw), and OpenCV's
    ``COLOR_BayerRGGB2RGB`` interpolates the other two from the neighbours (it fills the
    outermost row and column from the next ones in). The DN are whole
    numbers up to the ADC's full scale, so the 16-bit mosaic holds them exactly.
    """
    import cv2

    dn = np.clip(np.round(linear), 0, 65535).astype(np.uint16)
    mosaic = np.empty(dn.shape[:2], np.uint16)
    mosaic[0::2, 0::2] = dn[0::2, 0::2, 0]
    mosaic[0::2, 1::2] = dn[0::2, 1::2, 1]
    mosaic[1::2, 0::2] = dn[1::2, 0::2, 1]
    mosaic[1::2, 1::2] = dn[1::2, 1::2, 2]
    return cv2.cvtColor(mosaic, cv2.COLOR_BayerRGGB2RGB).astype(np.float32)


def render(bench: Bench, *, seed: int = 0, source: Mapping[str, Any] | str | None = None) -> Rendered:
    """Render one frame of ``bench`` (optionally with another ``source``).

    The same bench and ``seed`` always give the same frame.
    """
    if source is not None:
        bench = bench.with_(source=source)
    renderer = _Renderer(bench)
    rendered = renderer.frame(np.random.default_rng(seed))
    truth = dict(rendered.truth, seed=int(seed))
    return dataclasses.replace(rendered, truth=truth)


# --------------------------------------------------------------------------- files


_MAX_BENCH_FILE_BYTES = 2**20


def load_bench(path: str | os.PathLike) -> Bench:
    """Read a bench file (TOML or JSON) and check every field; see ``demo_images/bench.toml``.

    Raises
    ------
    BenchFileError
        Unknown sections or fields, values out of range, impossible geometry.
    """
    path = Path(path)
    try:
        if path.exists() and not path.is_dir() and not path.is_file():  # a pipe or a device would block or never end
            raise BenchFileError(f"bench file {str(path)!r} is not a regular file (a pipe, socket or device); check the path")
        size = path.stat().st_size
        if size > _MAX_BENCH_FILE_BYTES:  # a bench file is a few kB; do not read a huge file into memory
            raise BenchFileError(
                f"bench file {str(path)!r} is {size / 2**20:.0f} MB, far above the 1 MB a bench file can be; "
                "check the path (`benchspec simulate --template` prints a documented one)"
            )
        raw = path.read_bytes()
    except OSError as exc:
        raise BenchFileError(f"bench file {str(path)!r} cannot be read ({exc.strerror or exc}); check the path") from None
    if not raw.strip():
        raise BenchFileError(f"bench file {str(path)!r} is empty; `benchspec simulate --template` prints a documented one")
    try:
        text = raw.decode("utf-8")
        data = json.loads(text) if path.suffix.lower() == ".json" else tomllib.loads(text)
    except (UnicodeDecodeError, ValueError, tomllib.TOMLDecodeError) as exc:
        kind = "JSON" if path.suffix.lower() == ".json" else "TOML"
        raise BenchFileError(f"bench file {str(path)!r} is not valid UTF-8 {kind} ({exc})") from None
    except RecursionError:
        raise BenchFileError(f"bench file {str(path)!r} is nested too deeply to be a bench description") from None
    try:
        return bench_from_dict(data)
    except BenchFileError as exc:
        raise BenchFileError(f"bench file {str(path)!r}: {exc}") from None


def bench_from_dict(data: Mapping[str, Any]) -> Bench:
    """A :class:`Bench` from a mapping with the bench file's sections."""
    if not isinstance(data, Mapping):
        raise BenchFileError("a bench description must be a table of sections")
    kwargs: dict[str, Any] = {}
    for key, value in data.items():
        if key in _SECTIONS:
            if not isinstance(value, Mapping):
                raise BenchFileError(f"[{key}] must be a table of fields")
            kwargs[key] = _section_from(_SECTIONS[key], key, value)
        elif key == "source":
            if not isinstance(value, (str, Mapping)):
                raise BenchFileError(f"'source' must be a text such as 'led:630' or a table of fields, was {value!r}")
            kwargs[key] = parse_source(value) if isinstance(value, str) else dict(value)
        elif key == "name":
            kwargs[key] = str(value)
        else:
            raise BenchFileError(f"unknown section '{key}'; known: {', '.join([*_SECTIONS, 'source', 'name'])}")
    return Bench(**kwargs)


def _atomic_write_bytes(path: Path, payload: bytes, *, force: bool) -> None:
    if path.exists() and not force:
        raise ExportError(f"{str(path)!r} already exists; choose another name or pass --force to overwrite it")
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ExportError(f"cannot write {str(path)!r}: folder {str(folder)!r} does not exist; create it first")
    fd, tmp = None, None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=folder)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        with os.fdopen(fd, "wb") as handle:
            fd = None
            handle.write(payload)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        raise ExportError(f"cannot write {str(path)!r} ({exc.strerror or exc}); check the folder is writable and has space") from None
    finally:
        if fd is not None:
            os.close(fd)
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)


_FRAME_SUFFIXES = (".png", ".tif", ".tiff", ".jpg", ".jpeg")


def write_frame(rendered: Rendered, path: str | os.PathLike, *, bench: Bench | None = None, force: bool = False) -> None:
    """Write the frame as PNG, TIFF or JPEG (by extension), atomically."""
    import cv2

    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in _FRAME_SUFFIXES:
        raise ExportError(f"cannot write a frame as {suffix or 'a file without extension'!r}; use .png, .tif or .jpg")
    image = rendered.image
    if image.ndim == 3:
        image = image[..., ::-1]  # RGB -> BGR for OpenCV
    params: list[int] = []
    if suffix in (".jpg", ".jpeg"):
        if image.dtype != np.uint8:
            raise ExportError("JPEG holds 8-bit frames only; set output.bit_depth = 8 or write .png/.tif")
        quality = bench.output.jpeg_quality if bench is not None else 92
        params = [cv2.IMWRITE_JPEG_QUALITY, int(quality)]
    ok, buffer = cv2.imencode(suffix if suffix != ".jpeg" else ".jpg", np.ascontiguousarray(image), params)
    if not ok:
        raise ExportError(f"OpenCV could not encode the frame as {suffix}")
    _atomic_write_bytes(path, buffer.tobytes(), force=force)


def as_written(rendered: Rendered, *, jpeg_quality: int | None = None) -> np.ndarray:
    """The frame as a camera program would hand it over: unchanged, or after a JPEG round trip in memory.

    With ``jpeg_quality`` (10-100) the result is what :func:`write_frame` to a ``.jpg`` at that
    quality gives when read back (8-bit frames only); ``None`` returns ``rendered.image`` itself.
    """
    if jpeg_quality is None:
        return rendered.image
    import cv2

    low, high = _RANGES["output.jpeg_quality"]
    if not (low <= int(jpeg_quality) <= high) or int(jpeg_quality) != jpeg_quality:
        raise InputError(f"`jpeg_quality` must be a whole number in {low}-{high}, was {jpeg_quality!r}")
    image = rendered.image
    if image.dtype != np.uint8:
        raise InputError("JPEG holds 8-bit frames only; set output.bit_depth = 8 or pass jpeg_quality=None")
    bgr = image[..., ::-1] if image.ndim == 3 else image
    ok, buffer = cv2.imencode(".jpg", np.ascontiguousarray(bgr), [cv2.IMWRITE_JPEG_QUALITY, int(jpeg_quality)])
    if not ok:
        raise ExportError("OpenCV could not encode the frame as JPEG")
    decoded = cv2.imdecode(buffer, cv2.IMREAD_UNCHANGED)
    return np.ascontiguousarray(decoded[..., ::-1] if decoded.ndim == 3 else decoded)


def write_truth(truth: Mapping[str, Any], path: str | os.PathLike, *, force: bool = False) -> None:
    """Write a truth sidecar (JSON), atomically."""
    _atomic_write_bytes(Path(path), (json.dumps(truth, indent=1) + "\n").encode("utf-8"), force=force)


def render_video(
    bench: Bench,
    path: str | os.PathLike,
    *,
    frames: int,
    fps: float = 30.0,
    seed: int = 0,
    drift_px_per_frame: float = 0.0,
    flicker: float = 0.0,
    force: bool = False,
) -> dict:
    """Write a video (``.avi`` Motion-JPEG, or ``.mp4``) whose noise changes from frame to frame.

    ``drift_px_per_frame`` moves the band along the dispersion (a slowly bumped
    setup); ``flicker`` is the relative amplitude of a lamp's intensity
    flicker (random per frame). Returns the truth record with per-frame
    shifts and intensities.
    """
    import cv2

    if frames < 1:
        raise InputError(f"`frames` must be at least 1, was {frames}")
    path = Path(path)
    suffix = path.suffix.lower()
    codecs = {".avi": "MJPG", ".mp4": "mp4v"}
    if suffix not in codecs:
        raise ExportError(f"cannot write video as {suffix or 'a file without extension'!r}; use .avi or .mp4")
    if path.exists() and not force:
        raise ExportError(f"{str(path)!r} already exists; choose another name or pass --force to overwrite it")
    if not path.parent.is_dir():
        raise ExportError(f"cannot write {str(path)!r}: folder {str(path.parent)!r} does not exist")
    renderer = _Renderer(bench)
    rng = np.random.default_rng(seed)
    cam = bench.camera
    tmp = path.with_name(f".{path.stem}.part{suffix}")
    writer = cv2.VideoWriter(str(tmp), cv2.VideoWriter_fourcc(*codecs[suffix]), fps, (cam.width_px, cam.height_px), True)
    if not writer.isOpened():
        raise ExportError(f"OpenCV cannot open a {codecs[suffix]} video writer for {str(path)!r}")
    shifts, intensities = [], []
    try:
        for i in range(frames):
            shift = drift_px_per_frame * i
            intensity = 1.0 + (flicker * rng.uniform(-1, 1) if flicker else 0.0)
            frame = renderer.frame(rng, intensity=intensity, shift_px=shift)
            image = frame.image
            if image.dtype != np.uint8:
                image = (image >> 8).astype(np.uint8)
            if image.ndim == 2:
                image = np.repeat(image[..., None], 3, axis=2)
            writer.write(np.ascontiguousarray(image[..., ::-1]))
            shifts.append(shift)
            intensities.append(intensity)
        writer.release()
        os.replace(tmp, path)
    except BaseException:
        writer.release()
        if tmp.exists():
            tmp.unlink()
        raise
    return dict(renderer.truth, seed=int(seed), video={"frames": frames, "fps": fps, "shift_px": shifts, "intensity": intensities})
