"""`run --realtime`: SCHED_FIFO per thread and mlockall (runtime/realtime.py).

Sources: sched_setscheduler(2) and sched(7) (Linux man-pages): the policy is a per-thread
attribute, pid 0 is the calling thread, EPERM without CAP_SYS_NICE or an RLIMIT_RTPRIO at
least the priority; SCHED_FIFO priorities are 1..99 (sched_get_priority_min/max); mlockall(2)
flags MCL_CURRENT = 1, MCL_FUTURE = 2 (<sys/mman.h> on Linux).
"""
from __future__ import annotations

import errno
import os
import threading

import pytest

from constraint_ctrl.runtime import realtime
from constraint_ctrl.runtime.realtime import RealtimeControl, check_priority


def test_priority_range_is_sched_fifos() -> None:
    assert check_priority(1) is None and check_priority(99) is None
    for bad in (0, 100, -5, True, 2.5, '80'):
        assert check_priority(bad) is not None          # type: ignore[arg-type]


def test_refusal_is_reported_and_the_process_runs_on(monkeypatch: pytest.MonkeyPatch) -> None:
    """Where not permitted: no exception, a reason naming what is needed, normal scheduling."""
    calls: list[int] = []

    def refuse(pid: int, policy: int, param: object) -> None:
        calls.append(pid)
        raise PermissionError(errno.EPERM, 'Operation not permitted')
    monkeypatch.setattr(os, 'sched_setscheduler', refuse)
    monkeypatch.setattr(realtime, 'lock_memory', lambda: 'mlockall refused (test)')
    control = RealtimeControl(80)
    line = control.start({12345: 'recv'})
    assert 'refused' in line and 'normal scheduling' in line and 'rtprio' in line
    assert 'mlockall refused' in line
    assert control.enter() is None        # already refused: not asked again, nothing new
    assert calls == [12345]
    assert control.as_dict()['refused'] and not control.as_dict()['threads']


def test_each_thread_is_switched_once(monkeypatch: pytest.MonkeyPatch) -> None:
    switched: list[tuple[int, int]] = []
    monkeypatch.setattr(os, 'sched_setscheduler',
                        lambda pid, policy, param: switched.append((pid, param.sched_priority)))
    control = RealtimeControl(70)
    lines: list[str | None] = []

    def tick() -> None:
        for _ in range(3):
            lines.append(control.enter())
    worker = threading.Thread(target=tick, name='tick-thread')
    worker.start()
    worker.join()
    status = threading.Thread(target=lambda: lines.append(control.enter(below=1)),
                              name='status-thread')
    status.start()
    status.join()
    # pid 0 = the calling thread (sched_setscheduler(2)); one call per thread, at its priority
    assert switched == [(0, 70), (0, 69)]
    assert lines[0] is not None and 'tick-thread' in lines[0] and lines[1:3] == [None, None]
    assert lines[3] is not None and 'SCHED_FIFO 69' in lines[3]
    assert sorted(control.granted.values()) == ['status-thread at 69', 'tick-thread']


@pytest.mark.skipif(not hasattr(os, 'sched_setscheduler'), reason='Linux only')
def test_the_policy_is_per_thread_on_this_machine() -> None:
    """On the real kernel: switching one thread leaves the others (here the caller) alone; where
    it is not permitted the refusal says why."""
    seen: dict[str, object] = {}

    def worker() -> None:
        seen['problem'] = realtime.set_fifo(10)
        seen['fifo'] = realtime.is_fifo(0)
    thread = threading.Thread(target=worker)
    thread.start()
    thread.join()
    assert realtime.is_fifo(0) is False
    if seen['problem'] is None:
        assert seen['fifo'] is True
    else:
        assert 'not permitted' in str(seen['problem']) and seen['fifo'] is False


def test_threads_are_found_by_name() -> None:
    names = realtime.threads_named(('',))     # every thread of this process
    assert threading.get_native_id() in names
