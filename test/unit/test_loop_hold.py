"""The control loop's built-in hold: zero velocity with the watchdog still active.

Outside references:
- elementary kinematics: a velocity v0 brought to zero at a constant deceleration a takes
  v0 / a; at most a * dt per tick of length dt, so ceil(|v0| / (a dt)) ticks (the watchdog's
  acceleration limit is that per-tick bound, safety/watchdog.py);
- ISO/TS 15066 speed and separation monitoring as the watchdog implements it (S_p(0) =
  488 mm with the node's default parameters, safety-facts.md 1.4): a person inside it stops
  the arm whatever commands it, also while holding;
- ISO 10218-1 (from memory): a monitored standstill is still supervised; here: every
  watchdog check runs on every hold tick and its state is reported.
"""
from __future__ import annotations

import math
import shutil
import threading
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.errors import SkillError
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.runtime.library import SkillLibrary
from constraint_ctrl.runtime.loop import HOLD, HOLDING_EVENT, ControlLoop, LoopOutput, Snapshot
from constraint_ctrl.runtime.watchdog_setup import build_watchdog
from constraint_ctrl.safety.states import State
from constraint_ctrl.safety.watchdog import PersonSample

CONFIG = Path(__file__).resolve().parents[2] / 'config'
DT = 0.002
START = np.array([0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416])
FAR = np.array([3.0, 3.0, 1.0])
SOURCE = '/cell/operator'


@pytest.fixture()
def loop(tmp_path: Path) -> ControlLoop:
    skills = tmp_path / 'skills'
    skills.mkdir()
    (tmp_path / 'robots').mkdir()
    shutil.copy(CONFIG / 'robots' / 'six_axis_arm.urdf', tmp_path / 'robots')
    for name in ('keep_tool_vertical.yaml', 'follow_flange.yaml'):
        text = (CONFIG / 'skills' / name).read_text().replace('../scenes/',
                                                              str(CONFIG / 'scenes') + '/')
        (skills / name).write_text(text)
    model = RobotModel.from_urdf(CONFIG / 'robots' / 'six_axis_arm.urdf')
    library = SkillLibrary(skills, model.joint_names)
    assert library.reload().ok
    watchdog = build_watchdog(model, DT, {'resume_after': 0.05}, {SOURCE: 0.2})
    return ControlLoop(library, watchdog, DT, person_sources=[SOURCE])


class Cell:
    """Integrates the published command; a person at ``person``; time in ticks."""

    def __init__(self, loop: ControlLoop) -> None:
        self.loop = loop
        self.q = START.copy()
        self.t = 0.0
        self.person = FAR.copy()
        self.fresh = True

    def step(self) -> LoopOutput:
        people = {SOURCE: PersonSample(SOURCE, self.person.copy(), self.t)}
        stamp = self.t if self.fresh else -1.0
        out = self.loop.step(Snapshot(now=self.t, q=self.q.copy(), joint_state_stamp=stamp,
                                      people=people))
        self.q = self.q + DT * out.command
        self.t += DT
        return out

    def run(self, ticks: int) -> list[LoopOutput]:
        return [self.step() for _ in range(ticks)]

    def while_ticking(self, call) -> tuple:  # noqa: ANN001 - a request that waits for a tick
        result: list = []
        waiter = threading.Thread(target=lambda: result.append(call()))
        waiter.start()
        outs = []
        while waiter.is_alive():
            outs.append(self.step())
        waiter.join()
        return result[0], outs


def moving_cell(loop: ControlLoop) -> Cell:
    cell = Cell(loop)
    cell.run(5)
    loop.request_activation('keep_tool_vertical')
    outs = cell.run(600)                       # 1.2 s: the sweep ramps in over 1 s
    assert np.abs(outs[-1].command).max() > 1e-2 and not loop.holding
    return cell


def test_the_loop_starts_in_hold_and_says_so_once(loop: ControlLoop) -> None:
    assert loop.holding and loop.active is None
    outs = Cell(loop).run(200)
    assert all(o.skill == HOLD and o.tick is None for o in outs)
    assert all(not o.command.any() for o in outs)         # exactly zero, every tick
    assert [e for o in outs for e in o.events if e == HOLDING_EVENT] == [HOLDING_EVENT]
    assert HOLDING_EVENT in outs[0].events
    assert outs[-1].watchdog.state is State.NORMAL        # supervised, reported


def test_hold_brings_the_command_to_zero_within_the_acceleration_limit(
        loop: ControlLoop) -> None:
    cell = moving_cell(loop)
    before = cell.step().command
    (ok, message), outs = cell.while_ticking(lambda: loop.request_hold(timeout=5.0))
    assert ok and message.startswith('holding'), message
    assert loop.holding
    # the tick that took the request is the first hold tick; it reports 'holding'
    first = next(i for i, o in enumerate(outs) if o.skill == HOLD)
    assert HOLDING_EVENT in outs[first].events
    outs = outs[first:] + cell.run(400)
    limit = loop.watchdog.config.acceleration_limits * DT            # rad/s per tick
    commands = np.array([before] + [o.command for o in outs])
    steps = np.diff(commands, axis=0)
    assert (np.abs(steps) <= limit + 1e-12).all()                    # never a jump
    # each joint's speed only decreases and never reverses: hold never moves the arm
    assert (np.abs(commands[1:]) <= np.abs(commands[:-1]) + 1e-15).all()
    assert (commands[1:] * commands[:-1] >= 0.0).all()
    ticks = math.ceil(float(np.max(np.abs(before) / limit)))         # v0 / (a dt)
    assert ticks < 200
    assert not commands[ticks + 1:].any(), 'not exactly zero after v0 / a'
    assert all(o.watchdog.state is State.NORMAL for o in outs)


