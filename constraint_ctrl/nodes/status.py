"""The controller's diagnostics: ~/status and /diagnostics, and the per-row values on ~/rows.

~/status (at status_rate_hz) and /diagnostics (about 1 Hz, for the standard diagnostic
aggregator) carry the same diagnostic_msgs/DiagnosticArray with two statuses, named as
diagnostic_updater names its tasks ('<node name>: <task>') and with hardware_id set:
- '<node>: controller': active skill, solve status and time, missed ticks, the recorder
  (`recorder`: off, recording, failed or closed; `recorder_written`, `recorder_dropped`,
  `recorder_error`); level OK, ERROR when the solve failed;
- '<node>: watchdog': state, reason, speed scale, min separation, protective distance; level
  follows the watchdog: OK normal, WARN reduced or stopping, ERROR stopped (a fault or a stop).

~/rows (diagnostic_msgs/DiagnosticArray, at status_rate_hz): one status per row of the active
skill, named '<skill>: <row>', with the values 'value', 'error', 'slack', 'active', 'solved'
(false when the row's priority level could not be solved this tick); level OK when solved, WARN
when not. Why this type: among the standard messages (ROS 2 common_interfaces, which rosbags'
type store holds) only diagnostic_msgs carries values with a name each; the numeric arrays
(std_msgs/Float64MultiArray) name dimensions, not elements, and sensor_msgs/JointState's fields
mean joint positions, velocities and efforts.
"""
from __future__ import annotations

import threading
import time
import traceback
from collections.abc import Callable
from typing import Any

import numpy as np

from ..runtime.loop import HOLD, LoopOutput
from ..safety.states import State
from ..solve.qp import RowReport

OK, WARN, ERROR = 0, 1, 2


def _fmt(value: float) -> str:
    return f'{value:.6g}'


def watchdog_level(state: State) -> int:
    """OK normal, WARN reduced or stopping, ERROR stopped."""
    if state is State.STOPPED:
        return ERROR
    if state in (State.REDUCED, State.STOPPING):
        return WARN
    return OK


def _header(t: Any, stamp_ns: int) -> Any:
    sec, nanosec = divmod(stamp_ns, 1_000_000_000)
    return t.Header(stamp=t.Time(sec=int(sec), nanosec=int(nanosec)), frame_id='')


def build_status(port: Any, node: str, out: LoopOutput, stamp_ns: int, extra: dict[str, str],
                 hardware_id: str) -> Any:
    """The DiagnosticArray of ~/status and /diagnostics (see the module docstring)."""
    t = port.types
    wd = out.watchdog
    tick = out.tick
    solve = tick.status.value if tick is not None else 'idle'
    controller_level = ERROR if tick is not None and not tick.ok else OK
    controller_values = {
        'skill': out.skill or '',
        'solve_status': solve,
        'solve_message': tick.message if tick is not None else '',
        'solve_us': _fmt((tick.eval_ns + tick.solve_ns) / 1000.0) if tick is not None else '0',
        'skill_time': _fmt(tick.skill_time) if tick is not None else '0',
        **extra,
    }
    watchdog_values = {
        'state': wd.state.value,
        'reason': wd.reason,
        'speed_scale': _fmt(wd.speed_scale),
        'min_separation': _fmt(wd.min_separation),
        'protective_distance': _fmt(wd.protective_distance),
        'command_norm': _fmt(float(np.linalg.norm(wd.command))),
    }

    def status(suffix: str, lvl: int, message: str, values: dict[str, str]) -> Any:
        return t.DiagnosticStatus(
            level=port.diagnostic_level(lvl), name=f'{node}: {suffix}', message=message,
            hardware_id=hardware_id,
            values=[t.KeyValue(key=k, value=v) for k, v in values.items()])

    skill_text = f'{out.skill}: {solve}' if out.skill else 'no skill active'
    if out.skill == HOLD:
        skill_text = 'holding: zero velocity, watchdog active'
    return t.DiagnosticArray(header=_header(t, stamp_ns), status=[
        status('controller', controller_level, skill_text, controller_values),
        status('watchdog', watchdog_level(wd.state), f'{wd.state.value}: {wd.reason}',
               watchdog_values),
    ])


