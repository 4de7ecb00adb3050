"""Located YAML reading: plain values, the line of every field, and located refusals.

Outside references used by the checks (named again beside each one):
- PyYAML's ``yaml.safe_load`` as the reference reader of the values (same library, public API);
- the YAML 1.1 specification (PyYAML implements 1.1): unique mapping keys (section 3.2.1.1),
  allowed characters (section 5.1), the merge key type (yaml.org/type/merge.html) and the
  timestamp type (yaml.org/type/timestamp.html);
- RFC 3629 (UTF-8): the byte 0xFF never occurs in UTF-8 text.
Expected lines are counted by hand from the texts; a ``# <-`` comment marks the line meant.
"""
from __future__ import annotations

import textwrap
from pathlib import Path

import pytest
import yaml

from constraint_ctrl.errors import LocatedError, PlanError, SkillError
from constraint_ctrl.located_yaml import load_located

MARK = '# <-'


def write(tmp_path: Path, text: str, name: str = 'doc.yaml') -> Path:
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding='utf-8')
    return path


def marked_line(path: Path) -> int:
    """1-based line of the single ``# <-`` marker in a test text."""
    hits = [i for i, line in enumerate(path.read_text(encoding='utf-8').splitlines(), 1)
            if MARK in line]
    assert len(hits) == 1, hits
    return hits[0]


NESTED = """\
    name: demo
    ratio: 0.5
    count: 3
    enabled: true
    nothing: null
    limits:
      speed: {max: 1.5, min: -1.5}
      names: [a, b]
    steps:
      - name: first
        set:
          goal_x: 0.5
      - second
      -
        - 1
        - 2
    shared: &anchor {k: 7}
    again: *anchor
"""


def test_values_equal_the_reference_reader(tmp_path: Path) -> None:
    # Reference: PyYAML's yaml.safe_load of the same text (scalars, flow and block collections,
    # an anchor and its alias).
    path = write(tmp_path, NESTED)
    data, _ = load_located(path, PlanError)
    assert data == yaml.safe_load(path.read_text(encoding='utf-8'))
    # Core scalar types per the YAML 1.1 type repository (int, float, bool, null, str).
    assert type(data['count']) is int and type(data['ratio']) is float
    assert data['enabled'] is True and data['nothing'] is None and data['name'] == 'demo'


def test_lines_of_nested_mappings_and_lists(tmp_path: Path) -> None:
    # Lines counted by hand in NESTED. A mapping entry sits on its key's line, also when its
    # value starts below it ('limits', 'steps', 'steps[0].set'); a list item on the line where
    # its value starts (its '-' line, except for a lone '-' as in steps[2]); an alias has the
    # lines of the anchored node.
    _, lines = load_located(write(tmp_path, NESTED), PlanError)
    assert lines == {
        '': 1, 'name': 1, 'ratio': 2, 'count': 3, 'enabled': 4, 'nothing': 5,
        'limits': 6, 'limits.speed': 7, 'limits.speed.max': 7, 'limits.speed.min': 7,
        'limits.names': 8, 'limits.names[0]': 8, 'limits.names[1]': 8,
        'steps': 9, 'steps[0]': 10, 'steps[0].name': 10, 'steps[0].set': 11,
        'steps[0].set.goal_x': 12, 'steps[1]': 13, 'steps[2]': 15, 'steps[2][0]': 15,
        'steps[2][1]': 16, 'shared': 17, 'shared.k': 17, 'again': 18, 'again.k': 17,
    }


def test_lines_count_crlf_and_comment_lines(tmp_path: Path) -> None:
    # YAML 1.1 section 5.4: CR LF is one line break; comments and blank lines still count.
    path = tmp_path / 'crlf.yaml'
    path.write_bytes(b'# header\r\n\r\na: 1\r\nb:\r\n  - x\r\n')
    data, lines = load_located(path, PlanError)
    assert data == {'a': 1, 'b': ['x']}
    assert lines['a'] == 3 and lines['b'] == 4 and lines['b[0]'] == 5


@pytest.mark.parametrize(('text', 'field'), [
    ("""\
     plan: one
     steps: []
     plan: two   # <-
     """, 'plan'),
    ("""\
     steps:
       - name: a
         timeout: 3
         timeout: 4   # <-
     """, 'steps[0].timeout'),
    ("""\
     set: {x: 1, y: 2,
           x: 3}   # <-
     """, 'set.x'),
])
def test_duplicate_keys_are_refused_at_the_second_key(tmp_path: Path, text: str,
                                                      field: str) -> None:
    # YAML 1.1 section 3.2.1.1: the keys of a mapping are unique; PyYAML's safe_load would
    # silently keep the last value instead.
    path = write(tmp_path, text)
    with pytest.raises(PlanError, match=r'duplicate key') as info:
        load_located(path, PlanError)
    assert (info.value.file, info.value.line, info.value.field) == \
        (str(path), marked_line(path), field)


