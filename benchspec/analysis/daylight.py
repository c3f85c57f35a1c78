"""The dark lines of daylight: Fraunhofer lines and telluric bands.

A daylight spectrum (sunlight scattered from a white card or the sky - never
the Sun itself) is divided by its continuum; the dips are found, centred,
and labelled with their classical letters (C = H-alpha, D = sodium, ...).
The O2 and H2O bands formed in our own atmosphere are marked as telluric.

The reference set (``calibration/fraunhofer.csv``) is also offered as a
:class:`~benchspec.refdata.LineList`, so a wavelength calibration can use
daylight when no lamp is at hand, and :func:`find_absorption_features` works
on an uncalibrated (pixel) spectrum for the same purpose.
"""

from __future__ import annotations

import csv
import dataclasses
import functools
import io
import math
from dataclasses import dataclass

import numpy as np
from scipy.signal import find_peaks

from ..errors import AnalysisError, FileFormatError, InputError
from ..refdata import LineList, ReferenceLine, read_data_text
from ..spectrum import Spectrum
from ._common import parabolic_vertex, positive_uncertainty, require_calibrated, sample_step_nm

__all__ = [
    "DaylightReferenceLine",
    "AbsorptionFeature",
    "DaylightLine",
    "DaylightResult",
    "load_daylight_lines",
    "daylight_line_list",
    "continuum_normalise",
    "find_absorption_features",
    "identify_daylight_lines",
    "check_daylight_continuum",
    "find_daylight_dips",
    "DAYLIGHT_CALIBRATION_NOTE",
]

#: What a calibration from daylight's dark lines can and cannot promise (shown with its verdict).
DAYLIGHT_CALIBRATION_NOTE = (
    "calibrated from the dark lines of daylight: Ca II H+K, Mg b, Na D and the O2 B band are broad or blended at "
    "webcam resolution, so expect errors of a few tenths of a nm up to about 1 nm (more beyond the outer lines); "
    "check against a lamp when one is at hand"
)
# Dips shallower than this fraction of the continuum are JPEG ripple and noise more often than lines
# at webcam resolution (the demo and G173 benches: real dips 3-50%, ripple below 1%; common practice, no source).
_MIN_DIP_DEPTH = 0.015
# Continuum windows tried (px, read by continuum_normalise as its window): the dispersion is not known
# before the calibration, so the window that follows the camera's colour bumps yet spares the lines is searched.
DIP_WINDOWS_PX = (40.0, 24.0, 70.0)


@dataclass(frozen=True)
class DaylightReferenceLine:
    """One reference dark line of daylight (air wavelength)."""

    label: str
    wavelength_nm: float
    species: str
    origin: str  # "solar" or "telluric"
    depth: float
    width_nm: float

    @property
    def atmospheric(self) -> bool:
        """True for bands formed in the Earth's atmosphere (O2, H2O)."""
        return self.origin == "telluric"


@functools.lru_cache(maxsize=1)
def load_daylight_lines() -> tuple[DaylightReferenceLine, ...]:
    """The Fraunhofer and telluric lines of ``calibration/fraunhofer.csv``, by wavelength.

    The file's header names its sources; depths and widths are rough
    typical values for a low-resolution spectrum.
    """
    text = read_data_text("fraunhofer.csv")
    body = "\n".join(line for line in text.splitlines() if line.strip() and not line.startswith("#"))
    rows = []
    for number, row in enumerate(csv.DictReader(io.StringIO(body)), start=2):
        try:
            rows.append(
                DaylightReferenceLine(
                    label=row["label"].strip(),
                    wavelength_nm=float(row["wavelength_nm"]),
                    species=row["species"].strip(),
                    origin=row["origin"].strip(),
                    depth=float(row["depth"]),
                    width_nm=float(row["width_nm"]),
                )
            )
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise FileFormatError(f"calibration/fraunhofer.csv: data row {number} is malformed ({exc})") from None
    return tuple(sorted(rows, key=lambda r: r.wavelength_nm))


