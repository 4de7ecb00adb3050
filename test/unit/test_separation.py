"""Speed and separation monitoring: formula values and the per-tick scaling rule.

Reference: ISO/TS 15066:2016 clause 5.5.4 (S_p = S_h + S_r + S_s + C + Z_d + Z_r; the
sub-clause number 5.5.4.2.3 of the formula is from memory per safety-facts.md section 1). The
check values are the worked example and inversion table of /work/shared/reference/
safety-facts.md sections 1.3 and 1.4, computed there by hand from the published formula with
v_h = 1.6 m/s (ISO 13855 walking speed), C = 208 mm (ISO 13855 C = 8 (d - 14), d = 40 mm),
and the assumed T_r = 0.1 s, a = 1/0.3 m/s^2, Z_d = 0.1 m, Z_r = 0.02 m.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from constraint_ctrl.errors import ConstraintCtrlError
from constraint_ctrl.safety.separation import (
    SeparationMonitor, SeparationParams, max_robot_speed, protective_distance,
    standstill_distance)

PARAMS = SeparationParams()


def test_defaults_are_the_worked_example_inputs() -> None:
    """Defaults equal the inputs of safety-facts.md 1.3 (v_h from ISO 13855, C for d = 40 mm)."""
    assert PARAMS.human_speed == 1.6                                 # ISO 13855 walking speed
    assert PARAMS.intrusion_distance == pytest.approx(8 * (40 - 14) / 1000)   # ISO 13855 C
    assert PARAMS.reaction_time == 0.1
    assert 1.0 / PARAMS.robot_deceleration == pytest.approx(0.3)    # stop from 1 m/s in 0.3 s
    assert (PARAMS.person_uncertainty, PARAMS.robot_uncertainty) == (0.1, 0.02)


def test_worked_example_protective_distance_is_1218_mm() -> None:
    """safety-facts.md 1.3: S_p = 640 + 100 + 150 + 328 = 1218 mm at v_r = 1000 mm/s."""
    assert protective_distance(1.0, PARAMS) == pytest.approx(1.218, abs=1e-9)


def test_standstill_distance_is_488_mm() -> None:
    """safety-facts.md 1.4: v_h T_r + C + Z_d + Z_r = 160 + 208 + 100 + 20 = 488 mm."""
    assert standstill_distance(PARAMS) == pytest.approx(0.488, abs=1e-12)
    assert protective_distance(0.0, PARAMS) == pytest.approx(0.488, abs=1e-12)


@pytest.mark.parametrize(('separation', 'expected'), [
    (1.500, 1.305),   # safety-facts.md 1.4 table (above a robot's limit; the caller clamps)
    (1.218, 1.000),   # reproduces the worked example 1.3
    (1.000, 0.741),   # table row, also worked through step by step in 1.4
    (0.800, 0.479),
    (0.600, 0.184),
])
def test_max_robot_speed_matches_inversion_table(separation: float, expected: float) -> None:
    """safety-facts.md 1.4 table, quoted to 3 decimals there."""
    assert max_robot_speed(separation, PARAMS) == pytest.approx(expected, abs=5e-4)


@pytest.mark.parametrize('separation', [0.488, 0.4, 0.0, -0.2])
def test_max_robot_speed_is_zero_at_or_inside_488_mm(separation: float) -> None:
    """safety-facts.md 1.4: S <= 488 mm gives 0 (stop / hold a monitored stop)."""
    assert max_robot_speed(separation, PARAMS) == 0.0


def test_inverse_round_trip_and_independent_root_finder() -> None:
    """S_p(vmax(S)) == S, and vmax agrees with scipy's brentq root of S_p(v) - S (reference lib)."""
    for separation in np.linspace(0.489, 5.0, 60):
        v = max_robot_speed(separation, PARAMS)
        assert protective_distance(v, PARAMS) == pytest.approx(separation, rel=1e-12)
        root = brentq(lambda x, s=separation: protective_distance(x, PARAMS) - s, 0.0, 20.0,
                      xtol=1e-14)
        assert v == pytest.approx(root, rel=1e-10)


