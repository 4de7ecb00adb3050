"""The managed-node state machine (runtime/lifecycle.py) against the ROS 2 standard.

References:
* ids: the constants of lifecycle_msgs/msg/State and lifecycle_msgs/msg/Transition in rosbags'
  type store (Stores.ROS2_JAZZY and ROS2_HUMBLE), matched by constant name;
* the graph (which outcome of which step leads where): the ROS 2 design article "Managed
  nodes" (design.ros2.org/articles/node_lifecycle.html), written out below as it describes
  it (from memory), and the same table in rcl_lifecycle's default state machine (read in
  rcl 9.2.0's default_state_machine.c, outside this repository);
* what `ros2 lifecycle list` printed for an rclpy LifecycleNode in the active state on a real
  Jazzy core (/work/notes/ros2_core.md: deactivate [4] -> deactivating, shutdown [7] ->
  shuttingdown).
"""
from __future__ import annotations

from typing import Any

import pytest
from rosbags.typesys import Stores, get_typestore

from constraint_ctrl.runtime import lifecycle as lc
from constraint_ctrl.runtime.lifecycle import LifecycleMachine

STORES = (Stores.ROS2_JAZZY, Stores.ROS2_HUMBLE)

# The design article's graph: primary state -> (request, transition state);
# transition state -> goal of success / failure / error
REQUESTS = {
    'unconfigured': [('configure', 'configuring'), ('shutdown', 'shuttingdown')],
    'inactive': [('cleanup', 'cleaningup'), ('activate', 'activating'),
                 ('shutdown', 'shuttingdown')],
    'active': [('deactivate', 'deactivating'), ('shutdown', 'shuttingdown')],
    'finalized': [],
}
OUTCOMES = {   # success, failure, error
    'configuring': ('inactive', 'unconfigured', 'errorprocessing'),
    'cleaningup': ('unconfigured', 'inactive', 'errorprocessing'),
    'activating': ('active', 'inactive', 'errorprocessing'),
    'deactivating': ('inactive', 'active', 'errorprocessing'),
    'shuttingdown': ('finalized', 'finalized', 'errorprocessing'),
    'errorprocessing': ('unconfigured', 'finalized', 'finalized'),
}


def constants(store: Stores, msg: str) -> dict[str, int]:
    consts, _ = get_typestore(store).fielddefs[f'lifecycle_msgs/msg/{msg}']
    return {name: value for name, _, value in consts}


@pytest.mark.parametrize('store', STORES)
def test_state_ids_are_lifecycle_msgs_constants(store: Stores) -> None:
    consts = constants(store, 'State')
    for state in lc.STATES:
        prefix = 'PRIMARY_STATE_' if state.id < 10 else 'TRANSITION_STATE_'
        assert consts[prefix + state.label.upper()] == state.id, state
    # every state constant of lifecycle_msgs is a state of the machine
    assert sorted(consts.values()) == sorted(s.id for s in lc.STATES)


@pytest.mark.parametrize('store', STORES)
def test_transition_ids_are_lifecycle_msgs_constants(store: Stores) -> None:
    consts = constants(store, 'Transition')
    step = {'configuring': 'CONFIGURE', 'cleaningup': 'CLEANUP', 'activating': 'ACTIVATE',
            'deactivating': 'DEACTIVATE', 'shuttingdown': 'SHUTDOWN',
            'errorprocessing': 'ERROR'}
    for t in lc.TRANSITIONS:
        if t.label == 'shutdown':
            name = f'TRANSITION_{t.start.label.upper()}_SHUTDOWN'
        elif t.label.startswith('transition_'):
            result = t.label.removeprefix('transition_').upper()
            name = f'TRANSITION_ON_{step[t.start.label]}_{result}'
        else:
            name = f'TRANSITION_{t.label.upper()}'
        assert consts[name] == t.id, (name, t)
    # create, destroy and the callback results are not transitions of the graph
    graph_ids = {v for k, v in consts.items()
                 if k not in ('TRANSITION_CREATE', 'TRANSITION_DESTROY')
                 and not k.startswith('TRANSITION_CALLBACK_')}
    assert sorted(graph_ids) == sorted(t.id for t in lc.TRANSITIONS)


def test_graph_is_the_design_article_graph() -> None:
    expected = set()
    for start, requests in REQUESTS.items():
        for label, goal in requests:
            expected.add((label, start, goal))
    for start, goals in OUTCOMES.items():
        for label, goal in zip((lc.SUCCESS, lc.FAILURE, lc.ERROR), goals):
            expected.add((label, start, goal))
    got = [(t.label, t.start.label, t.goal.label) for t in lc.TRANSITIONS]
    assert len(got) == len(set(got)) == 25
    assert set(got) == expected


