"""Watchdog states and the record written whenever the state changes.

A transition carries the numbers that caused it, so a log of transitions alone explains
why the robot slowed down or stopped without replaying the run.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from enum import Enum


class State(str, Enum):
    """What the watchdog currently lets through."""

    NORMAL = 'normal'
    """Commands pass, limited only by the joint caps and the separation rule."""
    REDUCED = 'reduced'
    """Every monitored point is additionally held at or below the reduced speed."""
    STOPPING = 'stopping'
    """A requested (normal) stop: the command ramps down to zero within the stopping time."""
    STOPPED = 'stopped'
    """Zero command: a fault, a person too close, or a finished requested stop."""


@dataclass(frozen=True)
class Transition:
    """One change of state.

    Attributes:
        time: controller time of the tick that changed state (s).
        from_state: state before the tick.
        to_state: state after the tick.
        reason: plain-language cause, naming the input, point or fault involved.
        values: the measured values behind the reason (e.g. ``min_separation`` in m,
            ``age`` of a stale input in s), so the decision can be checked afterwards.
    """

    time: float
    from_state: State
    to_state: State
    reason: str
    values: dict[str, float] = field(default_factory=dict)
