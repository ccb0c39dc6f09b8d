"""The console side of a run: one line per stage with the elapsed time, a heartbeat while
a long stage runs, and a stage's failure recorded and said without stopping the run."""

from __future__ import annotations

import logging
import re
import sys
import threading
import time
import weakref
from contextlib import contextmanager

__all__ = ["Progress", "HEARTBEAT", "isolated"]

_LOG = logging.getLogger("bayespanel")


#: seconds without a progress line after which the last stage is said to be still running
HEARTBEAT = 10.0


class Progress:
    """Stage lines with elapsed time, to a stream (stderr on the command line).

    A stage that runs longer than :data:`HEARTBEAT` seconds without a line of its own
    (sampling a model, LOO of many points, drawing the figures) gets a line saying it is
    still running, every ``HEARTBEAT`` seconds, from a daemon thread that ends with the
    object (it holds only a weak reference).
    """

    def __init__(self, stream=None, quiet=False, heartbeat=HEARTBEAT):
        self.stream = stream if stream is not None else sys.stderr
        self.quiet = quiet
        self.t0 = time.perf_counter()
        self.heartbeat = heartbeat
        self._stage = None  # the last stage line, when it began, when a line was printed
        self._began = self._printed = self.t0
        self._lock = threading.Lock()
        self._beat = None

    def __call__(self, msg: str):
        if self.quiet:
            return
        with self._lock:
            self._print(msg)
            self._stage, self._began = _stage_name(msg), self._printed
        if self._beat is None and self.heartbeat:
            self._beat = threading.Thread(target=_heartbeat, args=(weakref.ref(self),),
                                          name="bayespanel-progress", daemon=True)
            self._beat.start()

    def _print(self, msg: str):
        self._printed = time.perf_counter()
        print(f"[{self._printed - self.t0:6.1f} s] {msg}", file=self.stream, flush=True)

    def _idle(self):
        """A line saying the last stage is still running, after ``heartbeat`` silent s."""
        with self._lock:
            if self._stage is not None and time.perf_counter() - self._printed >= self.heartbeat:
                self._print(f"  ... still running: {self._stage} "
                            f"({time.perf_counter() - self._began:.0f} s)")


def _stage_name(msg: str) -> str:
    """A stage line shortened for the heartbeat: ``sampling pooled: 4 chains x ...`` ->
    ``sampling pooled``; a closing parenthesis dropped (``LOO of x ... (PSIS, 816 points)``)."""
    text = re.sub(r"\s*\([^()]*\)$", "", msg.strip())
    head, sep, _ = text.partition(": ")
    return head if sep and " " in head else text


def _heartbeat(ref):
    """Loop of the heartbeat thread: ends when its :class:`Progress` is gone."""
    while True:
        time.sleep(1.0)
        progress = ref()
        if progress is None:
            return
        progress._idle()
        del progress


@contextmanager
def isolated(failed, say, name, title, what, refuse=()):
    """Run one fit or stage; on an error, record it in ``failed`` and go on, so one
    model's failure never loses the others (``results["failed"]``, the console and the
    report list it; the command line exits with 1). Interrupts are not caught, nor the
    errors in ``refuse`` (the reference fits come first and take milliseconds, so data
    they cannot be fitted to is refused as bad input before anything is sampled). The
    traceback goes to the ``bayespanel`` logger (``--debug`` shows it)."""
    try:
        yield
    except refuse:
        raise
    except Exception as exc:  # noqa: BLE001 - any failure of one fit is recorded, not raised
        from ..core.outputs import cannot_write

        if cannot_write(exc):  # a full disk stops the run; the folder keeps its earlier run
            raise
        text = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
        failed.append({"name": name, "title": title, "stage": what, "error": text})
        _LOG.debug("%s of %s failed", what, name, exc_info=True)
        say(f"{what if name in (what, 'tests') else f'{what} of {name}'} failed ({text}); "
            "the run goes on without it")
