"""Extraction: background, box and Horne (1986) optimal extraction, noise model, live path, bad input."""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchspec import extract, frames, geometry, simulate
from benchspec.errors import ExtractionError, FrameError, InputError
from benchspec.spectrum import Spectrum
from synthetic_band import rectified_columns, synthetic_band


def _geometry(image):
    return geometry.measure_geometry(image)


# ------------------------------------------------------------------ flux


@pytest.mark.parametrize("interpolation", ["cubic", "linear"])
def test_box_extraction_conserves_flux(interpolation):
    image, truth = synthetic_band(rotation_deg=8.0, curvature=(0.01, 1e-5), continuum=30.0, background=50.0)
    g = _geometry(image)
    band = geometry.rectify(image, g, interpolation=interpolation)
    spectrum = extract.extract(band, noise_model=extract.NoiseModel(1.0, 1.0), method="box")
    # each line's flux, exactly: amplitude * sigma * sqrt(2 pi) (the Gaussian) times 2 * half_height
    # (the top-hat slit profile's integral), plus the continuum under the same columns
    columns = rectified_columns(g, truth)
    sigma, half = truth["line_sigma"], truth["half_height"]
    expected_line = 800.0 * sigma * math.sqrt(2 * math.pi) * 2 * half
    for col in columns[1:-1]:
        c = int(round(col))
        window = spectrum.intensity[c - 12: c + 13]
        line_flux = window.sum() - 25 * 30.0 * 2 * half  # minus the continuum's share
        assert line_flux == pytest.approx(expected_line, rel=0.005)
    # the continuum per column: 30 DN times the band's height, away from lines
    between = int(round(0.5 * (columns[2] + columns[3])))
    assert spectrum.intensity[between] == pytest.approx(30.0 * 2 * half, rel=0.01)


def test_box_flux_matches_the_frame_sum():
    image, truth = synthetic_band(rotation_deg=-5.0, curvature=(0.008, 0.0), background=40.0)
    g = _geometry(image)
    spectrum = extract.extract(geometry.rectify(image, g), noise_model=extract.NoiseModel(1.0, 1.0), method="box")
    frame_flux = float((truth["clean"] - truth["background"]).sum())  # every photon of the band
    assert spectrum.intensity.sum() == pytest.approx(frame_flux, rel=0.005)


# ------------------------------------------------------------------ Horne vs box


def test_optimal_extraction_beats_box_on_noisy_data_with_known_truth():
    """Horne (1986): for a peaked spatial profile and read noise, optimal weights lower the variance."""
    profile_sigma = 5.0
    kwargs = dict(rotation_deg=3.0, gaussian_profile_sigma=profile_sigma, continuum=40.0, background=20.0,
                  line_amplitude=300.0, curvature=(0.004, 0.0))
    clean, truth = synthetic_band(**kwargs)
    g = _geometry(clean)
    noise = extract.NoiseModel(gain_e_per_dn=math.inf, read_noise_dn=4.0)
    rng = np.random.default_rng(11)
    box_runs, optimal_runs = [], []
    for _ in range(40):
        noisy = (truth["clean"] + rng.normal(0.0, 4.0, truth["clean"].shape)).astype(np.float32)
        band = geometry.rectify(noisy, g)
        box_runs.append(extract.extract(band, noise_model=noise, method="box"))
        optimal_runs.append(extract.extract(band, noise_model=noise, method="optimal"))
    # truth per column: continuum * integral of the Gaussian profile (away from lines)
    columns = rectified_columns(g, truth)
    between = [int(round(0.5 * (a + b))) for a, b in zip(columns[:-1], columns[1:])]
    true_flux = 40.0 * profile_sigma * math.sqrt(2 * math.pi)
    box = np.array([s.intensity[between] for s in box_runs])
    optimal = np.array([s.intensity[between] for s in optimal_runs])
    box_rms = np.sqrt(np.mean((box - true_flux) ** 2))
    optimal_rms = np.sqrt(np.mean((optimal - true_flux) ** 2))
    assert optimal_rms < 0.85 * box_rms
    # both are unbiased (within 3 standard errors of the mean of 40 x 5 columns)
    assert abs(box.mean() - true_flux) < 3 * box_rms / math.sqrt(box.size)
    assert abs(optimal.mean() - true_flux) < 3 * optimal_rms / math.sqrt(optimal.size)
    # the reported uncertainties are right (scatter / reported within 15%) and Horne's is lower
    box_sigma = np.mean([s.uncertainty[between] for s in box_runs])
    optimal_sigma = np.mean([s.uncertainty[between] for s in optimal_runs])
    assert box_rms / box_sigma == pytest.approx(1.0, abs=0.15)
    assert optimal_rms / optimal_sigma == pytest.approx(1.0, abs=0.15)
    assert optimal_sigma < box_sigma


