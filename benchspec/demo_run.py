"""``benchspec demo``: the whole pipeline on the bundled demo frames, as a user would run it.

Calibrates on the desk lamp's frames (automatic, no clicks), extracts every
demo frame, identifies the three mystery tubes, and runs the practicals
(response, absorbance, Rydberg, LED and laser figures, daylight lines).
Writes CSV spectra, PNG plots, the calibration file and a PDF report into
one folder and prints a summary. This is a shell over the same public calls
a user makes in Python; it holds no analysis of its own.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from . import demo
from .errors import BenchspecError, DegradedResultWarning, ExportError
from .refdata import load_line_list

__all__ = ["run_demo"]

_TUBES = ("tube_A.jpg", "tube_B.jpg", "tube_C.jpg")
# Their plots are drawn once their lines are known: the tubes' identified lines, daylight's dark lines.
_LABELLED_PLOTS = frozenset(_TUBES + ("daylight.jpg",))


def _frame(name: str) -> Path:
    return demo.demo_folder() / name


def _say(text: str = "") -> None:
    print(text, flush=True)


def _prepare_folder(out: Path, *, force: bool) -> None:
    if out.exists() and not out.is_dir():
        raise ExportError(f"{out} exists and is not a folder; choose another --out")
    if out.is_dir() and any(out.iterdir()) and not force:
        raise ExportError(f"{out} already holds files; choose an empty or new --out folder, or pass --force to overwrite")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ExportError(f"cannot create {out} ({exc.strerror or exc}); choose a writable --out folder") from None


def _nist_residuals(result) -> tuple[float, int]:
    """RMS of (observed - NIST) over the lines the top species explains."""
    residuals = [line.residual_nm for line in result.matches[0].lines if line.residual_nm is not None]
    residuals = np.asarray(residuals, dtype=float)
    return (float(np.sqrt(np.mean(residuals**2))) if residuals.size else float("nan")), int(residuals.size)


def run_demo(out: Path, *, force: bool = False) -> int:
    """Run the demo into ``out``; returns the exit code."""
    from .analysis.absorbance import absorbance_spectrum
    from .analysis.daylight import identify_daylight_lines
    from .analysis.metrics import source_metrics
    from .analysis.response import compute_response, apply_response
    from .analysis.rydberg import rydberg_from_spectrum
    from .identify import identify
    from .io import write_spectrum, write_table
    from .pipeline import calibrate_frames, extract_frames, write_calibration
    from .plots import save_spectrum_plot
    from .report import lines_from_results, write_report

    out = Path(out)
    _prepare_folder(out, force=force)
    bench = demo.demo_bench()
    _say(f"benchspec demo: {bench.name}")
    _say(f"frames from {demo.demo_folder()} (rendered by the virtual bench; see its README.md)")
    _say()

    dark = [_frame("dark.png")]
    lamp_frames = [_frame(f"cfl_{i}.png") for i in (1, 2, 3)]
    calibration = calibrate_frames(lamp_frames, lamp="cfl", dark=dark)
    cal_path = out / "calibration.json"
    write_calibration(calibration, cal_path, force=force)
    solution = calibration.wavelength
    _say("1. Wavelength calibration on the desk lamp (3 frames stacked, dark subtracted, no clicks)")
    _say(
        f"   {solution.n_used} lines used, weighted RMS {solution.rms_px:.3f} px = {solution.rms_nm:.4f} nm, "
        f"verdict: {solution.verdict}; wrote calibration.json"
    )

    spectra, titles = {}, {}
    notes = []
    for frame in demo.demo_frames():
        if frame.file == "dark.png":
            continue
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", DegradedResultWarning)
            # the written file, not the object in memory: the spectra's provenance names it and its hash
            spectrum = extract_frames([frame.path], cal_path, dark=dark)
        notes.extend(f"{frame.file}: {w.message}" for w in caught)
        stem = Path(frame.file).stem
        write_spectrum(spectrum, out / f"{stem}.csv", force=force)
        if frame.file not in _LABELLED_PLOTS:
            save_spectrum_plot(spectrum, out / f"{stem}.png", force=force, title=frame.label, dpi=110)
        spectra[frame.file], titles[frame.file] = spectrum, frame.label
    _say(f"2. Extracted {len(spectra)} demo frames: a CSV spectrum and a PNG plot each "
         "(the tubes' and daylight's plots with their lines labelled, once these are found below)")

    def plot_with_lines(name: str, lines) -> None:
        save_spectrum_plot(spectra[name], out / f"{Path(name).stem}.png", force=force, title=titles[name],
                           lines=lines or None, dpi=110)
    for note in notes:
        _say(f"   warning: {note}")

    _say("3. The mystery tubes")
    results = {}
    for name in _TUBES:
        result = identify(spectra[name])
        results[name] = result
        plot_with_lines(name, lines_from_results(result.to_dict()))  # each identified line: species and nm
        if result.matches:
            top = result.matches[0]
            rms, count = _nist_residuals(result)
            _say(
                f"   {name}: {result.verdict}: {top.symbol} (score {top.score:.2f}, {top.fraction:.0%} of the line flux); "
                f"{count} lines, RMS {rms:.3f} nm from NIST ASD"
            )
        else:
            _say(f"   {name}: {result.verdict}")

    _say("4. Practicals")
    _run_step("response from the halogen lamp (Planck, 2900 K)", lambda: _response(spectra, compute_response, apply_response, write_table, out, force))
    _run_step("absorbance of the dye against its blank", lambda: _absorbance(spectra, absorbance_spectrum, write_spectrum, out, force))
    _run_step("Rydberg constant from tube C", lambda: _rydberg(spectra["tube_C.jpg"], rydberg_from_spectrum))
    _run_step("LED", lambda: _led(spectra["led.jpg"], source_metrics))
    _run_step("laser", lambda: _laser(spectra["laser.jpg"], source_metrics))
    _run_step("daylight lines", lambda: _daylight(spectra["daylight.jpg"], identify_daylight_lines,
                                                  plot=lambda lines: plot_with_lines("daylight.jpg", lines)))

    top = results["tube_A.jpg"]
    write_report(
        out / "report_tube_A.pdf",
        spectra["tube_A.jpg"],
        force=force,
        calibration=calibration.wavelength,
        results=top,
        source_type="discharge",
        title="Mystery tube A",
    )
    _say("5. Wrote report_tube_A.pdf (one page: spectrum, calibration residuals, identification, cautions, provenance)")
    _say()
    _say(f"All outputs are in {out}. Cautions for the real sources: `benchspec cautions`.")
    return 0


def _run_step(title: str, step) -> None:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", DegradedResultWarning)
        try:
            text = step()
        except BenchspecError as exc:
            _say(f"   {title}: not possible: {exc}")
            return
    _say(f"   {title}: {text}")
    for warning in caught:  # said under the step it belongs to, not as an anonymous warning at the end
        _say(f"      warning: {warning.message}")


def _response(spectra, compute_response, apply_response, write_table, out, force) -> str:
    halogen = spectra["halogen.jpg"]
    response = compute_response(halogen, temperature_k=2900.0)
    corrected = apply_response(halogen, response)
    from .physics import planck_spectral_radiance

    planck = planck_spectral_radiance(corrected.wavelength_nm, 2900.0)
    ratio = corrected.intensity / planck
    ratio = ratio / np.median(ratio)
    from .analysis.response import save_response

    save_response(response, out / "response.json", force=force)
    low, high = corrected.wavelength_nm[0], corrected.wavelength_nm[-1]
    return (
        f"valid {low:.0f}-{high:.0f} nm; the lamp corrected by it matches Planck within "
        f"{np.max(np.abs(ratio - 1)):.1%}; wrote response.json"
    )


def _absorbance(spectra, absorbance_spectrum, write_spectrum, out, force) -> str:
    result = absorbance_spectrum(spectra["dye.jpg"], blank=spectra["blank.jpg"])
    valid = np.asarray(result.valid, dtype=bool)
    wl, a, da = result.wavelength_nm[valid], result.absorbance[valid], result.absorbance_uncertainty[valid]
    from .io import write_table as table

    table(
        out / "dye_absorbance.csv",
        {"wavelength_nm": wl, "absorbance": a, "uncertainty": da},
        provenance=spectra["dye.jpg"].provenance,
        force=force,
    )
    peak = int(np.argmax(a))
    return f"peak A = {a[peak]:.3f} +- {da[peak]:.3f} at {wl[peak]:.1f} nm; wrote dye_absorbance.csv"


def _rydberg(spectrum, rydberg_from_spectrum) -> str:
    result = rydberg_from_spectrum(spectrum)
    return (
        f"R_H = {result.rydberg_per_m:.6e} +- {result.uncertainty_per_m:.1e} /m from {len(result.lines)} Balmer lines; "
        f"CODATA R_inf/(1+m_e/m_p) = {result.codata_rydberg_per_m:.6e} /m ({result.difference_sigma:+.1f} sigma)"
    )


def _led(spectrum, source_metrics) -> str:
    m = source_metrics(spectrum)
    dominant = f"{m.dominant_wavelength_nm:.1f} nm" if m.dominant_wavelength_nm is not None else "n/a"
    fwhm = f"{m.fwhm_nm:.1f} nm" if m.fwhm_nm is not None else "n/a"
    return f"peak {m.peak_nm:.1f} nm, centroid {m.centroid_nm:.1f} nm, FWHM {fwhm}, dominant {dominant}, CIE x,y = {m.cie_x:.3f}, {m.cie_y:.3f}"


def _laser(spectrum, source_metrics) -> str:
    m = source_metrics(spectrum, laser_nominal_nm=532.0, laser_tolerance_nm=1.0, laser_label="DPSS green")
    check = m.laser
    verdict = "within" if check.within_tolerance else "OUTSIDE"
    return (
        f"{check.measured_nm:.2f} +- {check.measured_uncertainty_nm:.2f} nm, {check.offset_nm:+.2f} nm from the nominal "
        f"{check.nominal_nm:.1f} nm ({verdict} its +-{check.tolerance_nm:g} nm tolerance)"
    )


def _daylight(spectrum, identify_daylight_lines, *, plot) -> str:
    try:
        result = identify_daylight_lines(spectrum)
    except BenchspecError:
        plot(None)  # the plot is written all the same, without labels
        raise
    labelled = [line for line in result.lines if getattr(line, "label", None)]
    plot([(l.wavelength_nm, f"{l.label} {l.wavelength_nm:.1f}") for l in labelled])  # letters, as printed
    names = ", ".join(f"{l.label} {l.wavelength_nm:.1f}" for l in labelled[:10])
    return f"{len(labelled)} dark lines labelled: {names}"
