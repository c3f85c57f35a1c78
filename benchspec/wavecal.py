"""Automatic wavelength calibration: detected lines -> a lamp's reference lines -> a polynomial.

No first guess is needed: neither which side is blue, nor the dispersion
(0.1-3 nm/px by default), nor which lines are present.

Method
------
1. *Reference features.* At a trial dispersion D and the measured line width
   F (px), reference lines closer than about one resolution element (1.2 F D)
   merge into one feature: its wavelength is the intensity-weighted centroid
   of the members and its uncertainty adds the members' weighted spread to
   their listed tolerances. This is how the CFL traps are handled: Tb3+
   542.4 nm beside Hg 546.07 nm, the Hg 577/579 pair beside the phosphor
   group near 586 nm, dense Ne groups. Where the lines are resolved they stay
   separate features.
2. *Hypotheses by ratio-of-spacings pattern matching.* For triplets of the
   strongest detected lines and triplets of the strongest features, the ratio
   of spacings (p2 - p1)/(p3 - p1) is invariant to offset, scale and
   direction; a triplet pair whose ratios agree defines a quadratic
   pixel->wavelength hypothesis (for either direction of dispersion). The
   search runs in dispersion bands of a factor 1.6 so that blends are
   clustered at the right resolution.
3. *Scoring.* Each hypothesis is scored by the number of detected lines that
   land on a feature (within a tolerance of a few pixels), vectorised over
   all hypotheses.
4. *Refinement.* The best distinct hypotheses are refined by iterative
   matching (one detected line per feature, tightening tolerance) and a
   weighted polynomial fit of order 1-3, the order chosen by the Bayesian
   information criterion, with outliers rejected at 4 robust sigma.
5. *Decision.* The best refined solution is accepted only if it matches at
   least 3 lines used in the fit (4 matched without manual pairs), explains
   most of the bright lines, has an RMS under 1 px and is clearly better than
   any distinct runner-up (two fits of one assignment that differ only
   beyond the matched lines, or within their uncertainty, are not rivals); otherwise :class:`~benchspec.errors.CalibrationError`
   says why. A wrong lamp or lines that fit no lamp are refused, never
   returned as a wrong solution.

6. *Grating model.* The accepted solution's lines are also fitted with the
   physical mapping of a pinhole camera behind a grating,
   lambda(x) = A sin(theta + atan(s (x - x0) / f)) (grating equation at normal
   incidence, x = x0 + f tan(beta - tilt)), with the same outlier rejection;
   it replaces the polynomial only where its BIC is lower (by 2 if it has more
   parameters), compared on the lines either model keeps. Where the tightly
   known lines stop short of the frame's end (the CFL has none beyond
   611.6 nm) it extrapolates far better than a cubic.

The solution's 1-sigma uncertainty across the range comes from the fit
covariance (scaled by the reduced chi-square where that exceeds 1), through the
Jacobian of the grating model where that was chosen.
All wavelengths are in air (the line lists are in air).
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import math
from dataclasses import dataclass, field
from typing import Iterable, Sequence

import numpy as np

from .errors import CalibrationError, InputError
from .lines import LineTable, find_lines
from .physics import diffraction_angle_deg
from .refdata import Lamp, available_lamps, load_lamp, load_line_list
from .spectrum import Spectrum
from .wavefit import _derivative_coeffs, _median, _polyval
from .wavefit import (  # noqa: F401  (the fit stage lives in its own module)
    _grating_phase,
    _grating_eval,
    _grating_derivative,
    _grating_jacobian,
    _grating_fit,
    _grating_deletion_z,
    _covariance_scale,
    _grating_effective_parameters,
    _weighted_polyfit,
    _loo_residuals,
    _deletion_z,
    _select_order,
    _robust_fit,
)

__all__ = [
    "ManualPair",
    "MatchedLine",
    "WavelengthSolution",
    "WavelengthCalibration",
    "calibrate_lines",
    "calibrate_spectrum",
    "calibrate_combined",
    "dispersion_range_for_grating",
    "parse_pair",
    "VERDICTS",
    "SOLUTION_MODELS",
    "GRATING_PARAMETERS",
]

#: Quality verdicts, best first.
VERDICTS = ("good", "fair", "poor")
#: Models a WavelengthSolution can hold.
SOLUTION_MODELS = ("polynomial", "grating")
#: Names (and units) of the grating model's coefficients, in order.
GRATING_PARAMETERS = ("A_nm", "theta_rad", "x0_px", "f_px")

# Systematic floor added to every line centre (JPEG, demosaicing, model), px (common practice, no source):
# for block-coded (JPEG, MJPG) and video frames, and line tables that do not say how theirs were stored.
_CENTRE_FLOOR_PX = 0.03
# The floor for lines from lossless frames (PNG, TIFF, 16-bit; LineTable.encoding "lossless"): resampling
# and the line model only. Measured on the practicals benchmark's redrawn setups (19 PNG of 48, Rydberg
# pull width; an honest sigma gives about 1): 0.47 with the 0.03 px floor, 0.79 with 0.01, 0.96 with
# 0.004; JPEG setups 0.96 with 0.03 and 0.77 with 0.05. On the accuracy benchmark the line centres of
# PNG benches already pull 0.70 RMS on their statistical sigma alone (RGGB mosaic: 1.03).
_CENTRE_FLOOR_LOSSLESS_PX = 0.005


def _centre_floor_px(table: LineTable) -> float:
    """The systematic floor on the line centres of ``table``, by how its frames were stored."""
    return _CENTRE_FLOOR_LOSSLESS_PX if getattr(table, "encoding", None) == "lossless" else _CENTRE_FLOOR_PX
# A feature is used in the fit only if its own wavelength uncertainty is below this many pixels.
_FEATURE_FIT_LIMIT_PX = 0.75
# While matching, a polynomial is only an approximation of the true mapping: each line's
# uncertainty gets this floor so that tightly known lines are not rejected in cascade (px).
_MATCH_MODEL_FLOOR_PX = 0.1
# Broad reference features beyond this wavelength are not matched (a webcam's IR-cut filter skews them), nm.
_IR_CUT_NM = 680.0


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ManualPair:
    """A user-given pixel -> wavelength pair (e.g. a laser line).

    Attributes
    ----------
    pixel : float
    wavelength_nm : float
        Air wavelength.
    tolerance_nm : float
        1-sigma uncertainty of ``wavelength_nm``.
    label : str
    """

    pixel: float
    wavelength_nm: float
    tolerance_nm: float = 0.2
    label: str = "manual pair"


@dataclass(frozen=True)
class MatchedLine:
    """A detected line and the reference feature it was assigned to.

    Attributes
    ----------
    pixel, pixel_uncertainty : float
        Fitted centre and its 1-sigma, px.
    reference_nm : float
        Wavelength of the assigned feature (intensity-weighted centroid for a blend).
    reference_uncertainty_nm : float
        Listed tolerance plus blend spread, 1-sigma.
    fitted_nm : float
        The solution's wavelength at ``pixel``.
    residual_nm, residual_px : float
        reference minus fitted, in nm and in pixels.
    species : str
        Species (or lamp) of the feature's dominant line, ``"manual"`` for a pair.
    members_nm : tuple of float
        Reference lines merged into the feature (one for an isolated line).
    lamp : str
    used_in_fit : bool
        False for rejected outliers.
    anchor : bool
        The reference wavelength is known to better than 0.75 px (isolated
        atomic lines, resolved or tight blends); the RMS is computed over these.
    rejected : bool
        Rejected by the outlier test.
    blended : bool
        The feature merges several reference lines, or the detected line was flagged blended.
    saturated : bool
    snr : float
    """

    pixel: float
    pixel_uncertainty: float
    reference_nm: float
    reference_uncertainty_nm: float
    fitted_nm: float
    residual_nm: float
    residual_px: float
    species: str
    members_nm: tuple[float, ...]
    lamp: str
    used_in_fit: bool
    anchor: bool
    rejected: bool
    blended: bool
    saturated: bool
    snr: float

    def to_dict(self) -> dict:
        d = {name: getattr(self, name) for name in self.__dataclass_fields__}
        d["members_nm"] = list(self.members_nm)
        if not math.isfinite(self.snr):
            d["snr"] = None  # a manual pair: no detected line (JSON has no NaN)
        return d

    @classmethod
    def from_dict(cls, data) -> "MatchedLine":
        values = dict(data)
        values["members_nm"] = tuple(float(v) for v in values["members_nm"])
        if values.get("snr") is None:
            values["snr"] = float("nan")
        return cls(**values)


@dataclass(frozen=True)
class WavelengthSolution:
    """A pixel -> air wavelength mapping with its covariance: a polynomial, or the grating model.

    ``model == "polynomial"`` (the default)::

        wavelength_nm(p) = sum_k c_k t**k,  t = (p - pixel_centre) / pixel_scale

    ``model == "grating"`` (a pinhole camera behind a grating: x = x0 + f tan(beta - tilt)
    and the grating equation m lambda = d (sin alpha + sin beta))::

        wavelength_nm(p) = A sin(theta + atan(s (p - x0) / f)) + B

    with ``coefficients = (A_nm, theta_rad, x0_px, f_px)``, ``s = grating_sign`` (+1 or -1,
    which side blue is on) and ``B = grating_offset_nm`` (0 at normal incidence; fixed, not fitted).

    Attributes
    ----------
    coefficients : tuple of float
        Polynomial: c_0 ... c_order (nm). Grating: (A_nm, theta_rad, x0_px, f_px).
    covariance : tuple of tuple of float
        Covariance of the coefficients (nm^2 for a polynomial; in the coefficients' own units
        for the grating model), already scaled by the reduced chi-square where that exceeds 1.
    pixel_centre, pixel_scale : float
    pixel_range : tuple of float
        The pixel range of the spectrum the solution was fitted on (first, last).
    model : str
        ``"polynomial"`` or ``"grating"``.
    grating_sign : float
        +1 or -1 (grating model only).
    grating_offset_nm : float
        B (grating model only).
    alternative : WavelengthSolution or None
        The other model family fitted to the same lines (the grating model beside a polynomial
        solution, or the polynomial beside a grating one), when both fitted them.
    alternative_weight : float
        The alternative's posterior weight from the two models' BIC (1 / (1 + exp(dBIC / 2)),
        dBIC = BIC(alternative) - BIC(this)); 0 without one. :meth:`uncertainty_nm` adds
        ``alternative_weight * (alternative - this)**2`` to the variance (Bayesian model averaging
        about the reported model): where the lines cannot tell the two models apart their
        disagreement, small between the lines and growing beyond them, is part of the error.
    """

    coefficients: tuple[float, ...]
    covariance: tuple[tuple[float, ...], ...]
    pixel_centre: float
    pixel_scale: float
    pixel_range: tuple[float, float]
    model: str = "polynomial"
    grating_sign: float = 1.0
    grating_offset_nm: float = 0.0
    alternative: "WavelengthSolution | None" = None
    alternative_weight: float = 0.0

    def __post_init__(self):
        if self.model not in SOLUTION_MODELS:
            raise InputError(f"`model` must be one of {', '.join(SOLUTION_MODELS)}, was {self.model!r}")
        if self.model == "grating" and len(self.coefficients) != 4:
            raise InputError(f"the grating model needs 4 coefficients (A_nm, theta_rad, x0_px, f_px), got {len(self.coefficients)}")

    @property
    def order(self) -> int:
        """Polynomial order; for the grating model, 3 (it has as many free parameters as a cubic)."""
        return len(self.coefficients) - 1

    @property
    def description(self) -> str:
        """A few words for tables: "order 2 polynomial" or "grating model"."""
        return "grating model" if self.model == "grating" else f"order {self.order} polynomial"

    def _t(self, pixel):
        return (np.asarray(pixel, dtype=float) - self.pixel_centre) / self.pixel_scale

    def wavelength_nm(self, pixel) -> np.ndarray:
        """Air wavelength (nm) at ``pixel``."""
        if self.model == "grating":
            return _grating_eval(self.coefficients, pixel, self.grating_sign, self.grating_offset_nm)
        return np.polynomial.polynomial.polyval(self._t(pixel), self.coefficients)

    def dispersion_nm_per_px(self, pixel) -> np.ndarray:
        """d(wavelength)/d(pixel) in nm/px (negative when blue is on the right)."""
        if self.model == "grating":
            return _grating_derivative(self.coefficients, pixel, self.grating_sign)
        derivative = np.polynomial.polynomial.polyder(self.coefficients)
        return np.polynomial.polynomial.polyval(self._t(pixel), derivative) / self.pixel_scale

    def uncertainty_nm(self, pixel) -> np.ndarray:
        """1-sigma uncertainty of the solution's wavelength at ``pixel`` (nm)."""
        if self.model == "grating":
            basis = _grating_jacobian(self.coefficients, pixel, self.grating_sign)
        else:
            t = self._t(pixel)
            basis = np.stack([t**k for k in range(self.order + 1)], axis=-1)
        cov = np.asarray(self.covariance, dtype=float)
        variance = np.maximum(np.einsum("...i,ij,...j->...", basis, cov, basis), 0.0)
        if self.alternative is not None and self.alternative_weight > 0:
            variance = variance + self.alternative_weight * self.model_difference_nm(pixel) ** 2
        return np.sqrt(variance)

    def statistical_uncertainty_nm(self, pixel) -> np.ndarray:
        """1-sigma of this model's own fit at ``pixel`` (nm), without the model-averaging term."""
        return dataclasses.replace(self, alternative=None, alternative_weight=0.0).uncertainty_nm(pixel)

    def model_difference_nm(self, pixel) -> np.ndarray:
        """The alternative model's wavelength minus this one's at ``pixel`` (nm); 0 without an alternative."""
        if self.alternative is None:
            return np.zeros(np.shape(np.asarray(pixel, dtype=float)))
        return self.alternative.wavelength_nm(pixel) - self.wavelength_nm(pixel)

    def pixel_of(self, wavelength_nm) -> np.ndarray:
        """Pixel at which the solution reaches ``wavelength_nm`` (inverse, by interpolation on a fine grid)."""
        low, high = self.pixel_range
        grid = np.linspace(low, high, int(abs(high - low)) * 4 + 2)
        values = self.wavelength_nm(grid)
        if values[-1] < values[0]:
            grid, values = grid[::-1], values[::-1]
        return np.interp(np.asarray(wavelength_nm, dtype=float), values, grid, left=np.nan, right=np.nan)

    @property
    def blue_on_right(self) -> bool:
        return bool(self.dispersion_nm_per_px(0.5 * sum(self.pixel_range)) < 0)

    def to_dict(self) -> dict:
        out = self._own_dict()
        if self.alternative is not None:
            out["alternative"] = {**self.alternative._own_dict(), "weight": float(self.alternative_weight)}
        return out

    def _own_dict(self) -> dict:
        if self.model == "grating":
            return {
                "model": "grating",
                "variable": "lambda = A sin(theta + atan(sign (pixel - x0) / f)) + B",
                "parameter_names": list(GRATING_PARAMETERS),
                "parameters": list(self.coefficients),
                "covariance": [list(row) for row in self.covariance],
                "sign": self.grating_sign,
                "offset_nm": self.grating_offset_nm,
                "pixel_centre": self.pixel_centre,
                "pixel_scale": self.pixel_scale,
                "pixel_range": list(self.pixel_range),
            }
        return {
            "model": "polynomial",
            "variable": "t = (pixel - pixel_centre) / pixel_scale",
            "order": self.order,
            "coefficients_nm": list(self.coefficients),
            "covariance_nm2": [list(row) for row in self.covariance],
            "pixel_centre": self.pixel_centre,
            "pixel_scale": self.pixel_scale,
            "pixel_range": list(self.pixel_range),
        }

    @classmethod
    def from_dict(cls, data) -> "WavelengthSolution":
        own = cls._from_own_dict(data)
        alternative = data.get("alternative")
        if alternative is None:
            return own
        return dataclasses.replace(own, alternative=cls._from_own_dict(alternative),
                                   alternative_weight=float(alternative.get("weight", 0.0)))

    @classmethod
    def _from_own_dict(cls, data) -> "WavelengthSolution":
        model = data.get("model", "polynomial")
        pixel_range = (float(data["pixel_range"][0]), float(data["pixel_range"][1]))
        if model == "grating":
            return cls(
                coefficients=tuple(float(c) for c in data["parameters"]),
                covariance=tuple(tuple(float(v) for v in row) for row in data["covariance"]),
                pixel_centre=float(data["pixel_centre"]),
                pixel_scale=float(data["pixel_scale"]),
                pixel_range=pixel_range,
                model="grating",
                grating_sign=float(data["sign"]),
                grating_offset_nm=float(data.get("offset_nm", 0.0)),
            )
        return cls(
            coefficients=tuple(float(c) for c in data["coefficients_nm"]),
            covariance=tuple(tuple(float(v) for v in row) for row in data["covariance_nm2"]),
            pixel_centre=float(data["pixel_centre"]),
            pixel_scale=float(data["pixel_scale"]),
            pixel_range=pixel_range,
            model=model,
        )


