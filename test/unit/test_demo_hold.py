"""The demo's criterion that the plan ends in hold, on hand-made recordings.

The expected outcomes are the criterion's documented rules (tools/demo_report.py); the data
are worked examples written out here: a kinematic arm (q integrates the commanded velocity
exactly, as the simulator's does) that either stands still after the plan or drifts as the
issue saw it (joint_1 from 0.40 to 0.97 rad after the last step: the last skill left running).
"""
from __future__ import annotations

import numpy as np

from constraint_ctrl.tools.demo_report import HOLD_STILL_LIMIT, Status, ended_in_hold

PLAN_END = 10.0
STOP = 12.0
T = np.arange(9.0, 12.5, 0.01)       # the simulator's record, 100 Hz, plan clock


def status(skill_after: str) -> Status:
    times = np.arange(9.0, 12.5, 0.02)     # 50 Hz
    skills = ['move_to_point' if t < 10.02 else skill_after for t in times]
    n = len(times)
    return Status(times, skills, ['normal'] * n, np.ones(n), np.full(n, 3.0),
                  np.full(n, 0.5), [{}] * n, [''] * n)


def commands(until: float, speed: float) -> list[tuple[float, float]]:
    """Commands every 2 ms; ``speed`` until ``until``, zero after; plus the shutdown zeros."""
    out = [(t, speed if t < until else 0.0) for t in np.arange(9.0, 12.0, 0.002)]
    return out + [(12.05, 0.0)] * 3


def q_of(until: float, speed: float) -> np.ndarray:
    """joint_1 integrating ``speed`` until ``until`` (the others still)."""
    q = np.zeros((len(T), 6))
    q[:, 0] = 0.40 + speed * np.clip(T - 9.0, 0.0, until - 9.0)
    return q


EVENTS = [(-3.0, 'holding'), (0.1, 'activated_move_to_point'), (9.8, 'arrived'),
          (10.01, 'holding')]


def test_a_plan_that_ends_in_hold_passes() -> None:
    got = ended_in_hold(PLAN_END, STOP, EVENTS, status('hold'), commands(10.05, 0.1), T,
                        q_of(10.05, 0.1))
    assert got['passed'], got
    assert got['holding_at_s'] == 10.01          # the start-up hold (t < 0) does not count
    assert got['last_command_max_abs'] == 0.0 and got['true_joint_motion_rad'] == 0.0
    assert got['still_samples'] >= 100 and got['statuses_not_hold'] == 0


def test_the_last_skill_left_running_fails() -> None:
    # what the issue saw: no hold, the arm turns on at 0.285 rad/s (0.40 -> 0.97 rad in 2 s)
    events = EVENTS[:-1]
    drift = ended_in_hold(PLAN_END, STOP, events, status('move_to_point'),
                          commands(99.0, 0.285), T, q_of(99.0, 0.285))
    assert not drift['passed'] and drift['why'] == 'no holding event after the plan'
    # a holding event alone is not enough: the commands and the true arm must agree
    moving = ended_in_hold(PLAN_END, STOP, EVENTS, status('hold'), commands(99.0, 0.285), T,
                           q_of(99.0, 0.285))
    assert not moving['passed'] and moving['last_command_max_abs'] == 0.285


def test_a_status_that_still_names_the_skill_fails() -> None:
    got = ended_in_hold(PLAN_END, STOP, EVENTS, status('move_to_point'), commands(10.05, 0.1),
                        T, q_of(10.05, 0.1))
    assert not got['passed'] and got['statuses_not_hold'] == got['statuses_after_hold'] > 0


def test_true_motion_after_the_zero_command_fails() -> None:
    q = q_of(10.05, 0.1)
    q[T > 11.0, 2] += 1e-6                        # joint_3 creeps: more than the limit
    assert 1e-6 > HOLD_STILL_LIMIT
    got = ended_in_hold(PLAN_END, STOP, EVENTS, status('hold'), commands(10.05, 0.1), T, q)
    assert not got['passed']
    assert abs(got['true_joint_motion_rad'] - 1e-6) < 1e-12
