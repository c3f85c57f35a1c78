"""Setup planner against textbook grating figures."""

import numpy as np
import pytest

from benchspec.analysis.planner import centring_tilt_deg, dispersion_hint, plan_setup
from benchspec.errors import InputError


def test_textbook_first_order_angle():
    # Textbook worked example: 1000 lines/mm at 546.1 nm, first order, normal incidence -> 33.10 deg.
    assert centring_tilt_deg((546.1, 546.1), lines_per_mm=1000) == pytest.approx(33.10, abs=0.005)
    plan = plan_setup(lines_per_mm=1000, image_width_px=1280, horizontal_fov_deg=60, range_nm=(546.1 - 1e-6, 546.1 + 1e-6))
    assert plan.tilt_deg == pytest.approx(33.10, abs=0.005)
    assert plan.column_of(546.1) == pytest.approx(640.0, abs=0.01)  # centred


def test_second_order_of_380_lands_on_first_order_760():
    # Grating equation: m lambda sets the angle, so 2 x 380 nm falls where 1 x 760 nm does.
    plan = plan_setup(lines_per_mm=500, image_width_px=1280, horizontal_fov_deg=60, tilt_deg=0.0)
    assert plan.second_order_overlap_from_nm == pytest.approx(760.0)
    assert plan.column_of(380.0, order=2) == pytest.approx(plan.column_of(760.0), abs=1e-9)
    assert plan.second_order_on_sensor
    assert plan.second_order_start_column_px == pytest.approx(plan.column_of(760.0))


def test_centring_tilt_puts_the_range_symmetric():
    plan = plan_setup(lines_per_mm=1000, image_width_px=1280, horizontal_fov_deg=60)
    left, right = plan.range_columns_px
    assert left + right == pytest.approx(1280.0, abs=1e-6)
    assert plan.range_on_sensor and plan.centred_range_fits
    assert plan.wavelength_increases_with_column


def test_dispersion_is_the_derivative_of_the_mapping():
    # x = cx + f tan(beta - tilt): nm/px from the plan equals the numerical derivative of wavelength(column).
    plan = plan_setup(lines_per_mm=600, image_width_px=1920, horizontal_fov_deg=70, tilt_deg=20.0)
    lam = plan.wavelength_nm
    numeric = np.gradient(lam, plan.column_px)
    inside = np.isfinite(lam) & np.isfinite(numeric)
    inside[[0, -1]] = False
    assert np.allclose(plan.dispersion_nm_per_px[inside], numeric[inside], rtol=1e-4)
    # Inverse: the column of a wavelength read from the plan gives that wavelength back.
    column = plan.column_of(550.0)
    assert np.interp(column, plan.column_px, lam) == pytest.approx(550.0, abs=1e-3)


def test_resolution_limits():
    # Slit: dlambda = d (w / L) / m = 1000 nm x 0.1 / 100 = 1.0 nm; grooves: R = m N = 1 x 3 mm x 1000/mm.
    plan = plan_setup(lines_per_mm=1000, image_width_px=1280, horizontal_fov_deg=60, slit_width_mm=0.1,
                      slit_distance_mm=100.0, illuminated_width_mm=3.0)
    assert plan.slit_resolution_nm == pytest.approx(1.0)
    assert plan.resolving_power == pytest.approx(3000.0)
    assert plan.groove_resolution_nm == pytest.approx(550.0 / 3000.0)
    assert plan.pixel_resolution_nm == pytest.approx(2 * np.interp(plan.column_of(550.0), plan.column_px, plan.dispersion_nm_per_px), rel=1e-3)
    assert plan.limited_by == "pixels"
    wide_slit = plan_setup(lines_per_mm=1000, image_width_px=1280, horizontal_fov_deg=60, slit_width_mm=0.5, slit_distance_mm=100.0)
    assert wide_slit.limited_by == "slit"


def test_dispersion_range_and_hint():
    # 500 lines/mm on a 1280 px, 60 deg webcam: 0.2-3 nm/px is the realistic range (design notes).
    plan = plan_setup(lines_per_mm=500, image_width_px=1280, horizontal_fov_deg=60)
    low, high = plan.dispersion_range_nm_per_px
    assert 0.2 < low < high < 3.0
    hint = dispersion_hint(plan)
    assert hint[0] < low and hint[1] > high


def test_bad_plans():
    with pytest.raises(InputError, match="lines_per_mm"):
        plan_setup(lines_per_mm=0, image_width_px=1280, horizontal_fov_deg=60)
    with pytest.raises(InputError, match="no diffraction angle"):
        plan_setup(lines_per_mm=1000, image_width_px=1280, horizontal_fov_deg=60, order=2)
    with pytest.raises(InputError, match="slit_distance_mm"):
        plan_setup(lines_per_mm=500, image_width_px=1280, horizontal_fov_deg=60, slit_width_mm=0.1)
    with pytest.raises(InputError, match="horizontal_fov_deg"):
        plan_setup(lines_per_mm=500, image_width_px=1280, horizontal_fov_deg=0)
    # A range too wide for the field of view is reported, not hidden.
    narrow = plan_setup(lines_per_mm=1000, image_width_px=640, horizontal_fov_deg=20)
    assert not narrow.range_on_sensor and not narrow.centred_range_fits


def test_planner_matches_the_virtual_bench_mapping():
    # Consistency, not an outside source: the virtual bench (benchspec.simulate, written separately)
    # records its pixel-to-wavelength mapping in each frame's truth sidecar; the planner with the same
    # grating, camera and tilt must put every wavelength on the same column.
    import json
    from pathlib import Path

    truth_path = Path(__file__).resolve().parents[1] / "demo_images" / "cfl_1.truth.json"
    if not truth_path.exists():
        pytest.skip("demo frames not in this checkout")
    truth = json.loads(truth_path.read_text())
    bench = truth["bench"]
    plan = plan_setup(lines_per_mm=bench["grating"]["lines_per_mm"], image_width_px=bench["camera"]["width_px"],
                      horizontal_fov_deg=bench["camera"]["horizontal_fov_deg"], tilt_deg=truth["geometry"]["camera_tilt_deg"])
    column = np.array(truth["mapping"]["rectified_column_px"])
    wavelength = np.array(truth["mapping"]["wavelength_nm"])
    keep = np.isfinite(wavelength) & (wavelength > 380) & (wavelength < 750)
    assert np.allclose(plan.column_of(wavelength[keep]), column[keep], atol=0.01)
    assert plan.focal_length_px == pytest.approx(truth["geometry"]["focal_length_px"])