@dataclass(frozen=True)
class WavelengthCalibration:
    """The result of an automatic calibration.

    Attributes
    ----------
    solution : WavelengthSolution
    matches : tuple of MatchedLine
        Sorted by pixel.
    rms_px, rms_nm : float
        Weighted RMS residual of the lines used in the fit (weights 1/sigma^2 of
        each line's centre and reference uncertainty, so isolated atomic lines dominate).
    max_uncertainty_nm : float
        Largest 1-sigma solution uncertainty between the outermost matched lines
        (beyond them the solution is extrapolated; see ``uncertainty_nm``).
    verdict : str
        ``"good"``, ``"fair"`` or ``"poor"`` (see :data:`VERDICTS`).
    verdict_reason : str
        One line on why.
    lamps : tuple of str
    line_list_sources : tuple of str
        "species: source" for each line list used.
    coverage_fraction : float
        Fraction of the span of detected lines that lies between the outermost fitted lines.
    n_detected : int
        Lines the matcher was given (after dropping broad bands).
    notes : tuple of str
        Things a user should know (blends excluded, lines rejected, ...).
    evidence_nats : float
        How far the matches are from what chance would give (see the module
        notes); solutions below 12 are refused.
    """

    solution: WavelengthSolution
    matches: tuple[MatchedLine, ...]
    rms_px: float
    rms_nm: float
    max_uncertainty_nm: float
    verdict: str
    verdict_reason: str
    lamps: tuple[str, ...]
    line_list_sources: tuple[str, ...]
    coverage_fraction: float
    n_detected: int
    notes: tuple[str, ...] = ()
    evidence_nats: float = 0.0

    @property
    def n_used(self) -> int:
        return sum(m.used_in_fit for m in self.matches)

    def wavelength_nm(self, pixel) -> np.ndarray:
        return self.solution.wavelength_nm(pixel)

    def uncertainty_nm(self, pixel) -> np.ndarray:
        return self.solution.uncertainty_nm(pixel)

    def format_table(self) -> str:
        """The matched-line table, RMS and verdict as plain text."""
        rows = ["   pixel   +-1s   reference_nm  fitted_nm  resid_nm resid_px  species        used  flags"]
        for m in self.matches:
            flags = ",".join(f for f, on in (("blend", m.blended), ("sat", m.saturated), ("outlier", m.rejected)) if on)
            rows.append(
                f"{m.pixel:8.2f} {m.pixel_uncertainty:6.3f}  {m.reference_nm:11.3f} {m.fitted_nm:10.3f} "
                f"{m.residual_nm:+9.3f} {m.residual_px:+8.2f}  {m.species:<14s} {'yes' if m.used_in_fit else 'no ':<4s}  {flags}"
            )
        low, high = self.solution.pixel_range
        disp = float(np.median(np.abs(self.solution.dispersion_nm_per_px(np.linspace(low, high, 9)))))
        w0, w1 = sorted(self.solution.wavelength_nm([low, high]))
        used = [m.reference_nm for m in self.matches if m.used_in_fit]
        span = f" (lines at {min(used):.1f}-{max(used):.1f} nm, extrapolated beyond)" if used else ""
        rows.append(
            f"{self.solution.description}, {self.n_used} lines used of {len(self.matches)} matched "
            f"({self.n_detected} detected); weighted RMS {self.rms_px:.3f} px = {self.rms_nm:.4f} nm; "
            f"columns {low:.0f}-{high:.0f} px map to {w0:.1f}-{w1:.1f} nm{span} at {disp:.3f} nm/px, "
            f"blue on the {'right' if self.solution.blue_on_right else 'left'}; "
            f"solution 1-sigma <= {self.max_uncertainty_nm:.4f} nm between the outer lines"
        )
        rows.append(f"verdict: {self.verdict} ({self.verdict_reason})")
        rows.extend(f"note: {note}" for note in self.notes)
        return "\n".join(rows)

    def to_dict(self) -> dict:
        return {
            "solution": self.solution.to_dict(),
            "matches": [m.to_dict() for m in self.matches],
            "rms_px": self.rms_px,
            "rms_nm": self.rms_nm,
            "max_uncertainty_nm": self.max_uncertainty_nm,
            "verdict": self.verdict,
            "verdict_reason": self.verdict_reason,
            "lamps": list(self.lamps),
            "line_list_sources": list(self.line_list_sources),
            "coverage_fraction": self.coverage_fraction,
            "n_detected": self.n_detected,
            "notes": list(self.notes),
            "evidence_nats": self.evidence_nats,
        }

    @classmethod
    def from_dict(cls, data) -> "WavelengthCalibration":
        return cls(
            solution=WavelengthSolution.from_dict(data["solution"]),
            matches=tuple(MatchedLine.from_dict(m) for m in data["matches"]),
            rms_px=float(data["rms_px"]),
            rms_nm=float(data["rms_nm"]),
            max_uncertainty_nm=float(data["max_uncertainty_nm"]),
            verdict=str(data["verdict"]),
            verdict_reason=str(data["verdict_reason"]),
            lamps=tuple(data["lamps"]),
            line_list_sources=tuple(data["line_list_sources"]),
            coverage_fraction=float(data["coverage_fraction"]),
            n_detected=int(data["n_detected"]),
            notes=tuple(data.get("notes", ())),
            evidence_nats=float(data.get("evidence_nats", 0.0)),
        )


# --------------------------------------------------------------------------- helpers for users


def parse_pair(text: str) -> ManualPair:
    """Parse ``PIXEL=NM`` or ``PIXEL=NM+-TOL`` (nm) into a :class:`ManualPair`."""
    raw = str(text).strip()
    pixel_text, sep, rest = raw.partition("=")
    tolerance = 0.2
    for marker in ("+-", "±"):
        if marker in rest:
            rest, _, tol_text = rest.partition(marker)
            try:
                tolerance = float(tol_text)
            except ValueError:
                raise InputError(f"manual pair {raw!r}: tolerance {tol_text!r} is not a number; write e.g. 812.4=632.8+-0.1") from None
    try:
        pixel, wavelength = float(pixel_text), float(rest)
    except ValueError:
        raise InputError(f"manual pair {raw!r} must look like PIXEL=NM, e.g. 812.4=632.8") from None
    if not sep or not (200 <= wavelength <= 1200) or not math.isfinite(pixel) or not tolerance > 0:
        raise InputError(
            f"manual pair {raw!r} must look like PIXEL=NM with 200-1200 nm and a positive tolerance, e.g. 812.4=632.8"
        )
    return ManualPair(pixel=pixel, wavelength_nm=wavelength, tolerance_nm=tolerance)


def dispersion_range_for_grating(
    lines_per_mm: float, *, frame_width_px: int, field_of_view_deg: tuple[float, float] = (35.0, 95.0),
    centre_nm: float = 550.0,
) -> tuple[float, float]:
    """Plausible nm/px range for a grating of ``lines_per_mm`` in front of a webcam.

    dispersion = d cos(beta) / f with f = (width / 2) / tan(fov / 2) (pinhole
    camera) and beta from the grating equation at ``centre_nm``; the field of
    view of webcams spans roughly 35-95 degrees (common practice, no source).
    The range is widened by 25% each way.
    """
    if not lines_per_mm > 0:
        raise InputError(f"`lines_per_mm` must be positive, was {lines_per_mm}")
    if frame_width_px < 16:
        raise InputError(f"`frame_width_px` must be at least 16, was {frame_width_px}")
    beta = math.radians(diffraction_angle_deg(centre_nm, lines_per_mm=lines_per_mm))
    d_nm = 1e6 / lines_per_mm
    values = []
    for fov in field_of_view_deg:
        focal = 0.5 * frame_width_px / math.tan(math.radians(fov) / 2)
        values.append(d_nm * math.cos(beta) / focal)
    return (min(values) / 1.25, max(values) * 1.25)


# --------------------------------------------------------------------------- internal data


@dataclass(frozen=True)
class _Peaks:
    pixel: np.ndarray
    sigma: np.ndarray
    amplitude: np.ndarray
    fwhm: np.ndarray
    snr: np.ndarray
    blended: np.ndarray
    saturated: np.ndarray
    lamp: np.ndarray  # lamp index of each peak (combined calibrations)


@dataclass(frozen=True)
class _Features:
    wavelength: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    species: tuple[str, ...]
    members: tuple[tuple[float, ...], ...]
    merged: np.ndarray  # bool


@dataclass
class _Candidate:
    coefficients: np.ndarray
    covariance: np.ndarray
    peak_index: np.ndarray
    feature_index: np.ndarray
    used: np.ndarray
    rejected: np.ndarray
    features: _Features
    score: float
    rms_px: float
    chi2: float
    anchor: np.ndarray = None
    resid_px: np.ndarray = None
    # 1-sigma of each resid_px (px): the line's own uncertainty and that of the others' prediction of it
    resid_sigma_px: np.ndarray = None

    def feature_members_nm(self) -> list:
        """The reference lines (nm) of each assigned feature (one for an isolated line, several for a blend)."""
        return [self.features.members[k] for k in self.feature_index.tolist()]


def _peaks_from_table(table: LineTable, lamp_index: int = 0, kind: str = "emission") -> _Peaks:
    if not isinstance(table, LineTable):
        raise InputError(f"`lines` must be a LineTable from benchspec.lines.find_lines, got {type(table).__name__}")
    if table.kind != kind:
        # An absorption reference (daylight) is matched to dips, a lamp to its bright lines.
        raise InputError(f"this reference needs {kind} lines but the table holds {table.kind} lines; "
                         f"find lines with absorption={kind == 'absorption'}")
    lines = list(table.lines)
    if not lines:
        return _Peaks(*(np.zeros(0) for _ in range(5)), np.zeros(0, bool), np.zeros(0, bool), np.zeros(0, int))
    fwhm = np.array([l.fwhm_px for l in lines])
    typical = float(np.median(fwhm[np.argsort([-l.peak for l in lines])[:7]]))
    # Broad bands are continuum, and features much narrower than the line-spread function are hot
    # pixels or compression ringing: neither is a lamp line. The upper limit leaves room for
    # phosphor lines (~2 nm wide in themselves: 10 px at 0.2 nm/px, several times the LSF).
    keep = [l for l in lines if 0.5 * typical <= l.fwhm_px <= 5.0 * typical]
    # A clipped line with a neighbour has only one clean wing: its centre can be biased by a good
    # fraction of its width, far beyond the fit's own uncertainty (common practice, no source).
    clipped_blend = np.array([l.saturated and l.blended for l in keep], dtype=bool)
    arr = lambda name: np.array([getattr(l, name) for l in keep], dtype=float)
    floor = _centre_floor_px(table)
    return _Peaks(
        pixel=arr("centre_px"),
        sigma=np.where(clipped_blend, np.maximum(np.hypot(arr("centre_uncertainty_px"), floor), 0.3 * arr("fwhm_px")),
                       np.hypot(arr("centre_uncertainty_px"), floor)),
        amplitude=arr("peak"),
        fwhm=arr("fwhm_px"),
        snr=arr("snr"),
        blended=np.array([l.blended for l in keep], dtype=bool),
        saturated=np.array([l.saturated for l in keep], dtype=bool),
        lamp=np.full(len(keep), lamp_index, dtype=int),
    )


