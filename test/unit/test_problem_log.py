"""ProblemLog: bad data is counted every time and logged once per source per interval.

Rule under test (our own user's rule, not a standard): run-time input problems are counted and
reported once, not logged per message; a line when a source starts and when it stops having the
problem.
"""
from __future__ import annotations

from constraint_ctrl.problem_log import ProblemLog


class Clock:
    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def make() -> tuple[ProblemLog, list[tuple[str, str]], Clock]:
    lines: list[tuple[str, str]] = []
    clock = Clock()
    return ProblemLog(lambda level, text: lines.append((level, text)), interval=60.0,
                      clock=clock), lines, clock


def test_a_burst_of_the_same_problem_is_one_line_and_all_are_counted() -> None:
    log, lines, clock = make()
    for _ in range(550):                 # 10 s at 55 messages/s
        log.problem('/cell/operator', "frame 'camera' is not base_link")
        clock.t += 1 / 55
    assert len(lines) == 1
    assert lines[0][0] == 'warn' and "frame 'camera'" in lines[0][1]
    assert log.total == 550
    assert log.last_reason == "/cell/operator: frame 'camera' is not base_link"
    assert log.ongoing() == {'/cell/operator': "frame 'camera' is not base_link"}


def test_stop_is_logged_once_with_the_count_and_a_new_start_logs_again() -> None:
    log, lines, clock = make()
    for _ in range(3):
        log.problem('s', 'bad')
    log.ok('s')                          # within the settle time: not over yet
    assert len(lines) == 1 and log.ongoing() == {'s': 'bad'}
    clock.t += 1.0
    for _ in range(100):
        log.ok('s', 'good again')        # only the first good sample writes a line
    assert len(lines) == 2
    assert lines[1][0] == 'info' and 'good again after 3 problem(s)' in lines[1][1]
    assert log.ongoing() == {}
    log.problem('s', 'bad')
    assert len(lines) == 3 and 'bad' in lines[2][1]


def test_an_ongoing_problem_repeats_at_most_once_per_interval() -> None:
    log, lines, clock = make()
    for _ in range(130):                 # one per second for 130 s
        log.problem('s', 'bad')
        clock.t += 1.0
    # first line at t=0, then at 60 s and 120 s, each with the count since the previous line
    assert len(lines) == 3
    assert '60 more in the last 60 s' in lines[1][1]
    assert '121 in all' in lines[2][1]


def test_sources_are_independent_and_a_new_reason_is_a_new_line() -> None:
    log, lines, clock = make()
    log.problem('a', 'duplicate names')
    log.problem('b', 'duplicate names')
    log.problem('a', 'duplicate names')
    log.problem('a', 'non-finite position')
    assert [text.split(':')[0] for _, text in lines] == ['a', 'b', 'a']
    assert 'non-finite position' in lines[2][1]
    clock.t += 1.0
    log.ok('b')
    assert log.ongoing() == {'a': 'non-finite position'}


def test_a_source_alternating_good_and_bad_samples_logs_once() -> None:
    """Two publishers on one topic, one of them bad: 1000 alternations are one line."""
    log, lines, clock = make()
    for _ in range(1000):
        log.problem('joint_states', 'duplicate names')
        clock.t += 0.002
        log.ok('joint_states')
        clock.t += 0.002
    assert len(lines) == 1 and log.total == 1000
    clock.t += 1.0
    log.ok('joint_states')
    assert len(lines) == 2 and '1000 problem(s)' in lines[1][1]
