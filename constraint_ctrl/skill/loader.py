"""Skill files: YAML text in, a validated ``SkillSpec`` out.

Every mistake in a skill file becomes a ``SkillError`` naming the file, the 1-based line and the
field path (``constraints[2].behaviour.gain``), so a user can go straight to it. The YAML is
only composed into nodes (libyaml's parser if PyYAML has it, else PyYAML's own); the loader
reads the nodes itself. That gives every key and list item a line, lets duplicate keys be caught
(PyYAML would keep the last one silently) and keeps YAML tags such as ``!!python/object`` out:
only the core scalars (text, numbers, true/false, null), lists and mappings are ever turned into
values. Anchors, aliases and ``<<`` merge keys work as in YAML 1.1.

The skill file format (our own)::

    skill: follow_flange                 # identifier, required
    description: Keep the tool at a stand-off above the flange while moving along it.
    robot: ../robots/six_axis_arm.urdf   # optional; relative to this file's folder; without
                                         # it the skill drives the controller's robot model
    base_link: base_link                 # optional; default: the URDF's root link
    inputs:                              # scalar sensor signals, keyed by name
      range_left: {unit: m, rate_hz: 100, timeout: 0.05}
      range_right: {unit: m, rate_hz: 100}   # timeout default: max(0.1, 3 / rate_hz)
    unknowns:                            # extra unknowns, integrated like joints
      gear_turn: {start: 0.0, lower: -0.6, upper: 0.6, max_speed: 0.5, unit: rad}
    tunables:                            # run-time adjustable values; `value` required
      standoff: {value: 0.008, lower: 0.003, upper: 0.02, unit: m,
                 description: gap between sensors and surface}
      follow_gain: {value: 8.0, lower: 1.0, upper: 20.0, unit: 1/s}
    formulas:                         # named formulas other formulas can use
      mean_range: (range_left + range_right) / 2
    constraints:                         # task functions; `name` and `function` required
      - name: keep_standoff
        function: mean_range
        kind: equal                      # equal | at_most | at_least | within
        target: standoff                 # number or formula
        behaviour: {order: 1, gain: follow_gain}   # number or tunable name
        hard: false
        weight: 100.0                    # number or tunable name
        priority: 1                      # 1 is the most important level
      - name: turn_in_range
        function: gear_turn
        kind: within                     # at_least takes lower, at_most upper
        lower: -0.5
        upper: 0.5
        behaviour: {order: 2, natural_frequency: 6.0, damping_ratio: 0.8}
        hard: true
    events:                              # conditions that must hold for hold_for seconds
      - name: seated
        condition: mean_range < standoff + 0.001
        hold_for: 0.2
    limits:
      joint_speed: 1.0                   # every joint
      joint_speeds: {joint_6: 2.0}       # per joint, by URDF joint name
      joint_acceleration: 8.0
      position_gain: 5.0
    regularisation:
      damping: 0.01                      # > 0 keeps the QP strictly convex
      joint_weights: {joint_1: 2.0}
      unknown_weight: 1.0
    offline:                             # only for the offline tools (check, simulate)
      start: {joint_2: -0.5, joint_3: 1.0}   # joint positions, by URDF joint name
      inputs: {range_left: 0.008, range_right: 0.009}   # constant values of declared inputs
      scene: ../scenes/cell.yaml         # optional; relative to this file, must exist

Inputs, unknowns, tunables and formulas share one namespace (the names formulas use), which
must not contain ``time``, ``pi``, Python keywords or the formula functions. Formulas are only
checked for syntax here; names inside them are resolved when the skill is compiled.
"""
from __future__ import annotations

import difflib
import keyword
import math
import os
import re
from dataclasses import dataclass
from dataclasses import fields as dataclass_fields
from pathlib import Path
from typing import TYPE_CHECKING, NoReturn, Protocol, TypeVar

import yaml
from yaml.constructor import SafeConstructor
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from ..errors import FormulaError, SkillError
from ..located_yaml import MAX_FILE_BYTES, check_expansion
from .schema import (
    CONSTRAINT_KINDS,
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
)

if TYPE_CHECKING:
    from collections.abc import Callable, Iterable, Mapping, Sequence

__all__ = ['DOCUMENT', 'MAX_CONSTRAINTS', 'RESERVED_NAMES', 'load_skill', 'load_skill_text']

#: Field path used for problems that belong to the file as a whole (syntax, top level, I/O).
DOCUMENT = '<document>'
#: Names formulas always provide; formula functions are added from formula.FUNCTIONS.
RESERVED_NAMES: tuple[str, ...] = ('time', 'pi')

