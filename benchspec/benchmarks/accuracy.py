"""Accuracy benchmark of the frame -> calibrated spectrum chain on virtual benches.

``benchspec benchmark accuracy [--quick]``. Each bench is drawn (seeded) from:

* rotation -12..+12 deg, smile 0..20 px at the band's edges (650 nm);
* 0.2..3 nm/px at the sensor's centre, blue on either side (grating order +1 or -1);
  at the finest dispersions part of the 380-720 nm range falls off the sensor;
* PNG (lossless) or JPEG at quality 70-95, written gamma 1 or 2.2 (and read back
  with the matching ``gamma``), 640-1920 px wide, RGB sensor with its IR-cut filter;
* the brightest lines saturated (exposure 1.5-4 x full scale) or not (0.6-0.9).

Figures
-------
calibration
    On the CFL frame, with no first guess: success = a solution with weighted
    RMS < 0.5 px and every matched line assigned to the reference line that is
    really there (checked against the simulator's truth: the reference
    wavelength must agree with the true wavelength at the measured pixel
    within 3 sigma of the reference or 1.5 px); an explicit refusal
    (CalibrationError) is counted apart; a solution with a wrong assignment
    is a *wrong answer*. Also the true error of the solution (vs the truth
    mapping) between the outermost tightly known lines.
lines vs NIST
    With that calibration, He, Ne, H, Hg and Na frames of the same bench are
    extracted and their isolated lines (no listed neighbour of >= 5% of their
    intensity within 2.5 FWHM) compared with the NIST wavelengths of the
    packaged line lists, in px; inside the calibrated span and over all lines.
line centres vs truth
    The same lines' centres against the simulator's truth, in px, with their
    stated 1-sigma (pull = error / sigma). The truth of a centre in an extracted
    spectrum is where the line lies on each aperture row of the rectified band,
    averaged with the band's spatial profile (``row_averaged_truth``): a slit
    image left slightly curved by the rectification moves the summed line by
    the mean of its sag over the rows, the same on every frame of the setup
    (a smooth error the CFL calibration absorbs). The error against the centre
    row's truth alone is reported beside it; the difference is that
    rectification residual.
curvature
    On the benches with smile >= 10 px: the median FWHM of the narrow Hg I lines
    of a mercury frame (geometry from the CFL frame) after rectification and
    after summing rows uncorrected, each over the slit image's FWHM from the
    truth (target: rectified within 10%). The slit image's FWHM is the one the
    camera records: the line-spread function and the slit width, integrated
    over a pixel (2.3548 sqrt(sigma_lsf^2 + w^2/12 + 1/12)); the pixel's 1/12 px^2
    is in every recorded line, and the Gaussian fit of a perfectly straight,
    pixel-integrated line reads that width (a fit of a sampled Gaussian). The
    CFL's own phosphor lines are about 2 nm wide in themselves and would
    measure the lamp, not the correction. Beside it: the same bench's mercury
    frame rendered with no smile (rotation kept), measured the same way
    (``straight``): what the rotated frame gives when nothing is curved.
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings

import numpy as np

from ..errors import BenchspecError, CalibrationError, DegradedResultWarning
from ..refdata import load_line_list

__all__ = ["run", "format_report", "draw_bench", "truth_wavelength_at"]

CHECK_SPECIES = ("He", "Ne", "H", "Hg", "Na")
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_LAMP_OF = {"He": "he", "Ne": "ne", "H": "h", "Hg": "hg", "Na": "na"}


def draw_bench(rng: np.random.Generator):
    """One random virtual bench within the benchmark's ranges, and what was drawn."""
    from ..simulate import Bench

    # A frame width, a dispersion at 550 nm, and a groove density and field of view that give it
    # (d cos(beta) / f); a draw no plausible lens can give (e.g. 0.2 nm/px on a 640 px frame) is redrawn.
    for _ in range(1000):
        width = int(rng.choice([640, 1280, 1920]))
        height = int(round(width * 9 / 16))
        target = float(np.exp(rng.uniform(np.log(0.2), np.log(3.0))))
        found = False
        for _ in range(100):
            lines_per_mm = float(rng.choice([300, 500, 600, 830, 1000, 1200]))
            d_nm = 1e6 / lines_per_mm
            if 550.0 / d_nm >= 0.95:
                continue
            cos_beta = math.sqrt(1 - (550.0 / d_nm) ** 2)
            focal = d_nm * cos_beta / target
            fov = math.degrees(2 * math.atan(width / (2 * focal)))
            if 20.0 <= fov <= 110.0:
                found = True
                break
        if found:
            break
    else:  # pragma: no cover - 1000 draws always find one
        raise RuntimeError("no grating matches the dispersion")
    order = int(rng.choice([1, -1]))
    saturate = bool(rng.random() < 0.4)
    jpeg = bool(rng.random() < 0.5)
    drawn = {
        "nm_per_px": target,
        "lines_per_mm": lines_per_mm,
        "order": order,
        "width_px": width,
        "fov_deg": fov,
        "rotation_deg": float(rng.uniform(-12, 12)),
        "smile_px": float(rng.uniform(0, 20)),
        "jpeg_quality": int(rng.integers(70, 96)) if jpeg else None,
        "gamma": str(rng.choice(["1", "2.2"])),
        "exposure_level": float(rng.uniform(1.5, 4.0) if saturate else rng.uniform(0.6, 0.9)),
        "slit_height_px": float(rng.uniform(0.12, 0.3) * height),
        "lsf_sigma_px": float(rng.uniform(0.7, 1.6)),
    }
    bench = Bench().with_(
        grating={"lines_per_mm": lines_per_mm, "order": order},
        camera={"width_px": width, "height_px": height, "horizontal_fov_deg": fov, "rotation_deg": drawn["rotation_deg"]},
        slit={"height_px": drawn["slit_height_px"], "smile_px": drawn["smile_px"]},
        optics={"lsf_sigma_px": drawn["lsf_sigma_px"]},
        exposure={"level": drawn["exposure_level"]},
        output={"gamma": drawn["gamma"]},
    )
    return bench, drawn


