"""The controller node's reload, parameters and activation replies (issue 8 items 2, 5, 7, 16,
18, 19), driven through the real DDS parameter store and the node's service handlers.

Outside references: rclpy's parameter rules (ros2/rclpy rclpy/node.py: a read-only parameter is
refused with 'Trying to set a read-only parameter', a double outside the descriptor's
floating_point_range with 'out of range', ends within PARAM_REL_TOL = 1e-6 count as inside;
undeclare_parameter refuses read-only parameters); rcl_interfaces/msg/ParameterDescriptor and
FloatingPointRange (from_value, to_value, step) as `ros2 param describe` shows them.
"""
from __future__ import annotations

import math
import time
from pathlib import Path
from collections.abc import Iterator

import numpy as np
import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.model.kinematics import RobotModel  # noqa: E402
from constraint_ctrl.safety.states import State  # noqa: E402

from node_harness import CONFIG, NodeHarness, copy_skills, moving  # noqa: E402

SKILLS = ('keep_tool_vertical', 'move_to_point', 'follow_flange')


@pytest.fixture()
def node(tmp_path: Path) -> Iterator[NodeHarness]:
    h = NodeHarness(copy_skills(tmp_path / 'skills', SKILLS), {'rate_hz': '250.0'},
                    params_file=CONFIG / 'controller.yaml')
    try:
        yield h
    finally:
        h.close()


def start(node: NodeHarness, skill: str = 'keep_tool_vertical') -> None:
    node.run(5)
    reply = node.activate(skill)
    assert reply.success, reply.message
    node.run(100)
    assert moving(node.outputs[-1])


# --- item 5: reload never ends the node ------------------------------------------------------

def test_remove_reload_restore_reload_works_and_parameters_follow(node: NodeHarness) -> None:
    """Before: the second reload raised 'parameter ... is declared twice' and the node exited."""
    folder = node.node.library.folder
    text = (folder / 'move_to_point.yaml').read_text()
    assert node.set_parameters({'move_to_point.goal_z': 0.3}) == (True, '')
    (folder / 'move_to_point.yaml').unlink()
    reply = node.reload()
    assert reply.success, reply.message
    assert 'removed: move_to_point' in reply.message
    with pytest.raises(Exception, match='not declared'):
        node.get('move_to_point.goal_z')
    assert 'move_to_point' not in node.node._services
    (folder / 'move_to_point.yaml').write_text(text)
    reply = node.reload()
    assert reply.success, reply.message
    assert 'added: move_to_point' in reply.message
    assert node.get('move_to_point.goal_z') == 0.265          # the file's value again
    assert node.activate('move_to_point').success


def test_a_skill_renamed_in_its_file_replaces_the_old_name(node: NodeHarness) -> None:
    folder = node.node.library.folder
    path = folder / 'move_to_point.yaml'
    path.write_text(path.read_text().replace('\nskill: move_to_point', '\nskill: go_to_point', 1))
    reply = node.reload()
    assert reply.success, reply.message
    assert 'removed: move_to_point' in reply.message and 'added: go_to_point' in reply.message
    assert node.node.library.names() == ['follow_flange', 'go_to_point', 'keep_tool_vertical']
    assert node.get('go_to_point.goal_z') == 0.265
    with pytest.raises(Exception, match='not declared'):
        node.get('move_to_point.goal_z')
    assert set(node.node._services) == {'follow_flange', 'go_to_point', 'keep_tool_vertical'}
    assert node.activate('go_to_point').success


def test_the_running_skill_stays_when_its_file_is_removed(node: NodeHarness) -> None:
    start(node)
    folder = node.node.library.folder
    (folder / 'keep_tool_vertical.yaml').unlink()
    reply = node.reload()
    assert 'kept keep_tool_vertical' in reply.message and 'running' in reply.message
    assert isinstance(node.get('keep_tool_vertical.height'), float)
    assert moving(node.run(20)[-1])


@pytest.mark.parametrize('name', ['watchdog', 'inputs', 'people', 'activate_skill',
                                  'use_sim_time', 'rate_hz'])