_TAG = 'tag:yaml.org,2002:'
_MAP, _SEQ, _MERGE = _TAG + 'map', _TAG + 'seq', _TAG + 'merge'
_IDENTIFIER = re.compile(r'[A-Za-z_][A-Za-z0-9_]*')
_SNIPPET = 60  # characters of a bad mapping/list quoted in a message
_BREAK = re.compile('\r\n|[\n\r\x85\u2028\u2029]')
_NON_PRINTABLE = yaml.reader.Reader.NON_PRINTABLE  # what the YAML 1.1 spec allows in a stream
#: libyaml's parser when PyYAML has it (about 10x faster; same nodes and marks), else PyYAML's.
_YAML_LOADER: type[yaml.SafeLoader] | type[yaml.CSafeLoader] = getattr(yaml, 'CSafeLoader',
                                                                       yaml.SafeLoader)


class _Named(Protocol):
    @property
    def name(self) -> str: ...


_T = TypeVar('_T')
_N = TypeVar('_N', bound=_Named)

_CONSTRUCTOR = SafeConstructor()
_SCALARS: dict[str, Callable[[ScalarNode], object]] = {
    _TAG + 'str': _CONSTRUCTOR.construct_yaml_str,
    _TAG + 'value': _CONSTRUCTOR.construct_yaml_str,  # a plain '=' (YAML 1.1 value key)
    _TAG + 'int': _CONSTRUCTOR.construct_yaml_int,
    _TAG + 'float': _CONSTRUCTOR.construct_yaml_float,
    _TAG + 'bool': _CONSTRUCTOR.construct_yaml_bool,
    _TAG + 'null': _CONSTRUCTOR.construct_yaml_null,
}

_TOP_KEYS = ('skill', 'description', 'robot', 'base_link', 'inputs', 'unknowns', 'tunables',
             'formulas', 'constraints', 'events', 'limits', 'regularisation', 'offline')
_INPUT_KEYS = ('unit', 'rate_hz', 'timeout')
_UNKNOWN_KEYS = ('start', 'lower', 'upper', 'max_speed', 'unit')
_TUNABLE_KEYS = ('value', 'lower', 'upper', 'unit', 'description')
_CONSTRAINT_KEYS = ('name', 'function', 'kind', 'target', 'lower', 'upper', 'behaviour', 'hard',
                    'weight', 'priority')
_BEHAVIOUR_KEYS = ('order', 'gain', 'natural_frequency', 'damping_ratio')
_ORDER_KEYS = {1: ('gain',), 2: ('natural_frequency', 'damping_ratio')}
_KIND_KEYS = {'equal': ('target',), 'at_most': ('upper',), 'at_least': ('lower',),
              'within': ('lower', 'upper')}
_EVENT_KEYS = ('name', 'condition', 'hold_for')
_LIMITS_KEYS = ('joint_speed', 'joint_speeds', 'joint_acceleration', 'position_gain')
_REGULARISATION_KEYS = ('damping', 'joint_weights', 'unknown_weight')
_OFFLINE_KEYS = ('start', 'inputs', 'scene')
#: Most constraints one skill may have (each costs compile time; see compile.MAX_ROWS).
MAX_CONSTRAINTS = 2000


