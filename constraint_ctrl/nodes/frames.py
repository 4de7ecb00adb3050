"""Points into the node's frames on either transport: one small interface, two sources.

The node asks one question, per person sample and per point-input sample:

    frames.transform_point(xyz, from_frame, to_frame, stamp_ns, max_age_s)
        -> PointInFrame(xyz, age_s)   or   LookupFailure(kind, message)

`open_frames(port)` answers it with tf2_ros on the rclpy transport (Tf2Frames: a
tf2_ros.Buffer and a tf2_ros.TransformListener on the port's node, a thin mapping onto
tf2_ros) and with our own TransformBuffer on the DDS transport (TopicFrames: subscribes /tf
and /tf_static, tf2_msgs/TFMessage, with tf2_ros's QoS, profiles 'tf' and 'tf_static').

Both give the same answers:

* the point's stamp (ROS time, ns) picks the transform; a missing stamp (None or 0) means
  "now" (port.now_ns()), as an unstamped sensor sample counts from its arrival;
* inside the transform history: interpolated, age 0;
* later than the newest transform data by at most max_age_s: the newest data, age = how much
  older they are; by more: failure 'stale_transform'; earlier than the history: failure
  'before_history'; unknown frames, frames in two trees, invalid names: 'unknown_frame',
  'not_connected', 'invalid_frame' (see constraint_ctrl.frames.buffer for all kinds).

Failures and rejected /tf samples are counted per kind; `new_problems()` hands each kind's
first message out once, so the node logs a problem once, not per message.
"""
from __future__ import annotations

import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from ..frames.buffer import (
    BEFORE_HISTORY,
    DEFAULT_CACHE_TIME_S,
    DEFAULT_CAPACITY,
    DEFAULT_TOLERANCE_S,
    INVALID_FRAME,
    NOT_CONNECTED,
    STALE_TRANSFORM,
    UNKNOWN_FRAME,
    LookupFailure,
    Rejection,
    Transform,
    TransformBuffer,
)
from ..frames.messages import add_tf_message, edge_from_transform_stamped, stamp_to_ns

#: Failure kind for a tf2 TransformException that is none of the specific ones.
LOOKUP_FAILED = 'lookup_failed'

Subscribe = Callable[[Any, str, Callable[[Any], None], str], object]


@dataclass(frozen=True, slots=True)
class PointInFrame:
    """A point expressed in the requested frame, and the age of the transform data used (s):
    0 when the transform was known at the point's stamp."""

    xyz: np.ndarray
    age_s: float

    def __bool__(self) -> bool:
        return True


class Frames(Protocol):
    """What the node uses; both implementations below provide it."""

    counts: dict[str, int]

    def transform_point(self, xyz: Sequence[float], from_frame: str, to_frame: str,
                        stamp_ns: int | None, max_age_s: float | None = None
                        ) -> PointInFrame | LookupFailure: ...

    def new_problems(self) -> list[str]: ...

    def close(self) -> None: ...


class _Problems:
    """Counts failures and rejections per kind; reports each kind once."""

    def __init__(self) -> None:
        self.counts: dict[str, int] = {}
        self._first: dict[str, str] = {}
        self._reported: set[str] = set()
        self._problem_lock = threading.Lock()

    def _note(self, kind: str, message: str) -> None:
        with self._problem_lock:
            self.counts[kind] = self.counts.get(kind, 0) + 1
            self._first.setdefault(kind, message)

    def _fail(self, kind: str, message: str) -> LookupFailure:
        self._note(kind, message)
        return LookupFailure(kind, message)

    def new_problems(self) -> list[str]:
        """Each kind seen since the last call and never reported before, once: 'kind: first
        message'. The counts keep growing in `counts` (for status)."""
        with self._problem_lock:
            fresh = [k for k in self._first if k not in self._reported]
            self._reported.update(fresh)
            return [f'{k}: {self._first[k]}' for k in fresh]


