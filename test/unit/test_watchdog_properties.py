"""Property tests of the watchdog's scaling stages over random arms, commands and people.

Robot stand-in: a three-joint articulated arm (base yaw, shoulder and elbow pitch) with the
textbook closed-form position r = l2 cos q2 + l3 cos(q2 + q3), z = h + l2 sin q2 +
l3 sin(q2 + q3), p = (r cos q1, r sin q1, z) and its hand-derived Jacobian (checked below by
central differences). Permitted speeds come from the scalar ISO/TS 15066:2016 clause 5.5.4
inversion (``max_robot_speed``, itself checked against safety-facts.md 1.4 and scipy), applied
pair by pair here as an oracle for the vectorised code. Reduced speed 250 mm/s: ISO 10218-1
(clause from memory, safety-facts.md section 3).
"""
from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from constraint_ctrl.safety.separation import SeparationParams, max_robot_speed
from constraint_ctrl.safety.watchdog import (
    MonitoredPoint, PersonSample, Watchdog, WatchdogConfig, WatchdogInput)

REDUCED_SPEED = 0.25
REL = 1e-9


class Arm:
    """Articulated 3-joint arm; monitored points: elbow, mid forearm, tool tip."""

    def __init__(self, h: float, l2: float, l3: float) -> None:
        self.h, self.l2, self.l3 = h, l2, l3
        self.fractions = (0.0, 0.5, 1.0)    # share of l3 to each point

    def __call__(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        c1, s1 = math.cos(q[0]), math.sin(q[0])
        c2, s2 = math.cos(q[1]), math.sin(q[1])
        c23, s23 = math.cos(q[1] + q[2]), math.sin(q[1] + q[2])
        pos = np.empty((3, 3))
        jac = np.zeros((9, 3))
        for i, f in enumerate(self.fractions):
            l3 = f * self.l3
            r = self.l2 * c2 + l3 * c23
            pos[:, i] = (r * c1, r * s1, self.h + self.l2 * s2 + l3 * s23)
            dr2, dz2 = -self.l2 * s2 - l3 * s23, self.l2 * c2 + l3 * c23
            dr3, dz3 = -l3 * s23, l3 * c23
            jac[3 * i:3 * i + 3] = [[-r * s1, dr2 * c1, dr3 * c1],
                                    [r * c1, dr2 * s1, dr3 * s1],
                                    [0.0, dz2, dz3]]
        return pos, jac


def test_arm_jacobian_matches_central_differences() -> None:
    """The stand-in's hand-derived Jacobian equals (p(q + h e) - p(q - h e)) / 2h to O(h^2)."""
    arm = Arm(0.3, 0.5, 0.4)
    q = np.array([0.4, -0.7, 1.1])
    _, jac = arm(q)
    h = 1e-6
    for k in range(3):
        e = np.zeros(3)
        e[k] = h
        num = (arm(q + e)[0] - arm(q - e)[0]).T.reshape(-1) / (2 * h)
        assert np.allclose(jac[:, k], num, atol=1e-8)


finite = {'allow_nan': False, 'allow_infinity': False}
vec3 = st.tuples(*[st.floats(-3.0, 3.0, **finite)] * 3).map(np.array)
person = st.tuples(st.floats(-2.0, 2.0, **finite), st.floats(-2.0, 2.0, **finite),
                   st.floats(-0.5, 1.5, **finite)).map(np.array)
arms = st.builds(Arm, st.floats(0.1, 0.5), st.floats(0.2, 0.7), st.floats(0.1, 0.6))
params = st.builds(SeparationParams, human_speed=st.sampled_from([1.6, 2.0]),
                   reaction_time=st.floats(0.02, 0.3), robot_deceleration=st.floats(1.0, 10.0))


def _step(arm: Arm, sep: SeparationParams, radii: list[float], q: np.ndarray,
          command: np.ndarray, people: list[np.ndarray], reduced: bool) -> np.ndarray:
    """One first tick of a fresh watchdog whose rate and position limits cannot bind."""
    config = WatchdogConfig(separation=sep, reduced_mode=reduced, reduced_zone=0.0,
                            velocity_limits=[2.0, 2.0, 2.5], acceleration_limits=[1e9] * 3,
                            lower=[-math.inf] * 3, upper=[math.inf] * 3)
    points = [MonitoredPoint('arm', (0.0, 0.0, 0.0), r) for r in radii]
    watchdog = Watchdog(config, arm, points, dt=0.004)
    samples = {f'p{j}': PersonSample(f'p{j}', h, 0.0) for j, h in enumerate(people)}
    inp = WatchdogInput(now=0.0, q=q, joint_state_stamp=0.0, command=command, solver_ok=True,
                        solver_status='ok', input_stamps={}, input_timeouts={},
                        inputs_finite=True, people=samples, person_sources=tuple(samples))
    return watchdog.step(inp).command


@settings(max_examples=200, deadline=None)
@given(arm=arms, sep=params, radii=st.lists(st.floats(0.0, 0.1), min_size=3, max_size=3),
       q=vec3, command=vec3, people=st.lists(person, max_size=3),
       reduced=st.booleans())
def test_scaled_command_respects_separation_and_reduced_speed(
        arm: Arm, sep: SeparationParams, radii: list[float], q: np.ndarray,
        command: np.ndarray, people: list[np.ndarray], reduced: bool) -> None:
    """After the watchdog: u_ij . v_i <= vmax(S_ij) for every pair; |v_i| <= 0.25 m/s if reduced;
    and the output is a non-negative multiple of the command (the scaling stages only scale)."""
    out = _step(arm, sep, radii, q, command, people, reduced)
    pos, jac = arm(q)
    vel = (jac @ out).reshape(3, 3)
    for i in range(3):
        if reduced:
            assert np.linalg.norm(vel[i]) <= REDUCED_SPEED * (1 + REL)
        for h in people:
            diff = h - pos[:, i]
            dist = float(np.linalg.norm(diff))
            permitted = max_robot_speed(dist - radii[i], sep)
            if dist == 0.0:
                assert permitted == 0.0 and not out.any()
                continue
            directed = max(0.0, float(diff @ vel[i]) / dist)
            assert directed <= permitted * (1 + REL) + 1e-15
    # non-negative multiple: out = c * command with 0 <= c <= 1 (c read off the largest entry)
    k = int(np.argmax(np.abs(command)))
    if command[k] == 0.0:
        assert not out.any()
    else:
        c = out[k] / command[k]
        assert 0.0 <= c <= 1.0 + 1e-12
        assert np.allclose(out, c * command, rtol=0.0, atol=1e-12 * abs(command[k]))


@settings(max_examples=100, deadline=None)
@given(arm=arms, q=vec3, command=vec3, people=st.lists(person, min_size=1, max_size=3))
def test_binding_pair_reaches_its_permitted_speed(arm: Arm, q: np.ndarray, command: np.ndarray,
                                                  people: list[np.ndarray]) -> None:
    """The scaling is not needlessly conservative: when separation limits the command, some pair
    moves at exactly its permitted speed (the uniform factor is the minimum over pairs)."""
    sep = SeparationParams()
    radii = [0.05, 0.05, 0.05]
    config_limits = np.array([2.0, 2.0, 2.5])
    top = float(np.max(np.abs(command) / config_limits))
    if top > 1.0:
        command = command / top                  # keep joint speed scaling out of the picture
    out = _step(arm, sep, radii, q, command, people, reduced=False)
    pos, jac = arm(q)
    vel_in = (jac @ command).reshape(3, 3)
    vel_out = (jac @ out).reshape(3, 3)
    ratios = []
    too_close = False
    for i in range(3):
        for h in people:
            diff = h - pos[:, i]
            dist = float(np.linalg.norm(diff))
            permitted = max_robot_speed(dist - radii[i], sep)
            too_close |= permitted == 0.0          # stop, whatever the direction
            speed = float(diff @ vel_in[i]) / dist if dist > 0 else math.inf
            if speed > 0:
                ratios.append((permitted, speed, diff, i, dist))
    if too_close:
        assert not out.any()
        return
    if not ratios or min(v / s for v, s, *_ in ratios) >= 1.0:
        assert np.allclose(out, command, rtol=0, atol=1e-15)
        return
    achieved = [float(d @ vel_out[i]) / dist / v for v, _, d, i, dist in ratios]
    assert abs(max(achieved) - 1.0) <= 1e-9
