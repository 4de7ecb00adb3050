"""Frames and the robot model over DDS, with the controller as its own process (issue 9.3).

Before the controller starts, a peer (this process, DDS port) publishes, as a cell would:

* `robot_description` (std_msgs/String, reliable, keep last 1, transient local: what
  robot_state_publisher offers) holding the package's arm with its joints renamed `arm_1` ...
  `arm_6`, so a controller that moves on joint_states of those names can only have its model
  from the topic (its robot_description_file points at a file that does not exist);
* `/tf_static` base_link -> camera (transient local, as tf2_ros's static broadcaster);

and then, while the controller runs, joint_states (integrating the commands), `/tf`
base_link -> mount at 50 Hz (a camera on a moving mount), two person sources (one in `camera`,
one in `mount`) and a marker (PointStamped in `camera`) that a skill input reads in base_link.
The skills folder holds a skill without `robot:` (it drives the controller's model) and one
naming a link the model lacks (refused with its file and line).

Checks (expected points from scipy.spatial.transform.Rotation, an outside reference):
* a person whose camera coordinates are far away but whose transformed position is 0.3 m from
  the arm's base stops the arm (separation); moved away, the arm resumes;
* /tf of the mount stopping for longer than people.transform_timeout is a fault of that source
  (a stop, one log line when it starts), /tf again clears it (one log line) and motion resumes;
* the marker's z in base_link (transformed) is the skill's target, read back from ~/rows.
Timing: only order and eventual outcomes are asserted (a busy machine delays, never reorders);
the timeouts (joint states and persons 0.5-1 s, transform data 0.5 s) are far above the peer's
periods (4 and 20 ms), because on a loaded 2-core machine its timer thread was seen to pause
for 0.2-0.4 s.
"""
from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any
from collections.abc import Iterator

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

pytest.importorskip('cyclonedds')

from constraint_ctrl.frames.messages import make_edge, tf_message  # noqa: E402
from constraint_ctrl.transport.port import open_port  # noqa: E402
from domains import in_domain  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
NODE = '/constraint_controller'
URDF = ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'
JOINTS = [f'arm_{i}' for i in range(1, 7)]
START = np.array([0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0])
CAMERA_T = np.array([1.5, -2.0, 2.2])
CAMERA_R = Rotation.from_euler('zyx', [2.1, 0.4, -2.6])
MOUNT_T = np.array([-1.0, 0.5, 1.0])
MOUNT_R = Rotation.from_euler('z', 0.7)
MARKER_Z = 0.33          # the marker's height in base_link: the skill's tip height target

ROBOTLESS = """\
skill: track_marker
description: tip height from a marker seen by a camera; no robot named
inputs:
  marker_z: {unit: m, rate_hz: 50, timeout: 1.0}
formulas:
  tip: position(tool_tip)
constraints:
  - name: tip_height
    function: tip[2]
    kind: equal
    target: clamp(marker_z, 0.25, 0.45)
    behaviour: {order: 1, gain: 3.0}
    weight: 100.0
  - name: tool_down
    function: cross(axis_z(tool_tip), vector(0, 0, -1))
    kind: equal
    target: 0
    behaviour: {order: 1, gain: 3.0}
    weight: 30.0
  - name: sweep
    function: tip[1]
    kind: equal
    target: 0.05 * sin(2 * pi * time / 3)
    behaviour: {order: 1, gain: 3.0}
    weight: 10.0
"""
BAD_LINK = """\
skill: needs_a_gripper
constraints:
  - name: reach
    function: position(gripper_finger)[2]
    kind: at_least
    lower: 0.2
    behaviour: {order: 1, gain: 1.0}
"""


def in_frame(rotation: Rotation, translation: np.ndarray, p_base: np.ndarray) -> np.ndarray:
    """Coordinates in a frame whose pose in base_link is (rotation, translation)."""
    return rotation.inv().apply(p_base - translation)


