"""World: command integration, latency, limits, sensors, operator and noise; scene file errors.

Poses and sensor frames are cross-checked against Pinocchio (independent URDF kinematics).
"""
from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from constraint_ctrl.model import RobotModel
from constraint_ctrl.sim.flange import FlangeSurface
from constraint_ctrl.sim.gear_contact import GearPhase
from constraint_ctrl.sim.scene import (NoiseSpec, Scene, SceneError, StartAtTime,
                                       StartWhenToolInBox, load_scene)
from constraint_ctrl.sim.world import SimError, World

ROOT = Path(__file__).resolve().parents[2]
SCENE_FILE = ROOT / 'config' / 'scenes' / 'gearbox_cell.yaml'
URDF = ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'


@pytest.fixture(scope='module')
def model() -> RobotModel:
    return RobotModel.from_urdf(URDF)


@pytest.fixture(scope='module')
def shipped() -> Scene:
    return load_scene(SCENE_FILE)


@pytest.fixture(scope='module')
def pin_model() -> tuple[pin.Model, pin.Data]:
    m = pin.buildModelFromUrdf(str(URDF))
    return m, m.createData()


def exact(scene: Scene, **changes: object) -> Scene:
    """The scene without noise (and with other fields replaced)."""
    return dataclasses.replace(scene, noise=NoiseSpec(), **changes)


def with_start_pose(scene: Scene, q: np.ndarray, model: RobotModel) -> Scene:
    return dataclasses.replace(scene, initial_positions=dict(zip(model.joint_names, q)))


def ik_tool_down(pin_model: tuple[pin.Model, pin.Data], position: list[float],
                 heading: float) -> np.ndarray:
    """Tool z down, tool x at ``heading``: damped least squares on Pinocchio's frame Jacobian."""
    m, d = pin_model
    frame = m.getFrameId('tool_tip')
    c, s = math.cos(heading), math.sin(heading)
    target = pin.SE3(np.array([[c, s, 0.0], [s, -c, 0.0], [0.0, 0.0, -1.0]]),
                     np.array(position))
    q = np.array([math.atan2(position[1], position[0]), 0.3, 1.0, 0.0, math.pi / 2 - 1.3, 0.0])
    for _ in range(300):
        pin.framesForwardKinematics(m, d, q)
        err = pin.log6(d.oMf[frame].actInv(target)).vector
        if np.linalg.norm(err) < 1e-12:
            break
        jac = pin.computeFrameJacobian(m, d, q, frame, pin.LOCAL)
        dq = jac.T @ np.linalg.solve(jac @ jac.T + 1e-6 * np.eye(6), err)
        q = q + dq * min(1.0, 0.2 / max(np.linalg.norm(dq), 1e-300))
    assert np.linalg.norm(err) < 1e-10, 'test pose not reached'
    return q


def pin_frame(pin_model: tuple[pin.Model, pin.Data], q: np.ndarray, name: str) -> pin.SE3:
    m, d = pin_model
    pin.framesForwardKinematics(m, d, q)
    return d.oMf[m.getFrameId(name)]


# -- integration, latency, limits ----------------------------------------------------------------

def test_constant_velocity_integrates_to_q0_plus_v_t_after_the_latency(
        shipped: Scene, model: RobotModel) -> None:
    """q(t) = q0 + v (t - L) for t >= L (integral of a constant rate after a dead time L)."""
    scene = exact(shipped, command_latency=0.01, rate=500.0)
    world = World(scene, model)
    q0 = world.true_joint_positions
    v = np.array([0.1, -0.05, 0.08, 0.2, -0.1, 0.3])
    world.step(0.004, v)
    np.testing.assert_allclose(world.true_joint_positions, q0, atol=0)  # still in transit
    for _ in range(99):
        world.step(0.004, v)
    assert world.time == pytest.approx(0.4, abs=1e-12)
    np.testing.assert_allclose(world.true_joint_positions, q0 + v * (0.4 - 0.01), atol=1e-12)
    np.testing.assert_allclose(world.joint_velocities, v, atol=1e-15)


