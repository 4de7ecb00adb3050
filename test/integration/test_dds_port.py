"""Two processes on loopback talk through the DDS port (pub/sub, services, parameters).

The peer (dds_peer_helper.py) runs in its own interpreter; this test process is a second node.
Both use a random ROS_DOMAIN_ID so parallel runs on the machine do not see each other.
Expected behaviour comes from outside the project: ROS 2's parameter service semantics
(ros2/rclpy rclpy/parameter_service.py, rclpy/node.py: per-parameter results for
SetParameters, all-or-nothing for SetParametersAtomically, static typing, read-only) and the
node-discovery record of rmw_dds_common (ParticipantEntitiesInfo; a participant GUID ends in
entity id 00 00 01 c1, the DDS-RTPS participant entity id).
"""
from __future__ import annotations

import os
import random
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[2]
DOMAIN = str(random.randint(150, 230))
os.environ['ROS_DOMAIN_ID'] = DOMAIN    # before the first participant of this process

from constraint_ctrl.transport.dds_port import DdsPort  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
NS = f'/it{os.getpid()}'   # unique per run, in case another run picked the same domain
PEER = f'{NS}/peer'




class Node:
    """This process's node: a DdsPort spinning on a background thread."""

    def __init__(self) -> None:
        self.port = DdsPort('tester', ['test'])
        self.t = self.port.types
        self.lock = threading.Lock()
        self.joint_states: list[Any] = []
        self.commands: list[float] = []
        self.events: list[Any] = []
        self.port.create_subscription(self.t.JointState, f'{NS}/joint_states',
                                      self._on_joints, 'sensor')
        self.port.create_subscription(self.t.Float64, f'{NS}/cmd', self._on_cmd, 'default')
        self.port.create_subscription(self.t.ParameterEvent, '/parameter_events',
                                      self._on_event, 'parameters')
        self.thread = threading.Thread(target=self.port.spin, daemon=True)
        self.thread.start()

    def _on_joints(self, msg: Any) -> None:
        with self.lock:
            self.joint_states.append(msg)

    def _on_event(self, msg: Any) -> None:
        with self.lock:
            self.events.append(msg)

    def _on_cmd(self, msg: Any) -> None:
        with self.lock:
            self.commands.append(msg.data)

    def call(self, srv_type: Any, name: str, request: Any) -> Any:
        client = self.port.create_client(srv_type, name)
        assert client.wait_for_service(5.0), f'{name} not available'
        response = client.call(request, 5.0)
        assert response is not None, f'{name}: no reply'
        return response

    def close(self) -> None:
        self.port.shutdown()
        self.thread.join(5.0)
        self.port.shutdown()


