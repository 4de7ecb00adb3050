"""Watchdog states, transitions, faults, stops and resumption.

The robot stand-in is a Cartesian (gantry) robot: three prismatic joints along x, y, z, so a
point at ``offset`` from the carriage is at p = q + offset with Jacobian J = I (textbook
Cartesian-robot kinematics). Distances and speeds below are then plain vector arithmetic.
Separation numbers come from ISO/TS 15066:2016 clause 5.5.4 with the safety-facts.md 1.3
example terms (S_p(0) = 488 mm; computed there by hand). Timeouts and the resume hold are
common practice (safety-facts.md section 6), not standard values.
"""
from __future__ import annotations

import math
from dataclasses import replace

import casadi as ca
import numpy as np
import pytest

from constraint_ctrl.errors import ConstraintCtrlError
from constraint_ctrl.safety.faults import RECOVERY, FaultKind, Recovery
from constraint_ctrl.safety.separation import max_robot_speed, protective_distance
from constraint_ctrl.safety.states import State
from constraint_ctrl.safety.watchdog import (
    BufferedPoints, MonitoredPoint, PersonSample, Watchdog, WatchdogConfig, WatchdogInput)

DT = 0.01
OFFSETS = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, -0.3]])      # tool point, and 0.3 m below it
POINTS = [MonitoredPoint('carriage', tuple(o), 0.05) for o in OFFSETS]
STANDSTILL = 0.488    # S_p(0) of the safety-facts.md 1.3 terms (ISO/TS 15066 5.5.4)


