"""A sample that cannot be decoded, or a callback that raises, never ends a receive path.

Issue 8 item 4: a valid CDR sample carrying a string that is not UTF-8 (on joint_states, or
on a service request topic) used to raise inside the DDS port's dispatch thread, after which
that subscription or service stayed dead. Here a second participant writes such bytes with a
raw writer (the bytes of a correct sample with two name bytes replaced by 0xff 0xfe; rosbags'
deserializer refuses the same bytes, see test_cdr_codec.py), then good samples; the node
must receive and answer the good ones, count what it dropped per topic, and keep spinning.
A node callback that raises is counted the same way and spin() goes on.
"""
from __future__ import annotations

import os
import random
import threading
from collections.abc import Iterator
from typing import Any

import pytest

# before the first participant of this process; another test module of the same run may
# have chosen the domain already (the port reads it from the environment)
os.environ.setdefault('ROS_DOMAIN_ID', str(random.randint(150, 230)))

from cyclonedds.domain import DomainParticipant  # noqa: E402
from cyclonedds.pub import DataWriter  # noqa: E402
from cyclonedds.topic import Topic  # noqa: E402

from constraint_ctrl.transport import dds_raw  # noqa: E402
from constraint_ctrl.transport.dds_port import DdsPort  # noqa: E402
from constraint_ctrl.transport.dds_qos import writer_qos  # noqa: E402
from constraint_ctrl.transport.qos import PROFILES  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
NS = f'/bad{os.getpid()}'




def corrupt(data: bytes, marker: bytes) -> bytes:
    """Replace the first two bytes of `marker` inside `data` by 0xff 0xfe (not UTF-8)."""
    index = data.index(marker)
    return data[:index] + b'\xff\xfe' + data[index + 2:]


class Receiver:
    """The node under test: a DdsPort spinning on a thread, one subscription that records
    JointState names, one that raises on its first sample."""

    def __init__(self) -> None:
        self.port = DdsPort('receiver', ['test', '--ros-args', '-r', f'__ns:={NS}'])
        self.t = self.port.types
        self.names: list[list[str]] = []
        self.floats: list[float] = []
        self.lock = threading.Lock()
        self.port.create_subscription(self.t.JointState, f'{NS}/joint_states', self._on_joints,
                                      'sensor')
        self.port.create_subscription(self.t.Float64, f'{NS}/value', self._on_value, 'default')
        self.port.create_service(self.t.Trigger, '~/explode', self._explode)
        self.spin_ended = threading.Event()
        self.thread = threading.Thread(target=self._spin, daemon=True)
        self.thread.start()

    def _spin(self) -> None:
        try:
            self.port.spin()
        finally:
            self.spin_ended.set()

    def _on_joints(self, msg: Any) -> None:
        with self.lock:
            self.names.append(list(msg.name))

    def _on_value(self, msg: Any) -> None:
        with self.lock:
            self.floats.append(msg.data)
            first = len(self.floats) == 1
        if first:
            raise RuntimeError('callback fails on its first sample')

    def _explode(self, request: Any, response: Any) -> Any:
        raise RuntimeError('service callback fails')

    def close(self) -> None:
        self.port.shutdown()
        self.thread.join(5.0)
        self.port.shutdown()


@pytest.fixture(scope='module')
def receiver() -> Iterator[Receiver]:
    node = Receiver()
    yield node
    node.close()


@pytest.fixture(scope='module')
def sender() -> DomainParticipant:
    """A second participant of this process: writes raw bytes, as any peer could."""
    return DomainParticipant(int(os.environ['ROS_DOMAIN_ID']))


def raw_writer(participant: Any, topic_name: str, topic_type: type, profile: str) -> Any:
    writer = DataWriter(participant, Topic(participant, topic_name, topic_type),
                        writer_qos(PROFILES[profile]))
    assert wait_until(lambda: bool(writer.get_matched_subscriptions()), 10.0), topic_name
    return writer