class TopicFrames(_Problems):
    """/tf and /tf_static (tf2_msgs/TFMessage) into our TransformBuffer: the DDS transport.

    `subscribe` defaults to port.create_subscription; the node may pass its own wrapper (for
    example one that also records the messages in its bag). Callbacks run on the port's
    subscription thread; the buffer has its own lock.

    When ROS time jumps back or changes source (the port's `time_generation()` moves: a
    simulation restarted, use_sim_time switched), the timed transforms are cleared, as
    tf2_ros.Buffer's time-jump callback does; otherwise the restarted simulation's
    transforms would be older than the kept history and refused. Counted as 'time_jump'.
    """

    def __init__(self, port: Any, *, cache_time_s: float = DEFAULT_CACHE_TIME_S,
                 capacity: int = DEFAULT_CAPACITY, max_age_s: float = DEFAULT_TOLERANCE_S,
                 subscribe: Subscribe | None = None) -> None:
        super().__init__()
        self._port = port
        self.max_age_s = max_age_s
        self.buffer = TransformBuffer(cache_time_s, capacity, max_age_s)
        self._time_generation: Callable[[], int] | None = getattr(port, 'time_generation',
                                                                  None)
        self._generation = self._time_generation() if self._time_generation else 0
        sub = subscribe if subscribe is not None else port.create_subscription
        message = port.types.TFMessage
        self.subscriptions = [sub(message, '/tf', self._on_tf, 'tf'),
                              sub(message, '/tf_static', self._on_tf_static, 'tf_static')]
        self._own_subscriptions = subscribe is None   # else the lender destroys them

    def close(self) -> None:
        """Destroy the /tf and /tf_static subscriptions made here (not lent ones)."""
        subscriptions, self.subscriptions = self.subscriptions, []
        if self._own_subscriptions:
            for subscription in subscriptions:
                self._port.destroy_subscription(subscription)

    def _on_tf(self, msg: Any) -> None:
        self._feed(msg, static=False)

    def _on_tf_static(self, msg: Any) -> None:
        self._feed(msg, static=True)

    def _follow_time(self) -> None:
        """Clear the timed transforms once per jump of ROS time (see the class docstring)."""
        if self._time_generation is None:
            return
        generation = self._time_generation()
        if generation != self._generation:
            self._generation = generation
            self.buffer.clear()
            self._note('time_jump', 'ROS time jumped back or changed source: timed '
                       'transforms cleared (static ones kept), as tf2_ros does')

    def _feed(self, msg: Any, static: bool) -> None:
        self._follow_time()
        rejected: list[Rejection] = add_tf_message(self.buffer, msg, static)
        for r in rejected:
            self._note(f'rejected_{r.kind}', r.message)

    def transform_point(self, xyz: Sequence[float], from_frame: str, to_frame: str,
                        stamp_ns: int | None, max_age_s: float | None = None
                        ) -> PointInFrame | LookupFailure:
        self._follow_time()
        if not stamp_ns:
            stamp_ns = int(self._port.now_ns())
        limit = self.max_age_s if max_age_s is None else max_age_s
        found = self.buffer.lookup(to_frame, from_frame, stamp_ns, limit)
        if isinstance(found, LookupFailure):
            self._note(found.kind, found.message)
            return found
        return PointInFrame(np.array(found.apply(xyz)), found.age_s)


