"""Finding and measuring spectral lines in a 1-D spectrum.

Emission lines are peaks above a local linear background; absorption lines
are dips below a fitted continuum. Each line is fitted by least squares with
a Gaussian on a linear background (neighbouring lines that overlap are fitted
together, one Gaussian each), and reported with a sub-pixel centre and its
1-sigma uncertainty, FWHM, peak height, area and signal-to-noise ratio, plus
flags for blended and saturated lines.

The work is done on the sample index of the spectrum and mapped to its
``pixel`` axis, and to its ``wavelength_nm`` axis when it has one.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize, signal

from .errors import InputError, LineError
from .spectrum import Spectrum

__all__ = ["Line", "LineTable", "find_lines", "find_lines_quick", "estimate_noise", "fit_continuum", "CENTRE_SYSTEMATIC_FWHM",
           "CENTRE_SYSTEMATIC_FWHM_LOSSLESS"]

_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))

#: Systematic 1-sigma of a fitted line centre, as a fraction of the line's FWHM (``Line.centre_systematic_px``).
#: Measured with the accuracy benchmark's He/Ne/H/Hg/Na frames (virtual benches) against the simulator's
#: truth of where each line lies in the rectified, extracted spectrum (``benchmarks.accuracy.row_averaged_truth``).
#: The fit's own sigma explains the scatter between two noise draws of one frame (pull width 0.96) but
#: not the error against the truth: bright lines stated at 0.004-0.01 px sit 0.02-0.07 px off. On the
#: benchmark's 250 isolated NIST lines the pull RMS is 2.08 with the fit's sigma alone and 1.05 with
#: 0.01 FWHM added in quadrature (about 0.03 px at their 3 px FWHM; PNG 0.49, JPEG 1.22, gamma 1 1.66);
#: on 226 isolated lines of other benches (1 in 5, offset by 2) 1.36 and 0.84. The pixel-phase bias
#: of the Gaussian fit on pixel-integrated lines is below 0.002 px for sigma >= 0.6 px, so the term
#: stands for the resampling (frame rotation, rectification), JPEG and line-shape errors.
CENTRE_SYSTEMATIC_FWHM = 0.01
#: The same for lines of lossless frames (``LineTable.encoding`` "lossless": PNG, TIFF, 16-bit), where no
#: JPEG error enters: on the accuracy benchmark's 77 line centres of PNG benches the fit's sigma alone
#: already gives a pull RMS of 0.70 (MAD width 0.56), and with 0.01 FWHM added 0.47 (0.22). 0.002 FWHM
#: (about 0.006 px at 3 px) keeps a term for the resampling, matching the calibration's lossless floor.
CENTRE_SYSTEMATIC_FWHM_LOSSLESS = 0.002


@dataclass(frozen=True)
class Line:
    """One fitted line.

    Attributes
    ----------
    centre_px : float
        Centre on the spectrum's pixel axis (sub-pixel).
    centre_uncertainty_px : float
        1-sigma statistical uncertainty of ``centre_px`` from the fit covariance,
        scaled by the reduced chi-square of the fit when that exceeds 1.
    centre_systematic_px : float
        1-sigma systematic error of ``centre_px`` that the fit cannot see
        (resampling, JPEG, line shape), to be added in quadrature:
        ``CENTRE_SYSTEMATIC_FWHM`` times the FWHM for :func:`find_lines`
        (``CENTRE_SYSTEMATIC_FWHM_LOSSLESS`` for lossless frames; 0 where it
        is not estimated). See :data:`CENTRE_SYSTEMATIC_FWHM`.
    fwhm_px : float
        Full width at half maximum of the fitted Gaussian, in pixels.
    peak : float
        Height of the line above the local background (emission) or depth
        below the continuum (absorption), in intensity units; positive.
    area : float
        Integrated line flux (emission) or integrated dip (absorption),
        intensity x pixels.
    snr : float
        ``peak`` divided by the 1-sigma noise of one sample at the centre.
    kind : str
        ``"emission"`` or ``"absorption"``.
    blended : bool
        The line overlaps a neighbour (closer than twice their mean FWHM) or
        is markedly wider than the other lines (an unresolved blend).
    saturated : bool
        A sample within the line core was clipped; the centre is then fitted
        from the unclipped wings and ``peak`` is a lower bound.
    continuum : float
        Background (emission) or continuum (absorption) level at the centre.
    centre_nm, centre_uncertainty_nm, fwhm_nm : float or None
        The same on the wavelength axis when the spectrum is calibrated. The
        centre uncertainty combines the fit with the calibration's own
        uncertainty at that point.
    """

    centre_px: float
    centre_uncertainty_px: float
    fwhm_px: float
    peak: float
    area: float
    snr: float
    kind: str
    blended: bool
    saturated: bool
    continuum: float
    centre_nm: float | None = None
    centre_uncertainty_nm: float | None = None
    fwhm_nm: float | None = None
    centre_systematic_px: float = 0.0

    @property
    def centre_total_uncertainty_px(self) -> float:
        """Statistical and systematic 1-sigma of ``centre_px`` in quadrature."""
        return math.hypot(self.centre_uncertainty_px, self.centre_systematic_px)

    def to_dict(self) -> dict:
        """JSON-serialisable fields (floats and bools)."""
        return {name: getattr(self, name) for name in self.__dataclass_fields__}


@dataclass(frozen=True)
class LineTable:
    """The lines found in one spectrum, sorted by pixel, with what was used to find them.

    Attributes
    ----------
    lines : tuple of Line
    kind : str
        ``"emission"`` or ``"absorption"``.
    noise : float
        Median 1-sigma noise of one sample.
    min_snr : float
        Detection threshold that was applied.
    n_samples : int
        Length of the spectrum the lines came from.
    pixel_range : tuple of float
        (first, last) value of the spectrum's pixel axis.
    method : str
        How the centres were measured: ``"gaussian least squares"``
        (:func:`find_lines`) or ``"weighted log-parabola"``
        (:func:`find_lines_quick`, the live path).
    encoding : str or None
        How the frames behind the spectrum were stored, from its provenance
        (``StackedFrame.settings["encoding"]``): ``"lossless"``,
        ``"block-coded"`` (JPEG, MJPG), ``"video"``, or None when not
        recorded. The wavelength calibration sets its systematic floor on
        the line centres by it (see ``benchspec.wavecal``).
    """

    lines: tuple[Line, ...]
    kind: str
    noise: float
    min_snr: float
    n_samples: int
    pixel_range: tuple[float, float]
    method: str = "gaussian least squares"
    encoding: str | None = None

    def __len__(self) -> int:
        return len(self.lines)

    def __iter__(self):
        return iter(self.lines)

    def __getitem__(self, index):
        return self.lines[index]

    def _column(self, name):
        return np.array([getattr(line, name) for line in self.lines], dtype=float)

    @property
    def centre_px(self) -> np.ndarray:
        return self._column("centre_px")

    @property
    def centre_uncertainty_px(self) -> np.ndarray:
        return self._column("centre_uncertainty_px")

    @property
    def fwhm_px(self) -> np.ndarray:
        return self._column("fwhm_px")

    @property
    def peak(self) -> np.ndarray:
        return self._column("peak")

    @property
    def snr(self) -> np.ndarray:
        return self._column("snr")

    @property
    def blended(self) -> np.ndarray:
        return np.array([line.blended for line in self.lines], dtype=bool)

    @property
    def saturated(self) -> np.ndarray:
        return np.array([line.saturated for line in self.lines], dtype=bool)

    def to_dicts(self) -> list[dict]:
        return [line.to_dict() for line in self.lines]


# ----------------------------------------------------------------------------- helpers


def estimate_noise(values) -> float:
    """Robust 1-sigma noise of one sample from the scatter of second differences.

    The second difference removes smooth structure; for white noise its
    standard deviation is sqrt(6) sigma, and the MAD (x1.4826) makes the
    estimate insensitive to lines (common practice, no source).
    """
    y = np.asarray(values, dtype=float)
    if y.size < 5:
        return 0.0
    second = y[2:] - 2 * y[1:-1] + y[:-2]
    return float(1.4826 * np.median(np.abs(second - np.median(second))) / np.sqrt(6.0))


def fit_continuum(values, *, width: float, iterations: int = 30) -> np.ndarray:
    """Upper envelope of a spectrum with dips: a smooth continuum for absorption lines.

    Iterative smoothing where samples below the current continuum are
    replaced by it before the next pass, so dips stop pulling it down
    (common practice, no source).

    Parameters
    ----------
    values : array_like, shape (n,)
    width : float
        Gaussian smoothing sigma in samples; several times the widest line.
    """
    y = np.asarray(values, dtype=float)
    work = y.copy()
    continuum = ndimage.gaussian_filter1d(work, width, mode="nearest")
    noise = estimate_noise(y)
    for _ in range(iterations):
        work = np.where(y < continuum - noise, continuum, y)
        updated = ndimage.gaussian_filter1d(work, width, mode="nearest")
        if np.max(np.abs(updated - continuum)) < 1e-6 * (np.max(np.abs(y)) + 1e-30):
            continuum = updated
            break
        continuum = updated
    return continuum


def _gaussian_model(x0):
    """Sum of Gaussians on a linear background about ``x0``.

    Parameters are (slope, offset, then amplitude, centre, sigma per line).
    """

    def model(x, *params):
        total = params[1] + params[0] * (x - x0)
        for k in range(2, len(params), 3):
            amplitude, centre, sigma = params[k : k + 3]
            total = total + amplitude * np.exp(-0.5 * ((x - centre) / sigma) ** 2)
        return total

    return model


def _gaussian_jacobian(x0):
    """Analytic Jacobian of :func:`_gaussian_model` (one row per sample, one column per parameter).

    Exact derivatives spare the fit one model evaluation per parameter per
    iteration (finite differences), which made line fitting about 15 times slower.
    """

    def jacobian(x, *params):
        jac = np.empty((x.size, len(params)))
        jac[:, 0] = x - x0
        jac[:, 1] = 1.0
        for k in range(2, len(params), 3):
            amplitude, centre, sigma = params[k : k + 3]
            z = (x - centre) / sigma
            e = np.exp(-0.5 * z * z)
            jac[:, k] = e
            jac[:, k + 1] = amplitude * e * z / sigma
            jac[:, k + 2] = amplitude * e * z * z / sigma
        return jac

    return jacobian


def _group_arrays(x, y, sigma, uses, guesses_list):
    """Pad the groups' samples and parameters to common sizes for :func:`_fit_groups`."""
    sizes = [int(np.count_nonzero(u)) for u in uses]
    counts = [len(g) for g in guesses_list]
    fittable = [g for g in range(len(uses)) if sizes[g] >= 2 + 3 * counts[g] + 1]
    if not fittable:
        return None
    n_samples = max(sizes[g] for g in fittable)
    n_lines = max(counts[g] for g in fittable)
    n_groups, n_params = len(fittable), 2 + 3 * n_lines
    xs = np.zeros((n_groups, n_samples))
    ys = np.zeros((n_groups, n_samples))
    weight = np.zeros((n_groups, n_samples))  # 1 / sigma; 0 on padding
    pivot = np.zeros(n_groups)
    params = np.zeros((n_groups, n_params))
    lower = np.full((n_groups, n_params), -np.inf)
    upper = np.full((n_groups, n_params), np.inf)
    for b, g in enumerate(fittable):
        gx, gy, gs = x[uses[g]], y[uses[g]], sigma[uses[g]]
        m = gx.size
        xs[b, :m], ys[b, :m], weight[b, :m] = gx, gy, 1.0 / gs
        xs[b, m:] = gx[-1]
        pivot[b] = float(np.mean(gx))
        edge = np.r_[gy[:2], gy[-2:]]
        params[b, 1] = float(np.min(edge))
        span = float(gx.max() - gx.min())
        # the same start and bounds as _fit_group
        for j, (amplitude, centre, width) in enumerate(guesses_list[g]):
            base = 2 + 3 * j
            params[b, base : base + 3] = (max(amplitude, 1e-12), centre, max(width, 0.5))
            lower[b, base : base + 3] = (0.0, centre - max(2.0, width), 0.3)
            upper[b, base : base + 3] = (np.inf, centre + max(2.0, width), max(span, 1.0))
        for j in range(counts[g], n_lines):  # padding lines: zero amplitude, held fixed
            base = 2 + 3 * j
            params[b, base : base + 3] = lower[b, base : base + 3] = upper[b, base : base + 3] = (0.0, pivot[b], 1.0)
    params = np.minimum(np.maximum(params, lower), upper)
    return fittable, sizes, counts, xs, ys, weight, pivot, params, lower, upper


