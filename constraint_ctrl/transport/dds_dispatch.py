"""Threads that run the DDS port's callbacks: a waitset dispatcher and a fixed-rate timer.

Dispatch choice, measured on this project's machine (loopback, two processes, 2 shared and
busy cores, Float64 at 1 kHz for 3 s, publish-to-callback latency): waitset thread median
0.11-0.12 ms, p99 0.9-1.2 ms; Listener `on_data_available` (callback on Cyclone's receive
thread) median 0.11-0.13 ms, p99 0.3-0.4 ms. Medians are equal; the waitset thread costs a
thread wake-up in the tail. We still use the waitset thread: with a Listener a slow node
callback stalls Cyclone's receive thread (discovery, acknowledgements, every other reader),
and the Listener cannot hold callbacks back until spin() runs as rclpy does.

Each sample is taken as bytes (dds_raw.take) and decoded on its own; a sample that cannot be
taken or decoded is dropped, and an exception raised by the node's callback is caught; both
are counted and logged by the port's FaultLog (receive_faults.py), and dispatching goes on.

The timer runs on its own thread on an absolute schedule (tick k is due at start + k *
period, so no drift accumulates), on the monotonic clock or on ROS time (dds_time.RosClock,
for use_sim_time). A late tick runs once, at once; slots that passed entirely before it could
run are skipped rather than fired back to back (the rule of rcl_timer_call) and counted in
`missed`. An exception raised by its callback is counted like a callback's above.
"""
from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from cyclonedds.core import DDSException, GuardCondition, ReadCondition, WaitSet
from cyclonedds.util import duration

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport import dds_raw
from constraint_ctrl.transport.dds_time import RosClock
from constraint_ctrl.transport.receive_faults import FaultLog

_BATCH = 64
_TAKE_RETRY_S = 0.01


@dataclass
class _Entry:
    reader: Any
    condition: ReadCondition
    decode: Callable[[bytes], Any]
    handler: Callable[[Any, Any], None]
    label: str


class Dispatcher:
    """One thread waiting on a waitset; decodes each reader's samples and runs its handler."""

    def __init__(self, participant: Any, name: str, faults: FaultLog) -> None:
        self._name = name
        self._faults = faults
        self._waitset = WaitSet(participant)
        self._wake = GuardCondition(participant)
        self._waitset.attach(self._wake)
        self._entries: dict[int, _Entry] = {}
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._running = False

    def add(self, reader: Any, decode: Callable[[bytes], Any],
            handler: Callable[[Any, Any], None], label: str) -> None:
        """handler(message, sample_info) for every valid sample that decodes."""
        entry = _Entry(reader, ReadCondition(reader, dds_raw.NOT_READ), decode, handler, label)
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
            samples = dds_raw.take(entry.reader, _BATCH)
        except DDSException as exc:
            if id(entry.reader) in self._entries:  # not a reader removed meanwhile
                self._faults.dropped(entry.label, exc)
                time.sleep(_TAKE_RETRY_S)          # no busy loop on a reader that fails
            return
        for data, info in samples:
            if not info.valid_data:
                continue
            try:
                message = entry.decode(data)
            except Exception as exc:  # noqa: BLE001 - the sample is dropped and counted
                self._faults.dropped(entry.label, exc)
                continue
            try:
                entry.handler(message, info)
            except Exception as exc:  # noqa: BLE001 - counted and logged; dispatch goes on
                self._faults.callback_failed(entry.label, exc)


class FixedRateTimer:
    """Calls `callback` every period on its own thread; see the module docstring.

    With `clock` None the schedule is on the monotonic clock; with a RosClock it is on ROS
    time (system time, or /clock while use_sim_time is true).
    """

    def __init__(self, period_s: float, callback: Callable[[], None], faults: FaultLog,
                 name: str = 'timer', clock: RosClock | None = None) -> None:
        if not period_s > 0.0:
            msg = f'timer period must be > 0 s, got {period_s!r}'
            raise TransportError(msg)
        self.period_ns = round(period_s * 1e9)
        self.missed = 0
        self.ticks = 0
        self.clock = clock
        self._callback = callback
        self._faults = faults
        self._name = name
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._cancelled = False
        self._due = 0                      # monotonic ns of the next call (monotonic timers)
        # ROS-time timers count their first period from their creation, as rcl_timer_init
        # does, not from when their thread first runs (which a busy machine can delay past the
        # next /clock sample and so shift the whole schedule)
        self._anchor: tuple[int, int] | None = None
        if clock is not None:
            with clock.condition:
                self._anchor = (clock.generation, clock.now_ns())

    def start(self) -> None:
        if self._cancelled or self._thread is not None:
            return
        self._stop.clear()
        target = self._run if self.clock is None else self._run_ros_time
        self._thread = threading.Thread(target=target, name=self._name, daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Pause (resumable by start); waits for a running tick unless called from it."""
        thread, self._thread = self._thread, None
        self._stop.set()
        if self.clock is not None:
            self.clock.wake()
        if thread is not None and thread is not threading.current_thread():
            thread.join()

    def cancel(self) -> None:
        self._cancelled = True
        self.stop()

    def _fire(self, behind: int) -> None:
        self.missed += behind
        try:
            self._callback()
        except Exception as exc:  # noqa: BLE001 - counted and logged; the timer goes on
            self._faults.callback_failed(self._name, exc)
        self.ticks += 1

    def reset(self) -> None:
        """Restart the period from now (as rcl_timer_reset): the next call is one period
        later. On ROS time (use_sim_time) the schedule follows /clock and this does nothing."""
        self._due = time.monotonic_ns() + self.period_ns

    def _run(self) -> None:
        period = self.period_ns
        self._due = time.monotonic_ns() + period
        while True:
            delay = self._due - time.monotonic_ns()
            if delay > 0 and self._stop.wait(delay / 1e9):
                return
            if self._stop.is_set():
                return
            now = time.monotonic_ns()
            due = self._due
            if now < due:                  # reset() moved the next call while we waited
                continue
            behind = max(0, (now - due) // period)
            self._fire(behind)
            self._due = due + (behind + 1) * period

    def _run_ros_time(self) -> None:
        clock = self.clock
        assert clock is not None
        period = self.period_ns
        cond = clock.condition
        with cond:
            anchor, self._anchor = self._anchor, None   # the creation time, first start only
            generation, start = anchor if anchor is not None else (clock.generation,
                                                                   clock.now_ns())
            due = start + period
        while True:
            with cond:
                while True:
                    if self._stop.is_set():
                        return
                    now = clock.now_ns()
                    if clock.generation != generation:     # new source, or time went back
                        generation = clock.generation
                        due = now + period
                    if now >= due:
                        break
                    # simulated time moves only with /clock (notify); system time by itself
                    cond.wait(None if clock.sim_time else (due - now) / 1e9)
            behind = (now - due) // period
            self._fire(behind)
            due += (behind + 1) * period
