"""The scalar signals a simulated work cell offers to skills run offline.

Names: each range sensor's frame name (m, +inf when nothing is detected), and the wrist
force-torque reading in the tool frame as tool_force_x/y/z (N) and tool_torque_x/y/z (N m), the
force the environment exerts on the tool. On a live robot the same skill inputs are mapped to
topics in the controller's parameters file instead.
"""
from __future__ import annotations

from .world import World

WRENCH_SIGNALS = ('tool_force_x', 'tool_force_y', 'tool_force_z',
                  'tool_torque_x', 'tool_torque_y', 'tool_torque_z')


def world_signals(world: World) -> dict[str, float]:
    out = {reading.name: reading.range for reading in world.range_readings()}
    force, torque = world.wrench()
    out.update(zip(WRENCH_SIGNALS, [*force.tolist(), *torque.tolist()]))
    return out


__all__ = ['WRENCH_SIGNALS', 'world_signals']
