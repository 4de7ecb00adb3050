"""ROS 2 message and service types as cyclonedds-python structs (XCDR1, exact ROS field order).

Field order and types follow the .msg/.srv files of ros2/common_interfaces, ros2/rcl_interfaces
and ros2/rmw_dds_common; the top-level DDS type name follows rmw_cyclonedds'
`pkg::msg::dds_::Name_` rule, which is all rmw_cyclonedds compares when matching endpoints.
Every field has a default, like rclpy messages, so `JointState()` and keyword construction work.

Distro differences: sensor_msgs/Range has `variance` from Iron on (absent on Humble), and
rmw_dds_common/Gid holds 24 bytes on Humble, 16 from Iron on. `types_for(distro)` returns the
matching set.

Services: `Trigger.Request` / `Trigger.Response` are the plain ROS structs that node code sees.
On the wire rmw_cyclonedds puts a 16-byte header `{uint64 guid; int64 seq}` in front of them;
`Trigger.RequestWire` / `Trigger.ResponseWire` carry it as two leading members plus the plain
struct. XCDR1 aligns members relative to the stream start, and 16 is a multiple of every
alignment, so the nested struct is byte-identical to a flattened one. An empty ROS struct
(Trigger's request) has the generated member `uint8 structure_needs_at_least_one_member`.
"""

import types as pytypes
from dataclasses import dataclass, field
from types import SimpleNamespace
from typing import Any

from cyclonedds.idl import IdlStruct
from cyclonedds.idl import types as t

from constraint_ctrl.errors import TransportError


def _zeros(n: int) -> Any:
    return field(default_factory=lambda: bytes(n))  # uint8 arrays deserialize as bytes


def _seq() -> Any:
    return field(default_factory=list)


# --- builtin_interfaces, std_msgs -------------------------------------------------------------

@dataclass
class Time(IdlStruct, typename='builtin_interfaces::msg::dds_::Time_'):
    sec: t.int32 = 0
    nanosec: t.uint32 = 0


@dataclass
class Header(IdlStruct, typename='std_msgs::msg::dds_::Header_'):
    stamp: Time = field(default_factory=Time)
    frame_id: str = ''


@dataclass
class Float64(IdlStruct, typename='std_msgs::msg::dds_::Float64_'):
    data: t.float64 = 0.0


@dataclass
class String(IdlStruct, typename='std_msgs::msg::dds_::String_'):
    data: str = ''


@dataclass
class Bool(IdlStruct, typename='std_msgs::msg::dds_::Bool_'):
    data: bool = False


@dataclass
class MultiArrayDimension(IdlStruct, typename='std_msgs::msg::dds_::MultiArrayDimension_'):
    label: str = ''
    size: t.uint32 = 0
    stride: t.uint32 = 0


@dataclass
class MultiArrayLayout(IdlStruct, typename='std_msgs::msg::dds_::MultiArrayLayout_'):
    dim: t.sequence[MultiArrayDimension] = _seq()
    data_offset: t.uint32 = 0


@dataclass
class Float64MultiArray(IdlStruct, typename='std_msgs::msg::dds_::Float64MultiArray_'):
    layout: MultiArrayLayout = field(default_factory=MultiArrayLayout)
    data: t.sequence[t.float64] = _seq()


# --- sensor_msgs, geometry_msgs --------------------------------------------------------------

@dataclass
class JointState(IdlStruct, typename='sensor_msgs::msg::dds_::JointState_'):
    header: Header = field(default_factory=Header)
    name: t.sequence[str] = _seq()
    position: t.sequence[t.float64] = _seq()
    velocity: t.sequence[t.float64] = _seq()
    effort: t.sequence[t.float64] = _seq()


@dataclass
class RangeJazzy(IdlStruct, typename='sensor_msgs::msg::dds_::Range_'):
    """sensor_msgs/Range from Iron on (with `variance`)."""

    ULTRASOUND = 0
    INFRARED = 1
    header: Header = field(default_factory=Header)
    radiation_type: t.uint8 = 0
    field_of_view: t.float32 = 0.0
    min_range: t.float32 = 0.0
    max_range: t.float32 = 0.0
    range: t.float32 = 0.0
    variance: t.float32 = 0.0


@dataclass
class RangeHumble(IdlStruct, typename='sensor_msgs::msg::dds_::Range_'):
    """sensor_msgs/Range on Humble (no `variance`)."""

    ULTRASOUND = 0
    INFRARED = 1
    header: Header = field(default_factory=Header)
    radiation_type: t.uint8 = 0
    field_of_view: t.float32 = 0.0
    min_range: t.float32 = 0.0
    max_range: t.float32 = 0.0
    range: t.float32 = 0.0


@dataclass
class Vector3(IdlStruct, typename='geometry_msgs::msg::dds_::Vector3_'):
    x: t.float64 = 0.0
    y: t.float64 = 0.0
    z: t.float64 = 0.0


