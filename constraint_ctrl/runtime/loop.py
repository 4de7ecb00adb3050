"""The control tick: input snapshot -> active skill -> QP -> watchdog -> command.

Middleware-free: the controller node fills a Snapshot from its subscriptions and publishes what
``step`` returns; tests and tools drive the same loop directly.

Skill switches and parameter changes are requested from other threads (service and parameter
callbacks) and applied at the next tick boundary, so a tick always runs one consistent skill
with one consistent set of tunables. The new skill starts from the command that was last
published (its acceleration limits keep the command continuous). A switch is answered after
the new skill's first tick: if that tick cannot produce a command from fresh inputs, the
switch counts as failed, the requester is told why and the watchdog stops the arm.

**Hold** is a state of the loop itself, not a skill: no skill runs, the loop asks for zero
velocity and the watchdog still runs every tick (its faults, speed and separation checks and
state reports go on; a person still stops the arm). The loop starts in hold and stays there
until a skill is activated; ``request_hold`` (or ``request_activation(HOLD)``) returns to it at
a tick boundary and is answered after that tick, like an activation. The command is shaped by
the watchdog as any command is: from the last one it goes to zero within the acceleration
limit (each joint's speed only decreases, never changes sign), then stays exactly zero, so a
hold can never move the arm. The tick that enters hold (and the first tick, where the loop
starts in it) reports the event ``holding`` (HOLDING_EVENT); ``LoopOutput.skill`` is HOLD
while holding.

A reloaded file of the running skill is switched in the same way (``request_reload_switch``):
at a tick boundary, from the last command, with its clock, unknowns, start pose and event
states carried over when its unknowns are unchanged (else restarted from its start values).
"""
from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field
from collections.abc import Mapping, Sequence

import numpy as np

from ..safety.states import State
from ..safety.watchdog import PersonSample, Watchdog, WatchdogInput, WatchdogOutput
from .library import HOLD, SkillLibrary
from .runner import SkillRunner, TickResult

_NO_INPUTS = np.empty(0)   # the input vector of a skill without inputs (never written)
#: Event of the tick that enters hold (see the module docstring).
HOLDING_EVENT = 'holding'


@dataclass(frozen=True, slots=True)
class InputSample:
    """Latest value of one skill input and its capture time (controller clock, s)."""

    value: float
    stamp: float


@dataclass(slots=True)
class Snapshot:
    """Everything one tick reads, taken at one instant (controller clock, s)."""

    now: float
    q: np.ndarray | None                      # model joint order
    joint_state_stamp: float | None
    inputs: Mapping[str, InputSample] = field(default_factory=dict)
    people: Mapping[str, PersonSample] = field(default_factory=dict)
    missing_joints: Sequence[str] = ()
    #: capture time of each joint's last valid update (model order, NaN = none); when given
    #: the watchdog needs every joint fresh, not just the latest sample
    joint_stamps: np.ndarray | None = None


@dataclass(slots=True)
class LoopOutput:
    command: np.ndarray                       # model joint order, what to publish
    skill: str | None                         # the running skill, or HOLD while holding
    tick: TickResult | None
    watchdog: WatchdogOutput
    events: list[str]
    activated: str | None = None


class _Request:
    """A switch asked for by another thread; ``done`` is set once a tick has run its outcome.

    ``kind`` is 'activate' (switch to ``name``), 'reload' (the running skill ``name`` takes
    its reloaded version) or 'hold' (to the built-in hold). ``params`` are tunable values by
    name, applied with the switch.
    """

    def __init__(self, name: str, params: Mapping[str, float] | None = None,
                 kind: str = 'activate') -> None:
        self.name = name
        self.kind = kind
        self.params = dict(params or {})
        self.asked_at = time.monotonic()
        self.done = threading.Event()
        self.ok = False
        self.message = ''
        self.restore: list[tuple[int, float]] = []   # values to put back if the switch fails

    def finish(self, ok: bool, message: str) -> None:
        self.ok, self.message = ok, message
        self.done.set()