class Tf2Frames(_Problems):
    """tf2_ros on the rclpy transport: a thin mapping onto tf2_ros.Buffer.lookup_transform.

    tf2_ros.Buffer.lookup_transform(target_frame, source_frame, time, timeout=Duration())
    raises tf2's LookupException (unknown frame), ConnectivityException (two trees),
    ExtrapolationException (time outside the history, either side), InvalidArgumentException
    (bad names), all TransformException. tf2 never extrapolates forward; to give the DDS
    transport's answer (newest data within max_age_s), an ExtrapolationException is followed
    by a lookup at time 0 ("latest", at the latest common time of the chain), and its
    header.stamp decides: within max_age_s before the point's stamp -> used with that age.
    The point is transformed by hand (the same rotation code as our buffer) instead of
    through tf2_geometry_msgs, which saves a dependency and a message per sample.

    The constructor takes the pieces so that the mapping can be unit-tested without ROS;
    `on_node` builds the real ones.
    """

    def __init__(self, port: Any, buffer: Any, make_time: Callable[[int], Any], errors: Any,
                 *, max_age_s: float = DEFAULT_TOLERANCE_S) -> None:
        super().__init__()
        self._port = port
        self.buffer = buffer
        self._time = make_time
        self._errors = errors
        self.max_age_s = max_age_s
        self.listener: Any = None

    @classmethod
    def on_node(cls, port: Any, *, cache_time_s: float = DEFAULT_CACHE_TIME_S,
                max_age_s: float = DEFAULT_TOLERANCE_S) -> Tf2Frames:
        """tf2_ros.Buffer(cache_time, node) and tf2_ros.TransformListener(buffer, node) on the
        rclpy port's node (both Humble and Jazzy signatures); the listener subscribes /tf and
        /tf_static itself with tf2's QoS."""
        import tf2_ros
        from rclpy.duration import Duration
        from rclpy.time import Time
        buffer = tf2_ros.Buffer(cache_time=Duration(seconds=cache_time_s), node=port.node)
        frames = cls(port, buffer, lambda ns: Time(nanoseconds=int(ns)), tf2_ros,
                     max_age_s=max_age_s)
        frames.listener = tf2_ros.TransformListener(buffer, port.node)
        return frames

    def close(self) -> None:
        """Release what tf2_ros made on the node (at cleanup; the node lives on): the
        listener's /tf and /tf_static subscriptions (TransformListener.unregister), the
        buffer's 'tf2_frames' service and its clock jump callback."""
        listener, self.listener = self.listener, None
        if listener is not None:
            listener.unregister()
        buffer = self.buffer
        service = getattr(buffer, 'srv', None)
        if service is not None:
            self._port.node.destroy_service(service)
            buffer.srv = None
        jump = getattr(buffer, 'jump_handle', None)
        if jump is not None:
            jump.unregister()
            buffer.jump_handle = None

    def _kind(self, exc: Exception) -> str:
        e = self._errors
        for cls, kind in ((e.LookupException, UNKNOWN_FRAME),
                          (e.ConnectivityException, NOT_CONNECTED),
                          (e.InvalidArgumentException, INVALID_FRAME)):
            if isinstance(exc, cls):
                return kind
        return LOOKUP_FAILED

    def transform_point(self, xyz: Sequence[float], from_frame: str, to_frame: str,
                        stamp_ns: int | None, max_age_s: float | None = None
                        ) -> PointInFrame | LookupFailure:
        if not stamp_ns:
            stamp_ns = int(self._port.now_ns())
        limit_ns = round((self.max_age_s if max_age_s is None else max_age_s) * 1e9)
        errors = self._errors
        age_ns = 0
        try:
            stamped = self.buffer.lookup_transform(to_frame, from_frame, self._time(stamp_ns))
        except errors.ExtrapolationException as exc:
            try:
                stamped = self.buffer.lookup_transform(to_frame, from_frame, self._time(0))
            except errors.TransformException as again:
                return self._fail(self._kind(again), str(again))
            header = stamped.header.stamp
            age_ns = stamp_ns - stamp_to_ns(header.sec, header.nanosec)
            if age_ns < 0:
                return self._fail(BEFORE_HISTORY, str(exc))
            if age_ns > limit_ns:
                return self._fail(STALE_TRANSFORM, (
                    f'transform {to_frame} <- {from_frame} is {age_ns * 1e-9:.3f} s older than '
                    f'the point (limit {limit_ns * 1e-9:.3f} s): {exc}'))
        except errors.TransformException as exc:
            return self._fail(self._kind(exc), str(exc))
        edge = edge_from_transform_stamped(stamped)
        transform = Transform(to_frame, from_frame, edge.translation, edge.rotation, None, None)
        return PointInFrame(np.array(transform.apply(xyz)), age_ns * 1e-9)


def open_frames(port: Any, *, cache_time_s: float = DEFAULT_CACHE_TIME_S,
                max_age_s: float = DEFAULT_TOLERANCE_S,
                subscribe: Subscribe | None = None) -> Tf2Frames | TopicFrames:
    """tf2_ros on the rclpy port, our own buffer fed from /tf and /tf_static otherwise."""
    from ..transport.rclpy_port import RclpyPort  # imports no rclpy at module level
    if isinstance(port, RclpyPort):
        return Tf2Frames.on_node(port, cache_time_s=cache_time_s, max_age_s=max_age_s)
    return TopicFrames(port, cache_time_s=cache_time_s, max_age_s=max_age_s,
                       subscribe=subscribe)


__all__ = ['Frames', 'LOOKUP_FAILED', 'PointInFrame', 'Tf2Frames', 'TopicFrames',
           'open_frames']
