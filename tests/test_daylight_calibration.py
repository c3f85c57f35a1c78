"""Wavelength calibration from the dark lines of daylight (``--lamp daylight``), no lamp needed.

Outside reference: the ASTM G173-03 reference solar spectrum (pvlib ``get_reference_spectra``, global tilt,
1 nm steps above 400 nm), rendered through the virtual bench as a "sample" seen against a 5778 K Planck
source, so its real Fraunhofer lines and O2 bands reach the sensor.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from benchspec import simulate
from benchspec.errors import CalibrationError
from benchspec.pipeline import calibrate_frames
from benchspec.refdata import load_lamp

DEMO = Path(__file__).resolve().parents[1] / "demo_images"


def _g173_transmittance(tmp_path) -> str:
    pvlib = pytest.importorskip("pvlib")
    from benchspec import physics

    ref = pvlib.spectrum.get_reference_spectra()  # ASTM G173-03 (pvlib)
    wl = ref.index.to_numpy(dtype=float)
    keep = (wl >= 340) & (wl <= 1050)
    wl, glob = wl[keep], ref["global"].to_numpy(dtype=float)[keep]
    ratio = glob / physics.planck_spectral_radiance(wl, 5778.0)
    path = tmp_path / "g173.csv"
    np.savetxt(path, np.c_[wl, ratio / ratio.max()], delimiter=",", header="wavelength_nm,transmittance", comments="")
    return str(path)


def _truth_wavelength(geometry, truth, pixel):
    """The bench's true wavelength at rectified spectrum pixels (frame position -> the bench's own column)."""
    u = np.asarray(pixel, dtype=float)
    x, y = geometry.frame_coordinates(u, np.full(u.shape, float(geometry.centre_row)))
    g = truth["geometry"]
    px, py = g["pivot_px"]
    best = None
    for sign in (1.0, -1.0):  # the rotation's sense: the one that puts the points on the band's centre row
        a = math.radians(sign * g["rotation_deg"])
        col = px + (x - px) * math.cos(a) + (y - py) * math.sin(a)
        row = py - (x - px) * math.sin(a) + (y - py) * math.cos(a)
        spread = float(np.ptp(row))
        if best is None or spread < best[0]:
            best = (spread, col)
    mapping = truth["mapping"]
    return np.interp(best[1], mapping["rectified_column_px"], mapping["wavelength_nm"])


BENCHES = [
    # (grating lines/mm, grating order: the sign puts blue on the other side)
    pytest.param(1000.0, 1, id="1000l/mm-blue-left"),
    pytest.param(500.0, -1, id="500l/mm-blue-right"),
]


@pytest.mark.xfail(strict=True, reason="known limitation: G173 at 1 nm steps shows many solar dips that "
                   "calibration/fraunhofer.csv does not list (Fe I near 502, 541, 549 nm...), so the matcher's test that "
                   "the deepest features are explained refuses the solution; needs a longer line list")
@pytest.mark.parametrize("lines_per_mm, order", BENCHES)
def test_g173_bench_calibrated_from_daylight_matches_the_truth(tmp_path, lines_per_mm, order):
    bench = simulate.load_bench(DEMO / "bench.toml").with_(
        grating={"lines_per_mm": lines_per_mm, "order": order},
        source={"kind": "sample", "temperature_k": 5778.0, "transmittance_file": _g173_transmittance(tmp_path)},
    )
    frames = [simulate.render(bench, seed=s) for s in range(4)]
    cal = calibrate_frames([f.image for f in frames], lamp="daylight")
    w = cal.wavelength
    used = [m.pixel for m in w.matches if m.used_in_fit]
    grid = np.linspace(min(used), max(used), 200)
    truth = _truth_wavelength(cal.geometry, frames[0].truth, grid)
    error = w.wavelength_nm(grid) - truth
    dispersion = np.abs(w.solution.dispersion_nm_per_px(grid))
    print(lines_per_mm, order, "max error nm", np.max(np.abs(error)), "px", np.max(np.abs(error) / dispersion),
          "rms px", w.rms_px, w.format_table())
    assert w.verdict in ("fair", "poor")


def _frame_x_to_pixel(geometry, frame_x):
    u = np.arange(geometry.n_columns, dtype=float)
    x, _ = geometry.frame_coordinates(u, np.full(u.shape, float(geometry.centre_row)))
    order = np.argsort(x)
    return np.interp(frame_x, x[order], u[order])


@pytest.fixture(scope="module")
def demo_calibrations():
    daylight = calibrate_frames(str(DEMO / "daylight.jpg"), lamp="daylight")
    cfl = calibrate_frames(str(DEMO / "cfl_1.png"), lamp="cfl")
    return daylight, cfl


def test_demo_daylight_agrees_with_the_cfl_calibration_of_the_same_bench(demo_calibrations):
    daylight, cfl = demo_calibrations
    w = daylight.wavelength
    assert w.verdict == "fair" and "daylight" in w.verdict_reason  # never "good": coarser than a lamp
    assert w.n_used >= 5 and w.rms_px < 0.5
    used = [m.pixel for m in w.matches if m.used_in_fit]
    u = np.linspace(min(used), max(used), 100)
    x, _ = daylight.geometry.frame_coordinates(u, np.full(u.shape, float(daylight.geometry.centre_row)))
    u_cfl = _frame_x_to_pixel(cfl.geometry, x)
    difference = w.wavelength_nm(u) - cfl.wavelength.wavelength_nm(u_cfl)
    sigma = np.hypot(w.uncertainty_nm(u), cfl.wavelength.uncertainty_nm(u_cfl))
    print("max |daylight - CFL| nm", np.max(np.abs(difference)), "max sigma", np.max(sigma))
    # Within 3 combined sigma of the two solutions plus one pixel's width in frame position: the two frames'
    # geometries are measured independently (rotations differ by ~0.2 deg), so the same frame column may
    # sit up to about a pixel apart on the two rectified axes (common practice, no source).
    dispersion = np.abs(w.solution.dispersion_nm_per_px(u))
    assert np.all(np.abs(difference) <= 3 * sigma + dispersion), np.max(np.abs(difference) - 3 * sigma - dispersion)
    # Against the simulator's truth for the daylight frame: within 1 nm (about 1.4 px at 0.73 nm/px) from the
    # blended H+K to the O2 B band, the precision the verdict promises for broad, blended dark lines.
    truth = json.loads((DEMO / "daylight.truth.json").read_text())
    error = w.wavelength_nm(u) - _truth_wavelength(daylight.geometry, truth, u)
    print("max |daylight - truth| nm", np.max(np.abs(error)), "px", np.max(np.abs(error) / dispersion))
    assert np.max(np.abs(error)) <= 1.0


def test_daylight_calibration_records_its_line_list_and_source(demo_calibrations, tmp_path):
    from benchspec.calfile import read_calibration, write_calibration

    daylight, _ = demo_calibrations
    path = write_calibration(daylight, tmp_path / "day.json")
    again = read_calibration(path)
    assert again.settings["lamps"] == ["daylight"]
    assert any("Fraunhofer" in s for s in again.wavelength.line_list_sources)
    # Fraunhofer C = H-alpha 656.28 nm and F = H-beta 486.13 nm (NIST ASD air wavelengths, from memory)
    listed = {round(line["wavelength_nm"], 2) for line in again.line_list}
    assert {656.28, 486.13} <= listed


def test_daylight_reference_is_an_absorption_lamp():
    lamp = load_lamp("daylight")
    assert lamp.kind == "absorption" and lamp.source_type == "daylight"
    # Na D2 588.995 nm, D1 589.592 nm (NIST ASD, air; design notes list 588.99/589.59)
    assert any(abs(l.wavelength_nm - 588.99) < 0.01 for l in lamp.lines())


def test_cli_refuses_a_lamp_frame_with_lamp_daylight(tmp_path, capsys):
    from benchspec.cli import main

    out = tmp_path / "cal.json"
    code = main(["calibrate", str(DEMO / "cfl_1.png"), "--lamp", "daylight", "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert not out.exists()
    message = [l for l in err.splitlines() if "bright lines" in l]
    assert len(message) == 1 and "--lamp" in message[0]
    assert "Never look at the Sun" in err  # the Sun's caution is shown (benchspec.safety)


def test_featureless_continuum_is_refused(tmp_path):
    bench = simulate.load_bench(DEMO / "bench.toml").with_(source={"kind": "blackbody", "temperature_k": 5778.0})
    frame = simulate.render(bench, seed=2)
    with pytest.raises(CalibrationError, match="dark lines? deeper than 1.5% found; --lamp daylight needs the Fraunhofer lines"):
        calibrate_frames(frame.image, lamp="daylight")


@pytest.mark.gui
def test_viewer_offers_daylight_and_shows_the_suns_caution(xdisplay):
    tk = pytest.importorskip("tkinter")
    import time

    from benchspec.frames import read_image
    from benchspec.gui.app import Viewer
    from benchspec.sources import ArraySource

    image = read_image(str(DEMO / "daylight.jpg"))
    root = tk.Tk()
    viewer = Viewer(root, source=ArraySource([image], loop=True, frame_rate_hz=10, pace=True, name="camera 0"))
    try:
        assert "daylight" in viewer.lamp_box.cget("values")
        viewer.light_radios["daylight"].invoke()
        viewer.buttons["start"].invoke()
        assert viewer.lamp.get() == "daylight"  # choosing daylight as the light picks its dark lines
        assert "Never look at the Sun" in viewer.cautions_shown()
        end = time.monotonic() + 30
        while time.monotonic() < end and viewer.stats.frames_shown < 2:
            root.update()
            time.sleep(0.005)
        viewer.buttons["calibrate"].invoke()
        while time.monotonic() < end and "calibrated with daylight" not in "\n".join(viewer.log_lines):
            root.update()
            time.sleep(0.005)
        log = "\n".join(viewer.log_lines)
        assert "calibrated with daylight" in log, log[-800:]
        assert "Never look at the Sun" in log
    finally:
        viewer.close()
