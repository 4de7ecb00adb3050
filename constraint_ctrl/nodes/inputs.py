"""Turning ROS messages into the controller's snapshot: skill inputs, joint states, stamps.

A skill input is one scalar taken from one field of a message on one topic, mapped in the node's
parameters file:

    inputs:
      range_left: {topic: /tool/range_left, type: sensor_msgs/msg/Range, field: range}
      tool_force_z: {topic: /wrist/wrench, type: geometry_msgs/msg/WrenchStamped,
                     field: wrench.force.z, scale: 1.0}

Joint states: each sample is checked whole before any of it is used (``joint_sample_problem``):
more names than MAX_JOINT_NAMES, a name/position length mismatch, duplicate names or a
non-finite position reject the whole sample.

Stamps: a message's header stamp (ROS time) is turned into the controller's monotonic clock by
its age at arrival, so staleness is judged from capture time, not receive time; a stamp from the
future (clock skew beyond FUTURE_TOLERANCE) or an unset stamp falls back to the receive time.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from ..errors import TransportError

#: Message types a skill input can come from, with their default field.
INPUT_TYPES: dict[str, str] = {
    'sensor_msgs/msg/Range': 'range',
    'geometry_msgs/msg/WrenchStamped': 'wrench.force.z',
    'geometry_msgs/msg/PointStamped': 'point.z',
    'std_msgs/msg/Float64': 'data',
}
#: Port type attribute for each supported ROS type.
TYPE_ATTRIBUTE = {
    'sensor_msgs/msg/Range': 'Range',
    'geometry_msgs/msg/WrenchStamped': 'WrenchStamped',
    'geometry_msgs/msg/PointStamped': 'PointStamped',
    'std_msgs/msg/Float64': 'Float64',
}
#: Keys of one input's mapping (inputs.<input>.<key>).
MAPPING_KEYS = ('topic', 'type', 'field', 'scale', 'frame', 'transform_timeout')
POINT_TYPE = 'geometry_msgs/msg/PointStamped'
POINT_FIELDS = ('point.x', 'point.y', 'point.z')
#: How far in the future (s) a header stamp may be before it is not trusted.
FUTURE_TOLERANCE = 0.005
#: Most names a joint_states sample may carry; a larger one is rejected before any per-name
#: work (a real robot has tens of joints; 10,000 bounds the work a hostile sample can cause).
MAX_JOINT_NAMES = 10_000
#: The kinds of joint_states samples that are rejected whole.
JOINT_SAMPLE_PROBLEMS = ('too many names', 'length mismatch', 'duplicate names',
                         'non-finite position')


@dataclass(frozen=True, slots=True)
class InputMapping:
    """Where one skill input comes from."""

    name: str
    topic: str
    ros_type: str
    field: tuple[str, ...]
    scale: float = 1.0
    #: PointStamped only: frame the point is transformed into before ``field`` is taken
    #: ('' = the field as received); see nodes/points_in_base.py
    frame: str = ''
    #: s: how much older than the sample the transform data may be (None: the node's
    #: people.transform_timeout)
    transform_timeout: float | None = None

    def extract(self, msg: Any) -> float:
        value = msg
        for part in self.field:
            value = getattr(value, part)
        return self.scale * float(value)

    @property
    def has_header(self) -> bool:
        return self.ros_type != 'std_msgs/msg/Float64'


def parse_input_mappings(params: dict[str, Any]) -> dict[str, InputMapping]:
    """From flattened parameters {'range_left.topic': ..., ...} (prefix 'inputs.' removed)."""
    grouped: dict[str, dict[str, Any]] = {}
    for key, value in params.items():
        name, _, attr = key.partition('.')
        if not attr:
            msg = (f'parameter inputs.{key}: expected inputs.<input>.<key> with a key of '
                   f'{", ".join(MAPPING_KEYS)}')
            raise TransportError(msg)
        grouped.setdefault(name, {})[attr] = value
    out = {}
    for name, attrs in grouped.items():
        unknown = sorted(set(attrs) - set(MAPPING_KEYS))
        if unknown:
            msg = (f'parameter inputs.{name}: unknown keys {unknown} '
                   f'({", ".join(MAPPING_KEYS)})')
            raise TransportError(msg)
        if 'topic' not in attrs:
            msg = f'parameter inputs.{name}.topic is missing'
            raise TransportError(msg)
        ros_type = str(attrs.get('type', 'std_msgs/msg/Float64'))
        if ros_type not in INPUT_TYPES:
            msg = (f'parameter inputs.{name}.type: {ros_type!r} is not supported; use one of '
                   f'{", ".join(INPUT_TYPES)}')
            raise TransportError(msg)
        field = str(attrs.get('field', INPUT_TYPES[ros_type]))
        scale = attrs.get('scale', 1.0)
        if isinstance(scale, bool) or not isinstance(scale, (int, float)) or \
                not math.isfinite(scale):
            msg = f'parameter inputs.{name}.scale: expected a finite number, got {scale!r}'
            raise TransportError(msg)
        frame = str(attrs.get('frame', ''))
        if frame and ros_type != POINT_TYPE:
            msg = (f'parameter inputs.{name}.frame: only a {POINT_TYPE} input can be '
                   f'transformed into a frame; its type is {ros_type}')
            raise TransportError(msg)
        if frame and field not in POINT_FIELDS:
            msg = (f'parameter inputs.{name}.field: with frame set, the field must be '
                   f'point.x, point.y or point.z, got {field!r}')
            raise TransportError(msg)
        timeout = attrs.get('transform_timeout')
        if timeout is not None and (isinstance(timeout, bool) or
                                    not isinstance(timeout, (int, float)) or
                                    not math.isfinite(timeout) or timeout <= 0):
            msg = (f'parameter inputs.{name}.transform_timeout: expected a number of seconds '
                   f'> 0, got {timeout!r}')
            raise TransportError(msg)
        out[name] = InputMapping(name=name, topic=str(attrs['topic']), ros_type=ros_type,
                                 field=tuple(field.split('.')), scale=float(scale),
                                 frame=frame,
                                 transform_timeout=None if timeout is None else float(timeout))
    return out


def check_field(mapping: InputMapping, sample: Any) -> None:
    """Fail at start-up, not at the first message, when a field path does not exist."""
    try:
        mapping.extract(sample)
    except (AttributeError, TypeError, ValueError) as err:
        msg = (f'parameter inputs.{mapping.name}.field: {".".join(mapping.field)!r} is not a '
               f'number field of {mapping.ros_type} ({err})')
        raise TransportError(msg) from None


def joint_sample_problem(names: Sequence[str], positions: Sequence[float], *,
                         names_checked: bool = False) -> tuple[str, str] | None:
    """(kind, detail) of the reason a joint_states sample must be rejected whole, or None.

    ``kind`` is one of JOINT_SAMPLE_PROBLEMS (stable, for counting and logging once); ``detail``
    names the values. The checks are ordered by cost and the size bound comes first, so a huge
    sample costs O(1) here. ``names_checked``: this exact name list passed before (no
    duplicates), so only lengths and values are checked. Velocity and effort are not read by
    the controller and not checked.
    """
    n = len(names)
    if n > MAX_JOINT_NAMES:
        return 'too many names', f'{n} joint names, more than the {MAX_JOINT_NAMES} accepted'
    if len(positions) != n:
        return 'length mismatch', f'{n} joint names but {len(positions)} positions'
    if not names_checked and len(set(names)) != n:
        seen: set[str] = set()
        dups = sorted({x for x in names if x in seen or seen.add(x)})  # type: ignore[func-returns-value]
        return 'duplicate names', f'duplicate joint names {dups[:5]}'
    # one sum is finite for finite values (it overflows only beyond ~1e308: then look closer)
    if not math.isfinite(sum(positions)) and \
            not all(map(math.isfinite, positions)):
        bad = next(i for i, v in enumerate(positions) if not math.isfinite(v))
        return 'non-finite position', f'position of {names[bad]!r} is {positions[bad]!r}'
    return None


def capture_time(stamp_sec: int, stamp_nanosec: int, recv_ros_ns: int, recv_mono: float) -> float:
    """The sample's capture time on the monotonic clock (s), from its header stamp."""
    stamp_ns = int(stamp_sec) * 1_000_000_000 + int(stamp_nanosec)
    if stamp_ns <= 0:
        return recv_mono
    age = (recv_ros_ns - stamp_ns) * 1e-9
    if age < -FUTURE_TOLERANCE:
        return recv_mono
    return recv_mono - max(age, 0.0)


__all__ = ['INPUT_TYPES', 'InputMapping', 'JOINT_SAMPLE_PROBLEMS', 'MAX_JOINT_NAMES',
           'TYPE_ATTRIBUTE', 'capture_time', 'check_field', 'joint_sample_problem',
           'parse_input_mappings']
