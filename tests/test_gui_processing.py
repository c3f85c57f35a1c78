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
