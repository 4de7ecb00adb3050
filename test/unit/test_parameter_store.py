"""The DDS port's parameter store follows rclpy for ranges, undeclaring and re-declaring.

Reference: ros2/rclpy rclpy/node.py (read at release 8.0.0 as a mirror; behaviour unchanged since
Humble as far as these rules go): `_apply_floating_point_range` refuses a double outside the
descriptor's range with "Parameter <name> out of range Min: <min>, Max: <max>, value: <v>" and
accepts values within PARAM_REL_TOL = 1e-6 of either end; `undeclare_parameter` raises for
unknown and read-only names; `declare_parameter` takes the launch override unless
`ignore_override=True`, also after an undeclare (the overrides are kept by the node);
ParameterEvent carries removed parameters in `deleted_parameters` (rcl_interfaces/msg).
"""
from __future__ import annotations

import pytest

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.dds_parameters import ParameterStore
from constraint_ctrl.transport.dds_types import types_for

T = types_for('jazzy')


@pytest.fixture()
def store() -> ParameterStore:
    events: list[object] = []
    logs: list[tuple[str, str]] = []
    s = ParameterStore('/ctrl', {'skill.gain': 9.0, 'skill.height': 0.3}, T, lambda: 0,
                       events.append, log=lambda level, text: logs.append((level, text)))
    s.events, s.logs = events, logs  # type: ignore[attr-defined]
    return s


def test_ranges_refuse_with_rclpys_reason_and_accept_the_ends(store: ParameterStore) -> None:
    store.declare('skill.width', 0.1, 'half width [m]', value_range=(0.0, 0.15))
    assert store.set_atomically({'skill.width': 0.2}) == (
        False, 'Parameter skill.width out of range Min: 0.0, Max: 0.15, value: 0.2')
    assert store.set_atomically({'skill.width': 0.15 * (1 + 5e-7)}) == (True, '')   # tolerance
    assert store.set_atomically({'skill.width': 0.0}) == (True, '')
    desc = store.on_describe_parameters(T.DescribeParameters.Request(names=['skill.width']),
                                        T.DescribeParameters.Response()).descriptors[0]
    (rng,) = desc.floating_point_range
    assert (rng.from_value, rng.to_value, rng.step) == (0.0, 0.15, 0.0)
    assert desc.description == 'half width [m]'


def test_a_launch_value_outside_the_range_raises_and_stays_unclaimed(
        store: ParameterStore) -> None:
    with pytest.raises(TransportError, match='out of range'):
        store.declare('skill.gain', 1.0, value_range=(0.0, 5.0))
    assert store.get('skill.gain').value == 9.0          # the override, still there
    assert store.declare('skill.gain', 1.0, value_range=(0.0, 5.0),
                         ignore_override=True).value == 1.0
    assert store.get('skill.gain').value == 1.0


def test_undeclare_then_declare_again_reapplies_the_override(store: ParameterStore) -> None:
    assert store.declare('skill.height', 0.5).value == 0.3
    store.undeclare('skill.height')
    with pytest.raises(TransportError, match='not declared'):
        store.get('skill.height')
    deleted = store.events[-1].deleted_parameters      # type: ignore[attr-defined]
    assert [p.name for p in deleted] == ['skill.height']
    assert store.declare('skill.height', 0.5).value == 0.3          # as rclpy: override again
    store.undeclare('skill.height')
    assert store.declare('skill.height', 0.5, ignore_override=True).value == 0.5
    with pytest.raises(TransportError, match='declared twice'):
        store.declare('skill.height', 0.5)
    store.declare('fixed', 'x', read_only=True)
    with pytest.raises(TransportError, match='read-only'):
        store.undeclare('fixed')
    with pytest.raises(TransportError, match='not declared'):
        store.undeclare('nothing')


def test_exceptions_in_validator_and_listener_never_escape(store: ParameterStore) -> None:
    store.declare('skill.width', 0.1)

    def validator(values: dict) -> tuple[bool, str]:
        if values.get('skill.width') == 0.13:
            raise ZeroDivisionError('bug in the node')
        return True, ''

    def listener(values: dict) -> None:
        raise KeyError('another bug')
    store.set_validator(validator)
    store.add_listener(listener)
    ok, reason = store.set_atomically({'skill.width': 0.13})
    assert not ok and 'bug in the node' in reason
    assert store.get('skill.width').value == 0.1
    assert store.set_atomically({'skill.width': 0.12}) == (True, '')   # stored, listener logged
    assert store.get('skill.width').value == 0.12
    texts = [text for _, text in store.logs]           # type: ignore[attr-defined]
    assert any('parameter validator raised' in t for t in texts)
    assert any('parameter listener raised' in t and 'another bug' in t for t in texts)
