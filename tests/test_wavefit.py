"""The fit stage of wavelength calibration (benchspec.wavefit): the grating-shaped model's fit,
checked against the grating equation and an independent optimiser (scipy least_squares), and its
deletion residuals against full refits."""

import math

import numpy as np
import pytest
from scipy.optimize import least_squares

from benchspec.physics import diffraction_angle_deg
from benchspec.refdata import load_line_list
from benchspec.wavefit import _grating_deletion_z, _grating_eval, _grating_fit, _grating_profile

WIDTH_PX = 1920.0
AXIS_PX = 960.0


def _bench_lines(*, lines_per_mm=1000.0, tilt_deg=33.0, x0=1010.0, focal_px=2400.0, sign=1.0, seed=0, noise_px=0.03):
    """Pixel positions of NIST Hg and He lines on a flat sensor behind a grating (pinhole camera):
    x = x0 + s f tan(beta - tilt), beta from the grating equation (benchspec.physics, normal incidence)."""
    wavelength = np.array(sorted(l.wavelength_nm for species in ("Hg", "He")
                                 for l in load_line_list(species).lines if 400 < l.wavelength_nm < 680))
    beta = np.radians(diffraction_angle_deg(wavelength, lines_per_mm=lines_per_mm))
    pixel = x0 + sign * focal_px * np.tan(beta - math.radians(tilt_deg))
    inside = (pixel > 0) & (pixel < WIDTH_PX - 1)
    rng = np.random.default_rng(seed)
    return pixel[inside] + rng.normal(0, noise_px, inside.sum()), wavelength[inside]


def _fit(pixel, wavelength, sigma_nm, sign=1.0, **extra):
    return _grating_fit(pixel, wavelength, np.full(pixel.size, sigma_nm), sign=sign, width_px=WIDTH_PX,
                        axis_px=AXIS_PX, start_px=AXIS_PX, start_nm=550.0, start_disp=0.3 * sign, **extra)


@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_grating_fit_recovers_the_grating_equation(sign):
    # 1000 lines/mm: d = 1000 nm, so A = d / m = 1000 nm (textbook grating equation, m lambda = d sin beta).
    pixel, wavelength = _bench_lines(sign=sign, noise_px=0.0)
    params, cov, chi2 = _fit(pixel, wavelength, 0.01, sign=sign)
    assert params[0] == pytest.approx(1000.0, rel=2e-3)
    assert math.degrees(params[1]) == pytest.approx(33.0, abs=0.1)
    assert params[3] == pytest.approx(2400.0, rel=5e-3)
    # noiseless lines: only the x0 prior (50 px off-axis, prior sigma 192 px) costs chi-square
    assert chi2 < 0.1
    assert np.all(np.isfinite(cov)) and np.all(np.diag(cov) > 0)


def test_grating_fit_is_the_least_squares_minimum():
    # An independent optimiser (scipy least_squares, trust region, started at the truth) finds no
    # lower chi-square than our variable-projection search.
    pixel, wavelength = _bench_lines(seed=3, noise_px=0.05)
    sigma = np.full(pixel.size, 0.02)
    params, _, chi2 = _fit(pixel, wavelength, 0.02)

    def residual(p):
        return np.r_[(_grating_eval(p, pixel, 1.0) - wavelength) / sigma, (p[2] - AXIS_PX) / (0.1 * WIDTH_PX)]

    reference = least_squares(residual, [1000.0, math.radians(33.0), 1010.0, 2400.0], x_scale="jac", xtol=1e-14,
                              ftol=1e-14, gtol=1e-14, max_nfev=20000)
    assert chi2 <= float(np.sum(reference.fun**2)) + 1e-6
    np.testing.assert_allclose(_grating_eval(params, pixel, 1.0), _grating_eval(reference.x, pixel, 1.0), atol=2e-4)


def test_variable_projection_matches_a_direct_linear_fit():
    # For fixed x0 and f the model is linear in (A cos theta, A sin theta): compare with numpy lstsq.
    pixel, wavelength = _bench_lines(noise_px=0.05, seed=1)
    weight = np.full(pixel.size, 10.0)
    a, theta, chi2 = _grating_profile(pixel, wavelength, weight, 1.0, np.array([900.0, 1100.0]), np.array([2300.0, 2500.0]))
    for k, (x0, f) in enumerate([(900.0, 2300.0), (1100.0, 2500.0)]):
        u = (pixel - x0) / f
        basis = np.stack([u / np.sqrt(1 + u**2), 1 / np.sqrt(1 + u**2)], axis=-1) * weight[:, None]
        (c1, c2), *_ = np.linalg.lstsq(basis, wavelength * weight, rcond=None)
        assert a[k] == pytest.approx(math.hypot(c1, c2), rel=1e-9)
        assert theta[k] == pytest.approx(math.atan2(c2, c1), abs=1e-9)
        params = (a[k], theta[k], x0, f)
        assert chi2[k] == pytest.approx(np.sum(((_grating_eval(params, pixel, 1.0) - wavelength) * weight) ** 2), rel=1e-6)


def test_deletion_residuals_match_full_refits():
    # z_i^2 is the drop in chi-square when line i is left out; for high-leverage lines it is computed
    # from a refit started at the one-step Newton update: compare with full searches from scratch.
    pixel, wavelength = _bench_lines(seed=5, noise_px=0.05)
    wavelength = wavelength.copy()
    wavelength[-1] += 0.08  # one end line a little off (a blend, say)
    sigma = np.full(pixel.size, 0.02)
    params, _, chi2 = _fit(pixel, wavelength, 0.02)
    keep = np.ones(pixel.size, dtype=bool)

    def refit(mask, near):
        return _fit(pixel[mask], wavelength[mask], 0.02, initial=near)

    z = _grating_deletion_z(pixel, wavelength, sigma, params, chi2, 1.0, keep, refit)
    for i in (0, pixel.size - 1):  # the end lines carry the most leverage
        mask = keep.copy()
        mask[i] = False
        full = _fit(pixel[mask], wavelength[mask], 0.02)
        assert z[i] ** 2 == pytest.approx(chi2 - full[2], rel=0.02, abs=0.05)


