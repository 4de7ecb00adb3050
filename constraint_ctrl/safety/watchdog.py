"""The watchdog: last stage before a joint velocity command leaves the controller.

It runs after the solver and does not trust it: whatever a skill asks for, the published
command respects the joint limits, the speed caps and the separation rule, and any fault gives
zero within the same tick. Stage order and reasons are in speed_caps.py, fault recovery rules
in faults.py, the separation formula in separation.py.

Hot path: everything that depends only on the configuration is computed in ``__init__``; a
tick does three compiled casadi evaluations into preallocated buffers (kinematics, joint
stages, separation geometry), a handful of small numpy operations and plain float logic.

This is a supervisory software layer for development and testing, not a safety function: it
does not meet ISO 13849-1 / IEC 62061 and must never be the only protection for a person.
"""
from __future__ import annotations

import functools
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import casadi
import numpy as np

from constraint_ctrl.errors import ConstraintCtrlError
from constraint_ctrl.safety.faults import Fault, FaultDetector, FaultKind, FaultTracker
from constraint_ctrl.safety.separation import (
    SeparationMonitor, SeparationParams, protective_distance)
from constraint_ctrl.safety.speed_caps import JointStage, stop_ramp_factor
from constraint_ctrl.safety.states import State, Transition

PointsFn = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]
"""q (n,) -> (P (3, k) point positions in the base frame, J (3k, n) stacked Jacobians)."""

_TOO_CLOSE_KEY = (FaultKind.PERSON_TOO_CLOSE, '')
# Enum attribute lookups cost more than module globals on the tick.
_NORMAL, _REDUCED, _STOPPING, _STOPPED = State.NORMAL, State.REDUCED, State.STOPPING, State.STOPPED


@dataclass(frozen=True)
class MonitoredPoint:
    """A sphere on the robot that must keep its distance; centre at ``offset`` in ``link`` (m)."""

    link: str
    offset: tuple[float, float, float]
    radius: float

    def __post_init__(self) -> None:
        if len(self.offset) != 3 or not all(math.isfinite(v) for v in self.offset):
            msg = (f'monitored point on {self.link!r}: offset must be 3 finite numbers, '
                   f'got {self.offset!r}')
            raise ConstraintCtrlError(msg)
        if not (math.isfinite(self.radius) and self.radius >= 0):
            msg = f'monitored point on {self.link!r}: radius must be >= 0, got {self.radius!r}'
            raise ConstraintCtrlError(msg)


def _vector(name: str, value: object, n: int | None, *, positive: bool = False,
            allow_inf: bool = False) -> np.ndarray:
    arr = np.array(value, dtype=float).reshape(-1)
    if n is not None and arr.shape != (n,):
        msg = f'WatchdogConfig.{name}: expected {n} values (one per joint), got {arr.size}'
        raise ConstraintCtrlError(msg)
    bad = np.isnan(arr) if allow_inf else ~np.isfinite(arr)
    if positive:
        bad |= ~(arr > 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        need = 'a number > 0' if positive else 'a number'
        msg = f'WatchdogConfig.{name}[{i}]: expected {need}, got {float(arr[i])!r}'
        raise ConstraintCtrlError(msg)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, kw_only=True, eq=False)
