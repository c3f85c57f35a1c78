"""A second process for work that a single Python interpreter cannot spread over two cores.

The wavelength search (:mod:`benchspec.wavecal`) spends most of its time in many small,
independent refinements driven from Python. Threads do not help there (the interpreter lock
serialises them), so a process that searches more than once starts one long-lived helper
process and hands it half of each batch of refinements while it works on the other half.

Design rules:

- The helper is never needed. Until it is ready, when it is busy (another thread holds it),
  when it fails or hangs, and in a process forked from its owner, every caller computes its
  share itself. The results are the same either way: callers split work into independent
  items and merge them in their original order.
- The helper runs the same code (it checks that it imported the same ``benchspec``) and may only
  call functions of ``benchspec`` modules registered in :data:`_ALLOWED`.
- A process that searches once (a one-shot ``benchspec calibrate``) never starts it: it is
  started by the second request (:func:`shared`), and is ready a few hundred milliseconds later.
- ``BENCHSPEC_HELPER=0`` in the environment, or a machine with one CPU, turns it off.

The helper is a child started with ``python -m benchspec.helper``; requests and answers are
pickled over its standard input and output (:class:`multiprocessing.connection.Connection`).
It exits when its input closes, i.e. when its owner exits.
"""

from __future__ import annotations

import atexit
import importlib
import os
import subprocess
import sys
import threading
import time
from multiprocessing.connection import Connection

__all__ = ["shared", "warm", "enabled", "cpu_seconds", "Helper", "close_shared"]

# (module, function) pairs the helper may call.
_ALLOWED = {
    ("benchspec.wavecal", "_quick_pass"),
    ("benchspec.wavecal", "_full_pass"),
    ("benchspec.wavecal", "_group_seeds"),
    ("benchspec.wavecal", "_first_assignments"),
    ("benchspec.helper", "_echo"),
}

# An answer slower than this means the helper is stuck: it is stopped and the caller works alone.
_ANSWER_TIMEOUT_S = 30.0


def enabled() -> bool:
    """Whether this process may use a helper (``BENCHSPEC_HELPER`` unset or not 0, and 2+ CPUs)."""
    if os.environ.get("BENCHSPEC_HELPER", "1").strip() in ("0", "false", "no", "off"):
        return False
    try:
        n_cpu = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n_cpu = os.cpu_count() or 1
    return n_cpu >= 2


class Helper:
    """One helper process. Use :func:`shared`; then ``submit`` and ``result`` under ``lock``."""

    def __init__(self):
        self.owner_pid = os.getpid()
        self.lock = threading.Lock()
        self.ready = False
        self.dead = False
        self._proc = None
        self._send = None
        self._recv = None
        self._pending = False
        self.cpu_s = 0.0  # CPU seconds the helper spent on this process's requests
        self._start()

    def _start(self) -> None:
        import benchspec

        root = os.path.dirname(os.path.dirname(os.path.abspath(benchspec.__file__)))
        env = dict(os.environ)
        env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        # One core for the helper: its numpy must not start thread pools of its own.
        for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
            env[name] = "1"
        env["BENCHSPEC_HELPER"] = "0"  # a helper has no helper
        try:
            self._proc = subprocess.Popen([sys.executable, "-m", "benchspec.helper"], stdin=subprocess.PIPE,
                                          stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, env=env,
                                          close_fds=True)
            self._send = Connection(os.dup(self._proc.stdin.fileno()), readable=False)
            self._recv = Connection(os.dup(self._proc.stdout.fileno()), writable=False)
            self._proc.stdin.close()
            self._proc.stdout.close()
        except (OSError, ValueError):
            self._fail()

    def poll_ready(self) -> bool:
        """True once the helper has said it is ready (never blocks)."""
        if self.ready or self.dead:
            return self.ready and not self.dead
        try:
            if self._recv.poll(0):
                message = self._recv.recv()
                import benchspec

                if message == ("ready", os.path.abspath(benchspec.__file__)):
                    self.ready = True
                else:  # another benchspec, or something else on its output: not ours to use
                    self._fail()
        except (OSError, EOFError, ValueError, TypeError):
            self._fail()
        return self.ready and not self.dead

    def submit(self, module: str, function: str, *args) -> bool:
        """Send one request; False (and nothing pending) if the helper cannot take it."""
        if self.dead or not self.ready or self._pending or (module, function) not in _ALLOWED:
            return False
        try:
            self._send.send((module, function, args))
        except (OSError, ValueError, TypeError, AttributeError):
            self._fail()
            return False
        self._pending = True
        return True

    def result(self):
        """(True, value) for the pending request, or (False, None) if it failed (compute it yourself)."""
        if not self._pending:
            return False, None
        self._pending = False
        try:
            if not self._recv.poll(_ANSWER_TIMEOUT_S):
                self._fail()
                return False, None
            status, value, cpu_s = self._recv.recv()
        except (OSError, EOFError, ValueError, TypeError, AttributeError):
            self._fail()
            return False, None
        self.cpu_s += float(cpu_s)
        if status != "ok":
            # A request the helper could not do is done again by the caller, whose error (if any)
            # then carries a full traceback.
            return False, None
        return True, value

    def _fail(self) -> None:
        self.dead = True
        self.ready = False
        self.close()

    def close(self) -> None:
        for conn in (self._send, self._recv):
            try:
                if conn is not None:
                    conn.close()
            except OSError:
                pass
        self._send = self._recv = None
        if self._proc is not None and os.getpid() == self.owner_pid:
            try:
                self._proc.kill()
                self._proc.wait(timeout=2)
            except (OSError, subprocess.TimeoutExpired):
                pass
        self._proc = None


