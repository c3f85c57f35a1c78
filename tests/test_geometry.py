"""Geometry: band finding, rotation, curvature, aperture, rectification, serialisation, bad input."""

from __future__ import annotations

import dataclasses
import json
import math

import cv2
import numpy as np
import pytest

from benchspec import frames, geometry, simulate
from benchspec.errors import FileFormatError, FrameError, GeometryError, InputError
from synthetic_band import line_straightness, rectified_columns, synthetic_band

# The round-trip target: straightened to within 0.1 degree and 0.3 px.
ROTATION_TOLERANCE_DEG = 0.1
STRAIGHTNESS_TOLERANCE_PX = 0.3


# ------------------------------------------------------------------ round trip on exact synthetic frames


@pytest.mark.parametrize(
    "rotation_deg, curvature",
    [
        (0.0, (0.0, 0.0)),
        (7.3, (0.008, 2e-5)),  # smile 13-20 px at the band edge, growing along the band
        (-11.0, (-0.010, 0.0)),  # -16 px
        (14.5, (0.014, -1e-5)),  # 20-25 px
    ],
)
def test_round_trip_on_synthetic_band(rotation_deg, curvature):
    image, truth = synthetic_band(rotation_deg=rotation_deg, curvature=curvature, noise_sigma=3.0,
                                  rng=np.random.default_rng(7))
    g = geometry.measure_geometry(image)
    assert abs(g.rotation_deg - rotation_deg) < ROTATION_TOLERANCE_DEG
    assert g.curvature_known and g.n_lines_traced >= 4
    # curvature at each line (the geometry's s origin differs from the truth's: compare at the lines)
    u = np.array(rectified_columns(g, truth))
    measured_c = g.curvature_at(g.first_column_s_px + u)
    true_c = curvature[0] + curvature[1] * np.asarray(truth["lines_s"])
    np.testing.assert_allclose(measured_c, true_c, atol=3e-4)  # 3e-4 / px -> 0.5 px sag at the band edge
    rect = geometry.rectify(image, g)
    deviations = line_straightness(rect.image, g, columns=u, half_rows=0.9 * truth["half_height"])
    assert max(deviations) < STRAIGHTNESS_TOLERANCE_PX, deviations
    assert g.band_height_px == pytest.approx(2 * truth["half_height"], abs=1.5)


@pytest.mark.parametrize(
    "rotation_deg, curvature",
    [
        (-8.0, (0.0004, 0.0)),  # 6.8 px sag at the band's top and bottom
        (-12.0, (0.0, 0.0)),
        (8.0, (-0.0003, 1e-6)),
    ],
)
def test_round_trip_on_short_tall_band(rotation_deg, curvature):
    # Coarse dispersion behind a tall slit: the band (about 130 px long, 260 px high) is shorter
    # than it is high, so its row profile barely depends on the angle; the angle must come from
    # the slit images (they used to give e.g. -4.9 deg for -8, or +9.9 for -12).
    image, truth = synthetic_band(shape=(540, 960), rotation_deg=rotation_deg, half_height=130.0,
                                  lines_s=(-60.0, -41.0, -25.0, -8.0, 12.0, 30.0, 47.0, 66.0), line_sigma=1.6,
                                  curvature=curvature, noise_sigma=3.0, rng=np.random.default_rng(11))
    g = geometry.measure_geometry(image)
    assert abs(g.rotation_deg - rotation_deg) < ROTATION_TOLERANCE_DEG
    assert g.curvature_known and g.n_lines_traced >= 4
    u = np.array(rectified_columns(g, truth))
    true_c = curvature[0] + curvature[1] * np.asarray(truth["lines_s"])
    # 5e-5 / px^2 -> 0.7 px of sag at 0.9 of the half-height
    np.testing.assert_allclose(g.curvature_at(g.first_column_s_px + u), true_c, atol=5e-5)
    rect = geometry.rectify(image, g)
    deviations = line_straightness(rect.image, g, columns=u, half_rows=0.9 * truth["half_height"])
    assert max(deviations) < STRAIGHTNESS_TOLERANCE_PX, deviations


