"""The fit stage of wavelength calibration: weighted polynomials and the grating-shaped model.

Matched (pixel, wavelength, sigma) triples in, coefficients, covariance and
outlier masks out. :mod:`benchspec.wavecal` does the matching and decides;
this module only fits. Everything here is pure numpy/scipy on small arrays.
"""

from __future__ import annotations

import math

import numpy as np

__all__: list[str] = []  # internal to benchspec.wavecal

# --------------------------------------------------------------------------- the grating model
#
# A flat sensor behind a lens behind a transmission grating (pinhole camera): a ray leaving the grating
# at angle beta lands at x = x0 + f tan(beta - tilt), and the grating equation m lambda = d (sin alpha +
# sin beta) gives lambda(x) = A sin(theta + atan(s (x - x0) / f)) + B with A = d / m, theta = tilt and
# B = -A sin(alpha) (0 at normal incidence, the default here). s = +1 or -1 says which side blue is on.


def _grating_phase(params, pixel, sign):
    a, theta, x0, f = (float(v) for v in params)
    u = sign * (np.asarray(pixel, dtype=float) - x0) / f
    return a, theta, f, u, theta + np.arctan(u)


def _grating_eval(params, pixel, sign, offset_nm=0.0):
    a, _, _, _, phi = _grating_phase(params, pixel, sign)
    return a * np.sin(phi) + offset_nm


def _grating_derivative(params, pixel, sign):
    a, _, f, u, phi = _grating_phase(params, pixel, sign)
    return a * np.cos(phi) * sign / (f * (1.0 + u**2))


def _grating_jacobian(params, pixel, sign):
    """d lambda / d (A, theta, x0, f), shape (..., 4)."""
    a, _, f, u, phi = _grating_phase(params, pixel, sign)
    g = a * np.cos(phi) / (1.0 + u**2)
    return np.stack([np.sin(phi), a * np.cos(phi), -g * sign / f, -g * u / f], axis=-1)


_THETA_LIMIT_RAD = math.radians(80.0)


def _grating_bounds(width, start_px):
    """Box of admissible (A, theta, x0, f): f in [0.2, 20] x width, |theta| < 80 deg, x0 within 20 widths."""
    lower = np.array([1.0, -_THETA_LIMIT_RAD, start_px - 20 * width, 0.2 * width])
    upper = np.array([1e6, _THETA_LIMIT_RAD, start_px + 20 * width, 20.0 * width])
    return lower, upper


def _grating_profile(pixel, lam, weight, sign, x0, f):
    """Best (A, theta) for each (x0, f), by linear least squares, and the chi-square left.

    For fixed x0 and f the model is linear in (A cos theta, A sin theta):
    lambda = A cos(theta) u / sqrt(1 + u^2) + A sin(theta) / sqrt(1 + u^2), u = s (x - x0) / f
    (variable projection, Golub and Pereyra 1973). ``x0`` and ``f`` broadcast together; the
    results have their shape. Points outside the bounds on A and theta get chi2 = inf.
    """
    x0, f = np.broadcast_arrays(np.asarray(x0, dtype=float), np.asarray(f, dtype=float))
    u = sign * (pixel - x0[..., None]) / f[..., None]
    root = 1.0 / np.sqrt(1.0 + u * u)
    b1, b2 = u * root * weight, root * weight
    y = lam * weight
    s11, s12, s22 = (b1 * b1).sum(-1), (b1 * b2).sum(-1), (b2 * b2).sum(-1)
    t1, t2 = (b1 * y).sum(-1), (b2 * y).sum(-1)
    det = s11 * s22 - s12 * s12
    with np.errstate(divide="ignore", invalid="ignore"):
        c1 = (s22 * t1 - s12 * t2) / det
        c2 = (s11 * t2 - s12 * t1) / det
        chi2 = float(y @ y) - (c1 * t1 + c2 * t2)
    a = np.hypot(c1, c2)
    theta = np.arctan2(c2, c1)
    ok = np.isfinite(chi2) & (det > 0) & (np.abs(theta) < _THETA_LIMIT_RAD) & (a > 1.0)
    return a, theta, np.where(ok, np.maximum(chi2, 0.0), np.inf)


