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

import functools
import math
from dataclasses import dataclass, fields

import casadi
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


@functools.lru_cache(maxsize=64)
def _pair_functions(k: int, m: int) -> tuple[casadi.Function, casadi.Function]:
    """The casadi Functions of ``_PairKernel`` for k points and m people.

    Radii and S_p coefficients are inputs, so one build (about a millisecond) serves every
    monitor of that size in the process.
    """
    sx = casadi.SX
    pts, ppl, mov = sx.sym('points', 3, k), sx.sym('people', 3, m), sx.sym('moved', 1, m)
    radii, coef = sx.sym('radii', 1, k), sx.sym('coefficients', 4)
    standstill, a2, quarter_b2, half_b = (coef[i] for i in range(4))
    point_of = [i for i in range(k) for _ in range(m)]      # pair c = i m + j: row-major (k, m)
    person_of = list(range(m)) * k
    diff = ppl[:, person_of] - pts[:, point_of]                           # 3 x km
    dist = casadi.sqrt(diff[0, :] * diff[0, :] + diff[1, :] * diff[1, :]
                       + diff[2, :] * diff[2, :])
    sep = (dist - radii[:, point_of]) - mov[:, person_of]
    d = casadi.fmax(sep - standstill, 0.0)
    vmax = d / (casadi.sqrt(d * a2 + quarter_b2) + half_b)
    measure = casadi.Function('separation_measure', [pts, ppl, mov, radii, coef],
                              [sep, dist, diff, dist * vmax])
    diff_in, denom_in = sx.sym('diff', 3, k * m), sx.sym('denom', 1, k * m)
    vel = sx.sym('velocities', 3, k)
    v = vel[:, point_of]
    load = (diff_in[0, :] * v[0, :] + diff_in[1, :] * v[1, :]
            + diff_in[2, :] * v[2, :]) / denom_in
    return measure, casadi.Function('separation_load', [diff_in, denom_in, vel], [load])


class _PairKernel:
    """The per-tick separation arithmetic for k points and m people as two compiled casadi
    evaluations into preallocated buffers (one numpy call costs about as much as the whole
    evaluation on arrays this small).

    The expressions are the monitor's formulas, operation by operation and in the same order,
    so the results are those of the elementwise numpy version. Buffers (all C-ordered views):
    inputs ``points`` (k, 3), ``people`` (m, 3), ``moved`` (m,), ``velocities`` (k, 3); results
    ``sep``, ``dist``, ``denom`` (k, m), ``diff`` (k, m, 3) from ``measure`` and ``load`` (k, m)
    from ``load_eval``.
    """

    def __init__(self, radii: np.ndarray, m: int, coefficients: tuple[float, ...]) -> None:
        k = radii.size
        measure, load_fn = _pair_functions(k, m)
        flat = {name: np.zeros(size) for name, size in (
            ('points', 3 * k), ('people', 3 * m), ('moved', m), ('sep', k * m),
            ('dist', k * m), ('diff', 3 * k * m), ('denom', k * m), ('velocities', 3 * k),
            ('load', k * m))}
        flat['radii'] = np.array(radii, dtype=float)
        flat['coefficients'] = np.array(coefficients, dtype=float)
        self._flat = flat                 # keeps the memory behind the casadi buffers alive
        self._measure_buf, self.measure = measure.buffer()
        for i, name in enumerate(('points', 'people', 'moved', 'radii', 'coefficients')):
            self._measure_buf.set_arg(i, memoryview(flat[name]))
        for i, name in enumerate(('sep', 'dist', 'diff', 'denom')):
            self._measure_buf.set_res(i, memoryview(flat[name]))
        self._load_buf, self.load_eval = load_fn.buffer()
        for i, name in enumerate(('diff', 'denom', 'velocities')):
            self._load_buf.set_arg(i, memoryview(flat[name]))
        self._load_buf.set_res(0, memoryview(flat['load']))
        self.points = flat['points'].reshape(k, 3)
        self.people = flat['people'].reshape(m, 3)
        self.moved = flat['moved']
        self.velocities = flat['velocities'].reshape(k, 3)
        self.sep = flat['sep'].reshape(k, m)
        self.dist = flat['dist'].reshape(k, m)
        self.diff = flat['diff'].reshape(k, m, 3)
        self.denom = flat['denom'].reshape(k, m)
        self.load = flat['load'].reshape(k, m)