def gantry(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cartesian robot: p_i = q + offset_i, J_i = I."""
    return (q[:, np.newaxis] + OFFSETS.T), np.vstack([np.eye(3)] * len(OFFSETS))


def make_config(**overrides: object) -> WatchdogConfig:
    base = {'velocity_limits': [1.0, 1.0, 1.0], 'acceleration_limits': [5.0, 5.0, 5.0],
            'lower': [-3.0, -3.0, -3.0], 'upper': [3.0, 3.0, 3.0], 'resume_after': 0.5,
            'joint_names': ('x', 'y', 'z')}
    base.update(overrides)
    return WatchdogConfig(**base)


class Cell:
    """Drives a watchdog tick by tick with healthy inputs unless a test breaks one."""

    def __init__(self, config: WatchdogConfig | None = None) -> None:
        self.watchdog = Watchdog(config or make_config(), gantry, POINTS, DT)
        self.now = 0.0
        self.q = np.zeros(3)
        self.person: np.ndarray | None = None

    def inputs(self, cmd: np.ndarray, **overrides: object) -> WatchdogInput:
        people = {}
        sources: tuple[str, ...] = ()
        if self.person is not None:
            people = {'scanner': PersonSample('scanner', self.person.copy(), self.now)}
            sources = ('scanner',)
        fields = {'now': self.now, 'q': self.q.copy(), 'joint_state_stamp': self.now,
                  'command': cmd, 'solver_ok': True, 'solver_status': 'ok',
                  'input_stamps': {'force': self.now}, 'input_timeouts': {'force': 0.1},
                  'inputs_finite': True, 'people': people, 'person_sources': sources}
        fields.update(overrides)
        return WatchdogInput(**fields)

    def tick(self, cmd: object = (0.0, 0.0, 0.0), *, move: bool = False,
             **overrides: object):
        out = self.watchdog.step(self.inputs(np.array(cmd, dtype=float), **overrides))
        if move:
            self.q += out.command * DT
        self.now += DT
        return out

    def run(self, seconds: float, cmd: object = (0.0, 0.0, 0.0), **kw: object):
        outs = [self.tick(cmd, **kw) for _ in range(round(seconds / DT))]
        return outs[-1]


def test_first_healthy_tick_enters_normal_with_a_transition() -> None:
    """Starts stopped; the first tick with valid inputs moves to normal and records why.

    Source: project behaviour (start from zero command); 0.02 m/s is far below every limit, so
    the command must pass bit for bit.
    """
    cell = Cell()
    assert cell.watchdog.state is State.STOPPED
    out = cell.tick((0.02, 0.0, 0.0))
    assert out.state is State.NORMAL
    assert [(t.from_state, t.to_state) for t in out.transitions] == [(State.STOPPED, State.NORMAL)]
    assert 'first tick' in out.transitions[0].reason
    assert np.array_equal(out.command, [0.02, 0.0, 0.0])      # under every limit: unchanged
    assert out.min_separation == math.inf


def test_nothing_received_yet_is_a_stop() -> None:
    """No joint_states at all: stopped with zero from the first tick (common practice, safety-facts
    section 0: missing data means stop)."""
    cell = Cell()
    out = cell.tick((0.5, 0.0, 0.0), q=None, joint_state_stamp=None)
    assert out.state is State.STOPPED and not out.command.any()
    assert 'joint_states: nothing received yet' in out.reason


def _running_cell() -> Cell:
    cell = Cell()
    cell.run(0.5, (0.4, 0.0, 0.0))
    out = cell.tick((0.4, 0.0, 0.0))
    assert out.state is State.NORMAL and out.command[0] == pytest.approx(0.4)
    return cell


@pytest.mark.parametrize(('overrides', 'kind', 'text'), [
    ({'joint_state_stamp': -0.2}, FaultKind.JOINT_STATES_STALE, 'joint_states: last data'),
    ({'input_stamps': {'force': 0.0}}, FaultKind.INPUT_STALE, "input 'force': last data"),
    ({'input_stamps': {}}, FaultKind.INPUT_STALE, "input 'force': nothing received"),
    ({'inputs_finite': False}, FaultKind.INPUT_NOT_FINITE, 'NaN or inf'),
    ({'q': np.array([0.0, math.nan, 0.0])}, FaultKind.JOINT_STATES_NOT_FINITE, 'joint y is nan'),
    ({'command': np.array([0.4, math.inf, 0.0])}, FaultKind.COMMAND_INVALID, 'joint y is inf'),
    ({'command': None}, FaultKind.COMMAND_INVALID, 'gave no command'),
    ({'solver_ok': False, 'solver_status': 'infeasible'}, FaultKind.SOLVER_FAILED,
     'solver failed: infeasible'),
    ({'missing_joints': ('z',)}, FaultKind.JOINT_MISSING, "lacks configured joint(s) 'z'"),
    ({'q': np.zeros(2)}, FaultKind.JOINT_MISSING, 'gives 2 positions, expected 3'),
    ({'switch_failed': True}, FaultKind.SWITCH_FAILED, 'skill switch failed'),
])
def test_each_fault_gives_zero_in_the_same_tick(overrides: dict, kind: FaultKind,
                                                text: str) -> None:
    """Stale / NaN / failed inputs: zero command and state stopped within the faulty tick.

    Source: safety-facts.md section 6 fault-injection list (delayed messages, NaN/inf) and
    section 0 (stale or implausible data means stop); both common practice.
    """
    cell = _running_cell()
    out = cell.tick((0.4, 0.0, 0.0), **overrides)
    assert not out.command.any()
    assert out.state is State.STOPPED
    assert text in out.reason
    (transition,) = out.transitions
    assert (transition.from_state, transition.to_state) == (State.NORMAL, State.STOPPED)
    assert transition.reason == out.reason
    assert transition.time == pytest.approx(cell.now - DT)
    assert kind in RECOVERY


def test_stale_joint_states_reports_age_and_timeout() -> None:
    """The transition carries the measured age (s) and the timeout that it exceeded.

    80 ms against 50 ms: 2-3 missed cycles at 125 Hz is about 24 ms (safety-facts.md 6, common
    practice), so 50 ms is already lenient.
    """
    cell = _running_cell()
    out = cell.tick((0.4, 0.0, 0.0), joint_state_stamp=cell.now - 0.08)
    (transition,) = out.transitions
    assert transition.values['age'] == pytest.approx(0.08)
    assert transition.values['timeout'] == 0.05


def test_every_joint_must_be_fresh_on_its_own() -> None:
    """Per-joint freshness: one joint whose last valid update is older than the timeout stops
    the arm in that tick, and the fault names that joint (issue 8 item 1: a second publisher
    carrying other joints must not keep the arm's joints fresh). Timeout rule: common practice
    (safety-facts.md section 6)."""
    cell = _running_cell()
    stamps = np.array([cell.now, cell.now - 0.08, cell.now])
    out = cell.tick((0.4, 0.0, 0.0), joint_stamps=stamps)
    assert out.state is State.STOPPED and not out.command.any()
    assert "joint(s) y not updated within 0.050 s" in out.reason
    assert 'x,' not in out.reason and ', z' not in out.reason
    (transition,) = out.transitions
    assert transition.values['age'] == pytest.approx(0.08)
    assert transition.values['stale_joints'] == 1.0


def test_fresh_per_joint_stamps_keep_moving_and_never_updated_joints_stop() -> None:
    cell = _running_cell()
    fresh = cell.tick((0.4, 0.0, 0.0), joint_stamps=np.array([cell.now - 0.04, cell.now,
                                                                cell.now]))
    assert fresh.state is State.NORMAL and fresh.command[0] == pytest.approx(0.4)
    out = cell.tick((0.4, 0.0, 0.0), joint_stamps=np.array([cell.now, math.nan, math.nan]))
    assert out.state is State.STOPPED and not out.command.any()
    assert 'joint(s) y, z not updated' in out.reason and 'no valid update' in out.reason


def test_a_joint_stamped_in_the_future_is_stale() -> None:
    cell = _running_cell()
    out = cell.tick((0.4, 0.0, 0.0), joint_stamps=np.array([cell.now, cell.now,
                                                              cell.now + 0.2]))
    assert out.state is State.STOPPED
    assert 'joint(s) z' in out.reason and '0.200 s in the future' in out.reason


def test_stamp_from_the_future_is_stale() -> None:
    """A clock problem is not fresh data (common practice: reject future timestamps)."""
    cell = _running_cell()
    out = cell.tick((0.4, 0.0, 0.0), joint_state_stamp=cell.now + 1.0)
    assert out.state is State.STOPPED and 'in the future' in out.reason


def test_stale_person_source_is_a_stop_as_if_the_person_were_anywhere() -> None:
    """safety-facts.md 0 and 6 (common practice): stale data = a person at the worst position."""
    cell = Cell()
    cell.person = np.array([2.5, 0.0, 0.0])
    cell.run(0.3, (0.3, 0.0, 0.0))
    inp = cell.inputs(np.array([0.3, 0.0, 0.0]))
    inp.people = {'scanner': PersonSample('scanner', cell.person, cell.now - 0.25)}  # > 0.2 s
    out = cell.watchdog.step(inp)
    assert not out.command.any() and out.state is State.STOPPED
    assert "person source 'scanner'" in out.reason and 'worst position' in out.reason
    assert out.transitions[0].values['age'] == pytest.approx(0.25)


def test_person_source_that_never_sent_is_a_stop() -> None:
    """A configured source with no sample at all is just as stale as an old one (common practice,
    safety-facts.md 0)."""
    cell = _running_cell()
    out = cell.tick((0.3, 0.0, 0.0), person_sources=('scanner',))
    assert out.state is State.STOPPED and not out.command.any()
    assert "person source 'scanner'" in out.reason and 'nothing received yet' in out.reason


def test_per_source_person_timeout() -> None:
    """A slow camera may get its own timeout; 0.25 s old data is then still fresh (timeouts per
    sensor: about 2 frame periods plus processing, safety-facts.md 6, common practice)."""
    cell = Cell(make_config(person_timeouts={'scanner': 0.3}))
    cell.person = np.array([2.5, 0.0, 0.0])
    cell.run(0.1)
    inp = cell.inputs(np.zeros(3))
    inp.people = {'scanner': PersonSample('scanner', cell.person, cell.now - 0.25)}
    assert cell.watchdog.step(inp).state is State.NORMAL


def test_nan_person_position_is_a_stop() -> None:
    """An implausible (NaN) person position counts as a fault, naming the source (common practice,
    safety-facts.md 0 and 6)."""
    cell = _running_cell()
    cell.person = np.array([math.nan, 0.0, 0.0])
    out = cell.tick((0.4, 0.0, 0.0))
    assert out.state is State.STOPPED and "person source 'scanner'" in out.reason


def test_recovery_needs_fresh_data_held_for_resume_after_then_ramps_up() -> None:
    """Stale joint_states: stopped until fresh data held 0.5 s, then up at a = 5 m/s^2.

    Settle period of fresh valid data before motion resumes: safety-facts.md 6 (0.5-1 s, common
    practice); ramp-up v = a t (constant acceleration).
    """
    cell = _running_cell()
    cell.run(0.2, (0.4, 0.0, 0.0), joint_state_stamp=-1.0)          # stale for 0.2 s
    outs = [cell.tick((0.4, 0.0, 0.0)) for _ in range(50)]            # fresh t0 .. t0 + 0.49 s
    assert all(o.state is State.STOPPED and not o.command.any() for o in outs)
    out = cell.tick((0.4, 0.0, 0.0))                                  # t0 + 0.50 s
    assert out.state is State.NORMAL
    assert 'resumed after joint_states_stale cleared' in out.transitions[0].reason
    assert out.command[0] == pytest.approx(5.0 * DT)                  # v = a dt after rest
    out = cell.tick((0.4, 0.0, 0.0))
    assert out.command[0] == pytest.approx(2 * 5.0 * DT)


def test_interrupted_recovery_restarts_the_hold() -> None:
    """A single bad tick during the hold restarts the full resume_after wait ("seen continuously",
    safety-facts.md 6 settle period, common practice)."""
    cell = _running_cell()
    cell.tick((0.4, 0.0, 0.0), solver_ok=False, solver_status='max iterations')
    cell.run(0.3, (0.4, 0.0, 0.0))
    cell.tick((0.4, 0.0, 0.0), solver_ok=False, solver_status='max iterations')
    out = cell.run(0.5, (0.4, 0.0, 0.0))                 # ok ticks at t0 .. t0 + 0.49 s
    assert out.state is State.STOPPED and 'max iterations' in out.reason
    out = cell.tick((0.4, 0.0, 0.0))
    assert out.state is State.NORMAL


def test_failed_switch_clears_only_when_a_skill_is_activated() -> None:
    """RECOVERY rule: waiting is not enough, a successful activation is (project rule: a failed
    switch leaves no valid skill to follow)."""
    assert RECOVERY[FaultKind.SWITCH_FAILED] is Recovery.SKILL_ACTIVATED
    cell = _running_cell()
    cell.tick((0.4, 0.0, 0.0), switch_failed=True)
    out = cell.run(2.0, (0.4, 0.0, 0.0))
    assert out.state is State.STOPPED and 'skill switch failed' in out.reason
    out = cell.tick((0.4, 0.0, 0.0), skill_activated=True)
    assert out.state is State.NORMAL and out.command[0] == pytest.approx(5.0 * DT)


def test_two_faults_are_both_named_and_both_must_clear() -> None:
    """Each fault is tracked on its own; the reason lists all active ones (each input needs its own
    fresh-data hold, safety-facts.md 6, common practice)."""
    cell = _running_cell()
    out = cell.tick((0.4, 0.0, 0.0), inputs_finite=False, solver_ok=False,
                    solver_status='numerical')
    assert 'NaN or inf' in out.reason and 'numerical' in out.reason
    assert set(out.transitions[0].values) == set()   # neither fault has measured values
    cell.run(0.5, (0.4, 0.0, 0.0), inputs_finite=False)     # solver fine, input still bad
    out = cell.tick((0.4, 0.0, 0.0))
    assert out.state is State.STOPPED and 'numerical' not in out.reason
    assert cell.run(0.5, (0.4, 0.0, 0.0)).state is State.NORMAL


def test_requested_stop_ramps_to_zero_within_stopping_time() -> None:
    """Normal stop: linear in magnitude from the last published command, zero by 0.3 s.

    A controlled stop with power available (IEC 60204-1 9.2.2 category 1/2, per safety-facts.md
    5); the linear shape is this project's choice, checked here against v(t) = v0 (1 - t / T).
    """
    cell = _running_cell()
    cell.watchdog.request_stop('shutdown')
    outs = [cell.tick((0.4, 0.0, 0.0)) for _ in range(40)]
    speeds = [o.command[0] for o in outs]
    assert outs[0].state is State.STOPPING
    assert outs[0].transitions[0].reason.startswith('stop requested: shutdown')
    assert outs[0].transitions[0].values['speed'] == pytest.approx(0.4)
    n = round(0.3 / DT)
    for i in range(n):                           # linear: 0.4 (1 - (i + 1) dt / T)
        assert speeds[i] == pytest.approx(0.4 * (1 - (i + 1) * DT / 0.3), abs=1e-12)
    assert speeds[n - 1] == 0.0 and outs[n - 1].state is State.STOPPED
    assert all(s == 0.0 for s in speeds[n - 1:])
    assert [t.to_state for o in outs for t in o.transitions] == [State.STOPPING, State.STOPPED]
    assert cell.watchdog.last_reason == 'stop requested: shutdown'
    cell.watchdog.release_stop()
    out = cell.tick((0.4, 0.0, 0.0))
    assert out.state is State.NORMAL and out.command[0] == pytest.approx(5.0 * DT)


def test_stop_ramp_never_speeds_up_when_the_clock_jumps_back() -> None:
    """A clock going backwards (common practice: distrust such time, safety-facts.md 6) neither
    raises the ramp again nor delays the stop beyond stopping_time / dt ticks."""
    cell = _running_cell()
    cell.watchdog.request_stop('shutdown')
    speeds = [cell.tick((0.4, 0.0, 0.0)).command[0] for _ in range(10)]
    cell.now -= 0.2
    speeds += [cell.tick((0.4, 0.0, 0.0)).command[0] for _ in range(20)]
    assert all(b <= a for a, b in zip(speeds, speeds[1:]))
    assert speeds[9] == pytest.approx(0.4 * (1 - 10 * DT / 0.3))
    assert speeds[29] == 0.0                        # 30 ticks of 10 ms = 0.3 s


def test_fault_during_requested_stop_is_immediate() -> None:
    """A fault does not wait for the ramp: zero in that tick, and the ramp does not restart
    (project rule: a fault demands a zero command at once, no ramp)."""
    cell = _running_cell()
    cell.watchdog.request_stop('operator')
    cell.run(0.05, (0.4, 0.0, 0.0))
    out = cell.tick((0.4, 0.0, 0.0), inputs_finite=False)
    assert out.state is State.STOPPED and not out.command.any()
    out = cell.run(0.6, (0.4, 0.0, 0.0))
    assert out.state is State.STOPPED and not out.command.any()
    assert out.reason == 'stop requested: operator'


def test_reduced_mode_flag_caps_point_speed() -> None:
    """Reduced mode: every point at <= 0.25 m/s (ISO 10218-1 reduced speed, clause from memory)."""
    cell = _running_cell()
    cell.watchdog.set_reduced_mode(True)
    out = cell.run(1.0, (0.6, 0.6, 0.0))   # per-joint rate limits bend the path briefly
    assert out.state is State.REDUCED
    assert np.linalg.norm(out.command) == pytest.approx(0.25, rel=1e-12)   # J = I
    assert out.command[0] == pytest.approx(out.command[1], rel=1e-9)       # direction kept
    cell.watchdog.set_reduced_mode(False)
    out = cell.tick((0.6, 0.6, 0.0))
    assert out.state is State.NORMAL
    assert out.transitions[0].to_state is State.NORMAL


def test_person_approaches_then_leaves() -> None:
    """normal -> reduced (1.5 m) -> stopped (S_p(0) = 0.488 m) -> reduced -> normal.

    Directed speeds never exceed the ISO/TS 15066 permitted speed, the stop comes with the
    separation values, and motion resumes only after separation stayed clear for 0.5 s.
    """
    cell = Cell()
    cell.person = np.array([3.0, 0.0, 0.0])
    command = (0.3, 0.0, 0.0)                      # the skill keeps driving towards the person
    log = []
    for phase, velocity, seconds in (('wait', 0.0, 0.3), ('approach', -1.2, 2.2),
                                     ('stand', 0.0, 0.5), ('leave', 1.2, 2.5)):
        for _ in range(round(seconds / DT)):
            out = cell.tick(command, move=True)
            log.append((phase, cell.now - DT, out, cell.person.copy(), cell.q.copy()))
            cell.person[0] += velocity * DT
    states = [entry[2].state for entry in log]
    changes = [s for i, s in enumerate(states) if i == 0 or s is not states[i - 1]]
    assert changes == [State.NORMAL, State.REDUCED, State.STOPPED, State.REDUCED, State.NORMAL]

    for _, _, out, person, q in log:
        points = q[np.newaxis, :] - out.command * DT + OFFSETS   # pose the command was made at
        for p in points:
            diff = person - p
            sep = np.linalg.norm(diff) - 0.05
            speed = max(0.0, float(diff / np.linalg.norm(diff) @ out.command))
            assert speed <= max_robot_speed(sep, cell.watchdog.config.separation) * (1 + 1e-9)

    stop = next(t for e in log for t in e[2].transitions if t.to_state is State.STOPPED)
    assert stop.values['min_separation'] <= STANDSTILL
    assert stop.values['protective_distance'] == pytest.approx(STANDSTILL)
    assert 'person too close' in stop.reason
    reduced = next(t for e in log for t in e[2].transitions if t.to_state is State.REDUCED)
    assert reduced.values['min_separation'] < 1.5 and 'reduced zone' in reduced.reason

    # hysteresis: from the last tick that was not clear, 0.5 s of clear ticks before resuming
    clear_at = min(protective_distance(0.05, cell.watchdog.config.separation), STANDSTILL + 0.05)
    resume_tick = next(i for i, e in enumerate(log) if e[0] == 'leave'
                       and e[2].transitions and e[2].transitions[0].from_state is State.STOPPED)
    last_blocked = max(i for i in range(resume_tick) if log[i][2].min_separation < clear_at)
    assert log[resume_tick][1] - log[last_blocked + 1][1] == pytest.approx(0.5, abs=1e-9)
    assert all(not e[2].command.any() for e in log[last_blocked:resume_tick])


def test_report_distance_and_scale_in_a_simple_geometry() -> None:
    """Person 1.05 m ahead of a 5 cm sphere: S = 1.0 m, vmax = 0.741 m/s (safety-facts.md 1.4)."""
    config = make_config(acceleration_limits=[100.0] * 3, reduced_zone=0.5)
    cell = Cell(config)
    cell.person = np.array([1.05, 0.0, 0.0])
    out = cell.tick((1.0, 0.0, 0.0))
    assert out.min_separation == pytest.approx(1.0)
    assert out.speed_scale == pytest.approx(0.741, abs=5e-4)
    assert out.command[0] == pytest.approx(0.741, abs=5e-4)
    assert out.protective_distance == pytest.approx(1.0, rel=1e-9)   # S_p(vmax(S)) = S


def test_buffered_casadi_points_match_direct_evaluation() -> None:
    """Function.buffer() results (column-major) equal casadi's own call for a planar 2R arm."""
    q = ca.SX.sym('q', 2)
    elbow = ca.vertcat(0.4 * ca.cos(q[0]), 0.4 * ca.sin(q[0]), 0)
    tip = elbow + ca.vertcat(0.3 * ca.cos(q[0] + q[1]), 0.3 * ca.sin(q[0] + q[1]), 0)
    pos = ca.horzcat(elbow, tip)
    fn = ca.Function('points', [q], [ca.densify(pos), ca.densify(ca.jacobian(ca.vec(pos), q))])
    fast = BufferedPoints(fn)
    qv = np.array([0.3, -1.1])
    p, j = fast(qv)
    assert np.allclose(p, np.array(fn(qv)[0]), atol=1e-15)
    assert np.allclose(j, np.array(fn(qv)[1]), atol=1e-15)
    # planar 2R forward kinematics x = l1 c1 + l2 c12, y = l1 s1 + l2 s12 (textbook)
    assert p[0, 1] == pytest.approx(0.4 * math.cos(0.3) + 0.3 * math.cos(-0.8))
    assert p[1, 1] == pytest.approx(0.4 * math.sin(0.3) + 0.3 * math.sin(-0.8))


def test_config_errors_name_the_field_and_value() -> None:
    """Bad settings fail at construction with the field, index and value (project error rule)."""
    with pytest.raises(ConstraintCtrlError,
                       match=r'acceleration_limits\[1\]: expected a number > 0, got 0\.0$'):
        make_config(acceleration_limits=[1.0, 0.0, 1.0])
    with pytest.raises(ConstraintCtrlError, match=r'lower: expected 3 values'):
        make_config(lower=[0.0, 0.0])
    with pytest.raises(ConstraintCtrlError, match=r'joint z has lower=1\.0 > upper=-1\.0'):
        make_config(lower=[0.0, 0.0, 1.0], upper=[1.0, 1.0, -1.0])
    with pytest.raises(ConstraintCtrlError, match=r'resume_after: .* got -1'):
        make_config(resume_after=-1)


def test_points_function_shape_mismatch_is_reported() -> None:
    """A points function that does not fit the monitored points fails at construction (the
    shapes (3, k) and (3k, n) are the kinematics contract of the project)."""
    with pytest.raises(ConstraintCtrlError, match=r'expected \(3, 3\) and \(9, 3\)'):
        Watchdog(make_config(), gantry, [*POINTS, POINTS[0]], DT)


def test_non_finite_kinematics_is_a_stop() -> None:
    """Kinematics that go NaN (a broken model) stop the arm instead of publishing NaN (common
    practice: implausible data means stop, safety-facts.md 0); a model already broken at the
    probe pose is refused at construction."""
    def fragile(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        p, j = gantry(q)
        return (p * math.nan, j) if q[0] > 1.0 else (p, j)

    watchdog = Watchdog(make_config(), fragile, POINTS, DT)
    cell = Cell()
    cell.watchdog = watchdog
    cell.person = np.array([2.5, 0.0, 0.0])
    assert cell.tick((0.3, 0.0, 0.0)).state is State.NORMAL
    cell.q[0] = 1.5
    out = cell.tick((0.3, 0.0, 0.0))
    assert out.state is State.STOPPED and not out.command.any()
    assert 'kinematics gave NaN or inf' in out.reason
    with pytest.raises(ConstraintCtrlError, match='returned NaN or inf'):
        Watchdog(make_config(), lambda q: fragile(q + 2.0), POINTS, DT)


def test_config_is_immutable() -> None:
    """Limits cannot be changed behind the watchdog's back (numpy read-only flag raises
    ValueError on assignment)."""
    config = make_config()
    with pytest.raises(ValueError):
        config.velocity_limits[0] = 10.0
    assert replace(config, reduced_speed=0.1).reduced_speed == 0.1


def test_old_person_data_counts_as_a_person_nearer_by_what_they_could_walk() -> None:
    """A position captured 50 ms ago: the person may be 1.6 m/s x 0.05 s = 80 mm nearer
    (human speed of ISO 13855; data age handled as in safety-facts.md section 6, common
    practice), so S = 1.0 m - 0.08 m and vmax follows from the quadratic of section 1.4."""
    config = make_config(acceleration_limits=[100.0] * 3, reduced_zone=0.5)
    cell = Cell(config)
    cell.person = np.array([1.05, 0.0, 0.0])
    fresh = cell.tick((1.0, 0.0, 0.0))
    aged = cell.watchdog.step(cell.inputs(np.array([1.0, 0.0, 0.0]), people={
        'scanner': PersonSample('scanner', cell.person.copy(), cell.now - 0.05)}))
    assert fresh.min_separation == pytest.approx(1.0)
    assert aged.min_separation == pytest.approx(1.0 - 0.08)
    from constraint_ctrl.safety.separation import SeparationParams, max_robot_speed
    assert aged.command[0] == pytest.approx(max_robot_speed(0.92, SeparationParams()), abs=5e-4)
    assert aged.command[0] < fresh.command[0]


def _casadi_gantry() -> ca.Function:
    """The gantry above as a casadi points function (p_i = q + offset_i, J_i = I)."""
    q = ca.SX.sym('q', 3)
    pos = ca.horzcat(*[q + ca.DM(list(o)) for o in OFFSETS])
    return ca.Function('gantry', [q], [ca.densify(pos), ca.densify(ca.jacobian(ca.vec(pos), q))])


def test_casadi_points_function_gives_the_same_commands_as_a_callable() -> None:
    """The Jacobian of a casadi points function is read in place, a callable's is copied: both
    give the same commands while a person walks in at 0.5 m/s. Reduced mode caps the point
    speed at 250 mm/s (ISO 10218-1, from memory; J = I so |v| = |qdot|), then separation
    scaling binds, then the stop at S_p(0) = 488 mm (safety-facts.md 1.3)."""
    config = make_config(reduced_mode=True)
    cells = [Cell(config), Cell(config)]
    cells[1].watchdog = Watchdog(config, _casadi_gantry(), POINTS, DT)
    for cell in cells:
        cell.person = np.array([1.6, 0.0, 0.0])
    seen = set()
    for _ in range(250):
        outs = [cell.tick((0.8, 0.1, 0.0), move=True) for cell in cells]
        for cell in cells:
            cell.person = cell.person - [0.5 * DT, 0.0, 0.0]
        assert outs[0].state is outs[1].state
        assert np.allclose(outs[0].command, outs[1].command, rtol=1e-12, atol=1e-15)
        assert outs[0].speed_scale == pytest.approx(outs[1].speed_scale, rel=1e-12)
        assert np.linalg.norm(outs[1].command) <= 0.25 * (1 + 1e-12)
        reduced_only = 0.25 / math.hypot(0.8, 0.1)
        if outs[1].state is State.REDUCED:
            seen.add('separation' if outs[1].speed_scale < reduced_only * (1 - 1e-9)
                     else 'reduced')
        elif outs[1].state is State.STOPPED:
            assert outs[1].reason.startswith('person too close')
            seen.add('stop')
    assert seen == {'reduced', 'separation', 'stop'}