@pytest.fixture(scope='module')
def peer() -> Iterator[subprocess.Popen[str]]:
    env = {**os.environ, 'ROS_DOMAIN_ID': DOMAIN, 'PYTHONPATH': str(ROOT)}
    proc = subprocess.Popen(
        [sys.executable, str(Path(__file__).with_name('dds_peer_helper.py')), '--ros-args',
         '-r', f'__ns:={NS}', '-p', 'rate_hz:=100.0', '-p', 'inputs.joint_states:=/joint_states',
         '-p', 'inputs.ranges:=[range_left, range_right]'],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    line = proc.stdout.readline() if proc.stdout else ''
    if not line.startswith('READY'):
        proc.kill()
        pytest.fail(f'peer did not start: {line!r} {proc.stderr.read() if proc.stderr else ""}')
    assert line.split() == ['READY', 'peer', NS]
    yield proc
    if proc.poll() is None:
        proc.kill()
        proc.wait(5)


@pytest.fixture(scope='module')
def node(peer: subprocess.Popen[str]) -> Iterator[Node]:
    n = Node()
    yield n
    n.close()


def _param(t: Any, name: str, value: Any) -> Any:
    if isinstance(value, float):
        pv = t.ParameterValue(type=t.ParameterType.PARAMETER_DOUBLE, double_value=value)
    elif isinstance(value, int):
        pv = t.ParameterValue(type=t.ParameterType.PARAMETER_INTEGER, integer_value=value)
    else:
        pv = t.ParameterValue(type=t.ParameterType.PARAMETER_STRING, string_value=value)
    return t.Parameter(name=name, value=pv)


def test_joint_states_arrive(node: Node) -> None:
    assert wait_until(lambda: len(node.joint_states) >= 3, 5.0)
    with node.lock:
        msgs = list(node.joint_states)
    assert all(list(m.name) == ['joint_1', 'joint_2'] for m in msgs)
    assert all(list(m.velocity) == [0.5, -0.5] for m in msgs)
    first, last = msgs[0].position[0], msgs[-1].position[0]
    assert last > first and msgs[-1].header.frame_id == 'base_link'


def test_trigger_service_calls_count_up(node: Node) -> None:
    first = node.call(node.t.Trigger, f'{PEER}/ping', node.t.Trigger.Request())
    second = node.call(node.t.Trigger, f'{PEER}/ping', node.t.Trigger.Request())
    assert first.success and second.success
    assert int(second.message.split()[1]) == int(first.message.split()[1]) + 1


def test_overrides_are_visible_through_get_and_list(node: Node) -> None:
    """Launch overrides are declared at start; declare_parameter adopted rate_hz=100.0."""
    t = node.t
    got = node.call(t.GetParameters, f'{PEER}/get_parameters', t.GetParameters.Request(
        names=['rate_hz', 'inputs.ranges', 'robot_name']))
    assert (got.values[0].type, got.values[0].double_value) == (3, 100.0)
    assert list(got.values[1].string_array_value) == ['range_left', 'range_right']
    assert got.values[2].string_value == 'arm'
    listed = node.call(t.ListParameters, f'{PEER}/list_parameters',
                       t.ListParameters.Request(prefixes=['inputs'], depth=0))
    assert sorted(listed.result.names) == ['inputs.joint_states', 'inputs.ranges']
    everything = node.call(t.ListParameters, f'{PEER}/list_parameters',
                           t.ListParameters.Request())
    assert {'gain', 'rate_hz', 'robot_name'} <= set(everything.result.names)


def test_describe_parameters(node: Node) -> None:
    t = node.t
    described = node.call(t.DescribeParameters, f'{PEER}/describe_parameters',
                          t.DescribeParameters.Request(names=['rate_hz', 'robot_name']))
    rate, name = described.descriptors
    assert (rate.name, rate.type, rate.description, rate.read_only) == \
        ('rate_hz', 3, 'tick rate in Hz', False)
    assert (name.type, name.read_only) == (4, True)


def test_set_parameters_accepted_and_rejected(node: Node) -> None:
    """One result per parameter; validator reason, type and read-only refusals."""
    t = node.t
    result = node.call(t.SetParameters, f'{PEER}/set_parameters', t.SetParameters.Request(
        parameters=[_param(t, 'rate_hz', 200.0), _param(t, 'gain', -1.0),
                    _param(t, 'rate_hz', 5), _param(t, 'robot_name', 'other'),
                    _param(t, 'missing', 1.0)]))
    outcomes = [(r.successful, r.reason) for r in result.results]
    assert outcomes[0] == (True, '')
    assert outcomes[1] == (False, 'rate_hz and gain must be positive')
    assert outcomes[2][0] is False and 'type double' in outcomes[2][1]
    assert outcomes[3] == (False, "parameter 'robot_name' is read-only")
    assert outcomes[4] == (False, "parameter 'missing' is not declared")
    got = node.call(t.GetParameters, f'{PEER}/get_parameters',
                    t.GetParameters.Request(names=['rate_hz', 'gain']))
    assert [v.double_value for v in got.values] == [200.0, 1.0]

    def change_published() -> bool:
        with node.lock:
            return any(e.node == PEER and [(p.name, p.value.double_value)
                                           for p in e.changed_parameters] == [('rate_hz', 200.0)]
                       for e in node.events)
    assert wait_until(change_published, 3.0)    # rcl_interfaces/ParameterEvent


def test_set_parameters_atomically_is_all_or_nothing(node: Node) -> None:
    t = node.t
    refused = node.call(t.SetParametersAtomically, f'{PEER}/set_parameters_atomically',
                        t.SetParametersAtomically.Request(parameters=[
                            _param(t, 'gain', 2.0), _param(t, 'rate_hz', -3.0)]))
    assert (refused.result.successful, refused.result.reason) == \
        (False, 'rate_hz and gain must be positive')
    accepted = node.call(t.SetParametersAtomically, f'{PEER}/set_parameters_atomically',
                         t.SetParametersAtomically.Request(parameters=[
                             _param(t, 'gain', 2.0), _param(t, 'rate_hz', 25.0)]))
    assert accepted.result.successful
    got = node.call(t.GetParameters, f'{PEER}/get_parameters',
                    t.GetParameters.Request(names=['gain', 'rate_hz']))
    assert [v.double_value for v in got.values] == [2.0, 25.0]


def test_peer_is_announced_in_ros_discovery_info(node: Node) -> None:
    """What `ros2 node list` reads: ParticipantEntitiesInfo on ros_discovery_info."""
    from cyclonedds.sub import DataReader
    from cyclonedds.topic import Topic

    from constraint_ctrl.transport.dds_qos import reader_qos
    from constraint_ctrl.transport.qos import DISCOVERY_INFO
    t = node.t
    reader = DataReader(node.port._participant, Topic(
        node.port._participant, 'ros_discovery_info', t.ParticipantEntitiesInfo),
        reader_qos(DISCOVERY_INFO))
    seen: dict[str, Any] = {}

    def peer_seen() -> bool:
        for sample in reader.take(N=100):
            for info in getattr(sample, 'node_entities_info_seq', []):
                seen[f'{info.node_namespace}:{info.node_name}'] = (sample, info)
        return f'{NS}:peer' in seen
    assert wait_until(peer_seen, 5.0)
    sample, info = seen[f'{NS}:peer']
    assert bytes(sample.gid.data)[12:] == bytes.fromhex('000001c1')
    # readers: 6 parameter-service requests + ping request; writers: their 7 replies,
    # joint_states, cmd, /rosout and /parameter_events (the discovery writer belongs to no
    # node)
    assert (len(info.reader_gid_seq), len(info.writer_gid_seq)) == (7, 11)
    assert all(len(bytes(g.data)) == 16 for g in info.writer_gid_seq)


def test_sigterm_ends_spin_and_final_zero_command_arrives(
        node: Node, peer: subprocess.Popen[str]) -> None:
    """SIGTERM -> spin() returns -> the node still publishes its final zero command."""
    assert wait_until(lambda: 1.0 in node.commands, 5.0)
    peer.terminate()
    out, err = peer.communicate(timeout=10)
    assert peer.returncode == 0, err
    assert 'STOPPED' in out
    assert wait_until(lambda: node.commands and node.commands[-1] == 0.0, 3.0)


def test_destroying_a_service_updates_the_discovery_record(node: Node) -> None:
    """Receivers replace the node's entity list with each sample, so the service's request
    reader must appear after create_service and be gone after destroy_service."""
    from cyclonedds.sub import DataReader
    from cyclonedds.topic import Topic

    from constraint_ctrl.transport.dds_qos import reader_qos
    from constraint_ctrl.transport.qos import QosProfile
    port = node.port
    reader = DataReader(port._participant, Topic(
        port._participant, 'ros_discovery_info', port.types.ParticipantEntitiesInfo),
        reader_qos(QosProfile(depth=100, reliable=True, transient_local=True)))
    own = port._participant.guid.bytes
    latest: list[set[bytes]] = [set()]

    def listed(gid: bytes, present: bool) -> Callable[[], bool]:
        def check() -> bool:
            for sample in reader.take(N=100):
                if bytes(sample.gid.data) == own:
                    latest[0] = {bytes(g.data) for g in
                                 sample.node_entities_info_seq[0].reader_gid_seq}
            return (gid in latest[0]) == present
        return check
    handle = port.create_service(port.types.Trigger, '~/temporary', lambda q, r: r)
    gid = handle.reader.guid.bytes
    assert wait_until(listed(gid, True), 3.0)
    port.destroy_service(handle)
    assert wait_until(listed(gid, False), 3.0)
    assert latest[0]                      # the node itself is still announced


def test_timer_counts_missed_periods() -> None:
    """A tick that sleeps 2.5 periods must leave at least one whole slot unserved."""
    from constraint_ctrl.transport.dds_dispatch import FixedRateTimer
    from constraint_ctrl.transport.receive_faults import FaultLog
    lines: list[str] = []
    faults = FaultLog(lambda level, text: lines.append(text))
    calls: list[int] = []

    def slow_first() -> None:
        calls.append(1)
        if len(calls) == 1:
            time.sleep(0.025)
    timer = FixedRateTimer(0.01, slow_first, faults)
    timer.start()
    assert wait_until(lambda: len(calls) >= 3, 3.0)
    timer.cancel()
    assert timer.missed >= 1 and not faults.snapshot() and not lines
    timer.start()                                  # cancelled timers stay stopped
    assert timer._thread is None


def test_rclpy_transport_missing_is_reported() -> None:
    """No ROS install here: asking for rclpy says what to do."""
    from constraint_ctrl.errors import TransportError
    from constraint_ctrl.transport import open_port
    pytest.importorskip('cyclonedds')
    if __import__('importlib').util.find_spec('rclpy') is not None:
        pytest.skip('rclpy is installed here')
    with pytest.raises(TransportError, match='source /opt/ros/<distro>/setup.bash'):
        open_port('rclpy', 'x', [])
    with pytest.raises(TransportError, match="distro 'iron'"):
        open_port('dds', 'x', [], distro='iron')


def test_importing_transport_loads_no_middleware() -> None:
    """The package import must stay light; open_port loads the middleware it needs."""
    code = ('import sys, constraint_ctrl.transport, constraint_ctrl.transport.ros_args; '
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('cyclonedds', 'rclpy')))")
    out = subprocess.run([sys.executable, '-c', code], capture_output=True, text=True,
                         env={**os.environ, 'PYTHONPATH': str(ROOT)}, timeout=30, check=True)
    assert out.stdout.strip() == '[]'


