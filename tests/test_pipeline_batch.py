"""The batch path (``extract --each``: ``pipeline.iter_extract_frames`` on a video) against slower references.

A video's frames are decoded on a second thread and stay in the decoder's B, G, R order
(the channel weights are reversed instead); the decoding thread may also linearise frames
(``pipeline._PREPARE_AHEAD``). None of that may change a spectrum: the references are the same frames decoded to
RGB and given as arrays (``extract_frames(..., each=True)``, no second thread), and one
``LiveExtractor`` applied frame by frame. Differences allowed: float32 rounding of the sums
(relative 1e-6 of the spectrum's largest value), nothing more. Invented virtual-bench frames,
no outside reference values.
"""

import dataclasses
import warnings

import cv2
import numpy as np
import pytest

from benchspec import extract, frames, pipeline, simulate
from benchspec.errors import DegradedResultWarning

BENCH = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                               slit={"height_px": 80.0})
N_FRAMES = 7


@pytest.fixture(scope="module")
def video(tmp_path_factory):
    """A 7-frame Motion-JPEG video of two CFL renders, and its frames decoded to RGB."""
    cfl = [np.ascontiguousarray(simulate.render(BENCH, source="cfl", seed=s).image) for s in (3, 4)]
    path = tmp_path_factory.mktemp("batch") / "series.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30.0, (640, 360), True)
    for k in range(N_FRAMES):
        writer.write(np.ascontiguousarray(cfl[k % 2][:, :, ::-1]))
    writer.release()
    return path, list(frames.iter_video(path)), cfl[0]


@pytest.fixture(scope="module")
def mean_calibration(video):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        return pipeline.calibrate_frames(video[2], lamp="cfl")


def _calibrate(calibration, channel):
    """The calibration with another channel setting: the series combine the channels so (geometry kept)."""
    return dataclasses.replace(calibration, settings=dict(calibration.settings, channel=channel))