def _frame(bench, *, source=None, seed: int, jpeg_quality):
    """Render a frame; JPEG benches go through an in-memory JPEG round trip at their quality."""
    import cv2

    from ..simulate import render

    rendered = render(bench, seed=seed, source=source)
    image = rendered.image
    if jpeg_quality is not None:
        bgr = image[..., ::-1] if image.ndim == 3 else image
        ok, data = cv2.imencode(".jpg", np.ascontiguousarray(bgr), [cv2.IMWRITE_JPEG_QUALITY, int(jpeg_quality)])
        decoded = cv2.imdecode(data, cv2.IMREAD_UNCHANGED)
        image = decoded[..., ::-1] if decoded.ndim == 3 else decoded
    return np.ascontiguousarray(image), rendered.truth


def truth_wavelength_at(columns, geometry, truth) -> np.ndarray:
    """True wavelength at rectified columns of ``geometry`` (centre row), from the simulator's truth mapping."""
    u = np.asarray(columns, dtype=float)
    x, y = geometry.frame_coordinates(u, np.full_like(u, geometry.centre_row, dtype=float))
    g = truth["geometry"]
    theta = math.radians(g["rotation_deg"])
    px, py = g["pivot_px"]
    column = px + math.cos(theta) * (x - px) + math.sin(theta) * (y - py)
    mapping = truth["mapping"]
    return np.interp(column, mapping["rectified_column_px"], mapping["wavelength_nm"], left=np.nan, right=np.nan)


def _slit_image_columns(bench, geometry, rows, wavelength_nm, start):
    """Rectified columns u (shape of ``start``) where rows ``rows`` of ``geometry`` cross the virtual
    bench's slit image of ``wavelength_nm`` (its smile included), by Newton steps from ``start``; and
    where that converged (to 1e-3 px)."""
    from ..simulate import _columns, _projection

    proj = _projection(bench)
    theta = math.radians(bench.camera.rotation_deg)
    c, s = math.cos(theta), math.sin(theta)
    px, py = proj.centre_column_px, proj.band_row_px

    def offset(u):
        x, y = geometry.frame_coordinates(u, rows)
        dx, dy = x - px, y - py
        canvas_x, canvas_y = c * dx + s * dy + px, -s * dx + c * dy + py  # undo the frame's rotation
        with np.errstate(invalid="ignore"):
            return canvas_x - _columns(bench, proj, wavelength_nm, canvas_y - py)

    u = np.asarray(start, dtype=float)
    for _ in range(6):
        f = offset(u)
        slope = offset(u + 0.5) - offset(u - 0.5)
        u = u - f / np.where(np.abs(slope) > 1e-6, slope, 1.0)
    return u, np.isfinite(u) & (np.abs(offset(u)) < 1e-3)


