"""What `constraint-ctrl param` and `echo` send and print, checked against outside references.

* Parameter values are read as `ros2 param set` reads them: the expected types are the cases of
  ros2cli's own test of that function (ros2/ros2cli, ros2param/test/test_api.py,
  test_get_parameter_value: 'true', '1', '1.0', 'foo', typed lists, invalid YAML stays a
  string, 'off' is a YAML 1.1 bool, '!!str off' a string, a mixed list a string).
* The ParameterValue a value becomes is decoded by rosbags (an independent CDR reader with the
  rcl_interfaces definitions) into the same type code and slot.
* A message as `echo` prints it, read back as YAML, equals the message rosbags decodes from the
  same bytes, field for field and in field order (rosbags' message definitions).
* Names: '~' is the node's private namespace (its fully qualified name) and a relative name is
  resolved against the caller's namespace, '/' for a command-line tool (ROS 2 design article
  "Topic and Service name mapping", from memory; rcl's rcl_expand_topic_name).
"""
from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pytest
import yaml

pytest.importorskip('cyclonedds')

from rosbags.typesys import Stores, get_typestore  # noqa: E402

from constraint_ctrl.errors import ConstraintCtrlError  # noqa: E402
from constraint_ctrl.tools.remote import (format_message, format_value,  # noqa: E402
                                          full_type_name, parameter_value_msg, parse_value,
                                          split_node, topic_name)
from constraint_ctrl.transport.dds_types import codec_of, types_for  # noqa: E402

T = types_for('jazzy')
STORE = get_typestore(Stores.ROS2_JAZZY)

# ros2/ros2cli ros2param/test/test_api.py: (text, type, value)
ROS2PARAM_CASES = [
    ('true', 'bool', True),
    ('false', 'bool', False),
    ('1', 'integer', 1),
    ('0', 'integer', 0),
    ('-1', 'integer', -1),
    ('1.0', 'double', 1.0),
    ('0.0', 'double', 0.0),
    ('-1.0', 'double', -1.0),
    ('1.1234', 'double', 1.1234),
    ('foo', 'string', 'foo'),
    ('[false, true]', 'bool_array', [False, True]),
    ('[-1, 0, 1]', 'integer_array', [-1, 0, 1]),
    ('[-1.0, 0.0, 1.0, 1.1234]', 'double_array', [-1.0, 0.0, 1.0, 1.1234]),
    ('["foo", "bar", "buzz"]', 'string_array', ['foo', 'bar', 'buzz']),
    ('["foo", "bar", "buzz"', 'string', '["foo", "bar", "buzz"'),    # invalid YAML
    ('off', 'bool', False),                                          # YAML 1.1 bool
    ('!!str off', 'string', 'off'),
    ('[true,0.1,1]', 'string', '[true,0.1,1]'),                      # mixed list
]


@pytest.mark.parametrize('text,kind,value', ROS2PARAM_CASES)
def test_values_are_read_as_ros2_param_set_reads_them(text: str, kind: str, value: Any) -> None:
    assert parse_value(text) == (kind, value)


@pytest.mark.parametrize('text,kind,value', ROS2PARAM_CASES)
def test_parameter_value_decodes_in_rosbags_with_its_type(text: str, kind: str,
                                                          value: Any) -> None:
    msg = parameter_value_msg(kind, value, T)
    theirs = STORE.deserialize_cdr(codec_of(T.ParameterValue).encode(msg),
                                   'rcl_interfaces/msg/ParameterValue')
    # rcl_interfaces/msg/ParameterType.msg constants, as rosbags has them
    constants = {name: const for name, _, const in
                 STORE.fielddefs['rcl_interfaces/msg/ParameterType'][0]}
    assert theirs.type == constants[f'PARAMETER_{kind.upper()}']
    got = getattr(theirs, f'{kind}_value')
    assert (got.tolist() if isinstance(got, np.ndarray) else list(got) if kind.endswith(
        '_array') else got) == value


@pytest.mark.parametrize('value', [0.4, 250.0, 3, True, False, 'move_to_point', 'true', '3',
                                   '1.5', 'off', '[a]', '', [1, 2], [0.5, 1.0], ['a', 'b'],
                                   [True], 1e-300, -0.0])
def test_printed_values_read_back_as_the_same_value(value: Any) -> None:
    kind, parsed = parse_value(format_value(value))
    assert parsed == value and type(parsed) is type(value)
    if isinstance(value, list) and value:
        assert type(parsed[0]) is type(value[0])


