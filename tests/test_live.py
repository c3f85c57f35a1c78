"""The live path: the quick line finder, the fixed-profile optimal extraction, in-place linearising, --each.

No timing is asserted here (speed is measured by ``benchspec benchmark speed``): these tests
check that every shortcut of the live path gives the numbers of the general code within
their uncertainties.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pytest

from benchspec import extract, frames, geometry, lines, pipeline, simulate
from benchspec.errors import DegradedResultWarning, InputError, LineError
from benchspec.spectrum import Spectrum
from synthetic_band import synthetic_band

from synthetic_lines import FWHM_PER_SIGMA, gaussian_spectrum as _gaussian_lines


# ------------------------------------------------------------------ the quick line finder


def test_quick_lines_measure_a_gaussian(rng):
    table = lines.find_lines_quick(_gaussian_lines(rng, [200.3], sigma=1.5, height=1000.0))
    assert table.method == "weighted log-parabola" and len(table) == 1
    line = table[0]
    assert line.centre_px == pytest.approx(200.3, abs=4 * line.centre_uncertainty_px)
    assert line.fwhm_px == pytest.approx(1.5 * FWHM_PER_SIGMA, rel=0.05)
    assert line.peak == pytest.approx(1000.0, rel=0.05)
    # Area of a Gaussian: height * sigma * sqrt(2 pi) (textbook)
    assert line.area == pytest.approx(1000.0 * 1.5 * np.sqrt(2 * np.pi), rel=0.06)
    assert not line.blended and not line.saturated and line.kind == "emission"
    assert lines.find_lines(_gaussian_lines(rng, [200.3])).method == "gaussian least squares"


@pytest.mark.parametrize("sigma, height", [(1.0, 300.0), (1.5, 300.0), (2.5, 300.0), (1.5, 60.0)])
def test_quick_centre_uncertainty_is_a_real_one_sigma(sigma, height):
    # Pulls (measured - true) / reported sigma over seeded noisy lines have unit spread
    # (the meaning of a 1-sigma; common practice, no source).
    rng = np.random.default_rng(7)
    pulls = []
    for _ in range(80):
        centre = 150.0 + rng.uniform(-0.5, 0.5)
        x = np.arange(300, dtype=float)
        spectrum = Spectrum(intensity=height * np.exp(-0.5 * ((x - centre) / sigma) ** 2) + rng.normal(0, 8.0, 300),
                            uncertainty=np.full(300, 8.0), pixel=x)
        table = lines.find_lines_quick(spectrum)
        line = table[int(np.argmin(np.abs(table.centre_px - centre)))]  # a rare noise peak elsewhere is not this test's
        pulls.append((line.centre_px - centre) / line.centre_uncertainty_px)
    assert abs(np.mean(pulls)) < 0.35
    assert 0.7 < np.std(pulls) < 1.4


def test_quick_and_full_finders_agree_on_a_virtual_bench_spectrum():
    bench = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                                   slit={"height_px": 80.0})
    frame = simulate.render(bench, source="cfl", seed=3).image
    stacked = frames.stack_frames([frame])
    g = geometry.measure_geometry(stacked.image, saturated=stacked.saturated)
    noise = extract.estimate_noise_model(stacked, geometry=g)
    spectrum = extract.LiveExtractor(g, noise_model=noise).process_raw(frame)
    full, quick = lines.find_lines(spectrum, min_snr=10.0), lines.find_lines_quick(spectrum, min_snr=10.0)
    assert len(full) >= 5
    matched = 0
    for line in full:
        if line.blended or line.saturated:
            continue  # the quick finder measures a blend as one line; that is what its flag says
        nearest = quick[int(np.argmin(np.abs(quick.centre_px - line.centre_px)))]
        combined = np.hypot(line.centre_uncertainty_px, nearest.centre_uncertainty_px)
        assert abs(nearest.centre_px - line.centre_px) < max(4 * combined, 0.05)
        assert nearest.fwhm_px == pytest.approx(line.fwhm_px, rel=0.25)
        matched += 1
    assert matched >= 4


def test_quick_finder_flags_clipped_and_close_lines(rng):
    clipped = lines.find_lines_quick(_gaussian_lines(rng, [120.0], sigma=2.0, height=3000.0, clip=2000.0))
    (line,) = clipped
    assert line.saturated and line.centre_px == pytest.approx(120.0, abs=0.3)
    pair = lines.find_lines_quick(_gaussian_lines(rng, [200.0, 205.0], sigma=1.5, height=1000.0))
    assert len(pair) == 2 and all(line.blended for line in pair)


def test_quick_finder_on_a_calibrated_axis_and_without_lines(rng):
    base = _gaussian_lines(rng, [100.0, 250.0], n=400)
    wavelength = 400.0 + 0.5 * np.arange(400)
    calibrated = base.with_(wavelength_nm=wavelength, wavelength_uncertainty_nm=np.full(400, 0.05))
    table = lines.find_lines_quick(calibrated)
    assert [round(line.centre_nm) for line in table] == [450, 525]
    for line in table:
        assert line.centre_uncertainty_nm >= 0.05 and line.fwhm_nm == pytest.approx(0.5 * line.fwhm_px, rel=1e-6)
    noise_only = Spectrum(intensity=rng.normal(0, 1, 500), uncertainty=np.ones(500), pixel=np.arange(500.0))
    assert len(lines.find_lines_quick(noise_only)) <= 1  # a 5-sigma noise peak in 500 samples is rare


def test_quick_finder_bad_input():
    x = np.arange(50.0)
    spectrum = Spectrum(intensity=np.sin(x), uncertainty=np.ones(50), pixel=x)
    with pytest.raises(InputError, match="`min_snr` must be positive, was 0"):
        lines.find_lines_quick(spectrum, min_snr=0)
    with pytest.raises(InputError, match="`window_px` must be at least 2, was 1"):
        lines.find_lines_quick(spectrum, window_px=1)
    with pytest.raises(InputError, match="at least 7 are needed"):
        lines.find_lines_quick(Spectrum(intensity=np.ones(5), uncertainty=np.ones(5), pixel=np.arange(5.0)))
    with pytest.raises(LineError, match="flat"):
        lines.find_lines_quick(Spectrum(intensity=np.ones(50), uncertainty=np.ones(50), pixel=x))
    with pytest.raises(InputError, match="must be a benchspec Spectrum"):
        lines.find_lines_quick(np.ones(50))


# ------------------------------------------------------------------ the live extractor


def _band_with_varying_curvature():
    image, _ = synthetic_band(rotation_deg=2.0, curvature=(0.004, 2e-5), continuum=80.0, noise_sigma=2.0,
                              background=5.0, rng=np.random.default_rng(5))
    return image, geometry.measure_geometry(image)


def test_fixed_profile_optimal_matches_the_general_code():
    image, g = _band_with_varying_curvature()
    model = extract.NoiseModel(2.0, 3.0)
    live = extract.LiveExtractor(g, noise_model=model, method="optimal")
    assert live._weighted_sums is not None  # the fast form applies to this band
    fast_flux, fast_var, _ = live.process_arrays(image)
    general = extract.LiveExtractor(g, noise_model=model, method="optimal")
    general._weighted_sums = None  # the general per-pixel code, as before the fast form
    flux, var, _ = general.process_arrays(image)
    # the fast form takes the frame-area factor (1 within a fraction of a percent) as 1 in the
    # weights only: the flux moves by a small fraction of its own 1-sigma and of itself
    assert np.max(np.abs(fast_flux - flux) / np.sqrt(var)) < 0.25
    assert np.max(np.abs(fast_flux - flux) / np.abs(flux).max()) < 1e-3
    np.testing.assert_allclose(np.sqrt(fast_var), np.sqrt(var), rtol=0.01)
    box = extract.LiveExtractor(g, noise_model=model, method="box").process_arrays(image)[0]
    reference = extract.extract(geometry.rectify(image, g, interpolation="linear"), noise_model=model, method="box")
    assert np.max(np.abs(box - reference.intensity)) / np.abs(reference.intensity).max() < 1e-4


def test_fixed_profile_optimal_covers_a_band_whose_ends_leave_the_frame():
    # A geometry 6 columns wider than the frame at each end: some aperture samples read outside it and
    # some end columns have no background row inside. The fast form must still apply (at 1280x720 one
    # corner sample outside the frame used to send every frame to the per-pixel code, 3 times slower)
    # and agree with the general code; box must agree with extract(), which gives a side with no row
    # inside the frame no variance.
    image, g = _band_with_varying_curvature()
    wide = dataclasses.replace(g, first_column_s_px=g.first_column_s_px - 6, n_columns=g.n_columns + 12)
    model = extract.NoiseModel(2.0, 3.0)
    live = extract.LiveExtractor(wide, noise_model=model, method="optimal")
    assert live._valid_ap is not None and (live._valid_ap == 0).sum() > 50
    assert not (live._side_ok[0] | live._side_ok[1]).all()
    assert live._weighted_sums is not None
    fast_flux, fast_var, _ = live.process_arrays(image)
    general = extract.LiveExtractor(wide, noise_model=model, method="optimal")
    general._weighted_sums = None
    flux, var, _ = general.process_arrays(image)
    assert np.max(np.abs(fast_flux - flux) / np.sqrt(var)) < 0.25
    np.testing.assert_allclose(np.sqrt(fast_var), np.sqrt(var), rtol=0.01)
    box, box_var, _ = extract.LiveExtractor(wide, noise_model=model, method="box").process_arrays(image)
    reference = extract.extract(geometry.rectify(image, wide, interpolation="linear"), noise_model=model, method="box")
    assert np.max(np.abs(box - reference.intensity)) / np.abs(reference.intensity).max() < 1e-4
    np.testing.assert_allclose(np.sqrt(box_var), reference.uncertainty, rtol=0.01)


def test_weights_built_for_a_variance_off_by_a_quarter_lose_almost_nothing():
    """Any weights give an unbiased flux; P / V minimise its variance (Horne 1986, PASP 98, 609).

    The efficiency of weights w built for V_ref on a column whose variance is V is
    (sum w P)² / (sum w² V · sum P² / V), 1 for w = P / V. Over read-noise, background and
    photon-dominated columns, wherever the variance the kept weights give, sum w² V, is within
    the extractor's tolerance of its value at V_ref, the efficiency stays above 99.5%.
    """
    t = np.arange(-40, 41)
    profile = np.exp(-0.5 * (t / 12.0) ** 2)
    profile /= profile.sum()
    worst, checked = 1.0, 0
    for read in (1.0, 10.0, 100.0):
        for background in (0.0, 10.0, 1000.0):
            for f_ref in (10.0, 1e3, 1e5, 1e7):
                v_ref = read + f_ref * profile + background
                w = profile / v_ref
                for factor in np.linspace(0.2, 5.0, 60):
                    v = read + factor * f_ref * profile + background
                    if abs((w * w * v).sum() / (w * w * v_ref).sum() - 1) > extract._KEPT_WEIGHTS_TOLERANCE:
                        continue
                    worst = min(worst, (w * profile).sum() ** 2 / ((w * w * v).sum() * (profile**2 / v).sum()))
                    checked += 1
    assert checked > 500 and worst > 0.995


def test_kept_weights_follow_the_frames_of_a_series():
    """Frames of one scene: the weights of the first frame serve the others, within their noise.

    Against the weights built anew for every frame, the flux moves by a small fraction of its
    1-sigma and the stated 1-sigma by under 2%; a frame four times brighter builds them again.
    """
    image, g = _band_with_varying_curvature()
    model = extract.NoiseModel(2.0, 3.0)
    rng = np.random.default_rng(11)
    series = [np.clip(image + rng.normal(0, 3.0, image.shape), 0, None).astype(np.float32) for _ in range(6)]
    kept = extract.LiveExtractor(g, noise_model=model, method="optimal")
    fresh = extract.LiveExtractor(g, noise_model=model, method="optimal")
    for frame in series:
        flux, var, _ = kept.process_arrays(frame)
        fresh._kept_weights = None  # built for this frame
        flux_fresh, var_fresh, _ = fresh.process_arrays(frame)
        assert np.max(np.abs(flux - flux_fresh) / np.sqrt(var_fresh)) < 0.3
        np.testing.assert_allclose(np.sqrt(var), np.sqrt(var_fresh), rtol=0.02)
    first = kept._kept_weights
    kept.process_arrays(series[0])
    assert kept._kept_weights is first  # the same scene: kept
    kept.process_arrays(4.0 * series[0])
    assert kept._kept_weights is not first  # four times the light: built again


def test_prepare_live_equals_prepare_and_reads_regions_in_place():
    rng = np.random.default_rng(2)
    frame = rng.integers(0, 250, (120, 160, 3), dtype=np.uint8)
    preparer = frames.FramePreparer(gamma="srgb")
    region = frame[20:90, 30:140]  # rows with a stride: read without a copy
    buffers: dict = {}
    image, saturated = preparer.prepare_live(region, buffers=buffers)
    expected, expected_saturated = preparer.prepare(np.ascontiguousarray(region))
    assert saturated is None and not expected_saturated.any()
    np.testing.assert_array_equal(image, expected)
    again, _ = preparer.prepare_live(region, buffers=buffers)
    assert again is image or np.shares_memory(again, buffers["image"])  # the kept buffer, no new array
    clipped = frame.copy()
    clipped[50, 60] = 255
    image, saturated = preparer.prepare_live(clipped)
    expected, expected_saturated = preparer.prepare(clipped)
    np.testing.assert_array_equal(image, expected)
    np.testing.assert_array_equal(saturated, expected_saturated)
    assert saturated[50, 60] and saturated.sum() == 1


def _rotated_bench_frame(seed: int = 4):
    bench = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                                   slit={"height_px": 80.0})
    return simulate.render(bench, source="cfl", seed=seed).image


@pytest.mark.parametrize("method", ["optimal", "box"])
@pytest.mark.parametrize("interpolation", ["linear", "cubic"])
def test_strip_linearising_equals_the_whole_region(method, interpolation):
    # process_raw_arrays linearises only the strips the remap reads; the result must be the one of
    # linearising the whole region (FramePreparer.prepare_live), exactly: the same table, weights, dark
    frame = _rotated_bench_frame()
    stacked = frames.stack_frames([frame])
    g = geometry.measure_geometry(stacked.image, saturated=stacked.saturated)
    noise = extract.estimate_noise_model(stacked, geometry=g)
    dark = np.random.default_rng(5).uniform(0.0, 2.0, frame.shape[:2]).astype(np.float32)
    for preparer in (frames.FramePreparer(gamma="srgb"), frames.FramePreparer(gamma="srgb", dark=dark)):
        live = extract.LiveExtractor(g, noise_model=noise, method=method, preparer=preparer,
                                     interpolation=interpolation)
        covered = sum((r1 - r0) * (c1 - c0) for r0, r1, c0, c1 in live._strips)
        assert covered < (live.y1 - live.y0) * (live.x1 - live.x0)  # the rotated band leaves corners unread
        region = preparer.prepare_live(frame)[0][live.y0:live.y1, live.x0:live.x1]
        expected = live.process_prepared(np.ascontiguousarray(region))
        for bgr, given in ((False, frame), (True, np.ascontiguousarray(frame[:, :, ::-1]))):
            flux, variance, saturated = live.process_raw_arrays(given, bgr=bgr)
            np.testing.assert_allclose(flux, expected[0], rtol=1e-6, atol=1e-4)
            np.testing.assert_allclose(variance, expected[1], rtol=1e-6)
            assert not saturated.any()
        mono = frame[:, :, 1]
        expected_mono = live.process_prepared(
            np.ascontiguousarray(preparer.prepare_live(mono)[0][live.y0:live.y1, live.x0:live.x1]))
        np.testing.assert_allclose(live.process_raw_arrays(mono)[0], expected_mono[0], rtol=1e-6, atol=1e-4)


def test_strip_linearising_leaves_clipped_frames_to_the_general_path():
    frame = _rotated_bench_frame().copy()
    stacked = frames.stack_frames([frame])
    g = geometry.measure_geometry(stacked.image, saturated=stacked.saturated)
    live = extract.LiveExtractor(g, noise_model=extract.estimate_noise_model(stacked, geometry=g), method="optimal")
    row = int(round(g.centre_row))
    x0, y0, x1, y1 = live.region
    rect_to_frame = geometry.remap_tables(g)
    fx, fy = rect_to_frame[0][row, g.n_columns // 2], rect_to_frame[1][row, g.n_columns // 2]
    frame[int(fy), int(fx)] = 255  # one clipped pixel inside the aperture
    assert live._linearise_strips(frame[y0:y1, x0:x1], False) is None
    flux, variance, saturated = live.process_raw_arrays(frame)
    expected = live.process_prepared(*live.prepare_raw(frame))
    np.testing.assert_array_equal(saturated, expected[2])
    assert saturated.sum() >= 1
    np.testing.assert_allclose(flux, expected[0], rtol=1e-6)


def test_product_in_blocks_equals_matmul():
    rng = np.random.default_rng(3)
    a = rng.random((7, 171)).astype(np.float32)
    b = rng.random((171, 1264)).astype(np.float32)
    out = np.empty((7, 1264), np.float32)
    result = extract._product(a, b, out=out)
    assert result is out
    np.testing.assert_allclose(result, a @ b, rtol=1e-5)


# ------------------------------------------------------------------ extract --each


def test_each_frame_is_what_apply_calibration_gives():
    bench = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                                   slit={"height_px": 80.0})
    cfl = [simulate.render(bench, source="cfl", seed=s).image for s in (1, 2, 3)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        calibration = pipeline.calibrate_frames(cfl[0], lamp="cfl")
        series = list(pipeline.iter_extract_frames(cfl, calibration, extraction="box"))
    assert len(series) == 3
    noise = extract.estimate_noise_model(frames.stack_frames([cfl[0]]), geometry=calibration.geometry)
    live = extract.LiveExtractor(calibration.geometry, noise_model=noise, method="box")
    for frame, spectrum in zip(cfl, series):
        expected = pipeline.apply_calibration(live.process_raw(frame), calibration)
        np.testing.assert_array_equal(spectrum.wavelength_nm, expected.wavelength_nm)
        np.testing.assert_array_equal(spectrum.wavelength_uncertainty_nm, expected.wavelength_uncertainty_nm)
        np.testing.assert_allclose(spectrum.intensity, expected.intensity, rtol=1e-6, atol=1e-6)
        np.testing.assert_allclose(spectrum.uncertainty, expected.uncertainty, rtol=1e-6)
        np.testing.assert_array_equal(spectrum.saturated, expected.saturated)
        assert spectrum.provenance["wavelength_calibration"] == expected.provenance["wavelength_calibration"]
    assert [s.provenance["time_series_index"] for s in series] == [0, 1, 2]


def test_a_video_series_prepared_on_the_decoding_thread_equals_the_same_frames_as_arrays(tmp_path):
    import cv2

    bench = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                                   slit={"height_px": 80.0})
    cfl = [np.ascontiguousarray(simulate.render(bench, source="cfl", seed=s).image) for s in (1, 2)]
    path = tmp_path / "series.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30.0, (640, 360), True)
    for k in range(6):
        writer.write(np.ascontiguousarray(cfl[k % 2][:, :, ::-1]))
    writer.release()
    decoded = list(frames.iter_video(path))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        calibration = pipeline.calibrate_frames(cfl[0], lamp="cfl")
        from_video = list(pipeline.iter_extract_frames(str(path), calibration, band_check_every=4))
        from_arrays = list(pipeline.iter_extract_frames(decoded, calibration, band_check_every=4))
    assert len(from_video) == len(from_arrays) == 6
    for a, b in zip(from_video, from_arrays):
        # video frames stay in B, G, R order with the channel weights reversed: the three channels are
        # summed in another order, so samples agree to float32 rounding of the spectrum's scale
        scale = float(np.max(np.abs(b.intensity)))
        np.testing.assert_allclose(a.intensity, b.intensity, rtol=1e-6, atol=1e-6 * scale)
        np.testing.assert_allclose(a.uncertainty, b.uncertainty, rtol=1e-6)
    assert [s.provenance["frames"][0]["frame_index"] for s in from_video] == list(range(6))
    live = extract.LiveExtractor(calibration.geometry, noise_model=extract.NoiseModel(50.0, 1.0), method="optimal")
    for frame in decoded[:2]:
        direct = live.process_raw_arrays(frame)
        prepared = live.process_prepared(*live.prepare_raw(frame))
        for x, y in zip(direct, prepared):
            np.testing.assert_array_equal(x, y)


def test_opencv_threads_are_restored_after_a_series_and_bad_values_refused():
    import cv2

    bench = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                                   slit={"height_px": 80.0})
    frame = simulate.render(bench, source="cfl", seed=1).image
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        calibration = pipeline.calibrate_frames(frame, lamp="cfl")
        before = cv2.getNumThreads()
        series = pipeline.iter_extract_frames([frame, frame], calibration, opencv_threads=1)
        next(series)
        assert cv2.getNumThreads() == 1
        assert len(list(series)) == 1
    assert cv2.getNumThreads() == before
    with pytest.raises(InputError, match="`opencv_threads` must be at least 1"):
        next(pipeline.iter_extract_frames([frame], calibration, opencv_threads=0))
