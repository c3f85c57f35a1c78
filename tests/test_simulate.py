"""The virtual bench: geometry, line positions, noise statistics and clean failures."""

import json
import math

import numpy as np
import pytest

from benchspec import physics, refdata, simulate
from benchspec.cli import main
from benchspec.errors import BenchFileError


def _quiet_bench(**changes):
    """A linear, 16-bit, nearly noise-free bench for position checks."""
    bench = simulate.Bench().with_(
        output={"gamma": "1", "bit_depth": 16},
        noise={"read_noise_e": 0.0, "dark_current_e_per_s": 0.0, "gain_e_per_dn": 0.05, "adc_bits": 16},
        exposure={"stray_light": 0.0, "level": 0.8},
    )
    return bench.with_(**changes) if changes else bench


def test_line_positions_match_truth_by_independent_centroid():
    # The centroid of a symmetric line image is its centre (common practice, no source);
    # measured here on the band's central rows, where the smile is far below 0.01 px.
    rendered = simulate.render(_quiet_bench(source="he"), seed=3)
    strongest = max(l["relative_intensity"] for l in rendered.truth["lines"])
    image = rendered.linear.sum(axis=2).astype(float)
    row = int(round(rendered.truth["geometry"]["band_centre_row_px"]))
    profile = image[row - 2 : row + 2].mean(axis=0)
    checked = 0
    for line in rendered.truth["lines"]:
        x0 = line["rectified_column_px"]
        neighbours = [
            o for o in rendered.truth["lines"]
            if o is not line and abs(o["rectified_column_px"] - x0) < 8 and o["relative_intensity"] > 0.002 * line["relative_intensity"]
        ]
        if line["relative_intensity"] < 0.05 * strongest or neighbours or not 400 < line["wavelength_nm"] < 660:
            continue
        lo, hi = int(math.floor(x0)) - 4, int(math.floor(x0)) + 5
        cols = np.arange(lo, hi + 1)
        weights = profile[lo : hi + 1] - np.median(profile)
        centroid = float((cols * weights).sum() / weights.sum())
        assert centroid == pytest.approx(x0, abs=0.1), line["wavelength_nm"]
        checked += 1
    assert checked >= 3


def test_truth_mapping_follows_the_grating_equation():
    # Grating equation and a pinhole camera: x = cx + f tan(beta - tilt) on the centre row.
    rendered = simulate.render(_quiet_bench(source="hg"), seed=0)
    geometry = rendered.truth["geometry"]
    for line in rendered.truth["lines"]:
        beta = physics.diffraction_angle_deg(line["wavelength_nm"], lines_per_mm=1000, order=1)
        expected = 640 + geometry["focal_length_px"] * math.tan(math.radians(beta - geometry["camera_tilt_deg"]))
        assert line["rectified_column_px"] == pytest.approx(expected, abs=1e-6)


def test_rendered_lines_are_the_lamp_reference_lines():
    # The line list in calibration/ is the NIST ASD one (checked in test_refdata); the bench renders exactly it.
    rendered = simulate.render(simulate.Bench(source="hg"), seed=0)
    listed = refdata.load_line_list("Hg").wavelength_nm
    for line in rendered.truth["lines"]:
        assert np.min(np.abs(listed - line["wavelength_nm"])) == 0.0
    assert any(abs(l["wavelength_nm"] - 546.075) < 1e-9 for l in rendered.truth["lines"])


def test_shot_noise_variance_equals_mean_in_electrons():
    # Poisson statistics: for photon-limited signal the variance in electrons equals the mean.
    bench = simulate.Bench(source={"kind": "flat"}).with_(
        camera={"width_px": 320, "height_px": 240},
        slit={"height_px": 60},
        output={"gamma": "1", "bit_depth": 16},
        noise={"read_noise_e": 0.0, "dark_current_e_per_s": 0.0, "gain_e_per_dn": 2.0, "adc_bits": 14},
        exposure={"level": 0.3},
    )
    rendered = simulate.render(bench, seed=11)
    electrons = rendered.linear.astype(float) * bench.noise.gain_e_per_dn
    mean, variance = electrons.mean(), electrons.var()
    # The ADC step adds gain^2/12 of quantisation variance.
    assert (variance - bench.noise.gain_e_per_dn**2 / 12) / mean == pytest.approx(1.0, abs=0.05)