@pytest.mark.parametrize('text', [
    """\
    a: 1
    b: [1, 2
    c: 3   # <-
    """,                                  # flow sequence not closed before the next key
    """\
    a: 1
     b: 2   # <-
    """,                                  # a key indented under a scalar value
    """\
    a:
    \tb: 1   # <-
    """,                                  # tab indentation (YAML 1.1 section 5.5)
    """\
    a: "open
    b: 2
    """,                                  # unterminated quoted scalar, found at the end
])
def test_syntax_errors_carry_the_line_the_reference_reader_reports(tmp_path: Path,
                                                                  text: str) -> None:
    # Reference: the problem mark of PyYAML's own error for the same text; where a marker is
    # present it is also the hand-counted line.
    path = write(tmp_path, text)
    with pytest.raises(yaml.MarkedYAMLError) as reference:
        yaml.safe_load(path.read_text(encoding='utf-8'))
    expected = reference.value.problem_mark.line + 1
    if MARK in path.read_text(encoding='utf-8'):
        assert expected == marked_line(path)
    with pytest.raises(PlanError, match=r'not valid YAML') as info:
        load_located(path, PlanError)
    assert info.value.file == str(path) and info.value.line == expected


def test_forbidden_control_character_is_located(tmp_path: Path) -> None:
    # YAML 1.1 section 5.1: C0 control characters other than TAB, LF and CR may not appear.
    path = tmp_path / 'bell.yaml'
    path.write_text('a: 1\nb: 2\nc: "x\x07"\n', encoding='utf-8')
    with pytest.raises(PlanError, match=r'not valid YAML: .*#x0007') as info:
        load_located(path, PlanError)
    assert info.value.line == 3


def test_impossible_date_is_a_located_error(tmp_path: Path) -> None:
    # yaml.org/type/timestamp.html: an unquoted 2020-13-45 is read as a date; month 13 does not
    # exist (ISO 8601), and PyYAML raises a bare ValueError for it.
    path = write(tmp_path, """\
        a: 1
        when: 2020-13-45   # <-
        """)
    with pytest.raises(ValueError, match='month'):
        yaml.safe_load(path.read_text(encoding='utf-8'))
    with pytest.raises(PlanError, match=r'unsupported value: month') as info:
        load_located(path, PlanError)
    assert (info.value.line, info.value.field) == (marked_line(path), 'when')


def test_merge_keys_are_refused_at_their_line(tmp_path: Path) -> None:
    # yaml.org/type/merge.html defines <<; this reader builds plain values and refuses it.
    path = write(tmp_path, """\
        base: &b {x: 1}
        other:
          <<: *b   # <-
          y: 2
        """)
    with pytest.raises(PlanError, match=r'merge keys \(<<\)') as info:
        load_located(path, PlanError)
    assert (info.value.line, info.value.field) == (marked_line(path), 'other')


@pytest.mark.parametrize('text', [
    'a: !custom 5   # <-\n',
    'a: 1\n!custom k: 5   # <-\n',
    'a: !!python/name:os.system x   # <-\n',
])
def test_tags_outside_the_safe_schema_are_refused(tmp_path: Path, text: str) -> None:
    # PyYAML's SafeLoader refuses these tags too (reference: yaml.safe_load raises).
    path = write(tmp_path, text)
    with pytest.raises(yaml.constructor.ConstructorError):
        yaml.safe_load(path.read_text(encoding='utf-8'))
    with pytest.raises(PlanError, match=r'unsupported (value|key)') as info:
        load_located(path, PlanError)
    assert info.value.line == marked_line(path)


@pytest.mark.parametrize('text', ['a: &x [1, *x]\n', 'a: ' + '[' * 1000 + ']' * 1000 + '\n'])
def test_self_reference_and_absurd_nesting_are_errors(tmp_path: Path, text: str) -> None:
    # YAML 1.1 section 3.1.2 allows an alias inside the node it names (a cycle); plain values
    # cannot hold one. Deep nesting would exhaust Python's recursion limit.
    path = write(tmp_path, text)
    with pytest.raises(PlanError, match=r'nested too deeply|refers to itself') as info:
        load_located(path, PlanError)
    assert info.value.line == 1


@pytest.mark.parametrize('content', ['', '\n\n', '# only a comment\n'])
def test_empty_documents(tmp_path: Path, content: str) -> None:
    # Reference: yaml.safe_load gives None for each of these (no node in the stream).
    path = tmp_path / 'empty.yaml'
    path.write_text(content, encoding='utf-8')
    assert yaml.safe_load(content) is None
    with pytest.raises(PlanError, match=r'the file is empty') as info:
        load_located(path, PlanError)
    assert (info.value.file, info.value.line) == (str(path), 1)


def test_missing_file_directory_and_non_utf8_are_errors(tmp_path: Path) -> None:
    missing = tmp_path / 'nope.yaml'
    with pytest.raises(PlanError, match=r'cannot read the file') as info:
        load_located(missing, PlanError)
    assert info.value.file == str(missing)
    with pytest.raises(PlanError, match=r'cannot read the file'):
        load_located(tmp_path, PlanError)
    latin = tmp_path / 'latin.yaml'
    latin.write_bytes(b'a: caf\xe9\nb: \xff\n')   # RFC 3629: 0xE9 0x0A and 0xFF are not UTF-8
    with pytest.raises(PlanError, match=r'cannot read the file: .*utf-8') as info:
        load_located(latin, PlanError)
    assert info.value.file == str(latin)


def test_the_given_error_class_is_raised(tmp_path: Path) -> None:
    # Each file format gets its own error class; the reader must not swap it for another.
    path = write(tmp_path, 'a: 1\na: 2\n')
    with pytest.raises(SkillError) as info:
        load_located(path, SkillError)
    assert type(info.value) is SkillError and isinstance(info.value, LocatedError)
    assert str(info.value) == f"{path}:2: a: duplicate key 'a'"
