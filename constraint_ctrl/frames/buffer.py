"""A transform buffer without middleware: tf2's BufferCore semantics for the DDS transport.

On rclpy the node uses tf2_ros itself; on the direct DDS transport there is no tf2, so this
module keeps the frame tree the node learns from /tf and /tf_static and looks transforms up
the way tf2 does. It is plain Python (no numpy on the lookup path): the node calls it per
person sample and per point-input sample, tens to hundreds of times a second.

Conventions (those of geometry_msgs/TransformStamped and tf2):

* an edge parent -> child holds the pose of the child frame in the parent frame, i.e. the
  transform that maps a point in child coordinates to parent coordinates;
* frames form a tree: each child has one parent edge; a frame name loses one leading '/'
  when a transform is added (tf2 strips it too), while a lookup that names a frame with a
  leading '/' or an empty name fails as 'invalid_frame' (tf2 raises InvalidArgumentException);
* times are ROS times in integer nanoseconds (header.stamp.sec * 1e9 + nanosec);
* rotations are unit quaternions in ROS order (x, y, z, w).

Static edges never expire. A dynamic edge keeps its last `capacity` samples, at most
`cache_time_s` behind its newest one (tf2 keeps 10 s). Between two samples the translation is
interpolated linearly and the rotation by slerp along the shorter arc, as tf2's TimeCache
does. `lookup(target, source, time_ns)` walks both frames up to their common ancestor and
evaluates each dynamic edge at `time_ns`:

* inside an edge's history: interpolated (or the exact sample);
* before its oldest kept sample: failure 'before_history' (tf2: extrapolation into the past);
* after its newest sample by at most `tolerance` (s): the newest sample is used as it is, and
  the result's `stamp_ns` says how old it is; by more: failure 'stale_transform' (tf2 allows
  no forward extrapolation at all; the tolerance exists because a sensor sample is usually
  stamped a little after the last /tf sample of a moving chain);
* `time_ns=None` asks for the latest transform: the chain is evaluated at the latest time all
  its dynamic edges have data for (tf2's "time 0", getLatestCommonTime).

The result carries `stamp_ns`, the oldest data time used over the chain (None when only static
edges were used): its age relative to the requested time is what a caller compares with a
freshness limit.

Where this differs from tf2 (BufferCore/TimeCache, checked in ros2/geometry2, Jazzy):

* a dynamic sample for a child with a different parent replaces the edge and drops its
  history; tf2 keeps samples of both parents in one time-ordered cache and picks the parent
  of the older bracketing sample, so tf2 can still answer for times before the switch while
  this buffer answers 'before_history' there. Static <-> dynamic switches replace the edge in
  both (tf2 reallocates the frame's cache);
* a second sample with the same stamp replaces the first; tf2 (since Humble) stores both
  unless they are identical;
* quaternions are normalised on insertion (tf2 stores them as given after the same
  |q|^2 - 1 < 0.01 check) so that every composed rotation stays a rotation.
"""
from __future__ import annotations

import math
import threading
from bisect import bisect_left, bisect_right
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

#: Default history per dynamic edge (tf2's BUFFER_CORE_DEFAULT_CACHE_TIME is 10 s).
DEFAULT_CACHE_TIME_S = 10.0
#: Default number of samples kept per dynamic edge (1000 Hz /tf for one second).
DEFAULT_CAPACITY = 1000
#: Default forward tolerance (s): robot_state_publisher publishes /tf at 20 Hz by default,
#: 50 ms apart; 0.1 s lets one sample go missing before a lookup fails.
DEFAULT_TOLERANCE_S = 0.1
#: tf2 rejects quaternions with | |q|^2 - 1 | >= this (QUATERNION_NORMALIZATION_TOLERANCE).
QUATERNION_TOLERANCE = 0.01

# lookup failure kinds
UNKNOWN_FRAME = 'unknown_frame'
INVALID_FRAME = 'invalid_frame'
NOT_CONNECTED = 'not_connected'
LOOP = 'loop'
BEFORE_HISTORY = 'before_history'
STALE_TRANSFORM = 'stale_transform'
# rejection kinds (set_transform)
SELF_TRANSFORM = 'self_transform'
EMPTY_FRAME_ID = 'empty_frame_id'
NOT_FINITE = 'not_finite'
BAD_QUATERNION = 'bad_quaternion'
OLDER_THAN_HISTORY = 'older_than_history'

Vec3 = tuple[float, float, float]
Quat = tuple[float, float, float, float]
_IDENTITY_Q: Quat = (0.0, 0.0, 0.0, 1.0)
_ZERO: Vec3 = (0.0, 0.0, 0.0)


