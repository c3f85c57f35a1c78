"""Threads behind the viewer: one reads the source, one processes; the Tk thread only draws.

Frames flow through one-slot mailboxes that keep the newest item, so when
processing or drawing falls behind, old frames are dropped instead of queued
(the view stays current rather than lagging). Jobs (stack, dark, calibrate,
identify, save) go through a queue to the processing thread and their
outcomes come back as events the window polls for.
"""

from __future__ import annotations

import queue
import threading
import time
import traceback
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from ..errors import BenchspecError, SourceError
from ..sources import FrameSource

__all__ = ["Mailbox", "Event", "LiveWorker"]


class Mailbox:
    """Holds the newest item only; ``put`` replaces, ``take`` empties. Counts what was dropped."""

    def __init__(self):
        self._item = None
        self._full = False
        self._cond = threading.Condition()
        self.dropped = 0

    def put(self, item) -> None:
        with self._cond:
            if self._full:
                self.dropped += 1
            self._item, self._full = item, True
            self._cond.notify()

    def take(self, timeout: float | None = None):
        with self._cond:
            if not self._full and timeout:
                self._cond.wait(timeout)
            if not self._full:
                return None
            item, self._item, self._full = self._item, None, False
            return item


@dataclass(frozen=True)
class Event:
    """Something the window must hear about: a job finished or failed, the source ended or was lost."""

    kind: str              # "job", "ended", "lost", "collected"
    name: str = ""         # job name
    ok: bool = True
    value: Any = None
    message: str = ""


@dataclass
class _Collection:
    count: int
    purpose: str
    then: Callable[[list[np.ndarray], str], Any] | None
    frames: list = field(default_factory=list)


