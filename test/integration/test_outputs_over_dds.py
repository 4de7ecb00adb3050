"""Issue 9.4 over DDS: the controller as a process, a peer in this process playing the robot,
the person detector and the listeners.

- ~/position_command: each position target is q + q_dot dt, with q the joint_states sample the
  command answers (matched by the stamp ~/joint_command carries) and dt = 1 / rate_hz;
  at rest it is a measured q, held; with stale joint_states nothing is published;
- the command publishers are reliable and keep last 1 (read from Cyclone's own discovery data,
  not from our graph code);
- /diagnostics: hardware_id, '<node>: ' names, and a watchdog level that follows the state
  (OK normal, WARN reduced, ERROR stopped);
- ~/rows: row names and values; ~/markers: monitored spheres coloured by state, the person's
  S_p radius against the formula (safety-facts.md 1.1; S_p(0) = 488 mm, section 8).

Counts have margins and nothing here asserts a time.
"""
from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.nodes.markers import STATE_COLOURS  # noqa: E402
from constraint_ctrl.safety.states import State  # noqa: E402
from constraint_ctrl.transport.port import open_port  # noqa: E402
from domains import in_domain  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
NODE = '/constraint_controller'
JOINTS = [f'joint_{i}' for i in range(1, 7)]
START = np.array([0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416])
RATE = 100.0
FAR = (3.0, 3.0, 1.0)        # beyond the 1.5 m reduced zone
NEAR = (1.1, 0.0, 0.6)       # inside the reduced zone, outside S_p




