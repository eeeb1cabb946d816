"""The progress line of a run: which phase it is in, how far computing is, and when it is honest
to say so, how long is left.

A run goes through three phases: ``reading`` (the input, its groups and the distance set-up),
``computing`` (the sums; kernels report ``progress(done, total)`` in work units of their own)
and ``writing`` (the output). The line shows the phase and its elapsed time; while computing,
also the share of the work done, as a percentage, since the work units are not something a
user can read. A time left is shown only when it can mean something: after at least
:data:`ETA_MIN_SHARE` of the work, several reports and :data:`ETA_MIN_SECONDS` of computing, so
a run that reports once at the end never shows a guess. No rate is ever shown.

The runner owns the line (a script only passes the callback on to the estimator); it is drawn
on standard error when that is a terminal and the run is not ``quiet``.
"""

from __future__ import annotations

import sys
import threading
import time
from collections.abc import Callable
from typing import TextIO

__all__ = ["PHASES", "ETA_MIN_SHARE", "ETA_MIN_SECONDS", "ProgressLine"]

PHASES = ("reading", "computing", "writing")
#: a time left is shown from this share of the work on ...
ETA_MIN_SHARE = 0.05
#: ... after this many seconds of computing and this many reports
ETA_MIN_SECONDS = 2.0
ETA_MIN_REPORTS = 3
#: how often the line is redrawn while nothing reports (reading, a long group, writing)
REDRAW_SECONDS = 0.5


def _clock_text(seconds: float) -> str:
    seconds = int(round(seconds))
    hours, rest = divmod(seconds, 3600)
    return f"{hours}:{rest // 60:02d}:{rest % 60:02d}" if hours else f"{rest // 60}:{rest % 60:02d}"


class ProgressLine:
    """One terminal line that follows a run's phases.

    Parameters
    ----------
    label : str
        What runs, e.g. the script's name.
    enabled : bool
        Draw at all; when False every call is a no-op.
    stream : text stream, optional
        Where to draw; standard error by default.
    clock : callable, optional
        Seconds, monotonic; replaceable in tests.
    redraw : bool
        Redraw from a background thread every :data:`REDRAW_SECONDS` (off in tests).

    Examples
    --------
    >>> import io
    >>> now = [0.0]
    >>> line = ProgressLine("group-spread", True, stream=io.StringIO(), clock=lambda: now[0], redraw=False)
    >>> line.phase("reading"); now[0] = 3.0; line.text()
    'group-spread: reading, 0:03'
    >>> line(0, 500); now[0] = 4.0; line(10, 500); line.text()
    'group-spread: computing   2% |          | 0:01'
    >>> for k in range(2, 5):
    ...     now[0] = 4.0 + k; line(100 * k, 500)
    >>> line.text()
    'group-spread: computing  80% |████████  | 0:05, about 0:01 left'
    >>> line.phase("writing"); line.text()
    'group-spread: writing, 0:00'
    """

    def __init__(
        self,
        label: str,
        enabled: bool,
        *,
        stream: TextIO | None = None,
        clock: Callable[[], float] = time.monotonic,
        redraw: bool = True,
    ):
        self.label = label
        self.enabled = enabled
        self.stream = sys.stderr if stream is None else stream
        self.clock = clock
        self._lock = threading.Lock()
        self._phase: str | None = None
        self._since = clock()
        self._done = self._total = 0
        self._reports = 0
        self._width = 0
        self._stop = threading.Event()
        self._thread = None
        if enabled and redraw:
            self._thread = threading.Thread(target=self._redraw, name="pairspread-progress", daemon=True)

    def phase(self, name: str) -> None:
        """Enter phase ``name`` (one of :data:`PHASES`) and draw it at once."""
        if name not in PHASES:
            raise ValueError(f"phase must be one of {', '.join(PHASES)}, not {name!r}")
        if not self.enabled:
            return
        with self._lock:
            if name != self._phase:
                self._phase, self._since = name, self.clock()
                self._done = self._total = self._reports = 0
        self.draw()
        if self._thread is not None and not self._thread.is_alive() and not self._stop.is_set():
            self._thread.start()

    def __call__(self, done: int, total: int) -> None:
        """The kernels' callback: ``done`` of ``total`` work units are finished."""
        if not self.enabled:
            return
        if self._phase != "computing":
            self.phase("computing")
        with self._lock:
            self._done, self._total = max(int(done), 0), max(int(total), 0)
            self._reports += 1
        self.draw()

    def text(self) -> str:
        """The line as it would be drawn now."""
        with self._lock:
            phase, since, done, total, reports = self._phase, self._since, self._done, self._total, self._reports
        elapsed = self.clock() - since
        if phase is None:
            return ""
        if phase != "computing":
            return f"{self.label}: {phase}, {_clock_text(elapsed)}"
        share = min(done / total, 1.0) if total > 0 else 0.0
        filled = int(share * 10)
        bar = "█" * filled + " " * (10 - filled)
        out = f"{self.label}: computing {100 * share:3.0f}% |{bar}| {_clock_text(elapsed)}"
        if share >= ETA_MIN_SHARE and share < 1.0 and elapsed >= ETA_MIN_SECONDS and reports >= ETA_MIN_REPORTS:
            out += f", about {_clock_text(elapsed * (1.0 - share) / share)} left"
        return out

    def draw(self) -> None:
        if not self.enabled:
            return
        text = self.text()
        with self._lock:
            pad = max(self._width - len(text), 0)
            self._width = len(text)
            try:
                self.stream.write("\r" + text + " " * pad)
                self.stream.flush()
            except (OSError, ValueError):  # a closed or broken terminal must not stop the run
                self.enabled = False

    def _redraw(self) -> None:
        while not self._stop.wait(REDRAW_SECONDS):
            self.draw()

    def close(self) -> None:
        """Stop redrawing and clear the line."""
        self._stop.set()
        if self._thread is not None and self._thread.is_alive():
            self._thread.join(timeout=2)
        if self.enabled and self._width:
            try:
                self.stream.write("\r" + " " * self._width + "\r")
                self.stream.flush()
            except (OSError, ValueError):
                pass
