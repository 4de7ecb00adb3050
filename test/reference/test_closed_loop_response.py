"""Lockstep closed loop of one row against the textbook responses.

First order de/dt = -K e: e(t) = e0 exp(-K t). Second order e'' + 2 zeta w e' + w^2 e = 0 from
rest: overshoot exp(-zeta pi / sqrt(1 - zeta^2)) and the time response
e0 exp(-zeta w t) (cos(w_d t) + zeta / sqrt(1 - zeta^2) sin(w_d t)), w_d = w sqrt(1 - zeta^2)
(standard results, e.g. Ogata, Modern Control Engineering, ch. 5 (from memory for the chapter)).
The settling time is compared with the one scipy.signal (an outside implementation) gives for the
continuous system, using the 2 % band.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.solve.qp import SkillSolver
from skill_builders import ARM, first_order, row, second_order, skill, slider

DT = 0.001


def _run(spec, q0: np.ndarray, seconds: float) -> tuple[np.ndarray, np.ndarray]:
    solver = SkillSolver(compile_skill(spec))
    n = int(round(seconds / DT))
    q, x = q0.astype(float), np.zeros(q0.size)
    errors = np.zeros(n)
    for k in range(n):
        result = solver.solve(q, np.zeros(0), np.zeros(0), k * DT, DT, x)
        assert result.ok, result.message
        errors[k] = solver.outputs['error'][0]
        x = result.x
        q = q + DT * x
    return np.arange(n) * DT, errors


@pytest.mark.parametrize('gain', [1.0, 4.0])
def test_first_order_decays_exponentially(tmp_path, gain: float) -> None:
    spec = skill(slider(tmp_path), row('pos', 'position(carriage)[0]', target=0.3,
                                       behaviour=first_order(gain), weight=1e6), damping=1e-4)
    t, e = _run(spec, np.array([0.5]), 3.0 / gain)
    expected = 0.2 * np.exp(-gain * t)
    np.testing.assert_allclose(e, expected, rtol=0.01, atol=1e-6)


def test_first_order_on_the_arm_height_row() -> None:
    # a task function of the six-axis arm, not only of a single joint
    spec = skill(ARM, row('height', 'position(tool_tip)[2]', target=0.30,
                          behaviour=first_order(2.0), weight=1e6), damping=1e-4)
    t, e = _run(spec, np.array([0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0]), 1.5)
    expected = e[0] * np.exp(-2.0 * t)
    np.testing.assert_allclose(e, expected, rtol=0.01, atol=1e-6)


def _settling_time(t: np.ndarray, e: np.ndarray, band: float) -> float:
    outside = np.nonzero(np.abs(e) > band)[0]
    return float(t[outside[-1] + 1]) if outside.size else 0.0


@pytest.mark.parametrize(('omega', 'zeta'), [(6.0, 0.3), (8.0, 0.5), (5.0, 0.7)])
def test_second_order_overshoot_and_settling(tmp_path, omega: float, zeta: float) -> None:
    e0 = 0.1
    spec = skill(slider(tmp_path), row('pos', 'position(carriage)[0]', target=0.0,
                                       behaviour=second_order(omega, zeta), weight=1e6),
                 damping=1e-4)
    t, e = _run(spec, np.array([e0]), 8.0 / (zeta * omega))
    overshoot = -e.min() / e0
    expected_overshoot = np.exp(-zeta * np.pi / np.sqrt(1.0 - zeta ** 2))
    assert overshoot == pytest.approx(expected_overshoot, rel=0.02)
    # closed form of the free response from rest
    wd = omega * np.sqrt(1.0 - zeta ** 2)
    closed = e0 * np.exp(-zeta * omega * t) * (np.cos(wd * t)
                                               + zeta / np.sqrt(1 - zeta ** 2) * np.sin(wd * t))
    np.testing.assert_allclose(e, closed, atol=0.02 * e0)
    # settling time (2 % band) against scipy.signal's simulation of the continuous system
    system = signal.lti([1.0, 2 * zeta * omega, 0.0], [1.0, 2 * zeta * omega, omega ** 2])
    _, y_ref = signal.step(system, T=t)
    ts_ref = _settling_time(t, e0 * y_ref, 0.02 * e0)
    ts = _settling_time(t, e, 0.02 * e0)
    assert ts == pytest.approx(ts_ref, rel=0.05)
