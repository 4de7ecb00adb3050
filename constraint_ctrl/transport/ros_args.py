"""ROS command-line arguments, parameter files and name rules, without ROS.

The DDS port must behave like an rclpy node when started by `ros2 launch`, which passes
`--ros-args -r __node:=NAME -r __ns:=/NS -r from:=to -p name:=value --params-file FILE`.
This module reproduces the parts of rcl that those arguments touch:

* argument grammar of rcl/src/rcl/arguments.c (`-r/--remap`, `-p/--param`, `--params-file`,
  `-e/--enclave`, `--log-level`, the log on/off flags; an optional `node:` prefix on `-r`/`-p`);
* parameter files as rcl_yaml_param_parser reads them: keys above `ros__parameters` form the
  node name (joined with '/', a missing leading '/' added), nested parameter mappings are
  flattened with '.', list items must share one type;
* which overrides reach a node, as rclpy's node.cpp applies them: all rules are merged into one
  ordered table (a node key keeps the place of its first appearance, later values overwrite),
  then every key that matches the node's fully qualified name is applied in table order;
  '*' matches one name token and '**' any number of tokens;
* name expansion (`~`, `{node}`, `{ns}`, relative names) and remapping of the expanded name,
  then the DDS spellings rmw_cyclonedds uses (`rt/`, `rq/...Request`, `rr/...Reply`,
  `pkg::msg::dds_::Name_`).
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from constraint_ctrl.errors import TransportError

PARAMS_KEY = 'ros__parameters'
_LOG_LEVELS = ('debug', 'info', 'warn', 'error', 'fatal')
_IGNORED_FLAGS = frozenset({
    '--enable-stdout-logs', '--disable-stdout-logs', '--enable-rosout-logs',
    '--disable-rosout-logs', '--enable-external-lib-logs', '--disable-external-lib-logs'})
_IGNORED_WITH_VALUE = frozenset({'--log-file-name', '--log-config-file'})
_VALUE_FLAGS = frozenset({'-r', '--remap', '-p', '--param', '--params-file', '-e', '--enclave',
                          '--log-level'}) | _IGNORED_WITH_VALUE
_NODE_NAME_RE = re.compile(r'[A-Za-z_][A-Za-z0-9_]*\Z')
_TOKEN_RE = re.compile(r'[A-Za-z_][A-Za-z0-9_]*\Z')


@dataclass(frozen=True)
class RemapRule:
    """`[node:]match:=replacement`; `node` limits the rule to nodes with that name."""

    match: str
    replacement: str
    node: str | None = None


@dataclass
class RosArgs:
    """What `--ros-args` sections said; everything else lands in `other_args`."""

    # `-r [node:]__node:=NAME` / `-r [node:]__ns:=/NS` as (node prefix or None, value)
    node_name_rules: list[tuple[str | None, str]] = field(default_factory=list)
    namespace_rules: list[tuple[str | None, str]] = field(default_factory=list)
    remaps: list[RemapRule] = field(default_factory=list)
    # node key (as written, leading '/' added) -> {parameter: value}; insertion order matters
    overrides: dict[str, dict[str, Any]] = field(default_factory=dict)
    log_level: str | None = None
    enclave: str | None = None
    other_args: list[str] = field(default_factory=list)


def parse_ros_args(argv: list[str]) -> RosArgs:
    """Parse every `--ros-args ... [--]` section of argv (argv[0] included, as in sys.argv)."""
    args = RosArgs()
    in_ros = False
    i = 0
    while i < len(argv):
        arg = argv[i]
        if arg == '--ros-args':
            in_ros = True
            i += 1
            continue
        if not in_ros:
            args.other_args.append(arg)
            i += 1
            continue
        if arg == '--':
            in_ros = False
            i += 1
            continue
        if arg in _IGNORED_FLAGS:
            i += 1
            continue
        if arg not in _VALUE_FLAGS:
            msg = (f'unknown ROS argument {arg!r} after --ros-args; supported: -r/--remap, '
                   '-p/--param, --params-file, -e/--enclave, --log-level (end the ROS '
                   "section with '--' to pass your own arguments)")
            raise TransportError(msg)
        value = _flag_value(argv, i)
        if arg in ('-r', '--remap'):
            _add_remap(args, value)
        elif arg in ('-p', '--param'):
            node_key, name, text = _split_rule(value, arg)
            _merge(args.overrides, node_key or '/**', {name: _yaml_value(text, f'{arg} {value}')})
        elif arg == '--params-file':
            for node_key, params in load_params_file(Path(value)).items():
                _merge(args.overrides, node_key, params)
        elif arg in ('-e', '--enclave'):
            args.enclave = value
        elif arg == '--log-level':
            args.log_level = _log_level(value)
        i += 2
    return args


def _flag_value(argv: list[str], i: int) -> str:
    if i + 1 >= len(argv):
        msg = f'ROS argument {argv[i]!r} needs a value after it'
        raise TransportError(msg)
    return argv[i + 1]


def _split_rule(rule: str, flag: str) -> tuple[str | None, str, str]:
    """Split `[node:]lhs:=rhs`; the node prefix is everything before a ':' left of ':='."""
    lhs, sep, rhs = rule.partition(':=')
    if not sep or not lhs:
        msg = f'{flag} {rule!r}: expected NAME:=VALUE'
        raise TransportError(msg)
    node, colon, name = lhs.rpartition(':')
    if colon:
        return '/' + node.lstrip('/'), name, rhs
    return None, lhs, rhs


def _add_remap(args: RosArgs, rule: str) -> None:
    node_key, lhs, rhs = _split_rule(rule, '-r')
    node = node_key.lstrip('/') if node_key else None
    if lhs in ('__node', '__name'):
        args.node_name_rules.append((node, validate_node_name(rhs, f'-r {rule}')))
    elif lhs == '__ns':
        args.namespace_rules.append((node, normalize_namespace(rhs, f'-r {rule}')))
    else:
        args.remaps.append(RemapRule(match=lhs, replacement=rhs, node=node))


def node_identity(args: RosArgs, node_name: str, namespace: str = '/') -> tuple[str, str]:
    """Name and namespace after `__node`/`__ns` rules (a node prefix names the original node)."""
    name, ns = node_name, namespace
    for node, value in args.node_name_rules:
        if node is None or node == node_name:
            name = value
    for node, value in args.namespace_rules:
        if node is None or node == node_name:
            ns = value
    return name, ns


def _log_level(value: str) -> str:
    level = value.rpartition(':=')[2].lower()  # 'name:=level' sets one logger; we have one
    if level not in _LOG_LEVELS:
        msg = f'--log-level {value!r}: use one of {", ".join(_LOG_LEVELS)}'
        raise TransportError(msg)
    return level


def _merge(table: dict[str, dict[str, Any]], node_key: str, params: dict[str, Any]) -> None:
    key = node_key if node_key.startswith('/') else '/' + node_key
    table.setdefault(key, {}).update(params)


# ---------------------------------------------------------------------------------------------
# parameter values and files

def _check_value(value: Any, where: str) -> Any:
    """Keep only the value kinds a ROS parameter can hold; lists must be homogeneous."""
    if isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, list):
        if not value:
            msg = (f'{where}: an empty list has no parameter type in ROS; give at least one '
                   'element or leave the parameter out')
            raise TransportError(msg)
        kinds = {type(v) for v in value}
        if len(kinds) != 1 or next(iter(kinds)) not in (bool, int, float, str):
            msg = (f'{where}: list items must all be of one type (bool, int, float or str), '
                   f'got {value!r}')
            raise TransportError(msg)
        return list(value)
    msg = (f'{where}: value {value!r} is not a parameter value (bool, int, float, str or a '
           'list of one of them)')
    raise TransportError(msg)


def _yaml_value(text: str, where: str) -> Any:
    try:
        value = yaml.safe_load(text) if text else ''
    except yaml.YAMLError as exc:
        msg = f'{where}: value is not valid YAML ({exc})'
        raise TransportError(msg) from None
    return _check_value(value, where)


def load_params_file(path: Path) -> dict[str, dict[str, Any]]:
    """Read a ROS 2 parameter file into {node key: {dotted parameter name: value}}."""
    try:
        doc = yaml.safe_load(path.read_text(encoding='utf-8'))
    except OSError as exc:
        msg = f'--params-file {str(path)!r}: cannot read it ({exc.strerror})'
        raise TransportError(msg) from None
    except yaml.YAMLError as exc:
        msg = f'--params-file {str(path)!r}: not valid YAML ({exc})'
        raise TransportError(msg) from None
    if doc is None:
        return {}
    if not isinstance(doc, dict):
        msg = f'{path}: top level must be a mapping of node names'
        raise TransportError(msg)
    found: dict[str, dict[str, Any]] = {}
    _walk_nodes(doc, [], path, found)
    return found


def _walk_nodes(node: dict[Any, Any], keys: list[str], path: Path,
                found: dict[str, dict[str, Any]]) -> None:
    for key, value in node.items():
        key = str(key)
        if key == PARAMS_KEY:
            if not keys:
                msg = f'{path}: {PARAMS_KEY!r} needs a node name above it'
                raise TransportError(msg)
            node_key = '/' + '/'.join(k.strip('/') for k in keys)
            if value is None:
                value = {}
            if not isinstance(value, dict):
                msg = f'{path}: {node_key}.{PARAMS_KEY} must be a mapping of parameters'
                raise TransportError(msg)
            params: dict[str, Any] = {}
            _flatten(value, '', path, node_key, params)
            found.setdefault(node_key, {}).update(params)
        elif isinstance(value, dict):
            _walk_nodes(value, [*keys, key], path, found)
        else:
            where = '/'.join([*keys, key])
            msg = (f'{path}: {where!r} holds a value but no {PARAMS_KEY!r} mapping was opened '
                   f'above it; put parameters under <node>: {PARAMS_KEY}:')
            raise TransportError(msg)


def _flatten(mapping: dict[Any, Any], prefix: str, path: Path, node_key: str,
             out: dict[str, Any]) -> None:
    for key, value in mapping.items():
        name = f'{prefix}{key}'
        if isinstance(value, dict):
            _flatten(value, name + '.', path, node_key, out)
        else:
            out[name] = _check_value(value, f'{path}: {node_key}: parameter {name!r}')


def node_key_matches(node_key: str, node_fqn: str) -> bool:
    """Does a parameter-file node key ('/ns/node', '/**', '/**/node', '/*/node') match?"""
    parts = []
    for token in node_key.strip('/').split('/'):
        if token == '**':
            parts.append(r'(/\w+)*')
        elif token == '*':
            parts.append(r'/\w+')
        else:
            parts.append('/' + re.escape(token))
    return re.fullmatch(''.join(parts), node_fqn) is not None


def overrides_for(args: RosArgs, node_fqn: str) -> dict[str, Any]:
    """The parameter overrides that apply to one node, in rclpy's precedence."""
    result: dict[str, Any] = {}
    for node_key, params in args.overrides.items():
        if node_key_matches(node_key, node_fqn):
            result.update(params)
    return result


