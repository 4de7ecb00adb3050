"""The control tick: input snapshot -> active skill -> QP -> watchdog -> command.

Middleware-free: the controller node fills a Snapshot from its subscriptions and publishes what
``step`` returns; tests and tools drive the same loop directly.

Skill switches and parameter changes are requested from other threads (service and parameter
callbacks) and applied at the next tick boundary, so a tick always runs one consistent skill
with one consistent set of tunables. The new skill starts from the command that was last
published (its acceleration limits keep the command continuous); if its first tick cannot be
solved, the switch counts as failed and the watchdog stops the arm.
"""
from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from ..safety.states import State
from ..safety.watchdog import PersonSample, Watchdog, WatchdogInput, WatchdogOutput
from .library import SkillLibrary
from .runner import SkillRunner, TickResult


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
    skill: str | None
    tick: TickResult | None
    watchdog: WatchdogOutput
    events: list[str]
    activated: str | None = None


class _Request:
    """A switch asked for by another thread; ``done`` is set once the tick has handled it."""

    def __init__(self, name: str, params: Mapping[int, float] | None = None) -> None:
        self.name = name
        self.params = dict(params or {})
        self.asked_at = time.monotonic()
        self.done = threading.Event()
        self.ok = False
        self.message = ''


class ControlLoop:
    def __init__(self, library: SkillLibrary, watchdog: Watchdog, dt: float,
                 person_sources: Sequence[str] = ()) -> None:
        self.library = library
        self.watchdog = watchdog
        self.dt = dt
        self.person_sources = tuple(person_sources)
        self.active: SkillRunner | None = None
        self._lock = threading.Lock()
        self._switch: _Request | None = None
        self._params: list[tuple[str, int, float]] = []
        self._last_command = np.zeros(watchdog.config.n_joints)
        self._switch_failed = False
        #: seconds from each activation request to the tick that ran the new skill first
        self.switch_delays: list[float] = []

    # ------------------------------------------------------ other threads
    def request_activation(self, name: str, timeout: float | None = None,
                           params: Mapping[int, float] | None = None) -> tuple[bool, str]:
        """Ask for ``name`` to become active at the next tick; wait for the outcome.

        ``params`` (tunable index -> value of that skill) are applied in the same tick, just
        before the switch, so a new goal never reaches the skill that is still running.
        Without ``timeout`` it returns at once with (True, 'requested').
        """
        request = _Request(name, params)
        with self._lock:
            if self._switch is not None:
                self._switch.message = f'superseded by a request for {name!r}'
                self._switch.done.set()
            self._switch = request
        if timeout is None:
            return True, 'requested'
        if not request.done.wait(timeout):
            return False, f'no control tick within {timeout:.3f} s (is the controller running?)'
        return request.ok, request.message

    def set_parameters(self, skill: str, values: Mapping[int, float]) -> None:
        """Queue tunable values (already validated) for the next tick boundary, all at once."""
        with self._lock:
            self._params.extend((skill, index, value) for index, value in values.items())

    # -------------------------------------------------------------- tick
    def step(self, snap: Snapshot) -> LoopOutput:
        with self._lock:
            request, self._switch = self._switch, None
            params, self._params = self._params, []
        for skill, index, value in params:
            loaded = self.library.get(skill)
            if loaded is not None:
                loaded.runner.solver.set_param(index, value)
        activated = None
        events: list[str] = []
        if request is not None:
            activated = self._activate(request, snap)
        tick: TickResult | None = None
        runner = self.active
        command: np.ndarray | None = np.zeros_like(self._last_command)
        solver_ok, status = True, 'idle'
        input_stamps: dict[str, float] = {}
        input_timeouts: dict[str, float] = {}
        finite = True
        if runner is not None:
            spec = runner.skill.spec
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
        switch_ok = activated is not None and tick is not None and tick.ok
        if activated is not None:
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
        return LoopOutput(command=out.command, skill=runner.name if runner else None,
                          tick=tick, watchdog=out, events=events, activated=activated)

    def _activate(self, request: _Request, snap: Snapshot) -> str | None:
        loaded = self.library.get(request.name)
        if loaded is None:
            request.ok, request.message = False, f'no skill named {request.name!r} is loaded'
            request.done.set()
            return None
        if snap.q is None:
            request.ok, request.message = False, 'no joint positions yet; cannot start a skill'
            request.done.set()
            return None
        runner = loaded.runner
        for index, value in request.params.items():
            runner.solver.set_param(index, value)
        runner.activate(snap.q, self._last_command)
        self.active = runner
        delay = max(0.0, time.monotonic() - request.asked_at)
        self.switch_delays.append(delay)
        request.ok = True
        request.message = f'{request.name} active ({delay * 1000:.2f} ms after the request)'
        request.done.set()
        return request.name


__all__ = ['ControlLoop', 'InputSample', 'LoopOutput', 'Snapshot']