def _zoom_minimum(values, grid, evaluate, rounds):
    """Refine the minimum of ``evaluate`` along the last axis of ``grid`` by repeated 7-point zooms.

    ``values = evaluate(grid)``; each round spans the two cells around the current best and
    samples them again. Works on many independent rows at once. Returns (best grid value, best value).
    """
    rows = np.arange(grid.shape[0])
    k = np.argmin(values, axis=-1)
    step = np.abs(np.diff(grid, axis=-1)).mean(axis=-1)
    best_x, best_v = grid[rows, k], values[rows, k]
    for _ in range(rounds):
        grid = best_x[:, None] + step[:, None] * np.linspace(-1.0, 1.0, 7)
        values = evaluate(grid)
        k = np.argmin(values, axis=-1)
        better = values[rows, k] < best_v
        best_x = np.where(better, grid[rows, k], best_x)
        best_v = np.where(better, values[rows, k], best_v)
        step = step / 3.0
    return best_x, best_v


def _grating_search(pixel, lam, sigma, *, sign, width, axis_px, axis_sigma, x0_range, log_f_range, n_x0=17, n_f=40,
                    zoom_rounds=1):
    """Search of (x0, f) for the grating model over a box: for each x0 the best f (the valley floor),
    then the best x0 along it (with the prior), each refined by ``zoom_rounds`` zooming grids.
    One round is enough to start :func:`_grating_polish` in the minimum's basin (on 35 global
    fits of 20 accuracy benches, three rounds reached the same minimum to 4e-6 sigma).
    Returns the starting parameters (A, theta, x0, f) or None."""
    weight = 1.0 / sigma

    def floor_of(x0):  # best log f and chi2 for each x0 (1-D array)
        log_f = np.broadcast_to(np.linspace(*log_f_range, n_f), (x0.size, n_f))
        evaluate = lambda lf: _grating_profile(pixel, lam, weight, sign, x0[:, None], np.exp(lf))[2]
        return _zoom_minimum(evaluate(log_f), log_f, evaluate, zoom_rounds)

    def total(x0):
        log_f, chi2 = floor_of(x0)
        return chi2 + ((x0 - axis_px) / axis_sigma) ** 2, log_f

    x0 = np.linspace(*x0_range, n_x0)
    values, _ = total(x0)
    if not np.any(np.isfinite(values)):
        return None
    evaluate = lambda grid: total(grid.ravel())[0].reshape(grid.shape)
    best_x0, _ = _zoom_minimum(values[None, :], x0[None, :], evaluate, zoom_rounds)
    log_f, chi2 = floor_of(best_x0)
    if not np.isfinite(chi2[0]):
        return None
    f = float(np.exp(log_f[0]))
    a, theta, _ = _grating_profile(pixel, lam, weight, sign, best_x0[0], f)
    return np.array([float(a), float(theta), float(best_x0[0]), f])


