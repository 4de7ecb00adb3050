"""Message building of issue 9.4: the position target, /diagnostics and ~/status levels,
~/rows, ~/markers (spheres, people with S_p, constraint geometry).

References: the S_p formula of ISO/TS 15066:2016 5.5.4 as written out in
/work/shared/reference/safety-facts.md section 1.1 (with constant deceleration, T_s = v / a)
and its check value S_p(0) = 488 mm for the terms of section 1.3 (section 8: "v_r,max = 0 for
S <= 488 mm"); scipy's Rotation for marker orientations; numpy for the plane geometry.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from constraint_ctrl.errors import ConstraintCtrlError
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.nodes.markers import STATE_COLOURS, MarkerBuilder, MarkerJob, SkillShapes, \
    quaternion_z_to
from constraint_ctrl.nodes.outputs import PositionTarget, parse_command_interfaces
from constraint_ctrl.nodes.status import ERROR, OK, WARN, build_rows, build_status, watchdog_level
from constraint_ctrl.runtime.loop import Snapshot
from constraint_ctrl.runtime.watchdog_setup import build_watchdog, points_function
from constraint_ctrl.safety.states import State
from constraint_ctrl.safety.watchdog import PersonSample, WatchdogInput
from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.geometry import SkillGeometry
from constraint_ctrl.skill.loader import load_skill
from constraint_ctrl.solve.qp import SkillSolver
from constraint_ctrl.transport.dds_types import types_for

from node_harness import START, NodeHarness, copy_skills

ROOT = Path(__file__).resolve().parents[2]
URDF = ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'
Q0 = np.array(START)


def s_p(v: float, v_h: float = 1.6, t_r: float = 0.1, a: float = 3.333, c: float = 0.208,
        z_d: float = 0.1, z_r: float = 0.02) -> float:
    """S_p = S_h + S_r + S_s + C + Z_d + Z_r (safety-facts.md 1.1), constant deceleration a:
    T_s = v / a, S_h = v_h (T_r + T_s), S_r = v T_r, S_s = v^2 / (2 a). Defaults: the terms
    of safety-facts.md 1.3 and a = 3.333 m/s^2 as the node's watchdog settings give it."""
    t_s = v / a
    return v_h * (t_r + t_s) + v * t_r + v * v / (2 * a) + c + z_d + z_r


class _Port:
    """Just what the builders use: the DDS port's generated types and its level mapping."""

    types = types_for('jazzy')

    @staticmethod
    def diagnostic_level(level: int) -> int:
        return int(level)


# ------------------------------------------------------------------ command interfaces

def test_command_interfaces_parameter() -> None:
    assert parse_command_interfaces(['position', 'velocity']) == ('velocity', 'position')
    assert parse_command_interfaces(['position']) == ('position',)
    for bad in ([], ['effort'], ['velocity', 'velocity'], ['']):
        with pytest.raises(ConstraintCtrlError, match='command_interfaces'):
            parse_command_interfaces(bad)


def _snap(q: np.ndarray | None, now: float, stamps: np.ndarray) -> Snapshot:
    return Snapshot(now=now, q=q, joint_state_stamp=float(np.nanmax(stamps)),
                    joint_stamps=stamps)


def test_position_target_integrates_holds_and_withholds() -> None:
    order = np.array([1, 0, 2])            # joint_names order differs from the model's
    target = PositionTarget(order, dt=0.004, joint_state_timeout=0.05)
    q = np.array([0.1, -0.2, 0.3])
    qdot = np.array([0.5, 0.25, -1.0])
    target.take(_snap(q, 10.0, np.full(3, 9.99)))
    expected = (q + 0.004 * qdot)[order]
    assert target.target(qdot) == pytest.approx(expected.tolist(), abs=1e-15)
    # zero command: the measured q of the first zero tick, kept while the command stays zero
    target.take(_snap(q, 10.004, np.full(3, 10.0)))
    assert target.target(np.zeros(3)) == q[order].tolist()
    sagged = q - 0.001
    target.take(_snap(sagged, 10.008, np.full(3, 10.004)))
    assert target.target(np.zeros(3)) == q[order].tolist(), 'the hold target followed the sag'
    assert target.hold() == q[order].tolist()
    # one stale joint: nothing to send, and no hold target from old data afterwards
    target.take(_snap(sagged, 10.2, np.array([10.19, 10.1, 10.19])))
    assert target.target(np.zeros(3)) is None
    assert target.target(qdot) is None
    assert target.hold() is None
    never = np.array([10.19, np.nan, 10.19])     # a joint never updated is not fresh either
    target.take(_snap(sagged, 10.2, never))
    assert target.target(qdot) is None
    # fresh again: moving from the new measurement
    target.take(_snap(sagged, 10.3, np.full(3, 10.29)))
    assert target.target(qdot) == pytest.approx(((sagged + 0.004 * qdot)[order]).tolist())


