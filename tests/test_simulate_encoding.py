"""The virtual bench's frames as a camera program hands them over (``as_written``) and its tilt default."""

import cv2
import numpy as np
import pytest

from benchspec import physics
from benchspec.errors import InputError
from benchspec.simulate import Bench, as_written, camera_tilt_deg, render, write_frame


def test_without_jpeg_the_frame_is_the_rendered_one():
    rendered = render(Bench(), seed=3, source="cfl")
    assert as_written(rendered) is rendered.image


def test_jpeg_round_trip_is_what_a_written_jpeg_reads_back_as(tmp_path):
    rendered = render(Bench(), seed=3, source="cfl")
    path = tmp_path / "frame.jpg"
    bench = Bench().with_(output={"jpeg_quality": 85})
    write_frame(rendered, path, bench=bench)
    read_back = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)[..., ::-1]
    in_memory = as_written(rendered, jpeg_quality=85)
    assert in_memory.shape == rendered.image.shape and in_memory.dtype == np.uint8
    assert np.array_equal(in_memory, read_back)
    # lossy: at quality 85 the frame changes, by a few DN at most where the band is lit (8-bit frames)
    difference = np.abs(in_memory.astype(int) - rendered.image.astype(int))
    assert 0 < difference.max() < 64


@pytest.mark.parametrize("quality", [5, 101, 80.5])
def test_jpeg_quality_out_of_range_is_refused(quality):
    with pytest.raises(InputError, match="jpeg_quality"):
        as_written(render(Bench(), seed=1, source="cfl"), jpeg_quality=quality)


def test_sixteen_bit_frames_cannot_be_jpeg():
    rendered = render(Bench().with_(output={"bit_depth": 16}), seed=1, source="cfl")
    with pytest.raises(InputError, match="8-bit"):
        as_written(rendered, jpeg_quality=90)


def test_default_tilt_points_the_camera_at_550_nm():
    # the grating equation (physics.diffraction_angle_deg) at 550 nm, 1000 lines/mm, first order
    bench = Bench()
    assert camera_tilt_deg(bench) == pytest.approx(physics.diffraction_angle_deg(550.0, lines_per_mm=1000.0, order=1,
                                                                                 incidence_deg=0.0))
    # d sin(beta) = m lambda: sin(beta) = 0.55 at 1000 lines/mm (textbook grating equation)
    assert camera_tilt_deg(bench) == pytest.approx(np.degrees(np.arcsin(0.55)), abs=1e-9)
    assert camera_tilt_deg(bench.with_(camera={"tilt_deg": 12.5})) == 12.5
