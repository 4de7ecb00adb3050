"""The controller keeps controlling when a peer sends joint_states it cannot decode.

Issue 8 item 4, at process level: the controller runs as its own process on the DDS
transport; a peer drives it with good joint_states and, in between, writes samples whose
joint names are not UTF-8 (raw bytes of a valid CDR sample with two bytes replaced). The
controller must go on reading the good samples (its watchdog stays `normal` instead of stopping
for stale joint_states, as it did before: the subscription's thread died on the first bad
sample), count the dropped samples in its ~/status (`samples_dropped`), and stay up.
"""
from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

os.environ.setdefault('ROS_DOMAIN_ID', str(random.randint(150, 230)))

from cyclonedds.pub import DataWriter  # noqa: E402
from cyclonedds.topic import Topic  # noqa: E402

from constraint_ctrl.transport import dds_raw  # noqa: E402
from constraint_ctrl.transport.dds_qos import writer_qos  # noqa: E402
from constraint_ctrl.transport.port import open_port  # noqa: E402
from constraint_ctrl.transport.qos import PROFILES  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
NS = f'/badjs{os.getpid()}'
NODE = f'{NS}/constraint_controller'
JOINTS = [f'joint_{i}' for i in range(1, 7)]
START = [0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416]




class Driver:
    """Peer: good joint_states from a timer (integrating the commands), status reader."""

    def __init__(self) -> None:
        self.port = open_port('dds', 'driver', ['--ros-args', '-r', f'__ns:={NS}'])
        t = self.t = self.port.types
        self.lock = threading.Lock()
        self.q = np.array(START)
        self.commands: list[np.ndarray] = []
        self.status: list[Any] = []
        self.port.create_subscription(t.Float64MultiArray, f'{NODE}/command', self._on_cmd,
                                      'default')
        self.port.create_subscription(t.DiagnosticArray, f'{NODE}/status', self._on_status,
                                      'default')
        self.js = self.port.create_publisher(t.JointState, f'{NS}/joint_states', 'sensor')
        self.port.create_timer(0.004, self._publish)
        threading.Thread(target=self.port.spin, daemon=True).start()

    def _on_cmd(self, msg: Any) -> None:
        with self.lock:
            self.commands.append(np.array(list(msg.data)))

    def _on_status(self, msg: Any) -> None:
        with self.lock:
            self.status.append(msg)

    def _publish(self) -> None:
        with self.lock:
            if self.commands:
                self.q = self.q + 0.004 * self.commands[-1]
            q = self.q.tolist()
        ns = self.port.now_ns()
        self.js.publish(self.t.JointState(
            header=self.t.Header(stamp=self.t.Time(sec=ns // 10**9, nanosec=ns % 10**9),
                                 frame_id='base_link'),
            name=JOINTS, position=q, velocity=[], effort=[]))

    def latest(self) -> dict[str, str]:
        """Keys and values of the newest status message (all its statuses merged)."""
        with self.lock:
            msg = self.status[-1] if self.status else None
        if msg is None:
            return {}
        return {kv.key: kv.value for status in msg.status for kv in status.values}

    def moving_commands(self) -> int:
        with self.lock:
            return sum(float(np.abs(c).max()) > 1e-3 for c in self.commands)


@pytest.fixture(scope='module')
def running(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Driver, Any]]:
    work = tmp_path_factory.mktemp('badjs')
    skills = work / 'skills'
    skills.mkdir()
    text = (ROOT / 'config' / 'skills' / 'keep_tool_vertical.yaml').read_text()
    (skills / 'keep_tool_vertical.yaml').write_text(
        text.replace('../robots/', str(ROOT / 'config' / 'robots') + '/'))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    # No parameters file: the node's defaults (no person source, no mapped inputs) keep the
    # watchdog out of the way. config/controller.yaml, keyed '/**', would reach this namespaced
    # node and add the cell's person source, which nobody publishes here.
    proc = subprocess.Popen(
        [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds',
         '--ros-args', '-r', f'__ns:={NS}', '-p', f'skills_folder:={skills}',
         '-p', 'rate_hz:=250.0',
         '-p', 'status_rate_hz:=10.0', '-p', 'watchdog.joint_state_timeout:=0.5'],
        cwd=work, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    driver = Driver()
    try:
        yield driver, proc
    finally:
        driver.port.shutdown()
        if proc.poll() is None:
            proc.send_signal(signal.SIGINT)
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()


def test_bad_joint_states_are_counted_and_control_goes_on(running: tuple[Driver, Any]) -> None:
    driver, proc = running
    t = driver.t
    client = driver.port.create_client(t.Trigger, f'{NODE}/skills/keep_tool_vertical/activate')
    assert client.wait_for_service(60.0), 'controller did not come up'
    reply = client.call(t.Trigger.Request(), 10.0)
    assert reply is not None and reply.success, reply
    assert wait_until(lambda: driver.moving_commands() > 5, 20.0), 'no motion'
    participant = driver.port._participant
    writer = DataWriter(participant, Topic(participant, f'rt{NS}/joint_states', t.JointState),
                        writer_qos(PROFILES['default']))
    assert wait_until(lambda: bool(writer.get_matched_subscriptions()), 10.0)
    good = t.JointState.__cdr__.encode(t.JointState(name=JOINTS, position=START))
    index = good.index(b'joint_3')
    bad = good[:index] + b'\xff\xfe' + good[index + 2:]
    for _ in range(20):
        dds_raw.write(writer, bad)
        time.sleep(0.01)

    def counted_and_normal() -> bool:
        latest = driver.latest()
        return int(latest.get('samples_dropped', '0')) >= 1 and latest.get('state') == 'normal'
    # joint_state_timeout 0.5 s: a watchdog still normal seconds later reads good samples
    assert wait_until(counted_and_normal, 30.0), driver.latest()
    time.sleep(1.0)
    assert wait_until(counted_and_normal, 30.0), driver.latest()
    assert proc.poll() is None
