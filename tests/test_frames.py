"""Frames in: reading, streaming, stacking, dark, linearising, channels, bad input."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from benchspec import frames
from benchspec.errors import FileFormatError, FrameError, InputError


def _band_frame(rng, *, height=60, width=80, peak=200, dtype=np.uint8, colour=True):
    """A small encoded frame with a bright horizontal band and some noise (invented test data)."""
    y = np.arange(height)[:, None]
    band = np.exp(-0.5 * ((y - height / 2) / 6.0) ** 2) * np.ones((1, width))
    full = np.iinfo(dtype).max
    value = 10 * full / 255 + peak * full / 255 * band + rng.normal(0, 0.5 * full / 255, (height, width))
    mono = np.clip(np.round(value), 0, full).astype(dtype)
    if not colour:
        return mono
    return np.stack([mono, (mono * 0.5).astype(dtype), (mono * 0.25).astype(dtype)], axis=2)


def _write(path, rgb, params=()):
    bgr = cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR) if rgb.ndim == 3 else rgb
    ok, encoded = cv2.imencode(path.suffix, bgr, list(params))
    assert ok
    path.write_bytes(encoded.tobytes())
    return path


# ------------------------------------------------------------------ reading


@pytest.mark.parametrize("suffix", [".png", ".tif", ".bmp"])
@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
@pytest.mark.parametrize("colour", [True, False])
def test_lossless_formats_round_trip_bit_exact(tmp_path, rng, suffix, dtype, colour):
    if suffix == ".bmp" and dtype == np.uint16:
        pytest.skip("BMP has no 16-bit mode")
    frame = _band_frame(rng, dtype=dtype, colour=colour)
    path = _write(tmp_path / f"frame{suffix}", frame)
    read = frames.read_image(path)
    assert read.dtype == dtype
    np.testing.assert_array_equal(read, frame)  # also checks RGB order survives


def test_jpeg_is_read_in_rgb_order(tmp_path, rng):
    frame = _band_frame(rng)
    path = _write(tmp_path / "frame.jpg", frame, (cv2.IMWRITE_JPEG_QUALITY, 95))
    read = frames.read_image(path).astype(float)
    # the red channel is the brightest in the test frame: order must not be BGR
    assert read[..., 0].mean() > read[..., 1].mean() > read[..., 2].mean()
    assert np.abs(read - frame).mean() < 3  # JPEG at quality 95 is close to the original


def test_non_ascii_path_is_read(tmp_path, rng):
    folder = tmp_path / "spektren_æøå_光谱"
    folder.mkdir()
    frame = _band_frame(rng)
    path = _write(folder / "lampe_ü.png", frame)
    np.testing.assert_array_equal(frames.read_image(path), frame)


def test_frame_above_pixel_limit_is_refused_before_decoding(tmp_path, rng, monkeypatch):
    path = _write(tmp_path / "big.png", _band_frame(rng))
    monkeypatch.setattr(frames, "_decode_image_bytes", lambda *a, **k: pytest.fail("decoded anyway"))
    with pytest.raises(FrameError, match=r"big.png is 80x60 .*above the .* limit; resize or crop"):
        frames.read_image(path, max_pixels=1000)


def test_default_pixel_limit_is_documented():
    assert frames.MAX_FRAME_PIXELS == 50_000_000
    assert "50 megapixels" in frames.__doc__


@pytest.mark.parametrize(
    "content, message",
    [
        (b"", r"empty \(0 bytes\)"),
        (b"this is a text file, not an image\n" * 10, r"not a readable image .*PNG"),
    ],
)
def test_empty_and_wrong_type_files(tmp_path, content, message):
    path = tmp_path / "frame.png"
    path.write_bytes(content)
    with pytest.raises(FileFormatError, match=message):
        frames.read_image(path)


@pytest.mark.parametrize("suffix, kind", [(".png", "PNG"), (".jpg", "JPEG")])
def test_truncated_files(tmp_path, rng, suffix, kind):
    path = _write(tmp_path / f"frame{suffix}", _band_frame(rng, width=200, height=150))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) * 2 // 3])
    with pytest.raises(FileFormatError, match=rf"frame{suffix} is a truncated {kind}.*save the frame again"):
        frames.read_image(path)


def test_corrupt_png_body(tmp_path, rng):
    path = _write(tmp_path / "frame.png", _band_frame(rng, width=200, height=150))
    data = bytearray(path.read_bytes())
    data[60:400] = bytes(340)  # wipe part of the compressed data, keep header and end chunk
    path.write_bytes(bytes(data))
    with pytest.raises(FileFormatError, match=r"frame.png (could not be decoded|: image header is damaged)"):
        frames.read_image(path)


def test_missing_file(tmp_path):
    with pytest.raises(FileFormatError, match=r"nothere.png: no such file"):
        frames.read_image(tmp_path / "nothere.png")


def test_folder_and_glob_are_read_in_name_order(tmp_path, rng):
    for i in (2, 0, 1):
        _write(tmp_path / f"f{i}.png", np.full((8, 8), 10 * i + 20, np.uint8))
    (tmp_path / "notes.txt").write_text("not a frame")
    by_folder = [f[0, 0] for f in frames.iter_frames(tmp_path)]
    by_glob = [f[0, 0] for f in frames.iter_frames(str(tmp_path / "f*.png"))]
    assert by_folder == by_glob == [20, 30, 40]


def test_empty_folder_and_unmatched_glob(tmp_path):
    with pytest.raises(FileFormatError, match=r"holds no image files"):
        frames.expand_sources(tmp_path)
    with pytest.raises(FileFormatError, match=r"matches no file"):
        frames.expand_sources(str(tmp_path / "*.png"))


def test_video_is_streamed_frame_by_frame(tmp_path):
    path = tmp_path / "run.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30, (64, 48))
    for i in range(6):
        writer.write(np.full((48, 64, 3), 30 * i + 20, np.uint8))
    writer.release()
    stream = frames.iter_video(path)
    assert iter(stream) is stream  # a generator, not a list held in memory
    levels = [float(f.mean()) for f in stream]
    assert len(levels) == 6
    np.testing.assert_allclose(levels, [30 * i + 20 for i in range(6)], atol=3)
    assert len(list(frames.iter_frames(path, max_frames=4))) == 4


def test_unreadable_video(tmp_path):
    path = tmp_path / "broken.mp4"
    path.write_bytes(b"\x00\x00\x00\x18ftypmp42" + bytes(200))
    with pytest.raises(FileFormatError, match=r"broken.mp4 (could not be opened as a video|: no frame could be decoded).*convert it"):
        list(frames.iter_video(path))


# ------------------------------------------------------------------ linearising and channels


def test_srgb_and_power_law_decoding():
    codes = np.array([0, 128, 255], np.uint8)
    # IEC 61966-2-1 sRGB: encoded 0.5 -> ((0.5 + 0.055) / 1.055) ** 2.4 = 0.21404 (formula of the standard).
    srgb = frames.linearise(codes, gamma="srgb") / 255
    np.testing.assert_allclose(srgb, [0.0, ((128 / 255 + 0.055) / 1.055) ** 2.4, 1.0], rtol=1e-6)
    assert abs(((0.5 + 0.055) / 1.055) ** 2.4 - 0.21404) < 1e-5
    power = frames.linearise(codes, gamma="2.2") / 255
    np.testing.assert_allclose(power, [0.0, (128 / 255) ** 2.2, 1.0], rtol=1e-6)
    np.testing.assert_array_equal(frames.linearise(codes, gamma="1"), codes.astype(np.float32))


def test_auto_gamma_is_srgb_for_8_bit_and_linear_for_16_bit(rng):
    eight = frames.stack_frames([_band_frame(rng)])
    sixteen = frames.stack_frames([_band_frame(rng, dtype=np.uint16)])
    assert eight.settings["gamma"] == "srgb" and eight.settings["gamma_requested"] == "auto"
    assert sixteen.settings["gamma"] == "1"
    assert sixteen.full_scale == 65535.0


def test_channel_choices(rng):
    frame = _band_frame(rng)
    lin = frames.linearise(frame, gamma="1")
    for channel, index in (("r", 0), ("g", 1), ("b", 2)):
        st = frames.stack_frames([frame], gamma="1", channel=channel)
        np.testing.assert_allclose(st.image, lin[..., index], rtol=1e-6)
    mean = frames.stack_frames([frame], gamma="1")
    np.testing.assert_allclose(mean.image, lin.mean(axis=2), rtol=1e-5)
    custom = frames.stack_frames([frame], gamma="1", channel_weights=(2, 1, 1))
    np.testing.assert_allclose(custom.image, lin @ np.array([0.5, 0.25, 0.25]), rtol=1e-5)
    assert custom.settings["channel_weights_rgb"] == [0.5, 0.25, 0.25]
    # Rec. 709 luma weights (ITU-R BT.709-6)
    assert frames.channel_weights_for("luma") == (0.2126, 0.7152, 0.0722)


def test_bad_settings_name_the_parameter(rng):
    frame = _band_frame(rng)
    with pytest.raises(InputError, match=r"`gamma` must be one of auto, 2.2, srgb, 1, was '2.4'"):
        frames.stack_frames([frame], gamma="2.4")
    with pytest.raises(InputError, match=r"`channel` must be one of mean, r, g, b, luma, was 'ir'"):
        frames.stack_frames([frame], channel="ir")
    with pytest.raises(InputError, match=r"`channel_weights` must be three non-negative"):
        frames.stack_frames([frame], channel_weights=(1, -1, 0))
    with pytest.raises(InputError, match=r"`method` must be 'mean' or 'median', was 'sum'"):
        frames.stack_frames([frame], method="sum")


# ------------------------------------------------------------------ stacking


def test_mean_stack_variance_matches_the_known_noise(rng):
    truth = np.full((40, 50), 1000.0)
    truth[15:25] = 20000.0
    sigma = 40.0
    stack = [np.clip(np.round(truth + rng.normal(0, sigma, truth.shape)), 0, 65535).astype(np.uint16) for _ in range(16)]
    st = frames.stack_frames(iter(stack))
    assert st.n_frames == 16
    np.testing.assert_allclose(st.image.mean(), truth.mean(), rtol=1e-3)
    # variance of the mean of 16 frames: sigma^2 / 16 on average (rounding adds 1/12 DN^2)
    assert st.variance.mean() == pytest.approx((sigma**2 + 1 / 12) / 16, rel=0.05)
    assert st.frame_variance.mean() == pytest.approx(sigma**2 + 1 / 12, rel=0.05)
    assert st.image.dtype == np.float32 and not st.image.flags.writeable


def test_median_rejects_flicker_and_hot_pixels(rng):
    base = np.full((30, 30), 2000, np.uint16)
    stack = [(base + np.round(rng.normal(10, 6, base.shape))).astype(np.uint16) for _ in range(7)]
    clean = frames.stack_frames(stack, method="median", check=False)
    stack[3] = stack[3] + 3000  # one flickering frame
    stack[5][10, 10] = 60000  # a hot pixel in one frame
    # a flat field is "blank" for the usability check, so skip it here
    median = frames.stack_frames(stack, method="median", check=False)
    mean = frames.stack_frames(stack, method="mean", check=False)
    assert abs(float(median.image.mean()) - 2010) < 5
    assert mean.image.mean() > 2400
    assert median.image[10, 10] < 2030
    assert median.settings["method"] == "median"
    # median variance ~ (pi/2) * sigma^2 / N (asymptotic variance of the median of normal samples,
    # a textbook result); MAD of 7 samples is noisy, hence the loose tolerance
    assert clean.variance.mean() == pytest.approx(np.pi / 2 * (36 + 1 / 12) / 7, rel=0.15)


def test_single_frame_has_no_variance(rng):
    st = frames.stack_frames([_band_frame(rng)])
    assert st.n_frames == 1 and st.variance is None and st.frame_variance is None


def test_dark_is_subtracted_and_its_variance_added(rng):
    dark_level = np.full((30, 40), 300.0)
    dark_level[5, 7] = 5000  # a hot pixel in every frame and in the dark
    darks = [np.round(dark_level + rng.normal(0, 10, dark_level.shape)).astype(np.uint16) for _ in range(8)]
    light = dark_level.copy()
    light[10:20] += 8000
    lights = [np.round(light + rng.normal(0, 10, light.shape)).astype(np.uint16) for _ in range(8)]
    dark = frames.stack_frames(darks, check=False)
    st = frames.stack_frames(lights, dark=dark)
    assert abs(float(st.image[0:8].mean())) < 2
    assert abs(float(st.image[5, 7])) < 30  # hot pixel removed
    assert abs(float(st.image[12:18].mean()) - 8000) < 3
    assert st.variance.mean() == pytest.approx(2 * 100 / 8, rel=0.15)
    assert st.settings["dark"]["n_frames"] == 8


def test_a_lamp_frame_given_as_the_dark_is_warned_about():
    """The demo's CFL frame with the helium tube's frame as its "dark": a warning that names it.

    A real dark (the demo's own, lens capped) leaves only noise, and no warning. Invented demo
    frames (demo_images/, rendered by the virtual bench).
    """
    import warnings as _warnings
    from pathlib import Path

    from benchspec.errors import DegradedResultWarning

    demo = Path(frames.__file__).resolve().parent.parent / "demo_images"
    with _warnings.catch_warnings():
        _warnings.simplefilter("error", DegradedResultWarning)
        frames.load_stack(demo / "cfl_1.png", dark=demo / "dark.png")
    with pytest.warns(DegradedResultWarning, match=r"tube_A.jpg is brighter than the frames .*check --dark"):
        frames.load_stack(demo / "cfl_1.png", dark=demo / "tube_A.jpg")


def test_dark_of_another_size(rng):
    dark = frames.stack_frames([np.zeros((10, 10), np.uint16)], check=False)
    with pytest.raises(FrameError, match=r"the dark is 10x10 but the frames are 80x60"):
        frames.stack_frames([_band_frame(rng, dtype=np.uint16, colour=False)], dark=dark)


def test_frames_of_different_sizes(rng):
    with pytest.raises(FrameError, match=r"frame 2 is 40x30 but the first frame is 80x60"):
        frames.stack_frames([_band_frame(rng), _band_frame(rng, height=30, width=40)])


def test_saturation_mask_any_channel_any_frame(rng):
    a = _band_frame(rng)
    b = a.copy()
    b[3, 4, 2] = 255  # blue saturated in the second frame only
    a[5, 6, 0] = 255
    st = frames.stack_frames([a, b])
    assert st.saturated[3, 4] and st.saturated[5, 6]
    assert st.saturated.sum() == int(((a == 255) | (b == 255)).any(axis=2).sum())


@pytest.mark.parametrize(
    "frame, message",
    [
        (np.zeros((50, 60), np.uint8), r"the frame is black .*check the lamp is on"),
        (np.full((50, 60), 120, np.uint8), r"the frame is blank .*no spectrum is in view"),
        (np.full((50, 60, 3), 255, np.uint8), r"100% of the pixels are saturated; shorten the exposure"),
    ],
)
def test_unusable_stacks(frame, message):
    with pytest.raises(FrameError, match=message):
        frames.stack_frames([frame])


def test_no_frames():
    with pytest.raises(FrameError, match=r"no frames to stack"):
        frames.stack_frames([])


def test_input_frames_are_not_modified(rng):
    frame = _band_frame(rng)
    copy = frame.copy()
    frames.stack_frames([frame, frame], method="median")
    np.testing.assert_array_equal(frame, copy)


def test_load_stack_records_hashes_and_reads_darks(tmp_path, rng):
    import hashlib

    paths = [_write(tmp_path / f"lamp_{i}.png", _band_frame(rng, dtype=np.uint16)) for i in range(3)]
    dark_path = _write(tmp_path / "dark.tiff", np.full((60, 80, 3), 600, np.uint16))
    st = frames.load_stack(paths, dark=[dark_path])
    assert st.n_frames == 3
    assert st.input_files == tuple(str(p) for p in paths)
    assert st.input_sha256 == tuple(hashlib.sha256(p.read_bytes()).hexdigest() for p in paths)
    assert st.settings["dark"]["sha256"] == [hashlib.sha256(dark_path.read_bytes()).hexdigest()]
    raw = np.mean([frames.read_image(p).astype(float).mean(axis=2) for p in paths], axis=0)
    np.testing.assert_allclose(st.image, raw - 600, atol=0.01)


def test_preparer_matches_stack_of_one(rng):
    frame = _band_frame(rng)
    prepared, saturated = frames.FramePreparer(gamma="srgb").prepare(frame)
    st = frames.stack_frames([frame], gamma="srgb")
    np.testing.assert_allclose(prepared, st.image, rtol=1e-6, atol=1e-6)
    np.testing.assert_array_equal(saturated, st.saturated)


def test_load_stack_streams_a_video_and_hashes_it(tmp_path):
    import hashlib

    path = tmp_path / "lamp.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30, (64, 48))
    for i in range(5):
        frame = np.full((48, 64, 3), 40, np.uint8)
        frame[20:28] = 200
        writer.write(frame)
    writer.release()
    st = frames.load_stack(path, max_frames=4)
    assert st.n_frames == 4
    assert st.input_sha256 == (hashlib.sha256(path.read_bytes()).hexdigest(),)
    assert st.image[24].mean() > 5 * st.image[5].mean()


def test_identical_frames_fall_back_to_the_noise_model(rng):
    # A repeated still has no frame-to-frame scatter; a zero variance would claim infinite SNR.
    frame = _band_frame(rng)
    stacked = frames.stack_frames([frame, frame.copy(), frame.copy()])
    assert stacked.variance is None
    assert "identical" in stacked.settings["variance_note"]
