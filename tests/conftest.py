"""Shared test fixtures.

External references used across the suite are named beside each check.
"""

from __future__ import annotations

import os

import numpy as np
import pytest


@pytest.fixture
def rng():
    """A seeded generator: every test's random data is repeatable."""
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def xdisplay():
    """A display for GUI tests: the existing DISPLAY, or an Xvfb started for the session."""
    if os.environ.get("DISPLAY"):
        yield os.environ["DISPLAY"]
        return
    from benchspec.gui.display import start_virtual_display

    started = start_virtual_display(base=90)
    if started is None:
        pytest.skip("GUI tests need Xvfb (Debian package xvfb); .ci/run installs it")
    display, proc = started
    try:
        yield display
    finally:
        proc.terminate()
        proc.wait(timeout=5)
        os.environ.pop("DISPLAY", None)
