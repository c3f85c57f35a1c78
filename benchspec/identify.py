"""Which species made this spectrum: identification of gases and mixtures against the line library.

The method, in the order it runs:

1. **Boundary checks.** The spectrum must be calibrated (a ``wavelength_nm``
   axis), finite, strictly increasing (no repeats) and overlap 300-1100 nm
   by at least 50 nm; samples outside 300-1100 nm are dropped.
2. **Observed lines.** Peaks whose prominence exceeds ``min_snr`` times the
   noise are found (``scipy.signal.find_peaks``, on data smoothed to the
   line width); their centres are half-maximum centroids and their widths
   are measured at half prominence. Peaks narrower than 0.3 x the LSF (noise,
   hot pixels), broader than twice it, or rising less than 10% above the
   continuum under them (ripples on a bright continuum) are not lines.
3. **Line-spread function (LSF).** Unless ``fwhm_nm`` is given, the LSF
   FWHM is the 25th percentile of the widths of the significant peaks
   (blends only widen peaks). A spectrum whose narrowest significant peak is
   broader than 12 nm has no lines (an LED, a lamp continuum) and is
   ``unknown``, unless it shows four or more peaks of which one is narrow
   (a dense line spectrum seen at low resolution). Each sample is modelled
   as the integral of the line profile over the sample's own width (a box),
   so the model works at any sampling: 0.05 nm spectrometer pixels or the
   5 nm steps of tabulated lamp spectra.
4. **Forward model per species.** The species' NIST ASD lines inside the
   range, weighted by relative intensity, each a Gaussian of the LSF width
   (phosphor bands also carry their own width, the line's ``tolerance_nm``)
   integrated over each sample. The lines may shift within the calibration
   uncertainty: a common shift of up to ``max_shift_nm`` (three times
   ``Spectrum.wavelength_uncertainty_nm``, median at the strong lines, or
   0.9 nm when the spectrum carries none) chosen by correlation with the
   data; then, when the calibration uncertainty is known, a smooth offset
   curve (polynomial of degree <= 2 through the offsets of the species'
   isolated strong lines) with each line kept within three times the
   uncertainty at its own wavelength -- whichever correlates better.
5. **Non-negative least squares** (``scipy.optimize.nnls``) over all
   candidate species at once plus a smooth non-negative continuum (broad
   Gaussian bumps, FWHM ``max(40 nm, 8 x LSF)``, and a constant; a negative
   floor, from an over-subtracted background, is lifted first), so that
   mixtures share the flux between them (weights 1/noise).
6. **Relative intensities within a tolerance.** Lamp, discharge current and
   camera change line ratios. After each fit two things are re-estimated
   and the fit repeated (four fits in all): a smooth instrument response
   shared by all species (piecewise-linear in log, knots every 50 nm,
   within x/÷300, pulled towards 1 with the weight of three well-measured
   lines per knot, and informed only by species that show five or more
   lines), and a factor for every line of every fitted species, the ratio
   of the data to the model at that line clipped to
   ``[1/intensity_tolerance, intensity_tolerance]`` (default 4). Beyond
   that the model does not follow the data.
7. **Scores.** For each species: ``fraction`` is the share of the observed
   line flux (within 1.5 FWHM of an observed line, above the fitted
   continuum) that its model explains. ``presence`` is one minus the share
   of its expected flux (NIST ratios x the shared response, scaled to the
   lines that carry half of its model) that is missing from the data
   beyond the intensity tolerance, counting only lines that would be seen
   even at 1/tolerance of their expected strength. ``marginal`` is the
   line flux no longer explained when the fit is repeated without the
   species. The score is ``presence**1.5 * (1 - exp(-marginal / 0.04))``,
   in [0, 1]; a species that explains no observed line scores 0.
8. **Verdict.** ``unknown`` when there are no observed lines, the best score
   is below 0.4 or less than 60% of the line flux is explained (no species
   is then named); ``identified`` when exactly one species scores at least
   0.6 and at least 70% of the line flux is explained; ``mixture`` when two
   or more do (a compact fluorescent lamp is the mixture Hg +
   CFL-phosphor); ``uncertain`` otherwise.

Spectra from other instruments: build a :class:`~benchspec.spectrum.Spectrum`
with :func:`benchspec.spectrum.as_spectrum` from a wavelength column (air
wavelengths in nm, strictly increasing) and an intensity column (linear, any
units, background ideally subtracted), or read a file with
:func:`benchspec.io.read_spectrum` (a CSV with ``wavelength_nm,intensity``
and optional ``uncertainty``, ``saturated``, ``wavelength_uncertainty_nm``
columns; or plain two-column text). Sampling may be anything from a few
hundredths of a nm to 5 nm. If the data come from a vacuum-
wavelength instrument convert them first (``benchspec.physics.vacuum_to_air_nm``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
from scipy import optimize, signal, special

from .errors import IdentificationError, InputError
from .refdata import available_species, load_line_list
from .spectrum import Spectrum

__all__ = [
    "DEFAULT_SPECIES",
    "LineMatch",
    "ObservedLine",
    "SpeciesMatch",
    "IdentificationResult",
    "identify",
    "find_observed_lines",
    "VERDICTS",
]

#: The species tried when the caller does not choose.
DEFAULT_SPECIES = ("H", "He", "Ne", "Ar", "Kr", "Xe", "Hg", "Na", "CFL-phosphor")
VERDICTS = ("identified", "mixture", "uncertain", "unknown")

#: Wavelengths a silicon camera behind glass optics can record, with a margin (about 350-1050 nm;
#: common practice, no source): samples outside are dropped here, and `benchspec lines` leaves lines
#: outside out of its table. ``plots.VIEW_RANGE_NM`` is the same range.
WAVELENGTH_RANGE_NM = (300.0, 1100.0)
MIN_OVERLAP_NM = 50.0
_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))
_DEFAULT_CALIBRATION_SIGMA_NM = 0.3
_MAX_LSF_FWHM_NM = 10.0
_BROADEST_LINE_NM = 12.0
_EXPLAINED_SHARE = 0.25  # a peak is explained when the model reaches this share of its height
_SCORE_FRACTION_SCALE = 0.04
_PRESENCE_POWER = 1.5
_IDENTIFIED_SCORE = 0.6
_UNKNOWN_SCORE = 0.4
_UNKNOWN_EXPLAINED = 0.6
_REPORTED_SCORE = 0.2
_PASSES = 4  # fits: the first with NIST ratios, then with the response and per-line factors
_RESPONSE_LIMIT = 300.0  # the shared smooth response may depart from 1 by at most this factor
_RESPONSE_MIN_LINES = 5  # only species showing this many lines inform the shared response
_RESPONSE_KNOT_NM = 50.0  # knot spacing of the piecewise-linear log response (IR-cut filters fall within ~50 nm)
_RESPONSE_PRIOR_LINES = 1.0  # the prior "response = 1" weighs as much as this many well-measured lines
_MIN_CONTRAST = 0.1  # an emission line rises at least this fraction above the continuum under it


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ObservedLine:
    """A line found in the spectrum.

    Attributes
    ----------
    wavelength_nm : float
        Half-maximum centroid of the peak (air, nm).
    fwhm_nm : float
        Width at half prominence, nm.
    height : float
        Peak height above the local base, in intensity units.
    snr : float
        ``height`` over the 1-sigma noise of one sample.
    """

    wavelength_nm: float
    fwhm_nm: float
    height: float
    snr: float

    def to_dict(self) -> dict:
        return {
            "wavelength_nm": round(self.wavelength_nm, 4),
            "fwhm_nm": round(self.fwhm_nm, 4),
            "height": float(self.height),
            "snr": round(self.snr, 2),
        }


@dataclass(frozen=True)
class LineMatch:
    """An observed line explained by a species.

    Attributes
    ----------
    observed_nm : float
        Centre of the observed line.
    reference_nm : float
        Flux-weighted mean NIST wavelength of the species' lines that make the
        modelled peak (the wavelength of the line itself when it is alone).
    residual_nm : float
        ``observed_nm - reference_nm``.
    strongest_nm : float
        The species' line that contributes most to this peak.
    blend : int
        Number of the species' lines contributing at least 10% of the peak.
    share : float
        The species' share of the model at this peak, 0-1.
    snr : float
        Signal-to-noise ratio of the observed line.
    """

    observed_nm: float
    reference_nm: float
    residual_nm: float
    strongest_nm: float
    blend: int
    share: float
    snr: float

    def to_dict(self) -> dict:
        return {
            "observed_nm": round(self.observed_nm, 4),
            "reference_nm": round(self.reference_nm, 4),
            "residual_nm": round(self.residual_nm, 4),
            "strongest_nm": round(self.strongest_nm, 4),
            "blend": int(self.blend),
            "share": round(self.share, 3),
            "snr": round(self.snr, 2),
        }


@dataclass(frozen=True)
class SpeciesMatch:
    """One species' part in the spectrum.

    Attributes
    ----------
    symbol : str
        Element symbol (``"He"``) or ``"CFL-phosphor"``.
    score : float
        Confidence in [0, 1] that the species is present (see module notes).
    fraction : float
        Share of the observed line flux its model explains, 0-1.
    presence : float
        One minus the share of its predicted line flux missing from the data.
    shift_nm : float
        Wavelength shift applied to its lines (within the calibration uncertainty).
    lines : tuple of LineMatch
        The observed lines it explains, by wavelength.
    missing_nm : tuple of float
        Its lines predicted above 3 sigma that the data lack (beyond the
        intensity tolerance), strongest first, at most ten. A line that makes
        one of the matched peaks in ``lines`` is never listed here, however
        weak: it is in ``weaker_nm``.
    weaker_nm : tuple of float
        Its lines that make a matched peak (within max(FWHM, 3 sigma of the
        line profile) of a matched observed line, the reach that assigns
        reference lines to a peak) but carry less than half of ``1/intensity_tolerance``
        of the flux the NIST ratios and the fitted response predict (a webcam
        sees little at the UV and IR edges), strongest first, at most ten.
        They lower ``presence`` as the missing lines do.
    """

    symbol: str
    score: float
    fraction: float
    presence: float
    shift_nm: float
    lines: tuple[LineMatch, ...]
    missing_nm: tuple[float, ...] = ()
    weaker_nm: tuple[float, ...] = ()

    def to_dict(self) -> dict:
        return {
            "symbol": self.symbol,
            "score": round(self.score, 3),
            "fraction": round(self.fraction, 3),
            "lines": [line.to_dict() for line in self.lines],
        }


@dataclass(frozen=True)
class IdentificationResult:
    """What the spectrum is made of.

    Attributes
    ----------
    verdict : str
        ``"identified"``, ``"mixture"``, ``"uncertain"`` or ``"unknown"``.
    matches : tuple of SpeciesMatch
        Species scoring at least 0.2, best first; empty when the verdict is
        ``unknown`` (the notes then name the closest, not credible, candidates).
    unexplained : tuple of ObservedLine
        Observed lines no species explains.
    explained_fraction : float
        Share of the observed line flux the whole model explains.
    fwhm_nm : float or None
        LSF FWHM used (given or estimated); None when the spectrum has no lines.
    max_shift_nm : float
        Largest shift allowed to any species.
    observed : tuple of ObservedLine
        Every observed line.
    notes : tuple of str
        Plain-language remarks (why a verdict is unknown, range limits...).
    wavelength_nm, continuum, components
        The model: wavelength axis, fitted continuum and each fitted species'
        modelled intensity (read-only arrays), for plots.
    """

    verdict: str
    matches: tuple[SpeciesMatch, ...]
    unexplained: tuple[ObservedLine, ...]
    explained_fraction: float
    fwhm_nm: float | None
    max_shift_nm: float
    observed: tuple[ObservedLine, ...] = ()
    notes: tuple[str, ...] = ()
    wavelength_nm: np.ndarray | None = field(default=None, repr=False)
    continuum: np.ndarray | None = field(default=None, repr=False)
    components: Mapping[str, np.ndarray] = field(default_factory=dict, repr=False)

    @property
    def best(self) -> SpeciesMatch | None:
        """The best match, or None."""
        return self.matches[0] if self.matches else None

    @property
    def symbols(self) -> tuple[str, ...]:
        """Symbols of the matches, best first."""
        return tuple(m.symbol for m in self.matches)

    def to_dict(self) -> dict:
        """``{"verdict", "matches": [{"symbol", "score", "fraction", "lines"}...], "unexplained"}``."""
        return {
            "verdict": self.verdict,
            "matches": [m.to_dict() for m in self.matches],
            "unexplained": [line.to_dict() for line in self.unexplained],
        }


# --------------------------------------------------------------------------- input checks


def _checked_inputs(spectrum) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]:
    if not isinstance(spectrum, Spectrum):
        raise InputError(f"`spectrum` must be a benchspec Spectrum (see benchspec.spectrum.as_spectrum), got {type(spectrum).__name__}")
    if spectrum.wavelength_nm is None:
        raise IdentificationError(
            "the spectrum has no wavelength axis; calibrate it first (benchspec calibrate) "
            "or read a CSV that has a wavelength_nm column"
        )
    wavelength = np.asarray(spectrum.wavelength_nm, dtype=float)
    intensity = np.asarray(spectrum.intensity, dtype=float)
    check_wavelength_axis(wavelength)
    inside = (wavelength >= WAVELENGTH_RANGE_NM[0]) & (wavelength <= WAVELENGTH_RANGE_NM[1])
    if not inside.all():
        spectrum = spectrum.with_(
            intensity=spectrum.intensity[inside],
            uncertainty=spectrum.uncertainty[inside],
            pixel=spectrum.pixel[inside],
            wavelength_nm=spectrum.wavelength_nm[inside],
            wavelength_uncertainty_nm=None if spectrum.wavelength_uncertainty_nm is None else spectrum.wavelength_uncertainty_nm[inside],
            saturated=spectrum.saturated[inside],
        )
        wavelength, intensity = wavelength[inside], intensity[inside]
    bad = ~np.isfinite(intensity)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise IdentificationError(
            f"intensity has {int(bad.sum())} NaN or infinite value(s), first at sample {first} "
            f"({wavelength[first]:.2f} nm); drop or interpolate those samples"
        )
    if intensity.size < 16:
        raise IdentificationError(f"the spectrum has {intensity.size} samples; identification needs at least 16")
    span = wavelength[-1] - wavelength[0]
    if span < 10.0:
        raise IdentificationError(f"the spectrum spans {span:.2f} nm; identification needs at least 10 nm")
    uncertainty = np.asarray(spectrum.uncertainty, dtype=float)
    calibration = None
    if spectrum.wavelength_uncertainty_nm is not None:
        calibration = np.asarray(spectrum.wavelength_uncertainty_nm, dtype=float)
    return wavelength, intensity, uncertainty, calibration


def check_wavelength_axis(wavelength_nm) -> None:
    """Raise :class:`IdentificationError` unless ``wavelength_nm`` is usable for identification.

    Finite, strictly increasing (no repeats), and overlapping 300-1100 nm by at
    least 50 nm (or by its whole span, if shorter); :func:`identify` drops the
    samples outside 300-1100 nm.
    """
    wavelength = np.asarray(wavelength_nm, dtype=float)
    if wavelength.ndim != 1 or wavelength.size == 0:
        raise IdentificationError(f"the wavelength axis must be 1-D and not empty, got shape {wavelength.shape}")
    bad = ~np.isfinite(wavelength)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise IdentificationError(
            f"wavelength has {int(bad.sum())} NaN or infinite value(s), first at sample {first}; every sample needs a wavelength"
        )
    step = np.diff(wavelength)
    if np.any(step == 0):
        first = int(np.flatnonzero(step == 0)[0])
        raise IdentificationError(
            f"wavelength {wavelength[first]:g} nm is repeated (samples {first} and {first + 1}); "
            "wavelengths must be strictly increasing: average or drop the repeats"
        )
    if np.any(step < 0):
        first = int(np.flatnonzero(step < 0)[0])
        raise IdentificationError(
            f"wavelengths are not increasing: {wavelength[first]:g} nm at sample {first} is followed by "
            f"{wavelength[first + 1]:g} nm; sort the samples by wavelength"
        )
    low, high = WAVELENGTH_RANGE_NM
    # A spectrum that reaches past 300-1100 nm (a camera frame's far edges, another
    # instrument's wide range) is cropped to it; one that barely overlaps it is refused.
    overlap = min(high, wavelength[-1]) - max(low, wavelength[0])
    if overlap < min(MIN_OVERLAP_NM, wavelength[-1] - wavelength[0]):
        hint = ""
        if wavelength[-1] > 3000:
            hint = " (values look like angstrom: divide by 10)"
        elif wavelength[-1] < 3:
            hint = " (values look like micrometres: multiply by 1000)"
        raise IdentificationError(
            f"wavelengths span {wavelength[0]:g}-{wavelength[-1]:g} nm but identification works within "
            f"{low:g}-{high:g} nm and needs at least {MIN_OVERLAP_NM:g} nm of it{hint}; check the calibration or the units"
        )


def _noise(intensity: np.ndarray, uncertainty: np.ndarray | None) -> np.ndarray:
    n = intensity.size
    second = np.diff(intensity, 2)
    robust = 1.4826 * np.median(np.abs(second - np.median(second))) / np.sqrt(6.0)
    scale = max(float(np.max(np.abs(intensity))), 1e-300)
    floor = max(robust, 1e-4 * scale)
    if uncertainty is not None and uncertainty.size == n and np.all(np.isfinite(uncertainty)) and np.all(uncertainty > 0):
        sigma = np.maximum(uncertainty, 0.5 * float(np.median(uncertainty)))
        return np.maximum(sigma, 1e-6 * scale)
    return np.full(n, floor)


# --------------------------------------------------------------------------- observed lines


def _sample_edges(wavelength: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mid = 0.5 * (wavelength[1:] + wavelength[:-1])
    lo = np.concatenate(([wavelength[0] - (mid[0] - wavelength[0])], mid))
    hi = np.concatenate((mid, [wavelength[-1] + (wavelength[-1] - mid[-1])]))
    return lo, hi


def find_observed_lines(wavelength_nm, intensity, *, noise, min_snr: float = 5.0, smooth_samples: float = 0.0) -> tuple[ObservedLine, ...]:
    """Emission peaks of a calibrated spectrum (a small, fast finder for identification).

    Parameters
    ----------
    wavelength_nm, intensity : array_like, shape (n,)
    noise : array_like, shape (n,) or float
        1-sigma noise of one sample.
    min_snr : float
        Minimum prominence over noise.
    smooth_samples : float
        Gaussian smoothing (sigma, samples) applied before the search; the
        noise threshold is scaled accordingly.

    Returns
    -------
    tuple of ObservedLine, by wavelength.
    """
    from scipy import ndimage

    wavelength = np.asarray(wavelength_nm, dtype=float)
    values = np.asarray(intensity, dtype=float)
    sigma = np.broadcast_to(np.asarray(noise, dtype=float), values.shape)
    if smooth_samples >= 0.8:
        work = ndimage.gaussian_filter1d(values, smooth_samples, mode="nearest")
        sigma = sigma / np.sqrt(2.0 * np.sqrt(np.pi) * smooth_samples)
    else:
        work = values
    peaks, props = signal.find_peaks(work, prominence=0.0)
    if peaks.size == 0:
        return ()
    prominence = props["prominences"]
    keep = prominence >= min_snr * sigma[peaks]
    peaks, prominence = peaks[keep], prominence[keep]
    if peaks.size == 0:
        return ()
    widths, _, left, right = signal.peak_widths(work, peaks, rel_height=0.5)
    index = np.arange(values.size, dtype=float)
    left_nm = np.interp(left, index, wavelength)
    right_nm = np.interp(right, index, wavelength)
    found = []
    for k, p in enumerate(peaks):
        lo = int(np.floor(left[k]))
        hi = int(np.ceil(right[k])) + 1
        lo, hi = max(0, lo), min(values.size, max(hi, lo + 1))
        base = work[p] - prominence[k]
        weight = np.clip(work[lo:hi] - (base + 0.5 * prominence[k]), 0.0, None)
        if weight.sum() > 0 and hi - lo >= 3:
            centre = float(np.sum(weight * wavelength[lo:hi]) / weight.sum())
        elif 0 < p < values.size - 1:
            y0, y1, y2 = work[p - 1], work[p], work[p + 1]
            denom = y0 - 2 * y1 + y2
            offset = 0.5 * (y0 - y2) / denom if denom < 0 else 0.0
            centre = float(np.interp(p + np.clip(offset, -0.5, 0.5), index, wavelength))
        else:
            centre = float(wavelength[p])
        step = float(np.interp(p, index[:-1] + 0.5, np.diff(wavelength))) if values.size > 1 else 1.0
        fwhm = max(float(right_nm[k] - left_nm[k]), step)
        found.append(ObservedLine(centre, fwhm, float(prominence[k]), float(prominence[k] / sigma[p])))
    return tuple(found)


def _estimate_fwhm(lines: Sequence[ObservedLine], min_snr: float) -> float | None:
    """LSF FWHM from the significant peaks: a low percentile of their widths (blends only widen peaks).

    The 25th percentile of the widths of peaks above twice the detection
    threshold when there are at least three; otherwise the narrowest of the
    peaks above ``max(3 min_snr, 10% of the strongest)``. Widths of peaks near
    the noise threshold mean little and are not used.
    """
    if not lines:
        return None
    clear = np.array([l.fwhm_nm for l in lines if l.snr >= 2.0 * min_snr])
    if clear.size >= 3:
        estimate = float(np.percentile(clear, 25))
    else:
        strongest = max(l.snr for l in lines)
        threshold = min(max(3.0 * min_snr, 0.1 * strongest), strongest)
        estimate = float(min(l.fwhm_nm for l in lines if l.snr >= threshold))
    if estimate > _BROADEST_LINE_NM and len(lines) >= 4:
        # Several peaks, the clear ones all blends: a dense line spectrum at low resolution
        # (a single LED gives one or two broad peaks). The narrowest peak is the better guide.
        narrowest = float(min(l.fwhm_nm for l in lines))
        estimate = narrowest if narrowest <= _BROADEST_LINE_NM else estimate
    return estimate


# --------------------------------------------------------------------------- forward model


@dataclass(frozen=True)
class _Template:
    symbol: str
    wavelength_nm: np.ndarray  # line wavelengths
    intensity: np.ndarray  # nominal relative intensities (max 1)
    sigma_nm: np.ndarray  # Gaussian sigma of each line (LSF and intrinsic width)
    pair_sample: np.ndarray  # sample index of each (sample, line) pair
    pair_line: np.ndarray  # line index of each pair


def _build_template(symbol: str, wavelength: np.ndarray, step: np.ndarray, sigma_lsf: float, reach: float) -> _Template | None:
    line_list = load_line_list(symbol)
    centres = line_list.wavelength_nm
    intensity = line_list.relative_intensity
    tolerance = line_list.tolerance_nm
    margin = 3.0 * sigma_lsf * _FWHM_PER_SIGMA / 2 + reach
    keep = (centres >= wavelength[0] - margin) & (centres <= wavelength[-1] + margin)
    if not np.any(keep):
        return None
    centres, intensity, tolerance = centres[keep], intensity[keep], tolerance[keep]
    intrinsic = np.where(tolerance > 0.1, tolerance / _FWHM_PER_SIGMA, 0.0)
    sigma = np.sqrt(sigma_lsf**2 + intrinsic**2)
    half = 5.0 * sigma + reach + float(step.max())
    lo = np.searchsorted(wavelength, centres - half, side="left")
    hi = np.searchsorted(wavelength, centres + half, side="right")
    counts = hi - lo
    total = int(counts.sum())
    if total == 0:
        return None
    pair_line = np.repeat(np.arange(centres.size), counts)
    starts = np.repeat(lo - np.concatenate(([0], np.cumsum(counts)[:-1])), counts)
    pair_sample = np.arange(total) + starts
    return _Template(symbol, centres, intensity / intensity.max(), sigma, pair_sample, pair_line)


def _profiles(template: _Template, edges_lo: np.ndarray, edges_hi: np.ndarray, step: np.ndarray, shift) -> np.ndarray:
    """Unit-area line profile (per nm) of each pair, integrated over each sample's width.

    ``shift`` is one shift for all lines or an array with one per line.
    """
    shift = np.asarray(shift, dtype=float)
    centre = template.wavelength_nm[template.pair_line] + (shift[template.pair_line] if shift.ndim else shift)
    sigma = template.sigma_nm[template.pair_line]
    s = template.pair_sample
    upper = special.ndtr((edges_hi[s] - centre) / sigma)
    lower = special.ndtr((edges_lo[s] - centre) / sigma)
    return (upper - lower) / step[s]


def _render(template: _Template, profile: np.ndarray, weights: np.ndarray, n: int) -> np.ndarray:
    return np.bincount(template.pair_sample, weights=profile * weights[template.pair_line], minlength=n)


def _continuum_basis(wavelength: np.ndarray, fwhm_nm: float) -> np.ndarray:
    width = max(40.0, 8.0 * fwhm_nm)
    sigma = width / _FWHM_PER_SIGMA
    span = wavelength[-1] - wavelength[0]
    count = max(2, int(np.ceil(span / (width / 2.0))) + 1)
    centres = np.linspace(wavelength[0], wavelength[-1], count)
    bumps = np.exp(-0.5 * ((wavelength[:, None] - centres[None, :]) / sigma) ** 2)
    constant = np.ones((wavelength.size, 1))
    return np.hstack([bumps, constant])


# --------------------------------------------------------------------------- identification


def identify(
    spectrum: Spectrum,
    *,
    species: Sequence[str] | None = None,
    fwhm_nm: float | None = None,
    max_shift_nm: float | None = None,
    intensity_tolerance: float = 4.0,
    min_snr: float = 5.0,
) -> IdentificationResult:
    """Identify the species (and mixtures) that made an emission spectrum.

    Parameters
    ----------
    spectrum : Spectrum
        Calibrated emission spectrum (``wavelength_nm`` in air, nm, strictly
        increasing, 300-1100 nm), any sampling.
    species : sequence of str, optional
        Candidates (symbols of ``calibration/lines``); default
        :data:`DEFAULT_SPECIES`.
    fwhm_nm : float, optional
        Line-spread-function FWHM in nm; estimated from the spectrum if omitted.
    max_shift_nm : float, optional
        Largest shift of any species' lines; default three times the median
        ``wavelength_uncertainty_nm`` of the spectrum (clipped to 0.05-3 nm),
        or 0.9 nm when the spectrum has none.
    intensity_tolerance : float
        Factor by which each line's strength may depart from its NIST ASD
        relative intensity (>= 1).
    min_snr : float
        Detection threshold of observed lines (prominence over noise).

    Returns
    -------
    IdentificationResult

    Raises
    ------
    IdentificationError
        No wavelength axis; NaN or infinite values; wavelengths not strictly
        increasing or repeated; less than 50 nm inside 300-1100 nm; too few
        samples.
    InputError
        Unknown species or out-of-range options.

    Notes
    -----
    See the module docstring for the model, the tolerance on relative
    intensities, the scores and the verdict rules. The fit is non-negative
    least squares (Lawson & Hanson 1974, ``scipy.optimize.nnls``).
    """
    wavelength, intensity, uncertainty, calibration = _checked_inputs(spectrum)
    candidates = _checked_species(species)
    if not (np.isfinite(intensity_tolerance) and intensity_tolerance >= 1.0):
        raise InputError(f"`intensity_tolerance` must be a factor >= 1, was {intensity_tolerance}")
    if not (np.isfinite(min_snr) and min_snr > 0):
        raise InputError(f"`min_snr` must be positive, was {min_snr}")
    if fwhm_nm is not None and not (np.isfinite(fwhm_nm) and 0.01 <= fwhm_nm <= 50.0):
        raise InputError(f"`fwhm_nm` must be within 0.01-50 nm, was {fwhm_nm}")
    if max_shift_nm is not None and not (np.isfinite(max_shift_nm) and 0.0 <= max_shift_nm <= 10.0):
        raise InputError(f"`max_shift_nm` must be within 0-10 nm, was {max_shift_nm}")

    n = wavelength.size
    sigma = _noise(intensity, uncertainty)
    edges_lo, edges_hi = _sample_edges(wavelength)
    step = edges_hi - edges_lo
    median_step = float(np.median(step))
    given_shift = max_shift_nm
    max_shift_nm = 3.0 * _DEFAULT_CALIBRATION_SIGMA_NM if given_shift is None else float(given_shift)
    notes: list[str] = []

    # Observed lines and the line-spread function.
    first = find_observed_lines(wavelength, intensity, noise=sigma, min_snr=min_snr)
    estimated = _estimate_fwhm(first, min_snr) if fwhm_nm is None else float(fwhm_nm)
    if estimated is None:
        notes.append("no peak rises above the noise threshold: the spectrum is flat or line-free")
        return _unknown(wavelength, max_shift_nm, notes)
    if fwhm_nm is None and estimated > _BROADEST_LINE_NM:
        notes.append(
            f"the narrowest features are {estimated:.1f} nm wide (lines are narrower than {_BROADEST_LINE_NM:g} nm): "
            "a broad source such as an LED or a lamp continuum, not a line spectrum"
        )
        return _unknown(wavelength, max_shift_nm, notes, observed=first)
    lsf_fwhm = float(min(estimated, _MAX_LSF_FWHM_NM)) if fwhm_nm is None else float(fwhm_nm)
    lsf_fwhm = max(lsf_fwhm, median_step)
    smooth = (lsf_fwhm / median_step) / _FWHM_PER_SIGMA / 2.0
    observed = find_observed_lines(wavelength, intensity, noise=sigma, min_snr=min_snr, smooth_samples=smooth) if smooth >= 0.8 else first
    broad_limit = max(2.0 * lsf_fwhm, lsf_fwhm + 2.0 * median_step)
    narrow_limit = 0.3 * lsf_fwhm if lsf_fwhm >= 3.0 * median_step else 0.0  # far narrower than the LSF: noise or hot pixels
    lines = tuple(l for l in observed if narrow_limit <= l.fwhm_nm <= broad_limit)
    # Emission lines stand out from whatever continuum lies under them; ripples of a few
    # percent on a bright continuum (absorption structure, response ripple) are not lines.
    baseline = _rough_baseline(wavelength, intensity, lsf_fwhm)
    base_at = np.interp([l.wavelength_nm for l in lines], wavelength, baseline) if lines else np.array([])
    lines = tuple(l for l, b in zip(lines, base_at) if l.height >= _MIN_CONTRAST * max(b, 0.0))
    if not lines:
        notes.append(f"every peak is broader than {broad_limit:.1f} nm (twice the line width): no line spectrum")
        return _unknown(wavelength, max_shift_nm, notes, observed=observed, fwhm=lsf_fwhm)
    sigma_lsf = _gaussian_sigma(lsf_fwhm, median_step)
    if given_shift is None:
        max_shift_nm = _shift_allowance(wavelength, calibration, lines)

    reach = max_shift_nm
    if given_shift is None and calibration is not None and np.any(np.isfinite(calibration)):
        reach = max(reach, float(np.clip(3.0 * np.nanmax(calibration), 0.05, 3.0)))
    templates = []
    for symbol in candidates:
        template = _build_template(symbol, wavelength, step, sigma_lsf, reach)
        if template is not None:
            templates.append(template)
    skipped = [s for s in candidates if s not in {t.symbol for t in templates}]
    if skipped:
        notes.append(f"no reference lines of {', '.join(skipped)} fall in {wavelength[0]:.0f}-{wavelength[-1]:.0f} nm")
    if not templates:
        return _unknown(wavelength, max_shift_nm, notes, observed=observed, fwhm=lsf_fwhm)

    weight = 1.0 / sigma
    basis = _continuum_basis(wavelength, lsf_fwhm)
    line_signal = intensity - baseline
    # The continuum is non-negative; an over-subtracted background (a negative floor) is
    # lifted first, so that no species can pay for spurious lines with a negative pedestal.
    offset = min(0.0, float(np.percentile(intensity, 2.0)))
    intensity = intensity - offset

    # Per-species shift: the one (within the allowance) that best correlates with the line signal.
    shifts, profiles = [], []
    for template in templates:
        tried: dict[float, tuple[float, np.ndarray]] = {}

        def correlation(shift: float) -> float:
            shift = float(np.clip(shift, -max_shift_nm, max_shift_nm))
            if shift not in tried:
                profile = _profiles(template, edges_lo, edges_hi, step, shift)
                column = _render(template, profile, template.intensity, n)
                norm = np.sqrt(np.sum((column * weight) ** 2))
                value = float(np.sum(line_signal * column * weight**2) / norm) if norm > 0 else -np.inf
                tried[shift] = (value, profile)
            return tried[shift][0]

        coarse, spacing = _shift_grid(max_shift_nm, sigma_lsf)
        best_shift = max(coarse, key=correlation)
        for fine in (best_shift - spacing / 3, best_shift + spacing / 3):  # refine around the best coarse shift
            correlation(fine)
        best_shift = max(tried, key=lambda key: tried[key][0])
        best = (tried[best_shift][0], best_shift, tried[best_shift][1])
        if given_shift is None and calibration is not None:
            # The calibration error usually grows towards the ends of the axis: let the lines
            # follow a smooth offset curve, each within 3 sigma of the calibration where it lies.
            allowance = _line_allowance(template, wavelength, calibration)
            curve = _offset_curve(template, lines, allowance, min_snr)
            if curve is not None:
                profile = _profiles(template, edges_lo, edges_hi, step, curve)
                column = _render(template, profile, template.intensity, n)
                norm = np.sqrt(np.sum((column * weight) ** 2))
                value = float(np.sum(line_signal * column * weight**2) / norm) if norm > 0 else -np.inf
                if value > best[0]:
                    best = (value, curve, profile)
        shifts.append(best[1])
        profiles.append(best[2])

    line_weights = [t.intensity.copy() for t in templates]
    knots = _response_knots(wavelength)
    response = _fit_response(knots, np.array([]), np.array([]), np.array([]))
    low_factor, high_factor = 1.0 / intensity_tolerance, intensity_tolerance
    for iteration in range(_PASSES):
        columns = np.column_stack([_render(t, p, w, n) for t, p, w in zip(templates, profiles, line_weights)])
        scale = columns.max(axis=0)
        scale[scale <= 0] = 1.0
        design = np.hstack([columns / scale, basis])
        r, qtb = _compressed(design * weight[:, None], intensity * weight)
        coef, _ = optimize.nnls(r, qtb, maxiter=50 * design.shape[1])
        species_coef = coef[: len(templates)] / scale
        components = columns * species_coef[None, :]
        continuum = basis @ coef[len(templates):]
        if iteration == _PASSES - 1:
            break
        # Ratio of data to model at every line of every fitted species.
        model = components.sum(axis=1)
        ratios, usable_masks = [], []
        log_at, log_ratio, log_weight = [], [], []
        for k, (template, profile) in enumerate(zip(templates, profiles)):
            if species_coef[k] <= 0:
                ratios.append(None)
                usable_masks.append(None)
                continue
            rest = intensity - continuum - (model - components[:, k])
            own = components[:, k]
            size = template.intensity.size
            numerator = np.bincount(template.pair_line, weights=rest[template.pair_sample] * profile, minlength=size)
            denominator = np.bincount(template.pair_line, weights=own[template.pair_sample] * profile, minlength=size)
            noise_level = np.sqrt(np.bincount(template.pair_line, weights=(sigma[template.pair_sample] * profile) ** 2, minlength=size))
            usable = denominator > 0.5 * noise_level
            ratio = np.ones_like(denominator)
            ratio[usable] = np.clip(numerator[usable] / denominator[usable], 1e-3, 1e3)
            current = line_weights[k] / template.intensity  # factor already applied
            total_factor = ratio * current
            ratios.append(total_factor)
            usable_masks.append(usable)
            significant = usable & (numerator > 3.0 * noise_level)
            if np.count_nonzero(significant) < _RESPONSE_MIN_LINES:
                continue  # too few lines to tell an instrument response from a wrong species
            log_at.append(template.wavelength_nm[significant])
            log_ratio.append(np.log(total_factor[significant]))
            # a line measured at flux SNR >= 20 counts fully; weaker lines count less
            log_weight.append(np.clip(numerator[significant] / noise_level[significant] / 20.0, 0.0, 1.0))
        response = _fit_response(knots, np.concatenate(log_at) if log_at else np.array([]),
                                 np.concatenate(log_ratio) if log_ratio else np.array([]),
                                 np.concatenate(log_weight) if log_weight else np.array([]))
        for k, template in enumerate(templates):
            if ratios[k] is None:
                continue
            smooth = response(template.wavelength_nm)
            line_factor = np.clip(ratios[k] / smooth, low_factor, high_factor)
            current = line_weights[k] / template.intensity
            factor = np.where(usable_masks[k], smooth * line_factor, smooth * np.clip(current / smooth, low_factor, high_factor))
            line_weights[k] = template.intensity * factor

    # What each species adds: refit without it and see how much explained line flux is lost.
    near = _near_lines(wavelength, lines, lsf_fwhm)
    full = _explained_total(wavelength, intensity, components, continuum, near)
    marginal = np.zeros(len(templates))
    for k in range(len(templates)):
        if species_coef[k] <= 0:
            continue
        keep = [j for j in range(design.shape[1]) if j != k]
        reduced, _ = optimize.nnls(r[:, keep], qtb, maxiter=50 * design.shape[1])
        coef_without = np.zeros(design.shape[1])
        coef_without[keep] = reduced
        comps_without = columns * (coef_without[: len(templates)] / scale)[None, :]
        continuum_without = basis @ coef_without[len(templates):]
        marginal[k] = max(0.0, full - _explained_total(wavelength, intensity, comps_without, continuum_without, near))

    return _assess(
        wavelength, intensity, sigma, templates, profiles, line_weights, shifts, species_coef, components, continuum,
        lines, observed, lsf_fwhm, max_shift_nm, notes, n, near, marginal, response, intensity_tolerance, offset,
    )


def _compressed(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A small triangular problem with the same least-squares solutions as ``a x = b``.

    With ``a = Q R`` (R upper triangular, from the Cholesky factor of the Gram
    matrix), ``||a x - b||^2 = ||R x - Q^T b||^2 + const`` for every x, so the
    non-negative fits (and the refits that drop a column) run on k x k
    instead of n x k. The Gram matrix is summed with ``einsum`` loops rather
    than threaded BLAS: the matrices are small and threads only contend.
    """
    gram = np.einsum("ij,ik->jk", a, a)
    atb = np.einsum("ij,i->j", a, b)
    ridge = 1e-12 * max(float(np.trace(gram)), 1e-300)
    try:
        lower = np.linalg.cholesky(gram + ridge * np.eye(gram.shape[0]))
    except np.linalg.LinAlgError:
        return a, b
    from scipy.linalg import solve_triangular

    return lower.T, solve_triangular(lower, atb, lower=True)


