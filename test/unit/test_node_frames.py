"""The node-layer frames adapter, with a fake port (plain dataclasses with the ROS field names).

TopicFrames (the DDS transport's path) is driven through its /tf and /tf_static subscriptions;
expected points come from scipy.spatial.transform.Rotation. Tf2Frames (the rclpy path) is
driven with a stand-in for tf2_ros.Buffer that raises tf2's exception kinds the way
tf2_ros documents them (ros2/geometry2 tf2_ros_py buffer.py, tf2_py exceptions): it checks our
mapping onto tf2_ros, not tf2 itself, which needs a ROS install (checked by hand).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from constraint_ctrl.frames import buffer as fb
from constraint_ctrl.frames.buffer import LookupFailure
from constraint_ctrl.frames.messages import make_edge, tf_message, transform_stamped
from constraint_ctrl.nodes.frames import (
    LOOKUP_FAILED,
    PointInFrame,
    Tf2Frames,
    TopicFrames,
    open_frames,
)
from constraint_ctrl.transport.qos import PROFILES

SEC = 1_000_000_000


@dataclass
class Time:
    sec: int = 0
    nanosec: int = 0


@dataclass
class Header:
    stamp: Time = field(default_factory=Time)
    frame_id: str = ''


@dataclass
class Vector3:
    x: float = 0.0
    y: float = 0.0
    z: float = 0.0


@dataclass
class Quaternion:
    x: float = 0.0
    y: float = 0.0
    z: float = 0.0
    w: float = 1.0


@dataclass
class Transform:
    translation: Vector3 = field(default_factory=Vector3)
    rotation: Quaternion = field(default_factory=Quaternion)


@dataclass
class TransformStamped:
    header: Header = field(default_factory=Header)
    child_frame_id: str = ''
    transform: Transform = field(default_factory=Transform)


@dataclass
class TFMessage:
    transforms: list = field(default_factory=list)


TYPES = SimpleNamespace(Time=Time, Header=Header, Vector3=Vector3, Quaternion=Quaternion,
                        Transform=Transform, TransformStamped=TransformStamped,
                        TFMessage=TFMessage)


class FakePort:
    """The parts of transport.port.Port the adapter uses."""

    def __init__(self) -> None:
        self.types = TYPES
        self.subscriptions: dict[str, tuple[Any, Any, str]] = {}
        self.now = 0

    def create_subscription(self, msg_type: Any, topic: str, callback: Any, qos: str) -> str:
        assert qos in PROFILES   # a profile both ports know
        self.subscriptions[topic] = (msg_type, callback, qos)
        return topic

    def now_ns(self) -> int:
        return self.now

    def deliver(self, topic: str, msg: Any) -> None:
        msg_type, callback, _ = self.subscriptions[topic]
        assert isinstance(msg, msg_type)
        callback(msg)


# camera looks at the cell from above: static world -> camera; the robot base moves on a rail
CAMERA_Q = tuple(Rotation.from_euler('xyz', [np.pi, 0.0, 0.3]).as_quat())
CAMERA_T = (2.0, 0.5, 2.5)


def rail_pose(stamp_ns: int) -> tuple[tuple[float, float, float], tuple[float, ...]]:
    x = 0.1 * stamp_ns / SEC
    return (x, 0.0, 0.0), tuple(Rotation.from_euler('z', 0.05 * stamp_ns / SEC).as_quat())


def expected_in_base(point: np.ndarray, base_t: tuple, base_q: tuple) -> np.ndarray:
    """scipy: p_world = R_cam p + t_cam; p_base = R_base^T (p_world - t_base)."""
    world = Rotation.from_quat(CAMERA_Q).apply(point) + np.array(CAMERA_T)
    return Rotation.from_quat(base_q).inv().apply(world - np.array(base_t))


def cell() -> tuple[FakePort, TopicFrames]:
    port = FakePort()
    frames = open_frames(port, max_age_s=0.1)
    assert isinstance(frames, TopicFrames)
    port.deliver('/tf_static', tf_message(TYPES, [make_edge('world', 'camera', 0, CAMERA_T,
                                                            CAMERA_Q)]))
    for k in range(11):      # base on the rail at 10 Hz, 1.0 s .. 2.0 s
        stamp = SEC + k * 100_000_000
        port.deliver('/tf', tf_message(TYPES, [make_edge('world', 'base', stamp,
                                                         *rail_pose(stamp))]))
    return port, frames


def test_subscribes_tf_and_tf_static_with_tf2s_qos() -> None:
    port, _ = cell()
    assert {t: q for t, (_, _, q) in port.subscriptions.items()} == \
        {'/tf': 'tf', '/tf_static': 'tf_static'}
    # tf2_ros TransformListener (Humble, Jazzy): depth 100, reliable, static transient local
    assert (PROFILES['tf'].depth, PROFILES['tf'].reliable, PROFILES['tf'].transient_local) == \
        (100, True, False)
    assert (PROFILES['tf_static'].depth, PROFILES['tf_static'].transient_local) == (100, True)


def test_a_person_seen_by_the_camera_lands_in_the_base_frame() -> None:
    _, frames = cell()
    point = np.array([0.3, -0.2, 1.8])
    stamp = SEC + 450_000_000            # between two rail samples: interpolated
    got = frames.transform_point(point, 'camera', 'base', stamp)
    assert isinstance(got, PointInFrame) and got.age_s == 0.0
    np.testing.assert_allclose(got.xyz, expected_in_base(point, *rail_pose(stamp)), atol=1e-9)
    # base -> camera and back is the identity
    back = frames.transform_point(got.xyz, 'base', 'camera', stamp)
    np.testing.assert_allclose(back.xyz, point, atol=1e-12)


def test_old_transforms_fail_beyond_max_age_and_are_reported_once() -> None:
    port, frames = cell()
    newest = 2 * SEC
    held = frames.transform_point((0, 0, 1), 'camera', 'base', newest + 60_000_000)
    assert isinstance(held, PointInFrame) and held.age_s == pytest.approx(0.06)
    np.testing.assert_allclose(held.xyz, expected_in_base(np.array([0, 0, 1.0]),
                                                          *rail_pose(newest)), atol=1e-9)
    for _ in range(5):
        stale = frames.transform_point((0, 0, 1), 'camera', 'base', newest + 150_000_000)
        assert isinstance(stale, LookupFailure) and stale.kind == fb.STALE_TRANSFORM
    # a looser limit per call (e.g. a point input with its own parameter)
    assert frames.transform_point((0, 0, 1), 'camera', 'base', newest + 150_000_000,
                                  max_age_s=0.2)
    missing = frames.transform_point((0, 0, 1), 'lidar', 'base', newest)
    assert isinstance(missing, LookupFailure) and missing.kind == fb.UNKNOWN_FRAME
    assert frames.counts == {fb.STALE_TRANSFORM: 5, fb.UNKNOWN_FRAME: 1}
    problems = frames.new_problems()
    assert len(problems) == 2 and problems[0].startswith('stale_transform: ')
    assert frames.new_problems() == []          # each kind once
    frames.transform_point((0, 0, 1), 'camera', 'base', newest + SEC)
    assert frames.new_problems() == [] and frames.counts[fb.STALE_TRANSFORM] == 6
    # an unstamped point counts from now (the port's ROS time)
    port.now = newest + 20_000_000
    now = frames.transform_point((0, 0, 1), 'camera', 'base', 0)
    assert isinstance(now, PointInFrame) and now.age_s == pytest.approx(0.02)


def test_bad_tf_samples_are_counted_not_raised() -> None:
    port, frames = cell()
    bad = transform_stamped(TYPES, make_edge('world', 'base', 3 * SEC, (0, 0, 0), (0, 0, 0, 2)))
    port.deliver('/tf', TFMessage(transforms=[bad]))
    port.deliver('/tf', TFMessage(transforms=[bad]))
    assert frames.counts == {'rejected_bad_quaternion': 2}
    assert frames.new_problems()[0].startswith('rejected_bad_quaternion: transform world -> '
                                               'base')


# -- the rclpy path, against a stand-in for tf2_ros ----------------------------------------------

class TransformException(Exception):
    pass


class LookupException(TransformException):
    pass


class ConnectivityException(TransformException):
    pass


class ExtrapolationException(TransformException):
    pass


class InvalidArgumentException(TransformException):
    pass


ERRORS = SimpleNamespace(TransformException=TransformException, LookupException=LookupException,
                         ConnectivityException=ConnectivityException,
                         ExtrapolationException=ExtrapolationException,
                         InvalidArgumentException=InvalidArgumentException)


class FakeTf2Buffer:
    """lookup_transform(target, source, time) as tf2_ros documents it: a TransformStamped at
    `time` (time 0: latest, stamped with the latest time), or one of tf2's exceptions. Backed
    by one edge world -> base with samples up to `latest`."""

    def __init__(self, latest: int) -> None:
        self.latest = latest
        self.calls: list[tuple[str, str, int]] = []

    def lookup_transform(self, target: str, source: str, time: SimpleNamespace) -> Any:
        self.calls.append((target, source, time.nanoseconds))
        if 'nowhere' in (target, source):
            raise LookupException('"nowhere" passed to lookupTransform argument does not exist')
        if 'island' in (target, source):
            raise ConnectivityException('not part of the same tree')
        if '' in (target, source):
            raise InvalidArgumentException('frame_ids cannot be empty')
        if 'loop' in (target, source):
            raise TransformException('The tf tree is invalid because it contains a loop.')
        t = time.nanoseconds or self.latest
        if t > self.latest:
            raise ExtrapolationException('Lookup would require extrapolation into the future.')
        if t < SEC:
            raise ExtrapolationException('Lookup would require extrapolation into the past.')
        translation, rotation = rail_pose(t)
        edge = make_edge('world', 'base', t, translation, rotation)
        if (target, source) == ('base', 'world'):   # tf2 returns T_target_source
            inverse = Rotation.from_quat(rotation).inv()
            edge = make_edge('base', 'world', t, -inverse.apply(translation), inverse.as_quat())
        return transform_stamped(TYPES, edge)


def tf2_frames(latest: int = 2 * SEC) -> tuple[FakePort, FakeTf2Buffer, Tf2Frames]:
    port = FakePort()
    buffer = FakeTf2Buffer(latest)
    frames = Tf2Frames(port, buffer, lambda ns: SimpleNamespace(nanoseconds=ns), ERRORS,
                       max_age_s=0.1)
    return port, buffer, frames


def test_tf2_mapping_inside_history_and_held_newest() -> None:
    _, buffer, frames = tf2_frames()
    point = np.array([1.0, 2.0, 0.5])
    inside = frames.transform_point(point, 'world', 'base', SEC + 500_000_000)
    assert isinstance(inside, PointInFrame) and inside.age_s == 0.0
    base_t, base_q = rail_pose(SEC + 500_000_000)
    np.testing.assert_allclose(inside.xyz, Rotation.from_quat(base_q).inv().apply(
        point - np.array(base_t)), atol=1e-12)
    # 80 ms after the newest sample: tf2 raises (no forward extrapolation); the mapping asks
    # for time 0 (latest) and accepts it with its age
    held = frames.transform_point(point, 'world', 'base', 2 * SEC + 80_000_000)
    assert isinstance(held, PointInFrame) and held.age_s == pytest.approx(0.08)
    assert [c[2] for c in buffer.calls[-2:]] == [2 * SEC + 80_000_000, 0]
    base_t, base_q = rail_pose(2 * SEC)
    np.testing.assert_allclose(held.xyz, Rotation.from_quat(base_q).inv().apply(
        point - np.array(base_t)), atol=1e-12)


@pytest.mark.parametrize(('source', 'stamp', 'kind'), [
    ('base', 2 * SEC + 200_000_000, fb.STALE_TRANSFORM),
    ('base', SEC - 1, fb.BEFORE_HISTORY),
    ('nowhere', SEC, fb.UNKNOWN_FRAME),
    ('island', SEC, fb.NOT_CONNECTED),
    ('', SEC, fb.INVALID_FRAME),
    ('loop', SEC, LOOKUP_FAILED),
])
def test_tf2_exceptions_map_to_the_same_failure_kinds(source: str, stamp: int,
                                                      kind: str) -> None:
    _, _, frames = tf2_frames()
    got = frames.transform_point((0, 0, 0), source, 'world', stamp)
    assert isinstance(got, LookupFailure) and got.kind == kind and got.message
    assert frames.counts == {kind: 1}


def test_both_paths_agree_on_the_same_data() -> None:
    """The same rail samples through our buffer and through the tf2 stand-in."""
    port, buffer, tf2 = tf2_frames(latest=2 * SEC)
    own = TopicFrames(port, max_age_s=0.1)
    for k in range(11):
        stamp = SEC + k * 100_000_000
        port.deliver('/tf', tf_message(TYPES, [make_edge('world', 'base', stamp,
                                                         *rail_pose(stamp))]))
    rng = np.random.default_rng(2)
    for stamp in (SEC, SEC + 1, 2 * SEC, 2 * SEC + 50_000_000, 2 * SEC + 150_000_000, SEC - 5):
        point = rng.uniform(-1, 1, 3)
        a = own.transform_point(point, 'world', 'base', stamp)
        b = tf2.transform_point(point, 'world', 'base', stamp)
        assert type(a) is type(b)
        if isinstance(a, PointInFrame):
            assert a.age_s == pytest.approx(b.age_s)
            # the stand-in samples the rail exactly, ours interpolates between 10 Hz samples:
            # identical at sample times, within the chord error (< 1e-4 m) between them
            np.testing.assert_allclose(a.xyz, b.xyz, atol=1e-4)
        else:
            assert a.kind == b.kind


class ClockedPort(FakePort):
    """FakePort with the DDS port's time_generation(): it changes when ROS time jumps back
    or changes source (transport/dds_time.RosClock)."""

    def __init__(self) -> None:
        super().__init__()
        self.generation = 0

    def time_generation(self) -> int:
        return self.generation


def test_a_jump_back_in_ros_time_clears_the_timed_transforms() -> None:
    """A simulation restarted (/clock back from 2 s to 0.1 s): tf2_ros.Buffer clears on a
    backward jump or a clock change (ros2/geometry2 tf2_ros_py buffer.py, jump callback with
    on_clock_change; rclcpp's Buffer onTimeJump likewise, from memory) and keeps the static
    transforms (tf2 StaticCache::clearList does nothing, from memory). Without the clear the
    restarted simulation's transforms are older than the kept history and are refused."""
    port = ClockedPort()
    frames = open_frames(port, max_age_s=0.1)
    port.deliver('/tf_static', tf_message(TYPES, [make_edge('world', 'camera', 0, CAMERA_T,
                                                            CAMERA_Q)]))
    for k in range(11):
        stamp = SEC + k * 100_000_000
        port.deliver('/tf', tf_message(TYPES, [make_edge('world', 'base', stamp,
                                                         *rail_pose(stamp))]))
    assert isinstance(frames.transform_point((0, 0, 1), 'camera', 'base', 2 * SEC),
                      PointInFrame)
    port.generation += 1                                   # /clock went back
    restart = 100_000_000
    port.deliver('/tf', tf_message(TYPES, [make_edge('world', 'base', restart,
                                                     *rail_pose(restart))]))
    point = np.array([0.3, -0.2, 1.8])
    got = frames.transform_point(point, 'camera', 'base', restart)
    assert isinstance(got, PointInFrame), got
    np.testing.assert_allclose(got.xyz, expected_in_base(point, *rail_pose(restart)),
                               atol=1e-9)
    # the old future is gone: a point stamped at 2 s is now later than the history
    later = frames.transform_point(point, 'camera', 'base', 2 * SEC)
    assert isinstance(later, LookupFailure) and later.kind == fb.STALE_TRANSFORM
    assert frames.counts.get('time_jump') == 1
    assert any(text.startswith('time_jump:') for text in frames.new_problems())


def test_the_dds_port_clock_drives_the_clear() -> None:
    """The real DDS port: a /clock sample earlier than the last one moves time_generation."""
    pytest.importorskip('cyclonedds')
    from constraint_ctrl.transport.port import open_port
    port = open_port('dds', 'frames_clock_check', ['--ros-args', '-p', 'use_sim_time:=true'])
    try:
        t = port.types
        port._on_clock(t.Clock(clock=t.Time(sec=5, nanosec=0)))
        before = port.time_generation()
        port._on_clock(t.Clock(clock=t.Time(sec=6, nanosec=0)))
        assert port.time_generation() == before
        port._on_clock(t.Clock(clock=t.Time(sec=1, nanosec=0)))
        assert port.time_generation() == before + 1
    finally:
        port.shutdown()


def test_tf2_frames_close_releases_what_tf2_ros_made_on_the_node() -> None:
    """Cleanup must leave the rclpy node without tf's subscriptions and service:
    tf2_ros.TransformListener.unregister() destroys /tf and /tf_static subscriptions,
    tf2_ros.Buffer(node=...) made the 'tf2_frames' service (buffer.srv) and a clock jump
    callback (buffer.jump_handle) (ros2/geometry2 tf2_ros_py transform_listener.py and
    buffer.py)."""
    port, buffer, frames = tf2_frames()
    calls: list[str] = []
    buffer.srv = 'tf2_frames service'
    buffer.jump_handle = SimpleNamespace(unregister=lambda: calls.append('jump_handle'))
    port.node = SimpleNamespace(destroy_service=lambda srv: calls.append(f'destroy {srv}'))
    frames.listener = SimpleNamespace(unregister=lambda: calls.append('listener'))
    frames.close()
    assert sorted(calls) == ['destroy tf2_frames service', 'jump_handle', 'listener']
    frames.close()                                  # a second close does nothing more
    assert len(calls) == 3


def test_topic_frames_close_destroys_its_own_subscriptions_only() -> None:
    port = FakePort()
    destroyed: list[str] = []
    port.destroy_subscription = destroyed.append       # type: ignore[attr-defined]
    own = open_frames(port, max_age_s=0.1)
    own.close()
    assert sorted(destroyed) == ['/tf', '/tf_static']
    # with the node's subscribe wrapper, the node owns (and destroys) them
    del destroyed[:]
    lent = TopicFrames(port, subscribe=lambda _t, topic, _cb, _q: topic)
    lent.close()
    assert destroyed == []
