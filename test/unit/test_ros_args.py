"""ROS argument parsing, parameter files, name expansion and DDS name mangling.

Outside references, named per check:
* [RCL-args] ros2/rcl rcl/include/rcl/arguments.h + src/arguments.c: flags, `-p` rules stored
  under node '/**' unless prefixed with `node:`.
* [RCL-yaml] ros2/rcl rcl_yaml_param_parser/README.md: `<ns>: <node>: ros__parameters:` with
  optional nested parameter namespaces joined by '.'.
* [RCLPY-ovr] ros2/rclpy src/rclpy/node.cpp `_populate_node_parameters_from_rcl_params`: a
  missing leading '/' is added to node keys, '/*' becomes one token and '/**' any number of
  tokens, matched against the node's fully qualified name; later values overwrite earlier ones.
* [RCLPY-list] ros2/rclpy rclpy/node.py `list_parameters`, `get_parameters_by_prefix`;
  rclpy/parameter_service.py (empty answer when a requested name is unknown).
* [REF] /work/shared/reference/ros2-interop.md sections 1.1 (expansion examples), 1.2 (DDS
  topic names), 1.3 (type names).
"""
from __future__ import annotations

from pathlib import Path

import pytest

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.dds_parameters import ParameterStore
from constraint_ctrl.transport.dds_types import types_for
from constraint_ctrl.transport.ros_args import (RemapRule, dds_type_name, expand_name,
                                                load_params_file, node_identity,
                                                node_key_matches, overrides_for,
                                                parse_ros_args, reply_dds_name,
                                                request_dds_name, resolve_name, ros_type_name,
                                                topic_dds_name)

# --- argument grammar [RCL-args] ------------------------------------------------------------


def test_launch_style_arguments() -> None:
    """What launch_ros passes: node/ns remaps, a remap, typed -p values; '--' ends ROS args."""
    args = parse_ros_args([
        'ctrl_node', 'user_arg', '--ros-args', '-r', '__node:=ctrl', '-r', '__ns:=/robot',
        '-r', 'joint_states:=/arm/joint_states', '-p', 'rate_hz:=250', '-p', 'mode:=fast',
        '--param', 'gains:=[1.0, 2.5]', '-p', 'enabled:=true', '-p', "tag:='42'",
        '--log-level', 'warn', '--', 'after'])
    assert node_identity(args, 'constraint_ctrl') == ('ctrl', '/robot')
    assert args.other_args == ['ctrl_node', 'user_arg', 'after']
    assert args.remaps == [RemapRule(match='joint_states', replacement='/arm/joint_states')]
    # YAML typing of -p values: 250 is an integer, quoted '42' a string [RCL-args]
    assert args.overrides == {'/**': {'rate_hz': 250, 'mode': 'fast', 'gains': [1.0, 2.5],
                                      'enabled': True, 'tag': '42'}}
    assert isinstance(args.overrides['/**']['rate_hz'], int)
    assert args.log_level == 'warn'


def test_node_prefixed_rules_only_touch_that_node() -> None:
    """`node:__node:=x` and `node:name:=v` apply to the named node only [RCL-args]; the
    `node:` key of -p is matched like a file key, so a bare name means the root namespace
    [RCLPY-ovr]."""
    args = parse_ros_args(['--ros-args', '-r', 'other:__node:=renamed', '-r',
                           'ctrl:__ns:=/cell', '-p', 'ctrl:gain:=2.0', '-r', 'other:a:=b'])
    assert node_identity(args, 'ctrl') == ('ctrl', '/cell')
    assert node_identity(args, 'other') == ('renamed', '/')
    assert overrides_for(args, '/ctrl') == {'gain': 2.0}
    assert overrides_for(args, '/cell/ctrl') == {}
    assert overrides_for(args, '/other') == {}
    assert resolve_name('a', 'ctrl', '/', args.remaps) == '/a'
    assert resolve_name('a', 'other', '/', args.remaps) == '/b'


