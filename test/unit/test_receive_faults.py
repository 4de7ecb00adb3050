"""FaultLog: failures are counted per source and logged at most once a minute per source.

The rule comes from the user's requirements (issue 8 item 4 and the rule "counted and
reported once, not logged per message"); the clock is injected, so no waiting.
"""
from __future__ import annotations

from constraint_ctrl.transport.receive_faults import FaultLog, SourceFaults


class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def make() -> tuple[FaultLog, list[tuple[str, str]], FakeClock]:
    lines: list[tuple[str, str]] = []
    clock = FakeClock()
    return FaultLog(lambda level, text: lines.append((level, text)), clock=clock), lines, clock


def test_first_failure_is_logged_then_one_line_per_minute_with_the_count() -> None:
    log, lines, clock = make()
    for _ in range(500):                                  # a flood within one second
        log.dropped('subscription /joint_states', UnicodeDecodeError('utf-8', b'\xff', 0, 1,
                                                                     'invalid start byte'))
        clock.now += 0.002
    assert len(lines) == 1 and lines[0][0] == 'warn'
    assert 'subscription /joint_states' in lines[0][1] and 'invalid start byte' in lines[0][1]
    clock.now = 1060.0                                    # 60 s after the first line
    log.dropped('subscription /joint_states', ValueError('bad'))
    assert len(lines) == 2
    assert '499 more since the last report' in lines[1][1]
    assert '501 dropped' in lines[1][1]
    assert log.snapshot()['subscription /joint_states'] == SourceFaults(
        dropped=501, callback_errors=0, last_error='ValueError: bad')


def test_sources_are_limited_separately() -> None:
    log, lines, _ = make()
    log.dropped('subscription /a', ValueError('x'))
    log.dropped('subscription /b', ValueError('y'))
    log.dropped('subscription /a', ValueError('z'))
    assert [text.split(':')[0] for _, text in lines] == ['subscription /a', 'subscription /b']
    assert log.snapshot()['subscription /a'].dropped == 2


def test_callback_errors_carry_the_traceback_and_guard_returns() -> None:
    log, lines, _ = make()

    def failing(value: int) -> int:
        raise RuntimeError(f'no {value}')
    guarded = log.guard('timer 0', failing)
    assert guarded(3) is None
    assert guarded(4) is None
    assert log.snapshot()['timer 0'] == SourceFaults(dropped=0, callback_errors=2,
                                                    last_error='RuntimeError: no 4')
    assert len(lines) == 1 and lines[0][0] == 'error'
    assert 'Traceback' in lines[0][1] and 'no 3' in lines[0][1]
    assert log.guard('ok', lambda x: x + 1)(1) == 2


def test_a_failing_service_callback_still_gets_an_error_reply() -> None:
    """issue 8 item 5: an exception in a service callback becomes an error reply."""
    from types import SimpleNamespace
    log, lines, _ = make()

    def explode(request: object, response: object) -> object:
        raise KeyError('skill')
    reply = log.guard_service('service /ctrl/activate', explode)(
        SimpleNamespace(), SimpleNamespace(success=True, message=''))
    assert (reply.success, reply.message) == (False, "KeyError: 'skill'")
    assert log.snapshot()['service /ctrl/activate'].callback_errors == 1
    ok = log.guard_service('service /x', lambda q, r: r)(1, SimpleNamespace(success=True))
    assert ok.success is True and len(lines) == 1


def test_a_failing_log_never_escapes() -> None:
    """The log call itself may fail (e.g. /rosout refusing text that is not Unicode): the
    failure is still counted and the caller (a dispatch thread) is not interrupted."""
    def broken_log(level: str, text: str) -> None:
        raise UnicodeEncodeError('utf-8', '\udcff', 0, 1, 'surrogates not allowed')
    log = FaultLog(broken_log, clock=FakeClock())
    log.dropped('subscription /x', ValueError('\udcff'))
    log.callback_failed('timer 0', RuntimeError('x'))
    assert log.snapshot()['subscription /x'].dropped == 1
    assert log.snapshot()['timer 0'].callback_errors == 1