_SHARED: Helper | None = None
_REQUESTS = 0
_SHARED_LOCK = threading.Lock()


def shared() -> Helper | None:
    """The process's helper if it is ready and free, locked for the caller; else None.

    The caller must release ``helper.lock`` when done. The first call only counts; the second
    starts the helper, which is used from the first call after it has become ready.
    """
    global _SHARED, _REQUESTS
    if not enabled():
        return None
    with _SHARED_LOCK:
        if _SHARED is not None and _SHARED.owner_pid != os.getpid():
            _SHARED = None  # forked from the owner: the pipes are not ours
        _REQUESTS += 1
        if _SHARED is None:
            if _REQUESTS < 2:
                return None
            _SHARED = Helper()
        helper = _SHARED
    if not helper.lock.acquire(blocking=False):
        return None
    if not helper.poll_ready():
        helper.lock.release()
        return None
    return helper


def warm(timeout_s: float = 30.0) -> bool:
    """Start the process's helper now and wait until it is ready (True) or has failed (False).

    For callers that know they will search many times (the speed benchmark, a session that
    recalibrates): the first searches then need not run alone while it starts.
    """
    global _SHARED
    if not enabled():
        return False
    with _SHARED_LOCK:
        if _SHARED is not None and _SHARED.owner_pid != os.getpid():
            _SHARED = None
        if _SHARED is None:
            _SHARED = Helper()
        worker = _SHARED
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        with worker.lock:
            if worker.poll_ready():
                return True
        if worker.dead:
            return False
        time.sleep(0.01)
    return False


def cpu_seconds() -> float:
    """CPU seconds the process's helper has spent on its requests (0 without one): add it to
    :func:`time.process_time` for the CPU cost of work it shared."""
    worker = _SHARED
    return worker.cpu_s if worker is not None and worker.owner_pid == os.getpid() else 0.0


def close_shared() -> None:
    """Stop the process's helper (it is started again when needed)."""
    global _SHARED, _REQUESTS
    with _SHARED_LOCK:
        helper, _SHARED = _SHARED, None
        _REQUESTS = 0
    if helper is not None and helper.owner_pid == os.getpid():
        helper.close()


atexit.register(close_shared)


def _echo(*args):
    return args


def _serve() -> None:
    """The helper's loop: answer requests until the input closes."""
    requests = Connection(os.dup(0), writable=False)
    answers = Connection(os.dup(1), readable=False)
    os.dup2(2, 1)  # anything printed goes to stderr, never into the answers
    import benchspec

    answers.send(("ready", os.path.abspath(benchspec.__file__)))
    while True:
        try:
            module, function, args = requests.recv()
        except (EOFError, OSError):
            return
        start = time.process_time()
        try:
            if (module, function) not in _ALLOWED:
                raise PermissionError(f"{module}.{function} is not a helper function")
            value = getattr(importlib.import_module(module), function)(*args)
            answers.send(("ok", value, time.process_time() - start))
        except Exception as exc:  # noqa: BLE001 - reported to the caller, who computes it again
            try:
                answers.send(("error", f"{type(exc).__name__}: {exc}", time.process_time() - start))
            except (OSError, ValueError):
                return


if __name__ == "__main__":
    # Importing wavecal before saying ready keeps the first request fast.
    importlib.import_module("benchspec.wavecal")
    _serve()
