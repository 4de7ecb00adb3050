"""Speed and separation monitoring after ISO/TS 15066:2016 clause 5.5.4.

The protective separation distance is

    S_p(v) = S_h + S_r + S_s + C + Z_d + Z_r,
    S_h = v_h (T_r + T_s),  S_r = v T_r,  S_s = v^2 / (2 a),  T_s = v / a,

with a constant-deceleration stopping model (a real robot's stopping data should replace it).
S_p is quadratic in the robot speed v, so for a measured separation S the highest speed that
keeps S >= S_p(v) has a closed form; it is 0 (stop) once S is at or below S_p(0).

Each tick the monitor compares every monitored point (a sphere around a point on the robot)
with every person position, and returns one uniform factor for the joint command so that no
point's speed component towards any person exceeds what its separation permits. A uniform
factor keeps the command's direction, so the skill's motion is slowed, never bent.

This is a supervisory software layer for development and testing, not a safety function: it
does not meet ISO 13849-1 / IEC 62061 and must never be the only protection for a person.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np

from constraint_ctrl.errors import ConstraintCtrlError


@dataclass(frozen=True)
class SeparationParams:
    """Terms of the protective separation distance (SI units: m, s, m/s, m/s^2).

    Attributes:
        human_speed: v_h. 1.6 m/s is the ISO 13855 walking approach speed, used when the
            person's speed is not measured.
        reaction_time: T_r, detection + processing + transport + stop initiation. 0.1 s is
            the example value of the project's worked SSM example (not a standard value);
            include data age and the watchdog cycle in a real budget.
        robot_deceleration: a, constant braking deceleration. 3.333 m/s^2 = stop from 1 m/s in
            0.3 s (example value; take real numbers from the maker's stopping data).
        intrusion_distance: C. 0.208 m = ISO 13855 C = 8 (d - 14) mm for a detection
            capability d = 40 mm.
        person_uncertainty: Z_d, position tolerance of the person sensing (assumed 0.1 m).
        robot_uncertainty: Z_r, position tolerance of the robot (assumed 0.02 m).
    """

    human_speed: float = 1.6
    reaction_time: float = 0.1
    robot_deceleration: float = 1.0 / 0.3
    intrusion_distance: float = 0.208
    person_uncertainty: float = 0.1
    robot_uncertainty: float = 0.02

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
                msg = f'SeparationParams.{f.name}: expected a finite number >= 0, got {value!r}'
                raise ConstraintCtrlError(msg)
        for name in ('reaction_time', 'robot_deceleration'):
            if getattr(self, name) <= 0:
                msg = f'SeparationParams.{name}: must be > 0, got {getattr(self, name)!r}'
                raise ConstraintCtrlError(msg)


def standstill_distance(params: SeparationParams) -> float:
    """S_p(0): the separation at which even a standing robot must stop (m)."""
    return (params.human_speed * params.reaction_time + params.intrusion_distance
            + params.person_uncertainty + params.robot_uncertainty)


def protective_distance(robot_speed: float, params: SeparationParams) -> float:
    """S_p for a robot moving towards the person at ``robot_speed`` (m/s); receding counts as 0."""
    v = max(0.0, robot_speed)
    stop_time = v / params.robot_deceleration                        # T_s
    s_h = params.human_speed * (params.reaction_time + stop_time)    # person during T_r + T_s
    s_r = v * params.reaction_time                                   # robot before braking
    s_s = v * v / (2.0 * params.robot_deceleration)                  # robot while braking
    return (s_h + s_r + s_s + params.intrusion_distance + params.person_uncertainty
            + params.robot_uncertainty)


@dataclass(frozen=True)
class _Quadratic:
    """S_p(v) = A v^2 + b v + c0, precomputed once per parameter set."""

    a2: float   # A = 1 / (2 a)
    b: float    # v_h / a + T_r
    c0: float   # S_p(0)

    @classmethod
    def of(cls, params: SeparationParams) -> _Quadratic:
        a = params.robot_deceleration
        return cls(1.0 / (2.0 * a), params.human_speed / a + params.reaction_time,
                   standstill_distance(params))


def max_robot_speed(separation: float, params: SeparationParams) -> float:
    """Highest robot speed towards a person at ``separation`` (m) that keeps S >= S_p (m/s).

    Solves A v^2 + b v + (c0 - S) = 0 for its positive root, written as 2 d / (b + sqrt(b^2 +
    4 A d)) with d = S - c0, which avoids the cancellation of (-b + sqrt(...)) / (2 A) for small
    d. Returns 0 when S <= S_p(0).
    """
    quad = _Quadratic.of(params)
    d = separation - quad.c0
    if not d > 0.0:
        return 0.0
    return 2.0 * d / (quad.b + math.sqrt(quad.b * quad.b + 4.0 * quad.a2 * d))


class SeparationMonitor:
    """Per-tick separation check of k monitored points against m person positions.

    ``measure`` does the geometry (depends on q and the people only); ``scale`` then turns a
    candidate command's point velocities into the uniform factor. Splitting them lets the
    watchdog decide stops and zones before it has shaped the command.
    """

    def __init__(self, params: SeparationParams, radii: np.ndarray, *,
                 resume_speed: float, clear_margin: float) -> None:
        self.params = params
        self.radii = np.asarray(radii, dtype=float).reshape(-1, 1)
        self._quad = _Quadratic.of(params)
        self.standstill = self._quad.c0
        # A pair is clear (may count towards resuming) once its permitted speed reaches
        # resume_speed or its separation exceeds S_p(0) by clear_margin, whichever comes first.
        self.clear_distance = min(protective_distance(resume_speed, params),
                                  self._quad.c0 + clear_margin)
        self.n_people = 0
        self.min_separation = math.inf
        self.closest_point = -1
        self.closest_person = -1
        self._unit: np.ndarray = np.empty((0, 0, 3))
        self._vmax: np.ndarray = np.empty((0, 0))
        self._speed: np.ndarray = np.empty((0, 0))

    @property
    def too_close(self) -> bool:
        """Some pair is at or inside S_p(0): permitted speed 0, so a stop is required."""
        return self.min_separation <= self.standstill

    @property
    def clear(self) -> bool:
        """Every pair is far enough to count towards resuming after a stop."""
        return self.min_separation >= self.clear_distance

    def measure(self, points: np.ndarray, people: np.ndarray) -> None:
        """Compute separations, unit vectors and permitted speeds.

        Args:
            points: monitored point positions in the base frame, shape (k, 3), m.
            people: person positions in the base frame, shape (m, 3), m.
        """
        m = people.shape[0]
        self.n_people = m
        if m == 0:
            self.min_separation = math.inf
            self.closest_point = self.closest_person = -1
            return
        diff = people[np.newaxis, :, :] - points[:, np.newaxis, :]          # (k, m, 3)
        dist = np.sqrt(np.einsum('kmi,kmi->km', diff, diff))
        sep = dist - self.radii
        # A person exactly on a point has no direction; the pair is far inside S_p(0) anyway.
        np.maximum(dist, 1e-12, out=dist)
        self._unit = diff / dist[:, :, np.newaxis]
        flat = int(sep.argmin())
        self.closest_point, self.closest_person = divmod(flat, m)
        self.min_separation = float(sep.flat[flat])
        q = self._quad
        d = np.maximum(sep - q.c0, 0.0)
        self._vmax = 2.0 * d / (q.b + np.sqrt(q.b * q.b + 4.0 * q.a2 * d))

    def directed_speeds(self, velocities: np.ndarray) -> np.ndarray:
        """Speed of each point towards each person, u_ij . v_i, clipped at 0; shape (k, m)."""
        speed = np.einsum('kmi,ki->km', self._unit, velocities)
        np.maximum(speed, 0.0, out=speed)
        return speed

    def permitted_speeds(self) -> np.ndarray:
        """vmax_ij from the last ``measure``, shape (k, m), m/s."""
        return self._vmax

    def scale(self, velocities: np.ndarray) -> float:
        """Uniform factor in [0, 1] for a command whose point velocities are ``velocities``.

        Args:
            velocities: v_i = J_i qdot of each monitored point, shape (k, 3), m/s.
        """
        if self.n_people == 0:
            self._speed = np.zeros((velocities.shape[0], 0))
            return 1.0
        speed = self.directed_speeds(velocities)
        self._speed = speed
        moving = speed > 0.0
        if not moving.any():
            return 1.0
        factor = float((self._vmax[moving] / speed[moving]).min())
        return min(1.0, factor)

    def closest_pair_speed(self) -> float:
        """Directed speed of the closest pair in the last ``scale`` call (before scaling)."""
        if self.n_people == 0 or self._speed.size == 0:
            return 0.0
        return float(self._speed[self.closest_point, self.closest_person])
