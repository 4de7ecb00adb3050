"""The controller node's hold: it starts holding, ~/hold and activate_skill = hold switch to it
at a tick boundary, ~/status and ~/events say so (issue 9 section 1), driven through the real
DDS parameter store and the node's handlers (node_harness.py).

Outside references: std_srvs/srv/Trigger (success, message) as the reply of ~/hold; rclpy's
parameter rules (a set that the validator refuses is not applied) for activate_skill; the
watchdog's acceleration limit as the per-tick bound of the way down to zero (elementary
kinematics, see test_loop_hold.py).
"""
from __future__ import annotations

from pathlib import Path
from collections.abc import Iterator

import numpy as np
import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.runtime.loop import HOLD, HOLDING_EVENT  # noqa: E402

from node_harness import CONFIG, NodeHarness, copy_skills, moving  # noqa: E402


@pytest.fixture()
def node(tmp_path: Path) -> Iterator[NodeHarness]:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical', 'move_to_point')),
                    {'rate_hz': '250.0'}, params_file=CONFIG / 'controller.yaml')
    try:
        yield h
    finally:
        h.close()


def wait_for_zero(node: NodeHarness, ticks: int = 200) -> int:
    for k in range(ticks):
        node.run(1)
        if not node.outputs[-1].command.any():
            return k
    raise AssertionError('the command never reached exactly zero')


def test_the_node_starts_in_hold(node: NodeHarness) -> None:
    outs = node.run(50)
    assert all(o.skill == HOLD and not o.command.any() for o in outs)
    assert node.events.count(HOLDING_EVENT) == 1
    values = node.status_values()
    assert values['skill'] == HOLD
    message = node._status_message()
    assert message.status[0].message == 'holding: zero velocity, watchdog active'
    assert message.status[1].message.startswith('normal')       # watchdog state reported


def test_hold_service_stops_a_moving_skill(node: NodeHarness) -> None:
    node.run(5)
    assert node.activate('keep_tool_vertical').success
    node.run(350)
    assert moving(node.outputs[-1])
    node.events.clear()
    reply = node.while_ticking(lambda: node.node._on_hold(node.t.Trigger.Request(),
                                                          node.t.Trigger.Response()))
    assert reply.success and reply.message.startswith('holding'), reply.message
    assert node.node.loop.holding and node.events == [HOLDING_EVENT]
    wait_for_zero(node)
    outs = node.run(100)
    assert all(o.skill == HOLD and not o.command.any() for o in outs)
    assert node.status_values()['skill'] == HOLD


def test_activate_skill_hold_through_the_parameter(node: NodeHarness) -> None:
    node.run(5)
    assert node.set_while_ticking({'activate_skill': 'move_to_point',
                                   'move_to_point.goal_z': 0.4}) == (True, '')
    node.run(50)
    assert not node.node.loop.holding and moving(node.outputs[-1])
    assert node.set_while_ticking({'activate_skill': HOLD}) == (True, '')
    assert node.node.loop.holding
    assert node.get('activate_skill') == ''                      # write-only, as for skills
    wait_for_zero(node)
    # the tunable set with the earlier switch stays in force; the hold changed no parameter
    assert node.get('move_to_point.goal_z') == 0.4
    # and a skill again after the hold
    assert node.activate('keep_tool_vertical').success
    node.run(300)
    assert np.abs(node.outputs[-1].command).max() > 1e-3


def test_a_skill_file_named_hold_is_refused_with_its_location(tmp_path: Path) -> None:
    skills = copy_skills(tmp_path / 'skills', ('move_to_point',))
    text = (skills / 'move_to_point.yaml').read_text().replace('skill: move_to_point',
                                                               'skill: hold')
    (skills / 'hold.yaml').write_text(text)
    h = NodeHarness(skills, {'rate_hz': '250.0'}, params_file=CONFIG / 'controller.yaml')
    try:
        line = next(i for i, s in enumerate(text.splitlines(), 1) if s == 'skill: hold')
        failed = [t for level, t in h.logs if 'FAILED hold.yaml' in t]
        assert failed and f'hold.yaml:{line}: skill: ' in failed[0]
        assert HOLD not in h.node._services and h.node.library.names() == ['move_to_point']
    finally:
        h.close()
