"""Reference data shipped in ``calibration/``: line lists and lamp definitions.

Each line list names its source in its header; :func:`load_line_list` keeps
that text so exports can record where a calibration's wavelengths came from.
"""

from __future__ import annotations

import csv
import functools
import io
from dataclasses import dataclass
from importlib import resources

import numpy as np

from .errors import InputError, FileFormatError

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = [
    "ReferenceLine",
    "LineList",
    "Lamp",
    "load_line_list",
    "load_lamp",
    "available_species",
    "available_lamps",
    "read_data_text",
    "Laser",
    "load_lasers",
]

_PACKAGE = "benchspec.calibration"


def read_data_text(relative_path: str) -> str:
    """Text of a file in the packaged ``calibration/`` folder."""
    node = resources.files(_PACKAGE)
    for part in relative_path.split("/"):
        node = node / part
    try:
        return node.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise FileFormatError(f"reference file calibration/{relative_path} is missing from the installation; reinstall benchspec") from None


def _list_data(folder: str, suffix: str) -> list[str]:
    node = resources.files(_PACKAGE) / folder
    return sorted(p.name[: -len(suffix)] for p in node.iterdir() if p.name.endswith(suffix))


@dataclass(frozen=True)
class ReferenceLine:
    """One reference line (air wavelength)."""

    wavelength_nm: float
    relative_intensity: float
    species: str
    ion: str
    tolerance_nm: float
    calibration: bool
    note: str = ""


@dataclass(frozen=True)
class LineList:
    """A species' reference lines with the header that names their source."""

    species: str
    name: str
    source: str
    medium: str
    intensity_scale: str
    lines: tuple[ReferenceLine, ...]

    @property
    def wavelength_nm(self) -> np.ndarray:
        return np.array([line.wavelength_nm for line in self.lines])

    @property
    def relative_intensity(self) -> np.ndarray:
        return np.array([line.relative_intensity for line in self.lines])

    @property
    def tolerance_nm(self) -> np.ndarray:
        return np.array([line.tolerance_nm for line in self.lines])

    def within(self, low_nm: float, high_nm: float) -> "LineList":
        """The lines with ``low_nm <= wavelength <= high_nm``."""
        kept = tuple(l for l in self.lines if low_nm <= l.wavelength_nm <= high_nm)
        return LineList(self.species, self.name, self.source, self.medium, self.intensity_scale, kept)


