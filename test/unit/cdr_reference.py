"""The outside reference for the DDS port's CDR: rosbags' serialiser, and helpers to use it.

rosbags (PyPI `rosbags`, `get_typestore(Stores.ROS2_JAZZY / ROS2_HUMBLE)`) carries the .msg
definitions of each distro and serialises/deserialises ROS 2 CDR. Service definitions are not
in its stores; they are registered here from the .srv texts of the upstream packages, copied
field for field and kept separate from the copy in dds_types.SERVICES on purpose (a typo in
either shows up as a byte difference): ros2/common_interfaces std_srvs/srv/{Trigger,SetBool}.srv,
ros2/rcl_interfaces rcl_interfaces/srv/*.srv and lifecycle_msgs/srv/*.srv (humble and jazzy
branches, identical).
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
from rosbags.interfaces import Nodetype
from rosbags.typesys import Stores, get_types_from_msg, get_typestore

DISTROS = ('jazzy', 'humble')

_DTYPES = {'bool': np.bool_, 'byte': np.uint8, 'char': np.uint8, 'uint8': np.uint8,
           'int8': np.int8, 'uint16': np.uint16, 'int16': np.int16, 'uint32': np.uint32,
           'int32': np.int32, 'uint64': np.uint64, 'int64': np.int64, 'float32': np.float32,
           'float64': np.float64}

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
    'lifecycle_msgs/msg/ChangeState_Request': 'Transition transition',
    'lifecycle_msgs/msg/ChangeState_Response': 'bool success',
    'lifecycle_msgs/msg/GetState_Request': '',
    'lifecycle_msgs/msg/GetState_Response': 'State current_state',
    'lifecycle_msgs/msg/GetAvailableStates_Request': '',
    'lifecycle_msgs/msg/GetAvailableStates_Response': 'State[] available_states',
    'lifecycle_msgs/msg/GetAvailableTransitions_Request': '',
    'lifecycle_msgs/msg/GetAvailableTransitions_Response':
        'TransitionDescription[] available_transitions',
}


def _store(distro: str) -> Any:
    store = get_typestore(Stores.ROS2_JAZZY if distro == 'jazzy' else Stores.ROS2_HUMBLE)
    for name, text in SRV_DEFINITIONS.items():
        store.register(get_types_from_msg(text, name))
    return store


STORES = {distro: _store(distro) for distro in DISTROS}


def reference_name(msg_type: type) -> str:
    """Name of our class's type in the reference store ('pkg/msg/Name_Request' for bodies)."""
    return msg_type.__ros_type__.replace('/srv/', '/msg/')


def fields_of(store: Any, msgtype: str) -> list[tuple[str, Any]]:
    return list(store.fielddefs[msgtype][1])


def to_rosbags(obj: Any, msgtype: str, store: Any) -> Any:
    """Rebuild our message as rosbags' message, field by field in rosbags' declared order."""
    kwargs = {}
    fields = fields_of(store, msgtype)
    if not fields:   # rosbags' empty struct: its serialiser writes the one padding byte itself
        return store.types[msgtype]()
    for name, (kind, detail) in fields:
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


def rosbags_bytes(obj: Any, distro: str, *, little_endian: bool = True) -> bytes:
    store = STORES[distro]
    name = reference_name(type(obj))
    return bytes(store.serialize_cdr(to_rosbags(obj, name, store), name,
                                     little_endian=little_endian))


def plain(value: Any) -> Any:
    """A comparable form of a message: dataclasses -> dicts, any sequence -> list,
    bytes -> list of ints, NaN -> the string 'nan' (NaN != NaN)."""
    if dataclasses.is_dataclass(value):
        # ours, or rosbags' (whose constants and __msgtype__ are dataclass fields too; ROS
        # field names are lower case, constants upper case)
        return {f.name: plain(getattr(value, f.name)) for f in dataclasses.fields(value)
                if not f.name.startswith('__') and not f.name.isupper()}
    if isinstance(value, (bytes, bytearray)):
        return list(value)
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(v) for v in value]
    if isinstance(value, (float, np.floating)):
        return 'nan' if math.isnan(value) else float(value)
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    return value