def _concat_peaks(items: Sequence[_Peaks]) -> _Peaks:
    names = _Peaks.__dataclass_fields__
    merged = {n: np.concatenate([getattr(p, n) for p in items]) for n in names}
    order = np.argsort(merged["pixel"], kind="stable")
    return _Peaks(**{n: v[order] for n, v in merged.items()})


def _reference_lines(lamp: Lamp, low_nm: float = 370.0, high_nm: float = 1000.0):
    lines = [l for l in lamp.lines() if low_nm <= l.wavelength_nm <= high_nm and l.relative_intensity > 0]
    # Beyond ~680 nm a webcam's IR-cut filter falls steeply: across a band a few nm wide (the Eu3+
    # 707-712 nm group) it shifts the apparent centre by several nm, more than the listed tolerance
    # (design notes: IR-cut filters dim everything past ~670 nm). Narrow atomic lines are not moved.
    lines = [l for l in lines if not (l.wavelength_nm > _IR_CUT_NM and l.tolerance_nm >= 1.0)]
    if not lines:
        raise CalibrationError(f"lamp {lamp.name!r} has no reference lines between {low_nm:g} and {high_nm:g} nm")
    # Line lists of different species use different intensity scales; each is normalised to its strongest line.
    peak = {}
    for l in lines:
        peak[l.species] = max(peak.get(l.species, 0.0), l.relative_intensity)
    # Lines fainter than 1% of their species' strongest are too faint to anchor anything, and near
    # the ends of a spectrum they invite off-by-one assignments; they are left out unless the
    # species would keep fewer than 8 lines.
    strong = {sp: sum(1 for l in lines if l.species == sp and l.relative_intensity >= 0.01 * peak[sp]) for sp in peak}
    lines = [l for l in lines if strong[l.species] < 8 or l.relative_intensity >= 0.01 * peak[l.species]]
    wavelength = np.array([l.wavelength_nm for l in lines])
    intensity = np.array([l.relative_intensity / peak[l.species] for l in lines])
    tolerance = np.array([l.tolerance_nm for l in lines])
    species = tuple(l.species for l in lines)
    return wavelength, intensity, tolerance, species


# Blend features already built, keyed on the reference lines and the grouping (see _cluster and
# _cluster_adaptive): the matching asks for them again at nearly the same resolution hundreds of
# times per calibration. The cached arrays are read-only, so a cached feature set cannot be changed.
_FEATURE_CACHE: dict = {}
_FEATURE_CACHE_LIMIT = 256  # about ten calibrations (20-30 feature sets each)


def _reference_key(reference):
    wavelength, intensity, tolerance, species = reference
    return (wavelength.tobytes(), intensity.tobytes(), tolerance.tobytes(), species)


def _cached_features(key, build):
    hit = _FEATURE_CACHE.get(key)
    if hit is None:
        hit = build()
        for array in (hit.wavelength, hit.intensity, hit.sigma, hit.merged):
            array.flags.writeable = False
        if len(_FEATURE_CACHE) >= _FEATURE_CACHE_LIMIT:
            _FEATURE_CACHE.clear()
        _FEATURE_CACHE[key] = hit
    return hit


def _cluster(reference, resolution_nm: float) -> _Features:
    """Merge reference lines closer than ``resolution_nm`` into blend features (vectorised over groups)."""
    return _cluster_split(reference, np.diff(reference[0]) >= resolution_nm)


def _cluster_split(reference, split) -> _Features:
    return _cached_features(("cluster", _reference_key(reference), split.tobytes()),
                            lambda: _cluster_groups(reference, split))


def _cluster_groups(reference, split) -> _Features:
    """_cluster for a given grouping (``split[k]``: lines k and k + 1 are in different groups)."""
    wavelength, intensity, tolerance, species = reference
    n = wavelength.size
    group = np.concatenate([[0], np.cumsum(split)])
    n_groups = int(group[-1]) + 1
    strongest = np.zeros(n_groups)
    np.maximum.at(strongest, group, intensity)
    keep = intensity >= 0.03 * strongest[group]  # lines this faint barely move a blend's centre
    g, w, lam, tol = group[keep], intensity[keep], wavelength[keep], tolerance[keep]
    total = np.bincount(g, weights=w, minlength=n_groups)
    centre = np.bincount(g, weights=w * lam, minlength=n_groups) / total
    spread2 = np.maximum(np.bincount(g, weights=w * (lam - centre[g]) ** 2, minlength=n_groups) / total, 0.0)
    listed2 = np.bincount(g, weights=w * tol**2, minlength=n_groups) / total
    count = np.bincount(g, minlength=n_groups)
    kept_index = np.flatnonzero(keep)
    order = np.lexsort((-w, g))  # by group, strongest first
    first = np.r_[0, np.flatnonzero(np.diff(g[order])) + 1]
    dominant = kept_index[order[first]]
    bounds = np.r_[0, np.cumsum(count)]
    members = tuple(tuple(float(v) for v in lam[bounds[k]:bounds[k + 1]]) for k in range(n_groups))
    return _Features(centre, total, np.sqrt(listed2 + spread2), tuple(species[k] for k in dominant), members,
                     count > 1)


def _normalise(pixel_low: float, pixel_high: float):
    centre = 0.5 * (pixel_low + pixel_high)
    scale = max(0.5 * (pixel_high - pixel_low), 1.0)
    return centre, scale


# --------------------------------------------------------------------------- hypotheses


def _triplet_hypotheses(peaks: _Peaks, features: _Features, *, centre, scale, d_low, d_high, n_peaks=12, n_features=22):
    """Quadratic hypotheses (coefficient arrays, shape (h, 3)) from ratio-of-spacings triplet matches."""
    strong_peaks = np.sort(np.argsort(-peaks.amplitude)[:n_peaks])
    strong_features = np.sort(np.argsort(-features.intensity)[:n_features])
    if strong_peaks.size < 3 or strong_features.size < 3:
        return np.zeros((0, 3))
    pt = np.array(list(itertools.combinations(strong_peaks, 3)))
    ft = np.array(list(itertools.combinations(strong_features, 3)))
    p = peaks.pixel[pt]
    w = features.wavelength[ft]
    ws = features.sigma[ft]
    ratio_p = (p[:, 1] - p[:, 0]) / (p[:, 2] - p[:, 0])
    ratio_w = (w[:, 1] - w[:, 0]) / (w[:, 2] - w[:, 0])
    ratio_tol = 0.05 + (ws.sum(axis=1) + 0.0) / (w[:, 2] - w[:, 0])
    span_p = p[:, 2] - p[:, 0]
    span_w = w[:, 2] - w[:, 0]
    hypotheses = []
    for direction in (1, -1):
        target = ratio_w if direction == 1 else 1.0 - ratio_w
        close = np.abs(ratio_p[:, None] - target[None, :]) < ratio_tol[None, :]
        mean_disp = span_w[None, :] / span_p[:, None]
        close &= (mean_disp >= d_low / 1.3) & (mean_disp <= d_high * 1.3)
        ip, iw = np.nonzero(close)
        if ip.size == 0:
            continue
        t = (p[ip] - centre) / scale
        lam = w[iw] if direction == 1 else w[iw][:, ::-1]
        # Quadratic through three points, solved for each hypothesis at once.
        vander = np.stack([np.ones_like(t), t, t**2], axis=-1)
        try:
            coeffs = np.linalg.solve(vander, lam[..., None])[..., 0]
        except np.linalg.LinAlgError:
            continue
        hypotheses.append(coeffs)
    if not hypotheses:
        return np.zeros((0, 3))
    return np.concatenate(hypotheses)


def _pair_hypotheses(pairs: Sequence[ManualPair], *, centre, scale):
    if len(pairs) < 2:
        return np.zeros((0, 3))
    p = np.array([m.pixel for m in pairs])
    w = np.array([m.wavelength_nm for m in pairs])
    t = (p - centre) / scale
    order = 1 if len(pairs) < 4 else 2
    coeffs = np.polynomial.polynomial.polyfit(t, w, order)
    return np.pad(coeffs, (0, 3 - coeffs.size))[None, :]


def _score_hypotheses(coeffs, peaks: _Peaks, features: _Features, *, centre, scale, d_low, d_high, tol_px, pairs, t_ends):
    """Coarse score of each hypothesis: lines landing on a feature; invalid hypotheses score -inf."""
    # The 30 brightest lines are enough to rank hypotheses; refinement then uses every line.
    strongest = np.sort(np.argsort(-peaks.amplitude)[:30])
    amplitude = peaks.amplitude[strongest]
    t = (peaks.pixel[strongest] - centre) / scale
    end_disp = (coeffs[:, 1:2] + 2 * coeffs[:, 2:3] * t_ends[None, :]) / scale
    same_sign = np.sign(end_disp[:, 0]) == np.sign(end_disp[:, 1])
    magnitude = np.abs(end_disp)
    valid = same_sign & (magnitude.min(axis=1) >= d_low / 1.6) & (magnitude.max(axis=1) <= d_high * 1.6)
    valid &= magnitude.max(axis=1) <= 1.8 * magnitude.min(axis=1)
    for pair in pairs:
        tp = (pair.pixel - centre) / scale
        lp = coeffs[:, 0] + coeffs[:, 1] * tp + coeffs[:, 2] * tp**2
        dp = np.abs(coeffs[:, 1] + 2 * coeffs[:, 2] * tp) / scale
        valid &= np.abs(lp - pair.wavelength_nm) < 4.0 * dp + 3 * pair.tolerance_nm
    # Each hypothesis is scored on its own: only the valid ones need the line-by-line work.
    rows = np.flatnonzero(valid)
    full = coeffs
    coeffs = full[rows]
    lam = coeffs[:, 0:1] + coeffs[:, 1:2] * t + coeffs[:, 2:3] * t**2
    disp = (coeffs[:, 1:2] + 2 * coeffs[:, 2:3] * t) / scale
    order = np.argsort(features.wavelength)
    fw = features.wavelength[order]
    index = np.minimum(np.maximum(np.searchsorted(fw, lam), 1), fw.size - 1)  # np.clip, without its overhead
    left, right = np.abs(lam - fw[index - 1]), np.abs(lam - fw[index])
    closer_left = left < right
    nearest = index - closer_left  # index - 1 where the left neighbour is closer
    distance = np.where(closer_left, left, right)  # = |lam - fw[nearest]|
    allowed = tol_px * np.abs(disp) + features.sigma[order][nearest]
    hit = distance < allowed
    weight = 1.0 + 0.5 * (np.argsort(np.argsort(-amplitude)) < 6)
    score = np.full(full.shape[0], -np.inf)
    score[rows] = (hit * weight[None, :]).sum(axis=1)
    return score


def _cluster_adaptive(reference, resolution_nm: float, predicted_nm: np.ndarray) -> _Features:
    """Blend features that follow what was detected.

    Lines closer than 0.8 resolution element can never be separated and are
    merged. Neighbours up to 2 elements apart stay separate features only
    if enough detected lines fall among them to account for each; otherwise
    the group is one blend feature at its intensity-weighted centroid.
    """
    split = np.diff(reference[0]) >= 0.8 * resolution_nm
    sub = _cluster_split(reference, split)
    n_sub = sub.wavelength.size
    if n_sub == 0:
        return _cluster_adaptive_groups(sub, resolution_nm, predicted_nm)
    # The result depends on the resolution and the detected lines only through the groups (neighbours
    # closer than 2 elements) and the count of detected lines inside each group's window.
    sw = sub.wavelength
    join = np.diff(sw) < 2.0 * resolution_nm
    last = np.flatnonzero(~join)  # the last member of every group but the final one
    starts = np.concatenate(([0], last + 1))
    ends = np.concatenate((last, [n_sub - 1]))
    multi = ends > starts
    predicted = np.sort(predicted_nm)
    seen = (np.searchsorted(predicted, sw[ends[multi]] + 0.6 * resolution_nm, side="right")
            - np.searchsorted(predicted, sw[starts[multi]] - 0.6 * resolution_nm, side="left"))
    key = ("adaptive", _reference_key(reference), split.tobytes(), join.tobytes(), seen.tobytes())
    return _cached_features(key, lambda: _cluster_adaptive_groups(sub, resolution_nm, predicted_nm))


def _cluster_adaptive_groups(sub: _Features, resolution_nm: float, predicted_nm: np.ndarray) -> _Features:
    groups: list[list[int]] = []
    for k in range(sub.wavelength.size):
        if groups and sub.wavelength[k] - sub.wavelength[groups[-1][-1]] < 2.0 * resolution_nm:
            groups[-1].append(k)
        else:
            groups.append([k])
    w, i, s, sp, m, merged = [], [], [], [], [], []
    for g in groups:
        if len(g) > 1:
            strongest = max(sub.intensity[k] for k in g)
            significant = [k for k in g if sub.intensity[k] >= 0.15 * strongest]
            low = sub.wavelength[g[0]] - 0.6 * resolution_nm
            high = sub.wavelength[g[-1]] + 0.6 * resolution_nm
            seen = int(np.count_nonzero((predicted_nm >= low) & (predicted_nm <= high)))
            if len(significant) <= seen < len(g):
                g = significant  # faint neighbours only nudge a resolved strong line; they are not separate targets
            if seen < len(significant):
                weights = sub.intensity[g]
                members = tuple(x for k in g for x in sub.members[k])
                centre = float(np.sum(weights * sub.wavelength[g]) / np.sum(weights))
                spread = float(np.sqrt(np.sum(weights * ((sub.wavelength[g] - centre) ** 2 + sub.sigma[g] ** 2)) / np.sum(weights)))
                w.append(centre), i.append(float(np.sum(weights))), s.append(spread)
                sp.append(sub.species[g[int(np.argmax(weights))]]), m.append(members), merged.append(True)
                continue
        for k in g:
            w.append(float(sub.wavelength[k])), i.append(float(sub.intensity[k])), s.append(float(sub.sigma[k]))
            sp.append(sub.species[k]), m.append(sub.members[k]), merged.append(bool(sub.merged[k]))
    return _Features(np.array(w), np.array(i), np.array(s), tuple(sp), tuple(m), np.array(merged, dtype=bool))


