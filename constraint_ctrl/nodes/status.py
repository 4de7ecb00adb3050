"""The controller's ~/status message (diagnostic_msgs/DiagnosticArray).

Three statuses, so standard diagnostics tools can show them side by side:
- '<node>: controller': active skill, solve status and time, missed ticks, the recorder
  (`recorder`: off, recording, failed or closed; `recorder_written`, `recorder_dropped`,
  `recorder_error`);
- '<node>: watchdog': state, reason, speed scale, min separation, protective distance;
- '<node>: rows': per row of the active skill '<row>.value', '.error', '.slack', '.active',
  '.solved' (false when the row's priority level could not be solved this tick).
Level: OK while moving normally, WARN when reduced or stopping, ERROR when stopped by a fault
or when the solve failed.
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


def build_status(port: Any, node: str, out: LoopOutput, rows: RowReport | None,
                 row_names: list[str], stamp_ns: int, extra: dict[str, str]) -> Any:
    t = port.types
    wd = out.watchdog
    tick = out.tick
    level = OK
    if wd.state in (State.REDUCED, State.STOPPING):
        level = WARN
    if wd.state is State.STOPPED or (tick is not None and not tick.ok):
        level = ERROR
    solve = tick.status.value if tick is not None else 'idle'
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
    row_values: dict[str, str] = {}
    if rows is not None:
        for i, name in enumerate(row_names):
            row_values[f'{name}.value'] = _fmt(float(rows.value[i]))
            row_values[f'{name}.error'] = _fmt(float(rows.error[i]))
            row_values[f'{name}.slack'] = _fmt(float(rows.slack[i]))
            row_values[f'{name}.active'] = 'true' if rows.active[i] else 'false'
            row_values[f'{name}.solved'] = 'true' if rows.solved[i] else 'false'

    def status(suffix: str, lvl: int, message: str, values: dict[str, str]) -> Any:
        return t.DiagnosticStatus(
            level=port.diagnostic_level(lvl), name=f'{node}: {suffix}', message=message,
            hardware_id=node,
            values=[t.KeyValue(key=k, value=v) for k, v in values.items()])

    sec, nanosec = divmod(stamp_ns, 1_000_000_000)
    header = t.Header(stamp=t.Time(sec=int(sec), nanosec=int(nanosec)), frame_id='')
    skill_text = f'{out.skill}: {solve}' if out.skill else 'no skill active'
    if out.skill == HOLD:
        skill_text = 'holding: zero velocity, watchdog active'
    return t.DiagnosticArray(header=header, status=[
        status('controller', level, skill_text, controller_values),
        status('watchdog', level, f'{wd.state.value}: {wd.reason}', watchdog_values),
        status('rows', OK if rows is not None else WARN,
               f'{len(row_names)} rows' if rows is not None else 'no rows', row_values),
    ])


class StatusWorker:
    """Builds and publishes ~/status on its own thread, off the control path.

    Why: formatting some sixty values into a DiagnosticArray and serialising it costs about as
    much as two ticks; on the tick it would hold back every N-th command by that much (at
    10 Hz status and 1 kHz control, exactly the 99th percentile of the latency). The tick
    hands over only what it alone can read consistently (its LoopOutput and the rows of that
    solve, taken in the tick) with ``post`` and goes on. If the worker is still busy when the
    next status is due, the newer one replaces the waiting one: a status is a snapshot.
    ``publish(out, rows, names)`` failing is logged (the first time, then at most once a
    minute) and counted in ``errors``; the worker goes on.
    """

    def __init__(self, publish: Callable[[Any, Any, list[str]], None],
                 log: Callable[[str, str], None], name: str = 'status',
                 on_start: Callable[[], None] | None = None) -> None:
        self._publish = publish
        self._on_start = on_start
        self._log = log
        self._wake = threading.Condition()
        self._pending: tuple[Any, Any, list[str]] | None = None
        self._running = True
        self.errors = 0
        self.replaced = 0
        self._last_log = -1e9
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def post(self, out: Any, rows: Any, names: list[str]) -> None:
        with self._wake:
            if self._pending is not None:
                self.replaced += 1
            self._pending = (out, rows, names)
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
                    self._log('error', f'~/status failed ({self.errors} so far):\n'
                              + traceback.format_exc())

    def close(self, timeout: float = 2.0) -> None:
        """Publish what is pending, then stop."""
        with self._wake:
            self._running = False
            self._wake.notify()
        if self._thread is not threading.current_thread():
            self._thread.join(timeout)


__all__ = ['StatusWorker', 'build_status']
