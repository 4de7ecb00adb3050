"""One soft equality task with regularisation is damped least squares.

Reference: the damped least-squares inverse x = J^T (J J^T + lambda^2 I)^-1 v, published by
Wampler (IEEE Trans. SMC 16(1), 1986) and Nakamura & Hanafusa (ASME J. Dyn. Sys. 108, 1986)
(bibliographic details from memory). Computed here with plain numpy from the solver's own J and
row targets, independently of the QP assembly.
"""
from __future__ import annotations

import numpy as np
import pytest

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve.qp import SkillSolver
from skill_builders import ARM, first_order, row, skill


@pytest.mark.parametrize('damping', [0.01, 0.1, 0.5])
def test_single_soft_task_equals_damped_least_squares(damping: float) -> None:
    spec = skill(ARM, row('tip', 'position(tool_tip)', target='vector(0.45, 0.05, 0.33)',
                          behaviour=first_order(0.5)), damping=damping)
    solver = SkillSolver(compile_skill(spec))
    rng = np.random.default_rng(7)
    checked = 0
    for _ in range(20):
        q = np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0]) + rng.uniform(-0.15, 0.15, 6)
        result = solver.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6))
        assert result.ok
        J = solver.outputs['J']
        v = solver.outputs['lo']
        box_lo, box_hi = solver.outputs['box_lo'], solver.outputs['box_hi']
        dls = J.T @ np.linalg.solve(J @ J.T + damping ** 2 * np.eye(3), v)
        if np.any(dls <= box_lo + 1e-9) or np.any(dls >= box_hi - 1e-9):
            continue  # a joint limit row would be active: not the unconstrained formula
        np.testing.assert_allclose(result.x, dls, rtol=1e-9, atol=1e-12)
        checked += 1
    assert checked >= 15
