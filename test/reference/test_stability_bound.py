"""Discrete stability limits of the behaviours (skill/stability.py) against the controller itself.

Outside references (named again beside each check):
- the first-order limit K dt < 2 sin(pi / (2 (2d + 1))) of an integrator with d samples of delay
  under proportional feedback: Åström & Wittenmark, Computer-Controlled Systems (root locus /
  Jury test of a delayed integrator, from memory); the special cases d = 0 (K dt < 2, the
  forward-Euler limit) and d = 1 (K dt < 1) are textbook values (from memory);
- the symplectic (semi-implicit) Euler step of an undamped oscillator is stable for w dt < 2
  (a standard result of geometric integration, from memory); the damped closed form
  2 / (z + sqrt(1 + z^2)) follows from the Jury conditions (Franklin, Powell & Workman, Digital
  Control of Dynamic Systems, from memory);
- the decisive check: a lockstep simulation of the real controller (compiled skill, QP, runner)
  with the error measured through an input that is d ticks old, which must converge at 97 % of
  the limit and grow at 103 %, and ``check`` warns exactly on the unstable side.
"""
from __future__ import annotations

import math
import textwrap
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.runtime.runner import SkillRunner
from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.loader import load_skill
from constraint_ctrl.skill.stability import (first_order_limit, first_order_radius,
                                             second_order_limit, second_order_radius)
from constraint_ctrl.tools.check import check_compiled

CONFIG = Path(__file__).resolve().parents[2] / 'config'
URDF = CONFIG / 'robots' / 'six_axis_arm.urdf'
DT = 0.05            # a slow loop keeps every commanded speed far below the URDF limits
START_Q1 = 0.0
TARGET = 0.01        # rad: the first error, 10 mrad (speeds of at most K * 0.01 rad/s)


def test_first_order_closed_form_values() -> None:
    # d = 0: K dt < 2; d = 1: K dt < 1 (textbook values, from memory); d = 2: 2 sin(pi/10),
    # which is (sqrt(5) - 1) / 2, the golden ratio conjugate
    assert first_order_limit(0) == pytest.approx(2.0)
    assert first_order_limit(1) == pytest.approx(1.0)
    assert first_order_limit(2) == pytest.approx((math.sqrt(5) - 1) / 2)
    for d in range(8):
        limit = first_order_limit(d)
        assert first_order_radius(limit * (1 - 1e-6), d) < 1.0 < \
            first_order_radius(limit * (1 + 1e-6), d)
    # large delay: tends to the continuous phase-margin condition K (d + 1/2) dt = pi / 2
    assert first_order_limit(200) * 200.5 == pytest.approx(math.pi / 2, rel=1e-4)


def test_second_order_closed_form_without_delay() -> None:
    # undamped symplectic Euler: w dt < 2 (from memory); roots on the unit circle below it
    assert second_order_limit(0.0, 0) == pytest.approx(2.0)
    assert second_order_radius(1.9, 0.0, 0) == pytest.approx(1.0)
    assert second_order_radius(2.1, 0.0, 0) > 1.0
    for zeta in (0.2, 0.7, 1.0, 1.5):
        limit = second_order_limit(zeta, 0)
        assert second_order_radius(limit * (1 - 1e-6), zeta, 0) < 1.0 < \
            second_order_radius(limit * (1 + 1e-6), zeta, 0)


def skill_text(order: int, value: float, delay: int, zeta: float = 0.5) -> str:
    """One row on joint_1; with delay > 0 its error is sensed through an input ``sensed``
    (q_1 as it was ``delay`` ticks ago), declared at one sample per ``delay`` ticks."""
    if order == 1:
        behaviour = f'{{order: 1, gain: {value!r}}}'
    else:
        behaviour = f'{{order: 2, natural_frequency: {value!r}, damping_ratio: {zeta!r}}}'
    if delay == 0:
        inputs, function = '', 'joint(joint_1)'
    else:
        inputs = f'inputs:\n  sensed: {{unit: rad, rate_hz: {1.0 / (delay * DT)!r}}}\n'
        # value now: the sensed (old) position; derivative: d q_1 / d q_1 = 1
        function = 'joint(joint_1) - value_now(joint(joint_1)) + sensed'
    return textwrap.dedent(f"""\
        skill: delayed
        robot: {URDF}
        """) + inputs + textwrap.dedent(f"""\
        constraints:
          - name: hold
            function: {function}
            target: {TARGET}
            behaviour: {behaviour}
            weight: 1000.0
        regularisation: {{damping: 0.001}}
        offline:
          start: {{joint_1: {START_Q1}}}
        """)