_PAUSED_READER = '''
import sys, threading
from constraint_ctrl.transport.dds_port import DdsPort
port = DdsPort('paused_reader', ['test'])
port.create_subscription(port.types.Float64, sys.argv[1], lambda msg: print('GOT', flush=True),
                         'default')
threading.Thread(target=port.spin, daemon=True).start()
print('READY', flush=True)
threading.Event().wait()
'''


def test_shutdown_survives_a_reader_that_never_acknowledges() -> None:
    """A reliable reader whose process is paused never acknowledges; shutdown() waits for
    acknowledgements at most 0.5 s and must then go on. (cyclonedds-python 11.0.1's
    DataWriter.wait_for_acks raises AttributeError on its own timeout: it looks the code up
    on the builtin Exception, cyclonedds/pub.py.) Seen when the benchmark paused a peer."""
    import signal
    topic = f'{NS}/paused_reader'
    env = {**os.environ, 'ROS_DOMAIN_ID': DOMAIN, 'PYTHONPATH': str(ROOT)}
    proc = subprocess.Popen([sys.executable, '-c', _PAUSED_READER, topic], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    port = DdsPort('paused_writer', ['test'])
    try:
        assert proc.stdout is not None and proc.stdout.readline().startswith('READY')
        import select
        pub = port.create_publisher(port.types.Float64, topic, 'default')
        deadline = time.monotonic() + 30.0
        got = False
        while not got and time.monotonic() < deadline:   # until the reader has one sample
            pub.publish(port.types.Float64(data=1.0))
            if select.select([proc.stdout], [], [], 0.1)[0]:
                got = proc.stdout.readline().startswith('GOT')
        assert got, 'the reader never received a sample'
        os.kill(proc.pid, signal.SIGSTOP)
        for _ in range(5):
            pub.publish(port.types.Float64(data=2.0))
        started = time.monotonic()
        port.shutdown()                            # must not raise
        assert time.monotonic() - started < 10.0
    finally:
        port.shutdown()
        os.kill(proc.pid, signal.SIGCONT)
        proc.kill()
        proc.wait(5)


def test_latest_profile_keeps_only_the_newest_waiting_sample() -> None:
    """QoS 'latest' (keep last 1, best effort): while a callback is busy, newer samples
    replace each other in the reader, so the callback then sees one newer sample, not a
    backlog (DDS KEEP_LAST history semantics; the controller's control-path subscriptions
    use it so a node that fell behind ticks once, on the newest joint_states)."""
    topic = f'{NS}/latest_only'
    sub_port = DdsPort('latest_sub', ['test'])
    pub_port = DdsPort('latest_pub', ['test'])
    got: list[float] = []
    first = threading.Event()
    release = threading.Event()

    def on_value(msg: Any) -> None:
        got.append(msg.data)
        if len(got) == 1:
            first.set()
            release.wait(30.0)

    sub_port.create_subscription(sub_port.types.Float64, topic, on_value, 'latest')
    spinner = threading.Thread(target=sub_port.spin, daemon=True)
    spinner.start()
    pub = pub_port.create_publisher(pub_port.types.Float64, topic, 'sensor')
    try:
        value = 0.0
        while not first.is_set():                  # until the callback holds the first one
            value += 1.0
            pub.publish(pub_port.types.Float64(data=value))
            first.wait(0.05)
        start = value
        for _ in range(10):
            value += 1.0
            pub.publish(pub_port.types.Float64(data=value))
        time.sleep(2.0)                            # let them reach the reader (not timed)
        release.set()
        assert wait_until(lambda: len(got) >= 2, 10.0)
        time.sleep(0.5)
        assert len(got) == 2, got                  # one waiting sample, not ten
        assert start < got[1] <= value
    finally:
        release.set()
        sub_port.shutdown()
        spinner.join(5.0)
        sub_port.shutdown()
        pub_port.shutdown()


def test_timer_reset_restarts_the_period() -> None:
    """reset() restarts the period from now (rclpy's Timer.reset, rcl_timer_reset): a timer
    reset more often than its period does not fire, side by side with one that is not reset.
    Judged by counts with a wide margin, never by time."""
    from constraint_ctrl.transport.dds_dispatch import FixedRateTimer
    from constraint_ctrl.transport.receive_faults import FaultLog
    faults = FaultLog(lambda level, text: None)
    fired = {'reset': 0, 'free': 0}

    def count(name: str) -> Callable[[], None]:
        def callback() -> None:
            fired[name] += 1
        return callback
    reset_timer = FixedRateTimer(0.1, count('reset'), faults)
    free_timer = FixedRateTimer(0.1, count('free'), faults)
    reset_timer.start()
    free_timer.start()
    try:
        while fired['free'] < 12:
            reset_timer.reset()
            time.sleep(0.005)
    finally:
        reset_timer.cancel()
        free_timer.cancel()
    assert fired['reset'] <= fired['free'] // 4