def test_same_seed_same_frame_other_seed_other_noise():
    bench = simulate.Bench(source="cfl").with_(camera={"width_px": 640, "height_px": 360}, slit={"height_px": 80})
    a, b, c = (simulate.render(bench, seed=s).image for s in (5, 5, 6))
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)


def test_rotation_moves_lines_as_the_truth_says():
    bench = _quiet_bench(source="hg", camera={"rotation_deg": 8.0})
    rendered = simulate.render(bench, seed=1)
    image = rendered.linear.sum(axis=2).astype(float)
    line = max(rendered.truth["lines"], key=lambda l: l["relative_intensity"])
    x, y = line["frame_x_px"], line["frame_y_px"]
    r, c = int(round(y)), int(round(x))
    window = image[r - 1 : r + 2, c - 6 : c + 7]
    cols = np.arange(c - 6, c + 7)
    profile = window.mean(axis=0) - np.median(image)
    assert float((cols * profile).sum() / profile.sum()) == pytest.approx(x, abs=0.3)


def test_smile_override_sets_the_sag():
    bench = _quiet_bench(source="hg", slit={"smile_px": 15.0, "height_px": 200})
    rendered = simulate.render(bench, seed=1)
    assert rendered.truth["geometry"]["smile_px_at_650nm"] == pytest.approx(15.0, abs=1e-6)


def test_blackbody_source_follows_planck():
    model = simulate.source_spectrum({"kind": "blackbody", "temperature_k": 2856.0})
    wl = model.continuum_nm
    planck = physics.planck_spectral_radiance(wl, 2856.0)
    assert np.allclose(model.continuum, planck / planck.max(), rtol=1e-12)


def test_led_has_the_asked_peak_and_fwhm():
    model = simulate.source_spectrum({"kind": "led", "peak_nm": 630.0, "fwhm_nm": 20.0, "asymmetry": 1.5})
    wl, s = model.continuum_nm, model.continuum
    assert wl[np.argmax(s)] == pytest.approx(630.0, abs=0.05)
    above = wl[s >= 0.5]
    assert above[-1] - above[0] == pytest.approx(20.0, abs=0.1)
    assert (above[-1] - 630.0) > (630.0 - above[0])  # red side wider


@pytest.mark.parametrize(
    "data, match",
    [
        ({"camera": {"fov": 60}}, r"unknown field 'camera.fov'"),
        ({"lens": {}}, r"unknown section 'lens'"),
        ({"source": "plasma"}, r"unknown source 'plasma'"),
        ({"camera": {"rotation_deg": 40}}, r"'camera.rotation_deg' was 40.0; accepted range -20 to 20"),
        ({"output": {"gamma": "3"}}, r"'output.gamma' was '3'; accepted: 1, 2.2, srgb"),
        ({"source": {"kind": "led", "peak_nm": 2000}}, r"'source.peak_nm' was 2000; accepted range"),
    ],
)
def test_bad_bench_descriptions_name_the_field(data, match):
    with pytest.raises(BenchFileError, match=match):
        simulate.bench_from_dict(data)


def test_impossible_geometry_is_refused():
    with pytest.raises(BenchFileError, match="has no diffraction angle"):
        simulate.render(simulate.Bench(source="laser:1100"))
    with pytest.raises(BenchFileError, match="falls outside the frame"):
        simulate.render(simulate.Bench().with_(slit={"height_px": 740}))