def _fraunhofer_source() -> str:
    for line in read_data_text("fraunhofer.csv").splitlines():
        if line.lower().startswith("# source:"):
            return line.split(":", 1)[1].strip()
    return "calibration/fraunhofer.csv"


def daylight_line_list(*, include_telluric: bool = True) -> LineList:
    """The daylight reference lines as a :class:`~benchspec.refdata.LineList` for wavelength calibration.

    ``relative_intensity`` holds the typical depth (0-1) of each dip;
    ``tolerance_nm`` is half the line's typical width at low resolution
    (at least 0.1 nm); ``note`` holds the classical letter. Broad bands
    (width over 2 nm, e.g. the H2O band) are marked ``calibration=False``.
    Absorption lines: find them with ``absorption=True`` in line finding.
    """
    lines = []
    for ref in load_daylight_lines():
        if ref.atmospheric and not include_telluric:
            continue
        species, _, ion = ref.species.partition(" ")
        lines.append(
            ReferenceLine(
                wavelength_nm=ref.wavelength_nm,
                relative_intensity=ref.depth,
                species=ref.species,
                ion=ion if ion in ("I", "II") else "",
                tolerance_nm=max(0.1, ref.width_nm / 2),
                calibration=ref.width_nm <= 2.0,
                note=f"{ref.label} ({ref.origin})",
            )
        )
    return LineList(
        species="Fraunhofer",
        name="Dark lines of daylight",
        source=_fraunhofer_source(),
        medium="air",
        intensity_scale="typical depth below the continuum (0-1)",
        lines=tuple(lines),
    )


def continuum_normalise(spectrum: Spectrum, *, window_nm: float = 8.0, min_continuum_fraction: float = 0.05) -> Spectrum:
    """Divide a spectrum by its continuum (upper envelope), so dips read as depth below 1.

    The continuum is an iterative Gaussian smoothing (sigma a quarter of
    ``window_nm``; the default 8 nm follows a webcam's colour-filter bumps and
    IR-cut slope yet stays wider than lines at 1-3 nm resolution) in which samples below it are replaced by it before the
    next pass, so dips stop pulling it down
    (:func:`benchspec.lines.fit_continuum`); it follows a camera's slopes
    and colour-filter bumps without the bias of a running maximum. Where the
    continuum is below ``min_continuum_fraction`` of its peak (beyond the
    camera's range, past an IR-cut filter) the normalised spectrum is NaN.
    Works on an uncalibrated spectrum too, with ``window_nm`` then read as
    pixels.

    Returns
    -------
    Spectrum
        Same samples; intensity and uncertainty divided by the continuum;
        provenance records ``continuum_normalised``.
    """
    from ..lines import fit_continuum

    if not isinstance(spectrum, Spectrum):
        raise InputError(f"`spectrum` must be a benchspec Spectrum, got {type(spectrum).__name__}")
    if not window_nm > 0:
        raise InputError(f"`window_nm` must be positive, was {window_nm}")
    if not 0 <= min_continuum_fraction < 1:
        raise InputError(f"`min_continuum_fraction` must be in [0, 1), was {min_continuum_fraction}")
    x = spectrum.wavelength_nm if spectrum.is_calibrated else spectrum.pixel
    step = float(np.median(np.diff(x)))
    width = (window_nm / 4) / step
    if 8 * width >= spectrum.size:
        raise InputError(f"`window_nm` = {window_nm:g} is too wide for a spectrum of {spectrum.size} samples; use a smaller window")
    y = np.array(spectrum.intensity, dtype=np.float64)
    good = np.isfinite(y)
    if np.count_nonzero(good) < 8:
        raise AnalysisError("the spectrum has fewer than 8 finite samples; check the extraction")
    y = np.interp(np.arange(y.size), np.flatnonzero(good), y[good])
    continuum = fit_continuum(y, width=max(width, 1.0))
    peak = float(np.max(continuum))
    if not peak > 0:
        raise AnalysisError("the spectrum has no positive continuum to normalise by; check it is a daylight spectrum, dark-subtracted")
    usable = good & (continuum > min_continuum_fraction * peak)
    provenance = dict(spectrum.provenance)
    provenance["continuum_normalised"] = {"window_nm": float(window_nm), "min_continuum_fraction": float(min_continuum_fraction)}
    with np.errstate(invalid="ignore", divide="ignore"):
        return spectrum.with_(
            intensity=np.where(usable, spectrum.intensity / continuum, np.nan),
            uncertainty=np.where(usable, spectrum.uncertainty / continuum, np.nan),
            provenance=provenance,
        )


