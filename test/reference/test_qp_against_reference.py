"""The QP the solver builds and solves, checked against an independent QP solver and KKT.

Independent formulation: from the rows (J, lo, hi, weight) and the box bounds the skill function
returns, the problem is written again here from its definition and handed to OSQP (PyPI `osqp`,
an ADMM solver unrelated to quadprog's active-set method). The optimality conditions
(Karush-Kuhn-Tucker: stationarity, primal and dual feasibility, complementary slackness
any
convex optimisation text, e.g. Boyd & Vandenberghe, Convex Optimization, sec. 5.5.3) are checked
on quadprog's own multipliers.
"""
from __future__ import annotations

import numpy as np
import pytest
import quadprog
import scipy.sparse as sp

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve.qp import SkillSolver
from skill_builders import ARM, first_order, row, skill

osqp = pytest.importorskip('osqp')


def _mixed_skill():
    return compile_skill(skill(
        ARM,
        row('tip', 'position(tool_tip)', target='vector(0.5, 0.1, 0.3)',
            behaviour=first_order(3.0), weight=50.0),
        row('down', 'cross(axis_z(tool_tip), vector(0, 0, -1))', behaviour=first_order(3.0),
            weight=20.0),
        row('floor', 'position(tool_tip)[2]', kind='at_least', lower=0.31,
            behaviour=first_order(8.0), weight=400.0),
        row('side', 'position(tool_tip)[1]', kind='at_most', upper=0.06,
            behaviour=first_order(8.0), hard=True),
        row('wrist', 'joint(joint_5)', kind='within', lower=0.4, upper=0.9,
            behaviour=first_order(4.0), weight=5.0),
        damping=0.05, joint_speed=0.6))


def _independent(solver: SkillSolver) -> tuple[np.ndarray, float]:
    """Solve the same problem, written from its definition, with OSQP
    return x and cost."""
    skill = solver.skill
    out = solver.outputs
    J, lo, hi, w = out['J'], out['lo'], out['hi'], out['weight']
    rows = skill.rows
    n = skill.n_x
    soft_in = [i for i, r in enumerate(rows) if not r.hard and r.kind != 'equal']
    soft_eq = [i for i, r in enumerate(rows) if not r.hard and r.kind == 'equal']
    m = len(soft_in)
    lam = solver.p[skill.damping_param]
    P = np.zeros((n + m, n + m))
    P[:n, :n] = J[soft_eq].T @ np.diag(w[soft_eq]) @ J[soft_eq] + lam ** 2 * np.diag(skill.reg_diag)
    P[n:, n:] = np.diag(w[soft_in])
    qv = np.zeros(n + m)
    qv[:n] = -J[soft_eq].T @ (w[soft_eq] * lo[soft_eq])
    A, lo_rows, up_rows = [], [], []
    for i, r in enumerate(rows):
        a = np.zeros(n + m)
        a[:n] = J[i]
        if not r.hard and r.kind != 'equal':
            # lo - s <= J x and J x <= hi + s written as two rows with the slack
            k = n + soft_in.index(i)
            if np.isfinite(lo[i]):
                a1 = a.copy()
                a1[k] = 1.0
                A.append(a1)
                lo_rows.append(lo[i])
                up_rows.append(np.inf)
            if np.isfinite(hi[i]):
                a2 = a.copy()
                a2[k] = -1.0
                A.append(a2)
                lo_rows.append(-np.inf)
                up_rows.append(hi[i])
        elif r.hard:
            A.append(a)
            lo_rows.append(lo[i])
            up_rows.append(hi[i])
    for j in range(n):
        a = np.zeros(n + m)
        a[j] = 1.0
        A.append(a)
        lo_rows.append(out['box_lo'][j])
        up_rows.append(out['box_hi'][j])
    prob = osqp.OSQP()
    prob.setup(sp.csc_matrix(np.triu(P)), qv, sp.csc_matrix(np.array(A)), np.array(lo_rows),
               np.array(up_rows), eps_abs=1e-11, eps_rel=1e-11, max_iter=200000, polishing=True,
               verbose=False)
    res = prob.solve(raise_error=False)
    assert res.info.status == 'solved', res.info.status
    z = res.x
    return z[:n], 0.5 * z @ P @ z + qv @ z


def test_solution_matches_osqp_on_random_states() -> None:
    solver = SkillSolver(_mixed_skill())
    rng = np.random.default_rng(11)
    for _ in range(25):
        q = np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0]) + rng.uniform(-0.3, 0.3, 6)
        x_prev = rng.uniform(-0.2, 0.2, 6)
        result = solver.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, x_prev)
        if not result.ok:
            continue
        x_ref, _ = _independent(solver)
        np.testing.assert_allclose(result.x, x_ref, atol=2e-6)


def test_kkt_conditions_hold_on_quadprog_multipliers() -> None:
    solver = SkillSolver(_mixed_skill())
    rng = np.random.default_rng(3)
    lay = solver.skill.layout
    tested = 0
    for _ in range(25):
        q = np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0]) + rng.uniform(-0.3, 0.3, 6)
        if not solver.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6)).ok:
            continue
        G, a = solver.outputs['G'].copy(), solver.outputs['a'].copy()  # the QP that was solved
        C, b = solver.outputs['C'].copy(), solver.outputs['b'].copy()
        z, _, _, _, lagr, _ = quadprog.solve_qp(G, a, C, b, lay.meq)
        residual = C.T @ z - b
        # primal feasibility
        assert residual[lay.meq:].min() >= -1e-9
        np.testing.assert_allclose(residual[:lay.meq], 0.0, atol=1e-9)
        # dual feasibility (inequality multipliers non-negative)
        assert lagr[lay.meq:].min() >= -1e-12
        # stationarity: G z - a - C lambda = 0
        np.testing.assert_allclose(G @ z - a - C @ lagr, 0.0, atol=1e-8)
        # complementary slackness
        np.testing.assert_allclose(lagr[lay.meq:] * residual[lay.meq:], 0.0, atol=1e-9)
        tested += 1
    assert tested >= 15


def test_infeasible_hard_rows_give_status_and_zero_command(tmp_path) -> None:
    spec = skill(ARM,
                 row('up', 'position(tool_tip)[2]', kind='at_least', lower=0.5, hard=True,
                     behaviour=first_order(50.0)),
                 row('down', 'position(tool_tip)[2]', kind='at_most', upper=0.2, hard=True,
                     behaviour=first_order(50.0)))
    solver = SkillSolver(compile_skill(spec))
    result = solver.solve(np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0]), np.zeros(0), np.zeros(0),
                          0.0, 0.002, np.zeros(6))
    assert result.status.value == 'infeasible'
    assert not result.x.any()


def test_non_finite_input_gives_bad_input_and_zero_command() -> None:
    solver = SkillSolver(_mixed_skill())
    q = np.array([0.0, 0.3, np.nan, 0.0, 0.6, 0.0])
    result = solver.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, np.zeros(6))
    assert result.status.value == 'bad_input'
    assert 'q' in result.message
    assert not result.x.any()