def test_a_skill_named_like_a_node_parameter_is_refused_with_its_location(
        node: NodeHarness, name: str) -> None:
    folder = node.node.library.folder
    text = (folder / 'move_to_point.yaml').read_text()
    line = text.splitlines().index('skill: move_to_point') + 1
    (folder / f'{name}.yaml').write_text(text.replace('\nskill: move_to_point',
                                                      f'\nskill: {name}', 1))
    reply = node.reload()
    assert not reply.success
    # file, line, field: the located error of every skill file problem
    assert f'{name}.yaml:{line}: skill:' in reply.message, reply.message
    assert 'used by the controller itself' in reply.message
    assert name not in node.node._services
    node.run(2)                                   # still ticking


def test_an_exception_in_a_service_handler_is_an_error_reply(node: NodeHarness,
                                                             monkeypatch) -> None:
    def broken(*args, **kwargs):
        raise RuntimeError('disk on fire')
    monkeypatch.setattr(node.node.library, 'reload', broken)
    handler = node.node._guarded('~/reload_skills', node.node._on_reload)
    reply = handler(node.t.Trigger.Request(), node.t.Trigger.Response())
    assert not reply.success and 'disk on fire' in reply.message
    assert any('~/reload_skills failed' in text for _, text in node.logs)


# --- item 2: a reload of the running skill reaches it -------------------------------------------

def test_a_value_set_after_reloading_the_running_skill_reaches_it(node: NodeHarness) -> None:
    """The outside testers' case: reload the running skill's file, then lower
    limits.joint_speed to 0.05; the commands must obey it (they reached 0.163 rad/s)."""
    start(node)
    folder = node.node.library.folder
    path = folder / 'keep_tool_vertical.yaml'
    path.write_text(path.read_text() + '\n# edited\n')
    clock_before = node.node.loop.active.time
    reply = node.while_ticking(node.reload)
    assert reply.success, reply.message
    assert 'changed: keep_tool_vertical' in reply.message
    assert 'switched to the reloaded version: continued at skill time' in reply.message
    assert node.node.loop.active is node.node.library.get('keep_tool_vertical').runner
    assert node.node.loop.active.time >= clock_before            # the clock carried over
    ok, reason = node.set_parameters({'keep_tool_vertical.limits.joint_speed': 0.05})
    assert ok, reason
    assert node.get('keep_tool_vertical.limits.joint_speed') == 0.05
    outs = node.run(200)
    peak = max(float(np.abs(o.command).max()) for o in outs[5:])
    assert 0.0 < peak <= 0.05 + 1e-9, peak


def test_values_set_at_run_time_survive_a_reload_and_file_edits_take_effect(
        node: NodeHarness) -> None:
    start(node)
    assert node.set_parameters({'keep_tool_vertical.height': 0.40}) == (True, '')
    node.run(5)
    path = node.node.library.folder / 'keep_tool_vertical.yaml'
    text = path.read_text()
    assert 'behaviour: {order: 1, gain: 2.0}\n    weight: 1.0' in text
    path.write_text(text.replace('behaviour: {order: 1, gain: 2.0}\n    weight: 1.0',
                                 'behaviour: {order: 1, gain: 3.0}\n    weight: 1.0', 1))
    reply = node.while_ticking(node.reload)
    assert reply.success, reply.message
    assert node.get('keep_tool_vertical.height') == 0.40          # set at run time: kept
    assert node.get('keep_tool_vertical.tool_heading.gain') == 3.0   # the file's new value
    runner = node.node.loop.active
    compiled = runner.skill
    assert runner.solver.p[compiled.param_index('height')] == 0.40
    assert runner.solver.p[compiled.param_index('tool_heading.gain')] == 3.0


def test_a_reload_that_changes_the_unknowns_restarts_the_running_skill_and_says_so(
        node: NodeHarness) -> None:
    start(node, 'keep_tool_vertical')
    path = node.node.library.folder / 'keep_tool_vertical.yaml'
    path.write_text(path.read_text().replace(
        'tunables:', 'unknowns:\n  spare: {start: 0.0, lower: -1.0, upper: 1.0, max_speed: 0.1}'
        '\n\ntunables:', 1))
    reply = node.while_ticking(node.reload)
    assert reply.success, reply.message
    assert 'restarted with its start values' in reply.message
    assert node.node.loop.active.time < 0.1


# --- item 7: what cannot take effect at run time is refused ------------------------------------

