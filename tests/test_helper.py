"""The helper process that shares the wavelength search: same answers with it, without it, and when it fails.

The spectra are rendered from the packaged CFL line list (Hg I wavelengths from NIST ASD, see
calibration/) through the grating equation (tests/synthetic_lamp.py).
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from benchspec import helper, wavecal
from benchspec.lines import find_lines

from synthetic_lamp import cfl_continuum, lamp_lines, render


def _ready_helper(monkeypatch):
    monkeypatch.setenv("BENCHSPEC_HELPER", "1")
    monkeypatch.setattr(helper, "enabled", lambda: True)  # also on a one-CPU runner
    helper.close_shared()
    helper.shared()  # the first request only counts
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        worker = helper.shared()
        if worker is not None:
            worker.lock.release()
            return worker
        if helper._SHARED is not None and helper._SHARED.dead:
            break
        time.sleep(0.05)
    pytest.fail("the helper process did not become ready within 60 s")


def _solution(table):
    cal = wavecal.calibrate_lines(table, lamp="cfl")
    return cal, [(m.pixel, m.reference_nm, m.residual_nm, m.used_in_fit) for m in cal.matches]


@pytest.fixture
def cfl_table(rng):
    spectrum, truth = render(lamp_lines("cfl"), rng=rng, nm_per_px=0.6, n_pixels=1280, lines_per_mm=1000.0,
                             peak_counts=3000, continuum=cfl_continuum)
    return find_lines(spectrum), truth


def test_shared_search_gives_the_serial_answer(monkeypatch, cfl_table):
    table, truth = cfl_table
    monkeypatch.setenv("BENCHSPEC_HELPER", "0")
    assert helper.shared() is None
    serial, serial_matches = _solution(table)
    worker = _ready_helper(monkeypatch)
    calls = []
    original = worker.submit
    monkeypatch.setattr(worker, "submit", lambda *a: calls.append(a[1]) or original(*a))
    shared, shared_matches = _solution(table)
    helper.close_shared()
    # Every step of the search went through the helper, and the answer is bit for bit the same.
    assert {"_group_seeds", "_first_assignments", "_quick_pass", "_full_pass"} <= set(calls)
    np.testing.assert_array_equal(shared.solution.coefficients, serial.solution.coefficients)
    assert shared_matches == serial_matches
    # ... and right: Hg I 546.074 nm (NIST ASD) lands within 0.2 px of its rendered pixel.
    k = int(np.argmin(np.abs(truth["line_wavelength_nm"] - 546.074)))
    pixel = truth["line_pixel"][k]
    error_px = abs(float(shared.solution.wavelength_nm(pixel)) - 546.074) / float(shared.solution.dispersion_nm_per_px(pixel))
    assert error_px < 0.2


def test_a_helper_that_dies_changes_nothing(monkeypatch, cfl_table):
    table, _ = cfl_table
    monkeypatch.setenv("BENCHSPEC_HELPER", "0")
    serial, serial_matches = _solution(table)
    worker = _ready_helper(monkeypatch)
    worker._proc.kill()  # gone between two requests: the caller does the helper's share itself
    worker._proc.wait(timeout=10)
    shared, shared_matches = _solution(table)
    assert worker.dead
    np.testing.assert_array_equal(shared.solution.coefficients, serial.solution.coefficients)
    assert shared_matches == serial_matches
    helper.close_shared()


def test_helper_refuses_unlisted_functions(monkeypatch):
    worker = _ready_helper(monkeypatch)
    assert worker.lock.acquire(blocking=False)
    try:
        assert not worker.submit("os", "system", "true")
        assert worker.submit("benchspec.helper", "_echo", 1, "two")
        assert worker.result() == (True, (1, "two"))
    finally:
        worker.lock.release()
        helper.close_shared()


def test_helper_can_be_turned_off(monkeypatch):
    monkeypatch.setenv("BENCHSPEC_HELPER", "0")
    helper.close_shared()
    for _ in range(3):
        assert helper.shared() is None
    assert helper._SHARED is None