@pytest.mark.parametrize("rotation_deg, smile_px", [(-12.0, 20.0), (9.0, -15.0), (4.0, 8.0)])
def test_round_trip_on_virtual_bench(rotation_deg, smile_px):
    bench = simulate.Bench().with_(camera={"rotation_deg": rotation_deg}, slit={"smile_px": smile_px})
    rendered = simulate.render(bench, seed=3)
    stack = frames.stack_frames([rendered.image])
    g = geometry.measure_geometry(stack.image, saturated=stack.saturated)
    assert abs(g.rotation_deg - rotation_deg) < ROTATION_TOLERANCE_DEG
    assert g.curvature_known
    # the band's measured height matches the slit image's height (top-hat of 160 px in the bench)
    assert g.band_height_px == pytest.approx(bench.slit.height_px, abs=3)
    # straightness on the strongest isolated lines, from the bench's truth positions
    lines = rendered.truth["lines"]
    u = np.arange(g.n_columns, dtype=float)
    x, y = g.frame_coordinates(u, np.full(u.shape, float(g.centre_row)))
    strongest = max(line["relative_intensity"] for line in lines)
    columns = []
    for line in lines:
        if line["relative_intensity"] < 0.05 * strongest:
            continue
        k = int(np.argmin(np.hypot(x - line["frame_x_px"], y - line["frame_y_px"])))
        near = [o for o in lines if o is not line and abs(o["rectified_column_px"] - line["rectified_column_px"]) < 8
                and o["relative_intensity"] > 0.05 * line["relative_intensity"]]
        if not near and 10 < k < g.n_columns - 10:
            columns.append(k)
    assert len(columns) >= 2
    rect = geometry.rectify(stack.image, g)
    deviations = line_straightness(rect.image, g, columns=columns, half_rows=0.85 * bench.slit.height_px / 2, window=6)
    assert max(deviations) < STRAIGHTNESS_TOLERANCE_PX, deviations
    # the smile the geometry reports matches the bench's sag at 650 nm (within 1.5 px)
    k650 = int(np.argmin(np.abs(np.interp(u, rendered.truth["mapping"]["rectified_column_px"],
                                          rendered.truth["mapping"]["wavelength_nm"]) - 650)))
    # truth's mapping is in the bench's own rectified coordinates; find the column by frame position instead
    del k650


def test_curvature_correction_narrows_the_lines():
    """Summing rows of a curved band blurs lines; the rectified band keeps them at the slit-image width."""
    image, truth = synthetic_band(rotation_deg=5.0, curvature=(0.012, 0.0), noise_sigma=1.0,
                                  rng=np.random.default_rng(3))
    g = geometry.measure_geometry(image)
    rect = geometry.rectify(image, g)
    a0, a1 = g.aperture_rows
    straight = rect.image[a0:a1].sum(axis=0)
    # the same rows with rotation only (curvature dropped)
    flat = geometry.Geometry.from_dict({**g.to_dict(), "curvature_coefficients": [0.0], "tilt_coefficients": [0.0]})
    blurred = geometry.rectify(image, flat).image[a0:a1].sum(axis=0)
    col = int(round(rectified_columns(g, truth)[2]))

    def fwhm_and_peak(profile):
        p = profile[col - 30: col + 31].astype(float)
        p = p - np.median(np.r_[p[:10], p[-10:]])
        k = int(np.argmax(p))
        half = 0.5 * p[k]
        left = k
        while p[left - 1] > half:
            left -= 1
        right = k
        while p[right + 1] > half:
            right += 1
        x_left = left - 1 + (half - p[left - 1]) / (p[left] - p[left - 1])
        x_right = right + (p[right] - half) / (p[right] - p[right + 1])
        return x_right - x_left, p[k]

    true_fwhm = 2.3548 * truth["line_sigma"]
    width_straight, peak_straight = fwhm_and_peak(straight)
    width_blurred, peak_blurred = fwhm_and_peak(blurred)
    # the target: within 10% of the slit image's width (bilinear resampling adds a little)
    assert width_straight == pytest.approx(true_fwhm, rel=0.10)
    assert width_blurred > 1.5 * width_straight
    assert peak_straight > 2.5 * peak_blurred


