"""The viewer's Practicals page, driven through its real widgets under Xvfb (``xdisplay`` fixture).

Spectra come from the demo frames (the virtual bench's invented school bench),
calibrated once on the desk CFL with the core pipeline. Every number the page
shows is compared with the core call on the same spectrum; the core calls are
themselves checked against outside references in tests/test_analysis_*.py.
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import numpy as np
import pytest

from benchspec.safety import GENERAL_CAUTION, cautions_for
from benchspec.sources import demo_folder

pytestmark = pytest.mark.gui

tk = pytest.importorskip("tkinter")

DEMO = demo_folder()
SCREENSHOT = Path("/tmp/benchspec-practicals.png")


def _wait(root, condition, *, timeout: float = 20.0, what: str = "condition") -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        root.update()
        if condition():
            return
        time.sleep(0.005)
    raise AssertionError(f"timed out waiting for {what}")


@pytest.fixture(scope="module")
def demo_spectra():
    """The calibration of the demo CFL (dark subtracted) and the demo frames' spectra through it."""
    from benchspec.pipeline import calibrate_frames, extract_frames

    dark = [DEMO / "dark.png"]
    calibration = calibrate_frames([DEMO / f"cfl_{i}.png" for i in (1, 2, 3)], lamp="cfl", dark=dark)
    names = ["halogen", "blank", "dye", "tube_C", "led", "laser", "daylight"]
    spectra = {}
    for name in names:
        suffix = ".jpg"
        spectra[name] = extract_frames([DEMO / f"{name}{suffix}"], calibration, dark=dark)
    return calibration, spectra


@pytest.fixture
def panel_on(xdisplay):
    """A PracticalsPanel alone in a 1024x768 window; ``panel.spectrum_now`` is what its callable returns."""
    from benchspec.gui.practicals import PracticalsPanel

    roots = []

    def make():
        root = tk.Tk()
        root.geometry("1024x768+0+0")
        reports = []
        holder = {"spectrum": None}
        panel = PracticalsPanel(root, current_spectrum=lambda: holder["spectrum"],
                                report=lambda text, level="info": reports.append((level, text)))
        panel.pack(fill="both", expand=True)
        panel.holder, panel.reports = holder, reports
        roots.append(root)
        root.update()
        return panel

    yield make
    import gc

    for root in roots:
        root.destroy()
    # Collect the page's Tk objects now, on the Tk thread (as the viewer does when it closes): left to
    # chance, a later test's worker thread would run their clean-up, and Tk cannot answer there.
    gc.collect()


def _press(panel, button: str, spectrum=None, *, ok: bool = True):
    """Put ``spectrum`` on 'screen', press ``button`` and wait for the job and the figure."""
    if spectrum is not None:
        panel.holder["spectrum"] = spectrum
    before = len(panel.messages)
    panel.buttons[button].invoke()
    _wait(panel, lambda: not panel.busy, what=f"{button} to finish")
    new = panel.messages[before:]
    errors = [m for m in new if m.startswith("error:")]
    if ok:
        assert not errors, errors
    return new