def _with_pairs(values, extra):
    """np.r_[values, extra] for a fresh float array ``values``, without np.r_'s overhead."""
    return np.concatenate((values, np.asarray(extra, dtype=float))) if extra else values


def _on_lit_branch(coeffs, t, t_ends) -> np.ndarray:
    """Which of the positions ``t`` the polynomial reaches from the lit range without folding.

    Beyond a turning point outside the lit range the polynomial runs back over wavelengths it
    has already given: a faint detection there (noise far along the sensor) could land on one
    of the lamp's lines by that accident alone, so it is not matched.
    """
    reach = np.ones(t.shape, dtype=bool)
    if len(coeffs) < 3:
        return reach
    c = [float(v) for v in coeffs]
    if len(c) == 3:  # the derivative c1 + 2 c2 t: one root
        roots = [-c[1] / (2 * c[2])] if c[2] != 0 else []
    elif len(c) == 4 and c[3] != 0:  # c1 + 2 c2 t + 3 c3 t^2, in closed form (np.roots is 10x slower)
        a, b, q = 3 * c[3], 2 * c[2], c[1]
        disc = b * b - 4 * a * q
        roots = [] if disc < 0 else [(-b + sign * math.sqrt(disc)) / (2 * a) for sign in (1.0, -1.0)]
    else:
        found = np.roots(_derivative_coeffs(np.asarray(c))[::-1])
        roots = found[np.abs(found.imag) < 1e-9].real.tolist()
    for r in roots:
        if r > t_ends[1]:
            reach &= t < r
        elif r < t_ends[0]:
            reach &= t > r
    return reach


def _fold_probe(tt, t_ends) -> np.ndarray:
    """Where a solution through lines at ``tt`` must not fold: their span, a margin of 15% beyond it
    inside ``t_ends`` (the lit range), and always every line itself.

    A faint detection matched outside the lit range (noise far along the sensor) must still lie
    on the same monotonic branch as the others: a cubic that turns back there would assign it a
    wavelength of the lamp's lines it cannot have.
    """
    t_min, t_max = float(tt.min()), float(tt.max())
    margin = 0.15 * (t_max - t_min)
    low = min(max(float(t_ends[0]), t_min - margin), t_min)
    high = max(min(float(t_ends[1]), t_max + margin), t_max)
    probe = low + (high - low) * _UNIT_33  # np.linspace(low, high, 33), the same values (k / 32 is exact)
    probe[-1] = high
    return probe


_UNIT_33 = np.linspace(0.0, 1.0, 33)


def _assign(coeffs, t, peaks: _Peaks, reference, *, scale, fwhm, t_ends, tol_px):
    """One matching step of :func:`_refine`: each detected line to the closest feature within tolerance.

    Returns (assignment ((peak, feature) index pairs, sorted), features, dispersion at each
    line in nm/px, its median) or None where the polynomial folds or has no dispersion.
    """
    lam = _polyval(t, coeffs)
    disp = np.abs(_polyval(t, _derivative_coeffs(coeffs))) / scale
    median_disp = _median(disp) if disp.size else 1.0
    if not median_disp > 0 or not np.all(disp > 0):
        return None
    features = _cluster_adaptive(reference, fwhm * median_disp, lam)
    fw = features.wavelength
    cost = np.abs(lam[:, None] - fw[None, :]) / disp[:, None]  # px
    allowed = tol_px + 0.3 * peaks.fwhm[:, None] + 2 * features.sigma[None, :] / disp[:, None] + 3 * peaks.sigma[:, None]
    ok = (cost < allowed) & _on_lit_branch(coeffs, t, t_ends)[:, None]
    pi, fi = np.nonzero(ok)
    order = np.argsort(cost[pi, fi])
    taken_p, taken_f, chosen = set(), set(), []
    for k in order:  # one detected line per feature, closest first
        a, b = int(pi[k]), int(fi[k])
        if a in taken_p or b in taken_f:
            continue
        taken_p.add(a)
        taken_f.add(b)
        chosen.append((a, b))
    chosen.sort()
    return tuple(chosen), features, disp, median_disp


def _refine(initial, peaks: _Peaks, reference, *, centre, scale, fwhm, t_ends, pairs, max_order, n_trials=1, quick=False):
    """Iterative matching + robust fit from a starting polynomial. Returns a _Candidate or None.

    With ``quick`` the matching stops as soon as the assignment repeats and each step is one
    least-squares fit at the order BIC chooses, with no outlier rejection or leave-one-out
    checks: a cheap first pass that ranks many seeds, of which only the best get the full pass.
    """
    coeffs = np.asarray(initial, dtype=float)
    nonzero = np.flatnonzero(coeffs)
    coeffs = coeffs[: nonzero[-1] + 1] if nonzero.size else coeffs[:0]  # np.trim_zeros(coeffs, "b")
    if coeffs.size < 2:
        return None
    t = (peaks.pixel - centre) / scale
    previous = None
    result = None
    pair_t = [(m.pixel - centre) / scale for m in pairs]
    pair_nm = [m.wavelength_nm for m in pairs]
    for tol_px in ((4.0, 3.0, 2.0, 2.0, 2.0) if quick else (4.0, 3.0, 2.5, 2.0, 2.0, 2.0, 2.0)):
        matched = _assign(coeffs, t, peaks, reference, scale=scale, fwhm=fwhm, t_ends=t_ends, tol_px=tol_px)
        if matched is None:
            return None
        assignment, features, disp, median_disp = matched
        fw = features.wavelength
        if len(assignment) + len(pairs) < 2:
            return None
        p_idx = np.array([a for a, _ in assignment], dtype=int)
        f_idx = np.array([b for _, b in assignment], dtype=int)
        tt = _with_pairs(t[p_idx], pair_t)
        ll = _with_pairs(fw[f_idx], pair_nm)
        ss = _with_pairs(
            np.sqrt((peaks.sigma[p_idx] * disp[p_idx]) ** 2 + features.sigma[f_idx] ** 2
                    + (_MATCH_MODEL_FLOOR_PX * disp[p_idx]) ** 2),
            [math.hypot(m.tolerance_nm, _CENTRE_FLOOR_PX * median_disp) for m in pairs],
        )
        # The solution must not fold where there is light: over the lines' span and a margin beyond it.
        monotonic_t = _fold_probe(tt, t_ends)
        if quick:
            keep = np.ones(tt.size, dtype=bool)
            fit = _select_order(tt, ll, ss, keep, max_order=min(max_order, max(1, tt.size - 2)), monotonic_t=monotonic_t)
            if fit is None:
                return None
            _, new_coeffs, cov, chi2, order = fit
            reduced = chi2 / max(1, tt.size - (order + 1))
        else:
            fit = _robust_fit(tt, ll, ss, max_order=min(max_order, max(1, tt.size - 2)), monotonic_t=monotonic_t)
            if fit is None:
                return None
            new_coeffs, cov, keep, reduced = fit
        result = (new_coeffs, cov, p_idx, f_idx, keep, reduced, features, tt, ss)
        coeffs = new_coeffs
        if assignment == previous and (quick or tol_px == 2.0):
            break
        previous = assignment
    if result is None:
        return None
    coeffs, cov, p_idx, f_idx, keep, reduced, features, tt, ss = result
    n_lines = p_idx.size
    keep_lines = keep[:n_lines]
    used = keep_lines.copy()
    rejected = ~keep_lines
    lam = np.polynomial.polynomial.polyval(t[p_idx], coeffs)
    disp = np.abs(np.polynomial.polynomial.polyval(t[p_idx], np.polynomial.polynomial.polyder(coeffs))) / scale
    resid_px = (features.wavelength[f_idx] - lam) / disp
    if quick:
        sigma_px = ss[:n_lines] / disp
        candidate = _Candidate(coeffs, cov, p_idx, f_idx, used, rejected, features, 0.0, 0.0, reduced)
        candidate.anchor = used & (features.sigma[f_idx] / disp <= _FEATURE_FIT_LIMIT_PX)
        candidate.rms_px = float(np.sqrt(np.sum(resid_px**2 / sigma_px**2) / np.sum(1.0 / sigma_px**2))) if n_lines else np.inf
        candidate.resid_px = resid_px
        candidate.score = _final_score(candidate, peaks, centre=centre, scale=scale, t_ends=t_ends, fwhm=fwhm,
                                       n_pairs=len(pairs))
        return candidate
    # Leave-one-out residuals: a line the polynomial merely bends to pass through is not evidence.
    loo_nm = _loo_residuals(tt, np.r_[features.wavelength[f_idx], [m.wavelength_nm for m in pairs]], ss, keep,
                            coeffs.size - 1)
    loo_px = np.where(keep[:n_lines], loo_nm[:n_lines] / disp, resid_px)
    sigma_px = ss[:n_lines] / disp
    loo_sigma_px = _loo_sigma(tt, np.r_[features.wavelength[f_idx], [m.wavelength_nm for m in pairs]], ss, keep,
                              coeffs.size - 1, loo_nm)[:n_lines] / disp
    # Lines the others place far from their reference are not part of this solution: refit without them.
    # So are lines that miss their own feature by more than 2.5 sigma (and 1.5 px): near the ends a
    # loosely known phosphor feature otherwise accepts whatever falls within its wide tolerance.
    # A loosely known feature cannot bend the fit much, so the others predict it well: it must lie
    # within 3 sigma of that prediction.
    loose = features.sigma[f_idx] / disp > _FEATURE_FIT_LIMIT_PX
    inconsistent = used & ((np.abs(loo_px) > np.maximum(2.0, 6.0 * np.hypot(sigma_px, 0.15)))
                           | (np.abs(resid_px) > np.maximum(1.5, 2.5 * sigma_px))
                           | (loose & (np.abs(loo_px) > 3.0 * sigma_px)))
    if inconsistent.any() and (keep.sum() - inconsistent.sum()) >= 3:
        keep = keep.copy()
        keep[:n_lines][inconsistent] = False
        monotonic_t = _fold_probe(tt[keep], t_ends)
        refit = _select_order(tt, np.r_[features.wavelength[f_idx], [m.wavelength_nm for m in pairs]], ss, keep,
                              max_order=min(max_order, max(1, int(keep.sum()) - 2)), monotonic_t=monotonic_t)
        if refit is None:
            return None
        _, coeffs, cov, chi2, order = refit
        reduced = chi2 / max(1, int(keep.sum()) - (order + 1))
        cov = cov * max(1.0, reduced)
        used = keep[:n_lines].copy()
        rejected = ~used
        lam = np.polynomial.polynomial.polyval(t[p_idx], coeffs)
        disp = np.abs(np.polynomial.polynomial.polyval(t[p_idx], np.polynomial.polynomial.polyder(coeffs))) / scale
        resid_px = (features.wavelength[f_idx] - lam) / disp
        loo_nm = _loo_residuals(tt, np.r_[features.wavelength[f_idx], [m.wavelength_nm for m in pairs]], ss, keep,
                                coeffs.size - 1)
        loo_px = np.where(used, loo_nm[:n_lines] / disp, resid_px)
        sigma_px = ss[:n_lines] / disp
        loo_sigma_px = _loo_sigma(tt, np.r_[features.wavelength[f_idx], [m.wavelength_nm for m in pairs]], ss, keep,
                              coeffs.size - 1, loo_nm)[:n_lines] / disp
    loo_sigma_px = np.where(used, loo_sigma_px, sigma_px)
    # An assignment the solution does not support is no assignment: such lines are left unassigned
    # instead of being listed against a reference they miss (a loosely known feature that had to be
    # rejected supports nothing either).
    loose = features.sigma[f_idx] / disp > _FEATURE_FIT_LIMIT_PX
    supported = used | (~loose & (np.abs(resid_px) <= np.maximum(1.5, 2.5 * sigma_px)))
    if not supported.all():
        p_idx, f_idx, used, rejected = p_idx[supported], f_idx[supported], used[supported], rejected[supported]
        resid_px, loo_px, sigma_px, disp = resid_px[supported], loo_px[supported], sigma_px[supported], disp[supported]
        loo_sigma_px = loo_sigma_px[supported]
    anchor = used & (features.sigma[f_idx] / disp <= _FEATURE_FIT_LIMIT_PX)
    if used.any():
        weights = 1.0 / sigma_px[used] ** 2
        rms = float(np.sqrt(np.sum(weights * resid_px[used] ** 2) / np.sum(weights)))
    else:
        rms = np.inf
    candidate = _Candidate(coeffs, cov, p_idx, f_idx, used, rejected, features, 0.0, rms, reduced)
    candidate.anchor = anchor
    candidate.resid_px = loo_px
    candidate.resid_sigma_px = loo_sigma_px
    candidate.score = _final_score(candidate, peaks, centre=centre, scale=scale, t_ends=t_ends, fwhm=fwhm, n_pairs=len(pairs))
    return candidate


def _loo_sigma(tt, lam, ss, keep, order, loo_nm) -> np.ndarray:
    """1-sigma (nm) of each kept line's leave-one-out residual: sqrt(sigma**2 + var(prediction)).

    The ratio of the leave-one-out residual to its studentised form (wavefit's deletion
    residuals, sigma / sqrt(1 - h) for a weighted linear fit); a line the fit passes through
    exactly (residual 0), and a line not kept, keeps its own sigma.
    """
    z = _deletion_z(tt, lam, ss, keep, order)
    ratio = np.divide(np.abs(loo_nm), np.abs(z), out=np.zeros_like(ss), where=np.abs(z) > 1e-12)
    return np.where(keep & (ratio > 0), np.maximum(ratio, ss), ss)