@pytest.mark.parametrize("focal_px, lines_per_mm, tilt_deg", [(2400.0, 1000.0, 33.0), (30000.0, 100.0, 3.2)])
def test_stated_wavelength_uncertainty_matches_the_scatter_of_refits(focal_px, lines_per_mm, tilt_deg):
    # The covariance must say how far the fitted wavelength scale moves with the line-centre noise:
    # compare its 1-sigma at the ends and middle of the lines with the spread of fits to 200 noisy
    # copies (Monte Carlo; the linearised covariance is exact for small noise, textbook least
    # squares, e.g. Press et al., Numerical Recipes, section 15.6, from memory). f = 30000 px
    # (15.6 widths, 100 lines/mm: a nearly straight scale) makes the normal matrix condition number ~1e20,
    # where a pseudo-inverse of J^T J loses the poorly determined directions.
    from benchspec.wavefit import _grating_jacobian

    clean, wavelength = _bench_lines(focal_px=focal_px, lines_per_mm=lines_per_mm, tilt_deg=tilt_deg, x0=AXIS_PX,
                                     noise_px=0.0)
    assert clean.size >= 12
    params, cov, _ = _fit(clean, wavelength, 0.02)
    probe = np.array([clean.min(), 0.5 * (clean.min() + clean.max()), clean.max()])
    jac = _grating_jacobian(params, probe, 1.0)
    stated = np.sqrt(np.einsum("ij,jk,ik->i", jac, cov, jac))
    rng = np.random.default_rng(17)
    fitted = []
    for _ in range(200):
        noisy = wavelength + rng.normal(0.0, 0.02, wavelength.size)
        result = _fit(clean, noisy, 0.02)
        fitted.append(_grating_eval(result[0], probe, 1.0))
    scatter = np.std(np.array(fitted), axis=0)
    # 200 draws: the standard deviation itself is known to about 5% (1 / sqrt(2 n))
    np.testing.assert_allclose(stated, scatter, rtol=0.2)


def test_too_few_lines_give_no_fit():
    pixel, wavelength = _bench_lines()
    assert _fit(pixel[:4], wavelength[:4], 0.02) is None


@pytest.mark.parametrize("true_over_stated", [1.0, 3.0])
def test_covariance_scale_follows_the_scatter_of_tight_lines(true_over_stated):
    # For a linear least-squares fit E[sum r_i^2 / sigma_i^2] = sum (1 - h_i) = n - p (textbook
    # least squares, e.g. Bevington & Robinson, Data Reduction and Error Analysis, ch. 7; from memory):
    # the factor is ~1 when the stated sigmas are right and ~9 when the scatter is 3x larger;
    # loosely known lines (sigma 50x larger) must not dilute it.
    from benchspec.wavefit import _covariance_scale, _weighted_polyfit

    rng = np.random.default_rng(11)
    t = np.linspace(-1, 1, 60)
    sigma = np.where(np.arange(60) % 3 == 0, 0.5, 0.01)
    tight = sigma < 0.1
    factors = []
    for _ in range(20):
        lam = 550 + 100 * t - 3 * t**2 + rng.normal(0, 1, t.size) * np.where(tight, true_over_stated * sigma, 0.002)
        coeffs, cov, residual, _ = _weighted_polyfit(t, lam, sigma, 2)
        basis = np.stack([t**k for k in range(3)], axis=-1) / sigma[:, None]
        leverage = np.einsum("ij,jk,ik->i", basis, cov, basis)
        factors.append(_covariance_scale(residual / sigma, leverage, tight))
    assert np.median(factors) == pytest.approx(true_over_stated**2, rel=0.25)


def test_deletion_z_is_the_studentised_deletion_residual():
    # Weighted least squares identity (textbook regression diagnostics, e.g. Cook & Weisberg 1982,
    # from memory): (y_i - prediction without i) / sqrt(sigma_i^2 + var(prediction)) equals
    # r_i / (sigma_i sqrt(1 - h_i)) with r_i and h_i from the fit on all lines.
    from benchspec.wavefit import _deletion_z

    rng = np.random.default_rng(3)
    t = np.linspace(-1, 1, 9)
    sigma = rng.uniform(0.05, 0.5, t.size)
    lam = 550 + 120 * t + 4 * t**2 + rng.normal(0, 1, t.size) * sigma
    keep = np.ones(t.size, dtype=bool)
    z = _deletion_z(t, lam, sigma, keep, 2)
    x = np.stack([t**k for k in range(3)], axis=-1) / sigma[:, None]
    coeffs, *_ = np.linalg.lstsq(x, lam / sigma, rcond=None)
    r = (lam - np.polynomial.polynomial.polyval(t, coeffs)) / sigma
    h = np.einsum("ij,jk,ik->i", x, np.linalg.inv(x.T @ x), x)
    assert np.allclose(z, r / np.sqrt(1 - h), rtol=1e-6, atol=1e-9)
    # Clean Gaussian data: z is N(0, 1) per line, so none of the 9 looks like an outlier (|z| < 4).
    assert np.all(np.abs(z) < 4)
