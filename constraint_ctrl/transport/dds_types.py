"""ROS 2 message and service types for the DDS port, generated from rosbags' type store.

Nothing here is typed out by hand: `rosbags.typesys` ships the .msg definitions of every
standard ROS 2 package per distro (Stores.ROS2_JAZZY, Stores.ROS2_HUMBLE), including the
differences between them (sensor_msgs/Range has `variance` from Iron on; rmw_dds_common/Gid
holds 24 bytes on Humble, 16 from Iron on). For each name in MESSAGES (and everything those
types contain) `types_for(distro)` builds, once per distro:

* a cyclonedds-python struct (dataclass, exact ROS field order, top-level DDS type name
  `pkg::msg::dds_::Name_` as rmw_cyclonedds names it) so the type can be registered with DDS;
  every field has a default, like rclpy messages, and constants are class attributes;
* its CDR codec (cdr.py), which the port uses to write and read samples (`cls.__cdr__`).

A new standard message type costs one line in MESSAGES. Services are not in rosbags' stores:
their .srv texts (request and response halves, as in ros2/common_interfaces and
ros2/rcl_interfaces) are in SERVICES, parsed by rosbags' .msg parser.

Services on the wire: rmw_cyclonedds puts a 16-byte header `{uint64 guid; int64 seq}` in
front of the request/response struct. `<Service>.Request` / `.Response` are the plain structs
node code sees; `.RequestWire` / `.ResponseWire` are the DDS topic types (header members plus
the body, named `pkg::srv::dds_::Name_Request_` / `_Response_`), and `.request_codec` /
`.response_codec` encode and decode (guid, seq, body). An empty ROS struct (Trigger's request)
has the generated member `uint8 structure_needs_at_least_one_member`.
"""
from __future__ import annotations

import dataclasses
import functools
import keyword
from collections.abc import Iterable
from types import SimpleNamespace
from typing import Any

from cyclonedds.idl import IdlMeta, IdlStruct
from cyclonedds.idl import types as t
from rosbags.typesys import Stores, get_typestore, get_types_from_msg

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.cdr import (ARRAY, BASE, NAME, OCTETS, SEQUENCE, ServiceCodec,
                                           StructCodec, build_codecs)

#: Message types the DDS port offers as `port.types.<Name>` (their fields' types come along).
MESSAGES = (
    'builtin_interfaces/msg/Time',
    'builtin_interfaces/msg/Duration',
    'std_msgs/msg/Header',
    'std_msgs/msg/Bool',
    'std_msgs/msg/Float64',
    'std_msgs/msg/String',
    'std_msgs/msg/Float64MultiArray',
    'sensor_msgs/msg/JointState',
    'sensor_msgs/msg/Range',
    'geometry_msgs/msg/PointStamped',
    'geometry_msgs/msg/WrenchStamped',
    'geometry_msgs/msg/TransformStamped',
    'geometry_msgs/msg/Pose',
    'tf2_msgs/msg/TFMessage',
    'visualization_msgs/msg/MarkerArray',
    'diagnostic_msgs/msg/DiagnosticArray',
    'lifecycle_msgs/msg/TransitionEvent',
    'lifecycle_msgs/msg/TransitionDescription',
    'rosgraph_msgs/msg/Clock',
    'rcl_interfaces/msg/Log',
    'rcl_interfaces/msg/ParameterType',
    'rcl_interfaces/msg/ParameterEvent',
    'rcl_interfaces/msg/ParameterDescriptor',
    'rcl_interfaces/msg/ListParametersResult',
    'rcl_interfaces/msg/SetParametersResult',
    'rmw_dds_common/msg/ParticipantEntitiesInfo',
)

#: .srv texts: (request, response), field for field as in the upstream .srv files (the same
#: on Humble and Jazzy). Type names without a package resolve to the service's package.
SERVICES: dict[str, tuple[str, str]] = {
    'std_srvs/srv/Trigger': ('', 'bool success\nstring message'),
    'std_srvs/srv/SetBool': ('bool data', 'bool success\nstring message'),
    'rcl_interfaces/srv/SetParameters': ('Parameter[] parameters',
                                         'SetParametersResult[] results'),
    'rcl_interfaces/srv/SetParametersAtomically': ('Parameter[] parameters',
                                                   'SetParametersResult result'),
    'rcl_interfaces/srv/GetParameters': ('string[] names', 'ParameterValue[] values'),
    'rcl_interfaces/srv/GetParameterTypes': ('string[] names', 'uint8[] types'),
    'rcl_interfaces/srv/ListParameters': (
        'uint64 DEPTH_RECURSIVE=0\nstring[] prefixes\nuint64 depth',
        'ListParametersResult result'),
    'rcl_interfaces/srv/DescribeParameters': ('string[] names',
                                              'ParameterDescriptor[] descriptors'),
    'lifecycle_msgs/srv/ChangeState': ('Transition transition', 'bool success'),
    'lifecycle_msgs/srv/GetState': ('', 'State current_state'),
    'lifecycle_msgs/srv/GetAvailableStates': ('', 'State[] available_states'),
    'lifecycle_msgs/srv/GetAvailableTransitions': (
        '', 'TransitionDescription[] available_transitions'),
}

