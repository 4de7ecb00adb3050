"""Soft inequality rows solved without slack variables give the same commands (issue 11 item 5).

solve/soft_rows.py replaces a level's QP over [x, one slack per soft inequality row] by QPs over
x alone and accepts a solution only at a fixed point of its guess of the violated rows. Checked
here against:
- the QP with the slack variables as the engine solved it before (``slack_variables=True``), with
  the same library solver: quadprog (Goldfarb-Idnani) and DAQP (dual active set), to 1e-6;
- OSQP (PyPI `osqp`, an ADMM method unrelated to either) on the problem written again from its
  definition (test_qp_against_reference.py: ``_independent``), to 2e-6 as there;
on the generated chains of the benchmark's scaling table (the 48 joints x 200 rows cell among
them), along a closed-loop run and at random states (jumps, so the guess from the last call is
wrong), and on a small skill with 'within', hard and at-least rows. The reduced path must be the
one that ran (the fallback to the full QP is counted), so the comparison cannot pass by falling
back every time.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve import qp, soft_rows
from constraint_ctrl.solve.qp import SkillSolver
from constraint_ctrl.solve.soft_rows import SoftRowQp
from constraint_ctrl.tools.bench import generated_chain_urdf, generated_skill
from test_qp_against_reference import _independent, _mixed_skill

pytest.importorskip('daqp')
EMPTY = np.zeros(0)


def _chain(tmp_path: Path, joints: int, rows: int, levels: int):
    urdf = tmp_path / 'chain.urdf'
    urdf.write_text(generated_chain_urdf(joints))
    return compile_skill(generated_skill(urdf, joints, rows, levels))


def _reduced_calls(solver: SkillSolver) -> list[SoftRowQp]:
    calls = [solver._qp] + [level.qp for level in solver._levels]   # noqa: SLF001
    return [c for c in calls if isinstance(c, SoftRowQp)]


def _compare(skill, qp_solver: str, ticks: int, jumps: int, seed: int) -> int:
    """Closed loop, then random jumps: reduced vs slack variables; returns reduced solves."""
    new = SkillSolver(skill, qp_solver)
    old = SkillSolver(skill, qp_solver, slack_variables=True)
    reduced = _reduced_calls(new)
    assert reduced, 'the reduced path is not in use on this skill'
    n = skill.n_q
    q, x, dt = np.full(n, 0.3), np.zeros(n), 0.002
    solved_reduced = 0
    rng = np.random.default_rng(seed)
    for k in range(ticks + jumps):
        if k >= ticks:    # a jump: the violated rows of the last call are a wrong guess
            q, x = rng.uniform(-1.0, 1.0, n), rng.uniform(-0.5, 0.5, n)
        a = new.solve(q, EMPTY, EMPTY, k * dt, dt, x)
        b = old.solve(q, EMPTY, EMPTY, k * dt, dt, x)
        assert a.status is b.status and a.levels_solved == b.levels_solved, (a.message,
                                                                             b.message)
        np.testing.assert_allclose(a.x, b.x, atol=1e-6, rtol=0)
        solved_reduced += all(c.rounds > 0 for c in reduced)
        x = b.x
        q = q + dt * x
    return solved_reduced


@pytest.mark.parametrize(('joints', 'rows', 'levels'),
                         [(48, 200, 1), (48, 200, 2), (24, 200, 1), (6, 200, 2), (24, 50, 1)])
def test_same_commands_as_with_slack_variables_quadprog(tmp_path, joints, rows, levels) -> None:
    skill = _chain(tmp_path, joints, rows, levels)
    solved_reduced = _compare(skill, 'quadprog', ticks=80, jumps=6, seed=joints + rows)
    assert solved_reduced >= 70      # most ticks never needed the full QP


@pytest.mark.parametrize(('joints', 'rows', 'levels'), [(48, 200, 1), (12, 200, 2)])
def test_same_commands_as_with_slack_variables_daqp(tmp_path, joints, rows, levels) -> None:
    skill = _chain(tmp_path, joints, rows, levels)
    solved_reduced = _compare(skill, 'daqp', ticks=60, jumps=4, seed=levels)
    assert solved_reduced >= 50


@pytest.mark.parametrize('joints', [6, 12])
def test_same_commands_as_osqp_from_the_definition(tmp_path, joints) -> None:
    """OSQP reaches 1e-6 on these; on 24 and 48 joints it stops ~1e-5 away (the active-set
    solvers agree to 1e-11 there), so those are checked against bare DAQP below."""
    skill = _chain(tmp_path, joints, 200, 1)
    solver = SkillSolver(skill)
    reduced = _reduced_calls(solver)
    rng = np.random.default_rng(joints)
    q, x, dt = np.full(joints, 0.3), np.zeros(joints), 0.002
    for k in range(40):                  # a closed loop first, so the guess is warm
        x = solver.solve(q, EMPTY, EMPTY, k * dt, dt, x).x
        q = q + dt * x
    checked = 0
    for k in range(4):
        if k:
            q, x = rng.uniform(-1.0, 1.0, joints), rng.uniform(-0.5, 0.5, joints)
        for _ in range(2):               # the second call starts from the first one's guess
            result = solver.solve(q, EMPTY, EMPTY, 0.0, dt, x)
            assert result.ok, result.message
        assert reduced[0].rounds > 0
        x_ref, _ = _independent(solver)
        np.testing.assert_allclose(result.x, x_ref, atol=2e-6, rtol=0)
        checked += int(np.abs(result.x).max() > 1e-3)
    assert checked >= 3


def test_within_hard_and_at_least_rows_without_slacks(monkeypatch) -> None:
    """A 'within' row shares one slack between its two sides; hard rows keep no slack."""
    monkeypatch.setattr(qp, 'SLACK_ELIMINATION_MIN', 0)   # small skill: reduce it anyway
    skill = _mixed_skill()
    for qp_solver in qp.QP_SOLVERS:
        new = SkillSolver(skill, qp_solver)
        old = SkillSolver(skill, qp_solver, slack_variables=True)
        (reduced,) = _reduced_calls(new)
        rng = np.random.default_rng(5)
        compared = 0
        for _ in range(30):
            q = np.array([0.0, 0.3, 0.7, 0.0, 0.6, 0.0]) + rng.uniform(-0.4, 0.4, 6)
            x_prev = rng.uniform(-0.2, 0.2, 6)
            for _ in range(2):
                a = new.solve(q, EMPTY, EMPTY, 0.0, 0.002, x_prev)
            b = old.solve(q, EMPTY, EMPTY, 0.0, 0.002, x_prev)
            assert a.status is b.status
            if not a.ok:
                continue
            np.testing.assert_allclose(a.x, b.x, atol=1e-6, rtol=0)
            x_ref, _ = _independent(new)
            np.testing.assert_allclose(a.x, x_ref, atol=2e-6, rtol=0)
            # the report's active flags (mapped back from the reduced QP's columns): a row
            # clearly outside its bounds is active in both, and so is every hard row that is
            report_new, report_old = new.diagnostics(), old.diagnostics()
            outside = report_old.slack > 1e-6
            assert (report_new.active[outside] & report_old.active[outside]).all()
            hard = np.array([r.hard for r in skill.rows])
            assert (report_new.active[hard] == report_old.active[hard]).all()
            compared += int(reduced.rounds > 0)
        assert compared >= 15


def test_the_full_qp_is_solved_when_the_guess_does_not_settle(tmp_path, monkeypatch) -> None:
    skill = _chain(tmp_path, 48, 200, 1)
    monkeypatch.setattr(soft_rows, 'MAX_ROUNDS', 1)
    new = SkillSolver(skill)
    old = SkillSolver(skill, slack_variables=True)
    (reduced,) = _reduced_calls(new)
    rng = np.random.default_rng(2)
    fell_back = 0
    for _ in range(5):
        q, x = rng.uniform(-1.0, 1.0, 48), rng.uniform(-0.5, 0.5, 48)
        before = reduced.fallbacks
        a = new.solve(q, EMPTY, EMPTY, 0.0, 0.002, x)
        b = old.solve(q, EMPTY, EMPTY, 0.0, 0.002, x)
        np.testing.assert_allclose(a.x, b.x, atol=1e-6, rtol=0)
        fell_back += reduced.fallbacks - before
        # the next call starts from the violated rows of the full QP's solution: one guess
        a = new.solve(q, EMPTY, EMPTY, 0.0, 0.002, x)
        assert reduced.rounds == 1
        np.testing.assert_allclose(a.x, b.x, atol=1e-6, rtol=0)
    assert fell_back >= 3     # a jump to a random state changes the violated rows


def test_same_commands_as_bare_daqp_on_the_qp_with_slacks(tmp_path) -> None:
    """48 joints x 200 rows: DAQP called directly (no code of ours around it) on the level's QP
    with its slack variables, as the compiled function writes it (H = G, f = -a, A = C^T)."""
    import daqp
    skill = _chain(tmp_path, 48, 200, 1)
    solver = SkillSolver(skill)
    (reduced,) = _reduced_calls(solver)
    rng = np.random.default_rng(48)
    q, x, dt = np.full(48, 0.3), np.zeros(48), 0.002
    checked = 0
    for k in range(60):
        if k % 10 == 9:
            q, x = rng.uniform(-1.0, 1.0, 48), rng.uniform(-0.5, 0.5, 48)
        result = solver.solve(q, EMPTY, EMPTY, k * dt, dt, x)
        assert result.ok, result.message
        out = solver.outputs
        G, a, C, b = (np.array(out[key]) for key in ('G', 'a', 'C', 'b'))
        z, _, flag, _ = daqp.solve(G, -a, np.ascontiguousarray(C.T), np.full(b.size, 1e30), b,
                                   np.zeros(b.size, dtype=np.intc), primal_tol=1e-10)
        assert flag == 1
        np.testing.assert_allclose(result.x, z[:48], atol=1e-6, rtol=0)
        checked += int(reduced.rounds > 0)
        x = result.x
        q = q + dt * x
    assert checked >= 50


def test_objective_formed_by_the_solver_is_the_compiled_one(tmp_path, monkeypatch) -> None:
    """Large skills (more than EXPAND_LIMIT Jacobian entries) leave G and a to the solver (BLAS);
    both must equal the definition (solve/qp.py module docstring: G = H^T H + lambda^2 diag(r)
    beside diag(w) of the slacks, a = H^T sqrt(w) v, H = sqrt(w) J over the soft equality rows)
    and CasADi's own G and a of the same skill compiled the old way."""
    from constraint_ctrl.skill import compile as compile_module
    urdf = tmp_path / 'chain.urdf'
    urdf.write_text(generated_chain_urdf(24))
    spec = generated_skill(urdf, 24, 200, 1)
    large = compile_skill(spec)
    monkeypatch.setattr(compile_module, 'EXPAND_LIMIT', 10 ** 6)
    compiled = compile_skill(spec)
    assert large.objective_by_solver and not compiled.objective_by_solver
    one, two = SkillSolver(large), SkillSolver(compiled)
    rng = np.random.default_rng(7)
    for _ in range(3):
        q, x = rng.uniform(-1.0, 1.0, 24), rng.uniform(-0.5, 0.5, 24)
        a = one.solve(q, EMPTY, EMPTY, 0.0, 0.002, x)
        b = two.solve(q, EMPTY, EMPTY, 0.0, 0.002, x)
        np.testing.assert_allclose(a.x, b.x, atol=1e-9, rtol=0)
        out, ref = one.outputs, two.outputs
        np.testing.assert_allclose(out['G'], ref['G'], atol=1e-9, rtol=1e-12)
        np.testing.assert_allclose(out['a'], ref['a'], atol=1e-9, rtol=1e-12)
        # from the definition, with the rows' own J, targets and weights
        lay = large.layout
        eq, ineq = list(lay.soft_eq), list(lay.soft_ineq)
        J, lo, w = out['J'], out['lo'], out['weight']
        lam = one.p[large.damping_param]
        G = np.zeros((lay.n_z, lay.n_z))
        G[:24, :24] = J[eq].T @ (w[eq, None] * J[eq]) + lam ** 2 * np.diag(large.reg_diag)
        G[24:, 24:] = np.diag(w[ineq])
        np.testing.assert_allclose(out['G'], G, atol=1e-9, rtol=1e-12)
        np.testing.assert_allclose(out['a'][:24], J[eq].T @ (w[eq] * lo[eq]), atol=1e-9,
                                   rtol=1e-12)
        assert not out['a'][24:].any()