@pytest.mark.parametrize(('argv', 'match'), [
    (['--ros-args', '--bogus'], "unknown ROS argument '--bogus'"),
    (['--ros-args', '-p'], "'-p' needs a value"),
    (['--ros-args', '-p', 'novalue'], 'expected NAME:=VALUE'),
    (['--ros-args', '-p', 'x:=[1, a]'], 'one type'),
    (['--ros-args', '-p', 'x:=[]'], 'empty list'),
    (['--ros-args', '-r', '__node:=9lives'], "node name '9lives'"),
    (['--ros-args', '--log-level', 'loud'], 'use one of debug'),
])
def test_bad_arguments_say_what_is_wrong(argv: list[str], match: str) -> None:
    with pytest.raises(TransportError, match=match):
        parse_ros_args(argv)


# --- parameter files [RCL-yaml] [RCLPY-ovr] ---------------------------------------------------

PARAMS = """
/**:
  ros__parameters:
    common: 1
    rate_hz: 100.0
/robot/ctrl:
  ros__parameters:
    rate_hz: 250.0
    inputs:
      joint_states: /joint_states
      ranges: [range_left, range_right]
robot:
  other:
    ros__parameters: {x: 1}
ctrl:
  ros__parameters:
    only_root: true
/**/ctrl:
  ros__parameters:
    any_namespace: 3
/*/ctrl:
  ros__parameters:
    one_token: 4
"""


@pytest.fixture
def params_file(tmp_path: Path) -> Path:
    path = tmp_path / 'params.yaml'
    path.write_text(PARAMS)
    return path


def test_params_file_nesting_is_flattened(params_file: Path) -> None:
    """Namespace keys join with '/', parameter mappings with '.' [RCL-yaml]."""
    table = load_params_file(params_file)
    assert table['/robot/ctrl'] == {'rate_hz': 250.0, 'inputs.joint_states': '/joint_states',
                                    'inputs.ranges': ['range_left', 'range_right']}
    assert table['/robot/other'] == {'x': 1}
    assert table['/ctrl'] == {'only_root': True}


def test_params_file_wildcards_and_namespaces(params_file: Path) -> None:
    """Which keys reach /robot/ctrl and /ctrl, and who wins [RCLPY-ovr]."""
    args = parse_ros_args(['--ros-args', '--params-file', str(params_file)])
    assert overrides_for(args, '/robot/ctrl') == {
        'common': 1, 'rate_hz': 250.0, 'inputs.joint_states': '/joint_states',
        'inputs.ranges': ['range_left', 'range_right'], 'any_namespace': 3, 'one_token': 4}
    # a bare node name means the root namespace; '/**' also matches zero tokens, '/*' needs one
    assert overrides_for(args, '/ctrl') == {'common': 1, 'rate_hz': 100.0, 'only_root': True,
                                            'any_namespace': 3}


def test_node_key_patterns() -> None:
    """'/*' = exactly one token, '/**' = any number [RCLPY-ovr]."""
    assert node_key_matches('/**', '/a/b/c')
    assert node_key_matches('/**/c', '/c')
    assert node_key_matches('/a/*/c', '/a/b/c')
    assert not node_key_matches('/a/*/c', '/a/c')
    assert not node_key_matches('/c', '/a/c')


def test_later_rules_overwrite_but_keep_the_first_position(params_file: Path) -> None:
    """A -p after the file lands in the '/**' entry, which is applied before node keys
    [RCL-args: -p goes under '/**'; RCLPY-ovr: table order, later overwrite]."""
    args = parse_ros_args(['--ros-args', '--params-file', str(params_file), '-p',
                           'common:=7', '-p', 'rate_hz:=50.0'])
    resolved = overrides_for(args, '/robot/ctrl')
    assert resolved['common'] == 7          # '/**' value overwritten by the later -p
    assert resolved['rate_hz'] == 250.0     # node-specific key still applied after '/**'


@pytest.mark.parametrize(('text', 'match'), [
    ('ctrl:\n  ros__parameters:\n    a: [1, 2.0]\n', "'a': list items must all be of one type"),
    ('ctrl:\n  ros__parameters:\n    a: []\n', 'empty list'),
    ('ctrl:\n  rate: 3\n', "'ctrl/rate' holds a value but no 'ros__parameters'"),
    ('ros__parameters:\n  a: 1\n', 'needs a node name above it'),
    ('- a\n- b\n', 'top level must be a mapping'),
    ('ctrl: [unclosed\n', 'not valid YAML'),
])
def test_bad_params_files_name_file_and_field(tmp_path: Path, text: str, match: str) -> None:
    path = tmp_path / 'bad.yaml'
    path.write_text(text)
    with pytest.raises(TransportError, match=match) as info:
        parse_ros_args(['--ros-args', '--params-file', str(path)])
    assert 'bad.yaml' in str(info.value)


