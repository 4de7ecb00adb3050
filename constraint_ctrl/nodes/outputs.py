"""The controller's command interfaces: joint velocities, and joint positions for position
streaming (parameter ``command_interfaces``, read at start-up).

- 'velocity': ~/command, std_msgs/Float64MultiArray of joint velocities in joint_names order
  (for a forward command controller on velocity interfaces);
- 'position': ~/position_command, std_msgs/Float64MultiArray of joint positions in joint_names
  order, q + q_dot dt with q the last measured joint positions (the joint_states the tick
  answers) and q_dot this tick's command, for a forward command controller on position
  interfaces. ~/joint_command (sensor_msgs/JointState, stamped with that joint_states sample)
  then carries the same positions in its ``position`` field, beside the velocities.

Both publish with QoS 'command' (reliable, keep last 1): a reader that falls behind gets the
newest command, never a backlog of old targets.

What a position controller needs to stay still. A forward position controller holds the last
target it received, and drives the joints to it. So:
- while the command is zero (hold, a finished stop, a fault with fresh joint_states) the target
  is the measured position at the first zero tick, and it stays that position until motion
  resumes. Re-reading the measurement each tick would let the arm creep: under gravity a
  position loop settles a little below its target, and a target that follows the measurement
  follows the sag down;
- when the joint_states are stale (any joint older than watchdog.joint_state_timeout, or never
  seen) nothing is published on ~/position_command: an old measurement is not where the arm
  is (it kept following the last targets), so a target made from it would pull the arm back
  to where it was, and an extrapolation would move it on blindly. The controller's last target
  (at most one tick of motion past a fresh measurement) stays in force, which holds the arm;
  ~/command keeps publishing zero velocities.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import ConstraintCtrlError
from ..runtime.loop import Snapshot

COMMAND_INTERFACES = ('velocity', 'position')
DEFAULT_COMMAND_INTERFACES = ['velocity']


def parse_command_interfaces(value: Sequence[Any]) -> tuple[str, ...]:
    """The parameter's list, checked: known names, no duplicates, at least one."""
    names = [str(v) for v in value if str(v)]
    unknown = [n for n in names if n not in COMMAND_INTERFACES]
    if unknown or not names or len(set(names)) != len(names):
        msg = (f'parameter command_interfaces must list one or more of '
               f'{", ".join(COMMAND_INTERFACES)} (each once), got {list(value)!r}')
        raise ConstraintCtrlError(msg)
    return tuple(n for n in COMMAND_INTERFACES if n in names)


class PositionTarget:
    """Turns each tick's velocity command into the position target (see the module docstring).

    ``take(snapshot)`` on the tick, before ``target(command)``; both in model joint order,
    ``target`` returns the joint_names order (or None: publish nothing).
    """

    def __init__(self, to_command: np.ndarray, dt: float, joint_state_timeout: float) -> None:
        self._to_command = to_command
        self.dt = dt
        self.timeout = joint_state_timeout
        self._q: np.ndarray | None = None    # the snapshot's q when every joint was fresh
        self._held: np.ndarray | None = None  # the hold target while the command is zero
        self.withheld = 0                      # ticks with stale joint_states: nothing sent

    def take(self, snap: Snapshot) -> None:
        q, stamps = snap.q, snap.joint_stamps
        fresh = q is not None and stamps is not None and bool(
            np.all(snap.now - stamps <= self.timeout))     # NaN (never updated) is not fresh
        self._q = np.array(q, dtype=float) if fresh else None

    def target(self, command: np.ndarray) -> list[float] | None:
        q = self._q
        if q is None:
            self._held = None    # stale: send nothing; re-latch from fresh data afterwards
            self.withheld += 1
            return None
        if not command.any():
            if self._held is None:
                self._held = q
            return self._held[self._to_command].tolist()
        self._held = None
        return (q + command * self.dt)[self._to_command].tolist()

    def hold(self) -> list[float] | None:
        """The target for a zero command outside a tick (shutdown, a failed tick)."""
        if self._held is not None:
            return self._held[self._to_command].tolist()
        return None if self._q is None else self._q[self._to_command].tolist()


def position_message(t: Any, joint_names: Sequence[str]) -> Any:
    """The ~/position_command message, built once and refilled (data only)."""
    n = len(joint_names)
    return t.Float64MultiArray(layout=t.MultiArrayLayout(
        dim=[t.MultiArrayDimension(label='joint_position', size=n, stride=n)],
        data_offset=0), data=[math.nan] * n)


__all__ = ['COMMAND_INTERFACES', 'DEFAULT_COMMAND_INTERFACES', 'PositionTarget',
           'parse_command_interfaces', 'position_message']
