"""The viewer's per-frame processing (``gui.processing.BenchProcessor``), without a window.

Live frames get their line marks from the live finder (``lines.find_lines_quick``) on every
frame; a held frame or stack gets the full least-squares ``lines.find_lines``. Both must mark
the same strong lines. Invented virtual-bench frames; no outside reference values.
"""

import warnings

import numpy as np
import pytest

from benchspec import lines, simulate
from benchspec.errors import DegradedResultWarning
from benchspec.frames import stack_frames
from benchspec.gui import processing
from benchspec.gui.processing import BenchProcessor

BENCH = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 3.0},
                               slit={"height_px": 80.0})


@pytest.fixture(scope="module")
def cfl_frames():
    return [np.ascontiguousarray(simulate.render(BENCH, source="cfl", seed=s).image) for s in (5, 6, 7)]


def _counting(monkeypatch):
    calls = {"find_lines": 0, "find_lines_quick": 0}

    def wrap(name):
        original = getattr(lines, name)

        def counted(*args, **kwargs):
            calls[name] += 1
            return original(*args, **kwargs)
        monkeypatch.setattr(lines, name, counted)
    wrap("find_lines")
    wrap("find_lines_quick")
    return calls


def test_live_frames_use_the_quick_finder_every_frame_and_held_ones_the_full_fit(cfl_frames, monkeypatch):
    processor = BenchProcessor()
    calls = _counting(monkeypatch)
    live = [processor.live(frame, display_size=(320, 180), frame_index=k) for k, frame in enumerate(cfl_frames)]
    assert calls == {"find_lines": 0, "find_lines_quick": len(cfl_frames)}
    assert all(len(result.lines) >= 5 for result in live), [len(r.lines) for r in live]
    stacked = stack_frames(cfl_frames)
    held = processor.live(cfl_frames[-1], display_size=(320, 180), frame_index=-1, stacked=stacked)
    assert calls["find_lines"] == 1 and calls["find_lines_quick"] == len(cfl_frames)
    # the two finders mark the same strong lines: every held mark has a live mark within 1 px
    live_positions = np.array([m.position for m in live[-1].lines])
    held_positions = np.array([m.position for m in held.lines])
    assert len(held_positions) >= 5
    nearest = np.min(np.abs(held_positions[:, None] - live_positions[None, :]), axis=1)
    assert np.count_nonzero(nearest < 1.0) >= len(held_positions) - 2, (held_positions, live_positions)


def test_marks_on_the_wavelength_axis_are_named_after_the_lamp_lines(cfl_frames):
    processor = BenchProcessor()
    processor.live(cfl_frames[0], display_size=(320, 180), frame_index=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegradedResultWarning)
        processor.calibrate([cfl_frames[0]], lamp="cfl")
    result = processor.live(cfl_frames[1], display_size=(320, 180), frame_index=1)
    named = [m for m in result.lines if m.species]
    assert len(named) >= 3, [(m.position, m.species) for m in result.lines]
    for mark in named:  # a name is given only within 1.5 nm of the named reference line
        assert abs(mark.position - mark.reference_nm) <= 1.5
    # the same names as labelling each mark on its own
    assert [processor._label(m).species for m in result.lines] == [m.species for m in result.lines]


def test_the_live_finder_marks_nothing_on_a_dark_spectrum():
    assert processing._core_marks(np.arange(640.0), False, np.zeros(640), np.zeros(640, bool), np.ones(640),
                                  quick=True) == ()


def _display_line(geometry, row, scale, columns):
    """Where rectified ``row`` crosses display ``columns`` (display px, pixel centres on integers),
    through the geometry's own mapping: what a smooth line must follow."""
    u = np.linspace(-0.5, geometry.n_columns - 0.5, 4000)
    x, y = geometry.frame_coordinates(u, np.full(u.size, float(row)))
    return np.interp(columns, (x + 0.5) * scale - 0.5, (y + 0.5) * scale - 0.5)


def test_the_overlay_is_drawn_smooth_along_the_geometry_and_apart_from_the_background_shade(cfl_frames):
    processor = BenchProcessor()
    result = processor.live(cfl_frames[0], display_size=(320, 180))
    plain, scale = processing.prepare_display(cfl_frames[0], (320, 180))
    assert scale == result.display_scale
    drawn = result.display_image.astype(float) - plain.astype(float)
    assert not np.shares_memory(result.display_image, cfl_frames[0])
    geometry = processor.geometry
    columns = np.arange(16, 300)
    # Aperture edges (teal: green above red, unlike the amber outline and the violet shade) follow the
    # band's rotation and curvature: the teal centroid of each column within a quarter pixel of the
    # mapped edge. A line drawn in whole-pixel steps is up to half a pixel off (common practice, no source).
    teal = np.clip(drawn[..., 1] - drawn[..., 0], 0.0, None)
    for row in (geometry.aperture_rows[0] - 0.5, geometry.aperture_rows[1] - 0.5):
        expected = _display_line(geometry, row, scale, columns)
        errors = []
        for column, centre in zip(columns, expected):
            rows = np.arange(int(np.floor(centre)) - 2, int(np.ceil(centre)) + 3)
            weight = teal[rows, column]
            assert weight.sum() > 30, (column, centre)  # the edge is drawn in this column
            errors.append(np.sum(weight * rows) / weight.sum() - centre)
        assert np.max(np.abs(errors)) < 0.25, np.max(np.abs(errors))
    # The background strips are a violet shade (blue above green), the band outline an amber line (red
    # above blue) just outside the band: in no column does the outline's line sit on the shade.
    violet = drawn[..., 2] - drawn[..., 1]
    amber = drawn[..., 0] - drawn[..., 2]
    shade_rows = violet > 8.0
    assert shade_rows[:, columns].sum(axis=0).min() >= 2 * 8  # two strips, each several pixels tall
    for edge in (-0.5, geometry.n_rows - 0.5):
        expected = _display_line(geometry, edge, scale, columns)
        for column, centre in zip(columns, expected):
            rows = np.arange(int(round(centre)) - 3, int(round(centre)) + 4)
            peak = rows[int(np.argmax(amber[rows, column]))]
            assert amber[peak, column] > 60, (column, centre)
            assert not shade_rows[peak, column], (column, peak)


def test_residual_plot_limits_follow_the_residuals_and_their_error_bars():
    # two lines used, one rejected far off: the y range is the used lines' largest |residual| + 1-sigma
    rows = ({"wavelength_nm": 404.656, "residual_nm": 0.004, "uncertainty_nm": 0.02, "used": True},
            {"wavelength_nm": 546.075, "residual_nm": -0.010, "uncertainty_nm": 0.03, "used": True},
            {"wavelength_nm": 611.6, "residual_nm": 3.0, "uncertainty_nm": 0.5, "used": False})
    (low, high), reach = processing.residual_plot_limits(rows)
    assert reach == pytest.approx(0.040)
    assert low < 404.656 and high > 611.6 and high - low < 1.2 * (611.6 - 404.656)