@dataclass
class Point(IdlStruct, typename='geometry_msgs::msg::dds_::Point_'):
    x: t.float64 = 0.0
    y: t.float64 = 0.0
    z: t.float64 = 0.0


@dataclass
class PointStamped(IdlStruct, typename='geometry_msgs::msg::dds_::PointStamped_'):
    header: Header = field(default_factory=Header)
    point: Point = field(default_factory=Point)


@dataclass
class Wrench(IdlStruct, typename='geometry_msgs::msg::dds_::Wrench_'):
    force: Vector3 = field(default_factory=Vector3)
    torque: Vector3 = field(default_factory=Vector3)


@dataclass
class WrenchStamped(IdlStruct, typename='geometry_msgs::msg::dds_::WrenchStamped_'):
    header: Header = field(default_factory=Header)
    wrench: Wrench = field(default_factory=Wrench)


# --- diagnostic_msgs ---------------------------------------------------------------------------

@dataclass
class KeyValue(IdlStruct, typename='diagnostic_msgs::msg::dds_::KeyValue_'):
    key: str = ''
    value: str = ''


@dataclass
class DiagnosticStatus(IdlStruct, typename='diagnostic_msgs::msg::dds_::DiagnosticStatus_'):
    OK = 0
    WARN = 1
    ERROR = 2
    STALE = 3
    level: t.byte = 0
    name: str = ''
    message: str = ''
    hardware_id: str = ''
    values: t.sequence[KeyValue] = _seq()


@dataclass
class DiagnosticArray(IdlStruct, typename='diagnostic_msgs::msg::dds_::DiagnosticArray_'):
    header: Header = field(default_factory=Header)
    status: t.sequence[DiagnosticStatus] = _seq()


# --- rcl_interfaces ----------------------------------------------------------------------------

class ParameterType:
    """rcl_interfaces/msg/ParameterType holds only these constants."""

    PARAMETER_NOT_SET = 0
    PARAMETER_BOOL = 1
    PARAMETER_INTEGER = 2
    PARAMETER_DOUBLE = 3
    PARAMETER_STRING = 4
    PARAMETER_BYTE_ARRAY = 5
    PARAMETER_BOOL_ARRAY = 6
    PARAMETER_INTEGER_ARRAY = 7
    PARAMETER_DOUBLE_ARRAY = 8
    PARAMETER_STRING_ARRAY = 9


@dataclass
class ParameterValue(IdlStruct, typename='rcl_interfaces::msg::dds_::ParameterValue_'):
    type: t.uint8 = 0
    bool_value: bool = False
    integer_value: t.int64 = 0
    double_value: t.float64 = 0.0
    string_value: str = ''
    byte_array_value: t.sequence[t.byte] = _seq()
    bool_array_value: t.sequence[bool] = _seq()
    integer_array_value: t.sequence[t.int64] = _seq()
    double_array_value: t.sequence[t.float64] = _seq()
    string_array_value: t.sequence[str] = _seq()


@dataclass
class Parameter(IdlStruct, typename='rcl_interfaces::msg::dds_::Parameter_'):
    name: str = ''
    value: ParameterValue = field(default_factory=ParameterValue)


@dataclass
class FloatingPointRange(IdlStruct, typename='rcl_interfaces::msg::dds_::FloatingPointRange_'):
    from_value: t.float64 = 0.0
    to_value: t.float64 = 0.0
    step: t.float64 = 0.0


@dataclass
class IntegerRange(IdlStruct, typename='rcl_interfaces::msg::dds_::IntegerRange_'):
    from_value: t.int64 = 0
    to_value: t.int64 = 0
    step: t.uint64 = 0


@dataclass
class ParameterDescriptor(IdlStruct, typename='rcl_interfaces::msg::dds_::ParameterDescriptor_'):
    name: str = ''
    type: t.uint8 = 0
    description: str = ''
    additional_constraints: str = ''
    read_only: bool = False
    dynamic_typing: bool = False
    floating_point_range: t.sequence[FloatingPointRange, 1] = _seq()
    integer_range: t.sequence[IntegerRange, 1] = _seq()


@dataclass
class SetParametersResult(IdlStruct, typename='rcl_interfaces::msg::dds_::SetParametersResult_'):
    successful: bool = False
    reason: str = ''


@dataclass
class ListParametersResult(IdlStruct,
                           typename='rcl_interfaces::msg::dds_::ListParametersResult_'):
    names: t.sequence[str] = _seq()
    prefixes: t.sequence[str] = _seq()


@dataclass
class ParameterEvent(IdlStruct, typename='rcl_interfaces::msg::dds_::ParameterEvent_'):
    stamp: Time = field(default_factory=Time)
    node: str = ''
    new_parameters: t.sequence[Parameter] = _seq()
    changed_parameters: t.sequence[Parameter] = _seq()
    deleted_parameters: t.sequence[Parameter] = _seq()


