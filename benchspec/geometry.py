"""Geometry from the frame: band finding, rotation, slit-image curvature, aperture, rectification.

The model
---------
The band's centre line is a straight line through the frame point
``(centre_x_px, centre_y_px)`` at ``rotation_deg`` from the +x axis
(positive angles: the band runs *down* to the right, as image rows grow
downwards). Along it, ``s`` (px) runs along the dispersion and ``t`` (px)
across the band, ``t = 0`` on the centre line. Each emission line is an image
of the slit; in (s, t) it is not straight but shifted along s by

    ds(s, t) = b(s) * t + c(s) * t**2

where ``c(s)`` is the curvature (the parabolic "smile", growing with
wavelength) and ``b(s)`` the residual tilt of the slit images (it also
absorbs an apex that is not on the centre line). ``b`` and ``c`` are
polynomials in ``s`` (``numpy.polynomial`` order: lowest power first) whose
degree the number and spread of measured lines justify.

Once a wavelength calibration exists, the grating model (a pinhole camera behind
the grating: the solution itself, or fitted to a polynomial solution's lines) gives
each column a diffraction angle ``beta(s)``, and the curvature can take the physical
shape instead (:func:`refit_curvature_grating`)::

    c(s) = c_0 + k tan(beta(s)),   beta(s) = theta + atan(sign (s - s_x0) / f)

A straight slit seen through a plane grating images as a curve whose
curvature grows with tan(beta): rays from the slit's ends leave the grating
with the same dispersion-direction cosine but a smaller forward one, which a
flat sensor at focal length f shows as a sag of ``t**2 tan(beta) / (2 f)``
(the textbook spectral-line curvature of plane-grating spectrographs, from
memory; the virtual bench, :mod:`benchspec.simulate`, renders exactly that).
Unlike a polynomial fitted to the few traced lines, that shape holds beyond
the outermost traced lines. ``curvature_grating`` then holds
``(k, theta_rad, s_x0_px, f_px, sign)`` and ``curvature_coefficients`` holds
``c_0`` (or 0).

Rectified coordinates are integer columns ``u`` and rows ``v``:
``s = first_column_s_px + u`` and ``t = v - centre_row``. The rectified
pixel (u, v) samples the frame at ``s' = s + b(s) t + c(s) t**2``:

    x = centre_x_px + s' cos(theta) - t sin(theta)
    y = centre_y_px + s' sin(theta) + t cos(theta)

so in the rectified image the dispersion runs along u and every line is
straight. :func:`remap_tables` turns this into float32 ``cv2.remap`` maps;
:func:`rectify` is then one ``cv2.remap`` call per plane.

Measuring
---------
:func:`measure_geometry` finds the band anywhere in the frame (a coarse
search over shear angles of a downsampled copy for the most concentrated
projection), refines the rotation from the band's half-maximum edges in
chunks along the band, measures curvature and tilt by tracking each isolated
emission line across rows (sub-pixel Gaussian peak interpolation), fits
``b(s)`` and ``c(s)`` with outlier rejection, and chooses the extraction
aperture (where the band's spatial profile is above 2% of its peak) and
background rows on both sides. On a continuum with no line the rotation
still comes from the band's edges and ``curvature_known`` is False. A band
too short for its edges (a few chunks long) takes its rotation from the
common tilt of its slit images, and says so in ``notes``.

:func:`measure_band_shift` compares a later frame with a stored geometry and
says whether the setup was bumped.
"""

from __future__ import annotations

import dataclasses
import math
import threading
import warnings
from dataclasses import MISSING, dataclass
from typing import Any, Mapping

import cv2
import numpy as np

from .errors import FileFormatError, FrameError, GeometryError, InputError

__all__ = [
    "GEOMETRY_SCHEMA",
    "MAX_ROTATION_DEG",
    "Geometry",
    "RectifiedBand",
    "BandShift",
    "measure_geometry",
    "refit_curvature_grating",
    "line_shift_between",
    "remap_tables",
    "jacobian",
    "valid_samples",
    "INTERPOLATIONS",
    "rectify",
    "check_frame_size",
    "measure_band_shift",
]

GEOMETRY_SCHEMA = "benchspec-geometry/1"
# Turning the band axis by d (radians) turns the sampled slit images by -d: the tilt b gains +d.
_TILT_SIGN = 1.0
#: The band's rotation is searched within +-16 degrees (the issue asks for +-15).
MAX_ROTATION_DEG = 16.0

# thresholds (common practice, no source)
_MIN_CONTRAST = 0.10  # band peak above background, as a fraction of the background
_MIN_SNR = 10.0  # band peak over the noise of the profile
_APERTURE_LEVEL = 0.02  # aperture: spatial profile above 2% of its peak
_EDGE_LEVEL = 0.25  # a band whose profile is still above 25% at the frame edge is cut off
#: Systematic error of one traced line's sag at the edge of its trace (px), added in quadrature to
#: the parabola fit's own when curvature shapes are compared (:func:`refit_curvature_grating`).
#: Measured: over 209 lines traced on the accuracy benchmark's odd-numbered benches, the error of
#: the sag against the simulator's truth had a median of 0.046 px against a median stated 0.052 px,
#: pulls 1.39 wide (1.4826 MAD); with 0.03 px added, 1.01.
CURVATURE_SYSTEMATIC_SAG_PX = 0.03


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Geometry:
    """Where the band is, how it is rotated and curved, and which rows to extract.

    JSON-serialisable through :meth:`to_dict` / :meth:`from_dict`. All lengths
    are in pixels of the frame; see the module notes for the coordinates.

    Attributes
    ----------
    frame_width_px, frame_height_px : int
        Size of the frames the geometry was measured on; other sizes are refused.
    rotation_deg : float
        Angle of the dispersion axis from +x (positive: down to the right).
    rotation_uncertainty_deg : float
        1-sigma uncertainty of ``rotation_deg`` from the edge fit.
    centre_x_px, centre_y_px : float
        A frame point on the band's centre line (s = 0, t = 0).
    first_column_s_px : float
        ``s`` of rectified column 0.
    n_columns, n_rows : int
        Size of the rectified image (columns along the dispersion).
    centre_row : int
        Rectified row of the centre line (t = 0).
    aperture_rows : (int, int)
        Rectified rows [start, stop) summed into the spectrum.
    background_rows : tuple of (int, int)
        Rectified row ranges [start, stop) beside the band used for the background.
    band_height_px : float
        Full width at half maximum of the band's spatial profile.
    tilt_coefficients : tuple of float
        ``b(s)``: polynomial coefficients, lowest power first (px per px).
    curvature_coefficients : tuple of float
        ``c(s)``: polynomial coefficients, lowest power first (1/px). Zeros
        when the curvature is unknown.
    curvature_grating : tuple of float
        Empty (the default, and every geometry written before it existed), or
        ``(k, theta_rad, s_x0_px, f_px, sign)``: then ``c(s)`` is the polynomial
        plus ``k tan(theta + atan(sign (s - s_x0_px) / f_px))`` (1/px), the
        physical shape taken from a grating-shaped wavelength solution (see
        the module notes and :func:`refit_curvature_grating`).
    curvature_known : bool
        False when no emission line could be traced (e.g. a continuum).
    curvature_rms_px : float or None
        RMS of the traced line centres about the fitted model: how straight
        the lines are after rectification. None when unknown.
    n_lines_traced : int
        Lines used for the curvature fit.
    spatial_profile : tuple of float
        Normalised spatial profile over the aperture rows (sums to 1), used
        by optimal extraction when a frame's own profile is not fitted.
    notes : tuple of str
        Anything the caller should know (e.g. why the curvature is unknown).
    """

    frame_width_px: int
    frame_height_px: int
    rotation_deg: float
    rotation_uncertainty_deg: float
    centre_x_px: float
    centre_y_px: float
    first_column_s_px: float
    n_columns: int
    n_rows: int
    centre_row: int
    aperture_rows: tuple
    background_rows: tuple
    band_height_px: float
    tilt_coefficients: tuple = (0.0,)
    curvature_coefficients: tuple = (0.0,)
    curvature_grating: tuple = ()
    curvature_known: bool = False
    curvature_rms_px: float | None = None
    n_lines_traced: int = 0
    spatial_profile: tuple = ()
    notes: tuple = ()
    schema: str = GEOMETRY_SCHEMA

    def __post_init__(self):
        object.__setattr__(self, "aperture_rows", tuple(int(v) for v in self.aperture_rows))
        object.__setattr__(self, "background_rows", tuple(tuple(int(v) for v in pair) for pair in self.background_rows))
        for name in ("tilt_coefficients", "curvature_coefficients", "curvature_grating", "spatial_profile"):
            object.__setattr__(self, name, tuple(float(v) for v in getattr(self, name)))
        object.__setattr__(self, "notes", tuple(str(v) for v in self.notes))

    # -- size

    @property
    def frame_shape(self) -> tuple[int, int]:
        """(height, width) of the frames this geometry applies to."""
        return (self.frame_height_px, self.frame_width_px)

    @property
    def rectified_shape(self) -> tuple[int, int]:
        """(n_rows, n_columns) of the rectified image."""
        return (self.n_rows, self.n_columns)

    # -- model

    def curvature_at(self, s_px) -> np.ndarray:
        """c(s) in 1/px at positions ``s_px`` along the band."""
        s = np.asarray(s_px, float)
        c = np.polynomial.polynomial.polyval(s, self.curvature_coefficients)
        if self.curvature_grating:
            k, theta, s_x0, f, sign = self.curvature_grating
            c = c + k * np.tan(theta + np.arctan(sign * (s - s_x0) / f))
        return c

    def curvature_slope_at(self, s_px) -> np.ndarray:
        """dc/ds in 1/px^2 at positions ``s_px`` along the band."""
        from numpy.polynomial import polynomial as P

        s = np.asarray(s_px, float)
        coef = np.asarray(self.curvature_coefficients, float)
        slope = P.polyval(s, P.polyder(coef)) if coef.size > 1 else np.zeros_like(s)
        if self.curvature_grating:
            k, theta, s_x0, f, sign = self.curvature_grating
            z = (s - s_x0) / f
            beta = theta + np.arctan(sign * z)
            slope = slope + k * sign / (f * (1.0 + z * z) * np.cos(beta) ** 2)
        return slope

    def tilt_at(self, s_px) -> np.ndarray:
        """b(s) (px per px) at positions ``s_px`` along the band."""
        return np.polynomial.polynomial.polyval(np.asarray(s_px, float), self.tilt_coefficients)

    def smile_px(self, column=None) -> np.ndarray:
        """Sag of a line at the aperture's edge rows relative to its centre (px), per rectified column.

        The larger of the two edges' |c(s) t²|, signed like c.
        """
        u = np.arange(self.n_columns) if column is None else np.asarray(column, float)
        s = self.first_column_s_px + u
        t_edge = max(abs(self.aperture_rows[0] - self.centre_row), abs(self.aperture_rows[1] - 1 - self.centre_row))
        return self.curvature_at(s) * t_edge**2

    def frame_coordinates(self, column, row) -> tuple[np.ndarray, np.ndarray]:
        """Frame (x, y) of rectified (column, row) positions (arrays broadcast)."""
        u = np.asarray(column, dtype=np.float64)
        v = np.asarray(row, dtype=np.float64)
        s = self.first_column_s_px + u
        t = v - self.centre_row
        s_curved = s + self.tilt_at(s) * t + self.curvature_at(s) * t * t
        theta = math.radians(self.rotation_deg)
        c, sn = math.cos(theta), math.sin(theta)
        x = self.centre_x_px + s_curved * c - t * sn
        y = self.centre_y_px + s_curved * sn + t * c
        return x, y

    # -- serialisation

    def to_dict(self) -> dict:
        """Plain JSON-ready dict (lists, floats, ints, bools, str, None)."""
        data = {name: getattr(self, name) for name in self.__dataclass_fields__}  # fields are flat: no asdict recursion
        data["aperture_rows"] = list(self.aperture_rows)
        data["background_rows"] = [list(pair) for pair in self.background_rows]
        for name in ("tilt_coefficients", "curvature_coefficients", "curvature_grating", "spatial_profile", "notes"):
            data[name] = list(getattr(self, name))
        return data

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> "Geometry":
        """Rebuild from :meth:`to_dict` output; FileFormatError names a missing or bad field."""
        if not isinstance(data, Mapping):
            raise FileFormatError("geometry must be a JSON object (mapping); the calibration file is damaged")
        schema = data.get("schema", GEOMETRY_SCHEMA)
        if schema != GEOMETRY_SCHEMA:
            raise FileFormatError(
                f"geometry schema {schema!r} is not supported (expected {GEOMETRY_SCHEMA!r}); "
                "recalibrate with this version of benchspec"
            )
        names = [f for f in cls.__dataclass_fields__]
        unknown = sorted(set(data) - set(names))
        if unknown:
            raise FileFormatError(f"geometry has unknown field(s) {', '.join(unknown)}; the calibration file is damaged")
        required = [n for n, f in cls.__dataclass_fields__.items() if f.default is MISSING and f.default_factory is MISSING]
        missing = [n for n in required if n not in data]
        if missing:
            raise FileFormatError(f"geometry lacks field(s) {', '.join(missing)}; the calibration file is damaged")
        try:
            geometry = cls(**{k: v for k, v in data.items()})
            _validate(geometry)
        except (TypeError, ValueError) as exc:
            raise FileFormatError(f"geometry has a bad value ({exc}); the calibration file is damaged") from None
        return geometry


