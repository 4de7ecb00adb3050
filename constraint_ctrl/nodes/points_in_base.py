"""Person positions and point inputs into the frame the node needs, with faults counted once.

The controller's watchdog works in one frame (parameter base_frame, default the model's root
link); a person detector publishes in its camera's frame, a marker tracker in its own. This
module sits between the node's subscription callbacks and the frames adapter (nodes/frames.py:
tf2_ros on rclpy, our buffer fed from /tf and /tf_static on the DDS transport) and turns one
message into one number or point:

* a person (geometry_msgs/PointStamped) in '' or base_frame is taken as it is; in any other
  frame it is transformed at its header stamp. A missing transform, or transform data older
  than the person sample by more than people.transform_timeout, gives a NaN position: the
  watchdog treats a source with a non-finite position as a person anywhere (a stop), from that
  very sample on; the next sample that can be transformed replaces it;
* a point input with ``frame`` set (inputs.<name>.frame) is transformed into that frame before
  its field (point.x, point.y or point.z) is taken; without a transform its value is NaN,
  which the watchdog treats as an unusable input (a stop while a skill reads it).

Each fault is counted per source and logged once when it starts (and again only if its kind
changes) and once when it stops (ProblemLog with no repeat interval). Rejected /tf samples
(NaN, bad quaternion, ...) are not a source's fault: each kind is logged once per node
lifetime (Frames.new_problems) from ``report()``, which the node calls with its status.
"""
from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import ConstraintCtrlError
from ..frames.messages import stamp_to_ns
from ..problem_log import ProblemLog
from .frames import Frames, open_frames
from .inputs import InputMapping

#: Default of people.transform_timeout and inputs.<name>.transform_timeout (s): how much older
#: than a sample the newest transform data may be. robot_state_publisher sends /tf at 20 Hz by
#: default (50 ms apart); 0.1 s lets one sample go missing.
TRANSFORM_TIMEOUT = 0.1
#: Default of transforms.cache_time (s of /tf history per edge; tf2's default cache time).
CACHE_TIME = 10.0
#: The node parameters read here (at start-up).
PARAMETERS = ('people.transform_timeout', 'transforms.cache_time')

_NAN3 = np.full(3, np.nan)
_AXIS = {'x': 0, 'y': 1, 'z': 2}


class PointsInBase:
    """One per node; callbacks on any thread (the frames adapter and ProblemLog lock)."""

    def __init__(self, frames: Frames, base_frame: str, person_timeout_s: float,
                 log: Callable[[str, str], None]) -> None:
        self.frames = frames
        self.base_frame = base_frame
        self.person_timeout_s = person_timeout_s
        self._log = log
        # no repeat interval: once when a fault starts, once when it stops
        self.person_faults = ProblemLog(log, interval=math.inf)
        self.input_faults = ProblemLog(log, interval=math.inf)

    def person(self, source: str, msg: Any) -> np.ndarray:
        """The person's position in base_frame, or NaN (x3) when it cannot be known."""
        frame = msg.header.frame_id or self.base_frame
        p = msg.point
        if frame == self.base_frame:
            self.person_faults.ok(source, f'person positions usable in {self.base_frame!r} '
                                  'again')
            return np.array((p.x, p.y, p.z), dtype=float)
        stamp = msg.header.stamp
        got = self.frames.transform_point((p.x, p.y, p.z), frame, self.base_frame,
                                          stamp_to_ns(stamp.sec, stamp.nanosec),
                                          self.person_timeout_s)
        if not got:
            self.person_faults.problem(
                source, f'no transform {self.base_frame} <- {frame} ({got.kind}); the person '
                'counts as anywhere', got.message)
            return _NAN3
        self.person_faults.ok(source, f'person positions usable in {self.base_frame!r} again '
                              f'(transform {self.base_frame} <- {frame})')
        return got.xyz

    def input_value(self, mapping: InputMapping, msg: Any) -> float:
        """A PointStamped input's field after transforming the point into mapping.frame."""
        p = msg.point
        frame = msg.header.frame_id or mapping.frame
        source = f'input {mapping.name}'
        stamp = msg.header.stamp
        limit = mapping.transform_timeout
        got = self.frames.transform_point(
            (p.x, p.y, p.z), frame, mapping.frame, stamp_to_ns(stamp.sec, stamp.nanosec),
            self.person_timeout_s if limit is None else limit)
        if not got:
            self.input_faults.problem(source, f'no transform {mapping.frame} <- {frame} '
                                      f'({got.kind}); the input is unusable', got.message)
            return math.nan
        self.input_faults.ok(source, f'usable in {mapping.frame!r} again')
        return mapping.scale * float(got.xyz[_AXIS[mapping.field[-1]]])

    def close(self) -> None:
        """Release the frames adapter (its subscriptions and services), at cleanup."""
        self.frames.close()

    def report(self) -> dict[str, str]:
        """Log rejected /tf samples (each kind once); counts for ~/status."""
        for text in self.frames.new_problems():
            if text.startswith('rejected_'):
                self._log('warn', f'frames: {text} (logged once; counted in ~/status '
                          'frames_<kind>)')
        counts = dict(self.frames.counts)
        out = {f'frames_{k}': str(n) for k, n in sorted(counts.items())}
        out['person_transform_faults'] = str(self.person_faults.total)
        out['input_transform_faults'] = str(self.input_faults.total)
        return out


def _positive(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or \
            not math.isfinite(value) or value <= 0:
        msg = f'parameter {name} must be a number of seconds > 0, got {value!r}'
        raise ConstraintCtrlError(msg)
    return float(value)


def open_points_in_base(port: Any, declare: Callable[..., Any], base_frame: str,
                        subscribe: Callable[..., Any]) -> PointsInBase:
    """Declare people.transform_timeout and transforms.cache_time, open the frames adapter
    (tf2_ros on rclpy; /tf and /tf_static through ``subscribe(type, topic, callback, qos)``,
    the node's own, so the bag records them, on the DDS transport)."""
    timeout = _positive('people.transform_timeout', declare(
        'people.transform_timeout', TRANSFORM_TIMEOUT, 's: how much older than a person sample '
        'the newest transform data into base_frame may be', read_only=True).value)
    cache = _positive('transforms.cache_time', declare(
        'transforms.cache_time', CACHE_TIME, 's of /tf history kept per frame pair',
        read_only=True).value)
    frames = open_frames(port, cache_time_s=cache, max_age_s=timeout, subscribe=subscribe)
    return PointsInBase(frames, base_frame, timeout, port.log)


__all__ = ['CACHE_TIME', 'PARAMETERS', 'PointsInBase', 'TRANSFORM_TIMEOUT',
           'open_points_in_base']
