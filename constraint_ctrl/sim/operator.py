"""A person walking a scripted floor path through the cell.

The path is piecewise linear at a constant speed per segment. Before the start trigger fires the
person stands at the first waypoint, after the last segment at the last one: the position is
always defined, so a separation monitor never sees a gap in the data (the waypoints at both ends
are meant to lie outside the cell).
"""
from __future__ import annotations

import math

import numpy as np

from .scene import OperatorSpec, StartAtTime, StartWhenToolInBox


class OperatorPath:
    """Timed piecewise-linear path: arrival time at each waypoint from the speeds."""

    def __init__(self, spec: OperatorSpec) -> None:
        self.points = np.array([w.xy for w in spec.path], dtype=float)
        self.height = spec.height
        lengths = np.linalg.norm(np.diff(self.points, axis=0), axis=1)
        speeds = np.array([w.speed for w in spec.path[1:]], dtype=float)
        self.arrival = np.concatenate([[0.0], np.cumsum(lengths / speeds)])

    @property
    def duration(self) -> float:
        """Walking time (s) from the first to the last waypoint."""
        return float(self.arrival[-1])

    def position(self, elapsed: float) -> np.ndarray:
        """Torso point (x, y, height) after walking ``elapsed`` seconds (clamped to the path)."""
        if elapsed <= 0.0:
            xy = self.points[0]
        elif elapsed >= self.duration:
            xy = self.points[-1]
        else:
            i = int(np.searchsorted(self.arrival, elapsed, side='right')) - 1
            span = self.arrival[i + 1] - self.arrival[i]
            s = (elapsed - self.arrival[i]) / span if span > 0.0 else 1.0
            xy = self.points[i] + s * (self.points[i + 1] - self.points[i])
        return np.array([xy[0], xy[1], self.height])


class Operator:
    """The path plus its start trigger; feed it the tool position every simulation step."""

    def __init__(self, spec: OperatorSpec) -> None:
        self.spec = spec
        self.name = spec.name
        self.path = OperatorPath(spec)
        self.start_time: float | None = None
        self._inside_since: float | None = None
        if isinstance(spec.start, StartAtTime):
            self.start_time = spec.start.time

    def update(self, time: float, tool_position: np.ndarray) -> None:
        """Check the tool-in-box trigger at ``time`` (s); no effect once started."""
        trigger = self.spec.start
        if self.start_time is not None or not isinstance(trigger, StartWhenToolInBox):
            return
        p = np.asarray(tool_position, dtype=float)
        inside = bool(np.all(p >= trigger.lower) and np.all(p <= trigger.upper))
        if not inside:
            self._inside_since = None
            return
        if self._inside_since is None:
            self._inside_since = time
        if time - self._inside_since >= trigger.duration - 1e-12:
            self.start_time = time

    @property
    def started(self) -> bool:
        return self.start_time is not None

    def position(self, time: float) -> np.ndarray:
        """Torso point in the base frame at ``time`` (s)."""
        elapsed = -math.inf if self.start_time is None else time - self.start_time
        return self.path.position(elapsed)
