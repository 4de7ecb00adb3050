"""Per-tick cost of ``Watchdog.step`` under a realistic load.

The example arm moves along a smooth joint trajectory while people walk around it between about
0.6 and 2.5 m away, so the reduced zone and the separation scaling are active in most ticks (the
expensive path), with occasional stops for a person too close. Only ``step`` is timed; building the
inputs is the runtime's cost. Target (not asserted anywhere): median <= 30 us.
"""
from __future__ import annotations

import gc
import math
import time
from collections import Counter
from collections.abc import Sequence
from pathlib import Path

import casadi as ca
import numpy as np

from constraint_ctrl.safety.watchdog import (
    MonitoredPoint, PersonSample, Watchdog, WatchdogConfig, WatchdogInput)

URDF = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'
TARGET_MEDIAN_US = 30.0

# Spheres along the example arm: links, flange, tool tip, the distance sensors.
_CANDIDATES: list[tuple[str, tuple[float, float, float], float]] = [
    ('link_2', (0.0, 0.0, 0.2), 0.08), ('link_3', (0.0, 0.0, 0.0), 0.08),
    ('link_3', (0.2, 0.0, 0.0), 0.07), ('link_4', (0.0, 0.0, 0.0), 0.07),
    ('link_5', (0.0, 0.0, 0.0), 0.06), ('link_6', (0.0, 0.0, 0.0), 0.06),
    ('tool_flange', (0.0, 0.0, 0.0), 0.05), ('tool_tip', (0.0, 0.0, 0.0), 0.03),
    ('range_left', (0.0, 0.0, 0.0), 0.02), ('range_front', (0.0, 0.0, 0.0), 0.02),
]


def _points(n_points: int) -> list[MonitoredPoint]:
    out = []
    for i in range(n_points):
        link, offset, radius = _CANDIDATES[i % len(_CANDIDATES)]
        shift = 0.01 * (i // len(_CANDIDATES))
        out.append(MonitoredPoint(link, (offset[0] + shift, offset[1], offset[2]), radius))
    return out


def _model_points(points: Sequence[MonitoredPoint]) -> tuple[ca.Function, np.ndarray,
                                                              np.ndarray, np.ndarray, str]:
    """The real model's points Function, or a same-size stand-in if the model is missing."""
    try:
        from constraint_ctrl.model.kinematics import RobotModel
    except ImportError:
        return _stand_in(len(points))
    model = RobotModel.from_urdf(URDF)
    fn = model.points_function([(p.link, p.offset) for p in points])
    return (fn, model.velocity_limit, model.lower, model.upper,
            f'RobotModel({URDF.name})')


def _stand_in(k: int) -> tuple[ca.Function, np.ndarray, np.ndarray, np.ndarray, str]:
    """Planar-ish 6-joint chain in casadi, used only when model.kinematics is unavailable."""
    q = ca.SX.sym('q', 6)
    cols = []
    angle = ca.SX(0)
    pos = ca.vertcat(0, 0, 0.2)
    for i in range(k):
        angle = angle + q[i % 6]
        pos = pos + 0.15 * ca.vertcat(ca.cos(angle), ca.sin(angle), 0.1)
        cols.append(pos)
    pts = ca.horzcat(*cols)
    fn = ca.Function('points', [q], [ca.densify(pts), ca.densify(ca.jacobian(ca.vec(pts), q))])
    return (fn, np.full(6, 2.0), np.full(6, -3.0), np.full(6, 3.0),
            'stand-in chain (constraint_ctrl.model.kinematics not available)')


def bench_watchdog(n_points: int = 10, n_people: int = 3, ticks: int = 20000,
                   dt: float = 0.004) -> dict[str, object]:
    """Time ``Watchdog.step`` for ``ticks`` ticks; percentiles in microseconds."""
    points = _points(n_points)
    fn, vel, lower, upper, source = _model_points(points)
    config = WatchdogConfig(velocity_limits=vel, acceleration_limits=vel * 10.0,
                            lower=lower, upper=upper, resume_after=0.5)
    watchdog = Watchdog(config, fn, points, dt)
    n = vel.size
    rng = np.random.default_rng(1)
    phase = rng.uniform(0, 2 * math.pi, n)
    sources = tuple(f'camera_{j}' for j in range(n_people))
    angles = rng.uniform(0, 2 * math.pi, n_people)
    input_timeouts = {'wrench': 0.05, 'range_front': 0.05}
    states: Counter[str] = Counter()
    times = np.empty(ticks)
    perf = time.perf_counter_ns
    gc.collect()
    for i in range(ticks):
        now = i * dt
        q = 0.5 * np.sin(0.3 * now + phase) * np.minimum(np.abs(lower), upper)
        command = 0.6 * vel * np.cos(0.3 * now + phase)
        people = {}
        for j, src in enumerate(sources):
            radius = 1.55 + 0.95 * math.sin(0.21 * now + angles[j])   # 0.6 .. 2.5 m
            a = angles[j] + 0.1 * now
            people[src] = PersonSample(src, np.array([radius * math.cos(a),
                                                      radius * math.sin(a), 1.0]), now)
        inp = WatchdogInput(now=now, q=q, joint_state_stamp=now, command=command,
                            solver_ok=True, solver_status='ok',
                            input_stamps={'wrench': now, 'range_front': now},
                            input_timeouts=input_timeouts, inputs_finite=True,
                            people=people, person_sources=sources)
        start = perf()
        out = watchdog.step(inp)
        times[i] = perf() - start
        states[out.state.value] += 1
    us = times / 1000.0
    p50, p90, p99 = (float(np.percentile(us, p)) for p in (50, 90, 99))
    return {'points_source': source, 'n_points': n_points, 'n_people': n_people,
            'n_joints': n, 'ticks': ticks, 'median_us': round(p50, 2),
            'p50_us': round(p50, 2), 'p90_us': round(p90, 2), 'p99_us': round(p99, 2),
            'max_us': round(float(us.max()), 2), 'target_median_us': TARGET_MEDIAN_US,
            'states': dict(states)}


__all__ = ['bench_watchdog']