def test_two_traced_lines_carry_the_change_of_curvature_along_the_band():
    """Two lines whose curvatures differ clearly: c(s) is the line through them, not their mean.

    A constant through two such lines puts a wrong sag on every line outside them (the
    accuracy benchmark's 109 deg bench had 7.5 px of it). Exact synthetic frame: c(s) known.
    """
    curvature = (0.006, 1.5e-5)  # sag 9.6 px at t = 40 on the centre, changing 0.024 px per px along s
    image, truth = synthetic_band(rotation_deg=3.0, curvature=curvature, lines_s=(-150.0, 60.0), noise_sigma=2.0,
                                  rng=np.random.default_rng(11))
    g = geometry.measure_geometry(image)
    assert g.curvature_known and g.n_lines_traced == 2
    # at s = +250 (beyond both lines) the truth's sag at the aperture's edge and the geometry's agree
    u_lines = np.array(rectified_columns(g, truth))
    s_lines = g.first_column_s_px + u_lines
    s_far = s_lines[1] + 190.0  # truth's s = 250
    true_c = curvature[0] + curvature[1] * 250.0
    edge = 0.9 * truth["half_height"]
    assert abs(float(g.curvature_at(s_far)) - true_c) * edge**2 < 0.3  # the round trip's 0.3 px straightness


def test_continuum_gives_rotation_and_unknown_curvature():
    image, truth = synthetic_band(rotation_deg=-6.0, lines_s=(), continuum=500.0, noise_sigma=2.0,
                                  rng=np.random.default_rng(1))
    g = geometry.measure_geometry(image)
    assert abs(g.rotation_deg + 6.0) < ROTATION_TOLERANCE_DEG
    assert not g.curvature_known and g.curvature_rms_px is None
    assert any("curvature unknown" in note for note in g.notes)
    assert g.curvature_coefficients == (0.0,)


def test_virtual_halogen_continuum():
    bench = simulate.Bench().with_(camera={"rotation_deg": 7.0}, slit={"smile_px": 10.0})
    rendered = simulate.render(bench, seed=1, source="halogen")
    g = geometry.measure_geometry(frames.stack_frames([rendered.image]).image)
    assert abs(g.rotation_deg - 7.0) < ROTATION_TOLERANCE_DEG
    assert not g.curvature_known


def test_aperture_and_background_rows_are_beside_the_band():
    image, truth = synthetic_band(rotation_deg=3.0, noise_sigma=1.0)
    g = geometry.measure_geometry(image)
    a0, a1 = g.aperture_rows
    half = truth["half_height"]
    # aperture covers the band (+-half) and not much more
    assert a0 <= g.centre_row - half and a1 >= g.centre_row + half
    assert a1 - a0 <= 2 * half + 12
    assert len(g.background_rows) == 2
    (b0, b1), (c0, c1) = g.background_rows
    assert b1 <= a0 and c0 >= a1 and b1 - b0 >= 4 and c1 - c0 >= 4


# ------------------------------------------------------------------ remap tables, rectify, sizes


def test_remap_tables_are_float32_and_rectify_is_one_remap():
    image, _ = synthetic_band(rotation_deg=4.0, curvature=(0.01, 0.0))
    g = geometry.measure_geometry(image)
    map_x, map_y = geometry.remap_tables(g)
    assert map_x.dtype == np.float32 and map_y.dtype == np.float32
    assert map_x.shape == g.rectified_shape
    direct = cv2.remap(image, map_x, map_y, cv2.INTER_CUBIC)
    band = geometry.rectify(image, g)
    np.testing.assert_allclose(band.image[band.valid], direct[band.valid], rtol=1e-6)


