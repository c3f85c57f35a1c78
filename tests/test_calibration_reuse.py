"""What a calibration reuses instead of computing again, checked against computing it again.

The geometry's model of a slit image (``Geometry.frame_coordinates``: band position
``s + b(s) t + c(s) t²`` on aperture row t) is the reference: the shift of a line when only
the curvature changes is solved here independently, by bracketing root-finding
(scipy.optimize.brentq), and a second extraction with the new geometry is the reference for
the centres the calibration predicts.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.optimize import brentq

from benchspec import geometry, pipeline, simulate, wavecal
from benchspec.errors import InputError
from benchspec.extract import estimate_noise_model, extract_stack
from benchspec.frames import stack_frames
from benchspec.lines import find_lines


@pytest.fixture(scope="module")
def bench_geometry():
    bench = simulate.Bench().with_(camera={"rotation_deg": 3.0})
    image = simulate.render(bench, source="cfl", seed=2).image
    stacked = stack_frames([image], check=False)
    return stacked, geometry.measure_geometry(stacked.image, saturated=stacked.saturated)


def _exact_shift(old, new, u, t):
    """The column under ``new`` where row t meets the slit image that crosses row t at column u under ``old``."""
    s = old.first_column_s_px + u
    target = s + old.tilt_at(s) * t + old.curvature_at(s) * t * t

    def f(s_new):
        return s_new + new.tilt_at(s_new) * t + new.curvature_at(s_new) * t * t - target

    return brentq(f, s - 30.0, s + 30.0, xtol=1e-10) - s


def test_line_shift_between_solves_the_slit_image(bench_geometry):
    _, old = bench_geometry
    c = np.asarray(old.curvature_coefficients, float)
    # a changed curvature that also varies along the band (so the Newton steps meet a slope)
    new = dataclasses.replace(old, curvature_coefficients=tuple(np.r_[c[0] + 2e-4, c[1:] if c.size > 1 else [], ]),
                              curvature_grating=(3e-4, 0.3, old.first_column_s_px + 400.0, 1500.0, 1.0))
    columns = np.array([50.0, 300.0, old.n_columns - 60.0])
    shift, spread = geometry.line_shift_between(old, new, columns)
    a0, a1 = old.aperture_rows
    t = np.arange(a0, a1) - old.centre_row
    weights = np.asarray(old.spatial_profile, float)
    weights = weights / weights.sum()
    core = weights >= 0.1 * weights.max()
    for u, got, got_spread in zip(columns, shift, spread):
        exact = np.array([_exact_shift(old, new, u, tt) for tt in t])
        assert got == pytest.approx(float(exact @ weights), abs=1e-6)
        assert got_spread == pytest.approx(float(np.ptp(exact[core])), abs=1e-6)
        assert np.ptp(exact[core]) > 0.1  # the change is a real one: rows move by different amounts


def test_line_shift_between_is_zero_for_the_same_geometry(bench_geometry):
    _, old = bench_geometry
    shift, spread = geometry.line_shift_between(old, old, [10.0, 200.0])
    np.testing.assert_allclose(shift, 0.0, atol=1e-12)
    np.testing.assert_allclose(spread, 0.0, atol=1e-12)


def test_line_shift_between_refuses_a_moved_band(bench_geometry):
    _, old = bench_geometry
    moved = dataclasses.replace(old, rotation_deg=old.rotation_deg + 0.5)
    with pytest.raises(InputError, match="extract the spectrum again"):
        geometry.line_shift_between(old, moved, [100.0])


def test_predicted_centres_agree_with_a_second_extraction(bench_geometry):
    """After the curvature refit, the moved centres stand in for a second extraction.

    The agreement asked for, a tenth of each matched line's 1-sigma centre uncertainty, is what
    makes the shortcut harmless: it moves the solution by far less than its own error bar.
    """
    stacked, old = bench_geometry
    noise = estimate_noise_model(stacked, geometry=old)
    first = find_lines(extract_stack(stacked, old, noise_model=noise))
    calibration = wavecal.calibrate_lines(first, lamp="cfl")
    angles = pipeline._grating_angles_of(calibration, old)
    if calibration.solution.model == "grating":
        _, theta, x0, f = (float(v) for v in calibration.solution.coefficients)
        sign = float(calibration.solution.grating_sign)
    else:
        theta, x0, f, sign = angles
    new, info = geometry.refit_curvature_grating(stacked.image, old, theta_rad=theta, x0_px=x0, f_px=f, sign=sign,
                                                 saturated=stacked.saturated)
    assert info["used"]
    moved = pipeline._lines_moved_by(first, old, new)
    assert moved is not None
    second = find_lines(extract_stack(stacked, new, noise_model=noise))
    re_extracted = np.array([line.centre_px for line in second.lines])
    predicted = {round(m.pixel, 6) for m in calibration.matches}
    checked = 0
    for before, after in zip(first.lines, moved.lines):
        if round(before.centre_px, 6) not in predicted:
            continue
        nearest = re_extracted[np.argmin(np.abs(re_extracted - after.centre_px))]
        sigma = float(np.hypot(before.centre_uncertainty_px, before.centre_systematic_px))
        assert abs(after.centre_px - nearest) < 0.1 * sigma
        checked += 1
    assert checked >= 5


def test_a_line_whose_image_changes_shape_asks_for_a_second_extraction(bench_geometry):
    stacked, old = bench_geometry
    noise = estimate_noise_model(stacked, geometry=old)
    first = find_lines(extract_stack(stacked, old, noise_model=noise))
    c = np.asarray(old.curvature_coefficients, float)
    bent = dataclasses.replace(old, curvature_coefficients=(c[0] + 5e-4,) + tuple(c[1:]))  # ~4 px more sag at the edge
    assert pipeline._lines_moved_by(first, old, bent) is None


def test_calibrate_frames_says_when_it_moved_the_lines():
    bench = simulate.Bench().with_(camera={"rotation_deg": 3.0})
    calibration = pipeline.calibrate_frames(simulate.render(bench, source="cfl", seed=2).image, lamp="cfl")
    notes = calibration.geometry.notes
    assert any(n.startswith("curvature c =") for n in notes)  # the refit was taken
    assert "not extracted again" in notes[-1]
    assert calibration.wavelength.rms_px < 0.5


def test_remap_tables_are_shared_and_read_only(bench_geometry):
    _, g = bench_geometry
    first = geometry.remap_tables(g)
    again = geometry.remap_tables(dataclasses.replace(g))  # an equal geometry, another object
    assert first[0] is again[0] and first[1] is again[1]
    with pytest.raises(ValueError):
        first[0][0, 0] = 1.0
    other = geometry.remap_tables(dataclasses.replace(g, rotation_deg=g.rotation_deg + 1.0))
    assert not np.array_equal(other[1], first[1])


def test_the_per_geometry_cache_serves_several_threads(bench_geometry):
    """More geometries than the cache holds, asked for from four threads at once: every answer is right."""
    import threading

    _, g = bench_geometry
    shapes = [dataclasses.replace(g, rotation_deg=g.rotation_deg + 0.1 * k) for k in range(12)]
    errors = []

    def work(offset):
        try:
            for k in range(40):
                index = (k + offset) % len(shapes)
                map_x, map_y = geometry.remap_tables(shapes[index])
                x, y = shapes[index].frame_coordinates(0.0, 0.0)
                assert map_x[0, 0] == pytest.approx(float(x), abs=1e-3)
                assert map_y[0, 0] == pytest.approx(float(y), abs=1e-3)
        except Exception as exc:  # reported in the main thread
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(3 * n,)) for n in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    assert len(geometry._DERIVED) <= geometry._DERIVED_SIZE


def test_noise_factors_prepared_in_the_background_equal_those_computed_in_place(bench_geometry):
    """The resampling's noise factors started on a second thread are the arrays computed in place.

    Reference: the same functions called directly on the same geometry (nothing kept between).
    """
    from benchspec import extract

    stacked, g = bench_geometry
    rows = tuple(g.aperture_rows)
    geometry._DERIVED.clear()
    direct_factor = extract._resampling_variance_factor(geometry.remap_tables(g), rows, "cubic")
    direct_white = extract._white_band(g, geometry.remap_tables(g))
    geometry._DERIVED.clear()
    extract.prepare_in_background(g)
    background_factor = extract.resampling_variance_factor(g, rows)  # waits for the background result
    background_white = geometry.derived(("white band", g), lambda: pytest.fail("computed again instead of waited for"))
    np.testing.assert_array_equal(background_factor, direct_factor)
    np.testing.assert_array_equal(background_white, direct_white)
    assert not geometry._PENDING
    # the whole noise estimate and extraction agree too
    geometry._DERIVED.clear()
    in_place = extract_stack(stacked, g, noise_model=estimate_noise_model(stacked, geometry=g))
    geometry._DERIVED.clear()
    extract.prepare_in_background(g)
    prepared = extract_stack(stacked, g, noise_model=estimate_noise_model(stacked, geometry=g))
    np.testing.assert_array_equal(prepared.intensity, in_place.intensity)
    np.testing.assert_array_equal(prepared.uncertainty, in_place.uncertainty)


def test_an_error_in_the_background_is_raised_where_the_result_is_needed():
    def broken():
        raise ValueError("broken on purpose")

    key = ("a test key that nothing else uses",)
    geometry.derived_in_background(key, broken)
    with pytest.raises(ValueError, match="broken on purpose"):
        geometry.derived(key, broken)
    assert key not in geometry._PENDING and key not in geometry._DERIVED


def test_the_reference_spectrum_follows_the_refitted_geometry():
    """The calibration's reference spectrum is what the stored geometry extracts from the same frame.

    The band-shift check compares later frames with it (tolerance 1 px along the band): when the
    lines were moved instead of extracted again, the reference is resampled the same way, so the
    calibration frame itself shows no shift (well under 0.01 px) and the same spectrum.
    """
    bench = simulate.Bench().with_(camera={"rotation_deg": 3.0})
    image = simulate.render(bench, source="cfl", seed=2).image
    calibration = pipeline.calibrate_frames(image, lamp="cfl")
    assert "not extracted again" in calibration.geometry.notes[-1]
    stacked = stack_frames([image], check=False)
    shift = geometry.measure_band_shift(stacked.image, calibration.geometry,
                                        reference=np.asarray(calibration.reference_spectrum))
    assert shift.measured and not shift.moved
    assert abs(shift.along_px) < 0.01
    again = np.asarray(pipeline.extract_frames([image], calibration).intensity)
    reference = np.asarray(calibration.reference_spectrum)
    assert np.max(np.abs(reference - again)) < 0.01 * again.max()