def test_available_transitions_per_primary_state() -> None:
    steps = {'configure': lambda: None, 'activate': lambda: None, 'shutdown': lambda: None}
    machine = LifecycleMachine(steps)

    def listed() -> list[tuple[str, int, str]]:
        return [(t.label, t.id, t.goal.label) for t in machine.available_transitions()]
    assert listed() == [('configure', 1, 'configuring'), ('shutdown', 5, 'shuttingdown')]
    assert machine.change_state(label='configure').ok
    assert listed() == [('cleanup', 2, 'cleaningup'), ('activate', 3, 'activating'),
                        ('shutdown', 6, 'shuttingdown')]
    assert machine.change_state(transition_id=3).ok
    # as `ros2 lifecycle list` showed for an active rclpy LifecycleNode (ros2_core.md)
    assert listed() == [('deactivate', 4, 'deactivating'), ('shutdown', 7, 'shuttingdown')]
    assert machine.change_state(label='shutdown').ok
    assert machine.state == lc.FINALIZED and listed() == []


DRIVE = {'unconfigured': [], 'inactive': ['configure'], 'active': ['configure', 'activate'],
         'finalized': ['shutdown']}
RESULT_LABEL = {'ok': lc.SUCCESS, 'fail': lc.FAILURE, 'raise': lc.ERROR}


def run_case(start: str, label: str, outcome: str, error_step_ok: bool) -> tuple[Any, ...]:
    """From ``start``, request ``label`` whose step ends in ``outcome``; (outcome, events,
    end state)."""
    events: list[tuple[str, str, str]] = []
    mode = {'step': 'ok'}

    def step() -> str | None:
        if mode['step'] == 'fail':
            return 'refused for the test'
        if mode['step'] == 'raise':
            msg = 'broken for the test'
            raise RuntimeError(msg)
        return None

    def error_step() -> str | None:
        return None if error_step_ok else 'cannot recover'
    steps: dict[str, Any] = {name: step for name in
                             ('configure', 'cleanup', 'activate', 'deactivate', 'shutdown')}
    machine = LifecycleMachine({**steps, 'error': error_step},
                               lambda t: events.append((t.label, t.start.label, t.goal.label)))
    for request in DRIVE[start]:
        assert machine.change_state(label=request).ok
    assert machine.state.label == start
    events.clear()
    mode['step'] = outcome
    result = machine.change_state(label=label)
    return result, events, machine.state.label


def test_every_request_and_outcome_leads_where_the_design_says() -> None:
    """For each primary state, each request and each step outcome (success, failure with a
    reason, exception), with error processing succeeding or failing."""
    for start, requests in REQUESTS.items():
        for label, transition_state in requests:
            for outcome, goal in zip(('ok', 'fail', 'raise'), OUTCOMES[transition_state]):
                for error_step_ok in (True, False):
                    result, events, state = run_case(start, label, outcome, error_step_ok)
                    assert result.ok == (outcome == 'ok')
                    end = goal
                    expected = [(label, start, transition_state),
                                (RESULT_LABEL[outcome], transition_state, goal)]
                    if goal == 'errorprocessing':
                        end = OUTCOMES['errorprocessing'][0 if error_step_ok else 1]
                        expected.append((lc.SUCCESS if error_step_ok else lc.FAILURE,
                                         'errorprocessing', end))
                    assert events == expected, (start, label, outcome)
                    assert state == end == result.state.label
                    if outcome == 'fail':
                        assert result.reason == 'refused for the test'
                    if outcome == 'raise':
                        assert 'broken for the test' in result.reason


def test_a_transition_not_available_changes_nothing() -> None:
    events = []
    machine = LifecycleMachine({}, events.append)
    result = machine.change_state(label='activate')
    assert not result.ok and machine.state == lc.UNCONFIGURED and events == []
    assert "no transition 'activate' from unconfigured" in result.reason
    assert 'configure [1]' in result.reason
    assert not machine.change_state(transition_id=30).ok   # a result id is not a request
    assert not machine.change_state(transition_id=99).ok
    # a label wins over the id, as in ChangeState (rclpy's LifecycleNode looks it up first)
    assert machine.change_state(transition_id=99, label='configure').ok
    assert machine.state == lc.INACTIVE


def test_available_states_and_graph() -> None:
    machine = LifecycleMachine({})
    assert [s.label for s in machine.available_states()] == [
        'unknown', 'unconfigured', 'inactive', 'active', 'finalized', 'configuring',
        'cleaningup', 'shuttingdown', 'activating', 'deactivating', 'errorprocessing']
    assert len(machine.transition_graph()) == 25


def test_one_transition_at_a_time() -> None:
    inner: list = []
    machine: LifecycleMachine

    def configure() -> str | None:
        inner.append(machine.change_state(label='shutdown'))
        return None
    machine = LifecycleMachine({'configure': configure})
    assert machine.change_state(label='configure').ok
    assert not inner[0].ok and inner[0].reason == 'another transition is running'
    assert machine.state == lc.INACTIVE


def test_unknown_step_names_are_refused() -> None:
    with pytest.raises(ValueError, match='on_configure'):
        LifecycleMachine({'on_configure': lambda: None})
