"""The geometry a skill names, evaluated for drawing (~/markers, the demo's marker figure).

A skill has no separate geometry section: points, lines and planes appear inside its formulas.
This module finds the ones whose meaning can be read off the constraint honestly, by its shape,
and compiles one CasADi function that evaluates them from the very inputs the tick's solve
used (``SkillSolver.input_values``). What is drawn, per constraint:

* ``distance_to_plane(p, plane)`` anywhere in the task function: the plane (as a square patch
  centred on p's foot point on it) and the point p;
* ``distance_to_line(p, line)``: the line (a segment centred on p's foot point) and p;
* a task function that is a position (``position(link)``, ``point(link, x, y, z)``, directly
  or through named formulas) with kind ``equal`` and a vector target: the point, the target
  and the segment between them; with kind ``within`` and vector bounds: the box between the
  bounds;
* a component of a position (``tip[2]``) with number bounds: the plane(s) across that axis at
  each bound (``at_least``, ``at_most``, ``within``), centred below/above the point.

Not drawn (no honest picture from the shape alone): orientation rows (``cross``/``dot`` of
axes, ``rotation_error``), distances and angles (``norm``, ``angle_between``), joint-space rows,
unknowns, and positions whose bounds are themselves not constant along the other axes in a way
the rules above cover. ``SkillGeometry.not_drawn`` lists the constraints left out.

Middleware-free (core): the node turns ``Shape`` values into visualization_msgs markers.
"""
from __future__ import annotations

import ast
from dataclasses import dataclass, field
from typing import Any

import casadi as ca
import numpy as np

from .compile import FUNCTION_INPUTS, CompiledSkill, _Builder
from .formula import Quantity, compile_formula

#: Size of the patch drawn for a plane and half length of a drawn line segment (m).
PLANE_PATCH = 0.2
LINE_HALF_LENGTH = 0.3
_POSITION_CALLS = ('position', 'point')


@dataclass(frozen=True)
class Shape:
    """One drawable item in the base frame (m).

    kind 'point': ``data`` (3,); 'segment': (2, 3) start and end; 'plane': (4,) unit normal n
    and offset d (points x with n.x = d) plus ``centre`` (3,) where to centre the patch;
    'line': (6,) point and unit direction plus ``centre``; 'box': (2, 3) lower and upper corner.
    """

    constraint: str
    kind: str
    data: np.ndarray
    centre: np.ndarray | None = None


@dataclass
class SkillGeometry:
    """The compiled geometry of one skill (see the module docstring)."""

    skill: str
    function: ca.Function | None
    items: list[tuple[str, str, list[tuple[int, int]]]]  # (constraint, kind, output slices)
    not_drawn: list[str] = field(default_factory=list)

    @classmethod
    def of(cls, compiled: CompiledSkill) -> SkillGeometry:
        return _build(compiled)

    def evaluate(self, inputs: dict[str, np.ndarray]) -> list[Shape]:
        """Shapes at the given function inputs (names of ``FUNCTION_INPUTS``; q_now/s_now
        default to q/s, as the solver feeds them). Non-finite shapes are left out."""
        if self.function is None:
            return []
        args = {name: inputs.get(name, inputs.get({'q_now': 'q', 's_now': 's'}.get(name, name)))
                for name in FUNCTION_INPUTS}
        out = np.asarray(self.function(*[args[name] for name in FUNCTION_INPUTS])).reshape(-1)
        shapes = []
        for constraint, kind, slices in self.items:
            parts = [out[a:b] for a, b in slices]
            if not all(np.isfinite(p).all() for p in parts):
                continue
            shapes.append(_shape(constraint, kind, parts))
        return shapes


