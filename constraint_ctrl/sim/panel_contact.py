"""A curved panel the tool presses on: one spring-damper along the surface normal.

The panel is a segment of a cylinder (radius R, axis along base y, convex side up); the tool
frame origin is the centre of the polishing pad. Pad and panel together act as a push-only
spring-damper (stiffness k, damping c, sim/gear_contact.spring_damper) on the penetration
p = R - (distance of the pad centre from the cylinder axis), along the outward surface normal,
wherever the pad centre lies over the panel (within ``y_range`` and ``half_angle`` of the
crown). So a pad pressed straight into the panel feels F = k p + c dp/dt. No friction, no
torque (the force acts at the pad centre).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .gear_contact import spring_damper
from .scene import PanelSpec


@dataclass(frozen=True, slots=True)
class PanelResult:
    """One evaluation of the panel contact."""

    force: np.ndarray  # (3,) N, on the tool, tool frame
    torque: np.ndarray  # (3,) N m, on the tool, tool frame (always zero)
    normal_force: float  # N, along the outward surface normal
    penetration: float  # m, pad centre below the surface (negative above it)
    angle: float  # rad, around the axis from the crown (positive towards +x)
    over_panel: bool  # the pad centre lies over the panel's extent


class PanelContact:
    """Stateful only for the damping rate (the penetration of the previous call)."""

    def __init__(self, spec: PanelSpec) -> None:
        self.spec = spec
        self.reset()

    def reset(self) -> None:
        self._last: tuple[float, float] | None = None  # (time, penetration)

    def surface_point(self, angle: float, y: float) -> np.ndarray:
        """The point of the surface at ``angle`` from the crown and ``y`` along the axis."""
        ax, az = self.spec.axis
        r = self.spec.radius
        return np.array([ax + r * math.sin(angle), y, az + r * math.cos(angle)])

    def update(self, time: float, position: np.ndarray, rotation: np.ndarray) -> PanelResult:
        """Evaluate for the tool pose (base frame) at ``time``; call once per simulation step."""
        s = self.spec
        ax, az = s.axis
        dx, dz = float(position[0]) - ax, float(position[2]) - az
        distance = math.hypot(dx, dz)
        angle = math.atan2(dx, dz)
        over = (s.y_range[0] <= float(position[1]) <= s.y_range[1]
                and abs(angle) <= s.half_angle and distance > 0.0)
        penetration = s.radius - distance
        rate = 0.0
        if self._last is not None and time > self._last[0]:
            rate = (penetration - self._last[1]) / (time - self._last[0])
        self._last = (time, penetration)
        push = spring_damper(penetration, rate, s.stiffness, s.damping) if over else 0.0
        f_world = np.zeros(3)
        if push > 0.0:
            f_world[0] = push * dx / distance
            f_world[2] = push * dz / distance
        return PanelResult(force=np.asarray(rotation).T @ f_world, torque=np.zeros(3),
                           normal_force=push, penetration=penetration, angle=angle,
                           over_panel=over)
