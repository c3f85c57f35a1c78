"""Hydrogen's Balmer lines to the Rydberg constant.

Each Balmer line n -> 2 obeys 1/lambda_vac = R_H (1/4 - 1/n^2). The lines are
found near their expected places, fitted (Gaussian on a linear
background), converted from air to vacuum (Edlén 1966), and R_H is the
weighted least-squares slope through the origin.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
from scipy import constants, stats

from ..errors import AnalysisError, InputError
from ..physics import air_to_vacuum_nm, vacuum_to_air_nm
from ..spectrum import Spectrum
from ._common import FWHM_PER_SIGMA, fit_gaussian_line, positive_uncertainty, require_calibrated, sample_step_nm, warn_degraded

__all__ = [
    "BalmerLine",
    "RydbergResult",
    "BALMER_NAMES",
    "calibration_covariance_nm2",
    "codata_rydberg_hydrogen_per_m",
    "expected_balmer_air_nm",
    "find_balmer_lines",
    "fit_rydberg",
    "rydberg_from_spectrum",
]

#: Names of the Balmer lines by upper level n (n -> 2).
BALMER_NAMES = {3: "H-alpha", 4: "H-beta", 5: "H-gamma", 6: "H-delta", 7: "H-epsilon", 8: "H-zeta", 9: "H-eta"}


def codata_rydberg_hydrogen_per_m() -> tuple[float, float]:
    """R_H = R_inf / (1 + m_e/m_p) and its 1-sigma, from CODATA via scipy.constants.

    The reduced-mass correction for the hydrogen nucleus (a proton).
    """
    r_inf, _, r_inf_err = constants.physical_constants["Rydberg constant"]
    ratio, _, ratio_err = constants.physical_constants["electron-proton mass ratio"]
    value = r_inf / (1 + ratio)
    err = value * np.hypot(r_inf_err / r_inf, ratio_err / (1 + ratio))
    return float(value), float(err)


def expected_balmer_air_nm(upper_level: int) -> float:
    """Air wavelength (Edlén 1966) of the Balmer line n -> 2 from the CODATA R_H (Bohr model).

    Fine structure moves the real lines by ~0.01 nm, far below a webcam's
    resolution; used to place the search windows.
    """
    if int(upper_level) != upper_level or upper_level < 3:
        raise InputError(f"`upper_level` must be a whole number >= 3, was {upper_level}")
    r_h, _ = codata_rydberg_hydrogen_per_m()
    vacuum_nm = 1e9 / (r_h * (0.25 - 1.0 / upper_level**2))
    return float(vacuum_to_air_nm(vacuum_nm))


@dataclass(frozen=True)
class BalmerLine:
    """One Balmer line as measured."""

    upper_level: int
    name: str
    air_wavelength_nm: float
    vacuum_wavelength_nm: float
    wavelength_uncertainty_nm: float
    expected_air_wavelength_nm: float
    fwhm_nm: float
    snr: float
    residual_nm: float | None = None
    #: The parts of ``wavelength_uncertainty_nm`` (added in quadrature): the Gaussian fit's own
    #: 1-sigma of the centre, and the wavelength solution's 1-sigma at the line. None when unknown.
    statistical_uncertainty_nm: float | None = None
    calibration_uncertainty_nm: float | None = None


@dataclass(frozen=True)
class RydbergResult:
    """The Rydberg constant for hydrogen fitted from Balmer lines.

    ``uncertainty_per_m`` is the 1-sigma from the line-centre
    uncertainties; it is multiplied by the Birge ratio sqrt(chi^2/dof) only
    when the lines disagree beyond chance (p < 0.01), and ``scaled`` says
    so. ``difference_sigma`` is (fitted - CODATA) / combined uncertainty.

    ``budget`` splits ``uncertainty_per_m`` into its parts (added in quadrature, each already
    multiplied by the Birge ratio when ``scaled``): ``statistical_per_m`` from the H line centres'
    fit statistics, ``calibration_per_m`` from the wavelength solution's stated 1-sigma at the
    lines, ``unattributed_per_m`` from lines whose uncertainty was given without its parts;
    ``includes`` and ``excludes`` say in words what the uncertainty does and does not cover.
    """

    rydberg_per_m: float
    uncertainty_per_m: float
    codata_rydberg_per_m: float
    codata_uncertainty_per_m: float
    difference_per_m: float
    difference_sigma: float
    relative_difference: float
    chi2: float
    degrees_of_freedom: int
    birge_ratio: float
    scaled: bool
    lines: tuple[BalmerLine, ...]
    air_to_vacuum: str = "Edlén 1966"
    budget: dict = field(default_factory=dict)


_BUDGET_INCLUDES = (
    "H line centres: the Gaussian fit's statistical 1-sigma (noise)",
    "calibration: the wavelength solution's stated 1-sigma at each line (its line centres with their floor, "
    "the reference wavelengths' tolerances, the model floor, scaled by the lines' scatter where that is larger)",
    "the Birge ratio sqrt(chi^2/dof) when the lines disagree beyond chance (p < 0.01)",
)
_BUDGET_EXCLUDES = (
    "the correlation of the calibration's error between lines: treated as independent, since a spectrum "
    "carries each wavelength's 1-sigma but not the solution's covariance",
    "biases of the H line centres beyond their fit statistics (frame encoding, blends with H2 bands)",
    "fine structure and the Lamb shift: the Bohr formula places the real line centroids about 1e-5 "
    "(relative) off",
    "CODATA's own uncertainty (it is in codata_uncertainty_per_m and difference_sigma)",
)


def find_balmer_lines(
    spectrum: Spectrum,
    *,
    window_nm: float | None = None,
    min_snr: float = 5.0,
    levels=range(3, 10),
) -> tuple[BalmerLine, ...]:
    """Find and fit the Balmer lines present in a calibrated hydrogen spectrum.

    Parameters
    ----------
    spectrum : Spectrum
        Calibrated emission spectrum (air wavelengths).
    window_nm : float, optional
        Half-width of the search window around each expected line; default
        the larger of 2 nm, 6 samples and 5x the calibration uncertainty.
    min_snr : float
        Smallest line amplitude, in units of the noise, that counts as found.
    levels : iterable of int
        Upper levels n to look for (3 = H-alpha).

    Returns
    -------
    tuple of BalmerLine
        Lines found, by increasing n. May be empty.
    """
    spectrum = require_calibrated(spectrum)
    wl = spectrum.wavelength_nm
    y = np.where(np.isfinite(spectrum.intensity), spectrum.intensity, 0.0)
    sigma = positive_uncertainty(spectrum)
    step = sample_step_nm(wl)
    found = []
    for n in levels:
        expected = expected_balmer_air_nm(n)
        if not (wl[0] + 2 * step < expected < wl[-1] - 2 * step):
            continue
        cal_sigma = 0.0
        if spectrum.wavelength_uncertainty_nm is not None:
            cal_sigma = float(np.interp(expected, wl, spectrum.wavelength_uncertainty_nm))
        half = window_nm if window_nm is not None else max(2.0, 6 * step, 5 * cal_sigma)
        inside = np.flatnonzero(np.abs(wl - expected) <= half)
        if inside.size < 6:
            continue
        top = inside[int(np.argmax(y[inside]))]
        local_background = float(np.median(y[inside]))
        if y[top] - local_background < min_snr * sigma[top]:
            continue  # nothing above the noise here: do not fit noise
        # Fit window: +-4 sigma of a line a few samples wide around the top.
        fit_half = max(4 * step, 0.6 * half)
        use = np.flatnonzero(np.abs(wl - wl[top]) <= fit_half)
        if spectrum.saturated[use].any():
            warn_degraded(f"{BALMER_NAMES.get(n, f'n={n}')} is saturated; its centre is less certain - reduce the exposure")
        fit = fit_gaussian_line(wl[use], y[use], sigma[use], centre_guess=wl[top], width_guess=max(step, 0.3))
        if fit is None:
            continue
        snr = fit["amplitude"] / float(np.median(sigma[use]))
        if snr < min_snr or fit["amplitude"] <= 3 * fit["amplitude_uncertainty"]:
            continue
        if abs(fit["centre"] - expected) > half:
            continue
        centre_err = float(np.hypot(fit["centre_uncertainty"], cal_sigma))
        found.append(
            BalmerLine(
                upper_level=int(n),
                name=BALMER_NAMES.get(n, f"n={n}"),
                air_wavelength_nm=fit["centre"],
                vacuum_wavelength_nm=float(air_to_vacuum_nm(fit["centre"])),
                wavelength_uncertainty_nm=centre_err,
                expected_air_wavelength_nm=expected,
                fwhm_nm=fit["sigma_width"] * FWHM_PER_SIGMA,
                snr=float(snr),
                statistical_uncertainty_nm=float(fit["centre_uncertainty"]),
                calibration_uncertainty_nm=cal_sigma,
            )
        )
    return tuple(found)


def fit_rydberg(lines, *, calibration_covariance_nm2=None) -> RydbergResult:
    """Weighted fit of 1/lambda_vac = R_H (1/4 - 1/n^2) through the origin.

    Parameters
    ----------
    lines : sequence of BalmerLine
        At least two lines with positive uncertainties.
    calibration_covariance_nm2 : array (n, n), optional
        Covariance of the calibration's error between the lines (nm^2), e.g. from
        :func:`calibration_covariance_nm2`. With it the fit is generalised least squares
        on the full covariance (the lines' statistical 1-sigma on the diagonal plus this);
        without it each line's ``wavelength_uncertainty_nm`` is taken as independent.

    Raises
    ------
    AnalysisError
        Fewer than two lines.
    InputError
        A non-positive uncertainty; a covariance of the wrong shape, not symmetric positive
        semi-definite, or given for lines without their statistical 1-sigma.
    """
    lines = tuple(lines)
    if len(lines) < 2:
        names = ", ".join(l.name for l in lines) or "none"
        raise AnalysisError(
            f"a Rydberg fit needs at least 2 Balmer lines, found {len(lines)} ({names}); "
            "check the spectrum is of a hydrogen tube, calibrated, and covers 400-660 nm"
        )
    n = np.array([l.upper_level for l in lines], dtype=np.float64)
    lam_m = np.array([l.vacuum_wavelength_nm for l in lines]) * 1e-9
    lam_err_m = np.array([l.wavelength_uncertainty_nm for l in lines]) * 1e-9
    if np.any(lam_err_m <= 0) or not np.all(np.isfinite(lam_err_m)):
        raise InputError("every Balmer line needs a positive, finite wavelength uncertainty")
    x = 0.25 - 1.0 / n**2
    y = 1.0 / lam_m
    if calibration_covariance_nm2 is None:
        # independent lines: a diagonal covariance of 1/lambda
        y_err = lam_err_m / lam_m**2
        inverse = np.diag(1.0 / y_err**2)
        covariance_nm2 = None
    else:
        covariance_nm2 = _checked_covariance(calibration_covariance_nm2, lines)
        stat_nm = np.array([l.statistical_uncertainty_nm for l in lines])
        # 1/lambda moves by -d lambda / lambda^2: the covariance of y is J (stat + calibration) J
        jac = 1.0 / lam_m**2
        cov_y = (np.diag(stat_nm**2) + covariance_nm2) * 1e-18 * np.outer(jac, jac)
        try:
            inverse = np.linalg.inv(cov_y)
        except np.linalg.LinAlgError:
            raise InputError("the Balmer lines' covariance is singular; check the lines' statistical uncertainties") from None
    sxx = float(x @ inverse @ x)
    rydberg = float(x @ inverse @ y / sxx)
    err = float(1.0 / np.sqrt(sxx))
    residual = y - rydberg * x
    chi2 = float(residual @ inverse @ residual)
    dof = len(lines) - 1
    birge = float(np.sqrt(chi2 / dof))
    scaled = bool(stats.chi2.sf(chi2, dof) < 0.01)
    if scaled:
        err *= birge
        warn_degraded(
            f"the Balmer lines disagree beyond their uncertainties (chi^2 = {chi2:.1f} for {dof} degrees of freedom); "
            f"the uncertainty is scaled by {birge:.2f} - check the calibration and the line assignments"
        )
    # dR/dlambda_i: the fit's gain on y_i times dy_i/dlambda_i
    slope_per_m = -(inverse @ x) / sxx / lam_m**2
    budget = _budget(lines, slope_per_m, lam_err_m, covariance_nm2, birge if scaled else 1.0)
    budget["total_per_m"] = err
    codata, codata_err = codata_rydberg_hydrogen_per_m()
    difference = rydberg - codata
    combined = float(np.hypot(err, codata_err))
    with_residuals = tuple(
        BalmerLine(**{**l.__dict__, "residual_nm": float((lam - 1.0 / (rydberg * xi)) * 1e9)})
        for l, lam, xi in zip(lines, lam_m, x)
    )
    return RydbergResult(
        rydberg_per_m=rydberg,
        uncertainty_per_m=err,
        codata_rydberg_per_m=codata,
        codata_uncertainty_per_m=codata_err,
        difference_per_m=float(difference),
        difference_sigma=float(difference / combined),
        relative_difference=float(difference / codata),
        chi2=chi2,
        degrees_of_freedom=dof,
        birge_ratio=birge,
        scaled=scaled,
        lines=with_residuals,
        budget=budget,
    )


def _checked_covariance(covariance, lines) -> np.ndarray:
    c = np.asarray(covariance, dtype=float)
    k = len(lines)
    if c.shape != (k, k) or not np.all(np.isfinite(c)):
        raise InputError(f"`calibration_covariance_nm2` must be a finite {k} x {k} matrix (one row per line), was shape {c.shape}")
    size = max(float(np.abs(c).max()), 1e-30)
    if np.abs(c - c.T).max() > 1e-6 * size or np.linalg.eigvalsh(0.5 * (c + c.T)).min() < -1e-6 * size:
        raise InputError("`calibration_covariance_nm2` must be symmetric and positive semi-definite")
    if any(l.statistical_uncertainty_nm is None or not l.statistical_uncertainty_nm > 0 for l in lines):
        raise InputError("a calibration covariance needs every line's positive statistical_uncertainty_nm "
                         "(lines from find_balmer_lines have it)")
    return 0.5 * (c + c.T)


def calibration_covariance_nm2(solution, pixels) -> np.ndarray:
    """Covariance (nm^2) of a wavelength solution's error between ``pixels``: J C J^T.

    ``solution`` is a ``WavelengthSolution`` (or a calibration holding one); J is its wavelength's
    derivative with respect to its coefficients at each pixel, by central differences a thousandth
    of each coefficient's own 1-sigma wide (exact for a polynomial, linear within the uncertainty
    for the grating model). A solution with a model-averaging ``alternative`` adds
    ``alternative_weight * d d^T`` (d: the alternative minus the solution at the pixels), so the
    diagonal is the solution's :meth:`uncertainty_nm` squared.
    """
    solution = _solution_of(solution)
    pixels = np.atleast_1d(np.asarray(pixels, dtype=float))
    alternative_weight = float(getattr(solution, "alternative_weight", 0.0) or 0.0)
    difference = solution.model_difference_nm(pixels) if alternative_weight > 0 else None
    solution = dataclasses.replace(solution, alternative=None, alternative_weight=0.0)
    coefficients = np.asarray(solution.coefficients, dtype=float)
    cov = np.asarray(solution.covariance, dtype=float)
    jac = np.zeros((pixels.size, coefficients.size))
    for j in range(coefficients.size):
        step = 1e-3 * float(np.sqrt(max(cov[j, j], 0.0))) or 1e-9 * max(abs(coefficients[j]), 1.0)
        up, down = coefficients.copy(), coefficients.copy()
        up[j] += step
        down[j] -= step
        jac[:, j] = (dataclasses.replace(solution, coefficients=tuple(up)).wavelength_nm(pixels)
                     - dataclasses.replace(solution, coefficients=tuple(down)).wavelength_nm(pixels)) / (2 * step)
    out = jac @ cov @ jac.T
    if difference is not None:
        # the model-averaging term: the two models' disagreement, one coherent error across the lines
        out = out + alternative_weight * np.outer(difference, difference)
    return 0.5 * (out + out.T)


def _solution_of(calibration):
    from ..wavecal import WavelengthSolution

    value = calibration
    for name in ("wavelength", "solution"):  # Calibration -> WavelengthCalibration -> WavelengthSolution
        if not isinstance(value, WavelengthSolution):
            value = getattr(value, name, value)
    if not isinstance(value, WavelengthSolution):
        raise InputError(f"`calibration` must be a Calibration, WavelengthCalibration or WavelengthSolution, "
                         f"got {type(calibration).__name__}")
    return value


def _budget(lines, slope_per_m, lam_err_m, covariance_nm2, scale) -> dict:
    """The parts of the fit's 1-sigma: each part's (co)variance propagated with dR/dlambda_i."""
    stat = np.array([np.nan if l.statistical_uncertainty_nm is None else l.statistical_uncertainty_nm for l in lines]) * 1e-9
    cal = np.array([np.nan if l.calibration_uncertainty_nm is None else l.calibration_uncertainty_nm for l in lines]) * 1e-9
    known = np.isfinite(stat) & np.isfinite(cal)
    stat, cal = np.where(known, stat, 0.0), np.where(known, cal, 0.0)
    rest = np.where(known, lam_err_m**2 - stat**2 - cal**2, lam_err_m**2)
    rest = np.where(rest > 1e-9 * lam_err_m**2, rest, 0.0)  # rounding, not a part
    part = lambda variance: float(scale * np.sqrt(np.sum(slope_per_m**2 * variance)))
    if covariance_nm2 is None:
        calibration = part(cal**2)
        between = "independent"
    else:
        rest = np.zeros_like(rest)  # the full covariance replaces the lines' combined 1-sigma
        calibration = float(scale * np.sqrt(max(float(slope_per_m @ (covariance_nm2 * 1e-18) @ slope_per_m), 0.0)))
        between = "covariance of the wavelength solution"
    excludes = [e for e in _BUDGET_EXCLUDES if covariance_nm2 is None or not e.startswith("the correlation")]
    return {
        "statistical_per_m": part(stat**2),
        "calibration_per_m": calibration,
        "unattributed_per_m": part(rest),
        "birge_scale": float(scale),
        "calibration_between_lines": between,
        "includes": list(_BUDGET_INCLUDES),
        "excludes": excludes,
    }


def rydberg_from_spectrum(spectrum: Spectrum, *, window_nm: float | None = None, min_snr: float = 5.0,
                          calibration=None) -> RydbergResult:
    """Find the Balmer lines of a hydrogen spectrum and fit the Rydberg constant.

    Parameters
    ----------
    calibration : Calibration, WavelengthCalibration or WavelengthSolution, optional
        The calibration that gave ``spectrum`` its wavelengths. With it the calibration's
        error is carried with its covariance between the lines (their errors come from one
        solution, so they are correlated); without it, as independent per-line 1-sigma.

    Raises
    ------
    AnalysisError
        When fewer than two Balmer lines are found.
    InputError
        ``calibration`` is not the one that gave the spectrum its wavelengths.
    """
    spectrum = require_calibrated(spectrum)
    lines = find_balmer_lines(spectrum, window_nm=window_nm, min_snr=min_snr)
    if len(lines) < 2:
        wl = spectrum.wavelength_nm
        names = ", ".join(l.name for l in lines) or "none"
        raise AnalysisError(
            f"no usable Balmer series: found {len(lines)} Balmer line(s) ({names}) in {wl[0]:.0f}-{wl[-1]:.0f} nm, "
            f"need at least 2 of H-alpha 656.3, H-beta 486.1, H-gamma 434.0, H-delta 410.2 nm; "
            "check the tube is hydrogen, the spectrum is calibrated and the lines are above the noise"
        )
    if calibration is None:
        return fit_rydberg(lines)
    solution = _solution_of(calibration)
    wl = spectrum.wavelength_nm
    own = solution.wavelength_nm(spectrum.pixel)
    mismatch = float(np.max(np.abs(own - wl)))
    if not mismatch <= 1e-6 * float(np.max(np.abs(wl))):
        raise InputError(f"`calibration` is not the one that gave this spectrum its wavelengths (they differ by up to "
                         f"{mismatch:.3g} nm); pass the spectrum's own calibration, or none")
    order = np.argsort(wl)
    pixels = np.interp([l.air_wavelength_nm for l in lines], wl[order], np.asarray(spectrum.pixel, dtype=float)[order])
    return fit_rydberg(lines, calibration_covariance_nm2=calibration_covariance_nm2(solution, pixels))
