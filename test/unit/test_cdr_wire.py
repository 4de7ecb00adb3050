"""The DDS port's message and service types serialise exactly like ROS 2's CDR.

Outside reference: rosbags' ROS 2 CDR serialiser (see cdr_reference.py). Every type the port
offers is checked on both distros against it, byte for byte, for the port's own codec
(cdr.py, what goes on the wire) and for cyclonedds-python's generic serialiser of the generated
struct (what describes the type to DDS; cyclonedds-python's DataWriter pads samples to a
multiple of 4 bytes with zeros, cyclonedds/pub.py `write`, so those bytes are compared after
that padding). Decoding is checked on rosbags' little- and big-endian bytes.
"""
from __future__ import annotations

import math
from typing import Any

import pytest
from cdr_reference import STORES, plain, reference_name, rosbags_bytes, to_rosbags

from constraint_ctrl.transport.dds_types import MESSAGES, SERVICES, codec_of, types_for


def _pad4(data: bytes) -> bytes:
    return data.ljust(-(-len(data) // 4) * 4, b'\0')


def assert_same_cdr(ours: Any, msgtype: str, distro: str) -> bytes:
    """Byte equality with rosbags for our codec and cyclonedds' serialiser; decoding both
    byte orders of rosbags' bytes gives the message back."""
    assert reference_name(type(ours)) == msgtype.replace('/srv/', '/msg/')
    codec = codec_of(type(ours))
    mine = codec.encode(ours)
    theirs = rosbags_bytes(ours, distro)
    assert mine == theirs, msgtype
    assert _pad4(bytes(ours.serialize())) == _pad4(theirs), msgtype      # the IDL struct
    assert plain(codec.decode(mine)) == plain(ours)
    assert plain(codec.decode(rosbags_bytes(ours, distro, little_endian=False))) == plain(ours)
    assert plain(type(ours).deserialize(theirs)) == plain(ours)        # cyclonedds agrees
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
        **more_samples(t),
    }


def more_samples(t: Any) -> dict[str, Any]:
    """Types added for lifecycle, tf, markers, /rosout and /clock."""
    rotation = t.Quaternion(x=0.0, y=0.0, z=math.sqrt(0.5), w=math.sqrt(0.5))
    transform = t.TransformStamped(header=_stamp(t), child_frame_id='camera',
                                   transform=t.Transform(translation=t.Vector3(x=0.1, z=1.2),
                                                         rotation=rotation))
    marker = t.Marker(header=_stamp(t), ns='people', id=7, type=t.Marker.SPHERE,
                      action=t.Marker.ADD,
                      pose=t.Pose(position=t.Point(x=1.0, y=-0.5), orientation=rotation),
                      scale=t.Vector3(x=0.2, y=0.2, z=0.2),
                      color=t.ColorRGBA(r=1.0, g=0.5, b=0.0, a=0.75),
                      lifetime=t.Duration(sec=1, nanosec=500_000_000), frame_locked=True,
                      points=[t.Point(x=0.1), t.Point(y=0.2)],
                      colors=[t.ColorRGBA(r=0.25, a=1.0)], texture_resource='',
                      texture=t.CompressedImage(header=_stamp(t), format='png', data=[1, 2, 3]),
                      uv_coordinates=[t.UVCoordinate(u=0.5, v=0.25)], text='héllo',
                      mesh_resource='', mesh_file=t.MeshFile(filename='a.stl', data=[7]),
                      mesh_use_embedded_materials=False)
    state = t.State(id=t.State.PRIMARY_STATE_INACTIVE, label='inactive')
    transition = t.Transition(id=t.Transition.TRANSITION_ACTIVATE, label='activate')
    gid = t.Gid(data=bytes(range(1, 1 + len(t.Gid().data))))
    sample = {
        'builtin_interfaces/msg/Duration': t.Duration(sec=-1, nanosec=5),
        'geometry_msgs/msg/Quaternion': rotation,
        'geometry_msgs/msg/Transform': transform.transform,
        'geometry_msgs/msg/TransformStamped': transform,
        'geometry_msgs/msg/Pose': marker.pose,
        'tf2_msgs/msg/TFMessage': t.TFMessage(transforms=[transform, transform]),
        'std_msgs/msg/ColorRGBA': marker.color,
        'sensor_msgs/msg/CompressedImage': marker.texture,
        'visualization_msgs/msg/UVCoordinate': t.UVCoordinate(u=-1.0, v=2.0),
        'visualization_msgs/msg/MeshFile': marker.mesh_file,
        'visualization_msgs/msg/Marker': marker,
        'visualization_msgs/msg/MarkerArray': t.MarkerArray(markers=[marker, t.Marker()]),
        'lifecycle_msgs/msg/State': state,
        'lifecycle_msgs/msg/Transition': transition,
        'lifecycle_msgs/msg/TransitionDescription': t.TransitionDescription(
            transition=transition, start_state=state, goal_state=t.State(id=3, label='active')),
        'lifecycle_msgs/msg/TransitionEvent': t.TransitionEvent(
            timestamp=2**63 + 5, transition=transition, start_state=state, goal_state=state),
        'rosgraph_msgs/msg/Clock': t.Clock(clock=t.Time(sec=12, nanosec=34)),
        'rcl_interfaces/msg/Log': t.Log(stamp=t.Time(sec=1, nanosec=2), level=t.Log.WARN,
                                        name='robot.ctrl', msg='löst', file='x.py',
                                        function='f', line=42),
        'rcl_interfaces/msg/ParameterType': t.ParameterType(),
        'sensor_msgs/msg/Range': t.Range(header=_stamp(t), radiation_type=1, range=0.5),
        'rmw_dds_common/msg/Gid': gid,
        'rmw_dds_common/msg/NodeEntitiesInfo': t.NodeEntitiesInfo(
            node_namespace='/', node_name='n', reader_gid_seq=[gid], writer_gid_seq=[]),
        'rmw_dds_common/msg/ParticipantEntitiesInfo': t.ParticipantEntitiesInfo(gid=gid),
    }
    return sample


@pytest.mark.parametrize('distro', ['jazzy', 'humble'])
def test_every_message_type_matches_rosbags(distro: str) -> None:
    """Every message type the port offers, both distros, byte for byte against rosbags."""
    t = types_for(distro)
    samples = message_samples(t)
    for msgtype, sample in samples.items():
        assert_same_cdr(sample, msgtype, distro)
    offered = {cls.__ros_type__ for cls in vars(t).values() if isinstance(cls, type)}
    assert set(samples) == offered
    assert set(MESSAGES) <= offered


def test_quaternion_default_is_the_identity() -> None:
    """geometry_msgs/msg/Quaternion.msg declares `float64 w 1` (rosbags drops defaults)."""
    for distro in ('jazzy', 'humble'):
        q = types_for(distro).Pose().orientation
        assert (q.x, q.y, q.z, q.w) == (0.0, 0.0, 0.0, 1.0)


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
    request = t.SetBool.request_codec.encode(GUID, 1, t.SetBool.Request(data=True))
    assert request == bytes.fromhex('00010000') + HEADER + b'\x01'
    reply = t.SetBool.response_codec.encode(GUID, 1, t.SetBool.Response(success=True,
                                                                        message='ok'))
    assert reply == (bytes.fromhex('00010000') + HEADER
                     + bytes.fromhex('01000000' '03000000' '6f6b00'))
    assert t.SetBool.request_codec.decode(request)[:2] == (GUID, 1)
    # the same sample written big endian by a peer: header fields and body byte-swapped
    big = (bytes.fromhex('00000000') + bytes.fromhex('1122334455667788' '0000000000000001')
           + bytes.fromhex('01000000' '00000003' '6f6b00'))
    guid, seq, body = t.SetBool.response_codec.decode(big)
    assert (guid, seq, body.success, body.message) == (GUID, 1, True, 'ok')


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
        'lifecycle_msgs/msg/ChangeState': (
            t.ChangeState, t.ChangeState.Request(transition=t.Transition(id=1, label='configure')),
            t.ChangeState.Response(success=True)),
        'lifecycle_msgs/msg/GetState': (
            t.GetState, t.GetState.Request(),
            t.GetState.Response(current_state=t.State(id=2, label='inactive'))),
        'lifecycle_msgs/msg/GetAvailableStates': (
            t.GetAvailableStates, t.GetAvailableStates.Request(),
            t.GetAvailableStates.Response(available_states=[t.State(id=1, label='a'),
                                                            t.State(id=2, label='bc')])),
        'lifecycle_msgs/msg/GetAvailableTransitions': (
            t.GetAvailableTransitions, t.GetAvailableTransitions.Request(),
            t.GetAvailableTransitions.Response(available_transitions=[t.TransitionDescription(
                transition=t.Transition(id=3, label='activate'),
                start_state=t.State(id=2, label='inactive'),
                goal_state=t.State(id=13, label='activating'))])),
    }