def row_averaged_truth(bench, geometry, wavelength_nm: float, start_column: float) -> tuple[float, float]:
    """(profile-weighted mean over the aperture rows, centre row) of the rectified column of a rendered line.

    On each rectified row v the line of ``wavelength_nm`` lies at the column u where the frame
    point ``geometry.frame_coordinates(u, v)`` falls on the simulator's slit image of that
    wavelength (its smile included); found by Newton steps from ``start_column``. NaN where the
    line leaves the frame on too many rows.
    """
    a0, a1 = geometry.aperture_rows
    rows = np.arange(a0, a1, dtype=float)
    weight = np.asarray(geometry.spatial_profile, dtype=float)
    if weight.size != rows.size or not np.any(weight > 0):
        weight = np.ones(rows.size)
    u, ok = _slit_image_columns(bench, geometry, rows, wavelength_nm, np.full(rows.size, float(start_column)))
    centre = geometry.centre_row - a0
    if ok.sum() < 0.5 * rows.size:
        return float("nan"), float("nan")
    mean = float(np.sum(weight[ok] * u[ok]) / np.sum(weight[ok]))
    return mean, (float(u[centre]) if 0 <= centre < rows.size and ok[centre] else float("nan"))


def residual_sag_px(bench, geometry, truth, *, wavelength_range_nm=(380.0, 720.0), n_points: int = 61) -> float:
    """Largest sag (px) a slit image keeps at the aperture's edge after rectification, along the band.

    For wavelengths every ``(n_columns - 1) / (n_points - 1)`` columns across the rectified band
    (those inside ``wavelength_range_nm``, the lit part of the virtual bench's lamps), the column of
    the rendered slit image is found on the aperture's first, centre and last rectified rows (as in
    :func:`row_averaged_truth`); the parabola through the three gives the curvature the
    rectification left, and ``|gamma| t_edge**2`` (``t_edge`` the farther aperture edge from the
    centre row) its sag at the edge: what the geometry's curvature model gets wrong there, tilt
    left aside. NaN when fewer than three wavelengths are found on all three rows.
    """
    a0, a1 = geometry.aperture_rows
    rows = np.array([a0, geometry.centre_row, a1 - 1], dtype=float)[:, None]
    t = rows[:, 0] - geometry.centre_row
    start = np.linspace(0.0, geometry.n_columns - 1.0, n_points)
    wavelength = truth_wavelength_at(start, geometry, truth)
    keep = np.isfinite(wavelength) & (wavelength >= wavelength_range_nm[0]) & (wavelength <= wavelength_range_nm[1])
    if keep.sum() < 3 or t[0] == 0 or t[2] == 0:
        return float("nan")
    u, ok = _slit_image_columns(bench, geometry, rows, wavelength[keep][None, :],
                                np.repeat(start[keep][None, :], 3, axis=0))
    found = np.all(ok, axis=0)
    if found.sum() < 3:
        return float("nan")
    u = u[:, found]
    # parabola u(t) = u0 + beta t + gamma t^2 through (t_top, t=0, t_bottom)
    d_top, d_bottom = (u[0] - u[1]) / t[0], (u[2] - u[1]) / t[2]
    gamma = (d_bottom - d_top) / (t[2] - t[0])
    t_edge = max(abs(t[0]), abs(t[2]))
    return float(np.max(np.abs(gamma)) * t_edge**2)


def _isolated_lines(species: str, fwhm_nm: float):
    lines = load_line_list(species).lines
    wl = np.array([l.wavelength_nm for l in lines])
    inten = np.array([l.relative_intensity for l in lines])
    keep = []
    for i, l in enumerate(lines):
        near = (np.abs(wl - wl[i]) < 2.5 * fwhm_nm) & (np.arange(wl.size) != i)
        if np.any(inten[near] >= 0.05 * inten[i]):
            continue
        keep.append((l.wavelength_nm, l.relative_intensity))
    return keep


def _check_assignments(calibration, truth) -> tuple[bool, float, list]:
    """(all correct, max true error in px over the anchored span, problems)."""
    w = calibration.wavelength
    geometry = calibration.geometry
    problems = []
    for m in w.matches:
        true_nm = float(truth_wavelength_at([m.pixel], geometry, truth)[0])
        disp = abs(float(w.solution.dispersion_nm_per_px(m.pixel)))
        allowed = max(3 * math.hypot(m.reference_uncertainty_nm, m.pixel_uncertainty * disp), 1.5 * disp)
        if not np.isfinite(true_nm) or abs(true_nm - m.reference_nm) > allowed:
            problems.append(f"{m.pixel:.1f} px assigned {m.reference_nm:.2f} nm, truth {true_nm:.2f} nm")
    anchors = [m.pixel for m in w.matches if m.anchor and m.used_in_fit] or [m.pixel for m in w.matches]
    grid = np.linspace(min(anchors), max(anchors), 200)
    true = truth_wavelength_at(grid, geometry, truth)
    disp = np.abs(w.solution.dispersion_nm_per_px(grid))
    error_px = np.abs(w.solution.wavelength_nm(grid) - true) / disp
    return (not problems), float(np.nanmax(error_px)), problems


