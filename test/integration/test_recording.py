"""The controller's recorder as a process sees it, over Cyclone DDS on loopback.

- A `--record` folder that cannot be created is one line on stderr and exit code 2.
- A recorder that fails while running (a file size limit, RLIMIT_FSIZE, stands in for a full
  disk: the kernel cuts the write short, then refuses it) stops with a logged reason and its
  state in ~/status, while the controller keeps controlling; the bag holds what was written
  before, closed so that rosbags reads it.
- Signals arriving while the node shuts down (a second SIGINT, or SIGINT then SIGTERM, as
  `ros2 launch` and a terminal's Ctrl-C send them) never cut the shutdown short: exit code 0,
  last command zero, bag closed.
- Topic names in the bag are the names the node really used, after remapping.

The bags are read back with rosbags (an outside reader of rosbag2).
"""
from __future__ import annotations

import os
import random
import resource
import signal
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any
from collections.abc import Callable, Iterator

import numpy as np
import pytest
import yaml

pytest.importorskip('cyclonedds')

from constraint_ctrl.transport.port import open_port  # noqa: E402
from domains import in_domain  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
NODE = 'constraint_controller'
NAMESPACES = ('', '/cell1')
JOINTS = [f'joint_{i}' for i in range(1, 7)]
# a skill that never settles: the tool tip circles, so commands are never zero while it runs
SKILL = """
skill: circle_tool
robot: {robot}
constraints:
  - name: circle
    function: position(tool_tip)
    kind: equal
    target: vector(0.45 + 0.05 * sin(2 * pi * time / 2), 0.05 * cos(2 * pi * time / 2), 0.35)
    behaviour: {{order: 1, gain: 4.0}}
    weight: 100.0
  - name: tool_down
    function: cross(axis_z(tool_tip), vector(0, 0, -1))
    kind: equal
    target: 0
    behaviour: {{order: 1, gain: 4.0}}
    weight: 30.0
limits:
  joint_acceleration: 10.0
"""




