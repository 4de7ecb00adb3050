"""The cookbook's fixtures of the simulated cell: the screw joint, the curved panel, and scenes
that name only some fixtures.

Outside references, named beside each check: the lead of a single-start thread (advance =
pitch x turns, machine-design textbook); the linear spring-damper law F = k x + c dx/dt; the
geometry of a cylinder (penetration = R - distance from the axis, normal along the radius);
the torque rate of a joint after seating (the scene's value; ISO 5393 calls a joint hard when
the torque rises from snug to target within 30 degrees, from memory); rotation of a vector into
a frame, R^T v. Tool poses of the World are cross-checked with Pinocchio.
"""
from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from constraint_ctrl.model import RobotModel
from constraint_ctrl.sim.panel_contact import PanelContact
from constraint_ctrl.sim.scene import (NoiseSpec, PanelSpec, SceneError, ScrewSpec,
                                       load_scene)
from constraint_ctrl.sim.screw_joint import SLIP_SPEED, ScrewJoint, bit_angle
from constraint_ctrl.sim.signals import world_signals
from constraint_ctrl.sim.world import SimError, World

ROOT = Path(__file__).resolve().parents[2]
SCENES = ROOT / 'config' / 'cookbook' / 'scenes'
URDF = ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'

SCREW = ScrewSpec(hole=(0.55, -0.12), plate_top=0.30, standout=0.0015, pitch=0.002,
                  head_radius=0.0035, capture_radius=0.0005, tilt_tolerance=math.radians(2.0),
                  engage_force=5.0, running_torque=0.10, seated_torque_rate=1.5,
                  stiffness=20000.0, damping=40.0)
PANEL = PanelSpec(crown=(0.48, 0.33), radius=0.40, y_range=(-0.15, 0.25),
                  half_angle=math.radians(25.0), stiffness=5000.0, damping=10.0)


def tool_down(turn: float, tilt_deg: float = 0.0) -> np.ndarray:
    """Tool z down (tilted about base y by ``tilt_deg``), turned by ``turn`` rad clockwise seen
    from above (positive about the downward axis)."""
    c, s = math.cos(-turn), math.sin(-turn)
    rz = np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    t = math.radians(tilt_deg)
    ry = np.array([[math.cos(t), 0.0, math.sin(t)], [0.0, 1.0, 0.0],
                   [-math.sin(t), 0.0, math.cos(t)]])
    return ry @ rz @ np.diag([1.0, -1.0, -1.0])


def on_head(screw: ScrewJoint, press: float = 0.0005, dx: float = 0.0) -> np.ndarray:
    """Bit tip ``press`` below the head's top face (k press = 10 N for 0.5 mm), offset dx."""
    return np.array([SCREW.hole[0] + dx, SCREW.hole[1], screw.head_top - press])


def drive(screw: ScrewJoint, turns: float, steps: int, *, start: float = 0.0, t0: float = 0.0,
          dt: float = 0.002, **pose: float):
    """Turn the pressed bit from ``start`` by ``turns`` rad in ``steps`` equal steps; the bit
    follows the head down. Returns the last result."""
    result = None
    tilt = pose.pop('tilt_deg', 0.0)
    for k in range(steps + 1):
        angle = start + turns * k / steps
        result = screw.update(t0 + k * dt, on_head(screw, **pose), tool_down(angle, tilt))
    return result


# -- screw ------------------------------------------------------------------------------------

def test_bit_angle_is_positive_clockwise_seen_from_above() -> None:
    assert bit_angle(tool_down(0.3)) == pytest.approx(0.3, abs=1e-12)
    assert bit_angle(tool_down(-2.0)) == pytest.approx(-2.0, abs=1e-12)


def test_an_engaged_screw_advances_one_pitch_per_turn() -> None:
    """Lead of a single-start thread: advance = pitch * angle / (2 pi); 0.5 rad -> 0.159 mm."""
    screw = ScrewJoint(SCREW)
    result = drive(screw, 0.5, 100)
    assert result.engaged and not result.seated
    assert result.advance == pytest.approx(SCREW.pitch * 0.5 / (2 * math.pi), rel=1e-9)
    assert screw.head_top == pytest.approx(SCREW.plate_top + SCREW.standout - result.advance)