def test_each_practical_matches_the_core(panel_on, demo_spectra):
    from benchspec.analysis.absorbance import absorbance_spectrum
    from benchspec.analysis.daylight import identify_daylight_lines
    from benchspec.analysis.metrics import source_metrics
    from benchspec.analysis.response import apply_response, compute_response
    from benchspec.analysis.rydberg import rydberg_from_spectrum
    from benchspec.gui.practicals import absorbance_peak
    from benchspec.refdata import load_lasers

    _, spectra = demo_spectra
    panel = panel_on()

    # -- response from the halogen lamp (Planck at 2900 K, the demo lamp's rating)
    panel.radios["response"].invoke()
    assert cautions_for("halogen")[0] in panel.cautions_shown() and GENERAL_CAUTION in panel.cautions_shown()
    assert panel.temperature_entry.get() == "2900"
    _press(panel, "response", spectra["halogen"])
    core = compute_response(spectra["halogen"], temperature_k=2900.0)
    shown = panel.results["response"]
    assert shown.valid_range_nm == core.valid_range_nm
    np.testing.assert_array_equal(shown.relative_response, core.relative_response)
    low, high = core.valid_range_nm
    assert f"valid {low:.0f}-{high:.0f} nm" in panel.shown_text()
    assert panel.canvas is not None and panel.canvas.render_count >= 1  # the response figure is on screen
    # applied to the same lamp: equal to the core's correction
    _press(panel, "apply_response")
    corrected = apply_response(spectra["halogen"], core)
    np.testing.assert_array_equal(panel.results["apply"].intensity, corrected.intensity)
    assert f"{corrected.size} samples" in panel.shown_text()

    # -- absorbance of the dye against the water blank
    panel.radios["absorbance"].invoke()
    assert cautions_for("halogen")[0] in panel.cautions_shown()
    _press(panel, "blank", spectra["blank"])
    assert panel.blank is spectra["blank"]
    _press(panel, "sample", spectra["dye"])
    core = absorbance_spectrum(spectra["dye"], blank=spectra["blank"])
    wl, a, da, _limit = absorbance_peak(core)
    # the peak read independently from the core's arrays: the largest measurable absorbance
    usable = core.valid & np.isfinite(core.absorbance) & ~core.beyond_measurable
    k = np.flatnonzero(usable)[np.argmax(core.absorbance[usable])]
    assert (wl, a, da) == (core.wavelength_nm[k], core.absorbance[k], core.absorbance_uncertainty[k])
    assert f"A = {a:.3f} ± {da:.3f} at {wl:.1f} nm" in panel.shown_text()
    assert ("STRAY-LIGHT WARNING" in panel.shown_text()) == bool(np.any(core.beyond_measurable))
    np.testing.assert_array_equal(panel.results["absorbance"].absorbance, core.absorbance)

    # -- Rydberg constant from tube C (hydrogen)
    panel.radios["rydberg"].invoke()
    assert cautions_for("discharge")[0] in panel.cautions_shown()
    _press(panel, "rydberg", spectra["tube_C"])
    core = rydberg_from_spectrum(spectra["tube_C"])
    assert panel.results["rydberg"].rydberg_per_m == core.rydberg_per_m
    assert f"R_H = {core.rydberg_per_m:.6e} ± {core.uncertainty_per_m:.1e} /m" in panel.shown_text()
    assert len(panel.results["rydberg"].lines) == len(core.lines) >= 2
    # and the value itself: within 3 sigma of CODATA R_inf/(1+m_e/m_p) (scipy.constants, CODATA 2018)
    from scipy import constants

    codata = constants.Rydberg / (1 + constants.m_e / constants.m_p)
    assert abs(panel.results["rydberg"].rydberg_per_m - codata) < 3 * core.uncertainty_per_m

    # -- the red LED (no response correction: untick it, so the core call is the plain one)
    panel.radios["source"].invoke()
    assert cautions_for("led")[0] in panel.cautions_shown()
    panel.correct_sources.set(False)
    _press(panel, "source", spectra["led"])
    core = source_metrics(spectra["led"])
    shown = panel.results["source"]
    for name in ("peak_nm", "centroid_nm", "fwhm_nm", "dominant_wavelength_nm", "cie_x", "cie_y", "cct_k", "duv"):
        assert getattr(shown, name) == getattr(core, name), name
    text = panel.shown_text()
    assert f"Peak {core.peak_nm:.2f} ± {core.peak_uncertainty_nm:.2f} nm" in text
    assert f"dominant wavelength {core.dominant_wavelength_nm:.1f} nm" in text
    assert f"x = {core.cie_x:.4f}" in text and f"y = {core.cie_y:.4f}" in text
    assert "CCT, Duv: n/a" in text  # a red LED is not white
    # No colour fill under the curve: the only image is the thin wavelength strip below zero.
    for image in panel.canvas.figure.axes[0].images:
        assert image.get_extent()[3] <= 0

    # -- the green laser pointer, checked against the DPSS green entry of the laser list
    dpss = next(l for l in load_lasers() if l.key == "dpss-green")
    choice = next(name for name, laser in panel.lasers.items() if laser is dpss)
    panel.laser_box.set(choice)
    panel.laser_box.event_generate("<<ComboboxSelected>>")
    panel.update()
    assert cautions_for("laser")[0] in panel.cautions_shown()
    messages = _press(panel, "source", spectra["laser"])
    assert any(m.startswith("warning:") and "saturated" in m for m in messages)  # the demo spot clips
    core = source_metrics(spectra["laser"], laser_nominal_nm=dpss.nominal_nm, laser_tolerance_nm=dpss.tolerance_nm,
                          laser_label=dpss.name)
    assert panel.results["source"].laser == core.laser
    assert f"{core.laser.offset_nm:+.2f} nm from nominal {dpss.nominal_nm:g} nm" in panel.shown_text()

    # -- daylight lines, labelled
    panel.radios["daylight"].invoke()
    assert "Never look at the Sun" in panel.cautions_shown()
    _press(panel, "daylight", spectra["daylight"])
    core = identify_daylight_lines(spectra["daylight"])
    assert [(l.label, l.wavelength_nm) for l in panel.results["daylight"].identified] == \
        [(l.label, l.wavelength_nm) for l in core.identified]
    for line in core.identified:
        assert f"{line.label:6s} {line.wavelength_nm:7.2f}" in panel.shown_text()
    assert any(l.label.startswith("D") for l in core.identified)  # Na D, a line every daylight spectrum shows
    # -- the setup planner: the demo bench's 1000 lines/mm grating and 1280 px webcam
    from benchspec.analysis.planner import plan_setup

    panel.radios["planner"].invoke()
    assert "No light source" in panel.cautions_shown()
    panel.plan_entries["horizontal_fov_deg"].set("55")
    _press(panel, "planner")
    core = plan_setup(lines_per_mm=1000.0, image_width_px=1280, horizontal_fov_deg=55.0, slit_width_mm=0.1,
                      slit_distance_mm=100.0)
    shown = panel.results["planner"]
    assert (shown.tilt_deg, shown.range_columns_px, shown.resolution_nm) == \
        (core.tilt_deg, core.range_columns_px, core.resolution_nm)
    assert f"resolution at 550 nm: {core.resolution_nm:.2f} nm".lower() in panel.shown_text().lower()
    # the second order of 380 nm falls at 760 nm: the grating equation holds m*lambda, so 2 x 380 = 1 x 760 (issue 6's check)
    assert "overlaps first from 760 nm" in panel.shown_text()
    # the same figure, larger, in a window of its own (for a projector)
    panel.buttons["larger"].invoke()
    _wait(panel, lambda: panel.large_canvas is not None and panel.large_canvas.render_count >= 1, what="larger figure")
    assert panel.large_window.winfo_viewable()
    # every result and warning also went to the window's log
    assert any("R_H =" in text for _, text in panel.reports)


