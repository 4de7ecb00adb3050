"""Skill file loader: a full example loads into the expected spec; each mistake is located.

Outside references used by the checks (named again beside each one):
- YAML 1.1 / 1.2 specifications for what the YAML text means (keys, aliases, merge keys, tags);
- PyYAML itself (``yaml.safe_load``) as the reference reader of the test texts;
- the Python Language Reference, "Identifiers and keywords", and ``keyword.kwlist``;
- textbook control facts for why gains, frequencies and damping ratios must be > 0.
"""
from __future__ import annotations

import dataclasses
import keyword
import math
import re
import textwrap
from pathlib import Path

import pytest
import yaml

from constraint_ctrl.errors import FormulaError, SkillError
from constraint_ctrl.skill import (
    BehaviourSpec,
    ConstraintSpec,
    EventSpec,
    UnknownSpec,
    InputSpec,
    LimitsSpec,
    OfflineSpec,
    RegularisationSpec,
    SkillSpec,
    TunableSpec,
    load_skill,
    load_skill_text,
)
from constraint_ctrl.skill import loader
from constraint_ctrl.skill.formula import FUNCTIONS

SOURCE = 'skills/test_skill.yaml'
MARK = '# <-'

FULL = """\
skill: follow_flange
description: Keep the tool at a stand-off above the flange.
robot: ../robots/arm.urdf
base_link: base_link
inputs:
  range_left: {unit: m, rate_hz: 100, timeout: 0.05}
  range_right:
    unit: m
    rate_hz: 10
unknowns:
  gear_turn: {start: 0.1, lower: -0.6, upper: 0.6, max_speed: 0.5, unit: rad}
tunables:
  standoff: {value: 0.008, lower: 0.003, upper: 0.02, unit: m, description: sensor gap}
  follow_gain: {value: 8.0, lower: 1.0, upper: 20.0}
formulas:
  tool_tip_height: position(tool_tip)[2]
  mean_range: (range_left + range_right) / 2
constraints:
  - name: keep_standoff
    function: distance_to_plane(position(tool_tip), plane(vector(0, 0, 0), vector(0, 0, 1)))
    kind: equal
    target: standoff
    behaviour: {order: 1, gain: follow_gain}
    hard: false
    weight: 100.0
    priority: 1
  - name: turn_in_range
    function: gear_turn
    kind: within
    lower: -0.5
    upper: 0.5
    behaviour: {order: 2, natural_frequency: 6.0, damping_ratio: 0.8}
    hard: true
    weight: 2
    priority: 2
  - name: stay_low
    function: tool_tip_height
    kind: at_most
    upper: mean_range + 0.5
events:
  - name: seated
    condition: mean_range < standoff + 0.001
    hold_for: 0.2
limits:
  joint_speed: 1.0
  joint_speeds: {joint_6: 2.0}
  joint_acceleration: 8.0
  position_gain: 4.0
regularisation:
  damping: 0.02
  joint_weights: {joint_1: 2.0}
  unknown_weight: 0.5
offline:
  start: {joint_2: -0.5, joint_3: 1.0}
  inputs: {range_left: 0.008}
  scene: ../scenes/cell.yaml
"""

HEADER = 'skill: s\nrobot: arm.urdf\n'


BACK_ENDS = {'pure': yaml.SafeLoader, 'libyaml': getattr(yaml, 'CSafeLoader', None)}