def test_running_torque_resists_the_turn_and_shows_on_the_wrist() -> None:
    """Turning in at 2.5 rad/s (above SLIP_SPEED): the thread resists with running_torque; the
    sensor (tool frame, tool z down) sees -T about z and the push as -F along z, F = k x."""
    screw = ScrewJoint(SCREW)
    result = drive(screw, 0.1, 20)     # 0.005 rad per 2 ms
    assert 0.005 / 0.002 > SLIP_SPEED
    assert result.drive_torque == pytest.approx(SCREW.running_torque)
    np.testing.assert_allclose(result.torque, [0.0, 0.0, -SCREW.running_torque], atol=1e-12)
    # the bit follows the head, so the penetration stays 0.5 mm: only the spring term
    assert result.axial_force == pytest.approx(SCREW.stiffness * 0.0005, rel=1e-6)
    np.testing.assert_allclose(result.force, [0.0, 0.0, -SCREW.stiffness * 0.0005], atol=1e-9)


def test_slow_turning_is_resisted_in_proportion_and_backing_out_reverses_the_torque() -> None:
    screw = ScrewJoint(SCREW)
    slow = drive(screw, 0.02 * 0.2, 1, dt=0.2)          # 0.02 rad/s for one 0.2 s step
    assert slow.drive_torque == pytest.approx(SCREW.running_torque * 0.02 / SLIP_SPEED)
    back = drive(ScrewJoint(SCREW), -0.1, 20, start=0.0)
    assert back.drive_torque == pytest.approx(-SCREW.running_torque)
    assert back.advance == 0.0                            # it cannot come out past its start


@pytest.mark.parametrize(('what', 'pose'), [
    ('off the axis', {'dx': 0.0008}),
    ('tilted', {'tilt_deg': 3.0}),
    ('pressed too lightly', {'press': 0.0002}),           # 4 N < engage_force 5 N
])
def test_the_bit_slips_unless_aligned_and_pressed(what: str, pose: dict) -> None:
    screw = ScrewJoint(SCREW)
    result = drive(screw, 0.5, 100, **pose)
    assert not result.engaged, what
    assert result.advance == 0.0 and result.drive_torque == 0.0, what


def test_after_seating_the_torque_rises_at_the_joints_torque_rate() -> None:
    """Seated after 2 pi standout / pitch = 4.712 rad; every further radian adds the torque
    rate (1.5 N m/rad): 0.3 rad more -> 0.1 + 0.45 N m, held at rest, gone when the bit is
    lifted, and turning back past the seating angle lets the head rise again."""
    screw = ScrewJoint(SCREW)
    seat = 2 * math.pi * SCREW.standout / SCREW.pitch
    result = drive(screw, seat + 0.3, 1200)
    assert result.seated and screw.time_seated is not None
    assert result.advance == pytest.approx(SCREW.standout)
    assert result.windup == pytest.approx(0.3, abs=1e-9)
    assert result.drive_torque == pytest.approx(0.10 + 1.5 * 0.3, rel=1e-9)
    held = screw.update(10.0, on_head(screw), tool_down(seat + 0.3))
    assert held.drive_torque == pytest.approx(0.55, rel=1e-9)
    lifted = screw.update(10.002, on_head(screw, press=-0.001), tool_down(seat + 0.3))
    assert lifted.axial_force == 0.0 and lifted.drive_torque == 0.0 and lifted.seated
    back = drive(screw, -0.5, 100, start=seat + 0.3, t0=11.0)
    assert not back.seated
    assert back.advance == pytest.approx(SCREW.standout - 0.2 * SCREW.pitch / (2 * math.pi))


def test_off_the_head_the_tool_rests_on_the_plate() -> None:
    screw = ScrewJoint(SCREW)
    position = np.array([SCREW.hole[0] + 0.01, SCREW.hole[1], SCREW.plate_top - 0.001])
    screw.update(0.0, position, tool_down(0.0))
    result = screw.update(0.002, position, tool_down(0.0))
    assert result.axial_force == pytest.approx(SCREW.stiffness * 0.001)
    assert not result.engaged


# -- panel ------------------------------------------------------------------------------------

