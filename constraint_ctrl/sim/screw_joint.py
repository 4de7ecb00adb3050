"""A screw driven into a threaded hole by a bit on the tool: run-down and seating.

A deliberately simple quasi-static model, enough to make the driving torque rise when the screw
seats (so that a skill can end on a torque event) and to make alignment and pressing matter:

* Geometry: the hole axis is vertical; ``a`` = (0, 0, -1) points into the plate. The tool frame
  origin is the tip of the driver bit. The screw head (countersunk: flush with the plate once
  seated) has its top at ``plate_top + standout - advance``.
* Axial contact: within ``head_radius`` of the axis the bit rests on the head, elsewhere the tool
  rests on the plate; either is a push-only spring-damper along the axis (the same law as the
  gear contact, sim/gear_contact.spring_damper).
* Engagement: the bit is in the head's recess while its offset from the axis is within
  ``capture_radius``, its axis within ``tilt_tolerance`` of the hole axis and it presses with at
  least ``engage_force``. Only then does turning the tool turn the screw; otherwise the bit slips
  (no torque).
* Run-down: turned by an angle d(theta) about ``a``, the screw advances pitch * d(theta) / (2 pi)
  (a single-start thread advances one lead per turn). The thread resists with
  ``running_torque``; below ``SLIP_SPEED`` the resistance is taken proportional to the turning
  speed (a regularised Coulomb friction law, so that the torque is defined at rest).
* Seating: once the advance reaches ``standout`` the head is clamped; every further radian
  turned winds the joint up and raises the torque by ``seated_torque_rate`` (the torque rate of
  the joint: ISO 5393 calls a joint "hard" when the torque rises from snug to target within
  30 degrees, from memory). The torque held in the windup stays while the bit is engaged, also
  at rest; turning back unwinds it and, past the seating angle, backs the screw out again.

Force and torque are those the environment exerts on the tool (force-torque sensor convention),
in the tool frame: pressing on the head shows as a negative force along a tool z axis that
points into the plate, and the thread's resistance to tightening (positive turning about ``a``)
as a negative torque about it. No lateral forces and no friction between bit and head.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .gear_contact import spring_damper
from .scene import ScrewSpec

#: Turning speed (rad/s) below which the thread friction is proportional to the speed.
SLIP_SPEED = 0.05
#: The hole axis, pointing into the plate (the direction the screw advances).
AXIS = np.array([0.0, 0.0, -1.0])


@dataclass(frozen=True, slots=True)
class ScrewResult:
    """One evaluation of the screw model."""

    force: np.ndarray  # (3,) N, on the tool, tool frame
    torque: np.ndarray  # (3,) N m, on the tool about the tool origin, tool frame
    drive_torque: float  # N m, the torque the bit applies to the screw about the hole axis
    axial_force: float  # N, how hard the tool presses along the axis (head or plate)
    engaged: bool  # the bit is in the recess
    seated: bool  # the head is clamped on the plate
    advance: float  # m, how far the screw has run down (standout when seated)
    windup: float  # rad, turned since the head seated
    offset: float  # m, bit tip from the hole axis
    tilt: float  # rad, tool axis from the hole axis


def bit_angle(rotation: np.ndarray) -> float:
    """Angle of the tool x axis about the hole axis ``AXIS`` (rad), from base x."""
    # about a = -z the positive sense is clockwise seen from above: minus the heading about z
    return math.atan2(-rotation[1, 0], rotation[0, 0])


def wrap(angle: float) -> float:
    """Angle wrapped into [-pi, pi)."""
    return (angle + math.pi) % (2.0 * math.pi) - math.pi


class ScrewJoint:
    """Stateful model: how far the screw has run down, the seated windup, the last bit angle."""

    def __init__(self, spec: ScrewSpec) -> None:
        self.spec = spec
        self.reset()

    def reset(self) -> None:
        """Back to the start: screw standing out by ``standout``, nothing tracked yet."""
        self.advance = 0.0
        self.windup = 0.0
        self.seated = False
        self.time_seated: float | None = None
        self._last_angle: float | None = None
        self._last: tuple[float, float, bool] | None = None  # (time, penetration, on the head)

    @property
    def head_top(self) -> float:
        """z of the head's top face (m)."""
        return self.spec.plate_top + self.spec.standout - self.advance

    def update(self, time: float, position: np.ndarray, rotation: np.ndarray) -> ScrewResult:
        """Evaluate for the tool pose (base frame) at ``time``; call once per simulation step
        (turning and damping rates come from the previous call)."""
        s = self.spec
        rotation = np.asarray(rotation)
        offset = math.hypot(float(position[0]) - s.hole[0], float(position[1]) - s.hole[1])
        tilt = math.acos(max(-1.0, min(1.0, float(rotation[:, 2] @ AXIS))))
        on_head = offset <= s.head_radius
        surface = self.head_top if on_head else s.plate_top
        penetration = surface - float(position[2])
        angle = bit_angle(rotation)
        turned = 0.0 if self._last_angle is None else wrap(angle - self._last_angle)
        self._last_angle = angle
        rate = speed = 0.0
        if self._last is not None and time > self._last[0]:
            dt = time - self._last[0]
            speed = turned / dt
            if self._last[2] == on_head:        # no damping spike when the surface changes
                rate = (penetration - self._last[1]) / dt
        self._last = (time, penetration, on_head)
        axial = spring_damper(penetration, rate, s.stiffness, s.damping)
        engaged = (on_head and offset <= s.capture_radius and tilt <= s.tilt_tolerance
                   and axial >= s.engage_force)
        drive = 0.0
        if engaged:
            self._turn(time, turned)
            if self.seated:
                drive = s.running_torque + s.seated_torque_rate * self.windup
            else:
                drive = s.running_torque * max(-1.0, min(1.0, speed / SLIP_SPEED))
        # on the tool: pushed back against the axis, and held back about it
        rotation_t = rotation.T
        force = rotation_t @ (-axial * AXIS)
        torque = rotation_t @ (-drive * AXIS)
        return ScrewResult(force=force, torque=torque, drive_torque=drive, axial_force=axial,
                           engaged=engaged, seated=self.seated, advance=self.advance,
                           windup=self.windup, offset=offset, tilt=tilt)

    def _turn(self, time: float, turned: float) -> None:
        """Turn the engaged screw by ``turned`` rad about the hole axis."""
        s = self.spec
        lead = s.pitch / (2.0 * math.pi)     # m per rad
        if self.seated:
            self.windup += turned
            if self.windup >= 0.0:
                return
            # turned back past the seating angle: the head lifts, the screw runs out again
            self.seated = False
            self.advance = s.standout + self.windup * lead
            self.windup = 0.0
            return
        self.advance = max(0.0, self.advance + turned * lead)
        if self.advance >= s.standout:
            self.windup = (self.advance - s.standout) / lead
            self.advance = s.standout
            self.seated = True
            self.time_seated = time
