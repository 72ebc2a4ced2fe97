"""Ctrl-C and SIGTERM for the command line: never lost, handled at safe points.

:func:`handlers` installs handlers for SIGINT and SIGTERM. The first signal records
the request and raises ``KeyboardInterrupt`` at once (so a long solve stops promptly);
later signals only record it, so the clean-up (saving a checkpoint) is not cut short.
Because the request is recorded, it is not lost even where Python swallows the
exception (a finaliser, a callback from compiled code): the optimisation loop calls
:func:`check` at every iteration and the results writer before swapping a folder in,
and both raise ``KeyboardInterrupt`` again while a request is pending.

Such a swallowed ``KeyboardInterrupt`` would still be printed by Python as "Exception
ignored in ... Traceback"; inside :func:`handlers` it is dropped silently instead
(``sys.unraisablehook``), since the recorded request is honoured at the next safe point.

Outside :func:`handlers` (library use) nothing is installed and :func:`check` never
raises. Inside :func:`deferred` a signal is only recorded; it raises when the block ends.
"""

from __future__ import annotations

import contextlib
import signal
import sys
import threading
from collections.abc import Iterator

_pending: list[int] = []


def requested() -> bool:
    """Whether a Ctrl-C or SIGTERM arrived since the handlers were installed."""
    return bool(_pending)


def check() -> None:
    """Raise ``KeyboardInterrupt`` when an interrupt is pending (a safe point)."""
    if _pending:
        raise KeyboardInterrupt


_deferring: list[int] = [0]


@contextlib.contextmanager
def deferred() -> Iterator[None]:
    """A block that a signal does not cut in two: an interrupt raises after it ends.

    Used where state must change together (the design, the iteration count and the
    history row of one iteration), so that a checkpoint never mixes two iterations.
    """
    _deferring[0] += 1
    try:
        yield
    finally:
        _deferring[0] -= 1
    if not _deferring[0]:
        check()


def _handle(signum, frame) -> None:
    first = not _pending
    _pending.append(signum)
    if first and not _deferring[0]:
        raise KeyboardInterrupt


@contextlib.contextmanager
def handlers() -> Iterator[None]:
    """Install the SIGINT / SIGTERM handlers for the block (main thread only)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _pending.clear()
    previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    previous_hook = sys.unraisablehook

    def unraisable(info) -> None:
        # a Ctrl-C raised inside a finaliser: recorded by _handle, honoured by check()
        if isinstance(info.exc_value, KeyboardInterrupt) and _pending:
            return
        previous_hook(info)

    sys.unraisablehook = unraisable
    for s in previous:
        signal.signal(s, _handle)
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
        sys.unraisablehook = previous_hook
        _pending.clear()
