"""The plan-start check: a step naming a skill or tunable the controller lacks is refused before
the first step, located in the plan file, with a did-you-mean.

Outside references: Python's ``difflib.get_close_matches`` (standard library; its documented
default cutoff 0.6 on SequenceMatcher.ratio) is the similarity measure the suggestions follow,
and the ratios quoted below are SequenceMatcher's (2 * matches / total length, the formula in
the difflib documentation); the service names follow the controller's documented interface
(``<node>/skills/<skill>/activate``, ``<node>/hold``) as rmw names services in the graph.
"""
from __future__ import annotations

import difflib
import textwrap
from pathlib import Path

import pytest

from constraint_ctrl.plan.offer import (Offer, combined, did_you_mean, plan_problems,
                                        skills_from_services)
from constraint_ctrl.plan.plan import HOLD, load_plan
from constraint_ctrl.runtime.library import HOLD as LOOP_HOLD

CTRL = '/constraint_controller'
OFFER = Offer(skills=frozenset({'move_to_point', 'seat_gear', 'follow_flange'}),
              parameters=frozenset({'move_to_point.goal_x', 'move_to_point.goal_z',
                                    'move_to_point.tip_on_line.gain', 'seat_gear.press_force',
                                    'follow_flange.standoff', 'rate_hz', 'watchdog.stop_time'}),
              hold=True)


def plan_file(tmp_path: Path, steps: str) -> Path:
    path = tmp_path / 'plan.yaml'
    path.write_text('plan: check_demo\ncontroller: /constraint_controller\nsteps:\n'
                    + textwrap.dedent(steps), encoding='utf-8')
    return path


def line_of(path: Path, text: str) -> int:
    return next(i for i, line in enumerate(path.read_text().splitlines(), 1) if text in line)


def test_the_plan_and_the_loop_name_the_hold_alike() -> None:
    assert HOLD == LOOP_HOLD == 'hold'


def test_skills_come_from_the_activation_services_only() -> None:
    served = [f'{CTRL}/skills/seat_gear/activate', f'{CTRL}/skills/move_to_point/activate',
              f'{CTRL}/hold', f'{CTRL}/reload_skills', f'{CTRL}/get_parameters',
              '/other_node/skills/lurking/activate', f'{CTRL}/skills/a/b/activate']
    assert skills_from_services(CTRL, served) == {'seat_gear', 'move_to_point'}


def test_did_you_mean_follows_difflib() -> None:
    names = ['move_to_point', 'seat_gear', 'follow_flange', 'hold']
    # 'seat_gears' vs 'seat_gear': ratio 2*9/19 = 0.947 >= 0.6
    assert did_you_mean('seat_gears', names) == "; did you mean 'seat_gear'?"
    assert difflib.SequenceMatcher(None, 'seat_gears', 'seat_gear').ratio() == \
        pytest.approx(18 / 19)
    assert did_you_mean('mvoe_to_point', names) == "; did you mean 'move_to_point'?"
    assert did_you_mean('hodl', names) == "; did you mean 'hold'?"
    assert did_you_mean('xyz', names) == ''      # nothing close: no suggestion
    for word in ('seat_gears', 'mvoe_to_point', 'hodl', 'xyz', 'folow'):
        close = difflib.get_close_matches(word, names, n=1)
        assert did_you_mean(word, names) == (f"; did you mean {close[0]!r}?" if close else '')


def test_a_plan_the_controller_can_run_has_no_problems(tmp_path: Path) -> None:
    path = plan_file(tmp_path, """\
        - {name: a, skill: move_to_point, set: {goal_x: 0.5, goal_z: 0.3},
           done_when: arrived, timeout: 5}
        - {name: b, skill: seat_gear, duration: 2}
        - {name: c, skill: hold, duration: 1}
        """)
    assert plan_problems(load_plan(path), OFFER) == []


def test_unknown_skill_and_tunable_are_located_with_a_suggestion(tmp_path: Path) -> None:
    path = plan_file(tmp_path, """\
        - name: a
          skill: move_to_point
          set: {goal_x: 0.5, goal_zz: 0.3}
          done_when: arrived
          timeout: 5
        - name: b
          skill: seat_gears
          duration: 2
        - name: c
          skill: polish
          duration: 2
        """)
    problems = plan_problems(load_plan(path), OFFER)
    assert [(p.field, p.line) for p in problems] == [
        ('steps[0].set.goal_zz', line_of(path, 'goal_zz')),
        ('steps[1].skill', line_of(path, 'seat_gears')),
        ('steps[2].skill', line_of(path, 'polish'))]
    tunable, skill, far = problems
    assert tunable.file == str(path)
    # 'goal_zz' vs 'goal_z': ratio 2*6/13 = 0.92; vs 'goal_x': 2*5/13 = 0.77
    assert "skill 'move_to_point' has no tunable 'goal_zz'; did you mean 'goal_z'?" in \
        tunable.message
    # only tunables a plan can name are listed (a plan key has no dots)
    assert '(its tunables: goal_x, goal_z)' in tunable.message
    assert f"{CTRL} offers no skill 'seat_gears'; did you mean 'seat_gear'?" in skill.message
    assert 'did you mean' not in far.message
    assert '(it offers: follow_flange, move_to_point, seat_gear, hold)' in far.message
    error = combined(problems)
    lines = str(error).splitlines()
    assert lines[0] == str(tunable) and lines[1:] == [str(skill), str(far)]
    assert (error.file, error.line, error.field) == (tunable.file, tunable.line, tunable.field)


def test_a_controller_without_hold_cannot_run_a_plan(tmp_path: Path) -> None:
    path = plan_file(tmp_path, '- {name: a, skill: seat_gear, duration: 2}\n')
    old = Offer(OFFER.skills, OFFER.parameters, hold=False)
    [problem] = plan_problems(load_plan(path), old)
    assert problem.field == 'controller' and problem.line == 2
    assert f'does not serve {CTRL}/hold' in problem.message