def _grating_polish(params, pixel, lam, sigma, *, sign, axis_px, axis_sigma, lower, upper, max_iter=60):
    """Least squares on the 4 grating parameters, inside the bounds, by variable projection.

    For fixed (x0, f) the model is linear in (A cos theta, A sin theta) (see :func:`_grating_profile`),
    so those two are solved exactly at every step and Levenberg-Marquardt (Marquardt 1963 diagonal
    scaling) runs on (x0, f) alone, with Kaufman's (1975) Jacobian of the projected residual
    (Golub and Pereyra 2003). The full four-parameter problem has a long curved valley (x0, f and
    theta trade off against each other) along which plain LM crawls: from the grid's best point it
    was still 0.01-1 sigma short of the minimum after 20-60 steps; the projected problem reaches it
    in 2-4. A step that leaves the bounds on A or theta is refused like one that raises chi2.
    Residuals (model - lambda) / sigma and the Gaussian prior (x0 - axis) / axis_sigma.
    Returns (params, jacobian of the residual vector, chi2) or None.
    """
    pixel = np.asarray(pixel, dtype=float)
    weight = 1.0 / np.asarray(sigma, dtype=float)
    y = np.asarray(lam, dtype=float) * weight
    n = pixel.size
    low_nl, high_nl = np.asarray(lower[2:], dtype=float), np.asarray(upper[2:], dtype=float)

    def projected(q):
        """(residual vector, (A, theta), Kaufman Jacobian d r / d (x0, f)) at q = (x0, f), or None."""
        x0, f = float(q[0]), float(q[1])
        u = sign * (pixel - x0) / f
        root = 1.0 / np.sqrt(1.0 + u * u)
        b1, b2 = u * root * weight, root * weight
        s11, s12, s22 = float(b1 @ b1), float(b1 @ b2), float(b2 @ b2)
        det = s11 * s22 - s12 * s12
        if not det > 0:
            return None
        t1, t2 = float(b1 @ y), float(b2 @ y)
        c1, c2 = (s22 * t1 - s12 * t2) / det, (s11 * t2 - s12 * t1) / det
        a, theta = math.hypot(c1, c2), math.atan2(c2, c1)
        if not (lower[0] <= a <= upper[0] and lower[1] < theta < upper[1]):
            return None
        r = np.empty(n + 1)
        r[:n] = c1 * b1 + c2 * b2 - y
        r[n] = (x0 - axis_px) / axis_sigma
        # d model / d (x0, f) at fixed (A, theta) (cf. _grating_jacobian), weighted, then the part the
        # linear parameters can absorb projected out (Kaufman's approximation)
        g = (c1 - c2 * u) * root**3  # A cos(phi) / (1 + u^2), phi = theta + atan(u)
        j = np.empty((n + 1, 2))
        j[:n, 0] = -g * sign / f * weight
        j[:n, 1] = -g * u / f * weight
        for k in range(2):
            col = j[:n, k]
            p1, p2 = float(b1 @ col), float(b2 @ col)
            j[:n, k] = col - b1 * ((s22 * p1 - s12 * p2) / det) - b2 * ((s11 * p2 - s12 * p1) / det)
        j[n] = (1.0 / axis_sigma, 0.0)
        return r, (a, theta), j

    q = np.minimum(np.maximum(np.asarray(params, dtype=float)[2:], low_nl), high_nl)
    state = projected(q)
    if state is None:
        return None
    r, linear, j = state
    chi2 = float(r @ r)
    damping = 1e-3
    for _ in range(max_iter):
        h = j.T @ j
        grad = j.T @ r
        scale = np.maximum(np.diag(h), 1e-300)
        improved = converged = False
        for _ in range(12):
            try:
                step = np.linalg.solve(h + damping * np.diag(scale), -grad)
            except np.linalg.LinAlgError:
                damping *= 10.0
                continue
            trial = np.minimum(np.maximum(q + step, low_nl), high_nl)
            new = projected(trial)
            chi2_new = float(new[0] @ new[0]) if new is not None else np.inf
            if np.isfinite(chi2_new) and chi2_new <= chi2:
                converged = chi2 - chi2_new <= 1e-10 * max(chi2, 1.0)
                q, (r, linear, j), chi2 = trial, new, chi2_new
                damping = max(damping / 10.0, 1e-12)
                improved = True
                break
            damping *= 10.0
        if not improved or converged:
            break
    if not np.isfinite(chi2):
        return None
    p = np.array([linear[0], linear[1], q[0], q[1]])
    # the full four-parameter Jacobian at the minimum (the covariance's)
    full = np.empty((n + 1, 4))
    full[:n] = _grating_jacobian(p, pixel, sign) * weight[:, None]
    full[n] = (0.0, 0.0, 1.0 / axis_sigma, 0.0)
    return p, full, chi2


