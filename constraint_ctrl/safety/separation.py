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
    watchdog decide stops and zones before it has shaped the command. Permitted speeds are
    computed lazily, once per ``measure``, because a stopped robot never needs them.
    """

    def __init__(self, params: SeparationParams, radii: np.ndarray, *,
                 resume_speed: float, clear_margin: float) -> None:
        self.params = params
        self.radii = np.asarray(radii, dtype=float).reshape(-1, 1)
        quad = _Quadratic.of(params)
        self.standstill = quad.c0
        # vmax = 2 d / (b + sqrt(b^2 + 4 A d)) = d / (b/2 + sqrt(b^2/4 + A d)), d = S - c0
        self._a2 = quad.a2
        self._half_b = 0.5 * quad.b
        self._quarter_b2 = 0.25 * quad.b * quad.b
        # A pair is clear (may count towards resuming) once its permitted speed reaches
        # resume_speed or its separation exceeds S_p(0) by clear_margin, whichever comes first.
        self.clear_distance = min(protective_distance(resume_speed, params),
                                  quad.c0 + clear_margin)
        self.n_people = 0
        self.min_separation = math.inf
        self.closest_point = -1
        self.closest_person = -1
        self._diff: np.ndarray = np.empty((0, 0, 3))
        self._dist: np.ndarray = np.empty((0, 0))
        self._sep: np.ndarray = np.empty((0, 0))
        self._vmax: np.ndarray | None = None
        self._denom: np.ndarray | None = None
        self._load: np.ndarray | None = None

    @property
    def too_close(self) -> bool:
        """Some pair is at or inside S_p(0): permitted speed 0, so a stop is required."""
        return self.min_separation <= self.standstill

    @property
    def clear(self) -> bool:
        """Every pair is far enough to count towards resuming after a stop."""
        return self.min_separation >= self.clear_distance

    def measure(self, points: np.ndarray, people: np.ndarray,
                moved: np.ndarray | None = None) -> None:
        """Compute separations and distances of every point-person pair.

        Args:
            points: monitored point positions in the base frame, shape (k, 3), m.
            people: person positions in the base frame, shape (m, 3), m.
            moved: how far each person may have come closer since the position was captured,
                shape (m,), m (human speed times data age); taken off their separations, so
                old data counts as a person nearer by what they could have walked
                (safety-facts.md section 6, common practice).
        """
        m = people.shape[0]
        self.n_people = m
        self._vmax = self._denom = self._load = None
        if m == 0:
            self.min_separation = math.inf
            self.closest_point = self.closest_person = -1
            return
        diff = people - points[:, np.newaxis, :]                           # (k, m, 3)
        dist = np.add.reduce(diff * diff, axis=2)
        np.sqrt(dist, out=dist)
        sep = dist - self.radii
        if moved is not None:
            sep -= moved
        flat = int(sep.argmin())
        self.closest_point, self.closest_person = divmod(flat, m)
        self.min_separation = float(sep.flat[flat])
        self._diff, self._dist, self._sep = diff, dist, sep

    def permitted_speeds(self) -> np.ndarray:
        """vmax_ij from the last ``measure``, shape (k, m), m/s (0 at or inside S_p(0))."""
        if self._vmax is None:
            d = self._sep - self.standstill
            np.maximum(d, 0.0, out=d)
            root = d * self._a2
            root += self._quarter_b2
            np.sqrt(root, out=root)
            root += self._half_b
            self._vmax = d / root
        return self._vmax

    def directed_speeds(self, velocities: np.ndarray) -> np.ndarray:
        """Speed of each point towards each person, u_ij . v_i, clipped at 0; shape (k, m)."""
        speed = np.matmul(self._diff, velocities[:, :, np.newaxis])[:, :, 0]
        speed /= np.maximum(self._dist, 1e-300)
        np.maximum(speed, 0.0, out=speed)
        return speed

    def scale(self, velocities: np.ndarray) -> float:
        """Uniform factor in [0, 1] for a command whose point velocities are ``velocities``.

        The factor is 1 / max(1, max_ij speed_ij / vmax_ij), i.e. min(1, min_ij vmax_ij /
        speed_ij) over approaching pairs; pairs moving sideways or away do not limit it.

        Args:
            velocities: v_i = J_i qdot of each monitored point, shape (k, 3), m/s.
        """
        if self.n_people == 0:
            return 1.0
        if self.too_close:   # some vmax is 0: any approach at all must stop
            return 0.0 if self.directed_speeds(velocities).any() else 1.0
        if self._denom is None:
            self._denom = self._dist * self.permitted_speeds()    # > 0 when not too close
        # speed_ij / vmax_ij = (h_j - p_i) . v_i / (|h_j - p_i| vmax_ij)
        load = np.matmul(self._diff, velocities[:, :, np.newaxis])[:, :, 0]
        load /= self._denom
        self._load = load
        worst = float(load.flat[load.argmax()])
        return 1.0 if worst <= 1.0 else 1.0 / worst

    def closest_pair_speed(self, velocities: np.ndarray) -> float:
        """Directed speed of the closest pair for point velocities ``velocities`` (m/s)."""
        if self.n_people == 0:
            return 0.0
        i, j = self.closest_point, self.closest_person
        dist = float(self._dist[i, j])
        if dist == 0.0:
            return 0.0
        return max(0.0, float(self._diff[i, j] @ velocities[i]) / dist)

    def closest_pair_load(self) -> float:
        """speed / vmax of the closest pair in the last ``scale`` call (before its factor)."""
        if self._load is None:
            return 0.0
        return max(0.0, float(self._load[self.closest_point, self.closest_person]))
