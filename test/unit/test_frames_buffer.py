"""Transform buffer: failure reasons, history, replacement, rejections, message helpers.

The behaviour copied from tf2 is named with its source: ros2/geometry2 (Jazzy branch)
tf2/src/buffer_core.cpp (setTransformImpl, walkToTopParent, getLatestCommonTime) and
tf2/src/cache.cpp (TimeCache::findClosest, insertData, pruneList). Geometry is checked against
scipy.spatial.transform.Rotation where a value is not trivially known.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from constraint_ctrl.frames import buffer as fb
from constraint_ctrl.frames.buffer import LookupFailure, Transform, TransformBuffer
from constraint_ctrl.frames.messages import (
    MALFORMED,
    add_tf_message,
    edge_from_transform_stamped,
    make_edge,
    ns_to_stamp,
    stamp_to_ns,
    tf_message,
)

SEC = 1_000_000_000
ID = (0.0, 0.0, 0.0, 1.0)


def failure(result: object) -> str:
    assert isinstance(result, LookupFailure), result
    assert result.message
    return result.kind


# -- lookups that fail, each for its own reason ----------------------------------------------

def test_unknown_not_connected_and_invalid_frames() -> None:
    b = TransformBuffer()
    b.set_transform('world', 'base', 0, (1, 0, 0), ID, static=True)
    b.set_transform('map', 'robot2', 0, (0, 0, 0), ID, static=True)
    assert failure(b.lookup('world', 'camera', SEC)) == fb.UNKNOWN_FRAME
    assert "'camera'" in b.lookup('world', 'camera', SEC).message
    # two trees (tf2: ConnectivityException)
    result = b.lookup('base', 'robot2', SEC)
    assert failure(result) == fb.NOT_CONNECTED and "'world'" in result.message
    # tf2 lookupTransform rejects empty names and a leading '/' (InvalidArgumentException)
    assert failure(b.lookup('', 'base', SEC)) == fb.INVALID_FRAME
    assert failure(b.lookup('/world', 'base', SEC)) == fb.INVALID_FRAME
    # tf2 walkToTopParent: source == target short-circuits to identity, even for an unknown name
    same = b.lookup('nowhere', 'nowhere', SEC)
    assert isinstance(same, Transform) and same.apply((1, 2, 3)) == (1.0, 2.0, 3.0)


def test_before_history_and_stale_transform_with_the_tolerance() -> None:
    b = TransformBuffer(tolerance_s=0.1)
    for k in range(5):
        b.set_transform('world', 'cart', 10 * SEC + k * 100_000_000, (k, 0, 0), ID)
    # tf2 cache.cpp findClosest: before the oldest sample -> extrapolation into the past
    assert failure(b.lookup('world', 'cart', 10 * SEC - 1)) == fb.BEFORE_HISTORY
    newest = 10 * SEC + 400_000_000
    held = b.lookup('world', 'cart', newest + 100_000_000)        # exactly the tolerance
    assert isinstance(held, Transform) and held.translation == (4.0, 0.0, 0.0)
    assert held.stamp_ns == newest and held.age_s == pytest.approx(0.1, abs=1e-12)
    stale = b.lookup('world', 'cart', newest + 100_000_001)
    assert failure(stale) == fb.STALE_TRANSFORM and 'world -> cart' in stale.message
    # the tolerance can be set per lookup (the node passes its parameter)
    assert isinstance(b.lookup('world', 'cart', newest + 300_000_000, tolerance_s=0.5),
                      Transform)
    assert failure(b.lookup('world', 'cart', newest + 1, tolerance_s=0.0)) == fb.STALE_TRANSFORM


def test_a_loop_is_reported_not_followed_forever() -> None:
    b = TransformBuffer()
    b.set_transform('a', 'b', 0, (0, 0, 0), ID, static=True)
    b.set_transform('b', 'c', 0, (0, 0, 0), ID, static=True)
    b.set_transform('c', 'a', 0, (0, 0, 0), ID, static=True)   # a now has parent c: a cycle
    assert failure(b.lookup('a', 'b', 0)) == fb.LOOP
    # tf2 has no cycle check at insertion either; it reports the loop at lookup time
    assert failure(b.lookup('c', 'b', 0)) == fb.LOOP


# -- the tree: replacement, history, same stamps -----------------------------------------------

def test_a_second_parent_replaces_the_edge_and_its_history() -> None:
    b = TransformBuffer()
    b.set_transform('table', 'cup', 1 * SEC, (1, 0, 0), ID)
    b.set_transform('table', 'cup', 2 * SEC, (2, 0, 0), ID)
    b.set_transform('world', 'table', 0, (0, 0, 1), ID, static=True)
    b.set_transform('world', 'gripper', 0, (5, 0, 0), ID, static=True)
    assert b.lookup('world', 'cup', 2 * SEC).translation == (2.0, 0.0, 1.0)
    b.set_transform('gripper', 'cup', 3 * SEC, (0, 0, -0.1), ID)   # picked up
    assert b.parent_of('cup') == 'gripper' and b.replaced == 1
    found = b.lookup('world', 'cup', 3 * SEC)
    assert found.translation == pytest.approx((5.0, 0.0, -0.1))
    # the table history is gone (tf2 would still answer through the table here)
    assert failure(b.lookup('world', 'cup', 2 * SEC)) == fb.BEFORE_HISTORY
    # static <-> dynamic switches also replace the edge (tf2 reallocates the frame's cache)
    b.set_transform('gripper', 'cup', 0, (0, 0, -0.2), ID, static=True)
    assert b.replaced == 2
    assert b.lookup('world', 'cup', 99 * SEC).translation == pytest.approx((5.0, 0.0, -0.2))


def test_history_keeps_capacity_samples_and_cache_time() -> None:
    b = TransformBuffer(cache_time_s=1.0, capacity=10)
    for k in range(100):     # 100 samples 10 ms apart: capacity (10) binds before 1 s does
        b.set_transform('world', 'cart', k * 10_000_000, (k, 0, 0), ID)
    assert failure(b.lookup('world', 'cart', 89 * 10_000_000)) == fb.BEFORE_HISTORY
    assert b.lookup('world', 'cart', 90 * 10_000_000).translation == (90.0, 0.0, 0.0)
    b2 = TransformBuffer(cache_time_s=1.0, capacity=1000)
    for k in range(31):      # 0.1 s apart over 3 s: cache time (1 s) binds
        b2.set_transform('world', 'cart', k * 100_000_000, (k, 0, 0), ID)
    assert failure(b2.lookup('world', 'cart', 1_999_999_999)) == fb.BEFORE_HISTORY
    assert b2.lookup('world', 'cart', 2 * SEC).translation == (20.0, 0.0, 0.0)
    # tf2 insertData: a sample older than newest - cache time is refused (TF_OLD_DATA)
    refused = b2.set_transform('world', 'cart', 1 * SEC, (0, 0, 0), ID)
    assert refused is not None and refused.kind == fb.OLDER_THAN_HISTORY


def test_out_of_order_and_same_stamp_samples() -> None:
    b = TransformBuffer()
    for k in (3, 1, 2, 0):
        b.set_transform('world', 'cart', k * SEC, (k, 0, 0), ID)
    for k in range(4):
        assert b.lookup('world', 'cart', k * SEC).translation == (float(k), 0.0, 0.0)
    assert b.lookup('world', 'cart', SEC // 2).translation == (0.5, 0.0, 0.0)
    b.set_transform('world', 'cart', SEC, (7, 0, 0), ID)   # same stamp: replaces
    assert b.lookup('world', 'cart', SEC).translation == (7.0, 0.0, 0.0)


def test_many_samples_stay_correct_across_compaction() -> None:
    """The sample list is compacted lazily; values before and after must stay right."""
    b = TransformBuffer(cache_time_s=100.0, capacity=8)
    for k in range(1000):
        b.set_transform('world', 'cart', k * 1_000_000, (k, -k, 0), ID)
        if k >= 8:
            t = (k - 3) * 1_000_000 + 500_000
            assert b.lookup('world', 'cart', t).translation == (k - 2.5, -(k - 2.5), 0.0)
            assert failure(b.lookup('world', 'cart', (k - 8) * 1_000_000)) == \
                fb.BEFORE_HISTORY


# -- insertion checks (tf2 setTransformImpl) ----------------------------------------------------

@pytest.mark.parametrize(('parent', 'child', 'translation', 'rotation', 'kind'), [
    ('a', 'a', (0, 0, 0), ID, fb.SELF_TRANSFORM),                  # TF_SELF_TRANSFORM
    ('', 'a', (0, 0, 0), ID, fb.EMPTY_FRAME_ID),                   # TF_NO_FRAME_ID
    ('a', '', (0, 0, 0), ID, fb.EMPTY_FRAME_ID),                   # TF_NO_CHILD_FRAME_ID
    ('a', 'b', (0, math.nan, 0), ID, fb.NOT_FINITE),               # TF_NAN_INPUT
    ('a', 'b', (0, 0, 0), (0, 0, 0, math.inf), fb.NOT_FINITE),
    ('a', 'b', (0, 0, 0), (0, 0, 0, 1.01), fb.BAD_QUATERNION),     # TF_DENORMALIZED_QUATERNION
    ('a', 'b', (0, 0, 0), (0, 0, 0, 0), fb.BAD_QUATERNION),
])
def test_bad_samples_are_rejected_with_a_reason(parent: str, child: str, translation: tuple,
                                                rotation: tuple, kind: str) -> None:
    b = TransformBuffer()
    rejected = b.set_transform(parent, child, SEC, translation, rotation)
    assert rejected is not None and rejected.kind == kind and rejected.message
    assert b.frames() == []


def test_leading_slash_is_stripped_and_near_unit_quaternions_normalised() -> None:
    b = TransformBuffer()
    # |q|^2 = 1.0064 is inside tf2's 0.01 tolerance: accepted, then normalised
    q = np.array([0.0, 0.0, 0.38, 0.927])
    assert b.set_transform('/world', '/sensor', SEC, (0, 0, 0), q) is None
    assert b.frames() == ['sensor', 'world']
    found = b.lookup('world', 'sensor', SEC)
    # reference: scipy normalises the quaternion the same way
    np.testing.assert_allclose(found.matrix()[:3, :3], Rotation.from_quat(q).as_matrix(),
                               atol=1e-12)


# -- messages ------------------------------------------------------------------------------------

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
class TransformMsg:
    translation: Vector3 = field(default_factory=Vector3)
    rotation: Quaternion = field(default_factory=Quaternion)


@dataclass
class TransformStamped:
    header: Header = field(default_factory=Header)
    child_frame_id: str = ''
    transform: TransformMsg = field(default_factory=TransformMsg)


@dataclass
class TFMessage:
    transforms: list = field(default_factory=list)


class Types:
    """Plain dataclasses with the ROS field names, standing in for port.types."""

    Time, Header, Vector3, Quaternion = Time, Header, Vector3, Quaternion
    Transform, TransformStamped, TFMessage = TransformMsg, TransformStamped, TFMessage


def test_stamps_round_trip() -> None:
    assert stamp_to_ns(12, 345) == 12 * SEC + 345
    assert ns_to_stamp(12 * SEC + 345) == (12, 345)
    assert ns_to_stamp(stamp_to_ns(1_700_000_000, 999_999_999)) == (1_700_000_000, 999_999_999)


def test_tf_message_round_trip_and_feeding_the_buffer() -> None:
    q = tuple(Rotation.from_euler('xyz', [0.1, -0.2, 0.3]).as_quat())
    edges = [make_edge('world', 'camera', 5 * SEC + 7, (1, 2, 3), q),
             make_edge('camera', 'camera', 5 * SEC, (0, 0, 0), ID)]        # rejected
    msg = tf_message(Types, edges)
    assert edge_from_transform_stamped(msg.transforms[0]) == edges[0]
    broken = TransformStamped(child_frame_id='x')
    broken.transform.translation = None    # a field that cannot be read
    msg.transforms.append(broken)
    b = TransformBuffer()
    rejected = add_tf_message(b, msg, static=False)
    assert [r.kind for r in rejected] == [fb.SELF_TRANSFORM, MALFORMED]
    found = b.lookup('world', 'camera', 5 * SEC + 7)
    assert found.translation == (1.0, 2.0, 3.0)
    np.testing.assert_allclose(found.rotation, q, atol=1e-15)