class SeparationMonitor:
    """Per-tick separation check of k monitored points against m person positions.

    ``measure`` does the geometry (depends on q and the people only); ``scale`` then turns a
    candidate command's point velocities into the uniform factor. Splitting them lets the
    watchdog decide stops and zones before it has shaped the command. The arithmetic runs in a
    compiled kernel per number of people (``_PairKernel``, built on first use and kept);
    the full permitted-speed array is computed lazily, because the watchdog needs only the
    closest pair's.
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
        self._kernels: dict[int, _PairKernel] = {}
        self._kernel: _PairKernel | None = None      # the one the last ``measure`` filled
        self._diff: np.ndarray = np.empty((0, 0, 3))
        self._dist: np.ndarray = np.empty((0, 0))
        self._sep: np.ndarray = np.empty((0, 0))
        self._vmax: np.ndarray | None = None
        self._load: np.ndarray | None = None

    def prepare(self, n_people: int) -> None:
        """Set up the kernel for ``n_people`` now instead of in a tick (the first one of a size
        in the process builds its casadi Functions, about a millisecond)."""
        if n_people > 0 and n_people not in self._kernels:
            self._kernels[n_people] = _PairKernel(
                self.radii[:, 0], n_people,
                (self.standstill, self._a2, self._quarter_b2, self._half_b))

    @property
    def people(self) -> np.ndarray:
        """Person positions of the last ``measure``, (m, 3) m (a view: copy to keep it)."""
        if self.n_people == 0 or self._kernel is None:
            return np.zeros((0, 3))
        return self._kernel.people

    @property
    def separations(self) -> np.ndarray:
        """Separations of the last ``measure``, (k, m) m (a view: copy to keep it)."""
        return self._sep

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
        self._vmax = self._load = None
        if m == 0:
            self.min_separation = math.inf
            self.closest_point = self.closest_person = -1
            return
        kernel = self._kernels.get(m)
        if kernel is None:
            self.prepare(m)
            kernel = self._kernels[m]
        kernel.points[:] = points
        kernel.people[:] = people
        if moved is None:
            kernel.moved[:] = 0.0     # x - 0.0 == x: the same separations as not subtracting
        else:
            kernel.moved[:] = moved
        kernel.measure()
        sep = kernel.sep
        flat = int(sep.argmin())
        self.closest_point, self.closest_person = divmod(flat, m)
        self.min_separation = sep.item(flat)
        self._kernel = kernel
        self._diff, self._dist, self._sep = kernel.diff, kernel.dist, sep

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
        # speed_ij / vmax_ij = (h_j - p_i) . v_i / (|h_j - p_i| vmax_ij); the denominator
        # |h_j - p_i| vmax_ij (> 0 when not too close) comes from ``measure``.
        kernel = self._kernel
        assert kernel is not None
        kernel.velocities[:] = velocities
        kernel.load_eval()
        load = self._load = kernel.load
        worst = load.item(int(load.argmax()))
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

    def closest_pair_permitted_speed(self) -> float:
        """vmax of the closest pair from the last ``measure`` (m/s); same value as
        ``permitted_speeds()[closest_point, closest_person]`` without the whole array."""
        if self._vmax is not None:
            return float(self._vmax[self.closest_point, self.closest_person])
        d = max(self.min_separation - self.standstill, 0.0)
        return d / (math.sqrt(d * self._a2 + self._quarter_b2) + self._half_b)

    def closest_pair_load(self) -> float:
        """speed / vmax of the closest pair in the last ``scale`` call (before its factor)."""
        if self._load is None:
            return 0.0
        return max(0.0, float(self._load[self.closest_point, self.closest_person]))
