"""YAML to plain Python values plus the line of every field, for small configuration files.

Used by file formats whose validation is simple enough to run on plain values (task plans); the
skill loader has its own node-level reader because it also refuses tags and checks formulas as
it goes. Only YAML's core scalars, lists and mappings are built (SafeLoader), duplicate and
merge (<<) keys are refused, and ``lines`` maps field paths (``steps[2].set.goal_x``) to 1-based
lines (a mapping entry's line is its key's line).
"""
from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from .errors import LocatedError

MERGE_TAG = 'tag:yaml.org,2002:merge'
TOO_DEEP = 'the YAML is nested too deeply or refers to itself through an alias'
#: Line breaks as YAML counts them (for errors that carry a character position only).
_BREAK = re.compile('\r\n|[\n\r\x85\u2028\u2029]')


def load_located(path: Path, error: type[LocatedError]) -> tuple[Any, dict[str, int]]:
    """(value, lines) of a YAML file; any problem is raised as ``error`` with its location."""
    source = str(path)
    try:
        text = path.read_text(encoding='utf-8')
    except (OSError, ValueError) as err:  # ValueError: not UTF-8, or a NUL in the path
        raise error(f'cannot read the file: {err}', file=source) from None
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except RecursionError:
        raise error(TOO_DEEP, file=source, line=1) from None
    except yaml.YAMLError as err:
        mark = getattr(err, 'problem_mark', None)
        line = mark.line + 1 if mark else None
        if line is None and isinstance(getattr(err, 'position', None), int):
            line = len(_BREAK.findall(text, 0, err.position)) + 1  # ReaderError: no mark
        raise error(f'not valid YAML: {getattr(err, "problem", err)}', file=source,
                    line=line) from None
    if node is None:
        raise error('the file is empty', file=source, line=1)
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


__all__ = ['load_located']