@dataclass(frozen=True, slots=True)
class LookupFailure:
    """Why a lookup gave no transform: `kind` for counting, `message` for people."""

    kind: str
    message: str

    def __bool__(self) -> bool:   # `if result:` reads as "did it work"
        return False


@dataclass(frozen=True, slots=True)
class Rejection:
    """Why set_transform ignored a sample (tf2 logs TF_SELF_TRANSFORM, TF_NAN_INPUT, ...)."""

    kind: str
    message: str


@dataclass(frozen=True, slots=True)
class Transform:
    """T_target_source: maps a point in `source` coordinates to `target` coordinates.

    `time_ns` is the time the chain was evaluated at (None: a static chain asked for
    'latest'); `stamp_ns` is the oldest sample time used over the dynamic edges (None when
    the chain is static or the frames are the same).
    """

    target: str
    source: str
    translation: Vec3
    rotation: Quat            # unit quaternion x, y, z, w
    time_ns: int | None
    stamp_ns: int | None

    @property
    def age_s(self) -> float:
        """How much older the data are than the requested time (0 when interpolated)."""
        if self.stamp_ns is None or self.time_ns is None:
            return 0.0
        return (self.time_ns - self.stamp_ns) * 1e-9

    def apply(self, point: Sequence[float]) -> Vec3:
        """The point (x, y, z) in source coordinates, expressed in target coordinates."""
        x, y, z = _rotate(self.rotation, float(point[0]), float(point[1]), float(point[2]))
        t = self.translation
        return x + t[0], y + t[1], z + t[2]

    def matrix(self) -> np.ndarray:
        """4x4 homogeneous matrix of the same transform."""
        qx, qy, qz, qw = self.rotation
        out = np.eye(4)
        out[:3, :3] = [
            [1 - 2 * (qy * qy + qz * qz), 2 * (qx * qy - qz * qw), 2 * (qx * qz + qy * qw)],
            [2 * (qx * qy + qz * qw), 1 - 2 * (qx * qx + qz * qz), 2 * (qy * qz - qx * qw)],
            [2 * (qx * qz - qy * qw), 2 * (qy * qz + qx * qw), 1 - 2 * (qx * qx + qy * qy)]]
        out[:3, 3] = self.translation
        return out

    def __bool__(self) -> bool:
        return True


# -- quaternion arithmetic on plain floats (x, y, z, w) ---------------------------------------

def _qmul(a: Quat, b: Quat) -> Quat:
    ax, ay, az, aw = a
    bx, by, bz, bw = b
    return (aw * bx + ax * bw + ay * bz - az * by,
            aw * by - ax * bz + ay * bw + az * bx,
            aw * bz + ax * by - ay * bx + az * bw,
            aw * bw - ax * bx - ay * by - az * bz)


def _rotate(q: Quat, x: float, y: float, z: float) -> Vec3:
    """R(q) v with v' = v + w t + u x t, t = 2 u x v (u the vector part of q)."""
    qx, qy, qz, qw = q
    tx = 2.0 * (qy * z - qz * y)
    ty = 2.0 * (qz * x - qx * z)
    tz = 2.0 * (qx * y - qy * x)
    return (x + qw * tx + qy * tz - qz * ty,
            y + qw * ty + qz * tx - qx * tz,
            z + qw * tz + qx * ty - qy * tx)


def _compose(a_q: Quat, a_t: Vec3, b_q: Quat, b_t: Vec3) -> tuple[Quat, Vec3]:
    """(A o B): first B, then A."""
    x, y, z = _rotate(a_q, *b_t)
    return _qmul(a_q, b_q), (x + a_t[0], y + a_t[1], z + a_t[2])


def _invert(q: Quat, t: Vec3) -> tuple[Quat, Vec3]:
    qi = (-q[0], -q[1], -q[2], q[3])
    x, y, z = _rotate(qi, *t)
    return qi, (-x, -y, -z)


def _slerp(a: Quat, b: Quat, ratio: float) -> Quat:
    """Spherical interpolation along the shorter arc (as tf2::slerp), renormalised."""
    dot = a[0] * b[0] + a[1] * b[1] + a[2] * b[2] + a[3] * b[3]
    sign = 1.0
    if dot < 0.0:
        dot, sign = -dot, -1.0
    if dot > 0.9999995:   # nearly the same rotation: sin(theta) ~ 0, interpolate linearly
        s0, s1 = 1.0 - ratio, ratio
    else:
        theta = math.acos(min(dot, 1.0))
        inv = 1.0 / math.sin(theta)
        s0 = math.sin((1.0 - ratio) * theta) * inv
        s1 = math.sin(ratio * theta) * inv
    s1 *= sign
    x = s0 * a[0] + s1 * b[0]
    y = s0 * a[1] + s1 * b[1]
    z = s0 * a[2] + s1 * b[2]
    w = s0 * a[3] + s1 * b[3]
    n = 1.0 / math.sqrt(x * x + y * y + z * z + w * w)
    return x * n, y * n, z * n, w * n