def test_bench_file_round_trip_and_template(tmp_path, capsys):
    assert main(["simulate", "--template"]) == 0
    template = capsys.readouterr().out
    path = tmp_path / "bench.toml"
    path.write_text(template)
    assert simulate.load_bench(path) == simulate.Bench()
    bad = tmp_path / "bad.toml"
    bad.write_text("[camera]\nwidth = 3\n")
    with pytest.raises(BenchFileError, match="bad.toml.*unknown field 'camera.width'"):
        simulate.load_bench(bad)


def test_cli_writes_frame_and_truth(tmp_path, capsys):
    out = tmp_path / "frame dir é" / "tube.png"
    out.parent.mkdir()
    assert main(["simulate", "--source", "he", "--set", "camera.width_px=640", "--set", "camera.height_px=360",
                 "--set", "slit.height_px=80", "--out", str(out)]) == 0
    truth = json.loads(out.with_name("tube.truth.json").read_text())
    assert truth["schema"] == "benchspec-truth/1"
    assert any(abs(l["wavelength_nm"] - 587.562) < 0.01 for l in truth["lines"])  # He I, NIST ASD
    assert "cautions discharge" in capsys.readouterr().out


@pytest.mark.parametrize(
    "argv, match",
    [
        (["--source", "plasma"], "unknown source 'plasma'"),
        (["--set", "camera.fov=3"], "unknown field 'camera.fov'"),
        (["--source", "laser:1100"], "no diffraction angle"),
        (["--set", "slit.height_px=900"], "outside the frame"),
    ],
)
def test_cli_bad_input_exits_2_with_one_line_and_no_file(tmp_path, capsys, argv, match):
    out = tmp_path / "x.png"
    assert main(["simulate", *argv, "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "error:" in err
    assert __import__("re").search(match, err)
    assert list(tmp_path.iterdir()) == []


def test_cli_refuses_unwritable_or_existing_output(tmp_path, capsys):
    assert main(["simulate", "--out", str(tmp_path / "missing" / "x.png")]) == 2
    assert "does not exist" in capsys.readouterr().err
    existing = tmp_path / "keep.png"
    existing.write_bytes(b"precious")
    assert main(["simulate", "--out", str(existing)]) == 2
    assert existing.read_bytes() == b"precious"
    assert "--force" in capsys.readouterr().err


def test_video_has_changing_noise_and_drift(tmp_path):
    cv2 = pytest.importorskip("cv2")
    bench = simulate.Bench(source="hg").with_(camera={"width_px": 320, "height_px": 240}, slit={"height_px": 60})
    path = tmp_path / "clip.avi"
    truth = simulate.render_video(bench, path, frames=4, seed=2, drift_px_per_frame=0.5, flicker=0.05)
    capture = cv2.VideoCapture(str(path))
    frames = []
    while True:
        ok, frame = capture.read()
        if not ok:
            break
        frames.append(frame)
    assert len(frames) == 4
    assert not np.array_equal(frames[0], frames[1])
    assert truth["video"]["shift_px"] == [0.0, 0.5, 1.0, 1.5]


def test_second_order_light_lands_where_twice_its_wavelength_would():
    # Grating equation: order 2 at lambda leaves at the angle of order 1 at 2*lambda.
    bench = _quiet_bench(source="hg", grating={"second_order_fraction": 0.1})
    rendered = simulate.render(bench, seed=1)
    first = {round(l["wavelength_nm"], 3): l for l in rendered.truth["lines"]}
    second = {round(l["wavelength_nm"], 3): l for l in rendered.truth["second_order_lines"]}
    assert 404.656 in second
    mapping = rendered.truth["mapping"]
    doubled = np.interp(second[404.656]["rectified_column_px"], mapping["rectified_column_px"], mapping["wavelength_nm"])
    assert doubled == pytest.approx(2 * 404.656, abs=0.02)
    assert 546.075 in first and 546.075 not in second  # 1092 nm in order 2 misses the sensor


def test_lamp_unit_draws_one_lamp_within_the_listed_tolerance():
    # The listed tolerances (calibration/lines/CFL-phosphor.csv: "+-1 nm", common practice, no source)
    # are the lamp-to-lamp spread the virtual bench draws from; 0 keeps the listed wavelengths.
    from benchspec.refdata import load_lamp
    from benchspec.simulate import source_spectrum

    lines = load_lamp("cfl").lines()
    listed = np.array([l.wavelength_nm for l in lines])
    tolerance = np.array([l.tolerance_nm for l in lines])
    assert np.array_equal(source_spectrum({"kind": "lamp", "name": "cfl"}).line_wavelength_nm, listed)
    one = source_spectrum({"kind": "lamp", "name": "cfl", "lamp_unit": 7}).line_wavelength_nm
    again = source_spectrum({"kind": "lamp", "name": "cfl", "lamp_unit": 7}).line_wavelength_nm
    other = source_spectrum({"kind": "lamp", "name": "cfl", "lamp_unit": 8}).line_wavelength_nm
    assert np.array_equal(one, again) and not np.array_equal(one, other)
    assert np.all(np.abs(one - listed) <= 5 * tolerance)
    # Atomic Hg lines (tolerance <= 0.01 nm) stay within a hundredth of a nanometre.
    assert np.all(np.abs(one - listed)[tolerance <= 0.01] <= 0.05)


def _rggb_sites(image, channel):
    """The pixels whose filter is ``channel`` in an RGGB mosaic (red at the top-left pixel)."""
    if channel == 0:
        return image[0::2, 0::2, 0]
    if channel == 2:
        return image[1::2, 1::2, 2]
    return np.concatenate([image[0::2, 1::2, 1].ravel(), image[1::2, 0::2, 1].ravel()])


def test_mosaic_keeps_each_filters_own_sample_and_interpolates_the_others_bilinearly():
    # The mosaic is applied after the noise draw, so with the same seed every pixel keeps its own
    # filter's value exactly. The missing colours follow bilinear demosaicing (the mean of the
    # nearest same-colour neighbours: the four diagonal red pixels at a blue site, the two
    # horizontal ones at a green site on a red row; common practice, no source).
    bench = simulate.Bench().with_(camera={"width_px": 320, "height_px": 180, "horizontal_fov_deg": 30.0},
                                   output={"gamma": "1", "bit_depth": 16}, noise={"adc_bits": 12})
    # OpenCV fills the outermost row and column from their neighbours: compare inside them (an even
    # offset keeps the pattern's phase)
    plain = simulate.render(bench, seed=3).linear[2:-2, 2:-2]
    mosaic = simulate.render(bench.with_(camera={"mosaic": "rggb"}), seed=3).linear[2:-2, 2:-2]
    for channel in range(3):
        np.testing.assert_array_equal(_rggb_sites(mosaic, channel), _rggb_sites(plain, channel))
    red = plain[..., 0]
    at_blue = 0.25 * (red[0:-2:2, 0:-2:2] + red[0:-2:2, 2::2] + red[2::2, 0:-2:2] + red[2::2, 2::2])
    np.testing.assert_allclose(mosaic[1:-1:2, 1:-1:2, 0], at_blue, atol=0.5)  # 16-bit result, rounded
    at_green = 0.5 * (red[0::2, 0:-2:2] + red[0::2, 2::2])
    np.testing.assert_allclose(mosaic[0::2, 1:-1:2, 0], at_green, atol=0.5)
    assert np.any(mosaic != plain)


def test_mosaic_needs_an_rgb_sensor_and_a_known_pattern():
    with pytest.raises(BenchFileError, match="mono sensor"):
        simulate._validate(simulate.Bench().with_(camera={"sensor": "mono", "mosaic": "rggb"}))
    with pytest.raises(BenchFileError, match="accepted: none, rggb"):
        simulate._validate(simulate.Bench().with_(camera={"mosaic": "bayer"}))