def _shape(constraint: str, kind: str, parts: list[np.ndarray]) -> Shape:
    if kind == 'point':
        return Shape(constraint, kind, parts[0].copy())
    if kind in ('segment', 'box'):
        return Shape(constraint, kind, np.vstack([parts[0], parts[1]]))
    if kind == 'plane':
        plane, point = parts
        n, d = plane[:3], plane[3]
        return Shape(constraint, kind, plane.copy(), point - (float(n @ point) - d) * n)
    # line (a, u): centred on the foot point of p, a + ((p - a) . u) u
    line, point = parts
    a, u = line[:3], line[3:]
    return Shape(constraint, kind, line.copy(), a + float((point - a) @ u) * u)


class _Finder:
    """Reads constraint formulas for the shapes above; compiles the pieces it needs."""

    def __init__(self, compiled: CompiledSkill) -> None:
        spec = compiled.spec
        builder = _Builder(spec, compiled.model)
        scope = builder._scope()   # the same names and symbols the skill compiled with
        self.texts = dict(spec.formulas)
        for name, text in spec.formulas:
            scope.names[name] = compile_formula(str(text), scope)
        self.scope = scope
        self.builder = builder
        self.outputs: list[ca.SX] = []
        self.size = 0

    def value(self, text: str) -> Quantity:
        return compile_formula(text, self.scope)

    def add(self, sx: ca.SX) -> tuple[int, int]:
        flat = ca.vec(sx)
        start = self.size
        self.outputs.append(flat)
        self.size += flat.numel()
        return start, self.size

    def is_position(self, node: ast.AST, depth: int = 0) -> bool:
        """A position by its spelling: position(...), point(...), or a name for one."""
        if depth > 20:
            return False
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            if node.func.id in _POSITION_CALLS:
                return True
            if node.func.id == 'value_now' and len(node.args) == 1:
                return self.is_position(node.args[0], depth + 1)
            return False
        if isinstance(node, ast.Name) and node.id in self.texts:
            try:
                tree = ast.parse(str(self.texts[node.id]).strip(), mode='eval')
            except SyntaxError:
                return False
            return self.is_position(tree.body, depth + 1)
        return False


def _bound_text(value: Any) -> str | None:
    return None if value is None else str(value)


def _build(compiled: CompiledSkill) -> SkillGeometry:
    finder = _Finder(compiled)
    items: list[tuple[str, str, list[tuple[int, int]]]] = []
    not_drawn: list[str] = []
    for con in compiled.spec.constraints:
        try:
            tree = ast.parse(str(con.function).strip(), mode='eval').body
        except SyntaxError:
            not_drawn.append(con.name)
            continue
        before = len(items)
        for node in ast.walk(tree):
            if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
                    and node.func.id in ('distance_to_plane', 'distance_to_line')
                    and len(node.args) == 2):
                point = finder.value(ast.unparse(node.args[0]))
                shape = finder.value(ast.unparse(node.args[1]))
                kind = 'plane' if node.func.id == 'distance_to_plane' else 'line'
                items.append((con.name, kind, [finder.add(shape.sx), finder.add(point.sx)]))
                items.append((con.name, 'point', [finder.add(point.sx)]))
        if len(items) == before:
            items.extend(_position_items(finder, con, tree))
        if len(items) == before:
            not_drawn.append(con.name)
    if not items:
        return SkillGeometry(compiled.spec.name, None, [], not_drawn)
    b = finder.builder
    n_params = len(compiled.params)
    n_tunables = len(compiled.spec.tunables)
    rest = ca.SX.sym('p_rest', n_params - n_tunables)
    p = ca.vertcat(*finder.builder.params.symbols[:n_tunables], rest)
    inputs = [b.q, b.s, b.q_now, b.s_now, b.q_start, b.s_start, b.u, b.t, b.dt, b.x_prev, p]
    fn = ca.Function(f'geometry_{compiled.spec.name}', inputs, [ca.vertcat(*finder.outputs)],
                     list(FUNCTION_INPUTS), ['shapes'])
    return SkillGeometry(compiled.spec.name, fn, items, not_drawn)