class WatchdogConfig:
    """Watchdog settings (SI units). Arrays hold one value per joint, in the model's order.

    Attributes:
        separation: terms of the protective separation distance.
        reduced_speed: cap on every monitored point's speed in reduced mode (m/s); 0.25 m/s is
            the ISO 10218-1 reduced speed.
        reduced_zone: reduced mode switches on while a person is closer than this (m).
        reduced_mode: start with reduced mode switched on (``Watchdog.set_reduced_mode``).
        stopping_time: a requested stop ramps to zero within this time (s).
        resume_after: how long a clear condition must hold before a fault clears (s).
        joint_state_timeout: joint_states older than this is a fault (s).
        person_timeout: default timeout of a person-position source (s).
        person_timeouts: per-source timeouts overriding ``person_timeout`` (s).
        resume_speed: a person pair counts as clear once its permitted speed reaches this
            (m/s) ...
        clear_margin: ... or once its separation exceeds S_p(0) by this (m); also the margin
            by which a person must leave ``reduced_zone`` to end reduced mode.
        velocity_limits: |qdot| caps (rad/s or m/s).
        acceleration_limits: per-joint rate limits of the command (rad/s^2 or m/s^2).
        lower, upper: joint position limits (rad or m); +-inf for unlimited joints.
        joint_names: optional, only used to name joints in fault reasons.
    """

    separation: SeparationParams = field(default_factory=SeparationParams)
    reduced_speed: float = 0.25
    reduced_zone: float = 1.5
    reduced_mode: bool = False
    stopping_time: float = 0.3
    resume_after: float = 1.0
    joint_state_timeout: float = 0.05
    person_timeout: float = 0.2
    person_timeouts: Mapping[str, float] = field(default_factory=dict)
    resume_speed: float = 0.05
    clear_margin: float = 0.05
    velocity_limits: np.ndarray
    acceleration_limits: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    joint_names: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        vel = _vector('velocity_limits', self.velocity_limits, None, positive=True)
        n = vel.size
        set_ = object.__setattr__
        set_(self, 'velocity_limits', vel)
        set_(self, 'acceleration_limits',
             _vector('acceleration_limits', self.acceleration_limits, n, positive=True))
        lower = _vector('lower', self.lower, n, allow_inf=True)
        upper = _vector('upper', self.upper, n, allow_inf=True)
        if (lower > upper).any():
            i = int(np.flatnonzero(lower > upper)[0])
            joint = self.joint_names[i] if len(self.joint_names) == n else str(i)
            msg = (f'WatchdogConfig: joint {joint} has lower={float(lower[i])!r} > '
                   f'upper={float(upper[i])!r}')
            raise ConstraintCtrlError(msg)
        set_(self, 'lower', lower)
        set_(self, 'upper', upper)
        for name in ('reduced_speed', 'reduced_zone', 'stopping_time', 'resume_after',
                     'joint_state_timeout', 'person_timeout', 'resume_speed', 'clear_margin'):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
                msg = f'WatchdogConfig.{name}: expected a finite number >= 0, got {value!r}'
                raise ConstraintCtrlError(msg)
        for source, value in self.person_timeouts.items():
            if not (math.isfinite(value) and value >= 0):
                msg = f'WatchdogConfig.person_timeouts[{source!r}]: expected >= 0, got {value!r}'
                raise ConstraintCtrlError(msg)
        if self.joint_names and len(self.joint_names) != n:
            msg = (f'WatchdogConfig.joint_names: {len(self.joint_names)} names for {n} joints')
            raise ConstraintCtrlError(msg)

    @property
    def n_joints(self) -> int:
        return int(self.velocity_limits.size)


@dataclass(frozen=True, eq=False)
class WatchdogGeometry:
    """What the last ``step`` measured, for drawing it (copies; see ``Watchdog.geometry``).

    Attributes:
        points: centres of the monitored spheres in the base frame, (k, 3) m; None when the
            robot's position was unknown in that step.
        radii: sphere radii, (k,) m.
        people: person positions the step used, (m, 3) m (possibly fewer rows than sources).
        protective_distances: per person, S_p of its closest monitored sphere at that sphere's
            published speed towards the person, (m,) m; the watchdog keeps that sphere's
            surface at least this far from the person (plus what the person may have walked
            since the capture, ``walked``).
        walked: per person, human speed x data age, (m,) m.
        state: the watchdog state after the step.
    """

    points: np.ndarray | None
    radii: np.ndarray
    people: np.ndarray
    protective_distances: np.ndarray
    walked: np.ndarray
    state: State


