"""Task plan files: the shipped plan loads as written; every mistake is located.

Outside references used by the checks (named again beside each one):
- PyYAML's ``yaml.safe_load`` as the reference reader of the shipped plan;
- the YAML 1.1 specification: unique mapping keys (section 3.2.1.1), syntax;
- IEEE 754: NaN and the infinities are not finite numbers (YAML writes them .nan, .inf);
- ROS 2 name rules ("Topic and Service name mapping to DDS" design article, from memory): a name
  token is letters, digits and underscores and does not start with a digit; a fully qualified
  node name starts with '/'. Skill and tunable names become parts of service and parameter
  names, so the plan keeps to these tokens.
Expected lines are counted by hand; a ``# <-`` comment marks the line meant.
"""
from __future__ import annotations

import copy
import math
import re
import textwrap
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from constraint_ctrl.errors import PlanError
from constraint_ctrl.plan.plan import Plan, Step, load_plan

SHIPPED = Path(__file__).resolve().parents[2] / 'config' / 'plans' / 'gearbox_assembly.yaml'
MARK = '# <-'
SHIPPED_DATA = yaml.safe_load(SHIPPED.read_text(encoding='utf-8'))


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / 'plan.yaml'
    path.write_text(textwrap.dedent(text), encoding='utf-8')
    return path


def marked_line(path: Path) -> int:
    hits = [i for i, line in enumerate(path.read_text(encoding='utf-8').splitlines(), 1)
            if MARK in line]
    assert len(hits) == 1, hits
    return hits[0]


# --- the shipped plan ---------------------------------------------------------------------------

def test_shipped_plan_has_the_expected_steps() -> None:
    plan = load_plan(SHIPPED)
    assert plan.name == 'gearbox_assembly'
    assert plan.controller == '/constraint_controller'
    assert plan.watchdog_wait == 60.0
    assert plan.source == str(SHIPPED)
    assert [(s.name, s.skill, s.done_when) for s in plan.steps] == [
        ('approach_shaft', 'move_to_point', 'arrived'),
        ('seat_gear', 'seat_gear', 'seated'),
        ('lift_off', 'move_to_point', 'arrived'),
        ('above_flange', 'move_to_point', 'arrived'),
        ('down_to_flange', 'move_to_point', 'arrived'),
        ('follow_flange', 'follow_flange', 'flange_done'),
        ('retreat', 'move_to_point', 'arrived'),
    ]
    # Defaults of the format: no jump, abort on timeout, no tunables for seat_gear.
    assert all(s.next is None and s.on_timeout == 'abort' for s in plan.steps)
    assert plan.steps[1].set == {}


def test_shipped_plan_matches_the_reference_reader() -> None:
    # Reference: yaml.safe_load of the same file; every value must come through unchanged.
    raw = yaml.safe_load(SHIPPED.read_text(encoding='utf-8'))
    plan = load_plan(SHIPPED)
    assert plan.description == raw['description']
    assert len(plan.steps) == len(raw['steps'])
    for step, expected in zip(plan.steps, raw['steps']):
        assert step.timeout == float(expected['timeout'])
        assert dict(step.set) == {k: float(v) for k, v in expected.get('set', {}).items()}
        assert all(type(v) is float for v in step.set.values())


def test_optional_fields_and_jumps(tmp_path: Path) -> None:
    path = write(tmp_path, """\
        plan: retry_demo
        steps:
          - name: first
            skill: reach
            done_when: arrived
            timeout: 2
            next: third
            on_timeout: second
          - {name: second, skill: reach, done_when: arrived, timeout: 1.5}
          - {name: third, skill: reach, done_when: arrived, timeout: 1, set: {gain: -2}}
        """)
    plan = load_plan(path)
    assert plan.controller == '/constraint_controller' and plan.watchdog_wait == 60.0
    assert plan.description == ''
    assert plan.steps[0] == Step(name='first', skill='reach', done_when='arrived', timeout=2.0,
                                 next='third', on_timeout='second')
    assert plan.steps[2].set == {'gain': -2.0}    # tunables may be negative or zero
    assert plan.index('third') == 2
    assert all(s.duration is None for s in plan.steps)


