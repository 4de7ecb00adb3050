"""Fault detection and recovery for the watchdog.

Any active fault makes the watchdog publish zero within the same tick (state ``stopped``),
naming the fault and the measured values behind it. Faults are keyed by kind and subject
(the input, person source or joint concerned), so two stale inputs are two faults.

Recovery rules (also in ``RECOVERY``; ``resume_after`` is a watchdog setting, 1 s by default):

- stale, missing or non-finite inputs (joint_states, skill inputs, person sources, missing
  joints) and non-finite monitored-point kinematics: clear once fresh valid data has been seen
  continuously for ``resume_after``. With per-joint stamps (``WatchdogInput.joint_stamps``)
  joint_states freshness is judged per joint: each joint needs its own valid update within the
  timeout, so a sample carrying only other joints (a gripper's) keeps none of them fresh;
- solver failure or an unusable solver command: clears once the solver has reported ok with a
  finite command continuously for ``resume_after``;
- person too close (separation at or inside S_p(0)): clears once every monitored point has
  stayed clear of every person (see ``SeparationMonitor.clear``) for ``resume_after``;
- failed skill switch: clears on a tick where the runtime reports a skill activated
  successfully (``WatchdogInput.skill_activated``) and no new switch failure.

Any interruption of the clear condition restarts the wait. After the last fault clears the
command ramps up from zero under the acceleration limits. A stale person source counts as a
person at the worst position, i.e. a stop (common practice: missing, stale or implausible
sensor data means the person may be anywhere). Timestamps more than a timeout in the future
count as stale too (a clock problem is not fresh data).
"""
from __future__ import annotations

import math
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass, field
from enum import Enum
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from constraint_ctrl.safety.watchdog import PersonSample, WatchdogInput


class FaultKind(str, Enum):
    """What went wrong."""

    JOINT_STATES_STALE = 'joint_states_stale'
    JOINT_MISSING = 'joint_missing'
    JOINT_STATES_NOT_FINITE = 'joint_states_not_finite'
    INPUT_STALE = 'input_stale'
    INPUT_NOT_FINITE = 'input_not_finite'
    PERSON_STALE = 'person_stale'
    PERSON_INVALID = 'person_invalid'
    SOLVER_FAILED = 'solver_failed'
    COMMAND_INVALID = 'command_invalid'
    KINEMATICS_NOT_FINITE = 'kinematics_not_finite'
    SWITCH_FAILED = 'switch_failed'
    PERSON_TOO_CLOSE = 'person_too_close'


class Recovery(str, Enum):
    """How a fault clears."""

    FRESH_DATA_HELD = 'fresh valid data seen continuously for resume_after'
    OK_SOLVE_HELD = 'solver ok with a finite command continuously for resume_after'
    SEPARATION_CLEAR_HELD = 'every pair clear of S_p(0) continuously for resume_after'
    SKILL_ACTIVATED = 'a skill activated successfully'


RECOVERY: dict[FaultKind, Recovery] = {
    FaultKind.JOINT_STATES_STALE: Recovery.FRESH_DATA_HELD,
    FaultKind.JOINT_MISSING: Recovery.FRESH_DATA_HELD,
    FaultKind.JOINT_STATES_NOT_FINITE: Recovery.FRESH_DATA_HELD,
    FaultKind.INPUT_STALE: Recovery.FRESH_DATA_HELD,
    FaultKind.INPUT_NOT_FINITE: Recovery.FRESH_DATA_HELD,
    FaultKind.PERSON_STALE: Recovery.FRESH_DATA_HELD,
    FaultKind.PERSON_INVALID: Recovery.FRESH_DATA_HELD,
    FaultKind.SOLVER_FAILED: Recovery.OK_SOLVE_HELD,
    FaultKind.COMMAND_INVALID: Recovery.OK_SOLVE_HELD,
    FaultKind.KINEMATICS_NOT_FINITE: Recovery.FRESH_DATA_HELD,
    FaultKind.SWITCH_FAILED: Recovery.SKILL_ACTIVATED,
    FaultKind.PERSON_TOO_CLOSE: Recovery.SEPARATION_CLEAR_HELD,
}

FaultKey = tuple[FaultKind, str]


@dataclass(frozen=True)
class Fault:
    """One detected problem, with the values that show it."""

    kind: FaultKind
    subject: str
    reason: str
    values: dict[str, float] = field(default_factory=dict)

    @property
    def key(self) -> FaultKey:
        return (self.kind, self.subject)


def _age_fault(kind: FaultKind, subject: str, what: str, stamp: float | None, now: float,
               timeout: float) -> Fault:
    """The staleness fault of a ``stamp`` that is missing, older than ``timeout`` or as far in
    the future (the caller has already found it out of range)."""
    if stamp is None:
        return Fault(kind, subject, f'{what}: nothing received yet',
                     {'age': math.inf, 'timeout': timeout})
    age = now - stamp
    if age < 0:
        reason = f'{what}: stamp {-age:.3f} s in the future (timeout {timeout:.3f} s)'
    else:
        reason = f'{what}: last data {age:.3f} s old (timeout {timeout:.3f} s)'
    return Fault(kind, subject, reason, {'age': age, 'timeout': timeout})