def _grating_fit(pixel, lam, sigma, *, sign, width_px, axis_px, start_px=None, start_nm=None, start_disp=None,
                 initial=None):
    """Weighted least-squares fit of the grating model (B = 0). Returns (params, cov, chi2) or None.

    The global search is a grid over the optical-axis position x0 (within +-0.8 widths of
    ``axis_px``) and the focal length f (0.2-20 widths, log-spaced), each point solved
    exactly for (A, theta) by linear least squares; the best point is polished by
    :func:`_grating_polish` (variable projection). With ``initial`` (a nearby solution, e.g.
    of the same lines but one) the grid is skipped and only the polish runs. The covariance
    is :func:`_covariance_of` the Jacobian at the minimum.
    Bounds: f in [0.2, 20] x width and theta in (-80, 80) deg; a Gaussian prior of
    0.1 x width keeps x0 near ``axis_px`` (the middle of the frame).
    The returned chi2 includes the prior's term. ``start_*`` (the polynomial's wavelength and
    dispersion at the middle of the lines) only check the inputs are usable.
    """
    pixel, lam, sigma = (np.asarray(v, dtype=float) for v in (pixel, lam, sigma))
    if pixel.size < 5:
        return None
    if start_nm is not None and not start_nm > 0 or start_disp is not None and not abs(start_disp) > 0:
        return None
    width = max(float(width_px), 10.0)
    lower, upper = _grating_bounds(width, float(axis_px) if start_px is None else float(start_px))

    # Weak prior: the optical axis meets the sensor near the middle of the frame (a webcam's principal
    # point is within a few per cent of the image centre; common practice, no source). It lifts the
    # near-degeneracy of x0 with theta that would otherwise make extrapolation loose.
    axis_px, axis_sigma = float(axis_px), 0.1 * width
    options = dict(sign=sign, axis_px=axis_px, axis_sigma=axis_sigma, lower=lower, upper=upper)
    if initial is not None:
        # the polish alone, from the nearby solution brought back inside the bounds (the one-step
        # deletion update can overshoot them): variable projection reaches the minimum from there
        # (on 37 such refits of 20 accuracy benches, the same minimum as a 9 x 9 grid around it first,
        # to 1e-4 sigma, in a quarter of the time)
        start = np.minimum(np.maximum(np.asarray(initial, dtype=float), lower), upper)
        polished = _grating_polish(start, pixel, lam, sigma, max_iter=20, **options)
    else:
        start = _grating_search(pixel, lam, sigma, sign=sign, width=width, axis_px=axis_px, axis_sigma=axis_sigma,
                                x0_range=(axis_px - 0.8 * width, axis_px + 0.8 * width),
                                log_f_range=(math.log(0.2 * width), math.log(20.0 * width)))
        polished = None if start is None else _grating_polish(start, pixel, lam, sigma, **options)
    if polished is None:
        return None
    params, jac, chi2 = polished
    cov = _covariance_of(jac)
    if cov is None:
        return None
    return params, cov, chi2


def _covariance_of(jac):
    """(J^T J)^-1 from the SVD of J with its columns scaled to unit norm; None if J is singular.

    The grating parameters differ in scale by up to 10 orders (A in nm, theta in radians, f in
    pixels) and, for a nearly straight spectrum (f near its upper bound), the normal matrix
    J^T J has a condition number of 1e20 or more: a pseudo-inverse of it drops its weakest
    directions as rounding noise, which are exactly the poorly determined ones, and the
    covariance came out 10-30 times too small (a 1.2 nm/px accuracy bench: 0.03 px stated
    against 0.1-0.16 px true errors). Scaling the columns and working on J itself leaves a
    condition number near the square root of that (Golub and Van Loan, Matrix Computations,
    sections 5.3 and 5.5, least-squares sensitivity and column scaling).
    """
    jac = np.asarray(jac, dtype=float)
    norms = np.sqrt(np.sum(jac * jac, axis=0))
    if not np.all(np.isfinite(jac)) or not np.all(norms > 0):
        return None
    try:
        _, singular, vt = np.linalg.svd(jac / norms, full_matrices=False)
    except np.linalg.LinAlgError:
        return None
    if not singular[-1] > 1e-12 * singular[0]:
        return None
    v = vt.T / singular
    cov = (v @ v.T) / np.outer(norms, norms)
    return cov if np.all(np.isfinite(cov)) else None


