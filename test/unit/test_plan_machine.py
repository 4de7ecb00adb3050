"""The sequencer's state machine, driven with explicit times (no clock, no middleware).

The expected behaviour is the documented plan semantics (constraint_ctrl/plan/plan.py and
machine.py docstrings); every expected time is hand arithmetic on the times the test feeds in,
written out beside the check (worked examples). The watchdog event names are the controller's.
"""
from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from constraint_ctrl.plan.machine import Activate, Finish, PlanRunner
from constraint_ctrl.plan.plan import Plan, Step

T0 = 100.0   # an arbitrary monotonic start time, so that nothing relies on t = 0


def make_plan(*steps: Step, watchdog_wait: float = 60.0) -> Plan:
    return Plan(name='demo', controller='/constraint_controller', steps=steps,
                watchdog_wait=watchdog_wait)


REACH = Step(name='reach', skill='move_to_point', done_when='arrived', timeout=10.0)
SEAT = Step(name='seat', skill='seat_gear', done_when='seated', timeout=20.0)
LEAVE = Step(name='leave', skill='move_to_point', done_when='arrived', timeout=5.0)


def started(plan: Plan, now: float = T0) -> PlanRunner:
    runner = PlanRunner(plan)
    action = runner.start(now)
    assert action == Activate(plan.steps[0], 0)
    runner.activated(now)
    return runner


def test_steps_advance_on_their_event_only_after_activation() -> None:
    runner = PlanRunner(make_plan(REACH, SEAT))
    assert runner.state == 'waiting'
    assert runner.on_event('arrived', T0) is None          # before start: nothing to end
    assert runner.start(T0) == Activate(REACH, 0)
    assert runner.on_event('arrived', T0 + 1.0) is None    # activation not confirmed yet
    assert runner.step == REACH and runner.records[-1].ended is None
    runner.activated(T0 + 1.5)
    assert runner.on_event('seated', T0 + 2.0) is None     # another step's event
    assert runner.on_event('arrived', T0 + 3.0) == Activate(SEAT, 1)
    first = runner.records[0]
    assert (first.outcome, first.started, first.ended, first.duration) == \
        ('done', T0, T0 + 3.0, 3.0)
    assert runner.step == SEAT and not runner.armed


def test_late_event_of_the_previous_step_does_not_end_the_next() -> None:
    # Consecutive steps with the same done_when: a repeated 'arrived' from the first goal that
    # comes before the second step's activation is confirmed must not count for it.
    runner = started(make_plan(REACH, LEAVE))
    assert runner.on_event('arrived', T0 + 2.0) == Activate(LEAVE, 1)
    assert runner.on_event('arrived', T0 + 2.01) is None
    assert runner.step == LEAVE and runner.records[-1].ended is None
    runner.activated(T0 + 2.05)
    finish = runner.on_event('arrived', T0 + 4.0)
    assert finish == Finish('done', 'all steps done') and runner.state == 'done'
    assert [r.duration for r in runner.records] == pytest.approx([2.0, 2.0])   # 2-0, 4-2


def test_after_the_end_nothing_happens() -> None:
    runner = started(make_plan(REACH))
    assert runner.on_event('arrived', T0 + 1.0) == Finish('done', 'all steps done')
    assert runner.on_event('arrived', T0 + 2.0) is None
    assert runner.on_event('watchdog_stopped', T0 + 2.0) is None
    assert runner.tick(T0 + 1000.0) is None
    assert runner.state == 'done' and len(runner.records) == 1


def test_watchdog_stop_pauses_the_timeout_and_records_the_pause() -> None:
    runner = started(make_plan(REACH, SEAT))
    assert runner.tick(T0 + 4.0) is None
    assert runner.on_event('watchdog_stopped', T0 + 4.0) is None
    assert runner.state == 'paused'
    # 30 s stopped: far beyond the 10 s timeout, which must not run meanwhile.
    assert runner.tick(T0 + 34.0) is None and runner.state == 'paused'
    assert runner.on_event('watchdog_normal', T0 + 34.0) is None
    assert runner.state == 'running'
    record = runner.records[-1]
    assert (record.paused_s, record.pauses) == (pytest.approx(30.0), 1)
    # Moving time = 4 s before + time after the pause; the timeout (10 s) is reached at
    # T0 + 34 + 6 and passed just after.
    assert runner.tick(T0 + 39.9) is None
    finish = runner.tick(T0 + 40.1)
    assert isinstance(finish, Finish) and finish.outcome == 'aborted'
    assert finish.reason == "step reach: no 'arrived' within 10 s"
    assert (record.outcome, record.ended) == ('timeout', T0 + 40.1)