def test_a_person_still_stops_the_arm_while_holding(loop: ControlLoop) -> None:
    cell = Cell(loop)
    cell.run(50)
    cell.person = np.array([0.45, 0.0, 0.35])       # at the tool: inside S_p(0) = 0.488 m
    outs = cell.run(20)
    assert outs[-1].watchdog.state is State.STOPPED
    assert 'person too close' in outs[-1].watchdog.reason
    assert 'watchdog_stopped' in [e for o in outs for e in o.events]
    cell.person = FAR.copy()
    outs = cell.run(100)                            # clear for resume_after (0.05 s)
    assert outs[-1].watchdog.state is State.NORMAL
    assert all(o.skill == HOLD and not o.command.any() for o in outs)
    # stale joint states are a fault while holding too
    cell.fresh = False
    outs = cell.run(40)
    assert outs[-1].watchdog.state is State.STOPPED
    assert 'joint_states' in outs[-1].watchdog.reason


def test_activation_hold_and_activation_again(loop: ControlLoop) -> None:
    cell = moving_cell(loop)
    (ok, _), _ = cell.while_ticking(lambda: loop.request_activation(HOLD, timeout=5.0))
    assert ok and loop.holding
    cell.run(300)
    (ok, message), outs = cell.while_ticking(
        lambda: loop.request_activation('keep_tool_vertical', timeout=5.0))
    assert ok, message
    assert not loop.holding and outs[-1].skill == 'keep_tool_vertical'
    outs = cell.run(600)
    assert np.abs(outs[-1].command).max() > 1e-2
    assert HOLDING_EVENT not in [e for o in outs for e in o.events]


def test_hold_while_holding_is_confirmed_and_reported_again(loop: ControlLoop) -> None:
    cell = Cell(loop)
    cell.run(10)
    (ok, _), outs = cell.while_ticking(lambda: loop.request_hold(timeout=5.0))
    assert ok and [e for o in outs for e in o.events] == [HOLDING_EVENT]


def test_the_hold_has_no_tunables(loop: ControlLoop) -> None:
    ok, message = loop.request_activation(HOLD, timeout=1.0, params={'gain': 1.0})
    assert not ok and 'no tunables' in message


def test_a_later_request_replaces_a_pending_hold_and_the_reverse(loop: ControlLoop) -> None:
    cell = moving_cell(loop)
    loop.request_hold()
    loop.request_activation('keep_tool_vertical')
    cell.run(2)
    assert not loop.holding
    loop.request_activation('keep_tool_vertical')
    loop.request_hold()
    cell.run(2)
    assert loop.holding


def test_hold_ends_the_stop_of_a_failed_switch(loop: ControlLoop) -> None:
    """follow_flange without its range inputs cannot start: the watchdog stops the arm until
    a skill is activated. A hold needs no input, so it is such an activation."""
    cell = Cell(loop)
    cell.run(10)
    (ok, message), _ = cell.while_ticking(
        lambda: loop.request_activation('follow_flange', timeout=5.0))
    assert not ok and 'no data yet for input' in message
    outs = cell.run(50)
    assert outs[-1].watchdog.state is State.STOPPED
    assert 'skill switch failed' in outs[-1].watchdog.reason
    (ok, _), outs = cell.while_ticking(lambda: loop.request_hold(timeout=5.0))
    assert ok
    # the switch fault clears at the hold tick; the missing inputs were the skill's, so they
    # clear once quiet for resume_after (0.05 s = 25 ticks)
    assert 'skill switch failed' not in outs[-1].watchdog.reason
    outs = cell.run(40)
    assert outs[-1].watchdog.state is State.NORMAL and outs[-1].skill == HOLD


def test_a_skill_file_may_not_be_named_hold(tmp_path: Path) -> None:
    skills = tmp_path / 'skills'
    skills.mkdir()
    text = (CONFIG / 'skills' / 'keep_tool_vertical.yaml').read_text()
    text = text.replace('skill: keep_tool_vertical', 'skill: hold').replace(
        '../robots/', str(CONFIG / 'robots') + '/')
    (skills / 'hold.yaml').write_text(text)
    model = RobotModel.from_urdf(CONFIG / 'robots' / 'six_axis_arm.urdf')
    library = SkillLibrary(skills, model.joint_names)
    report = library.reload()
    assert not report.ok and library.names() == []
    line = next(i for i, s in enumerate(text.splitlines(), 1) if s.startswith('skill: hold'))
    assert report.failed['hold.yaml'].startswith(f'{skills / "hold.yaml"}:{line}: skill: ')
    assert "built-in hold" in report.failed['hold.yaml']
    with pytest.raises(SkillError, match='built-in hold'):
        library.load_file(skills / 'hold.yaml')
