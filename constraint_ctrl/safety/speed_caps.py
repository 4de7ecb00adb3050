"""Speed caps and joint limits applied to the solver's joint velocity command.

Order of the stages in one watchdog tick (each stage sees the previous stage's output):

1. faults: any fault, or a person inside S_p(0), replaces the command by zero at once; a
   requested (normal) stop replaces it by a ramp down to zero within ``stopping_time``;
2. position limits: a joint at or over a limit may only move back inward, and no joint may
   cross a limit within one tick;
3. acceleration limits: per joint, relative to the previous published command (skipped for an
   immediate zero and for the stop ramp, which is its own deceleration profile); the position
   rule is re-applied afterwards so the rate limit cannot push a joint outward;
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

import math

import numpy as np


def limit_positions(qdot: np.ndarray, q: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                    dt: float, out: np.ndarray) -> np.ndarray:
    """Clip each joint so that q + qdot dt stays inside [lower, upper].

    A joint already at or beyond a limit gets the bound 0 on that side (it may stay or move
    back inward, never further out). Writes into and returns ``out``.
    """
    inv_dt = 1.0 / dt
    hi = np.subtract(upper, q)
    hi *= inv_dt
    np.maximum(hi, 0.0, out=hi)
    lo = np.subtract(lower, q)
    lo *= inv_dt
    np.minimum(lo, 0.0, out=lo)
    np.maximum(qdot, lo, out=out)
    np.minimum(out, hi, out=out)
    return out


def limit_acceleration(qdot: np.ndarray, previous: np.ndarray, max_step: np.ndarray,
                       out: np.ndarray) -> np.ndarray:
    """Rate-limit each joint to previous +- max_step (max_step = acceleration limit * dt).

    Per joint, so a large change of direction is spread over several ticks. Writes into and
    returns ``out`` (which may be ``qdot`` itself).
    """
    np.minimum(qdot, previous + max_step, out=out)
    np.maximum(out, previous - max_step, out=out)
    return out


def joint_speed_scale(qdot: np.ndarray, velocity_limits: np.ndarray) -> float:
    """Largest factor in [0, 1] that brings every |qdot_i| to at most its velocity limit."""
    ratio = float(np.max(np.abs(qdot) / velocity_limits))
    return 1.0 if ratio <= 1.0 else 1.0 / ratio


def point_speed_scale(velocities: np.ndarray, max_speed: float) -> float:
    """Largest factor in [0, 1] that brings every point speed |v_i| to at most ``max_speed``.

    Args:
        velocities: linear velocities of the monitored points, shape (k, 3), m/s.
        max_speed: cap on the speed magnitude of each point, m/s.
    """
    top = math.sqrt(float(np.max(np.einsum('ki,ki->k', velocities, velocities))))
    return 1.0 if top <= max_speed else max_speed / top


def stop_ramp_factor(elapsed: float, stopping_time: float) -> float:
    """Fraction of the initial command left ``elapsed`` s into a linear stop ramp.

    Linear in magnitude from 1 at the start to 0 at ``stopping_time``; factors below 1e-9 are
    rounded to exactly 0 so accumulated float error in ``elapsed`` cannot leave a creeping
    residual.
    """
    if stopping_time <= 0.0:
        return 0.0
    factor = 1.0 - elapsed / stopping_time
    return factor if factor > 1e-9 else 0.0