def _final_score(c: _Candidate, peaks: _Peaks, *, centre, scale, t_ends, fwhm, n_pairs):
    """Evidence for a solution in nats: how unlikely its matches are by chance (a-contrario style).

    For each matched line the chance that a line dropped at random lands
    within |residual| of some feature is about 2 |residual| times the local
    feature density (features per px); the score sums -ln of those chances,
    charges the polynomial's free parameters, and charges strong features
    that fall in the range with no detected line near them, and bright
    detected lines the solution leaves unexplained (not those that sit on one
    of the lamp's listed lines too faint to be matched, such as the weak Hg
    lines at 535.4, 567.6 and 671.6 nm that a real CFL shows).
    """
    f = c.features
    t_feat = _invert(c.coefficients, f.wavelength, t_ends)
    feature_px = t_feat * scale + centre
    inside = np.isfinite(feature_px)
    range_px = (t_ends[1] - t_ends[0]) * scale
    score = 0.0
    derivative = _derivative_coeffs(c.coefficients)
    used_px = peaks.pixel[c.peak_index[c.used]] if c.used.any() else peaks.pixel[:0]
    span_low, span_high = (float(used_px.min()), float(used_px.max())) if used_px.size else (0.0, 0.0)
    used_k = np.flatnonzero(c.used)
    if used_k.size:  # the used lines' terms, all at once
        pi, fi = c.peak_index[used_k], c.feature_index[used_k]
        line_px = peaks.pixel[pi]
        line_sigma = peaks.sigma[pi]
        resid = np.asarray(c.resid_px, dtype=float)[used_k]
        sorted_px = np.sort(feature_px[inside])
        near = (np.searchsorted(sorted_px, line_px + 20 * fwhm, side="left")
                - np.searchsorted(sorted_px, line_px - 20 * fwhm, side="right"))
        density = np.maximum(near, 1) / min(40 * fwhm, range_px)
        disp = np.maximum(np.abs(_polyval((line_px - centre) / scale, derivative)) / scale, 1e-12)
        feature_sigma_px = f.sigma[fi] / disp
        sigma_px = np.sqrt(line_sigma**2 + feature_sigma_px**2 + 0.15**2)  # 0.15 px: model and JPEG
        predicted_px = np.zeros(used_k.size)
        if c.resid_sigma_px is not None:
            # A tightly known line's leave-one-out residual is judged against how well the other lines
            # predict it (an end anchor of a solution whose shape rests on loosely known features misses
            # by more, honestly), and such a line the others hardly predict proves little: landing
            # within that prediction's spread of a feature is no coincidence. Loosely known features
            # keep the plain test: across a dense list (Ne, Ar) a wrong solution would otherwise
            # excuse its extrapolated end lines.
            tight = feature_sigma_px <= _FEATURE_FIT_LIMIT_PX
            loo_sigma = np.asarray(c.resid_sigma_px, dtype=float)[used_k]
            own_px = np.sqrt(line_sigma**2 + feature_sigma_px**2 + _MATCH_MODEL_FLOOR_PX**2)
            end_line = ~((span_low < line_px) & (line_px < span_high))  # the others only extrapolate to it
            predicted_px = np.where(tight & end_line, np.sqrt(np.maximum(loo_sigma**2 - own_px**2, 0.0)), 0.0)
            sigma_px = np.where(tight, np.maximum(sigma_px, loo_sigma), sigma_px)
        width = 2 * np.maximum(np.maximum(np.abs(resid), line_sigma), np.maximum(predicted_px, 0.1))
        score += float(np.sum(-np.log(np.minimum(1.0, width * density))))
        # A true match misses by about its own uncertainty: charge misses of many sigma (Gaussian
        # log-likelihood, capped at 3 sigma so one bad line cannot sink a good solution).
        score -= float(np.sum(0.5 * np.minimum((resid / sigma_px) ** 2, 9.0)))
        # the other lines put it far from its reference: the assignment is not consistent
        score -= 10.0 * float(np.count_nonzero(np.abs(resid) > np.maximum(2.0, 6.0 * sigma_px)))
    score -= 2.0 * max(0, c.coefficients.size - n_pairs)
    # Brightness should roughly follow the listed intensities (camera response and lamp-to-lamp
    # differences allow a factor 5 brighter or 30 fainter at 1 sigma): a bright line on a faint
    # reference costs evidence.
    use = c.used
    if use.sum() >= 3:
        log_peak = np.log(np.maximum(peaks.amplitude[c.peak_index[use]], 1e-12))
        log_ref = np.log(np.maximum(f.intensity[c.feature_index[use]], 1e-6))
        delta = (log_peak - _median(log_peak)) - (log_ref - _median(log_ref))
        # Asymmetric: a weak camera response dims lines a lot, but nothing makes a faint line bright.
        spread = np.where(delta > 0, math.log(5.0), math.log(30.0))
        score -= float(np.sum(0.5 * (delta / spread) ** 2))
    if c.feature_index.size:
        level = 0.5 * _median(f.intensity[c.feature_index])
        matched = set(c.feature_index.tolist())
        for k in np.nonzero(inside & (f.intensity >= level))[0]:
            if k in matched:
                continue
            if np.min(np.abs(peaks.pixel - feature_px[k])) > 2 * fwhm:
                score -= 1.0
    # Bright detected lines the solution leaves unexplained: a lamp's own frame is mostly its lines.
    unexplained = np.ones(peaks.pixel.size, dtype=bool)
    unexplained[c.peak_index] = False
    bright = unexplained & (peaks.snr >= 20.0)
    if bright.any():
        # A line that sits on one of the lamp's listed lines too faint to be matched (the weak Hg
        # lines at 535.4, 567.6, 671.6 nm) is explained by the lamp, though it proves nothing.
        listed = _listed_wavelengths(tuple(sorted(set(f.species))))
        if listed.size:
            t_bright = (peaks.pixel[bright] - centre) / scale
            lam_bright = np.polynomial.polynomial.polyval(t_bright, c.coefficients)
            disp_bright = np.abs(np.polynomial.polynomial.polyval(t_bright, derivative)) / scale
            window = disp_bright * (1.0 + 3.0 * peaks.sigma[bright])  # 1 px: the solution's accuracy inside its span
            on_listed = np.min(np.abs(lam_bright[:, None] - listed[None, :]), axis=1) < window
            bright[np.flatnonzero(bright)[on_listed]] = False
    score -= 1.0 * float(np.count_nonzero(bright))
    # ... and above all the brightest three: a lamp's brightest lines are its listed lines.
    score -= 4.0 * float(np.count_nonzero(unexplained[np.argsort(-peaks.amplitude)[:3]]))
    score -= 3.0 * max(0.0, c.rms_px - 0.5)
    return score


@functools.lru_cache(maxsize=None)
def _listed_wavelengths(species: tuple[str, ...]) -> np.ndarray:
    """Every listed wavelength (nm) of these species' line lists, however faint."""
    values = []
    for name in species:
        try:
            values.extend(l.wavelength_nm for l in load_line_list(name).lines)
        except Exception:  # a reference that is not a species line list (e.g. built from another table)
            continue
    return np.sort(np.array(values, dtype=float))


def _invert(coeffs, wavelength, t_ends):
    grid = np.linspace(t_ends[0], t_ends[1], 512)
    values = np.polynomial.polynomial.polyval(grid, coeffs)
    if values[-1] < values[0]:
        grid, values = grid[::-1], values[::-1]
    return np.interp(wavelength, values, grid, left=np.nan, right=np.nan)


def _distinct(a: _Candidate, b: _Candidate, t_probe, scale) -> bool:
    """Whether two solutions are different answers, not two fits of the same one.

    They are compared at the lines either of them matches (beyond those, both only extrapolate):
    different answers differ there by more than 3 px and by more than 3 times their combined
    1-sigma uncertainty (two fits of one assignment that differ in which faint line goes to a
    loosely known feature stay well inside it). A line both match to different references makes
    them different answers whatever the mapping, unless one reference is a blend holding the
    other (the same line, resolved in one fit and blended in the other: Tb3+ 542.4 + Hg 546.07 nm).
    """
    pa = dict(zip(a.peak_index.tolist(), a.feature_members_nm()))
    for p, members in zip(b.peak_index.tolist(), b.feature_members_nm()):
        if p in pa and not set(pa[p]) & set(members):  # a blend and one of its own lines are the same line
            return True
    matched = np.union1d(a.peak_index[a.used], b.peak_index[b.used])
    t = t_probe[matched] if matched.size else t_probe
    la = np.polynomial.polynomial.polyval(t, a.coefficients)
    lb = np.polynomial.polynomial.polyval(t, b.coefficients)
    disp = np.maximum(np.abs(np.polynomial.polynomial.polyval(t, np.polynomial.polynomial.polyder(a.coefficients))) / scale,
                      1e-9)
    sigma = np.sqrt(_polynomial_variance(a, t) + _polynomial_variance(b, t))
    return bool(np.any((np.abs(la - lb) > 3.0 * disp) & (np.abs(la - lb) > 3.0 * sigma)))


def _polynomial_variance(c: _Candidate, t) -> np.ndarray:
    """Variance (nm^2) of a candidate's polynomial at normalised pixels ``t``."""
    cov = np.asarray(c.covariance, dtype=float)
    if cov.shape != (c.coefficients.size, c.coefficients.size) or not np.all(np.isfinite(cov)):
        return np.zeros(np.shape(t))
    basis = np.stack([np.asarray(t, dtype=float) ** k for k in range(c.coefficients.size)], axis=-1)
    return np.maximum(np.einsum("...i,ij,...j->...", basis, cov, basis), 0.0)


# --------------------------------------------------------------------------- the search

# Distinct first-pass assignments that get the full refinement (the rest are far behind).
_FULL_REFINEMENTS = 8
# Seeds (best coarse scores first) that get the cheap first pass.
_FIRST_PASS_SEEDS = 60


# Lines at least this significant mark where the lamp's light falls on the sensor (see _lit_pixels).
_LIT_SNR = 20.0


def _lit_pixels(peaks: _Peaks, pairs) -> np.ndarray:
    """Pixels that show where the spectrum is: the significant lines (SNR >= _LIT_SNR) and the pairs.

    Faint detections far outside the lamp's lines (noise, JPEG blocks, a weak continuum's ripple)
    would otherwise stretch the range every hypothesis is judged on: on a 1920 px frame at
    0.39 nm/px they spread the span to the whole sensor, and a quadratic through three true lines
    then failed the dispersion checks at those far ends. With fewer than three significant lines
    every line counts.
    """
    pixel = peaks.pixel
    strong = pixel[peaks.snr >= _LIT_SNR] if pixel.size else pixel
    chosen = strong if strong.size >= 3 else pixel
    return np.r_[chosen, [m.pixel for m in pairs]]


def _first_assignment(coeffs, peaks: _Peaks, reference, options):
    """The assignment a seed starts :func:`_refine` with (None where that stops before matching)."""
    coeffs = np.asarray(coeffs, dtype=float)
    nonzero = np.flatnonzero(coeffs)
    coeffs = coeffs[: nonzero[-1] + 1] if nonzero.size else coeffs[:0]
    if coeffs.size < 2:
        return None
    t = (peaks.pixel - options["centre"]) / options["scale"]
    matched = _assign(coeffs, t, peaks, reference, scale=options["scale"], fwhm=options["fwhm"],
                      t_ends=options["t_ends"], tol_px=4.0)
    if matched is None or len(matched[0]) + len(options["pairs"]) < 2:
        return None
    return matched[0]


def _group_seeds(items, peaks: _Peaks, reference, options) -> list:
    """Seeds [(coarse score, coefficients)] of each band group in ``items`` [(index, (low, high, features, n_bands))].

    A group's best hypotheses, kept only where they differ (wavelengths at the ends and middle
    differ by > 3 px), at most 12 per band: [(index, seeds)].
    """
    centre, scale, fwhm, pairs, t_ends = (options[k] for k in ("centre", "scale", "fwhm", "pairs", "t_ends"))
    out = []
    for index, (low, high, features, n_bands) in items:
        seeds = []
        out.append((index, seeds))
        coeffs = _triplet_hypotheses(peaks, features, centre=centre, scale=scale, d_low=low, d_high=high)
        coeffs = np.concatenate([coeffs, _pair_hypotheses(pairs, centre=centre, scale=scale)])
        if coeffs.shape[0] == 0:
            continue
        score = _score_hypotheses(coeffs, peaks, features, centre=centre, scale=scale, d_low=low, d_high=high,
                                  tol_px=3.0 + 0.3 * fwhm, pairs=pairs, t_ends=t_ends)
        finite = np.isfinite(score)
        if not finite.any():
            continue
        order = np.argsort(-score)[: 400 * n_bands]
        order = order[np.isfinite(score[order])]
        ranked = coeffs[order]
        probes = ranked[:, 0:1] + ranked[:, 1:2] * np.array([-1.0, 0.0, 1.0]) + ranked[:, 2:3] * np.array([1.0, 0.0, 1.0])
        limits = 3.0 * (np.abs(ranked[:, 1]) / scale)
        kept = np.empty((12 * n_bands, 3))
        n_kept = 0
        for j, k in enumerate(order):
            probe = probes[j]
            if n_kept and (np.abs(kept[:n_kept] - probe).max(axis=1) < limits[j]).any():
                continue
            kept[n_kept] = probe
            n_kept += 1
            seeds.append((float(score[k]), coeffs[k]))
            if n_kept >= 12 * n_bands:
                break
    return out


def _first_assignments(items, peaks: _Peaks, reference, options) -> list:
    """:func:`_first_assignment` of each seed in ``items`` [(index, coefficients)]: [(index, assignment)]."""
    return [(index, _first_assignment(c, peaks, reference, options)) for index, c in items]


def _quick_pass(items, peaks: _Peaks, reference, options) -> list:
    """The cheap first pass of :func:`_refine` over seeds ``items`` [(index, coefficients)]: [(index, candidate or None)]."""
    return [(index, _refine(coeffs, peaks, reference, quick=True, **options)) for index, coeffs in items]


