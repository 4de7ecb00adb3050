"""`constraint-ctrl echo` ends on SIGINT even when its process inherited SIGINT ignored.

A process started from a non-interactive shell's `&`, or by a harness whose own SIGINT is
ignored, inherits SIG_IGN for SIGINT (POSIX exec keeps ignored signals ignored; Python then
does not install its KeyboardInterrupt handler). An endless echo would then never end on
Ctrl-C / SIGINT and stay matched at the publisher. The echo installs its own handlers for
SIGINT and SIGTERM while it prints and puts the previous ones back afterwards.
"""
from __future__ import annotations

import os
import signal

import pytest

from constraint_ctrl.tools.remote import _stop_signals_end_echo


def test_sigint_ends_the_echo_even_when_inherited_ignored() -> None:
    saved = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        restore = _stop_signals_end_echo()
        try:
            with pytest.raises(KeyboardInterrupt):
                os.kill(os.getpid(), signal.SIGINT)
                signal.sigtimedwait([], 0.01) if hasattr(signal, 'sigtimedwait') else None
            with pytest.raises(KeyboardInterrupt):
                os.kill(os.getpid(), signal.SIGTERM)
                signal.sigtimedwait([], 0.01) if hasattr(signal, 'sigtimedwait') else None
        finally:
            restore()
        assert signal.getsignal(signal.SIGINT) is signal.SIG_IGN   # put back as it was
    finally:
        signal.signal(signal.SIGINT, saved)