def _near_lines(wavelength: np.ndarray, lines: Sequence[ObservedLine], fwhm: float) -> np.ndarray:
    """Samples within 1.5 FWHM of an observed line: where line flux is counted."""
    centres = np.array([l.wavelength_nm for l in lines])
    near = np.zeros(wavelength.size, dtype=bool)
    lo = np.searchsorted(wavelength, centres - 1.5 * fwhm)
    hi = np.searchsorted(wavelength, centres + 1.5 * fwhm, side="right")
    for a, b in zip(lo, hi):
        near[a:b] = True
    return near


def _explained_total(wavelength, intensity, components, continuum, near) -> float:
    """Share of the observed line flux (near lines, above the continuum) that the model explains."""
    step = np.gradient(wavelength)
    excess = np.clip(intensity - continuum, 0.0, None)
    total = float(np.sum(excess[near] * step[near]))
    if total <= 0:
        return 0.0
    supported = np.minimum(components.sum(axis=1), excess)
    return float(min(1.0, np.sum(supported[near] * step[near]) / total))


def _shift_allowance(wavelength, calibration, lines) -> float:
    """Largest shift of a species' lines: 3 x the calibration uncertainty where the lines are.

    The median of ``wavelength_uncertainty_nm`` at the strong observed lines
    (above 10% of the strongest's SNR; a calibration is often far less
    certain at the extrapolated ends of the axis than among its lines),
    clipped to 0.05-3 nm; 0.9 nm without one.
    """
    if calibration is None or not np.any(np.isfinite(calibration)):
        return 3.0 * _DEFAULT_CALIBRATION_SIGMA_NM
    good = np.isfinite(calibration)
    strongest = max(l.snr for l in lines)
    strong = [l.wavelength_nm for l in lines if l.snr >= 0.1 * strongest]
    at_lines = np.interp(strong, wavelength[good], calibration[good])
    return float(np.clip(3.0 * np.median(at_lines), 0.05, 3.0))