def stamp(t: Any, ns: int) -> Any:
    return t.Time(sec=ns // 10**9, nanosec=ns % 10**9)


class Cell:
    """Robot driver, camera, mount and marker in one DDS participant."""

    def __init__(self) -> None:
        self.port = open_port('dds', 'frames_cell', ['--ros-args'])
        t = self.t = self.port.types
        self.lock = threading.Lock()
        self.q = START.copy()
        self.commands: list[tuple[float, np.ndarray]] = []
        self.status: list[tuple[float, dict[str, str]]] = []
        self.send_mount_tf = True
        self.camera_person = in_frame(CAMERA_R, CAMERA_T, np.array([3.0, 3.0, 1.0]))
        self.mount_person = in_frame(MOUNT_R, MOUNT_T, np.array([-3.0, 3.0, 1.0]))
        self.marker = in_frame(CAMERA_R, CAMERA_T, np.array([0.4, 0.1, MARKER_Z]))
        # latched before the controller starts
        description = self.port.create_publisher(t.String, '/robot_description',
                                                 'robot_description')
        text = URDF.read_text()
        for i in range(1, 7):
            text = text.replace(f'"joint_{i}"', f'"arm_{i}"')
        self.description = text
        description.publish(t.String(data=text))
        static = self.port.create_publisher(t.TFMessage, '/tf_static', 'tf_static')
        static.publish(tf_message(t, [make_edge('base_link', 'camera', self.port.now_ns(),
                                                CAMERA_T, CAMERA_R.as_quat())]))
        self._keep = (description, static)
        self.tf = self.port.create_publisher(t.TFMessage, '/tf', 'tf')
        self.js = self.port.create_publisher(t.JointState, '/joint_states', 'sensor')
        self.person_camera = self.port.create_publisher(t.PointStamped, '/cell/camera_person',
                                                        'sensor')
        self.person_mount = self.port.create_publisher(t.PointStamped, '/cell/mount_person',
                                                       'sensor')
        self.marker_pub = self.port.create_publisher(t.PointStamped, '/cell/marker', 'sensor')
        self.port.create_subscription(t.Float64MultiArray, f'{NODE}/command', self._on_cmd,
                                      'default')
        self.port.create_subscription(t.DiagnosticArray, f'{NODE}/status', self._on_status,
                                      'default')
        # the rows of the running skill, one status per row '<skill>: <row>' (issue 9.4)
        self.port.create_subscription(t.DiagnosticArray, f'{NODE}/rows', self._on_rows,
                                      'default')
        self.rows: list[tuple[float, dict[str, str]]] = []
        self._n = 0
        self.port.create_timer(0.004, self._publish)
        threading.Thread(target=self.port.spin, daemon=True).start()

    def _on_cmd(self, msg: Any) -> None:
        with self.lock:
            self.commands.append((time.monotonic(), np.array(list(msg.data))))

    def _on_status(self, msg: Any) -> None:
        values: dict[str, str] = {}
        for st in msg.status:
            values.update({kv.key: kv.value for kv in st.values})
        with self.lock:
            self.status.append((time.monotonic(), values))

    def _on_rows(self, msg: Any) -> None:
        values = {f'{st.name.partition(": ")[2]}.{kv.key}': kv.value
                  for st in msg.status for kv in st.values}
        with self.lock:
            self.rows.append((time.monotonic(), values))

    def rows_since(self, t0: float) -> list[dict[str, str]]:
        with self.lock:
            return [v for t, v in self.rows if t >= t0]

    def _point(self, frame: str, xyz: np.ndarray, ns: int) -> Any:
        t = self.t
        return t.PointStamped(header=t.Header(stamp=stamp(t, ns), frame_id=frame),
                              point=t.Point(x=float(xyz[0]), y=float(xyz[1]), z=float(xyz[2])))

    def _publish(self) -> None:
        t = self.t
        ns = self.port.now_ns()
        self._n += 1
        with self.lock:
            if self.commands:
                self.q = self.q + 0.004 * self.commands[-1][1]
            q = self.q.tolist()
            camera_person, mount_person = self.camera_person, self.mount_person
        if self._n % 5 == 0 and self.send_mount_tf:          # /tf at 50 Hz
            self.tf.publish(tf_message(t, [make_edge('base_link', 'mount', ns, MOUNT_T,
                                                     MOUNT_R.as_quat())]))
        self.js.publish(t.JointState(header=t.Header(stamp=stamp(t, ns), frame_id=''),
                                     name=JOINTS, position=q, velocity=[], effort=[]))
        if self._n % 5 == 1:                                  # persons and marker at 50 Hz
            self.person_camera.publish(self._point('camera', camera_person, ns))
            self.person_mount.publish(self._point('mount', mount_person, ns))
            self.marker_pub.publish(self._point('camera', self.marker, ns))

    def moving_since(self, t0: float) -> bool:
        with self.lock:
            return any(t >= t0 and np.abs(c).max() > 1e-4 for t, c in self.commands)

    def stopped_since(self, t0: float, count: int = 5) -> bool:
        """At least `count` zero commands in a row after t0."""
        with self.lock:
            run = 0
            for t, c in self.commands:
                if t < t0:
                    continue
                run = run + 1 if not c.any() else 0
                if run >= count:
                    return True
            return False

    def statuses_since(self, t0: float) -> list[dict[str, str]]:
        with self.lock:
            return [v for t, v in self.status if t >= t0]


class Controller:
    def __init__(self, env: dict[str, str], params: Path, bag: Path) -> None:
        self.lines: list[str] = []
        self.params, self.bag = params, bag
        self.proc = subprocess.Popen(
            [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds',
             '--record', str(bag), '--ros-args', '--params-file', str(params)],
            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.append(line.rstrip('\n'))

    def log(self, text: str) -> list[str]:
        return [x for x in list(self.lines) if text in x]




@pytest.fixture(scope='module')
def cell(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Cell, Controller]]:
    work = tmp_path_factory.mktemp('frames')
    skills = work / 'skills'
    skills.mkdir()
    (skills / 'track_marker.yaml').write_text(ROBOTLESS)
    (skills / 'needs_a_gripper.yaml').write_text(BAD_LINK)
    params = work / 'params.yaml'
    params.write_text(f"""/**:
  ros__parameters:
    robot_description_source: topic
    robot_description_file: {work / 'no_such_file.urdf'}
    robot_description_timeout: 30.0
    skills_folder: {skills}
    rate_hz: 250.0
    initial_skill: track_marker
    people:
      sources: [/cell/camera_person, /cell/mount_person]
      timeout: 1.0
      transform_timeout: 0.5
    inputs:
      marker_z: {{topic: /cell/marker, type: geometry_msgs/msg/PointStamped, field: point.z,
                  frame: base_link}}
    watchdog:
      resume_after: 0.3
      joint_state_timeout: 0.5
""")
    domain = str(random.randint(1, 100))
    env = dict(os.environ, PYTHONPATH=str(ROOT), ROS_DOMAIN_ID=domain)
    with in_domain(domain):
        peer = Cell()
    time.sleep(0.5)                       # latched samples written before the node exists
    node = Controller(env, params, work / 'bag')
    node.urdf = work / 'renamed.urdf'
    node.urdf.write_text(peer.description)
    try:
        assert wait_until(lambda: peer.moving_since(0.0), 60.0), \
            'the controller never moved:\n' + '\n'.join(node.lines[-30:])
        yield peer, node
    finally:
        peer.port.shutdown()
        node.proc.send_signal(signal.SIGINT)
        node.proc.wait(15)


def test_the_model_came_from_the_latched_robot_description(
        cell: tuple[Cell, Controller]) -> None:
    """It moves on joints that only the topic's URDF has, although its file does not exist."""
    peer, node = cell
    assert peer.moving_since(0.0)
    assert node.log('ready (active): 1 skills')
    # robot_state_publisher publishes again after a parameter change: the running node keeps
    # its model and says so once, however often it comes
    for i in range(3):
        peer._keep[0].publish(peer.t.String(data=peer.description + f'<!-- change {i} -->'))
    assert wait_until(lambda: node.log('a new robot description arrived'), 20.0)
    time.sleep(0.5)
    assert len(node.log('a new robot description arrived on /robot_description')) == 1
    now = time.monotonic()
    assert wait_until(lambda: peer.moving_since(now), 20.0)


def test_a_skill_naming_a_link_the_model_lacks_is_refused_with_file_and_line(
        cell: tuple[Cell, Controller]) -> None:
    _, node = cell
    lines = node.log('FAILED needs_a_gripper.yaml')
    assert len(lines) == 1, node.lines[:20]
    assert 'needs_a_gripper.yaml:4: constraints[0].function:' in lines[0]
    assert "unknown link 'gripper_finger'" in lines[0]


def test_the_marker_input_is_read_in_base_link(cell: tuple[Cell, Controller]) -> None:
    """tip_height's target is the marker's z in base_link: value - error on ~/rows."""
    peer, _ = cell
    t0 = time.monotonic()
    assert wait_until(lambda: any('tip_height.error' in v for v in peer.rows_since(t0)),
                      20.0)
    v = [v for v in peer.rows_since(t0) if 'tip_height.error' in v][-1]
    target = float(v['tip_height.value']) - float(v['tip_height.error'])
    # ~/rows prints 6 significant digits
    assert target == pytest.approx(MARKER_Z, abs=1e-5)
    assert abs(peer.marker[2] - MARKER_Z) > 0.1     # raw camera z would be another target


def test_a_person_in_the_camera_frame_is_where_the_transform_puts_it(
        cell: tuple[Cell, Controller]) -> None:
    peer, node = cell
    now = time.monotonic()
    assert wait_until(lambda: peer.moving_since(now), 20.0), \
        [v.get('reason') for v in peer.statuses_since(now)][-3:]
    near = in_frame(CAMERA_R, CAMERA_T, np.array([0.0, 0.3, 0.5]))
    assert np.linalg.norm(near) > 2.0     # read as base_link coordinates it is far away
    t0 = time.monotonic()
    with peer.lock:
        peer.camera_person = near
    assert wait_until(lambda: peer.stopped_since(t0), 20.0), 'no stop for a close person'
    assert wait_until(lambda: any('person too close' in v.get('reason', '')
                                  for v in peer.statuses_since(t0)), 10.0), \
        [v.get('reason') for v in peer.statuses_since(t0)][-5:]
    t1 = time.monotonic()
    with peer.lock:
        peer.camera_person = in_frame(CAMERA_R, CAMERA_T, np.array([3.0, 3.0, 1.0]))
    assert wait_until(lambda: peer.moving_since(t1), 20.0), 'never resumed'


def test_tf_that_goes_old_is_a_fault_of_that_source_until_it_is_back(
        cell: tuple[Cell, Controller]) -> None:
    peer, node = cell
    now = time.monotonic()
    assert wait_until(lambda: peer.moving_since(now), 20.0), \
        [v.get('reason') for v in peer.statuses_since(now)][-3:]
    before = len(node.log(']: /cell/mount_person: '))
    t0 = time.monotonic()
    peer.send_mount_tf = False
    assert wait_until(lambda: peer.stopped_since(t0), 20.0), 'no stop without /tf'
    assert wait_until(lambda: any("'/cell/mount_person'" in v.get('reason', '')
                                  for v in peer.statuses_since(t0)), 10.0)
    time.sleep(1.0)           # ~50 more person samples without a usable transform
    started = node.log(']: /cell/mount_person: ')[before:]
    assert len(started) == 1, started
    assert 'no transform base_link <- mount (stale_transform)' in started[0]
    t1 = time.monotonic()
    peer.send_mount_tf = True
    assert wait_until(lambda: peer.moving_since(t1), 20.0), 'never resumed after /tf was back'
    assert wait_until(lambda: len(node.log(']: /cell/mount_person: ')) == before + 2, 10.0)
    stopped = node.log(']: /cell/mount_person: ')[-1]
    assert 'again' in stopped and 'problem(s)' in stopped
    v = peer.statuses_since(t1)[-1]
    assert int(v['frames_stale_transform']) >= 10
    assert int(v['person_transform_faults']) >= 10


def test_replay_transforms_like_the_node(cell: tuple[Cell, Controller], tmp_path: Path) -> None:
    """Last: stops the node, then replays its bag. The bag holds /tf and /tf_static (the node
    records what it subscribes); replay runs the node's own frames code over them in log order,
    so it sees the persons and the marker where the node saw them (scipy's transform of the
    published points), and the mount's person unusable while /tf was old, as the node did."""
    peer, node = cell
    peer.port.shutdown()
    node.proc.send_signal(signal.SIGINT)
    assert node.proc.wait(30) == 0
    assert not node.log('recording stopped'), node.log('record')
    from constraint_ctrl.cli import main
    from constraint_ctrl.tools import replay
    skill = node.params.parent / 'skills' / 'track_marker.yaml'
    out = tmp_path / 'replay'
    code = main(['replay', str(node.bag), '--skill', str(skill), '--params', str(node.params),
                 '--robot', str(node.urdf), '--out', str(out)])
    assert code == 0
    index = replay.index_bag(node.bag, None)
    settings = replay.node_settings(node.params, {'robot_description_file': str(node.urdf)},
                                    index.node)
    window = replay.choose_window(index, 'track_marker', 1, None, None)
    samples = replay.read_samples(index, window, tuple(JOINTS), settings.inputs,
                                  settings.person_sources, settings.base_frame,
                                  settings.transform_timeout)
    _, marker, _ = samples.inputs['marker_z']
    assert len(marker) >= 20 and np.nanmax(np.abs(marker - MARKER_Z)) < 1e-9
    _, camera, _ = samples.people['/cell/camera_person']
    usable = np.isfinite(camera).all(axis=1)
    assert usable.all()
    # far (3, 3, 1) and near (0, 0.3, 0.5) in base_link: both positions the test published
    far = np.linalg.norm(camera - [3.0, 3.0, 1.0], axis=1) < 1e-9
    near = np.linalg.norm(camera - [0.0, 0.3, 0.5], axis=1) < 1e-9
    assert far.sum() >= 10 and near.sum() >= 1 and (far | near).all()
    _, mount, _ = samples.people['/cell/mount_person']
    lost = ~np.isfinite(mount).all(axis=1)
    assert lost.sum() >= 10                        # the /tf outage of the test above
    np.testing.assert_allclose(mount[~lost], np.tile([-3.0, 3.0, 1.0], ((~lost).sum(), 1)),
                               atol=1e-9)