def test_duration_steps_and_the_hold(tmp_path: Path) -> None:
    """A step may end after a duration instead of an event (no done_when, no timeout), and
    may name the controller's built-in hold like a skill."""
    path = write(tmp_path, """\
        plan: dwell_demo
        steps:
          - {name: press, skill: reach, duration: 2.5, set: {goal_x: 0.4}}
          - name: settle    # <-
            skill: hold
            duration: 1
          - {name: lift, skill: reach, done_when: arrived, timeout: 4}
        """)
    plan = load_plan(path)
    press, settle, lift = plan.steps
    assert press == Step(name='press', skill='reach', done_when=None, timeout=None,
                         set={'goal_x': 0.4}, duration=2.5)
    assert (settle.skill, settle.duration, settle.done_when, settle.timeout) == \
        ('hold', 1.0, None, None)
    assert type(settle.duration) is float
    assert (lift.done_when, lift.timeout, lift.duration) == ('arrived', 4.0, None)
    assert [s.index for s in plan.steps] == [0, 1, 2]
    # a step's fields are located for errors found later (the check against the controller)
    error = plan.error('no such skill', 'steps[1].skill')
    assert (error.file, error.line, error.field) == (str(path), marked_line(path) + 1,
                                                     'steps[1].skill')
    # a field without a line of its own falls back to its step's line
    assert plan.error('x', 'steps[1].set.goal').line == marked_line(path)


# --- every error path is located ----------------------------------------------------------------

HEAD = 'plan: demo\nsteps:\n'
STEP = '  - name: a\n    skill: reach\n    done_when: arrived\n    timeout: 5\n'

