"""The two QP solvers give the same commands on the same matrices (issue 11 item 5).

quadprog (Goldfarb-Idnani dual active set, in C from the Fortran original) and DAQP (PyPI `daqp`,
a dual active-set method written independently) solve the very QPs the engine builds: the
generated chains of the benchmark's scaling table (one and two priority levels, many soft
inequality rows; every cell of the table) at random states, and every skill of the package along
a lockstep run. Their commands must agree to 1e-6 and their statuses must match (one cell is a
known exception, APART).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.loader import load_skill
from constraint_ctrl.solve.qp import SkillSolver
from constraint_ctrl.tools.bench import generated_chain_urdf, generated_skill
from constraint_ctrl.tools.simulate import start_pose

pytest.importorskip('daqp')
SKILLS = sorted((Path(__file__).resolve().parents[2] / 'config' / 'skills').glob('*.yaml'))


#: Every cell of the benchmark's scaling table (tools/bench.py: bench_scaling).
CELLS = [(j, r, lv) for j in (6, 12, 24, 48) for r in (10, 50, 200) for lv in (1, 2)]
#: Cells where the two solvers' second levels differ by more than 1e-6 at these states: the
#: lower level holds ~30 equality rows of level 1 in bands of 1e-12 on a 48-joint chain with
#: links of 1 cm, and DAQP's primal tolerance (1e-10) moves its solution along the nearly
#: singular directions of the held rows (seen: 7.7e-6 here, up to 2.4e-4 along a closed loop).
#: Both solvers agree with themselves without slack variables to 1e-9
#: (test_soft_rows_without_slacks.py); which of the two is nearer the exact lower level is not
#: settled.
APART = {(48, 200, 2)}


@pytest.mark.parametrize(('joints', 'rows', 'levels'), [
    pytest.param(*cell, marks=pytest.mark.xfail(strict=True, reason='see APART'))
    if cell in APART else cell for cell in CELLS])
def test_solvers_agree_on_generated_chains(tmp_path, joints, rows, levels) -> None:
    urdf = tmp_path / 'chain.urdf'
    urdf.write_text(generated_chain_urdf(joints))
    skill = compile_skill(generated_skill(urdf, joints, rows, levels))
    one, two = SkillSolver(skill, 'quadprog'), SkillSolver(skill, 'daqp')
    rng = np.random.default_rng(joints * rows + levels)
    compared = 0
    for _ in range(8):
        q = rng.uniform(-1.0, 1.0, joints)
        x_prev = rng.uniform(-0.5, 0.5, joints)
        a = one.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, x_prev)
        b = two.solve(q, np.zeros(0), np.zeros(0), 0.0, 0.002, x_prev)
        assert a.status is b.status, (a.message, b.message)
        assert a.levels_solved == b.levels_solved == levels
        np.testing.assert_allclose(a.x, b.x, atol=1e-6, rtol=0)
        compared += int(np.abs(a.x).max() > 1e-6)
    assert compared >= 6    # real commands, not zeros


@pytest.mark.parametrize('path', SKILLS, ids=[p.stem for p in SKILLS])
def test_solvers_agree_on_the_package_skills(path) -> None:
    skill = compile_skill(load_skill(path))
    one, two = SkillSolver(skill, 'quadprog'), SkillSolver(skill, 'daqp')
    q = start_pose(skill)
    s = skill.start_unknowns()
    u = np.array([skill.spec.offline.inputs.get(n, 0.0) for n in skill.input_names])
    for solver in (one, two):
        solver.set_start(q, s)
    x = np.zeros(skill.n_x)
    moving = 0
    for k in range(150):
        a = one.solve(q, s, u, k * 0.002, 0.002, x)
        b = two.solve(q, s, u, k * 0.002, 0.002, x)
        assert a.status is b.status, (a.message, b.message)
        np.testing.assert_allclose(a.x, b.x, atol=1e-6)
        moving += int(np.abs(a.x).max() > 1e-4)
        x = a.x
        q = q + 0.002 * x[:skill.n_q]
        s = s + 0.002 * x[skill.n_q:]
    assert moving > 0