def load_skill(path: str | os.PathLike[str]) -> SkillSpec:
    """Load a skill file; ``robot:`` is resolved against the file's folder.

    Raises:
        SkillError: the file cannot be read or is not a valid skill (file, line, field set).
    """
    source = os.fspath(path)
    try:
        with open(source, 'rb') as handle:
            data = handle.read(MAX_FILE_BYTES + 1)   # never more than the limit, whatever it is
    except (OSError, ValueError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        msg = f'cannot read skill file {source!r}: {reason}'
        raise SkillError(msg, file=source, field=DOCUMENT) from None
    _check_size(len(data), source)
    try:
        text = data.decode('utf-8')
    except UnicodeDecodeError as exc:
        valid = data[:exc.start].decode('utf-8')
        line = _line_at(valid, len(valid))
        bad = data[exc.start:exc.end]
        msg = f'expected UTF-8 text, got the byte(s) {bad!r}'
        raise SkillError(msg, file=source, line=line, field=DOCUMENT) from None
    return load_skill_text(text, source=source, base_dir=Path(source).parent)


def load_skill_text(text: str, *, source: str = '<string>',
                    base_dir: Path | None = None) -> SkillSpec:
    """Load a skill from YAML text; ``robot:`` is resolved against ``base_dir`` (default: cwd).

    Raises:
        SkillError: the text is not a valid skill (file, line and field set).
    """
    if len(text) > MAX_FILE_BYTES // 4:   # four bytes per character at most in UTF-8
        _check_size(len(text.encode('utf-8', 'surrogatepass')), source)
    try:
        root = _compose(text, source)
        check_expansion(root, SkillError, source, field=DOCUMENT)
        reader = _Reader(text, source, Path.cwd() if base_dir is None else Path(base_dir),
                         frozenset(RESERVED_NAMES) | _formula_functions())
        return reader.skill(root)
    except RecursionError:
        msg = 'the YAML is nested too deeply to be a skill file'
        raise SkillError(msg, file=source, line=1, field=DOCUMENT) from None


def _check_size(size: int, source: str) -> None:
    if size > MAX_FILE_BYTES:
        msg = (f'the file is larger than the limit of {MAX_FILE_BYTES:,} bytes for skill files; '
               'split the skill or remove what it does not need')
        raise SkillError(msg, file=source, line=1, field=DOCUMENT)


def _line_at(text: str, index: int) -> int:
    """1-based YAML line of a character index (YAML counts CR, LF, CRLF, NEL, LS, PS)."""
    return len(_BREAK.findall(text, 0, index)) + 1


def _compose(text: str, source: str) -> Node:
    """Parse YAML into a node tree, translating PyYAML's errors into located SkillErrors."""
    bad = _NON_PRINTABLE.search(text)
    if bad:  # checked here so both YAML back ends report it alike (and libyaml never sees it)
        msg = f'the character {bad.group()!r} is not allowed in a YAML file'
        raise SkillError(msg, file=source, line=_line_at(text, bad.start()), field=DOCUMENT)
    try:
        root = yaml.compose(text, Loader=_YAML_LOADER)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        # libyaml puts the end of an unterminated last line on the next line: clamp to the text.
        line = min(mark.line + 1, _line_at(text, len(text))) if mark is not None else 1
        what = ', '.join(part for part in (exc.context, exc.problem) if part)
        lines = _BREAK.split(text)
        near = _clip(lines[line - 1].strip()) if line <= len(lines) else ''
        column = f' (column {mark.column + 1})' if mark is not None else ''
        msg = f'not valid YAML: {what or "syntax error"}{column} near {near!r}'
        raise SkillError(msg, file=source, line=line, field=DOCUMENT) from None
    except (yaml.YAMLError, UnicodeError) as exc:
        msg = f'not valid YAML: {exc}'
        raise SkillError(msg, file=source, line=1, field=DOCUMENT) from None
    if root is None or (isinstance(root, ScalarNode) and root.tag == _TAG + 'null'):
        msg = "the file is empty; expected a mapping with at least 'skill' and 'constraints'"
        raise SkillError(msg, file=source, line=1, field=DOCUMENT)
    return root


def _formula_functions() -> frozenset[str]:
    """Function names of the formula language, which skills may not reuse as names."""
    try:
        from . import formula
    except ModuleNotFoundError as exc:
        if exc.name != f'{__package__}.formula':
            raise
        return frozenset()
    return frozenset(getattr(formula, 'FUNCTIONS', ()))


def _formula_checker() -> Callable[[str], None] | None:
    """The formula syntax check, or None while formula.py does not exist yet."""
    try:
        from .formula import check_formula_syntax
    except ModuleNotFoundError as exc:
        if exc.name != f'{__package__}.formula':
            raise
        return None
    return check_formula_syntax



@dataclass(frozen=True, slots=True)
class _Field:
    """A node of the file with its field path, its key as written and the line naming it."""

    path: str
    line: int
    node: Node
    key: str = ''

    def child(self, key: str) -> str:
        return key if self.path == DOCUMENT else f'{self.path}.{key}'


def _line(node: Node) -> int:
    return node.start_mark.line + 1


def _suggest(word: str, choices: Iterable[str]) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f'; did you mean {close[0]!r}?' if close else ''


def _clip(text: str) -> str:
    return text if len(text) <= _SNIPPET else text[:_SNIPPET] + '...'


def _describe(node: Node, text: str) -> str:
    """Name a node's YAML type and quote its text, for 'expected X, got Y' messages."""
    if isinstance(node, ScalarNode):
        kinds = {'str': 'the text', 'int': 'the number', 'float': 'the number',
                 'bool': 'the boolean', 'null': 'null'}
        kind = kinds.get(node.tag.removeprefix(_TAG), 'the value')
        return 'nothing (null)' if kind == 'null' else f'{kind} {_clip(node.value)!r}'
    kind = 'a mapping' if isinstance(node, MappingNode) else 'a list'
    return f'{kind} {_clip(text[node.start_mark.index:node.end_mark.index].strip())!r}'


class _Reader:
    """Builds a SkillSpec from a node tree, recording the line of every field it reads."""

    def __init__(self, text: str, source: str, base_dir: Path,
                 reserved: frozenset[str]) -> None:
        self.yaml_text = text
        self.source = source
        self.base_dir = base_dir
        self.reserved = reserved
        self.locations: dict[str, int] = {}
        self.check_formula = _formula_checker()
        self._merged: dict[int, list[tuple[Node, Node]]] = {}

    # -- errors -------------------------------------------------------------------------------

    def fail(self, at: _Field, message: str, *, path: str | None = None) -> NoReturn:
        raise SkillError(message, file=self.source, line=at.line, field=path or at.path)

    def unsupported_tag(self, at: _Field) -> NoReturn:
        msg = (f'unsupported YAML tag {at.node.tag!r} on {_describe(at.node, self.yaml_text)}; '
               'only text, numbers, true/false, lists and mappings are allowed (quote text '
               'that YAML reads as a date)')
        self.fail(at, msg)

    def expected(self, at: _Field, what: str) -> NoReturn:
        self.fail(at, f'expected {what}, got {_describe(at.node, self.yaml_text)}')

    # -- structure ----------------------------------------------------------------------------

    def entries(self, at: _Field) -> list[_Field]:
        """The fields of a mapping in file order (merge keys applied, duplicates rejected)."""
        if not isinstance(at.node, MappingNode):
            self.expected(at, 'a mapping')
        if at.node.tag != _MAP:
            self.unsupported_tag(at)
        seen: dict[str, int] = {}
        fields: list[_Field] = []
        for key_node, value_node in at.node.value:
            if key_node.tag == _MERGE:
                continue
            key = self.key(at, key_node)
            if key in seen:
                msg = (f'duplicate key {_clip(key)!r} (first at line {seen[key]}); '
                       'YAML would silently keep only the last one')
                self.fail(_Field(at.child(key), _line(key_node), key_node), msg)
            seen[key] = _line(key_node)
            fields.append(_Field(at.child(key), _line(key_node), value_node, key))
        for key_node, value_node in self.merged(at, at.node, set()):
            key = self.key(at, key_node)
            if key not in seen:
                seen[key] = _line(key_node)
                fields.append(_Field(at.child(key), _line(key_node), value_node, key))
        for item in fields:
            self.locations[item.path] = item.line
        return fields

    def merged(self, at: _Field, node: MappingNode,
               visiting: set[int]) -> list[tuple[Node, Node]]:
        """Key/value pairs a mapping takes in through ``<<`` merge keys (earlier ones win).

        Each mapping's merged pairs are worked out once and reused (an anchored mapping merged
        in many places, or merged twice at every level of a chain, costs one expansion), and a
        key already taken in is not taken again: linear in the size of the text.
        """
        known = self._merged.get(id(node))
        if known is not None:
            return known
        visiting.add(id(node))
        pairs: list[tuple[Node, Node]] = []
        taken: set[object] = set()

        def take(key_node: Node, value_node: Node) -> None:
            ident = key_node.value if isinstance(key_node, ScalarNode) else id(key_node)
            if ident not in taken:
                taken.add(ident)
                pairs.append((key_node, value_node))

        for key_node, value_node in node.value:
            if key_node.tag != _MERGE:
                continue
            here = _Field(at.path, _line(key_node), value_node)
            sources = value_node.value if isinstance(value_node, SequenceNode) else [value_node]
            for source in sources:
                if not isinstance(source, MappingNode):
                    self.expected(_Field(at.path, _line(key_node), source),
                                  'a mapping (or a list of mappings) after the merge key <<')
                if source.tag != _MAP:
                    self.unsupported_tag(_Field(at.path, _line(key_node), source))
                if id(source) in visiting:
                    self.fail(here, 'a merge key << refers to the mapping it is part of')
                for key, value in source.value:
                    if key.tag != _MERGE:
                        take(key, value)
                for key, value in self.merged(at, source, visiting):
                    take(key, value)
        visiting.discard(id(node))
        self._merged[id(node)] = pairs
        return pairs

    def key(self, at: _Field, key_node: Node) -> str:
        """A mapping key as written, so that ``on:`` or ``1:`` stay text (names are text)."""
        here = _Field(at.path, _line(key_node), key_node)
        if not isinstance(key_node, ScalarNode):
            self.expected(here, 'a plain name as key')
        if key_node.tag not in _SCALARS:
            self.unsupported_tag(here)
        if not key_node.value:
            self.expected(here, 'a non-empty name as key')
        return str(key_node.value)

    def fields(self, at: _Field, allowed: Sequence[str],
               required: Sequence[str] = ()) -> dict[str, _Field]:
        """A mapping with a fixed set of keys; unknown keys get a did-you-mean suggestion."""
        found: dict[str, _Field] = {}
        for item in self.entries(at):
            if item.key not in allowed:
                where = 'at the top level' if at.path == DOCUMENT else f'in {at.path}'
                msg = (f'unknown key {_clip(item.key)!r} {where}{_suggest(item.key, allowed)} '
                       f'(allowed: {", ".join(allowed)})')
                self.fail(item, msg)
            found[item.key] = item
        for key in required:
            if key not in found:
                self.fail(at, f'missing required key {key!r}', path=at.child(key))
        return found

    def items(self, at: _Field) -> list[_Field]:
        """The items of a YAML list, each located at its own line."""
        if not isinstance(at.node, SequenceNode):
            self.expected(at, 'a list (a YAML sequence, items starting with "- ")')
        if at.node.tag != _SEQ:
            self.unsupported_tag(at)
        result = [_Field(f'{at.path}[{i}]', _line(node), node)
                  for i, node in enumerate(at.node.value)]
        for item in result:
            self.locations[item.path] = item.line
        return result

    def not_too_many(self, at: _Field, limit: int, what: str) -> None:
        """Refuse a list longer than ``limit`` at its first item too many (before building any)."""
        if isinstance(at.node, SequenceNode) and len(at.node.value) > limit:
            extra = self.items(at)[limit]
            self.fail(extra, f'more than {limit} {what}: a skill file is limited to {limit} '
                             f'{what} (see the README, "File limits")')

    # -- scalars ------------------------------------------------------------------------------

    def scalar(self, at: _Field) -> object:
        """The Python value of a plain scalar; other YAML tags are refused, never constructed.

        Mappings and lists are returned as their node so the caller reports the type mismatch.
        """
        node = at.node
        if not isinstance(node, ScalarNode):
            if node.tag not in (_MAP, _SEQ):
                self.unsupported_tag(at)
            return node
        build = _SCALARS.get(node.tag)
        if build is None:
            self.unsupported_tag(at)
        try:
            return build(node)
        except (ValueError, IndexError, KeyError, TypeError, OverflowError):
            self.expected(at, f'a valid {node.tag.removeprefix(_TAG)}')

    def text(self, at: _Field) -> str:
        value = self.scalar(at)
        if not isinstance(value, str):
            self.expected(at, 'text')
        return value

    def nonempty_text(self, at: _Field) -> str:
        text = self.text(at)
        if not text.strip():
            self.fail(at, f'expected a non-empty name, got {text!r}')
        return text

    def name(self, at: _Field, written: str | None = None, *, formula_name: bool = False) -> str:
        """An identifier; names formulas use must also avoid the reserved names."""
        name = self.text(at) if written is None else written
        if not _IDENTIFIER.fullmatch(name) or keyword.iskeyword(name):
            msg = ('expected a name of letters, digits and _ that does not start with a digit '
                   f'and is not a Python keyword, got {_clip(name)!r}')
            self.fail(at, msg)
        if formula_name and name in self.reserved:
            self.fail(at, f'the name {name!r} is reserved by the formula language; '
                          'choose another name')
        return name

    def number(self, at: _Field, *, infinite_ok: bool = False) -> float:
        """A real number; a boolean is not a number and NaN never is one."""
        value = self.scalar(at)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.expected(at, 'a number')
        try:
            number = float(value)
        except OverflowError:
            written = _clip(str(getattr(at.node, 'value', '')))
            self.fail(at, f'expected a finite number, got {written!r}, too large for a float')
        if math.isnan(number) or (math.isinf(number) and not infinite_ok):
            self.fail(at, f'expected a finite number, got {number!r}')
        return number

    def positive(self, at: _Field) -> float:
        number = self.number(at)
        if number <= 0:
            self.fail(at, f'expected a number > 0, got {number!r}')
        return number

    def integer(self, at: _Field) -> int:
        value = self.scalar(at)
        if isinstance(value, bool) or not isinstance(value, int):
            self.expected(at, 'a whole number')
        return value

    def boolean(self, at: _Field) -> bool:
        value = self.scalar(at)
        if not isinstance(value, bool):
            self.expected(at, 'true or false')
        return value

    def formula(self, at: _Field) -> str:
        """Formula text, checked for syntax; a FormulaError gets this field's location."""
        text = self.text(at)
        if not text.strip():
            self.fail(at, f'expected a formula, got {text!r}')
        if self.check_formula is not None:
            try:
                self.check_formula(text)
            except FormulaError as exc:
                raise exc.located(file=self.source, line=at.line, field=at.path) from None
            except (SyntaxError, ValueError, RecursionError, MemoryError) as exc:
                # What ast.parse itself can raise; translated so callers only see SkillError.
                msg = f'cannot read the formula {_clip(text)!r} ({type(exc).__name__}: {exc})'
                raise FormulaError(msg, file=self.source, line=at.line, field=at.path) from None
        return text

    def number_or_formula(self, at: _Field) -> float | str:
        value = self.scalar(at)
        if isinstance(value, str):
            return self.formula(at)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.expected(at, 'a number or a formula')
        return self.number(at)

    def positive_or_tunable(self, at: _Field, tunables: Mapping[str, TunableSpec]) -> float | str:
        """A number > 0, or the name of a tunable that cannot be set to <= 0 at run time."""
        value = self.scalar(at)
        if not isinstance(value, str):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                self.expected(at, 'a number > 0 or the name of a tunable')
            return self.positive(at)
        if value not in tunables:
            declared = ', '.join(tunables) or 'none declared'
            msg = (f'expected a number > 0 or the name of a tunable, got {_clip(value)!r}'
                   f'{_suggest(value, tunables)} (tunables: {declared})')
            self.fail(at, msg)
        lower = tunables[value].lower
        if not lower > 0:
            msg = (f'tunable {value!r} is used where only values > 0 make sense, but its lower '
                   f'bound is {lower!r}; give tunables.{value}.lower a value > 0')
            self.fail(at, msg)
        return value

    # -- sections -----------------------------------------------------------------------------

    def skill(self, root: Node) -> SkillSpec:
        top = self.fields(_Field(DOCUMENT, _line(root), root), _TOP_KEYS, ('skill',))
        spec: dict[str, object] = {'name': self.name(top['skill'])}
        if 'robot' in top:        # without: the controller's model (or check --robot FILE)
            spec['robot'] = self.existing_file(top['robot'], 'robot')
        if 'description' in top:
            spec['description'] = self.text(top['description'])
        if 'base_link' in top:
            spec['base_link'] = self.nonempty_text(top['base_link'])
        tunables = self.each_entry(top.get('tunables'), self.tunable)
        spec['tunables'] = tunables
        inputs = self.each_entry(top.get('inputs'), self.input)
        spec['inputs'] = inputs
        spec['unknowns'] = self.each_entry(top.get('unknowns'), self.unknown)
        spec['formulas'] = self.each_entry(top.get('formulas'), self.named_formula)
        self.unique_names([top[key] for key in ('inputs', 'unknowns', 'tunables', 'formulas')
                           if key in top])
        by_name = {tunable.name: tunable for tunable in tunables}
        if 'constraints' in top:
            self.not_too_many(top['constraints'], MAX_CONSTRAINTS, 'constraints')
        spec['constraints'] = self.each_item(top.get('constraints'),
                                             lambda item: self.constraint(item, by_name))
        spec['events'] = self.each_item(top.get('events'), self.event)
        if 'limits' in top:
            spec['limits'] = self.limits(top['limits'])
        if 'regularisation' in top:
            spec['regularisation'] = self.regularisation(top['regularisation'])
        if 'offline' in top:
            spec['offline'] = self.offline(top['offline'], [item.name for item in inputs])
        spec['locations'] = dict(self.locations)
        return SkillSpec(source=self.source, **spec)  # type: ignore[arg-type]

    def existing_file(self, at: _Field, what: str) -> Path:
        """A path relative to the skill's folder, resolved; it must name an existing file."""
        written = self.nonempty_text(at)
        try:
            path = (self.base_dir / written).resolve()
            exists = path.is_file()
        except (OSError, ValueError, RuntimeError) as exc:
            self.fail(at, f'cannot use the {what} path {written!r}: {exc}')
        if not exists:
            msg = (f'{what} file {written!r} not found (looked for {str(path)!r}; the path is '
                   "relative to the skill file's folder)")
            self.fail(at, msg)
        return path

    def each_entry(self, at: _Field | None, build: Callable[[_Field], _T]) -> tuple[_T, ...]:
        return () if at is None else tuple(build(item) for item in self.entries(at))

    def each_item(self, at: _Field | None, build: Callable[[_Field], _N]) -> tuple[_N, ...]:
        """Build every list item, rejecting a name given to two items of the list."""
        if at is None:
            return ()
        built: list[_N] = []
        first: dict[str, str] = {}
        for item in self.items(at):
            spec = build(item)
            if spec.name in first:
                earlier = first[spec.name]
                msg = (f'the name {spec.name!r} is already used by {earlier} (line '
                       f'{self.locations[earlier]}); names in {at.path} must be unique')
                self.fail(_Field(f'{item.path}.name', self.locations[f'{item.path}.name'],
                                 item.node), msg)
            first[spec.name] = item.path
            built.append(spec)
        return tuple(built)

    def unique_names(self, sections: Sequence[_Field]) -> None:
        """Formulas see one namespace across these sections; the later use is reported."""
        first: dict[str, _Field] = {}
        for item in sorted((item for section in sections for item in self.entries(section)),
                           key=lambda item: item.line):
            if item.key in first:
                earlier = first[item.key]
                msg = (f'the name {item.key!r} is already used by {earlier.path} (line '
                       f'{earlier.line}); inputs, unknowns, tunables and formulas share one '
                       'namespace')
                self.fail(item, msg)
            first[item.key] = item

    def input(self, at: _Field) -> InputSpec:
        name = self.name(at, at.key, formula_name=True)
        f = self.fields(at, _INPUT_KEYS)
        spec: dict[str, object] = {}
        if 'unit' in f:
            spec['unit'] = self.text(f['unit'])
        rate = self.positive(f['rate_hz']) if 'rate_hz' in f else _default(InputSpec, 'rate_hz')
        # Stale after three missed samples, never sooner than 0.1 s (common practice).
        timeout = self.positive(f['timeout']) if 'timeout' in f else max(0.1, 3.0 / rate)
        return InputSpec(name=name, rate_hz=rate, timeout=timeout, **spec)  # type: ignore[arg-type]

    def unknown(self, at: _Field) -> UnknownSpec:
        name = self.name(at, at.key, formula_name=True)
        f = self.fields(at, _UNKNOWN_KEYS)
        start = self.number(f['start']) if 'start' in f else _default(UnknownSpec, 'start')
        lower, upper = self.bounds(f)
        self.inside(at, f, 'start', start, lower, upper)
        spec: dict[str, object] = {}
        if 'max_speed' in f:
            spec['max_speed'] = self.positive(f['max_speed'])
        if 'unit' in f:
            spec['unit'] = self.text(f['unit'])
        return UnknownSpec(name=name, start=start, lower=lower, upper=upper,
                           **spec)  # type: ignore[arg-type]

    def tunable(self, at: _Field) -> TunableSpec:
        name = self.name(at, at.key, formula_name=True)
        f = self.fields(at, _TUNABLE_KEYS, ('value',))
        value = self.number(f['value'])
        lower, upper = self.bounds(f)
        self.inside(at, f, 'value', value, lower, upper)
        spec = {key: self.text(f[key]) for key in ('unit', 'description') if key in f}
        return TunableSpec(name=name, value=value, lower=lower, upper=upper, **spec)

    def named_formula(self, at: _Field) -> tuple[str, str]:
        return self.name(at, at.key, formula_name=True), self.formula(at)

    def bounds(self, f: Mapping[str, _Field]) -> tuple[float, float]:
        """Optional lower/upper (infinite allowed); out of order is reported at ``lower``."""
        lower = self.number(f['lower'], infinite_ok=True) if 'lower' in f else -math.inf
        upper = self.number(f['upper'], infinite_ok=True) if 'upper' in f else math.inf
        if lower > upper:
            self.fail(f['lower'], f'expected lower <= upper, got lower={lower!r} > '
                                  f'upper={upper!r}')
        return lower, upper

    def inside(self, at: _Field, f: Mapping[str, _Field], key: str, value: float,
               lower: float, upper: float) -> None:
        if lower <= value <= upper:
            return
        default = '' if key in f else ' (the default; set it explicitly)'
        msg = f'expected {key} within [{lower!r}, {upper!r}], got {value!r}{default}'
        self.fail(f.get(key, at), msg, path=at.child(key))

    def constraint(self, at: _Field, tunables: Mapping[str, TunableSpec]) -> ConstraintSpec:
        f = self.fields(at, _CONSTRAINT_KEYS, ('name', 'function'))
        spec: dict[str, object] = {'name': self.name(f['name']),
                                   'function': self.formula(f['function'])}
        kind = self.kind(f['kind']) if 'kind' in f else 'equal'
        spec['kind'] = kind
        needed = _KIND_KEYS[kind]
        for key in ('target', 'lower', 'upper'):
            if key in f and key not in needed:
                self.fail(f[key], f'a constraint of kind {kind!r} takes '
                                  f'{" and ".join(needed)}, not {key!r}')
        for key in needed:
            if key not in f:
                self.fail(f.get('kind', at), f'a constraint of kind {kind!r} needs {key!r}',
                          path=at.child(key))
            spec[key] = self.number_or_formula(f[key])
        low, high = spec.get('lower'), spec.get('upper')
        if isinstance(low, float) and isinstance(high, float) and low > high:
            self.fail(f['lower'], f'expected lower <= upper, got lower={low!r} > upper={high!r}')
        if 'behaviour' in f:
            spec['behaviour'] = self.behaviour(f['behaviour'], tunables)
        if 'hard' in f:
            spec['hard'] = self.boolean(f['hard'])
        if 'weight' in f:
            spec['weight'] = self.positive_or_tunable(f['weight'], tunables)
        if 'priority' in f:
            spec['priority'] = self.priority(f['priority'])
        return ConstraintSpec(**spec)  # type: ignore[arg-type]

    def kind(self, at: _Field) -> str:
        kind = self.text(at)
        if kind not in CONSTRAINT_KINDS:
            self.fail(at, f'expected one of {", ".join(CONSTRAINT_KINDS)}, got {_clip(kind)!r}'
                          f'{_suggest(kind, CONSTRAINT_KINDS)}')
        return kind

    def priority(self, at: _Field) -> int:
        value = self.integer(at)
        if value < 1:
            self.fail(at, f'expected a whole number >= 1 (1 is the most important level), '
                          f'got {value!r}')
        return value

    def behaviour(self, at: _Field, tunables: Mapping[str, TunableSpec]) -> BehaviourSpec:
        f = self.fields(at, _BEHAVIOUR_KEYS)
        order = self.integer(f['order']) if 'order' in f else 1
        if order not in _ORDER_KEYS:
            self.fail(f['order'], f'expected order 1 or 2, got {order!r}')
        takes = _ORDER_KEYS[order]
        for key in _BEHAVIOUR_KEYS[1:]:
            if key in f and key not in takes:
                self.fail(f[key], f'a behaviour of order {order} takes only '
                                  f'{" and ".join(takes)}, not {key!r}')
        values = {key: self.positive_or_tunable(f[key], tunables) for key in takes if key in f}
        return BehaviourSpec(order=1 if order == 1 else 2, **values)

    def event(self, at: _Field) -> EventSpec:
        f = self.fields(at, _EVENT_KEYS, ('name', 'condition'))
        name = self.name(f['name'])
        condition = self.formula(f['condition'])
        if 'hold_for' not in f:
            return EventSpec(name=name, condition=condition)
        hold_for = self.number(f['hold_for'])
        if hold_for < 0:
            self.fail(f['hold_for'], f'expected a number >= 0 (seconds), got {hold_for!r}')
        return EventSpec(name=name, condition=condition, hold_for=hold_for)

    def per_joint(self, at: _Field) -> dict[str, float]:
        """Numbers > 0 keyed by URDF joint name (the names are checked against the URDF later)."""
        return {item.key: self.positive(item) for item in self.entries(at)}

    def limits(self, at: _Field) -> LimitsSpec:
        f = self.fields(at, _LIMITS_KEYS)
        spec: dict[str, object] = {key: self.positive(f[key]) for key in
                                   ('joint_speed', 'joint_acceleration', 'position_gain')
                                   if key in f}
        if 'joint_speeds' in f:
            spec['joint_speeds'] = self.per_joint(f['joint_speeds'])
        return LimitsSpec(**spec)  # type: ignore[arg-type]

    def regularisation(self, at: _Field) -> RegularisationSpec:
        f = self.fields(at, _REGULARISATION_KEYS)
        spec: dict[str, object] = {key: self.positive(f[key]) for key in
                                   ('damping', 'unknown_weight') if key in f}
        if 'joint_weights' in f:
            spec['joint_weights'] = self.per_joint(f['joint_weights'])
        return RegularisationSpec(**spec)  # type: ignore[arg-type]

    def offline(self, at: _Field, inputs: Sequence[str]) -> OfflineSpec:
        f = self.fields(at, _OFFLINE_KEYS)
        spec: dict[str, object] = {}
        if 'start' in f:
            spec['start'] = {item.key: self.number(item) for item in self.entries(f['start'])}
        if 'inputs' in f:
            values: dict[str, float] = {}
            for item in self.entries(f['inputs']):
                if item.key not in inputs:
                    self.fail(item, f'{_clip(item.key)!r} is not a declared input'
                                    f'{_suggest(item.key, inputs)} (inputs: '
                                    f'{", ".join(inputs) or "none declared"})')
                values[item.key] = self.number(item)
            spec['inputs'] = values
        if 'scene' in f:
            spec['scene'] = self.existing_file(f['scene'], 'scene')
        return OfflineSpec(**spec)  # type: ignore[arg-type]


def _default(cls: type, name: str) -> float:
    """A dataclass field's default (slotted dataclasses do not keep it as a class attribute)."""
    for spec_field in dataclass_fields(cls):
        if spec_field.name == name:
            return float(spec_field.default)
    raise AssertionError(name)