def test_missing_params_file(tmp_path: Path) -> None:
    with pytest.raises(TransportError, match='cannot read it'):
        parse_ros_args(['--ros-args', '--params-file', str(tmp_path / 'none.yaml')])


# --- names [REF 1.1, 1.2, 1.3] ---------------------------------------------------------------

@pytest.mark.parametrize(('name', 'expected'), [
    ('joint_states', '/robot/joint_states'),
    ('/joint_states', '/joint_states'),
    ('~/set_skill', '/robot/constraint_ctrl/set_skill'),
    ('~', '/robot/constraint_ctrl'),
    ('{node}/cmd', '/robot/constraint_ctrl/cmd'),
    ('{ns}/cmd', '/robot/cmd'),
])
def test_expansion_examples_from_the_reference(name: str, expected: str) -> None:
    """Node constraint_ctrl in /robot, the table in REF 1.1 (rcl_expand_topic_name rules)."""
    assert expand_name(name, 'constraint_ctrl', '/robot') == expected


def test_expansion_in_the_root_namespace() -> None:
    """'~' gets no extra slash when the namespace is '/' [REF 1.1]."""
    assert expand_name('~/set_skill', 'constraint_ctrl', '/') == '/constraint_ctrl/set_skill'
    assert expand_name('joint_states', 'constraint_ctrl', '/') == '/joint_states'


@pytest.mark.parametrize('name', ['', '~foo', 'a//b', '1abc', 'a/', 'a b', '{x}/y', 'a/~'])
def test_invalid_names_are_rejected(name: str) -> None:
    """Validity rules of the topic-name design article (REF 1.1)."""
    with pytest.raises(TransportError):
        expand_name(name, 'constraint_ctrl', '/robot')


def test_remapping_applies_to_expanded_names() -> None:
    """Rules match the expanded name; a relative replacement expands in the node namespace."""
    rules = [RemapRule('/robot/joint_states', 'arm_states'), RemapRule('~/cmd', '/cmd')]
    assert resolve_name('joint_states', 'ctrl', '/robot', rules) == '/robot/arm_states'
    assert resolve_name('~/cmd', 'ctrl', '/robot', rules) == '/cmd'
    assert resolve_name('other', 'ctrl', '/robot', rules) == '/robot/other'


def test_dds_topic_and_type_names_from_the_reference() -> None:
    """rt/, rq/..Request, rr/..Reply [REF 1.2]; pkg::msg::dds_::Name_ [REF 1.3]."""
    assert topic_dds_name('/robot/joint_states') == 'rt/robot/joint_states'
    assert request_dds_name('/robot/constraint_ctrl/set_skill') == \
        'rq/robot/constraint_ctrl/set_skillRequest'
    assert reply_dds_name('/robot/constraint_ctrl/set_skill') == \
        'rr/robot/constraint_ctrl/set_skillReply'
    assert dds_type_name('sensor_msgs/msg/JointState') == 'sensor_msgs::msg::dds_::JointState_'
    assert dds_type_name('std_srvs/srv/SetBool_Request') == \
        'std_srvs::srv::dds_::SetBool_Request_'
    assert ros_type_name('sensor_msgs::msg::dds_::JointState_') == 'sensor_msgs/msg/JointState'
    with pytest.raises(TransportError):
        dds_type_name('JointState')


# --- overrides reach the node's parameters [RCLPY-list] ---------------------------------------

@pytest.fixture
def store() -> ParameterStore:
    events: list[object] = []
    overrides = {'inputs.joint_states': '/joint_states', 'inputs.ranges': ['l', 'r'],
                 'rate_hz': 250.0, 'a.b.c': 1}
    s = ParameterStore('/robot/ctrl', overrides, types_for('jazzy'), lambda: 5_000_000_001,
                       events.append)
    s.events = events  # type: ignore[attr-defined]
    return s


