"""~/status is built on its own thread (nodes/status.py: StatusWorker), never on the tick.

Checked by order and counts, never by time: the tick's post() returns while the worker is
still busy with an earlier status; a newer status replaces one still waiting; a failing
build is counted and logged once, and the next status is published; close() publishes what
is pending.
"""
from __future__ import annotations

import threading

from constraint_ctrl.nodes.status import StatusWorker


def test_post_does_not_wait_for_publishing_and_the_newest_waiting_status_wins() -> None:
    release = threading.Event()
    started = threading.Event()
    published: list[int] = []
    tick_threads: set[int] = set()

    def publish(out: int, rows: object, names: list[str]) -> None:
        tick_threads.add(threading.get_ident())
        started.set()
        release.wait(10.0)
        published.append(out)

    worker = StatusWorker(publish, lambda level, text: None)
    worker.post(1, None, [])
    assert started.wait(10.0)         # the worker is inside publish(1), blocked
    worker.post(2, None, [])          # returns although publish(1) has not finished
    worker.post(3, None, [])          # replaces 2, still waiting
    assert published == []
    release.set()
    worker.close()
    assert published == [1, 3]
    assert worker.replaced == 1
    assert threading.get_ident() not in tick_threads


def test_a_failing_status_is_counted_logged_once_and_the_worker_goes_on() -> None:
    lines: list[tuple[str, str]] = []
    published: list[int] = []
    done = threading.Event()

    def publish(out: int, rows: object, names: list[str]) -> None:
        if out < 3:
            raise RuntimeError(f'status {out} failed')
        published.append(out)
        done.set()

    worker = StatusWorker(publish, lambda level, text: lines.append((level, text)))
    for out in (1, 2, 3):
        worker.post(out, None, [])
        if out < 3:                       # let each one reach the worker before the next
            while worker.errors < out:
                threading.Event().wait(0.001)
    assert done.wait(10.0)
    worker.close()
    assert worker.errors == 2 and published == [3]
    assert len(lines) == 1 and lines[0][0] == 'error' and 'status 1 failed' in lines[0][1]


def test_close_publishes_what_is_pending_then_stops() -> None:
    published: list[int] = []
    gate = threading.Event()
    worker = StatusWorker(lambda out, rows, names: (gate.wait(10.0), published.append(out)),
                          lambda level, text: None)
    worker.post(1, None, [])
    worker.post(2, None, [])
    gate.set()
    worker.close()
    assert published[-1] == 2
    worker.post(3, None, [])              # after close: nobody publishes it
    assert published[-1] == 2