def test_stopping_and_reduced_speed_events_pause_and_resume_once() -> None:
    runner = started(make_plan(REACH))
    runner.on_event('watchdog_stopping', T0 + 1.0)     # braking counts as stopped already
    runner.on_event('watchdog_stopped', T0 + 1.5)      # same pause, not a second one
    assert runner.state == 'paused'
    runner.on_event('watchdog_reduced', T0 + 3.0)      # moving again, at reduced speed
    assert runner.state == 'running'
    runner.on_event('watchdog_stopped', T0 + 5.0)
    runner.on_event('watchdog_normal', T0 + 5.5)
    record = runner.records[-1]
    assert (record.pauses, record.paused_s) == (2, pytest.approx(2.5))   # (3-1) + (5.5-5)


def test_watchdog_wait_exceeded_aborts_with_a_reason() -> None:
    runner = started(make_plan(REACH, watchdog_wait=8.0))
    runner.on_event('watchdog_stopped', T0 + 2.0)
    assert runner.tick(T0 + 10.0) is None              # exactly 8 s stopped: still allowed
    finish = runner.tick(T0 + 10.5)
    assert finish == Finish('aborted', 'step reach: the watchdog kept the arm stopped for '
                                       'more than 8 s')
    record = runner.records[-1]
    assert (record.outcome, record.ended, record.paused_s) == \
        ('aborted', T0 + 10.5, pytest.approx(8.5))
    assert runner.state == 'aborted' and runner.finish == finish


def test_step_entered_while_stopped_starts_paused() -> None:
    runner = started(make_plan(REACH, LEAVE))
    runner.on_event('watchdog_stopped', T0 + 1.0)
    # The first goal was reached just as the watchdog stopped the arm: the next step begins
    # while stopped, so its 5 s timeout must not run until the arm may move.
    assert runner.on_event('arrived', T0 + 1.2) == Activate(LEAVE, 1)
    runner.activated(T0 + 1.3)
    assert runner.state == 'paused'
    assert runner.tick(T0 + 20.0) is None
    runner.on_event('watchdog_normal', T0 + 21.2)
    record = runner.records[-1]
    assert (record.paused_s, record.pauses) == (pytest.approx(20.0), 1)   # 21.2 - 1.2
    assert runner.records[0].paused_s == pytest.approx(0.2)              # 1.2 - 1.0
    assert runner.tick(T0 + 26.0) is None                                 # moved 4.8 s
    assert isinstance(runner.tick(T0 + 26.4), Finish)                     # moved 5.2 s


def test_timeout_jumps_to_on_timeout_step() -> None:
    retry = Step(name='reach', skill='move_to_point', done_when='arrived', timeout=3.0,
                 on_timeout='back_off')
    back_off = Step(name='back_off', skill='move_to_point', done_when='arrived', timeout=4.0,
                    next='reach')
    runner = started(make_plan(retry, back_off))
    assert runner.tick(T0 + 3.0) is None                # not beyond 3 s yet
    assert runner.tick(T0 + 3.2) == Activate(back_off, 1)
    assert runner.records[0].outcome == 'timeout'
    runner.activated(T0 + 3.3)
    # back_off's `next` leads back to reach, which is a new attempt with its own record.
    assert runner.on_event('arrived', T0 + 5.0) == Activate(retry, 0)
    assert [(r.name, r.outcome) for r in runner.records] == \
        [('reach', 'timeout'), ('back_off', 'done'), ('reach', 'running')]