# ---------------------------------------------------------------------------------------------
# names

def validate_node_name(name: str, where: str = 'node name') -> str:
    if not _NODE_NAME_RE.match(name):
        msg = (f'{where}: node name {name!r} must be letters, digits and underscores and '
               'must not start with a digit')
        raise TransportError(msg)
    return name


def normalize_namespace(namespace: str, where: str = 'namespace') -> str:
    """Absolute namespace without trailing '/'; '' and '/' both mean the root."""
    ns = '/' + namespace.strip('/') if namespace.strip('/') else '/'
    if ns != '/':
        for token in ns[1:].split('/'):
            if not _TOKEN_RE.match(token):
                msg = (f'{where}: namespace {namespace!r} has an invalid token {token!r} '
                       '(letters, digits, underscores; not starting with a digit)')
                raise TransportError(msg)
    return ns


def node_fqn(namespace: str, node_name: str) -> str:
    return ('' if namespace == '/' else namespace) + '/' + node_name


def _validate_user_name(name: str) -> None:
    problem = None
    if not name:
        problem = 'it is empty'
    elif re.search(r'[^A-Za-z0-9_/~{}]', name):
        problem = 'only letters, digits, _, /, ~ and {} are allowed'
    elif name[0].isdigit():
        problem = 'it must not start with a digit'
    elif name.endswith('/') and name != '/':
        problem = 'it must not end with /'
    elif '//' in name:
        problem = 'it must not contain //'
    elif '~' in name[1:] or (name.startswith('~') and name not in ('~',) and name[1] != '/'):
        problem = "'~' is only allowed at the start, as '~' or '~/...'"
    elif name.count('{') != name.count('}'):
        problem = 'braces are not balanced'
    if problem:
        msg = f'topic or service name {name!r} is invalid: {problem}'
        raise TransportError(msg)