def _lines_vs_nist(calibration, bench, drawn, seed):
    """Residuals (px) of isolated NIST lines measured with the CFL calibration; per species."""
    from ..lines import find_lines
    from ..pipeline import extract_frames

    w = calibration.wavelength
    fitted = [m.pixel for m in w.matches if m.used_in_fit]
    low_px, high_px = min(fitted), max(fitted)
    out = {}
    for k, species in enumerate(CHECK_SPECIES):
        try:
            image, truth = _frame(bench, source={"kind": "lamp", "name": _LAMP_OF[species]}, seed=seed + 101 + k,
                                  jpeg_quality=drawn["jpeg_quality"])
        except BenchspecError:
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DegradedResultWarning)
            try:
                spectrum = extract_frames([image], calibration)
            except BenchspecError:
                continue
        table = find_lines(spectrum, min_snr=10.0)
        if len(table) == 0:
            continue
        fwhm_nm = float(np.median([l.fwhm_nm for l in table]))
        refs = _isolated_lines(species, fwhm_nm)
        rows = []
        for line in table:
            if line.blended or line.saturated:
                continue
            near = [r for r in refs if abs(r[0] - line.centre_nm) < 1.0 * fwhm_nm]
            if len(near) != 1:
                continue
            disp = abs(float(w.solution.dispersion_nm_per_px(line.centre_px)))
            inside = low_px <= line.centre_px <= high_px
            rendered = [t["wavelength_nm"] for t in truth["lines"] if abs(t["wavelength_nm"] - near[0][0]) < 1e-6]
            truth_error = None
            if rendered:
                averaged, centre_row = row_averaged_truth(bench, calibration.geometry, rendered[0], line.centre_px)
                if np.isfinite(averaged):
                    truth_error = {"error_px": line.centre_px - averaged, "error_centre_row_px": line.centre_px - centre_row,
                                   "sigma_px": line.centre_uncertainty_px,
                                   "sigma_total_px": getattr(line, "centre_total_uncertainty_px", line.centre_uncertainty_px),
                                   "snr": line.snr,
                                   "jpeg": drawn["jpeg_quality"] is not None, "gamma": drawn["gamma"]}
            # against the line's whole stated 1-sigma: its own fit and the calibration's at that pixel
            pull = (line.centre_nm - near[0][0]) / line.centre_uncertainty_nm if line.centre_uncertainty_nm else np.nan
            rows.append(((line.centre_nm - near[0][0]) / disp, inside, near[0][0], truth_error, float(pull),
                         drawn["jpeg_quality"] is not None))
        out[species] = rows
    return out


def _curvature(calibration, bench, drawn, seed, truth):
    """(median FWHM rectified, median FWHM uncorrected) over the slit image FWHM, from an Hg frame.

    Measured on the narrow Hg I lines of a mercury frame of the same bench (the geometry found on
    the CFL frame): the CFL's phosphor lines are broad in themselves (about 2 nm), so their width
    says little about how well the slit images were straightened.
    """
    from ..extract import extract_stack
    from ..frames import stack_frames
    from ..lines import find_lines

    from ..geometry import measure_geometry

    image, _ = _frame(bench, source={"kind": "lamp", "name": "hg"}, seed=seed + 77,
                      jpeg_quality=drawn["jpeg_quality"])
    stacked = stack_frames([image], gamma=drawn["gamma"])
    geometry = calibration.geometry
    if not geometry.curvature_known:
        return None
    uncorrected = dataclasses.replace(geometry, curvature_coefficients=(0.0,), tilt_coefficients=(0.0,))
    if getattr(geometry, "curvature_grating", ()):
        uncorrected = dataclasses.replace(uncorrected, curvature_grating=())
    # The recorded slit image: LSF and slit width (the simulator's optical FWHM) integrated over a pixel.
    optical_fwhm = float(truth["geometry"]["slit_image_fwhm_px"])
    slit_fwhm = math.sqrt(optical_fwhm**2 + _FWHM_PER_SIGMA**2 / 12.0)

    def median_fwhm(frame, g):
        spectrum = extract_stack(frame, g, method="box")
        table = find_lines(spectrum, min_snr=20.0)
        good = [l.fwhm_px for l in table if not l.blended and not l.saturated]
        return float(np.median(good)) if good else float("nan")

    rectified = median_fwhm(stacked, geometry)
    flat = median_fwhm(stacked, uncorrected)
    # The same bench with straight slit images (rotation kept), its geometry from its own frame.
    straight = float("nan")
    try:
        image, _ = _frame(bench.with_(slit={"smile_px": 0.0}), source={"kind": "lamp", "name": "hg"}, seed=seed + 77,
                          jpeg_quality=drawn["jpeg_quality"])
        frame = stack_frames([image], gamma=drawn["gamma"])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DegradedResultWarning)
            straight = median_fwhm(frame, measure_geometry(frame.image, saturated=frame.saturated))
    except BenchspecError:
        pass
    return rectified / slit_fwhm, flat / slit_fwhm, rectified / optical_fwhm, rectified / straight


