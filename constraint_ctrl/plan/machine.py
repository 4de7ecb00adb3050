"""The sequencer's state machine, free of any middleware: events and time in, actions out.

States of the plan: waiting (not started), running, paused (the controller's watchdog holds the
arm stopped: the step's timeout does not run), done, aborted, interrupted (the sequencer was
stopped by a signal). A step's done_when event only
counts once its skill's activation has been confirmed and only if it was received after the
confirmation, so an event of the previous skill (events carry no skill name) cannot end the next
step. The price: a done event the new skill raises within the activation's round trip (a few ms)
is missed, so give done events a hold_for.

A duration step is done once it has been running for its duration (time since the step
started, pauses not counted, as for a timeout); it needs no event and has no timeout.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from .plan import Plan, Step

#: Controller events that mean the watchdog holds the arm still, and that it moves again.
STOP_EVENTS = frozenset({'watchdog_stopped', 'watchdog_stopping'})
MOVE_EVENTS = frozenset({'watchdog_normal', 'watchdog_reduced'})


@dataclass(frozen=True, slots=True)
class Activate:
    """Set the step's tunables, then activate its skill."""

    step: Step
    index: int


@dataclass(frozen=True, slots=True)
class Finish:
    outcome: str      # 'done', 'aborted' or 'interrupted'
    reason: str


@dataclass(slots=True)
class StepRecord:
    name: str
    skill: str
    started: float
    ended: float | None = None
    outcome: str = 'running'
    paused_s: float = 0.0
    pauses: int = 0

    @property
    def duration(self) -> float | None:
        return None if self.ended is None else self.ended - self.started


@dataclass(slots=True)
class PlanRunner:
    plan: Plan
    state: str = 'waiting'
    current: int = -1
    armed: bool = False
    armed_at: float = float('inf')
    records: list[StepRecord] = field(default_factory=list)
    finish: Finish | None = None
    _paused_since: float | None = None
    _watchdog_stopped: bool = False

    @property
    def step(self) -> Step | None:
        return self.plan.steps[self.current] if 0 <= self.current < len(self.plan.steps) \
            else None

    def start(self, now: float) -> Activate:
        return self._enter(0, now)

    def _enter(self, index: int, now: float) -> Activate:
        self.current = index
        self.armed = False
        self.armed_at = float('inf')
        self.state = 'paused' if self._watchdog_stopped else 'running'
        step = self.plan.steps[index]
        # A step entered while the watchdog holds the arm starts with a pause (counted).
        self.records.append(StepRecord(step.name, step.skill, now,
                                       pauses=int(self._watchdog_stopped)))
        self._paused_since = now if self._watchdog_stopped else None
        return Activate(step, index)

    def activated(self, now: float) -> None:
        """The controller confirmed the switch at ``now``; earlier events belong to the old
        skill."""
        self.armed = True
        self.armed_at = now

    def activation_failed(self, reason: str, now: float) -> Finish:
        return self._end('aborted', f'step {self.step.name if self.step else "?"}: '
                         f'activation failed: {reason}', now)

    def refused(self, reason: str, now: float) -> Finish:
        """The plan cannot start (the controller cannot be asked): aborted without a step."""
        return self._end('aborted', reason, now)

    def interrupted(self, reason: str, now: float) -> Finish:
        """The sequencer was stopped from outside; the running step ends 'interrupted'."""
        return self._end('interrupted', reason, now)

    def on_event(self, name: str, now: float) -> Activate | Finish | None:
        if self.state in ('done', 'aborted', 'interrupted', 'waiting'):
            return None
        if name in STOP_EVENTS:
            self._watchdog_stopped = True
            if self.state == 'running':
                self.state = 'paused'
                self._paused_since = now
                self.records[-1].pauses += 1
            return None
        if name in MOVE_EVENTS:
            self._watchdog_stopped = False
            if self.state == 'paused':
                self._resume(now)
            return None
        step = self.step
        if step is not None and self.armed and now >= self.armed_at and \
                step.done_when is not None and name == step.done_when:
            self._close_step('done', now)
            return self._advance(step.next, now)
        return None

    def _resume(self, now: float) -> None:
        if self._paused_since is not None:
            self.records[-1].paused_s += now - self._paused_since
        self._paused_since = None
        self.state = 'running'

    def tick(self, now: float) -> Activate | Finish | None:
        step = self.step
        if step is None or self.state not in ('running', 'paused'):
            return None
        record = self.records[-1]
        if self.state == 'paused':
            assert self._paused_since is not None
            if now - self._paused_since > self.plan.watchdog_wait:
                return self._end('aborted', f'step {step.name}: the watchdog kept the arm '
                                 f'stopped for more than {self.plan.watchdog_wait:g} s', now)
            return None
        moving = now - record.started - record.paused_s
        if step.duration is not None:
            if self.armed and moving >= step.duration:
                self._close_step('done', now)
                return self._advance(step.next, now)
            return None
        if step.timeout is not None and moving > step.timeout:
            self._close_step('timeout', now)
            if step.on_timeout == 'abort':
                return self._end('aborted', f'step {step.name}: no {step.done_when!r} within '
                                 f'{step.timeout:g} s', now)
            return self._enter(self.plan.index(step.on_timeout), now)
        return None

    def _advance(self, next_name: str | None, now: float) -> Activate | Finish:
        index = self.plan.index(next_name) if next_name else self.current + 1
        if index >= len(self.plan.steps):
            return self._end('done', 'all steps done', now)
        return self._enter(index, now)

    def _close_step(self, outcome: str, now: float) -> None:
        record = self.records[-1]
        if self._paused_since is not None:
            record.paused_s += now - self._paused_since
            self._paused_since = now if self._watchdog_stopped else None
        record.ended = now
        record.outcome = outcome

    def _end(self, outcome: str, reason: str, now: float) -> Finish:
        if self.records and self.records[-1].ended is None:
            self._close_step(outcome, now)
        self.state = outcome
        self.finish = Finish(outcome, reason)
        return self.finish

    def report(self, t0: float = 0.0) -> dict[str, object]:
        return {
            'plan': self.plan.name,
            'outcome': self.finish.outcome if self.finish else self.state,
            'reason': self.finish.reason if self.finish else '',
            'steps': [{'name': r.name, 'skill': r.skill, 'outcome': r.outcome,
                       'started_s': round(r.started - t0, 4),
                       'ended_s': None if r.ended is None else round(r.ended - t0, 4),
                       'duration_s': None if r.duration is None else round(r.duration, 4),
                       'paused_s': round(r.paused_s, 4), 'pauses': r.pauses}
                      for r in self.records],
        }


__all__ = ['Activate', 'Finish', 'PlanRunner', 'StepRecord']