def pad_at(angle_deg: float, gap: float, y: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Pad centre ``gap`` outside the surface at ``angle_deg`` from the crown, square to it."""
    phi = math.radians(angle_deg)
    normal = np.array([math.sin(phi), 0.0, math.cos(phi)])
    ax, az = PANEL.axis
    position = np.array([ax, y, az]) + (PANEL.radius + gap) * normal
    z = -normal
    x = np.array([0.0, 1.0, 0.0])
    return position, np.column_stack([x, np.cross(z, x), z])


@pytest.mark.parametrize('angle_deg', [-20.0, 0.0, 7.0, 24.0])
def test_panel_pushes_back_along_the_normal_with_the_spring_law(angle_deg: float) -> None:
    """Held 1 mm inside the cylinder: F = k x = 5 N along the outward normal; in the tool
    frame (z into the panel) that is (0, 0, -5) N."""
    contact = PanelContact(PANEL)
    position, rotation = pad_at(angle_deg, -0.001)
    contact.update(0.0, position, rotation)
    result = contact.update(0.002, position, rotation)
    assert result.over_panel
    assert result.penetration == pytest.approx(0.001, abs=1e-12)
    assert result.normal_force == pytest.approx(5.0, rel=1e-9)
    np.testing.assert_allclose(result.force, [0.0, 0.0, -5.0], atol=1e-9)
    np.testing.assert_allclose(rotation @ result.force,
                               -5.0 * rotation[:, 2], atol=1e-9)   # = +5 N along the normal


def test_panel_damping_adds_c_times_the_penetration_rate() -> None:
    contact = PanelContact(PANEL)
    position, rotation = pad_at(3.0, -0.001)
    contact.update(0.0, position, rotation)
    deeper, _ = pad_at(3.0, -0.0011)
    result = contact.update(0.002, deeper, rotation)     # 0.05 m/s inwards
    assert result.normal_force == pytest.approx(5000.0 * 0.0011 + 10.0 * 0.05, rel=1e-6)


@pytest.mark.parametrize(('angle_deg', 'gap', 'y'), [
    (0.0, 0.002, 0.05),      # above the surface
    (26.0, -0.001, 0.05),    # beyond the half angle
    (0.0, -0.001, 0.30),     # beyond the panel along its axis
])
def test_no_force_off_the_panel(angle_deg: float, gap: float, y: float) -> None:
    contact = PanelContact(PANEL)
    position, rotation = pad_at(angle_deg, gap, y)
    result = contact.update(0.0, position, rotation)
    assert result.normal_force == 0.0 and np.all(result.force == 0.0)


# -- scenes and the World ---------------------------------------------------------------------

@pytest.fixture(scope='module')
def model() -> RobotModel:
    return RobotModel.from_urdf(URDF)


def test_cookbook_scenes_load_with_their_fixtures_only() -> None:
    screw = load_scene(SCENES / 'screw_station.yaml')
    assert screw.screw == SCREW
    assert screw.panel is None and screw.shaft is None and screw.flange is None
    panel = load_scene(SCENES / 'polishing_cell.yaml')
    assert panel.panel == PANEL
    assert panel.range_sensors is None and panel.screw is None


def test_a_world_without_sensors_or_fixtures_reads_only_noise(tmp_path: Path,
                                                            model: RobotModel) -> None:
    path = tmp_path / 'bare.yaml'
    path.write_text(f'robot: {{urdf: {URDF}}}\nsimulation: {{rate: 500.0}}\n')
    world = World(load_scene(path), model)
    assert world.range_readings() == []
    force, torque = world.wrench()
    assert np.all(force == 0.0) and np.all(torque == 0.0)    # no noise configured
    assert set(world_signals(world)) == {'tool_force_x', 'tool_force_y', 'tool_force_z',
                                         'tool_torque_x', 'tool_torque_y', 'tool_torque_z'}
    with pytest.raises(SimError, match='no shaft'):
        _ = world.gear_state
    assert world.screw_state is None and world.panel_state is None


def pin_tool(q: np.ndarray) -> pin.SE3:
    m = pin.buildModelFromUrdf(str(URDF))
    d = m.createData()
    pin.framesForwardKinematics(m, d, q)
    return d.oMf[m.getFrameId('tool_tip')]


def test_world_wrench_is_the_panels_force_at_the_true_pose(model: RobotModel) -> None:
    """Lower the pad onto the panel with joint_2 (no noise, no latency): the wrench equals the
    spring law at the Pinocchio tool pose, k (R - |p - axis|), rotated into the tool frame."""
    scene = dataclasses.replace(load_scene(SCENES / 'polishing_cell.yaml'), noise=NoiseSpec(),
                                command_latency=0.0)
    world = World(scene, model)
    command = np.array([0.0, 0.03, 0.0, 0.0, 0.0, 0.0])      # leans the arm forward and down
    for _ in range(200):
        world.step(0.002, command)
    world.step(0.002, np.zeros(6))
    world.step(0.002, np.zeros(6))                           # at rest: no damping term
    tool = pin_tool(world.true_joint_positions)
    ax, az = PANEL.axis
    radial = np.array([tool.translation[0] - ax, 0.0, tool.translation[2] - az])
    penetration = PANEL.radius - np.linalg.norm(radial)
    assert penetration > 0.0005, 'the pad did not reach the panel'
    expected = tool.rotation.T @ (PANEL.stiffness * penetration * radial / np.linalg.norm(radial))
    force, torque = world.wrench()
    np.testing.assert_allclose(force, expected, rtol=1e-6, atol=1e-9)
    assert np.all(torque == 0.0)


def test_resetting_the_pose_does_not_turn_the_screw(model: RobotModel) -> None:
    """reset_joint_positions places the robot before a run: the jump of joint_6 is not a turn."""
    scene = load_scene(SCENES / 'screw_station.yaml')
    world = World(scene, model)
    q = world.true_joint_positions
    q[5] += 2.0
    world.reset_joint_positions(q)
    world.step(0.002, np.zeros(6))
    assert world.screw_state.advance == 0.0 and world.screw_state.drive_torque == 0.0


def write_scene(tmp_path: Path, source: Path, old: str, new: str) -> Path:
    text = source.read_text(encoding='utf-8')
    assert old in text
    path = tmp_path / 'scenes' / source.name
    path.parent.mkdir(parents=True, exist_ok=True)
    (tmp_path / 'robots').mkdir(exist_ok=True)
    (tmp_path / 'robots' / 'six_axis_arm.urdf').write_text(URDF.read_text(encoding='utf-8'))
    path.write_text(text.replace(old, new, 1).replace('../../robots/', '../robots/'),
                    encoding='utf-8')
    return path


def line_of(path: Path, fragment: str) -> int:
    for number, line in enumerate(path.read_text(encoding='utf-8').splitlines(), start=1):
        if fragment in line:
            return number
    raise AssertionError(fragment)


@pytest.mark.parametrize(('scene', 'old', 'new', 'field', 'message'), [
    ('screw_station.yaml', '  capture_radius: 0.0005', '  capture_radius: 0.005',
     'screw.capture_radius', 'must not exceed head_radius'),
    ('screw_station.yaml', '  pitch: 0.002', '  pitch: 0', 'screw.pitch', 'must be > 0'),
    ('screw_station.yaml', '  pitch: 0.002', '  lead: 0.002', 'screw.lead', "unknown key 'lead'"),
    ('polishing_cell.yaml', 'y_range: [-0.15, 0.25]', 'y_range: [0.25, -0.15]',
     'panel.y_range', 'from low to high'),
    ('polishing_cell.yaml', '  half_angle_deg: 25.0', '  half_angle_deg: 120.0',
     'panel.half_angle_deg', 'must be <= 90'),
    ('polishing_cell.yaml', 'panel:', 'range_sensors: {frames: [range_left], min_range: 0.0, '
     'max_range: 0.04}\npanel:', 'range_sensors', "needs 'flange'"),
])
def test_scene_errors_name_file_line_and_field(tmp_path: Path, scene: str, old: str, new: str,
                                               field: str, message: str) -> None:
    path = write_scene(tmp_path, SCENES / scene, old, new)
    with pytest.raises(SceneError, match=message) as info:
        load_scene(path)
    assert info.value.file == str(path)
    assert info.value.field == field
    assert info.value.line == line_of(path, new.strip().split('\n')[0].split(':')[0] + ':')
