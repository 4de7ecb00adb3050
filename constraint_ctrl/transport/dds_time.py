"""ROS time of a DDS-port node: the system clock, or /clock when `use_sim_time` is true.

Mirrors rclpy's node clock and TimeSource (rclpy/time_source.py): with use_sim_time false,
ROS time is the system clock; with it true, ROS time is the latest rosgraph_msgs/Clock
received on /clock (best effort, depth 1 subscription), and 0 until the first one arrives.
The parameter may change at run time; the clock follows.

Timers that run on ROS time (see dds_dispatch.FixedRateTimer) wait on this clock's
condition: they fire when ROS time reaches their due time, so with simulated time they do
not fire at all while /clock does not advance, as rclpy's ROS-time timers do. When ROS time
changes source (use_sim_time switched) or jumps back (a simulation restarted), `generation`
changes and those timers start their schedule again from the new time.
"""
from __future__ import annotations

import threading
import time


class RosClock:
    """See the module docstring; thread-safe."""

    def __init__(self) -> None:
        self.condition = threading.Condition()
        self.generation = 0
        self._sim = False
        self._sim_ns = 0

    @property
    def sim_time(self) -> bool:
        return self._sim

    def now_ns(self) -> int:
        return self._sim_ns if self._sim else time.time_ns()

    def use_sim_time(self, active: bool) -> None:
        with self.condition:
            if active != self._sim:
                self._sim = active
                self.generation += 1
            self.condition.notify_all()

    def on_clock(self, ns: int) -> None:
        """A /clock sample: the new simulated time."""
        with self.condition:
            if ns < self._sim_ns and self._sim:
                self.generation += 1
            self._sim_ns = ns
            self.condition.notify_all()

    def wake(self) -> None:
        """Wake every waiting timer (to stop it)."""
        with self.condition:
            self.condition.notify_all()
