"""Frames -> calibrated spectrum in a few calls: the public API the command line wraps.

Example
-------
>>> from benchspec.pipeline import calibrate_frames, extract_frames      # doctest: +SKIP
>>> cal = calibrate_frames(["cfl_1.png", "cfl_2.png"], lamp="cfl")       # doctest: +SKIP
>>> print(cal.wavelength.format_table())                                 # doctest: +SKIP
>>> write_calibration(cal, "bench.json")                                 # doctest: +SKIP
>>> spectrum = extract_frames(["tube_*.png"], cal)                       # doctest: +SKIP

:func:`calibrate_frames` stacks the lamp frames (dark-subtracted,
linearised), finds the band and its geometry, extracts the spectrum, finds
the lines and solves the wavelength calibration with no first guess.
:func:`extract_frames` applies a stored calibration to later frames of the
same setup and warns (:class:`~benchspec.errors.DegradedResultWarning`) when
the band has moved since calibration.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import os
import warnings
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import cv2
import numpy as np

from .calfile import Calibration, read_calibration, write_calibration
from .errors import CalibrationError, DegradedResultWarning, FrameError, InputError
from .extract import NoiseModel, estimate_noise_model, extract_stack, prepare_in_background
from .frames import StackedFrame, _is_video, expand_sources, file_sha256, iter_frames, load_stack, stack_frames
from .geometry import measure_band_shift, measure_geometry, rectify, refit_curvature_grating
from .lines import LineTable, find_lines
from .refdata import load_lamp
from .spectrum import Spectrum
from .wavecal import (
    ManualPair,
    WavelengthCalibration,
    _recalibrate_lines,
    calibrate_combined,
    calibrate_lines,
    dispersion_range_for_grating,
)

__all__ = [
    "Calibration",
    "calibrate_frames",
    "extract_frames",
    "iter_extract_frames",
    "apply_calibration",
    "read_calibration",
    "write_calibration",
]


def _is_array_input(frames) -> bool:
    if isinstance(frames, np.ndarray):
        return True
    return isinstance(frames, (list, tuple)) and len(frames) > 0 and all(isinstance(f, np.ndarray) for f in frames)


def _stack(frames, *, dark, gamma, channel, method) -> tuple[StackedFrame, list[dict], list[dict]]:
    """Stack paths or arrays; returns the stack and the frame / dark records (path, sha256)."""
    dark_stack = None
    dark_records: list[dict] = []
    if dark is not None:
        if isinstance(dark, StackedFrame):
            dark_stack = dark
        elif _is_array_input(dark):
            arrays = [dark] if isinstance(dark, np.ndarray) and dark.ndim in (2, 3) and not isinstance(dark, list) else list(dark)
            dark_stack = stack_frames(arrays, method="mean", gamma=gamma, channel=channel, check=False)
            dark_records = [{"path": None, "sha256": None} for _ in arrays]
        else:
            dark_stack = load_stack(dark, method="mean", gamma=gamma, channel=channel)
            dark_records = [{"path": p, "sha256": h} for p, h in zip(dark_stack.input_files, dark_stack.input_sha256)]
    if _is_array_input(frames):
        arrays = [frames] if isinstance(frames, np.ndarray) else list(frames)
        stacked = stack_frames(arrays, method=method, gamma=gamma, channel=channel, dark=dark_stack)
        records = [{"path": None, "sha256": None} for _ in arrays]
    else:
        stacked = load_stack(frames, method=method, gamma=gamma, channel=channel, dark=dark_stack)
        records = [{"path": p, "sha256": h} for p, h in zip(stacked.input_files, stacked.input_sha256)]
    return stacked, records, dark_records


def _line_list_record(lamps) -> list[dict]:
    out = []
    for name in dict.fromkeys(lamps):
        for line in load_lamp(name).lines():
            out.append({"wavelength_nm": line.wavelength_nm, "relative_intensity": line.relative_intensity,
                        "species": line.species, "tolerance_nm": line.tolerance_nm})
    return out


#: Dips of a daylight frame are detected at this many sigma when calibrating from them (or at ``min_snr`` if
#: lower). They are matched to a short list of solar lines and every solution must pass the evidence test;
#: at 3.5 sigma a spectrum of 1000 columns holds about 0.2 noise dips (one-sided Gaussian tail 2.3e-4;
#: common practice, no source). With the single-frame noise model measured against the scatter of 8
#: frames (extract._noise_lag), the demo's daylight dips stand 3.5-5 sigma deep; the earlier 5 sigma on an
#: estimate 2.7x too low in variance was about 3 true sigma.
DAYLIGHT_DIP_MIN_SNR = 3.5


def _calibrate_from_dips(stacked, geometry, *, lamp, extraction, pairs, d_range, min_snr):
    """Geometry, wavelength solution and spectrum from the dark lines of a daylight stack (an absorption reference).

    A continuum has no bright lines to trace: what the geometry traced as "lines" are the band's
    ends, so the line tilt and curvature are dropped (rotation and aperture are kept). The dips are
    found at a few continuum windows (the dispersion is not known yet) and the accepted solution
    with the most evidence is kept; its verdict is capped at "fair" (see DAYLIGHT_CALIBRATION_NOTE).
    """
    import dataclasses

    from .analysis.daylight import DAYLIGHT_CALIBRATION_NOTE, DIP_WINDOWS_PX, check_daylight_continuum, find_daylight_dips

    if geometry.n_lines_traced or geometry.curvature_known:
        geometry = dataclasses.replace(
            geometry, tilt_coefficients=(0.0,), curvature_coefficients=(0.0,), curvature_known=False, n_lines_traced=0,
            curvature_rms_px=0.0,
            notes=tuple(geometry.notes) + ("line tilt and curvature not measured: daylight has no bright lines to trace "
                                           "(a lamp frame of the same setup would measure them)",))
    spectrum = extract_stack(stacked, geometry, method=extraction)
    check_daylight_continuum(spectrum)
    best, failures, most_dips = None, [], 0
    for window in DIP_WINDOWS_PX:
        if 8 * window / 4 >= spectrum.size:
            continue
        table = find_daylight_dips(spectrum, window_px=window, min_snr=min(min_snr, DAYLIGHT_DIP_MIN_SNR))
        most_dips = max(most_dips, len(table))
        if len(table) + len(pairs) < 3:
            continue
        try:
            found = calibrate_lines(table, lamp=lamp, pairs=pairs, dispersion_range_nm_per_px=d_range)
        except CalibrationError as exc:
            failures.append(str(exc))
            continue
        if best is None or found.evidence_nats > best.evidence_nats:
            best = found
    if best is None:
        if most_dips < 4:
            raise CalibrationError(
                f"only {most_dips} dark line{'' if most_dips == 1 else 's'} deeper than 1.5% found; --lamp daylight needs the Fraunhofer lines: "
                "skylight or a white card in sunlight (not a lamp or a featureless source), in focus, exposed near full "
                "scale without clipping, several frames stacked"
            )
        raise CalibrationError(f"daylight: {failures[0] if failures else 'no solution'}")
    verdict = "fair" if best.verdict == "good" else best.verdict
    best = dataclasses.replace(best, verdict=verdict, verdict_reason=f"{best.verdict_reason}; {DAYLIGHT_CALIBRATION_NOTE}",
                               notes=tuple(best.notes) + (DAYLIGHT_CALIBRATION_NOTE,))
    return geometry, best, spectrum


def _search_range(hint_lines_per_mm, hint_nm_per_px, *, frame_width_px: int) -> tuple[float, float]:
    """The dispersion range (nm/px) the matcher searches: 0.1-3 nm/px, narrowed by the hints."""
    d_range = (0.1, 3.0)
    if hint_lines_per_mm is not None:
        d_range = dispersion_range_for_grating(hint_lines_per_mm, frame_width_px=frame_width_px)
    if hint_nm_per_px is not None:
        try:
            low, high = (float(v) for v in hint_nm_per_px)
        except (TypeError, ValueError):
            raise InputError(f"hint_nm_per_px must be two numbers (low, high) in nm/px, got {hint_nm_per_px!r}") from None
        if not (np.isfinite(low) and np.isfinite(high) and 0 < low < high):
            raise InputError(f"the dispersion hint (--hint-nm-per-px LOW HIGH) must have 0 < LOW < HIGH, got {low:g} {high:g} nm/px; "
                             "give the range the setup planner predicts (benchspec plan --json)")
        both = (max(d_range[0], low), min(d_range[1], high))
        if both[0] >= both[1]:
            raise InputError(f"the dispersion hint {low:g}-{high:g} nm/px does not overlap "
                             f"{d_range[0]:g}-{d_range[1]:g} nm/px (the search range, or what --hint-lines-per-mm "
                             "allows); check the planner's inputs against the grating")
        d_range = both
    return d_range


def calibrate_frames(
    frames,
    *,
    lamp: str = "cfl",
    dark=None,
    gamma: str = "auto",
    channel: str = "mean",
    stack: str = "mean",
    extraction: str = "optimal",
    hint_lines_per_mm: float | None = None,
    hint_nm_per_px: tuple[float, float] | None = None,
    pairs: Sequence[ManualPair] = (),
    more_lamps: Sequence[tuple[Any, str]] = (),
    min_snr: float = 5.0,
) -> Calibration:
    """Calibrate a setup from frames of a lamp: geometry + wavelength solution.

    Parameters
    ----------
    frames : path, glob, folder, video, sequence of them, or ndarray(s)
        Frames of the lamp (stacked).
    lamp : str
        Lamp name (``cfl``, ``hg``, ``ne``, ``he``, ``h``, ``ar``, ``kr``, ``xe``, ``na``).
    dark : same kinds as ``frames``, or StackedFrame, optional
        Dark frames subtracted from every stack.
    gamma, channel, stack : str
        Linearisation, channel combination and stacking (see :mod:`benchspec.frames`).
    extraction : {"optimal", "box"}
    hint_lines_per_mm : float, optional
        Groove density of the grating; narrows the dispersion search
        (:func:`benchspec.wavecal.dispersion_range_for_grating`).
    hint_nm_per_px : (low, high), optional
        The dispersion range to search, e.g. the setup planner's prediction
        (:func:`benchspec.analysis.planner.dispersion_hint`); with
        ``hint_lines_per_mm`` too, the search covers where both agree.
    pairs : sequence of ManualPair
        Manual pixel=nm pairs (e.g. a laser), on the rectified-column axis.
    more_lamps : sequence of (frames, lamp)
        Frames of other lamps taken with the same setup; all lines go into one solution.
    min_snr : float
        Line detection threshold.

    Returns
    -------
    Calibration

    Raises
    ------
    FrameError, GeometryError, FileFormatError, CalibrationError
        Unusable frames, no band or a band at the edge, unreadable files, no
        trustworthy wavelength solution.
    """
    load_lamp(lamp)  # a wrong lamp name fails before any work
    for _, other in more_lamps:
        load_lamp(other)
    _search_range(None, hint_nm_per_px, frame_width_px=0)  # so does a malformed hint
    stacked, records, dark_records = _stack(frames, dark=dark, gamma=gamma, channel=channel, method=stack)
    if min(stacked.shape) < 16:  # name the file: the geometry only sees an array
        names = ", ".join(Path(r["path"]).name for r in records if r.get("path"))[:120] or "the frames"
        raise FrameError(f"{names}: {stacked.shape[1]}x{stacked.shape[0]} px is too small to hold a spectrum "
                         "(frames must be at least 16x16 px); check the file is a camera frame")
    geometry = measure_geometry(stacked.image, saturated=stacked.saturated)
    d_range = _search_range(hint_lines_per_mm, hint_nm_per_px, frame_width_px=geometry.frame_width_px)
    for record in records:
        record["lamp"] = lamp
    lamps = [lamp]
    # An absorption reference (daylight) is calibrated from the dips of a continuum, not from bright lines.
    absorption = load_lamp(lamp).kind == "absorption"
    # The gain and read noise describe the camera's pixels, not the rectification: estimated once
    # per stack here, they serve the extraction after the curvature refit too.
    noise: dict[int, NoiseModel] = {}
    if not absorption:
        # the resampling's noise factors on the second core while the band is rectified and its noise measured
        prepare_in_background(geometry, single_frame=not (stacked.n_frames >= 2 and stacked.frame_variance is not None))
        band = rectify(stacked.image, geometry, saturated=stacked.saturated)  # once, for the noise and the spectrum
        noise[id(stacked)] = estimate_noise_model(stacked, geometry=geometry, band=band)
        spectrum = extract_stack(stacked, geometry, method=extraction, noise_model=noise[id(stacked)], band=band)
        table = find_lines(spectrum, min_snr=min_snr)
    if absorption:
        if more_lamps:
            raise InputError(f"--lamp {lamp} cannot be combined with other lamps' frames (--with); calibrate from the "
                             "lamps, or from daylight alone")
        geometry, wavelength, spectrum = _calibrate_from_dips(stacked, geometry, lamp=lamp, extraction=extraction, pairs=pairs,
                                                    d_range=d_range, min_snr=min_snr)
    elif more_lamps:
        observations: list[tuple[LineTable, str]] = [(table, lamp)]
        other_stacks: list[tuple[StackedFrame, str]] = []
        for other_frames, other_lamp in more_lamps:
            other_stack, other_records, _ = _stack(other_frames, dark=dark, gamma=gamma, channel=channel, method=stack)
            if other_stack.shape != stacked.shape:
                raise FrameError(
                    f"the {other_lamp} frames are {other_stack.shape[1]}x{other_stack.shape[0]} px but the {lamp} frames are "
                    f"{stacked.shape[1]}x{stacked.shape[0]} px; combine frames of one camera setup only"
                )
            other_stacks.append((other_stack, other_lamp))
            noise[id(other_stack)] = estimate_noise_model(other_stack, geometry=geometry)
            other_spectrum = extract_stack(other_stack, geometry, method=extraction, noise_model=noise[id(other_stack)])
            observations.append((find_lines(other_spectrum, min_snr=min_snr), other_lamp))
            for record in other_records:
                record["lamp"] = other_lamp
            records.extend(other_records)
            lamps.append(other_lamp)
        wavelength = calibrate_combined(observations, pairs=pairs, dispersion_range_nm_per_px=d_range)
    else:
        wavelength = calibrate_lines(table, lamp=lamp, pairs=pairs, dispersion_range_nm_per_px=d_range)
    if not absorption:
        geometry, wavelength, spectrum = _refit_curvature(
            stacked, geometry, wavelength, spectrum, lamp=lamp, others=other_stacks if more_lamps else [],
            extraction=extraction, pairs=pairs, d_range=d_range, min_snr=min_snr, noise=noise,
            first_table=None if more_lamps else table)
    if wavelength.verdict == "poor":
        warnings.warn(f"wavelength calibration is poor: {wavelength.verdict_reason}", DegradedResultWarning, stacklevel=2)
    settings = {
        "gamma": stacked.settings.get("gamma", gamma),
        "gamma_requested": gamma,
        "channel": channel,
        "stack": stack,
        "extraction": extraction,
        "min_snr": min_snr,
        "hint_lines_per_mm": hint_lines_per_mm,
        "hint_nm_per_px": None if hint_nm_per_px is None else [float(v) for v in hint_nm_per_px],
        "dispersion_range_nm_per_px": list(d_range),
        "pairs": [{"pixel": p.pixel, "wavelength_nm": p.wavelength_nm, "tolerance_nm": p.tolerance_nm} for p in pairs],
        "lamps": lamps,
        "n_frames": stacked.n_frames,
        # lossless or block-coded: it sets the systematic floor on the line centres (benchspec.wavecal)
        "encoding": stacked.settings.get("encoding"),
    }
    return Calibration(
        geometry=geometry,
        wavelength=wavelength,
        frames=tuple(records),
        dark_frames=tuple(dark_records),
        settings=settings,
        line_list=tuple(_line_list_record(lamps)),
        reference_spectrum=tuple(float(v) for v in spectrum.intensity),
        created_utc="",
    )


def _refit_curvature(stacked, geometry, wavelength, spectrum, *, lamp, others, extraction, pairs, d_range, min_snr,
                     noise=None, first_table=None):
    """The physical curvature shape from the diffraction angle along the band, then extract and calibrate once more.

    A grating-shaped solution gives each column's diffraction angle; for a polynomial solution
    the grating model is fitted to its lines for that angle alone (:func:`_grating_angles_of`).
    The slit images' curvature grows
    with its tangent (:func:`benchspec.geometry.refit_curvature_grating`), a shape that holds
    beyond the outermost traced lines where the polynomial is extrapolated. Taken only when the
    traced lines support it (no worse than the polynomial by BIC, or not rejected by a
    chi-square test); the lines then move slightly and are calibrated again. Where the move
    is a shift of each line's image as a whole (``first_table``, one lamp, and every line's
    shift nearly the same on all aperture rows: :func:`_lines_moved_by`) the new centres are
    computed from the two geometries; otherwise the spectrum is extracted again. When that
    second calibration is refused, the first geometry and solution are kept. ``noise`` maps
    id(stack) to the noise model already estimated for it (estimated again where missing).
    Returns (geometry, wavelength, spectrum); the spectrum is the first one when the lines
    were moved without a second extraction.
    """
    solution = wavelength.solution
    if not geometry.curvature_known:
        return geometry, wavelength, spectrum
    if solution.model == "grating":
        _, theta, x0, f = (float(v) for v in solution.coefficients)
        sign = float(solution.grating_sign)
        source = "the grating-shaped wavelength solution"
    else:
        angles = _grating_angles_of(wavelength, geometry)
        if angles is None:
            return geometry, wavelength, spectrum
        theta, x0, f, sign = angles
        source = "the grating model fitted to the polynomial solution's lines"
    try:
        refit, info = refit_curvature_grating(stacked.image, geometry, theta_rad=theta, x0_px=x0, f_px=f,
                                              sign=sign, saturated=stacked.saturated, angle_source=source)
    except InputError:  # a solution whose parameters give no usable angle: keep the polynomial
        return geometry, wavelength, spectrum
    if not info["used"]:
        return geometry, wavelength, spectrum
    noise = noise or {}
    moved = None if others or first_table is None else _lines_moved_by(first_table, geometry, refit)
    if moved is not None:  # the lines' new centres follow from the geometry: no second extraction
        table, new_spectrum = moved, _spectrum_moved_by(spectrum, geometry, refit)
        refit = dataclasses.replace(refit, notes=refit.notes + (
            "after the curvature refit the lines' centres were moved as the new geometry places them "
            f"(at most {max(abs(a.centre_px - b.centre_px) for a, b in zip(moved.lines, first_table.lines)):.3f} px), "
            "not extracted again",))
    else:
        new_spectrum = extract_stack(stacked, refit, method=extraction, noise_model=noise.get(id(stacked)))
        table = find_lines(new_spectrum, min_snr=min_snr)
    try:
        if others:
            observations = [(table, lamp)] + [
                (find_lines(extract_stack(s, refit, method=extraction, noise_model=noise.get(id(s))), min_snr=min_snr), name)
                for s, name in others]
            new_wavelength = calibrate_combined(observations, pairs=pairs, dispersion_range_nm_per_px=d_range)
        else:  # the same lines, moved by a fraction of a pixel: refined from the first solution, no new search
            new_wavelength = _recalibrate_lines(table, wavelength.solution, lamp=lamp, pairs=pairs,
                                                dispersion_range_nm_per_px=d_range)
    except CalibrationError:
        return geometry, wavelength, spectrum
    return refit, new_wavelength, new_spectrum


#: Largest spread, as a fraction of a line's FWHM, of a line's shift across the aperture rows for which
#: the curvature refit's effect on the line centres is taken from the geometry instead of a second
#: extraction. Measured on 16 accuracy benches (seed 0) against extracting again: where every line's
#: spread is below 0.05 FWHM the predicted centres of the matched lines agree with the re-extracted
#: ones within 0.1 of their 1-sigma uncertainty (0.0002-0.012 px); a JPEG bench at quality 76 with a
#: spread of 0.10 FWHM differed by 0.16 px, and one whose lines moved by 0.7 px by 0.08 px.
_PREDICTED_SHIFT_SPREAD_FWHM = 0.05


#: Largest shift (px) of a line for which the refit's effect is taken from the geometry: the range the
#: comparison with a second extraction covered (shifts up to 0.11 px on the 16 benches).
_PREDICTED_SHIFT_MAX_PX = 0.25


def _spectrum_moved_by(spectrum: Spectrum, old, new) -> Spectrum:
    """``spectrum`` (extracted with ``old``) resampled to where ``new`` places each column (linear interpolation).

    Kept as the calibration's reference spectrum, which later frames extracted with ``new`` are
    compared with for a bumped setup (:func:`benchspec.geometry.measure_band_shift`): it must not
    carry the refit's shift of a fraction of a pixel.
    """
    from .geometry import line_shift_between

    u = np.asarray(spectrum.pixel, dtype=np.float64)
    # The shift is a smooth function of the column (polynomials and the grating's tangent): 129
    # nodes and linear interpolation give it within 4e-4 px on the 15 accuracy benches that take
    # this path (against every column computed), at a tenth of the cost.
    nodes = np.linspace(u.min(), u.max(), 129) if u.size > 129 else u
    shift = np.interp(u, nodes, line_shift_between(old, new, nodes)[0])
    moved = u + shift
    order = np.argsort(moved)
    return dataclasses.replace(
        spectrum,
        intensity=np.interp(u, moved[order], np.asarray(spectrum.intensity, dtype=np.float64)[order]),
        uncertainty=np.interp(u, moved[order], np.asarray(spectrum.uncertainty, dtype=np.float64)[order]))


def _lines_moved_by(table: LineTable, old, new) -> LineTable | None:
    """``table``'s lines as extracting with ``new`` instead of ``old`` would place them, or None.

    The shift of each centre is :func:`benchspec.geometry.line_shift_between` (the
    profile-weighted mean over the aperture rows); None, asking for a second extraction, when a
    line's shift varies across the rows by more than :data:`_PREDICTED_SHIFT_SPREAD_FWHM` of its
    FWHM (its image then changes shape, not only place), a line moves by more than
    :data:`_PREDICTED_SHIFT_MAX_PX`, or the geometries differ otherwise.
    """
    from .geometry import line_shift_between

    if not table.lines:
        return None
    centres = np.array([line.centre_px for line in table.lines])
    fwhm = np.array([line.fwhm_px for line in table.lines])
    try:
        shift, spread = line_shift_between(old, new, centres)
    except InputError:
        return None
    if not (np.all(np.isfinite(shift)) and np.all(spread <= _PREDICTED_SHIFT_SPREAD_FWHM * fwhm)
            and np.all(np.abs(shift) <= _PREDICTED_SHIFT_MAX_PX)):
        return None
    lines = tuple(dataclasses.replace(line, centre_px=float(c + d)) for line, c, d in zip(table.lines, centres, shift))
    return dataclasses.replace(table, lines=lines)


def _grating_angles_of(wavelength, geometry):
    """(theta_rad, x0_px, f_px, sign) of the grating model fitted to a polynomial solution's lines, or None.

    Only the diffraction angle along the band is wanted (for the curvature's shape); the
    wavelength solution stays the polynomial the calibration chose. The fit is the calibration's
    own grating model (``wavefit._grating_fit``, with its prior that the optical axis meets the
    sensor near the frame's centre, here that centre's rectified column) on the lines the
    polynomial used; fewer than 5 lines give None.
    """
    import math

    from .wavefit import _grating_fit

    used = [m for m in wavelength.matches if m.used_in_fit]
    if len(used) < 5:
        return None
    pixel = np.array([m.pixel for m in used], dtype=float)
    reference = np.array([m.reference_nm for m in used], dtype=float)
    dispersion = np.asarray(wavelength.solution.dispersion_nm_per_px(pixel), dtype=float)
    if not np.all(np.isfinite(dispersion)) or not np.all(dispersion != 0):
        return None
    sigma = np.hypot(np.array([m.pixel_uncertainty for m in used]) * np.abs(dispersion),
                     np.array([m.reference_uncertainty_nm for m in used]))
    sigma = np.maximum(sigma, 0.03 * np.abs(dispersion))  # the calibration's 0.03 px centre floor
    theta = math.radians(geometry.rotation_deg)
    centre_s = ((geometry.frame_width_px / 2 - geometry.centre_x_px) * math.cos(theta)
                + (geometry.frame_height_px / 2 - geometry.centre_y_px) * math.sin(theta))
    sign = 1.0 if float(np.median(dispersion)) > 0 else -1.0
    result = _grating_fit(pixel, reference, sigma, sign=sign, width_px=float(geometry.n_columns),
                          axis_px=centre_s - geometry.first_column_s_px)
    if result is None:
        return None
    _, theta_rad, x0, f = (float(v) for v in result[0])
    return theta_rad, x0, f, sign


# --------------------------------------------------------------------------- applying a calibration


def _monotonic_span(wavelength: np.ndarray, anchor: int) -> tuple[int, int]:
    """The contiguous run of columns around ``anchor`` where the wavelength is strictly monotonic."""
    steps = np.diff(wavelength)
    sign = np.sign(steps[min(max(anchor, 0), steps.size - 1)])
    good = np.sign(steps) == sign
    start = anchor
    while start > 0 and good[start - 1]:
        start -= 1
    stop = anchor
    while stop < steps.size and good[stop]:
        stop += 1
    return start, stop + 1


def apply_calibration(spectrum: Spectrum, calibration: Calibration | WavelengthCalibration) -> Spectrum:
    """A copy of a pixel-axis spectrum with the wavelength axis and its 1-sigma, wavelength increasing.

    Columns where the polynomial is not monotonic (far outside the lines) are dropped.
    """
    wavelength_cal = calibration.wavelength if isinstance(calibration, Calibration) else calibration
    if not isinstance(wavelength_cal, WavelengthCalibration):
        raise InputError(f"`calibration` must be a Calibration or WavelengthCalibration, got {type(calibration).__name__}")
    solution = wavelength_cal.solution
    pixel = np.asarray(spectrum.pixel, dtype=float)
    wavelength = solution.wavelength_nm(pixel)
    centre = float(np.median([m.pixel for m in wavelength_cal.matches]))
    anchor = int(np.argmin(np.abs(pixel - centre)))
    start, stop = _monotonic_span(wavelength, anchor)
    keep = slice(start, stop)
    order = np.arange(start, stop)
    if wavelength[stop - 1] < wavelength[start]:
        order = order[::-1]
    if order.size < 2:
        raise CalibrationError("the wavelength solution is not monotonic over the spectrum; recalibrate")
    provenance = dict(spectrum.provenance)
    provenance["wavelength_calibration"] = {
        "lamps": list(wavelength_cal.lamps),
        "rms_px": wavelength_cal.rms_px,
        "rms_nm": wavelength_cal.rms_nm,
        "verdict": wavelength_cal.verdict,
        "polynomial_order": solution.order,
        "line_list_sources": list(wavelength_cal.line_list_sources),
        "columns_kept": [int(start), int(stop)],
    }
    del keep
    return Spectrum(
        intensity=spectrum.intensity[order],
        uncertainty=spectrum.uncertainty[order],
        pixel=pixel[order],
        wavelength_nm=wavelength[order],
        wavelength_uncertainty_nm=solution.uncertainty_nm(pixel[order]),
        saturated=spectrum.saturated[order],
        provenance=provenance,
    )


def _calibration_mapping(calibration: Calibration, path) -> dict:
    w = calibration.wavelength
    return {
        "path": None if path is None else str(path),
        "lamp": ", ".join(w.lamps),
        "rms_nm": w.rms_nm,
        "rms_px": w.rms_px,
        "line_list_source": "; ".join(w.line_list_sources),
        "polynomial_order": w.solution.order,
        "model": w.solution.description,
        # the wavelengths between the outermost lines the solution was fitted to; beyond, it is extrapolated
        "lines_span_nm": _lines_span_nm(w),
        "verdict": w.verdict,
        "created_utc": calibration.created_utc,
    }


def _lines_span_nm(wavelength: WavelengthCalibration) -> list[float] | None:
    used = [m.reference_nm for m in wavelength.matches if m.used_in_fit]
    return [float(min(used)), float(max(used))] if used else None


def _check_band(image, calibration: Calibration, label: str) -> dict:
    shift = measure_band_shift(image, calibration.geometry)
    if shift.measured and shift.moved:
        warnings.warn(f"{label}: {shift.message}", DegradedResultWarning, stacklevel=3)
    return {"measured": shift.measured, "moved": shift.moved, "across_px": shift.across_px,
            "rotation_change_deg": shift.rotation_change_deg, "message": shift.message}


def _loaded_calibration(calibration, cal_path=None) -> tuple[Calibration, Any]:
    """The calibration (read from its file when given a path) and the path it came from."""
    if isinstance(calibration, (str, os.PathLike)):
        cal_path = Path(calibration)
        calibration = read_calibration(cal_path)
    if not isinstance(calibration, Calibration):
        raise InputError(f"`calibration` must be a Calibration or a calibration file path, got {type(calibration).__name__}")
    return calibration, cal_path


def extract_frames(
    frames,
    calibration: Calibration | str | os.PathLike,
    *,
    dark=None,
    each: bool = False,
    extraction: str | None = None,
):
    """Apply a stored calibration to frames of the same setup.

    Parameters
    ----------
    frames : path, glob, folder, video, sequence of them, or ndarray(s)
    calibration : Calibration or path of a calibration file
    dark : optional
        Dark frames, as in :func:`calibrate_frames`.
    each : bool
        False: stack the frames into one spectrum. True: one spectrum per
        frame (a time series; every frame of a video).
    extraction : {"optimal", "box"}, optional
        Default: the method stored in the calibration.

    Returns
    -------
    Spectrum, or list of Spectrum with ``each=True``
        Wavelength axis (increasing) with its 1-sigma uncertainty; the
        provenance names the frames, their hashes and the calibration.
        The list holds every spectrum of the series (about 50 kB per frame
        at 1280 columns: some 5 GB for an hour at 30 fps); for long series
        iterate :func:`iter_extract_frames` instead, which yields the same
        spectra one at a time in bounded memory (``benchspec extract --each``
        does).

    Warns
    -----
    DegradedResultWarning
        The band has moved since calibration (the setup was bumped).

    Raises
    ------
    FrameError
        Frames of another size than the calibration's (another camera resolution).
    """
    from .io import build_provenance

    calibration, cal_path = _loaded_calibration(calibration)
    settings = calibration.settings
    gamma = str(settings.get("gamma_requested", settings.get("gamma", "auto")))
    channel = str(settings.get("channel", "mean"))
    method = str(settings.get("stack", "mean"))
    extraction = extraction or str(settings.get("extraction", "optimal"))
    cal_record = _calibration_mapping(calibration, cal_path)
    run_settings = {"gamma": gamma, "channel": channel, "stack": method, "extraction": extraction}

    if not each:
        stacked, records, dark_records = _stack(frames, dark=dark, gamma=gamma, channel=channel, method=method)
        names = ", ".join(Path(r["path"]).name for r in records if r.get("path"))[:120] or "the frames"
        _check_frame_size(stacked.shape, calibration, cal_path, names)
        band = _check_band(stacked.image, calibration, "frames")
        spectrum = extract_stack(stacked, calibration.geometry, method=extraction)
        provenance = build_provenance(
            frames=[r for r in records if r["path"]] or [{"path": None, "description": "frames passed as arrays", "sha256": None}],
            dark_frames=[r for r in dark_records if r["path"]],
            calibration=cal_record,
            settings=dict(run_settings, gamma_resolved=stacked.settings.get("gamma"), n_frames=stacked.n_frames,
                          encoding=stacked.settings.get("encoding")),
            extra={"band_check": band},
        )
        return apply_calibration(spectrum.with_(provenance=provenance), calibration)

    spectra = list(iter_extract_frames(frames, calibration, dark=dark, extraction=extraction, _calibration_path=cal_path))
    if not spectra:
        raise FrameError("no frames to extract; pass image files, a folder, a glob pattern or a video")
    return spectra


def iter_extract_frames(
    frames,
    calibration: Calibration | str | os.PathLike,
    *,
    dark=None,
    extraction: str | None = None,
    band_check_every: int = 90,
    interpolation: str = "linear",
    opencv_threads: int | None = 1,
    _calibration_path=None,
):
    """One calibrated spectrum per frame, streamed: a time series of any length in bounded memory.

    Frames are decoded on a second thread, a few ahead (a bounded queue; up
    to 64 MB while the first frame sets the series up), and go through one
    :class:`~benchspec.extract.LiveExtractor` built from the calibration's
    geometry (remap tables and aperture weights computed once). Video frames
    stay in the decoder's B, G, R order (the channel weights are reversed
    instead of converting every frame: a spectrum changes by float32
    rounding only).
    The default bilinear resampling is about three times faster than the
    bicubic one used for stacked frames; lines come out about 7% wider, their
    centres and fluxes are unchanged (``interpolation="cubic"`` to match the
    stacked path). The noise model is estimated once, from the first frame.
    The band's position is checked on the first frame and every
    ``band_check_every`` frames after it (3 s of 30 fps video: a check costs
    about as much as extracting 10 frames). Spectra of one band-check period
    share the nested parts of their provenance (settings, calibration,
    band check); treat them as read-only.

    ``opencv_threads`` sets OpenCV's thread count while the series runs
    (``cv2.setNumThreads``, process-wide; restored when the iteration ends);
    None leaves it alone. The default, 1, keeps OpenCV's calls on the
    consuming thread: the decoding thread already occupies the second core,
    and OpenCV's worker threads spin while they wait for work. Measured on
    the 2-core build machine, quiet (load < 1; 300 frames of 1280x720
    video, optimal extraction, 6 alternating passes): process CPU a frame
    3.09-3.50 ms (median 3.34) with 1 thread against 3.41-4.09 (3.91) with
    OpenCV's default 2, and 0.54-0.64x the decode-only rate (median 0.62)
    against 0.53-0.60x (0.55).

    Yields
    ------
    Spectrum
        As :func:`extract_frames` with ``each=True`` returns them; the
        provenance gives the frame's file and index and the series index.
    """
    if band_check_every < 1:
        raise InputError(f"`band_check_every` must be at least 1, was {band_check_every}")
    if opencv_threads is not None and opencv_threads < 1:
        raise InputError(f"`opencv_threads` must be at least 1 (or None), was {opencv_threads}")
    if opencv_threads is None:
        yield from _iter_extract(frames, calibration, dark=dark, extraction=extraction,
                                 band_check_every=band_check_every, interpolation=interpolation,
                                 cal_path=_calibration_path)
        return
    import cv2

    previous = cv2.getNumThreads()
    cv2.setNumThreads(int(opencv_threads))
    try:
        yield from _iter_extract(frames, calibration, dark=dark, extraction=extraction,
                                 band_check_every=band_check_every, interpolation=interpolation,
                                 cal_path=_calibration_path)
    finally:
        cv2.setNumThreads(previous)


#: the decoding thread linearises a frame itself while at least this many decoded frames wait (see
#: _decoded_ahead); None: it only decodes. Once the optimal extraction kept its weights between frames
#: (benchspec.extract.LiveExtractor) the consuming thread became the faster one's equal and handing it
#: work paid: measured quiet (load < 1) on the 2-core machine, 300 frames 1280x720, 20 interleaved
#: passes each: median 0.714 of the decode-only rate with 1, 0.704 with 2, 0.684 with None (CPU of all
#: threads 2.93 ms a frame in each). Before that change, at load 3, None was best (4.8-5.4 ms a frame
#: against 5.9 with 2): a frame linearised on one thread and extracted on the other crosses between the
#: cores' caches, which only pays when the decoding thread has time to spare
_PREPARE_AHEAD: int | None = 1


def _iter_extract(frames, calibration, *, dark, extraction, band_check_every, interpolation, cal_path):
    """The body of :func:`iter_extract_frames` (arguments checked there)."""
    from .extract import LiveExtractor
    from .frames import FramePreparer
    from .io import build_provenance

    calibration, cal_path = _loaded_calibration(calibration, cal_path)
    settings = calibration.settings
    gamma = str(settings.get("gamma_requested", settings.get("gamma", "auto")))
    channel = str(settings.get("channel", "mean"))
    extraction = extraction or str(settings.get("extraction", "optimal"))
    cal_record = _calibration_mapping(calibration, cal_path)
    run_settings = {"gamma": gamma, "channel": channel, "stack": "none (one spectrum per frame)", "extraction": extraction}

    # The dark is stacked once; every frame is linearised alike.
    dark_stack = None
    dark_records: list[dict] = []
    if dark is not None:
        if isinstance(dark, StackedFrame):
            dark_stack = dark
        elif _is_array_input(dark):
            dark_stack = stack_frames([dark] if isinstance(dark, np.ndarray) else list(dark), gamma=gamma,
                                      channel=channel, check=False)
        else:
            dark_stack = stack_frames(iter_frames(dark), gamma=gamma, channel=channel, check=False)
            dark_records = [{"path": str(p), "sha256": file_sha256(p)} for p in expand_sources(dark)]
    # once the extractor exists, the decoding thread also linearises frames' regions while it is ahead
    # (OpenCV releases the lock meanwhile), so the two cores share the work evenly
    ahead_work: dict = {"ahead": _PREPARE_AHEAD}  # "ahead" unused while there is no "prepare"
    if _is_array_input(frames):
        arrays = [frames] if isinstance(frames, np.ndarray) else list(frames)
        sources = ((None, k, a, False, None) for k, a in enumerate(arrays))
    else:
        # video frames stay in the decoder's B, G, R order: the channel weights are reversed instead
        sources = _decoded_ahead(_iter_labelled(frames, bgr=True), work=ahead_work)
    extractor = None
    band: dict = {}
    gamma_resolved = None
    encoding = None
    axis = None  # the calibrated axis, the same for every frame: computed on the first
    for series_index, (path, index, frame, bgr, prepared) in enumerate(sources):
        label = f"{path or 'array'} frame {index}"
        if extractor is None:
            rgb = cv2.cvtColor(frame, cv2.COLOR_BGR2RGB) if bgr else frame
            stacked = stack_frames([rgb], gamma=gamma, channel=channel, dark=dark_stack)
            _check_frame_size(stacked.shape, calibration, cal_path, label)
            band = _check_band(stacked.image, calibration, label)
            gamma_resolved = stacked.settings.get("gamma")
            encoding = stacked.settings.get("encoding")
            if encoding == "lossless" and path is not None and _is_video(Path(path)):
                encoding = "video"  # lossy, whatever its block edges show (see frames.load_stack)
            noise = estimate_noise_model(stacked, geometry=calibration.geometry)
            preparer = FramePreparer(gamma=gamma, channel=channel, dark=None if dark_stack is None else dark_stack.image)
            preparer_bgr = FramePreparer(gamma=gamma, channel_weights=tuple(reversed(preparer.weights)),
                                         dark=preparer.dark)
            extractor = LiveExtractor(calibration.geometry, noise_model=noise, method=extraction,
                                      preparer=preparer, interpolation=interpolation)
            ahead_work["ready"] = True  # set up: the read-ahead shrinks back to a few frames
            if _PREPARE_AHEAD is not None:
                ahead_work["prepare"] = extractor.prepare_raw
            base = None
        elif series_index % band_check_every == 0:
            _check_frame_size(np.shape(frame), calibration, cal_path, label)
            # the linear frame is all the check needs: no stack statistics (a stack of one costs 5 times more);
            # meanwhile the decoding thread may run further ahead (a check costs some 5-10 frames' extraction)
            ahead_work["busy"] = True
            if "wake" in ahead_work:
                ahead_work["wake"]()
            try:
                band = _check_band((preparer_bgr if bgr else preparer).prepare(frame)[0], calibration, label)
            finally:
                ahead_work["busy"] = False
            base = None
        if base is None:  # the record shared by the frames until the next band check
            base = build_provenance(
                frames=[{"path": None if path is None else str(path), "frame_index": index, "sha256": None}],
                dark_frames=[r for r in dark_records if r["path"]],
                calibration=cal_record,
                settings=dict(run_settings, gamma_resolved=gamma_resolved, n_frames=1, encoding=encoding),
                extra={"band_check": band, "time_series_index": series_index},
            )
            signal_record = base["frames"][0]
        if prepared is not None:
            flux, variance, saturated = extractor.process_prepared(*prepared)
        else:
            flux, variance, saturated = extractor.process_raw_arrays(frame, bgr=bgr)
        # per frame only the frame, its index and the time change; the nested settings, calibration and
        # band-check records are shared by the frames of one band-check period (read them, do not edit them)
        provenance = dict(base)
        provenance["frames"] = [dict(signal_record, path=None if path is None else str(path), frame_index=index)]
        provenance["frames"] += [dict(r) for r in base["frames"][1:]]
        provenance["created_utc"] = _utc_now()
        provenance["time_series_index"] = series_index
        if axis is None:
            axis = apply_calibration(Spectrum(intensity=flux, uncertainty=np.sqrt(np.maximum(variance, 0)),
                                              pixel=np.arange(flux.size, dtype=np.float64)), calibration)
            order = np.rint(axis.pixel).astype(np.intp)
        provenance["wavelength_calibration"] = dict(axis.provenance["wavelength_calibration"])
        # what apply_calibration gives, without solving the same wavelength axis again for every frame
        yield Spectrum(intensity=flux[order], uncertainty=np.sqrt(np.maximum(variance[order], 0)), pixel=axis.pixel,
                       wavelength_nm=axis.wavelength_nm, wavelength_uncertainty_nm=axis.wavelength_uncertainty_nm,
                       saturated=saturated[order], provenance=provenance)


def _utc_now() -> str:
    """The time now, as :func:`benchspec.io.build_provenance` writes it (ISO 8601, whole seconds, Z)."""
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _nbytes(item) -> int:
    """Bytes of the arrays an item holds (a frame, or a tuple with a frame and its prepared arrays)."""
    if isinstance(item, np.ndarray):
        return item.nbytes
    if isinstance(item, tuple):
        return sum(_nbytes(part) for part in item)
    return 0


#: while the first frame sets up the series (noise model, extractor, band check: some 50-100 ms) and during
#: the later band checks, decoded frames may wait up to this many bytes instead of ``depth`` frames: the
#: decoding thread keeps decoding instead of idling (otherwise ``depth``: frames handed over soon are still
#: in the caches)
_AHEAD_BYTES = 64_000_000


def _decoded_ahead(items, *, depth: int = 4, work: dict | None = None, max_bytes: int | None = None):
    """The same items, produced by a second thread ahead of the consumer (OpenCV decodes without the GIL).

    At most ``depth`` items wait; while the consumer is still setting up
    (``work`` given, neither ``"ready"`` nor ``"prepare"`` in it yet) or says it is busy
    (``work["busy"]`` true, then ``work["wake"]()``) more may, as long as
    they hold at most ``max_bytes`` (default :data:`_AHEAD_BYTES`). Memory
    stays bounded whatever the length of the series.

    With ``work``, each item ``(path, index, frame, is_bgr)`` comes out as
    ``(path, index, frame, is_bgr, prepared)``: ``prepared`` is
    ``work["prepare"](frame, bgr=is_bgr)`` computed on the second thread once
    the consumer has put a callable there (None before or without one, or
    when it raised: the consumer then does the work and meets the error
    itself).

    The work is shared out as the two threads keep pace: the second thread
    does it only while at least ``work["ahead"]`` items (default 2) and at
    most ``depth`` wait, i.e. while decoding is ahead of the consumer but not
    with a backlog from the set-up or a band check; when the consumer waits for
    frames it gets them raw and prepares them itself. Which thread prepares a
    frame does not change the result.
    """
    import collections
    import threading

    budget = _AHEAD_BYTES if max_bytes is None else int(max_bytes)
    waiting: collections.deque = collections.deque()  # (item, bytes)
    state = {"bytes": 0}
    changed = threading.Condition()
    stop = threading.Event()
    done = object()

    def warming() -> bool:  # the consumer is setting up (neither "ready" nor "prepare" yet) or busy (a band check)
        if work is None:
            return False
        ready = bool(work.get("ready")) or work.get("prepare") is not None
        return not ready or bool(work.get("busy"))

    def wake() -> None:
        with changed:
            changed.notify_all()

    if work is not None:
        work["wake"] = wake

    def put(item, size: int) -> bool:
        with changed:
            while len(waiting) >= depth and (not warming() or state["bytes"] + size > budget):
                if stop.is_set():
                    return False
                changed.wait(0.1)
            waiting.append((item, size))
            state["bytes"] += size
            changed.notify_all()
        return True

    # a frame is prepared only while at most ``depth`` items wait (never into a backlog left by the set-up
    # or a band check): then the consumer holds one of the last depth + 1 items and is done with all
    # older ones, so prepared arrays cycling through depth + 3 buffers are never overwritten in use
    rings = [{} for _ in range(depth + 3)]

    def produce():
        try:
            for count, item in enumerate(items):
                if work is not None:
                    prepare = work.get("prepare")
                    prepared = None
                    if prepare is not None and work.get("ahead", 2) <= len(waiting) <= depth:
                        try:
                            prepared = prepare(item[2], bgr=item[3], buffers=rings[count % len(rings)])
                        except Exception:  # the consumer repeats the work and reports the error
                            prepared = None
                    item = (*item, prepared)
                if stop.is_set() or not put(item, _nbytes(item)):
                    return
            put(done, 0)
        except BaseException as exc:  # handed to the consumer, raised there
            with changed:
                waiting.append((exc, 0))
                changed.notify_all()

    worker = threading.Thread(target=produce, name="benchspec-decode", daemon=True)
    worker.start()
    try:
        while True:
            with changed:
                while not waiting:
                    changed.wait()
                item, size = waiting.popleft()
                state["bytes"] -= size
                changed.notify_all()
            if item is done:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        with changed:
            changed.notify_all()
        worker.join(timeout=5)


def _check_frame_size(shape, calibration: Calibration, cal_path, what: str) -> None:
    """FrameError naming the frames, the calibration file and both sizes when they differ."""
    height, width = int(shape[0]), int(shape[1])
    cal_height, cal_width = calibration.frame_shape
    if (height, width) != (cal_height, cal_width):
        source = f"calibration {cal_path}" if cal_path is not None else "the calibration"
        raise FrameError(
            f"{what}: {width}x{height} px, but {source} was made on {cal_width}x{cal_height} px frames "
            f"(another camera resolution?); set the camera back to {cal_width}x{cal_height} or recalibrate"
        )


def _iter_labelled(frames, *, bgr: bool = False):
    """(path, index within the file, frame, is_bgr) for every frame named by ``frames``.

    ``bgr``: colour video frames come in the decoder's B, G, R order (``is_bgr`` True), unconverted.
    """
    from .frames import _is_video, iter_video, read_image

    for path in expand_sources(frames):
        if _is_video(path):
            for index, frame in enumerate(iter_video(path, bgr=bgr)):
                yield path, index, frame, bgr and frame.ndim == 3
        else:
            yield path, 0, read_image(path), False