# --- rmw_dds_common (node discovery) -----------------------------------------------------------

@dataclass
class GidJazzy(IdlStruct, typename='rmw_dds_common::msg::dds_::Gid_'):
    data: t.array[t.uint8, 16] = _zeros(16)


@dataclass
class NodeEntitiesInfoJazzy(IdlStruct, typename='rmw_dds_common::msg::dds_::NodeEntitiesInfo_'):
    node_namespace: t.bounded_str[256] = ''
    node_name: t.bounded_str[256] = ''
    reader_gid_seq: t.sequence[GidJazzy] = _seq()
    writer_gid_seq: t.sequence[GidJazzy] = _seq()


@dataclass
class ParticipantEntitiesInfoJazzy(
        IdlStruct, typename='rmw_dds_common::msg::dds_::ParticipantEntitiesInfo_'):
    gid: GidJazzy = field(default_factory=GidJazzy)
    node_entities_info_seq: t.sequence[NodeEntitiesInfoJazzy] = _seq()


@dataclass
class GidHumble(IdlStruct, typename='rmw_dds_common::msg::dds_::Gid_'):
    data: t.array[t.uint8, 24] = _zeros(24)


@dataclass
class NodeEntitiesInfoHumble(IdlStruct, typename='rmw_dds_common::msg::dds_::NodeEntitiesInfo_'):
    node_namespace: t.bounded_str[256] = ''
    node_name: t.bounded_str[256] = ''
    reader_gid_seq: t.sequence[GidHumble] = _seq()
    writer_gid_seq: t.sequence[GidHumble] = _seq()


@dataclass
class ParticipantEntitiesInfoHumble(
        IdlStruct, typename='rmw_dds_common::msg::dds_::ParticipantEntitiesInfo_'):
    gid: GidHumble = field(default_factory=GidHumble)
    node_entities_info_seq: t.sequence[NodeEntitiesInfoHumble] = _seq()


# --- services ----------------------------------------------------------------------------------

def _wire(body: type, typename: str) -> type:
    """Struct `{uint64 guid; int64 seq; body}` named as rmw_cyclonedds names the service type."""
    def fill(ns: dict[str, Any]) -> None:
        ns['__annotations__'] = {'guid': t.uint64, 'seq': t.int64, 'body': body}
        ns['guid'] = 0
        ns['seq'] = 0
        ns['body'] = field(default_factory=body)
        ns['__module__'] = __name__
    cls = pytypes.new_class(body.__name__ + 'Wire', (IdlStruct,), {'typename': typename}, fill)
    return dataclass(cls)


class ServiceType:
    """A ROS service type: plain Request/Response and their header-carrying wire forms."""

    def __init__(self, ros_type: str, request: type, response: type) -> None:
        pkg, _, name = ros_type.split('/')
        self.ros_type = ros_type
        self.Request = request
        self.Response = response
        self.RequestWire = _wire(request, f'{pkg}::srv::dds_::{name}_Request_')
        self.ResponseWire = _wire(response, f'{pkg}::srv::dds_::{name}_Response_')

    def __repr__(self) -> str:
        return f'ServiceType({self.ros_type!r})'


@dataclass
class TriggerRequest(IdlStruct, typename='std_srvs::srv::Trigger_Request'):
    structure_needs_at_least_one_member: t.uint8 = 0


@dataclass
class TriggerResponse(IdlStruct, typename='std_srvs::srv::Trigger_Response'):
    success: bool = False
    message: str = ''


@dataclass
class SetBoolRequest(IdlStruct, typename='std_srvs::srv::SetBool_Request'):
    data: bool = False


@dataclass
class SetBoolResponse(IdlStruct, typename='std_srvs::srv::SetBool_Response'):
    success: bool = False
    message: str = ''


@dataclass
class SetParametersRequest(IdlStruct, typename='rcl_interfaces::srv::SetParameters_Request'):
    parameters: t.sequence[Parameter] = _seq()


@dataclass
class SetParametersResponse(IdlStruct, typename='rcl_interfaces::srv::SetParameters_Response'):
    results: t.sequence[SetParametersResult] = _seq()


@dataclass
class SetParametersAtomicallyRequest(
        IdlStruct, typename='rcl_interfaces::srv::SetParametersAtomically_Request'):
    parameters: t.sequence[Parameter] = _seq()


@dataclass
class SetParametersAtomicallyResponse(
        IdlStruct, typename='rcl_interfaces::srv::SetParametersAtomically_Response'):
    result: SetParametersResult = field(default_factory=SetParametersResult)


@dataclass
class GetParametersRequest(IdlStruct, typename='rcl_interfaces::srv::GetParameters_Request'):
    names: t.sequence[str] = _seq()


