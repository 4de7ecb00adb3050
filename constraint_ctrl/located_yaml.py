"""YAML to plain Python values plus the line of every field, for small configuration files.

Used by file formats whose validation is simple enough to run on plain values (task plans); the
skill loader has its own node-level reader because it also refuses tags and checks formulas as
it goes. Only YAML's core scalars, lists and mappings are built (SafeLoader), duplicate keys are
refused, and ``lines`` maps field paths (``steps[2].set.goal_x``) to 1-based lines.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from .errors import LocatedError


def load_located(path: Path, error: type[LocatedError]) -> tuple[Any, dict[str, int]]:
    """(value, lines) of a YAML file; any problem is raised as ``error`` with its location."""
    source = str(path)
    try:
        text = path.read_text(encoding='utf-8')
    except (OSError, UnicodeDecodeError) as err:
        raise error(f'cannot read the file: {err}', file=source) from None
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as err:
        mark = getattr(err, 'problem_mark', None)
        raise error(f'not valid YAML: {getattr(err, "problem", err)}', file=source,
                    line=mark.line + 1 if mark else None) from None
    if node is None:
        raise error('the file is empty', file=source, line=1)
    lines: dict[str, int] = {}
    constructor = yaml.SafeLoader('')

    def build(n: Node, path: str) -> Any:
        lines[path] = n.start_mark.line + 1
        if isinstance(n, MappingNode):
            out: dict[str, Any] = {}
            for key_node, value_node in n.value:
                key = str(constructor.construct_object(key_node, deep=True))
                if key in out:
                    raise error(f'duplicate key {key!r}', file=source,
                                line=key_node.start_mark.line + 1,
                                field=f'{path}.{key}' if path else key)
                out[key] = build(value_node, f'{path}.{key}' if path else key)
            return out
        if isinstance(n, SequenceNode):
            return [build(item, f'{path}[{i}]') for i, item in enumerate(n.value)]
        assert isinstance(n, ScalarNode)
        try:
            return constructor.construct_object(n, deep=True)
        except yaml.YAMLError as err:
            raise error(f'unsupported value: {err}', file=source,
                        line=n.start_mark.line + 1, field=path) from None

    return build(node, ''), lines


__all__ = ['load_located']
