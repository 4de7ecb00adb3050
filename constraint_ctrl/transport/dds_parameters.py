"""Node parameters of the DDS port, with the rules and services an rclpy node has.

Rules mirrored from rclpy's Node (node.py, parameter_service.py):
* launch overrides are declared when the node starts (automatically_declare_parameters_from_
  overrides=True); a later `declare_parameter` of such a name adopts the override's value;
* parameters are statically typed: a change to another type is rejected, as is a change of a
  read-only parameter or of an undeclared name;
* SetParameters validates and applies each parameter on its own (one result per parameter);
  SetParametersAtomically validates all together and applies all or none;
* GetParameters / DescribeParameters / GetParameterTypes answer an empty list when any
  requested name is unknown; ListParameters filters by prefixes and depth as rclpy does;
* every accepted change is published as rcl_interfaces/ParameterEvent on /parameter_events.

The validator sees {name: new value} and returns (ok, reason); listeners see the new values
after they were stored. Register both after declaring the node's parameters.
"""
from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.dds_types import types_for
from constraint_ctrl.transport.port import ParameterValue, ParameterView

PT = types_for('jazzy').ParameterType   # its constants are the same on every distro
Validator = Callable[[dict[str, ParameterValue]], tuple[bool, str]]
Listener = Callable[[dict[str, ParameterValue]], None]

_TYPE_NAMES = {
    PT.PARAMETER_NOT_SET: 'not set', PT.PARAMETER_BOOL: 'bool', PT.PARAMETER_INTEGER: 'integer',
    PT.PARAMETER_DOUBLE: 'double', PT.PARAMETER_STRING: 'string',
    PT.PARAMETER_BYTE_ARRAY: 'byte array', PT.PARAMETER_BOOL_ARRAY: 'bool array',
    PT.PARAMETER_INTEGER_ARRAY: 'integer array', PT.PARAMETER_DOUBLE_ARRAY: 'double array',
    PT.PARAMETER_STRING_ARRAY: 'string array'}
_LIST_TYPES = ((bool, PT.PARAMETER_BOOL_ARRAY), (int, PT.PARAMETER_INTEGER_ARRAY),
               (float, PT.PARAMETER_DOUBLE_ARRAY), (str, PT.PARAMETER_STRING_ARRAY))


def type_of(value: Any) -> int:
    """ParameterType of a Python value (bool before int: bool is an int subclass)."""
    if isinstance(value, bool):
        return PT.PARAMETER_BOOL
    if isinstance(value, int):
        return PT.PARAMETER_INTEGER
    if isinstance(value, float):
        return PT.PARAMETER_DOUBLE
    if isinstance(value, str):
        return PT.PARAMETER_STRING
    if isinstance(value, (bytes, bytearray)):
        return PT.PARAMETER_BYTE_ARRAY
    if isinstance(value, (list, tuple)) and value:
        for kind, code in _LIST_TYPES:
            if all(type(v) is kind for v in value):
                return code
    return PT.PARAMETER_NOT_SET


def to_msg(value: Any, types: SimpleNamespace) -> Any:
    """Python value -> rcl_interfaces/ParameterValue."""
    code = type_of(value)
    msg = types.ParameterValue(type=code)
    slot = {PT.PARAMETER_BOOL: 'bool_value', PT.PARAMETER_INTEGER: 'integer_value',
            PT.PARAMETER_DOUBLE: 'double_value', PT.PARAMETER_STRING: 'string_value',
            PT.PARAMETER_BYTE_ARRAY: 'byte_array_value',
            PT.PARAMETER_BOOL_ARRAY: 'bool_array_value',
            PT.PARAMETER_INTEGER_ARRAY: 'integer_array_value',
            PT.PARAMETER_DOUBLE_ARRAY: 'double_array_value',
            PT.PARAMETER_STRING_ARRAY: 'string_array_value'}.get(code)
    if slot is not None:
        setattr(msg, slot, list(value) if code >= PT.PARAMETER_BYTE_ARRAY else value)
    return msg