@pytest.mark.parametrize(('name', 'value', 'reason'), [
    ('inputs.range_left.topic', '/elsewhere', 'read-only'),
    ('use_sim_time', True, 'use_sim_time cannot change at run time'),
    ('rate_hz', 100.0, 'read at configure'),      # settable while unconfigured only
    ('watchdog.resume_after', 0.1, 'read at configure'),
    ('keep_tool_vertical.limits.joint_speed', 1.6, 'out of range'),
    ('keep_tool_vertical.limits.joint_acceleration', 20.0, 'out of range'),
])
def test_parameters_that_cannot_take_effect_are_refused_with_a_reason(
        node: NodeHarness, name: str, value: object, reason: str) -> None:
    before = node.get(name)
    ok, why = node.set_parameters({name: value})
    assert not ok and reason in why, why
    assert node.get(name) == before


def test_safety_limits_may_be_lowered_and_restored_but_not_raised(node: NodeHarness) -> None:
    """Upper bound of limits.joint_speed: the file's 1.5 rad/s, below the arm's loosest URDF
    velocity limit (4.0 rad/s, config/robots/six_axis_arm.urdf); acceleration: the file's."""
    model = RobotModel.from_urdf(CONFIG / 'robots' / 'six_axis_arm.urdf')
    desc = node.describe('keep_tool_vertical.limits.joint_speed')
    (rng,) = desc.floating_point_range
    assert rng.to_value == 1.5 <= float(np.max(model.velocity_limit))
    assert node.set_parameters({'keep_tool_vertical.limits.joint_speed': 0.5})[0]
    assert node.set_parameters({'keep_tool_vertical.limits.joint_speed': 1.5})[0]
    (acc,) = node.describe('keep_tool_vertical.limits.joint_acceleration').floating_point_range
    assert acc.to_value == 15.0


def test_a_skill_whose_file_value_exceeds_every_urdf_limit_is_capped_there(
        tmp_path: Path) -> None:
    folder = copy_skills(tmp_path / 'skills', ('keep_tool_vertical',))
    path = folder / 'keep_tool_vertical.yaml'
    path.write_text(path.read_text().replace('joint_speed: 1.5', 'joint_speed: 9.0'))
    h = NodeHarness(folder)
    try:
        # the loosest URDF velocity limit of the arm is joint_6's 4.0 rad/s
        assert h.get('keep_tool_vertical.limits.joint_speed') == 4.0
        (rng,) = h.describe('keep_tool_vertical.limits.joint_speed').floating_point_range
        assert rng.to_value == 4.0
    finally:
        h.close()


# --- item 16: activation replies after the first tick, with its outcome --------------------------

def test_activating_a_skill_without_input_data_fails_with_the_reason(node: NodeHarness) -> None:
    start(node)
    reply = node.activate('follow_flange')
    assert not reply.success
    assert 'no data yet for input(s) range_left, range_right, range_front' in reply.message
    assert 'activated_follow_flange' not in [o.activated for o in node.outputs]
    assert not any(o.activated == 'follow_flange' for o in node.outputs)
    out = node.run(2)[-1]
    assert out.watchdog.state is State.STOPPED and not out.command.any()


def test_a_successful_activation_replies_after_its_first_tick(node: NodeHarness) -> None:
    node.run(5)
    reply = node.activate('move_to_point')
    assert reply.success and 'first tick ok' in reply.message
    firsts = [o for o in node.outputs if o.activated == 'move_to_point']
    assert len(firsts) == 1 and firsts[0].tick is not None and firsts[0].tick.ok


def test_activate_skill_parameter_fails_whole_when_the_switch_fails(node: NodeHarness) -> None:
    start(node)
    before = node.get('follow_flange.standoff')
    ok, reason = node.set_while_ticking({'activate_skill': 'follow_flange',
                                         'follow_flange.standoff': 0.01})
    assert not ok and 'no data yet for input(s)' in reason
    assert node.get('follow_flange.standoff') == before          # nothing changed
    runner = node.node.library.get('follow_flange').runner
    assert runner.solver.p[runner.skill.param_index('standoff')] == before
    assert node.get('activate_skill') == ''


def test_activate_skill_parameter_applies_tunables_with_the_switch_and_reads_back_empty(
        node: NodeHarness) -> None:
    start(node)
    ok, reason = node.set_while_ticking({'activate_skill': 'move_to_point',
                                         'move_to_point.goal_z': 0.40})
    assert ok, reason
    assert node.get('activate_skill') == ''                     # write-only
    assert node.get('move_to_point.goal_z') == 0.40
    runner = node.node.loop.active
    assert runner.name == 'move_to_point'
    assert runner.solver.p[runner.skill.param_index('goal_z')] == 0.40