@dataclass
class GetParametersResponse(IdlStruct, typename='rcl_interfaces::srv::GetParameters_Response'):
    values: t.sequence[ParameterValue] = _seq()


@dataclass
class GetParameterTypesRequest(IdlStruct,
                               typename='rcl_interfaces::srv::GetParameterTypes_Request'):
    names: t.sequence[str] = _seq()


@dataclass
class GetParameterTypesResponse(IdlStruct,
                                typename='rcl_interfaces::srv::GetParameterTypes_Response'):
    types: t.sequence[t.uint8] = _seq()


@dataclass
class ListParametersRequest(IdlStruct, typename='rcl_interfaces::srv::ListParameters_Request'):
    DEPTH_RECURSIVE = 0
    prefixes: t.sequence[str] = _seq()
    depth: t.uint64 = 0


@dataclass
class ListParametersResponse(IdlStruct, typename='rcl_interfaces::srv::ListParameters_Response'):
    result: ListParametersResult = field(default_factory=ListParametersResult)


@dataclass
class DescribeParametersRequest(IdlStruct,
                                typename='rcl_interfaces::srv::DescribeParameters_Request'):
    names: t.sequence[str] = _seq()


@dataclass
class DescribeParametersResponse(IdlStruct,
                                 typename='rcl_interfaces::srv::DescribeParameters_Response'):
    descriptors: t.sequence[ParameterDescriptor] = _seq()


Trigger = ServiceType('std_srvs/srv/Trigger', TriggerRequest, TriggerResponse)
SetBool = ServiceType('std_srvs/srv/SetBool', SetBoolRequest, SetBoolResponse)
SetParameters = ServiceType('rcl_interfaces/srv/SetParameters', SetParametersRequest,
                            SetParametersResponse)
SetParametersAtomically = ServiceType('rcl_interfaces/srv/SetParametersAtomically',
                                      SetParametersAtomicallyRequest,
                                      SetParametersAtomicallyResponse)
GetParameters = ServiceType('rcl_interfaces/srv/GetParameters', GetParametersRequest,
                            GetParametersResponse)
GetParameterTypes = ServiceType('rcl_interfaces/srv/GetParameterTypes',
                                GetParameterTypesRequest, GetParameterTypesResponse)
ListParameters = ServiceType('rcl_interfaces/srv/ListParameters', ListParametersRequest,
                             ListParametersResponse)
DescribeParameters = ServiceType('rcl_interfaces/srv/DescribeParameters',
                                 DescribeParametersRequest, DescribeParametersResponse)

_COMMON = {
    cls.__name__: cls for cls in (
        Time, Header, Float64, String, Bool, MultiArrayDimension, MultiArrayLayout,
        Float64MultiArray, JointState, Vector3, Point, PointStamped, Wrench, WrenchStamped,
        KeyValue, DiagnosticStatus, DiagnosticArray, ParameterType, ParameterValue, Parameter,
        FloatingPointRange, IntegerRange, ParameterDescriptor, SetParametersResult,
        ListParametersResult, ParameterEvent)}
_SERVICES = {
    srv.ros_type.rsplit('/', 1)[1]: srv for srv in (
        Trigger, SetBool, SetParameters, SetParametersAtomically, GetParameters,
        GetParameterTypes, ListParameters, DescribeParameters)}
_BY_DISTRO = {
    'jazzy': {'Range': RangeJazzy, 'Gid': GidJazzy, 'NodeEntitiesInfo': NodeEntitiesInfoJazzy,
              'ParticipantEntitiesInfo': ParticipantEntitiesInfoJazzy},
    'humble': {'Range': RangeHumble, 'Gid': GidHumble, 'NodeEntitiesInfo': NodeEntitiesInfoHumble,
               'ParticipantEntitiesInfo': ParticipantEntitiesInfoHumble},
}


def types_for(distro: str) -> SimpleNamespace:
    """All message and service types of one distro, by their ROS names."""
    if distro not in _BY_DISTRO:
        msg = f'distro {distro!r} is not supported; use one of {", ".join(_BY_DISTRO)}'
        raise TransportError(msg)
    return SimpleNamespace(**_COMMON, **_BY_DISTRO[distro], **_SERVICES)


def ros_type_of(msg_type: Any) -> str:
    """'sensor_msgs/msg/JointState' for a message class, 'std_srvs/srv/Trigger' for a service."""
    if isinstance(msg_type, ServiceType):
        return msg_type.ros_type
    typename = getattr(msg_type, '__idl_typename__', '')
    parts = typename.split('::')
    if len(parts) == 4 and parts[2] == 'dds_' and parts[3].endswith('_'):
        return f'{parts[0]}/{parts[1]}/{parts[3][:-1]}'
    msg = f'{msg_type!r} is not a ROS message type of the DDS port'
    raise TransportError(msg)