def _validate(g: Geometry) -> None:
    if g.frame_width_px < 1 or g.frame_height_px < 1 or g.n_columns < 1 or g.n_rows < 1:
        raise ValueError("sizes must be positive")
    a0, a1 = g.aperture_rows
    if not (0 <= a0 < a1 <= g.n_rows):
        raise ValueError(f"aperture_rows {g.aperture_rows} outside 0..{g.n_rows}")
    for b0, b1 in g.background_rows:
        if not (0 <= b0 < b1 <= g.n_rows):
            raise ValueError(f"background_rows {(b0, b1)} outside 0..{g.n_rows}")
    if not all(math.isfinite(v) for v in (g.rotation_deg, g.centre_x_px, g.centre_y_px, g.first_column_s_px)):
        raise ValueError("non-finite position or angle")
    if g.curvature_grating:
        if len(g.curvature_grating) != 5 or not all(math.isfinite(v) for v in g.curvature_grating):
            raise ValueError("curvature_grating must be five finite numbers (k, theta_rad, s_x0_px, f_px, sign)")
        k, theta, s_x0, f, sign = g.curvature_grating
        if f <= 0 or sign not in (1.0, -1.0) or not abs(theta) < math.pi:
            raise ValueError(f"curvature_grating needs f_px > 0, sign +1 or -1 and |theta| < pi, got {g.curvature_grating}")


@dataclass(frozen=True)
class RectifiedBand:
    """The band resampled so the dispersion runs along x and every line is straight.

    Attributes
    ----------
    image : ndarray of float32, shape (n_rows, n_columns)
        Linear signal; pixels whose source lies outside the frame are 0.
    variance : ndarray of float32 or None
        Variance of each rectified pixel, resampled with the same weights.
    saturated : ndarray of bool
        True where a saturated frame pixel contributes.
    valid : ndarray of bool
        True where the resampling kernel lies wholly inside the frame.
    geometry : Geometry
    interpolation : str
        "cubic" or "linear": the kernel used (extraction needs it for the variance).
    area : ndarray of float32 or None
        Frame area per rectified pixel (:func:`jacobian`); multiply
        background-subtracted values by it before summing to conserve flux.
        None when it is 1 everywhere.
    """

    image: np.ndarray
    variance: np.ndarray | None
    saturated: np.ndarray
    valid: np.ndarray
    geometry: Geometry
    interpolation: str = "cubic"
    area: np.ndarray | None = None


@dataclass(frozen=True)
class BandShift:
    """How far a later frame's band lies from a stored geometry.

    Attributes
    ----------
    across_px : float
        Shift of the band across the dispersion (positive: towards larger t).
    along_px : float or None
        Shift along the dispersion, from cross-correlating with a reference
        spectrum; None when no reference was given.
    rotation_change_deg : float
        Change of the band's angle.
    moved : bool
        True when any shift exceeds its tolerance: the setup was bumped.
    measured : bool
        False when the band could not be measured in the new frame.
    message : str
        One line for people.
    """

    across_px: float
    along_px: float | None
    rotation_change_deg: float
    moved: bool
    measured: bool
    message: str


# --------------------------------------------------------------------------- helpers


def _as_image(image, *, name: str = "image") -> np.ndarray:
    array = np.asarray(image)
    if array.ndim != 2:
        raise InputError(f"`{name}` must be a 2-D single-channel frame (H, W), got shape {array.shape}; "
                         "stack or combine the colour channels first (benchspec.frames)")
    if array.shape[0] < 16 or array.shape[1] < 16:
        raise InputError(f"`{name}` is {array.shape[1]}x{array.shape[0]} px; frames must be at least 16x16")
    array = array.astype(np.float32, copy=False)
    if not np.isfinite(array).all():
        array = np.nan_to_num(array, nan=0.0, posinf=0.0, neginf=0.0)
    return array


def _robust_sigma(values) -> float:
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size < 2:
        return 0.0
    return float(1.4826 * np.median(np.abs(values - np.median(values))))