# -- edges --------------------------------------------------------------------------------------

class _Edge:
    """One parent -> child edge: a single static sample, or a sorted history of samples."""

    __slots__ = ('parent', 'child', 'static', 'stamps', 'values', 'lo')

    def __init__(self, parent: str, child: str, static: bool) -> None:
        self.parent = parent
        self.child = child
        self.static = static
        self.stamps: list[int] = []
        self.values: list[tuple[Quat, Vec3]] = []
        self.lo = 0           # samples before index lo are dropped (compacted lazily)

    def newest(self) -> int:
        return self.stamps[-1]

    def insert(self, stamp: int, value: tuple[Quat, Vec3], capacity: int,
               cache_ns: int) -> bool:
        """False when the sample is older than the kept history (tf2: TF_OLD_DATA)."""
        stamps, values = self.stamps, self.values
        if self.static:
            stamps[:] = [0]
            values[:] = [value]
            return True
        n = len(stamps)
        if n == self.lo or stamp > stamps[-1]:
            stamps.append(stamp)
            values.append(value)
        else:
            if stamp < stamps[-1] - cache_ns:
                return False
            i = bisect_left(stamps, stamp, self.lo, n)
            if i < n and stamps[i] == stamp:
                values[i] = value
            else:
                stamps.insert(i, stamp)      # i >= lo: the dropped samples stay in front
                values.insert(i, value)
        newest = stamps[-1]
        lo = self.lo
        end = len(stamps)
        while end - lo > capacity or (end - lo > 1 and stamps[lo] < newest - cache_ns):
            lo += 1
        if lo > capacity:            # compact now and then: amortised O(1) per sample
            del stamps[:lo]
            del values[:lo]
            lo = 0
        self.lo = lo
        return True

    def at(self, time_ns: int, tolerance_ns: int) -> tuple[Quat, Vec3, int] | LookupFailure:
        """(rotation, translation, data stamp) at time_ns, or why not."""
        stamps = self.stamps
        newest = stamps[-1]
        if time_ns >= newest:
            if time_ns - newest > tolerance_ns:
                return LookupFailure(STALE_TRANSFORM, (
                    f'transform {self.parent} -> {self.child} is {(time_ns - newest) * 1e-9:.3f}'
                    f' s older than the requested time (newest sample {_t(newest)}, requested '
                    f'{_t(time_ns)}, tolerance {tolerance_ns * 1e-9:.3f} s)'))
            q, t = self.values[-1]
            return q, t, newest
        oldest = stamps[self.lo]
        if time_ns < oldest:
            return LookupFailure(BEFORE_HISTORY, (
                f'requested time {_t(time_ns)} is before the oldest kept sample of '
                f'{self.parent} -> {self.child} ({_t(oldest)})'))
        i = bisect_right(stamps, time_ns, self.lo, len(stamps))   # stamps[i-1] <= t < stamps[i]
        s0, s1 = stamps[i - 1], stamps[i]
        q0, t0 = self.values[i - 1]
        if s0 == time_ns:
            return q0, t0, time_ns
        q1, t1 = self.values[i]
        r = (time_ns - s0) / (s1 - s0)
        t = (t0[0] + r * (t1[0] - t0[0]), t0[1] + r * (t1[1] - t0[1]),
             t0[2] + r * (t1[2] - t0[2]))
        return _slerp(q0, q1, r), t, time_ns


def _t(ns: int) -> str:
    return f'{ns // 1_000_000_000}.{ns % 1_000_000_000:09d}'


def _strip(name: str) -> str:
    return name[1:] if name.startswith('/') else name


@dataclass(frozen=True, slots=True)
class _Path:
    up: tuple[_Edge, ...]     # source -> ... -> ancestor
    down: tuple[_Edge, ...]   # target -> ... -> ancestor