def _line_allowance(template: _Template, wavelength: np.ndarray, calibration: np.ndarray) -> np.ndarray:
    """Largest offset of each line: 3 x the calibration uncertainty at its wavelength (0.05-3 nm)."""
    good = np.isfinite(calibration)
    local = np.interp(template.wavelength_nm, wavelength[good], calibration[good])
    return np.clip(3.0 * local, 0.05, 3.0)


def _offset_curve(template: _Template, lines: Sequence[ObservedLine], allowance: np.ndarray, min_snr: float) -> np.ndarray | None:
    """Smooth offsets (observed - NIST) of the species' lines, from its strong isolated lines matched to observed ones.

    A weighted polynomial of degree up to 2 through the offsets of the
    species' 30 strongest isolated lines that have an observed line within
    their allowance; each line's offset is then clipped to its allowance.
    None when fewer than three lines match.
    """
    observed = np.array([l.wavelength_nm for l in lines if l.snr >= 2.0 * min_snr])
    if observed.size < 3:
        return None
    centres, strength, sigma = template.wavelength_nm, template.intensity, template.sigma_nm
    at, offset, weight = [], [], []
    for j in np.argsort(-strength)[:30]:
        if strength[j] < 0.02:
            break
        neighbours = np.abs(centres - centres[j]) < 2.5 * sigma[j]
        if np.sum(strength[neighbours] >= 0.3 * strength[j]) > 1:
            continue  # a blend of the species' own lines: its observed centre is not this line's
        distance = observed - centres[j]
        k = int(np.argmin(np.abs(distance)))
        if abs(distance[k]) <= allowance[j]:
            at.append(centres[j])
            offset.append(distance[k])
            weight.append(np.sqrt(strength[j]))
    if len(at) < 3:
        return None
    at, offset, weight = np.array(at), np.array(offset), np.array(weight)
    span = at.max() - at.min()
    degree = 0 if span < 30.0 else min(2, len(at) - 2)
    centre = 0.5 * (at.max() + at.min())
    scale = max(span / 2.0, 1.0)
    coefficients = np.polyfit((at - centre) / scale, offset, degree, w=weight)
    curve = np.polyval(coefficients, (centres - centre) / scale)
    return np.clip(curve, -allowance, allowance)


