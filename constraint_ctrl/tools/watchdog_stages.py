"""Which watchdog stage capped a command, tick by tick, summed up for simulate's report.

The watchdog publishes the shaped command, its state and the product of the uniform factors of
stages 4-6 (``speed_scale``). This module splits that outcome into the stages of
safety/speed_caps.py with the package's own stage functions, applied in the watchdog's order
to the solver's command:

2-3. ``limit_acceleration`` (relative to the previous published command, the acceleration
     limit of the watchdog's configuration) then ``limit_positions`` (no joint crosses a
     limit within one tick);
4.   ``apply_joint_speed_limits``: the factor that keeps every joint at or under its velocity
     limit;
5.   in state ``reduced``: ``point_speed_scale`` of the monitored points' velocities (the
     watchdog's own point function, runtime/watchdog_setup.points_function) at the reduced
     speed;
6.   separation: what is left of ``speed_scale`` after stages 4 and 5.

The product of the reconstructed stages must give the published command; a tick where it does
not is counted as ``unexplained`` (expected 0: the tests check it), so the report never claims
a cause it cannot show. Ticks in which the watchdog held the arm (state ``stopped`` or
``stopping``: a fault, a person too close, a stop ramp) are counted under ``stopped`` with their
reasons.

Per stage the report gives the ticks and seconds it changed the command, the first and last
time, the joints it touched (joint stages), and ``max_ratio``: how many times larger than
allowed the request was at worst (requested change / allowed change for the acceleration
limit, 1 / factor for the scaling stages). The position-limit stage reports ``max_cut``
instead (the largest velocity it removed, rad/s or m/s), because the allowed velocity at a
limit is 0 and a ratio would be infinite.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..safety.speed_caps import (apply_joint_speed_limits, limit_acceleration,
                                 limit_positions, point_speed_scale)
from ..safety.states import State
from ..safety.watchdog import Watchdog, WatchdogOutput

STAGES = ('acceleration', 'position_limits', 'joint_speed', 'reduced_speed', 'separation')
#: A stage counts as having acted when it changed a velocity by more than this (relative to
#: the velocity's size, plus an absolute floor far below any command that moves a robot).
_CHANGED = 1e-9


@dataclass(slots=True)
class StageTally:
    """How one stage acted over a run."""

    ticks: int = 0
    first_s: float | None = None
    last_s: float | None = None
    max_ratio: float = 1.0
    max_cut: float = 0.0
    zeroed_ticks: int = 0
    joints: set[str] = field(default_factory=set)

    def hit(self, t: float) -> None:
        self.ticks += 1
        if self.first_s is None:
            self.first_s = t
        self.last_s = t


class StageRecorder:
    """Feeds on (solver command, watchdog output) pairs; ``summary`` is the report section."""

    def __init__(self, watchdog: Watchdog, points_fn: Any, joint_names: tuple[str, ...]) -> None:
        config = watchdog.config
        self.dt = watchdog.dt
        self.joint_names = joint_names
        self.step = config.acceleration_limits * self.dt
        self.lower, self.upper = config.lower, config.upper
        self.inv_velocity = 1.0 / config.velocity_limits
        self.reduced_speed = config.reduced_speed
        self.points_fn = points_fn
        self.stages = {name: StageTally() for name in STAGES}
        self.stopped = StageTally()
        self.stop_reasons: dict[str, int] = {}
        self.unexplained = 0
        self.ticks = 0
        self.previous = np.zeros(config.n_joints)

    def record(self, t: float, q: np.ndarray | None, requested: np.ndarray | None,
               out: WatchdogOutput) -> None:
        """One tick: ``requested`` is the solver's command (None when it gave none)."""
        self.ticks += 1
        try:
            if out.state in (State.STOPPED, State.STOPPING) or requested is None or q is None:
                self.stopped.hit(t)
                self.stop_reasons[out.reason] = self.stop_reasons.get(out.reason, 0) + 1
            else:
                self._attribute(t, q, requested, out)
        finally:
            self.previous = out.command.copy()

    def _attribute(self, t: float, q: np.ndarray, requested: np.ndarray,
                   out: WatchdogOutput) -> None:
        accel = limit_acceleration(requested, self.previous, self.step, np.empty_like(requested))
        moved = _changed(requested, accel)
        if moved.any():
            tally = self.stages['acceleration']
            tally.hit(t)
            tally.joints.update(self._names(moved))
            ratio = np.abs(requested - self.previous)[moved] / self.step[moved]
            tally.max_ratio = max(tally.max_ratio, float(ratio.max()))
        limited = limit_positions(accel, q, self.lower, self.upper, self.dt,
                                  np.empty_like(accel))
        moved = _changed(accel, limited)
        if moved.any():
            tally = self.stages['position_limits']
            tally.hit(t)
            tally.joints.update(self._names(moved))
            tally.max_cut = max(tally.max_cut, float(np.abs(accel - limited)[moved].max()))
        scaled = limited.copy()
        joint = apply_joint_speed_limits(scaled, self.inv_velocity)
        self._factor('joint_speed', t, joint)
        reduced = 1.0
        if out.state is State.REDUCED and scaled.any():
            jac = np.asarray(self.points_fn(q)[1], dtype=float)
            velocities = (jac @ scaled).reshape(-1, 3)
            reduced = point_speed_scale(velocities, self.reduced_speed)
        self._factor('reduced_speed', t, reduced)
        known = joint * reduced
        separation = out.speed_scale / known if known > 0.0 else 1.0
        self._factor('separation', t, min(separation, 1.0))
        expected = limited * known * min(separation, 1.0)
        if not np.allclose(expected, out.command, rtol=1e-7, atol=1e-10):
            self.unexplained += 1

    def _factor(self, stage: str, t: float, factor: float) -> None:
        if factor >= 1.0 - _CHANGED:
            return
        tally = self.stages[stage]
        tally.hit(t)
        if factor <= 0.0:
            tally.zeroed_ticks += 1
        else:
            tally.max_ratio = max(tally.max_ratio, 1.0 / factor)

    def _names(self, mask: np.ndarray) -> list[str]:
        return [self.joint_names[i] for i in np.flatnonzero(mask)]

    def summary(self) -> dict[str, Any]:
        stages: dict[str, Any] = {}
        for name, tally in self.stages.items():
            entry: dict[str, Any] = {
                'ticks': tally.ticks, 'seconds': round(tally.ticks * self.dt, 6),
                'first_s': _time(tally.first_s), 'last_s': _time(tally.last_s)}
            if name == 'position_limits':
                entry['max_cut'] = tally.max_cut
            else:
                entry['max_ratio'] = tally.max_ratio
            if name in ('acceleration', 'position_limits'):
                entry['joints'] = sorted(tally.joints)
            if name in ('reduced_speed', 'separation'):
                entry['zeroed_ticks'] = tally.zeroed_ticks
            stages[name] = entry
        return {
            'ticks': self.ticks,
            'stages': stages,
            'stopped': {'ticks': self.stopped.ticks,
                        'seconds': round(self.stopped.ticks * self.dt, 6),
                        'first_s': _time(self.stopped.first_s),
                        'last_s': _time(self.stopped.last_s),
                        'reasons': dict(sorted(self.stop_reasons.items(),
                                               key=lambda item: -item[1]))},
            'unexplained_ticks': self.unexplained,
        }


def _changed(before: np.ndarray, after: np.ndarray) -> np.ndarray:
    return np.abs(before - after) > _CHANGED * (1.0 + np.abs(before))


def _time(t: float | None) -> float | None:
    return None if t is None or not math.isfinite(t) else round(t, 6)


__all__ = ['STAGES', 'StageRecorder', 'StageTally']