def _parse_line_list(text: str, *, origin: str) -> LineList:
    header: dict[str, str] = {}
    body: list[str] = []
    for raw in text.splitlines():
        if raw.startswith("#"):
            key, _, value = raw[1:].partition(":")
            header[key.strip().lower()] = value.strip()
        elif raw.strip():
            body.append(raw)
    for key in ("species", "source", "medium"):
        if key not in header:
            raise FileFormatError(f"{origin}: header line '# {key}: ...' is missing; every line list must name it")
    if header["medium"] != "air":
        raise FileFormatError(f"{origin}: medium is {header['medium']!r}; benchspec line lists are in air")
    reader = csv.DictReader(io.StringIO("\n".join(body)))
    lines = []
    for row_number, row in enumerate(reader, start=2):
        try:
            lines.append(
                ReferenceLine(
                    wavelength_nm=float(row["wavelength_nm"]),
                    relative_intensity=float(row["relative_intensity"]),
                    species=header["species"],
                    ion=row.get("ion") or "",
                    tolerance_nm=float(row.get("tolerance_nm") or 0.01),
                    calibration=(row.get("calibration") or "no").strip().lower() == "yes",
                    note=row.get("note") or "",
                )
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise FileFormatError(f"{origin}: data row {row_number} is malformed ({exc}); expected numbers in wavelength_nm and relative_intensity") from None
    lines.sort(key=lambda l: l.wavelength_nm)
    return LineList(
        species=header["species"],
        name=header.get("name", header["species"]),
        source=header["source"],
        medium="air",
        intensity_scale=header.get("intensity", ""),
        lines=tuple(lines),
    )


@functools.lru_cache(maxsize=None)
def load_line_list(species: str) -> LineList:
    """The packaged line list of ``species`` (e.g. ``"Hg"``, ``"He"``, ``"CFL-phosphor"``)."""
    known = available_species()
    if species not in known:
        raise InputError(f"unknown species {species!r}; known species: {', '.join(known)}")
    return _parse_line_list(read_data_text(f"lines/{species}.csv"), origin=f"calibration/lines/{species}.csv")


@functools.lru_cache(maxsize=None)
def available_species() -> tuple[str, ...]:
    """Species that have a line list in ``calibration/lines``."""
    return tuple(_list_data("lines", ".csv"))


@dataclass(frozen=True)
class Lamp:
    """A lamp: the line lists it shows and its source type (for cautions)."""

    name: str
    title: str
    species: tuple[str, ...]
    source_type: str
    source: str
    continuum_fraction: float = 0.0
    #: "emission" (a lamp's bright lines) or "absorption" (the dark lines of daylight).
    kind: str = "emission"

    def line_lists(self) -> tuple[LineList, ...]:
        if self.kind == "absorption":
            # The dark lines of daylight live in calibration/fraunhofer.csv, read by the daylight analysis.
            from .analysis.daylight import daylight_line_list

            return (daylight_line_list(),)
        return tuple(load_line_list(s) for s in self.species)

    def lines(self, *, calibration_only: bool = False) -> tuple[ReferenceLine, ...]:
        """All the lamp's reference lines, sorted by wavelength."""
        found = [l for ll in self.line_lists() for l in ll.lines if l.calibration or not calibration_only]
        return tuple(sorted(found, key=lambda l: l.wavelength_nm))

    @property
    def sources(self) -> str:
        """The sources of the lamp's line lists, one string."""
        return "; ".join(f"{ll.species}: {ll.source}" for ll in self.line_lists())


@functools.lru_cache(maxsize=None)
def available_lamps() -> tuple[str, ...]:
    """Lamp names that have a definition in ``calibration/lamps``."""
    return tuple(_list_data("lamps", ".toml"))


def _lamp_kind(value, origin: str) -> str:
    if value not in ("emission", "absorption"):
        raise FileFormatError(f"{origin}: kind is {value!r}; it must be 'emission' or 'absorption'")
    return value


@functools.lru_cache(maxsize=None)
def load_lamp(name: str) -> Lamp:
    """The packaged lamp definition ``name`` (e.g. ``"cfl"``, ``"hg"``, ``"ne"``)."""
    key = name.strip().lower()
    known = available_lamps()
    if key not in known:
        raise InputError(f"unknown lamp {name!r}; choose one of: {', '.join(known)}")
    origin = f"calibration/lamps/{key}.toml"
    try:
        data = tomllib.loads(read_data_text(f"lamps/{key}.toml"))
        return Lamp(
            name=data["name"],
            title=data["title"],
            species=tuple(data["species"]),
            source_type=data["source_type"],
            source=data["source"],
            continuum_fraction=float(data.get("continuum_fraction", 0.0)),
            kind=_lamp_kind(data.get("kind", "emission"), origin),
        )
    except (KeyError, TypeError, ValueError, tomllib.TOMLDecodeError) as exc:
        raise FileFormatError(f"{origin} is malformed ({exc}); see calibration/README.md") from None


@dataclass(frozen=True)
class Laser:
    """A common laser: nominal air wavelength and how far a real unit may sit from it."""

    key: str
    name: str
    nominal_nm: float
    tolerance_nm: float
    kind: str
    source: str
    note: str = ""

    def matches(self, wavelength_nm: float) -> bool:
        """True when ``wavelength_nm`` lies within the laser's tolerance of its nominal value."""
        return abs(float(wavelength_nm) - self.nominal_nm) <= self.tolerance_nm


@functools.lru_cache(maxsize=None)
def load_lasers() -> tuple[Laser, ...]:
    """The packaged list of common lasers (``calibration/lasers.csv``), sorted by wavelength."""
    origin = "calibration/lasers.csv"
    body = [raw for raw in read_data_text("lasers.csv").splitlines() if raw.strip() and not raw.startswith("#")]
    lasers = []
    for row_number, row in enumerate(csv.DictReader(io.StringIO("\n".join(body))), start=2):
        try:
            laser = Laser(
                key=row["key"].strip(),
                name=row["name"].strip(),
                nominal_nm=float(row["nominal_nm"]),
                tolerance_nm=float(row["tolerance_nm"]),
                kind=row["kind"].strip(),
                source=row["source"].strip(),
                note=(row.get("note") or "").strip(),
            )
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise FileFormatError(f"{origin}: data row {row_number} is malformed ({exc}); expected key,name,nominal_nm,tolerance_nm,kind,source,note") from None
        if not laser.source:
            raise FileFormatError(f"{origin}: data row {row_number} ({laser.key}) names no source; every laser must name one")
        lasers.append(laser)
    return tuple(sorted(lasers, key=lambda l: l.nominal_nm))
