"""geometry_msgs/TransformStamped and tf2_msgs/TFMessage <-> buffer edges, in plain numbers.

Nothing here imports a message package: the functions read and build messages by their ROS
field names only, so the same code serves rclpy messages, the DDS transport's generated
classes and the plain dataclasses of unit tests. Field layout (ROS 2, both distros):

    TFMessage.transforms: TransformStamped[]
    TransformStamped: header (stamp.sec, stamp.nanosec, frame_id = parent), child_frame_id,
                      transform.translation (x, y, z), transform.rotation (x, y, z, w)
"""
from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any

from .buffer import Rejection, TransformBuffer

#: Rejection kind of a TransformStamped whose fields cannot be read as numbers.
MALFORMED = 'malformed'


@dataclass(frozen=True, slots=True)
class EdgeSample:
    """One TransformStamped as plain numbers: the pose of `child` in `parent` at stamp_ns."""

    parent: str
    child: str
    stamp_ns: int
    translation: tuple[float, float, float]
    rotation: tuple[float, float, float, float]     # x, y, z, w


def stamp_to_ns(sec: int, nanosec: int) -> int:
    """builtin_interfaces/Time -> integer ns (sec may be negative only in theory)."""
    return int(sec) * 1_000_000_000 + int(nanosec)


def ns_to_stamp(stamp_ns: int) -> tuple[int, int]:
    """Integer ns -> (sec, nanosec) with 0 <= nanosec < 1e9, as builtin_interfaces/Time."""
    sec, nanosec = divmod(int(stamp_ns), 1_000_000_000)
    return sec, nanosec


def edge_from_transform_stamped(msg: Any) -> EdgeSample:
    """Read a geometry_msgs/TransformStamped (any representation) into plain numbers."""
    header = msg.header
    tr = msg.transform.translation
    ro = msg.transform.rotation
    return EdgeSample(str(header.frame_id), str(msg.child_frame_id),
                      stamp_to_ns(header.stamp.sec, header.stamp.nanosec),
                      (float(tr.x), float(tr.y), float(tr.z)),
                      (float(ro.x), float(ro.y), float(ro.z), float(ro.w)))


def add_edge(buffer: TransformBuffer, edge: EdgeSample, static: bool) -> Rejection | None:
    return buffer.set_transform(edge.parent, edge.child, edge.stamp_ns, edge.translation,
                                edge.rotation, static=static)


def add_tf_message(buffer: TransformBuffer, msg: Any, static: bool) -> list[Rejection]:
    """Feed every transform of a tf2_msgs/TFMessage; the rejected ones come back (usually [])."""
    rejected: list[Rejection] = []
    for ts in msg.transforms:
        try:
            sample = edge_from_transform_stamped(ts)
        except (AttributeError, TypeError, ValueError) as exc:
            rejected.append(Rejection(MALFORMED, f'malformed TransformStamped ignored: {exc}'))
            continue
        problem = add_edge(buffer, sample, static)
        if problem is not None:
            rejected.append(problem)
    return rejected


def transform_stamped(types: SimpleNamespace | Any, edge: EdgeSample) -> Any:
    """Build a geometry_msgs/TransformStamped with a port's message classes (port.types)."""
    sec, nanosec = ns_to_stamp(edge.stamp_ns)
    tx, ty, tz = edge.translation
    qx, qy, qz, qw = edge.rotation
    return types.TransformStamped(
        header=types.Header(stamp=types.Time(sec=sec, nanosec=nanosec), frame_id=edge.parent),
        child_frame_id=edge.child,
        transform=types.Transform(translation=types.Vector3(x=tx, y=ty, z=tz),
                                  rotation=types.Quaternion(x=qx, y=qy, z=qz, w=qw)))


def tf_message(types: SimpleNamespace | Any, edges: Iterable[EdgeSample]) -> Any:
    """Build a tf2_msgs/TFMessage with a port's message classes."""
    return types.TFMessage(transforms=[transform_stamped(types, e) for e in edges])


def make_edge(parent: str, child: str, stamp_ns: int, translation: Sequence[float],
         rotation: Sequence[float]) -> EdgeSample:
    """An EdgeSample from loose numbers (lists, numpy arrays)."""
    tx, ty, tz = (float(v) for v in translation)
    qx, qy, qz, qw = (float(v) for v in rotation)
    return EdgeSample(parent, child, int(stamp_ns), (tx, ty, tz), (qx, qy, qz, qw))


__all__ = ['EdgeSample', 'MALFORMED', 'add_edge', 'add_tf_message', 'edge_from_transform_stamped',
           'make_edge', 'ns_to_stamp', 'stamp_to_ns', 'tf_message', 'transform_stamped']
