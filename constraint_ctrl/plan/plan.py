"""Task plans for the sequencer: which skill to run, with which tunables, until which event or
for how long.

Our own YAML format::

    plan: gearbox_assembly                # identifier
    controller: /constraint_controller    # the controller node the plan talks to
    watchdog_wait: 60                     # s a step may stay stopped by the watchdog before
                                          # the plan aborts (its timeout is paused meanwhile)
    steps:
      - name: approach                    # identifier, unique
        skill: move_to_point              # activated through ~/skills/<skill>/activate
        set: {goal_x: 0.50, goal_z: 0.26} # tunables set (SetParameters) before activation
        done_when: arrived                # event on ~/events that ends the step
        next: seat                        # optional: the step after (default: the next one)
        timeout: 15                       # s of motion; then on_timeout happens
        on_timeout: abort                 # abort (default) or the name of a step (so no step
                                          # may be named abort)
      - name: settle
        skill: hold                       # the controller's built-in hold (no tunables)
        duration: 0.5                     # instead of done_when: the step is done after this
                                          # many s of motion (no timeout, no on_timeout)

A step ends either on an event (``done_when``, with ``timeout`` required) or after
``duration`` seconds, never both. Time the watchdog holds the arm stopped counts towards
neither (the skill's own clock stops too). Whatever the outcome (done, aborted, timed out,
interrupted), the sequencer ends a plan by putting the controller in hold, and before the first
step it checks that the controller offers every skill and tunable the plan names
(plan/offer.py).

The sequencer only uses the controller's ROS interface (Trigger services, parameters, events),
so it stands in for whatever sequencer a user already has.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from collections.abc import Mapping

from ..errors import PlanError
from ..located_yaml import load_located

IDENTIFIER = re.compile(r'^[A-Za-z_][A-Za-z0-9_]*$')
TOP_KEYS = {'plan', 'description', 'controller', 'watchdog_wait', 'steps'}
STEP_KEYS = {'name', 'skill', 'set', 'done_when', 'duration', 'next', 'timeout', 'on_timeout'}
#: The controller's built-in hold: a step may name it like a skill (without tunables).
HOLD = 'hold'


@dataclass(frozen=True, slots=True)
class Step:
    name: str
    skill: str
    done_when: str | None            # None: a duration step
    timeout: float | None            # None exactly when done_when is None
    set: Mapping[str, float] = field(default_factory=dict)
    next: str | None = None          # None: the following step, or the end
    on_timeout: str = 'abort'        # 'abort' or a step name
    duration: float | None = None    # s of motion after which the step is done
    index: int | None = field(default=None, compare=False)   # position in the plan file


@dataclass(frozen=True, slots=True)
class Plan:
    name: str
    controller: str
    steps: tuple[Step, ...]
    watchdog_wait: float = 60.0
    description: str = ''
    source: str = '<string>'
    lines: Mapping[str, int] = field(default_factory=dict, compare=False, repr=False)

    def index(self, name: str) -> int:
        return [s.name for s in self.steps].index(name)

    def error(self, message: str, field_path: str) -> PlanError:
        """A PlanError located at ``field_path`` (e.g. ``steps[2].skill``) of the plan file:
        its own line, or the line of the nearest enclosing field."""
        probe = field_path
        while probe and probe not in self.lines:
            probe = probe.rsplit('.', 1)[0] if '.' in probe else ''
        return PlanError(message, file=self.source, line=self.lines.get(probe),
                         field=field_path)


def load_plan(path: str | Path) -> Plan:
    path = Path(path)
    data, lines = load_located(path, PlanError)
    source = str(path)

    def fail(message: str, field_path: str) -> PlanError:
        probe = field_path
        while probe and probe not in lines:
            probe = probe.rsplit('.', 1)[0] if '.' in probe else ''
        return PlanError(message, file=source, line=lines.get(probe), field=field_path)

    def finite(value: int | float) -> bool:
        try:
            return math.isfinite(value)
        except OverflowError:  # an int beyond the float range
            return False

    def number(value: Any, where: str, *, positive: bool = True) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or \
                not finite(value) or (positive and value <= 0):
            raise fail(f'expected a {"positive " if positive else ""}number, got {value!r}',
                       where)
        return float(value)

    def name(value: Any, where: str) -> str:
        if not isinstance(value, str) or not IDENTIFIER.match(value):
            raise fail(f'expected a name of letters, digits and _, got {value!r}', where)
        return value

    if not isinstance(data, dict):
        raise fail('a plan file is a mapping with plan, controller and steps', 'plan')
    unknown = sorted(set(data) - TOP_KEYS)
    if unknown:
        raise fail(f'unknown keys {unknown}; expected some of {sorted(TOP_KEYS)}', unknown[0])
    for key in ('plan', 'steps'):
        if key not in data:
            raise fail(f'{key!r} is required', key)
    controller = data.get('controller', '/constraint_controller')
    if not isinstance(controller, str) or not controller.startswith('/'):
        raise fail(f'expected an absolute node name like /constraint_controller, got '
                   f'{controller!r}', 'controller')
    raw_steps = data['steps']
    if not isinstance(raw_steps, list) or not raw_steps:
        raise fail('expected a non-empty list of steps', 'steps')
    steps = []
    for i, raw in enumerate(raw_steps):
        where = f'steps[{i}]'
        if not isinstance(raw, dict):
            raise fail('a step is a mapping with name, skill and either done_when and timeout '
                       'or duration', where)
        unknown = sorted(set(raw) - STEP_KEYS)
        if unknown:
            raise fail(f'unknown keys {unknown}; expected some of {sorted(STEP_KEYS)}',
                       f'{where}.{unknown[0]}')
        for key in ('name', 'skill'):
            if key not in raw:
                raise fail(f'{key!r} is required', where)
        if 'duration' in raw:
            if 'done_when' in raw:
                raise fail('a step ends either on an event (done_when) or after a duration, '
                           'not both', f'{where}.duration')
            for key in ('timeout', 'on_timeout'):
                if key in raw:
                    raise fail(f'a duration step ends by itself; {key} belongs to steps that '
                               'wait for an event (done_when)', f'{where}.{key}')
        else:
            if 'done_when' not in raw:
                raise fail("'done_when' (an event) or 'duration' (seconds) is required", where)
            if 'timeout' not in raw:
                raise fail("'timeout' is required with done_when", where)
        settings = raw.get('set', {})
        if not isinstance(settings, dict):
            raise fail('expected a mapping of tunable: value', f'{where}.set')
        values = {name(k, f'{where}.set.{k}'): number(v, f'{where}.set.{k}', positive=False)
                  for k, v in settings.items()}
        skill = name(raw['skill'], f'{where}.skill')
        if skill == HOLD and values:
            raise fail(f'{HOLD!r} is the controller\'s built-in hold: it has no tunables',
                       f'{where}.set')
        timed = 'duration' in raw
        steps.append(Step(
            name=name(raw['name'], f'{where}.name'), skill=skill,
            done_when=None if timed else name(raw['done_when'], f'{where}.done_when'),
            timeout=None if timed else number(raw['timeout'], f'{where}.timeout'), set=values,
            next=name(raw['next'], f'{where}.next') if raw.get('next') is not None else None,
            on_timeout=name(raw.get('on_timeout', 'abort'), f'{where}.on_timeout'),
            duration=number(raw['duration'], f'{where}.duration') if timed else None,
            index=i))
    names = [s.name for s in steps]
    for i, step in enumerate(steps):
        if step.name == 'abort':  # on_timeout: abort could not reach it
            raise fail("'abort' is reserved for on_timeout; name the step differently",
                       f'steps[{i}].name')
        if step.name in names[:i]:  # located at the second use, like a duplicate YAML key
            raise fail(f'step name {step.name!r} is used twice', f'steps[{i}].name')
        for key, target in (('next', step.next), ('on_timeout', step.on_timeout)):
            if target is not None and target != 'abort' and target not in names:
                raise fail(f'{target!r} is not a step of this plan ({", ".join(names)})',
                           f'steps[{i}].{key}')
    return Plan(name=name(data['plan'], 'plan'), controller=controller, steps=tuple(steps),
                watchdog_wait=number(data.get('watchdog_wait', 60.0), 'watchdog_wait'),
                description=str(data.get('description', '')), source=source, lines=lines)


__all__ = ['HOLD', 'Plan', 'Step', 'load_plan']