def _series(source, calibration, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        return list(pipeline.iter_extract_frames(source, calibration, **kwargs))


def _assert_same(spectra, expected):
    assert len(spectra) == len(expected)
    for a, b in zip(spectra, expected):
        scale = float(np.max(np.abs(b.intensity)))
        np.testing.assert_array_equal(a.wavelength_nm, b.wavelength_nm)
        np.testing.assert_array_equal(a.wavelength_uncertainty_nm, b.wavelength_uncertainty_nm)
        np.testing.assert_allclose(a.intensity, b.intensity, rtol=1e-6, atol=1e-6 * scale)
        np.testing.assert_allclose(a.uncertainty, b.uncertainty, rtol=1e-6, atol=1e-6 * float(np.max(b.uncertainty)))
        np.testing.assert_array_equal(a.saturated, b.saturated)


def test_bgr_decoding_gives_the_rgb_frames_reversed(video):
    path, decoded, _ = video
    raw = list(frames.iter_video(path, bgr=True))
    assert len(raw) == len(decoded)
    for bgr, rgb in zip(raw, decoded):
        np.testing.assert_array_equal(bgr[:, :, ::-1], rgb)


# "luma" and "r" weigh the channels unequally: a channel-order mistake would show there
@pytest.mark.parametrize("channel", ["mean", "luma", "r"])
def test_video_series_equals_extract_frames_of_the_decoded_frames(video, channel, mean_calibration):
    path, decoded, first = video
    calibration = _calibrate(mean_calibration, channel)
    from_video = _series(str(path), calibration, band_check_every=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        from_arrays = pipeline.extract_frames(decoded, calibration, each=True)
    _assert_same(from_video, from_arrays)
    assert [s.provenance["frames"][0]["frame_index"] for s in from_video] == list(range(N_FRAMES))
    assert [s.provenance["time_series_index"] for s in from_video] == list(range(N_FRAMES))
    # and frame by frame through one live extractor (the noise model of the first frame, as the series)
    noise = extract.estimate_noise_model(frames.stack_frames([decoded[0]], channel=channel),
                                         geometry=calibration.geometry)
    live = extract.LiveExtractor(calibration.geometry, noise_model=noise, method="optimal",
                                 preparer=frames.FramePreparer(channel=channel))
    _assert_same(from_video, [pipeline.apply_calibration(live.process_raw(f), calibration) for f in decoded])


# 0: the decoding thread prepares every frame it can; 10**6: none; None (the default): it only decodes
@pytest.mark.parametrize("ahead", [0, 10**6, None])
def test_which_thread_prepares_a_frame_does_not_change_the_spectra(video, monkeypatch, ahead, mean_calibration):
    path, decoded, first = video
    calibration = _calibrate(mean_calibration, "luma")
    reference = _series(decoded, calibration)
    monkeypatch.setattr(pipeline, "_PREPARE_AHEAD", ahead)
    _assert_same(_series(str(path), calibration), reference)


def test_a_dark_is_subtracted_alike_from_video_and_array_frames(video, mean_calibration):
    path, decoded, first = video
    calibration = _calibrate(mean_calibration, "luma")
    dark = [np.full_like(first, 6), np.full_like(first, 8)]
    _assert_same(_series(str(path), calibration, dark=dark), _series(decoded, calibration, dark=dark))
    # the dark changes the spectra (so the comparison above compares something)
    plain = _series(decoded[:1], calibration)[0]
    darkened = _series(decoded[:1], calibration, dark=dark)[0]
    assert not np.allclose(plain.intensity, darkened.intensity, rtol=1e-3)


def test_live_extractor_bgr_frames_equal_rgb_frames(video, mean_calibration):
    _, decoded, first = video
    calibration = _calibrate(mean_calibration, "luma")
    live = extract.LiveExtractor(calibration.geometry, noise_model=extract.NoiseModel(50.0, 1.0), method="optimal",
                                 preparer=frames.FramePreparer(channel="luma"))
    for frame in decoded[:2]:
        bgr = np.ascontiguousarray(frame[:, :, ::-1])
        rgb_result = live.process_raw_arrays(frame)
        bgr_result = live.process_raw_arrays(bgr, bgr=True)
        prepared = live.process_prepared(*live.prepare_raw(bgr, bgr=True))
        scale = float(np.max(np.abs(rgb_result[0])))
        for got in (bgr_result, prepared):
            np.testing.assert_allclose(got[0], rgb_result[0], rtol=1e-6, atol=1e-6 * scale)
            np.testing.assert_allclose(got[1], rgb_result[1], rtol=1e-6)
            np.testing.assert_array_equal(got[2], rgb_result[2])
        # the channels really are weighed unequally: the frame read as RGB gives another spectrum
        wrong = live.process_raw_arrays(bgr)
        assert not np.allclose(wrong[0], rgb_result[0], rtol=1e-3, atol=1e-3 * scale)


def test_frames_decoded_ahead_are_bounded_by_bytes_while_setting_up_then_by_count():
    """While the consumer sets up, the decoding thread runs past ``depth`` frames up to the byte budget."""
    import time

    produced = []

    def frames_of_one_megabyte(n):
        for k in range(n):
            produced.append(k)
            yield None, k, np.full(1_000_000, k % 256, np.uint8), False

    def wait_for(count):
        deadline = time.monotonic() + 10.0
        while len(produced) < count and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(0.05)
        return len(produced)

    work: dict = {"ahead": 10**6}  # no "prepare" yet: the consumer is setting up
    ahead = pipeline._decoded_ahead(frames_of_one_megabyte(40), depth=2, work=work, max_bytes=5_500_000)
    first = next(ahead)
    # 5 waiting (5.5 MB), one taken, one in the producer's hands: past depth=2, no further than the budget
    assert wait_for(7) == 7
    work["prepare"] = lambda frame, bgr, buffers: (frame, None)  # set up: from now on at most depth=2 wait
    seen = [first]
    for _ in range(5):  # the five waiting frames
        seen.append(next(ahead))
    assert wait_for(9) == 9  # frames 6 and 7 waiting (depth=2), frame 8 in hand
    seen += list(ahead)
    assert [int(item[1]) for item in seen] == list(range(40))  # every frame once, in order
    assert all(int(item[2][0]) == item[1] % 256 for item in seen)


def test_an_error_while_decoding_ahead_reaches_the_consumer_after_the_frames_before_it():
    def failing():
        yield np.zeros(10, np.uint8)
        raise OSError("disk went away")

    ahead = pipeline._decoded_ahead(failing())
    assert next(ahead).size == 10
    with pytest.raises(OSError, match="disk went away"):
        next(ahead)


def test_buffers_prepared_ahead_are_not_overwritten_while_waiting_or_in_use():
    """The decoding thread reuses a ring of buffers; across busy spells (band checks) none is overwritten early."""
    import time

    def numbered(n):
        for k in range(n):
            yield None, k, np.full(200_000, k, np.int32), False

    def prepare(frame, bgr, buffers):
        image = buffers.setdefault("image", np.empty(frame.shape, np.int32))
        image[...] = frame  # the frame's number, written into a reused buffer
        return image, None

    work: dict = {"ahead": 0}
    ahead = pipeline._decoded_ahead(numbered(300), depth=3, work=work, max_bytes=20_000_000)
    work["prepare"] = prepare
    prepared = 0
    for path, index, frame, bgr, ready in ahead:
        if ready is not None:
            prepared += 1
            assert np.all(ready[0] == index)  # still this frame's numbers
        if index % 37 == 0:  # a busy spell: the decoding thread may run up to 20 MB (12 frames) ahead
            work["busy"] = True
            work["wake"]()
            time.sleep(0.02)
            work["busy"] = False
        if ready is not None and index % 5 == 0:
            time.sleep(0.002)  # hold the buffer a while, as an extraction does
            assert np.all(ready[0] == index)
    assert prepared > 100  # the decoding thread did prepare most frames
