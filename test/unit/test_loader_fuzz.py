"""Fuzzing the skill loader: any input either loads or raises SkillError, and nothing runs.

Oracles: PyYAML (``yaml.safe_dump``) writes the mutated documents; a loaded spec is re-checked
against the rules of the format by ``assert_valid`` below, written independently of the loader;
a sentinel file shows that no text was ever executed.
"""
from __future__ import annotations

import copy
import math
import re
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from constraint_ctrl.errors import SkillError
from constraint_ctrl.skill import SkillSpec, load_skill, load_skill_text, loader
from constraint_ctrl.skill.schema import CONSTRAINT_KINDS

SOURCE = 'fuzz.yaml'
FUZZ = settings(max_examples=200, deadline=None,
                suppress_health_check=[HealthCheck.too_slow])

VALID = """\
skill: follow_flange
description: Keep the tool at a stand-off above the flange.
robot: arm.urdf
base_link: base_link
inputs:
  range_left: {unit: m, rate_hz: 100, timeout: 0.05}
  range_right: {unit: m, rate_hz: 10}
unknowns:
  gear_turn: {start: 0.1, lower: -0.6, upper: 0.6, max_speed: 0.5, unit: rad}
tunables:
  standoff: {value: 0.008, lower: 0.003, upper: 0.02, unit: m, description: sensor gap}
  follow_gain: {value: 8.0, lower: 1.0, upper: 20.0}
formulas:
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
  start: {joint_2: -0.5}
  inputs: {range_left: 0.008}
"""
EXAMPLE = yaml.safe_load(VALID)
NAME = re.compile(r'[A-Za-z_][A-Za-z0-9_]*')
# YAML 1.1 spec 5.4, line break characters: LF, CR (CRLF counts once), NEL, LS, PS (from memory).
LINE_BREAK = re.compile('\r\n|[\n\r\x85\u2028\u2029]')


def line_count(text: str) -> int:
    return len(LINE_BREAK.findall(text)) + 1


