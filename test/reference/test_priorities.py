"""Priority levels: a lower level never degrades a higher one.

Reference: the lexicographic (strict hierarchy) definition of prioritised least squares: the
optimal residuals of level k are those of solving levels 1..k alone (e.g. Kanoun, Lamiraux &
Wieber, IEEE T-RO 27(4), 2011, on hierarchical quadratic programs (from memory)). The check
solves the higher level without the lower one and compares its slacks.
"""
from __future__ import annotations

import numpy as np

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve.qp import SkillSolver
from skill_builders import ARM, first_order, row, skill

HIGH = (row('tip', 'position(tool_tip)', target='vector(0.5, 0.0, 0.3)', behaviour=first_order(3.0),
            weight=1.0, priority=1),
        row('floor', 'position(tool_tip)[2]', kind='at_least', lower=0.32,
            behaviour=first_order(5.0), weight=1.0, priority=1))
LOW = (row('elbow', 'position(link_3)[0]', target=0.35, behaviour=first_order(3.0), priority=2),
       row('roll', 'joint(joint_6)', target=1.0, behaviour=first_order(3.0), priority=2),
       row('pull_tip', 'position(tool_tip)[2]', target=0.1, behaviour=first_order(3.0),
           weight=100.0, priority=3))


def test_lower_levels_never_degrade_higher_ones() -> None:
    both = SkillSolver(compile_skill(skill(ARM, *HIGH, *LOW, damping=0.05)))
    alone = SkillSolver(compile_skill(skill(ARM, *HIGH, damping=0.05)))
    rng = np.random.default_rng(5)
    n_high = 4  # tip x/y/z and floor
    compared = 0
    for _ in range(20):
        q = np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0]) + rng.uniform(-0.25, 0.25, 6)
        r_both = both.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6))
        r_alone = alone.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6))
        assert r_both.ok and r_alone.ok
        slack_both = both.diagnostics().slack[:n_high]
        slack_alone = alone.diagnostics().slack[:n_high]
        np.testing.assert_allclose(slack_both, slack_alone, atol=1e-7)
        compared += 1
    assert compared == 20


def test_lower_level_uses_the_remaining_freedom() -> None:
    # with the tip held (3 of 6 joint directions), joint 6 is free: the level-2 roll row moves it
    solver = SkillSolver(compile_skill(skill(ARM, *HIGH, *LOW[:2], damping=0.01)))
    q = np.array([0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0])
    x = np.zeros(6)
    for k in range(3000):
        result = solver.solve(q, np.zeros(0), np.zeros(0), k * 0.002, 0.002, x)
        assert result.ok
        x = result.x
        q = q + 0.002 * x
    report = solver.diagnostics()
    names = [r.name for r in solver.skill.rows]
    assert abs(report.error[names.index('roll')]) < 1e-3
    # x and y of the tip are met; its z target (0.30) fights the floor row (>= 0.32) at the
    # same level, so z settles between the two
    assert np.abs(report.error[:2]).max() < 1e-4
    assert 0.30 < report.value[2] < 0.32