def test_node_publishes_positions_and_velocities_of_one_tick(tmp_path: Path) -> None:
    skills = copy_skills(tmp_path / 'skills', ('move_to_point',))
    node = NodeHarness(skills, params={'command_interfaces': '[velocity, position]',
                                       'watchdog.joint_state_timeout': '10.0',
                                       'people.timeout': '10.0'})
    try:
        positions: list[list[float]] = []
        joint_commands: list[tuple[list[float], list[float]]] = []
        node.node._pub_position.publish = lambda m: positions.append(list(m.data))
        node.node._pub_joint_command.publish = lambda m: joint_commands.append(
            (list(m.position), list(m.velocity)))
        node.run(5)
        node.while_ticking(lambda: node.node.loop.request_activation('move_to_point',
                                                                     timeout=5.0))
        measured = node.q.copy()
        node.feed()
        node.tick()
        velocity = np.array(joint_commands[-1][1])
        assert np.abs(velocity).max() > 1e-6, 'the skill did not move the arm'
        # joint_names default to the model order here
        assert np.allclose(positions[-1], measured + node.node.dt * velocity, rtol=0,
                           atol=1e-15)
        assert joint_commands[-1][0] == positions[-1]
        assert len(positions) == len(joint_commands)
    finally:
        node.close()


# ------------------------------------------------------------------ diagnostics

def test_watchdog_levels() -> None:
    assert watchdog_level(State.NORMAL) == OK
    assert watchdog_level(State.REDUCED) == WARN
    assert watchdog_level(State.STOPPING) == WARN
    assert watchdog_level(State.STOPPED) == ERROR


def test_status_and_rows_messages(tmp_path: Path) -> None:
    skills = copy_skills(tmp_path / 'skills', ('move_to_point',))
    node = NodeHarness(skills, params={'watchdog.joint_state_timeout': '10.0',
                                       'people.timeout': '10.0'})
    try:
        node.run(3)
        node.while_ticking(lambda: node.node.loop.request_activation('move_to_point',
                                                                     timeout=5.0))
        out = node.run(2)[-1]
        job = node.node._status_job(out)
        msg = build_status(_Port, 'constraint_controller', out, 5_000_000_123, {}, 'arm_7')
        assert [s.name for s in msg.status] == ['constraint_controller: controller',
                                                'constraint_controller: watchdog']
        assert {s.hardware_id for s in msg.status} == {'arm_7'}
        assert msg.status[1].level == watchdog_level(out.watchdog.state)
        assert (msg.header.stamp.sec, msg.header.stamp.nanosec) == (5, 123)
        rows = build_rows(_Port, out.skill, job[1], job[2], 0, 'arm_7')
        names = [s.name for s in rows.status]
        assert names[:3] == ['move_to_point: tip_on_line[0]', 'move_to_point: tip_on_line[1]',
                             'move_to_point: tip_on_line[2]']
        assert len(names) == len(node.node.loop.active.skill.rows)
        values = {kv.key: kv.value for kv in rows.status[0].values}
        assert set(values) == {'value', 'error', 'slack', 'active', 'solved'}
        assert float(values['value']) == pytest.approx(job[1].value[0], rel=1e-5)
        # the node's hardware_id defaults to the URDF's robot name
        assert node.node.hardware_id == 'six_axis_arm'
        assert build_rows(_Port, None, None, [], 0, 'x').status == []
    finally:
        node.close()


# ------------------------------------------------------------------ markers

@pytest.mark.parametrize('direction', [(0, 0, 1), (0, 0, -1), (1, 0, 0), (0.3, -0.5, 0.8),
                                       (1e-9, 0, -1)])
def test_plane_orientation_matches_scipy(direction: tuple[float, float, float]) -> None:
    n = np.array(direction, dtype=float)
    n /= np.linalg.norm(n)
    rotated = Rotation.from_quat(quaternion_z_to(n)).apply([0.0, 0.0, 1.0])   # x, y, z, w
    assert np.allclose(rotated, n, atol=1e-9)


def _watchdog_step(person: np.ndarray, qdot: np.ndarray) -> tuple:
    model = RobotModel.from_urdf(URDF)
    wd = build_watchdog(model, 0.002, {'joint_acceleration': 1e6}, {'cam': 1.0})
    out = None
    for k in range(3):
        out = wd.step(WatchdogInput(
            now=1.0 + 0.002 * k, q=Q0, joint_state_stamp=1.0 + 0.002 * k, command=qdot,
            solver_ok=True, solver_status='ok', input_stamps={}, input_timeouts={},
            inputs_finite=True, people={'cam': PersonSample('cam', person, 1.0 + 0.002 * k)},
            person_sources=['cam'], joint_stamps=np.full(6, 1.0 + 0.002 * k)))
    return model, wd, out