def _grating_deletion_z(pixel, lam, sigma, params, chi2, sign, keep, refit):
    """Studentised deletion residuals of the kept lines of a grating fit (0 for the others).

    z_i = r_i / (sigma_i sqrt(1 - h_i)), h from the linearised hat matrix, so that z_i**2 is
    the drop in chi-square when line i is left out; lines of high leverage (h > 0.8) are
    refitted without them (``refit(mask, params)`` -> (params, cov, chi2) or None, started
    from the one-step (Newton) deletion update of ``params``) and z_i is the square root of
    the actual drop. Four parameters on a handful of tightly known lines make some lines
    pivotal, so the prediction's own uncertainty must be counted before calling a line an outlier.
    """
    out = np.zeros(pixel.size)
    index = np.flatnonzero(keep)
    jac = _grating_jacobian(params, pixel, sign) / sigma[:, None]
    hessian = jac[index].T @ jac[index]
    inverse = np.linalg.pinv(hessian)
    leverage = np.einsum("ij,jk,ik->i", jac, inverse, jac)
    residual = (lam - _grating_eval(params, pixel, sign)) / sigma
    for i in index:
        if leverage[i] <= 0.8:
            out[i] = residual[i] / math.sqrt(1.0 - leverage[i])
            continue
        mask = keep.copy()
        mask[i] = False
        # one Newton step of the deletion: the linearised fit without line i
        step, *_ = np.linalg.lstsq(hessian - np.outer(jac[i], jac[i]), jac[i] * residual[i], rcond=None)
        start = params - step
        other = refit(mask, start)
        drop = chi2 - other[2] if other is not None else residual[i] ** 2 / 0.2
        out[i] = math.copysign(math.sqrt(max(drop, 0.0)), residual[i])
    return out


# --------------------------------------------------------------------------- fitting
#
# The polynomial problems are tiny (3-120 lines, 2-4 coefficients) and are solved thousands of times
# per calibration, so numpy's per-call overhead, not arithmetic, sets their cost. They are solved on
# the normal equations (one inverse gives the coefficients, with one step of iterative refinement, and
# the covariance), the Vandermonde matrix is built once for the highest order (a lower order's problem
# is its leading columns and the leading block of the normal matrix), and deletion residuals come
# from the hat matrix of one fit. Squaring the condition number is harmless while cond(A^T A) stays
# below _NORMAL_COND_LIMIT (rounding of ~1e-9 relative at worst); beyond it, and when a deletion
# leaves the others nearly unable to predict a line (1 - h below _MIN_SPARE), the SVD least squares
# (numpy lstsq) and explicit refits are used instead.

_NORMAL_COND_LIMIT = 1e7
_MIN_SPARE = 1e-3


def _vander(t, order):
    """Columns t**0 .. t**order (the highest order once; lower orders are its leading columns)."""
    out = np.empty((t.size, order + 1))
    out[:, 0] = 1.0
    if order >= 1:
        out[:, 1] = t
    for k in range(2, order + 1):
        out[:, k] = t**k
    return out


def _polyval(x, coeffs):
    """Horner's rule in the operation order of numpy.polynomial.polynomial.polyval (same results)."""
    c = coeffs.tolist() if isinstance(coeffs, np.ndarray) else list(coeffs)
    y = c[-1] + x * 0.0
    for k in range(len(c) - 2, -1, -1):
        y = c[k] + y * x
    return y


def _derivative_coeffs(coeffs):
    """Coefficients of the derivative (as numpy.polynomial.polynomial.polyder: k * c_k, the same values)."""
    c = np.asarray(coeffs, dtype=float)
    if c.size <= 1:
        return c[:1] * 0.0
    values = c.tolist()
    return np.array([k * values[k] for k in range(1, len(values))])


def _median(x):
    """Median of a small 1-D array (np.median's value, without its per-call overhead)."""
    s = np.sort(x)
    n = s.size
    if n == 0 or not math.isfinite(s[-1]) or not math.isfinite(s[0]):
        return float(np.median(x))
    h = n // 2
    return float(s[h]) if n % 2 else float((s[h - 1] + s[h]) / 2.0)


def _normal_solve(a, b, normal, rhs):
    """Least squares a c = b from the normal equations (``normal`` = a.T a, ``rhs`` = a.T b).

    One step of iterative refinement brings the coefficients to the accuracy of an orthogonal
    solver. Returns (coeffs, inverse of the normal matrix) or None when the normal matrix is
    singular or too ill-conditioned (trace(N) trace(N^-1) >= cond_2(N), checked against
    _NORMAL_COND_LIMIT): the caller then uses the SVD solver.
    """
    try:
        inverse = np.linalg.inv(normal)
    except np.linalg.LinAlgError:
        return None
    bound = float(normal.trace()) * float(inverse.trace())
    if not 0.0 < bound < _NORMAL_COND_LIMIT:
        return None
    coeffs = inverse @ rhs
    coeffs = coeffs + inverse @ ((b - a @ coeffs) @ a)
    return coeffs, inverse


