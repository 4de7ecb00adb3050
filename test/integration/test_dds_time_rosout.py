"""The DDS port behaves like any ROS 2 node for logs and time: /rosout and use_sim_time.

Expected behaviour from outside the project (ros2-interop.md sections 3.1 and 5; rcl
`logging_rosout.h`, rclpy `time_source.py`, rcl_interfaces/msg/Log.msg):
* every log line is published as rcl_interfaces/Log on /rosout with the node's logger name
  (namespace and node name joined by dots, as rcl names node loggers (from memory)), the
  severity constants of Log.msg (DEBUG 10, INFO 20, WARN 30, ERROR 40) and the caller's file,
  function and line; the publisher is reliable, transient local (a late reader still gets the
  lines), depth 1000, lifespan 10 s;
* with use_sim_time true, the node clock is the latest /clock message and 0 before the first;
  a ROS-time timer fires as /clock passes its due times and never while /clock stands still;
  slots that /clock jumps over are skipped and counted (rcl_timer_call's rule);
* `constraint-ctrl sim --publish-clock` publishes /clock and stamps its messages with it.
Order and eventual outcomes only; no wall-clock timing assertions.
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

os.environ.setdefault('ROS_DOMAIN_ID', str(random.randint(150, 230)))

from cyclonedds.qos import Policy  # noqa: E402
from cyclonedds.sub import DataReader  # noqa: E402

from constraint_ctrl.transport import dds_raw  # noqa: E402
from constraint_ctrl.transport.dds_port import DdsPort  # noqa: E402
from constraint_ctrl.transport.dds_qos import reader_qos  # noqa: E402
from constraint_ctrl.transport.qos import ROSOUT  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
NS = f'/time{os.getpid()}'




class Spinning:
    """A DdsPort spinning on a thread."""

    def __init__(self, name: str, *args: str) -> None:
        self.port = DdsPort(name, ['test', '--ros-args', '-r', f'__ns:={NS}', *args])
        self.thread: threading.Thread | None = None

    def start(self) -> None:
        self.thread = threading.Thread(target=self.port.spin, daemon=True)
        self.thread.start()

    def close(self) -> None:
        self.port.shutdown()
        if self.thread is not None:
            self.thread.join(5.0)
        self.port.shutdown()


@pytest.fixture()
def nodes() -> Iterator[list[Spinning]]:
    made: list[Spinning] = []
    yield made
    for node in made:
        node.close()


def test_logs_reach_rosout_with_name_level_and_caller(nodes: list[Spinning]) -> None:
    talker = Spinning('talker')
    nodes.append(talker)
    talker.port.log('warn', 'gripper is late')            # before any reader exists
    listener = Spinning('listener')
    nodes.append(listener)
    port = listener.port
    topic = port._topic(port.types.Log, '/rosout')[1]
    reader = DataReader(port._participant, topic, reader_qos(ROSOUT))
    seen: list[Any] = []

    def line_seen(text: str) -> Callable[[], bool]:
        def check() -> bool:
            for data, info in dds_raw.take(reader, 100):
                if info.valid_data:
                    seen.append(port.types.Log.__cdr__.decode(data))
            return any(msg.msg == text and msg.name == f'{NS[1:]}.talker' for msg in seen)
        return check
    assert wait_until(line_seen('gripper is late'), 10.0)   # transient local: late reader
    talker.port.log('info', 'second line')
    assert wait_until(line_seen('second line'), 10.0)
    warn = next(m for m in seen if m.msg == 'gripper is late')
    info = next(m for m in seen if m.msg == 'second line')
    assert (warn.level, info.level) == (30, 20)             # Log.WARN, Log.INFO
    assert warn.file == Path(__file__).name and warn.function == \
        'test_logs_reach_rosout_with_name_level_and_caller' and warn.line > 0
    assert warn.stamp.sec > 1_600_000_000                   # wall-clock stamps
    handles = reader.get_matched_publications()
    qos = [reader.get_matched_publication_data(h).qos for h in handles]
    lifespans = {q[Policy.Lifespan].lifespan for q in qos if q[Policy.Lifespan] is not None}
    assert lifespans == {10 * 10**9}                        # 10 s, in ns
    assert all(q[Policy.Durability] == Policy.Durability.TransientLocal for q in qos)
    assert all(q[Policy.History] == Policy.History.KeepLast(1000) for q in qos)
    assert all(q[Policy.Userdata].data.startswith(b'typehash=RIHS01_') for q in qos)


def test_sim_time_follows_clock_and_timers_wait_for_it(nodes: list[Spinning]) -> None:
    clocked = Spinning('clocked', '-p', 'use_sim_time:=true')
    source = Spinning('clock_source')
    nodes.extend([clocked, source])
    port = clocked.port
    assert port.now_ns() == 0                               # no /clock yet
    ticks: list[int] = []
    timer = port.create_timer(0.1, lambda: ticks.append(port.now_ns()))
    steady = source.port.create_timer(0.01, lambda: None)   # a node on the monotonic clock
    clocked.start()
    source.start()
    t = source.port.types
    pub = source.port.create_publisher(t.Clock, '/clock', 'default')

    def send(ns: int) -> None:
        pub.publish(t.Clock(clock=t.Time(sec=ns // 10**9, nanosec=ns % 10**9)))
        assert wait_until(lambda: port.now_ns() == ns, 10.0), ns

    send(50_000_000)                                        # 0.05 s: before the first slot
    assert wait_until(lambda: steady.ticks >= 20, 10.0)     # wall time passes ...
    assert ticks == [] and timer.ticks == 0                 # ... sim time does not
    send(100_000_000)
    assert wait_until(lambda: len(ticks) == 1, 10.0)
    send(350_000_000)                                       # jumps over the 0.2 and 0.3 slots
    assert wait_until(lambda: len(ticks) == 2, 10.0)
    assert ticks == [100_000_000, 350_000_000]
    assert timer.missed == 1                                # (0.35 - 0.2) // 0.1
    seen = steady.ticks
    assert wait_until(lambda: steady.ticks >= seen + 20, 10.0)
    assert len(ticks) == 2                                  # /clock stands still: no tick
    assert port.faults() == {}


def test_use_sim_time_can_be_switched_off(nodes: list[Spinning]) -> None:
    clocked = Spinning('switched', '-p', 'use_sim_time:=true')
    nodes.append(clocked)
    port = clocked.port
    assert port.now_ns() == 0
    t = port.types
    caller = Spinning('switcher')
    nodes.append(caller)
    clocked.start()
    client = caller.port.create_client(t.SetParameters, f'{NS}/switched/set_parameters')
    assert client.wait_for_service(10.0)
    before = time.time_ns()
    reply = client.call(t.SetParameters.Request(parameters=[t.Parameter(
        name='use_sim_time', value=t.ParameterValue(type=1, bool_value=False))]), 10.0)
    assert reply is not None and reply.results[0].successful
    assert port.now_ns() >= before                          # the system clock again


def test_simulator_publishes_clock_and_stamps_with_it(nodes: list[Spinning]) -> None:
    """`constraint-ctrl sim --publish-clock`: /clock advances from 0, joint_states are stamped
    with a /clock time (not the wall clock)."""
    env = {**os.environ, 'PYTHONPATH': str(ROOT)}
    sim = subprocess.Popen(
        [sys.executable, '-m', 'constraint_ctrl.cli', 'sim', '--transport', 'dds',
         '--publish-clock'], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        node = Spinning('observer')
        nodes.append(node)
        t = node.port.types
        clocks: list[int] = []
        stamps: list[int] = []
        lock = threading.Lock()

        def on_clock(msg: Any) -> None:
            with lock:
                clocks.append(msg.clock.sec * 10**9 + msg.clock.nanosec)

        def on_joints(msg: Any) -> None:
            with lock:
                stamps.append(msg.header.stamp.sec * 10**9 + msg.header.stamp.nanosec)
        node.port.create_subscription(t.Clock, '/clock', on_clock, 'default')
        node.port.create_subscription(t.JointState, '/joint_states', on_joints, 'sensor')
        node.start()
        assert wait_until(lambda: len(clocks) >= 50 and len(stamps) >= 50, 60.0), \
            sim.stderr.read() if sim.poll() is not None and sim.stderr else 'no data'
        with lock:
            assert clocks == sorted(clocks) and clocks[0] < 100 * 10**9   # from 0, not epoch
            assert max(stamps) < 100 * 10**9                             # sim time stamps
            assert set(stamps) & set(clocks)                 # stamped with a /clock value
    finally:
        sim.terminate()
        sim.wait(20)
    assert sim.returncode == 0