def test_person_radius_is_the_protective_distance_at_rest() -> None:
    _, wd, out = _watchdog_step(np.array([2.5, 0.0, 0.5]), np.zeros(6))
    geometry = wd.geometry()
    # safety-facts.md section 8: S_p(0) = 488 mm for the section 1.3 terms (our defaults)
    assert geometry.protective_distances[0] == pytest.approx(0.488, abs=1e-9)
    assert geometry.protective_distances[0] == pytest.approx(out.protective_distance)
    assert geometry.state is State.NORMAL


def test_person_radius_is_the_protective_distance_while_moving() -> None:
    person = np.array([2.0, 0.3, 0.6])
    qdot = np.array([0.0, 0.3, -0.2, 0.0, 0.1, 0.0])
    model, wd, out = _watchdog_step(person, qdot)
    geometry = wd.geometry()
    assert out.state is State.NORMAL and np.allclose(out.command, qdot)
    # independent of the watchdog's Jacobians: point velocities by a finite difference of the
    # monitored points' positions, the closest sphere by centre distance minus radius
    _, fn = points_function(model)
    eps = 1e-6
    p0 = np.array(fn(Q0)[0])
    velocities = (np.array(fn(Q0 + eps * qdot)[0]) - np.array(fn(Q0 - eps * qdot)[0])).T \
        / (2 * eps)
    separation = np.linalg.norm(person - p0.T, axis=1) - geometry.radii
    i = int(np.argmin(separation))
    towards = person - p0[:, i]
    speed = max(0.0, float(velocities[i] @ towards / np.linalg.norm(towards)))
    assert speed > 0.05, 'the test pose should move the closest sphere towards the person'
    assert geometry.protective_distances[0] == pytest.approx(s_p(speed), abs=1e-6)
    assert geometry.protective_distances[0] == pytest.approx(out.protective_distance, abs=1e-9)
    assert np.allclose(geometry.points, p0.T, atol=1e-12)


def test_marker_array_spheres_people_and_geometry(tmp_path: Path) -> None:
    person = np.array([1.2, 0.0, 0.5])          # within the 1.5 m reduced zone
    _, wd, out = _watchdog_step(person, np.zeros(6))
    geometry = wd.geometry()
    assert geometry.state is State.REDUCED
    spec = load_skill(ROOT / 'config' / 'skills' / 'move_to_point.yaml')
    compiled = compile_skill(spec)
    solver = SkillSolver(compiled)
    solver.solve(Q0, compiled.start_unknowns(), np.zeros(0), 0.1, 0.002, np.zeros(6))
    shapes = SkillShapes().shapes(compiled, solver.input_values())
    builder = MarkerBuilder(_Port, 'base_link', 0.2)
    msg = builder.build(MarkerJob(geometry, compiled, None, 7 * 10**9), shapes)
    M = _Port.types.Marker
    markers = list(msg.markers)
    assert markers[0].action == M.DELETEALL
    by_ns: dict[str, list] = {}
    for m in markers[1:]:
        by_ns.setdefault(m.ns, []).append(m)
        assert m.header.frame_id == 'base_link' and m.header.stamp.sec == 7
    spheres = by_ns['monitored_spheres']
    assert len(spheres) == 7 and all(m.type == M.SPHERE for m in spheres)
    reduced = STATE_COLOURS[State.REDUCED]
    assert all((m.color.r, m.color.g, m.color.b, m.color.a) == pytest.approx(reduced)
               for m in spheres)
    assert [m.scale.x for m in spheres] == pytest.approx([0.16] * 6 + [0.10])  # 2 x radius
    (halo,) = by_ns['protective_distance']
    assert halo.scale.x / 2 == pytest.approx(s_p(0.0))
    assert (halo.pose.position.x, halo.pose.position.y, halo.pose.position.z) == \
        pytest.approx(tuple(person))
    # move_to_point: the target point and segment of tip_on_line, the bench plane z = 0.12 of
    # above_bench (its bound in the skill file), centred under the tip
    geo = by_ns['constraint_geometry']
    planes = [m for m in geo if m.text == 'above_bench' and m.type == M.CUBE]
    assert len(planes) == 1
    assert planes[0].pose.position.z == pytest.approx(0.12)
    q = planes[0].pose.orientation
    assert (q.x, q.y, q.z, q.w) == pytest.approx((0, 0, 0, 1))
    assert any(m.text == 'tip_on_line' and m.type == M.LINE_LIST for m in geo)


