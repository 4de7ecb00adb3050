"""A lower priority level can never stop the arm (issue 8 item 3).

When level 1 drives joints onto their speed or acceleration limit, the active-set solver returns
the level-1 solution with round-off of about 1e-13 beyond the bound (a property of floating point,
not of the skill). The lower level must treat that solution as feasible: the skill below is
feasible on every tick by construction (level 2 has slacks or is a soft equality; the hard rows
are absent), so every tick of a lockstep run must return OK and a non-zero command while the
target is far away.

Reference for "feasible": the level-1 solution itself satisfies every bound of the lower level up
to round-off, so the lexicographic definition (see test_priorities.py) always has a solution.
"""
from __future__ import annotations

import numpy as np

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.schema import LimitsSpec
from constraint_ctrl.solve.qp import SkillSolver
from skill_builders import ARM, first_order, row, skill

START = np.array([0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0])
DT = 0.002


def _two_level_skill(*, joint_speed: float | None, joint_acceleration: float | None):
    spec = skill(
        ARM,
        # level 1: a far target with a high gain, so the joints run into their limits
        row('tip', 'position(tool_tip)', target='vector(0.30, 0.35, 0.45)',
            behaviour=first_order(20.0), weight=100.0, priority=1),
        # level 2: a posture wish in what freedom is left
        row('roll', 'joint(joint_6)', target=1.2, behaviour=first_order(5.0), priority=2),
        row('wrist', 'joint(joint_4)', kind='within', lower=-0.2, upper=0.2,
            behaviour=first_order(5.0), priority=2),
        damping=0.02)
    from dataclasses import replace
    return compile_skill(replace(spec, limits=LimitsSpec(joint_speed=joint_speed,
                                                         joint_acceleration=joint_acceleration)))


def _lockstep(solver: SkillSolver, ticks: int) -> tuple[int, int, float]:
    """Ticks that were not OK, ticks with a speed at its limit, largest speed reached."""
    q, x = START.copy(), np.zeros(6)
    not_ok = saturated = 0
    largest = 0.0
    for k in range(ticks):
        result = solver.solve(q, np.zeros(0), np.zeros(0), k * DT, DT, x)
        if not result.ok:
            not_ok += 1
        box_lo, box_hi = solver.outputs['box_lo'], solver.outputs['box_hi']
        if result.ok and (np.isclose(result.x, box_hi, atol=1e-9).any()
                          or np.isclose(result.x, box_lo, atol=1e-9).any()):
            saturated += 1
        largest = max(largest, float(np.abs(result.x).max()))
        x = result.x
        q = q + DT * x
    return not_ok, saturated, largest


def test_level_one_at_the_speed_limit_never_stops_the_tick() -> None:
    solver = SkillSolver(_two_level_skill(joint_speed=0.3, joint_acceleration=None))
    not_ok, saturated, largest = _lockstep(solver, 400)
    assert not_ok == 0, f'{not_ok} of 400 ticks stopped the arm'
    assert saturated > 50, 'the scenario must drive level 1 onto the speed limit'
    assert largest <= 0.3 + 1e-9   # the limit still holds for the command


def test_level_one_at_the_acceleration_limit_never_stops_the_tick() -> None:
    solver = SkillSolver(_two_level_skill(joint_speed=0.8, joint_acceleration=2.0))
    not_ok, saturated, largest = _lockstep(solver, 400)
    assert not_ok == 0, f'{not_ok} of 400 ticks stopped the arm'
    assert saturated > 50, 'the scenario must drive level 1 onto the acceleration limit'
    assert largest <= 0.8 + 1e-9