#: Default values written in .msg files, which rosbags' parser does not keep (found by a
#: search of ros2/common_interfaces and ros2/rcl_interfaces, humble and jazzy branches, for
#: fields with a default; the others there are already the zero value).
FIELD_DEFAULTS: dict[str, dict[str, Any]] = {
    'geometry_msgs/msg/Quaternion': {'w': 1.0},     # geometry_msgs/msg/Quaternion.msg: w 1
}

STORES = {'jazzy': Stores.ROS2_JAZZY, 'humble': Stores.ROS2_HUMBLE}

_IDL_PRIMITIVES: dict[str, Any] = {
    'bool': bool, 'byte': t.byte, 'char': t.uint8, 'uint8': t.uint8, 'int8': t.int8,
    'uint16': t.uint16, 'int16': t.int16, 'uint32': t.uint32, 'int32': t.int32,
    'uint64': t.uint64, 'int64': t.int64, 'float32': t.float32, 'float64': t.float64,
}
_EMPTY_MEMBER = ('structure_needs_at_least_one_member', (BASE, ('uint8', 0)))


def normalize_fieldname(name: str) -> str:
    """A ROS field name that is a Python keyword gets a trailing '_' (as rosbags and rclpy
    spell it), so it can be an attribute."""
    return f'{name}_' if keyword.iskeyword(name) else name


def body_key(srv: str, half: str) -> str:
    """Key of a service's request/response struct in our type store: 'pkg/msg/Name_Request'
    (rosbags' parser resolves unqualified field types against the key's package)."""
    pkg, _, name = srv.split('/')
    return f'{pkg}/msg/{name}_{half}'


@functools.cache
def type_store(distro: str) -> Any:
    """rosbags' type store of the distro plus our service bodies (a private copy)."""
    if distro not in STORES:
        msg = f'distro {distro!r} is not supported; use one of {", ".join(STORES)}'
        raise TransportError(msg)
    store = get_typestore(STORES[distro])
    for srv, (request, response) in SERVICES.items():
        for half, text in (('Request', request), ('Response', response)):
            store.register(get_types_from_msg(text, body_key(srv, half)))
    return store


def _fields(store: Any, name: str) -> list[tuple[str, Any]]:
    return list(store.fielddefs[name][1]) or [_EMPTY_MEMBER]


def _closure(store: Any, roots: Iterable[str]) -> list[str]:
    """Every type the roots need, nested types before the types that hold them."""
    order: list[str] = []
    seen: set[str] = set()

    def visit(name: str) -> None:
        if name in seen:
            return
        seen.add(name)
        if name not in store.fielddefs:
            msg = f'rosbags has no message type {name!r}'
            raise TransportError(msg)
        for _, (kind, detail) in _fields(store, name):
            inner = detail[0] if kind in (ARRAY, SEQUENCE) else (kind, detail)
            if inner[0] == NAME:
                visit(inner[1])
        order.append(name)

    for root in roots:
        visit(root)
    return order


def _idl_type(desc: Any, classes: dict[str, type]) -> Any:
    kind, detail = desc
    if kind == BASE:
        base, bound = detail
        if base == 'string':
            return t.bounded_str[bound] if bound else str
        if base not in _IDL_PRIMITIVES:
            msg = f'field type {base} is not supported'
            raise TransportError(msg)
        return _IDL_PRIMITIVES[base]
    if kind == NAME:
        return classes[detail]
    inner, size = detail
    if kind == ARRAY:
        return t.array[_idl_type(inner, classes), size]
    return t.sequence[_idl_type(inner, classes), size] if size else \
        t.sequence[_idl_type(inner, classes)]


def _default(desc: Any, classes: dict[str, type]) -> Any:
    kind, detail = desc
    if kind == BASE:
        base = detail[0]
        if base == 'string':
            return ''
        if base == 'bool':
            return False
        return 0.0 if base.startswith('float') else 0
    if kind == NAME:
        return dataclasses.field(default_factory=classes[detail])
    inner, size = detail
    if kind == SEQUENCE:
        return dataclasses.field(default_factory=list)
    if inner[0] == BASE and inner[1][0] in OCTETS:
        return dataclasses.field(default_factory=lambda: bytes(size))
    if inner[0] == NAME:
        cls = classes[inner[1]]
        return dataclasses.field(default_factory=lambda: [cls() for _ in range(size)])
    value = _default(inner, classes)
    return dataclasses.field(default_factory=lambda: [value] * size)