def test_optimal_extraction_rejects_a_hot_pixel():
    image, truth = synthetic_band(continuum=50.0, background=10.0, noise_sigma=1.0, rng=np.random.default_rng(2))
    g = _geometry(image)
    clean_box = extract.extract(geometry.rectify(image, g), noise_model=extract.NoiseModel(math.inf, 1.0), method="box")
    hot = image.copy()
    columns = rectified_columns(g, truth)
    u = int(round(0.5 * (columns[1] + columns[2])))
    x, y = g.frame_coordinates(u, g.centre_row)
    hot[int(round(float(y))), int(round(float(x)))] += 5000.0
    band = geometry.rectify(hot, g)
    box = extract.extract(band, noise_model=extract.NoiseModel(math.inf, 1.0), method="box")
    optimal = extract.extract(band, noise_model=extract.NoiseModel(math.inf, 1.0), method="optimal")
    assert box.intensity[u] - clean_box.intensity[u] > 1000
    assert abs(optimal.intensity[u] - clean_box.intensity[u]) < 0.02 * clean_box.intensity[u]
    assert optimal.provenance["extraction"]["rejected_pixels"] >= 1


# ------------------------------------------------------------------ noise model


def _noisy_stack(clean, *, gain, read_noise_dn, n, rng):
    """Frames with Poisson photon noise (gain e-/DN) and Gaussian read noise, as uint16."""
    out = []
    for _ in range(n):
        electrons = rng.poisson(np.clip(clean, 0, None) * gain).astype(np.float64)
        dn = electrons / gain + rng.normal(0.0, read_noise_dn, clean.shape)
        out.append(np.clip(np.round(dn), 0, 65535).astype(np.uint16))
    return out


def test_noise_model_from_a_stack_recovers_gain_and_read_noise():
    clean, _ = synthetic_band(line_amplitude=20000.0, continuum=3000.0, background=200.0)
    rng = np.random.default_rng(5)
    stack = frames.stack_frames(_noisy_stack(clean, gain=2.0, read_noise_dn=6.0, n=10, rng=rng))
    model = extract.estimate_noise_model(stack)
    assert model.source == "stack" and model.n_frames == 10
    assert model.gain_e_per_dn == pytest.approx(2.0, rel=0.1)
    # read noise plus the 1/12 DN^2 of integer rounding
    assert model.read_noise_dn == pytest.approx(math.sqrt(36 + 1 / 12), rel=0.1)
    assert model.stack_factor == pytest.approx(0.1)


def test_noise_model_from_one_frame_is_a_rough_spatial_estimate():
    clean, _ = synthetic_band(line_amplitude=20000.0, continuum=3000.0, background=200.0)
    frame = _noisy_stack(clean, gain=2.0, read_noise_dn=6.0, n=1, rng=np.random.default_rng(8))
    stack = frames.stack_frames(frame)
    g = geometry.measure_geometry(stack.image)
    model = extract.estimate_noise_model(stack, geometry=g)
    assert model.source == "spatial"
    assert model.gain_e_per_dn == pytest.approx(2.0, rel=0.3)
    assert model.read_noise_dn == pytest.approx(6.0, rel=0.4)
    with pytest.raises(ExtractionError, match=r"a single frame has no frame-to-frame scatter: pass its geometry"):
        extract.estimate_noise_model(stack)


def test_one_demosaiced_colour_frame_gives_the_noise_of_the_stack():
    """A colour camera's bilinear demosaicing (virtual bench, RGGB mosaic): one frame's spatial estimate
    of the gain agrees with the frame-to-frame estimate of 8 frames (photon transfer from the scatter
    of repeated frames, common practice, no source) within 20%, i.e. the noise within 10%.

    Demosaicing fills every other red and blue row with the mean of its neighbours; a second
    difference of adjacent rows is zero there, and the estimate was 4x off (gain 40 against 157 e-/DN).
    """
    bench = simulate.Bench().with_(camera={"mosaic": "rggb", "width_px": 960, "height_px": 540}, output={"gamma": "1"})
    raw = [simulate.render(bench, seed=s).image for s in range(8)]
    stack = frames.stack_frames(raw, gamma="1")
    single = frames.stack_frames(raw[:1], gamma="1")
    g = geometry.measure_geometry(single.image, saturated=single.saturated)
    temporal = extract.estimate_noise_model(stack, geometry=g)
    spatial = extract.estimate_noise_model(single, geometry=g)
    assert temporal.source == "stack" and spatial.source == "spatial"
    assert spatial.gain_e_per_dn == pytest.approx(temporal.gain_e_per_dn, rel=0.2)