def test_value_text_is_plain() -> None:
    assert [format_value(v) for v in (0.4, True, [1, 2], ['a', 'b'], 'true')] == \
        ['0.4', 'true', '[1, 2]', '[a, b]', "'true'"]


def _rosbags_plain(value: Any) -> Any:
    if dataclasses.is_dataclass(value):
        # rosbags' classes carry the .msg constants (DiagnosticStatus.OK, ...) as fields too
        constants = {name for name, _, _ in STORE.fielddefs[value.__msgtype__][0]}
        return {f.name: _rosbags_plain(getattr(value, f.name))
                for f in dataclasses.fields(value)
                if not f.name.startswith('__') and f.name not in constants}
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, list):
        return [_rosbags_plain(v) for v in value]
    return value


def _check_against_rosbags(msg: Any, ros_type: str) -> dict[str, Any]:
    printed = yaml.safe_load(format_message(msg))
    theirs = _rosbags_plain(STORE.deserialize_cdr(codec_of(type(msg)).encode(msg), ros_type))
    assert printed == theirs
    # field order as in the message definition, at every level of nesting
    assert list(printed) == list(theirs)
    return printed


def test_joint_state_prints_as_rosbags_decodes_it() -> None:
    msg = T.JointState(header=T.Header(stamp=T.Time(sec=12, nanosec=345), frame_id='base_link'),
                       name=['joint_1', 'joint_2'], position=[0.5, -1.25e-7],
                       velocity=[float('inf'), 0.0], effort=[])
    printed = _check_against_rosbags(msg, 'sensor_msgs/msg/JointState')
    assert list(printed['header']) == ['stamp', 'frame_id']
    text = format_message(msg)
    assert 'name:\n- joint_1\n- joint_2\n' in text       # block lists, as ros2 topic echo
    assert 'effort: []' in text


def test_status_message_prints_as_rosbags_decodes_it() -> None:
    status = T.DiagnosticStatus(level=2, name='ctrl: controller', message='ok: true',
                                hardware_id='x',
                                values=[T.KeyValue(key='skill', value='move_to_point'),
                                        T.KeyValue(key='solve_us', value='88.7')])
    msg = T.DiagnosticArray(header=T.Header(frame_id=''), status=[status])
    printed = _check_against_rosbags(msg, 'diagnostic_msgs/msg/DiagnosticArray')
    assert printed['status'][0]['values'][0] == {'key': 'skill', 'value': 'move_to_point'}


def test_float_array_and_string_print_as_rosbags_decodes_them() -> None:
    layout = T.MultiArrayLayout(dim=[T.MultiArrayDimension(label='joint_velocity', size=3,
                                                           stride=3)], data_offset=0)
    _check_against_rosbags(T.Float64MultiArray(layout=layout, data=[0.1, -0.2, 0.0]),
                           'std_msgs/msg/Float64MultiArray')
    _check_against_rosbags(T.String(data="activated_move_to_point: 'x'"), 'std_msgs/msg/String')


@pytest.mark.parametrize('text,node,expected', [
    ('~/status', '/constraint_controller', '/constraint_controller/status'),
    ('~/events', 'constraint_controller', '/constraint_controller/events'),
    ('~/events', '/cell1/ctrl', '/cell1/ctrl/events'),
    ('joint_states', '/cell1/ctrl', '/joint_states'),
    ('/robot/joint_states', '/cell1/ctrl', '/robot/joint_states'),
])
def test_topic_names(text: str, node: str, expected: str) -> None:
    assert topic_name(text, node) == expected


def test_node_names() -> None:
    assert split_node('constraint_controller') == ('/constraint_controller', '/',
                                                   'constraint_controller')
    assert split_node('/cell1/ctrl') == ('/cell1/ctrl', '/cell1', 'ctrl')
    with pytest.raises(ConstraintCtrlError, match='--node'):
        split_node('/cell1/2ctrl')


def test_type_names() -> None:
    assert full_type_name('std_msgs/String') == 'std_msgs/msg/String'
    assert full_type_name('sensor_msgs/msg/JointState') == 'sensor_msgs/msg/JointState'
    with pytest.raises(ConstraintCtrlError, match='--type'):
        full_type_name('std_srvs/srv/Trigger')