def _make_struct(class_name: str, typename: str, fields: list[tuple[str, Any, Any]],
                 attributes: dict[str, Any]) -> type:
    """A cyclonedds IdlStruct dataclass built the way `class X(IdlStruct, typename=...)` is."""
    namespace = IdlMeta.__prepare__(class_name, (IdlStruct,), typename=typename)
    for name, idl_type, default in fields:
        namespace['__annotations__'][name] = idl_type
        namespace[name] = default
    namespace.update(attributes)
    namespace['__module__'] = __name__
    namespace['__qualname__'] = class_name
    return dataclasses.dataclass(IdlMeta(class_name, (IdlStruct,), namespace))


def _message_class(store: Any, name: str, classes: dict[str, type], service: str | None) -> type:
    """The struct of one message type; `service` names the service a request/response body
    belongs to (its DDS name is then `pkg::srv::Name_Request`, used only nested in the wire
    struct, and its ROS name `pkg/srv/Name_Request`, as rclpy names the class)."""
    pkg, _, short = name.split('/')
    if service is None:
        typename, ros_type = f'{pkg}::msg::dds_::{short}_', name
    else:
        typename, ros_type = f'{pkg}::srv::{short}', f'{pkg}/srv/{short}'
    constants = {const: value for const, _, value in store.fielddefs[name][0]}
    given = FIELD_DEFAULTS.get(name, {})
    fields = [(normalize_fieldname(field), _idl_type(desc, classes),
               given.get(field, _default(desc, classes))) for field, desc in _fields(store, name)]
    return _make_struct(short, typename, fields, {**constants, '__ros_type__': ros_type})


class ServiceType:
    """A ROS service type: plain Request/Response, their DDS wire types and codecs."""

    def __init__(self, ros_type: str, request: type, response: type) -> None:
        pkg, _, name = ros_type.split('/')
        self.ros_type = ros_type
        self.Request = request
        self.Response = response
        self.RequestWire = _wire(request, f'{pkg}::srv::dds_::{name}_Request_')
        self.ResponseWire = _wire(response, f'{pkg}::srv::dds_::{name}_Response_')
        self.request_codec = ServiceCodec(request.__cdr__)
        self.response_codec = ServiceCodec(response.__cdr__)

    def __repr__(self) -> str:
        return f'ServiceType({self.ros_type!r})'


def _wire(body: type, typename: str) -> type:
    """Struct `{uint64 guid; int64 seq; body}`: the DDS topic type of one service direction."""
    return _make_struct(body.__name__ + 'Wire', typename, [
        ('guid', t.uint64, 0), ('seq', t.int64, 0),
        ('body', body, dataclasses.field(default_factory=body))], {})


@functools.cache
def types_for(distro: str) -> SimpleNamespace:
    """All message and service types of one distro, by their ROS names (built once)."""
    store = type_store(distro)
    bodies = {body_key(srv, half): srv for srv in SERVICES for half in ('Request', 'Response')}
    classes: dict[str, type] = {}
    for name in _closure(store, [*MESSAGES, *bodies]):
        classes[name] = _message_class(store, name, classes, bodies.get(name))
    codecs = build_codecs({name: store.fielddefs[name] for name in classes}, classes,
                          normalize_fieldname)
    namespace: dict[str, Any] = {}
    for name, cls in classes.items():
        cls.__cdr__ = codecs[name]
        if name not in bodies:
            _add(namespace, cls.__name__, cls, name)
    for srv in SERVICES:
        service = ServiceType(srv, classes[body_key(srv, 'Request')],
                              classes[body_key(srv, 'Response')])
        _add(namespace, srv.rsplit('/', 1)[1], service, srv)
    return SimpleNamespace(**namespace)


def _add(namespace: dict[str, Any], short: str, value: Any, full: str) -> None:
    if short in namespace:
        other = ros_type_of(namespace[short])
        msg = f'two types share the name {short}: {other} and {full}; rename one in dds_types'
        raise TransportError(msg)
    namespace[short] = value


def ros_type_of(msg_type: Any) -> str:
    """'sensor_msgs/msg/JointState' for a message class, 'std_srvs/srv/Trigger' for a service."""
    if isinstance(msg_type, ServiceType):
        return msg_type.ros_type
    ros_type = getattr(msg_type, '__ros_type__', None)
    if isinstance(ros_type, str) and isinstance(msg_type, type):
        return ros_type
    msg = f'{msg_type!r} is not a ROS message type of the DDS port'
    raise TransportError(msg)


def codec_of(msg_type: Any) -> StructCodec:
    """The CDR codec of a message class made by types_for."""
    codec = getattr(msg_type, '__cdr__', None)
    if not isinstance(codec, StructCodec):
        msg = f'{msg_type!r} is not a ROS message type of the DDS port'
        raise TransportError(msg)
    return codec
