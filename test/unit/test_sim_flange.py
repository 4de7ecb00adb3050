"""Flange surface: height field, normals and ray casting checked against independent references."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from constraint_ctrl.sim.flange import FlangeSurface
from constraint_ctrl.sim.scene import FlangeSpec, Wave

# The shipped scene's flange (config/scenes/gearbox_cell.yaml).
SPEC = FlangeSpec(centre=(0.45, 0.25), mid_radius=0.13, width=0.10, height=0.20,
                  waves=(Wave(0.0015, 3, 0.0, 0.0), Wave(0.0006, 4, 30.0, math.radians(60.0))))
MAX_RANGE = 0.04


def reference_height(spec: FlangeSpec, x: float, y: float) -> float:
    """The documented height formula, written out term by term with math (no numpy)."""
    dx, dy = x - spec.centre[0], y - spec.centre[1]
    r, phi = math.hypot(dx, dy), math.atan2(dy, dx)
    return spec.height + sum(w.amplitude * math.sin(w.around * phi
                                                    + w.across * (r - spec.mid_radius) + w.phase)
                             for w in spec.waves)


def reference_distance(spec: FlangeSpec, origin: np.ndarray, direction: np.ndarray,
                       max_range: float) -> float:
    """First + to - sign change of z(t) - h(t) on a dense grid, refined with scipy's brentq."""
    d = direction / np.linalg.norm(direction)

    def g(t: float) -> float:
        p = origin + t * d
        return p[2] - reference_height(spec, p[0], p[1])

    grid = np.linspace(0.0, max_range, 4001)
    values = [g(t) for t in grid]
    for a, b, ga, gb in zip(grid[:-1], grid[1:], values[:-1], values[1:]):
        if ga > 0.0 >= gb:
            return brentq(g, a, b, xtol=1e-15, rtol=4 * np.finfo(float).eps)
    return math.inf


def point_above_flange(rng: np.random.Generator, clearance: float) -> np.ndarray:
    """A point over the annulus (kept 12 mm inside its edges), ``clearance`` above the mid level."""
    r = rng.uniform(SPEC.inner_radius + 0.012, SPEC.outer_radius - 0.012)
    a = rng.uniform(-math.pi, math.pi)
    return np.array([SPEC.centre[0] + r * math.cos(a), SPEC.centre[1] + r * math.sin(a),
                     SPEC.height + clearance])


def test_height_matches_the_written_out_formula() -> None:
    """Vectorised height equals the term-by-term formula at random points."""
    surface = FlangeSurface(SPEC)
    rng = np.random.default_rng(1)
    xy = rng.uniform([0.25, 0.05], [0.65, 0.45], size=(50, 2))
    expected = [reference_height(SPEC, x, y) for x, y in xy]
    np.testing.assert_allclose(surface.height(xy[:, 0], xy[:, 1]), expected, rtol=0, atol=1e-15)


def test_ray_cast_matches_brentq_on_the_same_height_field() -> None:
    """Distances agree with scipy.optimize.brentq (independent root finder) to 1e-10 m."""
    surface = FlangeSurface(SPEC)
    rng = np.random.default_rng(2)
    origins, directions = [], []
    for _ in range(40):
        origins.append(point_above_flange(rng, rng.uniform(0.004, 0.03)))
        tilt = rng.uniform(0.0, 0.35)  # up to 20 degrees off vertical
        heading = rng.uniform(-math.pi, math.pi)
        directions.append([math.sin(tilt) * math.cos(heading), math.sin(tilt) * math.sin(heading),
                           -math.cos(tilt)])
    origins_a, directions_a = np.array(origins), np.array(directions)
    got = surface.ray_cast(origins_a, directions_a, MAX_RANGE)
    expected = [reference_distance(SPEC, o, d, MAX_RANGE) for o, d in zip(origins_a, directions_a)]
    assert np.all(np.isfinite(expected))  # every ray of this set reaches the surface
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-10)
    # one ray at a time gives the same numbers as the batch
    for o, d, dist in zip(origins_a[:5], directions_a[:5], got[:5]):
        assert surface.ray_cast(o, d, MAX_RANGE) == pytest.approx(dist, abs=1e-14)


def test_shallow_ray_hits_the_first_crossing() -> None:
    """A grazing ray (5 degrees below horizontal) still finds the first crossing (brentq)."""
    surface = FlangeSurface(SPEC)
    origin = np.array([SPEC.centre[0] + 0.095, SPEC.centre[1], SPEC.height + 0.004])
    direction = np.array([math.cos(math.radians(5.0)), 0.0, -math.sin(math.radians(5.0))])
    expected = reference_distance(SPEC, origin, direction, 0.08)
    assert math.isfinite(expected)
    assert surface.ray_cast(origin, direction, 0.08) == pytest.approx(expected, abs=1e-10)