def test_next_jumps_over_steps() -> None:
    skip = Step(name='reach', skill='move_to_point', done_when='arrived', timeout=10.0,
                next='leave')
    runner = started(make_plan(skip, SEAT, LEAVE))
    assert runner.on_event('arrived', T0 + 1.0) == Activate(LEAVE, 2)
    runner.activated(T0 + 1.1)
    assert runner.on_event('arrived', T0 + 2.0) == Finish('done', 'all steps done')
    assert [r.name for r in runner.records] == ['reach', 'leave']


def test_activation_failure_aborts() -> None:
    runner = PlanRunner(make_plan(REACH, SEAT))
    runner.start(T0)
    finish = runner.activation_failed('parameters rejected: goal_x above its upper bound',
                                      T0 + 0.2)
    assert finish == Finish('aborted', 'step reach: activation failed: parameters rejected: '
                                       'goal_x above its upper bound')
    assert runner.state == 'aborted'
    assert (runner.records[0].outcome, runner.records[0].duration) == \
        ('aborted', pytest.approx(0.2))
    assert runner.on_event('arrived', T0 + 1.0) is None


def test_report_has_durations_relative_to_the_start() -> None:
    runner = started(make_plan(REACH, SEAT, LEAVE))
    runner.on_event('arrived', T0 + 2.5)
    runner.activated(T0 + 2.6)
    runner.on_event('watchdog_stopped', T0 + 3.0)
    runner.on_event('watchdog_normal', T0 + 4.25)
    runner.on_event('seated', T0 + 9.0)
    report = runner.report(T0)
    assert report == {
        'plan': 'demo', 'outcome': 'running', 'reason': '',
        'steps': [
            {'name': 'reach', 'skill': 'move_to_point', 'outcome': 'done', 'started_s': 0.0,
             'ended_s': 2.5, 'duration_s': 2.5, 'paused_s': 0.0, 'pauses': 0},
            {'name': 'seat', 'skill': 'seat_gear', 'outcome': 'done', 'started_s': 2.5,
             'ended_s': 9.0, 'duration_s': 6.5, 'paused_s': 1.25, 'pauses': 1},
            {'name': 'leave', 'skill': 'move_to_point', 'outcome': 'running',
             'started_s': 9.0, 'ended_s': None, 'duration_s': None, 'paused_s': 0.0,
             'pauses': 0},
        ]}
    runner.activated(T0 + 9.1)
    runner.on_event('arrived', T0 + 12.0)
    final = runner.report(T0)
    assert (final['outcome'], final['reason']) == ('done', 'all steps done')
    assert [s['duration_s'] for s in final['steps']] == [2.5, 6.5, 3.0]


EVENTS = st.sampled_from(['arrived', 'seated', 'watchdog_stopped', 'watchdog_stopping',
                          'watchdog_normal', 'watchdog_reduced', 'activated', 'tick'])


@settings(max_examples=150, deadline=None)
@given(script=st.lists(st.tuples(EVENTS, st.floats(min_value=0.0, max_value=6.0)),
                       max_size=40),
       wait=st.floats(min_value=1.0, max_value=30.0))
def test_records_stay_consistent_under_any_event_order(script: list[tuple[str, float]],
                                                       wait: float) -> None:
    # Bookkeeping identities that hold whatever the order: a step's duration splits into
    # moving and paused time; a timed-out step moved longer than its timeout; a step ended by
    # the watchdog wait was paused longer than the wait; only one step is open at a time.
    plan = make_plan(REACH, SEAT, LEAVE, watchdog_wait=wait)
    runner = PlanRunner(plan)
    now = T0
    runner.start(now)
    for name, gap in script:
        now += gap
        if name == 'activated':
            runner.activated(now)
        elif name == 'tick':
            runner.tick(now)
        else:
            runner.on_event(name, now)
    runner.tick(now)
    limits = {s.name: s.timeout for s in plan.steps}
    for i, record in enumerate(runner.records):
        if record.ended is None:
            assert i == len(runner.records) - 1 and runner.state in ('running', 'paused')
            continue
        assert record.duration is not None and record.duration >= 0.0
        assert -1e-9 <= record.paused_s <= record.duration + 1e-9
        assert record.outcome in ('done', 'timeout', 'aborted')
        if record.outcome == 'timeout':
            assert record.duration - record.paused_s > limits[record.name]
        if record.paused_s > 0.0:
            assert record.pauses >= 1      # paused time comes from a counted pause
    if runner.state == 'aborted':
        assert runner.finish is not None and runner.finish.reason.startswith('step ')
        if 'watchdog kept' in runner.finish.reason:
            assert runner.records[-1].paused_s > wait


