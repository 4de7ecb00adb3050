"""The control tick end to end without middleware: switching, tunables, events, faults."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.runtime.library import SkillLibrary
from constraint_ctrl.runtime.loop import HOLD, ControlLoop, Snapshot
from constraint_ctrl.runtime.watchdog_setup import build_watchdog
from constraint_ctrl.safety.states import State

CONFIG = Path(__file__).resolve().parents[2] / 'config'
DT = 0.002
START = np.array([0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416])


@pytest.fixture()
def loop(tmp_path: Path) -> ControlLoop:
    skills = tmp_path / 'skills'
    skills.mkdir()
    (tmp_path / 'robots').mkdir()
    shutil.copy(CONFIG / 'robots' / 'six_axis_arm.urdf', tmp_path / 'robots')
    for name in ('move_to_point.yaml', 'keep_tool_vertical.yaml'):
        text = (CONFIG / 'skills' / name).read_text()
        text = text.replace('../scenes/', str(CONFIG / 'scenes') + '/')
        (skills / name).write_text(text)
    model = RobotModel.from_urdf(CONFIG / 'robots' / 'six_axis_arm.urdf')
    library = SkillLibrary(skills, model.joint_names)
    report = library.reload()
    assert report.ok, report.summary()
    watchdog = build_watchdog(model, DT, {'resume_after': 0.05})
    return ControlLoop(library, watchdog, DT)


def _run(loop: ControlLoop, q: np.ndarray, t0: float, seconds: float,
         stale_after: float | None = None) -> tuple[np.ndarray, float, list]:
    outputs = []
    t = t0
    for _ in range(int(round(seconds / DT))):
        stamp = t if stale_after is None or t < stale_after else stale_after
        out = loop.step(Snapshot(now=t, q=q.copy(), joint_state_stamp=stamp))
        outputs.append(out)
        q = q + DT * out.command
        t += DT
    return q, t, outputs


def test_activation_applies_at_the_next_tick_and_the_skill_arrives(loop: ControlLoop) -> None:
    q, t, outs = _run(loop, START, 0.0, 0.1)
    assert all(o.skill == HOLD for o in outs) and not outs[-1].command.any()
    loop.request_activation('move_to_point')
    q, t, outs = _run(loop, q, t, 4.0)
    assert outs[0].activated == 'move_to_point'
    events = [e for o in outs for e in o.events]
    assert 'arrived' in events
    assert outs[-1].watchdog.state in (State.NORMAL, State.REDUCED)


def test_tunable_change_moves_the_goal(loop: ControlLoop) -> None:
    q, t, _ = _run(loop, START, 0.0, 0.1)
    skill = loop.library.get('move_to_point')
    assert skill is not None
    loop.set_parameters('move_to_point', {'goal_z': 0.40})
    loop.request_activation('move_to_point')
    q, t, outs = _run(loop, q, t, 4.0)
    tip_z = skill.compiled.model.fk_function(['tool_tip'])(q)
    assert float(np.array(tip_z)[2, 3]) == pytest.approx(0.40, abs=2e-3)


def test_stale_joint_states_give_zero_command_in_the_same_tick(loop: ControlLoop) -> None:
    q, t, _ = _run(loop, START, 0.0, 0.1)
    loop.request_activation('keep_tool_vertical')
    q, t, outs = _run(loop, q, t, 1.0)
    assert np.abs(outs[-1].command).max() > 1e-4
    # joint_states stop updating: older than 50 ms -> zero at once
    _, _, outs = _run(loop, q, t, 0.2, stale_after=t)
    stopped = [i for i, o in enumerate(outs) if o.watchdog.state is State.STOPPED]
    assert stopped, 'the watchdog never stopped on stale joint_states'
    first = stopped[0]
    # the age passes the 50 ms timeout during tick 25 or 26 after the last update
    assert first <= 26
    assert not outs[first].command.any()
    assert all(not o.command.any() for o in outs[first:])


def test_missing_skill_input_stops_instead_of_moving(loop: ControlLoop, tmp_path: Path) -> None:
    # follow_flange needs three range inputs; none arrive
    src = (CONFIG / 'skills' / 'follow_flange.yaml').read_text()
    (loop.library.folder / 'follow_flange.yaml').write_text(
        src.replace('../scenes/', str(CONFIG / 'scenes') + '/'))
    assert loop.library.reload().ok
    q, t, _ = _run(loop, START, 0.0, 0.05)
    loop.request_activation('follow_flange')
    _, _, outs = _run(loop, q, t, 0.1)
    assert all(not o.command.any() for o in outs)
    assert outs[-1].watchdog.state is State.STOPPED


def test_unknown_skill_is_refused_and_the_old_one_keeps_running(loop: ControlLoop) -> None:
    q, t, _ = _run(loop, START, 0.0, 0.05)
    loop.request_activation('keep_tool_vertical')
    q, t, _ = _run(loop, q, t, 0.5)
    import threading
    result: list = []
    waiter = threading.Thread(target=lambda: result.append(
        loop.request_activation('no_such_skill', timeout=2.0)))
    waiter.start()
    while waiter.is_alive():
        q, t, outs = _run(loop, q, t, DT)
    ok, message = result[0]
    assert not ok and 'no skill named' in message
    q, t, outs = _run(loop, q, t, 0.1)
    assert outs[-1].skill == 'keep_tool_vertical'
    assert np.abs(outs[-1].command).max() > 0.0


def test_a_request_no_tick_took_is_withdrawn_and_never_switches_later(loop: ControlLoop) -> None:
    """A refused (timed out) activation must not happen at a later tick: the caller was told
    it failed, and its tunables were not applied."""
    q, t, _ = _run(loop, START, 0.0, 0.05)
    ok, message = loop.request_activation('move_to_point', timeout=0.05,
                                          params={'goal_z': 0.4})
    assert not ok and 'nothing was switched' in message
    q, t, outs = _run(loop, q, t, 0.05)
    assert all(o.skill == HOLD and o.activated is None for o in outs)
    runner = loop.library.get('move_to_point').runner
    assert runner.solver.p[runner.skill.param_index('goal_z')] != 0.4


def test_a_tick_that_raises_answers_the_waiting_request(loop: ControlLoop,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    import threading
    q, t, _ = _run(loop, START, 0.0, 0.05)
    result: list = []
    waiter = threading.Thread(target=lambda: result.append(
        loop.request_activation('move_to_point', timeout=5.0)))
    waiter.start()
    while loop._switch is None:
        pass

    def broken(*args, **kwargs):
        raise FloatingPointError('kaput')
    monkeypatch.setattr(loop.watchdog, 'step', broken)
    with pytest.raises(FloatingPointError):
        loop.step(Snapshot(now=t, q=q.copy(), joint_state_stamp=t))
    waiter.join(5.0)
    assert result and result[0][0] is False and 'kaput' in result[0][1]