def _gaussian_sigma(fwhm: float, median_step: float) -> float:
    """Gaussian part of the LSF: the sample box (variance step^2/12) is modelled separately."""
    return float(np.sqrt(max((fwhm / _FWHM_PER_SIGMA) ** 2 - median_step**2 / 12.0, (0.25 * median_step) ** 2, 0.02**2)))


def _response_knots(wavelength: np.ndarray) -> np.ndarray:
    span = wavelength[-1] - wavelength[0]
    count = int(np.clip(np.round(span / _RESPONSE_KNOT_NM) + 1, 2, 17))
    return np.linspace(wavelength[0], wavelength[-1], count)


def _fit_response(knots: np.ndarray, at_nm: np.ndarray, log_ratio: np.ndarray, weights: np.ndarray):
    """A smooth instrument response shared by all species: exp of a piecewise-linear curve fitted to line log-ratios.

    Camera sensitivity and IR-cut filters change every line of every species
    in the same smooth way; fitting that once keeps the per-line tolerance
    for what differs from lamp to lamp. A ridge term pulls the curve towards
    1 (the NIST ASD ratios) with the weight of a few well-measured lines, so
    that a spectrum with one or two lines cannot bend the response to suit
    a wrong species.
    """
    count = knots.size
    if at_nm.size < 3:
        return lambda x: np.ones_like(np.asarray(x, dtype=float))
    hats = np.empty((at_nm.size, count))
    for j in range(count):
        unit = np.zeros(count)
        unit[j] = 1.0
        hats[:, j] = np.interp(at_nm, knots, unit)
    w = np.asarray(weights, dtype=float)
    rows = [hats * w[:, None]]
    rhs = [log_ratio * w]
    ridge = np.sqrt(_RESPONSE_PRIOR_LINES)
    rows.append(ridge * np.eye(count))
    rhs.append(np.zeros(count))
    if count > 2:
        curvature = np.zeros((count - 2, count))
        for j in range(count - 2):
            curvature[j, j : j + 3] = (1.0, -2.0, 1.0)
        rows.append(ridge * curvature)
        rhs.append(np.zeros(count - 2))
    solution, *_ = np.linalg.lstsq(np.vstack(rows), np.concatenate(rhs), rcond=None)
    solution = np.clip(solution, -np.log(_RESPONSE_LIMIT), np.log(_RESPONSE_LIMIT))
    return lambda x: np.exp(np.interp(np.asarray(x, dtype=float), knots, solution))