def _finite(a: np.ndarray) -> bool:
    """True when every entry is finite: an inf or NaN anywhere makes the dot product non-finite
    (cheaper than ``isfinite(a).all()`` on small arrays; overflows only beyond 1e154)."""
    return math.isfinite(float(np.dot(a, a)))


class FaultDetector:
    """Checks one tick's inputs; cheap when nothing is wrong (a few float comparisons)."""

    def __init__(self, n_joints: int, *, joint_state_timeout: float, person_timeout: float,
                 person_timeouts: Mapping[str, float], joint_names: Sequence[str] = ()) -> None:
        self.n_joints = n_joints
        self.joint_state_timeout = joint_state_timeout
        self.person_timeout = person_timeout
        self.person_timeouts = dict(person_timeouts)
        self.joint_names = tuple(joint_names)
        self.q_valid = False

    def _joint(self, i: int) -> str:
        return self.joint_names[i] if i < len(self.joint_names) else f'#{i}'

    def check(self, inp: WatchdogInput, people_finite: bool = True) -> list[Fault]:
        """All faults present in ``inp``; also sets ``q_valid`` (q usable for kinematics).

        Args:
            inp: this tick's inputs.
            people_finite: False when the caller found a non-finite or malformed person
                position; the detector then names the offending sources.
        """
        faults: list[Fault] = []
        now = inp.now
        self.q_valid = self._check_joints(inp, faults)
        # Fast path first (plain float comparisons); build the fault only when one fails.
        stamps = inp.input_stamps
        for name, timeout in inp.input_timeouts.items():
            stamp = stamps.get(name)
            if stamp is None or not -timeout <= now - stamp <= timeout:
                faults.append(_age_fault(FaultKind.INPUT_STALE, name, f'input {name!r}',
                                         stamp, now, timeout))
        if not inp.inputs_finite:
            faults.append(Fault(FaultKind.INPUT_NOT_FINITE, '',
                                'a skill input holds NaN or inf', {}))
        people = inp.people
        for source in inp.person_sources:
            sample = people.get(source)
            timeout = self.person_timeouts.get(source, self.person_timeout)
            if sample is None or not -timeout <= now - sample.stamp <= timeout:
                faults.append(_age_fault(
                    FaultKind.PERSON_STALE, source,
                    f'person source {source!r} (treated as a person at the worst position)',
                    None if sample is None else sample.stamp, now, timeout))
        if not people_finite:
            faults.extend(_person_shape_faults(inp.people))
        self._check_solver(inp, faults)
        if inp.switch_failed:
            faults.append(Fault(FaultKind.SWITCH_FAILED, '',
                                'a skill switch failed mid-motion; activate a skill to resume',
                                {}))
        return faults

    def _check_joints(self, inp: WatchdogInput, faults: list[Fault]) -> bool:
        if inp.missing_joints:
            names = ', '.join(repr(j) for j in inp.missing_joints)
            faults.append(Fault(FaultKind.JOINT_MISSING, '',
                                f'joint_states lacks configured joint(s) {names}',
                                {'missing': float(len(inp.missing_joints))}))
            return False
        q = inp.q
        if q is None or inp.joint_state_stamp is None:
            faults.append(Fault(FaultKind.JOINT_STATES_STALE, '',
                                'joint_states: nothing received yet',
                                {'age': math.inf, 'timeout': self.joint_state_timeout}))
            return False
        valid = True
        timeout = self.joint_state_timeout
        stamps = inp.joint_stamps
        if stamps is not None:
            # per joint: the oldest and the newest stamp bound every age (NaN fails both tests)
            now = inp.now
            if not (now - float(stamps.min()) <= timeout and now - float(stamps.max()) >= -timeout):
                faults.append(self._stale_joints_fault(stamps, now, timeout))
        elif not -timeout <= inp.now - inp.joint_state_stamp <= timeout:
            faults.append(_age_fault(FaultKind.JOINT_STATES_STALE, '', 'joint_states',
                                     inp.joint_state_stamp, inp.now, timeout))
        if q.shape != (self.n_joints,):
            faults.append(Fault(FaultKind.JOINT_MISSING, '',
                                f'joint_states gives {q.size} positions, expected '
                                f'{self.n_joints}',
                                {'received': float(q.size), 'expected': float(self.n_joints)}))
            return False
        if not _finite(q):
            bad = int(np.flatnonzero(~np.isfinite(q))[0])
            faults.append(Fault(FaultKind.JOINT_STATES_NOT_FINITE, '',
                                f'joint_states position of joint {self._joint(bad)} is '
                                f'{float(q[bad])!r}', {'joint_index': float(bad)}))
            valid = False
        return valid

    def _stale_joints_fault(self, stamps: np.ndarray, now: float, timeout: float) -> Fault:
        """Name every joint not updated by a valid sample within ``timeout`` (stamps further
        than ``timeout`` in the future count as stale too), with the largest age."""
        ages = now - stamps
        with np.errstate(invalid='ignore'):
            stale = ~((ages <= timeout) & (ages >= -timeout))     # NaN (never updated) is stale
        idx = np.flatnonzero(stale)
        names = ', '.join(self._joint(int(i)) for i in idx)
        bad = ages[idx]
        if not np.isfinite(bad).all():
            age = math.inf
            detail = 'no valid update: never received, or invalidated by a rejected sample'
        elif float(bad.max()) > timeout:
            age = float(bad.max())
            detail = f'oldest update {age:.3f} s ago'
        else:
            age = float(bad.min())
            detail = f'stamped {-age:.3f} s in the future'
        reason = (f'joint_states: joint(s) {names} not updated within {timeout:.3f} s '
                  f'({detail}; samples without these joints do not count)')
        return Fault(FaultKind.JOINT_STATES_STALE, '', reason,
                     {'age': age, 'timeout': timeout, 'stale_joints': float(idx.size)})

    def _check_solver(self, inp: WatchdogInput, faults: list[Fault]) -> None:
        if not inp.solver_ok:
            faults.append(Fault(FaultKind.SOLVER_FAILED, '',
                                f'solver failed: {inp.solver_status}', {}))
            return
        cmd = inp.command
        if cmd is None or cmd.shape != (self.n_joints,):
            got = 'no command' if cmd is None else f'shape {cmd.shape}'
            faults.append(Fault(FaultKind.COMMAND_INVALID, '',
                                f'solver reported ok but gave {got}, expected '
                                f'({self.n_joints},)', {}))
        elif not _finite(cmd):
            bad = int(np.flatnonzero(~np.isfinite(cmd))[0])
            faults.append(Fault(FaultKind.COMMAND_INVALID, '',
                                f'solver command for joint {self._joint(bad)} is '
                                f'{float(cmd[bad])!r}', {'joint_index': float(bad)}))