#: Consecutive iterations a group of the batch fit may keep a parameter at a bound before it is left to
#: the bounded solver. A blend whose start puts a width or centre at its limit often leaves it within a
#: few steps (the speed benchmark's 625/630 px pair: the batch settled it at 6, with SciPy's minimum to
#: every printed digit, and SciPy took 5.5 ms). Measured on the CFL frames of the first 40 accuracy
#: benches (702 lines) against 3: 4 centres moved by more than 0.01 of their 1-sigma, at most by
#: 0.16 sigma; find_lines took 12% less time. A result at a bound is still never accepted.
_PINNED_ITERATIONS = 6


def _fit_groups(x, y, sigma, uses, guesses_list, *, max_iterations: int = 30):
    """Fit every group's Gaussians on a linear background at once; None where a group is not settled.

    Levenberg-Marquardt (Marquardt 1963) with the analytic Jacobian,
    vectorised over groups padded to a common size, with steps clipped to
    the bounds of :func:`_fit_group`. A group is returned only if it
    converged within ``max_iterations`` with every parameter strictly
    inside its bounds, where the bounded solver would reach the same
    minimum; the others (a line shrinking to nothing, a centre pushed to its
    limit, slow convergence) get None and are left to :func:`_fit_group`.
    The covariance is computed as ``scipy.optimize.curve_fit`` does
    (pseudo-inverse of the weighted Jacobian, absolute sigma).
    """
    out = [None] * len(uses)
    arrays = _group_arrays(x, y, sigma, uses, guesses_list)
    if arrays is None:
        return out
    fittable, sizes, counts, xs, ys, weight, pivot, p, lower, upper = arrays
    n_groups, n_params = p.shape
    active = lower != upper  # padding lines are held fixed
    offset = xs - pivot[:, None]

    def model(params):
        z = (xs[:, None, :] - params[:, 3::3, None]) / params[:, 4::3, None]  # (group, line, sample)
        e = np.exp(-0.5 * z * z)
        return params[:, 1:2] + params[:, 0:1] * offset + (params[:, None, 2::3] @ e)[:, 0, :], z, e

    def jacobian(params, z, e):
        jac = np.empty((n_groups, xs.shape[1], n_params))
        jac[:, :, 0] = offset
        jac[:, :, 1] = 1.0
        ae = params[:, 2::3, None] * e
        width = params[:, 4::3, None]
        jac[:, :, 2::3] = np.swapaxes(e, 1, 2)
        jac[:, :, 3::3] = np.swapaxes(ae * z / width, 1, 2)
        jac[:, :, 4::3] = np.swapaxes(ae * z * z / width, 1, 2)
        return jac * (active * 1.0)[:, None, :] * weight[:, :, None]

    m, z, e = model(p)
    jac = jacobian(p, z, e)
    r = weight * (ys - m)
    cost = np.einsum("bn,bn->b", r, r)
    damping = np.full(n_groups, 1e-3)
    done = np.zeros(n_groups, dtype=bool)
    at_bound = np.zeros(n_groups, dtype=int)  # consecutive iterations with a parameter held at a bound
    gave_up = np.zeros(n_groups, dtype=bool)
    eye = np.eye(n_params)
    for _ in range(max_iterations):
        jac_t = np.swapaxes(jac, 1, 2)
        normal = jac_t @ jac
        gradient = (jac_t @ r[:, :, None])[:, :, 0]
        diagonal = np.diagonal(normal, axis1=1, axis2=2)
        floor = 1e-12 * diagonal.max(axis=1, keepdims=True) + 1e-300
        scale = damping[:, None] * np.maximum(diagonal, floor) + ~active
        try:
            step = np.linalg.solve(normal + scale[:, :, None] * eye, gradient[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            return out
        trial = np.minimum(np.maximum(p + step, lower), upper)
        m_trial, z_trial, e_trial = model(trial)
        r_trial = weight * (ys - m_trial)
        cost_trial = np.einsum("bn,bn->b", r_trial, r_trial)
        better = (cost_trial < cost) & ~done
        tiny_step = np.abs(trial - p).max(axis=1) <= 1e-8 * (np.abs(p).max(axis=1) + 1e-8)
        # a group pinned at a bound is left to the bounded solver: stop iterating it
        pinned = np.any(active & ((trial <= lower) | (trial >= upper)), axis=1)
        at_bound = np.where(pinned, at_bound + 1, 0)
        # relative reduction of the cost below 1e-8: scipy's default ftol
        done |= (better & (cost - cost_trial <= 1e-8 * cost)) | (tiny_step & ~better) | (damping >= 1e16)
        gave_up |= (at_bound >= _PINNED_ITERATIONS) & ~done
        done |= gave_up
        if better.any():
            p[better], cost[better], r[better] = trial[better], cost_trial[better], r_trial[better]
            jac[better] = jacobian(trial, z_trial, e_trial)[better]
        damping = np.where(better, np.maximum(damping / 3.0, 1e-12), np.minimum(damping * 8.0, 1e16))
        if done.all():
            break
    for b, g in enumerate(fittable):
        n_used, q = sizes[g], 2 + 3 * counts[g]
        params = p[b, :q]
        margin = 1e-6 * np.maximum(1.0, np.abs(params))
        if not done[b] or gave_up[b] or np.any((params - lower[b, :q] <= margin) | (upper[b, :q] - params <= margin)):
            continue
        _, singular, vt = np.linalg.svd(jac[b, :n_used, :q], full_matrices=False)
        keep = singular > np.finfo(float).eps * max(n_used, q) * singular[0]
        cov = (vt[keep].T / singular[keep] ** 2) @ vt[keep]
        if np.all(np.isfinite(cov)):
            out[g] = (params.copy(), cov, float(cost[b] / max(1, n_used - q)))
    return out


def _fit_group(x, y, sigma, use, guesses):
    """Least-squares fit of several Gaussians on a linear background.

    Returns (params, covariance, reduced_chi2) or None when the fit fails.
    """
    xs, ys, ss = x[use], y[use], sigma[use]
    n_params = 2 + 3 * len(guesses)
    if xs.size < n_params + 1:
        return None
    model = _gaussian_model(float(np.mean(xs)))
    jacobian = _gaussian_jacobian(float(np.mean(xs)))
    edge = np.r_[ys[:2], ys[-2:]]
    p0 = [0.0, float(np.min(edge))]
    lower = [-np.inf, -np.inf]
    upper = [np.inf, np.inf]
    span = float(xs.max() - xs.min())
    # A line cannot be much higher than what the window shows, even when its core is clipped and
    # only the wings are fitted: bound the height so a clipped line does not run away.
    ceiling = 6.0 * max(float(np.ptp(y[use])), 1e-12)
    for amplitude, centre, width in guesses:
        p0 += [min(max(amplitude, 1e-12), ceiling), centre, max(width, 0.5)]
        lower += [0.0, centre - max(2.0, width), 0.3]
        upper += [ceiling, centre + max(2.0, width), max(span, 1.0)]
    p0 = np.minimum(np.maximum(p0, lower), upper)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            params, cov = optimize.curve_fit(
                model, xs, ys, p0=p0, sigma=ss, absolute_sigma=True, bounds=(lower, upper), maxfev=4000,
                jac=jacobian, x_scale="jac",  # scaled by the Jacobian: amplitudes and centres differ by 1e4
            )
    except (RuntimeError, ValueError, optimize.OptimizeWarning):
        return None
    if not np.all(np.isfinite(cov)):
        return None
    residual = (ys - model(xs, *params)) / ss
    dof = max(1, xs.size - n_params)
    return params, cov, float(np.sum(residual**2) / dof)


def _fit_censored(x, y, sigma, window, saturated, guesses, *, min_width: float = 0.3):
    """Least-squares fit of Gaussians on a linear background to a window holding clipped samples.

    A saturated sample is a lower bound on the signal (extraction keeps the clipped pixels, so such
    a column holds at least that much): it adds a residual only where the model falls below it
    (a censored, one-sided fit), while unsaturated samples count as usual. The lower bounds pin a
    clipped line's height and width, which its few unclipped wing samples alone leave free when the
    clip is deep or the line narrow. Lower bounds cannot stop a line from growing ever taller and
    narrower, so its Gaussian sigma is held at ``min_width`` or more (a little under the sigma of
    the spectrum's unclipped lines: no line is narrower than the line-spread function); a width at
    that bound is held fixed in the covariance. Returns (params, covariance, reduced_chi2) or None.
    """
    xs, ys, ss, clipped = x[window], y[window], sigma[window], saturated[window]
    n_params = 2 + 3 * len(guesses)
    if np.count_nonzero(~clipped) < 3 or xs.size < n_params + 1:
        return None
    x0 = float(np.mean(xs))
    model = _gaussian_model(x0)
    jacobian = _gaussian_jacobian(x0)
    p0 = [0.0, float(np.min(ys[~clipped]))]
    lower = [-np.inf, -np.inf]
    upper = [np.inf, np.inf]
    span = float(xs.max() - xs.min())
    # The bounds of _fit_group, with the height allowed above the clipped samples.
    ceiling = 6.0 * max(float(np.ptp(ys)), 1e-12)
    for amplitude, centre, width in guesses:
        p0 += [min(max(amplitude, 1e-12), ceiling), centre, max(width, 0.5, 1.2 * min_width)]
        lower += [0.0, centre - max(2.0, width), min_width]
        upper += [ceiling, centre + max(2.0, width), max(span, 1.0, 1.5 * min_width)]
    p0 = np.minimum(np.maximum(p0, lower), upper)

    def residuals(params):
        r = (ys - model(xs, *params)) / ss
        return np.where(clipped & (r < 0), 0.0, r)  # clipped: only a model below the recorded value counts

    def jac(params):
        r = (ys - model(xs, *params)) / ss
        active = ~(clipped & (r < 0))
        return -jacobian(xs, *params) / ss[:, None] * active[:, None]

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = optimize.least_squares(residuals, p0, jac=jac, bounds=(lower, upper), x_scale="jac", max_nfev=4000)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not fit.success:
        return None
    params = fit.x
    # Covariance: a lower bound the model meets (within one sigma) pins the fit like a measurement,
    # one the model clears by more constrains nothing nearby; counting only the strictly violated
    # ones would leave a deeply clipped line's height and width, and with them its centre, free.
    r = (ys - model(xs, *params)) / ss
    binding = ~clipped | (r > -1.0)
    j = -jacobian(xs, *params) / ss[:, None] * binding[:, None]
    free = np.ones(n_params, dtype=bool)
    free[4::3] = params[4::3] > min_width * (1 + 1e-6)  # widths at their floor are held
    j = j[:, free]
    _, singular, vt = np.linalg.svd(j, full_matrices=False)
    if singular.size == 0 or singular[0] <= 0:
        return None
    keep = singular > np.finfo(float).eps * max(j.shape) * singular[0]
    cov = np.zeros((n_params, n_params))
    cov[np.ix_(free, free)] = (vt[keep].T / singular[keep] ** 2) @ vt[keep]
    if not np.all(np.isfinite(cov)):
        return None
    r = residuals(params)
    n_active = int(np.count_nonzero(~clipped) + np.count_nonzero(clipped & (r > 0)))
    dof = max(1, n_active - n_params)
    return params, cov, float(np.sum(r**2) / dof)


# ----------------------------------------------------------------------------- main entry


def find_lines(
    spectrum: Spectrum,
    *,
    absorption: bool = False,
    min_snr: float = 5.0,
    max_lines: int | None = None,
    continuum_width_px: float | None = None,
) -> LineTable:
    """Find and fit the emission (or absorption) lines of a spectrum.

    Parameters
    ----------
    spectrum : Spectrum
        Pixel axis or calibrated; ``uncertainty`` is used as the per-sample
        noise where it is positive, else a robust estimate replaces it.
    absorption : bool
        Look for dips against a fitted continuum instead of peaks.
    min_snr : float
        Minimum ratio of a line's prominence to the noise of one sample.
    max_lines : int, optional
        Keep only the most prominent ``max_lines`` lines.
    continuum_width_px : float, optional
        Smoothing scale of the continuum for absorption lines (samples);
        default 8 times the typical line FWHM, at least 15.

    Returns
    -------
    LineTable
        Lines sorted by pixel; may be empty.

    Raises
    ------
    InputError
        ``min_snr`` not positive, or a spectrum too short to hold a line.
    LineError
        The spectrum has no finite samples or no variation at all.

    Notes
    -----
    Centres come from a Gaussian + linear-background least-squares fit; the
    1-sigma centre uncertainty is the fit covariance scaled by the reduced
    chi-square where that exceeds 1 (so model mismatch widens it). The
    photon-noise floor is about sigma/sqrt(N) px for N detected counts.
    Each line also carries ``centre_systematic_px`` = ``CENTRE_SYSTEMATIC_FWHM``
    (0.01; 0.002 for lossless frames, ``CENTRE_SYSTEMATIC_FWHM_LOSSLESS``)
    times its FWHM, the measured error the fit cannot see; add it in
    quadrature (``Line.centre_total_uncertainty_px``) for the total 1-sigma.
    Overlapping lines (closer than 2.5 mean FWHM) are fitted jointly.
    Where a line's window holds saturated samples, each of them counts as a
    lower bound on the model (a censored fit), the unsaturated ones as usual;
    such lines are flagged ``saturated`` and their uncertainty can be
    conservative.
    """
    if not isinstance(spectrum, Spectrum):
        raise InputError(f"`spectrum` must be a benchspec Spectrum, got {type(spectrum).__name__}")
    if not min_snr > 0:
        raise InputError(f"`min_snr` must be positive, was {min_snr}")
    n = spectrum.size
    if n < 7:
        raise InputError(f"the spectrum has {n} samples; at least 7 are needed to find a line")
    raw = np.array(spectrum.intensity, dtype=float)
    if not np.all(np.isfinite(raw)):
        if not np.any(np.isfinite(raw)):
            raise LineError("the spectrum has no finite samples; check the extraction")
        index = np.arange(n)
        good = np.isfinite(raw)
        raw = np.interp(index, index[good], raw[good])
    if np.ptp(raw) == 0:
        raise LineError("the spectrum is flat (every sample equal); there are no lines to find — check the frame is not blank")
    noise_global = estimate_noise(raw)
    given = np.array(spectrum.uncertainty, dtype=float)
    if np.all(np.isfinite(given)) and np.all(given > 0):
        sigma = given
    else:
        fallback = noise_global if noise_global > 0 else 1e-6 * np.ptp(raw)
        sigma = np.where(np.isfinite(given) & (given > 0), given, fallback)
    saturated = np.asarray(spectrum.saturated, dtype=bool)
    x = np.arange(n, dtype=float)
    kind = "absorption" if absorption else "emission"

    typical_fwhm = _typical_fwhm(raw if not absorption else -raw, sigma, min_snr)
    if absorption:
        width = continuum_width_px if continuum_width_px else max(15.0, 8.0 * typical_fwhm)
        continuum = fit_continuum(raw, width=width)
        y = continuum - raw
    else:
        continuum = None
        y = raw

    smoothing = 1.0 if typical_fwhm >= 3 else 0.0
    smooth = ndimage.gaussian_filter1d(y, smoothing, mode="nearest") if smoothing else y
    # Noise of one smoothed sample: sigma * sqrt(sum of squared kernel weights) = sigma / sqrt(2 sqrt(pi) s).
    noise_factor = 1.0 / math.sqrt(2.0 * math.sqrt(math.pi) * smoothing) if smoothing else 1.0
    # Height is judged against a local baseline (a low running percentile), not against the
    # neighbouring minima: prominence alone lets noise peaks double their height.
    window = int(max(15, 6 * typical_fwhm)) | 1
    baseline = ndimage.uniform_filter1d(ndimage.percentile_filter(smooth, 20, size=window, mode="nearest"), window,
                                        mode="nearest")
    peaks, props = signal.find_peaks(smooth, prominence=0, distance=2)
    if peaks.size:
        prominence = props["prominences"]
        height = smooth[peaks] - baseline[peaks]
        threshold = min_snr * sigma[peaks] * noise_factor
        significant = (np.minimum(height, prominence) >= threshold)
        peaks, prominence = peaks[significant], prominence[significant]
    if peaks.size == 0:
        return LineTable((), kind, float(np.median(sigma)), float(min_snr), n, (float(spectrum.pixel[0]), float(spectrum.pixel[-1])),
                         encoding=frame_encoding(spectrum))
    if max_lines is not None and peaks.size > max_lines:
        keep = np.sort(np.argsort(prominence)[::-1][:max_lines])
        peaks, prominence = peaks[keep], prominence[keep]
    widths = signal.peak_widths(smooth, peaks, rel_height=0.5)[0]
    widths = np.clip(widths, 1.0, max(1.0, n / 3))

    # Group lines whose profiles overlap so that they are fitted together.
    groups: list[list[int]] = [[0]]
    for k in range(1, peaks.size):
        previous = groups[-1][-1]
        if peaks[k] - peaks[previous] < 1.25 * (widths[k] + widths[previous]) and len(groups[-1]) < 6:
            groups[-1].append(k)
        else:
            groups.append([k])

    fitted = []  # (centre_index, centre_sigma, sigma_width, amplitude, background, chi2, saturated, group size, k)
    prepared = []
    for g_index, group in enumerate(groups):
        low = int(np.floor(peaks[group[0]] - 1.6 * widths[group[0]] - 2))
        high = int(np.ceil(peaks[group[-1]] + 1.6 * widths[group[-1]] + 2))
        # A window stops short of the next group's line: a faint line's window reaching into a
        # bright neighbour's wing was fitted as a spike (the speed benchmark's 720p CFL frame: a
        # line of 105 DN over noise 4.5 at 615.5 px, 9.7 px from one of 3400 DN, came out 0.7 px
        # wide at SNR 3.3). See _window_boundary.
        if g_index > 0:
            a, b = groups[g_index - 1][-1], group[0]
            low = max(low, int(np.ceil(_window_boundary(peaks, widths, prominence, sigma, a, b)[1])))
        if g_index + 1 < len(groups):
            a, b = group[-1], groups[g_index + 1][0]
            high = min(high, int(np.floor(_window_boundary(peaks, widths, prominence, sigma, a, b)[0])))
        low, high = max(0, low), min(n - 1, high)
        window = np.zeros(n, dtype=bool)
        window[low : high + 1] = True
        use = window & ~saturated
        n_params = 2 + 3 * len(group)
        clipped_group = bool(np.any(saturated & window))
        if use.sum() < n_params + 2:
            use = window
        guesses = [(float(prominence[k]), float(peaks[k]), float(widths[k] / _FWHM_PER_SIGMA)) for k in group]
        prepared.append((group, window, use, clipped_group, guesses))
    # All groups at once (vectorised); a group the batch does not settle is fitted alone with bounds.
    # Groups with clipped samples get the censored fit instead (the batch sees no sample of them).
    batch = _fit_groups(x, y, sigma, [np.zeros_like(p[2]) if p[3] else p[2] for p in prepared], [p[4] for p in prepared])
    # Narrowest width a clipped line may take: 0.8 x the median sigma of the lines fitted unclipped
    # and alone (the line-spread function), or the generic 0.3 px floor when there are fewer than 3.
    alone = [r[0][4] for p, r in zip(prepared, batch) if r is not None and len(p[0]) == 1 and not p[3]]
    min_width = max(0.3, 0.8 * float(np.median(alone))) if len(alone) >= 3 else 0.3
    for (group, window, use, clipped_group, guesses), result in zip(prepared, batch):
        if result is None and clipped_group:
            result = _fit_censored(x, y, sigma, window, saturated, guesses, min_width=min_width)
            if result is not None:
                use = window
        if result is None:
            result = _fit_group(x, y, sigma, use, guesses)
        if result is None and len(group) > 1:
            # fall back to one fit per line
            for k in group:
                single = _fit_single(x, y, sigma, saturated, peaks[k], widths[k], prominence[k], n)
                if single is not None:
                    fitted.append((*single, 2, k))
            continue
        if result is None:
            single = _fit_single(x, y, sigma, saturated, peaks[group[0]], widths[group[0]], prominence[group[0]], n)
            if single is not None:
                fitted.append((*single, 1, group[0]))
            continue
        params, cov, chi2 = result
        x0 = float(np.mean(x[use]))
        scale = max(1.0, chi2)
        for j, k in enumerate(group):
            base = 2 + 3 * j
            amplitude, centre, width_sigma = params[base : base + 3]
            centre_sigma = float(np.sqrt(cov[base + 1, base + 1] * scale))
            # The fit holds each centre within +-max(2, width) of its guess: a covariance wider than
            # that interval (a degenerate fit, e.g. two lines inside one clipped run) says only that
            # the centre is somewhere in it, i.e. the interval's uniform sigma.
            centre_sigma = min(centre_sigma, 2.0 * max(2.0, guesses[j][2]) / math.sqrt(12.0))
            if clipped_group:
                # A clipped line's centre rests on its wings alone, where an asymmetric line-spread
                # function or an undetected faint neighbour moves it by a fraction of the width that
                # the fit cannot see: on the accuracy benchmark's CFL frames, clipped, unblended Hg
                # and Eu lines sat 0.25 px RMS from the truth (10 lines, FWHM about 3 px) against
                # 0.03-0.09 px stated by the fit. A systematic 0.1 FWHM is added in quadrature.
                centre_sigma = float(np.hypot(centre_sigma, 0.1 * _FWHM_PER_SIGMA * width_sigma))
            background = float(params[1] + params[0] * (centre - x0))
            core = np.abs(x - centre) <= max(1.0, 1.2 * width_sigma)
            fitted.append((float(centre), centre_sigma, float(width_sigma), float(amplitude), background, chi2,
                           bool(np.any(saturated & core)) or (clipped_group and len(group) == 1), len(group), k))

    encoding = frame_encoding(spectrum)
    systematic = CENTRE_SYSTEMATIC_FWHM_LOSSLESS if encoding == "lossless" else CENTRE_SYSTEMATIC_FWHM
    lines = _assemble(fitted, spectrum, sigma, continuum, kind, x, n, min_snr, systematic)
    return LineTable(tuple(lines), kind, float(np.median(sigma)), float(min_snr), n,
                     (float(spectrum.pixel[0]), float(spectrum.pixel[-1])), encoding=encoding)


def _window_boundary(peaks, widths, prominence, sigma, a: int, b: int) -> tuple[float, float]:
    """Where the fit window of line ``a``'s group ends and that of the next group's line ``b`` starts.

    Each window stops where the other line's profile has fallen to its noise: ``k`` Gaussian
    sigmas from its centre with ``exp(-k**2 / 2) = noise / height``, and never past the midpoint
    between the two. It keeps at least 0.75 FWHM of its own line's side (lines closer than
    1.25 FWHM each are fitted together as one group).
    """
    pa, pb = float(peaks[a]), float(peaks[b])
    middle = 0.5 * (pa + pb)
    noise = max(float(sigma[int(round(middle))]), 1e-300)

    def reach(k):  # how far line k's wing stays above the noise
        return widths[k] / _FWHM_PER_SIGMA * math.sqrt(2.0 * math.log(max(prominence[k] / noise, 1.0)))

    end_a = max(pa + 0.75 * widths[a], min(middle, pb - reach(b)))
    start_b = min(pb - 0.75 * widths[b], max(middle, pa + reach(a)))
    return end_a, start_b


def frame_encoding(spectrum: Spectrum) -> str | None:
    """How the spectrum's frames were stored, as its provenance records it (see ``LineTable.encoding``)."""
    provenance = spectrum.provenance or {}
    frames = provenance.get("frames")
    # a stack's extraction keeps the stack's settings under "frames"; a spectrum written by
    # extract_frames (and read back from its CSV) has them in its own "settings"
    for settings in (frames.get("settings") if isinstance(frames, dict) else None, provenance.get("settings")):
        encoding = settings.get("encoding") if isinstance(settings, dict) else None
        if encoding is not None:
            return str(encoding)
    return None


def _typical_fwhm(y, sigma, min_snr) -> float:
    """Median FWHM (samples) of the most prominent peaks; sets smoothing and continuum scales."""
    peaks, props = signal.find_peaks(y, prominence=min_snr * float(np.median(sigma)), distance=2)
    if peaks.size == 0:
        return 3.0
    order = np.argsort(props["prominences"])[::-1][:7]
    widths = signal.peak_widths(y, peaks[order], rel_height=0.5)[0]
    return float(max(1.0, np.median(widths)))


def _fit_single(x, y, sigma, saturated, peak, width, prominence, n):
    low = int(max(0, np.floor(peak - 1.6 * width - 2)))
    high = int(min(n - 1, np.ceil(peak + 1.6 * width + 2)))
    window = np.zeros(n, dtype=bool)
    window[low : high + 1] = True
    use = window & ~saturated
    if use.sum() < 7:
        use = window
    result = _fit_group(x, y, sigma, use, [(float(prominence), float(peak), float(width / _FWHM_PER_SIGMA))])
    if result is None:
        return None
    params, cov, chi2 = result
    x0 = float(np.mean(x[use]))
    amplitude, centre, width_sigma = params[2:5]
    core = np.abs(x - centre) <= max(1.0, 1.2 * width_sigma)
    return (float(centre), float(np.sqrt(cov[3, 3] * max(1.0, chi2))), float(width_sigma), float(amplitude),
            float(params[1] + params[0] * (centre - x0)), chi2, bool(np.any(saturated & core)))


def _assemble(fitted, spectrum, sigma, continuum, kind, x, n, min_snr, systematic_fwhm=CENTRE_SYSTEMATIC_FWHM):
    if not fitted:
        return []
    fitted = [f for f in fitted if 0 <= f[0] <= n - 1 and np.isfinite(f[1]) and f[3] > 0]
    # A fit can shrink a noise bump found at the detection threshold to nothing: keep fitted lines
    # whose height still clears half the threshold.
    fitted = [f for f in fitted if f[3] >= 0.5 * min_snr * sigma[int(np.clip(round(f[0]), 0, n - 1))]]
    fitted.sort(key=lambda f: f[0])
    # Two guesses can converge on the same line: keep the stronger.
    merged = []
    for f in fitted:
        if merged and abs(f[0] - merged[-1][0]) < 0.5 * _FWHM_PER_SIGMA * min(f[2], merged[-1][2]):
            if f[3] > merged[-1][3]:
                merged[-1] = f
            continue
        merged.append(f)
    fwhm = np.array([f[2] * _FWHM_PER_SIGMA for f in merged])
    reference_fwhm = float(np.median(fwhm)) if fwhm.size else 0.0
    pixel = np.asarray(spectrum.pixel, dtype=float)
    wavelength = spectrum.wavelength_nm
    wl_sigma = spectrum.wavelength_uncertainty_nm
    pixel_step = np.gradient(pixel) if n > 1 else np.ones(1)
    lines = []
    for i, f in enumerate(merged):
        centre, centre_sigma, width_sigma, amplitude, background, chi2, clipped, group_size, _ = f
        this_fwhm = width_sigma * _FWHM_PER_SIGMA
        neighbours = [abs(centre - g[0]) for j, g in enumerate(merged) if j != i]
        nearest = min(neighbours) if neighbours else np.inf
        overlapping = nearest < 2.0 * 0.5 * (this_fwhm + reference_fwhm)
        too_wide = len(merged) >= 3 and this_fwhm > 1.6 * reference_fwhm
        index = int(np.clip(round(centre), 0, n - 1))
        step = float(np.interp(centre, x, pixel_step))
        level = float(continuum[index]) if continuum is not None else background
        area = float(amplitude * width_sigma * np.sqrt(2 * np.pi) * abs(step))
        centre_nm = sigma_nm = fwhm_nm = None
        if wavelength is not None:
            centre_nm = float(np.interp(centre, x, wavelength))
            dispersion = float(np.interp(centre, x, np.gradient(wavelength)))
            cal_sigma = float(np.interp(centre, x, wl_sigma)) if wl_sigma is not None else 0.0
            sigma_nm = float(np.hypot(centre_sigma * abs(dispersion), cal_sigma))
            fwhm_nm = float(this_fwhm * abs(dispersion))
        lines.append(
            Line(
                centre_px=float(np.interp(centre, x, pixel)),
                centre_uncertainty_px=float(centre_sigma * abs(step)),
                fwhm_px=float(this_fwhm * abs(step)),
                peak=float(amplitude),
                area=area,
                snr=float(amplitude / sigma[index]),
                kind=kind,
                blended=bool(overlapping or too_wide),
                saturated=bool(clipped),
                continuum=level,
                centre_nm=centre_nm,
                centre_uncertainty_nm=sigma_nm,
                fwhm_nm=fwhm_nm,
                centre_systematic_px=float(systematic_fwhm * this_fwhm * abs(step)),
            )
        )
    return lines


# ----------------------------------------------------------------------------- the live line finder

_SMOOTH_NOISE_FACTOR = math.sqrt(6.0) / 4.0  # noise of one sample after the (1, 2, 1)/4 kernel, white noise


def find_lines_quick(
    spectrum: Spectrum,
    *,
    min_snr: float = 5.0,
    max_lines: int | None = None,
    window_px: float | None = None,
) -> LineTable:
    """Emission lines of a live spectrum in well under a millisecond: no iterative fit per line.

    The same detection rule as :func:`find_lines` (a peak's height above the
    higher of the lowest levels on its two sides, against ``min_snr`` times
    the noise of the lightly smoothed spectrum), but every step is one
    vectorised pass over the spectrum or over all lines at once. Centres,
    widths and heights come from a weighted least-squares parabola through
    the logarithm of the background-subtracted samples of each line's core
    (a Gaussian is a parabola in log space), with the analytic covariance of
    that linear fit. Use :func:`find_lines` for saved spectra: it fits blends
    jointly and models a sloping background.

    Parameters
    ----------
    spectrum : Spectrum
        As for :func:`find_lines`.
    min_snr : float
        Minimum ratio of a line's height to the noise of one sample.
    max_lines : int, optional
        Keep only the highest ``max_lines`` lines.
    window_px : float, optional
        Samples on each side searched for the background level; default
        15, or 2.5 times the typical FWHM of the brightest peaks when wider.

    Returns
    -------
    LineTable
        With ``method="weighted log-parabola"``; ``blended`` flags lines
        closer than twice their mean FWHM (a blend is measured as one line).

    Raises
    ------
    InputError, LineError
        As :func:`find_lines`.

    Notes
    -----
    Caruana's method (log-parabola through a Gaussian's samples) with the
    weights ``y² / sigma²`` that make it a proper least-squares fit, iterated
    once with the model in the weights (Guo 2011, IEEE Signal Processing
    Magazine 28(5) 134; from memory). The centre's 1-sigma comes from the
    fit covariance propagated through ``x0 = -b / 2c`` and is scaled by the
    reduced chi-square where that exceeds 1; the background level's own
    uncertainty is not included, which matters only for faint lines.
    Samples flagged saturated are left out of the fit (the centre then comes
    from the line's unclipped flanks). Absorption lines are not searched.
    """
    if not isinstance(spectrum, Spectrum):
        raise InputError(f"`spectrum` must be a benchspec Spectrum, got {type(spectrum).__name__}")
    if not min_snr > 0:
        raise InputError(f"`min_snr` must be positive, was {min_snr}")
    if window_px is not None and not window_px >= 2:
        raise InputError(f"`window_px` must be at least 2, was {window_px}")
    n = spectrum.size
    if n < 7:
        raise InputError(f"the spectrum has {n} samples; at least 7 are needed to find a line")
    y = np.asarray(spectrum.intensity, dtype=np.float64)
    if not np.all(np.isfinite(y)):
        good = np.isfinite(y)
        if not good.any():
            raise LineError("the spectrum has no finite samples; check the extraction")
        index = np.arange(n)
        y = np.interp(index, index[good], y[good])
    if np.ptp(y) == 0:
        raise LineError("the spectrum is flat (every sample equal); there are no lines to find — check the frame is not blank")
    sigma = np.asarray(spectrum.uncertainty, dtype=np.float64)
    if not (np.all(np.isfinite(sigma)) and np.all(sigma > 0)):
        noise = estimate_noise(y)
        fallback = noise if noise > 0 else 1e-6 * np.ptp(y)
        sigma = np.where(np.isfinite(sigma) & (sigma > 0), sigma, fallback)
    saturated = np.asarray(spectrum.saturated, dtype=bool)
    pixel_range = (float(spectrum.pixel[0]), float(spectrum.pixel[-1]))

    noise_level = _middle(sigma, default=0.0)

    def empty():
        return LineTable((), "emission", noise_level, float(min_snr), n, pixel_range,
                         method="weighted log-parabola")

    smooth = np.empty(n)
    smooth[1:-1] = 0.25 * (y[:-2] + y[2:]) + 0.5 * y[1:-1]
    smooth[0], smooth[-1] = y[0], y[-1]
    local = ndimage.maximum_filter1d(smooth, 5, mode="nearest")
    candidates = np.flatnonzero((smooth[1:-1] > smooth[:-2]) & (smooth[1:-1] >= smooth[2:])
                                & (smooth[1:-1] >= local[1:-1])) + 1
    if candidates.size == 0:
        return empty()
    half = 7 if window_px is None else int(math.ceil(window_px))
    base, height = _side_levels(smooth, candidates, half)
    sigma_at = sigma[candidates]
    keep = height >= min_snr * _SMOOTH_NOISE_FACTOR * sigma_at
    peaks, base, height = candidates[keep], base[keep], height[keep]
    _, guess, _ = _three_point(y, peaks, base)
    typical = _middle(guess[np.isfinite(guess)], default=1.5)
    if window_px is None and 2.5 * _FWHM_PER_SIGMA * typical > 2 * half + 1:
        # broad lines: look further out for the background, then detect again
        half = int(math.ceil(1.25 * _FWHM_PER_SIGMA * typical))
        base, height = _side_levels(smooth, candidates, half)
        keep = height >= min_snr * _SMOOTH_NOISE_FACTOR * sigma_at
        peaks, base, height = candidates[keep], base[keep], height[keep]
        _, guess, _ = _three_point(y, peaks, base)
    if peaks.size == 0:
        return empty()
    if max_lines is not None and peaks.size > max_lines:
        order = np.sort(np.argsort(height)[::-1][:max_lines])
        peaks, base, height, guess = peaks[order], base[order], height[order], guess[order]
    fit = _log_parabola_fit(y, smooth, sigma, saturated, peaks, base, guess)
    lines = _assemble_quick(fit, spectrum, sigma, n, min_snr)
    return LineTable(tuple(lines), "emission", noise_level, float(min_snr), n, pixel_range,
                     method="weighted log-parabola")


def _clamp(values, low, high):
    """``np.clip`` without its per-call overhead (it dominates on the short arrays of the live path)."""
    return np.minimum(np.maximum(values, low), high)


def _middle(values: np.ndarray, *, default: float) -> float:
    """Median of a short array (the upper middle value for an even count), without np.median's overhead."""
    if values.size == 0:
        return default
    return float(np.partition(values, values.size // 2)[values.size // 2])


def _side_levels(smooth: np.ndarray, peaks: np.ndarray, half: int) -> tuple[np.ndarray, np.ndarray]:
    """Per peak: the higher of the lowest levels within ``2 half + 1`` samples on each side, and the height above it.

    The lowest level is taken from a 5-sample running mean: the minimum of
    noisy samples lies about two sigma below the true level, and would let
    noise peaks through as lines.
    """
    n = smooth.size
    lowest = ndimage.minimum_filter1d(ndimage.uniform_filter1d(smooth, 5, mode="nearest"), 2 * half + 1,
                                      mode="nearest")  # centred windows
    left = lowest[_clamp(peaks - half - 1, 0, n - 1)]
    right = lowest[_clamp(peaks + half + 1, 0, n - 1)]
    base = np.maximum(left, right)
    return base, smooth[peaks] - base


def _three_point(y, peaks, base):
    """Centre offset, Gaussian sigma and log-height from the three samples around each peak (Caruana)."""
    n = y.size
    i = _clamp(peaks, 1, n - 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        a, b, c = (np.log(np.maximum(y[i + k] - base, 1e-300)) for k in (-1, 0, 1))
        curvature = a - 2 * b + c
        width = np.sqrt(-1.0 / curvature)
        offset = 0.5 * (a - c) / curvature
    width = np.where(curvature < 0, width, np.nan)
    return offset, width, b


def _log_parabola_fit(y, smooth, sigma, saturated, peaks, base, guess, *, iterations: int = 2) -> dict:
    """Weighted parabola through log(y - base) of each line's core, all lines at once.

    A line's core runs at most about 1.2 Gaussian sigma either side of the
    peak, and stops where the smoothed spectrum rises again (a neighbour's
    flank). Returns arrays over the lines that gave a usable fit.
    """
    n = y.size
    guess = np.where(np.isfinite(guess), guess, _middle(guess[np.isfinite(guess)], default=1.5))
    clipped_run = np.zeros(peaks.size, dtype=int)
    if saturated.any():
        # a clipped core is left out: reach past it to the unclipped flanks
        run = ndimage.uniform_filter1d(saturated.astype(float), 9, mode="constant") * 9
        clipped_run = np.round(run[peaks]).astype(int)
    half = _clamp(np.ceil(1.2 * guess), 1, 10).astype(int) + (clipped_run + 1) // 2
    width = int(half.max())
    offsets = np.arange(-width, width + 1)
    index = _clamp(peaks[:, None] + offsets[None, :], 0, n - 1)
    inside = (np.abs(offsets)[None, :] <= half[:, None]) & (peaks[:, None] + offsets[None, :] >= 0) \
        & (peaks[:, None] + offsets[None, :] < n)
    # walking away from the peak, stop where the smoothed spectrum rises again
    level = smooth[index]
    falling = np.ones_like(inside)
    falling[:, width + 1:] = np.logical_and.accumulate(level[:, width + 1:] <= level[:, width:-1], axis=1)
    falling[:, :width] = np.logical_and.accumulate((level[:, :width] <= level[:, 1:width + 1])[:, ::-1], axis=1)[:, ::-1]
    values = y[index] - base[:, None]
    inside &= falling & ~saturated[index] & (values > 0)
    u = offsets.astype(float)
    design = np.stack([np.ones_like(u), u, u * u])  # (3, samples)
    products = (design[:, None, :] * design[None, :, :]).reshape(9, -1)
    logs = np.log(np.where(inside, values, 1.0))
    inverse_noise = 1.0 / sigma[index]
    model = np.where(inside, values, 0.0)
    ok = inside.sum(axis=1) >= 3
    for _ in range(iterations):
        weight = (model * inverse_noise) ** 2  # 1 / variance of log(y): y² / sigma² (0 outside the core)
        normal = (weight @ products.T).reshape(-1, 3, 3)
        rhs = (weight * logs) @ design.T
        cov, determinant = _inverse_3x3(normal)
        ok &= np.isfinite(determinant) & (determinant > 1e-300)
        coef = np.einsum("kij,kj->ki", cov, rhs)
        model = np.exp(np.minimum(coef @ design, 700.0)) * inside
    c0, c1, c2 = coef.T
    ok &= c2 < 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        shift = -c1 / (2 * c2)
        width_sigma = np.sqrt(-1.0 / (2 * c2))
        amplitude = np.exp(np.minimum(c0 - c1 * c1 / (4 * c2), 700.0))
        gradient = np.stack([np.zeros_like(c1), -1.0 / (2 * c2), c1 / (2 * c2 * c2)], -1)
        centre_var = np.einsum("bi,bij,bj->b", gradient, cov, gradient)
        residual = (((logs - coef @ design) * model * inverse_noise) ** 2).sum(axis=1)
        dof = inside.sum(axis=1) - 3
        chi2 = np.where(dof > 0, residual / np.maximum(dof, 1), 1.0)
    ok &= np.isfinite(shift) & (np.abs(shift) <= half + 0.5) & np.isfinite(centre_var) & (centre_var > 0)
    ok &= np.isfinite(width_sigma) & np.isfinite(amplitude)
    centre = peaks[ok] + shift[ok]
    width_sigma = width_sigma[ok]
    reach = np.maximum(1.0, 1.2 * width_sigma)
    counts = np.concatenate([[0], np.cumsum(saturated)])
    lo = _clamp(np.ceil(centre - reach), 0, n).astype(int)
    hi = _clamp(np.floor(centre + reach) + 1, 0, n).astype(int)
    return {
        "centre": centre,
        "centre_sigma": np.sqrt(centre_var[ok] * np.maximum(1.0, chi2[ok])),
        "width_sigma": width_sigma,
        "amplitude": amplitude[ok],
        "background": base[ok],
        "clipped": (counts[np.maximum(hi, lo)] - counts[lo]) > 0,
    }


def _inverse_3x3(m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverses (by cofactors) and determinants of a stack of symmetric 3x3 matrices; nan where singular."""
    a, b, c, d, e, f = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2], m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
    A, B, C = d * f - e * e, c * e - b * f, b * e - c * d
    determinant = a * A + b * B + c * C
    D, E, F = a * f - c * c, b * c - a * e, a * d - b * b
    with np.errstate(divide="ignore", invalid="ignore"):  # a singular matrix gives inf * 0 = nan, quietly
        scale = 1.0 / determinant
        inverse = np.stack([A, B, C, B, D, E, C, E, F], -1).reshape(-1, 3, 3) * scale[:, None, None]
    return inverse, determinant


def _assemble_quick(fit: dict, spectrum: Spectrum, sigma: np.ndarray, n: int, min_snr: float) -> list[Line]:
    """Line objects from :func:`_log_parabola_fit`'s arrays: the same rules as :func:`_assemble`, vectorised."""
    centre = fit["centre"]
    index = _clamp(np.round(centre), 0, n - 1).astype(int) if centre.size else np.zeros(0, int)
    keep = (centre >= 0) & (centre <= n - 1) & (fit["amplitude"] >= 0.5 * min_snr * sigma[index])
    order = np.argsort(centre[keep], kind="stable")
    f = {k: v[keep][order] for k, v in fit.items()}
    if f["centre"].size > 1:  # two peaks converging on one line: keep the stronger
        close = np.diff(f["centre"]) < 0.5 * _FWHM_PER_SIGMA * np.minimum(f["width_sigma"][1:], f["width_sigma"][:-1])
        if close.any():
            drop = np.zeros(f["centre"].size, dtype=bool)
            for k in np.flatnonzero(close):
                weaker = k if f["amplitude"][k] < f["amplitude"][k + 1] else k + 1
                drop[weaker] = True
            f = {k: v[~drop] for k, v in f.items()}
    centre = f["centre"]
    if centre.size == 0:
        return []
    fwhm = f["width_sigma"] * _FWHM_PER_SIGMA
    reference = _middle(fwhm, default=0.0)
    gaps = np.empty(centre.size + 1)
    gaps[0] = gaps[-1] = np.inf
    gaps[1:-1] = np.diff(centre)
    nearest = np.minimum(gaps[:-1], gaps[1:])
    blended = (nearest < (fwhm + reference)) | ((centre.size >= 3) & (fwhm > 1.6 * reference))
    x = np.arange(n, dtype=float)
    pixel = np.asarray(spectrum.pixel, dtype=float)
    spacing = np.diff(pixel)
    if spacing[0] == spacing[-1] and spacing.min() == spacing.max():  # the usual evenly spaced axis
        step = np.full(centre.size, abs(float(spacing[0])))
    else:
        step = np.abs(np.interp(centre, x, np.gradient(pixel)))
    index = _clamp(np.round(centre), 0, n - 1).astype(int)
    columns = {
        "centre_px": np.interp(centre, x, pixel),
        "centre_uncertainty_px": f["centre_sigma"] * step,
        "fwhm_px": fwhm * step,
        "peak": f["amplitude"],
        "area": f["amplitude"] * f["width_sigma"] * math.sqrt(2 * math.pi) * step,
        "snr": f["amplitude"] / sigma[index],
        "continuum": f["background"],
    }
    wavelength = spectrum.wavelength_nm
    if wavelength is not None:
        dispersion = np.abs(np.interp(centre, x, np.gradient(wavelength)))
        wl_sigma = spectrum.wavelength_uncertainty_nm
        calibration = np.interp(centre, x, wl_sigma) if wl_sigma is not None else np.zeros(centre.size)
        columns["centre_nm"] = np.interp(centre, x, wavelength)
        columns["centre_uncertainty_nm"] = np.hypot(f["centre_sigma"] * dispersion, calibration)
        columns["fwhm_nm"] = fwhm * dispersion
    none = [None] * centre.size
    rows = zip(columns["centre_px"].tolist(), columns["centre_uncertainty_px"].tolist(), columns["fwhm_px"].tolist(),
               columns["peak"].tolist(), columns["area"].tolist(), columns["snr"].tolist(), blended.tolist(),
               f["clipped"].tolist(), columns["continuum"].tolist(),
               *(columns[k].tolist() if k in columns else none for k in ("centre_nm", "centre_uncertainty_nm", "fwhm_nm")))
    return [Line(c, cs, w, p, a, snr, "emission", bl, sat, cont, nm, nms, wnm)
            for c, cs, w, p, a, snr, bl, sat, cont, nm, nms, wnm in rows]
