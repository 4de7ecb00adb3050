"""YAML to plain Python values plus the line of every field, and the size limits of our formats.

Used by file formats whose validation is simple enough to run on plain values (task plans); the
skill loader has its own node-level reader because it also refuses tags and checks formulas as
it goes. Only YAML's core scalars, lists and mappings are built (SafeLoader), duplicate and
merge (<<) keys are refused, and ``lines`` maps field paths (``steps[2].set.goal_x``) to 1-based
lines (a mapping entry's line is its key's line).

Limits shared by every YAML format of the package (skills, plans, scenes), so that no file can
make a loader run for minutes or fill the memory (aliases and merge keys let a small text stand
for a huge value):

* ``MAX_FILE_BYTES``: a file larger than 1,000,000 bytes is refused before it is parsed (our
  largest example skill is about 6 kB);
* ``MAX_EXPANDED_VALUES``: the value a file stands for, with every alias and merge key written
  out, may hold at most 100,000 values (each scalar, list and mapping counts one, a mapping
  entry counts its key and its value). ``check_expansion`` counts this in time linear in the
  size of the text (each node is measured once), also for merge chains whose naive expansion is
  exponential, and names the line of the first node that is too big.
"""
from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from .errors import LocatedError

MERGE_TAG = 'tag:yaml.org,2002:merge'
#: Largest file (bytes) any of our YAML formats reads.
MAX_FILE_BYTES = 1_000_000
#: Largest number of values a file may expand to (aliases and merge keys written out).
MAX_EXPANDED_VALUES = 100_000
TOO_DEEP = 'the YAML is nested too deeply or refers to itself through an alias'
#: Line breaks as YAML counts them (for errors that carry a character position only).
_BREAK = re.compile('\r\n|[\n\r\x85\u2028\u2029]')


def read_limited(path: Path, error: type[LocatedError], *, field: str | None = None,
                 limit: int = MAX_FILE_BYTES) -> bytes:
    """The bytes of a file of at most ``limit`` bytes; a larger one is refused unread.

    Only ``limit + 1`` bytes are ever read, so a huge file (or a device) costs nothing.
    Raises ``error`` naming the file: ``OSError`` (missing, a folder, no permission) and
    ``ValueError`` (a NUL in the path) included.
    """
    source = str(path)
    try:
        with open(path, 'rb') as handle:
            data = handle.read(limit + 1)
    except (OSError, ValueError) as err:
        reason = err.strerror if isinstance(err, OSError) and err.strerror else str(err)
        raise error(f'cannot read the file: {reason}', file=source, field=field) from None
    if len(data) > limit:
        raise error(f'the file is larger than the limit of {limit:,} bytes for our YAML '
                    'formats; split it or remove what it does not need', file=source,
                    line=1, field=field)
    return data


def check_expansion(root: Node, error: type[LocatedError], source: str, *,
                    field: str | None = None, budget: int = MAX_EXPANDED_VALUES) -> int:
    """Count the values ``root`` stands for with aliases and merge keys written out.

    Returns the count; raises ``error`` located at the first node (innermost first) whose value
    is larger than ``budget``, or at a node that contains itself through an alias (which no
    finite value can). Linear in the number of nodes and alias uses: each node is measured once
    and its count reused wherever an alias repeats it.
    """
    counter = _Expansion(error, source, field, budget)
    try:
        return counter.size(root)
    except RecursionError:
        raise error(TOO_DEEP, file=source, line=1, field=field) from None


class _Expansion:
    """Memoised sizes of a YAML node graph (aliases share nodes: the graph is a DAG or cyclic).

    A mapping's merge keys follow yaml.org/type/merge.html: its own keys win over merged ones,
    earlier merged mappings over later ones; its size counts each resulting key once. The field
    path of the node being measured is kept as a stack, so a refusal names the field
    (``steps[2].set``) where the value first grows too big.
    """

    def __init__(self, error: type[LocatedError], source: str, field: str | None,
                 budget: int) -> None:
        self.error, self.source, self.field, self.budget = error, source, field, budget
        self.sizes: dict[int, int] = {}
        self.entries: dict[int, list[tuple[Node, Node]]] = {}
        self.open: set[int] = set()
        self.merging: set[int] = set()
        self.merge_steps = 0
        self.path: list[str] = []

    def fail(self, node: Node, message: str) -> None:
        field = ''.join(self.path).lstrip('.') or self.field
        raise self.error(message, file=self.source, line=node.start_mark.line + 1, field=field)

    def too_big(self, node: Node) -> None:
        self.fail(node, f'this value holds more than {self.budget:,} values (scalars, lists and '
                        'mappings, with aliases and merge keys written out); files of our '
                        'formats are limited to that')

    def size(self, node: Node) -> int:
        key = id(node)
        known = self.sizes.get(key)
        if known is not None:
            return known
        if key in self.open:
            self.fail(node, 'this value refers to itself through an alias, so it has no end')
        self.open.add(key)
        total = 1
        path = self.path
        if isinstance(node, SequenceNode):
            for i, item in enumerate(node.value):
                path.append(f'[{i}]')
                total += self.size(item)
                path.pop()
                if total > self.budget:
                    break
        elif isinstance(node, MappingNode):
            for key_node, value_node in self.mapping_entries(node):
                name = key_node.value if isinstance(key_node, ScalarNode) else '?'
                path.append(f'.{name}')
                total += self.size(key_node) + self.size(value_node)
                path.pop()
                if total > self.budget:
                    break
        self.open.discard(key)
        if total > self.budget:
            self.too_big(node)
        self.sizes[key] = total
        return total

    def mapping_entries(self, node: MappingNode) -> list[tuple[Node, Node]]:
        """The mapping's entries after applying its merge keys (computed once per node)."""
        key = id(node)
        known = self.entries.get(key)
        if known is not None:
            return known
        own = [(k, v) for k, v in node.value if k.tag != MERGE_TAG]
        if len(own) == len(node.value):
            self.entries[key] = own
            return own
        if key in self.merging:
            self.fail(node, 'a merge key << refers to the mapping it is part of')
        self.merging.add(key)
        seen = {_identity(k) for k, _ in own}
        result = list(own)
        for key_node, value_node in node.value:
            if key_node.tag != MERGE_TAG:
                continue
            sources = value_node.value if isinstance(value_node, SequenceNode) else [value_node]
            for source in sources:
                if not isinstance(source, MappingNode):
                    continue       # the format's reader names this mistake with its line
                for pair in self.mapping_entries(source):
                    self.merge_steps += 1
                    if self.merge_steps > self.budget:
                        self.too_big(node)
                    ident = _identity(pair[0])
                    if ident not in seen:
                        seen.add(ident)
                        result.append(pair)
        self.merging.discard(key)
        self.entries[key] = result
        return result