class ControlLoop:
    def __init__(self, library: SkillLibrary, watchdog: Watchdog, dt: float,
                 person_sources: Sequence[str] = ()) -> None:
        self.library = library
        self.watchdog = watchdog
        self.dt = dt
        self.person_sources = tuple(person_sources)
        self.active: SkillRunner | None = None     # None: holding (the loop starts so)
        self._hold_reported = False                 # 'holding' sent for the current hold
        self._lock = threading.Lock()
        self._switch: _Request | None = None
        self._replace: _Request | None = None
        self._params: list[tuple[str, str, float]] = []
        self._last_command = np.zeros(watchdog.config.n_joints)
        self._switch_failed = False
        #: seconds from each activation request to the tick that ran the new skill first
        self.switch_delays: list[float] = []

    @property
    def holding(self) -> bool:
        """True while no skill runs (at start, and after a hold took effect)."""
        return self.active is None

    # ------------------------------------------------------ other threads
    def request_hold(self, timeout: float | None = None) -> tuple[bool, str]:
        """Hold from the next tick on (see the module docstring); with ``timeout``, wait until
        that tick ran. It replaces a switch not yet taken, and a later switch replaces it."""
        return self._queue_switch(_Request(HOLD, kind='hold'), timeout)

    def request_activation(self, name: str, timeout: float | None = None,
                           params: Mapping[str, float] | None = None) -> tuple[bool, str]:
        """Ask for ``name`` to become active at the next tick; wait for the outcome.

        The outcome is known after the new skill's first tick: ok when it produced a command
        from fresh inputs, else why not (then the watchdog stops the arm, as for any failed
        switch). ``params`` (tunable name -> value of that skill) are applied in the same tick,
        just before the switch, so a new goal never reaches the skill that is still running;
        if the switch fails they are put back. Without ``timeout`` it returns at once with
        (True, 'requested'). ``name`` HOLD asks for the hold (it has no tunables).
        """
        if name == HOLD:
            if params:
                return False, f'the hold has no tunables (got {sorted(params)})'
            return self.request_hold(timeout)
        return self._queue_switch(_Request(name, params), timeout)

    def _queue_switch(self, request: _Request, timeout: float | None) -> tuple[bool, str]:
        with self._lock:
            if self._switch is not None:
                self._switch.finish(False, f'superseded by a request for {request.name!r}')
            self._switch = request
        return self._wait(request, timeout)

    def request_reload_switch(self, name: str, timeout: float) -> tuple[bool, str]:
        """The running skill ``name`` was reloaded: switch to the library's new version at the
        next tick boundary, continuing its clock and unknowns where possible
        (SkillRunner.continue_from); (ok, what happened) after its first tick."""
        request = _Request(name, kind='reload')
        with self._lock:
            if self._replace is not None:
                self._replace.finish(False, 'superseded by a later reload')
            self._replace = request
        return self._wait(request, timeout)

    def _wait(self, request: _Request, timeout: float | None) -> tuple[bool, str]:
        """The outcome of ``request``; one that no tick took within ``timeout`` is withdrawn,
        so a refused request never switches later."""
        if timeout is None:
            return True, 'requested'
        if request.done.wait(timeout):
            return request.ok, request.message
        with self._lock:
            withdrawn = self._switch is request or self._replace is request
            if self._switch is request:
                self._switch = None
            if self._replace is request:
                self._replace = None
        if withdrawn:
            return False, (f'no control tick within {timeout:.3f} s (is the controller '
                           'running?); nothing was switched')
        # a tick has taken it meanwhile: its outcome comes at the end of that tick
        if request.done.wait(max(timeout, 1.0)):
            return request.ok, request.message
        return False, 'the tick that took the request did not finish it'

    def _abandon(self, requests: tuple[_Request | None, ...], exc: BaseException) -> None:
        for request in requests:
            if request is not None and not request.done.is_set():
                request.finish(False, f'the tick failed: {exc!r}')

    def set_parameters(self, skill: str, values: Mapping[str, float]) -> None:
        """Queue tunable values by name (already validated) for the next tick boundary."""
        with self._lock:
            self._params.extend((skill, name, value) for name, value in values.items())

    # -------------------------------------------------------------- tick
    def step(self, snap: Snapshot) -> LoopOutput:
        with self._lock:
            request, self._switch = self._switch, None
            replace, self._replace = self._replace, None
            params, self._params = self._params, []
        if request is None and replace is None:
            return self._step(snap, params, None, None)
        try:
            return self._step(snap, params, request, replace)
        except BaseException as exc:   # whoever waits must not wait for an answer forever
            self._abandon((request, replace), exc)
            raise

    def _step(self, snap: Snapshot, params: list[tuple[str, str, float]],
              request: _Request | None, replace: _Request | None) -> LoopOutput:
        for skill, name, value in params:
            loaded = self.library.get(skill)
            if loaded is not None:
                try:
                    index = loaded.compiled.param_index(name)
                except KeyError:
                    continue          # the tunable went away with a reload
                loaded.runner.solver.set_param(index, value)
        pending: _Request | None = None
        if replace is not None:
            pending = self._take_reloaded(replace, snap)
        if request is not None:
            if pending is not None:
                pending.finish(False, f'superseded by a switch to {request.name!r}')
            pending = self._hold(request) if request.kind == 'hold' \
                else self._activate(request, snap)
        events: list[str] = []
        tick: TickResult | None = None
        runner = self.active
        command: np.ndarray | None = None
        solver_ok, status = True, 'idle'
        input_stamps: dict[str, float] = {}
        input_timeouts: dict[str, float] = {}
        finite = True
        if runner is None:             # hold: zero, shaped by the watchdog like any command
            command = np.zeros_like(self._last_command)
            if not self._hold_reported:
                events.append(HOLDING_EVENT)
                self._hold_reported = True
        else:
            spec = runner.skill.spec
            u = _NO_INPUTS                  # read only: the solver copies it into its buffer
            if spec.inputs:
                u = np.empty(len(spec.inputs))
                for i, inp in enumerate(spec.inputs):
                    sample = snap.inputs.get(inp.name)
                    input_timeouts[inp.name] = inp.timeout
                    if sample is None:
                        u[i] = np.nan
                    else:
                        u[i] = sample.value
                        input_stamps[inp.name] = sample.stamp
                finite = bool(np.isfinite(u).all())
            if snap.q is not None and finite:
                tick = runner.tick(snap.q, u, self.dt)
                command = tick.joint_velocity if tick.ok else None
                solver_ok, status = tick.ok, tick.status.value + (
                    f' ({tick.message})' if tick.message else '')
                events.extend(tick.events)
            else:
                command = None
                solver_ok, status = False, 'no joint positions' if snap.q is None \
                    else 'non-finite or missing skill input'
        problem = None
        if pending is not None and pending.kind != 'hold':
            problem = _first_tick_problem(runner, tick, status, snap)
        switch_ok = pending is not None and problem is None
        if pending is not None:
            # a skill that cannot produce its first command is a failed switch: stop
            self._switch_failed = not switch_ok
        out = self.watchdog.step(WatchdogInput(
            now=snap.now, q=snap.q, joint_state_stamp=snap.joint_state_stamp, command=command,
            solver_ok=solver_ok, solver_status=status, input_stamps=input_stamps,
            input_timeouts=input_timeouts, inputs_finite=finite, people=snap.people,
            person_sources=self.person_sources, switch_failed=self._switch_failed,
            skill_activated=switch_ok, missing_joints=snap.missing_joints,
            joint_stamps=snap.joint_stamps))
        if runner is not None:
            moving = out.state in (State.NORMAL, State.REDUCED)
            runner.commit(out.command, out.speed_scale if moving else 0.0, self.dt)
        self._last_command = out.command
        events.extend(f'watchdog_{t.to_state.value}' for t in out.transitions)
        activated = None
        if pending is not None:
            activated = self._finish(pending, problem)
        return LoopOutput(command=out.command, skill=runner.name if runner else HOLD,
                          tick=tick, watchdog=out, events=events, activated=activated)

    def _activate(self, request: _Request, snap: Snapshot) -> _Request | None:
        loaded = self.library.get(request.name)
        if loaded is None:
            request.finish(False, f'no skill named {request.name!r} is loaded')
            return None
        if snap.q is None:
            request.finish(False, 'no joint positions yet; cannot start a skill')
            return None
        runner = loaded.runner
        solver = runner.solver
        try:
            indices = {name: loaded.compiled.param_index(name) for name in request.params}
        except KeyError as err:
            request.finish(False, str(err.args[0]))
            return None
        for name, value in request.params.items():
            request.restore.append((indices[name], float(solver.p[indices[name]])))
            solver.set_param(indices[name], value)
        runner.activate(snap.q, self._last_command)
        self.active = runner
        self._hold_reported = False
        self.switch_delays.append(max(0.0, time.monotonic() - request.asked_at))
        return request

    def _hold(self, request: _Request) -> _Request:
        """Enter hold at this tick boundary. A hold always works (it needs no input): it counts
        as a successful switch, so it also ends a stop latched by a failed one."""
        self.active = None
        self._hold_reported = False        # this tick reports 'holding', even if held already
        return request

    def _take_reloaded(self, request: _Request, snap: Snapshot) -> _Request | None:
        old = self.active
        loaded = self.library.get(request.name)
        if old is None or old.name != request.name:
            request.finish(True, f'{request.name} is not running; its next activation uses '
                                 'the reloaded version')
            return None
        if loaded is None or loaded.runner is old:
            request.finish(True, f'{request.name} keeps running (no new version loaded)')
            return None
        if snap.q is None:
            request.finish(False, f'{request.name}: no joint positions; the reloaded version '
                                  'was not switched in')
            return None
        restarted = loaded.runner.continue_from(old, snap.q, self._last_command)
        request.message = restarted or (f'continued at skill time {old.time:.3f} s with its '
                                        'unknowns and the values set at run time')
        self.active = loaded.runner
        return request

    def _finish(self, request: _Request, problem: str | None) -> str | None:
        """Answer a switch after its first tick; the name for ``activated`` on success."""
        delay_ms = (time.monotonic() - request.asked_at) * 1000
        if problem is None:
            if request.kind == 'hold':
                request.finish(True, f'holding: zero velocity asked from this tick on '
                                     f'({delay_ms:.2f} ms after the request), watchdog active')
                return None
            if request.kind == 'reload':
                request.finish(True, f'{request.name} (running) switched to the reloaded '
                                     f'version: {request.message}')
                return None
            request.finish(True, f'{request.name} active: first tick ok ({delay_ms:.2f} ms '
                                 'after the request)')
            return request.name
        runner = self.active
        if runner is not None:
            for index, value in request.restore:
                runner.solver.set_param(index, value)
        what = 'reloaded version of' if request.kind == 'reload' else 'switch to'
        request.finish(False, f'{what} {request.name} failed at its first tick: {problem}; '
                              'the watchdog stops the arm until a skill is activated')
        return None