def test_undecodable_joint_states_are_dropped_and_good_ones_arrive(
        receiver: Receiver, sender: DomainParticipant) -> None:
    t = receiver.t
    writer = raw_writer(sender, f'rt{NS}/joint_states', t.JointState, 'default')
    good = t.JointState.__cdr__.encode(t.JointState(name=['joint_1', 'joint_2'],
                                                    position=[0.1, 0.2]))
    bad = corrupt(good, b'joint_1')
    for _ in range(3):
        dds_raw.write(writer, bad)
    dds_raw.write(writer, good)
    assert wait_until(lambda: ['joint_1', 'joint_2'] in receiver.names, 10.0)
    dds_raw.write(writer, bad)
    dds_raw.write(writer, good)
    assert wait_until(lambda: len(receiver.names) >= 2, 10.0)
    with receiver.lock:
        assert all(names == ['joint_1', 'joint_2'] for names in receiver.names)
    faults = receiver.port.faults()[f'subscription {NS}/joint_states']
    assert faults.dropped == 4 and faults.callback_errors == 0
    assert 'UTF-8' in faults.last_error or 'utf-8' in faults.last_error
    assert not receiver.spin_ended.is_set()


def test_undecodable_service_request_is_dropped_and_the_next_call_answered(
        receiver: Receiver, sender: DomainParticipant) -> None:
    """A bad GetParameters request (a name that is not UTF-8) on the request topic, then a
    normal call through a client: it is answered."""
    t = receiver.t
    srv = t.GetParameters
    name = f'{NS}/receiver/get_parameters'
    writer = raw_writer(sender, f'rq{name}Request', srv.RequestWire, 'services')
    good = srv.request_codec.encode(7, 1, srv.Request(names=['use_sim_time']))
    dds_raw.write(writer, corrupt(good, b'use_sim_time'))
    caller = DdsPort('caller', ['test'])
    try:
        client = caller.create_client(srv, name)
        assert client.wait_for_service(10.0)
        reply = client.call(srv.Request(names=['use_sim_time']), 10.0)
    finally:
        caller.shutdown()
    assert reply is not None and [v.type for v in reply.values] == [1]    # a bool parameter
    label = f'service {name}'
    assert wait_until(lambda: label in receiver.port.faults(), 10.0)
    assert receiver.port.faults()[label].dropped == 1
    assert not receiver.spin_ended.is_set()


def test_a_raising_callback_is_counted_and_spin_goes_on(
        receiver: Receiver, sender: DomainParticipant) -> None:
    t = receiver.t
    writer = raw_writer(sender, f'rt{NS}/value', t.Float64, 'default')
    for value in (1.0, 2.0, 3.0):
        dds_raw.write(writer, t.Float64.__cdr__.encode(t.Float64(data=value)))
    assert wait_until(lambda: len(receiver.floats) >= 3, 10.0)
    with receiver.lock:
        assert receiver.floats[:3] == [1.0, 2.0, 3.0]
    faults = receiver.port.faults()[f'subscription {NS}/value']
    assert (faults.dropped, faults.callback_errors) == (0, 1)
    assert 'callback fails on its first sample' in faults.last_error
    assert not receiver.spin_ended.is_set()


def test_a_raising_service_callback_gives_an_error_reply(receiver: Receiver) -> None:
    """The caller gets a reply (success false, the error in message), spin goes on."""
    t = receiver.t
    name = f'{NS}/receiver/explode'
    caller = DdsPort('caller2', ['test'])
    try:
        client = caller.create_client(t.Trigger, name)
        assert client.wait_for_service(10.0)
        replies = [client.call(t.Trigger.Request(), 10.0) for _ in range(2)]
    finally:
        caller.shutdown()
    assert all(r is not None and not r.success and 'service callback fails' in r.message
               for r in replies)
    assert receiver.port.faults()[f'service {name}'].callback_errors == 2
    assert not receiver.spin_ended.is_set()