def _checked_species(species) -> tuple[str, ...]:
    if species is None:
        return DEFAULT_SPECIES
    if isinstance(species, str):
        species = [s for s in species.split(",")]
    chosen = []
    known = available_species()
    lookup = {k.lower(): k for k in known}
    for name in species:
        key = str(name).strip()
        if not key:
            continue
        if key.lower() not in lookup:
            raise InputError(f"unknown species {key!r}; choose from: {', '.join(known)}")
        chosen.append(lookup[key.lower()])
    if not chosen:
        raise InputError(f"no candidate species given; choose from: {', '.join(known)}")
    return tuple(dict.fromkeys(chosen))


def _shift_grid(max_shift: float, sigma_lsf: float) -> tuple[list[float], float]:
    """Coarse shifts to try (spacing about one LSF sigma, at most 13 of them) and their spacing."""
    if max_shift <= 0:
        return [0.0], 0.0
    count = int(np.clip(np.ceil(2 * max_shift / sigma_lsf) + 1, 3, 13))
    if count % 2 == 0:
        count += 1
    grid = np.linspace(-max_shift, max_shift, count)
    return [float(g) for g in grid], float(grid[1] - grid[0])


def _rough_baseline(wavelength: np.ndarray, intensity: np.ndarray, fwhm: float) -> np.ndarray:
    """A lower envelope of the spectrum (rolling minimum, then smoothed) used to steer the shift search."""
    from scipy import ndimage

    step = float(np.median(np.diff(wavelength)))
    window = int(max(3, round(4.0 * max(fwhm, 3.0) / step)))
    low = ndimage.minimum_filter1d(intensity, window, mode="nearest")
    return ndimage.uniform_filter1d(low, window, mode="nearest")


