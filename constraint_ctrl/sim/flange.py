"""The housing flange: an annulus whose top surface is a smooth height field z = h(x, y).

h = height + sum_i A_i sin(m_i phi + k_i (r - r_mid) + p_i), with (r, phi) polar coordinates
about the flange centre. Whole wave numbers m_i keep the surface continuous around the ring.
The distance sensors only see this top surface; side walls and the housing interior lie
beyond their range and are not modelled.
"""
from __future__ import annotations

import math

import numpy as np

from .scene import FlangeSpec

#: Radius below which polar derivatives are evaluated as if at this radius (never on the annulus).
_MIN_RADIUS = 1e-9


class FlangeSurface:
    """Height, normal and ray intersection of one flange; every method accepts arrays."""

    def __init__(self, spec: FlangeSpec) -> None:
        self.spec = spec
        self._cx, self._cy = spec.centre
        self._amp = np.array([w.amplitude for w in spec.waves], dtype=float)
        self._around = np.array([w.around for w in spec.waves], dtype=float)
        self._across = np.array([w.across for w in spec.waves], dtype=float)
        self._phase = np.array([w.phase for w in spec.waves], dtype=float)
        # Sampling step for ray bracketing: an eighth of the shortest surface wavelength over
        # the annulus, so that a ray crosses the surface at most once between two samples on
        # any plausible (slope-bounded) surface.
        wavenumber = float(np.hypot(self._around / spec.inner_radius, self._across).max(
            initial=0.0))
        shortest = 2.0 * math.pi / wavenumber if wavenumber > 0.0 else math.inf
        self.sample_step = min(shortest / 8.0, 0.01)

    # -- surface ------------------------------------------------------------------------------

    def _polar(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray,
                                                            np.ndarray, np.ndarray]:
        dx = np.asarray(x, dtype=float) - self._cx
        dy = np.asarray(y, dtype=float) - self._cy
        r = np.hypot(dx, dy)
        return dx, dy, r, np.arctan2(dy, dx)

    def _arguments(self, r: np.ndarray, phi: np.ndarray) -> np.ndarray:
        """Wave arguments, shape (..., n_waves)."""
        return (self._around * phi[..., None] + self._across * (r[..., None] - self.spec.mid_radius)
                + self._phase)

    def height(self, x: np.ndarray | float, y: np.ndarray | float) -> np.ndarray:
        """Surface z (m) at base-frame (x, y), extended beyond the annulus by the same formula."""
        _, _, r, phi = self._polar(np.asarray(x), np.asarray(y))
        return self.spec.height + np.sin(self._arguments(r, phi)) @ self._amp

    def gradient(self, x: np.ndarray | float,
                 y: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """Analytic (dh/dx, dh/dy) from the chain rule through (r, phi)."""
        dx, dy, r, phi = self._polar(np.asarray(x), np.asarray(y))
        r_safe = np.maximum(r, _MIN_RADIUS)
        weights = np.cos(self._arguments(r, phi)) * self._amp
        dh_dphi = weights @ self._around
        dh_dr = weights @ self._across
        # dr/dx = x/r, dr/dy = y/r, dphi/dx = -y/r^2, dphi/dy = x/r^2
        hx = dh_dr * dx / r_safe - dh_dphi * dy / r_safe**2
        hy = dh_dr * dy / r_safe + dh_dphi * dx / r_safe**2
        return hx, hy

    def normal(self, x: np.ndarray | float, y: np.ndarray | float) -> np.ndarray:
        """Unit upward surface normal (-h_x, -h_y, 1)/norm, shape (..., 3)."""
        hx, hy = self.gradient(x, y)
        n = np.stack([-hx, -hy, np.ones_like(hx)], axis=-1)
        return n / np.linalg.norm(n, axis=-1, keepdims=True)

    def on_flange(self, x: np.ndarray | float, y: np.ndarray | float) -> np.ndarray:
        """True where (x, y) lies over the annulus (edges included)."""
        _, _, r, _ = self._polar(np.asarray(x), np.asarray(y))
        return (r >= self.spec.inner_radius) & (r <= self.spec.outer_radius)

    # -- rays ---------------------------------------------------------------------------------

    def ray_cast(self, origin: np.ndarray, direction: np.ndarray,
                 max_range: float) -> np.ndarray | float:
        """Distance along each ray to its first downward crossing of the surface.

        ``origin`` and ``direction`` have shape (3,) or (k, 3); the direction need not be unit
        length, distances are in metres along the unit direction. A ray that meets the surface
        first at a point off the annulus, or not within ``max_range``, gives inf. An origin
        already below the surface over the annulus (inside the material) gives 0.

        Method: sample g(t) = z(t) - h(x(t), y(t)) every ``sample_step`` to bracket the first
        sign change from + to -, then refine by Newton steps kept inside the bracket (bisection
        when a step leaves it).
        """
        o = np.asarray(origin, dtype=float)
        single = o.ndim == 1
        o = np.atleast_2d(o)
        d = np.atleast_2d(np.asarray(direction, dtype=float))
        d = d / np.linalg.norm(d, axis=1, keepdims=True)
        k = o.shape[0]
        result = np.full(k, np.inf)

        n = max(2, math.ceil(max_range / self.sample_step))
        t = np.linspace(0.0, max_range, n + 1)
        pts = o[:, None, :] + t[None, :, None] * d[:, None, :]  # (k, n+1, 3)
        g = pts[..., 2] - self.height(pts[..., 0], pts[..., 1])

        inside = (g[:, 0] <= 0.0) & self.on_flange(o[:, 0], o[:, 1])
        result[inside] = 0.0
        crossing = (g[:, :-1] > 0.0) & (g[:, 1:] <= 0.0)
        has = crossing.any(axis=1) & ~inside
        if not has.any():
            return float(result[0]) if single else result
        rows = np.nonzero(has)[0]
        first = crossing[rows].argmax(axis=1)
        lo, hi = t[first], t[first + 1]
        g_lo, g_hi = g[rows, first], g[rows, first + 1]
        root = self._refine(o[rows], d[rows], lo, hi, g_lo, g_hi)
        hit = o[rows] + root[:, None] * d[rows]
        on = self.on_flange(hit[:, 0], hit[:, 1])
        result[rows[on]] = root[on]
        return float(result[0]) if single else result

    def _refine(self, o: np.ndarray, d: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                g_lo: np.ndarray, g_hi: np.ndarray, tol: float = 1e-12,
                max_iter: int = 60) -> np.ndarray:
        """Safeguarded Newton on g(t) within brackets g(lo) > 0 >= g(hi), all rays at once."""
        t = lo + g_lo / (g_lo - g_hi) * (hi - lo)  # start from the secant (regula falsi) point
        for _ in range(max_iter):
            p = o + t[:, None] * d
            g = p[:, 2] - self.height(p[:, 0], p[:, 1])
            above = g > 0.0
            lo = np.where(above, t, lo)
            hi = np.where(above, hi, t)
            hx, hy = self.gradient(p[:, 0], p[:, 1])
            slope = d[:, 2] - hx * d[:, 0] - hy * d[:, 1]
            with np.errstate(divide='ignore', invalid='ignore'):
                newton = t - g / slope
            bad = ~np.isfinite(newton) | (newton <= lo) | (newton >= hi)
            exact = g == 0.0
            t_next = np.where(exact, t, np.where(bad, 0.5 * (lo + hi), newton))
            done = np.abs(t_next - t) <= tol
            t = t_next
            if done.all():
                break
        return t