def run(quick: bool = False, *, seed: int = 20261201, n_benches: int | None = None, verbose: bool = False,
        mosaic: str = "none") -> dict:
    """Run the accuracy benchmark.

    Parameters
    ----------
    quick : bool
        12 benches (NIST-line check on 4 of them) instead of 60 (on every fifth one).
    seed : int
        Seed of the bench draws (results repeat).
    n_benches : int, optional
        Override the number of benches.
    verbose : bool
        Print one line per bench.
    mosaic : str
        ``"rggb"`` renders every drawn bench (and its NIST-line frames) through a colour-filter
        mosaic and bilinear demosaicing (``simulate.CameraSettings.mosaic``); ``"none"`` (default)
        gives each pixel all three channels. The lamp-unit check keeps the default bench.

    Returns
    -------
    dict
        ``calibration`` (counts, rates, RMS and true-error statistics, refusals and wrong
        answers with reasons), ``lines_vs_nist`` (RMS px per species, inside the calibrated
        span and overall), ``curvature`` (FWHM ratios), ``benches`` (one record each),
        ``targets`` and ``passed``.
    """
    from ..pipeline import calibrate_frames

    from ..errors import InputError
    from ..simulate import _CHOICES

    if mosaic not in _CHOICES["camera.mosaic"]:
        raise InputError(f"`mosaic` was {mosaic!r}; accepted: {', '.join(_CHOICES['camera.mosaic'])}")
    rng = np.random.default_rng(seed)
    count = n_benches or (12 if quick else 60)
    nist_every = 3 if quick else 5
    records = []
    nist: dict[str, list] = {s: [] for s in CHECK_SPECIES}
    curvature = []
    started = time.process_time()
    for index in range(count):
        bench, drawn = draw_bench(rng)
        if mosaic != "none":  # after the draw, so the benches are the same ones with or without it
            bench = bench.with_(camera={"mosaic": mosaic})
        bench_seed = seed + 1000 * index
        record = {"index": index, **{k: (round(v, 3) if isinstance(v, float) else v) for k, v in drawn.items()}}
        try:
            image, truth = _frame(bench, seed=bench_seed, jpeg_quality=drawn["jpeg_quality"])
        except BenchspecError as exc:
            record.update(status="not rendered", reason=str(exc))
            records.append(record)
            continue
        t0 = time.process_time()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", DegradedResultWarning)
                calibration = calibrate_frames([image], lamp="cfl", gamma=drawn["gamma"])
        except CalibrationError as exc:
            record.update(status="refused", reason=str(exc), cpu_s=time.process_time() - t0)
            records.append(record)
            if verbose:
                print(f"bench {index}: refused: {exc}")
            continue
        except BenchspecError as exc:
            record.update(status="failed before calibration", reason=str(exc), cpu_s=time.process_time() - t0)
            records.append(record)
            if verbose:
                print(f"bench {index}: {type(exc).__name__}: {exc}")
            continue
        except Exception as exc:  # a bug, not bad input: counted and reported, the other benches still run
            record.update(status="crashed", reason=f"{type(exc).__name__}: {exc}", cpu_s=time.process_time() - t0)
            records.append(record)
            if verbose:
                print(f"bench {index}: crashed: {type(exc).__name__}: {exc}")
            continue
        record["cpu_s"] = time.process_time() - t0
        w = calibration.wavelength
        correct, true_error_px, problems = _check_assignments(calibration, truth)
        record.update(rms_px=w.rms_px, n_matched=len(w.matches), n_used=w.n_used, polynomial_order=w.solution.order,
                      verdict=w.verdict, true_error_px=true_error_px,
                      rotation_error_deg=calibration.geometry.rotation_deg - drawn["rotation_deg"])
        if not correct:
            record.update(status="wrong", reason="; ".join(problems))
        elif w.rms_px >= 0.5:
            record.update(status="rms too large")
        else:
            record.update(status="ok")
        if verbose:
            print(f"bench {index}: {record['status']} {drawn['nm_per_px']:.2f} nm/px rms {w.rms_px:.3f} px "
                  f"true error {true_error_px:.2f} px {'; '.join(problems)}")
        if record["status"] == "ok" and calibration.geometry.curvature_known:
            record["residual_sag_px"] = residual_sag_px(bench, calibration.geometry, truth)
            record["curvature_model"] = "grating" if getattr(calibration.geometry, "curvature_grating", ()) else "polynomial"
        if record["status"] == "ok" and index % nist_every == 0:
            for species, rows in _lines_vs_nist(calibration, bench, drawn, bench_seed).items():
                nist[species].extend(rows)
        if record["status"] == "ok" and drawn["smile_px"] >= 10.0:
            ratios = _curvature(calibration, bench, drawn, bench_seed, truth)
            if ratios is not None:
                curvature.append(ratios)
                record["fwhm_over_slit"] = {"rectified": ratios[0], "uncorrected": ratios[1],
                                            "rectified_over_optical": ratios[2], "rectified_over_straight": ratios[3]}
        records.append(record)

    statuses = [r["status"] for r in records]
    calibrated = [r for r in records if "rms_px" in r]
    ok = statuses.count("ok")
    summary = {
        "benches": count,
        "ok": ok,
        "refused": statuses.count("refused"),
        "wrong": statuses.count("wrong"),
        "rms_too_large": statuses.count("rms too large"),
        "crashed": statuses.count("crashed"),
        "other_failures": count - ok - statuses.count("refused") - statuses.count("wrong") - statuses.count("rms too large")
        - statuses.count("crashed"),
        "success_rate": ok / count if count else float("nan"),
        "rms_px_median": float(np.median([r["rms_px"] for r in calibrated])) if calibrated else float("nan"),
        "rms_px_max": float(np.max([r["rms_px"] for r in calibrated])) if calibrated else float("nan"),
        "true_error_px_median": float(np.median([r["true_error_px"] for r in calibrated])) if calibrated else float("nan"),
        "true_error_px_max": float(np.max([r["true_error_px"] for r in calibrated])) if calibrated else float("nan"),
        "rotation_error_deg_max": float(np.max(np.abs([r["rotation_error_deg"] for r in calibrated]))) if calibrated else float("nan"),
        "cpu_s_median": float(np.median([r["cpu_s"] for r in records if "cpu_s" in r])) if records else float("nan"),
    }
    per_species = {}
    inside_all, all_rows = [], []
    for species, rows in nist.items():
        inside = [r[0] for r in rows if r[1]]
        every = [r[0] for r in rows]
        inside_all += inside
        all_rows += every
        per_species[species] = {
            "n_inside": len(inside),
            "rms_px_inside": float(np.sqrt(np.mean(np.square(inside)))) if inside else float("nan"),
            "n_all": len(every),
            "rms_px_all": float(np.sqrt(np.mean(np.square(every)))) if every else float("nan"),
        }
    def pulls_of(keep):
        values = np.array([r[4] for rows in nist.values() for r in rows if r[1] and keep(r) and np.isfinite(r[4])])
        if values.size < 2:
            return {"n": int(values.size)}
        return {"n": int(values.size), "pull_rms": float(np.sqrt(np.mean(values**2))),
                "pull_width_mad": float(1.4826 * np.median(np.abs(values - np.median(values)))),
                "fraction_beyond_3_sigma": float(np.mean(np.abs(values) > 3))}

    lines_summary = {
        "per_species": per_species,
        # (measured - NIST) / the line's stated 1-sigma (fit and calibration), inside the calibrated span:
        # how honest the uncertainty a user is given for a measured wavelength is
        "stated_sigma_pulls": {"all": pulls_of(lambda r: True), "png": pulls_of(lambda r: not r[5]),
                               "jpeg": pulls_of(lambda r: r[5])},
        "rms_px_inside": float(np.sqrt(np.mean(np.square(inside_all)))) if inside_all else float("nan"),
        "rms_px_all": float(np.sqrt(np.mean(np.square(all_rows)))) if all_rows else float("nan"),
        "n_inside": len(inside_all),
        "n_all": len(all_rows),
    }
    def stat(k, f):
        return float(f([c[k] for c in curvature])) if curvature else float("nan")

    curvature_summary = {
        "benches": len(curvature),
        "fwhm_over_slit_rectified_median": stat(0, np.nanmedian),
        "fwhm_over_slit_uncorrected_median": stat(1, np.nanmedian),
        "fwhm_over_slit_rectified_max": stat(0, np.nanmax),
        "fwhm_over_optical_slit_rectified_median": stat(2, np.nanmedian),
        "fwhm_over_straight_rectified_median": stat(3, np.nanmedian),
        "fwhm_over_straight_rectified_max": stat(3, np.nanmax),
    }
    sags = np.array([r["residual_sag_px"] for r in records if np.isfinite(r.get("residual_sag_px", np.nan))])
    curvature_summary.update({
        "residual_sag_benches": int(sags.size),
        "residual_sag_px_median": float(np.median(sags)) if sags.size else float("nan"),
        "residual_sag_px_max": float(np.max(sags)) if sags.size else float("nan"),
        "grating_shaped_benches": sum(r.get("curvature_model") == "grating" for r in records),
    })
    truth_rows = [r[3] for rows in nist.values() for r in rows if r[3] is not None]

    def centre_stats(selected):
        if not selected:
            return {"n": 0}
        e = np.array([t["error_px"] for t in selected])
        e_row = np.array([t["error_centre_row_px"] for t in selected])
        sig = np.array([t["sigma_px"] for t in selected])
        total = np.array([t["sigma_total_px"] for t in selected])
        pull, pull_total = e / sig, e / total
        return {"n": int(e.size), "rms_error_px": float(np.sqrt(np.mean(e**2))),
                "rms_error_centre_row_px": float(np.sqrt(np.nanmean(e_row**2))),
                "median_sigma_px": float(np.median(sig)), "pull_rms": float(np.sqrt(np.mean(pull**2))),
                "pull_width_mad": float(1.4826 * np.median(np.abs(pull))),
                "fraction_beyond_3_sigma": float(np.mean(np.abs(pull) > 3)),
                "median_sigma_total_px": float(np.median(total)),
                "pull_rms_total": float(np.sqrt(np.mean(pull_total**2))),
                "pull_width_mad_total": float(1.4826 * np.median(np.abs(pull_total))),
                "fraction_beyond_3_sigma_total": float(np.mean(np.abs(pull_total) > 3))}

    centres_summary = {
        "all": centre_stats(truth_rows),
        "png": centre_stats([t for t in truth_rows if not t["jpeg"]]),
        "jpeg": centre_stats([t for t in truth_rows if t["jpeg"]]),
        "gamma_1": centre_stats([t for t in truth_rows if t["gamma"] == "1"]),
        "snr_below_100": centre_stats([t for t in truth_rows if t["snr"] < 100]),
    }
    targets = {
        "calibration succeeds on 100% (RMS < 0.5 px, every line correctly assigned)": summary["success_rate"] == 1.0,
        "never a wrong answer (refusals allowed, no wrong assignment)": summary["wrong"] == 0,
        "isolated He/Ne/H/Hg/Na lines within 0.2 px RMS of NIST (inside the calibrated span)": bool(
            lines_summary["rms_px_inside"] <= 0.2),
        "isolated He/Ne/H/Hg/Na lines within 0.2 px RMS of NIST (all, incl. extrapolated)": bool(
            lines_summary["rms_px_all"] <= 0.2),
        "rectified FWHM within 10% of the slit image (smile >= 10 px)": bool(
            curvature_summary["fwhm_over_slit_rectified_median"] <= 1.10),
    }
    return {
        "calibration": summary,
        "lines_vs_nist": lines_summary,
        "line_centres_vs_truth": centres_summary,
        "curvature": curvature_summary,
        "lamp_units": _lamp_units(4 if quick else 24),
        "targets": dict(targets),
        "passed": {name: bool(v) for name, v in targets.items()},
        "cpu_s_total": time.process_time() - started,
        "benches": records,
        "seed": seed,
        "quick": quick,
        "mosaic": mosaic,
    }