def _unknown(wavelength, max_shift, notes, *, observed=(), fwhm=None) -> IdentificationResult:
    return IdentificationResult(
        verdict="unknown",
        matches=(),
        unexplained=tuple(observed),
        explained_fraction=0.0,
        fwhm_nm=fwhm,
        max_shift_nm=float(max_shift),
        observed=tuple(observed),
        notes=tuple(notes),
        wavelength_nm=_readonly(wavelength),
    )


def _readonly(values) -> np.ndarray:
    array = np.array(values, dtype=float, copy=True)
    array.setflags(write=False)
    return array


def _assess(wavelength, intensity, sigma, templates, profiles, line_weights, shifts, species_coef, components, continuum,
            lines, observed, fwhm, max_shift, notes, n, near, marginal, response, tolerance, offset) -> IdentificationResult:
    model = components.sum(axis=1)
    excess = np.clip(intensity - continuum, 0.0, None)
    step = np.gradient(wavelength)
    centres = np.array([l.wavelength_nm for l in lines])
    total_flux = float(np.sum(excess[near] * step[near]))
    supported = np.minimum(model, excess)  # model flux the data support
    share = np.divide(components, model[:, None], out=np.zeros_like(components), where=model[:, None] > 0)
    explained_flux = (supported[:, None] * share * step[:, None])[near].sum(axis=0)
    fractions = explained_flux / total_flux if total_flux > 0 else np.zeros(len(templates))
    explained_total = float(min(1.0, fractions.sum()))

    # Which observed lines are explained, and by whom.
    model_at = np.interp(centres, wavelength, model)
    base_at = np.interp(centres, wavelength, continuum)
    height_at = np.interp(centres, wavelength, intensity) - base_at
    explained = model_at >= _EXPLAINED_SHARE * np.maximum(height_at, np.array([l.height for l in lines]) * 0.5)
    unexplained = tuple(l for l, e in zip(lines, explained) if not e)

    matches = []
    for k, template in enumerate(templates):
        if species_coef[k] <= 0:
            continue
        comp_at = np.interp(centres, wavelength, components[:, k])
        species_share = np.divide(comp_at, model_at, out=np.zeros_like(comp_at), where=model_at > 0)
        mine = [i for i in range(len(lines)) if explained[i] and species_share[i] >= _EXPLAINED_SHARE]
        line_matches = tuple(
            _line_match(lines[i], template, line_weights[k] * species_coef[k], shifts[k], fwhm, species_share[i])
            for i in mine
        )
        presence, absent = _presence(template, profiles[k], line_weights[k] * species_coef[k], intensity, continuum,
                                     model - components[:, k], sigma, response, tolerance)
        # A weak line that still makes a matched peak is seen, not missing (listing it as both contradicted itself)
        seen = _makes_a_matched_peak(template, shifts[k], fwhm, [lines[i].wavelength_nm for i in mine])
        missing = tuple(float(template.wavelength_nm[j]) for j in absent if not seen[j])[:10]
        weaker = tuple(float(template.wavelength_nm[j]) for j in absent if seen[j])[:10]
        fraction = float(np.clip(fractions[k], 0.0, 1.0))
        if not line_matches:
            score = 0.0
        else:
            score = presence**_PRESENCE_POWER * (1.0 - np.exp(-float(marginal[k]) / _SCORE_FRACTION_SCALE))
        shift_array = np.asarray(shifts[k], dtype=float)
        shift_reported = float(shift_array[int(np.argmax(template.intensity))]) if shift_array.ndim else float(shift_array)
        matches.append(SpeciesMatch(template.symbol, float(score), fraction, float(presence), shift_reported,
                                    line_matches, missing, weaker))
    matches.sort(key=lambda m: (-m.score, -m.fraction))
    reported = tuple(m for m in matches if m.score >= _REPORTED_SCORE)

    strong = [m for m in reported if m.score >= _IDENTIFIED_SCORE]
    best = reported[0].score if reported else 0.0
    if best < _UNKNOWN_SCORE or explained_total < _UNKNOWN_EXPLAINED:
        verdict = "unknown"
        if best < _UNKNOWN_SCORE:
            notes.append("no species in the library explains the lines well enough")
        else:
            notes.append(f"only {explained_total:.0%} of the line flux is explained by the library")
    elif len(strong) == 1 and explained_total >= 0.7:
        verdict = "identified"
    elif len(strong) >= 2 and explained_total >= 0.7:
        verdict = "mixture"
    else:
        verdict = "uncertain"
    if unexplained:
        notes.append(f"{len(unexplained)} observed line(s) are not explained by any candidate species")

    if verdict == "unknown":
        # nothing credible: no species is named (the notes say why)
        closest = ", ".join(f"{m.symbol} {m.score:.2f}" for m in reported[:3])
        if closest:
            notes.append(f"closest candidates, not credible: {closest}")
        reported = ()
    kept = {m.symbol for m in reported}
    comps = {}
    for k, template in enumerate(templates):
        if template.symbol in kept:
            comps[template.symbol] = _readonly(components[:, k])
    return IdentificationResult(
        verdict=verdict,
        matches=reported,
        unexplained=unexplained,
        explained_fraction=explained_total,
        fwhm_nm=float(fwhm),
        max_shift_nm=float(max_shift),
        observed=tuple(observed),
        notes=tuple(notes),
        wavelength_nm=_readonly(wavelength),
        continuum=_readonly(continuum + offset),
        components=comps,
    )