def _full_pass(items, peaks: _Peaks, reference, options) -> list:
    """The full refinement of each of ``items`` [(index, coefficients)]: [(index, candidate or None)]."""
    return [(index, _refine(coeffs, peaks, reference, **options)) for index, coeffs in items]


def _shared_pass(function: str, items, peaks: _Peaks, reference, options) -> list:
    """``function``(items, ...) with every other item done by the helper process when it is free.

    The items are independent, so the answer does not depend on who did which: it is the merged
    list in the items' order, the same as one local call over all items. Whatever the helper cannot
    do (not ready, busy, failed) is done here.
    """
    local = globals()[function]
    if len(items) < 2:
        return local(items, peaks, reference, options)
    from . import helper as _helper

    worker = _helper.shared()
    if worker is None:
        return local(items, peaks, reference, options)
    try:
        theirs, mine = items[1::2], items[0::2]
        sent = worker.submit("benchspec.wavecal", function, theirs, peaks, reference, options)
        out = local(mine, peaks, reference, options)
        ok, value = worker.result() if sent else (False, None)
    finally:
        worker.lock.release()
    if not ok:
        value = local(theirs, peaks, reference, options)
    return sorted(out + list(value), key=lambda item: item[0])


def _search(peaks: _Peaks, reference, *, pixel_range, d_range, pairs, max_order, seed=None):
    """All refined candidates, best first.

    ``seed`` (a WavelengthSolution of the same lines, slightly moved): no search, only the
    full refinement started from it (see :func:`_recalibrate_lines`).
    """
    # Normalise on the span of the detected lines (and pairs), and judge hypotheses only where there is
    # light: a sensor much wider than the spectrum must not veto a solution by its extrapolation.
    lit = _lit_pixels(peaks, pairs)
    if lit.size == 0:
        lit = np.array(pixel_range, dtype=float)
    margin = 0.1 * max(float(np.ptp(lit)), 10.0)
    low, high = max(pixel_range[0], lit.min() - margin), min(pixel_range[1], lit.max() + margin)
    centre, scale = _normalise(low, high)
    t_full = np.array([(pixel_range[0] - centre) / scale, (pixel_range[1] - centre) / scale])
    t_ends = np.array([(low - centre) / scale, (high - centre) / scale])
    t_probe = (peaks.pixel - centre) / scale if peaks.pixel.size else np.linspace(-1, 1, 5)
    fwhm = float(np.median(peaks.fwhm[np.argsort(-peaks.amplitude)[:7]])) if peaks.pixel.size else 3.0
    d_low, d_high = d_range
    if seed is not None:
        t_seed = np.linspace(t_ends[0], t_ends[1], 25)
        start = np.polynomial.polynomial.polyfit(t_seed, np.asarray(seed.wavelength_nm(centre + scale * t_seed), float),
                                                 min(3, max_order))
        refined = _refine(start, peaks, reference, centre=centre, scale=scale, fwhm=fwhm, t_ends=t_ends, pairs=pairs,
                          max_order=max_order)
        return ([] if refined is None else [refined]), (centre, scale, t_full, fwhm)
    bands = []
    edge = d_low
    while edge < d_high:
        bands.append((edge, min(edge * 1.6, d_high)))
        edge *= 1.6
    candidates: list[_Candidate] = []
    # Neighbouring bands whose blends cluster the same way share one set of hypotheses (the ratio
    # matching does not depend on the band, only the dispersion limits do).
    groups: list = []
    for low, high in bands:
        features = _cluster(reference, 1.2 * fwhm * math.sqrt(low * high))
        if groups and np.array_equal(groups[-1][2].wavelength, features.wavelength) \
                and np.array_equal(groups[-1][2].sigma, features.sigma):
            groups[-1] = (groups[-1][0], high, groups[-1][2], groups[-1][3] + 1)
        else:
            groups.append((low, high, features, 1))
    options = dict(centre=centre, scale=scale, fwhm=fwhm, t_ends=t_ends, pairs=pairs, max_order=max_order)
    seeds = []
    for _, found in _shared_pass("_group_seeds", list(enumerate(groups)), peaks, reference, options):
        seeds.extend(found)
    seeds.sort(key=lambda s: -s[0])
    # First pass: seeds that start from the same assignment are one (the first, best coarse score,
    # stands for them all); each of the others gets the cheap refinement, and only the best few
    # distinct assignments get the full one. Every step is a list of independent items, shared with
    # the helper process when there is one (see _shared_pass), merged in the items' order.
    items, seen = [], set()
    starts = list(enumerate(c for _, c in seeds[:_FIRST_PASS_SEEDS]))
    for index, assignment in _shared_pass("_first_assignments", starts, peaks, reference, options):
        if assignment is not None and assignment not in seen:
            seen.add(assignment)
            items.append((index, starts[index][1]))
    first: dict = {}
    for _, quick in _shared_pass("_quick_pass", items, peaks, reference, options):
        if quick is None:
            continue
        key = (tuple(quick.peak_index.tolist()), tuple(quick.feature_index.tolist()))
        if key not in first or quick.score > first[key].score:
            first[key] = quick
    ranked = sorted(first.values(), key=lambda q: -q.score)[:_FULL_REFINEMENTS]
    items = [(index, q.coefficients) for index, q in enumerate(ranked)]
    for _, refined in _shared_pass("_full_pass", items, peaks, reference, options):
        if refined is None:
            continue
        disp_ends = np.abs(np.polynomial.polynomial.polyval(t_ends, np.polynomial.polynomial.polyder(refined.coefficients))) / scale
        if disp_ends.min() < d_low / 1.6 or disp_ends.max() > d_high * 1.6:
            continue
        candidates.append(refined)
    candidates.sort(key=lambda c: -c.score)
    distinct: list[_Candidate] = []
    for c in candidates:
        if all(_distinct(c, other, t_probe, scale) for other in distinct):
            distinct.append(c)
    return distinct, (centre, scale, t_full, fwhm)


def _explained(c: _Candidate, peaks: _Peaks):
    """(fraction of the 5 strongest lines matched, fraction of line flux matched)."""
    strongest = np.argsort(-peaks.amplitude)[: min(5, peaks.pixel.size)]
    matched = np.zeros(peaks.pixel.size, dtype=bool)
    matched[c.peak_index] = True
    flux = peaks.amplitude * peaks.fwhm
    return float(matched[strongest].mean()), float(flux[matched].sum() / max(flux.sum(), 1e-300))


# Evidence (nats) a solution needs: chance matches over ~1e4 hypotheses stay well below it.
_MIN_EVIDENCE = 12.0
# A distinct runner-up within this many nats makes the match ambiguous (e^4 = 55 times less likely).
_MIN_MARGIN = 4.0
# Extra evidence per tightly known line short of 3 (fitted to a few wide targets, a wrong scale
# can look as tight as the right one).
_ANCHOR_SURCHARGE = 3.0


def _explained_top(c: _Candidate, peaks: _Peaks, k: int) -> float:
    strongest = np.argsort(-peaks.amplitude)[: min(k, peaks.pixel.size)]
    return float(np.isin(strongest, c.peak_index).mean())


def _decide(candidates, peaks: _Peaks, *, lamp_label: str, pairs, context) -> _Candidate:
    n_peaks = peaks.pixel.size
    if not candidates:
        raise CalibrationError(
            f"no wavelength solution: the {n_peaks} detected lines do not match the {lamp_label} lines at any "
            "dispersion in range; check --lamp, or add --hint-lines-per-mm or a --pair PIXEL=NM"
        )
    best = candidates[0]
    n_used = int(best.used.sum())
    need = 3 if pairs else 4
    if n_used + len(pairs) < need:
        raise CalibrationError(
            f"only {n_used} of {n_peaks} detected lines match {lamp_label} lines; at least {need} are needed for a "
            "trustworthy solution (3 with --pair); check --lamp, expose longer, or add --pair PIXEL=NM"
        )
    strong_fraction, flux_fraction = _explained(best, peaks)
    top3 = _explained_top(best, peaks, 3)
    if not pairs and (top3 < 2 / 3 - 1e-9 or flux_fraction < 0.5 or (strong_fraction < 0.8 and flux_fraction < 0.85)):
        raise CalibrationError(
            f"the lines do not fit {lamp_label}: the best match explains {top3:.0%} of the 3 and {strong_fraction:.0%} of the 5 brightest lines "
            f"and {flux_fraction:.0%} of the line flux; check --lamp (or identify the source first)"
        )
    # Clipping flattens the brightest lines, so with saturated lines among the five brightest the
    # brightness order says little and this test is not made.
    if not pairs and not peaks.saturated[np.argsort(-peaks.amplitude)[:5]].any():
        brightest = np.argsort(-peaks.amplitude)[:5]
        position = {int(p): k for k, p in enumerate(best.peak_index)}
        for p in brightest:
            k = position.get(int(p))
            if k is not None and best.features.intensity[best.feature_index[k]] < 0.03:
                raise CalibrationError(
                    f"the lines do not fit {lamp_label}: the best match puts one of the brightest lines "
                    f"({peaks.pixel[p]:.1f} px) on a reference line listed at "
                    f"{best.features.intensity[best.feature_index[k]]:.1%} of the lamp's strongest; check --lamp"
                )
    if best.rms_px > 1.0:
        raise CalibrationError(
            f"the best match to {lamp_label} leaves an RMS of {best.rms_px:.2f} px (limit 1 px); the lines are probably "
            "not this lamp's, or the band is distorted; check --lamp and the geometry"
        )
    # A solution resting on loosely known features (blends, phosphor bands) needs more evidence:
    # fitted to a few wide targets, a wrong scale can look as tight as the right one.
    n_anchor = int(np.count_nonzero(best.anchor)) if best.anchor is not None else n_used
    need_evidence = _MIN_EVIDENCE + _ANCHOR_SURCHARGE * max(0, 3 - n_anchor)
    if not pairs and best.score < need_evidence:
        raise CalibrationError(
            f"the best match to {lamp_label} ({n_used} lines, {n_anchor} of them tightly known) is not convincing: "
            f"lines this many could fall on the lamp's lines by chance (evidence {best.score:.1f} of "
            f"{need_evidence:.0f} needed); check --lamp, "
            "expose longer, or add --hint-lines-per-mm or a --pair PIXEL=NM"
        )
    if len(candidates) > 1 and candidates[1].score >= best.score - _MIN_MARGIN:
        runner = candidates[1]
        raise CalibrationError(
            f"ambiguous: two different wavelength solutions fit {lamp_label} almost equally well "
            f"({n_used} and {int(runner.used.sum())} lines); add --hint-lines-per-mm or a --pair PIXEL=NM"
        )
    return best