# (text, field, message pattern); the expected line is the '# <-' line.
CASES: dict[str, tuple[str, str, str]] = {
    'unknown top key': (HEAD + STEP + 'stepz: 1   # <-\n', 'stepz',
                        r"unknown keys \['stepz'\]"),
    'unknown top key, block value': (HEAD + STEP + 'extra:   # <-\n  a: 1\n', 'extra',
                                     r"unknown keys \['extra'\]"),
    'unknown step key': (HEAD + STEP + '    timout: 5   # <-\n', 'steps[0].timout',
                         r"unknown keys \['timout'\]"),
    'missing plan': ('steps:   # <-\n' + STEP, 'plan', r"'plan' is required"),
    'missing steps': ('plan: demo   # <-\ncontroller: /c\n', 'steps', r"'steps' is required"),
    'missing done_when': (HEAD + '  - name: a   # <-\n    skill: reach\n    timeout: 5\n',
                          'steps[0]', r"'done_when' \(an event\) or 'duration' \(seconds\) is "
                          r"required"),
    'missing timeout': (HEAD + STEP + '  - {name: b, skill: s, done_when: e}   # <-\n',
                        'steps[1]', r"'timeout' is required with done_when"),
    'duration and done_when': (HEAD + STEP + '    duration: 2   # <-\n', 'steps[0].duration',
                               r'either on an event \(done_when\) or after a duration, not both'),
    'duration and timeout': (HEAD + '  - {name: a, skill: s, duration: 2, timeout: 3}   # <-\n',
                             'steps[0].timeout', r'a duration step ends by itself; timeout'),
    'duration and on_timeout': (HEAD + '  - name: a\n    skill: s\n    duration: 2\n'
                                '    on_timeout: a   # <-\n', 'steps[0].on_timeout',
                                r'a duration step ends by itself; on_timeout'),
    'duration zero': (HEAD + '  - name: a\n    skill: s\n    duration: 0   # <-\n',
                      'steps[0].duration', r'positive number, got 0'),
    'duration NaN': (HEAD + '  - name: a\n    skill: s\n    duration: .nan   # <-\n',
                     'steps[0].duration', r'positive number, got nan'),
    'duration text': (HEAD + '  - name: a\n    skill: s\n    duration: 2 s   # <-\n',
                      'steps[0].duration', r"positive number, got '2 s'"),
    'hold with tunables': (HEAD + '  - name: a\n    skill: hold\n    duration: 1\n'
                           '    set: {goal_x: 1.0}   # <-\n', 'steps[0].set',
                           r"'hold' is the controller's built-in hold: it has no tunables"),
    'timeout bool': (HEAD + STEP.replace('timeout: 5', 'timeout: true   # <-'),
                     'steps[0].timeout', r'positive number, got True'),
    'timeout NaN': (HEAD + STEP.replace('timeout: 5', 'timeout: .nan   # <-'),
                    'steps[0].timeout', r'positive number, got nan'),
    'timeout infinite': (HEAD + STEP.replace('timeout: 5', 'timeout: .inf   # <-'),
                         'steps[0].timeout', r'positive number, got inf'),
    'timeout negative': (HEAD + STEP.replace('timeout: 5', 'timeout: -3   # <-'),
                         'steps[0].timeout', r'positive number, got -3'),
    'timeout zero': (HEAD + STEP.replace('timeout: 5', 'timeout: 0   # <-'),
                     'steps[0].timeout', r'positive number, got 0'),
    'timeout text': (HEAD + STEP.replace('timeout: 5', 'timeout: 5 s   # <-'),
                     'steps[0].timeout', r"positive number, got '5 s'"),
    'timeout beyond float range': (HEAD + STEP.replace('timeout: 5', 'timeout: 1' + '0' * 400
                                                       + '   # <-'),
                                   'steps[0].timeout', r'positive number, got 10{400}'),
    'watchdog_wait negative': ('watchdog_wait: -1   # <-\n' + HEAD + STEP, 'watchdog_wait',
                               r'positive number, got -1'),
    'watchdog_wait NaN': ('watchdog_wait: .NaN   # <-\n' + HEAD + STEP, 'watchdog_wait',
                          r'positive number, got nan'),
    'set value text': (HEAD + STEP + '    set: {goal_x: high}   # <-\n',
                       'steps[0].set.goal_x', r"expected a number, got 'high'"),
    'set value bool': (HEAD + STEP + '    set:\n      goal_x: no   # <-\n',
                       'steps[0].set.goal_x', r'expected a number, got False'),
    'set value NaN': (HEAD + STEP + '    set: {goal_x: .nan}   # <-\n',
                      'steps[0].set.goal_x', r'expected a number, got nan'),
    'set not a mapping': (HEAD + STEP + '    set: [1, 2]   # <-\n', 'steps[0].set',
                          r'expected a mapping of tunable: value'),
    'set tunable name': (HEAD + STEP + '    set: {goal x: 1}   # <-\n',
                         'steps[0].set.goal x', r"name of letters, digits and _, got 'goal x'"),
    'step name starts with a digit': (HEAD + STEP.replace('name: a', 'name: 2nd   # <-'),
                                      'steps[0].name', r"got '2nd'"),
    'step name not text': (HEAD + STEP.replace('name: a', 'name: [a]   # <-'),
                           'steps[0].name', r"got \['a'\]"),
    'skill name with a dash': (HEAD + STEP.replace('skill: reach', 'skill: re-ach   # <-'),
                               'steps[0].skill', r"got 're-ach'"),
    'done_when empty': (HEAD + STEP.replace('done_when: arrived', "done_when: ''   # <-"),
                        'steps[0].done_when', r"got ''"),
    'plan name with a space': ('plan: gear box   # <-\nsteps:\n' + STEP, 'plan',
                               r"got 'gear box'"),
    'duplicate step name': (HEAD + STEP + STEP.replace('- name: a', '- name: a   # <-'),
                            'steps[1].name', r"step name 'a' is used twice"),
    'step named abort': (HEAD + STEP.replace('name: a', 'name: abort   # <-'),
                         'steps[0].name', r"'abort' is reserved"),
    'next names a missing step': (HEAD + STEP + '    next: nowhere   # <-\n',
                                  'steps[0].next', r"'nowhere' is not a step of this plan"),
    'on_timeout names a missing step': (HEAD + STEP + '    on_timeout: retry   # <-\n',
                                        'steps[0].on_timeout',
                                        r"'retry' is not a step of this plan \(a\)"),
    'controller relative': ('controller: constraint_controller   # <-\n' + HEAD + STEP,
                            'controller', r'absolute node name'),
    'controller not text': ('controller: 5   # <-\n' + HEAD + STEP, 'controller',
                            r'absolute node name .*got 5'),
    'steps empty': ('plan: demo\nsteps: []   # <-\n', 'steps', r'non-empty list of steps'),
    'steps a mapping': ('plan: demo\nsteps:   # <-\n  a: 1\n', 'steps',
                        r'non-empty list of steps'),
    'steps missing value': ('plan: demo\nsteps:   # <-\n', 'steps', r'non-empty list of steps'),
    'step not a mapping': (HEAD + STEP + '  - just_a_name   # <-\n', 'steps[1]',
                           r'a step is a mapping'),
    'duplicate top key': (HEAD + STEP + 'plan: again   # <-\n', 'plan',
                          r"duplicate key 'plan'"),
    'duplicate step key': (HEAD + STEP + '    skill: other   # <-\n', 'steps[0].skill',
                           r"duplicate key 'skill'"),
    'top level a list': ('- plan: demo   # <-\n', 'plan', r'a plan file is a mapping'),
    'top level text': ('just some words   # <-\n', 'plan', r'a plan file is a mapping'),
}


