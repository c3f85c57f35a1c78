"""The polynomial fit stage of benchspec.wavefit (normal equations, one Vandermonde per order search,
deletion residuals from one hat matrix) against a straightforward reference written out here: numpy's
SVD least squares (numpy.linalg.lstsq, LAPACK gelsd) for every fit, and explicit refits without each
line for the deletion and leave-one-out residuals, on seeded random problems (well and badly
conditioned ones, and the smallest ones, n = order + 1).

Tolerance: 1e-9 relative (normwise) on coefficients and covariance. Both computations round; the
covariance (A^T A)^-1 carries cond(A^T A) x 1e-16 relative rounding whichever way it is computed,
and the fast path is used only below cond 1e7 (beyond it the SVD path is taken), so 1e-9 is the
rounding level allowed, a millionth of the smallest wavelength uncertainty that matters (0.01 px).
"""

import math

import numpy as np
import pytest

from benchspec import wavefit

# --------------------------------------------------------------------------- the reference


def _ref_vander(t, order):
    return np.stack([t**k for k in range(order + 1)], axis=-1)


def _ref_polyfit(t, lam, sigma, order):
    vander = _ref_vander(t, order)
    weights = 1.0 / sigma
    a = vander * weights[:, None]
    coeffs, *_ = np.linalg.lstsq(a, lam * weights, rcond=None)
    residual = lam - vander @ coeffs
    try:
        cov = np.linalg.inv(a.T @ a)
    except np.linalg.LinAlgError:
        cov = np.full((order + 1, order + 1), np.inf)
    return coeffs, cov, residual, float(np.sum((residual / sigma) ** 2))


def _ref_deletion_z(t, lam, sigma, keep, order):
    # (lam_i - prediction of the others) / sqrt(sigma_i^2 + var(prediction)), by refitting without line i
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    if index.size <= order + 1:
        return out
    vander = _ref_vander(t, order) / sigma[:, None]
    for i in index:
        others = index[index != i]
        a = vander[others]
        coeffs, *_ = np.linalg.lstsq(a, lam[others] / sigma[others], rcond=None)
        basis = vander[i] * sigma[i]
        variance = float(basis @ np.linalg.pinv(a.T @ a) @ basis)
        out[i] = (lam[i] - basis @ coeffs) / math.sqrt(sigma[i] ** 2 + max(variance, 0.0))
    return out


def _ref_loo(t, lam, sigma, keep, order):
    out = np.zeros(t.size)
    index = np.flatnonzero(keep)
    if index.size <= order + 1:
        return out
    for i in index:
        others = index[index != i]
        coeffs, *_ = _ref_polyfit(t[others], lam[others], sigma[others], order)
        out[i] = lam[i] - _ref_vander(t[i:i + 1], order)[0] @ coeffs
    return out


def _ref_select_order(t, lam, sigma, keep, *, max_order, monotonic_t):
    best = None
    m = int(keep.sum())
    lowest = 2 if m >= 5 and max_order >= 2 else 1
    for order in range(lowest, max_order + 1):
        if m < order + (3 if order == 3 else 2) and not (order == 1 and m == 2):
            break
        coeffs, cov, _, chi2 = _ref_polyfit(t[keep], lam[keep], sigma[keep], order)
        deriv = np.polynomial.polynomial.polyval(monotonic_t, np.polynomial.polynomial.polyder(coeffs))
        if order > 1 and not (np.all(deriv > 0) or np.all(deriv < 0)):
            continue
        bic = chi2 + (order + 1) * math.log(max(m, 2))
        if best is None or bic < best[0] - 2.0:
            best = (bic, coeffs, cov, chi2, order)
    return best


