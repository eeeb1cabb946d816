"""Ctrl-C that is never lost, even when a library swallows it.

Python turns SIGINT into a ``KeyboardInterrupt`` raised in whatever Python code runs next. When
that code is a compiled extension's start-up (pandas' Cython modules import others while they
load), the extension may clear the exception and carry on: the interrupt is gone and the run
goes on to write its output, exiting 0 (seen about 1 run in 20 with Ctrl-C during pandas' import),
or it turns the interrupt into an error of its own ("ImportError: pd_parser.c could not import
module pandas").

While the command line runs, :func:`watching` installs a handler that also *remembers* the
interrupt; :func:`check` raises it again at the points where it matters (after the start-up
imports, before anything is written or printed), and the command line reports any error raised
after a Ctrl-C as the interruption it is, so a Ctrl-C always ends the run with status 130 and
nothing written.
"""

from __future__ import annotations

import contextlib
import signal
import sys
import threading
from collections.abc import Iterator

__all__ = ["watching", "check", "seen", "is_ours"]

_SEEN = [False]


def _on_sigint(signum, frame) -> None:
    _SEEN[0] = True
    raise KeyboardInterrupt


def _quiet_unraisable(previous):
    """An unraisable-exception hook that stays silent about a remembered Ctrl-C.

    A Ctrl-C that lands in a callback from compiled code (numba compiling a kernel calls back
    into Python) cannot be raised there; Python prints it as "Exception ignored ..." with a
    traceback. It is remembered already and reported once, as the interruption.
    """

    def hook(unraisable) -> None:
        if isinstance(unraisable.exc_value, KeyboardInterrupt) and _SEEN[0]:
            return
        previous(unraisable)

    return hook


def is_ours(handler) -> bool:
    """Whether ``handler`` is Python's own SIGINT handler or this module's."""
    return handler is signal.default_int_handler or handler is _on_sigint


def seen() -> bool:
    """Whether a Ctrl-C arrived since :func:`watching` began."""
    return _SEEN[0]


def check() -> None:
    """Raise ``KeyboardInterrupt`` if a Ctrl-C arrived and was not acted on."""
    if _SEEN[0]:
        raise KeyboardInterrupt


@contextlib.contextmanager
def watching() -> Iterator[None]:
    """Remember every Ctrl-C inside the block (main thread, Python's own handler only)."""
    _SEEN[0] = False
    if (
        threading.current_thread() is not threading.main_thread()
        or signal.getsignal(signal.SIGINT) is not signal.default_int_handler
    ):
        yield
        return
    signal.signal(signal.SIGINT, _on_sigint)
    previous = sys.unraisablehook
    sys.unraisablehook = _quiet_unraisable(previous)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, signal.default_int_handler)
        sys.unraisablehook = previous
        _SEEN[0] = False