def build_rows(port: Any, skill: str | None, rows: RowReport | None, row_names: list[str],
               stamp_ns: int, hardware_id: str) -> Any:
    """The DiagnosticArray of ~/rows: one status per row (empty when no skill ran)."""
    t = port.types
    ok, warn = port.diagnostic_level(OK), port.diagnostic_level(WARN)
    statuses = []
    if rows is not None and skill:
        for i, name in enumerate(row_names):
            solved = bool(rows.solved[i])
            statuses.append(t.DiagnosticStatus(
                level=ok if solved else warn, name=f'{skill}: {name}',
                message='' if solved else 'its priority level was not solved this tick',
                hardware_id=hardware_id, values=[
                    t.KeyValue(key='value', value=_fmt(float(rows.value[i]))),
                    t.KeyValue(key='error', value=_fmt(float(rows.error[i]))),
                    t.KeyValue(key='slack', value=_fmt(float(rows.slack[i]))),
                    t.KeyValue(key='active', value='true' if rows.active[i] else 'false'),
                    t.KeyValue(key='solved', value='true' if solved else 'false')]))
    return t.DiagnosticArray(header=_header(t, stamp_ns), status=statuses)


class StatusWorker:
    """Builds and publishes ~/status on its own thread, off the control path.

    Why: formatting some sixty values into a DiagnosticArray and serialising it costs about as
    much as two ticks; on the tick it would hold back every N-th command by that much (at
    10 Hz status and 1 kHz control, exactly the 99th percentile of the latency). The tick
    hands over only what it alone can read consistently (its LoopOutput and the rows of that
    solve, taken in the tick) with ``post`` and goes on. If the worker is still busy when the
    next status is due, the newer one replaces the waiting one: a status is a snapshot.
    ``publish(*job)`` failing is logged (the first time, then at most once a minute) and
    counted in ``errors``; the worker goes on. The controller runs two: ~/status (with ~/rows
    and /diagnostics) and ~/markers.
    """

    def __init__(self, publish: Callable[..., None],
                 log: Callable[[str, str], None], name: str = 'status', what: str = '~/status',
                 on_start: Callable[[], None] | None = None) -> None:
        self._publish = publish
        self.what = what              # what it publishes, for its log line
        self._on_start = on_start
        self._log = log
        self._wake = threading.Condition()
        self._pending: tuple[Any, ...] | None = None
        self._running = True
        self.errors = 0
        self.replaced = 0
        self._last_log = -1e9
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def post(self, *job: Any) -> None:
        """Hand over the arguments of one ``publish`` call (replacing one still waiting)."""
        with self._wake:
            if self._pending is not None:
                self.replaced += 1
            self._pending = job
            self._wake.notify()

    def _run(self) -> None:
        if self._on_start is not None:    # e.g. the node's real-time set-up of this thread
            self._on_start()
        while True:
            with self._wake:
                while self._pending is None and self._running:
                    self._wake.wait()
                if self._pending is None:
                    return
                job, self._pending = self._pending, None
            try:
                self._publish(*job)
            except Exception:  # noqa: BLE001 - a failed status must not end the status thread
                self.errors += 1
                now = time.monotonic()
                if now - self._last_log >= 60.0:
                    self._last_log = now
                    self._log('error', f'{self.what} failed ({self.errors} so far):\n'
                              + traceback.format_exc())

    def close(self, timeout: float = 2.0) -> None:
        """Publish what is pending, then stop."""
        with self._wake:
            self._running = False
            self._wake.notify()
        if self._thread is not threading.current_thread():
            self._thread.join(timeout)


__all__ = ['ERROR', 'OK', 'WARN', 'StatusWorker', 'build_rows', 'build_status', 'watchdog_level']