def _lamp_units(n_units: int) -> dict:
    """Real lamps: CFL units 1..n (the virtual bench's ``source.lamp_unit``: each line drawn within its
    listed tolerance, fixed for that lamp) on the default bench, two PNG frames each, no first guess."""
    from ..pipeline import calibrate_frames
    from ..simulate import Bench, render

    ok, refused, wrong = [], [], []
    for unit in range(1, n_units + 1):
        source = {"kind": "lamp", "name": "cfl", "lamp_unit": unit}
        rendered = [render(Bench(), seed=s, source=source) for s in (2000 + 2 * unit, 2001 + 2 * unit)]
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", DegradedResultWarning)
                calibration = calibrate_frames([r.image for r in rendered], lamp="cfl")
        except CalibrationError as exc:
            refused.append({"unit": unit, "reason": str(exc)})
            continue
        correct, _, problems = _check_assignments(calibration, rendered[0].truth)
        (ok if correct else wrong).append({"unit": unit, "evidence_nats": calibration.wavelength.evidence_nats,
                                           **({} if correct else {"problems": problems})})
    return {"units": n_units, "ok": len(ok), "refused": len(refused), "wrong": len(wrong),
            "refusals": refused, "wrong_answers": wrong,
            "evidence_nats_median": float(np.median([r["evidence_nats"] for r in ok])) if ok else float("nan")}