def _first_tick_problem(runner: SkillRunner | None, tick: TickResult | None, status: str,
                        snap: Snapshot) -> str | None:
    """Why the first tick of a new skill does not count as a working start, or None.

    It must have solved with inputs that are all present, finite and fresh (an input older
    than its timeout would have the watchdog stop the arm in the same tick).
    """
    if runner is None:
        return 'no skill active'
    missing, bad, stale = [], [], []
    for inp in runner.skill.spec.inputs:
        sample = snap.inputs.get(inp.name)
        if sample is None:
            missing.append(inp.name)
        elif not np.isfinite(sample.value):
            bad.append(inp.name)
        elif not -inp.timeout <= snap.now - sample.stamp <= inp.timeout:
            stale.append(f'{inp.name} ({snap.now - sample.stamp:.3f} s old, timeout '
                         f'{inp.timeout:g} s)')
    parts = []
    if missing:
        parts.append(f'no data yet for input(s) {", ".join(missing)}')
    if bad:
        parts.append(f'non-finite input(s) {", ".join(bad)}')
    if stale:
        parts.append(f'stale input(s) {", ".join(stale)}')
    if tick is not None and not tick.ok:
        parts.append(f'solver: {status}')
    elif tick is None and not parts:
        parts.append(status)
    return '; '.join(parts) or None


__all__ = ['HOLD', 'HOLDING_EVENT', 'ControlLoop', 'InputSample', 'LoopOutput', 'Snapshot']