def _identity(key: Node) -> object:
    """What makes two mapping keys the same key (their tag and text; collections by node)."""
    return (key.tag, key.value) if isinstance(key, ScalarNode) else id(key)


class CountingLoader(yaml.SafeLoader):
    """PyYAML's pure SafeLoader that stops composing after ``MAX_EXPANDED_VALUES`` nodes.

    Written nodes are never more than the expanded ones, so a file this stops is one that
    ``check_expansion`` would refuse anyway; stopping early bounds the parsing time too.
    """

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self.nodes_composed = 0

    def compose_node(self, parent: Node | None, index: object) -> Node:  # type: ignore[override]
        self.nodes_composed += 1
        if self.nodes_composed > MAX_EXPANDED_VALUES:
            mark = self.peek_event().start_mark
            raise TooManyNodes(mark)
        return super().compose_node(parent, index)


class TooManyNodes(yaml.YAMLError):
    """Raised by CountingLoader; ``problem_mark`` is where composing stopped."""

    def __init__(self, mark: yaml.Mark) -> None:
        self.problem_mark = mark
        self.problem = (f'the file holds more than {MAX_EXPANDED_VALUES:,} values; files '
                        'of our formats are limited to that')
        super().__init__(self.problem)


def load_located(path: Path, error: type[LocatedError]) -> tuple[Any, dict[str, int]]:
    """(value, lines) of a YAML file; any problem is raised as ``error`` with its location."""
    source = str(path)
    data = read_limited(path, error)
    try:
        text = data.decode('utf-8')
    except ValueError as err:  # not UTF-8
        raise error(f'cannot read the file: {err}', file=source) from None
    loader: CountingLoader | None = None
    try:
        loader = CountingLoader(text)   # the reader checks the characters here already
        node = loader.get_single_node()
    except RecursionError:
        raise error(TOO_DEEP, file=source, line=1) from None
    except TooManyNodes as err:
        raise error(err.problem, file=source, line=err.problem_mark.line + 1) from None
    except yaml.YAMLError as err:
        mark = getattr(err, 'problem_mark', None)
        line = mark.line + 1 if mark else None
        if line is None and isinstance(getattr(err, 'position', None), int):
            line = len(_BREAK.findall(text, 0, err.position)) + 1  # ReaderError: no mark
        raise error(f'not valid YAML: {getattr(err, "problem", err)}', file=source,
                    line=line) from None
    finally:
        if loader is not None:
            loader.dispose()
    if node is None:
        raise error('the file is empty', file=source, line=1)
    check_expansion(node, error, source)
    lines: dict[str, int] = {}
    constructor = yaml.SafeLoader('')

    def scalar(n: Node, path: str, what: str) -> Any:
        try:
            return constructor.construct_object(n, deep=True)
        except (yaml.YAMLError, ValueError) as err:  # ValueError: a date like 2020-13-45
            reason = getattr(err, 'problem', None) or err
            raise error(f'unsupported {what}: {reason}', file=source,
                        line=n.start_mark.line + 1, field=path or None) from None

    def build(n: Node, path: str, line: int) -> Any:
        # A mapping field's line is its key's line (also when the value starts below it).
        lines[path] = line
        if isinstance(n, MappingNode):
            out: dict[str, Any] = {}
            for key_node, value_node in n.value:
                key_line = key_node.start_mark.line + 1
                if key_node.tag == MERGE_TAG:
                    raise error('merge keys (<<) are not supported here; write the fields out',
                                file=source, line=key_line, field=path or None)
                key = str(scalar(key_node, path, 'key'))
                child = f'{path}.{key}' if path else key
                if key in out:
                    raise error(f'duplicate key {key!r}', file=source, line=key_line,
                                field=child)
                out[key] = build(value_node, child, key_line)
            return out
        if isinstance(n, SequenceNode):
            return [build(item, f'{path}[{i}]', item.start_mark.line + 1)
                    for i, item in enumerate(n.value)]
        assert isinstance(n, ScalarNode)
        return scalar(n, path, 'value')

    try:
        return build(node, '', node.start_mark.line + 1), lines
    except RecursionError:  # an alias inside the node it names, or absurd nesting
        raise error(TOO_DEEP, file=source, line=1) from None


__all__ = ['MAX_EXPANDED_VALUES', 'MAX_FILE_BYTES', 'CountingLoader', 'TooManyNodes',
           'check_expansion', 'load_located', 'read_limited']