@dataclass(frozen=True, eq=False)
class PersonSample:
    """Position(s) of people from one source, in the robot base frame (m), shape (3,) or (m, 3).

    ``stamp`` is the capture time on the controller's clock (s), not the receive time.
    """

    source: str
    position: np.ndarray
    stamp: float

    def __post_init__(self) -> None:
        if not isinstance(self.position, np.ndarray) or self.position.dtype != np.float64:
            object.__setattr__(self, 'position', np.asarray(self.position, dtype=float))


@dataclass
class WatchdogInput:
    """Everything one tick needs. Times are on one monotonic clock (s).

    Attributes:
        now: tick time.
        q: measured joint positions in the model's order, or None if not available.
        joint_state_stamp: capture time of ``q``.
        command: the solver's joint velocity command (n,), or None.
        solver_ok: the solver found a usable solution.
        solver_status: the solver's status text (quoted in the fault reason).
        input_stamps: capture time of each skill input by name.
        input_timeouts: timeout of each skill input by name; a name without a stamp is stale.
        inputs_finite: every skill input value is finite.
        people: latest sample of each person-position source.
        person_sources: sources that must be fresh (a stale or absent one means a stop).
        switch_failed: a skill switch failed mid-motion (latched until ``skill_activated``).
        skill_activated: a skill was activated successfully this tick.
        missing_joints: configured joints absent from joint_states (names).
        joint_stamps: capture time of each joint's last valid update, shape (n,), model order
            (NaN: never updated). When given, every joint must be fresh on its own: a sample
            that carried other joints (a gripper's) refreshes none of these.
    """

    now: float
    q: np.ndarray | None
    joint_state_stamp: float | None
    command: np.ndarray | None
    solver_ok: bool
    solver_status: str
    input_stamps: Mapping[str, float]
    input_timeouts: Mapping[str, float]
    inputs_finite: bool
    people: Mapping[str, PersonSample]
    person_sources: Sequence[str]
    switch_failed: bool = False
    skill_activated: bool = False
    missing_joints: Sequence[str] = ()
    joint_stamps: np.ndarray | None = None


@dataclass
class WatchdogOutput:
    """The command to publish and why it is what it is.

    Attributes:
        command: joint velocity command to publish (n,), a fresh array.
        state: state after this tick.
        reason: cause of the current state.
        speed_scale: product of the uniform factors of joint speed, reduced speed and
            separation scaling (1 = untouched by them, 0 = zero command).
        min_separation: smallest point-to-person separation (m); inf with nobody seen, nan
            when the robot's position is unknown.
        protective_distance: S_p of the closest pair at its published directed speed (m);
            with nobody seen, S_p at the fastest point's speed (a person in the worst direction).
        transitions: state changes in this tick (usually empty).
    """

    command: np.ndarray
    state: State
    reason: str
    speed_scale: float
    min_separation: float
    protective_distance: float
    transitions: list[Transition]


def _points_finite(p: np.ndarray, j: np.ndarray) -> bool:
    return math.isfinite(float(p.sum()) + float(j.sum()))