def _missing_as_nan(value):
    """A copy with every None figure (nothing measured) as NaN, which formats as 'nan'."""
    if isinstance(value, dict):
        return {k: _missing_as_nan(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_missing_as_nan(v) for v in value]
    return float("nan") if value is None else value


def format_report(figures: dict) -> str:
    figures = _missing_as_nan(figures)
    c = figures["calibration"]
    lines = figures["lines_vs_nist"]
    curv = figures["curvature"]
    out = [
        f"automatic calibration on {c['benches']} virtual benches (CFL, no first guess"
        + ("" if figures.get("mosaic", "none") == "none" else
           f"; {figures['mosaic'].upper()} colour-filter mosaic, bilinear demosaicing") + ")",
        f"  ok {c['ok']}  refused {c['refused']}  wrong {c['wrong']}  rms>=0.5px {c['rms_too_large']}  "
        f"crashed {c.get('crashed', 0)}  "
        f"other {c['other_failures']}  -> success {c['success_rate']:.0%}",
        f"  weighted RMS: median {c['rms_px_median']:.3f} px, max {c['rms_px_max']:.3f} px; true error within the "
        f"anchored span: median {c['true_error_px_median']:.3f} px, max {c['true_error_px_max']:.3f} px",
        f"  rotation error max {c['rotation_error_deg_max']:.3f} deg; CPU per calibration (median) {c['cpu_s_median']:.2f} s",
        "isolated NIST lines measured with the CFL calibration (px RMS; n)",
    ]
    for species, s in lines["per_species"].items():
        out.append(f"  {species:<3s} inside span {s['rms_px_inside']:.3f} ({s['n_inside']})   all {s['rms_px_all']:.3f} ({s['n_all']})")
    out.append(f"  all species: inside span {lines['rms_px_inside']:.3f} px ({lines['n_inside']}), all {lines['rms_px_all']:.3f} px ({lines['n_all']})")
    for label, p in lines.get("stated_sigma_pulls", {}).items():
        if "pull_rms" in p:
            out.append(f"  against the stated 1-sigma ({label}, {p['n']} lines inside span): pull RMS {p['pull_rms']:.2f}, "
                       f"width (MAD) {p['pull_width_mad']:.2f}, beyond 3 sigma {100 * p['fraction_beyond_3_sigma']:.1f}%")
    nan = float("nan")
    centres = figures.get("line_centres_vs_truth", {})
    for name, c in centres.items():
        if c.get("n"):
            out.append(f"  centres vs truth ({name}, {c['n']}): RMS {c['rms_error_px']:.3f} px (centre row only "
                       f"{c['rms_error_centre_row_px']:.3f}), stated sigma median {c['median_sigma_px']:.3f} px, pull RMS "
                       f"{c['pull_rms']:.2f}, MAD width {c['pull_width_mad']:.2f}, beyond 3 sigma {c['fraction_beyond_3_sigma']:.0%}; "
                       f"with the systematic term: sigma {c.get('median_sigma_total_px', nan):.3f} px, pull RMS "
                       f"{c.get('pull_rms_total', nan):.2f}, MAD width {c.get('pull_width_mad_total', nan):.2f}, "
                       f"beyond 3 sigma {c.get('fraction_beyond_3_sigma_total', nan):.0%}")
    out.append(f"curvature (benches with smile >= 10 px: {curv['benches']}): FWHM / slit image FWHM "
               f"rectified {curv['fwhm_over_slit_rectified_median']:.3f} (max {curv['fwhm_over_slit_rectified_max']:.3f}), "
               f"rows summed uncorrected {curv['fwhm_over_slit_uncorrected_median']:.3f}; over the optical FWHM "
               f"(no pixel) {curv.get('fwhm_over_optical_slit_rectified_median', float('nan')):.3f}; over the same bench "
               f"with no smile {curv.get('fwhm_over_straight_rectified_median', float('nan')):.3f} "
               f"(max {curv.get('fwhm_over_straight_rectified_max', float('nan')):.3f})")
    out.append(f"curvature left at the aperture's edge (largest sag along the band, 380-720 nm, "
               f"{curv.get('residual_sag_benches', 0)} calibrated benches): median "
               f"{curv.get('residual_sag_px_median', float('nan')):.2f} px, max {curv.get('residual_sag_px_max', float('nan')):.2f} px; "
               f"grating-shaped curvature on {curv.get('grating_shaped_benches', 0)}")
    units = figures.get("lamp_units")
    if units:
        out.append(f"real lamps (CFL units 1-{units['units']}, default bench): ok {units['ok']}  refused {units['refused']}  "
                   f"wrong {units['wrong']}; evidence median {units['evidence_nats_median']:.1f} nats")
        for r in units["refusals"]:
            out.append(f"  unit {r['unit']}: refused: {r['reason']}")
    for r in figures["benches"]:
        if r["status"] != "ok":
            out.append(f"  bench {r['index']} ({r['nm_per_px']:.2f} nm/px, order {r['order']}): {r['status']}: {r.get('reason', '')}")
    out.append("targets:")
    for name, passed in figures["passed"].items():
        out.append(f"  [{'pass' if passed else 'FAIL'}] {name}")
    return "\n".join(out)
