"""`constraint-ctrl simulate`: lockstep kinematic simulation of one skill, no middleware.

Each tick evaluates the skill at the current joint positions, solves the QP and integrates the
command exactly (q += dt * q_dot), so what you see is the controller's own behaviour without
robot dynamics or latency. Inputs come from the skill's ``offline.inputs`` constants, or from the
simulated work cell when the skill names an ``offline.scene``.
"""
from __future__ import annotations

import json
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import ConstraintCtrlError
from ..runtime.runner import SkillRunner
from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill

@dataclass(slots=True)
class Trace:
    """Everything recorded per tick (rows x ticks arrays are filled in place)."""

    time: np.ndarray
    q: np.ndarray
    joint_velocity: np.ndarray
    unknown_velocity: np.ndarray
    unknowns: np.ndarray
    error: np.ndarray
    slack: np.ndarray
    active: np.ndarray
    solve_us: np.ndarray
    status: list[str] = field(default_factory=list)
    events: list[tuple[float, str]] = field(default_factory=list)


def start_pose(skill: CompiledSkill) -> np.ndarray:
    start = skill.spec.offline.start
    unknown = sorted(set(start) - set(skill.joint_names))
    if unknown:
        raise skill.spec.error(f'unknown joints {unknown}; the robot has {list(skill.joint_names)}',
                               'offline.start')
    return np.array([float(start.get(j, 0.0)) for j in skill.joint_names])


class ExactPlant:
    """The command integrated exactly; inputs are the skill's offline.inputs constants."""

    def __init__(self, skill: CompiledSkill) -> None:
        values = skill.spec.offline.inputs
        missing = [name for name in skill.input_names if name not in values]
        if missing:
            raise skill.spec.error(f'no offline value for inputs {missing}: give them under '
                                   'offline.inputs or name an offline.scene', 'offline')
        self.u = np.array([float(values[name]) for name in skill.input_names])
        self.q = start_pose(skill)

    def measured(self) -> tuple[np.ndarray, np.ndarray]:
        return self.q, self.u

    def true_q(self) -> np.ndarray:
        return self.q

    def apply(self, dt: float, qdot: np.ndarray) -> None:
        self.q = self.q + dt * qdot


class ScenePlant:
    """The simulated work cell: latency, noise, sensors and contact (constraint_ctrl.sim)."""

    def __init__(self, skill: CompiledSkill) -> None:
        from ..sim.scene import load_scene
        from ..sim.signals import world_signals
        from ..sim.world import World

        scene_path = skill.spec.offline.scene
        assert scene_path is not None
        self.world = World(load_scene(scene_path), skill.model)
        if skill.spec.offline.start:
            self.world.reset_joint_positions(start_pose(skill))
        self._signals = world_signals
        offered = world_signals(self.world)
        missing = [n for n in skill.input_names if n not in offered]
        if missing:
            raise skill.spec.error(f'the scene {scene_path.name} offers no signals {missing}; '
                                   f'it offers {sorted(offered)}', 'offline.scene')
        self.names = skill.input_names
        order = [skill.model.joint_names.index(j) for j in skill.joint_names]
        self.order = np.array(order, dtype=int)

    def measured(self) -> tuple[np.ndarray, np.ndarray]:
        signals = self._signals(self.world)
        return (self.world.joint_positions[self.order],
                np.array([signals[name] for name in self.names]))

    def true_q(self) -> np.ndarray:
        return self.world.true_joint_positions[self.order]

    def apply(self, dt: float, qdot: np.ndarray) -> None:
        command = np.zeros(len(self.order))
        command[self.order] = qdot
        self.world.step(dt, command)