def test_inverse_round_trip_other_parameters() -> None:
    """Round trip with 2000 mm/s hand speed (ISO 13855 arm approach) and a slow brake."""
    params = SeparationParams(human_speed=2.0, reaction_time=0.25, robot_deceleration=1.2,
                              intrusion_distance=0.0, person_uncertainty=0.05,
                              robot_uncertainty=0.0)
    for separation in (0.56, 0.8, 1.7, 3.0):   # S_p(0) = 0.55 m here
        v = max_robot_speed(separation, params)
        assert v > 0
        assert protective_distance(v, params) == pytest.approx(separation, rel=1e-12)


def test_receding_speed_counts_as_standstill() -> None:
    """Only the speed towards the person counts (TS 15066 directed speeds, from memory)."""
    assert protective_distance(-0.5, PARAMS) == protective_distance(0.0, PARAMS)


@pytest.mark.parametrize('field', ['reaction_time', 'robot_deceleration'])
def test_params_reject_zero_times_and_decelerations(field: str) -> None:
    """A zero reaction time or deceleration is not a physical stop; the error names the field."""
    with pytest.raises(ConstraintCtrlError, match=f'SeparationParams.{field}: must be > 0'):
        SeparationParams(**{field: 0.0})


def test_params_reject_negative_and_nan() -> None:
    """Negative or NaN terms are rejected with the field and the bad value."""
    with pytest.raises(ConstraintCtrlError, match=r'human_speed: .*got -1\.0'):
        SeparationParams(human_speed=-1.0)
    with pytest.raises(ConstraintCtrlError, match=r'person_uncertainty: .*got nan'):
        SeparationParams(person_uncertainty=math.nan)


def _monitor(radius: float = 0.0) -> SeparationMonitor:
    return SeparationMonitor(PARAMS, np.array([radius]), resume_speed=0.05, clear_margin=0.05)


def test_scale_for_head_on_approach_matches_table() -> None:
    """Point moving at 1 m/s straight at a person 1.0 m away may keep 0.741 m/s (table 1.4)."""
    mon = _monitor(radius=0.1)
    mon.measure(np.zeros((1, 3)), np.array([[1.1, 0.0, 0.0]]))   # S = 1.1 - 0.1 = 1.0 m
    assert mon.min_separation == pytest.approx(1.0)
    scale = mon.scale(np.array([[1.0, 0.0, 0.0]]))
    assert scale == pytest.approx(0.741, abs=5e-4)


def test_scale_uses_directed_speed_only() -> None:
    """Directed speed = component towards the person: 45 deg gives cos 45 of the speed."""
    mon = _monitor()
    mon.measure(np.zeros((1, 3)), np.array([[0.8, 0.0, 0.0]]))
    v = 1.0
    vel = np.array([[v * math.cos(math.pi / 4), v * math.sin(math.pi / 4), 0.0]])
    expected = max_robot_speed(0.8, PARAMS) / (v * math.cos(math.pi / 4))
    assert mon.scale(vel) == pytest.approx(expected, rel=1e-12)
    assert mon.scale(np.array([[0.0, 2.0, 0.0]])) == 1.0      # sideways: not towards
    assert mon.scale(np.array([[-2.0, 0.0, 0.0]])) == 1.0     # moving away