def test_skill_geometry_against_numpy() -> None:
    """follow_flange's surface plane through the three beam hits, against numpy's plane
    through the same three points; the hits come from the skill's own formulas (value_now of
    point(link, x, 0, 0)), evaluated at the solver's inputs."""
    spec = load_skill(ROOT / 'config' / 'skills' / 'follow_flange.yaml')
    compiled = compile_skill(spec)
    solver = SkillSolver(compiled)
    q = np.array([0.407, 0.846, 0.1968, 0.0, 0.528, 0.407])
    ranges = np.array([0.009, 0.011, 0.010])
    solver.solve(q, compiled.start_unknowns(), ranges, 0.0, 0.002, np.zeros(6))
    geometry = SkillGeometry.of(compiled)
    shapes = geometry.evaluate(solver.input_values())
    planes = [s for s in shapes if s.kind == 'plane']
    assert {s.constraint for s in planes} == {'keep_standoff', 'left_in_range',
                                              'right_in_range', 'front_in_range'}
    model = compiled.model
    hits = []
    for link, r in zip(('range_left', 'range_right', 'range_front'), ranges):
        pose = _pose(model, link, q)
        hits.append(pose[:3, 3] + r * pose[:3, 0])      # r along the beam (+x of its frame)
    normal = np.cross(hits[1] - hits[0], hits[2] - hits[0])
    normal /= np.linalg.norm(normal)
    plane = planes[0].data
    assert np.allclose(plane[:3], normal, atol=1e-9)
    assert plane[3] == pytest.approx(float(normal @ hits[0]), abs=1e-9)
    # the patch centre is on the plane
    assert float(normal @ planes[0].centre) == pytest.approx(plane[3], abs=1e-12)
    assert 'face_surface' in geometry.not_drawn


def _pose(model: RobotModel, link: str, q: np.ndarray) -> np.ndarray:
    import casadi as ca
    fn = ca.Function('pose', [model.q], [model.pose(link)])
    return np.array(fn(q))


def test_replay_reads_rows_from_the_rows_topic(tmp_path: Path) -> None:
    """A bag as the node now records it (~/rows beside ~/status, built by the node's own
    builders, written with rosbags' rosbag2 writer): replay's reader finds each row's series
    and the watchdog state of the same moment."""
    from types import SimpleNamespace

    from rosbags.rosbag2 import StoragePlugin, Writer
    from rosbags.typesys import Stores, get_typestore

    from constraint_ctrl.solve.qp import RowReport
    from constraint_ctrl.tools.replay import index_bag, read_recorded_rows
    store = get_typestore(Stores.ROS2_JAZZY)
    port = SimpleNamespace(types=SimpleNamespace(**{k.rsplit('/', 1)[1]: v
                                                    for k, v in store.types.items()}),
                           diagnostic_level=lambda level: int(level))
    names = ['tip_on_line[0]', 'above_bench']
    bag = tmp_path / 'bag'
    t0 = 10**12
    with Writer(bag, version=9, storage_plugin=StoragePlugin.MCAP) as writer:
        conns = {topic: writer.add_connection(topic, kind, typestore=store) for topic, kind in (
            ('/constraint_controller/rows', 'diagnostic_msgs/msg/DiagnosticArray'),
            ('/constraint_controller/events', 'std_msgs/msg/String'),
            ('/constraint_controller/command', 'std_msgs/msg/Float64MultiArray'))}
        T = store.types
        layout = T['std_msgs/msg/MultiArrayLayout'](dim=[], data_offset=0)
        writer.write(conns['/constraint_controller/command'], t0, store.serialize_cdr(
            T['std_msgs/msg/Float64MultiArray'](layout=layout, data=np.zeros(6)),
            'std_msgs/msg/Float64MultiArray'))
        for k in range(5):
            report = RowReport(value=np.array([0.1 * k, 0.12]), error=np.array([1e-3 * k, 0.0]),
                               slack=np.zeros(2), active=np.array([True, False]),
                               solved=np.array([True, True]))
            msg = build_rows(port, 'move_to_point', report, names, t0 + k * 10**8, 'arm')
            writer.write(conns['/constraint_controller/rows'], t0 + k * 10**8,
                         store.serialize_cdr(msg, 'diagnostic_msgs/msg/DiagnosticArray'))
        writer.write(conns['/constraint_controller/events'], t0, store.serialize_cdr(
            store.types['std_msgs/msg/String'](data='activated_move_to_point'),
            'std_msgs/msg/String'))
    index = index_bag(bag)
    rows = read_recorded_rows(index, 'move_to_point', 0.0, 10.0)
    assert len(rows.time) == 5
    assert np.allclose(rows.values['tip_on_line[0]']['error'], [0, 1e-3, 2e-3, 3e-3, 4e-3])
    assert np.allclose(rows.values['above_bench']['value'], 0.12)
    assert read_recorded_rows(index, 'other_skill', 0.0, 10.0).time.size == 0