@pytest.fixture(scope='module')
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Skill folder with the robot file; shared by all examples (hypothesis reuses it)."""
    path = tmp_path_factory.mktemp('fuzz')
    (path / 'arm.urdf').write_text('<robot name="arm"/>\n')
    return path


def sentinel(folder: Path) -> Path:
    return folder / 'executed'


def payloads(folder: Path) -> list[str]:
    """Text that would create the sentinel file if anything ever evaluated it."""
    target = sentinel(folder)
    return [f"__import__('os').system('touch {target}')",
            f"open('{target}', 'w').write('x')",
            f"[c for c in ().__class__.__base__.__subclasses__()] or open('{target}', 'w')",
            f"!!python/object/apply:os.system ['touch {target}']",
            'lambda: 0', "exec('1')", "eval('1')", '1 if x else 2', 'x.__class__']


def load_or_error(text: str, folder: Path) -> SkillSpec | SkillError:
    """Load; any exception other than SkillError propagates and fails the test."""
    try:
        return load_skill_text(text, source=SOURCE, base_dir=folder)
    except SkillError as error:
        return error


def assert_located(error: SkillError, text: str, source: str = SOURCE) -> None:
    """A SkillError names the file, a line inside the text (or just past it) and a field."""
    assert error.file == source
    assert error.field
    assert error.line is not None
    assert 1 <= error.line <= line_count(text)


def assert_valid(spec: SkillSpec, text: str) -> None:
    """The rules of the format, re-stated independently of the loader's code."""
    def positive(x: float) -> bool:
        return isinstance(x, float) and math.isfinite(x) and x > 0

    tunables = {t.name: t for t in spec.tunables}

    def positive_or_tunable(x: float | str) -> bool:
        return positive(x) if isinstance(x, float) else tunables[x].lower > 0

    def number_or_formula(x: float | str | None) -> bool:
        return isinstance(x, str) and x.strip() != '' or isinstance(x, float) and math.isfinite(x)

    names = [i.name for i in spec.inputs] + [f.name for f in spec.unknowns] + \
        list(tunables) + [name for name, _ in spec.formulas]
    assert len(names) == len(set(names))
    assert all(NAME.fullmatch(n) and n not in ('time', 'pi') for n in names)
    for i in spec.inputs:
        assert positive(i.rate_hz) and positive(i.timeout)
    for f in spec.unknowns:
        assert f.lower <= f.start <= f.upper and math.isfinite(f.start)
        assert positive(f.max_speed)
    for t in spec.tunables:
        assert t.lower <= t.value <= t.upper and math.isfinite(t.value)
    needs = {'equal': {'target'}, 'at_most': {'upper'}, 'at_least': {'lower'},
             'within': {'lower', 'upper'}}
    assert len({c.name for c in spec.constraints}) == len(spec.constraints)
    for c in spec.constraints:
        assert c.kind in CONSTRAINT_KINDS
        given_fields = {k for k in ('target', 'lower', 'upper') if getattr(c, k) is not None}
        assert given_fields == needs[c.kind]
        assert all(number_or_formula(getattr(c, k)) for k in given_fields)
        if isinstance(c.lower, float) and isinstance(c.upper, float):
            assert c.lower <= c.upper
        assert c.behaviour.order in (1, 2)
        for value in (c.behaviour.gain, c.behaviour.natural_frequency, c.behaviour.damping_ratio,
                      c.weight):
            assert positive_or_tunable(value)
        assert isinstance(c.hard, bool)
        assert isinstance(c.priority, int) and not isinstance(c.priority, bool)
        assert c.priority >= 1
    assert len({e.name for e in spec.events}) == len(spec.events)
    for e in spec.events:
        assert math.isfinite(e.hold_for) and e.hold_for >= 0 and e.condition.strip()
    for value in (spec.limits.joint_speed, spec.limits.joint_acceleration):
        assert value is None or positive(value)
    assert positive(spec.limits.position_gain)
    assert all(positive(v) for v in spec.limits.joint_speeds.values())
    assert positive(spec.regularisation.damping) and positive(spec.regularisation.unknown_weight)
    assert all(positive(v) for v in spec.regularisation.joint_weights.values())
    assert set(spec.offline.inputs) <= {i.name for i in spec.inputs}
    assert all(math.isfinite(v) for v in spec.offline.start.values())
    assert spec.robot is None or spec.robot.is_file()   # robot: is optional (issue 9.3)
    assert all(1 <= line <= line_count(text) for line in spec.locations.values())


def test_fuzz_base_document_is_valid(folder: Path) -> None:
    """The fuzz starts from a valid skill, also after a yaml.safe_dump round trip."""
    direct = load_skill_text(VALID, source=SOURCE, base_dir=folder)
    dumped = yaml.safe_dump(EXAMPLE, sort_keys=False)
    assert load_skill_text(dumped, source=SOURCE, base_dir=folder).constraints == \
        direct.constraints
    assert_valid(direct, VALID)


# -- (a) arbitrary text and bytes --------------------------------------------------------------

YAMLISH = st.text(alphabet=st.sampled_from(list('ab_1.-: \n\t[]{},&*!|>\'"#%@`?<~=\\')),
                  max_size=200)
LINES = st.lists(st.sampled_from(VALID.splitlines() + ['  ', '- x', '  - y: 1', '<<: *a',
                                                     'a: &a {b: 1}', '---', '...']),
                 max_size=40).map('\n'.join)


@FUZZ
@given(text=st.one_of(st.text(max_size=300), YAMLISH, LINES))
def test_any_text_loads_or_raises_skill_error(text: str, folder: Path) -> None:
    """Arbitrary text, YAML-flavoured text and shuffled valid lines never crash the loader."""
    result = load_or_error(text, folder)
    if isinstance(result, SkillError):
        assert_located(result, text)
    else:
        assert_valid(result, text)
    assert not sentinel(folder).exists()