def test_one_jpeg_frame_of_the_demo_daylight_gives_the_noise_of_a_stack(tmp_path):
    """The demo's daylight frame (JPEG quality 90, sRGB): rendered again with 8 noise seeds by its own
    recipe, one frame's spatial gain is within 30% of the 8 frames' temporal one (it was 2.7x off:
    JPEG's chroma subsampling pairs rows). Invented demo bench; reference: photon transfer from the
    scatter of repeated frames (common practice, no source).
    """
    from benchspec import demo

    frame = next(f for f in demo.demo_frames() if f.file == "daylight.jpg")
    bench = demo._bench_for(frame, {})
    paths = []
    for k in range(8):
        rendered = simulate.render(bench, seed=frame.seed + k)
        paths.append(tmp_path / f"day{k}.jpg")
        simulate.write_frame(rendered, paths[-1], bench=bench)
    stack = frames.load_stack([str(p) for p in paths])
    single = frames.load_stack(str(paths[0]))
    g = geometry.measure_geometry(single.image, saturated=single.saturated)
    temporal = extract.estimate_noise_model(stack, geometry=g)
    spatial = extract.estimate_noise_model(single, geometry=g)
    assert spatial.gain_e_per_dn == pytest.approx(temporal.gain_e_per_dn, rel=0.3)


def test_box_uncertainty_matches_the_scatter_of_repeated_frames():
    clean, _ = synthetic_band(rotation_deg=6.0, curvature=(0.01, 0.0), line_amplitude=8000.0, continuum=800.0,
                              background=100.0)
    rng = np.random.default_rng(9)
    frames_list = _noisy_stack(clean, gain=1.5, read_noise_dn=4.0, n=24, rng=rng)
    g = geometry.measure_geometry(clean)
    model = extract.NoiseModel(1.5, math.sqrt(16 + 1 / 12))
    spectra = [extract.extract(geometry.rectify(f.astype(np.float32), g), noise_model=model, method="box")
               for f in frames_list]
    scatter = np.std([s.intensity for s in spectra], axis=0, ddof=1)
    reported = np.mean([s.uncertainty for s in spectra], axis=0)
    assert np.median(scatter / reported) == pytest.approx(1.0, abs=0.1)


# ------------------------------------------------------------------ saturation, output, stack path


def test_saturated_columns_are_flagged_and_provenance_recorded():
    clean, truth = synthetic_band(line_amplitude=[800, 800, 120000, 800, 800, 800], background=100.0)
    raw = np.clip(np.round(clean), 0, 65535).astype(np.uint16)
    stack = frames.stack_frames([raw, raw])
    g = geometry.measure_geometry(stack.image, saturated=stack.saturated)
    spectrum = extract.extract_stack(stack, g, method="box", noise_model=extract.NoiseModel(1.0, 2.0))
    columns = rectified_columns(g, truth)
    hot = int(round(columns[2]))
    assert spectrum.saturated[hot]
    assert not spectrum.saturated[int(round(columns[0]))]
    assert spectrum.saturated.sum() < 12
    assert isinstance(spectrum, Spectrum) and spectrum.wavelength_nm is None
    np.testing.assert_array_equal(spectrum.pixel, np.arange(g.n_columns))
    assert spectrum.provenance["frames"]["n_frames"] == 2
    assert spectrum.provenance["geometry"]["rotation_deg"] == g.rotation_deg
    assert spectrum.provenance["extraction"]["saturated_columns"] == int(spectrum.saturated.sum())


def test_extract_stack_on_the_virtual_bench():
    bench = simulate.Bench().with_(camera={"rotation_deg": 6.0, "width_px": 640, "height_px": 360},
                                   slit={"smile_px": 15.0, "height_px": 100.0}, output={"gamma": "1", "bit_depth": 16})
    stack = frames.stack_frames([simulate.render(bench, seed=s).image for s in range(3)])
    g = geometry.measure_geometry(stack.image, saturated=stack.saturated)
    box = extract.extract_stack(stack, g, method="box")
    optimal = extract.extract_stack(stack, g, method="optimal")
    assert box.provenance["extraction"]["noise_model"]["source"] == "stack"
    # same total flux from both methods (to 0.5%), optimal no noisier than box
    assert optimal.intensity.sum() == pytest.approx(box.intensity.sum(), rel=0.005)
    assert np.median(optimal.uncertainty / box.uncertainty) <= 1.0


# ------------------------------------------------------------------ live path