def _grating_upgrade(best: _Candidate, peaks: _Peaks, *, pairs, context, pixel_range):
    """The grating model as a candidate for the final fit, beside the chosen polynomial.

    The grating model gets the same robust fit as the polynomial (all matched lines,
    rejected one at a time at 5 robust sigma, on studentised deletion residuals: see
    :func:`_grating_deletion_z`). The two models
    are then compared by BIC on the union of the lines either keeps, each refitted there
    without rejection (the polynomial's order chosen again by BIC), so a line one model
    has to reject counts against it. The grating model wins only with a lower BIC (by 2
    if it has more parameters than the polynomial). Returns (solution, used, rejected,
    anchor, note) or None (the matching's polynomial stays).
    """
    centre, scale, _, _ = context
    f = best.features
    p_idx, f_idx = best.peak_index, best.feature_index
    n_lines = p_idx.size
    coeffs = np.asarray(best.coefficients, dtype=float)
    deriv = np.polynomial.polynomial.polyder(coeffs)
    t_lines = (peaks.pixel[p_idx] - centre) / scale
    disp_lines = np.abs(np.polynomial.polynomial.polyval(t_lines, deriv)) / scale
    median_disp = float(np.median(disp_lines)) if n_lines else abs(coeffs[1]) / scale
    px = np.r_[peaks.pixel[p_idx], [m.pixel for m in pairs]]
    lam = np.r_[f.wavelength[f_idx], [m.wavelength_nm for m in pairs]]
    ss = np.r_[np.hypot(peaks.sigma[p_idx] * disp_lines, f.sigma[f_idx]),
               [math.hypot(m.tolerance_nm, _CENTRE_FLOOR_PX * median_disp) for m in pairs]]
    keep_poly = np.r_[np.asarray(best.used, dtype=bool), np.ones(len(pairs), dtype=bool)]
    # Lines whose uncertainty is set by the centre measurement, not by a loosely known reference:
    # their scatter about the fit tests the stated centre uncertainties (see _covariance_scale).
    tight = np.r_[f.sigma[f_idx] <= peaks.sigma[p_idx] * disp_lines,
                  [m.tolerance_nm <= _CENTRE_FLOOR_PX * median_disp for m in pairs]].astype(bool)
    t_all = (px - centre) / scale
    # The polynomial keeps the matching stage's fit and covariance, whose per-line model floor
    # (_MATCH_MODEL_FLOOR_PX) also stands for the polynomial's own inadequacy: refitted without it,
    # order-2 solutions moved by 1-3 px between loosely known lines and their stated uncertainty
    # was half the true error on the accuracy benchmark's benches.
    n_poly = coeffs.size
    polynomial = None
    if int(keep_poly.sum()) < 6:
        return polynomial
    sign = 1.0 if coeffs[1] > 0 else -1.0

    def grating_solution(params, cov):
        return WavelengthSolution(
            coefficients=tuple(float(v) for v in params),
            covariance=tuple(tuple(float(v) for v in row) for row in cov),
            pixel_centre=float(centre), pixel_scale=float(scale),
            pixel_range=(float(pixel_range[0]), float(pixel_range[1])), model="grating", grating_sign=sign)

    width = abs(float(pixel_range[1]) - float(pixel_range[0]))
    start = dict(sign=sign, width_px=width, axis_px=0.5 * (float(pixel_range[0]) + float(pixel_range[1])), start_px=centre, start_nm=float(coeffs[0]), start_disp=float(coeffs[1] / scale))

    def probe_of(mask):
        span = px[mask].max() - px[mask].min()
        return np.linspace(max(pixel_range[0], px[mask].min() - 0.15 * span),
                           min(pixel_range[1], px[mask].max() + 0.15 * span), 33)

    def fit_on(mask):
        result = _grating_fit(px[mask], lam[mask], ss[mask], **start)
        if result is None:
            return None
        d = _grating_derivative(result[0], probe_of(mask), sign)
        if not (np.all(d > 0) or np.all(d < 0)):
            return None  # a fold inside the range is never physical
        return result

    # The same outlier rejection as _robust_fit, on all matched lines.
    keep = np.ones(px.size, dtype=bool)
    fitted = fit_on(keep)
    if fitted is not None and keep_poly.all():
        # The polynomial kept every line, so the comparison below is on all lines whatever the grating
        # model rejects: when its fit on all lines loses, the rejection loop cannot change the outcome.
        log_all = math.log(max(px.size, 2))
        chi2_all = float(np.sum(((lam - np.polynomial.polynomial.polyval(t_all, coeffs)) / ss) ** 2))
        k_all = _grating_effective_parameters(fitted[0], fitted[1], px, ss, sign)
        bic_all_grating, bic_all_poly = fitted[2] + k_all * log_all, chi2_all + n_poly * log_all
        if not bic_all_grating < bic_all_poly + _occam_margin(k_all, n_poly):
            return _Upgrade(None, grating_solution(fitted[0], fitted[1]), _alternative_weight(bic_all_grating - bic_all_poly))
    for _ in range(max(1, px.size // 3)):
        if fitted is None or keep.sum() <= 6:
            break
        z = _grating_deletion_z(px, lam, ss, fitted[0], fitted[2], sign, keep,
                                lambda mask, near: _grating_fit(px[mask], lam[mask], ss[mask], initial=near, **start))
        zk = z[keep]
        spread = max(1.0, 1.4826 * float(np.median(np.abs(zk - np.median(zk)))))
        worst = int(np.argmax(np.where(keep, np.abs(z), -1)))
        if not (abs(z[worst]) > 5.0 * spread and abs(z[worst]) > 5.0):
            break
        trial = keep.copy()
        trial[worst] = False
        refit = fit_on(trial)
        if refit is None:
            break
        keep, fitted = trial, refit
    if fitted is None or keep.sum() < 6:
        return polynomial
    params, cov, chi2 = fitted
    # Compare on the union of the lines either model keeps.
    union = keep | keep_poly
    m = int(union.sum())
    log_m = math.log(max(m, 2))
    on_union = fitted if np.array_equal(union, keep) else fit_on(union)
    if on_union is None:
        return polynomial
    # the prior on x0 leaves the grating model fewer than 4 free parameters: count the effective number
    k_grating = _grating_effective_parameters(on_union[0], on_union[1], px[union], ss[union], sign)
    bic_grating = on_union[2] + k_grating * log_m
    if np.array_equal(union, keep_poly):
        chi2_poly = float(np.sum(((lam[union] - np.polynomial.polynomial.polyval(t_all[union], coeffs)) / ss[union]) ** 2))
        bic_poly = chi2_poly + n_poly * log_m
    else:
        refit = _select_order(t_all, lam, ss, union, max_order=3, monotonic_t=(probe_of(union) - centre) / scale)
        bic_poly, n_poly = (np.inf, coeffs.size) if refit is None else (refit[0], refit[4] + 1)
    if not bic_grating < bic_poly + _occam_margin(k_grating, n_poly):
        return _Upgrade(None, grating_solution(on_union[0], on_union[1]), _alternative_weight(bic_grating - bic_poly))
    jac = _grating_jacobian(params, px[keep], sign) / ss[keep, None]
    leverage = np.einsum("ij,jk,ik->i", jac, cov, jac)
    # scaled up (never down) by the scatter of the tightly known lines: loosely known lines, whose
    # near-zero chi-square terms would dilute a plain reduced chi-square, are left out of it
    cov = cov * max(1.0, _covariance_scale((lam[keep] - _grating_eval(params, px[keep], sign)) / ss[keep], leverage,
                                           tight[keep]))
    solution = grating_solution(params, cov)
    used = keep[:n_lines].copy()
    rejected = ~used
    disp = np.abs(solution.dispersion_nm_per_px(peaks.pixel[p_idx]))
    anchor = used & (f.sigma[f_idx] / disp <= _FEATURE_FIT_LIMIT_PX)
    note = (f"the grating model (pinhole camera behind a grating) fits better than a polynomial "
            f"(BIC {bic_grating:.1f} against {bic_poly:.1f} on {m} lines)")
    n_back = int(np.count_nonzero(keep[:n_lines] & ~keep_poly[:n_lines]))
    if n_back:
        note += f"; {n_back} line(s) a polynomial had to reject fit it and are used"
    alternative = WavelengthSolution(
        coefficients=tuple(float(c) for c in best.coefficients),
        covariance=tuple(tuple(float(v) for v in row) for row in best.covariance),
        pixel_centre=float(centre), pixel_scale=float(scale), pixel_range=(float(pixel_range[0]), float(pixel_range[1])))
    return _Upgrade((solution, used, rejected, anchor, note), alternative, _alternative_weight(bic_poly - bic_grating))


def _occam_margin(k_grating: float, n_poly: int) -> float:
    """How much higher the grating model's BIC may be than the polynomial's and still win.

    Of two models whose BIC differ by less than 2 ("not worth more than a bare mention", Kass
    and Raftery 1995, J. Am. Stat. Assoc. 90, 773) the one with fewer parameters is taken: the
    model with more must win by 2. Against a cubic (4 coefficients) the grating model, whose
    prior on x0 leaves it 3-4 effective parameters, is the simpler one; against an order 1 or
    2 polynomial it is the larger one.
    """
    if k_grating > n_poly:
        return -2.0
    if k_grating < n_poly:
        return 2.0
    return 0.0


@dataclass(frozen=True)
class _Upgrade:
    """What the final model comparison gives: the grating model's result when it wins (else None), and
    the other family's fit with its BIC weight (see ``WavelengthSolution.alternative``)."""

    grating: tuple | None
    alternative: "WavelengthSolution | None"
    weight: float


def _alternative_weight(delta_bic: float) -> float:
    """Posterior weight of a model whose BIC exceeds the chosen one's by ``delta_bic`` (two models, equal priors)."""
    if not math.isfinite(delta_bic):
        return 0.0
    return 1.0 / (1.0 + math.exp(min(max(0.5 * delta_bic, -50.0), 50.0)))


def _build_result(best: _Candidate, peaks: _Peaks, *, lamps: Sequence[Lamp], pairs, context, pixel_range, extra_notes=(),
                  upgrade=None):
    centre, scale, t_ends, fwhm = context
    used_mask, rejected_mask, anchor_mask = best.used, best.rejected, best.anchor
    grating = upgrade.grating if upgrade is not None else None
    if grating is not None:
        solution, used_mask, rejected_mask, anchor_mask, grating_note = grating
        extra_notes = tuple(extra_notes) + ((grating_note,) if grating_note else ())
    else:
        solution = WavelengthSolution(
            coefficients=tuple(float(c) for c in best.coefficients),
            covariance=tuple(tuple(float(v) for v in row) for row in best.covariance),
            pixel_centre=float(centre),
            pixel_scale=float(scale),
            pixel_range=(float(pixel_range[0]), float(pixel_range[1])),
        )
    if upgrade is not None and upgrade.alternative is not None and upgrade.weight > 0:
        solution = dataclasses.replace(solution, alternative=upgrade.alternative, alternative_weight=float(upgrade.weight))
    f = best.features
    matches = []
    for k, (pi, fi) in enumerate(zip(best.peak_index, best.feature_index)):
        pixel = float(peaks.pixel[pi])
        fitted = float(solution.wavelength_nm(pixel))
        disp = abs(float(solution.dispersion_nm_per_px(pixel)))
        lamp = lamps[int(peaks.lamp[pi])] if len(lamps) > int(peaks.lamp[pi]) else lamps[0]
        matches.append(
            MatchedLine(
                pixel=pixel,
                pixel_uncertainty=float(peaks.sigma[pi]),
                reference_nm=float(f.wavelength[fi]),
                reference_uncertainty_nm=float(f.sigma[fi]),
                fitted_nm=fitted,
                residual_nm=float(f.wavelength[fi] - fitted),
                residual_px=float((f.wavelength[fi] - fitted) / disp),
                species=f.species[fi],
                members_nm=f.members[fi],
                lamp=lamp.name,
                used_in_fit=bool(used_mask[k]),
                anchor=bool(anchor_mask[k]),
                rejected=bool(rejected_mask[k]),
                blended=bool(f.merged[fi] or peaks.blended[pi]),
                saturated=bool(peaks.saturated[pi]),
                snr=float(peaks.snr[pi]),
            )
        )
    for pair in pairs:
        fitted = float(solution.wavelength_nm(pair.pixel))
        disp = abs(float(solution.dispersion_nm_per_px(pair.pixel)))
        matches.append(
            MatchedLine(pair.pixel, 0.0, pair.wavelength_nm, pair.tolerance_nm, fitted, pair.wavelength_nm - fitted,
                        (pair.wavelength_nm - fitted) / disp, "manual", (pair.wavelength_nm,), pair.label, True, True,
                        False, False, False, float("nan"))
        )
    matches.sort(key=lambda m: m.pixel)
    used = [m for m in matches if m.used_in_fit]
    # Weighted RMS (weights 1/sigma^2 of each line's total uncertainty): tightly known lines dominate it.
    sigma_px = np.array([math.hypot(m.pixel_uncertainty, m.reference_uncertainty_nm / abs(float(solution.dispersion_nm_per_px(m.pixel))))
                         for m in used])
    weights = 1.0 / np.maximum(sigma_px, 1e-6) ** 2
    rms_px = float(np.sqrt(np.sum(weights * np.array([m.residual_px for m in used]) ** 2) / np.sum(weights)))
    rms_nm = float(np.sqrt(np.sum(weights * np.array([m.residual_nm for m in used]) ** 2) / np.sum(weights)))
    used_pixels = [m.pixel for m in used]
    grid = np.linspace(min(m.pixel for m in matches), max(m.pixel for m in matches), 257)
    max_sigma = float(np.max(solution.uncertainty_nm(grid)))
    # Coverage: how much of the span holding detected lines is bracketed by fitted lines.
    lit = _lit_pixels(peaks, pairs)
    coverage = min(1.0, (max(used_pixels) - min(used_pixels)) / max(float(np.ptp(lit)), 1.0))
    notes = list(extra_notes)
    n_loose = sum(1 for m in matches if m.used_in_fit and not m.anchor)
    if n_loose:
        notes.append(f"{n_loose} matched line(s) with loosely known wavelengths (blends, phosphor bands) were fitted "
                     "with their larger uncertainty and left out of the RMS")
    for m in matches:
        if m.rejected:
            notes.append(f"line at {m.pixel:.1f} px ({m.reference_nm:.2f} nm) rejected as an outlier ({m.residual_px:+.2f} px)")
    if any(m.saturated and m.used_in_fit for m in matches):
        notes.append("saturated lines were fitted from their unclipped wings; shorten the exposure for better centres")
    n_fit = sum(1 for m in matches if m.used_in_fit)
    n_anchor = sum(1 for m in matches if m.used_in_fit and m.anchor)
    summary = f"{n_fit} lines fitted ({n_anchor} with tightly known wavelengths), weighted RMS {rms_px:.2f} px, lines span {coverage:.0%} of the range"
    if n_fit >= 5 and n_anchor >= 3 and rms_px <= 0.3 and coverage >= 0.4:
        verdict, reason = "good", summary
    elif n_fit >= 4 and rms_px <= 0.6:
        verdict, reason = "fair", summary
        if coverage < 0.4:
            reason += "; wavelengths outside the calibrated lines are extrapolated"
    else:
        verdict = "poor"
        reason = summary + "; add lines (another lamp, --pair) before trusting it"
    sources = tuple(dict.fromkeys(f"{ll.species}: {ll.source}" for lamp in lamps for ll in lamp.line_lists()))
    return WavelengthCalibration(
        solution=solution,
        matches=tuple(matches),
        rms_px=rms_px,
        rms_nm=rms_nm,
        max_uncertainty_nm=max_sigma,
        verdict=verdict,
        verdict_reason=reason,
        lamps=tuple(dict.fromkeys(l.name for l in lamps)),
        line_list_sources=sources,
        coverage_fraction=float(coverage),
        n_detected=int(peaks.pixel.size),
        notes=tuple(notes),
        evidence_nats=float(best.score),
    )


# --------------------------------------------------------------------------- public entry points


def _as_lamp(lamp) -> Lamp:
    if isinstance(lamp, Lamp):
        return lamp
    if not isinstance(lamp, str):
        raise InputError(f"`lamp` must be a lamp name such as 'cfl', got {type(lamp).__name__}")
    return load_lamp(lamp)


def _check_options(d_range, max_order, pairs):
    low, high = (float(v) for v in d_range)
    if not (0 < low < high):
        raise InputError(f"`dispersion_range_nm_per_px` must be (low, high) with 0 < low < high, was {d_range}")
    if max_order not in (1, 2, 3):
        raise InputError(f"`max_order` must be 1, 2 or 3, was {max_order}")
    for pair in pairs:
        if not isinstance(pair, ManualPair):
            raise InputError(f"`pairs` must hold ManualPair objects (see parse_pair), got {type(pair).__name__}")
    return (low, high)


def calibrate_lines(
    lines: LineTable,
    *,
    lamp: str | Lamp = "cfl",
    pairs: Sequence[ManualPair] = (),
    dispersion_range_nm_per_px: tuple[float, float] = (0.1, 3.0),
    max_order: int = 3,
    suggest_lamps: bool = False,
) -> WavelengthCalibration:
    """Calibrate a line table against a lamp's reference lines, with no first guess.

    Parameters
    ----------
    lines : LineTable
        Emission lines of the lamp frame (``benchspec.lines.find_lines``).
    lamp : str or Lamp
        Lamp name (``"cfl"``, ``"hg"``, ``"ne"``, ``"he"``, ``"h"``, ``"ar"``, ``"kr"``, ``"xe"``, ``"na"``).
    pairs : sequence of ManualPair
        Extra fixed points (e.g. a laser), used in the fit and to constrain the search.
    dispersion_range_nm_per_px : (float, float)
        Allowed |nm/px|; narrow it with :func:`dispersion_range_for_grating` when the grating is known.
    max_order : int
        Highest polynomial order considered (1-3); the data choose the order.
    suggest_lamps : bool
        On failure, try the other lamps and name one that fits well (verdict
        good and twice the evidence needed) in the error message. Off by
        default: dense line lists (Ar, Ne, Xe) fit many spectra loosely.

    Returns
    -------
    WavelengthCalibration

    Raises
    ------
    CalibrationError
        Fewer than 3 usable lines, lines that fit no solution, a wrong lamp,
        an ambiguous match, or an RMS above 1 px.
    """
    d_range = _check_options(dispersion_range_nm_per_px, max_order, pairs)
    lamp_obj = _as_lamp(lamp)
    peaks = _peaks_from_table(lines, kind=lamp_obj.kind)
    pixel_range = (min(lines.pixel_range), max(lines.pixel_range))
    def check_pairs():
        _check_pairs_against_lines(pairs, lambda: _calibrate_peaks(
            peaks, [lamp_obj], pixel_range=pixel_range, d_range=d_range, pairs=(), max_order=max_order,
            suggest_lamps=False), lamp_label=f"lamp {lamp_obj.name!r}")

    try:
        result = _calibrate_peaks(peaks, [lamp_obj], pixel_range=pixel_range, d_range=d_range, pairs=tuple(pairs),
                                  max_order=max_order, suggest_lamps=suggest_lamps)
    except CalibrationError:
        if pairs:  # a pair the lines contradict is the likelier cause, and the more useful message
            check_pairs()
        raise
    if pairs:
        check_pairs()
    return result


def _check_pairs_against_lines(pairs, calibrate_without, *, lamp_label: str) -> None:
    """Refuse manual pairs that the lamp's own lines contradict.

    A pair constrains the search, so a wrong one (a pixel misread, a wavelength mistyped) can
    steer it to a solution through the pair and a few loosely known lines. When the lines alone
    give a solution that passes every check, each pair must agree with it within 5 sigma of
    their combined uncertainty (the pair's tolerance, the solution's own 1-sigma at that pixel
    and the 0.03 px centre floor); otherwise CalibrationError names the pair and where the lines
    put its wavelength. Lines that cannot be calibrated alone (the usual reason for a pair)
    leave the pairs unchecked.
    """
    try:
        alone = calibrate_without()
    except CalibrationError:
        return
    if alone.verdict == "poor":
        return
    solution = alone.solution
    for pair in pairs:
        fitted = float(solution.wavelength_nm(pair.pixel))
        disp = abs(float(solution.dispersion_nm_per_px(pair.pixel)))
        sigma = math.sqrt(pair.tolerance_nm**2 + float(solution.uncertainty_nm(pair.pixel)) ** 2
                          + (_CENTRE_FLOOR_PX * disp) ** 2)
        if abs(fitted - pair.wavelength_nm) > 5.0 * sigma:
            grid = np.linspace(*solution.pixel_range, 4096)
            wl = solution.wavelength_nm(grid)
            where = grid[int(np.argmin(np.abs(wl - pair.wavelength_nm)))]
            placed = (f"{pair.wavelength_nm:g} nm at pixel {where:.1f}"
                      if np.min(np.abs(wl - pair.wavelength_nm)) < 2 * disp else f"{pair.wavelength_nm:g} nm off the frame")
            raise CalibrationError(
                f"the pair {pair.pixel:g}={pair.wavelength_nm:g} disagrees with the {lamp_label} lines, which alone put "
                f"{fitted:.1f} nm at pixel {pair.pixel:g} and {placed} ({abs(fitted - pair.wavelength_nm) / disp:.0f} px "
                "apart); check the pair's pixel (a rectified column, as in the line table) and wavelength, or leave it out"
            )


def _recalibrate_lines(lines: LineTable, seed: WavelengthSolution, *, lamp: str | Lamp = "cfl",
                       pairs: Sequence[ManualPair] = (), dispersion_range_nm_per_px: tuple[float, float] = (0.1, 3.0),
                       max_order: int = 3) -> WavelengthCalibration:
    """:func:`calibrate_lines` for lines that moved slightly since ``seed`` was found from them.

    After the curvature is refitted the same frame's lines shift by a fraction of a pixel: the
    search is not made again, the lines are matched and fitted starting from ``seed`` (the
    first calibration's solution). The same checks decide (enough lines, the brightest
    explained, RMS, evidence); only the comparison with a runner-up, which the first
    calibration passed, is not repeated. Raises CalibrationError as calibrate_lines does.
    """
    d_range = _check_options(dispersion_range_nm_per_px, max_order, pairs)
    lamp_obj = _as_lamp(lamp)
    peaks = _peaks_from_table(lines, kind=lamp_obj.kind)
    pixel_range = (min(lines.pixel_range), max(lines.pixel_range))
    return _calibrate_peaks(peaks, [lamp_obj], pixel_range=pixel_range, d_range=d_range, pairs=tuple(pairs),
                            max_order=max_order, suggest_lamps=False, seed=seed)


def _calibrate_peaks(peaks, lamps, *, pixel_range, d_range, pairs, max_order, suggest_lamps, extra_notes=(), seed=None):
    label = " + ".join(f"lamp {l.name!r}" for l in lamps)
    if peaks.pixel.size + len(pairs) < 3:
        raise CalibrationError(
            f"only {peaks.pixel.size} emission lines were detected; at least 3 are needed (4 without manual pairs); "
            "check the lamp is on and in view, expose longer, or add --pair PIXEL=NM"
        )
    wavelength, intensity, tolerance, species = [], [], [], []
    for lamp in lamps:
        w, i, t, s = _reference_lines(lamp)
        wavelength.append(w), intensity.append(i), tolerance.append(t), species.extend(s)
    order = np.argsort(np.concatenate(wavelength), kind="stable")
    reference = (np.concatenate(wavelength)[order], np.concatenate(intensity)[order], np.concatenate(tolerance)[order],
                 tuple(np.array(species, dtype=object)[order]))
    candidates, context = _search(peaks, reference, pixel_range=pixel_range, d_range=d_range, pairs=pairs,
                                  max_order=max_order, seed=seed)
    try:
        best = _decide(candidates, peaks, lamp_label=label, pairs=pairs, context=context)
    except CalibrationError as exc:
        if suggest_lamps and len(lamps) == 1 and not pairs:
            hint = _suggest_other_lamp(peaks, lamps[0].name, pixel_range=pixel_range, d_range=d_range, max_order=max_order)
            if hint:
                raise CalibrationError(f"{exc}; the lines fit lamp {hint!r}: try --lamp {hint}") from None
        raise
    upgrade = _grating_upgrade(best, peaks, pairs=pairs, context=context, pixel_range=pixel_range) if max_order >= 3 else None
    return _build_result(best, peaks, lamps=lamps, pairs=pairs, context=context, pixel_range=pixel_range,
                         extra_notes=extra_notes, upgrade=upgrade)


def _suggest_other_lamp(peaks, current, *, pixel_range, d_range, max_order):
    for name in available_lamps():
        if name == current:
            continue
        try:
            other = _calibrate_peaks(peaks, [load_lamp(name)], pixel_range=pixel_range, d_range=d_range, pairs=(),
                                     max_order=max_order, suggest_lamps=False)
        except CalibrationError:
            continue
        if other.verdict == "good" and other.evidence_nats >= 2 * _MIN_EVIDENCE:
            return name
    return None


def calibrate_spectrum(
    spectrum: Spectrum,
    *,
    lamp: str | Lamp = "cfl",
    min_snr: float = 5.0,
    pairs: Sequence[ManualPair] = (),
    dispersion_range_nm_per_px: tuple[float, float] = (0.1, 3.0),
    max_order: int = 3,
) -> WavelengthCalibration:
    """Find the emission lines of a lamp spectrum (pixel axis) and calibrate them; see :func:`calibrate_lines`."""
    table = find_lines(spectrum, min_snr=min_snr)
    return calibrate_lines(table, lamp=lamp, pairs=pairs, dispersion_range_nm_per_px=dispersion_range_nm_per_px,
                           max_order=max_order)


def calibrate_combined(
    observations: Sequence[tuple[LineTable, str | Lamp]],
    *,
    pairs: Sequence[ManualPair] = (),
    dispersion_range_nm_per_px: tuple[float, float] = (0.1, 3.0),
    max_order: int = 3,
) -> WavelengthCalibration:
    """One solution from frames of several lamps taken with the same setup.

    Each lamp's lines are matched only to that lamp's reference lines. The
    lamps that can be solved alone seed the solution; then every lamp's lines
    are matched with it and one polynomial is fitted to all of them.

    Parameters
    ----------
    observations : sequence of (LineTable, lamp)
        Line tables on the same pixel axis, each with its lamp.
    """
    d_range = _check_options(dispersion_range_nm_per_px, max_order, pairs)
    if not observations:
        raise InputError("`observations` is empty; give at least one (line table, lamp) pair")
    lamps = [_as_lamp(l) for _, l in observations]
    tables = [t for t, _ in observations]
    if len(tables) == 1:
        return calibrate_lines(tables[0], lamp=lamps[0], pairs=pairs, dispersion_range_nm_per_px=d_range, max_order=max_order)
    ranges = [t.pixel_range for t in tables]
    pixel_range = (min(min(r) for r in ranges), max(max(r) for r in ranges))
    seeds = []
    for table, lamp in zip(tables, lamps):
        try:
            seeds.append(calibrate_lines(table, lamp=lamp, pairs=pairs, dispersion_range_nm_per_px=d_range,
                                         max_order=max_order, suggest_lamps=False))
        except CalibrationError:
            continue
    all_peaks = _concat_peaks([_peaks_from_table(t, k) for k, t in enumerate(tables)])
    if not seeds:
        # Nothing solvable alone: match the union of lines against the union of the lamps' lines.
        return _calibrate_peaks(all_peaks, lamps, pixel_range=pixel_range, d_range=d_range, pairs=tuple(pairs),
                                max_order=max_order, suggest_lamps=False)
    seed = max(seeds, key=lambda s: (s.n_used, -s.rms_px))
    centre, scale = _normalise(*pixel_range)
    t_ends = np.array([(pixel_range[0] - centre) / scale, (pixel_range[1] - centre) / scale])
    # Re-express the seed polynomial in the combined normalisation.
    grid = np.linspace(pixel_range[0], pixel_range[1], 64)
    start = np.polynomial.polynomial.polyfit((grid - centre) / scale, seed.solution.wavelength_nm(grid), seed.solution.order)
    matched = []
    for k, (table, lamp) in enumerate(zip(tables, lamps)):
        peaks = _peaks_from_table(table, k)
        if peaks.pixel.size == 0:
            continue
        w, i, t, s = _reference_lines(lamp)
        fwhm = float(np.median(peaks.fwhm))
        candidate = _refine(start, peaks, (w, i, t, s), centre=centre, scale=scale, fwhm=fwhm, t_ends=t_ends, pairs=(),
                            max_order=max_order)
        if candidate is None:
            continue
        matched.append((peaks, candidate))
    if not matched:
        return seed
    # Joint fit over every lamp's matches.
    tt, ll, ss, owners = [], [], [], []
    for peaks, c in matched:
        disp = np.abs(np.polynomial.polynomial.polyval((peaks.pixel[c.peak_index] - centre) / scale,
                                                       np.polynomial.polynomial.polyder(c.coefficients))) / scale
        for j, (pi, fi) in enumerate(zip(c.peak_index, c.feature_index)):
            if c.features.sigma[fi] / disp[j] > _FEATURE_FIT_LIMIT_PX:
                continue
            tt.append((peaks.pixel[pi] - centre) / scale)
            ll.append(c.features.wavelength[fi])
            ss.append(math.hypot(peaks.sigma[pi] * disp[j], c.features.sigma[fi]))
    for pair in pairs:
        tt.append((pair.pixel - centre) / scale), ll.append(pair.wavelength_nm), ss.append(pair.tolerance_nm)
    fit = _robust_fit(np.array(tt), np.array(ll), np.array(ss), max_order=min(max_order, max(1, len(tt) - 2)),
                      monotonic_t=np.linspace(t_ends[0], t_ends[1], 33))
    if fit is None:
        return seed
    coeffs, cov, keep, reduced = fit
    # Rebuild one candidate over the union of peaks so the result lists every lamp's matches.
    reference_parts = [_reference_lines(l) for l in lamps]
    w = np.concatenate([r[0] for r in reference_parts])
    order = np.argsort(w, kind="stable")
    reference = (w[order], np.concatenate([r[1] for r in reference_parts])[order],
                 np.concatenate([r[2] for r in reference_parts])[order],
                 tuple(np.array([s for r in reference_parts for s in r[3]], dtype=object)[order]))
    fwhm = float(np.median(all_peaks.fwhm))
    union = _refine(coeffs, all_peaks, reference, centre=centre, scale=scale, fwhm=fwhm, t_ends=t_ends, pairs=tuple(pairs),
                    max_order=max_order)
    if union is None or union.used.sum() < seed.n_used:
        return seed
    context = (centre, scale, t_ends, fwhm)
    return _build_result(union, all_peaks, lamps=lamps, pairs=tuple(pairs), context=context, pixel_range=pixel_range,
                         extra_notes=(f"combined {len(tables)} frames of lamps {', '.join(l.name for l in lamps)}",))