# --- items 18 and 19: launch values and descriptors --------------------------------------------

def test_a_refused_launch_value_does_not_stay_in_the_parameter(tmp_path: Path) -> None:
    """`-p follow_flange.standoff:=0.5` (range 0.004..0.025): read back 0.008, logged once."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', SKILLS),
                    {'follow_flange.standoff': '0.5', 'keep_tool_vertical.height': '1',
                     'move_to_point.goal_z': '0.4'},
                    params_file=CONFIG / 'controller.yaml')
    try:
        assert h.get('follow_flange.standoff') == 0.008
        runner = h.node.library.get('follow_flange').runner
        assert runner.solver.p[runner.skill.param_index('standoff')] == 0.008
        assert h.get('keep_tool_vertical.height') == 0.35          # an integer is refused
        assert h.get('move_to_point.goal_z') == 0.4                # a valid one is adopted
        lines = [t for _, t in h.logs if 'launch value refused' in t]
        assert len(lines) == 2 and any('follow_flange.standoff' in x and '0.008' in x
                                       for x in lines)
    finally:
        h.close()


def test_tunable_descriptors_carry_range_and_description(node: NodeHarness) -> None:
    desc = node.describe('keep_tool_vertical.sweep_size')
    (rng,) = desc.floating_point_range
    assert (rng.from_value, rng.to_value, rng.step) == (0.0, 0.15, 0.0)
    assert desc.description == 'half width of the sweep [m]'
    gain = node.describe('keep_tool_vertical.follow_path.gain')
    assert gain.floating_point_range[0].to_value == math.inf and gain.description
    assert node.describe('inputs.range_left.topic').read_only


def test_reloads_and_refusals_leave_the_node_ticking(node: NodeHarness) -> None:
    start(node)
    for _ in range(3):
        node.reload()
    t0 = time.monotonic()
    assert moving(node.run(10)[-1]) and time.monotonic() > t0


def test_a_misspelt_launch_parameter_cannot_be_set_later(tmp_path: Path) -> None:
    """A launch override the node never uses is declared (rclpy's automatically_declare_
    parameters_from_overrides) but has no effect: setting it is refused with that reason."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'keep_tool_vertcal.height': '0.3'})
    try:
        assert h.get('keep_tool_vertcal.height') == 0.3
        ok, reason = h.set_parameters({'keep_tool_vertcal.height': 0.4})
        assert not ok and 'has no effect on this node' in reason
        assert h.get('keep_tool_vertcal.height') == 0.3
    finally:
        h.close()


@pytest.mark.parametrize(('name', 'value', 'expected'), [
    ('rate_hz', 'abc', "rate_hz: expected a number (double), got the string 'abc'"),
    ('people.sources', '5', 'people.sources: expected a list of strings, got the integer 5'),
    ('base_frame', '[1, 2]', 'base_frame: expected a string, got the list [1, 2]'),
    ('status_rate_hz', 'true', 'status_rate_hz: expected a number (double), got the bool True'),
])
def test_a_node_parameter_of_the_wrong_type_fails_configure_naming_it(
        tmp_path: Path, name: str, value: str, expected: str) -> None:
    """A launch value whose type does not fit (rclpy's declare_parameter refuses such an
    override with InvalidParameterTypeException, ros2/rclpy rclpy/node.py) fails configure
    with the parameter's name, the type it needs and the value given, not with a Python
    conversion error from deep inside configure."""
    from constraint_ctrl.errors import ConstraintCtrlError
    with pytest.raises(ConstraintCtrlError) as caught:
        NodeHarness(copy_skills(tmp_path / 'skills', SKILLS), {name: value})
    assert expected in str(caught.value)


def test_an_integer_for_a_double_parameter_is_taken(tmp_path: Path) -> None:
    """`-p rate_hz:=250` is an integer in ROS 2's YAML reading of `-p` values (rcl's
    parameter parser, from memory); our double parameters take a whole number."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', SKILLS), {'rate_hz': '250'})
    try:
        assert h.node.rate == 250.0
    finally:
        h.close()