@pytest.mark.parametrize("method", ["box", "optimal"])
def test_live_extractor_matches_extract(method):
    image, _ = synthetic_band(rotation_deg=-9.0, curvature=(0.012, 0.0), continuum=100.0, noise_sigma=3.0,
                              rng=np.random.default_rng(4))
    g = _geometry(image)
    model = extract.NoiseModel(2.0, 3.0)
    live = extract.LiveExtractor(g, noise_model=model, method=method, interpolation="cubic")
    flux, variance, saturated = live.process_arrays(image)
    reference = extract.extract(geometry.rectify(image, g), noise_model=model, method=method, clip_sigma=None)
    scale = np.abs(reference.intensity).max()
    tolerance = 1e-4 if method == "box" else 0.02  # optimal: stored profile vs a profile fitted per frame
    assert np.max(np.abs(flux - reference.intensity)) / scale < tolerance
    np.testing.assert_allclose(np.sqrt(variance), reference.uncertainty, rtol=0.05 if method == "optimal" else 1e-3)
    assert not saturated.any()
    spectrum = live.process(image)
    assert spectrum.provenance["extraction"]["live"] is True


def test_live_extractor_raw_frames_and_frame_size():
    clean, _ = synthetic_band(rotation_deg=4.0, continuum=60.0, line_amplitude=150.0, background=10.0)
    raw = np.clip(np.round(clean), 0, 255).astype(np.uint8)
    raw[170:190, 200:203] = 255  # a saturated patch inside the band
    g = _geometry(frames.stack_frames([raw]).image)
    live = extract.LiveExtractor(g, noise_model=extract.NoiseModel(1.0, 1.0), preparer=frames.FramePreparer(gamma="2.2"))
    image, saturated = frames.FramePreparer(gamma="2.2").prepare(raw)
    direct = live.process(image, saturated)
    from_raw = live.process_raw(raw)
    np.testing.assert_allclose(from_raw.intensity, direct.intensity, rtol=1e-5, atol=1e-3)
    np.testing.assert_array_equal(from_raw.saturated, direct.saturated)
    assert direct.saturated.any()
    with pytest.raises(FrameError, match=r"the frame is 100x80 px but the geometry was measured on 640x360 px"):
        live.process_raw(np.zeros((80, 100), np.uint8))


# ------------------------------------------------------------------ bad input


def test_bad_arguments():
    image, _ = synthetic_band()
    g = _geometry(image)
    band = geometry.rectify(image, g)
    model = extract.NoiseModel(1.0, 1.0)
    with pytest.raises(InputError, match=r"`method` must be one of optimal, box, was 'sum'"):
        extract.extract(band, noise_model=model, method="sum")
    with pytest.raises(InputError, match=r"`noise_model` must be a NoiseModel"):
        extract.extract(band, noise_model=(1.0, 1.0))
    with pytest.raises(InputError, match=r"`clip_sigma` must be above 2 or None, was 1"):
        extract.extract(band, noise_model=model, clip_sigma=1)
    with pytest.raises(InputError, match=r"`gain_e_per_dn` must be positive \(or inf\), was -2"):
        extract.NoiseModel(-2, 1.0)
    with pytest.raises(InputError, match=r"`interpolation` must be one of linear, cubic, was 'nearest'"):
        extract.LiveExtractor(g, noise_model=model, interpolation="nearest")
    with pytest.raises(InputError, match=r"`stacked` must be a StackedFrame"):
        extract.extract_stack(image, g)


def test_stack_of_another_size_is_refused():
    image, _ = synthetic_band()
    g = _geometry(image)
    stack = frames.stack_frames([np.full((240, 320), 100, np.uint16) + np.eye(240, 320, dtype=np.uint16) * 5000])
    with pytest.raises(FrameError, match=r"the frame is 320x240 px but the geometry was measured on 640x360 px frames"):
        extract.extract_stack(stack, g)


def test_the_noise_bins_are_numpy_digitize_bins():
    """The noise estimate's log-spaced bin index equals np.digitize's (the reference), edges included."""
    from benchspec.extract import _geometric_bin_index

    rng = np.random.default_rng(7)
    for trial in range(300):
        n = int(rng.integers(5, 40))
        levels = np.exp(rng.normal(rng.normal(3, 3), rng.uniform(0.1, 4), int(rng.integers(1, 3000))))
        if trial % 3 == 0:
            levels = levels - rng.uniform(0, 5)  # dark pixels below zero
        lo, hi = np.percentile(levels, [0.5, 99.9])
        floor = max(lo, 1e-3 * max(hi, 1e-12), 1e-12)
        hi = max(hi, 2 * floor)
        edges = np.geomspace(floor, hi, n + 1)
        edges[0] = -np.inf
        at_edges = np.concatenate([edges[1:], np.nextafter(edges[1:], -np.inf), np.nextafter(edges[1:], np.inf)])
        levels = np.concatenate([levels, at_edges])
        np.testing.assert_array_equal(_geometric_bin_index(levels, edges, floor, hi), np.digitize(levels, edges) - 1)