def test_the_latency_delays_a_stop_as_well(shipped: Scene, model: RobotModel) -> None:
    """A zero command issued at t1 stops the robot at t1 + L (same dead time both ways)."""
    world = World(exact(shipped, command_latency=0.02), model)
    q0 = world.true_joint_positions
    v = np.full(6, 0.1)
    for _ in range(50):
        world.step(0.002, v)  # t1 = 0.1
    for _ in range(50):
        world.step(0.002, np.zeros(6))
    np.testing.assert_allclose(world.true_joint_positions, q0 + v * 0.1, atol=1e-12)


def test_uneven_dt_is_carried_over_to_whole_steps(shipped: Scene, model: RobotModel) -> None:
    """Steps of 3 ms on a 2 ms grid: time advances by whole steps, nothing is lost."""
    world = World(exact(shipped, command_latency=0.0, rate=500.0), model)
    counts = [world.step(0.003, np.zeros(6)).steps for _ in range(4)]
    assert counts == [1, 2, 1, 2]  # 3, 6, 9, 12 ms -> 1, 3, 4, 6 whole steps
    assert world.time == pytest.approx(0.012, abs=1e-12)


def test_velocity_limits_are_clipped_and_reported(shipped: Scene, model: RobotModel) -> None:
    """joint_1 commanded at 10 rad/s moves at its URDF limit velocity="2.0"."""
    world = World(exact(shipped, command_latency=0.0), model)
    q0 = world.true_joint_positions
    report = world.step(0.1, [10.0, 0.0, 0.0, 0.0, 0.0, -0.5])
    assert report.velocity_clipped == ('joint_1',)
    assert report.position_stopped == ()
    expected = q0 + np.array([2.0, 0.0, 0.0, 0.0, 0.0, -0.5]) * 0.1
    np.testing.assert_allclose(world.true_joint_positions, expected, atol=1e-12)


def test_position_limits_hold_the_joint_and_are_reported(shipped: Scene,
                                                         model: RobotModel) -> None:
    """joint_2 driven up stops exactly at its URDF upper limit 2.0 rad."""
    world = World(exact(shipped, command_latency=0.0), model)
    stopped: set[str] = set()
    for _ in range(30):
        stopped |= set(world.step(0.1, [0.0, 1.5, 0.0, 0.0, 0.0, 0.0]).position_stopped)
    assert world.true_joint_positions[1] == 2.0
    assert stopped == {'joint_2'}
    assert world.joint_velocities[1] == 0.0


def test_bad_commands(shipped: Scene, model: RobotModel) -> None:
    """A wrong-length command is refused; a non-finite one becomes zero velocity."""
    world = World(exact(shipped, command_latency=0.0), model)
    with pytest.raises(SimError, match='3 values; the robot has 6 joints'):
        world.step(0.01, [0.0, 0.0, 0.0])
    q0 = world.true_joint_positions
    report = world.step(0.01, [math.nan, 1.0, 0.0, 0.0, 0.0, 0.0])
    assert report.rejected_commands == 1
    np.testing.assert_allclose(world.true_joint_positions, q0, atol=0)


# -- kinematics and sensors ------------------------------------------------------------------

def test_frame_poses_agree_with_pinocchio(shipped: Scene, model: RobotModel,
                                          pin_model: tuple[pin.Model, pin.Data]) -> None:
    """The in-place casadi evaluation gives Pinocchio's frame placements (reference library)."""
    q = np.array([0.3, 0.5, 0.4, -0.7, 0.9, 2.0])
    world = World(with_start_pose(exact(shipped), q, model), model)
    for name, pose in world.frame_poses().items():
        ref = pin_frame(pin_model, q, name)
        np.testing.assert_allclose(pose[:3, :3], ref.rotation, atol=1e-12)
        np.testing.assert_allclose(pose[:3, 3], ref.translation, atol=1e-12)