@pytest.mark.parametrize('case', sorted(CASES))
def test_mistakes_are_located(tmp_path: Path, case: str) -> None:
    text, field, pattern = CASES[case]
    path = write(tmp_path, text)
    with pytest.raises(PlanError, match=pattern) as info:
        load_plan(path)
    error = info.value
    assert (error.file, error.line, error.field) == (str(path), marked_line(path), field)
    assert str(error).startswith(f'{path}:{error.line}: {field}: ')


@pytest.mark.parametrize(('text', 'line'), [
    ('plan: demo\nsteps: [\n  {name: a}\n', 4),   # flow list still open at the end (line 4)
    ('plan: demo\n  steps: 1\n', 2),               # mapping value where none is allowed
    ('plan: "demo\n', 2),                          # quoted scalar runs to the end of the file
])
def test_yaml_syntax_errors_are_located(tmp_path: Path, text: str, line: int) -> None:
    # Lines checked against the problem mark of PyYAML's own error for the same text.
    path = write(tmp_path, text)
    with pytest.raises(yaml.MarkedYAMLError) as reference:
        yaml.safe_load(text)
    assert reference.value.problem_mark.line + 1 == line
    with pytest.raises(PlanError, match=r'not valid YAML') as info:
        load_plan(path)
    assert (info.value.file, info.value.line) == (str(path), line)


@pytest.mark.parametrize('content', ['', '# a plan will go here\n'])
def test_empty_file(tmp_path: Path, content: str) -> None:
    path = write(tmp_path, content)
    with pytest.raises(PlanError, match=r'the file is empty') as info:
        load_plan(path)
    assert (info.value.file, info.value.line) == (str(path), 1)


def test_unreadable_file(tmp_path: Path) -> None:
    path = tmp_path / 'missing.yaml'
    with pytest.raises(PlanError, match=r'cannot read the file') as info:
        load_plan(path)
    assert info.value.file == str(path)


# --- random mutations of the shipped plan -------------------------------------------------------

SCALARS = (st.none() | st.booleans() | st.integers() | st.integers(min_value=10 ** 300)
           | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=12)
           | st.sampled_from(['abort', 'approach_shaft', 'retreat', 'arrived', '/ctrl', '']))
VALUES = st.recursive(SCALARS, lambda inner: st.lists(inner, max_size=3)
                      | st.dictionaries(st.text(max_size=8), inner, max_size=3), max_leaves=6)
