"""The controller as a managed node, driven over DDS as `ros2 lifecycle` drives one.

A peer on the DDS port (this process) plays robot driver and lifecycle manager: it calls the
lifecycle_msgs services of the controller process as ros2lifecycle does (get_state,
get_available_transitions, then change_state with the Transition found there; rmw_cyclonedds'
service framing), and subscribes ~/transition_event, ~/command and ~/status.

References: the states, transitions, ids and labels are lifecycle_msgs' (State.msg,
Transition.msg constants, checked against rosbags in test/unit/test_lifecycle_machine.py);
what a state offers (the managed-node design: inactive processes no data but holds its
configuration, active does) is what `ros2 lifecycle list` showed for an rclpy LifecycleNode
on a real Jazzy core (/work/notes/ros2_core.md). Counts below are margins, never timings.
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

pytest.importorskip('cyclonedds')

from constraint_ctrl.transport.port import open_port  # noqa: E402
from domains import in_domain  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
NODE = '/constraint_controller'
JOINTS = [f'joint_{i}' for i in range(1, 7)]
START = np.array([0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416])
CALL_S = 180.0        # configure compiles the skills: minutes on a busy machine, not seconds




class Manager:
    """Robot driver (joint_states integrating ~/command) and lifecycle client in one peer."""

    def __init__(self) -> None:
        self.port = open_port('dds', 'lifecycle_peer', ['--ros-args'])
        t = self.t = self.port.types
        self.lock = threading.Lock()
        self.q = START.copy()
        self.commands: list[np.ndarray] = []
        self.status = 0
        self.events: list[tuple[int, str, str]] = []
        self.event_stamps: list[int] = []
        self.port.create_subscription(t.Float64MultiArray, f'{NODE}/command', self._on_cmd,
                                      'default')
        self.port.create_subscription(t.DiagnosticArray, f'{NODE}/status', self._on_status,
                                      'default')
        self.rows = 0
        self.markers = 0
        self.port.create_subscription(t.DiagnosticArray, f'{NODE}/rows', self._on_rows,
                                      'default')
        self.port.create_subscription(t.MarkerArray, f'{NODE}/markers', self._on_markers,
                                      'default')
        self.port.create_subscription(t.TransitionEvent, f'{NODE}/transition_event',
                                      self._on_event, 'default')
        self.js = self.port.create_publisher(t.JointState, '/joint_states', 'sensor')
        self.port.create_timer(0.01, self._publish)
        self._clients: dict[str, Any] = {}
        threading.Thread(target=self.port.spin, daemon=True).start()

    def _on_cmd(self, msg: Any) -> None:
        with self.lock:
            self.commands.append(np.array(list(msg.data)))

    def _on_status(self, msg: Any) -> None:
        with self.lock:
            self.status += 1

    def _on_rows(self, msg: Any) -> None:
        with self.lock:
            self.rows += 1

    def _on_markers(self, msg: Any) -> None:
        with self.lock:
            self.markers += 1

    def output_counts(self) -> tuple[int, int]:
        """~/rows and ~/markers received so far."""
        with self.lock:
            return self.rows, self.markers

    def _on_event(self, msg: Any) -> None:
        with self.lock:
            self.events.append((msg.transition.id, msg.start_state.label,
                                msg.goal_state.label))
            self.event_stamps.append(msg.timestamp)

    def _publish(self) -> None:
        with self.lock:
            if self.commands:
                self.q = self.q + 0.01 * self.commands[-1]
            q = self.q.tolist()
        ns = self.port.now_ns()
        t = self.t
        self.js.publish(t.JointState(
            header=t.Header(stamp=t.Time(sec=ns // 10**9, nanosec=ns % 10**9), frame_id=''),
            name=JOINTS, position=q, velocity=[], effort=[]))

    def call(self, srv: str, name: str, request: Any, timeout: float = CALL_S) -> Any:
        client = self._clients.get(name)
        if client is None:
            client = self._clients[name] = self.port.create_client(getattr(self.t, srv), name)
        assert client.wait_for_service(60.0), f'service {name} not available'
        reply = client.call(request, timeout)
        assert reply is not None, f'no reply from {name}'
        return reply

    def state(self) -> tuple[int, str]:
        s = self.call('GetState', f'{NODE}/get_state',
                      self.t.GetState.Request()).current_state
        return s.id, s.label

    def transitions(self) -> list[tuple[str, int, str, str]]:
        reply = self.call('GetAvailableTransitions', f'{NODE}/get_available_transitions',
                          self.t.GetAvailableTransitions.Request())
        return [(d.transition.label, d.transition.id, d.start_state.label, d.goal_state.label)
                for d in reply.available_transitions]

    def set(self, label: str) -> bool:
        """As `ros2 lifecycle set NODE LABEL`: the Transition from the available list."""
        reply = self.call('GetAvailableTransitions', f'{NODE}/get_available_transitions',
                          self.t.GetAvailableTransitions.Request())
        found = [d.transition for d in reply.available_transitions
                 if d.transition.label == label]
        assert found, f'{label} not available'
        return bool(self.call('ChangeState', f'{NODE}/change_state',
                              self.t.ChangeState.Request(transition=found[0])).success)

    def change_by_id(self, transition_id: int) -> bool:
        t = self.t
        return bool(self.call('ChangeState', f'{NODE}/change_state', t.ChangeState.Request(
            transition=t.Transition(id=transition_id, label=''))).success)

    def command_count(self) -> int:
        with self.lock:
            return len(self.commands)

    def commands_since(self, index: int) -> list[np.ndarray]:
        with self.lock:
            return list(self.commands[index:])

    def close(self) -> None:
        self.port.shutdown()


def start_controller(work: Path, *args: str) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen(
        [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds', *args],
        cwd=work, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def stop(proc: subprocess.Popen) -> str:
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()
    return proc.communicate()[0]


@pytest.fixture(scope='module')
def domain() -> Iterator[str]:
    with in_domain(str(random.randint(101, 230))) as value:
        yield value


@pytest.fixture(scope='module')
def skills(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp('lifecycle') / 'skills'
    folder.mkdir()
    text = (ROOT / 'config' / 'skills' / 'move_to_point.yaml').read_text()
    (folder / 'move_to_point.yaml').write_text(
        text.replace('../robots/', str(ROOT / 'config' / 'robots') + '/'))
    return folder


def test_managed_node_over_dds(domain: str, skills: Path) -> None:
    proc = start_controller(skills.parent, '--no-autostart', '--ros-args',
                            '-p', f'skills_folder:={skills}', '-p', 'rate_hz:=100.0')
    peer = Manager()
    output = ''
    try:
        # unconfigured: the lifecycle services only; nothing commands the robot
        assert peer.state() == (1, 'unconfigured')
        assert peer.transitions() == [('configure', 1, 'unconfigured', 'configuring'),
                                      ('shutdown', 5, 'unconfigured', 'shuttingdown')]
        states = peer.call('GetAvailableStates', f'{NODE}/get_available_states',
                           peer.t.GetAvailableStates.Request()).available_states
        assert [(s.id, s.label) for s in states][:5] == [
            (0, 'unknown'), (1, 'unconfigured'), (2, 'inactive'), (3, 'active'),
            (4, 'finalized')]
        assert len(states) == 11
        assert peer.port.count_publishers(f'{NODE}/command') == 0
        assert wait_until(lambda: peer.port.count_publishers(f'{NODE}/transition_event') == 1,
                          30.0)
        time.sleep(0.5)      # let the node's writer match our reader too

        # configure -> inactive: zero commands and status only; skills cannot be activated
        assert peer.set('configure')
        assert peer.state() == (2, 'inactive')
        assert peer.transitions() == [('cleanup', 2, 'inactive', 'cleaningup'),
                                      ('activate', 3, 'inactive', 'activating'),
                                      ('shutdown', 6, 'inactive', 'shuttingdown')]
        mark = peer.command_count()
        assert wait_until(lambda: peer.command_count() >= mark + 50, 60.0)
        assert all(not c.any() for c in peer.commands_since(mark))
        assert wait_until(lambda: peer.status > 0, 30.0), 'no ~/status while inactive'
        assert peer.output_counts() == (0, 0), 'inactive sent ~/rows or ~/markers'
        refused = peer.call('Trigger', f'{NODE}/skills/move_to_point/activate',
                            peer.t.Trigger.Request())
        assert not refused.success and 'not active' in refused.message

        # activate -> ticks; a skill moves the arm
        assert peer.change_by_id(3)
        assert peer.state() == (3, 'active')
        reply = peer.call('Trigger', f'{NODE}/skills/move_to_point/activate',
                          peer.t.Trigger.Request(), timeout=60.0)
        assert reply.success, reply.message
        assert wait_until(lambda: any(c.any() for c in peer.commands_since(-5)), 60.0)
        assert wait_until(lambda: min(peer.output_counts()) > 0, 30.0), \
            'active: no ~/rows or ~/markers'

        # deactivate -> inactive: from the first zero after the reply on, only zeros
        assert peer.set('deactivate')
        assert peer.state() == (2, 'inactive')
        mark = peer.command_count()
        assert wait_until(lambda: peer.command_count() >= mark + 50, 60.0)
        after = peer.commands_since(mark)
        first_zero = next(i for i, c in enumerate(after) if not c.any())
        assert all(not c.any() for c in after[first_zero:])
        assert len(after) - first_zero >= 40
        # what was in flight at the deactivation has arrived by now; from here on, nothing
        counts = peer.output_counts()
        mark = peer.command_count()
        assert wait_until(lambda: peer.command_count() >= mark + 50, 60.0)
        assert peer.output_counts() == counts, 'inactive sent ~/rows or ~/markers'
        # activating again starts without a skill (hold): zero commands until one is asked for
        assert peer.set('activate')
        mark = peer.command_count()
        assert wait_until(lambda: peer.command_count() >= mark + 30, 60.0)
        assert all(not c.any() for c in peer.commands_since(mark + 5))
        assert peer.set('deactivate')

        # cleanup -> unconfigured: the topics and services configure made are gone
        assert peer.set('cleanup')
        assert peer.state() == (1, 'unconfigured')
        assert wait_until(lambda: peer.port.count_publishers(f'{NODE}/command') == 0, 30.0)
        services = dict(peer.port.get_service_names_and_types_by_node(
            'constraint_controller', '/'))
        assert f'{NODE}/reload_skills' not in services
        assert services[f'{NODE}/change_state'] == ['lifecycle_msgs/srv/ChangeState']

        # a second configuration works as the first; shutdown from active ends in finalized
        assert peer.set('configure') and peer.set('activate')
        mark = peer.command_count()
        assert wait_until(lambda: peer.command_count() >= mark + 20, 60.0), 'no ticks'
        assert peer.set('shutdown')
        assert peer.state() == (4, 'finalized')
        assert peer.transitions() == []
        time.sleep(1.0)
        last = peer.commands_since(-1)
        assert last and not last[0].any(), 'the last command before finalized is not zero'
        assert not peer.change_by_id(1), 'finalized accepted a transition'
        assert wait_until(lambda: len(peer.events) >= 18, 30.0)
        with peer.lock:
            events, stamps = list(peer.events), list(peer.event_stamps)
        request_and_result = [
            (1, 'unconfigured', 'configuring'), (10, 'configuring', 'inactive'),
            (3, 'inactive', 'activating'), (30, 'activating', 'active'),
            (4, 'active', 'deactivating'), (40, 'deactivating', 'inactive'),
            (3, 'inactive', 'activating'), (30, 'activating', 'active'),
            (4, 'active', 'deactivating'), (40, 'deactivating', 'inactive'),
            (2, 'inactive', 'cleaningup'), (20, 'cleaningup', 'unconfigured'),
            (1, 'unconfigured', 'configuring'), (10, 'configuring', 'inactive'),
            (3, 'inactive', 'activating'), (30, 'activating', 'active'),
            (7, 'active', 'shuttingdown'), (50, 'shuttingdown', 'finalized')]
        assert events == request_and_result
        assert stamps == sorted(stamps) and stamps[0] > 0
        assert proc.poll() is None, 'the process ended with its node finalized'
    finally:
        peer.close()
        output = stop(proc)
    assert proc.returncode == 0, output[-3000:]
    assert 'shutting down: zero command sent' in output


def test_failing_configure_stays_unconfigured(domain: str, skills: Path) -> None:
    bad_urdf = skills.parent / 'broken.urdf'
    bad_urdf.write_text('<robot name="broken"><link name="base"/>')    # not closed
    # autostart (the default) with a skills folder that does not exist: the process stays
    missing = skills.parent / 'no_such_folder'
    auto = start_controller(skills.parent, '--ros-args', '-p', f'skills_folder:={missing}',
                            '-r', '__node:=auto_controller')
    manual = start_controller(skills.parent, '--no-autostart', '--ros-args',
                              '-p', f'robot_description_file:={bad_urdf}')
    peer = Manager()
    try:
        assert peer.state() == (1, 'unconfigured')
        assert wait_until(lambda: peer.port.count_publishers(f'{NODE}/transition_event') == 1,
                          30.0)
        time.sleep(0.5)
        assert not peer.set('configure')
        assert peer.state() == (1, 'unconfigured')
        assert wait_until(lambda: len(peer.events) >= 2, 30.0)
        assert peer.events[:2] == [(1, 'unconfigured', 'configuring'),
                                   (11, 'configuring', 'unconfigured')]
        assert manual.poll() is None
        # the fix: set the parameter while unconfigured, configure again
        t = peer.t
        good = str(ROOT / 'config' / 'robots' / 'six_axis_arm.urdf')
        value = t.ParameterValue(type=t.ParameterType.PARAMETER_STRING, string_value=good)
        reply = peer.call('SetParameters', f'{NODE}/set_parameters', t.SetParameters.Request(
            parameters=[t.Parameter(name='robot_description_file', value=value)]))
        assert reply.results[0].successful, reply.results[0].reason
        assert peer.set('configure')
        assert peer.state() == (2, 'inactive')
        # configured: the parameter is refused with the way to change it
        reply = peer.call('SetParameters', f'{NODE}/set_parameters', t.SetParameters.Request(
            parameters=[t.Parameter(name='robot_description_file', value=value)]))
        assert not reply.results[0].successful and 'cleanup' in reply.results[0].reason
        # the autostarted node: its configure failed at start; it still serves its state
        state = peer.call('GetState', '/auto_controller/get_state',
                          peer.t.GetState.Request()).current_state
        assert (state.id, state.label) == (1, 'unconfigured')
        assert auto.poll() is None
    finally:
        peer.close()
        manual_out, auto_out = stop(manual), stop(auto)
    assert 'lifecycle: configure failed' in manual_out and 'broken.urdf' in manual_out, \
        manual_out[-3000:]
    assert 'lifecycle: configure failed' in auto_out and 'no_such_folder' in auto_out, \
        auto_out[-3000:]
    assert manual.returncode == 0 and auto.returncode == 0
