"""Speed caps and joint limits applied to the solver's joint velocity command.

Order of the stages in one watchdog tick (each stage sees the previous stage's output):

1. faults: any fault, or a person inside S_p(0), replaces the command by zero at once; a
   requested (normal) stop replaces it by a ramp down to zero within ``stopping_time``;
2. position limits: a joint at or over a limit may only move back inward, and no joint may
   cross a limit within one tick;
3. acceleration limits: per joint, relative to the previous published command (skipped for an
   immediate zero and for the stop ramp, which is its own deceleration profile). The position
   rule overrides the rate limit: clamping to the position bounds both before and after the
   rate limit gives the same result as clamping only after it, so the watchdog does the latter;
4. joint speed scaling: one factor for all joints so that |qdot_i| <= velocity limit;
5. reduced speed: one factor so that every monitored point moves at or below the reduced speed;
6. separation scaling (separation.py): one factor so that no point approaches any person faster
   than its separation permits.

Stages 4-6 only shrink the command by a factor in [0, 1], and zero satisfies every rule, so
the published command never exceeds the speed caps or the separation rule, whatever the
earlier stages did. Deceleration caused by stages 4-6 may exceed the acceleration limits:
keeping distance wins over smoothness.
"""
from __future__ import annotations

import functools
import math

import casadi
import numpy as np


def position_rate_bounds(q: np.ndarray, lower_rate: np.ndarray, upper_rate: np.ndarray,
                         inv_dt: float, lo: np.ndarray, hi: np.ndarray,
                         work: np.ndarray | None = None) -> None:
    """Bounds on qdot that keep q + qdot dt inside [lower, upper], written into ``lo``, ``hi``.

    A joint already at or beyond a limit gets the bound 0 on that side (it may stay or move
    back inward, never further out).

    Args:
        q: joint positions (n,).
        lower_rate, upper_rate: lower / dt and upper / dt, precomputed (-inf/+inf allowed).
        inv_dt: 1 / tick period.
        lo, hi: output arrays (n,).
        work: optional scratch array (n,).
    """
    q_rate = np.multiply(q, inv_dt, out=work)
    np.subtract(upper_rate, q_rate, out=hi)
    np.maximum(hi, 0.0, out=hi)
    np.subtract(lower_rate, q_rate, out=lo)
    np.minimum(lo, 0.0, out=lo)


def limit_positions(qdot: np.ndarray, q: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                    dt: float, out: np.ndarray) -> np.ndarray:
    """Clip each joint so that q + qdot dt stays inside [lower, upper] (``position_rate_bounds``).

    Writes into and returns ``out``.
    """
    lo, hi = np.empty_like(q), np.empty_like(q)
    position_rate_bounds(q, lower / dt, upper / dt, 1.0 / dt, lo, hi)
    np.maximum(qdot, lo, out=out)
    np.minimum(out, hi, out=out)
    return out


def limit_acceleration(qdot: np.ndarray, previous: np.ndarray, max_step: np.ndarray,
                       out: np.ndarray, work_hi: np.ndarray | None = None,
                       work_lo: np.ndarray | None = None) -> np.ndarray:
    """Rate-limit each joint to previous +- max_step (max_step = acceleration limit * dt).

    Per joint, so a large change of direction is spread over several ticks. Writes into and
    returns ``out`` (which may be ``qdot`` itself); ``work_hi``/``work_lo`` are optional
    scratch arrays that avoid allocations.
    """
    hi = np.add(previous, max_step, out=work_hi)
    lo = np.subtract(previous, max_step, out=work_lo)
    np.minimum(qdot, hi, out=out)
    np.maximum(out, lo, out=out)
    return out


def apply_joint_speed_limits(qdot: np.ndarray, inv_velocity_limits: np.ndarray,
                      work: np.ndarray | None = None) -> float:
    """Scale ``qdot`` in place by the largest factor in [0, 1] that keeps every |qdot_i| at or
    under its velocity limit; return the factor.

    Args:
        qdot: joint velocity command (n,), modified in place.
        inv_velocity_limits: 1 / velocity limit per joint (precomputed once).
        work: optional scratch array of shape (n,) to avoid an allocation.
    """
    ratio = np.abs(qdot, out=work)
    ratio *= inv_velocity_limits
    top = float(ratio[ratio.argmax()])      # argmax + index: cheaper than max() on tiny arrays
    if top <= 1.0:
        return 1.0
    qdot *= 1.0 / top
    return 1.0 / top


