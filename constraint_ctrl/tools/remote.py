"""`constraint-ctrl call | param | echo`: drive a running node without a ROS install.

On a ROS 2 install the ros2 command line does the same (`ros2 service call`, `ros2 param`,
`ros2 topic echo`); these commands exist for machines without one. They are clients on the
package's own DDS port (transport/port.open_port('dds', ...)): a short-lived hidden node
(its name starts with '_', as ros2cli's nodes do) that finds the target node through
discovery, calls its Trigger and parameter services, or subscribes to a topic. The domain is
ROS_DOMAIN_ID from the environment; without CYCLONEDDS_URI the port talks on loopback only,
so only nodes on this machine are reachable.

Exit codes: 0 done; 1 the node refused or the call failed (the reason is printed: the Trigger
message, the SetParameters result reason); 2 a usage error or an unreachable node (no such
node, service or publisher within --timeout; the message says which nodes discovery did
see and what to check).

Values for `param set` are read as YAML, as `ros2 param set` reads them (ros2cli
ros2param/api get_parameter_value): true/false, integers, floats, strings, and lists whose
items share one of those types; text that is not valid YAML, and a list of mixed types, stay
a string. So `3` is an integer and `3.0` a double: a node's double parameter refuses `3`.
"""
from __future__ import annotations

import argparse
import dataclasses
import keyword
import math
import os
import queue
import sys
import threading
import time
from typing import Any

from ..errors import ConstraintCtrlError

DEFAULT_NODE = '/constraint_controller'
DEFAULT_TIMEOUT_S = 5.0
#: replies may take longer than finding the node: an activation answers after the new
#: skill's first tick (the node waits up to 3 s for it), a reload after compiling
MIN_REPLY_WAIT_S = 10.0
_POLL_S = 0.05


class Unreachable(ConstraintCtrlError):
    """The node, its service or the topic's publisher was not found in time (exit code 2)."""


# ------------------------------------------------------------------------------- values

def parse_value(text: str) -> tuple[str, Any]:
    """(kind, value) of a command-line parameter value, read as `ros2 param set` reads it.

    kind is one of bool, integer, double, string, bool_array, integer_array, double_array,
    string_array (rcl_interfaces/ParameterType without the PARAMETER_ prefix, lower case).
    """
    import yaml
    try:
        value = yaml.safe_load(text)
    except yaml.YAMLError:
        return 'string', text
    if isinstance(value, bool):
        return 'bool', value
    if isinstance(value, int):
        return 'integer', value
    if isinstance(value, float):
        return 'double', value
    if isinstance(value, list):
        for kind, cls in (('bool_array', bool), ('integer_array', int),
                          ('double_array', float), ('string_array', str)):
            # bool is an int subclass: an integer list must not take [true, false]
            if all(isinstance(v, cls) and (cls is bool or not isinstance(v, bool))
                   for v in value):
                return kind, list(value)
        return 'string', text
    if isinstance(value, str):
        return 'string', value
    return 'string', text          # null, a mapping, a date: the text as given


def parameter_value_msg(kind: str, value: Any, types: Any) -> Any:
    """rcl_interfaces/ParameterValue of a parsed value."""
    pt = types.ParameterType
    code = getattr(pt, f'PARAMETER_{kind.upper()}')
    msg = types.ParameterValue(type=code)
    setattr(msg, f'{kind}_value', value)
    return msg


def format_value(value: Any) -> str:
    """A parameter value as YAML flow text, so `param set NAME "$(param get NAME)"` gives the
    same value back (strings that would read as another type are quoted)."""
    import yaml
    if isinstance(value, (bytes, bytearray)):
        value = list(value)
    text = yaml.safe_dump(value, default_flow_style=True, width=math.inf,
                          allow_unicode=True).strip()
    if text.endswith('\n...'):
        text = text[:-4].rstrip()
    return text


# ------------------------------------------------------------------------------- messages

def _field_name(name: str) -> str:
    """The ROS field name of a struct attribute (keywords carry a trailing '_')."""
    return name[:-1] if name.endswith('_') and keyword.iskeyword(name[:-1]) else name


