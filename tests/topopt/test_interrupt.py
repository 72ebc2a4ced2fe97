"""Ctrl-C is never lost and never printed as a traceback (issue 15), in-process.

A signal handler's exception raised inside a finaliser (``__del__``, a weakref callback)
is swallowed by Python and reported through ``sys.unraisablehook`` (Python
documentation, "sys.unraisablehook"; PEP 442 for finalisers). The request must still be
honoured at the next safe point, and the user must not see "Exception ignored ...
Traceback". Common practice (our command-line contract, docs/design.md).
"""

from __future__ import annotations

import signal
import sys

import pytest

from topopt import interrupt


class SignalledWhenCollected:
    """An object whose finaliser receives a Ctrl-C (as if the user pressed it then)."""

    def __del__(self):
        signal.raise_signal(signal.SIGINT)


class FailsWhenCollected:
    """An object whose finaliser fails with an ordinary error."""

    def __del__(self):
        raise RuntimeError("a finaliser failed")


def test_ctrl_c_inside_a_finaliser_is_kept_and_not_printed(monkeypatch):
    reported = []
    monkeypatch.setattr(sys, "unraisablehook", lambda info: reported.append(info.exc_value))
    with interrupt.handlers():
        obj = SignalledWhenCollected()
        del obj  # the handler's KeyboardInterrupt is swallowed by Python here
        assert reported == []
        assert interrupt.requested()
        with pytest.raises(KeyboardInterrupt):
            interrupt.check()
        # other unraisable errors still reach the previous hook
        obj = FailsWhenCollected()
        del obj
        assert [type(e) for e in reported] == [RuntimeError]
    assert not interrupt.requested()
    # outside the handlers the hook is the previous one again
    obj = FailsWhenCollected()
    del obj
    assert [type(e) for e in reported] == [RuntimeError, RuntimeError]


def test_signal_inside_deferred_raises_when_the_block_ends():
    steps = []
    with interrupt.handlers(), pytest.raises(KeyboardInterrupt):
        with interrupt.deferred():
            signal.raise_signal(signal.SIGINT)
            steps.append("after the signal")  # the block is not cut in two
        steps.append("never")
    assert steps == ["after the signal"]


def test_outside_the_handlers_check_never_raises():
    assert not interrupt.requested()
    interrupt.check()