def _ref_robust_fit(t, lam, sigma, *, max_order, monotonic_t):
    n = t.size
    if n < 2:
        return None
    keep = np.ones(n, dtype=bool)
    best = _ref_select_order(t, lam, sigma, keep, max_order=max_order, monotonic_t=monotonic_t)
    for _ in range(max(1, n // 3)):
        if best is None or keep.sum() <= best[4] + 2:
            break
        coeffs, order = best[1], best[4]
        z = (lam - np.polynomial.polynomial.polyval(t, coeffs)) / sigma
        z_del = np.where(keep, _ref_deletion_z(t, lam, sigma, keep, order), z)
        spread = max(1.0, 1.4826 * float(np.median(np.abs(z[keep] - np.median(z[keep])))))
        worst = int(np.argmax(np.where(keep, np.abs(z_del), -1)))
        if not (abs(z_del[worst]) > 5.0 * spread and abs(z_del[worst]) > 5.0):
            break
        trial = keep.copy()
        trial[worst] = False
        refit = _ref_select_order(t, lam, sigma, trial, max_order=max_order, monotonic_t=monotonic_t)
        if refit is None:
            break
        keep, best = trial, refit
    if best is None:
        return None
    _, coeffs, cov, chi2, order = best
    reduced = chi2 / max(1, int(keep.sum()) - (order + 1))
    return coeffs, cov * max(1.0, reduced), keep, reduced


# --------------------------------------------------------------------------- random problems


def _problem(rng, kind, n, order=3):
    """(t, lam, sigma): a calibration-like curve (400-700 nm over t in [-1, 1]) with noise and outliers.

    ``well``: lines spread over the span, sigma 0.02-0.3 nm (tight centres and loose features);
    ``ill``: lines bunched into a small part of the span and sigma over 4 decades (cond(A^T A) from
    about 1e3 to 1e18, median 6e8: most take the SVD path); ``outliers``: a few lines moved by 20-60 sigma.
    """
    if kind == "ill":
        t = np.sort(rng.uniform(0.6, 0.6 + rng.choice([0.02, 0.2, 0.4]), n))
        sigma = 10.0 ** rng.uniform(-3.5, 0.5, n)
    else:
        t = np.sort(rng.uniform(-1, 1, n))
        sigma = np.where(rng.random(n) < 0.3, rng.uniform(0.1, 0.3, n), rng.uniform(0.02, 0.05, n))
    coeffs = np.array([550.0, 150.0, rng.uniform(-8, 8), rng.uniform(-2, 2)])[: order + 1]
    lam = np.polynomial.polynomial.polyval(t, coeffs) + rng.normal(0, 1, n) * sigma
    if kind == "outliers" and n >= 6:
        bad = rng.choice(n, size=max(1, n // 6), replace=False)
        lam[bad] += rng.choice([-1, 1], bad.size) * rng.uniform(20, 60, bad.size) * sigma[bad]
    return t, lam, sigma


def _rel(a, b):
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    assert a.shape == b.shape
    if not np.all(np.isfinite(b)):
        assert np.array_equal(np.isfinite(a), np.isfinite(b))
        a, b = a[np.isfinite(b)], b[np.isfinite(b)]
    return float(np.linalg.norm(a - b) / max(np.linalg.norm(b), 1e-300))


def _cases():
    rng = np.random.default_rng(20261202)
    cases = []
    for kind in ("well", "ill", "outliers"):
        for _ in range(60):
            order = int(rng.integers(1, 4))
            n = int(rng.integers(order + 1, 30))
            cases.append((kind, order, _problem(rng, kind, n, order)))
    for order in (1, 2, 3):  # the smallest problems: as many lines as coefficients, and one more
        for extra in (0, 1):
            for kind in ("well", "ill"):
                for _ in range(5):
                    cases.append((kind, order, _problem(rng, kind, order + 1 + extra, order)))
    return cases


CASES = _cases()


def test_the_cases_take_both_paths():
    # The ill-conditioned cases must reach the SVD fallback and the others the normal equations,
    # or the comparisons below would test only one of them.
    fast = fallback = 0
    for _, order, (t, lam, sigma) in CASES:
        a = _ref_vander(t, order) / sigma[:, None]
        b = lam / sigma
        if wavefit._normal_solve(a, b, a.T @ a, b @ a) is None:
            fallback += 1
        else:
            fast += 1
    assert fast > 100 and fallback > 20


@pytest.mark.parametrize("case", range(len(CASES)))
def test_weighted_polyfit_matches_svd_least_squares(case):
    _, order, (t, lam, sigma) = CASES[case]
    coeffs, cov, residual, chi2 = wavefit._weighted_polyfit(t, lam, sigma, order)
    r_coeffs, r_cov, r_residual, r_chi2 = _ref_polyfit(t, lam, sigma, order)
    assert _rel(coeffs, r_coeffs) < 1e-9
    assert _rel(cov, r_cov) < 1e-9
    # the residuals of a near-exact fit are tiny differences of ~500 nm values: compare in nm
    assert np.max(np.abs(residual - r_residual)) < 1e-9 * 700.0
    assert chi2 == pytest.approx(r_chi2, rel=1e-9, abs=1e-9)


def _well_posed(t, sigma, order):
    a = _ref_vander(t, order) / sigma[:, None]
    return np.linalg.cond(a.T @ a) < wavefit._NORMAL_COND_LIMIT


@pytest.mark.parametrize("case", range(len(CASES)))
def test_deletion_and_leave_one_out_residuals_match_refits(case):
    _, order, (t, lam, sigma) = CASES[case]
    keep = np.ones(t.size, dtype=bool)
    keep[::7] = t.size < 9  # some lines already left out (their entries stay 0)
    z = wavefit._deletion_z(t, lam, sigma, keep, order)
    loo = wavefit._loo_residuals(t, lam, sigma, keep, order)
    r_z = _ref_deletion_z(t, lam, sigma, keep, order)
    r_loo = _ref_loo(t, lam, sigma, keep, order)
    assert np.all(z[~keep] == 0) and np.all(loo[~keep] == 0)
    if _well_posed(t[keep], sigma[keep], order):
        # z is in units of sigma: 1e-7 is far below any threshold (5 robust sigma); the refits'
        # own rounding grows as 1 / (1 - h) for lines of high leverage
        assert np.max(np.abs(z - r_z)) < 1e-7 * max(1.0, np.max(np.abs(r_z)))
        assert np.max(np.abs(loo - r_loo)) < 1e-7 * max(1.0, np.max(np.abs(r_loo)))
    else:
        # past the conditioning limit the module refits each line on the SVD path, as the reference
        # does (the leave-one-out residuals of such problems are not compared: refits of a nearly
        # singular problem differ from r / (1 - h) by more than rounding, neither being better)
        assert np.allclose(z, r_z, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("case", range(len(CASES)))
def test_order_choice_and_rejection_match_the_reference(case):
    _, order, (t, lam, sigma) = CASES[case]
    monotonic_t = np.linspace(t.min() - 0.1, t.max() + 0.1, 33)
    max_order = min(3, max(1, t.size - 2))
    keep = np.ones(t.size, dtype=bool)
    chosen = wavefit._select_order(t, lam, sigma, keep, max_order=max_order, monotonic_t=monotonic_t)
    reference = _ref_select_order(t, lam, sigma, keep, max_order=max_order, monotonic_t=monotonic_t)
    assert (chosen is None) == (reference is None)
    if reference is not None:
        assert chosen[4] == reference[4]
        assert _rel(chosen[1], reference[1]) < 1e-9 and _rel(chosen[2], reference[2]) < 1e-9
        assert chosen[0] == pytest.approx(reference[0], rel=1e-9, abs=1e-9)
    robust = wavefit._robust_fit(t, lam, sigma, max_order=max_order, monotonic_t=monotonic_t)
    r_robust = _ref_robust_fit(t, lam, sigma, max_order=max_order, monotonic_t=monotonic_t)
    assert (robust is None) == (r_robust is None)
    if r_robust is not None:
        assert np.array_equal(robust[2], r_robust[2])  # the same lines rejected
        assert robust[0].size == r_robust[0].size  # the same order
        assert _rel(robust[0], r_robust[0]) < 1e-9 and _rel(robust[1], r_robust[1]) < 1e-9
        assert robust[3] == pytest.approx(r_robust[3], rel=1e-9, abs=1e-12)


def test_outlier_cases_do_reject_lines():
    # The rejection comparison above means something only if lines are rejected in some cases.
    rejected = 0
    for kind, _, (t, lam, sigma) in CASES:
        if kind != "outliers":
            continue
        fit = wavefit._robust_fit(t, lam, sigma, max_order=min(3, max(1, t.size - 2)),
                                  monotonic_t=np.linspace(t.min(), t.max(), 33))
        rejected += fit is not None and not fit[2].all()
    assert rejected >= 20


def test_horner_and_median_helpers_give_numpys_values():
    rng = np.random.default_rng(5)
    x = rng.uniform(-1.2, 1.2, 33)
    for size in (1, 2, 3, 4):
        c = rng.normal(0, 100, size)
        assert np.array_equal(wavefit._polyval(x, c), np.polynomial.polynomial.polyval(x, c))
        assert np.array_equal(wavefit._derivative_coeffs(c), np.polynomial.polynomial.polyder(c))
    for n in (1, 2, 5, 6, 31):
        v = rng.normal(0, 1, n)
        assert wavefit._median(v) == np.median(v)
