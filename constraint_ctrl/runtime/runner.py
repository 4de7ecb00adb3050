"""Runs one active skill tick by tick: its clock, unknowns and events.

The skill clock advances by dt times the speed scale the watchdog applied to the last command
(``commit``), so when the arm is slowed or stopped near a person, time-based targets (ramps,
sweeps) slow or stop with it, and the arm resumes where it left off instead of chasing a target
that ran ahead. Feature variables are integrated with the same scale for the same reason.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..skill.compile import CompiledSkill
from ..solve.qp import RowReport, SkillSolver, SolveResult, SolveStatus


@dataclass(slots=True)
class TickResult:
    """One tick's output before the watchdog: joint velocity command and what happened."""

    skill: str
    joint_velocity: np.ndarray
    unknown_velocity: np.ndarray
    status: SolveStatus
    message: str
    skill_time: float
    events: list[str] = field(default_factory=list)
    eval_ns: int = 0
    solve_ns: int = 0

    @property
    def ok(self) -> bool:
        return self.status is SolveStatus.OK


class EventTracker:
    """Raises an event once its condition has held for ``hold_for`` seconds (re-arms on false)."""

    def __init__(self, names: tuple[str, ...], hold_for: tuple[float, ...]) -> None:
        self.names = names
        self.hold_for = np.asarray(hold_for, dtype=float)
        self.since = np.full(len(names), np.nan)
        self.raised = np.zeros(len(names), dtype=bool)

    def update(self, t: float, values: np.ndarray) -> list[str]:
        out: list[str] = []
        for i, name in enumerate(self.names):
            if values[i] > 0.5:
                if np.isnan(self.since[i]):
                    self.since[i] = t
                if not self.raised[i] and t - self.since[i] >= self.hold_for[i] - 1e-12:
                    self.raised[i] = True
                    out.append(name)
            else:
                self.since[i] = np.nan
                self.raised[i] = False
        return out


class SkillRunner:
    """State of one skill while it is active; built when the skill is loaded, reset on
    activation."""

    def __init__(self, skill: CompiledSkill, qp_solver: str = 'quadprog') -> None:
        self.skill = skill
        self.solver = SkillSolver(skill, qp_solver=qp_solver)
        self.unknowns = skill.start_unknowns()
        self.start_q = np.zeros(skill.n_q)                 # pose at activation (start_value())
        self.start_unknowns = self.unknowns.copy()
        self.time = 0.0
        self.x_prev = np.zeros(skill.n_x)
        self.events = EventTracker(skill.event_names,
                                   tuple(ev.hold_for for ev in skill.spec.events))
        self._last_unknown_velocity = np.zeros(skill.n_s)

    @property
    def name(self) -> str:
        return self.skill.spec.name

    def activate(self, q: np.ndarray, joint_velocity: np.ndarray) -> None:
        """Start from the skill's unknowns at their start values, its clock at 0, continuing the
        last command.

        ``q`` is remembered as the start pose that start_value() in formulas refers to.
        """
        self.unknowns = self.skill.start_unknowns()
        self.start_q = np.array(q, dtype=float)
        self.start_unknowns = self.unknowns.copy()
        self.solver.set_start(q, self.unknowns)
        self.time = 0.0
        self.x_prev = np.concatenate([joint_velocity, np.zeros(self.skill.n_s)])
        self.events = EventTracker(self.skill.event_names,
                                   tuple(ev.hold_for for ev in self.skill.spec.events))

    def continue_from(self, old: SkillRunner, q: np.ndarray,
                      joint_velocity: np.ndarray) -> str | None:
        """Take over from another version of this skill (a reloaded file) without a restart.

        The skill clock, the start pose (what start_value() refers to), the unknowns, their
        last velocities and the event states carry over when the unknowns are the same (by
        name); rows may differ, since they are recomputed from these every tick. Returns None
        when it carried over, else why it restarted instead (activate(): clock 0, unknowns at
        their start values, start pose = ``q``).
        """
        if sorted(old.skill.unknown_names) != sorted(self.skill.unknown_names):
            self.activate(q, joint_velocity)
            return (f'unknowns changed ({list(old.skill.unknown_names)} -> '
                    f'{list(self.skill.unknown_names)}): restarted with its start values')
        where = [old.skill.unknown_names.index(n) for n in self.skill.unknown_names]
        self.unknowns = old.unknowns[where].copy()
        self.start_q = old.start_q.copy()
        self.start_unknowns = old.start_unknowns[where].copy()
        self.solver.set_start(self.start_q, self.start_unknowns)
        self.time = old.time
        n_q = self.skill.n_q
        self.x_prev = np.concatenate([joint_velocity, old.x_prev[n_q:][where]])
        self._last_unknown_velocity = old._last_unknown_velocity[where].copy()
        self.events = EventTracker(self.skill.event_names,
                                   tuple(ev.hold_for for ev in self.skill.spec.events))
        for i, name in enumerate(self.skill.event_names):
            if name in old.skill.event_names:
                j = old.skill.event_names.index(name)
                self.events.since[i] = old.events.since[j]
                self.events.raised[i] = old.events.raised[j]
        return None

    def tick(self, q: np.ndarray, u: np.ndarray, dt: float) -> TickResult:
        result: SolveResult = self.solver.solve(q, self.unknowns, u, self.time, dt, self.x_prev)
        n_q = self.skill.n_q
        events: list[str] = []
        if result.ok:
            events = self.events.update(self.time, self.solver.outputs['events'])
        self._last_unknown_velocity = result.x[n_q:]
        return TickResult(skill=self.name, joint_velocity=result.x[:n_q],
                          unknown_velocity=result.x[n_q:], status=result.status,
                          message=result.message, skill_time=self.time, events=events,
                          eval_ns=result.eval_ns, solve_ns=result.solve_ns)

    def commit(self, sent_joint_velocity: np.ndarray, scale: float, dt: float) -> None:
        """Record what was actually sent; advance the clock and unknowns by the applied scale."""
        scale = float(min(max(scale, 0.0), 1.0))
        self.x_prev[:self.skill.n_q] = sent_joint_velocity
        self.x_prev[self.skill.n_q:] = scale * self._last_unknown_velocity
        self.unknowns += dt * scale * self._last_unknown_velocity
        self.time += dt * scale

    def diagnostics(self) -> RowReport:
        return self.solver.diagnostics()


__all__ = ['EventTracker', 'SkillRunner', 'TickResult']