@FUZZ
@given(data=st.one_of(st.binary(max_size=300), LINES.map(lambda t: t.encode('utf-16'))))
def test_any_bytes_load_or_raise_skill_error(data: bytes, folder: Path) -> None:
    """Bytes in a file (not UTF-8, NUL, control characters) give a located SkillError."""
    path = folder / 'bytes.yaml'
    path.write_bytes(data)
    try:
        spec = load_skill(path)
    except SkillError as error:
        assert error.file == str(path) and error.field
        text = data.decode('utf-8', errors='replace')
        assert error.line is not None and 1 <= error.line <= line_count(text)
    else:
        assert_valid(spec, data.decode('utf-8'))


@pytest.mark.parametrize('back_end', ['SafeLoader', 'CSafeLoader'])
def test_deep_nesting_is_a_skill_error(back_end: str, folder: Path,
                                       monkeypatch: pytest.MonkeyPatch) -> None:
    """Pure PyYAML composes recursively (RecursionError), libyaml stops at a nesting limit."""
    if not hasattr(yaml, back_end):
        pytest.skip('PyYAML was built without libyaml')
    monkeypatch.setattr(loader, '_YAML_LOADER', getattr(yaml, back_end))
    block = ''.join(' ' * i + 'a:\n' for i in range(700))
    for text in ('[' * 800, 'a: ' + '{b: ' * 800, block):
        error = load_or_error(text, folder)
        assert isinstance(error, SkillError)
        assert_located(error, text)


def test_alias_bomb_is_not_expanded(folder: Path) -> None:
    """Nested aliases (the 'billion laughs' pattern) are refused without expanding them."""
    levels = ['&a0 [x, x, x, x, x, x, x, x, x]']
    levels += [f'&a{i} [' + ', '.join([f'*a{i - 1}'] * 9) + ']' for i in range(1, 10)]
    text = f'skill: s\nrobot: arm.urdf\ndescription: [{", ".join(levels)}]\n'
    error = load_or_error(text, folder)
    # a5 (597,871 values) is the first item over the 100,000-value budget (README, File limits)
    assert isinstance(error, SkillError) and error.field == 'description[5]'
    assert 'holds more than 100,000 values' in error.message


# -- (b) structure-aware mutations --------------------------------------------------------------

def paths(node: object, prefix: tuple[object, ...] = ()) -> list[tuple[object, ...]]:
    """Every key/index path below node (containers and leaves)."""
    found: list[tuple[object, ...]] = []
    children = node.items() if isinstance(node, dict) else (
        enumerate(node) if isinstance(node, list) else ())
    for key, child in children:
        found.append((*prefix, key))
        found.extend(paths(child, (*prefix, key)))
    return found


def parent_of(doc: object, path: tuple[object, ...]) -> object:
    for key in path[:-1]:
        doc = doc[key]  # type: ignore[index]
    return doc


def bad_values(folder: Path) -> st.SearchStrategy[object]:
    return st.one_of(
        st.booleans(), st.none(),
        st.sampled_from([math.nan, math.inf, -math.inf, 10 ** 400, -10 ** 400, 1e308, -1e-300,
                         0, 0.0, -1, -1.5, 3, '', ' ', 'time', 'pi', 'sin', 'standoff',
                         'follow_gain', 'equal', 'within', 'at_most', 'joint_1', '1.0', '.nan',
                         'x' * 500, '2024-05-01', 'yes', 'no', 'null', '~', '<<']),
        st.sampled_from(payloads(folder)),
        st.floats(allow_nan=True, allow_infinity=True),
        st.integers(min_value=-10 ** 6, max_value=10 ** 6),
        st.text(max_size=20),
        st.lists(st.integers(min_value=-3, max_value=3), max_size=3),
        st.dictionaries(st.text(max_size=6), st.integers(min_value=-3, max_value=3),
                        max_size=2),
    )