def _lstsq_polyfit(vander, lam, sigma):
    """The SVD path (numpy lstsq), for problems the normal equations would not solve accurately."""
    weights = 1.0 / sigma
    a = vander * weights[:, None]
    coeffs, *_ = np.linalg.lstsq(a, lam * weights, rcond=None)
    try:
        cov = np.linalg.inv(a.T @ a)
    except np.linalg.LinAlgError:
        cov = np.full((vander.shape[1], vander.shape[1]), np.inf)
    return coeffs, cov


def _weighted_polyfit(t, lam, sigma, order):
    """Weighted least-squares polynomial (coefficients in t, lowest first).

    Returns (coeffs, cov = (A^T A)^-1, residual lam - fit in nm, chi2).
    """
    t, lam, sigma = (np.asarray(v, dtype=float) for v in (t, lam, sigma))
    vander = _vander(t, order)
    weights = 1.0 / sigma
    a = vander * weights[:, None]
    b = lam * weights
    solved = _normal_solve(a, b, a.T @ a, b @ a)
    coeffs, cov = solved if solved is not None else _lstsq_polyfit(vander, lam, sigma)
    residual = lam - vander @ coeffs
    chi2 = float(np.sum((residual / sigma) ** 2))
    return coeffs, cov, residual, chi2


def _hat_fit(t, lam, sigma, keep, order):
    """Fit on the kept lines and the leverage of every line under it.

    Returns (coeffs, vander of all lines, leverage h_i = a_i (A^T A)^-1 a_i of all lines) or None
    (ill-conditioned: the callers then use explicit refits).
    """
    vander = _vander(t, order)
    a = vander / sigma[:, None]
    ak, bk = a[keep], lam[keep] / sigma[keep]
    solved = _normal_solve(ak, bk, ak.T @ ak, bk @ ak)
    if solved is None:
        return None
    coeffs, inverse = solved
    leverage = np.einsum("ij,jk,ik->i", a, inverse, a)
    return coeffs, vander, leverage


def _loo_residuals(t, lam, sigma, keep, order):
    """Leave-one-out residuals (nm) of the kept lines: each line against the fit of the others.

    r / (1 - h) from the hat matrix of the fit on the kept lines (the exact leave-one-out residual
    of a linear least-squares fit). Lines the others can hardly predict (1 - h < _MIN_SPARE, where
    r / (1 - h) tends to 0 / 0) are refitted without them.
    """
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    if index.size <= order + 1:
        return out
    hat = _hat_fit(t, lam, sigma, keep, order)
    if hat is None:
        return _loo_residuals_svd(t, lam, sigma, keep, order)
    coeffs, vander, leverage = hat
    residual = lam[index] - vander[index] @ coeffs
    spare = 1.0 - leverage[index]
    good = spare >= _MIN_SPARE
    out[index[good]] = residual[good] / spare[good]
    if not good.all():
        out[index[~good]] = _loo_residuals_refit(t, lam, sigma, keep, order, index[~good])[index[~good]]
    return out


def _loo_residuals_svd(t, lam, sigma, keep, order):
    """Leave-one-out residuals on the SVD path: r / (1 - h) with the leverage from the pseudo-inverse,
    and refits for lines of high leverage (h > 0.8)."""
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    vander = _vander(t, order) / sigma[:, None]
    coeffs, *_ = np.linalg.lstsq(vander[index], lam[index] / sigma[index], rcond=None)
    residual = lam - _polyval(t, coeffs)
    inverse = np.linalg.pinv(vander[index].T @ vander[index])
    leverage = np.einsum("ij,jk,ik->i", vander, inverse, vander)
    low = index[leverage[index] <= 0.8]
    out[low] = residual[low] / (1.0 - leverage[low])
    high = index[leverage[index] > 0.8]
    out[high] = _loo_residuals_refit(t, lam, sigma, keep, order, high)[high]
    return out


def _loo_residuals_refit(t, lam, sigma, keep, order, lines):
    """Leave-one-out residuals of ``lines`` by explicit refits of the other kept lines (SVD)."""
    return _refit_without(t, lam, sigma, keep, order, lines, studentise=False)


