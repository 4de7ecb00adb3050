"""The demo's stand-off RMS leaves out the first second the arm actually follows, not the first
second on the wall clock.

Seen in a run on a loaded machine: the watchdog held the arm (stale data) 0.2 s into following,
before the tool had come down from the approach height to 8 mm, for four seconds; the wall-clock
settling window had passed by then, so the RMS counted 1.8 mm of not-yet-settled stand-off for
four seconds and the criterion failed although the following itself was fine. The settling
window is the first second of following during which the watchdog let the arm move (states
normal or reduced on ~/status).
"""
from __future__ import annotations

import numpy as np

from constraint_ctrl.tools.demo_report import SETTLE, settling_end


def test_settling_counts_only_time_the_arm_may_move() -> None:
    status_time = np.arange(0.0, 10.0, 0.02)                # ~/status at 50 Hz
    states = ['normal'] * len(status_time)
    for i, t in enumerate(status_time):
        if 2.2 <= t < 6.2:                                   # held 0.2 s into following
            states[i] = 'stopped'
    end = settling_end(2.0, 9.0, status_time, states)
    # 0.2 s before the stop, the remaining 0.8 s after it
    assert abs(end - (6.2 + SETTLE - 0.2)) <= 0.03


def test_without_a_stop_it_is_the_first_second() -> None:
    status_time = np.arange(0.0, 10.0, 0.02)
    end = settling_end(2.0, 9.0, status_time, ['normal'] * len(status_time))
    assert abs(end - (2.0 + SETTLE)) <= 0.03


def test_without_status_it_falls_back_to_the_wall_clock() -> None:
    assert settling_end(2.0, 9.0, np.zeros(0), []) == 2.0 + SETTLE
