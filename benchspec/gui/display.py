"""A virtual display (Xvfb) for running the viewer where there is no screen: CI, tests, measurements."""

from __future__ import annotations

import os
import shutil
import subprocess
import time

__all__ = ["start_virtual_display"]


def start_virtual_display(*, base: int = 90, size: str = "1280x900x24") -> tuple[str, subprocess.Popen] | None:
    """Start Xvfb on a free-ish display number and point ``DISPLAY`` at it.

    Returns ``(display, process)``; the caller terminates the process. Returns
    None when the Debian package xvfb is not installed.
    """
    xvfb = shutil.which("Xvfb")
    if xvfb is None:
        return None
    display = ":%d" % (base + os.getpid() % 100)
    proc = subprocess.Popen([xvfb, display, "-screen", "0", size, "-nolisten", "tcp"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    for _ in range(50):  # the server is ready once its socket exists (common practice, no source)
        if os.path.exists(f"/tmp/.X11-unix/X{display[1:]}"):
            break
        time.sleep(0.1)
    os.environ["DISPLAY"] = display
    return display, proc
