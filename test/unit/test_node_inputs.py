"""Skill inputs from ROS messages: parameter mapping, field extraction, capture time.

Outside references used by the checks (named again beside each one):
- the ROS 2 message definitions (ros2/common_interfaces): sensor_msgs/msg/Range (float32 range),
  geometry_msgs/msg/WrenchStamped (Header header, Wrench wrench; Wrench = Vector3 force, torque),
  geometry_msgs/msg/PointStamped (Header header, Point point), std_msgs/msg/Float64 (float64
  data, no header), builtin_interfaces/msg/Time (int32 sec, uint32 nanosec);
- IEEE 754 binary32 rounding (numpy.float32) for a float32 field after a CDR round trip;
- ROS convention that a zero header stamp means "not set" (from memory).
Messages are the real wire types (types_for('jazzy')), sent through CDR bytes and back.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from constraint_ctrl.errors import TransportError
from constraint_ctrl.nodes.inputs import (
    FUTURE_TOLERANCE, INPUT_TYPES, TYPE_ATTRIBUTE, InputMapping, capture_time, check_field,
    parse_input_mappings)
from constraint_ctrl.transport.dds_types import types_for

T = types_for('jazzy')
S = 1_000_000_000   # ns per s


def wire(msg: Any) -> Any:
    """The message as a subscriber gets it: serialized to CDR bytes and read back."""
    return type(msg).deserialize(msg.serialize())


def sample(ros_type: str) -> Any:
    return getattr(T, TYPE_ATTRIBUTE[ros_type])()


# --- parse_input_mappings ---------------------------------------------------------------------

@pytest.mark.parametrize(('ros_type', 'field'), [
    ('sensor_msgs/msg/Range', ('range',)),
    ('geometry_msgs/msg/WrenchStamped', ('wrench', 'force', 'z')),
    ('geometry_msgs/msg/PointStamped', ('point', 'z')),
    ('std_msgs/msg/Float64', ('data',)),
])
def test_default_field_per_type_is_a_number_field_of_that_message(ros_type: str,
                                                                  field: tuple[str, ...]) -> None:
    mappings = parse_input_mappings({'probe.topic': '/probe', 'probe.type': ros_type})
    mapping = mappings['probe']
    assert mapping == InputMapping(name='probe', topic='/probe', ros_type=ros_type,
                                   field=field, scale=1.0)
    check_field(mapping, sample(ros_type))   # the field exists in the message definition
    # Only std_msgs/Float64 lacks a header in its definition.
    assert mapping.has_header is (ros_type != 'std_msgs/msg/Float64')


def test_type_defaults_to_float64_and_several_inputs_parse() -> None:
    mappings = parse_input_mappings({
        'depth.topic': '/depth',
        'tool_force_z.topic': '/wrist/wrench',
        'tool_force_z.type': 'geometry_msgs/msg/WrenchStamped',
        'tool_force_z.field': 'wrench.torque.x',
        'tool_force_z.scale': -2,
    })
    assert sorted(mappings) == ['depth', 'tool_force_z']
    assert mappings['depth'].ros_type == 'std_msgs/msg/Float64'
    assert mappings['depth'].field == ('data',)
    force = mappings['tool_force_z']
    assert force.field == ('wrench', 'torque', 'x')
    assert force.scale == -2.0 and type(force.scale) is float
    assert parse_input_mappings({}) == {}


@pytest.mark.parametrize(('params', 'pattern'), [
    ({'range_left': '/x'}, r'parameter inputs\.range_left: expected inputs\.<input>\.'),
    ({'range_left.topic': '/x', 'range_left.rate': 10},
     r"parameter inputs\.range_left: unknown keys \['rate'\]"),
    ({'range_left.type': 'sensor_msgs/msg/Range'}, r'parameter inputs\.range_left\.topic is '
                                                   r'missing'),
    ({'range_left.topic': '/x', 'range_left.type': 'sensor_msgs/msg/Imu'},
     r"parameter inputs\.range_left\.type: 'sensor_msgs/msg/Imu' is not supported; use one of "
     r'sensor_msgs/msg/Range, '),
    ({'range_left.topic': '/x', 'range_left.scale': True},
     r'parameter inputs\.range_left\.scale: expected a finite number, got True'),
    ({'range_left.topic': '/x', 'range_left.scale': float('nan')},
     r'inputs\.range_left\.scale: expected a finite number, got nan'),
    ({'range_left.topic': '/x', 'range_left.scale': float('-inf')},
     r'inputs\.range_left\.scale: expected a finite number, got -inf'),
    ({'range_left.topic': '/x', 'range_left.scale': '0.001'},
     r"inputs\.range_left\.scale: expected a finite number, got '0\.001'"),
])
def test_bad_parameters_name_the_parameter(params: dict[str, Any], pattern: str) -> None:
    with pytest.raises(TransportError, match=pattern):
        parse_input_mappings(params)


def test_every_supported_type_has_a_wire_type() -> None:
    for ros_type in INPUT_TYPES:
        msg = sample(ros_type)
        # Reference: the DDS type name rule pkg::msg::dds_::Name_ of rmw_cyclonedds.
        package, _, name = ros_type.split('/')
        assert type(msg).__idl_typename__.replace('.', '::') == f'{package}::msg::dds_::{name}_'


# --- extract and check_field ------------------------------------------------------------------

def test_range_value_after_the_wire_is_the_float32_value() -> None:
    mapping = parse_input_mappings({'range_left.topic': '/l',
                                    'range_left.type': 'sensor_msgs/msg/Range'})['range_left']
    msg = wire(T.Range(range=0.42, min_range=0.02, max_range=2.0))
    # IEEE 754 binary32: 0.42 is stored as 0.4199999868869781...
    assert mapping.extract(msg) == float(np.float32(0.42))
    assert mapping.extract(msg) != 0.42


def test_wrench_nested_field_with_scale() -> None:
    mapping = parse_input_mappings({
        'push.topic': '/wrist/wrench', 'push.type': 'geometry_msgs/msg/WrenchStamped',
        'push.field': 'wrench.force.y', 'push.scale': -0.5})['push']
    msg = wire(T.WrenchStamped(wrench=T.Wrench(force=T.Vector3(x=1.0, y=12.0, z=-3.0),
                                                  torque=T.Vector3(y=99.0))))
    assert mapping.extract(msg) == -6.0          # -0.5 * 12.0, exact in binary64


def test_point_and_float64_fields() -> None:
    point = parse_input_mappings({'h.topic': '/p', 'h.type': 'geometry_msgs/msg/PointStamped',
                                  'h.field': 'point.y'})['h']
    assert point.extract(wire(T.PointStamped(point=T.Point(x=1.0, y=-0.125, z=3.0)))) == -0.125
    millimetres = parse_input_mappings({'d.topic': '/d', 'd.scale': 0.001})['d']
    # 250 mm -> 0.25 m; the product is rounded once in binary64.
    assert millimetres.extract(wire(T.Float64(data=250.0))) == pytest.approx(0.25, rel=1e-15)


@pytest.mark.parametrize(('ros_type', 'field', 'reason'), [
    ('geometry_msgs/msg/WrenchStamped', 'wrench.force', 'a struct, not a number'),
    ('geometry_msgs/msg/WrenchStamped', 'wrench.force.w', 'Vector3 has x, y, z only'),
    ('sensor_msgs/msg/Range', 'rnage', 'a misspelt field'),
    ('sensor_msgs/msg/Range', 'header.frame_id', 'a string field'),
    ('geometry_msgs/msg/PointStamped', 'header', 'a struct'),
    ('std_msgs/msg/Float64', '', 'an empty path'),
])
def test_check_field_refuses_paths_that_are_not_number_fields(ros_type: str, field: str,
                                                             reason: str) -> None:
    mapping = parse_input_mappings({'x.topic': '/t', 'x.type': ros_type, 'x.field': field})['x']
    with pytest.raises(TransportError) as info:
        check_field(mapping, sample(ros_type))
    assert str(info.value).startswith(
        f"parameter inputs.x.field: {field!r} is not a number field of {ros_type} ("), reason


def test_check_field_accepts_integer_stamp_fields() -> None:
    # builtin_interfaces/Time: int32 sec is a number, so a stamp can be an input.
    mapping = parse_input_mappings({'s.topic': '/t', 's.type': 'sensor_msgs/msg/Range',
                                    's.field': 'header.stamp.sec'})['s']
    check_field(mapping, sample('sensor_msgs/msg/Range'))
    assert mapping.extract(wire(T.Range(header=T.Header(stamp=T.Time(sec=17))))) == 17.0


# --- capture_time --------------------------------------------------------------------------------

RECV_ROS = 1_700_000_000 * S + 500_000_000   # receive time on the ROS clock (ns)
RECV_MONO = 5_000.0                          # the same instant on the monotonic clock (s)


def stamp_of(ns: int) -> tuple[int, int]:
    """builtin_interfaces/Time of a time in ns: sec, and nanosec in [0, 1e9)."""
    return ns // S, ns % S


def test_stamp_in_the_past_moves_the_capture_time_back_by_the_age() -> None:
    sec, nanosec = stamp_of(RECV_ROS - 250_000_000)         # captured 0.25 s before arrival
    assert (sec, nanosec) == (1_700_000_000, 250_000_000)
    assert capture_time(sec, nanosec, RECV_ROS, RECV_MONO) == pytest.approx(4_999.75, abs=1e-9)


def test_age_uses_both_sec_and_nanosec() -> None:
    # sec = 1_699_999_998, nanosec = 900_000_000 -> age = 1_700_000_000.5 - 1_699_999_998.9 = 1.6
    assert capture_time(1_699_999_998, 900_000_000, RECV_ROS, RECV_MONO) == \
        pytest.approx(RECV_MONO - 1.6, abs=1e-9)


def test_unset_stamp_uses_the_receive_time() -> None:
    assert capture_time(0, 0, RECV_ROS, RECV_MONO) == RECV_MONO


@pytest.mark.parametrize('ahead_ns', [6_000_000, 250_000_000, 3_600 * S])
def test_stamp_more_than_5_ms_ahead_uses_the_receive_time(ahead_ns: int) -> None:
    assert FUTURE_TOLERANCE == 0.005
    sec, nanosec = stamp_of(RECV_ROS + ahead_ns)
    assert capture_time(sec, nanosec, RECV_ROS, RECV_MONO) == RECV_MONO


@pytest.mark.parametrize('ahead_ns', [1, 3_000_000, 5_000_000])
def test_stamp_slightly_ahead_is_clock_skew_and_counts_as_now(ahead_ns: int) -> None:
    # Within the tolerance a stamp is trusted, but a sample cannot be captured after it arrived.
    sec, nanosec = stamp_of(RECV_ROS + ahead_ns)
    assert capture_time(sec, nanosec, RECV_ROS, RECV_MONO) == RECV_MONO


def test_capture_time_from_a_received_message_header() -> None:
    # The stamp as the node reads it from a message that went over the wire.
    sec, nanosec = stamp_of(RECV_ROS - 40_000_000)
    msg = wire(T.WrenchStamped(header=T.Header(stamp=T.Time(sec=sec, nanosec=nanosec))))
    got = capture_time(msg.header.stamp.sec, msg.header.stamp.nanosec, RECV_ROS, RECV_MONO)
    assert got == pytest.approx(RECV_MONO - 0.040, abs=1e-9)