def _component_axes(finder: _Finder, tree: ast.AST) -> tuple[str, list[int]] | None:
    """For ``vector(c0, c1, c2)`` whose components are P[i] (each in its own place i, one
    position P) or the number 0: (P's text, the axes taken from P); else None."""
    if not (isinstance(tree, ast.Call) and isinstance(tree.func, ast.Name)
            and tree.func.id == 'vector' and len(tree.args) == 3):
        return None
    position: str | None = None
    kept: list[int] = []
    for axis, arg in enumerate(tree.args):
        if isinstance(arg, ast.Constant) and arg.value == 0:
            continue
        if not (isinstance(arg, ast.Subscript) and isinstance(arg.slice, ast.Constant)
                and arg.slice.value == axis and finder.is_position(arg.value)):
            return None
        text = ast.unparse(arg.value)
        if position not in (None, text):
            return None
        position = text
        kept.append(axis)
    return (position, kept) if position is not None else None


def _position_items(finder: _Finder, con: Any, tree: ast.AST
                    ) -> list[tuple[str, str, list[tuple[int, int]]]]:
    items: list[tuple[str, str, list[tuple[int, int]]]] = []
    if finder.is_position(tree):
        point = finder.value(ast.unparse(tree))
        if con.kind == 'equal' and con.target is not None:
            target = finder.value(str(con.target))
            if target.kind == 'vector':
                items.append((con.name, 'point', [finder.add(target.sx)]))
                items.append((con.name, 'segment', [finder.add(point.sx),
                                                    finder.add(target.sx)]))
        elif con.kind == 'within' and con.lower is not None and con.upper is not None:
            lower, upper = finder.value(str(con.lower)), finder.value(str(con.upper))
            if lower.kind == 'vector' and upper.kind == 'vector':
                items.append((con.name, 'box', [finder.add(lower.sx), finder.add(upper.sx)]))
        if items:
            items.append((con.name, 'point', [finder.add(point.sx)]))
        return items
    axes = _component_axes(finder, tree)
    if axes is not None and con.kind == 'equal' and con.target is not None:
        # vector(P[i], P[j], 0): the constrained components of P meet the target's; the free
        # axes (written 0 on both sides) span a line (one free axis) or a plane (two)
        position, kept = axes
        target = finder.value(str(con.target))
        free = [a for a in range(3) if a not in kept]
        if target.kind == 'vector' and len(free) in (1, 2):
            point = finder.value(position)
            anchor = ca.SX(target.sx)
            for a in free:
                anchor[a] = point.sx[a]
            if len(free) == 1:
                direction = np.zeros(3)
                direction[free[0]] = 1.0
                line = ca.vertcat(anchor, ca.DM(direction))
                items.append((con.name, 'line', [finder.add(line), finder.add(point.sx)]))
            else:
                normal = np.zeros(3)
                normal[kept[0]] = 1.0
                plane = ca.vertcat(ca.DM(normal), target.sx[kept[0]])
                items.append((con.name, 'plane', [finder.add(plane), finder.add(point.sx)]))
            items.append((con.name, 'point', [finder.add(point.sx)]))
        return items
    if (isinstance(tree, ast.Subscript) and finder.is_position(tree.value)
            and isinstance(tree.slice, ast.Constant) and tree.slice.value in (0, 1, 2)):
        axis = int(tree.slice.value)
        point = finder.value(ast.unparse(tree.value))
        normal = np.zeros(3)
        normal[axis] = 1.0
        for text in (_bound_text(con.lower), _bound_text(con.upper),
                     _bound_text(con.target if con.kind == 'equal' else None)):
            if text is None:
                continue
            bound = finder.value(text)
            if bound.kind != 'scalar':
                continue
            plane = ca.vertcat(ca.DM(normal), bound.sx)
            items.append((con.name, 'plane', [finder.add(plane), finder.add(point.sx)]))
        if items:
            items.append((con.name, 'point', [finder.add(point.sx)]))
    return items


__all__ = ['LINE_HALF_LENGTH', 'PLANE_PATCH', 'Shape', 'SkillGeometry']
