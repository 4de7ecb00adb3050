"""A timer on simulated time counts its first period from its creation, as rcl does.

rcl_timer_init reads the clock when the timer is made and the first call is due one period
after that (ros2/rcl timer.c, from memory), whatever the executor does meanwhile. Ours used
to read the clock when its thread first ran, so a /clock sample arriving between creation and
that moment (a busy machine delays the thread) moved the whole schedule: seen as
test_dds_time_rosout's timer not firing at 0.1 s of simulated time in a loaded full run.
"""
from __future__ import annotations

import threading

from constraint_ctrl.transport.dds_dispatch import FixedRateTimer
from constraint_ctrl.transport.dds_time import RosClock
from constraint_ctrl.transport.receive_faults import FaultLog


def test_first_call_is_one_period_after_creation_not_after_the_thread_started() -> None:
    clock = RosClock()
    clock.use_sim_time(True)                  # simulated time 0 when the timer is made
    fired = threading.Event()
    calls: list[int] = []

    def tick() -> None:
        calls.append(clock.now_ns())
        fired.set()

    timer = FixedRateTimer(0.1, tick, FaultLog(lambda level, text: None), clock=clock)
    clock.on_clock(50_000_000)                # /clock moves before the timer's thread runs
    timer.start()
    try:
        clock.on_clock(100_000_000)           # one period after creation
        assert fired.wait(10.0), 'no call at 0.1 s of simulated time'
        assert calls == [100_000_000]
    finally:
        timer.cancel()