@pytest.mark.parametrize('distro', ['jazzy', 'humble'])
def test_service_bodies_follow_the_16_byte_header(distro: str) -> None:
    """Wire = 4-byte encapsulation + guid/seq (ros2-interop.md 2.1) + the plain struct (rosbags)."""
    t = types_for(distro)
    samples = service_samples(t)
    assert {srv.ros_type for srv, _, _ in samples.values()} == set(SERVICES)
    for base, (srv, request, response) in samples.items():
        for suffix, body, wire_cls, codec in (
                ('_Request', request, srv.RequestWire, srv.request_codec),
                ('_Response', response, srv.ResponseWire, srv.response_codec)):
            body_bytes = assert_same_cdr(body, base + suffix, distro)
            data = codec.encode(GUID, 1, body)
            assert data[:4] == body_bytes[:4] == bytes.fromhex('00010000')
            assert data[4:20] == HEADER
            assert data[20:] == body_bytes[4:]
            guid, seq, decoded = codec.decode(data)
            assert (guid, seq, plain(decoded)) == (GUID, 1, plain(body))
            wire = wire_cls(guid=GUID, seq=1, body=body)      # the DDS topic type agrees
            assert _pad4(bytes(wire.serialize())) == _pad4(data)


def test_trigger_request_is_header_plus_one_byte() -> None:
    """Empty ROS structs carry `uint8 structure_needs_at_least_one_member` (ros2-interop.md 2.1)."""
    t = types_for('jazzy')
    data = t.Trigger.request_codec.encode(GUID, 1, t.Trigger.Request())
    assert data == bytes.fromhex('00010000') + HEADER + b'\x00'
    reference = bytes(STORES['jazzy'].serialize_cdr(
        to_rosbags(t.Trigger.Request(), 'std_srvs/msg/Trigger_Request', STORES['jazzy']),
        'std_srvs/msg/Trigger_Request'))
    assert reference == bytes.fromhex('00010000') + b'\x00'


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