def test_frame_of_another_size_is_refused():
    image, _ = synthetic_band()
    g = geometry.measure_geometry(image)
    with pytest.raises(FrameError, match=r"the frame is 320x240 px but the geometry was measured on 640x360 px frames"):
        geometry.rectify(np.zeros((240, 320), np.float32), g)


def test_geometry_is_json_serialisable_and_round_trips():
    image, _ = synthetic_band(rotation_deg=2.0, curvature=(0.005, 1e-5))
    g = geometry.measure_geometry(image)
    text = json.dumps(g.to_dict())
    again = geometry.Geometry.from_dict(json.loads(text))
    assert again == g
    np.testing.assert_array_equal(geometry.remap_tables(again)[0], geometry.remap_tables(g)[0])
    with pytest.raises(Exception):
        g.rotation_deg = 1.0  # frozen


@pytest.mark.parametrize(
    "change, message",
    [
        ({"schema": "benchspec-geometry/9"}, r"geometry schema 'benchspec-geometry/9' is not supported"),
        ({"colour": "blue"}, r"geometry has unknown field\(s\) colour"),
        ({"aperture_rows": [50, 10]}, r"geometry has a bad value"),
    ],
)
def test_damaged_geometry_dict(change, message):
    image, _ = synthetic_band()
    data = {**geometry.measure_geometry(image).to_dict(), **change}
    with pytest.raises(FileFormatError, match=message):
        geometry.Geometry.from_dict(data)


def test_grating_shaped_curvature_round_trips_and_old_dicts_load():
    """``curvature_grating`` (c = c0 + k tan(beta(s))): optional in the dict, JSON round trip, area factor."""
    image, _ = synthetic_band(rotation_deg=2.0, curvature=(0.005, 1e-5))
    g = geometry.measure_geometry(image)
    old = g.to_dict()
    del old["curvature_grating"]  # a dict written before the field existed
    assert geometry.Geometry.from_dict(old) == g and g.curvature_grating == ()
    shaped = dataclasses.replace(g, curvature_coefficients=(1e-4,), curvature_grating=(0.004, 0.3, 320.0, 600.0, -1.0))
    again = geometry.Geometry.from_dict(json.loads(json.dumps(shaped.to_dict())))
    assert again == shaped
    s = np.array([-200.0, 0.0, 150.0])
    beta = 0.3 + np.arctan(-(s - 320.0) / 600.0)
    np.testing.assert_allclose(shaped.curvature_at(s), 1e-4 + 0.004 * np.tan(beta), rtol=1e-12)
    # the frame area per rectified pixel uses dc/ds: against a central difference of c(s)
    ds = 1e-3
    numeric = (shaped.curvature_at(s + ds) - shaped.curvature_at(s - ds)) / (2 * ds)
    np.testing.assert_allclose(shaped.curvature_slope_at(s), numeric, rtol=1e-6)
    area = geometry.jacobian(shaped)
    column = 100
    t = np.arange(shaped.n_rows) - shaped.centre_row
    expected = 1 + shaped.curvature_slope_at(shaped.first_column_s_px + column) * t * t \
        + np.polynomial.polynomial.polyval(shaped.first_column_s_px + column,
                                           np.polynomial.polynomial.polyder(shaped.tilt_coefficients)) * t
    np.testing.assert_allclose(area[:, column], expected, rtol=1e-5)
    for bad in ([0.004, 0.3, 320.0, 0.0, 1.0], [0.004, 0.3, 320.0, 600.0, 0.5], [0.004, 0.3]):
        with pytest.raises(FileFormatError, match=r"geometry has a bad value \(curvature_grating"):
            geometry.Geometry.from_dict({**shaped.to_dict(), "curvature_grating": bad})


def test_missing_geometry_field():
    image, _ = synthetic_band()
    data = geometry.measure_geometry(image).to_dict()
    del data["rotation_deg"]
    with pytest.raises(FileFormatError, match=r"geometry lacks field\(s\) rotation_deg"):
        geometry.Geometry.from_dict(data)


