"""A node parameter's value in force against the type of its default.

ROS 2 types a parameter by its value (rcl_interfaces/msg/ParameterType); rclpy refuses an
override of another type when a node declares the parameter (InvalidParameterTypeException).
Our node parameters come in through either transport, from launch values, parameter files or
`-p`, so configure checks them here once and fails with the parameter's name, the type it needs
and the value given, instead of a conversion error deep inside configure. One leniency: a whole
number is taken for a double (`-p rate_hz:=500` is an integer in ROS 2's YAML reading).
"""
from __future__ import annotations

from typing import Any

from ..errors import ConstraintCtrlError

_NAMES = {bool: 'bool', int: 'integer', float: 'number (double)', str: 'string'}
_LIST_NAMES = {bool: 'bools', int: 'integers', float: 'numbers (doubles)', str: 'strings'}
_GIVEN = {bool: 'bool', int: 'integer', float: 'double', str: 'string', list: 'list',
          tuple: 'list', bytes: 'byte array'}


def _kind(value: Any) -> type | None:
    """The ROS parameter kind of a Python value: bool, int, float, str or None (other)."""
    for kind in (bool, int, float, str):     # bool first: bool is an int in Python
        if isinstance(value, kind):
            return kind
    return None


def _fits(kind: type, value: Any) -> bool:
    if kind is float:
        return _kind(value) in (int, float)
    return _kind(value) is kind


def _given(value: Any) -> str:
    name = next((n for t, n in _GIVEN.items() if isinstance(value, t)), type(value).__name__)
    return f'the {name} {value!r}'


def checked_value(name: str, default: Any, value: Any) -> Any:
    """``value`` when it has the type of ``default`` (ints taken for doubles, as floats);
    else a ConstraintCtrlError naming the parameter, the type needed and the value given.
    Lists: of the default's element type; an empty default list takes any list of bool,
    int, float or str (the code that reads it checks more)."""
    if isinstance(default, (list, tuple)):
        element = _kind(default[0]) if default else None
        if isinstance(value, (list, tuple)) and all(
                _fits(element, v) if element else _kind(v) is not None for v in value):
            return [float(v) for v in value] if element is float else list(value)
        need = f'a list of {_LIST_NAMES[element]}' if element else 'a list'
        raise ConstraintCtrlError(f'parameter {name}: expected {need}, got {_given(value)}')
    kind = _kind(default)
    if kind is None or _fits(kind, value):
        return float(value) if kind is float else value
    raise ConstraintCtrlError(f'parameter {name}: expected a {_NAMES[kind]}, '
                              f'got {_given(value)}')


__all__ = ['checked_value']
