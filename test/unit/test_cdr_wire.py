"""The DDS port's message and service structs serialise exactly like ROS 2's CDR.

Outside reference: rosbags' ROS 2 CDR serialiser (PyPI `rosbags`, `get_typestore(Stores.
ROS2_JAZZY / ROS2_HUMBLE).serialize_cdr`), whose type stores carry the .msg definitions of each
distro. Service definitions are not in those stores; they are registered below from the .srv
texts of ros2/common_interfaces (std_srvs) and ros2/rcl_interfaces, copied field for field.

Padding: cyclonedds-python's DataWriter pads every sample to a multiple of 4 bytes with zeros
(cyclonedds/pub.py `write`), so what goes on the wire is compared after padding both byte
strings to a multiple of 4; the unpadded `serialize()` output must additionally be a prefix of,
or equal to, rosbags' bytes padded the same way.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from rosbags.interfaces import Nodetype
from rosbags.typesys import Stores, get_types_from_msg, get_typestore

from constraint_ctrl.transport.dds_types import types_for

_DTYPES = {'bool': np.bool_, 'byte': np.uint8, 'char': np.uint8, 'uint8': np.uint8,
           'int8': np.int8, 'uint16': np.uint16, 'int16': np.int16, 'uint32': np.uint32,
           'int32': np.int32, 'uint64': np.uint64, 'int64': np.int64, 'float32': np.float32,
           'float64': np.float64}

# .srv request/response bodies (ros2/common_interfaces std_srvs, ros2/rcl_interfaces srv, same
# on Humble and Jazzy), registered as message types so rosbags can serialise them.
SRV_DEFINITIONS = {
    'std_srvs/msg/Trigger_Request': '',
    'std_srvs/msg/Trigger_Response': 'bool success\nstring message',
    'std_srvs/msg/SetBool_Request': 'bool data',
    'std_srvs/msg/SetBool_Response': 'bool success\nstring message',
    'rcl_interfaces/msg/SetParameters_Request': 'Parameter[] parameters',
    'rcl_interfaces/msg/SetParameters_Response': 'SetParametersResult[] results',
    'rcl_interfaces/msg/SetParametersAtomically_Request': 'Parameter[] parameters',
    'rcl_interfaces/msg/SetParametersAtomically_Response': 'SetParametersResult result',
    'rcl_interfaces/msg/GetParameters_Request': 'string[] names',
    'rcl_interfaces/msg/GetParameters_Response': 'ParameterValue[] values',
    'rcl_interfaces/msg/GetParameterTypes_Request': 'string[] names',
    'rcl_interfaces/msg/GetParameterTypes_Response': 'uint8[] types',
    'rcl_interfaces/msg/ListParameters_Request':
        'uint64 DEPTH_RECURSIVE=0\nstring[] prefixes\nuint64 depth',
    'rcl_interfaces/msg/ListParameters_Response': 'ListParametersResult result',
    'rcl_interfaces/msg/DescribeParameters_Request': 'string[] names',
    'rcl_interfaces/msg/DescribeParameters_Response': 'ParameterDescriptor[] descriptors',
}


def _store(distro: str) -> Any:
    store = get_typestore(Stores.ROS2_JAZZY if distro == 'jazzy' else Stores.ROS2_HUMBLE)
    for name, text in SRV_DEFINITIONS.items():
        store.register(get_types_from_msg(text, name))
    return store


STORES = {'jazzy': _store('jazzy'), 'humble': _store('humble')}


def to_rosbags(obj: Any, msgtype: str, store: Any) -> Any:
    """Rebuild our struct as rosbags' message, field by field in rosbags' declared order."""
    kwargs = {}
    for name, (kind, detail) in store.fielddefs[msgtype][1]:
        kwargs[name] = _convert(getattr(obj, name), kind, detail, store)
    return store.types[msgtype](**kwargs)


def _convert(value: Any, kind: int, detail: Any, store: Any) -> Any:
    if kind == Nodetype.BASE:
        return value
    if kind == Nodetype.NAME:
        return to_rosbags(value, detail, store)
    (sub_kind, sub_detail), _ = detail
    if sub_kind == Nodetype.BASE and sub_detail[0] != 'string':
        return np.array(list(value), dtype=_DTYPES[sub_detail[0]])
    return [_convert(v, sub_kind, sub_detail, store) for v in value]


def _pad4(data: bytes) -> bytes:
    return data.ljust(-(-len(data) // 4) * 4, b'\0')


def assert_same_cdr(ours: Any, msgtype: str, distro: str) -> bytes:
    """Byte equality with rosbags (after the DataWriter's 4-byte padding) and round trips."""
    store = STORES[distro]
    mine = bytes(ours.serialize())
    theirs = bytes(store.serialize_cdr(to_rosbags(ours, msgtype, store), msgtype))
    assert _pad4(mine) == _pad4(theirs), msgtype
    assert _pad4(theirs).startswith(mine), msgtype
    assert type(ours).deserialize(mine) == ours          # our own round trip
    assert type(ours).deserialize(theirs) == ours        # we read what ROS writes
    return mine


def _stamp(t: Any, sec: int = 1_700_000_000, nanosec: int = 123_456_789) -> Any:
    return t.Header(stamp=t.Time(sec=sec, nanosec=nanosec), frame_id='base_link')


def message_samples(t: Any) -> dict[str, Any]:
    """One sample per message type, odd string lengths to exercise alignment padding."""
    pv = t.ParameterValue(type=8, bool_value=True, integer_value=-7, double_value=2.5,
                          string_value='é', byte_array_value=[1, 255],
                          bool_array_value=[True, False, True], integer_array_value=[-1, 2**40],
                          double_array_value=[0.1, -3.0], string_array_value=['a', 'bcd'])
    status = t.DiagnosticStatus(level=2, name='ctrl', message='joint limit', hardware_id='arm',
                                values=[t.KeyValue(key='k', value='vv')])
    return {
        'builtin_interfaces/msg/Time': t.Time(sec=-3, nanosec=999_999_999),
        'std_msgs/msg/Header': _stamp(t),
        'std_msgs/msg/Float64': t.Float64(data=-1.25e-3),
        'std_msgs/msg/String': t.String(data='skill: pick'),
        'std_msgs/msg/Bool': t.Bool(data=True),
        'std_msgs/msg/MultiArrayDimension': t.MultiArrayDimension(label='joints', size=6,
                                                                  stride=6),
        'std_msgs/msg/MultiArrayLayout': t.MultiArrayLayout(
            dim=[t.MultiArrayDimension(label='j', size=2, stride=2)], data_offset=1),
        'std_msgs/msg/Float64MultiArray': t.Float64MultiArray(
            layout=t.MultiArrayLayout(dim=[t.MultiArrayDimension(label='joints', size=3,
                                                                 stride=3)]),
            data=[0.1, -0.2, 0.3]),
        'sensor_msgs/msg/JointState': t.JointState(
            header=_stamp(t), name=['joint_1', 'joint_22', 'j3'], position=[0.0, 1.5, -2.0],
            velocity=[0.1, 0.2, 0.3], effort=[]),
        'geometry_msgs/msg/Vector3': t.Vector3(x=1.0, y=-2.0, z=3.5),
        'geometry_msgs/msg/Point': t.Point(x=0.5, y=0.25, z=-0.125),
        'geometry_msgs/msg/PointStamped': t.PointStamped(header=_stamp(t),
                                                         point=t.Point(x=1.0, y=2.0, z=3.0)),
        'geometry_msgs/msg/Wrench': t.Wrench(force=t.Vector3(x=1.0), torque=t.Vector3(z=-1.0)),
        'geometry_msgs/msg/WrenchStamped': t.WrenchStamped(
            header=_stamp(t), wrench=t.Wrench(force=t.Vector3(x=1.0, y=2.0, z=3.0),
                                              torque=t.Vector3(x=-0.1, y=-0.2, z=-0.3))),
        'diagnostic_msgs/msg/KeyValue': t.KeyValue(key='state', value='running'),
        'diagnostic_msgs/msg/DiagnosticStatus': status,
        'diagnostic_msgs/msg/DiagnosticArray': t.DiagnosticArray(header=_stamp(t),
                                                                 status=[status, status]),
        'rcl_interfaces/msg/ParameterValue': pv,
        'rcl_interfaces/msg/Parameter': t.Parameter(name='gain', value=pv),
        'rcl_interfaces/msg/FloatingPointRange': t.FloatingPointRange(from_value=-1.0,
                                                                      to_value=1.0, step=0.5),
        'rcl_interfaces/msg/IntegerRange': t.IntegerRange(from_value=-5, to_value=5, step=1),
        'rcl_interfaces/msg/ParameterDescriptor': t.ParameterDescriptor(
            name='rate', type=3, description='tick rate', additional_constraints='> 0',
            read_only=True, dynamic_typing=False,
            floating_point_range=[t.FloatingPointRange(from_value=1.0, to_value=1e3, step=0.0)],
            integer_range=[]),
        'rcl_interfaces/msg/SetParametersResult': t.SetParametersResult(successful=False,
                                                                        reason='rate <= 0'),
        'rcl_interfaces/msg/ListParametersResult': t.ListParametersResult(
            names=['a.b', 'c'], prefixes=['a']),
        'rcl_interfaces/msg/ParameterEvent': t.ParameterEvent(
            stamp=t.Time(sec=5, nanosec=6), node='/robot/ctrl',
            new_parameters=[t.Parameter(name='x', value=pv)], changed_parameters=[],
            deleted_parameters=[t.Parameter(name='y')]),
    }


@pytest.mark.parametrize('distro', ['jazzy', 'humble'])
def test_every_message_type_matches_rosbags(distro: str) -> None:
    """All plain messages, both distros, byte for byte against rosbags (source: rosbags)."""
    samples = message_samples(types_for(distro))
    for msgtype, sample in samples.items():
        assert_same_cdr(sample, msgtype, distro)
    assert len(samples) == 25


def test_range_layout_differs_between_humble_and_jazzy() -> None:
    """sensor_msgs/Range gained `variance` after Humble (rosbags' Humble/Jazzy stores)."""
    # float32 fields: values exactly representable in float32 so round trips compare equal
    values = dict(header=_stamp(types_for('jazzy')), radiation_type=1, field_of_view=0.25,
                  min_range=0.015625, max_range=4.0, range=-math.inf)
    jazzy = types_for('jazzy').Range(**values, variance=0.0078125)
    humble_types = types_for('humble')
    humble = humble_types.Range(**{**values, 'header': _stamp(humble_types)})
    jazzy_bytes = assert_same_cdr(jazzy, 'sensor_msgs/msg/Range', 'jazzy')
    humble_bytes = assert_same_cdr(humble, 'sensor_msgs/msg/Range', 'humble')
    assert len(jazzy_bytes) == len(humble_bytes) + 4   # one float32 more
    assert not hasattr(humble, 'variance')
    assert types_for('jazzy').Range.INFRARED == 1 and types_for('humble').Range.ULTRASOUND == 0


@pytest.mark.parametrize(('distro', 'size'), [('jazzy', 16), ('humble', 24)])
def test_participant_entities_info_gid_size(distro: str, size: int) -> None:
    """rmw_dds_common Gid is char[16] from Iron on, char[24] on Humble (rosbags' stores)."""
    t = types_for(distro)
    guid = bytes(range(1, 17))
    gid = t.Gid(data=guid.ljust(size, b'\0'))
    info = t.ParticipantEntitiesInfo(gid=gid, node_entities_info_seq=[t.NodeEntitiesInfo(
        node_namespace='/robot', node_name='constraint_ctrl', reader_gid_seq=[gid, gid],
        writer_gid_seq=[gid])])
    data = assert_same_cdr(info, 'rmw_dds_common/msg/ParticipantEntitiesInfo', distro)
    assert data[4:4 + size] == guid.ljust(size, b'\0')   # the Gid opens the body
    assert len(t.Gid().data) == size


# Worked example of ros2-interop.md section 2.1 (rmw_cyclonedds request framing, little endian,
# guid = 0x1122334455667788, seq = 1).
GUID = 0x1122334455667788
HEADER = bytes.fromhex('8877665544332211' '0100000000000000')


def test_setbool_request_and_reply_match_worked_example() -> None:
    """Full bytes of the worked example in ros2-interop.md 2.1 (source: that section)."""
    t = types_for('jazzy')
    request = t.SetBool.RequestWire(guid=GUID, seq=1, body=t.SetBool.Request(data=True))
    assert bytes(request.serialize()) == bytes.fromhex('00010000') + HEADER + b'\x01'
    reply = t.SetBool.ResponseWire(guid=GUID, seq=1,
                                   body=t.SetBool.Response(success=True, message='ok'))
    assert bytes(reply.serialize()) == (bytes.fromhex('00010000') + HEADER
                                        + bytes.fromhex('01000000' '03000000' '6f6b00'))


def service_samples(t: Any) -> dict[str, tuple[Any, Any, Any]]:
    p = t.Parameter(name='rate', value=t.ParameterValue(type=3, double_value=50.0))
    r = t.SetParametersResult(successful=False, reason='odd')
    return {
        'std_srvs/msg/Trigger': (t.Trigger, t.Trigger.Request(),
                                 t.Trigger.Response(success=True, message='done')),
        'std_srvs/msg/SetBool': (t.SetBool, t.SetBool.Request(data=True),
                                 t.SetBool.Response(success=False, message='no')),
        'rcl_interfaces/msg/SetParameters': (
            t.SetParameters, t.SetParameters.Request(parameters=[p, p]),
            t.SetParameters.Response(results=[r, t.SetParametersResult(successful=True)])),
        'rcl_interfaces/msg/SetParametersAtomically': (
            t.SetParametersAtomically, t.SetParametersAtomically.Request(parameters=[p]),
            t.SetParametersAtomically.Response(result=r)),
        'rcl_interfaces/msg/GetParameters': (
            t.GetParameters, t.GetParameters.Request(names=['rate', 'gain']),
            t.GetParameters.Response(values=[p.value, t.ParameterValue(type=4,
                                                                      string_value='x')])),
        'rcl_interfaces/msg/GetParameterTypes': (
            t.GetParameterTypes, t.GetParameterTypes.Request(names=['rate']),
            t.GetParameterTypes.Response(types=[3, 9])),
        'rcl_interfaces/msg/ListParameters': (
            t.ListParameters, t.ListParameters.Request(prefixes=['inputs'], depth=2),
            t.ListParameters.Response(result=t.ListParametersResult(names=['inputs.a'],
                                                                    prefixes=['inputs']))),
        'rcl_interfaces/msg/DescribeParameters': (
            t.DescribeParameters, t.DescribeParameters.Request(names=['rate']),
            t.DescribeParameters.Response(descriptors=[t.ParameterDescriptor(
                name='rate', type=3, description='Hz', read_only=True)])),
    }


@pytest.mark.parametrize('distro', ['jazzy', 'humble'])
def test_service_bodies_follow_the_16_byte_header(distro: str) -> None:
    """Wire = 4-byte encapsulation + guid/seq (ros2-interop.md 2.1) + the plain struct (rosbags)."""
    t = types_for(distro)
    for base, (srv, request, response) in service_samples(t).items():
        for suffix, body, wire_cls in (('_Request', request, srv.RequestWire),
                                       ('_Response', response, srv.ResponseWire)):
            plain = assert_same_cdr(body, base + suffix, distro)
            wire = wire_cls(guid=GUID, seq=1, body=body)
            data = bytes(wire.serialize())
            assert data[:4] == plain[:4] == bytes.fromhex('00010000')
            assert data[4:20] == HEADER
            assert data[20:] == plain[4:]
            assert wire_cls.deserialize(data) == wire


def test_trigger_request_is_header_plus_one_byte() -> None:
    """Empty ROS structs carry `uint8 structure_needs_at_least_one_member` (ros2-interop.md 2.1)."""
    t = types_for('jazzy')
    data = bytes(t.Trigger.RequestWire(guid=GUID, seq=1).serialize())
    assert data == bytes.fromhex('00010000') + HEADER + b'\x00'
    rosbags_bytes = bytes(STORES['jazzy'].serialize_cdr(
        to_rosbags(t.Trigger.Request(), 'std_srvs/msg/Trigger_Request', STORES['jazzy']),
        'std_srvs/msg/Trigger_Request'))
    assert rosbags_bytes == bytes.fromhex('00010000') + b'\x00'


def test_dds_type_names_follow_rmw_cyclonedds_mangling() -> None:
    """`pkg::msg::dds_::Name_` and `pkg::srv::dds_::Name_Request_` (ros2-interop.md 1.3)."""
    t = types_for('jazzy')
    assert t.JointState.__idl_typename__ == 'sensor_msgs::msg::dds_::JointState_'
    assert t.Range.__idl_typename__ == 'sensor_msgs::msg::dds_::Range_'
    assert t.ParticipantEntitiesInfo.__idl_typename__ == \
        'rmw_dds_common::msg::dds_::ParticipantEntitiesInfo_'
    assert t.SetBool.RequestWire.__idl_typename__ == 'std_srvs::srv::dds_::SetBool_Request_'
    assert t.SetParameters.ResponseWire.__idl_typename__ == \
        'rcl_interfaces::srv::dds_::SetParameters_Response_'
