"""Speed caps and joint limits: reduced speed at monitored points, joint velocity, acceleration
and position limits.

References: 250 mm/s reduced speed of ISO 10218-1 (clause 5.6 of the 2011 edition, from memory;
value also in the US OSHA Technical Manual Sec. IV Ch. 4, "10 in/s (250 mm/s)", per
safety-facts.md section 3); point velocities of the example arm checked with Pinocchio (PyPI
reference library); constant-acceleration kinematics v = a t; URDF <limit> semantics (lower,
upper, velocity of a joint; from memory).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.safety.speed_caps import (
    JointStage, apply_joint_speed_limits, limit_acceleration, limit_positions, point_speed_scale,
    stop_ramp_factor)
from constraint_ctrl.safety.watchdog import (
    MonitoredPoint, Watchdog, WatchdogConfig, WatchdogInput)

URDF = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'
REDUCED_SPEED = 0.250   # m/s, ISO 10218-1 reduced speed (clause from memory)


def _inputs(now: float, q: np.ndarray, command: np.ndarray) -> WatchdogInput:
    return WatchdogInput(now=now, q=q, joint_state_stamp=now, command=command, solver_ok=True,
                         solver_status='ok', input_stamps={}, input_timeouts={},
                         inputs_finite=True, people={}, person_sources=())


def test_point_speed_scale_hand_values() -> None:
    """|(0.3, 0.4, 0)| = 0.5 m/s (3-4-5 triangle) scales by 0.25 / 0.5 = 0.5."""
    vel = np.array([[0.3, 0.4, 0.0], [0.0, 0.1, 0.0]])
    assert point_speed_scale(vel, REDUCED_SPEED) == pytest.approx(0.5, rel=1e-15)
    assert point_speed_scale(vel * 0.4, REDUCED_SPEED) == 1.0     # 0.2 m/s: under the cap


def test_reduced_speed_at_points_of_example_arm_checked_with_pinocchio() -> None:
    """Reduced mode holds tool tip, flange and elbow at <= 250 mm/s, measured by Pinocchio."""
    model = RobotModel.from_urdf(URDF)
    links = ['tool_tip', 'tool_flange', 'link_3']
    points = [MonitoredPoint(link, (0.0, 0.0, 0.0), 0.05) for link in links]
    config = WatchdogConfig(reduced_mode=True, velocity_limits=model.velocity_limit,
                            acceleration_limits=np.full(6, 1e6), lower=model.lower,
                            upper=model.upper)
    fn = model.points_function([(p.link, p.offset) for p in points])
    watchdog = Watchdog(config, fn, points, dt=0.004)
    ref = pin.buildModelFromUrdf(str(URDF))
    data = ref.createData()
    rng = np.random.default_rng(7)
    for _ in range(20):
        q = rng.uniform(model.lower * 0.8, model.upper * 0.8)
        command = rng.uniform(-1.5, 1.5, 6)
        out = watchdog.step(_inputs(0.0, q, command))
        pin.forwardKinematics(ref, data, q, out.command)
        pin.updateFramePlacements(ref, data)
        speeds = [np.linalg.norm(pin.getFrameVelocity(ref, data, ref.getFrameId(link),
                                                       pin.LOCAL_WORLD_ALIGNED).linear)
                  for link in links]
        assert max(speeds) <= REDUCED_SPEED * (1 + 1e-9)
        # the cap is reached, not undershot, when the command was faster than allowed
        pin.forwardKinematics(ref, data, q, command)
        pin.updateFramePlacements(ref, data)
        raw = max(np.linalg.norm(pin.getFrameVelocity(ref, data, ref.getFrameId(link),
                                                      pin.LOCAL_WORLD_ALIGNED).linear)
                  for link in links)
        if raw > REDUCED_SPEED:
            assert max(speeds) == pytest.approx(REDUCED_SPEED, rel=1e-9)
        # uniform scaling: same direction in joint space
        assert np.allclose(out.command, out.speed_scale * command, rtol=0, atol=1e-12)


def test_joint_speed_scale_keeps_direction() -> None:
    """(4, 1, -2) rad/s against 2 rad/s limits (URDF velocity) becomes (2, 0.5, -1): hand values."""
    qdot = np.array([4.0, 1.0, -2.0])
    scale = apply_joint_speed_limits(qdot, 1.0 / np.array([2.0, 2.0, 2.0]))
    assert scale == 0.5
    assert np.array_equal(qdot, [2.0, 0.5, -1.0])
    slow = np.array([0.5, -0.1, 0.0])
    assert apply_joint_speed_limits(slow, 1.0 / np.array([2.0, 2.0, 2.0]), np.empty(3)) == 1.0
    assert np.array_equal(slow, [0.5, -0.1, 0.0])


def test_joint_speed_limits_of_example_arm_in_watchdog() -> None:
    """Every |qdot_i| ends at or under its URDF velocity limit, the binding joint exactly at it."""
    model = RobotModel.from_urdf(URDF)
    points = [MonitoredPoint('tool_tip', (0.0, 0.0, 0.0), 0.0)]
    config = WatchdogConfig(velocity_limits=model.velocity_limit,
                            acceleration_limits=np.full(6, 1e6), lower=model.lower,
                            upper=model.upper)
    watchdog = Watchdog(config, model.points_function([('tool_tip', (0, 0, 0))]), points, 0.004)
    command = np.array([1.0, -6.0, 0.5, 0.0, 2.0, -1.0])     # joint_2 at 3x its 2 rad/s limit
    out = watchdog.step(_inputs(0.0, np.zeros(6), command)).command
    assert np.all(np.abs(out) <= model.velocity_limit * (1 + 1e-12))
    assert out[1] == pytest.approx(-2.0, rel=1e-12)
    assert np.allclose(out, command / 3.0, rtol=1e-12)


def test_acceleration_limit_follows_v_equals_a_t() -> None:
    """From rest towards 1 rad/s with a = 2 rad/s^2: v(t) = min(1, a t) (constant acceleration)."""
    dt, a = 0.01, 2.0
    prev = np.zeros(2)
    target = np.array([1.0, -0.5])
    out = np.empty(2)
    for i in range(1, 80):
        limit_acceleration(target, prev, np.array([a * dt, a * dt]), out)
        t = i * dt
        assert out[0] == pytest.approx(min(1.0, a * t), abs=1e-12)
        assert out[1] == pytest.approx(-min(0.5, a * t), abs=1e-12)
        prev = out.copy()


def test_acceleration_limit_in_place_on_its_input() -> None:
    """Passing the command itself as ``out`` (the watchdog does) gives the same result."""
    qdot = np.array([1.0, -1.0, 0.01])
    expected = limit_acceleration(qdot, np.zeros(3), np.full(3, 0.1), np.empty(3)).copy()
    limit_acceleration(qdot, np.zeros(3), np.full(3, 0.1), qdot)
    assert np.array_equal(qdot, expected)
    assert np.array_equal(expected, [0.1, -0.1, 0.01])


def test_position_limits_only_inward_at_or_over_a_limit() -> None:
    """A joint at upper may not move up, one past lower may not move down; inward passes."""
    lower, upper = np.array([-1.0, -1.0, -1.0]), np.array([1.0, 1.0, 1.0])
    q = np.array([1.0, -1.2, 0.0])
    out = limit_positions(np.array([0.5, -0.3, 0.2]), q, lower, upper, 0.01, np.empty(3))
    assert np.array_equal(out, [0.0, 0.0, 0.2])
    out = limit_positions(np.array([-0.5, 0.3, 0.2]), q, lower, upper, 0.01, np.empty(3))
    assert np.array_equal(out, [-0.5, 0.3, 0.2])


def test_position_limits_do_not_cross_within_one_tick() -> None:
    """1 mm below the limit at dt = 10 ms: at most 0.1 rad/s outward (q + qdot dt <= upper)."""
    q = np.array([0.999])
    out = limit_positions(np.array([1.0]), q, np.array([-1.0]), np.array([1.0]), 0.01, np.empty(1))
    assert out[0] == pytest.approx(0.1, rel=1e-9)
    assert q[0] + out[0] * 0.01 <= 1.0 + 1e-15


def test_watchdog_never_lets_acceleration_push_past_a_limit() -> None:
    """Decelerating towards a limit: the position rule wins over the rate limit (hard stop)."""
    config = WatchdogConfig(velocity_limits=[2.0], acceleration_limits=[1.0], lower=[-1.0],
                            upper=[1.0])

    def line(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return np.array([[q[0]], [0.0], [0.0]]), np.array([[1.0], [0.0], [0.0]])

    watchdog = Watchdog(config, line, [MonitoredPoint('slide', (0.0, 0.0, 0.0), 0.0)], 0.01)
    q = np.array([0.9])
    now = 0.0
    for _ in range(300):       # ramps up at 1 rad/s^2 towards the limit, must stop at it
        out = watchdog.step(_inputs(now, q.copy(), np.array([1.5]))).command
        q += out * 0.01
        now += 0.01
        assert q[0] <= 1.0 + 1e-12
    assert q[0] == pytest.approx(1.0, abs=1e-9)


def test_stop_ramp_is_linear_and_ends_at_stopping_time() -> None:
    """Linear in magnitude: half left at half the stopping time, exactly 0 at the end."""
    assert stop_ramp_factor(0.0, 0.3) == 1.0
    assert stop_ramp_factor(0.15, 0.3) == pytest.approx(0.5)
    assert stop_ramp_factor(0.3, 0.3) == 0.0
    assert stop_ramp_factor(0.3 - 1e-12, 0.3) == 0.0       # float residue rounds to a full stop
    assert stop_ramp_factor(0.1, 0.0) == 0.0
    assert stop_ramp_factor(5.0, 0.3) == 0.0               # past the end: stays at 0


def _joint_stage(lower: list[float], upper: list[float], dt: float, vel: list[float]
                 ) -> tuple[JointStage, np.ndarray, np.ndarray]:
    prev, out = np.zeros(len(vel)), np.zeros(len(vel))
    stage = JointStage(np.array(lower) / dt, np.array(upper) / dt, 1.0 / dt,
                       1.0 / np.array(vel), prev, out)
    return stage, prev, out


def test_compiled_joint_stage_position_rule_hand_values() -> None:
    """Without a rate limit (step inf, the stop ramp): the same hand values as the numpy
    position rule above: at or over a limit only inward, never across within one tick."""
    stage, _, out = _joint_stage([-1.0] * 4, [1.0, 1.0, 1.0, 1.0], 0.01, [2.0] * 4)
    stage.step[:] = np.inf
    stage.q[:] = [1.0, -1.2, 0.0, 0.999]
    stage.command[:] = [0.5, -0.3, 0.2, 1.0]
    stage.eval()
    assert out[:3].tolist() == [0.0, 0.0, 0.2]
    assert out[3] == pytest.approx(0.1, rel=1e-9)          # 1 mm left at dt = 10 ms
    stage.command[:] = [-0.5, 0.3, 0.2, -1.0]
    stage.eval()
    assert out.tolist() == [-0.5, 0.3, 0.2, -1.0]
    assert stage.top[0] == 0.5                             # max |qdot_i| / 2 rad/s


def test_compiled_joint_stage_rate_limit_follows_v_equals_a_t() -> None:
    """From rest towards 1 rad/s with a = 2 rad/s^2: v(t) = min(1, a t); an unlimited joint
    (URDF continuous, +-inf bounds) is rate limited only."""
    dt, a = 0.01, 2.0
    stage, prev, out = _joint_stage([-3.0, -math.inf], [3.0, math.inf], dt, [5.0, 5.0])
    stage.step[:] = a * dt
    stage.command[:] = [1.0, -0.5]
    for i in range(1, 80):
        stage.eval()
        t = i * dt
        assert out[0] == pytest.approx(min(1.0, a * t), abs=1e-12)
        assert out[1] == pytest.approx(-min(0.5, a * t), abs=1e-12)
        prev[:] = out


def test_compiled_joint_stage_equals_the_numpy_stages() -> None:
    """Random states: the compiled stage gives exactly the numpy functions' result (those are
    checked against the hand values above), including joints at and beyond their limits."""
    rng = np.random.default_rng(7)
    n, dt = 6, 0.004
    lower = np.array([-2.0, -1.0, -math.inf, -3.0, -0.5, -2.5])
    upper = np.array([2.0, 1.5, math.inf, 3.0, 0.5, 2.5])
    vel = np.array([2.0, 2.0, 3.0, 1.5, 4.0, 2.5])
    stage, prev, out = _joint_stage(list(lower), list(upper), dt, list(vel))
    for _ in range(200):
        q = rng.uniform(-3.5, 3.5, n)
        command = rng.uniform(-6.0, 6.0, n)
        prev[:] = rng.uniform(-3.0, 3.0, n)
        step = rng.uniform(0.0, 0.05, n)
        stage.q[:], stage.command[:], stage.step[:] = q, command, step
        stage.eval()
        expected = limit_acceleration(command, prev, step, np.empty(n))
        expected = limit_positions(expected, q, lower, upper, dt, expected)
        assert np.array_equal(out, expected)
        scaled = expected.copy()
        factor = apply_joint_speed_limits(scaled, 1.0 / vel)
        top = float(np.max(np.abs(expected) / vel))
        assert stage.top[0] == pytest.approx(top, rel=1e-15)
        assert factor == (1.0 if top <= 1.0 else pytest.approx(1.0 / top, rel=1e-15))
