"""Threads that run the DDS port's callbacks: a waitset dispatcher and a fixed-rate timer.

Dispatch choice, measured on this project's machine (loopback, two processes, 2 shared and
busy cores, Float64 at 1 kHz for 3 s, publish-to-callback latency): waitset thread median
0.11-0.12 ms, p99 0.9-1.2 ms; Listener `on_data_available` (callback on Cyclone's receive
thread) median 0.11-0.13 ms, p99 0.3-0.4 ms. Medians are equal; the waitset thread costs a
thread wake-up in the tail. We still use the waitset thread: with a Listener a slow node
callback stalls Cyclone's receive thread (discovery, acknowledgements, every other reader),
and the Listener cannot hold callbacks back until spin() runs as rclpy does. Sub-millisecond
tail latency is small against the controller's tick period.

The timer runs on its own thread on an absolute monotonic schedule (tick k is due at
start + k * period, so no drift accumulates). A late tick runs once, at once; slots that
passed entirely before it could run are skipped rather than fired back to back (the rule of
rcl_timer_call) and counted in `missed`.
"""
from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from cyclonedds.core import (DDSException, GuardCondition, InstanceState, ReadCondition,
                             SampleState, ViewState, WaitSet)
from cyclonedds.internal import InvalidSample
from cyclonedds.util import duration

from constraint_ctrl.errors import TransportError

ErrorHandler = Callable[[str, BaseException], None]
_BATCH = 64


@dataclass
class _Entry:
    reader: Any
    condition: ReadCondition
    handler: Callable[[Any], None]
    label: str


class Dispatcher:
    """One thread waiting on a waitset; runs each reader's handler for every valid sample."""

    def __init__(self, participant: Any, name: str, on_error: ErrorHandler) -> None:
        self._name = name
        self._on_error = on_error
        self._waitset = WaitSet(participant)
        self._wake = GuardCondition(participant)
        self._waitset.attach(self._wake)
        self._entries: dict[int, _Entry] = {}
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._running = False

    def add(self, reader: Any, handler: Callable[[Any], None], label: str) -> None:
        mask = SampleState.NotRead | ViewState.Any | InstanceState.Any
        entry = _Entry(reader, ReadCondition(reader, mask), handler, label)
        with self._lock:
            self._waitset.attach(entry.condition)
            self._entries[id(reader)] = entry
        self._wake.set(True)

    def remove(self, reader: Any) -> None:
        with self._lock:
            entry = self._entries.pop(id(reader), None)
            if entry is not None:
                self._waitset.detach(entry.condition)

    def start(self) -> None:
        if self._thread is not None:
            return
        self._running = True
        self._thread = threading.Thread(target=self._run, name=self._name, daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop dispatching (waits for a running handler unless called from one)."""
        thread, self._thread = self._thread, None
        self._running = False
        self._wake.set(True)
        if thread is not None and thread is not threading.current_thread():
            thread.join()

    def _run(self) -> None:
        while self._running:
            self._waitset.wait(duration(seconds=1))
            self._wake.take()
            with self._lock:
                entries = list(self._entries.values())
            for entry in entries:
                if not self._running:
                    return
                self._drain(entry)

    def _drain(self, entry: _Entry) -> None:
        try:
            samples = entry.reader.take(N=_BATCH)
        except DDSException as exc:
            if id(entry.reader) in self._entries:  # not a reader removed meanwhile
                self._on_error(entry.label, exc)
            return
        for sample in samples:
            if isinstance(sample, InvalidSample):
                continue
            try:
                entry.handler(sample)
            except Exception as exc:  # noqa: BLE001 - reported to the port, which stops spin()
                self._on_error(entry.label, exc)


class FixedRateTimer:
    """Calls `callback` every period on its own thread; see the module docstring."""

    def __init__(self, period_s: float, callback: Callable[[], None], on_error: ErrorHandler,
                 name: str = 'timer') -> None:
        if not period_s > 0.0:
            msg = f'timer period must be > 0 s, got {period_s!r}'
            raise TransportError(msg)
        self.period_ns = round(period_s * 1e9)
        self.missed = 0
        self.ticks = 0
        self._callback = callback
        self._on_error = on_error
        self._name = name
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._cancelled = False

    def start(self) -> None:
        if self._cancelled or self._thread is not None:
            return
        self._stop.clear()
        self._thread = threading.Thread(target=self._run, name=self._name, daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Pause (resumable by start); waits for a running tick unless called from it."""
        thread, self._thread = self._thread, None
        self._stop.set()
        if thread is not None and thread is not threading.current_thread():
            thread.join()

    def cancel(self) -> None:
        self._cancelled = True
        self.stop()

    def _run(self) -> None:
        period = self.period_ns
        due = time.monotonic_ns() + period
        while True:
            delay = due - time.monotonic_ns()
            if delay > 0 and self._stop.wait(delay / 1e9):
                return
            if self._stop.is_set():
                return
            behind = max(0, (time.monotonic_ns() - due) // period)
            self.missed += behind
            try:
                self._callback()
            except Exception as exc:  # noqa: BLE001 - reported to the port, which stops spin()
                self._on_error(self._name, exc)
            self.ticks += 1
            due += (behind + 1) * period