class BufferedPoints:
    """Allocation-free evaluation of a casadi points Function via ``Function.buffer()``.

    Outputs must be dense; casadi writes them column-major, so the (3, k) and (3k, n) results
    are Fortran-ordered views into preallocated arrays (overwritten by the next call).
    """

    def __init__(self, fn: casadi.Function) -> None:
        if fn.n_in() != 1 or fn.n_out() != 2:
            msg = (f'points function {fn.name()!r}: expected 1 input (q) and 2 outputs (P, J), '
                   f'got {fn.n_in()} and {fn.n_out()}')
            raise ConstraintCtrlError(msg)
        for i in range(2):
            if not fn.sparsity_out(i).is_dense():
                msg = f'points function {fn.name()!r}: output {i} must be dense (use densify)'
                raise ConstraintCtrlError(msg)
        n = fn.nnz_in(0)
        rows_p, k = fn.size_out(0)
        rows_j, n_j = fn.size_out(1)
        if rows_p != 3 or rows_j != 3 * k or n_j != n:
            msg = (f'points function {fn.name()!r}: outputs {fn.size_out(0)} and '
                   f'{fn.size_out(1)} do not match (3, k) and (3k, {n})')
            raise ConstraintCtrlError(msg)
        if fn.is_a('SXFunction'):
            # Common subexpression elimination: the link poses share most of their terms, so
            # this roughly halves the instruction count; the arithmetic per output is unchanged.
            q = casadi.SX.sym('q', n)
            fn = casadi.Function(f'{fn.name()}_cse', [q], fn(q), {'cse': True})
        self._q = np.zeros(n)
        self._out = np.zeros(3 * k + 3 * k * n)      # P then J, one block for one finite check
        self._p = self._out[:3 * k]
        self._j = self._out[3 * k:]
        self._buffer, self._eval = fn.buffer()
        self._buffer.set_arg(0, memoryview(self._q))
        self._buffer.set_res(0, memoryview(self._p))
        self._buffer.set_res(1, memoryview(self._j))
        self._p_view = self._p.reshape(k, 3).T
        self._j_view = self._j.reshape(n, 3 * k).T

    def __call__(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        self._q[:] = q
        self._eval()
        return self._p_view, self._j_view

    def results_finite(self, p: np.ndarray, j: np.ndarray) -> bool:
        """True when the last results (``p``, ``j``: the views returned) hold no NaN or inf.

        One dot product over the shared block instead of two reductions.
        """
        return math.isfinite(float(np.dot(self._out, self._out)))


@functools.lru_cache(maxsize=16)
def _point_velocities_function(k: int, n: int) -> casadi.Function:
    """``PointVelocities``' casadi Function for k points and n joints (one build per size)."""
    sx = casadi.SX
    j_sym, qd_sym, cap = sx.sym('jac', 3 * k, n), sx.sym('qdot', n), sx.sym('cap')
    vel = casadi.reshape(casadi.mtimes(j_sym, qd_sym), 3, k)
    top = casadi.sqrt(casadi.mmax(vel[0, :] * vel[0, :] + vel[1, :] * vel[1, :]
                                  + vel[2, :] * vel[2, :]))
    factor = casadi.if_else(top <= cap, 1.0, cap / top)
    return casadi.Function('point_velocities', [j_sym, qd_sym, cap], [vel * factor, factor])


class PointVelocities:
    """Stage 5 for one tick as a single compiled casadi evaluation into fixed buffers.

    v = J qdot of every monitored point, then the reduced-speed factor of
    ``point_speed_scale`` (1 if the fastest point is within ``cap``, else cap / |v|max) and
    the scaled velocities; ``cap`` inf means no reduced speed (factor exactly 1).

    Buffers: ``jac`` (3k, n) input (or the array given at construction), ``qdot`` (the array
    given at construction), ``cap`` (1,); results ``velocities`` (k, 3), ``factor`` (1,).
    """

    def __init__(self, k: int, qdot: np.ndarray, jac: np.ndarray | None = None) -> None:
        n = qdot.size
        self._jac_flat = np.zeros(3 * k * n) if jac is None else jac
        self.jac = self._jac_flat.reshape(n, 3 * k).T      # column-major, as casadi reads it
        self.qdot = qdot
        self.cap = np.full(1, math.inf)
        self._vel_flat = np.zeros(3 * k)
        self.velocities = self._vel_flat.reshape(k, 3)
        self.factor = np.ones(1)
        self._buf, self.eval = _point_velocities_function(k, n).buffer()
        self._buf.set_arg(0, memoryview(self._jac_flat))
        self._buf.set_arg(1, memoryview(qdot))
        self._buf.set_arg(2, memoryview(self.cap))
        self._buf.set_res(0, memoryview(self._vel_flat))
        self._buf.set_res(1, memoryview(self.factor))


class Watchdog:
    """Shapes each solver command into one that may be published; see the module docstring."""

    def __init__(self, config: WatchdogConfig, points_fn: PointsFn | casadi.Function,
                 points: Sequence[MonitoredPoint], dt: float) -> None:
        if not (math.isfinite(dt) and dt > 0):
            msg = f'Watchdog: tick period dt must be > 0, got {dt!r}'
            raise ConstraintCtrlError(msg)
        if not points:
            msg = 'Watchdog: at least one monitored point is required (e.g. the tool tip)'
            raise ConstraintCtrlError(msg)
        self.config = config
        self.dt = dt
        n = config.n_joints
        k = len(points)
        self._n, self._k = n, k
        buffered = (BufferedPoints(points_fn) if isinstance(points_fn, casadi.Function)
                    else None)
        self._points_fn: PointsFn = buffered or points_fn
        self._points_finite: Callable[[np.ndarray, np.ndarray], bool] = (
            buffered.results_finite if buffered else _points_finite)
        self._check_points_fn(points_fn)
        radii = np.array([p.radius for p in points])
        self._monitor = SeparationMonitor(config.separation, radii,
                                          resume_speed=config.resume_speed,
                                          clear_margin=config.clear_margin)
        self._detector = FaultDetector(n, joint_state_timeout=config.joint_state_timeout,
                                       person_timeout=config.person_timeout,
                                       person_timeouts=config.person_timeouts,
                                       joint_names=config.joint_names)
        self._tracker = FaultTracker(config.resume_after)
        self._max_step = config.acceleration_limits * dt
        self._inv_vel = 1.0 / config.velocity_limits
        self._inv_dt = 1.0 / dt
        self._lower_rate = config.lower * self._inv_dt     # -inf stays -inf
        self._upper_rate = config.upper * self._inv_dt
        self._sp0 = self._monitor.standstill
        self._zero = np.zeros(n)
        self._prev = np.zeros(n)
        self._work = np.zeros(n)
        self._joints = JointStage(self._lower_rate, self._upper_rate, self._inv_dt,
                                  self._inv_vel, self._prev, self._work)
        self._joints.step[:] = self._max_step
        self._rate_limited = True           # what ``_joints.step`` holds: max_step, or inf
        # With a buffered casadi points function the Jacobian is read in place, else copied.
        self._motion = PointVelocities(k, self._work, buffered._j if buffered else None)
        self._copy_jac = buffered is None
        self._no_people = np.zeros((0, 3))
        self._people_buf = np.zeros((4, 3))
        self._people_flat = self._people_buf.reshape(-1)
        self._moved_buf = np.zeros(4)
        self._no_moved = np.zeros(0)
        for m in range(1, self._people_buf.shape[0] + 1):   # no kernel build inside a tick
            self._monitor.prepare(m)
        self._vel: np.ndarray | None = None
        self._last_points: np.ndarray | None = None   # the points of the last step (a view)
        self._last_moved = self._no_moved
        self._sep_factor = 1.0
        self._reduced_mode = config.reduced_mode
        self._in_zone = False
        self._stop_reason: str | None = None
        self._stop_t0: float | None = None
        self._stop_c0 = np.zeros(n)
        self._stop_elapsed = 0.0
        self._last_now = -math.inf
        self._started = False
        self._state = State.STOPPED
        self._reason = 'not started: no tick yet'

    def _check_points_fn(self, original: object) -> None:
        q = np.clip(np.zeros(self._n), self.config.lower, self.config.upper)
        try:
            p, j = self._points_fn(q)
        except Exception as exc:   # a user-supplied callable: report any failure as ours
            msg = f'Watchdog: points function failed at q={q.tolist()}: {exc}'
            raise ConstraintCtrlError(msg) from exc
        if np.shape(p) != (3, self._k) or np.shape(j) != (3 * self._k, self._n):
            msg = (f'Watchdog: points function {original!r} returned P {np.shape(p)} and J '
                   f'{np.shape(j)}, expected (3, {self._k}) and ({3 * self._k}, {self._n}) for '
                   f'{self._k} monitored points and {self._n} joints')
            raise ConstraintCtrlError(msg)
        if not self._points_finite(p, j):
            msg = (f'Watchdog: points function {original!r} returned NaN or inf at '
                   f'q={q.tolist()}; check the robot description')
            raise ConstraintCtrlError(msg)

    @property
    def state(self) -> State:
        return self._state

    @property
    def last_reason(self) -> str:
        return self._reason

    def request_stop(self, reason: str) -> None:
        """Ask for a normal stop: ramp to zero within ``stopping_time``, then hold zero."""
        if self._stop_reason is None:
            self._stop_reason = reason
            self._stop_t0 = None

    def release_stop(self) -> None:
        """Withdraw a requested stop; motion ramps up again under the acceleration limits."""
        self._stop_reason = None
        self._stop_t0 = None

    def set_reduced_mode(self, on: bool) -> None:
        """Switch reduced mode on or off (a node parameter); people in the zone still force it."""
        self._reduced_mode = bool(on)

    def _gather_people(self, people: Mapping[str, PersonSample], now: float
                       ) -> tuple[np.ndarray, bool, np.ndarray]:
        """All person positions as (m, 3), whether every sample was well-formed, and how far
        each person may have walked since capture (human speed x data age, (m,)).

        Single positions (the usual case) are copied into a reused buffer; samples holding
        several people take the slower general path. Malformed or non-finite rows are left
        out here and reported as faults by the detector.
        """
        if not people:
            return self._no_people, True, self._no_moved
        if len(people) > self._people_buf.shape[0]:
            self._people_buf = np.zeros((2 * len(people), 3))
            self._people_flat = self._people_buf.reshape(-1)
            self._moved_buf = np.zeros(2 * len(people))
        human = self.config.separation.human_speed
        ok = True
        coords: list[float] = []     # plain floats: cheaper than one numpy copy per sample
        walked: list[float] = []
        extra = []
        extra_moved = []
        for sample in people.values():
            pos = sample.position
            if pos.shape == (3,):
                coords += pos.tolist()
                walked.append(human * max(0.0, now - sample.stamp))
            elif pos.size and pos.size % 3 == 0:
                extra.append(pos.reshape(-1, 3))
                extra_moved.append(np.full(pos.size // 3,
                                           human * max(0.0, now - sample.stamp)))
            else:
                ok = False
        m = len(walked)
        # A non-finite sum flags a NaN or inf (or an overflow, which the exact test clears).
        finite = math.isfinite(sum(coords))
        self._people_flat[:3 * m] = coords
        self._moved_buf[:m] = walked
        rows = self._people_buf[:m]
        moved = self._moved_buf[:m]
        if extra:
            rows = np.concatenate([rows, *extra])
            moved = np.concatenate([moved, *extra_moved])
            finite = finite and math.isfinite(float(rows.sum()))
        if not finite:
            keep = np.isfinite(rows).all(axis=1)
            return rows[keep], False, moved[keep]
        return rows, ok, moved

    def step(self, inp: WatchdogInput) -> WatchdogOutput:
        """Check one tick's inputs and shape the solver command into the published one."""
        now = inp.now
        monitor = self._monitor
        people, people_ok, moved = self._gather_people(inp.people, now)
        detected = self._detector.check(inp, people_ok)
        q = inp.q
        jac = None
        if self._detector.q_valid:
            assert q is not None
            p, jac = self._points_fn(q)
            if not self._points_finite(p, jac):
                detected.append(Fault(FaultKind.KINEMATICS_NOT_FINITE, '',
                                      f'monitored point kinematics gave NaN or inf at '
                                      f'q={q.tolist()}', {}))
                jac = None
        self._last_points = p if jac is not None else None
        self._last_moved = moved
        if jac is not None:
            monitor.measure(p.T, people, moved)
            if monitor.too_close:
                detected.append(self._too_close_fault())
            blocked = () if monitor.clear else (_TOO_CLOSE_KEY,)
        else:
            monitor.measure(self._no_people, self._no_people)
            monitor.min_separation = math.nan
            blocked = (_TOO_CLOSE_KEY,)   # cannot confirm clear without knowing the pose
        tracker = self._tracker
        if detected or tracker.active:
            faults_changed = tracker.update(now, detected, blocked=blocked,
                                            skill_activated=inp.skill_activated)
        else:                        # healthy tick, nothing latched: skip the bookkeeping
            faults_changed = False
            if tracker.cleared:
                tracker.cleared = []
        reduced = self._update_reduced(monitor.min_separation)

        out = self._work
        self._vel = None
        speed_scale = 0.0
        ramp_speed = 0.0
        if tracker.active:
            state = _STOPPED
            out[:] = 0.0
            self._stop_c0[:] = 0.0      # a stop ramp interrupted by a fault does not restart
        else:
            if self._stop_reason is not None:
                if self._stop_t0 is None:
                    self._stop_t0 = now
                    self._stop_c0[:] = self._prev
                    self._stop_elapsed = self.dt
                else:
                    # At least one tick period per tick, more if ticks come late: the ramp
                    # ends in time even if the clock stalls or jumps back.
                    self._stop_elapsed += max(self.dt, now - self._last_now)
                factor = stop_ramp_factor(self._stop_elapsed, self.config.stopping_time)
                np.multiply(self._stop_c0, factor, out=self._joints.command)
                ramp_speed = float(np.abs(self._stop_c0).max()) * factor
                state = _STOPPING if factor > 0.0 and ramp_speed > 0.0 else _STOPPED
                self._limit_joints(None, q, rate_limit=False)
            else:
                assert inp.command is not None and q is not None
                state = _REDUCED if reduced else _NORMAL
                self._limit_joints(inp.command, q, rate_limit=True)
            speed_scale = self._scale(out, jac, reduced)
        pd = self._report_distance()
        self._prev[:] = out

        transitions: list[Transition] = []
        if state is not self._state or faults_changed:
            reason, values = self._explain(state, reduced)
            if state is not self._state:
                transitions.append(Transition(now, self._state, state, reason, values))
            self._state = state
            self._reason = reason
        self._started = True
        self._last_now = now
        return WatchdogOutput(out.copy(), state, self._reason, speed_scale,
                              monitor.min_separation, pd, transitions)

    def geometry(self) -> WatchdogGeometry:
        """Copies of what the last ``step`` measured, for drawing it (allocates: call it at a
        low rate, on the tick that ran the step, before the next one)."""
        m = self._monitor
        radii = m.radii[:, 0].copy()
        if self._last_points is None:
            return WatchdogGeometry(None, radii, np.zeros((0, 3)), np.zeros(0), np.zeros(0),
                                    self._state)
        points = np.array(self._last_points.T)
        n_people = m.n_people
        people = np.zeros((0, 3))
        distances = np.zeros(n_people)
        if n_people:
            people = np.array(m.people)
            closest = np.argmin(m.separations, axis=0)     # per person: its closest sphere
            speeds = (m.directed_speeds(self._vel) if self._vel is not None
                      else np.zeros((len(radii), n_people)))
            for j in range(n_people):
                distances[j] = protective_distance(float(speeds[closest[j], j]),
                                                   self.config.separation)
        return WatchdogGeometry(points, radii, people, distances,
                                np.array(self._last_moved[:n_people]), self._state)

    def _too_close_fault(self) -> Fault:
        m = self._monitor
        return Fault(FaultKind.PERSON_TOO_CLOSE, '',
                     f'person too close: monitored point {m.closest_point} is '
                     f'{m.min_separation:.3f} m from person {m.closest_person}, at or inside '
                     f'the standstill protective distance {m.standstill:.3f} m',
                     {'min_separation': m.min_separation, 'protective_distance': m.standstill,
                      'point': float(m.closest_point), 'person': float(m.closest_person)})

    def _update_reduced(self, min_separation: float) -> bool:
        zone = self.config.reduced_zone
        if self._in_zone:
            # Leave only with a margin, so a person standing on the boundary does not toggle it.
            self._in_zone = not (min_separation >= zone + self.config.clear_margin)
        else:
            self._in_zone = min_separation < zone
        return self._reduced_mode or self._in_zone

    def _limit_joints(self, command: np.ndarray | None, q: np.ndarray | None, *,
                      rate_limit: bool) -> None:
        """Stages 2-3 into ``_work``: the rate limit (optional), then the position limits.

        Clipping to the position bounds before the rate limit as well would not change the
        result (clamps compose monotonically), so they are applied once, last, where they also
        override the rate limit. ``command`` None: already in ``_joints.command``.
        """
        assert q is not None
        stage = self._joints
        if rate_limit is not self._rate_limited:
            stage.step[:] = self._max_step if rate_limit else math.inf
            self._rate_limited = rate_limit
        stage.q[:] = q
        if command is not None:
            stage.command[:] = command
        stage.eval()

    def _scale(self, out: np.ndarray, jac: np.ndarray | None, reduced: bool) -> float:
        """Stages 4-6: joint speed, reduced speed and separation factors, applied to ``out``.

        Point velocities are computed once and scaled along with the command; the final ones
        are kept in ``_vel`` for the report.
        """
        # Stage 4 (``apply_joint_speed_limits``) from the ratio the joint stage computed.
        top = self._joints.top.item(0)
        joint = 1.0
        if top > 1.0:
            joint = 1.0 / top
            out *= joint
        if jac is None or (top == 0.0 and not out.any()):   # top 0: all zero but underflow
            return joint
        motion = self._motion
        if self._copy_jac:
            motion.jac[:] = jac
        motion.cap[0] = self.config.reduced_speed if reduced else math.inf
        motion.eval()                       # v = J out, scaled by the reduced-speed factor
        vel = motion.velocities
        rest = motion.factor.item(0)
        s = self._monitor.scale(vel)
        self._sep_factor = s
        if s != 1.0:
            vel *= s
            rest *= s
        if rest != 1.0:
            out *= rest
        self._vel = vel
        return joint * rest

    def _report_distance(self) -> float:
        """S_p of the closest pair at its published directed speed; see WatchdogOutput."""
        vel = self._vel
        if vel is None:                      # not moving (or pose unknown): S_p(0)
            return self._sp0
        m = self._monitor
        if m.n_people:
            load = m.closest_pair_load()
            if load > 0.0:    # speed / vmax before the separation factor was applied
                vmax = m.closest_pair_permitted_speed()
                speed = load * vmax * self._sep_factor
            else:
                speed = 0.0
        else:
            sq = np.einsum('ki,ki->k', vel, vel)
            speed = math.sqrt(float(sq[sq.argmax()]))
        return protective_distance(speed, self.config.separation)

    def _explain(self, state: State, reduced: bool) -> tuple[str, dict[str, float]]:
        """Reason and values for entering ``state`` (only called on a change)."""
        m = self._monitor
        tracker = self._tracker
        if state is State.STOPPED and tracker.active:
            return tracker.reason(), tracker.values()
        if state is State.STOPPING:
            return (f'stop requested: {self._stop_reason}; ramping to zero within '
                    f'{self.config.stopping_time:.3f} s',
                    {'stopping_time': self.config.stopping_time,
                     'speed': float(np.abs(self._stop_c0).max())})
        if state is State.STOPPED:
            return f'stop requested: {self._stop_reason}', {}
        values = {'min_separation': m.min_separation, 'reduced_zone': self.config.reduced_zone}
        cleared = ', '.join(f.kind.value for f in tracker.cleared)
        if state is State.REDUCED:
            why = ('person within the reduced zone' if self._in_zone
                   else 'reduced mode switched on')
            values['reduced_speed'] = self.config.reduced_speed
        else:
            why = 'no person within the reduced zone and reduced mode off'
        if not self._started:
            why += ' (first tick with valid inputs)'
        elif self._state is State.STOPPED or self._state is State.STOPPING:
            why += f' (resumed after {cleared} cleared)' if cleared else ' (resumed)'
            values['resume_after'] = self.config.resume_after
        return why, values