def expand_name(name: str, node_name: str, namespace: str) -> str:
    """Expand a topic/service name to its fully qualified form (rcl_expand_topic_name rules)."""
    _validate_user_name(name)
    private = node_fqn(namespace, node_name)
    if name.startswith('~'):
        name = private + name[1:]
    name = name.replace('{node}', node_name)
    name = name.replace('{ns}', namespace).replace('{namespace}', namespace)
    unknown = re.search(r'\{[^}]*\}', name)
    if unknown:
        msg = f'topic or service name contains unknown substitution {unknown.group(0)!r}'
        raise TransportError(msg)
    if not name.startswith('/'):
        name = ('' if namespace == '/' else namespace) + '/' + name
    name = name.replace('//', '/')
    for token in name[1:].split('/'):
        if not _TOKEN_RE.match(token):
            msg = f'expanded name {name!r} has an invalid token {token!r}'
            raise TransportError(msg)
    return name


def resolve_name(name: str, node_name: str, namespace: str, remaps: list[RemapRule]) -> str:
    """Expand, then apply the first remap rule whose expanded match equals the name."""
    expanded = expand_name(name, node_name, namespace)
    for rule in remaps:
        if rule.node is not None and rule.node != node_name:
            continue
        if expand_name(rule.match, node_name, namespace) == expanded:
            return expand_name(rule.replacement, node_name, namespace)
    return expanded


def topic_dds_name(fqn: str) -> str:
    return 'rt' + fqn


def request_dds_name(fqn: str) -> str:
    return 'rq' + fqn + 'Request'


def reply_dds_name(fqn: str) -> str:
    return 'rr' + fqn + 'Reply'


def dds_type_name(ros_type: str) -> str:
    """'sensor_msgs/msg/JointState' -> 'sensor_msgs::msg::dds_::JointState_'."""
    parts = ros_type.split('/')
    if len(parts) != 3 or parts[1] not in ('msg', 'srv'):
        msg = f'ROS type {ros_type!r} must look like package/msg/Name or package/srv/Name'
        raise TransportError(msg)
    return f'{parts[0]}::{parts[1]}::dds_::{parts[2]}_'


def ros_type_name(dds_name: str) -> str:
    """Inverse of dds_type_name, as graph tools demangle it."""
    pkg, kind, dds, name = dds_name.split('::')
    if dds != 'dds_' or not name.endswith('_'):
        msg = f'DDS type name {dds_name!r} is not a ROS 2 mangled name'
        raise TransportError(msg)
    return f'{pkg}/{kind}/{name[:-1]}'