@pytest.fixture(autouse=True, params=list(BACK_ENDS))
def yaml_back_end(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> None:
    """Run every test with PyYAML's pure parser and with libyaml: results must not differ."""
    if BACK_ENDS[request.param] is None:
        pytest.skip('PyYAML was built without libyaml')
    monkeypatch.setattr(loader, '_YAML_LOADER', BACK_ENDS[request.param])


@pytest.fixture
def base(tmp_path: Path) -> Path:
    """A folder with the files the skill texts refer to (robot, scene); returns the skill folder."""
    (tmp_path / 'robots').mkdir()
    (tmp_path / 'robots' / 'arm.urdf').write_text('<robot name="arm"/>\n')
    (tmp_path / 'scenes').mkdir()
    (tmp_path / 'scenes' / 'cell.yaml').write_text('{}\n')
    skills = tmp_path / 'skills'
    skills.mkdir()
    (skills / 'arm.urdf').write_text('<robot name="arm"/>\n')
    return skills


def load(text: str, base: Path) -> SkillSpec:
    return load_skill_text(text, source=SOURCE, base_dir=base)


def marked_line(text: str) -> int:
    """1-based line of the one line carrying the marker comment (the offending field)."""
    lines = [number for number, line in enumerate(text.splitlines(), 1) if MARK in line]
    assert len(lines) == 1, text
    return lines[0]


def expect_error(text: str, base: Path, field: str, match: str,
                 error: type[SkillError] = SkillError) -> SkillError:
    with pytest.raises(error, match=match) as caught:
        load(text, base)
    assert caught.value.file == SOURCE
    assert caught.value.line == marked_line(text)
    assert caught.value.field == field
    return caught.value


# -- a valid file ----------------------------------------------------------------------------------

def test_full_example_loads_into_the_expected_dataclasses(base: Path) -> None:
    """Every field of the example lands in its dataclass; values read off the YAML text above."""
    spec = load(FULL, base)
    expected = SkillSpec(
        name='follow_flange',
        robot=(base.parent / 'robots' / 'arm.urdf').resolve(),
        source=SOURCE,
        description='Keep the tool at a stand-off above the flange.',
        base_link='base_link',
        inputs=(InputSpec('range_left', 'm', 100.0, 0.05),
                # timeout absent: max(0.1, 3 / 10 Hz) = 0.3 s (the rule in our brief)
                InputSpec('range_right', 'm', 10.0, 0.3)),
        unknowns=(UnknownSpec('gear_turn', 0.1, -0.6, 0.6, 0.5, 'rad'),),
        tunables=(TunableSpec('standoff', 0.008, 0.003, 0.02, 'm', 'sensor gap'),
                  TunableSpec('follow_gain', 8.0, 1.0, 20.0)),
        formulas=(('tool_tip_height', 'position(tool_tip)[2]'),
                     ('mean_range', '(range_left + range_right) / 2')),
        constraints=(
            ConstraintSpec('keep_standoff', 'distance_to_plane(position(tool_tip), '
                           'plane(vector(0, 0, 0), vector(0, 0, 1)))', 'equal',
                           target='standoff', behaviour=BehaviourSpec(1, gain='follow_gain'),
                           hard=False, weight=100.0, priority=1),
            ConstraintSpec('turn_in_range', 'gear_turn', 'within', lower=-0.5, upper=0.5,
                           behaviour=BehaviourSpec(2, natural_frequency=6.0, damping_ratio=0.8),
                           hard=True, weight=2.0, priority=2),
            ConstraintSpec('stay_low', 'tool_tip_height', 'at_most', upper='mean_range + 0.5'),
        ),
        events=(EventSpec('seated', 'mean_range < standoff + 0.001', 0.2),),
        limits=LimitsSpec(1.0, {'joint_6': 2.0}, 8.0, 4.0),
        regularisation=RegularisationSpec(0.02, {'joint_1': 2.0}, 0.5),
        offline=OfflineSpec({'joint_2': -0.5, 'joint_3': 1.0}, {'range_left': 0.008},
                            (base.parent / 'scenes' / 'cell.yaml').resolve()),
    )
    assert dataclasses.replace(spec, locations={}) == expected
    # Numbers written as YAML ints (rate_hz: 100, weight: 2) come back as float, as typed.
    assert isinstance(spec.inputs[0].rate_hz, float)
    assert isinstance(spec.constraints[1].weight, float)


def test_docstring_example_loads(tmp_path: Path) -> None:
    """The format documented in the loader's docstring is itself a valid skill."""
    block = loader.__doc__.split('::\n\n', 1)[1].split('\n\n', 1)[0]
    text = textwrap.dedent(block)
    (tmp_path / 'robots').mkdir()
    (tmp_path / 'robots' / 'six_axis_arm.urdf').write_text('<robot name="arm"/>\n')
    (tmp_path / 'scenes').mkdir()
    (tmp_path / 'scenes' / 'cell.yaml').write_text('{}\n')
    (tmp_path / 'skills').mkdir()
    spec = load_skill_text(text, base_dir=tmp_path / 'skills')
    # Cross-check against PyYAML's own reading of the same text (reference reader).
    plain = yaml.safe_load(text)
    assert spec.name == plain['skill']
    assert [c.name for c in spec.constraints] == [c['name'] for c in plain['constraints']]
    assert [t.name for t in spec.tunables] == list(plain['tunables'])


def test_defaults_follow_the_schema(base: Path) -> None:
    """Absent optional fields take schema.py's defaults; input timeout follows max(0.1, 3/rate)."""
    text = HEADER + textwrap.dedent("""\
        inputs:
          fast: {rate_hz: 100}
          slow: {}
        constraints:
          - name: c
            function: fast
            target: 0.0
        """)
    spec = load(text, base)
    assert spec.description == '' and spec.base_link is None
    # 3 / 100 Hz = 0.03 s < 0.1 s floor; default rate 50 Hz -> 0.06 s < 0.1 s (brief's rule).
    assert [i.timeout for i in spec.inputs] == [0.1, 0.1]
    assert spec.inputs[1].rate_hz == 50.0
    assert spec.constraints[0] == ConstraintSpec('c', 'fast', 'equal', target=0.0)
    assert spec.limits == LimitsSpec() and spec.regularisation == RegularisationSpec()
    assert spec.offline == OfflineSpec()


def test_load_skill_resolves_robot_against_the_file_folder(base: Path,
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    """robot: is relative to the skill file, not to the working directory."""
    path = base / 'full.yaml'
    path.write_text(FULL)
    monkeypatch.chdir(base.parent.parent)
    spec = load_skill(path)
    assert spec.source == str(path)
    assert spec.robot == (base.parent / 'robots' / 'arm.urdf').resolve()


def test_anchors_aliases_and_merge_keys_are_accepted(base: Path) -> None:
    """YAML 1.1 anchors/aliases and the << merge key (yaml.org/type/merge.html, from memory)."""
    text = HEADER + textwrap.dedent("""\
        inputs:
          left: &sensor {unit: m, rate_hz: 20}
          right: *sensor
          front:
            <<: *sensor
            rate_hz: 40
        """)
    spec = load(text, base)
    # PyYAML's SafeLoader applies the same merge semantics; use it as the reference.
    reference = yaml.safe_load(text)['inputs']
    assert [(i.name, i.unit, i.rate_hz) for i in spec.inputs] == [
        (name, value['unit'], float(value['rate_hz'])) for name, value in reference.items()]


def test_yaml_11_booleans_are_booleans(base: Path) -> None:
    """YAML 1.1 bool type (yaml.org/type/bool.html, from memory): on is true, as in PyYAML."""
    text = HEADER + 'constraints:\n  - {name: c, function: x, target: 0, hard: on}\n'
    assert load(text, base).constraints[0].hard is yaml.safe_load('on')


def test_locations_cover_every_constraint_field(base: Path) -> None:
    """Each constraint key of the example (as PyYAML reads it) has the line it is written on."""
    spec = load(FULL, base)
    lines = FULL.splitlines()
    search_from = 0
    for index, item in enumerate(yaml.safe_load(FULL)['constraints']):
        assert f'constraints[{index}]' in spec.locations
        for key, value in item.items():
            path = f'constraints[{index}].{key}'
            line = spec.locations[path]
            assert re.match(rf'\s*(- )?{key}:', lines[line - 1]), (path, lines[line - 1])
            assert line > search_from
            if isinstance(value, dict):
                for inner in value:
                    assert spec.locations[f'{path}.{inner}'] == line  # flow mapping, same line
        search_from = spec.locations[f'constraints[{index}]']
    behaviour_line = lines.index('    behaviour: {order: 1, gain: follow_gain}') + 1
    assert spec.line_of('constraints[0].behaviour.gain') == behaviour_line
    # A default that is not written falls back to its parent's line (SkillSpec.line_of).
    assert spec.line_of('constraints[0].behaviour.damping_ratio') == behaviour_line


# -- errors ----------------------------------------------------------------------------------------

def case(body: str, field: str, match: str, error: type[SkillError] = SkillError,
         header: str = HEADER) -> tuple[str, str, str, type[SkillError]]:
    return header + textwrap.dedent(body), field, match, error


CASES = {
    # Mapping keys are unique (YAML 1.2.2 spec, 3.2.1.1 "Nodes", from memory); PyYAML keeps
    # the last one silently, so the loader must catch it.
    'duplicate_key': case("""\
        inputs:
          a: {rate_hz: 10}
          a: {rate_hz: 20}  # <-
        """, 'inputs.a', r"duplicate key 'a' \(first at line 4\)"),
    'duplicate_key_in_flow': case("""\
        inputs:
          a: {rate_hz: 10, rate_hz: 20}  # <-
        """, 'inputs.a.rate_hz', "duplicate key 'rate_hz'"),
    'duplicate_top_key': case("""\
        skill: again  # <-
        """, 'skill', "duplicate key 'skill' \\(first at line 1\\)"),
    'yaml_syntax': case("""\
        description: a: b  # <-
        """, loader.DOCUMENT, 'not valid YAML: mapping values are not allowed'),
    'unknown_top_key': case("""\
        constraint: []  # <-
        """, 'constraint', "unknown key 'constraint' at the top level; did you mean "
                           "'constraints'"),
    'unknown_input_key': case("""\
        inputs:
          a: {rate: 10}  # <-
        """, 'inputs.a.rate', "unknown key 'rate' in inputs.a; did you mean 'rate_hz'"),
    # A missing key is reported where the mapping that lacks it starts.
    # (robot: is optional since issue 9.3: the skill then drives the controller's model)
    'missing_skill': case("""\
        description: no name  # <-
        """, 'skill', "missing required key 'skill'", header=''),
    'missing_constraint_name': case("""\
        constraints:
          - function: x  # <-
            target: 0
        """, 'constraints[0].name', "missing required key 'name'"),
    'missing_tunable_value': case("""\
        tunables:
          k: {lower: 0}  # <-
        """, 'tunables.k.value', "missing required key 'value'"),
    # A YAML 1.1 boolean (yaml.org/type/bool.html, from memory) is not accepted as a number.
    'bool_as_number': case("""\
        inputs:
          a: {rate_hz: true}  # <-
        """, 'inputs.a.rate_hz', "expected a number, got the boolean 'true'"),
    'bool_as_weight': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            weight: yes  # <-
        """, 'constraints[0].weight', "expected a number > 0 or the name of a tunable, got "
                                       "the boolean 'yes'"),
    'quoted_number': case("""\
        regularisation:
          damping: '0.01'  # <-
        """, 'regularisation.damping', "expected a number, got the text '0.01'"),
    'text_as_bool': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            hard: 1  # <-
        """, 'constraints[0].hard', "expected true or false, got the number '1'"),
    'float_priority': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            priority: 1.5  # <-
        """, 'constraints[0].priority', "expected a whole number, got the number '1.5'"),
    'list_for_mapping': case("""\
        inputs: [a, b]  # <-
        """, 'inputs', r"expected a mapping, got a list '\[a, b\]'"),
    'mapping_for_list': case("""\
        constraints: {name: c}  # <-
        """, 'constraints', 'expected a list'),
    'null_section': case("""\
        events:  # <-
        """, 'events', r'expected a list .*, got nothing \(null\)'),
    # NaN is unordered (IEEE 754), so no range check could catch it later: refuse it at load.
    'nan_rate': case("""\
        inputs:
          a: {rate_hz: .nan}  # <-
        """, 'inputs.a.rate_hz', 'expected a finite number, got nan'),
    'inf_target': case("""\
        constraints:
          - name: c
            function: x
            target: .inf  # <-
        """, 'constraints[0].target', 'expected a finite number, got inf'),
    'huge_int': case(f"""\
        tunables:
          k: {{value: 1{'0' * 400}}}  # <-
        """, 'tunables.k.value', "expected a finite number, got '1000.*', too large"),
    'nan_unknown_bound': case("""\
        unknowns:
          f: {lower: .nan}  # <-
        """, 'unknowns.f.lower', 'expected a finite number, got nan'),
    'unknown_lower_above_upper': case("""\
        unknowns:
          f:
            lower: 0.5  # <-
            upper: 0.1
        """, 'unknowns.f.lower', r'expected lower <= upper, got lower=0.5 > upper=0.1'),
    'unknown_default_start_outside': case("""\
        unknowns:
          f: {lower: 0.2, upper: 0.5}  # <-
        """, 'unknowns.f.start',
        r'expected start within \[0.2, 0.5\], got 0.0 \(the default'),
    'tunable_value_outside': case("""\
        tunables:
          k:
            value: 3.0  # <-
            upper: 2.0
        """, 'tunables.k.value', r'expected value within \[-inf, 2.0\], got 3.0'),
    'within_lower_above_upper': case("""\
        constraints:
          - name: c
            function: x
            kind: within
            lower: 2  # <-
            upper: 1
        """, 'constraints[0].lower', 'expected lower <= upper, got lower=2.0 > upper=1.0'),
    'rate_zero': case("""\
        inputs:
          a: {rate_hz: 0}  # <-
        """, 'inputs.a.rate_hz', 'expected a number > 0, got 0.0'),
    'timeout_negative': case("""\
        inputs:
          a: {timeout: -0.1}  # <-
        """, 'inputs.a.timeout', 'expected a number > 0, got -0.1'),
    'hold_for_negative': case("""\
        events:
          - name: e
            condition: x > 0
            hold_for: -1  # <-
        """, 'events[0].hold_for', r'expected a number >= 0 \(seconds\), got -1.0'),
    'weight_zero': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            weight: 0  # <-
        """, 'constraints[0].weight', 'expected a number > 0, got 0.0'),
    # de/dt = -K e decays only for K > 0 (solution e0 exp(-K t), any ODE textbook).
    'gain_negative': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            behaviour: {gain: -2}  # <-
        """, 'constraints[0].behaviour.gain', 'expected a number > 0, got -2.0'),
    # A second-order response is stable and damped only for wn > 0 and zeta > 0 (Ogata, Modern
    # Control Engineering, ch. 5, from memory).
    'damping_ratio_zero': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            behaviour:
              order: 2
              damping_ratio: 0  # <-
        """, 'constraints[0].behaviour.damping_ratio', 'expected a number > 0, got 0.0'),
    'natural_frequency_negative': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            behaviour: {order: 2, natural_frequency: -6}  # <-
        """, 'constraints[0].behaviour.natural_frequency', 'expected a number > 0, got -6.0'),
    'priority_zero': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            priority: 0  # <-
        """, 'constraints[0].priority', r'expected a whole number >= 1 .*, got 0'),
    # quadprog needs a positive definite Hessian (quadprog.solve_qp docstring, "G must be
    # positive definite", from memory); damping**2 * W is that guarantee.
    'damping_zero': case("""\
        regularisation:
          damping: 0  # <-
        """, 'regularisation.damping', 'expected a number > 0, got 0.0'),
    'joint_speed_negative': case("""\
        limits:
          joint_speeds:
            joint_3: -1.0  # <-
        """, 'limits.joint_speeds.joint_3', 'expected a number > 0, got -1.0'),
    'joint_weight_zero': case("""\
        regularisation:
          joint_weights: {joint_1: 0}  # <-
        """, 'regularisation.joint_weights.joint_1', 'expected a number > 0, got 0.0'),
    # Identifiers: Python Language Reference 2.3 (ASCII subset, from memory); keyword.kwlist.
    'skill_name_not_identifier': case("""\
        skill: follow-flange  # <-
        """, 'skill', "expected a name .*, got 'follow-flange'", header='robot: arm.urdf\n'),
    'input_name_starts_with_digit': case("""\
        inputs:
          2nd_range: {}  # <-
        """, 'inputs.2nd_range', "got '2nd_range'"),
    'constraint_name_keyword': case("""\
        constraints:
          - name: lambda  # <-
            function: x
            target: 0
        """, 'constraints[0].name', "not a Python keyword, got 'lambda'"),
    'name_used_twice_across_sections': case("""\
        inputs:
          gap: {}
        tunables:
          gap: {value: 1}  # <-
        """, 'tunables.gap', r"the name 'gap' is already used by inputs.gap \(line 4\)"),
    'duplicate_constraint_name': case("""\
        constraints:
          - {name: c, function: x, target: 0}
          - {name: c, function: y, target: 0}  # <-
        """, 'constraints[1].name', r"the name 'c' is already used by constraints\[0\]"),
    'duplicate_event_name': case("""\
        events:
          - name: e
            condition: x > 0
          - name: e  # <-
            condition: x < 0
        """, 'events[1].name', r"the name 'e' is already used by events\[0\] \(line 4\)"),
    'reserved_time': case("""\
        inputs:
          time: {}  # <-
        """, 'inputs.time', "the name 'time' is reserved"),
    'reserved_pi': case("""\
        tunables:
          pi: {value: 3}  # <-
        """, 'tunables.pi', "the name 'pi' is reserved"),
    'reserved_function_name': case("""\
        formulas:
          norm: x + 1  # <-
        """, 'formulas.norm', "the name 'norm' is reserved"),
    'unknown_kind': case("""\
        constraints:
          - name: c
            function: x
            kind: equals  # <-
        """, 'constraints[0].kind', "got 'equals'; did you mean 'equal'"),
    'equal_without_target': case("""\
        constraints:
          - name: c  # <-
            function: x
        """, 'constraints[0].target', "kind 'equal' needs 'target'"),
    'equal_with_lower': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            lower: 1  # <-
        """, 'constraints[0].lower', "kind 'equal' takes target, not 'lower'"),
    'at_most_with_lower': case("""\
        constraints:
          - name: c
            function: x
            kind: at_most
            lower: 1  # <-
            upper: 2
        """, 'constraints[0].lower', "kind 'at_most' takes upper, not 'lower'"),
    'at_least_without_lower': case("""\
        constraints:
          - name: c
            function: x
            kind: at_least  # <-
        """, 'constraints[0].lower', "kind 'at_least' needs 'lower'"),
    'within_without_upper': case("""\
        constraints:
          - name: c
            function: x
            kind: within  # <-
            lower: 0
        """, 'constraints[0].upper', "kind 'within' needs 'upper'"),
    'order_1_with_frequency': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            behaviour:
              natural_frequency: 3  # <-
        """, 'constraints[0].behaviour.natural_frequency',
        "order 1 takes only gain, not 'natural_frequency'"),
    'order_2_with_gain': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            behaviour: {order: 2, gain: 3}  # <-
        """, 'constraints[0].behaviour.gain',
        "order 2 takes only natural_frequency and damping_ratio, not 'gain'"),
    'order_3': case("""\
        constraints:
          - name: c
            function: x
            target: 0
            behaviour: {order: 3}  # <-
        """, 'constraints[0].behaviour.order', 'expected order 1 or 2, got 3'),
    'unknown_tunable': case("""\
        tunables:
          stiff_gain: {value: 4, lower: 1}
        constraints:
          - name: c
            function: x
            target: 0
            behaviour: {gain: stif_gain}  # <-
        """, 'constraints[0].behaviour.gain', "got 'stif_gain'; did you mean 'stiff_gain'"),
    'tunable_may_reach_zero': case("""\
        tunables:
          k: {value: 4}
        constraints:
          - name: c
            function: x
            target: 0
            weight: k  # <-
        """, 'constraints[0].weight', "tunable 'k' .* lower bound is -inf"),
    'robot_not_found': case("""\
        robot: ../robots/missing.urdf  # <-
        """, 'robot', "robot file '../robots/missing.urdf' not found", header='skill: s\n'),
    'robot_is_a_folder': case("""\
        robot: ..  # <-
        """, 'robot', "robot file '..' not found", header='skill: s\n'),
    'robot_null_byte': case("""\
        robot: "arm\\0.urdf"  # <-
        """, 'robot', 'cannot use the robot path', header='skill: s\n'),
    'scene_not_found': case("""\
        offline:
          scene: nowhere.yaml  # <-
        """, 'offline.scene', "scene file 'nowhere.yaml' not found"),
    'offline_undeclared_input': case("""\
        inputs:
          range_left: {}
        offline:
          inputs: {range_lft: 0.1}  # <-
        """, 'offline.inputs.range_lft', "'range_lft' is not a declared input; did you mean "
                                         "'range_left'"),
    # Only the YAML core types are constructed (PyYAML docs, from memory: safe_load "recognizes only
    # standard YAML tags"); python/* tags must never reach a constructor.
    'python_tag': case("""\
        description: !!python/object/apply:os.system ['true']  # <-
        """, 'description', "unsupported YAML tag 'tag:yaml.org,2002:python/object/apply"),
    'python_tag_on_key': case("""\
        !!python/name:os.system : 1  # <-
        """, loader.DOCUMENT, 'unsupported YAML tag'),
    'date_as_text': case("""\
        description: 2024-05-01  # <-
        """, 'description', "unsupported YAML tag 'tag:yaml.org,2002:timestamp'.*quote"),
    'formula_not_in_language': case("""\
        constraints:
          - name: c
            function: __import__('os').system('true')  # <-
            target: 0
        """, 'constraints[0].function', 'only the functions of the formula language can be '
                                           'called', FormulaError),
    'condition_with_equality': case("""\
        events:
          - name: e
            condition: x == 1  # <-
        """, 'events[0].condition', "comparison '==' is not allowed", FormulaError),
    'target_formula_incomplete': case("""\
        constraints:
          - name: c
            function: x
            target: 1 +  # <-
        """, 'constraints[0].target', 'not a valid formula', FormulaError),
    'formula_empty': case("""\
        formulas:
          e: ''  # <-
        """, 'formulas.e', "expected a formula, got ''"),
    'formula_unknown_function': case("""\
        formulas:
          e: sine(x)  # <-
        """, 'formulas.e', "unknown function 'sine'", FormulaError),
}


@pytest.mark.parametrize(('text', 'field', 'match', 'error'), list(CASES.values()),
                         ids=list(CASES))
def test_error_names_file_line_and_field(text: str, field: str, match: str,
                                         error: type[SkillError], base: Path) -> None:
    """Each mistake raises a SkillError at the marked line with the field path filled in."""
    expect_error(text, base, field, match, error)


def test_every_python_keyword_is_refused_as_a_name(base: Path) -> None:
    """All of keyword.kwlist (Python's own list) are refused; they could not be referenced."""
    for word in keyword.kwlist:
        text = HEADER + f'inputs:\n  {word}: {{}}  {MARK}\n'
        expect_error(text, base, f'inputs.{word}', 'not a Python keyword')


def test_every_formula_function_is_reserved(base: Path) -> None:
    """Names of formula.FUNCTIONS cannot name an input (a call and a name would clash)."""
    for name in FUNCTIONS:
        text = HEADER + f'inputs:\n  {name}: {{}}  {MARK}\n'
        expect_error(text, base, f'inputs.{name}', 'reserved')


@pytest.mark.parametrize('text', ['- a\n- b\n', 'just text\n', '42\n'])
def test_top_level_must_be_a_mapping(text: str, base: Path) -> None:
    """A skill file is one mapping; a list or a scalar at the top is refused at line 1."""
    with pytest.raises(SkillError, match='expected a mapping, got') as caught:
        load(text, base)
    assert (caught.value.file, caught.value.line, caught.value.field) == (SOURCE, 1,
                                                                           loader.DOCUMENT)


@pytest.mark.parametrize('text', ['', '# only a comment\n', '---\n', '~\n'])
def test_empty_file_is_refused(text: str, base: Path) -> None:
    """No document, or an empty one, is refused (PyYAML reads each of these as None)."""
    assert yaml.safe_load(text) is None
    with pytest.raises(SkillError, match='the file is empty') as caught:
        load(text, base)
    assert (caught.value.line, caught.value.field) == (1, loader.DOCUMENT)


@pytest.mark.parametrize(('text', 'line'), [
    ('skill: s\nrobot: arm.urdf\ndescription: "a\x07"\n', 3),   # BEL, a C0 control
    ('skill: s\r\nrobot: arm.urdf\r\ndescription: "\ud800"\n', 3),  # lone surrogate
    ('skill: s\x85description: "\x00"\n', 2),                   # NEL is a YAML line break
])
def test_characters_yaml_does_not_allow(text: str, line: int, base: Path) -> None:
    """YAML 1.1 spec 5.1 (printable subset of Unicode, from memory): others are refused."""
    with pytest.raises(SkillError, match='is not allowed in a YAML file') as caught:
        load(text, base)
    assert (caught.value.line, caught.value.field) == (line, loader.DOCUMENT)


def test_two_documents_are_refused(base: Path) -> None:
    """A skill file holds one YAML document (PyYAML compose: 'expected a single document')."""
    text = HEADER + f'---  {MARK}\n' + HEADER
    expect_error(text, base, loader.DOCUMENT, 'expected a single document')


def test_unreadable_and_undecodable_files(base: Path) -> None:
    """A missing file and bytes that are not UTF-8 (RFC 3629) are SkillErrors naming the file."""
    # RFC 3629 (from memory): 0xE9 followed by a newline is not a valid UTF-8 sequence.
    missing = base / 'missing.yaml'
    with pytest.raises(SkillError, match='cannot read skill file') as caught:
        load_skill(missing)
    assert caught.value.file == str(missing) and caught.value.field == loader.DOCUMENT
    bad = base / 'latin1.yaml'
    bad.write_bytes(HEADER.encode() + 'description: caf\xe9\n'.encode('latin-1'))
    with pytest.raises(SkillError, match=r"expected UTF-8 text, got the byte\(s\) b'\\xe9") as \
            caught:
        load_skill(bad)
    assert (caught.value.file, caught.value.line) == (str(bad), 3)


def test_formula_error_keeps_its_type_and_gains_a_location(base: Path) -> None:
    """The loader re-raises FormulaError (not a bare SkillError) so callers can tell them apart."""
    text = HEADER + f'formulas:\n  e: a @ b  {MARK}\n'
    error = expect_error(text, base, 'formulas.e', "operator '@' is not allowed", FormulaError)
    assert str(error).startswith(f'{SOURCE}:{marked_line(text)}: formulas.e: ')


def test_constraint_values_may_be_formulas_or_numbers(base: Path) -> None:
    """target/lower/upper keep formula text as written and turn YAML ints into floats."""
    text = HEADER + textwrap.dedent("""\
        constraints:
          - {name: a, function: x, kind: within, lower: -1, upper: 0.5 * pi}
          - name: b
            function: x
            kind: at_least
            lower: ramp(0, 2, 0.1, 0.3)
        """)
    spec = load(text, base)
    assert (spec.constraints[0].lower, spec.constraints[0].upper) == (-1.0, '0.5 * pi')
    assert spec.constraints[1].lower == 'ramp(0, 2, 0.1, 0.3)'
    assert math.isclose(yaml.safe_load('-1'), spec.constraints[0].lower)