# ------------------------------------------------------------------ band shift


def test_band_shift_is_detected():
    image, truth = synthetic_band(rotation_deg=5.0, curvature=(0.008, 0.0), noise_sigma=2.0)
    g = geometry.measure_geometry(image)
    same = geometry.measure_band_shift(image, g)
    assert same.measured and not same.moved and abs(same.across_px) < 0.2
    cx, cy = truth["centre"]
    moved_image, _ = synthetic_band(rotation_deg=5.6, centre=(cx, cy + 4.0), curvature=(0.008, 0.0), noise_sigma=2.0)
    moved = geometry.measure_band_shift(moved_image, g)
    assert moved.moved and "setup may have been bumped" in moved.message
    assert moved.rotation_change_deg == pytest.approx(0.6, abs=0.1)
    assert moved.across_px == pytest.approx(4.0 * math.cos(math.radians(5.0)), abs=0.7)


def test_band_shift_along_the_dispersion_with_a_reference():
    image, truth = synthetic_band(noise_sigma=1.0)
    g = geometry.measure_geometry(image)
    a0, a1 = g.aperture_rows
    reference = geometry.rectify(image, g).image[a0:a1].sum(axis=0)
    shifted, _ = synthetic_band(noise_sigma=1.0, lines_s=[s + 2.5 for s in truth["lines_s"]])
    result = geometry.measure_band_shift(shifted, g, reference=reference)
    assert result.along_px == pytest.approx(2.5, abs=0.2)
    assert result.moved


# ------------------------------------------------------------------ bad input


def test_no_band_in_noise():
    rng = np.random.default_rng(2)
    image = (100 + rng.normal(0, 5, (300, 400))).astype(np.float32)
    with pytest.raises(GeometryError, match=r"no spectral band found: brightest region is .*check the lamp is on and the slit is in view"):
        geometry.measure_geometry(image)


def test_faint_band_reports_its_contrast():
    image, _ = synthetic_band(background=1000.0, line_amplitude=0.0, continuum=30.0, lines_s=())
    with pytest.raises(GeometryError, match=r"no spectral band found: brightest region is 3% above background \(need 10%\)"):
        geometry.measure_geometry(image)


def test_band_touching_the_top_edge():
    image, _ = synthetic_band(shape=(200, 500), centre=(250.0, 25.0), half_height=40.0, continuum=300.0, lines_s=())
    with pytest.raises(GeometryError, match=r"the spectral band touches the top edge of the frame"):
        geometry.measure_geometry(image)


def test_band_touching_the_bottom_edge():
    image, _ = synthetic_band(shape=(200, 500), centre=(250.0, 180.0), half_height=40.0, continuum=300.0, lines_s=())
    with pytest.raises(GeometryError, match=r"the spectral band touches the bottom edge of the frame"):
        geometry.measure_geometry(image)


def test_bad_parameters():
    image, _ = synthetic_band()
    with pytest.raises(InputError, match=r"`max_rotation_deg` must be in \(0, 30\], was 45"):
        geometry.measure_geometry(image, max_rotation_deg=45)
    with pytest.raises(InputError, match=r"`image` must be a 2-D single-channel frame"):
        geometry.measure_geometry(np.zeros((50, 60, 3), np.float32))


def test_input_is_not_modified():
    image, _ = synthetic_band(rotation_deg=3.0, noise_sigma=1.0)
    copy = image.copy()
    image.setflags(write=False)
    geometry.measure_geometry(image)
    np.testing.assert_array_equal(image, copy)


def test_band_rotated_beyond_the_range_is_refused():
    image, _ = synthetic_band(shape=(500, 500), rotation_deg=24.0, lines_s=(), continuum=400.0, half_height=25.0)
    with pytest.raises(GeometryError, match=r"the band is rotated by 2\d\.\d deg, beyond the \+-16 deg"):
        geometry.measure_geometry(image)
