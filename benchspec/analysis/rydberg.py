"""Hydrogen's Balmer lines to the Rydberg constant.

Each Balmer line n -> 2 obeys 1/lambda_vac = R_H (1/4 - 1/n^2). The lines are
found near their expected places, fitted (Gaussian on a linear
background), converted from air to vacuum (Edlén 1966), checked to form one
Balmer series (:func:`assign_balmer_series`), and R_H is the weighted
least-squares slope through the origin.
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
    "SERIES_REJECTION_PROBABILITY",
    "BOHR_MODEL_RELATIVE",
    "assign_balmer_series",
    "calibration_covariance_nm2",
    "codata_rydberg_hydrogen_per_m",
    "expected_balmer_air_nm",
    "find_balmer_lines",
    "fit_rydberg",
    "rydberg_from_spectrum",
]

#: Names of the Balmer lines by upper level n (n -> 2).
BALMER_NAMES = {3: "H-alpha", 4: "H-beta", 5: "H-gamma", 6: "H-delta", 7: "H-epsilon", 8: "H-zeta", 9: "H-eta"}

#: How often a real Balmer series, with honest 1-sigma, may lose a line or be refused by
#: :func:`assign_balmer_series`: a line is left out beyond the two-sided 99.9% range (3.29 sigma)
#: of its Bohr wavelength or of the other lines' prediction, and the series is refused when its
#: chi^2 lies beyond the 99.9th percentile. A significance level, chosen (common practice, no
#: source); the distances themselves are in units of the lines' own stated 1-sigma.
SERIES_REJECTION_PROBABILITY = 1e-3

#: The Bohr formula with CODATA R_H places the real Balmer lines (fine structure, Lamb shift)
#: within this fraction of their wavelength: the NIST ASD air wavelengths of H-alpha..H9
#: (calibration/lines/H.csv) differ from it by 0.6e-5 to 1.42e-5 (H-alpha, 0.009 nm).
BOHR_MODEL_RELATIVE = 1.5e-5


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
    #: Lines found near a Balmer wavelength but left out of the fit by :func:`assign_balmer_series`
    #: (too far from their Balmer wavelength or from where the other lines put them);
    #: ``residual_nm`` is against the fitted R_H.
    left_out: tuple[BalmerLine, ...] = ()


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
    return _one_level_per_line(found)


def _one_level_per_line(found) -> tuple[BalmerLine, ...]:
    """One spectral line is one Balmer line: of levels whose fits landed on the same line (centres
    closer than the wider fit's FWHM, where two lines are not resolved), keep the one nearest its
    expected wavelength in units of its own 1-sigma. Wide search windows on a coarse spectrum
    otherwise give a single line of another gas (He I 388.87 nm) to H-epsilon, H-zeta and H-eta."""
    kept: list[BalmerLine] = []
    distance = lambda l: abs(l.air_wavelength_nm - l.expected_air_wavelength_nm) / l.wavelength_uncertainty_nm
    for line in sorted(found, key=distance):
        if all(abs(line.air_wavelength_nm - k.air_wavelength_nm) >= max(line.fwhm_nm, k.fwhm_nm) for k in kept):
            kept.append(line)
    return tuple(sorted(kept, key=lambda l: l.upper_level))


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


def _series_arrays(lines):
    """x = 1/4 - 1/n^2, y = 1/lambda_vac (1/m) and y's 1-sigma of independent lines."""
    n = np.array([l.upper_level for l in lines], dtype=np.float64)
    lam_m = np.array([l.vacuum_wavelength_nm for l in lines]) * 1e-9
    lam_err_m = np.array([l.wavelength_uncertainty_nm for l in lines]) * 1e-9
    if np.any(lam_err_m <= 0) or not np.all(np.isfinite(lam_err_m)):
        raise InputError("every Balmer line needs a positive, finite wavelength uncertainty")
    return 0.25 - 1.0 / n**2, 1.0 / lam_m, lam_err_m / lam_m**2


def _leave_one_out(lines):
    """Each line against the R_H fitted to the others: pulls and predicted air wavelengths (nm).

    The pull is (y_i - R_(-i) x_i) / sqrt(sigma_i^2 + x_i^2 var R_(-i)): the line's own 1-sigma
    (centre and calibration) with the other lines' prediction's 1-sigma, in quadrature.
    """
    x, y, y_err = _series_arrays(lines)
    w = 1.0 / y_err**2
    sxx, sxy = float(np.sum(w * x * x)), float(np.sum(w * x * y))
    others_sxx = sxx - w * x * x
    others_r = (sxy - w * x * y) / others_sxx
    pulls = (y - others_r * x) / np.sqrt(y_err**2 + x * x / others_sxx)
    predicted_air_nm = vacuum_to_air_nm(1e9 / (others_r * x))
    return pulls, np.atleast_1d(np.asarray(predicted_air_nm, dtype=float))


def _series_chi2(lines) -> float:
    x, y, y_err = _series_arrays(lines)
    w = 1.0 / y_err**2
    r = float(np.sum(w * x * y) / np.sum(w * x * x))
    return float(np.sum(w * (y - r * x) ** 2))


def _bohr_sigma_nm(line) -> float:
    """1-sigma of a line's distance from its Bohr wavelength: its own, with the model's offset."""
    return float(np.hypot(line.wavelength_uncertainty_nm, BOHR_MODEL_RELATIVE * line.expected_air_wavelength_nm))


def _bohr_pull(line) -> float:
    return (line.air_wavelength_nm - line.expected_air_wavelength_nm) / _bohr_sigma_nm(line)


def _off_bohr(line) -> str:
    """Where a line lies from its Bohr-model wavelength (CODATA R_H), in nm and in its 1-sigma."""
    offset = line.air_wavelength_nm - line.expected_air_wavelength_nm
    return (f"{line.name} at {line.air_wavelength_nm:.2f} nm lies {offset:+.2f} nm = {abs(_bohr_pull(line)):.1f} sigma "
            f"from {line.expected_air_wavelength_nm:.2f} nm")


_WHAT_TO_TRY = ("check the tube is hydrogen (`benchspec identify SPEC.csv` names the gas) and the calibration covers "
                "these wavelengths")


def assign_balmer_series(lines, *, rejection_probability: float = SERIES_REJECTION_PROBABILITY):
    """Keep the lines that form one Balmer series; refuse a set that does not.

    Three tests, each at the two-sided ``1 - rejection_probability`` level (3.29 sigma, or the
    99.9th percentile of chi^2, by default), each in units of the lines' own stated 1-sigma
    (line centre and calibration, ``wavelength_uncertainty_nm``):

    1. each line within that range of its Balmer wavelength from CODATA R_H (Bohr model, with
       :data:`BOHR_MODEL_RELATIVE` for the real lines' fine structure); lines beyond it are left
       out: helium's 412.1 nm line is not H-delta (410.2 nm) when the calibration is good to 0.1 nm;
    2. with three or more lines, each within that range of the wavelength the other lines' R_H
       predicts for it (its 1-sigma and the prediction's in quadrature); the worst line beyond it
       is left out and the test repeated (two lines that disagree cannot say which one is wrong);
    3. the remaining lines' chi^2 about their fitted series below its percentile.

    A line that passes the first test can be a few sigma off, so a calibration that is off at
    every line still gives an R_H, and ``RydbergResult.difference_sigma`` says how far it is from
    CODATA; a line beyond it is not taken as that Balmer line.

    Parameters
    ----------
    lines : sequence of BalmerLine
        Candidate lines with positive uncertainties, e.g. from :func:`find_balmer_lines`.
    rejection_probability : float
        Probability in (0, 0.5) with which a line of a real series with honest 1-sigma fails each
        test, and with which such a series is refused.

    Returns
    -------
    kept, left_out : tuple of BalmerLine, tuple of BalmerLine
        The lines of the series (by increasing n) and those left out, each warned about.

    Raises
    ------
    AnalysisError
        Fewer than two lines left, or lines that do not form one Balmer series: a helium, neon or
        mercury spectrum has lines a few nm from some Balmer wavelengths, not a series.
    """
    if not 0 < rejection_probability < 0.5:
        raise InputError(f"`rejection_probability` must be in (0, 0.5), was {rejection_probability}")
    candidates = sorted(lines, key=lambda l: l.upper_level)
    _series_arrays(candidates)  # uncertainties checked before any arithmetic
    limit = float(stats.norm.isf(rejection_probability / 2))
    kept = [l for l in candidates if abs(_bohr_pull(l)) <= limit]
    off = [l for l in candidates if abs(_bohr_pull(l)) > limit]
    if len(kept) < 2:
        names = ", ".join(l.name for l in kept) or "none"
        why = ""
        if off:
            worst = max(off, key=lambda l: abs(_bohr_pull(l)))
            why = (f"{_off_bohr(worst)}, beyond {limit:.2f} sigma of its Bohr wavelength (CODATA R_H)"
                   + (f", and {len(off) - 1} more line(s) too" if len(off) > 1 else "") + "; ")
        raise AnalysisError(
            f"no usable Balmer series: {why}{len(kept)} line(s) left at Balmer wavelengths ({names}), need at least 2; "
            + _WHAT_TO_TRY
        )
    for line in off:
        warn_degraded(f"{_off_bohr(line)}, beyond {limit:.2f} sigma of its Bohr wavelength (CODATA R_H); "
                      "not taken as that Balmer line - a blend or another gas's line nearby")
    left_out = list(off)
    while len(kept) >= 3:
        pulls, predicted = _leave_one_out(kept)
        worst = int(np.argmax(np.abs(pulls)))
        if abs(pulls[worst]) <= limit:
            break
        line = kept.pop(worst)
        left_out.append(line)
        warn_degraded(
            f"{line.name} at {line.air_wavelength_nm:.2f} nm lies {abs(pulls[worst]):.1f} sigma from {predicted[worst]:.2f} nm, "
            f"where the other Balmer lines put it (limit {limit:.2f} sigma); left out of the fit - a blend or another "
            "gas's line near the Balmer wavelength"
        )
    chi2 = _series_chi2(kept)
    dof = len(kept) - 1
    ceiling = float(stats.chi2.isf(rejection_probability, dof))
    if chi2 > ceiling:
        worst = max(kept, key=lambda l: abs(_bohr_pull(l)))
        found = ", ".join(f"{l.name} {l.air_wavelength_nm:.2f}" for l in kept)
        raise AnalysisError(
            f"no usable Balmer series: the lines at Balmer wavelengths ({found} nm) do not fit one series within their "
            f"uncertainties (chi^2 = {chi2:.1f} for {dof} dof, beyond its {100 * (1 - rejection_probability):g}th percentile "
            f"{ceiling:.1f}); {_off_bohr(worst)}; " + _WHAT_TO_TRY
        )
    return tuple(kept), tuple(sorted(left_out, key=lambda l: l.upper_level))


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

    The lines found are assigned to the series by :func:`assign_balmer_series`: lines far from
    where the others put them are left out (``RydbergResult.left_out``, with a warning), and a set
    that is not one Balmer series is refused.

    Raises
    ------
    AnalysisError
        When fewer than two Balmer lines are found, or the lines found do not form one Balmer series.
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
            "check the tube is hydrogen (`benchspec identify SPEC.csv`), the spectrum is calibrated and the lines are above the noise"
        )
    lines, left_out = assign_balmer_series(lines)
    if calibration is None:
        return _with_left_out(fit_rydberg(lines), left_out)
    solution = _solution_of(calibration)
    wl = spectrum.wavelength_nm
    own = solution.wavelength_nm(spectrum.pixel)
    mismatch = float(np.max(np.abs(own - wl)))
    if not mismatch <= 1e-6 * float(np.max(np.abs(wl))):
        raise InputError(f"`calibration` is not the one that gave this spectrum its wavelengths (they differ by up to "
                         f"{mismatch:.3g} nm); pass the spectrum's own calibration, or none")
    order = np.argsort(wl)
    pixels = np.interp([l.air_wavelength_nm for l in lines], wl[order], np.asarray(spectrum.pixel, dtype=float)[order])
    return _with_left_out(fit_rydberg(lines, calibration_covariance_nm2=calibration_covariance_nm2(solution, pixels)), left_out)


def _with_left_out(result: RydbergResult, left_out) -> RydbergResult:
    """The result with the left-out lines, each with its residual against the fitted R_H."""
    if not left_out:
        return result
    residuals = tuple(
        dataclasses.replace(l, residual_nm=float(l.vacuum_wavelength_nm
                                                  - 1e9 / (result.rydberg_per_m * (0.25 - 1.0 / l.upper_level**2))))
        for l in left_out
    )
    return dataclasses.replace(result, left_out=residuals)
