"""A FigureCanvasTkAgg whose full redraws run on a helper thread.

A full matplotlib redraw of a plot with axes, ticks and a dozen labels takes
100-200 ms on this class of machine, too long to block the Tk thread. Agg
rendering needs no Tk, so :class:`ThreadedCanvas` renders on a helper thread
and the Tk thread only copies the finished pixels to the screen (a few ms).
While a render runs, the Tk thread leaves the figure alone (:attr:`rendering`)
and resizes wait until it is done.
"""

from __future__ import annotations

import logging
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Callable

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_tkagg import FigureCanvasTkAgg

__all__ = ["ThreadedCanvas"]

log = logging.getLogger("benchspec.viewer")


class ThreadedCanvas(FigureCanvasTkAgg):
    """FigureCanvasTkAgg with asynchronous full redraws; call :meth:`poll` from the Tk thread often."""

    def __init__(self, figure, master, executor: ThreadPoolExecutor):
        self._executor = executor
        self._future: Future | None = None
        self._again = False
        self._pending_resize: tuple[int, int] | None = None
        self.on_rendered: Callable[[], None] | None = None
        self.render_count = 0
        super().__init__(figure, master=master)

    @property
    def rendering(self) -> bool:
        """True while a render runs: do not touch the figure or its renderer."""
        return self._future is not None

    # Every redraw request (first show, resize, draw_idle) goes to the helper thread.
    def draw(self):
        self.render_async()

    def draw_idle(self):
        self.render_async()

    def draw_now(self):
        """A synchronous redraw (for saving or tests); waits for a running render first."""
        if self._future is not None:
            self._future.result()
            self._future = None
        FigureCanvasAgg.draw(self)
        self.blit()

    def wait(self) -> None:
        """Let a running render finish and show it (Tk thread), before changing the figure."""
        if self._future is not None:
            self._future.result()
            self.poll()

    def render_async(self) -> None:
        if self._future is not None:
            self._again = True
            return
        self._future = self._executor.submit(FigureCanvasAgg.draw, self)

    def _resize_figure_for_canvas_size(self, width, height):
        if self._future is not None:
            self._pending_resize = (width, height)
            return
        super()._resize_figure_for_canvas_size(width, height)

    def poll(self) -> bool:
        """Show a finished render (Tk thread). True when one was shown."""
        future = self._future
        if future is None or not future.done():
            return False
        self._future = None
        try:
            future.result()
        except Exception:  # pragma: no cover - a matplotlib fault; keep the window alive
            log.exception("plot rendering failed")
            return False
        if self._pending_resize is not None:
            size, self._pending_resize = self._pending_resize, None
            super()._resize_figure_for_canvas_size(*size)  # queues a fresh render
            return False
        self.render_count += 1
        self.blit()
        if self.on_rendered is not None:
            self.on_rendered()
        if self._again:
            self._again = False
            self.render_async()
        return True