def test_beer_lambert_standards_and_an_unknown(panel_on, demo_spectra):
    """A simulated dilution series of the demo dye recovers the dye's concentration (issue 6's check)."""
    from benchspec.analysis.absorbance import (absorbance_spectrum, band_absorbance, fit_beer_lambert,
                                               predict_concentration)

    _, spectra = demo_spectra
    blank, dye = spectra["blank"], spectra["dye"]
    panel = panel_on()
    panel.radios["absorbance"].invoke()
    _press(panel, "blank", blank)
    # fewer than 2 standards: a clear refusal, no invented line
    messages = _press(panel, "fit_standards", ok=False)
    assert any(m.startswith("error:") and "standard" in m for m in messages)
    # standards: the blank dimmed by the dye's own absorbance shape, scaled to c / 2 (invented units: c = 2 is the dye)
    shape = np.nan_to_num(absorbance_spectrum(dye, blank=blank).absorbance, nan=0.0)
    panel.concentration_unit.set("units")
    for c in (0.5, 1.0, 2.0, 3.0):
        _press(panel, "sample", blank.with_(intensity=blank.intensity * 10 ** (-shape * c / 2)))
        panel.standard_concentration.set(f"{c:g}")
        panel.buttons["add_standard"].invoke()
        assert panel.messages[-1].startswith("info: standard")
    wavelength = float(panel.standard_wavelength.get())  # the first standard's peak, kept for the rest
    _press(panel, "fit_standards")
    readings = [band_absorbance(absorbance_spectrum(blank.with_(intensity=blank.intensity * 10 ** (-shape * c / 2)),
                                                    blank=blank), wavelength_nm=wavelength) for c in (0.5, 1.0, 2.0, 3.0)]
    core = fit_beer_lambert([0.5, 1.0, 2.0, 3.0], [r.absorbance for r in readings],
                            absorbance_uncertainties=[r.absorbance_uncertainty for r in readings], concentration_unit="units")
    assert panel.fit.slope_per_concentration == core.slope_per_concentration
    assert f"R^2 = {core.r_squared:.4f}" in panel.shown_text()
    # the real dye frame as the unknown
    _press(panel, "sample", dye)
    _press(panel, "unknown")
    reading = band_absorbance(absorbance_spectrum(dye, blank=blank), wavelength_nm=wavelength)
    expected = predict_concentration(core, reading.absorbance, absorbance_uncertainty=reading.absorbance_uncertainty,
                                     label="unknown")
    shown = panel.results["unknown"]
    assert shown.concentration == expected.concentration
    assert f"c = {expected.concentration:.4g} ± {expected.concentration_uncertainty:.2g} units" in panel.shown_text()
    assert abs(shown.concentration - 2.0) <= 3 * shown.concentration_uncertainty  # recovered within its uncertainty