class TransformBuffer:
    """Static and timed transforms of a frame tree; see the module docstring.

    Thread-safe: one lock guards insertions and lookups (transport callbacks and the tick may
    run on different threads).
    """

    def __init__(self, cache_time_s: float = DEFAULT_CACHE_TIME_S,
                 capacity: int = DEFAULT_CAPACITY,
                 tolerance_s: float = DEFAULT_TOLERANCE_S) -> None:
        if not cache_time_s > 0.0 or capacity < 2 or not tolerance_s >= 0.0:
            msg = (f'transform buffer needs cache_time_s > 0, capacity >= 2 and tolerance_s >= 0'
                   f' (got {cache_time_s!r}, {capacity!r}, {tolerance_s!r})')
            raise ValueError(msg)
        self.cache_ns = round(cache_time_s * 1e9)
        self.capacity = int(capacity)
        self.tolerance_ns = round(tolerance_s * 1e9)
        self._edges: dict[str, _Edge] = {}      # by child frame
        self._known: set[str] = set()           # every frame name ever seen
        self._paths: dict[tuple[str, str], _Path | LookupFailure] = {}
        self._lock = threading.Lock()
        self.replaced = 0                       # edges replaced by a new parent or kind

    # -- insertion ---------------------------------------------------------------------------

    def set_transform(self, parent: str, child: str, stamp_ns: int,
                      translation: Sequence[float], rotation: Sequence[float],
                      static: bool = False) -> Rejection | None:
        """Add one sample of the edge parent -> child; None when kept, else why not.

        translation: child origin in parent coordinates (m); rotation: quaternion x, y, z, w.
        A static sample's stamp is ignored (static transforms hold at all times).
        """
        parent, child = _strip(parent), _strip(child)
        if not parent or not child:
            which = 'frame_id' if not parent else 'child_frame_id'
            return Rejection(EMPTY_FRAME_ID, f'transform with an empty {which} '
                             f'({parent!r} -> {child!r}) ignored')
        if parent == child:
            return Rejection(SELF_TRANSFORM, f'transform from {parent!r} to itself ignored')
        tx, ty, tz = (float(v) for v in translation)
        qx, qy, qz, qw = (float(v) for v in rotation)
        if not all(math.isfinite(v) for v in (tx, ty, tz, qx, qy, qz, qw)):
            return Rejection(NOT_FINITE, f'transform {parent} -> {child} has a value that is '
                             f'not finite ({tx}, {ty}, {tz}) ({qx}, {qy}, {qz}, {qw}); ignored')
        norm2 = qx * qx + qy * qy + qz * qz + qw * qw
        if abs(norm2 - 1.0) >= QUATERNION_TOLERANCE:
            return Rejection(BAD_QUATERNION, f'transform {parent} -> {child}: rotation '
                             f'({qx}, {qy}, {qz}, {qw}) is not a unit quaternion; ignored')
        n = 1.0 / math.sqrt(norm2)
        value = ((qx * n, qy * n, qz * n, qw * n), (tx, ty, tz))
        with self._lock:
            edge = self._edges.get(child)
            if edge is None or edge.parent != parent or edge.static != static:
                if edge is not None:
                    self.replaced += 1
                edge = _Edge(parent, child, static)
                self._edges[child] = edge
                self._known.add(parent)
                self._known.add(child)
                self._paths.clear()
            if not edge.insert(int(stamp_ns), value, self.capacity, self.cache_ns):
                return Rejection(OLDER_THAN_HISTORY, (
                    f'transform {parent} -> {child} at {_t(int(stamp_ns))} is older than the '
                    f'kept history ({self.cache_ns * 1e-9:g} s behind {_t(edge.newest())}); '
                    'ignored'))
        return None

    def clear(self) -> None:
        """Forget every timed transform; static ones stay (when ROS time jumps back or
        changes source, as tf2_ros.Buffer does: tf2's static cache ignores a clear, from
        memory, and /tf_static is not sent again)."""
        with self._lock:
            timed = [child for child, edge in self._edges.items() if not edge.static]
            for child in timed:
                del self._edges[child]
            self._paths.clear()

    def frames(self) -> list[str]:
        """Every frame name seen so far, sorted."""
        with self._lock:
            return sorted(self._known)

    def parent_of(self, frame: str) -> str | None:
        with self._lock:
            edge = self._edges.get(_strip(frame))
            return None if edge is None else edge.parent

    # -- lookup ------------------------------------------------------------------------------

    def lookup(self, target: str, source: str, time_ns: int | None = None,
               tolerance_s: float | None = None) -> Transform | LookupFailure:
        """T_target_source at time_ns (None: the latest the chain allows); see module doc.

        tolerance_s overrides the buffer's forward tolerance for this lookup.
        """
        for name, which in ((target, 'target'), (source, 'source')):
            if not name or name.startswith('/'):
                return LookupFailure(INVALID_FRAME, (
                    f'{which} frame {name!r} is not a valid frame name (empty, or starts '
                    "with '/')"))
        if target == source:
            return Transform(target, source, _ZERO, _IDENTITY_Q, time_ns, None)
        tolerance_ns = self.tolerance_ns if tolerance_s is None else round(tolerance_s * 1e9)
        with self._lock:
            path = self._paths.get((target, source))
            if path is None:
                path = self._find_path(target, source)
                if len(self._paths) > 256:
                    self._paths.clear()
                self._paths[(target, source)] = path
            if isinstance(path, LookupFailure):
                return path
            if time_ns is None:
                common = None
                for edge in path.up + path.down:
                    if not edge.static:
                        newest = edge.newest()
                        common = newest if common is None else min(common, newest)
                time_ns = common
            q_src, t_src = _IDENTITY_Q, _ZERO
            q_tgt, t_tgt = _IDENTITY_Q, _ZERO
            stamp: int | None = None
            for edges, up in ((path.up, True), (path.down, False)):
                q_acc, t_acc = _IDENTITY_Q, _ZERO
                for i, edge in enumerate(edges):
                    if edge.static:
                        q, t = edge.values[0]
                    else:
                        found = edge.at(time_ns, tolerance_ns)   # type: ignore[arg-type]
                        if isinstance(found, LookupFailure):
                            return found
                        q, t, used = found
                        stamp = used if stamp is None else min(stamp, used)
                    q_acc, t_acc = (q, t) if i == 0 else _compose(q, t, q_acc, t_acc)
                if up:
                    q_src, t_src = q_acc, t_acc
                else:
                    q_tgt, t_tgt = q_acc, t_acc
        if path.down:
            q_inv, t_inv = _invert(q_tgt, t_tgt)
            q_src, t_src = _compose(q_inv, t_inv, q_src, t_src) if path.up else (q_inv, t_inv)
        return Transform(target, source, t_src, q_src, time_ns, stamp)

    def transform_point(self, point: Sequence[float], target: str, source: str,
                        time_ns: int | None = None, tolerance_s: float | None = None
                        ) -> tuple[Vec3, Transform] | LookupFailure:
        """The point given in `source` coordinates, in `target` coordinates, and the transform
        used (its age_s says how old the data were)."""
        found = self.lookup(target, source, time_ns, tolerance_s)
        if isinstance(found, LookupFailure):
            return found
        return found.apply(point), found

    def _ancestors(self, frame: str) -> tuple[list[_Edge], str] | LookupFailure:
        edges: list[_Edge] = []
        limit = len(self._edges)
        while frame in self._edges:
            edge = self._edges[frame]
            edges.append(edge)
            frame = edge.parent
            if len(edges) > limit:
                chain = ' -> '.join(e.child for e in edges[:8])
                return LookupFailure(LOOP, f'the frame tree contains a loop ({chain} ...)')
        return edges, frame

    def _find_path(self, target: str, source: str) -> _Path | LookupFailure:
        for name in (target, source):
            if name not in self._known:
                known = ', '.join(sorted(self._known)[:12]) or '(none yet)'
                return LookupFailure(UNKNOWN_FRAME, f'frame {name!r} does not exist (known '
                                     f'frames: {known})')
        up = self._ancestors(source)
        if isinstance(up, LookupFailure):
            return up
        down = self._ancestors(target)
        if isinstance(down, LookupFailure):
            return down
        up_edges, source_root = up
        down_edges, target_root = down
        if source_root != target_root:
            return LookupFailure(NOT_CONNECTED, (
                f'frames {source!r} and {target!r} are not connected: {source!r} belongs to the '
                f'tree of {source_root!r}, {target!r} to the tree of {target_root!r}'))
        # the common ancestor is the first frame on target's way up that is on source's way up
        on_source_path = {source: 0}
        for i, edge in enumerate(up_edges):
            on_source_path[edge.parent] = i + 1
        cut_down = 0
        frame = target
        while frame not in on_source_path:
            frame = down_edges[cut_down].parent
            cut_down += 1
        return _Path(up=tuple(up_edges[:on_source_path[frame]]),
                     down=tuple(down_edges[:cut_down]))


__all__ = ['BEFORE_HISTORY', 'BAD_QUATERNION', 'DEFAULT_CACHE_TIME_S', 'DEFAULT_CAPACITY',
           'DEFAULT_TOLERANCE_S', 'EMPTY_FRAME_ID', 'INVALID_FRAME', 'LOOP', 'LookupFailure',
           'NOT_CONNECTED', 'NOT_FINITE', 'OLDER_THAN_HISTORY', 'Rejection', 'SELF_TRANSFORM',
           'STALE_TRANSFORM', 'Transform', 'TransformBuffer', 'UNKNOWN_FRAME']