class Cell:
    """The robot (integrates ~/command, publishes stamped joint_states and remembers each
    sample), the person detector and the listeners, in one DDS participant."""

    def __init__(self) -> None:
        self.port = open_port('dds', 'outputs_peer', ['--ros-args'])
        t = self.t = self.port.types
        self.lock = threading.Lock()
        self.q = START.copy()
        self.sent: dict[tuple[int, int], np.ndarray] = {}
        self.velocity: np.ndarray = np.zeros(6)
        self.velocities = 0
        self.joint_commands: list[tuple[tuple[int, int], list[float], list[float]]] = []
        self.positions: list[list[float]] = []
        self.diagnostics: list[Any] = []
        self.rows: list[Any] = []
        self.markers: list[Any] = []
        self.events: list[str] = []
        self.publish_joints = True
        self.person: tuple[float, float, float] | None = FAR
        sub = self.port.create_subscription
        sub(t.Float64MultiArray, f'{NODE}/command', self._on_velocity, 'default')
        sub(t.JointState, f'{NODE}/joint_command', self._on_joint_command, 'default')
        sub(t.Float64MultiArray, f'{NODE}/position_command',
            lambda m: self._keep(self.positions, list(m.data)), 'default')
        sub(t.DiagnosticArray, '/diagnostics', lambda m: self._keep(self.diagnostics, m),
            'default')
        sub(t.DiagnosticArray, f'{NODE}/rows', lambda m: self._keep(self.rows, m), 'default')
        sub(t.MarkerArray, f'{NODE}/markers', lambda m: self._keep(self.markers, m), 'default')
        sub(t.String, f'{NODE}/events', lambda m: self._keep(self.events, m.data), 'default')
        self.js = self.port.create_publisher(t.JointState, '/joint_states', 'sensor')
        self.operator = self.port.create_publisher(t.PointStamped, '/cell/operator', 'sensor')
        self.timer = self.port.create_timer(0.01, self._publish)
        threading.Thread(target=self.port.spin, daemon=True).start()

    def _keep(self, into: list, item: Any) -> None:
        with self.lock:
            into.append(item)

    def _on_velocity(self, msg: Any) -> None:
        with self.lock:
            self.velocity = np.array(list(msg.data))
            self.velocities += 1

    def _on_joint_command(self, msg: Any) -> None:
        stamp = (msg.header.stamp.sec, msg.header.stamp.nanosec)
        self._keep(self.joint_commands, (stamp, list(msg.position), list(msg.velocity)))

    def _header(self) -> Any:
        ns = self.port.now_ns()
        return self.t.Header(stamp=self.t.Time(sec=ns // 10**9, nanosec=ns % 10**9),
                             frame_id='base_link')

    def _publish(self) -> None:
        with self.lock:
            self.q = self.q + 0.01 * self.velocity
            q = self.q.copy()
            joints, person = self.publish_joints, self.person
        if joints:
            header = self._header()
            with self.lock:
                self.sent[(header.stamp.sec, header.stamp.nanosec)] = q
            self.js.publish(self.t.JointState(header=header, name=JOINTS, position=q.tolist(),
                                              velocity=[], effort=[]))
        if person is not None:
            x, y, z = person
            self.operator.publish(self.t.PointStamped(header=self._header(),
                                                      point=self.t.Point(x=x, y=y, z=z)))

    def trigger(self, name: str) -> Any:
        client = self.port.create_client(self.t.Trigger, name)
        assert client.wait_for_service(20.0), f'service {name} not available'
        reply = client.call(self.t.Trigger.Request(), 20.0)
        assert reply is not None, f'no reply from {name}'
        return reply

    def watchdog_status(self, after: int = 0) -> list[Any]:
        with self.lock:
            arrays = self.diagnostics[after:]
        return [s for a in arrays for s in a.status if s.name == 'constraint_controller: watchdog']

    def close(self) -> None:
        self.port.shutdown()


@pytest.fixture(scope='module')
def cell(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Cell, subprocess.Popen]]:
    work = tmp_path_factory.mktemp('outputs')
    skills = work / 'skills'
    skills.mkdir()
    text = (ROOT / 'config' / 'skills' / 'move_to_point.yaml').read_text()
    (skills / 'move_to_point.yaml').write_text(
        text.replace('../robots/', str(ROOT / 'config' / 'robots') + '/'))
    domain = str(random.randint(100, 230))
    env = dict(os.environ, PYTHONPATH=str(ROOT), ROS_DOMAIN_ID=domain)
    proc = subprocess.Popen(
        [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds', '--ros-args',
         '--params-file', str(ROOT / 'config' / 'controller.yaml'),
         '-p', f'skills_folder:={skills}', '-p', f'rate_hz:={RATE}',
         '-p', 'command_interfaces:=[velocity, position]',
         '-p', 'watchdog.joint_state_timeout:=0.5', '-p', 'people.timeout:=1.0',
         '-p', 'watchdog.resume_after:=0.2', '-p', 'markers_rate_hz:=5.0',
         '-p', 'diagnostics_rate_hz:=1.0', '-p', 'status_rate_hz:=10.0'],
        cwd=work, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    with in_domain(domain):
        cell = Cell()
    try:
        yield cell, proc
    finally:
        cell.close()
        if proc.poll() is None:
            proc.send_signal(signal.SIGINT)
            try:
                proc.wait(15)
            except subprocess.TimeoutExpired:
                proc.kill()


def _publishers_qos(port: Any, topic: str) -> list[tuple[bool, Any]]:
    """(reliable, history) of each writer of the ROS topic, from Cyclone's built-in
    publication topic (what `ros2 topic info -v` reads through rmw_cyclonedds)."""
    from cyclonedds.builtin import BuiltinDataReader, BuiltinTopicDcpsPublication
    from cyclonedds.qos import Policy
    reader = BuiltinDataReader(port._participant, BuiltinTopicDcpsPublication)
    found = []
    for sample in reader.take(N=10_000):
        if sample.topic_name == f'rt{topic}':
            found.append((isinstance(sample.qos[Policy.Reliability],
                                     Policy.Reliability.Reliable), sample.qos[Policy.History]))
    return found


def test_at_rest_position_is_a_measured_q_and_spheres_are_green(cell) -> None:
    robot, proc = cell
    assert wait_until(lambda: len(robot.positions) >= 20, 60.0), 'no ~/position_command'
    with robot.lock:
        commands = list(robot.joint_commands)
        sent = dict(robot.sent)
    at_rest = [c for c in commands if c[1] and not any(c[2])]
    assert len(at_rest) >= 10
    # no skill: the target is one measured q (the first zero tick's), the same every tick
    first = at_rest[0][1]
    assert all(c[1] == first for c in at_rest)
    assert any(np.array_equal(first, q) for q in sent.values())
    assert wait_until(lambda: len(robot.markers) >= 3, 30.0), 'no ~/markers'
    marker_array = robot.markers[-1]
    spheres = [m for m in marker_array.markers if m.ns == 'monitored_spheres']
    assert len(spheres) == 7      # six moving links and the tool tip (watchdog_setup)
    green = STATE_COLOURS[State.NORMAL]
    assert all((m.color.r, m.color.g, m.color.b, m.color.a) == pytest.approx(green)
               for m in spheres)
    (halo,) = [m for m in marker_array.markers if m.ns == 'protective_distance']
    # at rest S_p(0) = v_h T_r + C + Z_d + Z_r = 1.6 x 0.1 + 0.208 + 0.1 + 0.02 = 0.488 m
    # (safety-facts.md section 8: v_r,max = 0 for S <= 488 mm)
    assert halo.scale.x / 2.0 == pytest.approx(0.488, abs=1e-9)
    assert (halo.pose.position.x, halo.pose.position.y) == pytest.approx(FAR[:2])


def test_command_publishers_are_reliable_keep_last_1(cell) -> None:
    robot, _ = cell
    from cyclonedds.qos import Policy
    for topic in ('command', 'position_command', 'joint_command'):
        name = f'{NODE}/{topic}'
        assert wait_until(lambda name=name: bool(_publishers_qos(robot.port, name)), 20.0)
        qos = _publishers_qos(robot.port, name)
        assert qos == [(True, Policy.History.KeepLast(depth=1))], (topic, qos)


def test_position_command_is_measured_q_plus_velocity_dt(cell) -> None:
    robot, _ = cell
    with robot.lock:
        before = len(robot.joint_commands)
    assert robot.trigger(f'{NODE}/skills/move_to_point/activate').success
    assert wait_until(lambda: 'arrived' in robot.events, 60.0), robot.events
    with robot.lock:
        commands = robot.joint_commands[before:]
        positions = list(robot.positions)
        sent = dict(robot.sent)
    moving = [c for c in commands if c[1] and any(abs(v) > 1e-9 for v in c[2])]
    matched = 0
    for stamp, position, velocity in moving:
        q = sent.get(stamp)
        assert q is not None, f'~/joint_command answers {stamp}, a sample never sent'
        # the node computes q + v dt in float64 from the same floats: equal to round-off
        assert np.allclose(position, q + np.array(velocity) / RATE, rtol=0, atol=1e-12)
        matched += 1
    assert matched >= 30, f'only {matched} moving commands'
    # ~/position_command carries exactly the targets ~/joint_command shows
    shown = {tuple(c[1]) for c in robot.joint_commands if c[1]}
    assert sum(tuple(p) in shown for p in positions) >= len(positions) - 2


def test_rows_carry_names_and_values(cell) -> None:
    robot, _ = cell
    assert robot.trigger(f'{NODE}/skills/move_to_point/activate').success
    assert wait_until(lambda: any(len(r.status) for r in robot.rows[-3:]), 20.0)
    with robot.lock:
        rows = [r for r in robot.rows if len(r.status)][-1]
    names = [s.name for s in rows.status]
    for row in ('tip_on_line[0]', 'tip_on_line[1]', 'tip_on_line[2]', 'tool_down[0]',
                'hold_heading', 'above_bench'):
        assert f'move_to_point: {row}' in names, names
    for status in rows.status:
        values = {kv.key: kv.value for kv in status.values}
        assert np.isfinite(float(values['value'])) and values['solved'] in ('true', 'false')
    # the bench plane of above_bench (z = 0.12 in the skill file) among the markers
    assert wait_until(lambda: any(m.text == 'above_bench' and m.type == m.CUBE
                                  for m in robot.markers[-1].markers), 20.0)
    plane = [m for m in robot.markers[-1].markers if m.text == 'above_bench'
             and m.type == m.CUBE][0]
    assert plane.pose.position.z == pytest.approx(0.12, abs=1e-9)


def test_diagnostics_follow_the_watchdog(cell) -> None:
    robot, _ = cell
    assert wait_until(lambda: robot.watchdog_status(), 30.0), 'no /diagnostics'
    status = robot.watchdog_status()[-1]
    assert status.hardware_id == 'six_axis_arm'
    assert status.level == 0 and status.message.startswith('normal'), status
    names = {s.name for s in robot.diagnostics[-1].status}
    assert names == {'constraint_controller: controller', 'constraint_controller: watchdog'}
    # a person inside the reduced zone: WARN, spheres yellow
    mark = len(robot.diagnostics)
    robot.person = NEAR
    assert wait_until(lambda: any(s.level == 1 and s.message.startswith('reduced')
                                  for s in robot.watchdog_status(mark)), 30.0)
    yellow = STATE_COLOURS[State.REDUCED]
    assert wait_until(lambda: any(
        m.ns == 'monitored_spheres' and (m.color.r, m.color.g, m.color.b, m.color.a)
        == pytest.approx(yellow) for m in robot.markers[-1].markers), 20.0)
    # the person source goes silent: a person anywhere, stopped, ERROR, spheres red
    mark = len(robot.diagnostics)
    robot.person = None
    assert wait_until(lambda: any(s.level == 2 and s.message.startswith('stopped')
                                  for s in robot.watchdog_status(mark)), 30.0)
    red = STATE_COLOURS[State.STOPPED]
    assert wait_until(lambda: any(
        m.ns == 'monitored_spheres' and (m.color.r, m.color.g, m.color.b, m.color.a)
        == pytest.approx(red) for m in robot.markers[-1].markers), 20.0)
    robot.person = FAR
    mark = len(robot.diagnostics)
    assert wait_until(lambda: any(s.level == 0 for s in robot.watchdog_status(mark)), 30.0)


def test_stale_joint_states_publish_no_position(cell) -> None:
    robot, _ = cell
    robot.events.clear()
    robot.publish_joints = False
    assert wait_until(lambda: 'watchdog_stopped' in robot.events, 30.0), robot.events
    with robot.lock:
        positions, velocities = len(robot.positions), robot.velocities
    # 40 more velocity commands (zeros) and at most the two already in flight on the position
    # topic when the stop was announced
    assert wait_until(lambda: robot.velocities >= velocities + 40, 30.0)
    assert len(robot.positions) <= positions + 2
    assert not any(robot.velocity)
    robot.publish_joints = True
    assert wait_until(lambda: len(robot.positions) > positions + 5, 30.0), \
        'no position commands once joint_states are fresh again'