def compiled(tmp_path: Path, text: str):  # noqa: ANN201 - CompiledSkill
    path = tmp_path / 'delayed.yaml'
    path.write_text(text)
    return compile_skill(load_skill(path))


def run_lockstep(skill, delay: int, ticks: int) -> np.ndarray:  # noqa: ANN001
    """The controller in lockstep: q_1 integrates the command; the input lags ``delay`` ticks."""
    runner = SkillRunner(skill)
    q = np.zeros(skill.n_q)
    q[0] = START_Q1
    runner.activate(q, np.zeros(skill.n_q))
    history = [q[0]] * (delay + 1)
    errors = []
    for _ in range(ticks):
        u = np.array([history[-1 - delay]]) if delay else np.zeros(0)
        result = runner.tick(q, u, DT)
        assert result.ok, result.message
        errors.append(history[-1 - delay] - TARGET)
        runner.commit(result.joint_velocity, 1.0, DT)
        q = q + DT * result.joint_velocity
        history.append(q[0])
    return np.array(errors)


def envelope(errors: np.ndarray) -> tuple[float, float]:
    """The first |error| and the largest |error| over the last 10 % of the run.

    Past the limit the oscillation grows until the speed limit of the joint (URDF, 2 rad/s)
    bounds it: the last 10 % then swings far wider than the first error.
    """
    n = max(1, len(errors) // 10)
    return float(abs(errors[0])), float(np.abs(errors[-n:]).max())


@pytest.mark.parametrize('delay', [0, 1, 3])
def test_first_order_converges_below_and_grows_past_the_limit(tmp_path: Path,
                                                              delay: int) -> None:
    limit = first_order_limit(delay) / DT
    for factor, stable in ((0.97, True), (1.03, False)):
        skill = compiled(tmp_path, skill_text(1, factor * limit, delay))
        first, last = envelope(run_lockstep(skill, delay, 3000))
        if stable:
            assert last < 0.05 * first, (delay, factor, first, last)
        else:
            assert last > 3.0 * first, (delay, factor, first, last)
        # check warns exactly on the unstable side, naming the largest stable gain
        report = check_compiled(skill, rate_hz=1.0 / DT)
        warned = [w for w in report.warnings if 'stability limit' in w]
        assert bool(warned) is not stable, report.warnings
        if warned:
            assert f'largest stable value is {limit:.4g} 1/s' in warned[0]
            assert 'constraints[0].behaviour.gain' in warned[0]


@pytest.mark.parametrize(('delay', 'zeta'), [(0, 0.5), (2, 0.5), (1, 0.3)])
def test_second_order_converges_below_and_grows_past_the_limit(tmp_path: Path, delay: int,
                                                               zeta: float) -> None:
    limit = second_order_limit(zeta, delay) / DT
    for factor, stable in ((0.97, True), (1.03, False)):
        skill = compiled(tmp_path, skill_text(2, factor * limit, delay, zeta))
        first, last = envelope(run_lockstep(skill, delay, 3000))
        if stable:
            assert last < 0.05 * first, (delay, zeta, factor, first, last)
        else:
            assert last > 3.0 * first, (delay, zeta, factor, first, last)
        report = check_compiled(skill, rate_hz=1.0 / DT)
        warned = [w for w in report.warnings if 'stability limit' in w]
        assert bool(warned) is not stable, report.warnings
        if warned:
            assert f'largest stable value is {limit:.4g} rad/s' in warned[0]
