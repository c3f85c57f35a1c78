"""Shared test fixtures.

External references used across the suite are named beside each check.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import time

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
    xvfb = shutil.which("Xvfb")
    if xvfb is None:
        pytest.skip("GUI tests need Xvfb (Debian package xvfb); .ci/run installs it")
    display = ":%d" % (90 + os.getpid() % 100)
    proc = subprocess.Popen([xvfb, display, "-screen", "0", "1280x900x24", "-nolisten", "tcp"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    for _ in range(50):
        if os.path.exists(f"/tmp/.X11-unix/X{display[1:]}"):
            break
        time.sleep(0.1)
    os.environ["DISPLAY"] = display
    try:
        yield display
    finally:
        proc.terminate()
        proc.wait(timeout=5)
        os.environ.pop("DISPLAY", None)