def _deletion_z(t, lam, sigma, keep, order):
    """Studentised deletion residuals of the kept lines of a polynomial fit (0 for the others).

    Each kept line against the fit of the others, over the uncertainty of that difference:
    z_i = (lam_i - pred_i) / sqrt(sigma_i**2 + var(pred_i)), which for a weighted linear fit
    equals r_i / (sigma_i sqrt(1 - h_i)) with r_i and the leverage h_i from the fit on all kept
    lines (computed so, in one fit). An end line of high leverage is then judged against
    how well the other lines can predict it, not against its own (small) sigma alone: a tightly
    known end line that a loosely constrained extrapolation misses is not an outlier.
    Lines with 1 - h < _MIN_SPARE (and ill-conditioned problems) are refitted explicitly.
    """
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    if index.size <= order + 1:
        return out
    hat = _hat_fit(t, lam, sigma, keep, order)
    if hat is None:
        return _deletion_z_refit(t, lam, sigma, keep, order, index)
    coeffs, vander, leverage = hat
    residual = (lam[index] - vander[index] @ coeffs) / sigma[index]
    spare = 1.0 - leverage[index]
    good = spare >= _MIN_SPARE
    out[index[good]] = residual[good] / np.sqrt(spare[good])
    if not good.all():
        out[index[~good]] = _deletion_z_refit(t, lam, sigma, keep, order, index[~good])[index[~good]]
    return out


def _deletion_z_refit(t, lam, sigma, keep, order, lines):
    """Studentised deletion residuals of ``lines`` by explicit refits of the other kept lines (SVD)."""
    return _refit_without(t, lam, sigma, keep, order, lines, studentise=True)


def _refit_without(t, lam, sigma, keep, order, lines, *, studentise):
    """Each of ``lines`` against the fit of the other kept lines: its residual (nm), or with
    ``studentise`` that residual over sqrt(sigma**2 + var(prediction)). 0 for the other lines."""
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    vander = _vander(t, order) / sigma[:, None]
    for i in lines:
        others = index[index != i]
        a = vander[others]
        coeffs, *_ = np.linalg.lstsq(a, lam[others] / sigma[others], rcond=None)
        basis = vander[i] * sigma[i]
        residual = lam[i] - basis @ coeffs
        if not studentise:
            out[i] = residual
            continue
        try:
            variance = float(basis @ np.linalg.pinv(a.T @ a) @ basis)
        except np.linalg.LinAlgError:
            variance = np.inf
        out[i] = residual / math.sqrt(sigma[i] ** 2 + max(variance, 0.0))
    return out


def _select_order(t, lam, sigma, keep, *, max_order, monotonic_t):
    """Best polynomial order on the kept lines by BIC (each order must gain > 2); None if nothing fits.

    Returns (bic, coeffs, cov, chi2, order).
    """
    m = int(keep.sum())
    # A flat sensor behind a grating always bends the dispersion (x = f tan(beta)), so with enough
    # lines the search starts at order 2; order 1 is only for three or four lines.
    lowest = 2 if m >= 5 and max_order >= 2 else 1
    orders = []
    for order in range(lowest, max_order + 1):
        # order 3 needs two spare lines, lower orders one (or none for a line through two points)
        if m < order + (3 if order == 3 else 2) and not (order == 1 and m == 2):
            break
        orders.append(order)
    if not orders:
        return None
    tk, lk, sk = t[keep], lam[keep], sigma[keep]
    vander = _vander(tk, orders[-1])
    weights = 1.0 / sk
    a = vander * weights[:, None]
    b = lk * weights
    normal = a.T @ a
    rhs = b @ a
    log_m = math.log(max(m, 2))
    best = None
    for order in orders:
        p = order + 1
        ap = a[:, :p]
        solved = _normal_solve(ap, b, normal[:p, :p], rhs[:p])
        coeffs, cov = solved if solved is not None else _lstsq_polyfit(vander[:, :p], lk, sk)
        if order > 1:
            c = coeffs.tolist()
            deriv = _polyval(monotonic_t, [k * c[k] for k in range(1, p)])  # the derivative, by Horner
            if not (np.all(deriv > 0) or np.all(deriv < 0)):
                continue  # a fold inside the range is never physical
        chi2 = float(np.sum(((lk - vander[:, :p] @ coeffs) / sk) ** 2))
        bic = chi2 + p * log_m
        if best is None or bic < best[0] - 2.0:
            best = (bic, coeffs, cov, chi2, order)
    return best


