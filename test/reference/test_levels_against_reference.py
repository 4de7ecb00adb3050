"""Priority levels against an independent solver solving the same lexicographic sequence.

Definition (strict hierarchy of prioritised least squares; e.g. Kanoun, Lamiraux & Wieber, IEEE
T-RO 27(4), 2011 (from memory)): level k minimises its own objective (soft equality residuals,
soft inequality slacks, the damping) over the x that keep every row of the levels above as it
was solved: equality rows at J_i x = J_i x_(its level), inequality rows within their bounds
widened by the slack their level needed; hard rows and the box always hold.

Here each level is written again from that definition, from the rows (J, lo, hi, weight) and the
box the compiled skill returns, in another formulation than the engine's: the held equality rows
are substituted away (x = x_above + N y, N an orthonormal null-space basis from scipy's SVD), so
they hold exactly, and each level is solved by DAQP (PyPI `daqp`, a dual active-set solver
written independently of quadprog) at a 1e-12 tolerance. Every bound a level repeats from the
levels above (held rows, hard rows, the box) is widened by TOL, because no solver returns a
level's solution exactly on its active bounds. OSQP (the level-1 reference in
test_qp_against_reference.py) was tried first: on these nearly dependent held rows its ADMM
iterations hit the iteration limit or reported false infeasibility on 2-3 of 20 states, and did
not reach 1e-6 where it did finish, so it cannot serve as the reference here. The engine's
command must agree to 1e-6 with the reference with both of its QP solvers, and the two solvers
with each other.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import null_space

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve.qp import QP_SOLVERS, SkillSolver
from skill_builders import ARM, first_order, row, skill

daqp = pytest.importorskip('daqp')

START = np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0])
#: Feasibility tolerance of the reference on repeated bounds (relative to the bound's size).
TOL = 1e-9


def _widen(low: float, up: float) -> tuple[float, float]:
    return low - TOL * (1 + abs(low)), up + TOL * (1 + abs(up))


def three_level_skill(joint_acceleration: float | None = 8.0):
    from dataclasses import replace
    from constraint_ctrl.skill.schema import LimitsSpec
    spec = skill(
        ARM,
        row('tip', 'position(tool_tip)', target='vector(0.45, 0.1, 0.35)',
            behaviour=first_order(6.0), weight=50.0, priority=1),
        row('floor', 'position(tool_tip)[2]', kind='at_least', lower=0.33,
            behaviour=first_order(8.0), weight=400.0, priority=1),
        row('side', 'position(tool_tip)[1]', kind='at_most', upper=0.12,
            behaviour=first_order(8.0), hard=True),
        row('down', 'cross(axis_z(tool_tip), vector(0, 0, -1))', behaviour=first_order(3.0),
            weight=20.0, priority=2),
        row('wrist', 'joint(joint_4)', kind='within', lower=-0.3, upper=0.3,
            behaviour=first_order(4.0), weight=5.0, priority=2),
        row('roll', 'joint(joint_6)', target=0.8, behaviour=first_order(3.0), priority=3),
        damping=0.05)
    return compile_skill(replace(spec, limits=LimitsSpec(joint_speed=0.5,
                                                         joint_acceleration=joint_acceleration)))


def _reference_level(P, qv, A, lo, up) -> np.ndarray:
    """min 1/2 z'Pz + qv'z s.t. lo <= A z <= up, by DAQP (dual active set, tolerance 1e-12)."""
    A = np.ascontiguousarray(np.array(A, dtype=float).reshape(len(lo), -1))
    lo = np.clip(np.array(lo, dtype=float), -1e30, 1e30)
    up = np.clip(np.array(up, dtype=float), -1e30, 1e30)
    z, _, flag, _ = daqp.solve(np.ascontiguousarray(P), np.array(qv, dtype=float), A, up, lo,
                               np.zeros(len(lo), dtype=np.intc), primal_tol=1e-12)
    if flag == -1:
        raise ReferenceInfeasible
    assert flag == 1, flag
    return np.asarray(z)


class ReferenceInfeasible(Exception):
    """The reference found a level infeasible."""


def independent_levels(solver: SkillSolver) -> np.ndarray:
    """The lexicographic sequence, each level solved by OSQP (module docstring).

    Held equality rows are removed by substitution, x = x_above + N y with N an orthonormal basis
    of their null space (scipy.linalg.null_space, an SVD), so they hold exactly; everything else
    is handed to OSQP as bounds on A x.
    """
    skill = solver.skill
    out = solver.outputs
    J, lo, hi, w = out['J'], out['lo'], out['hi'], out['weight']
    box_lo, box_hi = out['box_lo'], out['box_hi']
    rows = skill.rows
    n = skill.n_x
    lam = solver.p[skill.damping_param]
    held_eq = [i for i, r in enumerate(rows) if r.hard and r.kind == 'equal']
    held: list[tuple[int, float, float]] = [(i, lo[i], hi[i]) for i, r in enumerate(rows)
                                            if r.hard and r.kind != 'equal']
    x = np.zeros(n)
    for number, level in enumerate(skill.layout.levels):
        widen = _widen if number else (lambda low, up: (low, up))
        now = [i for i, r in enumerate(rows) if not r.hard and r.level == level]
        eq = [i for i in now if rows[i].kind == 'equal']
        ineq = [i for i in now if rows[i].kind != 'equal']
        m = len(ineq)
        # level 1 keeps hard equality rows as OSQP equalities; below, they are substituted
        N = null_space(J[held_eq], rcond=1e-9) if number and held_eq else np.eye(n)
        x_ref = x if number else np.zeros(n)
        k_y = N.shape[1]
        Px = J[eq].T @ np.diag(w[eq]) @ J[eq] + lam ** 2 * np.diag(skill.reg_diag)
        qx = -J[eq].T @ (w[eq] * lo[eq])
        P = np.zeros((k_y + m, k_y + m))
        P[:k_y, :k_y] = N.T @ Px @ N
        P[k_y:, k_y:] = np.diag(w[ineq])
        qv = np.zeros(k_y + m)
        qv[:k_y] = N.T @ (Px @ x_ref + qx)
        A, lb, ub = [], [], []

        def add(coef: np.ndarray, low: float, up: float, slack: int | None = None,
                sign: float = 1.0) -> None:
            a = np.zeros(k_y + m)
            a[:k_y] = coef @ N
            if slack is not None:
                a[k_y + slack] = sign
            shift = coef @ x_ref
            if not a.any() or np.abs(a).max() < 1e-12:
                # a held row with no component left in the null space: x_ref decides it
                assert low - 1e-8 <= shift <= up + 1e-8
                return
            A.append(a)
            lb.append(low - shift)
            ub.append(up - shift)

        if not number:
            for i in held_eq:
                add(J[i], lo[i], lo[i])
        for i, low, up in held:
            add(J[i], *widen(low, up))
        for k, i in enumerate(ineq):
            if np.isfinite(lo[i]):
                add(J[i], lo[i], np.inf, k, 1.0)
            if np.isfinite(hi[i]):
                add(J[i], -np.inf, hi[i], k, -1.0)
        eye = np.eye(n)
        for j in range(n):
            add(eye[j], *widen(box_lo[j], box_hi[j]))
        x = x_ref + N @ _reference_level(P, qv, A, lb, ub)[:k_y]
        jx = J @ x
        for i in now:
            if rows[i].kind == 'equal':
                held_eq.append(i)
            else:
                slack = max(0.0, lo[i] - jx[i]) + max(0.0, jx[i] - hi[i])
                held.append((i, lo[i] - slack, hi[i] + slack))
    return x


@pytest.mark.parametrize('qp_solver', QP_SOLVERS)
def test_three_levels_match_the_lexicographic_sequence_solved_by_osqp(qp_solver: str) -> None:
    # random states and last commands: without the acceleration limit, whose box around a random
    # last command could make the hard row infeasible
    solver = SkillSolver(three_level_skill(joint_acceleration=None), qp_solver=qp_solver)
    assert len(solver.skill.layout.levels) == 3
    rng = np.random.default_rng(21)
    compared = 0
    for _ in range(25):
        q = START + rng.uniform(-0.3, 0.3, 6)
        x_prev = rng.uniform(-0.3, 0.3, 6)
        result = solver.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, x_prev)
        if not result.ok:
            # the hard row cannot hold within the speed limits here: the reference agrees
            assert result.status.value == 'infeasible'
            with pytest.raises(ReferenceInfeasible):
                independent_levels(solver)
            continue
        assert result.levels_solved == 3, result.message
        np.testing.assert_allclose(result.x, independent_levels(solver), atol=1e-6)
        compared += 1
    assert compared >= 15


@pytest.mark.parametrize('qp_solver', QP_SOLVERS)
def test_levels_match_along_a_closed_loop_run_at_the_limits(qp_solver: str) -> None:
    # lockstep run: the tip row drives joints onto the speed and acceleration limits
    solver = SkillSolver(three_level_skill(), qp_solver=qp_solver)
    q, x = START.copy(), np.zeros(6)
    at_limit = 0
    for k in range(300):
        result = solver.solve(q, np.zeros(0), np.zeros(0), k * 0.002, 0.002, x)
        assert result.ok and result.levels_solved == 3, result.message
        if k % 15 == 0:
            np.testing.assert_allclose(result.x, independent_levels(solver), atol=1e-6)
        box_lo, box_hi = solver.outputs['box_lo'], solver.outputs['box_hi']
        at_limit += bool(np.isclose(result.x, box_hi, atol=1e-9).any()
                         or np.isclose(result.x, box_lo, atol=1e-9).any())
        x = result.x
        q = q + 0.002 * x
    assert at_limit > 20