def _person_shape_faults(people: Mapping[str, PersonSample]) -> list[Fault]:
    faults = []
    for source, sample in people.items():
        pos = np.asarray(sample.position, dtype=float)
        if pos.size == 0 or pos.size % 3 != 0:
            faults.append(Fault(FaultKind.PERSON_INVALID, source,
                                f'person source {source!r}: position has {pos.size} values, '
                                'expected 3 per person', {'size': float(pos.size)}))
        elif not np.isfinite(pos).all():
            faults.append(Fault(FaultKind.PERSON_INVALID, source,
                                f'person source {source!r}: position holds NaN or inf', {}))
    return faults


@dataclass
class ActiveFault:
    """A fault that is holding the robot, and since when its clear condition has held."""

    fault: Fault
    since: float
    quiet_since: float | None = None


class FaultTracker:
    """Latches faults and releases each one by its recovery rule."""

    def __init__(self, resume_after: float) -> None:
        self.resume_after = resume_after
        self.active: dict[FaultKey, ActiveFault] = {}
        self.cleared: list[Fault] = []

    def update(self, now: float, detected: Sequence[Fault], *,
               blocked: Collection[FaultKey] = (), skill_activated: bool = False) -> bool:
        """Fold in this tick's faults; return True if the set of active faults changed.

        Args:
            now: tick time (s).
            detected: faults present this tick.
            blocked: keys whose trigger is gone but whose clear condition does not hold yet
                (e.g. a person just outside S_p(0) but not yet clear).
            skill_activated: the runtime activated a skill successfully this tick.
        """
        changed = False
        if self.cleared:
            self.cleared = []
        if not detected and not self.active:
            return False
        seen: set[FaultKey] = set()
        for fault in detected:
            key = fault.key
            seen.add(key)
            entry = self.active.get(key)
            if entry is None:
                self.active[key] = ActiveFault(fault, now)
                changed = True
            else:
                entry.quiet_since = None     # keep the first detection: it is what caused the stop
        for key in [k for k in self.active if k not in seen]:
            entry = self.active[key]
            rule = RECOVERY[key[0]]
            if rule is Recovery.SKILL_ACTIVATED:
                done = skill_activated
            elif key in blocked:
                entry.quiet_since = None
                done = False
            else:
                if entry.quiet_since is None:
                    entry.quiet_since = now
                # 1e-9 s absorbs float error in sums of tick periods.
                done = now - entry.quiet_since >= self.resume_after - 1e-9
            if done:
                self.cleared.append(entry.fault)
                del self.active[key]
                changed = True
        return changed

    def reason(self) -> str:
        """All active faults' reasons, oldest first."""
        return '; '.join(e.fault.reason for e in self.active.values())

    def values(self) -> dict[str, float]:
        """Measured values of the active faults (prefixed by kind/subject when several)."""
        entries = list(self.active.values())
        if len(entries) == 1:
            return dict(entries[0].fault.values)
        out: dict[str, float] = {}
        for e in entries:
            prefix = e.fault.kind.value + (f'[{e.fault.subject}]' if e.fault.subject else '')
            for k, v in e.fault.values.items():
                out[f'{prefix}.{k}'] = v
        return out
