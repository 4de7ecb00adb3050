"""Contact between the gripped splined gear and the vertical splined shaft.

A deliberately simple quasi-static model, enough to make force feedback and the "drop" real:

* Geometry: the tool frame origin is the centre of the gear's lower face. ``depth`` is how far
  that face is below the shaft top (measured along the shaft axis, world z). ``offset`` is the
  horizontal distance of the tool origin from the shaft axis. ``mismatch`` is the angle of the
  gear's reference tooth (tool x axis, heading about world z) minus the shaft spline phase,
  wrapped into [-pitch/2, pitch/2). Tool tilt is not modelled; it only rotates the reported
  force into the tool frame.
* Not engaged, depth > 0:
  - offset <= clearance and |mismatch| < chamfer tolerance: the chamfers guide the gear onto
    the spline; it becomes *engaged* (next bullet).
  - offset <= clearance, spline misaligned: the teeth rest on the shaft end face -> axial
    spring-damper on depth.
  - clearance < offset < shaft radius + gear outer radius: the gear face rests on the shaft end
    face -> the same axial spring-damper.
  - further off: the gear misses the shaft, no force (nothing else is modelled).
* Engaged: the gear slides freely until it reaches the shoulder ``drop`` lower (axial spring-damper
  on depth - drop beyond that); offset beyond the clearance is pushed back by a lateral spring;
  turning beyond the chamfer play is resisted by a torsional spring about the axis. Lifting the
  face above the shaft top disengages.
* Seated: the first time an engaged gear reaches the shoulder, ``seated`` latches, the time is
  kept and the gripper is taken to let go: the gear stays on the shaft. Afterwards the tool only
  feels the shoulder spring if it pushes below the seated gear (no lateral or torsional force).

All forces act at the tool origin (the gear face centre), so the only torque is the spline
torque about the axis. Force and torque are those the environment exerts on the tool
(force-torque sensor convention), expressed in the tool frame. No friction.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum

import numpy as np

from .scene import ShaftSpec

#: How close (m) to the shoulder an engaged gear counts as seated.
SEAT_TOLERANCE = 1e-4


class GearPhase(Enum):
    """Where the gear is relative to the shaft."""

    CLEAR = 'clear'  # above the shaft top or beside the shaft: no contact
    ON_SPLINE_TEETH = 'on_spline_teeth'  # centred but misaligned: resting on the spline ends
    ON_END_FACE = 'on_end_face'  # laterally off beyond the clearance, resting on the end face
    SLIDING = 'sliding'  # on the spline, above the shoulder
    ON_SHOULDER = 'on_shoulder'  # on the spline, pressed onto the shoulder
    RELEASED = 'released'  # seated and let go; the tool no longer carries it


@dataclass(frozen=True, slots=True)
class GearContactResult:
    """One evaluation of the contact model."""

    force: np.ndarray  # (3,) N, on the tool, tool frame
    torque: np.ndarray  # (3,) N m, on the tool about the tool origin, tool frame
    phase: GearPhase
    depth: float  # m, gear face below the shaft top (negative above it)
    offset: float  # m, horizontal distance from the shaft axis
    mismatch: float  # rad, in [-pitch/2, pitch/2)
    seated: bool


def spline_mismatch(gear_angle: float, spline_phase: float, pitch: float) -> float:
    """Angle from the nearest spline tooth position, wrapped into [-pitch/2, pitch/2)."""
    return (gear_angle - spline_phase + 0.5 * pitch) % pitch - 0.5 * pitch


def spring_damper(penetration: float, rate: float, stiffness: float, damping: float) -> float:
    """Push-only contact force k x + c dx/dt for x > 0 (never pulls), else 0."""
    if penetration <= 0.0:
        return 0.0
    return max(0.0, stiffness * penetration + damping * rate)


def heading(rotation: np.ndarray) -> float:
    """Angle of the tool x axis about world z (rad)."""
    return math.atan2(rotation[1, 0], rotation[0, 0])


class GearContact:
    """Stateful contact model: remembers engagement, the seated latch and the last depth."""

    def __init__(self, spec: ShaftSpec) -> None:
        self.spec = spec
        self.engaged = False
        self.seated = False
        self.time_seated: float | None = None
        self._last: tuple[float, float, float] | None = None  # (time, depth, offset)

    def reset(self) -> None:
        self.engaged = False
        self.seated = False
        self.time_seated = None
        self._last = None

    def update(self, time: float, position: np.ndarray,
               rotation: np.ndarray) -> GearContactResult:
        """Evaluate the contact for the tool pose (base frame) at ``time`` (s).

        Rates for damping come from the previous call, so call once per simulation step.
        """
        s = self.spec
        depth = s.top - float(position[2])
        lateral = np.array([position[0] - s.position[0], position[1] - s.position[1]])
        offset = float(math.hypot(lateral[0], lateral[1]))
        mismatch = spline_mismatch(heading(rotation), s.spline_phase, s.pitch)
        depth_rate = offset_rate = 0.0
        if self._last is not None and time > self._last[0]:
            dt = time - self._last[0]
            depth_rate = (depth - self._last[1]) / dt
            offset_rate = (offset - self._last[2]) / dt
        self._last = (time, depth, offset)

        f_world = np.zeros(3)
        torque_z = 0.0
        if self.seated:
            phase = GearPhase.RELEASED
            f_world[2] = spring_damper(depth - s.drop, depth_rate, s.stiffness, s.damping)
        else:
            if depth <= 0.0:
                self.engaged = False
            elif not self.engaged and offset <= s.clearance \
                    and abs(mismatch) < s.chamfer_tolerance:
                self.engaged = True
            if self.engaged:
                phase, torque_z = self._engaged(time, depth, depth_rate, offset, offset_rate,
                                                lateral, mismatch, f_world)
            elif depth > 0.0 and offset < s.radius + s.gear_outer_radius:
                phase = (GearPhase.ON_SPLINE_TEETH if offset <= s.clearance
                         else GearPhase.ON_END_FACE)
                f_world[2] = spring_damper(depth, depth_rate, s.stiffness, s.damping)
            else:
                phase = GearPhase.CLEAR
        rotation_t = np.asarray(rotation).T
        torque_world = np.array([0.0, 0.0, torque_z])
        return GearContactResult(
            force=rotation_t @ f_world, torque=rotation_t @ torque_world, phase=phase,
            depth=s.drop if self.seated else depth, offset=offset, mismatch=mismatch,
            seated=self.seated)

    def _engaged(self, time: float, depth: float, depth_rate: float, offset: float,
                 offset_rate: float, lateral: np.ndarray, mismatch: float,
                 f_world: np.ndarray) -> tuple[GearPhase, float]:
        s = self.spec
        f_world[2] = spring_damper(depth - s.drop, depth_rate, s.stiffness, s.damping)
        push = spring_damper(offset - s.clearance, offset_rate, s.stiffness, s.damping)
        if push > 0.0:
            f_world[:2] = -push * lateral / offset
        play = abs(mismatch) - s.chamfer_tolerance
        torque_z = -math.copysign(s.torsional_stiffness * play, mismatch) if play > 0 else 0.0
        if depth >= s.drop - SEAT_TOLERANCE:
            self.seated = True
            self.time_seated = time
            return GearPhase.ON_SHOULDER, torque_z
        return GearPhase.SLIDING, torque_z