def test_scale_takes_the_tightest_pair() -> None:
    """Two points, two people: factor = smallest vmax_ij / speed_ij over approaching pairs."""
    mon = SeparationMonitor(PARAMS, np.array([0.0, 0.05]), resume_speed=0.05, clear_margin=0.05)
    points = np.array([[0.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    people = np.array([[1.5, 0.0, 0.0], [0.0, 1.9, 0.0]])
    vel = np.array([[0.4, 0.0, 0.0], [0.0, 0.5, 0.0]])
    mon.measure(points, people)
    pairs = []
    for i in range(2):
        for j in range(2):
            d = people[j] - points[i]
            u = d / np.linalg.norm(d)
            speed = max(0.0, float(u @ vel[i]))
            sep = float(np.linalg.norm(d)) - [0.0, 0.05][i]
            if speed > 0:
                pairs.append(max_robot_speed(sep, PARAMS) / speed)
    assert mon.scale(vel) == pytest.approx(min(1.0, *pairs), rel=1e-12)
    assert mon.min_separation == pytest.approx(0.85)
    assert (mon.closest_point, mon.closest_person) == (1, 1)


def test_too_close_and_clear_thresholds() -> None:
    """Stop at or inside S_p(0) = 488 mm; clear only beyond the resume threshold."""
    mon = _monitor()
    mon.measure(np.zeros((1, 3)), np.array([[0.48, 0.0, 0.0]]))
    assert mon.too_close and not mon.clear
    assert mon.scale(np.array([[0.1, 0.0, 0.0]])) == 0.0
    mon.measure(np.zeros((1, 3)), np.array([[0.50, 0.0, 0.0]]))
    assert not mon.too_close and not mon.clear
    # clear at min(S_p(0.05 m/s), S_p(0) + 0.05 m) = min(0.488 + 0.0305, 0.538)
    threshold = min(protective_distance(0.05, PARAMS), 0.488 + 0.05)
    mon.measure(np.zeros((1, 3)), np.array([[threshold + 1e-6, 0.0, 0.0]]))
    assert mon.clear


def test_no_people_means_no_scaling() -> None:
    """With nobody seen the separation stage passes the command unchanged."""
    mon = _monitor()
    mon.measure(np.zeros((1, 3)), np.zeros((0, 3)))
    assert mon.min_separation == math.inf
    assert mon.scale(np.array([[3.0, 0.0, 0.0]])) == 1.0


def _pair_oracle(points: np.ndarray, radii: np.ndarray, people: np.ndarray,
                 vel: np.ndarray) -> tuple[float, tuple[int, int], float]:
    """Pair by pair with the scalar ISO/TS 15066 inversion (``max_robot_speed``, checked above
    against the table): smallest separation, its pair, and the uniform factor."""
    best, pair, factor = math.inf, (-1, -1), 1.0
    for i, p in enumerate(points):
        for j, h in enumerate(people):
            d = h - p
            dist = float(np.linalg.norm(d))
            sep = dist - radii[i]
            if sep < best:
                best, pair = sep, (i, j)
            speed = float(d @ vel[i]) / dist
            if speed > 0:
                factor = min(factor, max_robot_speed(sep, PARAMS) / speed)
    return best, pair, factor


def test_changing_number_of_people_between_measures() -> None:
    """The geometry is compiled per number of people: 3, 1, then 6 people (a size not seen
    before) and back to 3 each give the pair-by-pair result of the published formula."""
    rng = np.random.default_rng(3)
    radii = np.array([0.05, 0.08, 0.0, 0.03])
    mon = SeparationMonitor(PARAMS, radii, resume_speed=0.05, clear_margin=0.05)
    for m in (3, 1, 6, 3, 2):
        points = rng.uniform(-0.15, 0.15, (4, 3))
        direction = rng.normal(size=(m, 3))
        people = direction / np.linalg.norm(direction, axis=1, keepdims=True)
        people *= rng.uniform(1.0, 1.6, (m, 1))          # S > 0.66 m: never too close
        vel = rng.uniform(-2.0, 2.0, (4, 3))
        best, pair, factor = _pair_oracle(points, radii, people, vel)
        assert factor < 1.0                                # the separation rule binds
        mon.measure(points, people)
        assert mon.n_people == m
        assert mon.min_separation == pytest.approx(best, rel=1e-12)
        assert (mon.closest_point, mon.closest_person) == pair
        assert not mon.too_close
        assert mon.scale(vel) == pytest.approx(factor, rel=1e-12)
        assert mon.closest_pair_permitted_speed() == pytest.approx(
            max_robot_speed(best, PARAMS), rel=1e-12)
        assert mon.closest_pair_permitted_speed() == mon.permitted_speeds()[pair]
        assert mon.permitted_speeds().shape == (4, m)