def test_range_readings_agree_with_pinocchio_and_ray_cast(
        shipped: Scene, model: RobotModel, pin_model: tuple[pin.Model, pin.Data]) -> None:
    """Over the flange: each reading = ray_cast from the Pinocchio sensor frame along its +x."""
    q = ik_tool_down(pin_model, [0.58, 0.25, 0.212], heading=0.4)
    world = World(with_start_pose(exact(shipped), q, model), model)
    surface = FlangeSurface(shipped.flange)
    readings = world.range_readings()
    assert [r.name for r in readings] == ['range_left', 'range_right', 'range_front']
    for reading in readings:
        frame = pin_frame(pin_model, q, reading.name)
        beam = frame.rotation[:, 0]
        np.testing.assert_allclose(beam, [0.0, 0.0, -1.0], atol=1e-9)  # parallel to the tool
        expected = surface.ray_cast(frame.translation, beam, 0.04)
        assert 0.002 < expected < 0.04  # all three beams see the flange in this pose
        assert reading.range == pytest.approx(expected, abs=1e-12)
        assert (reading.min_range, reading.max_range) == (0.002, 0.04)


def test_no_detection_is_reported_as_plus_inf(shipped: Scene, model: RobotModel) -> None:
    """Start pose, 0.25 m above the flange height: beyond max_range -> +inf (sensor_msgs/Range)."""
    world = World(exact(shipped), model)
    assert all(r.range == math.inf for r in world.range_readings())


def test_pressing_the_gear_on_the_shaft_shows_in_the_wrench(
        shipped: Scene, model: RobotModel, pin_model: tuple[pin.Model, pin.Data]) -> None:
    """1 mm onto the misaligned spline: F = k x along tool -z (Hooke); turning lets it slide."""
    shaft = shipped.shaft
    q = ik_tool_down(pin_model, [*shaft.position, shaft.top - 0.001], heading=0.0)
    world = World(with_start_pose(exact(shipped, command_latency=0.0), q, model), model)
    world.step(0.002, np.zeros(6))  # a second evaluation at rest: zero damping rate
    force, torque = world.wrench()
    np.testing.assert_allclose(force, [0.0, 0.0, -shaft.stiffness * 0.001], atol=1e-6)
    np.testing.assert_allclose(torque, 0.0, atol=1e-12)
    assert world.gear_state.phase is GearPhase.ON_SPLINE_TEETH
    # joint_6 turns the tool about its own (downward) axis: heading changes by -angle
    turn = -np.radians(8.0)
    world.step(1.0, [0.0, 0.0, 0.0, 0.0, 0.0, turn])
    world.step(0.01, np.zeros(6))
    state = world.gear_state
    assert state.phase is GearPhase.SLIDING
    assert math.degrees(state.mismatch) == pytest.approx(-1.0, abs=1e-6)
    np.testing.assert_allclose(world.wrench()[0], 0.0, atol=1e-12)


# -- operator ---------------------------------------------------------------------------------

def test_operator_walks_the_path_at_the_given_speeds(shipped: Scene, model: RobotModel) -> None:
    """Piecewise linear at constant speed: arrival time = sum(segment length / speed)."""
    assert shipped.operator is not None
    operator = dataclasses.replace(shipped.operator, start=StartAtTime(0.5))
    world = World(exact(shipped, operator=operator), model)
    points = np.array([w.xy for w in operator.path])
    speeds = [w.speed for w in operator.path[1:]]
    arrivals = 0.5 + np.cumsum(np.linalg.norm(np.diff(points, axis=0), axis=1) / speeds)
    samples: list[tuple[float, np.ndarray]] = []
    while world.time < arrivals[-1] + 1.0:
        world.step(0.05, np.zeros(6))
        (name, xyz), = world.people()
        samples.append((world.time, xyz))
    assert name == 'operator'
    times = np.array([t for t, _ in samples])
    xyz = np.array([p for _, p in samples])
    assert np.all(xyz[:, 2] == operator.height)
    before = times <= 0.5
    assert before.sum() >= 3 and np.all(xyz[before, :2] == points[0])
    after = times >= arrivals[-1]
    assert after.sum() >= 3
    np.testing.assert_allclose(xyz[after, :2] - points[-1], 0.0, atol=1e-12)
    # on each segment: position = start + unit direction * speed * (t - segment start)
    starts = np.concatenate([[0.5], arrivals[:-1]])
    for i, (t0, t1) in enumerate(zip(starts, arrivals)):
        inside = (times > t0) & (times < t1)
        assert inside.sum() >= 3
        unit = (points[i + 1] - points[i]) / np.linalg.norm(points[i + 1] - points[i])
        expected = points[i] + np.outer(speeds[i] * (times[inside] - t0), unit)
        np.testing.assert_allclose(xyz[inside, :2], expected, atol=1e-9)


