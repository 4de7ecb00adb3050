"""A lower priority level that cannot be solved never stops the arm (issue 8 item 3).

The tick then returns the solution of the levels above with status OK and says per row which
rows were not solved. Reference for "the solution of the levels above": the same skill without
its lower level is exactly the level-1 QP (same hard rows, level-1 rows, box), solved on its own.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve import qp as qp_module
from constraint_ctrl.solve.qp import QP_SOLVERS, SkillSolver, SolveStatus
from constraint_ctrl.tools.check import check_compiled

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / 'reference'))
from skill_builders import ARM, first_order, row, skill  # noqa: E402

Q = np.array([0.1, 0.35, 0.65, 0.05, 0.55, 0.2])
LEVEL_ONE = (
    row('tip', 'position(tool_tip)', target='vector(0.45, 0.05, 0.3)', behaviour=first_order(4.0),
        weight=10.0, priority=1),
    row('low_side', 'position(tool_tip)[1]', kind='at_most', upper=0.2, hard=True,
        behaviour=first_order(4.0)),
)


def _solve(spec, qp_solver: str) -> tuple[SkillSolver, object]:
    solver = SkillSolver(compile_skill(spec), qp_solver=qp_solver)
    solver.set_start(Q, np.zeros(0))
    return solver, solver.solve(Q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6))


@pytest.mark.parametrize('qp_solver', QP_SOLVERS)
def test_injected_infeasible_lower_level_gives_level_one_and_ok(monkeypatch, qp_solver) -> None:
    two = skill(ARM, *LEVEL_ONE, row('roll', 'joint(joint_6)', target=1.0, priority=2))
    _, alone = _solve(skill(ARM, *LEVEL_ONE), qp_solver)
    solver = SkillSolver(compile_skill(two), qp_solver=qp_solver)
    level = solver._levels[0]   # noqa: SLF001 (the injection point: level 2's QP call)

    def infeasible(*_args):
        raise qp_module.QpFailure(SolveStatus.INFEASIBLE, 'constraints are inconsistent')

    monkeypatch.setattr(level, 'qp', infeasible)
    result = solver.solve(Q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6))
    assert result.status is SolveStatus.OK
    assert result.levels_solved == 1
    assert 'level 2 not solved' in result.message
    assert np.abs(result.x).max() > 1e-3          # a real command, not a stop
    np.testing.assert_allclose(result.x, alone.x, atol=1e-12)
    report = solver.diagnostics()
    names = [r.name for r in solver.skill.rows]
    assert not report.solved[names.index('roll')]
    assert report.solved[names.index('tip[0]')] and report.solved[names.index('low_side')]
    assert not report.active[names.index('roll')]


@pytest.mark.parametrize('qp_solver', QP_SOLVERS)
def test_non_finite_lower_level_row_gives_level_one_and_ok(qp_solver) -> None:
    # degenerate: a level-2 row that is NaN at this pose (sqrt of a negative number)
    two = skill(ARM, *LEVEL_ONE, row('bad', 'sqrt(joint(joint_6) - 5)', target=0.0, priority=2))
    _, alone = _solve(skill(ARM, *LEVEL_ONE), qp_solver)
    solver, result = _solve(two, qp_solver)
    assert result.status is SolveStatus.OK, result.message
    assert result.levels_solved == 1
    np.testing.assert_allclose(result.x, alone.x, atol=1e-12)
    assert not solver.diagnostics().solved[-1]


def test_check_does_not_blame_hard_rows_for_a_lower_level() -> None:
    two = skill(ARM, *LEVEL_ONE, row('bad', 'sqrt(joint(joint_6) - 5)', target=0.0, priority=2))
    from dataclasses import replace
    from constraint_ctrl.skill.schema import OfflineSpec
    spec = replace(two, offline=OfflineSpec(start=dict(zip(
        ['joint_1', 'joint_2', 'joint_3', 'joint_4', 'joint_5', 'joint_6'], Q.tolist()))))
    report = check_compiled(compile_skill(spec))
    text = '\n'.join(report.lines())
    assert 'hard rows' not in text and 'low_side' not in text.replace('rows', '')
    assert any('level 2 not solved' in w and 'bad' in w for w in report.warnings), text