def _line_match(line: ObservedLine, template: _Template, amplitude: np.ndarray, shift: float, fwhm: float, share: float) -> LineMatch:
    centre = line.wavelength_nm
    sigma = template.sigma_nm
    contribution = amplitude * np.exp(-0.5 * ((template.wavelength_nm + shift - centre) / sigma) ** 2) / sigma
    near = np.abs(template.wavelength_nm + shift - centre) <= max(fwhm, 3 * sigma.min())
    if not np.any(near) or contribution[near].sum() <= 0:
        nearest = int(np.argmin(np.abs(template.wavelength_nm - centre)))
        reference = strongest = float(template.wavelength_nm[nearest])
        blend = 1
    else:
        w = np.where(near, contribution, 0.0)
        reference = float(np.sum(w * template.wavelength_nm) / w.sum())
        strongest = float(template.wavelength_nm[int(np.argmax(w))])
        blend = int(np.sum(w >= 0.1 * w.max()))
    return LineMatch(centre, reference, centre - reference, strongest, blend, float(min(share, 1.0)), line.snr)


def _makes_a_matched_peak(template: _Template, shift, fwhm: float, matched_nm) -> np.ndarray:
    """Which of the template's lines lie close enough to a matched observed line to make it (as in ``_line_match``)."""
    if not len(matched_nm):
        return np.zeros(template.wavelength_nm.size, dtype=bool)
    reach = max(fwhm, 3 * float(template.sigma_nm.min()))
    shifted = template.wavelength_nm + np.asarray(shift, dtype=float)
    return np.min(np.abs(shifted[:, None] - np.asarray(matched_nm, dtype=float)[None, :]), axis=1) <= reach