def test_overrides_are_declared_and_found_by_prefix(store: ParameterStore) -> None:
    """automatically_declare_parameters_from_overrides + get_parameters_by_prefix."""
    found = store.by_prefix('inputs')
    assert {k: v.value for k, v in found.items()} == {'joint_states': '/joint_states',
                                                      'ranges': ['l', 'r']}
    assert found['ranges'].name == 'inputs.ranges'
    assert set(store.by_prefix('')) == {'inputs.joint_states', 'inputs.ranges', 'rate_hz',
                                        'a.b.c'}
    event = store.events[0]  # type: ignore[attr-defined]
    assert event.node == '/robot/ctrl' and len(event.new_parameters) == 4
    assert (event.stamp.sec, event.stamp.nanosec) == (5, 1)


def test_declare_adopts_the_override(store: ParameterStore) -> None:
    assert store.declare('rate_hz', 100.0, 'tick rate').value == 250.0
    assert store.declare('gain', 0.5).value == 0.5
    with pytest.raises(TransportError, match='declared twice'):
        store.declare('gain', 0.7)
    with pytest.raises(TransportError, match='non-empty list'):
        store.declare('names', [])


def test_set_rules(store: ParameterStore) -> None:
    """Type changes, read-only and undeclared names are refused; validator reasons pass on."""
    store.declare('mode', 'auto', read_only=True)
    assert store.set_atomically({'rate_hz': 3}) == (
        False, "parameter 'rate_hz' is of type double, cannot set it to type integer")
    assert store.set_atomically({'mode': 'manual'}) == (False, "parameter 'mode' is read-only")
    assert store.set_atomically({'nope': 1.0}) == (False, "parameter 'nope' is not declared")
    seen: list[dict[str, object]] = []
    store.set_validator(lambda v: (v.get('rate_hz', 1.0) > 0, 'rate_hz must be > 0'))
    store.add_listener(seen.append)
    assert store.set_atomically({'rate_hz': -1.0, 'a.b.c': 2}) == (False, 'rate_hz must be > 0')
    assert store.get('a.b.c').value == 1                     # all or nothing
    assert store.set_atomically({'rate_hz': 500.0, 'a.b.c': 2}) == (True, '')
    assert seen == [{'rate_hz': 500.0, 'a.b.c': 2}]
    assert store.get('rate_hz').value == 500.0


def test_list_parameters_depth_and_prefixes(store: ParameterStore) -> None:
    """Filter of rclpy Node.list_parameters [RCLPY-list]."""
    t = types_for('jazzy')

    def listed(prefixes: list[str], depth: int) -> tuple[list[str], list[str]]:
        result = store.on_list_parameters(t.ListParameters.Request(prefixes=prefixes,
                                                                   depth=depth),
                                          t.ListParameters.Response()).result
        return sorted(result.names), sorted(result.prefixes)

    assert listed([], 0) == (['a.b.c', 'inputs.joint_states', 'inputs.ranges', 'rate_hz'],
                             ['a.b', 'inputs'])
    assert listed([], 1) == (['rate_hz'], [])
    assert listed(['inputs'], 1) == (['inputs.joint_states', 'inputs.ranges'], ['inputs'])
    assert listed(['a'], 1) == ([], [])
    assert listed(['a'], 2) == (['a.b.c'], ['a.b'])


def test_get_and_describe_answer_empty_for_unknown_names(store: ParameterStore) -> None:
    """parameter_service.py returns an empty list when any requested name is unknown."""
    t = types_for('jazzy')
    got = store.on_get_parameters(t.GetParameters.Request(names=['rate_hz', 'inputs.ranges']),
                                  t.GetParameters.Response())
    assert [(v.type, v.double_value) for v in got.values][0] == (3, 250.0)
    assert list(got.values[1].string_array_value) == ['l', 'r'] and got.values[1].type == 9
    empty = store.on_get_parameters(t.GetParameters.Request(names=['rate_hz', 'zzz']),
                                    t.GetParameters.Response())
    assert list(empty.values) == []
    store.declare('rate_hz', 1.0, 'tick rate', read_only=True)
    desc = store.on_describe_parameters(t.DescribeParameters.Request(names=['rate_hz']),
                                        t.DescribeParameters.Response()).descriptors[0]
    assert (desc.name, desc.type, desc.description, desc.read_only) == ('rate_hz', 3,
                                                                       'tick rate', True)
    types = store.on_get_parameter_types(t.GetParameterTypes.Request(names=['a.b.c']),
                                         t.GetParameterTypes.Response()).types
    assert list(types) == [2]