class Peer:
    """Robot driver stand-in: integrates the commands it receives into joint_states, which it
    publishes on /joint_states and /robot/joint_states, with a wrench on /cell1/tool/wrench;
    keeps commands and statuses of the node in the root namespace and in /cell1."""

    def __init__(self) -> None:
        self.port = open_port('dds', 'recording_peer', ['--ros-args'])
        t = self.t = self.port.types
        self.lock = threading.Lock()
        self.q = np.array([0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0])
        self.commands: list[np.ndarray] = []
        self.status: list[dict[str, str]] = []
        for ns in NAMESPACES:
            self.port.create_subscription(t.Float64MultiArray, f'{ns}/{NODE}/command',
                                          self._on_command, 'default')
            self.port.create_subscription(t.DiagnosticArray, f'{ns}/{NODE}/status',
                                          self._on_status, 'default')
        self.publishers = [self.port.create_publisher(t.JointState, topic, 'sensor')
                           for topic in ('/joint_states', '/robot/joint_states')]
        self.wrench = self.port.create_publisher(t.WrenchStamped, '/cell1/tool/wrench', 'sensor')
        self.wrenches_sent = 0
        self.port.create_timer(0.004, self._publish)
        threading.Thread(target=self.port.spin, daemon=True).start()

    def _on_command(self, msg: Any) -> None:
        with self.lock:
            self.commands.append(np.array(list(msg.data)))

    def _on_status(self, msg: Any) -> None:
        values = {kv.key: kv.value for kv in msg.status[0].values}
        with self.lock:
            self.status.append(values)

    def _publish(self) -> None:
        ns = self.port.now_ns()
        with self.lock:
            if self.commands:
                self.q = self.q + 0.004 * self.commands[-1]
            q = self.q.tolist()
        msg = self.t.JointState(
            header=self.t.Header(stamp=self.t.Time(sec=ns // 10**9, nanosec=ns % 10**9),
                                 frame_id=''),
            name=JOINTS, position=q, velocity=[], effort=[])
        for pub in self.publishers:
            pub.publish(msg)
        self.wrenches_sent += 1                  # numbered, to find a message recorded twice
        self.wrench.publish(self.t.WrenchStamped(header=msg.header, wrench=self.t.Wrench(
            force=self.t.Vector3(x=float(self.wrenches_sent), y=0.0, z=0.0))))

    def reset(self) -> None:
        with self.lock:
            self.commands.clear()
            self.status.clear()
            self.q = np.array([0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0])

    def moving(self) -> bool:
        with self.lock:
            return bool(self.commands) and float(np.abs(self.commands[-1]).max()) > 1e-3

    def count(self) -> int:
        with self.lock:
            return len(self.commands)

    def last_command(self) -> np.ndarray:
        with self.lock:
            return self.commands[-1]

    def last_status(self) -> dict[str, str]:
        with self.lock:
            return dict(self.status[-1]) if self.status else {}


class Node:
    """The controller process, its stderr collected line by line."""

    def __init__(self, work: Path, domain: str, args: list[str],
                 preexec: Callable[[], None] | None = None) -> None:
        env = dict(os.environ, PYTHONPATH=str(ROOT), ROS_DOMAIN_ID=domain,
                   PYTHONDONTWRITEBYTECODE='1')
        self.proc = subprocess.Popen(
            [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds', *args],
            cwd=work, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
            preexec_fn=preexec)
        self.lines: list[str] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stderr is not None
        for line in self.proc.stderr:
            self.lines.append(line.rstrip('\n'))

    def wait_for_line(self, text: str, timeout_s: float) -> bool:
        return wait_until(lambda: any(text in line for line in self.lines), timeout_s)

    def finish(self, timeout_s: float = 60.0) -> int:
        try:
            code = self.proc.wait(timeout_s)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(10)
            raise
        self._reader.join(10)
        return code

    def log(self) -> str:
        return '\n'.join(self.lines)


@pytest.fixture(scope='module')
def cell(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Peer, Path, str]]:
    work = tmp_path_factory.mktemp('recording')
    (work / 'skills').mkdir()
    (work / 'skills' / 'circle_tool.yaml').write_text(
        SKILL.format(robot=ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'))
    domain = str(random.randint(101, 200))
    with in_domain(domain):       # the peer's participant joins this domain
        peer = Peer()
    yield peer, work, domain
    peer.port.shutdown()


def _node_args(work: Path, bag: Path, *extra: str) -> list[str]:
    # joint_state_timeout well above the peer's period, so that a loaded machine does not
    # stop the arm for stale joint states (the recorder is under test here, not the watchdog)
    return ['--record', str(bag), '--ros-args', '-p', f'skills_folder:={work / "skills"}',
            '-p', 'rate_hz:=250.0', '-p', 'initial_skill:=circle_tool',
            '-p', 'watchdog.joint_state_timeout:=0.5', *extra]


def _read_bag(bag: Path, keep: str = '') -> tuple[dict[str, int], dict, list[Any]]:
    """(messages per topic as rosbags reads them, metadata.yaml, the messages of `keep`)"""
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore
    meta = yaml.safe_load((bag / 'metadata.yaml').read_text())['rosbag2_bagfile_information']
    counts: dict[str, int] = {}
    kept = []
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        for conn in reader.connections:
            counts.setdefault(conn.topic, 0)
        for conn, _, raw in reader.messages():
            msg = reader.deserialize(raw, conn.msgtype)       # every message decodes
            counts[conn.topic] += 1
            if conn.topic == keep:
                kept.append(msg)
    return counts, meta, kept


def test_record_folder_that_cannot_be_created(cell, tmp_path: Path) -> None:
    """Start-up: one line naming the folder, exit code 2, no traceback."""
    _, work, domain = cell
    (tmp_path / 'plain_file').write_text('a file, not a folder')
    bag = tmp_path / 'plain_file' / 'bag'
    node = Node(work, domain, _node_args(work, bag))
    assert node.finish() == 2, node.log()
    assert 'Traceback' not in node.log(), node.log()
    errors = [line for line in node.lines if line.startswith('error:')]
    assert len(errors) == 1 and str(bag) in errors[0], node.log()


def test_recorder_failure_while_running(cell, tmp_path: Path) -> None:
    """The bag's file may not grow past 1.3 MB: the second MCAP chunk (rosbags writes about
    1 MiB at a time) fails. The controller goes on; the first chunk is kept and closed."""
    peer, work, domain = cell
    peer.reset()
    limit = 1_300_000
    bag = tmp_path / 'bag'

    def limit_file_size() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    node = Node(work, domain, _node_args(work, bag), preexec=limit_file_size)
    try:
        assert wait_until(peer.moving, 60), 'the controller never started moving\n' + node.log()
        assert wait_until(lambda: peer.last_status().get('recorder') == 'failed', 180), \
            f'{peer.last_status()}\n{node.log()}'
        failed = peer.last_status()
        assert 'File too large' in failed['recorder_error'], failed
        # the controller keeps controlling: commands keep coming and keep moving the arm,
        # status keeps coming with more and more recorder drops
        count = peer.count()
        assert wait_until(lambda: peer.count() > count + 100, 30)
        assert wait_until(peer.moving, 30)
        assert wait_until(lambda: int(peer.last_status()['recorder_dropped']) >
                          int(failed['recorder_dropped']), 30)

        def running(status: dict[str, str]) -> bool:
            return (status['skill'], status['solve_status'], status['recorder']) == \
                ('circle_tool', 'ok', 'failed')
        assert wait_until(lambda: running(peer.last_status()), 30), peer.last_status()
        later = peer.last_status()
        node.proc.send_signal(signal.SIGINT)
        assert node.finish() == 0, node.log()
    finally:
        if node.proc.poll() is None:
            node.proc.kill()
    # one logged reason, at the time of the failure
    reasons = [line for line in node.lines if 'recording stopped' in line]
    assert len(reasons) == 1 and 'File too large' in reasons[0], node.log()
    assert not peer.last_command().any(), 'the last command was not zero'
    counts, meta, _ = _read_bag(bag)
    assert sum(counts.values()) == meta['message_count'] > 0
    assert counts[f'/{NODE}/command'] > 0 and counts['/joint_states'] > 0
    assert (bag / 'bag.mcap').stat().st_size <= limit
    assert int(later['recorder_written']) >= meta['message_count']


SIGNAL_PAIRS = [(signal.SIGINT, signal.SIGINT, 1), (signal.SIGINT, signal.SIGTERM, 1),
                (signal.SIGINT, signal.SIGINT, 2), (signal.SIGINT, signal.SIGTERM, 2),
                (signal.SIGINT, signal.SIGINT, 3)]


@pytest.mark.parametrize(('first', 'second', 'attempt'), SIGNAL_PAIRS,
                         ids=[f'{a.name}-{b.name}-{n}' for a, b, n in SIGNAL_PAIRS])
def test_second_signal_during_shutdown(cell, tmp_path: Path, first: signal.Signals,
                                       second: signal.Signals, attempt: int) -> None:
    """The second signal is sent when the node says it is shutting down (zero command sent,
    bag closing): shutdown still finishes. Repeated, to catch the race."""
    peer, work, domain = cell
    peer.reset()
    bag = tmp_path / 'bag'
    node = Node(work, domain, _node_args(work, bag))
    try:
        assert wait_until(peer.moving, 60), 'the controller never started moving\n' + node.log()
        node.proc.send_signal(first)
        assert node.wait_for_line('shutting down', 30), node.log()
        node.proc.send_signal(second)
        assert node.finish() == 0, node.log()
    finally:
        if node.proc.poll() is None:
            node.proc.kill()
    assert not peer.last_command().any(), 'the last command was not zero'
    counts, meta, _ = _read_bag(bag)
    assert sum(counts.values()) == meta['message_count']
    assert counts[f'/{NODE}/command'] > 0


def test_bag_topic_names_follow_remapping(cell, tmp_path: Path) -> None:
    """With -r __ns:=/cell1 -r joint_states:=/robot/joint_states the node reads
    /robot/joint_states and publishes under /cell1: the bag names exactly those topics. Two
    skill inputs read one topic (tool/wrench, relative: /cell1/tool/wrench): recorded once."""
    peer, work, domain = cell
    peer.reset()
    bag = tmp_path / 'bag'
    inputs = []
    for name, field in (('push', 'wrench.force.z'), ('twist', 'wrench.torque.z')):
        inputs += ['-p', f'inputs.{name}.topic:=tool/wrench',
                   '-p', f'inputs.{name}.type:=geometry_msgs/msg/WrenchStamped',
                   '-p', f'inputs.{name}.field:={field}']
    node = Node(work, domain, _node_args(work, bag, '-r', '__ns:=/cell1',
                                         '-r', 'joint_states:=/robot/joint_states', *inputs))
    try:
        assert wait_until(peer.moving, 60), 'the controller never started moving\n' + node.log()
        node.proc.send_signal(signal.SIGINT)
        assert node.finish() == 0, node.log()
    finally:
        if node.proc.poll() is None:
            node.proc.kill()
    counts, _, wrenches = _read_bag(bag, keep='/cell1/tool/wrench')
    assert set(counts) == {'/robot/joint_states', '/cell1/tool/wrench', f'/cell1/{NODE}/command',
                           f'/cell1/{NODE}/joint_command', f'/cell1/{NODE}/events',
                           f'/cell1/{NODE}/status', f'/cell1/{NODE}/rows',
                           f'/cell1/{NODE}/markers', '/diagnostics',   # /diagnostics: absolute
                           # the frame tree the node subscribes (issue 9.3): absolute names
                           '/tf', '/tf_static'}
    assert counts['/robot/joint_states'] > 0 and counts[f'/cell1/{NODE}/command'] > 0
    numbers = [m.wrench.force.x for m in wrenches]
    assert numbers and len(set(numbers)) == len(numbers), 'a wrench was recorded twice'

