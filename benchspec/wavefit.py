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


def _grating_fit(pixel, lam, sigma, *, sign, width_px, axis_px, start_px, start_nm, start_disp):
    """Weighted least-squares fit of the grating model (B = 0). Returns (params, cov, chi2) or None.

    Starts from the polynomial's wavelength and |dispersion| at ``start_px`` for a few focal
    lengths and optical-axis positions; bounds f in [0.2, 20] x width and theta in (-80, 80) deg;
    a Gaussian prior of 0.1 x width keeps x0 near ``axis_px`` (the middle of the frame).
    The returned chi2 includes the prior's term.
    """
    from scipy.optimize import least_squares

    pixel, lam, sigma = (np.asarray(v, dtype=float) for v in (pixel, lam, sigma))
    if pixel.size < 5 or not start_nm > 0 or not abs(start_disp) > 0:
        return None
    width = max(float(width_px), 10.0)
    lower = np.array([1.0, math.radians(-80.0), start_px - 20 * width, 0.2 * width])
    upper = np.array([1e6, math.radians(80.0), start_px + 20 * width, 20.0 * width])

    # Weak prior: the optical axis meets the sensor near the middle of the frame (a webcam's principal
    # point is within a few per cent of the image centre; common practice, no source). It lifts the
    # near-degeneracy of x0 with theta that would otherwise make extrapolation loose.
    axis_px, axis_sigma = float(axis_px), 0.1 * width

    def residual(p):
        return np.r_[(_grating_eval(p, pixel, sign) - lam) / sigma, (p[2] - axis_px) / axis_sigma]

    def jacobian(p):
        prior = np.array([[0.0, 0.0, 1.0 / axis_sigma, 0.0]])
        return np.vstack([_grating_jacobian(p, pixel, sign) / sigma[:, None], prior])

    best = None
    for f_factor in (0.6, 1.2, 2.5, 6.0):
        f = f_factor * width
        for x0 in (axis_px, start_px, start_px - 0.5 * width, start_px + 0.5 * width):
            # at start_px: A sin(theta + atan(u0)) = lambda0 and A cos(...) / (f (1 + u0^2)) = |D|
            u0 = sign * (start_px - x0) / f
            phi = math.atan2(start_nm, abs(start_disp) * f * (1.0 + u0**2))
            theta = phi - math.atan(u0)
            a = start_nm / math.sin(phi)
            p0 = np.array([a, theta, x0, f])
            if not np.all((p0 > lower) & (p0 < upper)):
                continue
            try:
                fit = least_squares(residual, p0, jac=jacobian, bounds=(lower, upper), x_scale="jac", method="trf",
                                    max_nfev=200)
            except (ValueError, np.linalg.LinAlgError):
                continue
            chi2 = float(np.sum(fit.fun**2))
            if np.isfinite(chi2) and (best is None or chi2 < best[2]):
                best = (fit.x, fit.jac, chi2)
    if best is None:
        return None
    params, jac, chi2 = best
    try:
        cov = np.linalg.pinv(jac.T @ jac)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(cov)):
        return None
    return params, cov, chi2


def _grating_deletion_z(pixel, lam, sigma, params, chi2, sign, keep, refit):
    """Studentised deletion residuals of the kept lines of a grating fit (0 for the others).

    z_i = r_i / (sigma_i sqrt(1 - h_i)), h from the linearised hat matrix, so that z_i**2 is
    the drop in chi-square when line i is left out; lines of high leverage (h > 0.8) are
    refitted without them (``refit(mask)`` -> (params, cov, chi2) or None) and z_i is the
    square root of the actual drop. Four parameters on a handful of tightly known lines make
    some lines pivotal, so the prediction's own uncertainty must be counted before calling a
    line an outlier.
    """
    out = np.zeros(pixel.size)
    index = np.flatnonzero(keep)
    jac = _grating_jacobian(params, pixel, sign) / sigma[:, None]
    inverse = np.linalg.pinv(jac[index].T @ jac[index])
    leverage = np.einsum("ij,jk,ik->i", jac, inverse, jac)
    residual = (lam - _grating_eval(params, pixel, sign)) / sigma
    for i in index:
        if leverage[i] <= 0.8:
            out[i] = residual[i] / math.sqrt(1.0 - leverage[i])
            continue
        mask = keep.copy()
        mask[i] = False
        other = refit(mask)
        drop = chi2 - other[2] if other is not None else residual[i] ** 2 / 0.2
        out[i] = math.copysign(math.sqrt(max(drop, 0.0)), residual[i])
    return out