@dataclass(frozen=True)
class AbsorptionFeature:
    """A dip below the continuum. ``wavelength_nm`` is None for an uncalibrated spectrum."""

    centre_px: float
    wavelength_nm: float | None
    uncertainty_nm: float | None
    depth: float
    depth_uncertainty: float
    width_nm: float | None


def find_absorption_features(
    normalised: Spectrum,
    *,
    min_depth: float = 0.03,
    min_snr: float = 4.0,
    max_width_nm: float = 12.0,
) -> tuple[AbsorptionFeature, ...]:
    """Dips in a continuum-normalised spectrum (see :func:`continuum_normalise`).

    A dip counts when its depth below the local continuum (its prominence)
    is at least ``min_depth`` and ``min_snr`` times the noise. The centre is
    the vertex of a parabola through the three lowest samples, with its
    uncertainty propagated from the noise (and the calibration uncertainty
    when the spectrum carries one).
    """
    if not isinstance(normalised, Spectrum):
        raise InputError(f"`normalised` must be a benchspec Spectrum, got {type(normalised).__name__}")
    if not 0 < min_depth < 1:
        raise InputError(f"`min_depth` must be between 0 and 1, was {min_depth}")
    usable = np.isfinite(normalised.intensity)
    y = np.where(usable, normalised.intensity, 1.0)
    sigma = positive_uncertainty(normalised)
    calibrated = normalised.is_calibrated
    x = normalised.wavelength_nm if calibrated else normalised.pixel
    step = float(np.median(np.diff(x)))
    noise = float(np.median(sigma[usable])) if np.any(usable) else float(np.median(sigma))
    width_samples = max_width_nm / step if calibrated else max_width_nm
    peaks, props = find_peaks(-y, prominence=min_depth, width=(None, width_samples))
    features = []
    for k, index in enumerate(peaks):
        # Significance against the local noise: the spectrum's noise changes along it.
        if props["prominences"][k] < min_snr * sigma[index] or not usable[index]:
            continue
        if _touches_unusable(usable, int(index), float(props["widths"][k])):
            continue
        vertex = parabolic_vertex(x, -y, sigma, int(index))
        if vertex is None:
            position, err = float(x[index]), step / np.sqrt(12)
        else:
            position, err = vertex
            # A three-point parabola on a sampled line is biased by up to about a
            # tenth of a sample (common practice, no source): kept as a floor.
            err = float(np.hypot(err, 0.1 * step))
        pixel = float(np.interp(position, x, normalised.pixel)) if calibrated else position
        wavelength = uncertainty = width = None
        if calibrated:
            wavelength = position
            cal = 0.0
            if normalised.wavelength_uncertainty_nm is not None:
                cal = float(np.interp(position, x, normalised.wavelength_uncertainty_nm))
            uncertainty = float(np.hypot(err, cal))
            width = float(props["widths"][k] * step)
        features.append(
            AbsorptionFeature(
                centre_px=pixel,
                wavelength_nm=wavelength,
                uncertainty_nm=uncertainty,
                depth=float(props["prominences"][k]),
                depth_uncertainty=float(np.hypot(sigma[index], noise)),
                width_nm=width,
            )
        )
    return tuple(features)


