"""SIGINT/SIGTERM around spin(): they stop it, then are only counted until shutdown ends.

The process-level behaviour (two signals in a row to a recording node: exit 0, bag closed) is
test/integration/test_recording.py; this checks the handler bookkeeping in this process.
Python runs a signal's handler in the main thread soon after the signal arrives
(Python docs, signal module); signal.raise_signal delivers it to this process.
"""
from __future__ import annotations

import signal
import time

from constraint_ctrl.transport.signals import StopSignals


def _deliver(sig: signal.Signals) -> None:
    signal.raise_signal(sig)
    time.sleep(0.01)           # the handler runs at the next check of the interpreter


def test_catch_hold_release() -> None:
    before = {sig: signal.getsignal(sig) for sig in (signal.SIGINT, signal.SIGTERM)}
    stops: list[int] = []
    guard = StopSignals(lambda: stops.append(1))
    try:
        guard.catch()
        _deliver(signal.SIGINT)
        assert stops == [1]
        guard.hold()                       # spin() returned: shutdown must not be cut short
        _deliver(signal.SIGINT)            # would raise KeyboardInterrupt with the default
        _deliver(signal.SIGTERM)           # would end the process with the default
        assert stops == [1] and guard.received == 3
    finally:
        guard.release()
    assert {sig: signal.getsignal(sig) for sig in before} == before


def test_release_leaves_a_handler_someone_else_installed() -> None:
    before = signal.getsignal(signal.SIGINT)
    guard = StopSignals(lambda: None)
    try:
        guard.catch()
        guard.hold()
        signal.signal(signal.SIGINT, signal.SIG_IGN)   # as serve() does for the shutdown
        guard.release()
        assert signal.getsignal(signal.SIGINT) is signal.SIG_IGN
        assert signal.getsignal(signal.SIGTERM) is not guard._held_handler
    finally:
        signal.signal(signal.SIGINT, before)


def test_a_second_spin_keeps_the_original_handlers() -> None:
    before = signal.getsignal(signal.SIGINT)
    guard = StopSignals(lambda: None)
    guard.catch()
    guard.hold()
    guard.catch()                          # spin() again before shutdown
    guard.hold()
    guard.release()
    assert signal.getsignal(signal.SIGINT) is before
