"""SIGINT and SIGTERM around a port's spin(), the same for both ports.

While spin() runs they end it. From the moment spin() returns until the port is shut down
they are only counted: Python's default SIGINT handler would raise KeyboardInterrupt wherever
the main thread happens to be (in the middle of the final zero command, of closing a bag, of
withdrawing the node), and `ros2 launch` or a terminal often send a second signal within tens
of milliseconds of the first. After shutdown the handlers from before spin() are back, unless
someone installed their own meanwhile (see nodes/common.py: serve keeps ignoring them until
the process ends).

Python runs signal handlers in the main thread only; spin() in another thread changes nothing.
"""
from __future__ import annotations

import signal
import threading
from collections.abc import Callable
from typing import Any

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


def _main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


class StopSignals:
    """catch() at the start of spin(), hold() when it returns, release() at shutdown's end."""

    def __init__(self, on_stop: Callable[[], None]) -> None:
        self.received = 0
        self._on_stop = on_stop
        self._saved: dict[int, Any] = {}
        # bound once, so that the installed handlers can be recognised by identity
        self._stop_handler = self._stop
        self._held_handler = self._held

    def _stop(self, signum: int, frame: object) -> None:
        self.received += 1
        self._on_stop()

    def _held(self, signum: int, frame: object) -> None:
        self.received += 1

    def _ours(self, handler: object) -> bool:
        return handler is self._stop_handler or handler is self._held_handler

    def catch(self) -> None:
        """From now on SIGINT and SIGTERM call on_stop (main thread only)."""
        if not _main_thread():
            return
        for sig in STOP_SIGNALS:
            previous = signal.signal(sig, self._stop_handler)
            if not self._ours(previous):
                self._saved[sig] = previous

    def hold(self) -> None:
        """From now on SIGINT and SIGTERM are only counted."""
        if not _main_thread():
            return
        for sig in self._saved:
            if self._ours(signal.getsignal(sig)):
                signal.signal(sig, self._held_handler)

    def release(self) -> None:
        """Put back the handlers from before catch(), where ours are still installed."""
        if not _main_thread():
            return
        for sig, previous in self._saved.items():
            if self._ours(signal.getsignal(sig)):
                signal.signal(sig, previous)
        self._saved.clear()


def ignore_stop_signals() -> None:
    """SIGINT and SIGTERM are ignored from now on (main thread only): for a process that is
    shutting down and must finish that (SIGKILL still ends it)."""
    if _main_thread():
        for sig in STOP_SIGNALS:
            signal.signal(sig, signal.SIG_IGN)


__all__ = ['STOP_SIGNALS', 'StopSignals', 'ignore_stop_signals']