def _touches_unusable(usable: np.ndarray, index: int, width_samples: float) -> bool:
    """True when a dip lies within two of its widths of a region where the continuum is unusable.

    Where the light fades (an IR-cut filter past ~670 nm, the blue end of the camera's range) the
    continuum cannot follow the falling signal: the normalised spectrum sags towards the edge of the
    unusable region and forms a false dip whose "centre" is the edge itself. On the demo daylight
    frame that false dip sat 3 nm blue of the O2 B band (686.7 nm) and was labelled B.
    """
    reach = int(math.ceil(2.0 * max(width_samples, 1.0))) + 1
    return not bool(np.all(usable[max(index - reach, 0): index + reach + 1]))


@dataclass(frozen=True)
class DaylightLine:
    """A dip found in daylight, with its label where it matches a reference line.

    ``label``, ``species`` and ``origin`` are None for an unidentified dip;
    a dip matching several unresolved lines (Na D1 + D2 at low resolution)
    has joined labels ("D2+D1").
    """

    wavelength_nm: float
    uncertainty_nm: float
    depth: float
    label: str | None
    species: str | None
    origin: str | None
    atmospheric: bool | None
    reference_nm: tuple[float, ...]
    offset_nm: float | None


@dataclass(frozen=True)
class DaylightResult:
    """Lines found in a daylight spectrum and the normalised spectrum they were found in."""

    lines: tuple[DaylightLine, ...]
    normalised: Spectrum
    tolerance_nm: float
    missing_labels: tuple[str, ...]

    @property
    def identified(self) -> tuple[DaylightLine, ...]:
        return tuple(l for l in self.lines if l.label is not None)


def identify_daylight_lines(
    spectrum: Spectrum,
    *,
    tolerance_nm: float | None = None,
    window_nm: float = 8.0,
    min_depth: float = 0.03,
    min_snr: float = 4.0,
) -> DaylightResult:
    """Continuum-normalise a daylight spectrum, find its dips and label them.

    Parameters
    ----------
    spectrum : Spectrum
        Calibrated daylight spectrum (air wavelengths).
    tolerance_nm : float, optional
        Largest distance between a dip and its reference line; default the
        larger of 1.5 nm and 2 samples, plus 3x the calibration uncertainty
        at that line.
        Broad telluric bands (O2 A, B; H2O) get half their typical width on
        top, because their deepest point sits a little red of the band head.
    window_nm, min_depth, min_snr
        See :func:`continuum_normalise` and :func:`find_absorption_features`.

    Raises
    ------
    AnalysisError
        When no dip is found at all.

    Notes
    -----
    Each reference line is given to the nearest dip within tolerance; a dip
    given several lines is reported as their blend.
    """
    spectrum = require_calibrated(spectrum)
    step = sample_step_nm(spectrum.wavelength_nm)
    given = tolerance_nm is not None
    if not given:
        tolerance_nm = max(1.5, 2 * step)
    if not tolerance_nm > 0:
        raise InputError(f"`tolerance_nm` must be positive, was {tolerance_nm}")

    def calibration_sigma(wavelength):
        if given or spectrum.wavelength_uncertainty_nm is None:
            return 0.0
        return float(np.interp(wavelength, spectrum.wavelength_nm, spectrum.wavelength_uncertainty_nm))

    normalised = continuum_normalise(spectrum, window_nm=window_nm)
    features = find_absorption_features(normalised, min_depth=min_depth, min_snr=min_snr)
    wl = spectrum.wavelength_nm
    if not features:
        raise AnalysisError(
            f"no absorption lines deeper than {100 * min_depth:g}% found in {wl[0]:.0f}-{wl[-1]:.0f} nm; "
            "check it is a daylight spectrum, not saturated, with enough signal (stack frames)"
        )
    centres = np.array([f.wavelength_nm for f in features])
    assigned: dict[int, list[DaylightReferenceLine]] = {}
    missing = []
    for ref in load_daylight_lines():
        if not (wl[0] <= ref.wavelength_nm <= wl[-1]):
            continue
        allowed = tolerance_nm + 3 * calibration_sigma(ref.wavelength_nm) + (ref.width_nm / 2 if ref.atmospheric else 0.0)
        distance = np.abs(centres - ref.wavelength_nm)
        best = int(np.argmin(distance))
        if distance[best] <= allowed:
            assigned.setdefault(best, []).append(ref)
        else:
            missing.append(ref.label)
    lines = []
    for index, feature in enumerate(features):
        refs = assigned.get(index, [])
        if refs:
            species = []
            for r in refs:
                if r.species not in species:
                    species.append(r.species)
            origins = {r.origin for r in refs}
            reference = tuple(r.wavelength_nm for r in refs)
            lines.append(
                DaylightLine(
                    wavelength_nm=feature.wavelength_nm,
                    uncertainty_nm=feature.uncertainty_nm,
                    depth=feature.depth,
                    label="+".join(r.label for r in refs),
                    species=" + ".join(species),
                    origin="telluric" if origins == {"telluric"} else ("solar" if origins == {"solar"} else "mixed"),
                    atmospheric="telluric" in origins,
                    reference_nm=reference,
                    offset_nm=float(feature.wavelength_nm - np.mean(reference)),
                )
            )
        else:
            lines.append(
                DaylightLine(
                    wavelength_nm=feature.wavelength_nm,
                    uncertainty_nm=feature.uncertainty_nm,
                    depth=feature.depth,
                    label=None,
                    species=None,
                    origin=None,
                    atmospheric=None,
                    reference_nm=(),
                    offset_nm=None,
                )
            )
    return DaylightResult(lines=tuple(lines), normalised=normalised, tolerance_nm=float(tolerance_nm), missing_labels=tuple(missing))