#: Each example writes one small file into tmp_path (reused across examples).
FUZZ = settings(max_examples=80, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
# Values the format accepts in many places, so that a fair share of mutants still load.
PLAUSIBLE = (st.floats(min_value=0.01, max_value=100.0) | st.integers(1, 100)
             | st.sampled_from(['approach_shaft', 'retreat', 'seat_gear', 'abort', 'arrived']))
KEYS = st.sampled_from(sorted({'plan', 'description', 'controller', 'watchdog_wait', 'steps',
                               'name', 'skill', 'set', 'done_when', 'next', 'timeout',
                               'on_timeout', 'duration', 'goal_x', 'bogus'}))


def containers(node: Any) -> list[Any]:
    """Every dict and list inside the plan, the top level first."""
    found = [node]
    children = node.values() if isinstance(node, dict) else node if isinstance(node, list) \
        else []
    for child in children:
        if isinstance(child, (dict, list)):
            found.extend(containers(child))
    return found


@st.composite
def mutated_plans(draw: st.DrawFn) -> dict[str, Any]:
    data = copy.deepcopy(SHIPPED_DATA)
    for _ in range(draw(st.integers(min_value=1, max_value=4))):
        target = draw(st.sampled_from(containers(data)))
        action = draw(st.sampled_from(['replace', 'delete', 'add', 'copy']))
        if isinstance(target, dict):
            if action == 'add' or not target:
                target[draw(KEYS)] = draw(PLAUSIBLE | VALUES)
            else:
                key = draw(st.sampled_from(sorted(target)))
                if action == 'delete':
                    del target[key]
                else:
                    target[key] = draw(PLAUSIBLE | VALUES)
        elif target:
            index = draw(st.integers(min_value=0, max_value=len(target) - 1))
            if action == 'delete':
                del target[index]
            elif action == 'copy':
                target.append(copy.deepcopy(target[index]))
            else:
                target[index] = draw(PLAUSIBLE | VALUES)
    return data


@FUZZ
@given(data=mutated_plans())
def test_mutated_plans_load_or_raise_plan_error(tmp_path: Path, data: dict[str, Any]) -> None:
    path = tmp_path / 'mutated.yaml'
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding='utf-8')
    try:
        plan = load_plan(path)
    except PlanError as error:
        assert error.file == str(path) and error.message
        event('refused')
        return
    event('loaded')
    # What loads keeps the format's promises (checked on the plain data, not on the loader).
    assert isinstance(plan, Plan) and plan.steps
    names = [s.name for s in plan.steps]
    assert len(set(names)) == len(names) and 'abort' not in names
    ros_token = re.compile(r'[A-Za-z_][A-Za-z0-9_]*')   # ROS 2 name token (from memory)
    for step in plan.steps:
        assert all(ros_token.fullmatch(n) for n in (step.name, step.skill))
        # exactly one way to end: an event with its timeout, or a duration
        assert (step.done_when is None) == (step.timeout is None) != (step.duration is None)
        assert step.done_when is None or ros_token.fullmatch(step.done_when)
        for value in (step.timeout, step.duration):
            assert value is None or (math.isfinite(value) and value > 0)
        assert all(math.isfinite(v) for v in step.set.values())
        assert step.next is None or step.next in names
        assert step.on_timeout == 'abort' or step.on_timeout in names
    assert plan.controller.startswith('/') and math.isfinite(plan.watchdog_wait)


@FUZZ
@given(cut=st.integers(min_value=0), length=st.integers(min_value=0, max_value=6),
       insert=st.text(alphabet=' \t\n:-[]{}&*!#|>"\'%@`,?0a\x07\x85\u2028', max_size=4))
def test_edited_plan_text_loads_or_raises_plan_error(tmp_path: Path, cut: int, length: int,
                                                     insert: str) -> None:
    # Character-level edits reach YAML syntax and reader errors that value mutations cannot.
    text = SHIPPED.read_text(encoding='utf-8')
    at = cut % (len(text) + 1)
    path = tmp_path / 'edited.yaml'
    path.write_text(text[:at] + insert + text[at + length:], encoding='utf-8')
    try:
        load_plan(path)
    except PlanError as error:
        assert error.file == str(path) and error.message


def test_readme_plan_example_loads(tmp_path: Path) -> None:
    """The plan example in README.md ("Sequencer and plans") is a valid plan as written."""
    readme = (Path(__file__).resolve().parents[2] / 'README.md').read_text(encoding='utf-8')
    blocks = [b for b in re.findall(r'```yaml\n(.*?)```', readme, flags=re.S)
              if b.startswith('plan:')]
    assert len(blocks) == 1, 'README.md should hold exactly one plan example'
    path = tmp_path / 'readme_plan.yaml'
    path.write_text(blocks[0], encoding='utf-8')
    plan = load_plan(path)
    assert [(s.name, s.skill, s.done_when, s.duration) for s in plan.steps] == [
        ('approach', 'move_to_point', 'arrived', None), ('press', 'seat_gear', None, 2.0),
        ('settle', 'hold', None, 0.5)]
