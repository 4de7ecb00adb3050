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

from typing import Any

import numpy as np

from ..runtime.loop import LoopOutput
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
    return t.DiagnosticArray(header=header, status=[
        status('controller', level, skill_text, controller_values),
        status('watchdog', level, f'{wd.state.value}: {wd.reason}', watchdog_values),
        status('rows', OK if rows is not None else WARN,
               f'{len(row_names)} rows' if rows is not None else 'no rows', row_values),
    ])


__all__ = ['build_status']