def check_daylight_continuum(spectrum: Spectrum) -> None:
    """Refuse a spectrum that is not a continuum (a lamp's emission lines, a dark frame) before calibrating from dips.

    Across the lit span (first to last sample above 10% of the smoothed peak) daylight stays above that level
    almost everywhere; a line lamp drops to its background between lines.

    Raises
    ------
    CalibrationError
    """
    from scipy import ndimage

    from ..errors import CalibrationError

    y = np.nan_to_num(np.asarray(spectrum.intensity, dtype=float))
    smooth = ndimage.gaussian_filter1d(y, 3.0, mode="nearest")
    peak = float(np.max(smooth)) if smooth.size else 0.0
    if not peak > 0:
        raise CalibrationError("the frame holds no light: --lamp daylight needs skylight or sunlight scattered from a white card through the slit")
    lit = np.flatnonzero(smooth > 0.1 * peak)
    span = smooth[lit[0]: lit[-1] + 1]
    fraction = float(np.mean(span > 0.1 * peak))
    if fraction < 0.8 or lit.size < 30:
        raise CalibrationError(
            f"the frame shows bright lines, not a continuum with dark lines (only {fraction:.0%} of the lit span is above "
            "10% of the peak, need 80%): --lamp daylight needs skylight or a white card in sunlight; for a lamp frame pass "
            "that lamp's name to --lamp"
        )


def find_daylight_dips(spectrum: Spectrum, *, window_px: float, min_snr: float = 5.0, min_depth: float = _MIN_DIP_DEPTH):
    """The dips of an uncalibrated (pixel-axis) daylight spectrum as an absorption :class:`~benchspec.lines.LineTable`.

    The spectrum is divided by its continuum (:func:`continuum_normalise` with ``window_px`` as its
    window), then :func:`benchspec.lines.find_lines` fits the dips (``absorption=True``); dips
    shallower than ``min_depth`` of the continuum are dropped. ``peak`` of each line is its depth
    (fraction of the continuum), which the calibration compares with the listed typical depths.
    """
    from ..lines import LineTable, find_lines

    normalised = continuum_normalise(spectrum, window_nm=window_px, min_continuum_fraction=0.05)
    table = find_lines(normalised, absorption=True, min_snr=min_snr, continuum_width_px=1e3)
    kept = tuple(line for line in table.lines if line.peak >= min_depth)
    return dataclasses.replace(table, lines=kept)