def test_operator_starts_after_the_tool_stays_in_the_box(shipped: Scene,
                                                         model: RobotModel) -> None:
    """Trigger: tool frame origin inside the box for 0.3 s; a box elsewhere never triggers."""
    assert shipped.operator is not None
    tool = World(exact(shipped), model).frame_poses()['tool_tip'][:3, 3]
    box = StartWhenToolInBox(tuple(tool - 0.01), tuple(tool + 0.01), 0.3)
    world = World(exact(shipped, operator=dataclasses.replace(shipped.operator, start=box)),
                  model)
    far = StartWhenToolInBox((5.0, 5.0, 5.0), (6.0, 6.0, 6.0), 0.3)
    idle = World(exact(shipped, operator=dataclasses.replace(shipped.operator, start=far)),
                 model)
    for _ in range(100):
        world.step(0.01, np.zeros(6))
        idle.step(0.01, np.zeros(6))
    assert world.operator is not None and idle.operator is not None
    assert world.operator.start_time == pytest.approx(0.3, abs=1e-9)
    assert not idle.operator.started
    np.testing.assert_allclose(idle.people()[0][1][:2], shipped.operator.path[0].xy)


# -- noise ------------------------------------------------------------------------------------

def scene_step(scene: Scene) -> float:
    return 1.0 / scene.rate


def run_noisy(scene: Scene, model: RobotModel, steps: int) -> np.ndarray:
    """Per step: measured minus true joints, range minus exact range, force, torque."""
    world = World(scene, model)
    exact_ranges = [r.range for r in World(exact(scene), model).range_readings()]
    assert all(0.005 < r < 0.035 for r in exact_ranges)  # noise cannot push them out of range
    rows = []
    for _ in range(steps):
        world.step(scene_step(scene), np.zeros(6))  # one fixed step: one noise draw
        force, torque = world.wrench()
        ranges = [r.range for r in world.range_readings()]
        rows.append(np.concatenate([world.joint_positions - world.true_joint_positions,
                                    np.subtract(ranges, exact_ranges), force, torque]))
    return np.array(rows)


def test_noise_is_seeded_and_has_the_configured_spread(
        shipped: Scene, model: RobotModel, pin_model: tuple[pin.Model, pin.Data]) -> None:
    """Same seed -> same samples; sample std within 10 % of sigma (std error ~ 1/sqrt(2N))."""
    q = ik_tool_down(pin_model, [0.32, 0.25, 0.215], heading=-0.3)  # over the flange
    scene = with_start_pose(shipped, q, model)
    first = run_noisy(scene, model, 1200)
    again = run_noisy(scene, model, 1200)
    other = run_noisy(dataclasses.replace(scene, seed=scene.seed + 1), model, 1200)
    np.testing.assert_array_equal(first, again)
    assert not np.any(np.isclose(first, other, rtol=0, atol=0))
    noise = shipped.noise
    sigma = np.array([noise.joint_position] * 6 + [noise.range] * 3 + [noise.force] * 3
                     + [noise.torque] * 3)
    # relative standard error of a sample std is about 1/sqrt(2 N) = 2.0 % for N = 1200
    # (from memory); 10 % leaves more than 5 standard errors
    np.testing.assert_allclose(first.std(axis=0), sigma, rtol=0.10)
    # the mean of N samples has standard error sigma/sqrt(N); allow 5 of them
    assert np.all(np.abs(first.mean(axis=0)) < 5 * sigma / math.sqrt(1200))


