"""How the frames were stored (lossless or block-coded) and the centre floor the calibration takes from it.

JPEG codes 8x8 pixel blocks independently (ITU-T T.81, section A.2: the image is divided into
8x8 blocks for the DCT), so a decoded JPEG carries steps at one phase of the 8-pixel grid that
a lossless PNG (ISO/IEC 15948) cannot have.
"""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from benchspec import frames, simulate, wavecal
from benchspec.lines import LineTable


@pytest.fixture(scope="module")
def bench_frame():
    return simulate.render(simulate.Bench(), seed=3, source="cfl")


@pytest.mark.parametrize("quality", [70, 85, 95])
def test_jpeg_frames_are_block_coded(bench_frame, quality):
    image = simulate.as_written(bench_frame, jpeg_quality=quality)
    ratio = frames.block_edge_ratio(image)
    assert ratio > frames.BLOCK_EDGE_RATIO_LIMIT
    stacked = frames.stack_frames([image])
    assert stacked.settings["encoding"] == "block-coded"
    assert stacked.settings["block_edge_ratio"] == pytest.approx(ratio)


def test_png_frames_are_lossless(bench_frame):
    image = simulate.as_written(bench_frame, jpeg_quality=None)
    assert frames.block_edge_ratio(image) < frames.BLOCK_EDGE_RATIO_LIMIT
    assert frames.stack_frames([image]).settings["encoding"] == "lossless"


def test_a_crop_off_the_block_grid_is_still_seen(bench_frame):
    """The blocks' phase is searched, not assumed: a frame cropped by 3 px keeps its 8x8 steps."""
    image = simulate.as_written(bench_frame, jpeg_quality=90)[3:, 5:]
    assert frames.block_edge_ratio(image) > frames.BLOCK_EDGE_RATIO_LIMIT


def test_sixteen_bit_frames_are_lossless():
    """No common 16-bit image format is block-coded (common practice, no source)."""
    rng = np.random.default_rng(1)
    sixteen = rng.integers(1000, 20000, (64, 96), dtype=np.uint16)
    assert frames.stack_frames([sixteen], check=False).settings["encoding"] == "lossless"


def test_a_video_of_clean_frames_is_never_called_lossless(tmp_path):
    """Inter-frame codecs smooth their block edges (deblocking) but are lossy: a video file is "video".

    MJPG frames keep their block edges and come out "block-coded"; a frame of constant rows
    has no steps to show, so the file's kind decides.
    """
    path = tmp_path / "run.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30, (64, 48))
    for _ in range(3):
        frame = np.full((48, 64, 3), 40, np.uint8)
        frame[20:28] = 200
        writer.write(frame)
    writer.release()
    assert frames.load_stack(path).settings["encoding"] in ("video", "block-coded")


def _table(encoding):
    from benchspec.lines import Line

    line = Line(centre_px=100.0, centre_uncertainty_px=0.002, fwhm_px=3.0, peak=1000.0, area=3000.0, snr=500.0,
                kind="emission", blended=False, saturated=False, continuum=0.0)
    return LineTable((line,) * 3, "emission", 1.0, 5.0, 400, (0.0, 399.0), encoding=encoding)


def test_the_centre_floor_follows_the_encoding():
    """Lossless lines get the small floor; block-coded, video and unrecorded ones the common 0.03 px.

    0.03 px: common practice, no source; the lossless floor is measured (see wavecal).
    """
    sigma = {e: float(wavecal._peaks_from_table(_table(e)).sigma[0]) for e in ("lossless", "block-coded", "video", None)}
    assert sigma["lossless"] == pytest.approx(np.hypot(0.002, wavecal._CENTRE_FLOOR_LOSSLESS_PX))
    for other in ("block-coded", "video", None):
        assert sigma[other] == pytest.approx(np.hypot(0.002, 0.03))


def test_find_lines_carries_the_frames_encoding(bench_frame):
    from benchspec.extract import extract_stack
    from benchspec.geometry import measure_geometry
    from benchspec.lines import find_lines

    for quality, expected in ((None, "lossless"), (90, "block-coded")):
        stacked = frames.stack_frames([simulate.as_written(bench_frame, jpeg_quality=quality)])
        table = find_lines(extract_stack(stacked, measure_geometry(stacked.image)))
        assert table.encoding == expected


def test_extracted_spectra_record_the_encoding_their_lines_carry(bench_frame):
    """A spectrum from extract_frames states its frames' encoding (and keeps it in its CSV's provenance)."""
    import warnings

    from benchspec.lines import find_lines
    from benchspec.pipeline import calibrate_frames, extract_frames

    bench = simulate.Bench()
    lamp = [simulate.as_written(simulate.render(bench, seed=s, source="cfl"), jpeg_quality=None) for s in (1, 2)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        calibration = calibrate_frames(lamp, lamp="cfl")
    assert calibration.settings["encoding"] == "lossless"
    for quality, expected in ((None, "lossless"), (85, "block-coded")):
        spectrum = extract_frames([simulate.as_written(simulate.render(bench, seed=5, source="he"), jpeg_quality=quality)],
                                  calibration)
        assert spectrum.provenance["settings"]["encoding"] == expected
        assert find_lines(spectrum).encoding == expected