def test_done_event_received_before_the_switch_was_confirmed_is_ignored() -> None:
    """An event queued while the activation call ran belongs to the previous skill."""
    from constraint_ctrl.plan.machine import Activate, PlanRunner
    from constraint_ctrl.plan.plan import Plan, Step
    plan = Plan(name='p', controller='/c', steps=(
        Step('a', 'move', 'arrived', 10.0), Step('b', 'move', 'arrived', 10.0)))
    runner = PlanRunner(plan)
    runner.start(0.0)
    runner.activated(0.1)
    assert isinstance(runner.on_event('arrived', 1.0), Activate)   # step a done -> b
    runner.activated(1.05)                                        # b confirmed at 1.05
    assert runner.on_event('arrived', 1.02) is None               # sent before: ignored
    assert runner.step.name == 'b'
    assert runner.on_event('arrived', 2.0).outcome == 'done'


# --- duration steps, interruption (issue 9 section 1) ---------------------------------------

PRESS = Step(name='press', skill='seat_gear', done_when=None, timeout=None, duration=2.0)
SETTLE = Step(name='settle', skill='hold', done_when=None, timeout=None, duration=0.5)


def test_duration_step_is_done_after_its_moving_time() -> None:
    runner = started(make_plan(PRESS, REACH))
    assert runner.on_event('seated', T0 + 0.5) is None          # events do not end it
    assert runner.on_event('arrived', T0 + 0.6) is None
    assert runner.tick(T0 + 1.99) is None                        # 1.99 s < 2 s
    assert runner.tick(T0 + 2.0) == Activate(REACH, 1)           # 2 s of motion: done
    record = runner.records[0]
    assert (record.outcome, record.duration) == ('done', pytest.approx(2.0))


def test_duration_does_not_run_while_the_watchdog_holds_the_arm() -> None:
    runner = started(make_plan(PRESS))
    runner.on_event('watchdog_stopped', T0 + 1.0)
    assert runner.tick(T0 + 30.0) is None and runner.state == 'paused'
    runner.on_event('watchdog_normal', T0 + 31.0)                # paused 30 s
    assert runner.tick(T0 + 31.9) is None                        # moved 1.0 + 0.9 s
    assert runner.tick(T0 + 32.0) == Finish('done', 'all steps done')   # moved 1 + 1 s
    record = runner.records[0]
    assert (record.paused_s, record.duration) == (pytest.approx(30.0), pytest.approx(32.0))


def test_duration_counts_only_once_the_activation_is_confirmed() -> None:
    runner = PlanRunner(make_plan(SETTLE, REACH))
    assert runner.start(T0) == Activate(SETTLE, 0)
    assert runner.tick(T0 + 5.0) is None          # not confirmed: the step may not end yet
    runner.activated(T0 + 5.0)
    assert runner.tick(T0 + 5.0) == Activate(REACH, 1)   # started at T0: 5 s >= 0.5 s


def test_interrupted_plan_records_the_running_step_and_ignores_what_follows() -> None:
    runner = started(make_plan(REACH, SEAT))
    finish = runner.interrupted('interrupted by SIGTERM', T0 + 1.5)
    assert finish == Finish('interrupted', 'interrupted by SIGTERM')
    assert runner.state == 'interrupted'
    assert (runner.records[0].outcome, runner.records[0].ended) == ('interrupted', T0 + 1.5)
    assert runner.on_event('arrived', T0 + 2.0) is None and runner.tick(T0 + 99.0) is None
    assert runner.report(T0)['outcome'] == 'interrupted'


def test_refused_plan_is_aborted_without_steps() -> None:
    runner = PlanRunner(make_plan(REACH))
    finish = runner.refused('the controller /c is not available', T0)
    assert finish.outcome == 'aborted' and runner.records == []
    assert runner.report(T0)['steps'] == [] and runner.on_event('arrived', T0) is None
