"""Discrete stability limits of the behaviours (compile.py) at a control rate, with input delay.

Why: a behaviour is written as a continuous law (de/dt = -K e, or the damped oscillator), but
the controller applies it once per tick of dt seconds, to an error that may be measured through
an input that is d ticks old. A gain that is harmless in continuous time can make the sampled
loop ring or diverge. ``check`` uses these limits to warn with the largest safe value.

Model (one row, solved exactly; the QP's damping and other rows only take speed away from it,
which does not make it less stable): the error the controller sees at tick k is e[k - d]; the
robot integrates the command exactly over the tick (the lockstep model of ``simulate``).

First order, gain K (compile.py: J x = -K e):

    e[k+1] = e[k] - a e[k-d],    a = K dt
    characteristic polynomial  z^(d+1) - z^d + a = 0

For d = 0 the root is z = 1 - a: stable for 0 < a < 2 (oscillating sign for a > 1). For d >= 1
a root crosses the unit circle where z = e^(i theta) and a = z^d (1 - z) is real and positive:
|1 - z| = 2 sin(theta / 2) and arg(z^d (1 - z)) = d theta + (theta - pi) / 2 = 0, so the first
crossing is at theta = pi / (2d + 1) and

    a < 2 sin(pi / (2 (2d + 1)))          (d = 0 gives 2, d = 1 gives 1, d = 2 gives 0.618)

This is the classic result for integral control of a sampled plant with a pure delay (Åström &
Wittenmark, Computer-Controlled Systems, the root-locus/Jury analysis of a delayed integrator,
from memory; Franklin, Powell & Workman, Digital Control of Dynamic Systems, discrete stability
by the Jury test, from memory). It was derived again here from the polynomial and is checked
in test/reference/test_stability_bound.py against its roots and a lockstep simulation of the
controller that converges just below it and diverges just past it. For large d it tends to the
continuous condition K (d dt + dt / 2) < pi / 2 (phase margin of an integrator with delay).

Second order, natural frequency w, damping ratio z (compile.py's symplectic Euler scheme: the
rate v[k] is the last command's, then v[k+1] = v[k] + dt (-2 z w v[k] - w^2 e[k-d]),
e[k+1] = e[k] + dt v[k+1]):

    z^d (z - 1)(z - c) + (w dt)^2 z = 0,    c = 1 - 2 z w dt

For d = 0 the Jury conditions (Franklin, Powell & Workman, from memory) P(1) > 0, P(-1) > 0 and
|c| < 1 give

    w dt < 2 / (z + sqrt(1 + z^2))        (2 without damping: the scheme's known limit)

Without damping the roots lie on the unit circle below the limit (the oscillation neither grows
nor decays, as in continuous time) and any delay makes it grow. For d >= 1 there is no closed
form here: the limit is found numerically as the smallest w dt at which a root of the
polynomial (numpy.roots) leaves the unit circle (a scan then bisection).
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

#: A root this far outside the unit circle counts as growth (round-off of numpy.roots is far
#: smaller for the low degrees used here).
_GROWTH = 1e-9
#: Largest w dt scanned for the second-order limit (the d = 0 limit is at most 2).
_SCAN_TOP = 2.5
_SCAN_STEPS = 500


def delay_ticks(delay: float, dt: float) -> int:
    """Whole ticks a value ``delay`` seconds old lags behind (ceil, round-off tolerant)."""
    if not (delay > 0.0 and dt > 0.0):
        return 0
    return max(0, math.ceil(delay / dt - 1e-9))


def first_order_limit(delay: int) -> float:
    """Largest stable K dt (exclusive) of a first-order row with ``delay`` ticks of delay."""
    return 2.0 * math.sin(math.pi / (2.0 * (2 * delay + 1)))


def first_order_radius(gain_dt: float, delay: int) -> float:
    """Largest root modulus of z^(d+1) - z^d + K dt (< 1: the error decays)."""
    coefficients = np.zeros(delay + 2)
    coefficients[0], coefficients[1] = 1.0, -1.0
    coefficients[-1] += gain_dt
    return float(np.abs(np.roots(coefficients)).max())


def second_order_radius(omega_dt: float, damping_ratio: float, delay: int) -> float:
    """Largest root modulus of z^d (z - 1)(z - c) + (w dt)^2 z with c = 1 - 2 z w dt."""
    c = 1.0 - 2.0 * damping_ratio * omega_dt
    poly = np.polymul(np.polymul([1.0, -1.0], [1.0, -c]), [1.0] + [0.0] * delay)
    poly[-2] += omega_dt ** 2
    return float(np.abs(np.roots(poly)).max())


@lru_cache(maxsize=256)
def second_order_limit(damping_ratio: float, delay: int) -> float:
    """Largest stable w dt (exclusive) of a second-order row; 0 when none is stable."""
    if delay == 0:
        return 2.0 / (damping_ratio + math.sqrt(1.0 + damping_ratio ** 2))
    if damping_ratio <= 0.0:
        return 0.0            # undamped with any delay: grows for every w > 0

    def grows(omega_dt: float) -> bool:
        return second_order_radius(omega_dt, damping_ratio, delay) > 1.0 + _GROWTH

    step = _SCAN_TOP / _SCAN_STEPS
    low = 0.0
    for i in range(1, _SCAN_STEPS + 1):
        high = i * step
        if grows(high):
            break
        low = high
    else:
        return _SCAN_TOP
    for _ in range(60):
        middle = 0.5 * (low + high)
        if grows(middle):
            high = middle
        else:
            low = middle
    return low


__all__ = ['delay_ticks', 'first_order_limit', 'first_order_radius', 'second_order_limit',
           'second_order_radius']