def point_speed_scale(velocities: np.ndarray, max_speed: float) -> float:
    """Largest factor in [0, 1] that brings every point speed |v_i| to at most ``max_speed``.

    Args:
        velocities: linear velocities of the monitored points, shape (k, 3), m/s.
        max_speed: cap on the speed magnitude of each point, m/s.
    """
    sq = np.einsum('ki,ki->k', velocities, velocities)
    top = math.sqrt(float(sq[sq.argmax()]))
    return 1.0 if top <= max_speed else max_speed / top


def stop_ramp_factor(elapsed: float, stopping_time: float) -> float:
    """Fraction of the initial command left ``elapsed`` s into a linear stop ramp.

    Linear in magnitude from 1 at the start to 0 at ``stopping_time``; factors below 1e-9 are
    rounded to exactly 0 so accumulated float error in ``elapsed`` cannot leave a creeping
    residual.
    """
    if stopping_time <= 0.0:
        return 0.0
    factor = 1.0 - max(0.0, elapsed) / stopping_time      # a clock running back never adds speed
    return factor if factor > 1e-9 else 0.0


@functools.lru_cache(maxsize=16)
def _joint_stage_function(n: int) -> casadi.Function:
    """``JointStage``'s casadi Function for n joints (limits are inputs: one build per size)."""
    sx = casadi.SX
    q, cmd, prev, step = (sx.sym(name, n) for name in ('q', 'command', 'previous', 'step'))
    lower_rate, upper_rate, inv_vel = (sx.sym(name, n) for name in (
        'lower_rate', 'upper_rate', 'inv_velocity_limits'))
    inv_dt = sx.sym('inv_dt')
    q_rate = q * inv_dt
    hi = casadi.fmax(upper_rate - q_rate, 0.0)
    lo = casadi.fmin(lower_rate - q_rate, 0.0)
    res = casadi.fmin(cmd, prev + step)
    res = casadi.fmax(res, prev - step)
    res = casadi.fmin(casadi.fmax(res, lo), hi)
    top = casadi.mmax(casadi.fabs(res) * inv_vel)
    return casadi.Function('joint_stage', [q, cmd, prev, step, lower_rate, upper_rate, inv_dt,
                                           inv_vel], [res, top])


class JointStage:
    """Stages 2-4 for one tick as a single compiled casadi evaluation into fixed buffers.

    The expressions are ``position_rate_bounds``, ``limit_acceleration`` and the ratio of
    ``apply_joint_speed_limits``, operation by operation in the same order, so the result equals
    the numpy functions; one evaluation costs less than two of their numpy calls. A stop ramp
    (no rate limit) sets ``step`` to inf: min(c, prev + inf) = max(c, prev - inf) = c exactly.

    Buffers (numpy views the caller writes/reads): ``q``, ``command``, ``step`` (inputs; the
    previous command is read from the array given at construction), ``out`` (the limited
    command, the array given at construction) and ``top`` (max_i |out_i| / velocity limit_i).
    """

    def __init__(self, lower_rate: np.ndarray, upper_rate: np.ndarray, inv_dt: float,
                 inv_velocity_limits: np.ndarray, previous: np.ndarray, out: np.ndarray) -> None:
        n = previous.size
        self.q, self.command, self.step = np.zeros(n), np.zeros(n), np.zeros(n)
        self.top = np.zeros(1)
        self.out = out
        # Kept alive for the casadi buffer, which holds raw pointers to them.
        self._args = (self.q, self.command, previous, self.step,
                      np.array(lower_rate, dtype=float), np.array(upper_rate, dtype=float),
                      np.array([inv_dt], dtype=float),
                      np.array(inv_velocity_limits, dtype=float))
        self._buf, self.eval = _joint_stage_function(n).buffer()
        for i, arr in enumerate(self._args):
            self._buf.set_arg(i, memoryview(arr))
        self._buf.set_res(0, memoryview(out))
        self._buf.set_res(1, memoryview(self.top))