def from_msg(msg: Any) -> Any:
    """rcl_interfaces/ParameterValue -> Python value (None for NOT_SET or unknown types)."""
    return {
        PT.PARAMETER_BOOL: lambda: bool(msg.bool_value),
        PT.PARAMETER_INTEGER: lambda: int(msg.integer_value),
        PT.PARAMETER_DOUBLE: lambda: float(msg.double_value),
        PT.PARAMETER_STRING: lambda: str(msg.string_value),
        PT.PARAMETER_BYTE_ARRAY: lambda: bytes(msg.byte_array_value),
        PT.PARAMETER_BOOL_ARRAY: lambda: [bool(v) for v in msg.bool_array_value],
        PT.PARAMETER_INTEGER_ARRAY: lambda: [int(v) for v in msg.integer_array_value],
        PT.PARAMETER_DOUBLE_ARRAY: lambda: [float(v) for v in msg.double_array_value],
        PT.PARAMETER_STRING_ARRAY: lambda: [str(v) for v in msg.string_array_value],
    }.get(msg.type, lambda: None)()


@dataclass
class _Entry:
    value: Any
    type: int
    description: str = ''
    read_only: bool = False
    claimed: bool = False  # declared by node code (not only by a launch override)


class ParameterStore:
    """Declared parameters of one node; thread-safe; serves the standard parameter services."""

    def __init__(self, node_fqn: str, overrides: dict[str, Any], types: SimpleNamespace,
                 now_ns: Callable[[], int],
                 publish_event: Callable[[Any], None] | None = None) -> None:
        self._fqn = node_fqn
        self._types = types
        self._now_ns = now_ns
        self._publish_event = publish_event
        self._lock = threading.RLock()
        self._entries: dict[str, _Entry] = {}
        self._validator: Validator | None = None
        self._listeners: list[Listener] = []
        for name, value in overrides.items():
            code = type_of(value)
            if code == PT.PARAMETER_NOT_SET:
                msg = f'parameter override {name!r}: {value!r} is not a parameter value'
                raise TransportError(msg)
            self._entries[name] = _Entry(value, code)
        self._event({n: e.value for n, e in self._entries.items()}, new=True)

    # --- node-side API ---------------------------------------------------------------------

    def declare(self, name: str, value: Any, description: str = '',
                read_only: bool = False) -> ParameterView:
        code = type_of(value)
        if code == PT.PARAMETER_NOT_SET:
            msg = (f'parameter {name!r}: default {value!r} has no ROS parameter type; use bool, '
                   'int, float, str, bytes or a non-empty list of one of bool/int/float/str')
            raise TransportError(msg)
        with self._lock:
            entry = self._entries.get(name)
            if entry is not None and entry.claimed:
                msg = f'parameter {name!r} is declared twice'
                raise TransportError(msg)
            final = entry.value if entry is not None else value
            self._validate({name: final}, f'parameter {name!r} = {final!r}')
            if entry is None:
                self._entries[name] = _Entry(value, code, description, read_only, claimed=True)
                self._event({name: value}, new=True)
            else:
                entry.description, entry.read_only, entry.claimed = description, read_only, True
            return ParameterView(name, final)

    def get(self, name: str) -> ParameterView:
        with self._lock:
            entry = self._entries.get(name)
            if entry is None:
                known = ', '.join(sorted(self._entries)) or 'none'
                msg = f'parameter {name!r} is not declared (declared: {known})'
                raise TransportError(msg)
            return ParameterView(name, entry.value)

    def by_prefix(self, prefix: str) -> dict[str, ParameterView]:
        start = prefix + '.' if prefix else ''
        with self._lock:
            return {n[len(start):]: ParameterView(n, e.value) for n, e in self._entries.items()
                    if n.startswith(start)}

    def set_validator(self, callback: Validator | None) -> None:
        self._validator = callback

    def add_listener(self, callback: Listener) -> None:
        self._listeners.append(callback)

    def set_atomically(self, changes: dict[str, Any]) -> tuple[bool, str]:
        """Check types and read-only, then the validator; store all or nothing."""
        if not changes:
            return False, 'no parameters given'
        with self._lock:
            for name, value in changes.items():
                problem = self._check_change(name, value)
                if problem:
                    return False, problem
            if self._validator is not None:
                ok, reason = self._validator(dict(changes))
                if not ok:
                    return False, reason or 'rejected by the node'
            for name, value in changes.items():
                self._entries[name].value = value
            self._event(changes, new=False)
            listeners = list(self._listeners)
        for listener in listeners:
            listener(dict(changes))
        return True, ''

    def _check_change(self, name: str, value: Any) -> str:
        entry = self._entries.get(name)
        if entry is None:
            return f'parameter {name!r} is not declared'
        if entry.read_only:
            return f'parameter {name!r} is read-only'
        code = type_of(value)
        if code != entry.type:
            return (f'parameter {name!r} is of type {_TYPE_NAMES[entry.type]}, '
                    f'cannot set it to type {_TYPE_NAMES.get(code, "unknown")}')
        return ''

    def _validate(self, values: dict[str, Any], what: str) -> None:
        if self._validator is None:
            return
        ok, reason = self._validator(dict(values))
        if not ok:
            msg = f'{what} rejected: {reason}'
            raise TransportError(msg)

    def _event(self, values: dict[str, Any], *, new: bool) -> None:
        if self._publish_event is None or not values:
            return
        t = self._types
        now = self._now_ns()
        params = [t.Parameter(name=n, value=to_msg(v, t)) for n, v in values.items()]
        event = t.ParameterEvent(stamp=t.Time(sec=now // 1_000_000_000,
                                              nanosec=now % 1_000_000_000), node=self._fqn)
        if new:
            event.new_parameters = params
        else:
            event.changed_parameters = params
        self._publish_event(event)

    # --- standard services (callback(request, response) -> response) ----------------------

    def on_set_parameters(self, request: Any, response: Any) -> Any:
        results = []
        for p in request.parameters:
            ok, reason = self.set_atomically({p.name: from_msg(p.value)})
            results.append(self._types.SetParametersResult(successful=ok, reason=reason))
        response.results = results
        return response

    def on_set_parameters_atomically(self, request: Any, response: Any) -> Any:
        changes = {p.name: from_msg(p.value) for p in request.parameters}
        ok, reason = self.set_atomically(changes)
        response.result = self._types.SetParametersResult(successful=ok, reason=reason)
        return response

    def on_get_parameters(self, request: Any, response: Any) -> Any:
        with self._lock:
            if all(n in self._entries for n in request.names):
                response.values = [to_msg(self._entries[n].value, self._types)
                                   for n in request.names]
        return response

    def on_get_parameter_types(self, request: Any, response: Any) -> Any:
        with self._lock:
            if all(n in self._entries for n in request.names):
                response.types = [self._entries[n].type for n in request.names]
        return response

    def on_describe_parameters(self, request: Any, response: Any) -> Any:
        with self._lock:
            if all(n in self._entries for n in request.names):
                response.descriptors = [
                    self._types.ParameterDescriptor(
                        name=n, type=self._entries[n].type,
                        description=self._entries[n].description,
                        read_only=self._entries[n].read_only)
                    for n in request.names]
        return response

    def on_list_parameters(self, request: Any, response: Any) -> Any:
        prefixes, depth = list(request.prefixes), int(request.depth)
        with self._lock:
            names = list(self._entries)
        result = self._types.ListParametersResult()
        found_names: list[str] = []
        found_prefixes: list[str] = []
        for name in names:
            if not _listed(name, prefixes, depth):
                continue
            found_names.append(name)
            head = name.rpartition('.')[0]
            if head and head not in found_prefixes:
                found_prefixes.append(head)
        result.names, result.prefixes = found_names, found_prefixes
        response.result = result
        return response


def _listed(name: str, prefixes: list[str], depth: int) -> bool:
    """rclpy's Node.list_parameters filter (depth 0 = recursive)."""
    def shallow(s: str) -> bool:
        return s.count('.') < depth
    if not prefixes:
        return depth == 0 or shallow(name)
    return any(name == p or (name.startswith(p + '.')
                             and (depth == 0 or shallow(name[len(p) + 1:])))
               for p in prefixes)