def _noise_from_differences(image: np.ndarray) -> float:
    """Pixel noise from neighbouring-pixel differences (robust to smooth structure)."""
    d = np.diff(image[:, ::1], axis=1)
    return _robust_sigma(d[:: max(1, d.shape[0] // 200), :: max(1, d.shape[1] // 400)]) / math.sqrt(2)


def _shear_projection(small: np.ndarray, slope: float, pad: int) -> np.ndarray:
    """Row profile along lines y = y0 + slope * (x - xc) of ``small``."""
    h, w = small.shape
    xc = (w - 1) / 2.0
    matrix = np.array([[1.0, 0.0, 0.0], [slope, 1.0, -slope * xc - pad]], dtype=np.float64)
    sheared = cv2.warpAffine(small, matrix, (w, h + 2 * pad), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                             borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    return sheared.sum(axis=1), sheared


def _band_image(image: np.ndarray, *, theta_deg: float, cx: float, cy: float, s0: float, n_s: int,
                t0: float, n_t: int, tilt=(0.0,), curvature=(0.0,), curvature_grating=(), border=float("nan")) -> np.ndarray:
    """The frame in band coordinates: out[v, u] = frame at (s = s0 + u, t = t0 + v); ``border`` outside.

    With zero tilt and curvature this is a pure rotation (one ``cv2.warpAffine``);
    otherwise the curved model (``curvature_grating`` as in :class:`Geometry`) is applied with ``cv2.remap``.
    """
    th = math.radians(theta_deg)
    c, sn = math.cos(th), math.sin(th)
    if not np.any(tilt) and not np.any(curvature) and not curvature_grating:
        matrix = np.array([[c, -sn, cx + s0 * c - t0 * sn], [sn, c, cy + s0 * sn + t0 * c]], dtype=np.float64)
        return cv2.warpAffine(image, matrix, (int(n_s), int(n_t)), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                              borderMode=cv2.BORDER_CONSTANT, borderValue=border)
    s = s0 + np.arange(int(n_s), dtype=np.float64)[None, :]
    t = t0 + np.arange(int(n_t), dtype=np.float64)[:, None]
    b = np.polynomial.polynomial.polyval(s, tilt)
    k = np.polynomial.polynomial.polyval(s, curvature)
    if curvature_grating:
        gk, g_theta, s_x0, f, sign = curvature_grating
        k = k + gk * np.tan(g_theta + np.arctan(sign * (s - s_x0) / f))
    s_curved = s + b * t + k * t * t
    map_x = (cx + s_curved * c - t * sn).astype(np.float32)
    map_y = (cy + s_curved * sn + t * c).astype(np.float32)
    return cv2.remap(image, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=border)


def _line_s_range(theta_deg: float, cx: float, cy: float, width: int, height: int, margin: float = 0.0):
    """Range of s for which the centre line stays inside the frame (minus a margin)."""
    th = math.radians(theta_deg)
    c, sn = math.cos(th), math.sin(th)
    lo, hi = -1e9, 1e9
    for origin, direction, size in ((cx, c, width), (cy, sn, height)):
        if abs(direction) < 1e-9:
            if not (margin <= origin <= size - 1 - margin):
                return 0.0, -1.0
            continue
        a = (margin - origin) / direction
        b = (size - 1 - margin - origin) / direction
        lo, hi = max(lo, min(a, b)), min(hi, max(a, b))
    return lo, hi


def _outer_edges(profile: np.ndarray, level: float, lo: int, hi: int):
    """Outermost sub-pixel crossings of ``level`` within profile[lo:hi] (NaN-free part).

    Returns (top, bottom) or (None, None) when the profile never reaches the
    level or is already above it at the ends of the window.
    """
    p = profile[lo:hi]
    above = np.flatnonzero(p >= level)
    if above.size == 0:
        return None, None
    i, j = above[0], above[-1]
    if i == 0 or j == p.size - 1:
        return None, None
    top = (i - 1) + (level - p[i - 1]) / (p[i] - p[i - 1])
    bottom = j + (p[j] - level) / (p[j] - p[j + 1])
    return lo + top, lo + bottom


def _robust_line_fit(x, y, w, *, degree: int, clip: float = 3.0, floor: float = 0.05, iterations: int = 5,
                     scale_covariance: bool = True):
    """Weighted polynomial fit with iterative sigma clipping.

    The covariance is scaled by the reduced chi-square unless ``scale_covariance`` is False
    (the weights are then taken as 1 / the points' true variances).
    Returns (coefficients lowest-first, covariance, keep mask, residual rms).
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    w = np.asarray(w, float)
    keep = np.isfinite(x) & np.isfinite(y) & (w > 0)
    coef = np.zeros(degree + 1)
    cov = np.full((degree + 1, degree + 1), np.inf)
    for _ in range(iterations):
        if keep.sum() <= degree:
            break
        A = np.vander(x[keep], degree + 1, increasing=True)
        sw = np.sqrt(w[keep])
        coef, *_ = np.linalg.lstsq(A * sw[:, None], y[keep] * sw, rcond=None)
        resid = y - np.vander(x, degree + 1, increasing=True) @ coef
        scale = max(_robust_sigma(resid[keep] * np.sqrt(w[keep] / np.mean(w[keep]))), floor)
        new_keep = keep & (np.abs(resid) * np.sqrt(w / np.mean(w[keep])) < clip * scale)
        if new_keep.sum() == keep.sum():
            keep = new_keep
            break
        keep = new_keep
    if keep.sum() > degree:
        A = np.vander(x[keep], degree + 1, increasing=True)
        sw = np.sqrt(w[keep])
        coef, *_ = np.linalg.lstsq(A * sw[:, None], y[keep] * sw, rcond=None)
        resid = y[keep] - A @ coef
        dof = max(1, keep.sum() - degree - 1)
        chi2 = float(np.sum(w[keep] * resid**2) / dof)
        try:
            cov = np.linalg.inv((A * w[keep][:, None]).T @ A) * (chi2 if scale_covariance else 1.0)
        except np.linalg.LinAlgError:
            pass
        rms = float(np.sqrt(np.mean(resid**2)))
    else:
        rms = float("nan")
    return coef, cov, keep, rms


def _subpixel_peak(left, centre, right):
    """Offset of a Gaussian through three samples (log-parabola); falls back to a parabola."""
    left = np.asarray(left, float)
    centre = np.asarray(centre, float)
    right = np.asarray(right, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        positive = (left > 0) & (centre > 0) & (right > 0)
        ll, lc, lr = np.log(np.where(positive, left, 1)), np.log(np.where(positive, centre, 1)), np.log(np.where(positive, right, 1))
        denom_g = ll - 2 * lc + lr
        off_g = 0.5 * (ll - lr) / denom_g
        denom_p = left - 2 * centre + right
        off_p = 0.5 * (left - right) / denom_p
    offset = np.where(positive & (denom_g < 0), off_g, off_p)
    offset = np.where(np.isfinite(offset), offset, 0.0)
    return np.clip(offset, -0.75, 0.75)


# --------------------------------------------------------------------------- measuring


def measure_geometry(
    image,
    *,
    saturated=None,
    max_rotation_deg: float = MAX_ROTATION_DEG,
    background_gap_px: int = 3,
    background_width_px: int | None = None,
    min_line_snr: float = 15.0,
    iterations: int = 1,
) -> Geometry:
    """Find the band in a frame and measure its rotation, curvature and aperture.

    Parameters
    ----------
    image : ndarray, shape (H, W)
        A linear single-channel frame, e.g. ``StackedFrame.image``; a lamp
        with emission lines gives the curvature, a continuum only the
        rotation. The input is not modified.
    saturated : ndarray of bool, shape (H, W), optional
        Saturated pixels; they are not used to trace lines.
    max_rotation_deg : float, keyword-only
        Search range of the band's angle (default 16).
    background_gap_px : int, keyword-only
        Rows left empty between the aperture and the background rows.
    background_width_px : int or None, keyword-only
        Rows of background on each side; default a quarter of the aperture
        height, between 4 and 30.
    min_line_snr : float, keyword-only
        Lines fainter than this (peak over noise in the central rows) are not traced.
    iterations : int, keyword-only
        Refinement passes (edges, then lines, on the band resampled with the
        current model).

    Returns
    -------
    Geometry

    Raises
    ------
    GeometryError
        No band, a band that touches the frame's top or bottom edge, or a
        band that runs more than ``max_rotation_deg`` from horizontal.
    InputError
        A bad parameter or an image that is not 2-D.

    Notes
    -----
    Rotation: the coarse angle maximises the sum of squares of the band's
    projection along sheared lines (a projection-profile search, common
    practice); it is refined by a robust straight-line fit to the mid-points
    of the band's outer half-maximum edges in chunks along the band. A band
    shorter than about twice its height gets a second start from the angle
    at which its column profile (across the slit images) is sharpest, taken
    when the first start fails or traces no line.
    Curvature: each isolated line is tracked outwards from the centre rows,
    bin by bin, with a three-point Gaussian peak interpolation, and fitted
    with ``x0 + b t + c t**2``; ``b(s)`` and ``c(s)`` are then fitted across
    lines with sigma clipping. Both steps are repeated on the band resampled
    with the current model, so that edges and lines are measured where they
    are straight.
    """
    frame = _as_image(image)
    if not 0 < max_rotation_deg <= 30:
        raise InputError(f"`max_rotation_deg` must be in (0, 30], was {max_rotation_deg}")
    if iterations < 1:
        raise InputError(f"`iterations` must be at least 1, was {iterations}")
    if saturated is not None:
        saturated = np.asarray(saturated, dtype=bool)
        if saturated.shape != frame.shape:
            raise InputError(f"`saturated` has shape {saturated.shape} but the image has {frame.shape}")
    coarse = _coarse_band(frame, max_rotation_deg=max_rotation_deg)
    options = dict(saturated=saturated, max_rotation_deg=max_rotation_deg, background_gap_px=background_gap_px,
                   background_width_px=background_width_px, min_line_snr=min_line_snr, iterations=iterations)
    try:
        first, failure = _measure_from(frame, coarse, **options), None
    except GeometryError as exc:
        first, failure = None, exc
    alternative = coarse.get("alternative_theta_deg")
    if alternative is not None and (first is None or not first.curvature_known):
        # A short, tall band: the row profile's angle led nowhere (no edges, no traceable lines);
        # start again from the angle of the slit images, and keep that if it traces the lines.
        try:
            second = _measure_from(frame, {**coarse, "theta_deg": alternative}, **options)
        except GeometryError:
            second = None
        if second is not None and (first is None or second.curvature_known):
            return second
    if first is None:
        raise failure
    return first


def _measure_from(frame, coarse, *, saturated, max_rotation_deg, background_gap_px, background_width_px,
                  min_line_snr, iterations) -> Geometry:
    """measure_geometry from a coarse start (angle, centre, half-height)."""
    height, width = frame.shape
    notes: list[str] = []
    theta, cx, cy, half_height = coarse["theta_deg"], coarse["cx"], coarse["cy"], coarse["half_height"]
    tilt = np.zeros(1)
    curv = np.zeros(1)
    curvature = None
    sat_float = saturated.astype(np.float32) if saturated is not None else None

    def region():
        margin = int(math.ceil(max(12.0, 0.6 * half_height))) + 30
        s_lo, s_hi = _line_s_range(theta, cx, cy, width, height)
        if s_hi - s_lo < 16:
            raise GeometryError("the band is too short inside the frame; point the camera at the spectrum")
        s0 = math.floor(s_lo)
        t0 = -int(math.ceil(half_height + margin))
        return s0, int(math.floor(s_hi) - s0 + 1), t0, int(2 * -t0 + 1), (s_lo, s_hi)

    with np.errstate(all="ignore"), _quiet_nan_warnings():
        for iteration in range(iterations + 1):
            # Straight edges first: repeat the pure-rotation trace while it still turns the axis
            # by more than 0.3 deg (a tall, short band can leave the coarse search a few degrees off).
            for attempt in range(4 if iteration == 0 else 1):
                s0, n_s, t0, n_t, _ = region()
                band = _band_image(frame, theta_deg=theta, cx=cx, cy=cy, s0=s0, n_s=n_s, t0=t0, n_t=n_t,
                                   tilt=tilt, curvature=curv)
                trace = _measure_trace(band, s0=s0, t0=t0, half_height=half_height)
                s_ref = trace["lit_middle_s"] if iteration == 0 else 0.0
                previous_theta = theta
                theta, cx, cy, half_height = _updated_axis(theta, cx, cy, trace, s_ref=s_ref)
                if abs(theta - previous_theta) < 0.3:
                    break
            # Turning the axis by d turns the sampled slit images by -d; keep lines straight by
            # adding d (radians) to the tilt b(s) the model already holds.
            if np.any(tilt) or np.any(curv):
                tilt = np.polynomial.polynomial.polyadd(tilt, [_TILT_SIGN * math.radians(theta - previous_theta)])
            if abs(theta) > 45:
                break  # runaway: reported below
            if iteration == iterations:
                break
            # Curvature residual on the band resampled with the updated axis and current model.
            s0, n_s, t0, n_t, _ = region()
            band = _band_image(frame, theta_deg=theta, cx=cx, cy=cy, s0=s0, n_s=n_s, t0=t0, n_t=n_t,
                               tilt=tilt, curvature=curv)
            sat_band = None
            if sat_float is not None and saturated.any():
                sat_band = np.nan_to_num(_band_image(sat_float, theta_deg=theta, cx=cx, cy=cy, s0=s0, n_s=n_s, t0=t0,
                                                     n_t=n_t, tilt=tilt, curvature=curv)) > 0
            residual = _measure_curvature(band, sat_band, centre_index=-t0, half_height=half_height, s0=s0,
                                          min_snr=min_line_snr, short_band=trace["n_chunks"] < 3)
            if not residual["known"]:
                if curvature is None:
                    curvature = residual
                break
            tilt = np.polynomial.polynomial.polyadd(tilt, residual["tilt"])
            curv = np.polynomial.polynomial.polyadd(curv, residual["curvature"])
            curvature = residual

        if trace["n_chunks"] < 3 and curvature is not None and curvature["known"] and abs(tilt[0]) > 0.005:
            # Too short a band for its edges: the slit images are perpendicular to the dispersion,
            # so their tilt is the remaining rotation. The centre line crosses the band's true centre
            # at s = 0 (where its centre was measured) but is turned by the rotation error e, so at a
            # line s_i it runs e s_i off the apex of that line's parabola, which adds 2 c e s_i to its
            # tilt: b(s_i) = -e (1 + 2 c(s_i) s_i). Solved per traced line and averaged; b(0) alone
            # mistook a 7.1 deg band for 5.8 deg where the lines sat 20-40 px off the centre (c 0.0024).
            line_s = np.asarray(curvature.get("line_s", [0.0]), dtype=float)
            b_at = np.polynomial.polynomial.polyval(line_s, tilt)
            lever = 1.0 + 2.0 * np.polynomial.polynomial.polyval(line_s, curv) * line_s
            usable = lever > 0.5
            slope = float(np.mean(b_at[usable] / lever[usable])) if usable.any() else float(tilt[0])
            d_rad = -math.atan(slope)
            theta += math.degrees(d_rad)
            tilt = np.polynomial.polynomial.polyadd(tilt, [_TILT_SIGN * d_rad])
            notes.append("rotation taken from the tilt of the slit images (the band is too short for its edges)")
        if abs(theta) > max_rotation_deg + 1:
            raise GeometryError(
                f"the band is rotated by {theta:.1f} deg, beyond the +-{max_rotation_deg:g} deg benchspec corrects; "
                "level the camera so the spectrum runs across the frame"
            )
        # Final band image with the final model: spatial profile, aperture, edge checks.
        s0, n_s, t0, n_t, (s_lo, s_hi) = region()
        band = _band_image(frame, theta_deg=theta, cx=cx, cy=cy, s0=s0, n_s=n_s, t0=t0, n_t=n_t,
                           tilt=tilt, curvature=curv)
        profile_info = _spatial_profile(band, centre_index=-t0, half_height=half_height)
        _check_edges(band, profile_info)
    if not curvature["known"]:
        notes.append(curvature["reason"])
        tilt = np.zeros(1)
        curv = np.zeros(1)

    # Rectified layout: aperture, gap, background on each side.
    a_lo, a_hi = profile_info["aperture"]  # t offsets (inclusive) relative to the centre line
    bg_width = background_width_px
    if bg_width is None:
        bg_width = int(np.clip(round(0.25 * (a_hi - a_lo + 1)), 4, 30))
    if bg_width < 1 or background_gap_px < 0:
        raise InputError(f"`background_width_px` must be >= 1 and `background_gap_px` >= 0, "
                         f"were {background_width_px} and {background_gap_px}")
    available = profile_info["valid_t_range"]
    bg_top = (max(a_lo - background_gap_px - bg_width, available[0]), a_lo - background_gap_px - 1)
    bg_bottom = (a_hi + background_gap_px + 1, min(a_hi + background_gap_px + bg_width, available[1]))
    rows_top = max(0, bg_top[1] - bg_top[0] + 1)
    rows_bottom = max(0, bg_bottom[1] - bg_bottom[0] + 1)
    if rows_top < 2 and rows_bottom < 2:
        raise GeometryError(
            "the band leaves no rows for the background on either side; move the camera so the band has "
            "some dark rows above and below it"
        )
    if rows_top < 2 or rows_bottom < 2:
        notes.append("background measured on one side of the band only (the other side leaves the frame)")
    t_first = bg_top[0] if rows_top >= 2 else a_lo
    t_last = bg_bottom[1] if rows_bottom >= 2 else a_hi
    centre_row = -t_first
    n_rows = t_last - t_first + 1
    background_rows = []
    if rows_top >= 2:
        background_rows.append((bg_top[0] - t_first, bg_top[1] - t_first + 1))
    if rows_bottom >= 2:
        background_rows.append((bg_bottom[0] - t_first, bg_bottom[1] - t_first + 1))
    aperture_rows = (a_lo - t_first, a_hi - t_first + 1)

    # Columns: every s at which all aperture rows (curved) map inside the frame.
    s_grid = np.arange(math.floor(s_lo) - 2, math.ceil(s_hi) + 3, dtype=np.float64)
    inside = np.ones(s_grid.size, dtype=bool)
    th = math.radians(theta)
    cth, sth = math.cos(th), math.sin(th)
    for t in (a_lo, 0, a_hi):
        sc = s_grid + np.polynomial.polynomial.polyval(s_grid, tilt) * t + np.polynomial.polynomial.polyval(s_grid, curv) * t * t
        x = cx + sc * cth - t * sth
        y = cy + sc * sth + t * cth
        # 1-2 px margin: the cubic resampling kernel reads one pixel before and two after
        inside &= (x >= 1) & (x <= width - 3) & (y >= 1) & (y <= height - 3)
    if inside.sum() < 8:
        raise GeometryError("the band is too short inside the frame (fewer than 8 columns); point the camera at the spectrum")
    idx = np.flatnonzero(inside)
    first_s = float(s_grid[idx[0]])
    n_columns = int(idx[-1] - idx[0] + 1)

    spatial = profile_info["rel"][a_lo - t0: a_hi - t0 + 1].astype(np.float64)
    spatial = np.clip(np.nan_to_num(spatial), 0, None)
    spatial = spatial / spatial.sum() if spatial.sum() > 0 else np.full(spatial.size, 1.0 / spatial.size)

    return Geometry(
        frame_width_px=int(width),
        frame_height_px=int(height),
        rotation_deg=float(theta),
        rotation_uncertainty_deg=float(trace["theta_sigma_deg"]),
        centre_x_px=float(cx),
        centre_y_px=float(cy),
        first_column_s_px=first_s,
        n_columns=n_columns,
        n_rows=int(n_rows),
        centre_row=int(centre_row),
        aperture_rows=aperture_rows,
        background_rows=tuple(background_rows),
        band_height_px=float(profile_info["fwhm"]),
        tilt_coefficients=tuple(float(v) for v in tilt),
        curvature_coefficients=tuple(float(v) for v in curv),
        curvature_known=bool(curvature["known"]),
        curvature_rms_px=curvature["rms"],
        n_lines_traced=int(curvature["n_lines"]),
        spatial_profile=tuple(float(v) for v in spatial),
        notes=tuple(notes),
    )


class _quiet_nan_warnings(warnings.catch_warnings):
    """Silence numpy's "mean of empty slice" warnings: all-NaN columns are expected outside the frame."""

    def __enter__(self):
        result = super().__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)
        return result


def _updated_axis(theta, cx, cy, trace, *, s_ref: float):
    """New angle and centre from a trace fit t_mid(s) = a + m s measured in the current band coordinates.

    A slope from fewer than 3 chunks is not trusted (only the centre moves), and one step turns
    the axis by at most 6 degrees, so a poor first measurement cannot run away.
    """
    a, m = trace["intercept"], trace["slope"]
    if trace["n_chunks"] < 3:
        m = 0.0
    m = float(np.clip(m, -math.tan(math.radians(6.0)), math.tan(math.radians(6.0))))
    th = math.radians(theta)
    t_ref = a + m * s_ref
    new_cx = cx + s_ref * math.cos(th) - t_ref * math.sin(th)
    new_cy = cy + s_ref * math.sin(th) + t_ref * math.cos(th)
    return theta + math.degrees(math.atan(m)), new_cx, new_cy, trace["half_height"]


def _best_projection_angle(score, max_rotation_deg: float) -> float:
    """Angle (deg) that maximises ``score``: 2 deg steps, then 0.5 deg, then a parabola's vertex."""
    angles = np.arange(-max_rotation_deg, max_rotation_deg + 0.01, 2.0)
    scores = np.array([score(a) for a in angles])
    best = int(np.argmax(scores))
    fine = np.arange(angles[best] - 1.5, angles[best] + 1.51, 0.5)
    fine_scores = np.array([score(a) for a in fine])
    j = int(np.argmax(fine_scores))
    angle = float(fine[j])
    if 0 < j < fine.size - 1:
        a, b, c = fine_scores[j - 1: j + 2]
        denom = a - 2 * b + c
        if denom < 0:
            angle += 0.5 * 0.5 * (a - c) / denom
    return angle


def _coarse_rows_and_columns(profile: np.ndarray, sheared: np.ndarray):
    """(top, bottom, lit columns) of the band in a sheared copy: the rows above a quarter of the
    row profile's peak around it, and the columns of those rows above a fifth of their brightest.
    (None, None, empty) when the frame is uniform."""
    smooth = np.convolve(profile, np.ones(3) / 3, mode="same")
    r0 = int(np.argmax(smooth))
    peak = smooth[r0]
    if peak <= 0:
        return None, None, np.array([], dtype=int)
    level = 0.25 * peak
    top = r0
    while top > 0 and smooth[top - 1] > level:
        top -= 1
    bottom = r0
    while bottom < smooth.size - 1 and smooth[bottom + 1] > level:
        bottom += 1
    column_profile = np.convolve(sheared[top: bottom + 1].mean(axis=0), np.ones(3) / 3, mode="same")
    lit = np.flatnonzero(column_profile > 0.2 * float(column_profile.max()))
    return top, bottom, lit


def _coarse_band(frame: np.ndarray, *, max_rotation_deg: float) -> dict:
    """Rough angle, centre and half-height from a downsampled copy; raises GeometryError when no band."""
    height, width = frame.shape
    k = max(1, int(round(max(height, width) / 320)))
    small = cv2.resize(frame, (max(8, width // k), max(8, height // k)), interpolation=cv2.INTER_AREA) if k > 1 else frame
    background = float(np.median(small))
    noise = _noise_from_differences(small)
    work = np.clip(small - background, 0, None).astype(np.float32)
    hs, ws = work.shape
    pad = int(math.ceil(ws * math.tan(math.radians(max_rotation_deg)) / 2)) + 2

    def score(angle):
        profile, _ = _shear_projection(work, math.tan(math.radians(angle)), pad)
        return float(np.dot(profile, profile))

    angle = _best_projection_angle(score, max_rotation_deg)
    slope = math.tan(math.radians(angle))
    profile, sheared = _shear_projection(work, slope, pad)
    # Row profile (mean over columns) -> band rows; column profile -> brightest region.
    top, bottom, lit = _coarse_rows_and_columns(profile, sheared)
    alternative = None
    if top is not None and lit.size and (lit[-1] - lit[0] + 1) < 2 * (bottom - top + 1):
        # A band shorter than about twice its height (coarse dispersion behind a tall slit): the
        # row profile hardly changes with the angle (its edges are only as long as the band), but
        # the slit images are long, so the column profile across them (projected along the slit
        # direction, perpendicular to the band) is sharpest at the band's angle. Sharpness: the
        # sum of squares of its (lightly smoothed) derivative, which the band's overall shape
        # hardly feeds. Offered as a second start; measure_geometry takes it when the first fails.
        from scipy.ndimage import gaussian_filter1d

        work_t = np.ascontiguousarray(work.T)
        pad_t = int(math.ceil(hs * math.tan(math.radians(max_rotation_deg)) / 2)) + 2

        def column_score(angle):
            columns, _ = _shear_projection(work_t, -math.tan(math.radians(angle)), pad_t)
            slope_profile = np.diff(gaussian_filter1d(columns.astype(np.float64), 1.0))
            return float(np.dot(slope_profile, slope_profile))

        column_angle = _best_projection_angle(column_score, max_rotation_deg)
        if abs(column_angle - angle) > 1.0:
            alternative = column_angle
    if top is None:
        raise GeometryError(
            "no spectral band found: the frame is uniform; check the lamp is on and the slit is in view"
        )
    rows = sheared[top: bottom + 1]
    column_profile = rows.mean(axis=0)
    column_profile = np.convolve(column_profile, np.ones(3) / 3, mode="same")
    brightest = float(column_profile.max())
    profile_noise = noise / math.sqrt(max(1, rows.shape[0]) * 3)
    contrast = brightest / background if background > 0 else float("inf")
    snr = brightest / profile_noise if profile_noise > 0 else float("inf")
    if background > 0 and contrast < _MIN_CONTRAST and background > 3 * noise:
        raise GeometryError(
            f"no spectral band found: brightest region is {100 * contrast:.0f}% above background "
            f"(need {100 * _MIN_CONTRAST:.0f}%); check the lamp is on and the slit is in view"
        )
    if snr < _MIN_SNR:
        raise GeometryError(
            f"no spectral band found: brightest region is {snr:.1f} times the noise (need {_MIN_SNR:g}); "
            "check the lamp is on and the slit is in view, or stack more frames"
        )
    # Back to full-resolution frame coordinates: the centre of the band's rows at the frame's middle column.
    xs = (ws - 1) / 2.0
    ys = (top + bottom) / 2.0 - pad
    cx = (xs + 0.5) * k - 0.5
    cy = (ys + 0.5) * k - 0.5
    half_height = max(2.0, (bottom - top + 1) * k / 2.0 * math.cos(math.radians(angle)))
    # If the band is short, put the centre at its lit part so the refinement sees it.
    if lit.size:
        mid = (lit[0] + lit[-1]) / 2.0
        shift = (mid - xs) * k
        cx += shift
        cy += shift * slope
    return {"theta_deg": math.degrees(math.atan(slope)), "cx": cx, "cy": cy, "half_height": half_height,
            "background": background, "noise": noise, "alternative_theta_deg": alternative}


def _measure_trace(band: np.ndarray, *, s0: float, t0: float, half_height: float) -> dict:
    """Fit the centre line t_mid(s) = a + m s from the band's outer half-maximum edges in chunks.

    ``band`` is the frame in band coordinates (rows t0.., columns s0..), NaN outside the frame.
    """
    n_t, n_s = band.shape
    centre_index = -t0
    core = band[max(0, int(centre_index - half_height)): int(centre_index + half_height) + 1]
    column_mean = np.nanmean(core, axis=0)
    # Chunks of about 24-30 px cover the lit part of the band (plus a margin); narrower chunks would
    # cut the slit images of a misaligned band.
    finite_cols = np.isfinite(column_mean)
    if finite_cols.any():
        base = np.nanpercentile(column_mean, 10)
        peak = np.nanmax(column_mean)
        lit_cols = np.flatnonzero(finite_cols & (column_mean > base + 0.05 * (peak - base)))
    else:
        lit_cols = np.array([], dtype=int)
    if lit_cols.size >= 8:
        span_lo, span_hi = lit_cols[0], lit_cols[-1] + 1
        pad = max(8, (span_hi - span_lo) // 10)
        span_lo, span_hi = max(0, span_lo - pad), min(n_s, span_hi + pad)
    else:
        span_lo, span_hi = 0, n_s
    chunk_px = max(24, n_s // 64)
    # A band shorter than a few times its height (coarse dispersion, tall slit) has dense, curved
    # slit images with no dark column between them: chunks of a third of the lit span each average
    # over many lines, so a line cut at a chunk's side does not truncate the chunk's edges.
    lit_span = (lit_cols[-1] - lit_cols[0] + 1) if lit_cols.size >= 8 else n_s
    if lit_span < 1.0 * (2 * half_height):
        chunk_px = max(chunk_px, (span_hi - span_lo) // 3)
    n_chunks = max(2, (span_hi - span_lo) // chunk_px)
    edges = np.linspace(span_lo, span_hi, n_chunks + 1).astype(int)
    # Move chunk boundaries to the darkest column nearby, so no line's stroke is cut in two.
    column_signal = np.nan_to_num(column_mean, nan=np.inf)
    reach = max(1, (edges[1] - edges[0]) // 3)
    for k in range(1, n_chunks):
        lo, hi = max(edges[k - 1] + 2, edges[k] - reach), min(edges[k + 1] - 2, edges[k] + reach)
        if hi > lo:
            edges[k] = lo + int(np.argmin(column_signal[lo:hi]))
    outer = max(3, int(0.2 * (n_t / 2 - half_height)))
    window = (max(0, int(centre_index - 1.6 * half_height - 4)), min(n_t, int(centre_index + 1.6 * half_height + 5)))
    # All chunk profiles at once: sums and counts of finite values per chunk (reduceat over columns).
    finite_map = np.isfinite(band)
    sub = slice(edges[0], edges[-1])
    sums = np.add.reduceat(np.where(finite_map[:, sub], band[:, sub], 0.0), edges[:-1] - edges[0], axis=1).T
    counts = np.add.reduceat(finite_map[:, sub], edges[:-1] - edges[0], axis=1).T  # (n_chunks, n_t)
    widths_px = np.diff(edges)[:, None]
    rows_finite = counts >= 0.5 * widths_px
    with np.errstate(invalid="ignore", divide="ignore"):
        profiles = np.where(rows_finite, sums / np.maximum(counts, 1), np.nan)
    ends = np.concatenate([profiles[:, :outer], profiles[:, -outer:]], axis=1)
    baseline = np.nanmedian(ends, axis=1)
    noise = 1.4826 * np.nanmedian(np.abs(ends - baseline[:, None]), axis=1)
    noise = np.maximum(np.nan_to_num(noise), 1e-6 * np.maximum(1.0, np.abs(np.nan_to_num(baseline))))
    filled = np.where(np.isfinite(profiles), profiles, baseline[:, None])
    smooth = filled.copy()
    smooth[:, 1:-1] = (filled[:, :-2] + filled[:, 1:-1] + filled[:, 2:]) / 3.0
    zone = slice(max(0, int(centre_index - half_height)), int(centre_index + half_height) + 1)
    signal = smooth[:, zone].max(axis=1) - baseline
    chunk_signal = np.nan_to_num(signal)
    enough_rows = rows_finite[:, window[0]:window[1]].sum(axis=1) >= 8
    measured = enough_rows & np.isfinite(baseline) & (chunk_signal >= 8 * noise)
    level = baseline + 0.5 * signal
    # first and last finite rows of each chunk, limited to the window
    has_rows = rows_finite.any(axis=1)
    first_finite = np.argmax(rows_finite, axis=1)
    last_finite = n_t - 1 - np.argmax(rows_finite[:, ::-1], axis=1)
    lo = np.maximum(window[0], first_finite + 1)
    hi = np.minimum(window[1], last_finite)
    idx = np.arange(n_chunks)
    lo_c = np.clip(lo, 0, n_t - 1)
    hi_c = np.clip(hi - 1, 0, n_t - 1)
    cut_top = measured & has_rows & (lo > window[0]) & (smooth[idx, lo_c] >= level)
    cut_bottom = measured & has_rows & (hi < window[1]) & (smooth[idx, hi_c] >= level) & ~cut_top
    cut = {"top": int(cut_top.sum()), "bottom": int(cut_bottom.sum())}
    measured_chunks = int(measured.sum())
    rows = np.arange(n_t)[None, :]
    in_window = (rows >= lo[:, None]) & (rows < hi[:, None])
    above = (smooth >= level[:, None]) & in_window
    any_above = above.any(axis=1)
    i_top = np.argmax(above, axis=1)
    i_bottom = n_t - 1 - np.argmax(above[:, ::-1], axis=1)
    inner = any_above & (i_top > lo) & (i_bottom < hi - 1)
    ok = measured & ~cut_top & ~cut_bottom & inner
    i_top_c = np.clip(i_top, 1, n_t - 1)
    i_bot_c = np.clip(i_bottom, 0, n_t - 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        top = (i_top_c - 1) + (level - smooth[idx, i_top_c - 1]) / (smooth[idx, i_top_c] - smooth[idx, i_top_c - 1])
        bottom = i_bot_c + (smooth[idx, i_bot_c] - level) / (smooth[idx, i_bot_c] - smooth[idx, i_bot_c + 1])
    ok &= np.isfinite(top) & np.isfinite(bottom)
    # A chunk at either end of the lit band that is much fainter than the rest sees only part of
    # the band's (tilted) end, not its edges: drop it. (A line spectrum's end chunks hold whole
    # slit images and stay.)
    lit_index = np.flatnonzero(chunk_signal > 0.05 * max(chunk_signal.max(), 1e-12))
    if lit_index.size >= 4:
        typical = float(np.median(chunk_signal[lit_index]))
        for end in (lit_index[:2], lit_index[::-1][:2]):
            for k in end:
                if chunk_signal[k] < 0.5 * typical:
                    ok[k] = False
                else:
                    break
    mids = list(0.5 * (top[ok] + bottom[ok]) + t0)
    widths = list((bottom - top)[ok])
    snr = np.minimum(chunk_signal / noise, 50.0)  # capped: a few bright lines must not outvote the rest of the band
    weights = list((snr**2)[ok])
    centres_s = list((s0 + 0.5 * (edges[:-1] + edges[1:] - 1))[ok])
    signals = list(chunk_signal[ok])
    for side in ("top", "bottom"):
        if measured_chunks and cut[side] >= max(2, 0.3 * measured_chunks):
            raise GeometryError(
                f"the spectral band touches the {side} edge of the frame; move or turn the camera so the whole "
                "band, with a few dark rows on each side, is inside the frame"
            )
    if len(mids) < 2:
        raise GeometryError(
            "no spectral band found: the band's edges could not be measured in any part of the frame; "
            "check the lamp is on and the slit is in view"
        )
    mids = np.asarray(mids)
    centres_s = np.asarray(centres_s)
    w = np.asarray(weights)
    signals = np.asarray(signals)
    degree = 1 if len(mids) >= 3 else 0
    # Chunks far weaker than the band (stray light, frame corners) and chunks far off a
    # Theil-Sen line (robust to a few wild points of high weight) are dropped first.
    usable = signals >= 0.1 * np.median(signals)  # much fainter chunks: the band's fading ends, stray light
    if usable.sum() < 2:
        usable = np.ones(signals.size, dtype=bool)
    if degree == 1 and usable.sum() >= 3:
        from scipy.stats import theilslopes

        slope0, intercept0, _, _ = theilslopes(mids[usable], centres_s[usable])
        resid = mids - (intercept0 + slope0 * centres_s)
        spread = max(_robust_sigma(resid[usable]), 0.1)
        close = usable & (np.abs(resid) < 5 * spread)
        if close.sum() >= 3:
            usable = close
    w = np.where(usable, w, 0.0)
    coef, cov, keep, _ = _robust_line_fit(centres_s, mids, w, degree=degree, floor=0.05)
    if degree == 0:
        coef = np.array([coef[0], 0.0])
        cov = np.array([[cov[0, 0], 0], [0, (1.0 / max(1.0, np.ptp(centres_s) + 24)) ** 2]])
    slope = float(coef[1])
    theta_sigma = math.degrees(math.sqrt(max(cov[1, 1], 0.0))) if np.isfinite(cov[1, 1]) else float("nan")
    lit_chunks = chunk_signal > 0.05 * chunk_signal.max()
    lit_s = s0 + 0.5 * (edges[:-1] + edges[1:])[lit_chunks]
    lit_middle = float(0.5 * (lit_s.min() + lit_s.max())) if lit_s.size else 0.0
    half = 0.5 * float(np.median(np.asarray(widths)[keep] if keep.any() else widths))
    return {
        "intercept": float(coef[0]),
        "slope": slope,
        "theta_sigma_deg": theta_sigma,
        "half_height": max(1.5, half),
        "lit_middle_s": lit_middle,
        "n_chunks": int(keep.sum()),
        "mids": mids[keep],
        "widths": np.asarray(widths)[keep],
        "mid_s": centres_s[keep],
        "s_span": float(np.ptp(centres_s[keep])) if keep.sum() > 1 else 0.0,
    }


def _spatial_profile(band: np.ndarray, *, centre_index: int, half_height: float) -> dict:
    """The band's spatial profile, its FWHM and the aperture (t offsets, inclusive)."""
    n_t, n_s = band.shape
    core = band[max(0, int(centre_index - half_height / 2)): int(centre_index + half_height / 2) + 1]
    column_signal = np.nanmean(core, axis=0)
    finite = np.isfinite(column_signal)
    if not finite.any():
        raise GeometryError("no spectral band found inside the frame; check the slit is in view")
    median = np.nanpercentile(column_signal, 50)
    threshold = median + 0.3 * (np.nanmax(column_signal) - median)
    lit = finite & (column_signal >= threshold)
    complete = np.isfinite(band).all(axis=0) & lit
    use = complete if complete.sum() >= 3 else lit
    profile = np.nanmean(band[:, use], axis=1)
    lit_rows = np.isfinite(band[:, lit]).any(axis=1)
    valid_rows = np.flatnonzero(lit_rows)
    outer = max(3, int(0.15 * n_t))
    ends = np.concatenate([profile[:outer], profile[-outer:]])
    ends = ends[np.isfinite(ends)]
    baseline = float(np.median(ends)) if ends.size else float(np.nanmin(profile))
    rel = profile - baseline
    smooth = np.convolve(np.nan_to_num(rel), np.ones(3) / 3, mode="same")
    zone = slice(int(max(0, centre_index - half_height - 2)), int(min(n_t, centre_index + half_height + 3)))
    peak_i = int(np.argmax(smooth[zone])) + zone.start
    peak = float(smooth[peak_i])
    top, bottom = _outer_edges(smooth, 0.5 * peak, 0, n_t)
    fwhm = (bottom - top) if top is not None else 2 * half_height
    noise = max(_robust_sigma(ends), 1e-9)
    level = max(_APERTURE_LEVEL * peak, 3 * noise)
    above = np.flatnonzero(smooth > level)
    # the contiguous run of rows above the level that holds the peak
    runs = np.split(above, np.flatnonzero(np.diff(above) > 1) + 1)
    run = next((r for r in runs if r.size and r[0] <= peak_i <= r[-1]), np.array([peak_i]))
    pad = 2
    a_lo = max(int(run[0]) - pad, 0) - centre_index
    a_hi = min(int(run[-1]) + pad, n_t - 1) - centre_index
    valid_t = (int(valid_rows.min()) - centre_index, int(valid_rows.max()) - centre_index) if valid_rows.size else (a_lo, a_hi)
    return {"profile": profile, "aperture": (int(a_lo), int(a_hi)), "fwhm": float(fwhm), "peak": peak,
            "baseline": baseline, "rel": rel, "lit": lit, "peak_index": peak_i, "valid_t_range": valid_t,
            "centre_index": centre_index}


def _check_edges(band, profile_info) -> None:
    """GeometryError when the band's lit part is cut by the frame's top or bottom edge."""
    lit = profile_info["lit"]
    rel_peak = profile_info["peak"]
    baseline = profile_info["baseline"]
    columns = np.flatnonzero(lit)
    if columns.size == 0:
        return
    sub = band[:, columns]
    finite = np.isfinite(sub)
    n = sub.shape[0]
    # For each lit column, the first and last rows inside the frame, and the signal just inside them.
    first = np.argmax(finite, axis=0)
    last = n - 1 - np.argmax(finite[::-1], axis=0)
    idx = np.arange(columns.size)
    top_values = sub[np.clip(first + 1, 0, n - 1), idx] - baseline
    bottom_values = sub[np.clip(last - 1, 0, n - 1), idx] - baseline
    centre = profile_info["peak_index"]
    cut_top = (first > 0) & (top_values > _EDGE_LEVEL * rel_peak) & (first < centre)
    cut_bottom = (last < n - 1) & (bottom_values > _EDGE_LEVEL * rel_peak) & (last > centre)
    if cut_top.mean() > 0.05 or cut_bottom.mean() > 0.05:
        side = "top" if cut_top.sum() >= cut_bottom.sum() else "bottom"
        raise GeometryError(
            f"the spectral band touches the {side} edge of the frame; move or turn the camera so the whole "
            "band, with a few dark rows on each side, is inside the frame"
        )
    a_lo, a_hi = profile_info["aperture"]
    lo_t, hi_t = profile_info["valid_t_range"]
    if a_lo <= lo_t + 1 and a_hi >= hi_t - 1:
        raise GeometryError(
            "the spectral band fills the frame from top to bottom; move the camera back or narrow the slit so the "
            "band has dark rows above and below it"
        )


def _measure_curvature(band, sat_band, *, centre_index, half_height, s0, min_snr, short_band: bool = False) -> dict:
    """Trace isolated emission lines across rows and fit b(s), c(s).

    ``short_band``: the band is too short for its edges, so the lines' common tilt will set the
    rotation; a trace far off its own parabola (RMS above max(1 px, FWHM/2): it jumped between
    features, e.g. on a JPEG frame) is then dropped while two others remain, since with the
    three or four lines such a band holds no clipping across lines can tell it apart.
    """
    unknown = {"known": False, "tilt": np.zeros(1), "curvature": np.zeros(1), "rms": None, "n_lines": 0}
    n_t, n_s = band.shape
    data = np.nan_to_num(band, nan=0.0)
    valid = np.isfinite(band)
    core = max(1, int(round(half_height / 3)))
    rows = slice(centre_index - core, centre_index + core + 1)
    with np.errstate(all="ignore"):
        spectrum = np.nanmean(band[rows], axis=0)
    spectrum = np.nan_to_num(spectrum, nan=0.0)
    from scipy.ndimage import minimum_filter1d, uniform_filter1d
    from scipy.signal import find_peaks

    continuum = uniform_filter1d(minimum_filter1d(spectrum, 41), 41)
    resid = spectrum - continuum
    noise = max(_robust_sigma(np.diff(spectrum)) / math.sqrt(2), 1e-9)
    peaks, props = find_peaks(resid, prominence=min_snr * noise, width=(0.8, 12))
    if peaks.size == 0:
        unknown["reason"] = "curvature unknown: no emission line to trace (a continuum gives the rotation only)"
        return unknown
    heights = resid[peaks]
    fwhm = float(np.median(props["widths"]))
    window = int(max(3, math.ceil(1.5 * fwhm)))
    # isolation: no other peak above 30% of this one within 2*window
    order = np.argsort(-heights)
    chosen = []
    for i in order[:40]:
        p = peaks[i]
        near = np.abs(peaks - p) <= 2 * window + 1
        near[i] = False
        if np.any(heights[near] > 0.3 * heights[i]):
            continue
        if p < window + 2 or p > n_s - window - 3:
            continue
        if sat_band is not None and sat_band[rows, p].mean() > 0.3:
            continue
        chosen.append(p)
    if not chosen:
        unknown["reason"] = "curvature unknown: no isolated, unsaturated emission line to trace"
        return unknown
    chosen = np.array(sorted(chosen))
    # row bins across the aperture
    t_lo = -int(0.92 * half_height)
    t_hi = int(0.92 * half_height)
    bin_rows = int(np.clip(round(half_height / 8), 2, 8))
    starts = np.arange(t_lo, t_hi - bin_rows + 2, bin_rows)
    if starts.size < 5:
        unknown["reason"] = "curvature unknown: the band is too short across to trace lines"
        return unknown
    bin_t = starts + (bin_rows - 1) / 2.0
    bins = np.stack([data[centre_index + a: centre_index + a + bin_rows].mean(axis=0) for a in starts])
    bin_valid = np.stack([valid[centre_index + a: centre_index + a + bin_rows].all(axis=0) for a in starts])
    bin_noise = noise * math.sqrt((2 * core + 1) / bin_rows)
    n_lines = chosen.size
    n_bins = starts.size
    positions = np.full((n_lines, n_bins), np.nan)
    strengths = np.zeros((n_lines, n_bins))
    centre_bin = int(np.argmin(np.abs(bin_t)))
    offsets = np.arange(-window, window + 1)
    local_bg_offsets = np.array([-window - 2, -window - 1, window + 1, window + 2])

    def measure(j, predicted):
        centre = np.round(predicted).astype(int)
        ok = (centre > window + 3) & (centre < n_s - window - 4)
        centre = np.where(ok, centre, window + 4)
        grid = centre[:, None] + offsets[None, :]
        values = bins[j][grid]
        bg = np.median(bins[j][centre[:, None] + local_bg_offsets[None, :]], axis=1)
        values = values - bg[:, None]
        k = np.argmax(values, axis=1)
        k = np.clip(k, 1, values.shape[1] - 2)
        idx = np.arange(values.shape[0])
        left, mid, right = values[idx, k - 1], values[idx, k], values[idx, k + 1]
        pos = grid[idx, k] + _subpixel_peak(left, mid, right)
        ok &= (mid > 5 * bin_noise) & bin_valid[j][grid[idx, k]]
        if sat_band is not None:
            ok &= ~sat_band[centre_index + starts[j]: centre_index + starts[j] + bin_rows, :][:, grid[idx, k]].any(axis=0)
        ok &= np.abs(pos - predicted) < window
        return np.where(ok, pos, np.nan), np.where(ok, mid, 0.0)

    pos, strength = measure(centre_bin, chosen.astype(float))
    positions[:, centre_bin] = pos
    strengths[:, centre_bin] = strength
    for direction in (1, -1):
        last = positions[:, centre_bin].copy()
        prev = last.copy()
        step = 0
        j = centre_bin + direction
        while 0 <= j < n_bins:
            step += 1
            slope = np.where(np.isfinite(prev) & (step > 1), last - prev, 0.0)
            predicted = np.where(np.isfinite(last), last + slope, np.nan)
            alive = np.isfinite(predicted)
            if not alive.any():
                break
            p, st = measure(j, np.where(alive, predicted, chosen.astype(float)))
            p = np.where(alive, p, np.nan)
            positions[:, j] = p
            strengths[:, j] = np.where(alive, st, 0.0)
            found = np.isfinite(p)
            prev = np.where(found, last, prev)
            last = np.where(found, p, last)
            # a line lost for one bin keeps its prediction; lost for longer stops (predicted stays stale)
            j += direction
    # per-line fits x(t) = x0 + b t + c t^2
    line_s, line_b, line_c, line_wb, line_wc, residuals = [], [], [], [], [], []
    traces = []
    span_needed = 0.5 * (t_hi - t_lo)
    for i in range(n_lines):
        found = np.isfinite(positions[i])
        if found.sum() < 5:
            continue
        t = bin_t[found]
        if t.max() - t.min() < span_needed:
            continue
        x = positions[i, found]
        w = (strengths[i, found] / bin_noise) ** 2
        coef, cov, keep, rms = _robust_line_fit(t, x, np.minimum(w, 1e4), degree=2, floor=0.05)
        if keep.sum() < 5 or not np.isfinite(cov).all():
            continue
        line_s.append(coef[0] + s0)
        line_b.append(coef[1])
        line_c.append(coef[2])
        line_wb.append(1.0 / max(cov[1, 1], 1e-12))
        line_wc.append(1.0 / max(cov[2, 2], 1e-16))
        residuals.append(rms)
        traces.append((t[keep], x[keep] + s0))
    if short_band and len(line_s) >= 3:
        good = np.array(residuals) <= max(1.0, 0.5 * fwhm)
        if 2 <= good.sum() < good.size:
            pick = np.flatnonzero(good)
            line_s, line_b, line_c, line_wb, line_wc = ([v[k] for k in pick] for v in (line_s, line_b, line_c, line_wb, line_wc))
            residuals = [residuals[k] for k in pick]
            traces = [traces[k] for k in pick]
    if len(line_s) < 2:
        # one traced feature on a continuum is as likely an edge or a dip as a slit image
        unknown["reason"] = "curvature unknown: fewer than two lines could be traced across the band"
        return unknown
    line_s = np.array(line_s)
    span = line_s.max() - line_s.min()
    n = line_s.size
    lit = np.flatnonzero(spectrum > 0.05 * max(spectrum.max(), 1e-12))
    lit_span = float(lit[-1] - lit[0]) if lit.size > 1 else float(n_s)
    # Degree: as high as the lines allow (quadratic needs 6 lines spread over half the lit band,
    # so it is not extrapolated far), lowered while the top coefficient is not significant.
    max_c = 2 if (n >= 6 and span >= 0.5 * lit_span) else 1 if n >= 3 else 0
    max_b = 1 if n >= 3 else 0
    # fit in scaled s for conditioning, then convert to plain coefficients
    scale = max(1.0, span / 2)
    centre_s = 0.5 * (line_s.max() + line_s.min())
    z = (line_s - centre_s) / scale
    # With few lines the fit's significance rests on each line's stated curvature variance: its
    # parabola fit's plus a systematic sag at its trace's edge (CURVATURE_SYSTEMATIC_SAG_PX, measured).
    t_edge = np.array([np.max(np.abs(t)) for t, _ in traces])
    wc_total = 1.0 / (1.0 / np.minimum(np.array(line_wc), 1e16) + (CURVATURE_SYSTEMATIC_SAG_PX / t_edge**2) ** 2)
    c_coef, keep_c = _significant_fit(z, np.array(line_c), np.array(line_wc), max_degree=max_c, floor=1e-7,
                                      trust_weights_below_dof=3, trusted_weights=wc_total)
    if n == 2:
        c_coef = _two_line_curvature(z, np.array(line_c), wc_total, fallback=c_coef)
    b_coef, keep_b = _significant_fit(z, np.array(line_b), np.array(line_wb), max_degree=max_b, floor=1e-4)
    curvature = _unscale_poly(c_coef, centre_s, scale)
    tilt = _unscale_poly(b_coef, centre_s, scale)
    # straightness: residual of every traced point about the model (line centre x0 free)
    res_all = []
    for (t, xs), s_line, kc, kb in zip(traces, line_s, keep_c, keep_b):
        if not (kc and kb):
            continue
        model = np.polynomial.polynomial.polyval(s_line, tilt) * t + np.polynomial.polynomial.polyval(s_line, curvature) * t * t
        r = xs - model
        res_all.append(r - np.average(r))
    rms = float(np.sqrt(np.mean(np.concatenate(res_all) ** 2))) if res_all else None
    return {"known": True, "tilt": tilt, "curvature": curvature, "rms": rms, "n_lines": int(np.sum(keep_c & keep_b)),
            "line_s": line_s, "line_c": np.array(line_c), "line_wc": np.array(line_wc), "traces": traces,
            "max_degree": max_c, "keep_c": keep_c}


def line_shift_between(old: Geometry, new: Geometry, columns) -> tuple[np.ndarray, np.ndarray]:
    """Where lines at rectified ``columns`` under ``old`` fall under ``new``: (shift, spread) in columns.

    Both geometries must share the band's centre, rotation and rows (as
    :func:`refit_curvature_grating` leaves them: it changes the curvature
    only). A slit image crosses aperture row t at the band position
    ``s + b(s) t + c(s) t²``; under ``new`` the same point lies at the column
    u' that solves ``s' + b'(s') t + c'(s') t² = s + b(s) t + c(s) t²``
    (two Newton steps from u' = u, exact to far below 0.001 px for the
    curvatures a band can have). ``shift`` is the mean of ``u' - u`` over
    the aperture rows weighted by the band's spatial profile (what an
    extraction's centre follows when the change across the rows is small
    against the line's width); ``spread`` is the range of ``u' - u`` over
    the rows where the profile exceeds a tenth of its peak (the line's
    image widens or narrows by up to that much).
    """
    if (old.frame_shape != new.frame_shape or old.aperture_rows != new.aperture_rows
            or old.centre_row != new.centre_row or old.rotation_deg != new.rotation_deg
            or old.centre_x_px != new.centre_x_px or old.centre_y_px != new.centre_y_px
            or old.first_column_s_px != new.first_column_s_px):
        raise InputError("the two geometries differ in more than their curvature and tilt; extract the spectrum again")
    u = np.asarray(columns, dtype=np.float64).reshape(-1)
    a0, a1 = old.aperture_rows
    t = np.arange(a0, a1, dtype=np.float64) - old.centre_row
    profile = np.asarray(old.spatial_profile, dtype=np.float64)
    if profile.size != t.size or not profile.sum() > 0:
        profile = np.ones(t.size)
    weights = np.clip(profile, 0, None)
    weights = weights / weights.sum()
    s = old.first_column_s_px + u[:, None]
    target = s + old.tilt_at(s) * t + old.curvature_at(s) * t * t
    s_new = s.copy()
    for _ in range(2):
        value = s_new + new.tilt_at(s_new) * t + new.curvature_at(s_new) * t * t
        slope = 1.0 + np.polynomial.polynomial.polyval(
            s_new, np.polynomial.polynomial.polyder(np.asarray(new.tilt_coefficients, float))
            if len(new.tilt_coefficients) > 1 else [0.0]) * t + new.curvature_slope_at(s_new) * t * t
        s_new = s_new - (value - target) / slope
    delta = s_new - s  # (n_columns, n_rows)
    shift = delta @ weights
    core = weights >= 0.1 * weights.max()
    spread = delta[:, core].max(axis=1) - delta[:, core].min(axis=1)
    return shift, spread


def refit_curvature_grating(image, geometry: Geometry, *, theta_rad: float, x0_px: float, f_px: float, sign: float,
                            saturated=None, min_line_snr: float = 15.0,
                            angle_source: str = "the grating-shaped wavelength solution") -> tuple[Geometry, dict]:
    """Refit the slit images' curvature with the physical shape ``c0 + k tan(beta(s))``, where the data support it.

    Parameters
    ----------
    image : ndarray, shape (H, W)
        The linear frame the geometry was measured on (e.g. ``StackedFrame.image``).
    geometry : Geometry
        From :func:`measure_geometry` on that frame, with a known curvature.
    theta_rad, x0_px, f_px, sign : float, keyword-only
        The diffraction angle along the rectified columns ``p``,
        ``beta(p) = theta + atan(sign (p - x0) / f)``: the parameters of a grating-shaped
        wavelength solution (:class:`benchspec.wavecal.WavelengthSolution` with
        ``model == "grating"``: ``coefficients[1:]`` and ``grating_sign``), or of the grating
        model fitted to a polynomial solution's lines (``pipeline.calibrate_frames`` does so).
    saturated : ndarray of bool, shape (H, W), optional
    min_line_snr : float, keyword-only
        As in :func:`measure_geometry`.
    angle_source : str, keyword-only
        Where the angle came from, for the geometry's note.

    Returns
    -------
    (Geometry, dict)
        The geometry with ``curvature_grating`` set (the polynomial kept as ``c0``) when the
        physical shape is taken, else ``geometry`` unchanged; and what was compared:
        ``used`` (bool), ``reason``, ``n_lines``, the models' ``bic`` and ``rms_px``.

    Notes
    -----
    The lines are traced again (as in :func:`measure_geometry`) on the band resampled with the
    geometry's own model, so each line's total curvature is the model's at that line plus
    what is left. Three shapes are fitted to those per-line curvatures with their weights
    (1 / variance of each line's parabola fit): the geometry's polynomial (its own degree),
    ``k tan(beta)`` and ``c0 + k tan(beta)``, on the lines the polynomial keeps after sigma
    clipping; each line's variance also holds a systematic :data:`CURVATURE_SYSTEMATIC_SAG_PX`
    of sag at its trace's edge. Each gets a BIC, ``chi2 / s2 + p ln n`` with ``s2`` the polynomial's reduced
    chi-square where that exceeds 1 (the per-line variances leave out JPEG and resampling
    errors, common practice). The better physical shape is taken when its BIC is no larger than
    the polynomial's, or when the lines do not reject it (its chi-square below the 99th
    percentile for its degrees of freedom: the shape is known beforehand, the polynomial is
    only a description of the traced lines), and the diffraction angle stays within 80 deg
    across the band.
    The physics (from memory): a straight slit seen through a plane grating images as a curve
    of curvature proportional to tan(beta) (the spectral-line curvature of plane-grating
    spectrographs); the virtual bench renders it so.
    """
    frame = _as_image(image)
    check_frame_size(frame.shape, geometry)
    if not (math.isfinite(f_px) and f_px > 0 and sign in (1, -1, 1.0, -1.0)
            and all(math.isfinite(v) for v in (theta_rad, x0_px))):
        raise InputError(f"the grating parameters need a finite theta and x0, f_px > 0 and sign +1 or -1; got "
                         f"theta {theta_rad}, x0 {x0_px}, f {f_px}, sign {sign}")
    info = {"used": False, "reason": "", "n_lines": 0}
    if not geometry.curvature_known:
        info["reason"] = "curvature unknown"
        return geometry, info
    s0 = geometry.first_column_s_px
    s_x0 = float(x0_px) + s0
    s_edges = s0 + np.array([0.0, geometry.n_columns - 1.0])
    beta_edges = theta_rad + np.arctan(sign * (s_edges - s_x0) / f_px)
    if np.max(np.abs(beta_edges)) > math.radians(80.0):
        info["reason"] = "diffraction angle beyond 80 deg on the band"
        return geometry, info
    half_height = max(2.0, geometry.band_height_px / 2.0)
    t0 = -int(math.ceil(1.2 * half_height + 6))
    n_t = 2 * -t0 + 1
    options = dict(theta_deg=geometry.rotation_deg, cx=geometry.centre_x_px, cy=geometry.centre_y_px, s0=s0,
                   n_s=geometry.n_columns, t0=t0, n_t=n_t, tilt=geometry.tilt_coefficients,
                   curvature=geometry.curvature_coefficients, curvature_grating=geometry.curvature_grating)
    short = any("too short for its edges" in note for note in geometry.notes)
    with np.errstate(all="ignore"), _quiet_nan_warnings():
        band = _band_image(frame, **options)
        sat_band = None
        if saturated is not None:
            sat = np.asarray(saturated, dtype=bool)
            if sat.shape != frame.shape:
                raise InputError(f"`saturated` has shape {sat.shape} but the image has {frame.shape}")
            if sat.any():
                sat_band = np.nan_to_num(_band_image(sat.astype(np.float32), **options)) > 0
        residual = _measure_curvature(band, sat_band, centre_index=-t0, half_height=half_height, s0=s0,
                                      min_snr=min_line_snr, short_band=short)
    if not residual["known"]:
        info["reason"] = residual["reason"]
        return geometry, info
    line_s = residual["line_s"]
    c_total = geometry.curvature_at(line_s) + residual["line_c"]
    t_edge = np.array([np.max(np.abs(t)) for t, _ in residual["traces"]])
    w = 1.0 / (1.0 / np.minimum(residual["line_wc"], 1e16) + (CURVATURE_SYSTEMATIC_SAG_PX / t_edge**2) ** 2)
    tan_beta = np.tan(theta_rad + np.arctan(sign * (line_s - s_x0) / f_px))
    # the polynomial, as measure_geometry chooses it, in scaled s
    degree = len(geometry.curvature_coefficients) - 1
    span = float(np.ptp(line_s))
    scale = max(1.0, span / 2)
    z = (line_s - 0.5 * (line_s.max() + line_s.min())) / scale
    coef, _, keep, _ = _robust_line_fit(z, c_total, w, degree=degree, floor=1e-7)
    n = int(keep.sum())
    info["n_lines"] = n
    # Two lines can only choose between one-parameter shapes: a constant (the polynomial of
    # degree 0) and k tan(beta), each left one degree of freedom.
    if n < 2 or (n == 2 and degree > 0) or (n >= 3 and n <= degree + 1):
        info["reason"] = f"{n} traced lines: too few to compare shapes"
        return geometry, info

    def chi2(basis):
        A = basis[keep]
        sw = np.sqrt(w[keep])
        params, *_ = np.linalg.lstsq(A * sw[:, None], c_total[keep] * sw, rcond=None)
        r = c_total[keep] - A @ params
        return params, float(np.sum(w[keep] * r * r))

    ones = np.ones_like(tan_beta)
    _, chi2_poly = chi2(np.vander(z, degree + 1, increasing=True))
    k_only, chi2_k = chi2(tan_beta[:, None])
    both, chi2_both = chi2(np.stack([ones, tan_beta], axis=1))
    s2 = max(1.0, chi2_poly / (n - degree - 1))
    bic = {"polynomial": chi2_poly / s2 + (degree + 1) * math.log(n),
           "k tan(beta)": chi2_k / s2 + math.log(n),
           "c0 + k tan(beta)": chi2_both / s2 + 2 * math.log(n)}
    info["bic"] = bic
    shapes = ("k tan(beta)",) if n == 2 else ("k tan(beta)", "c0 + k tan(beta)")
    best = min(shapes, key=lambda name: bic[name])
    chi2_best, p_best = (chi2_k, 1) if best == "k tan(beta)" else (chi2_both, 2)
    from scipy.stats import chi2 as chi2_distribution

    consistent = chi2_best <= chi2_distribution.ppf(0.99, n - p_best)
    info["chi2"] = {"polynomial": chi2_poly, "k tan(beta)": chi2_k, "c0 + k tan(beta)": chi2_both}
    if bic[best] > bic["polynomial"] and not consistent:
        info["reason"] = (f"the {n} traced lines reject the tan(beta) shape (chi-square {chi2_best:.1f} for {n - p_best} "
                          f"degrees of freedom) and the polynomial fits them better (BIC {bic['polynomial']:.1f} vs {bic[best]:.1f})")
        return geometry, info
    c0, k = (0.0, float(k_only[0])) if best == "k tan(beta)" else (float(both[0]), float(both[1]))
    refit = dataclasses.replace(geometry, curvature_coefficients=(c0,),
                                curvature_grating=(k, float(theta_rad), s_x0, float(f_px), float(sign)))
    # straightness after rectification with the new shape: what each trace keeps once the change is applied
    delta = refit.curvature_at(line_s) - geometry.curvature_at(line_s)
    res_all = []
    for (t, xs), d in zip(residual["traces"], delta):
        r = xs - d * t * t
        res_all.append(r - np.mean(r))
    rms = float(np.sqrt(np.mean(np.concatenate(res_all) ** 2))) if res_all else geometry.curvature_rms_px
    note = (f"curvature c = {'c0 + ' if best != 'k tan(beta)' else ''}k tan(beta), beta from {angle_source} "
            f"({n} traced lines, chi-square {chi2_best:.1f} for {n - p_best} degrees of freedom; BIC "
            f"{bic[best]:.1f} vs {bic['polynomial']:.1f} for the polynomial)")
    refit = dataclasses.replace(refit, curvature_rms_px=rms, n_lines_traced=n, notes=geometry.notes + (note,))
    info.update(used=True, reason=note, model=best, k=k, c0=c0, rms_px=rms)
    return refit, info


def _two_line_curvature(z, c, w, *, fallback):
    """c(z) through two traced lines when their curvatures differ significantly, else ``fallback``.

    The curvature of slit images changes with wavelength (conical diffraction); a constant
    through two lines whose curvatures differ by more than 2.5 sigma extrapolates a wrong
    sag to every line outside them. ``w`` is 1 / each line's variance (with the systematic
    sag included). Two points leave no residual to judge a fit by, so the test rests on
    those stated variances.
    """
    variance = 1.0 / w
    if not (np.all(np.isfinite(variance)) and abs(z[1] - z[0]) > 0):
        return fallback
    if abs(c[1] - c[0]) <= 2.5 * math.sqrt(variance.sum()):
        return fallback
    if c[0] * c[1] <= 0:
        # across one order's visible band beta keeps its sign, and so does the slit images'
        # curvature: opposite signs are not two slit images (e.g. features of a continuum)
        return fallback
    slope = (c[1] - c[0]) / (z[1] - z[0])
    return np.array([c[0] - slope * z[0], slope])


def _consistent(x, y, w, coef, keep, degree) -> bool:
    """Whether the kept points' chi-square about the fit is below its 99th percentile (True with no residual left)."""
    dof = int(keep.sum()) - degree - 1
    if dof < 1:
        return True
    from scipy.stats import chi2 as chi2_distribution

    resid = y[keep] - np.polynomial.polynomial.polyval(x[keep], coef)
    return float(np.sum(w[keep] * resid**2)) <= chi2_distribution.ppf(0.99, dof)


def _significant_fit(x, y, w, *, max_degree: int, floor: float, trust_weights_below_dof: int = 0,
                     trusted_weights=None):
    """Robust polynomial fit of the highest degree <= max_degree whose top coefficient is significant (> 2.5 sigma).

    With fewer than ``trust_weights_below_dof`` degrees of freedom the fit takes
    ``trusted_weights`` (default ``w``: 1 / each point's full variance) and its significance
    rests on them alone: the reduced chi-square of one or two residuals is too noisy a
    scale, and one poorly measured point would inflate it many times.
    Returns (coefficients lowest first, keep mask); degree 0 falls back to the
    weighted median when clipping leaves nothing.
    """
    for degree in range(max_degree, 0, -1):
        scaled = np.count_nonzero(np.isfinite(y)) - degree - 1 >= trust_weights_below_dof
        weights = w if scaled or trusted_weights is None else trusted_weights
        coef, cov, keep, _ = _robust_line_fit(x, y, weights, degree=degree, floor=floor, scale_covariance=scaled)
        if not scaled and not _consistent(x, y, weights, coef, keep, degree):
            # the points scatter beyond their stated variances (e.g. features of a continuum, not
            # slit images): those variances cannot be trusted, the scaled covariance judges
            coef, cov, keep, _ = _robust_line_fit(x, y, w, degree=degree, floor=floor)
            scaled = True
        enough = keep.sum() > degree + (1 if scaled else 0)  # trusted weights need no residual
        if enough and np.isfinite(cov[degree, degree]) and cov[degree, degree] > 0:
            if abs(coef[degree]) > 2.5 * math.sqrt(cov[degree, degree]):
                return coef, keep
    coef, cov, keep, _ = _robust_line_fit(x, y, w, degree=0, floor=floor)
    if not keep.any():
        order = np.argsort(y)
        cumulative = np.cumsum(w[order])
        coef = np.array([y[order][np.searchsorted(cumulative, 0.5 * cumulative[-1])]])
        keep = np.ones(y.size, dtype=bool)
    return coef, keep


def _unscale_poly(coef, centre, scale):
    """Coefficients of p((s - centre) / scale) as a polynomial in s (lowest power first)."""
    from numpy.polynomial import polynomial as P

    result = np.zeros(1)
    base = np.array([-centre / scale, 1.0 / scale])
    power = np.array([1.0])
    for a in coef:
        result = P.polyadd(result, a * power)
        power = P.polymul(power, base)
    return result


# --------------------------------------------------------------------------- applying


def check_frame_size(shape, geometry: Geometry) -> None:
    """FrameError when a frame's (H, W) differs from the geometry's frame size."""
    height, width = int(shape[0]), int(shape[1])
    if (height, width) != geometry.frame_shape:
        raise FrameError(
            f"the frame is {width}x{height} px but the geometry was measured on "
            f"{geometry.frame_width_px}x{geometry.frame_height_px} px frames; use a calibration made with this "
            "camera resolution, or recalibrate"
        )


def jacobian(geometry: Geometry) -> np.ndarray | None:
    """Frame area per rectified pixel, ``ds'/ds = 1 + b'(s) t + c'(s) t**2``, shape ``rectified_shape`` (float32).

    Where the curvature changes along the band, the model samples the frame
    at a spacing slightly different from 1 px; :func:`rectify` multiplies by
    this factor so that sums over the rectified band conserve flux. None when
    it is 1 everywhere (no tilt or curvature varying with s).
    """
    from numpy.polynomial import polynomial as P

    db = P.polyder(np.asarray(geometry.tilt_coefficients, float)) if len(geometry.tilt_coefficients) > 1 else np.zeros(1)
    dc = P.polyder(np.asarray(geometry.curvature_coefficients, float)) if len(geometry.curvature_coefficients) > 1 else np.zeros(1)
    if not np.any(db) and not np.any(dc) and not (geometry.curvature_grating and geometry.curvature_grating[0]):
        return None
    s = geometry.first_column_s_px + np.arange(geometry.n_columns, dtype=np.float64)[None, :]
    t = np.arange(geometry.n_rows, dtype=np.float64)[:, None] - geometry.centre_row
    return (1.0 + P.polyval(s, db) * t + geometry.curvature_slope_at(s) * t * t).astype(np.float32)


#: What a geometry fixes (its remap tables, the resampling's noise factors), for the last few
#: geometries used: a calibration rectifies the same stack two or three times and an extraction
#: of later frames reuses its geometry. Keyed by (purpose, geometry, ...): Geometry is a frozen,
#: hashable dataclass, so an equal geometry finds the entry. The arrays are read-only.
_DERIVED: dict = {}
_DERIVED_SIZE = 8


_DERIVED_LOCK = threading.Lock()  # the viewer's processing thread and the caller's may share the cache


def derived(key, compute):
    """``compute()`` for ``key``, kept for the last :data:`_DERIVED_SIZE` keys (arrays made read-only).

    Thread-safe: two threads asking for a missing key may both compute it (the results are equal).
    A key being computed in the background (:func:`derived_in_background`) is waited for, not
    computed again; an error raised there is raised here.
    """
    try:
        with _DERIVED_LOCK:
            value = _DERIVED.pop(key, None)
            if value is not None:
                _DERIVED[key] = value  # most recently used last
                return value
            pending = _PENDING.get(key)
    except TypeError:  # an unhashable key: computed every time
        return compute()
    if pending is not None:
        return pending.result()
    return _compute_and_keep(key, compute)


def _compute_and_keep(key, compute):
    value = compute()
    for item in value if isinstance(value, tuple) else (value,):
        if isinstance(item, np.ndarray):
            item.flags.writeable = False
    with _DERIVED_LOCK:
        while len(_DERIVED) >= _DERIVED_SIZE:
            _DERIVED.pop(next(iter(_DERIVED)))
        _DERIVED[key] = value
    return value


#: Keys being computed by :func:`derived_in_background`, with their futures.
_PENDING: dict = {}
_BACKGROUND = None  # a one-thread executor, made on first use


def derived_in_background(key, compute) -> None:
    """Start ``derived(key, compute)`` on a background thread and return at once.

    For what a geometry fixes and the caller needs a little later (the noise factors of the
    resampling, while the band is rectified and its noise measured): on a second core the two
    overlap. A later :func:`derived` call for ``key`` waits for the result. Nothing happens when
    the key is already kept or being computed.
    """
    global _BACKGROUND
    from concurrent.futures import ThreadPoolExecutor

    with _DERIVED_LOCK:
        if key in _DERIVED or key in _PENDING:
            return
        if _BACKGROUND is None:
            _BACKGROUND = ThreadPoolExecutor(max_workers=1, thread_name_prefix="benchspec-derived")

        def work():
            try:
                return _compute_and_keep(key, compute)
            finally:
                with _DERIVED_LOCK:
                    _PENDING.pop(key, None)

        _PENDING[key] = _BACKGROUND.submit(work)


def remap_tables(geometry: Geometry) -> tuple[np.ndarray, np.ndarray]:
    """float32 ``cv2.remap`` maps (map_x, map_y), each of shape ``geometry.rectified_shape``.

    ``cv2.remap(frame, map_x, map_y, cv2.INTER_LINEAR)`` gives the rectified band. The
    tables are read-only and shared by calls with equal geometries.
    """
    def compute():
        u = np.arange(geometry.n_columns, dtype=np.float64)[None, :]
        v = np.arange(geometry.n_rows, dtype=np.float64)[:, None]
        x, y = geometry.frame_coordinates(u, v)
        return x.astype(np.float32), y.astype(np.float32)

    return derived(("remap", geometry), compute)


INTERPOLATIONS = {"linear": cv2.INTER_LINEAR, "cubic": cv2.INTER_CUBIC}


def valid_samples(map_x: np.ndarray, map_y: np.ndarray, frame_shape, interpolation: str = "cubic") -> np.ndarray:
    """True where the resampling kernel at (map_x, map_y) lies wholly inside a frame of ``frame_shape``."""
    height, width = frame_shape
    lo, hi = (0, 1) if interpolation == "linear" else (1, 2)
    return (map_x >= lo) & (map_x <= width - 1 - hi) & (map_y >= lo) & (map_y <= height - 1 - hi)


def rectify(image, geometry: Geometry, *, variance=None, saturated=None, tables=None,
            interpolation: str = "cubic") -> RectifiedBand:
    """Resample a frame into the rectified band (one ``cv2.remap`` per plane).

    Parameters
    ----------
    image : ndarray, shape (H, W)
        Linear frame of the size the geometry was measured on.
    geometry : Geometry
    variance : ndarray, shape (H, W), optional
        Per-pixel variance, resampled with the same kernel (a rough map;
        :mod:`benchspec.extract` propagates variance from its noise model).
    saturated : ndarray of bool, shape (H, W), optional
    tables : (map_x, map_y), optional
        Precomputed :func:`remap_tables` (saves their computation).
    interpolation : {"cubic", "linear"}, keyword-only
        OpenCV's bicubic kernel (default) keeps lines within about 5% of
        their width; bilinear is about 3 times faster but widens a 2.6 px
        line by about 12%. Both keep the flux (their weights sum to one).

    Returns
    -------
    RectifiedBand
        Values are frame values (surface brightness per frame pixel); the
        band's ``area`` (see :func:`jacobian`) converts background-subtracted
        values to flux per rectified pixel.

    Raises
    ------
    FrameError
        The frame's size differs from the geometry's.
    """
    frame = np.asarray(image)
    if frame.ndim != 2:
        raise InputError(f"`image` must be 2-D (H, W), got shape {frame.shape}")
    if interpolation not in INTERPOLATIONS:
        raise InputError(f"`interpolation` must be one of {', '.join(INTERPOLATIONS)}, was {interpolation!r}")
    check_frame_size(frame.shape, geometry)
    flag = INTERPOLATIONS[interpolation]
    map_x, map_y = tables if tables is not None else remap_tables(geometry)
    frame = frame.astype(np.float32, copy=False)
    out = cv2.remap(frame, map_x, map_y, flag, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    area = jacobian(geometry)
    valid = valid_samples(map_x, map_y, frame.shape, interpolation)
    var_out = None
    if variance is not None:
        var = np.asarray(variance, dtype=np.float32)
        if var.shape != frame.shape:
            raise InputError(f"`variance` has shape {var.shape} but the image has {frame.shape}")
        var_out = cv2.remap(var, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    if saturated is not None:
        sat = np.asarray(saturated, dtype=bool)
        if sat.shape != frame.shape:
            raise InputError(f"`saturated` has shape {sat.shape} but the image has {frame.shape}")
        sat = sat.astype(np.uint8)
        if interpolation == "cubic":
            sat = cv2.dilate(sat, np.ones((3, 3), np.uint8))  # the cubic kernel reaches one pixel further
        sat_out = cv2.remap(sat.astype(np.float32), map_x, map_y, cv2.INTER_LINEAR,
                            borderMode=cv2.BORDER_CONSTANT, borderValue=0) > 0
    else:
        sat_out = np.zeros(out.shape, dtype=bool)
    return RectifiedBand(image=out, variance=var_out, saturated=sat_out, valid=valid, geometry=geometry,
                         interpolation=interpolation, area=area)


def measure_band_shift(image, geometry: Geometry, *, reference=None, across_tolerance_px: float = 1.5,
                       along_tolerance_px: float = 1.0, rotation_tolerance_deg: float = 0.3) -> BandShift:
    """Has the band moved since ``geometry`` was measured (was the setup bumped)?

    Parameters
    ----------
    image : ndarray, shape (H, W)
        A later linear frame of the same setup.
    geometry : Geometry
    reference : ndarray, shape (n_columns,), optional
        A spectrum extracted with ``geometry`` from the calibration frame;
        when given, the shift along the dispersion is measured by
        cross-correlation (only meaningful for a source with the same lines).
    across_tolerance_px, along_tolerance_px, rotation_tolerance_deg : float
        Shifts above these count as "moved".

    Returns
    -------
    BandShift
    """
    frame = _as_image(image)
    check_frame_size(frame.shape, geometry)
    half = max(2.0, geometry.band_height_px / 2)
    t0 = -(geometry.centre_row)
    n_t = geometry.n_rows
    # widen the window so a band that moved by up to half its height is still seen
    extra = int(math.ceil(half))
    try:
        with np.errstate(all="ignore"), _quiet_nan_warnings():
            band = _band_image(frame, theta_deg=geometry.rotation_deg, cx=geometry.centre_x_px, cy=geometry.centre_y_px,
                               s0=geometry.first_column_s_px, n_s=geometry.n_columns, t0=t0 - extra, n_t=n_t + 2 * extra,
                               tilt=geometry.tilt_coefficients, curvature=geometry.curvature_coefficients,
                               curvature_grating=geometry.curvature_grating)
            trace = _measure_trace(band, s0=geometry.first_column_s_px, t0=t0 - extra, half_height=half)
    except GeometryError as exc:
        return BandShift(0.0, None, 0.0, False, False, f"band shift not measured: {exc}")
    # Only chunks whose band has the calibrated height count: a frame without the band (dark,
    # stray light, a bloomed laser spot) must not read as a moved band.
    height = geometry.band_height_px
    same = (trace["widths"] > 0.75 * height) & (trace["widths"] < 1.3 * height)
    mids, mid_s = trace["mids"][same], trace["mid_s"][same]
    if mids.size >= 4 and np.ptp(mid_s) >= 100 and same.mean() > 0.6:
        slope, intercept = np.polyfit(mid_s, mids, 1)
        resid = mids - (intercept + slope * mid_s)
        good = np.abs(resid) < max(3 * _robust_sigma(resid), 0.5)
        slope, intercept = np.polyfit(mid_s[good], mids[good], 1) if good.sum() >= 3 else (slope, intercept)
        across = float(intercept)
        rotation_change = math.degrees(math.atan(slope))
    elif mids.size >= 1:
        # Too little of the band is lit (a laser, an LED, a few lines) to measure a rotation:
        # only the shift across is measured, where the band is lit, assuming the angle is unchanged.
        across = float(np.median(mids))
        rotation_change = 0.0
    else:
        return BandShift(0.0, None, 0.0, False, False,
                         "band shift not measured: no part of the band with the calibrated height was found")
    along = None
    if reference is not None:
        ref = np.asarray(reference, dtype=np.float64)
        if ref.shape != (geometry.n_columns,):
            raise InputError(f"`reference` must have {geometry.n_columns} samples, got shape {ref.shape}")
        rect = rectify(frame, geometry)
        a0, a1 = geometry.aperture_rows
        spec = rect.image[a0:a1].sum(axis=0).astype(np.float64)
        along = _cross_correlation_shift(spec, ref)
    moved = abs(across) > across_tolerance_px or abs(rotation_change) > rotation_tolerance_deg or (
        along is not None and abs(along) > along_tolerance_px)
    parts = [f"across {across:+.2f} px", f"rotation {rotation_change:+.2f} deg"]
    if along is not None:
        parts.insert(0, f"along {along:+.2f} px")
    if moved:
        message = "the band has moved since calibration (" + ", ".join(parts) + "); the setup may have been bumped — recalibrate"
    else:
        message = "the band is where the calibration expects it (" + ", ".join(parts) + ")"
    return BandShift(float(across), None if along is None else float(along), float(rotation_change), bool(moved), True, message)


def _cross_correlation_shift(spectrum: np.ndarray, reference: np.ndarray, max_shift: int = 60) -> float:
    """Sub-pixel shift of ``spectrum`` relative to ``reference`` (positive: features moved to larger columns)."""
    a = spectrum - np.median(spectrum)
    b = reference - np.median(reference)
    n = a.size
    max_shift = min(max_shift, n // 3)
    lags = np.arange(-max_shift, max_shift + 1)
    corr = np.array([np.dot(a[max(0, k): n + min(0, k)], b[max(0, -k): n - max(0, k)]) for k in lags])
    i = int(np.argmax(corr))
    offset = 0.0
    if 0 < i < lags.size - 1:
        l, c, r = corr[i - 1: i + 2]
        denom = l - 2 * c + r
        if denom < 0:
            offset = 0.5 * (l - r) / denom
    return float(lags[i] + offset)