@FUZZ
@given(data=st.data())
def test_mutated_example_loads_or_raises_skill_error(data: st.DataObject, folder: Path) -> None:
    """Random leaf changes, deletions and unknown keys: load a valid spec or a located error."""
    doc = copy.deepcopy(EXAMPLE)
    for _ in range(data.draw(st.integers(min_value=1, max_value=4), label='mutations')):
        path = data.draw(st.sampled_from(paths(doc)), label='path')
        parent = parent_of(doc, path)
        action = data.draw(st.sampled_from(['replace', 'replace', 'delete', 'add_key']),
                           label='action')
        if action == 'replace':
            parent[path[-1]] = data.draw(bad_values(folder), label='value')  # type: ignore[index]
        elif action == 'delete':
            del parent[path[-1]]  # type: ignore[attr-defined]
        elif isinstance(parent, dict):
            key = data.draw(st.one_of(st.text(min_size=1, max_size=12),
                                      st.sampled_from([f'{k}s' for k in parent] + ['rate'])),
                            label='new key')
            parent[key] = data.draw(bad_values(folder), label='new value')
    text = yaml.safe_dump(doc, sort_keys=False, allow_unicode=True)
    result = load_or_error(text, folder)
    if isinstance(result, SkillError):
        assert_located(result, text)
    else:
        assert_valid(result, text)
    if getattr(yaml, 'CSafeLoader', None) is not None:
        # Differential check: libyaml and PyYAML's pure parser must give the same outcome.
        other = (yaml.SafeLoader if loader._YAML_LOADER is not yaml.SafeLoader
                 else yaml.CSafeLoader)
        with pytest.MonkeyPatch.context() as patch:
            patch.setattr(loader, '_YAML_LOADER', other)
            again = load_or_error(text, folder)
        if isinstance(result, SkillError):
            assert isinstance(again, SkillError)
            assert (again.line, again.field, again.message) == (result.line, result.field,
                                                                result.message)
        else:
            assert again == result
    assert not sentinel(folder).exists()


#: Tags yaml.safe_load refuses itself (python/* and application tags) ...
UNSAFE_TAGS = ['!!python/object/apply:os.system', '!!python/name:os.system', '!!python/module:os',
               '!!python/object:builtins.dict', '!!python/object/new:builtins.list',
               '!!python/tuple', '!custom', '!<tag:example.com,2000:thing>']
#: ... and YAML 1.1 types it would construct but no field of a skill takes.
OTHER_TAGS = ['!!binary', '!!set', '!!omap', '!!pairs', '!!timestamp']
KEY_LINE = re.compile(r'^(\s*(?:- )?[A-Za-z_]\w*:)( .*)?$')


@FUZZ
@given(line=st.sampled_from([i for i, text in enumerate(VALID.splitlines())
                             if KEY_LINE.match(text)]),
       tag=st.sampled_from(UNSAFE_TAGS + OTHER_TAGS))
def test_yaml_tags_are_refused(line: int, tag: str, folder: Path) -> None:
    """A tag other than the core types on any field is a SkillError at that line.

    PyYAML's SafeLoader refuses the unsafe ones too (PyYAML docs, from memory: safe_load
    "recognizes only standard YAML tags"); the loader constructs none of them.
    """
    lines = VALID.splitlines()
    lines[line] = KEY_LINE.sub(lambda m: f'{m.group(1)} {tag}{m.group(2) or ""}', lines[line])
    text = '\n'.join(lines) + '\n'
    if tag in UNSAFE_TAGS:
        with pytest.raises(yaml.constructor.ConstructorError):
            yaml.load(text, Loader=getattr(yaml, 'CSafeLoader', yaml.SafeLoader))  # noqa: S506
    with pytest.raises(SkillError, match='unsupported YAML tag') as caught:
        load_skill_text(text, source=SOURCE, base_dir=folder)
    assert_located(caught.value, text)
    assert caught.value.line == line + 1
    assert not sentinel(folder).exists()