class LiveWorker:
    """Reads ``source`` and runs ``process`` on the newest frame, off the Tk thread.

    Parameters
    ----------
    source : FrameSource
        Owned by the worker from now on: it is closed when the worker stops.
    process : callable
        ``process(frame) -> result`` for live frames (the processor's fast path).
    """

    def __init__(self, source: FrameSource, process: Callable[[Any], Any]):
        self.source = source
        self._process = process
        self.frames = Mailbox()        # newest raw frame, for processing
        self.results = Mailbox()       # newest processed result, for drawing
        self.events: "queue.Queue[Event]" = queue.Queue()
        self._jobs: "queue.Queue[tuple[str, Callable[[], Any]]]" = queue.Queue()
        self._stop = threading.Event()
        self._paused = threading.Event()   # live processing paused (e.g. a held spectrum)
        self._collect: _Collection | None = None
        self._collect_lock = threading.Lock()
        self.last_frame = None
        self.frames_read = 0
        self.frames_processed = 0
        self.process_time_s = 0.0
        self.recent_process_s: list[float] = []   # the last 60 live processing times
        self.source_state = "running"
        self._reader = threading.Thread(target=self._read_loop, name="benchspec-reader", daemon=True)
        self._worker = threading.Thread(target=self._work_loop, name="benchspec-processing", daemon=True)

    # ------------------------------------------------------------------ control (Tk thread)
    def start(self) -> "LiveWorker":
        self._reader.start()
        self._worker.start()
        return self

    def stop(self, *, timeout: float = 1.0) -> None:
        """Stop both threads; the reader closes the source when it exits."""
        self._stop.set()
        self._jobs.put(("", lambda: None))  # wake the processing thread
        self._reader.join(timeout)
        self._worker.join(timeout)
        if not self._reader.is_alive():
            return
        # A camera read can block; the daemon reader closes the source when it returns.

    @property
    def running(self) -> bool:
        return not self._stop.is_set()

    def pause_live(self, paused: bool) -> None:
        if paused:
            self._paused.set()
        else:
            self._paused.clear()

    def submit(self, name: str, job: Callable[[], Any]) -> None:
        """Run ``job()`` on the processing thread; its outcome arrives as an Event named ``name``."""
        self._jobs.put((name, job))

    def collect(self, count: int, purpose: str, then: Callable[[list, str], Any] | None = None) -> None:
        """Gather the next ``count`` frames; then run ``then(frames, stop_reason)`` as job ``purpose``.

        When the source ends or is lost first, ``then`` gets the frames read so
        far and the reason; they are never thrown away.
        """
        with self._collect_lock:
            self._collect = _Collection(int(count), purpose, then)
        if self.source_state != "running":
            self._finish_collection(f"the source is {self.source_state}")

    @property
    def collecting(self) -> tuple[str, int, int] | None:
        c = self._collect
        return None if c is None else (c.purpose, len(c.frames), c.count)

    # ------------------------------------------------------------------ threads
    def _finish_collection(self, reason: str) -> None:
        with self._collect_lock:
            collection, self._collect = self._collect, None
        if collection is None:
            return
        frames = list(collection.frames)
        if collection.then is None:
            self.events.put(Event("collected", collection.purpose, True, (frames, reason)))
        else:
            then = collection.then
            self.submit(collection.purpose, lambda: then(frames, reason))

    def _read_loop(self) -> None:
        try:
            while not self._stop.is_set():
                try:
                    frame = self.source.read()
                except SourceError as exc:
                    self.source_state = "lost"
                    self._finish_collection(str(exc))
                    self.events.put(Event("lost", ok=False, message=str(exc)))
                    return
                except Exception as exc:  # a driver fault: report it as a lost source, keep the frames
                    self.source_state = "lost"
                    message = f"the source failed ({type(exc).__name__}: {exc}); the frames captured so far are kept"
                    self._finish_collection(message)
                    self.events.put(Event("lost", ok=False, message=message))
                    return
                if frame is None:
                    self.source_state = "ended"
                    self._finish_collection(f"the {self.source.kind} ended")
                    self.events.put(Event("ended", message=f"the {self.source.kind} ended after "
                                                          f"{self.frames_read} frames; the last frame stays on screen"))
                    return
                self.frames_read += 1
                self.last_frame = frame
                with self._collect_lock:
                    collection = self._collect
                    if collection is not None:
                        collection.frames.append(frame.image)
                        done = len(collection.frames) >= collection.count
                    else:
                        done = False
                if done:
                    self._finish_collection("")
                self.frames.put(frame)
        finally:
            try:
                self.source.close()
            except Exception:
                pass

    def _work_loop(self) -> None:
        while not self._stop.is_set():
            try:
                name, job = self._jobs.get_nowait()
            except queue.Empty:
                name, job = None, None
            if job is not None:
                if not name:
                    continue
                self._run_job(name, job)
                continue
            frame = self.frames.take(timeout=0.02)
            if frame is None or self._paused.is_set():
                continue
            started = time.perf_counter()
            try:
                result = self._process(frame)
            except BenchspecError as exc:
                self.events.put(Event("job", "live", False, message=str(exc)))
                time.sleep(0.2)  # do not flood the log with the same complaint
                continue
            except Exception as exc:  # pragma: no cover - a bug; report, keep running
                self.events.put(Event("job", "live", False, message=f"live processing failed: {exc!r}",
                                      value=traceback.format_exc()))
                time.sleep(0.2)
                continue
            spent = time.perf_counter() - started
            self.process_time_s += spent
            self.recent_process_s.append(spent)
            if len(self.recent_process_s) > 60:
                del self.recent_process_s[:-60]
            self.frames_processed += 1
            self.results.put(result)

    def _run_job(self, name: str, job: Callable[[], Any]) -> None:
        try:
            value = job()
        except BenchspecError as exc:
            self.events.put(Event("job", name, False, message=str(exc)))
        except Exception as exc:
            self.events.put(Event("job", name, False, message=f"{name} failed: {exc!r}", value=traceback.format_exc()))
        else:
            self.events.put(Event("job", name, True, value))