def _robust_fit(t, lam, sigma, *, max_order, monotonic_t):
    """Weighted polynomial fit, order 1-3 by BIC, outliers rejected one at a time at 5 robust sigma.

    The order is chosen again after each rejection, so a line that only a
    higher order explains is not thrown out by a lower-order fit.
    Returns (coeffs, cov_scaled, keep_mask, chi2_reduced) or None.
    """
    n = t.size
    if n < 2:
        return None
    keep = np.ones(n, dtype=bool)
    best = _select_order(t, lam, sigma, keep, max_order=max_order, monotonic_t=monotonic_t)
    for _ in range(max(1, n // 3)):
        if best is None or keep.sum() <= best[4] + 2:
            break
        coeffs, order = best[1], best[4]
        z = (lam - _polyval(t, coeffs)) / sigma
        # Studentised deletion residuals: a line the polynomial bends to reach (typically an end
        # line assigned to the wrong reference) stands out although its own residual is small.
        z_loo = np.where(keep, _deletion_z(t, lam, sigma, keep, order), z)
        zk = z[keep]
        spread = max(1.0, 1.4826 * _median(np.abs(zk - _median(zk))))
        worst = int(np.argmax(np.where(keep, np.abs(z_loo), -1)))
        if not (abs(z_loo[worst]) > 5.0 * spread and abs(z_loo[worst]) > 5.0):
            break
        trial = keep.copy()
        trial[worst] = False
        refit = _select_order(t, lam, sigma, trial, max_order=max_order, monotonic_t=monotonic_t)
        if refit is None:
            break
        keep, best = trial, refit
    if best is None:
        return None
    _, coeffs, cov, chi2, order = best
    dof = max(1, int(keep.sum()) - (order + 1))
    reduced = chi2 / dof
    return coeffs, cov * max(1.0, reduced), keep, reduced


# --------------------------------------------------------------------------- stated uncertainty

# Weight of the stated line uncertainties against the scatter the lines show, in degrees of freedom
# (a Bayesian scaled-inverse-chi-square prior centred on 1: with few lines the stated uncertainties
# dominate; with many, the measured scatter does).
_SCALE_PRIOR_DOF = 2.0


def _covariance_scale(normalised_residual, leverage, tight):
    """Variance factor for a fit's covariance from the scatter of its tightly known lines.

    ``normalised_residual`` = (reference - fitted) / sigma and ``leverage`` (diagonal of the hat
    matrix) of every fitted line; ``tight`` marks lines whose sigma is set by the centre
    measurement (not by a loosely known reference wavelength, whose near-zero chi-square
    terms would dilute the estimate). E[r_i^2] = 1 - h_i for a correct sigma, so
    s^2 = sum r_i^2 / sum (1 - h_i) over the tight lines; it is shrunk towards 1 with
    ``_SCALE_PRIOR_DOF`` pseudo degrees of freedom, so that a handful of lines that happen to
    agree closely do not make the solution overconfident.
    """
    r = np.asarray(normalised_residual, dtype=float)[tight]
    dof = float(np.sum(np.clip(1.0 - np.asarray(leverage, dtype=float)[tight], 0.0, 1.0)))
    chi2 = float(np.sum(r * r))
    return (chi2 + _SCALE_PRIOR_DOF) / (dof + _SCALE_PRIOR_DOF)


def _grating_effective_parameters(params, cov, pixel, sigma, sign):
    """Effective number of parameters of a grating fit: the trace of its hat matrix over the lines.

    The prior on x0 takes part of one parameter's freedom away, so a well-anchored fit has
    between 3 and 4 (Hastie, Tibshirani and Friedman, The Elements of Statistical Learning,
    section 7.6, effective degrees of freedom of a penalised fit).
    """
    jac = _grating_jacobian(params, pixel, sign) / np.asarray(sigma, dtype=float)[:, None]
    return float(np.einsum("ij,jk,ik->", jac, np.asarray(cov, dtype=float), jac))