def message_to_plain(value: Any) -> Any:
    """A message as nested dicts and lists in field order (byte arrays as lists of ints)."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {_field_name(f.name): message_to_plain(getattr(value, f.name))
                for f in dataclasses.fields(value)}
    if isinstance(value, (bytes, bytearray)):
        return list(value)
    if isinstance(value, (list, tuple)):
        return [message_to_plain(v) for v in value]
    return value


def format_message(msg: Any) -> str:
    """A message as YAML block text, the way `ros2 topic echo` prints one (without the
    '---' that follows it)."""
    import yaml
    return yaml.safe_dump(message_to_plain(msg), sort_keys=False, default_flow_style=False,
                          width=math.inf, allow_unicode=True)


def full_type_name(text: str) -> str:
    """'std_msgs/String' or 'std_msgs/msg/String' -> 'std_msgs/msg/String'."""
    parts = text.strip('/').split('/')
    if len(parts) == 2:
        parts.insert(1, 'msg')
    if len(parts) != 3 or parts[1] != 'msg' or not all(parts):
        msg = f'--type {text!r}: expected a message type such as std_msgs/msg/String'
        raise ConstraintCtrlError(msg)
    return '/'.join(parts)


def message_class(types: Any, ros_type: str) -> Any:
    from ..transport.dds_types import MESSAGES, ros_type_of
    for value in vars(types).values():
        if isinstance(value, type):
            try:
                if ros_type_of(value) == ros_type:
                    return value
            except ConstraintCtrlError:
                continue
    known = ', '.join(sorted(m for m in MESSAGES if not m.startswith('rmw_dds_common/')))
    msg = f'cannot decode {ros_type}: this tool knows the message types {known}'
    raise ConstraintCtrlError(msg)


# ------------------------------------------------------------------------------- names

def split_node(text: str) -> tuple[str, str, str]:
    """'--node' value -> (fully qualified name, namespace, base name); a missing leading '/'
    is added ('constraint_controller' is '/constraint_controller')."""
    from ..transport.ros_args import node_fqn, normalize_namespace, validate_node_name
    fqn = '/' + text.strip().lstrip('/')
    namespace, _, base = fqn.rpartition('/')
    base = validate_node_name(base, '--node')
    namespace = normalize_namespace(namespace, '--node')
    return node_fqn(namespace, base), namespace, base


def topic_name(text: str, node: str) -> str:
    """'~/status' is the node's own topic; a relative name is relative to '/', as in
    `ros2 topic echo`; an absolute one stays."""
    from ..transport.ros_args import expand_name
    _, namespace, base = split_node(node)
    return expand_name(text, base, namespace if text.startswith('~') else '/')


# ------------------------------------------------------------------------------- the client

class Client:
    """One hidden DDS node for the length of a command."""

    def __init__(self, node: str, timeout_s: float, distro: str) -> None:
        if not (math.isfinite(timeout_s) and timeout_s > 0):
            msg = f'--timeout must be a number of seconds > 0, got {timeout_s}'
            raise ConstraintCtrlError(msg)
        self.node, self.namespace, self.base = split_node(node)
        self.timeout = timeout_s
        self.reply_wait = max(timeout_s, MIN_REPLY_WAIT_S)
        from ..transport.port import open_port
        self.port = open_port('dds', f'_constraint_ctrl_cli_{os.getpid()}', [], distro=distro)
        self.types = self.port.types

    def close(self) -> None:
        self.port.shutdown()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- finding things ---------------------------------------------------------------

    def _nodes(self) -> list[str]:
        from ..transport.ros_args import node_fqn
        return sorted(node_fqn(ns, name) for name, ns in self.port.get_node_names_and_namespaces()
                      if not name.startswith('_'))

    def _where(self) -> str:
        """What discovery sees, and what to check, for an unreachable message."""
        from ..transport.dds_discovery import domain_id
        nodes = self._nodes()
        seen = ', '.join(nodes) if nodes else 'none'
        reach = ('' if os.environ.get('CYCLONEDDS_URI') else
                 '; without CYCLONEDDS_URI only nodes on this machine are reachable')
        return (f'nodes seen on ROS_DOMAIN_ID={domain_id()}: {seen}. Is the node running, '
                f'with the same ROS_DOMAIN_ID{reach}?')

    def unreachable(self, what: str) -> Unreachable:
        if self.node in self._nodes():
            served = [name for name, _ in self.port.get_service_names_and_types_by_node(
                self.base, self.namespace)]
            skills = sorted(name.split('/')[-2] for name in served
                            if name.startswith(f'{self.node}/skills/')
                            and name.endswith('/activate'))
            extra = f' (its skills: {", ".join(skills) or "none"})' if '/skills/' in what else ''
            return Unreachable(f'{what} not available: node {self.node} is running but does '
                               f'not serve it{extra}')
        return Unreachable(f'{what} not available within {self.timeout:g} s: no node '
                           f'{self.node}; {self._where()}')

    def call(self, srv_type: Any, service: str, request: Any) -> Any | None:
        """The reply, or None when none came (after the service was found); raises
        Unreachable when the service is not found within the timeout."""
        client = self.port.create_client(srv_type, service)
        if not client.wait_for_service(self.timeout):
            raise self.unreachable(f'service {service}')
        return client.call(request, self.reply_wait)

    def no_reply(self, service: str) -> int:
        print(f'failed: no reply from {service} within {self.reply_wait:g} s (the request may '
              'still take effect)', file=sys.stderr)
        return 1


# ------------------------------------------------------------------------------- commands

def _trigger(args: argparse.Namespace, service_suffix: str) -> int:
    with Client(args.node, args.timeout, args.distro) as client:
        t = client.types
        service = f'{client.node}/{service_suffix}'
        reply = client.call(t.Trigger, service, t.Trigger.Request())
        if reply is None:
            return client.no_reply(service)
        if not reply.success:
            print(f'refused: {reply.message or "(no reason given)"}', file=sys.stderr)
            return 1
        print(reply.message or 'done')
        return 0


def call_activate(args: argparse.Namespace) -> int:
    from ..transport.ros_args import validate_node_name
    validate_node_name(args.skill, 'skill')   # a skill name is one token of the service name
    return _trigger(args, f'skills/{args.skill}/activate')


def call_hold(args: argparse.Namespace) -> int:
    return _trigger(args, 'hold')


def call_reload(args: argparse.Namespace) -> int:
    return _trigger(args, 'reload_skills')


def param_set(args: argparse.Namespace) -> int:
    kind, value = parse_value(args.value)
    with Client(args.node, args.timeout, args.distro) as client:
        t = client.types
        service = f'{client.node}/set_parameters'
        parameter = t.Parameter(name=args.name, value=parameter_value_msg(kind, value, t))
        reply = client.call(t.SetParameters, service,
                            t.SetParameters.Request(parameters=[parameter]))
        if reply is None:
            return client.no_reply(service)
        if len(reply.results) != 1:
            print(f'failed: {service} answered {len(reply.results)} results for one '
                  'parameter', file=sys.stderr)
            return 1
        result = reply.results[0]
        if not result.successful:
            reason = result.reason or '(no reason given)'
            if kind == 'integer' and 'of type double' in reason:
                reason += f' (write {value}.0 for a double)'
            print(f'refused: {reason}', file=sys.stderr)
            return 1
        print(f'set {args.name} to {format_value(value)}')
        return 0


def param_get(args: argparse.Namespace) -> int:
    from ..transport.dds_parameters import from_msg
    with Client(args.node, args.timeout, args.distro) as client:
        t = client.types
        service = f'{client.node}/get_parameters'
        reply = client.call(t.GetParameters, service, t.GetParameters.Request(names=[args.name]))
        if reply is None:
            return client.no_reply(service)
        values = list(reply.values)
        if len(values) != 1 or values[0].type == t.ParameterType.PARAMETER_NOT_SET:
            print(f'failed: node {client.node} has no parameter {args.name!r} (see: '
                  'constraint-ctrl param list)', file=sys.stderr)
            return 1
        print(format_value(from_msg(values[0])))
        return 0


def param_list(args: argparse.Namespace) -> int:
    with Client(args.node, args.timeout, args.distro) as client:
        t = client.types
        service = f'{client.node}/list_parameters'
        prefixes = [args.prefix] if args.prefix else []
        reply = client.call(t.ListParameters, service,
                            t.ListParameters.Request(prefixes=prefixes, depth=0))
        if reply is None:
            return client.no_reply(service)
        for name in sorted(reply.result.names):
            print(name)
        return 0


def _echo_profile(publishers: list[tuple[str, bool, bool]]) -> str:
    """A reader QoS every publisher matches, as `ros2 topic echo` adapts its own: best effort
    when any publisher is, the latest retained sample when all retain one (transient local)."""
    if not all(reliable for _, reliable, _ in publishers):
        return 'sensor'
    if all(latched for _, _, latched in publishers):
        return 'status'
    return 'default'


def echo(args: argparse.Namespace) -> int:
    if args.count is not None and args.count < 1:
        raise ConstraintCtrlError(f'--count must be at least 1, got {args.count}')
    wanted = full_type_name(args.type) if args.type else None
    with Client(args.node, args.timeout, args.distro) as client:
        topic = topic_name(args.topic, client.node)
        port = client.port
        deadline = time.monotonic() + client.timeout
        publishers = port.publisher_qos(topic)
        while not publishers and time.monotonic() < deadline:
            time.sleep(_POLL_S)
            publishers = port.publisher_qos(topic)
        if not publishers:
            raise Unreachable(f'no publisher on {topic} within {client.timeout:g} s; '
                              f'{client._where()}{_tilde_hint(args.topic)}')
        found = sorted({ros_type for ros_type, _, _ in publishers})
        if wanted is None and len(found) > 1:
            raise ConstraintCtrlError(f'{topic} is published with several types '
                                      f'({", ".join(found)}): choose one with --type')
        ros_type = wanted or found[0]
        if ros_type not in found:
            raise ConstraintCtrlError(f'{topic} is published as {", ".join(found)}, not '
                                      f'{ros_type}')
        received: queue.Queue[Any] = queue.Queue()
        port.create_subscription(message_class(client.types, ros_type), topic, received.put,
                                 _echo_profile(publishers))
        spinner = threading.Thread(target=port.spin, daemon=True)
        spinner.start()
        print(f'echo {topic} ({ros_type}) from {len(publishers)} publisher(s); '
              + ('Ctrl-C to stop' if args.count is None else f'{args.count} message(s)'),
              file=sys.stderr, flush=True)
        printed = 0
        restore = _stop_signals_end_echo()
        try:
            while args.count is None or printed < args.count:
                try:
                    msg = received.get(timeout=0.2)
                except queue.Empty:
                    continue
                sys.stdout.write(format_message(msg) + '---\n')
                sys.stdout.flush()
                printed += 1
        except KeyboardInterrupt:
            pass                      # Ctrl-C (or SIGTERM) is how an endless echo ends
        finally:
            restore()
            port.shutdown()           # ends spin(); closing the port follows in close()
            spinner.join(5.0)
        return 0


def _stop_signals_end_echo() -> Any:
    """SIGINT and SIGTERM end an echo, so the node is withdrawn and its reader unmatched (a
    reader killed without that stays matched at the publisher until its lease ends). SIGINT
    gets our handler even when the process inherited it ignored (started from a script or a
    test harness that ignores it): an endless echo has no other way to end cleanly, as the
    ros2 command line's echo installs its own handler too. Returns the function that puts the
    previous handlers back."""
    import signal
    if threading.current_thread() is not threading.main_thread():
        return lambda: None

    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    previous = {sig: signal.signal(sig, stop) for sig in (signal.SIGINT, signal.SIGTERM)}

    def restore() -> None:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    return restore


def _tilde_hint(text: str) -> str:
    home = os.path.expanduser('~')
    if home not in ('', '/', '~') and text.startswith(home + '/'):
        return (f" (did the shell replace '~' with {home}? quote the name: "
                f"'~/{text[len(home) + 1:]}')")
    return ''


# ------------------------------------------------------------------------------- command line

def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument('--node', default=DEFAULT_NODE,
                        help=f'fully qualified name of the node (default: {DEFAULT_NODE})')
    parser.add_argument('--timeout', type=float, default=DEFAULT_TIMEOUT_S, metavar='S',
                        help='seconds to wait for the node (its service or the topic\'s '
                             f'publisher) to be found (default: {DEFAULT_TIMEOUT_S:g}); a reply '
                             f'may take up to max(S, {MIN_REPLY_WAIT_S:g}) s')
    parser.add_argument('--distro', choices=('auto', 'jazzy', 'humble'), default='auto',
                        help='ROS 2 message layouts of the node (auto: jazzy)')


_EPILOG = ('Works without a ROS install, over the DDS transport on ROS_DOMAIN_ID (loopback only '
           'unless CYCLONEDDS_URI is set). Exit codes: 0 done, 1 refused or failed (reason '
           'printed), 2 usage error or node not reachable. On a ROS 2 install the ros2 command '
           'line does the same: ros2 service call, ros2 param, ros2 topic echo.')


def add_commands(sub: Any) -> None:
    """Add `call`, `param` and `echo` to the subcommands of `constraint-ctrl`."""
    p = sub.add_parser('call', help='call a service of a running controller (activate a skill, '
                       'hold, reload the skills)', epilog=_EPILOG)
    calls = p.add_subparsers(dest='call', required=True, metavar='{activate,hold,reload}')
    q = calls.add_parser('activate', help='switch to a skill (~/skills/SKILL/activate); the reply '
                         'comes after its first tick', epilog=_EPILOG)
    q.add_argument('skill')
    _common(q)
    q.set_defaults(func=call_activate)
    q = calls.add_parser('hold', help='hold the arm (~/hold: zero velocity, watchdog active)',
                         epilog=_EPILOG)
    _common(q)
    q.set_defaults(func=call_hold)
    q = calls.add_parser('reload', help='load new or changed skill files (~/reload_skills)',
                         epilog=_EPILOG)
    _common(q)
    q.set_defaults(func=call_reload)

    p = sub.add_parser('param', help='set, get or list parameters of a running node',
                       epilog=_EPILOG)
    params = p.add_subparsers(dest='param', required=True, metavar='{set,get,list}')
    q = params.add_parser('set', help='set one parameter (the value is read as YAML: 3 is an '
                          'integer, 3.0 a double, [a, b] a list)', epilog=_EPILOG)
    q.add_argument('name')
    q.add_argument('value')
    _common(q)
    q.set_defaults(func=param_set)
    q = params.add_parser('get', help='print the value in force', epilog=_EPILOG)
    q.add_argument('name')
    _common(q)
    q.set_defaults(func=param_get)
    q = params.add_parser('list', help='list the parameter names', epilog=_EPILOG)
    q.add_argument('prefix', nargs='?', default='',
                   help='only names under this prefix (e.g. watchdog)')
    _common(q)
    q.set_defaults(func=param_list)

    p = sub.add_parser('echo', help='print the messages of a topic as YAML text',
                       epilog=_EPILOG)
    p.add_argument('topic', help="topic name; '~/status' is the node's own (~/events, "
                   "~/command, ...), a relative name is relative to '/'")
    p.add_argument('--count', type=int, metavar='N', help='stop after N messages (default: '
                   'run until Ctrl-C)')
    p.add_argument('--type', metavar='TYPE', help='message type (default: the type the '
                   "topic's publishers announce), e.g. std_msgs/msg/String")
    _common(p)
    p.set_defaults(func=echo)


__all__ = ['DEFAULT_NODE', 'Unreachable', 'add_commands', 'format_message', 'format_value',
           'message_to_plain', 'parse_value', 'parameter_value_msg', 'split_node', 'topic_name']