# --------------------------------------------------------------------------- fitting


def _weighted_polyfit(t, lam, sigma, order):
    vander = np.stack([t**k for k in range(order + 1)], axis=-1)
    weights = 1.0 / sigma
    a = vander * weights[:, None]
    b = lam * weights
    coeffs, *_ = np.linalg.lstsq(a, b, rcond=None)
    residual = lam - vander @ coeffs
    chi2 = float(np.sum((residual / sigma) ** 2))
    try:
        cov = np.linalg.inv(a.T @ a)
    except np.linalg.LinAlgError:
        cov = np.full((order + 1, order + 1), np.inf)
    return coeffs, cov, residual, chi2


def _loo_residuals(t, lam, sigma, keep, order):
    """Leave-one-out residuals (nm) of the kept lines: each line against the fit of the others.

    r / (1 - h) from the hat matrix, except for lines of high leverage (h > 0.8, e.g. an end line
    that alone sets the curvature), which are refitted without them: there r / (1 - h) is 0 / 0.
    """
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    if index.size <= order + 1:
        return out
    vander = np.stack([t**k for k in range(order + 1)], axis=-1) / sigma[:, None]
    coeffs, *_ = np.linalg.lstsq(vander[index], lam[index] / sigma[index], rcond=None)
    residual = lam - np.polynomial.polynomial.polyval(t, coeffs)
    inverse = np.linalg.pinv(vander[index].T @ vander[index])
    leverage = np.einsum("ij,jk,ik->i", vander, inverse, vander)
    for i in index:
        if leverage[i] <= 0.8:
            out[i] = residual[i] / (1.0 - leverage[i])
            continue
        others = index[index != i]
        refit, *_ = np.linalg.lstsq(vander[others], lam[others] / sigma[others], rcond=None)
        out[i] = lam[i] - np.polynomial.polynomial.polyval(t[i], refit)
    return out


def _select_order(t, lam, sigma, keep, *, max_order, monotonic_t):
    """Best polynomial order on the kept lines by BIC (each order must gain > 2); None if nothing fits."""
    best = None
    m = int(keep.sum())
    # A flat sensor behind a grating always bends the dispersion (x = f tan(beta)), so with enough
    # lines the search starts at order 2; order 1 is only for three or four lines.
    lowest = 2 if m >= 5 and max_order >= 2 else 1
    for order in range(lowest, max_order + 1):
        # order 3 needs two spare lines, lower orders one (or none for a line through two points)
        if m < order + (3 if order == 3 else 2) and not (order == 1 and m == 2):
            break
        coeffs, cov, residual, chi2 = _weighted_polyfit(t[keep], lam[keep], sigma[keep], order)
        deriv = np.polynomial.polynomial.polyval(monotonic_t, np.polynomial.polynomial.polyder(coeffs))
        if order > 1 and not (np.all(deriv > 0) or np.all(deriv < 0)):
            continue  # a fold inside the range is never physical
        bic = chi2 + (order + 1) * math.log(max(m, 2))
        if best is None or bic < best[0] - 2.0:
            best = (bic, coeffs, cov, chi2, order)
    return best


def _robust_fit(t, lam, sigma, *, max_order, monotonic_t):
    """Weighted polynomial fit, order 1-3 by BIC, outliers rejected one at a time at 4 robust sigma.

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
        z = (lam - np.polynomial.polynomial.polyval(t, coeffs)) / sigma
        # Leave-one-out residuals r / (1 - h): a line the polynomial bends to reach (typically an
        # end line assigned to the wrong reference) stands out although its own residual is small.
        z_loo = np.where(keep, _loo_residuals(t, lam, sigma, keep, order) / sigma, z)
        spread = max(1.0, 1.4826 * float(np.median(np.abs(z[keep] - np.median(z[keep])))))
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