def run(skill: CompiledSkill, duration: float, dt: float = 0.002, *,
        progress: bool = False, qp_solver: str = 'quadprog') -> Trace:
    plant = ScenePlant(skill) if skill.spec.offline.scene is not None else ExactPlant(skill)
    runner = SkillRunner(skill, qp_solver)
    runner.activate(plant.measured()[0], np.zeros(skill.n_q))
    n = int(round(duration / dt))
    rows = skill.n_rows
    trace = Trace(time=np.arange(n) * dt, q=np.zeros((n, skill.n_q)),
                  joint_velocity=np.zeros((n, skill.n_q)),
                  unknown_velocity=np.zeros((n, skill.n_s)), unknowns=np.zeros((n, skill.n_s)),
                  error=np.zeros((n, rows)), slack=np.zeros((n, rows)),
                  active=np.zeros((n, rows), dtype=bool), solve_us=np.zeros(n))
    bar = _progress(n) if progress and n >= 5000 else None
    for k in range(n):
        t = k * dt
        q, u = plant.measured()
        result = runner.tick(q, u, dt)
        report = runner.diagnostics()
        trace.q[k] = plant.true_q()
        trace.unknowns[k] = runner.unknowns
        trace.joint_velocity[k] = result.joint_velocity
        trace.unknown_velocity[k] = result.unknown_velocity
        trace.error[k] = report.error
        trace.slack[k] = report.slack
        trace.active[k] = report.active
        trace.solve_us[k] = (result.eval_ns + result.solve_ns) / 1000.0
        trace.status.append(result.status.value)
        trace.events.extend((t, name) for name in result.events)
        runner.commit(result.joint_velocity, 1.0, dt)
        plant.apply(dt, result.joint_velocity)
        if bar is not None and k % 500 == 0:
            bar.update(min(500, n - k))
    if bar is not None:
        bar.close()
    return trace


def _progress(total: int):  # pragma: no cover - cosmetic
    from tqdm import tqdm
    return tqdm(total=total, unit='tick', file=sys.stderr, leave=False)


def summarise(skill: CompiledSkill, trace: Trace, duration: float, dt: float) -> dict[str, object]:
    per_constraint: dict[str, dict[str, float]] = {}
    for con in skill.spec.constraints:
        idx = [i for i, r in enumerate(skill.rows) if r.constraint == con.name]
        err = np.abs(trace.error[:, idx]) if idx else np.zeros((1, 1))
        slack = np.abs(trace.slack[:, idx]) if idx else np.zeros((1, 1))
        per_constraint[con.name] = {
            'kind': con.kind, 'hard': con.hard, 'priority': con.priority,
            'final_error': float(err[-1].max()) if err.size else 0.0,
            'max_error_last_10_percent': float(err[-max(1, len(err) // 10):].max()),
            'max_slack': float(slack.max()) if slack.size else 0.0,
            'active_fraction': float(trace.active[:, idx].mean()) if idx else 0.0,
        }
    statuses = {s: trace.status.count(s) for s in sorted(set(trace.status))}
    us = trace.solve_us[trace.solve_us > 0]
    return {
        'skill': skill.spec.name,
        'source': skill.spec.source,
        'duration_s': duration,
        'tick_s': dt,
        'ticks': len(trace.time),
        'constraints': per_constraint,
        'events': [{'time_s': round(t, 6), 'event': name} for t, name in trace.events],
        'solve_status_counts': statuses,
        'solve_time_us': {
            'median': float(np.median(us)) if us.size else None,
            'p99': float(np.percentile(us, 99)) if us.size else None,
            'max': float(us.max()) if us.size else None,
            'note': 'evaluate + solve per tick, wall clock on this machine',
        },
        'final_joint_positions': dict(zip(skill.joint_names, trace.q[-1].tolist())),
        'final_unknowns': dict(zip(skill.unknown_names, trace.unknowns[-1].tolist())),
    }


def write_outputs(skill: CompiledSkill, trace: Trace, summary: dict[str, object],
                  out_dir: Path) -> list[Path]:
    from .plots import plot_simulation

    out_dir.mkdir(parents=True, exist_ok=True)
    report = out_dir / 'report.json'
    report.write_text(json.dumps(summary, indent=2) + '\n')
    return [report, *plot_simulation(skill, trace, out_dir)]


def simulate_file(path: Path, duration: float, out_dir: Path, dt: float = 0.002,
                  progress: bool = True, qp_solver: str = 'quadprog'
                  ) -> tuple[dict[str, object], list[Path]]:
    spec = load_skill(path)
    skill = compile_skill(spec)
    if duration <= 0 or dt <= 0:
        msg = f'duration and tick must be > 0, got {duration} and {dt}'
        raise ConstraintCtrlError(msg)
    trace = run(skill, duration, dt, progress=progress, qp_solver=qp_solver)
    summary = summarise(skill, trace, duration, dt)
    return summary, write_outputs(skill, trace, summary, out_dir)


__all__ = ['Trace', 'run', 'simulate_file', 'start_pose', 'summarise']