# -- scene file -------------------------------------------------------------------------------

def test_shipped_scene_loads_with_the_scenario_values(shipped: Scene) -> None:
    """The gearbox cell: 12-tooth spline (30 deg pitch), 9 deg phase, 4 mm drop."""
    assert shipped.urdf == URDF
    assert math.degrees(shipped.shaft.pitch) == pytest.approx(30.0)
    assert math.degrees(shipped.shaft.spline_phase) == pytest.approx(9.0)
    assert shipped.shaft.drop == 0.004
    assert shipped.flange.slope_bound() < 0.1
    assert shipped.range_sensors.frames == ('range_left', 'range_right', 'range_front')


def write_variant(tmp_path: Path, old: str, new: str) -> Path:
    text = SCENE_FILE.read_text(encoding='utf-8')
    assert old in text
    target = tmp_path / 'scenes' / 'cell.yaml'
    target.parent.mkdir(parents=True, exist_ok=True)
    (tmp_path / 'robots').mkdir(exist_ok=True)
    (tmp_path / 'robots' / 'six_axis_arm.urdf').write_text(URDF.read_text(encoding='utf-8'))
    target.write_text(text.replace(old, new, 1), encoding='utf-8')
    return target


def line_of(path: Path, fragment: str) -> int:
    """1-based line of the first line containing ``fragment`` (counted in the written file)."""
    for number, line in enumerate(path.read_text(encoding='utf-8').splitlines(), start=1):
        if fragment in line:
            return number
    raise AssertionError(fragment)


@pytest.mark.parametrize(('old', 'new', 'field', 'message'), [
    ('  drop: 0.004', '  drop: -0.004', 'shaft.drop', 'must be > 0, got -0.004'),
    ('  drop: 0.004', '  drop_height: 0.004', 'shaft.drop_height', "unknown key 'drop_height'"),
    ('  teeth: 12', '  teeth: twelve', 'shaft.teeth', "whole number >= 1, got 'twelve'"),
    ('  max_range: 0.040', '  max_range: 0.001', 'range_sensors.max_range',
     'greater than min_range'),
    ('  chamfer_tolerance_deg: 2.0', '  chamfer_tolerance_deg: 20.0',
     'shaft.chamfer_tolerance_deg', 'must be <= 15, got 20'),
    ('{amplitude: 0.0015, around: 3,', '{amplitude: 0.02, around: 3,', 'flange.waves',
     'slopes up to'),
])
def test_scene_errors_name_file_line_field_and_value(tmp_path: Path, old: str, new: str,
                                                     field: str, message: str) -> None:
    """Each bad value is reported as file:line: field: message."""
    path = write_variant(tmp_path, old, new)
    with pytest.raises(SceneError, match=message) as info:
        load_scene(path)
    err = info.value
    assert err.file == str(path)
    assert err.field == field
    anchor = 'waves:' if field == 'flange.waves' else new.strip().split(':')[0]
    assert err.line == line_of(path, anchor)


def test_unknown_initial_joint_is_reported_at_its_line(tmp_path: Path,
                                                       model: RobotModel) -> None:
    """The World checks joint names against the model and points back into the scene file."""
    path = write_variant(tmp_path, '    joint_6: 3.1416', '    joint_7: 3.1416')
    scene = load_scene(path)
    with pytest.raises(SceneError, match="unknown joint 'joint_7'") as info:
        World(scene, model)
    assert info.value.line == line_of(path, 'joint_7')
    assert info.value.field == 'robot.initial_positions.joint_7'


def test_unknown_sensor_frame_is_reported_at_its_line(tmp_path: Path, model: RobotModel) -> None:
    """A range sensor frame missing from the URDF points at its entry in the scene file."""
    path = write_variant(tmp_path, 'frames: [range_left, range_right, range_front]',
                         'frames: [range_left, range_rigth, range_front]')
    with pytest.raises(SceneError, match="no link 'range_rigth'") as info:
        World(load_scene(path), model)
    assert info.value.field == 'range_sensors.frames[1]'
    assert info.value.line == line_of(path, 'range_rigth')