def test_bad_input_gets_one_line_and_the_page_stays_usable(panel_on, demo_spectra):
    from benchspec.gui.practicals import absorbance_peak

    _, spectra = demo_spectra
    panel = panel_on()
    # nothing calibrated on screen yet
    messages = _press(panel, "response", None, ok=False)
    assert any(m.startswith("error:") and "no calibrated spectrum" in m for m in messages)
    # a temperature that is not a number: refused before any job
    panel.temperature.set("warm")
    panel.buttons["response"].invoke()
    assert panel.messages[-1].startswith("error:") and "'warm'" in panel.messages[-1]
    panel.temperature.set("2900")
    # the blank and the sample swapped: the sample is brighter than its blank
    panel.radios["absorbance"].invoke()
    panel.buttons["sample"].invoke()
    assert "take a blank first" in panel.messages[-1]
    _press(panel, "blank", spectra["dye"])
    messages = _press(panel, "sample", spectra["blank"], ok=False)
    (error,) = [m for m in messages if m.startswith("error:")]
    assert "brighter than the blank" in error and "\n" not in error
    assert ("error", error[len("error: "):]) in panel.reports  # the window's log hears it too
    # a sample too dark for this setup in 540-600 nm (an invented transmittance of 0.2%): the stray-light warning
    _press(panel, "blank", spectra["blank"])
    wl = spectra["blank"].wavelength_nm
    dense = spectra["blank"].with_(intensity=spectra["blank"].intensity * np.where((wl > 540) & (wl < 600), 0.002, 0.6))
    messages = _press(panel, "sample", dense)
    assert "STRAY-LIGHT WARNING" in panel.shown_text()
    assert any(m.startswith("warning:") and "exceeds what this setup can measure" in m for m in messages)
    _, peak, _, limit = absorbance_peak(panel.results["absorbance"])
    assert peak <= limit  # the reported peak is one the setup can measure
    # a planner entry that is not a number
    panel.radios["planner"].invoke()
    panel.plan_entries["lines_per_mm"].set("many")
    panel.buttons["planner"].invoke()
    assert panel.messages[-1].startswith("error:") and "lines/mm must be a number, got 'many'" in panel.messages[-1]
    # no Balmer lines in an LED
    panel.radios["rydberg"].invoke()
    messages = _press(panel, "rydberg", spectra["led"], ok=False)
    assert any(m.startswith("error:") and "no usable Balmer series" in m for m in messages)
    # and the page still works
    _press(panel, "rydberg", spectra["tube_C"])
    assert "R_H =" in panel.shown_text()


def test_viewer_page_uses_the_viewers_calibration_and_thread(xdisplay, tmp_path, demo_spectra):
    """The page inside the bench viewer: demo tube C, the viewer's calibration, a screenshot at 1024x768."""
    from PIL import ImageGrab

    from benchspec.analysis.rydberg import rydberg_from_spectrum
    from benchspec.gui.app import Viewer
    from benchspec.gui.processing import _within
    from benchspec.pipeline import extract_frames, write_calibration
    from benchspec.sources import DemoSource

    calibration, _ = demo_spectra
    path = write_calibration(calibration, tmp_path / "calibration.json")
    root = tk.Tk()
    root.geometry("1024x768+0+0")
    viewer = Viewer(root, source=DemoSource("tube_C"), ask_open_path=lambda *a, **k: str(path))
    try:
        viewer.light_radios["discharge"].invoke()
        viewer.buttons["start"].invoke()
        _wait(root, lambda: viewer.stats.frames_shown >= 2, what="live frames")
        viewer.buttons["load_calibration"].invoke()
        _wait(root, lambda: viewer.calibration is not None, what="calibration loaded")
        panel = viewer.practicals
        viewer.pages.select(panel)
        panel.radios["rydberg"].invoke()
        panel.buttons["rydberg"].invoke()
        _wait(root, lambda: "rydberg" in panel.results and not panel.busy, what="Rydberg in the viewer")
        frames = viewer._frames_now()
        core = rydberg_from_spectrum(_within(extract_frames(frames, calibration), 300.0, 1100.0))
        assert panel.results["rydberg"].rydberg_per_m == pytest.approx(core.rydberg_per_m, rel=1e-12)
        assert f"R_H = {core.rydberg_per_m:.6e}" in panel.shown_text()
        assert any("R_H =" in line for line in viewer.log_lines)
        assert cautions_for("discharge")[0] in panel.cautions_shown()
        for _ in range(20):
            root.update()
            time.sleep(0.01)
        x, y, w, h = root.winfo_rootx(), root.winfo_rooty(), root.winfo_width(), root.winfo_height()
        assert (w, h) == (1024, 768)
        shot = tmp_path / "practicals.png"
        ImageGrab.grab(bbox=(x, y, x + w, y + h), xdisplay=xdisplay).save(shot)
        shutil.copy(shot, SCREENSHOT)
        assert shot.stat().st_size > 10000
    finally:
        viewer.close()