@pytest.mark.parametrize('tilt_deg', [0.0, 10.0, 35.0, 60.0])
def test_plane_case_matches_line_plane_intersection(tilt_deg: float) -> None:
    """Without waves the surface is the plane z = height: t = (height - o_z) / d_z (closed form)."""
    flat = FlangeSpec(SPEC.centre, SPEC.mid_radius, SPEC.width, 0.2)
    surface = FlangeSurface(flat)
    tilt = math.radians(tilt_deg)
    d = np.array([math.sin(tilt) * math.cos(0.7), math.sin(tilt) * math.sin(0.7), -math.cos(tilt)])
    o = np.array([flat.centre[0] + 0.12, flat.centre[1] - 0.01, 0.215])
    expected = (0.2 - o[2]) / d[2]  # line-plane intersection with the unit direction
    assert surface.ray_cast(o, d, MAX_RANGE) == pytest.approx(expected, abs=1e-12)


def test_constant_term_shifts_the_plane() -> None:
    """A wave with around = across = 0 is the constant A sin(phase): plane z = h + A sin(p)."""
    spec = FlangeSpec(SPEC.centre, SPEC.mid_radius, SPEC.width, 0.2,
                      (Wave(0.003, 0, 0.0, math.radians(30.0)),))
    surface = FlangeSurface(spec)
    o = np.array([spec.centre[0], spec.centre[1] + 0.13, 0.22])
    expected = 0.22 - (0.2 + 0.003 * 0.5)  # sin(30 deg) = 1/2
    assert surface.ray_cast(o, [0.0, 0.0, -1.0], MAX_RANGE) == pytest.approx(expected, abs=1e-12)


def test_normals_match_finite_differences() -> None:
    """Analytic normals equal (-h_x, -h_y, 1)/norm from numpy.gradient on a fine grid."""
    surface = FlangeSurface(SPEC)
    step = 1e-5
    # a 3x3 stencil around each probe point, differentiated by numpy.gradient (central differences)
    probes = []
    expected = []
    for angle in np.linspace(-3.0, 3.0, 7):
        for radius in (0.095, 0.13, 0.165):
            x0 = SPEC.centre[0] + radius * math.cos(angle)
            y0 = SPEC.centre[1] + radius * math.sin(angle)
            gx = x0 + step * np.array([-1.0, 0.0, 1.0])
            gy = y0 + step * np.array([-1.0, 0.0, 1.0])
            grid_x, grid_y = np.meshgrid(gx, gy, indexing='ij')
            h = np.array([[reference_height(SPEC, a, b) for a, b in zip(rx, ry)]
                          for rx, ry in zip(grid_x, grid_y)])
            hx, hy = np.gradient(h, step, step)
            n = np.array([-hx[1, 1], -hy[1, 1], 1.0])
            expected.append(n / np.linalg.norm(n))
            probes.append((x0, y0))
    probes_a = np.array(probes)
    got = surface.normal(probes_a[:, 0], probes_a[:, 1])
    # central difference error ~ h^2 |h'''| ~ 1e-10 * 1e3, rounding ~ eps * h / step ~ 1e-11
    np.testing.assert_allclose(got, np.array(expected), rtol=0, atol=1e-7)
    np.testing.assert_allclose(np.linalg.norm(got, axis=1), 1.0, atol=1e-15)
    assert np.all(got[:, 2] > 0.99)  # the scene keeps slopes below 0.1


def test_off_flange_and_out_of_range_rays_give_inf() -> None:
    """No hit: over the ring's hole, beyond max_range, pointing up; inside the material: 0."""
    surface = FlangeSurface(SPEC)
    down = np.array([0.0, 0.0, -1.0])
    hole = np.array([SPEC.centre[0] + 0.02, SPEC.centre[1], 0.21])
    outside = np.array([SPEC.centre[0] + 0.25, SPEC.centre[1], 0.21])
    far_above = np.array([SPEC.centre[0] + 0.13, SPEC.centre[1], 0.30])
    assert surface.ray_cast(hole, down, MAX_RANGE) == math.inf
    assert surface.ray_cast(outside, down, MAX_RANGE) == math.inf
    assert surface.ray_cast(far_above, down, MAX_RANGE) == math.inf
    assert surface.ray_cast(far_above, down, 0.2) == pytest.approx(
        0.30 - reference_height(SPEC, far_above[0], far_above[1]), abs=1e-12)
    above = np.array([SPEC.centre[0] + 0.13, SPEC.centre[1], 0.21])
    assert surface.ray_cast(above, -down, MAX_RANGE) == math.inf
    buried = np.array([SPEC.centre[0] + 0.13, SPEC.centre[1], 0.19])
    assert surface.ray_cast(buried, down, MAX_RANGE) == 0.0
    batch = surface.ray_cast(np.array([hole, above, far_above]), np.array([down, down, down]),
                             MAX_RANGE)
    assert np.isinf(batch[0]) and np.isfinite(batch[1]) and np.isinf(batch[2])