def _presence(template, profile, amplitude, intensity, continuum, others, sigma, response, tolerance) -> tuple[float, np.ndarray]:
    """How much of what the species predicts is really there: 1 - flux share of its lines missing beyond tolerance.

    Returns the presence and the indices of the template's lines that carry
    less than half of ``expected / tolerance`` (strongest expected first).

    The species' expected line fluxes are its NIST ASD relative intensities
    times the fitted instrument response, scaled by observed/expected over the
    lines that carry half of the species' modelled flux. A line is
    *strong* when even at 1/tolerance of that it would stand 3 sigma above the
    noise; a strong line weaker than expected/tolerance counts as (partly)
    missing.
    """
    rest = intensity - continuum - others
    size = template.intensity.size
    pp = np.bincount(template.pair_line, weights=profile**2, minlength=size)
    data = np.bincount(template.pair_line, weights=rest[template.pair_sample] * profile, minlength=size)
    noise = np.sqrt(np.bincount(template.pair_line, weights=(sigma[template.pair_sample] * profile) ** 2, minlength=size))
    inside = pp > 0
    none = np.zeros(0, dtype=int)
    if not np.any(inside):
        return 1.0, none
    observed = np.where(inside, data / np.where(inside, pp, 1.0), 0.0)  # least-squares line flux at each line
    noise_flux = np.where(inside, noise / np.where(inside, pp, 1.0), np.inf)
    nominal = template.intensity * response(template.wavelength_nm)
    claimed = np.clip(np.minimum(observed, amplitude), 0.0, None)
    modelled = np.where(inside, amplitude, 0.0)
    if modelled.sum() <= 0 or not np.any(claimed >= 3.0 * noise_flux):
        return 1.0, none
    # The species' scale: data over NIST expectation on the lines that carry half of its
    # modelled flux (where the fit put it), so that a species fitted to one line is judged
    # by what that line implies for all the others.
    order = np.argsort(-modelled)
    cumulative = np.cumsum(modelled[order])
    core = order[: int(np.searchsorted(cumulative, 0.5 * cumulative[-1])) + 1]
    scale = float(claimed[core].sum() / max(nominal[core].sum(), 1e-300))
    expected = scale * nominal
    strong = inside & (expected / tolerance >= 3.0 * noise_flux)
    if not np.any(strong):
        return 1.0, none
    shortfall = np.clip(1.0 - tolerance * np.clip(observed, 0.0, None) / np.where(expected > 0, expected, 1.0), 0.0, 1.0)
    presence = 1.0 - float(np.sum((expected * shortfall)[strong]) / np.sum(expected[strong]))
    absent = np.flatnonzero(strong & (shortfall > 0.5))
    return float(np.clip(presence, 0.0, 1.0)), absent[np.argsort(-expected[absent], kind="stable")]
