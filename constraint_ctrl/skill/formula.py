"""The formula language of skill files, translated into CasADi SX expressions.

A formula is parsed with Python's ``ast`` (mode 'eval') and only a small whitelist of node types
is accepted; each node is then translated into CasADi, so no text is ever evaluated as code.
Values carry a kind (see ``Quantity``) so that type mistakes are reported in the words of the
formula, not as matrix dimension errors.

Language summary (also in ``FUNCTIONS``):

* numbers: int and float literals; ``pi``. ``True``/``False``, strings and other literals are
  not part of the language (write a comparison where a condition is needed).
* arithmetic: ``+ - * / **`` on scalars; ``+ -`` on vectors; scalar * vector, vector * scalar,
  vector / scalar; unary ``-``/``+``; ``v[0]`` .. ``v[2]`` picks a vector component.
* conditions: ``< <= > >=`` (chains allowed) on scalars, combined with ``and``/``or``/``not``;
  their result is a 'boolean', which is not allowed in arithmetic. ``==``/``!=`` are not
  offered: exact equality of measured numbers is fragile, compare with a tolerance instead.
* calls: only the functions of ``FUNCTIONS``, positional arguments only. Link names appear only
  as frame arguments (``position(tool_tip)``) and joint names only in ``joint(joint_3)``.
"""
from __future__ import annotations

import ast
import difflib
import math
import operator
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import casadi as ca

from ..errors import FormulaError
from ..model.kinematics import RobotModel

MAX_LENGTH = 2000   #: characters; keeps hostile input cheap
MAX_DEPTH = 50      #: nesting depth of the syntax tree

#: Matrix shape of each kind. 'plane' is [n; d] (unit normal n, points p with n.p = d);
#: 'line' is [point; unit direction]; 'boolean' is 0/1; 'frame' is a 4x4 pose in base_link.
KIND_SHAPES: dict[str, tuple[int, int]] = {
    'scalar': (1, 1), 'vector': (3, 1), 'frame': (4, 4), 'plane': (4, 1), 'line': (6, 1),
    'boolean': (1, 1),
}
CONSTANTS: dict[str, float] = {'pi': math.pi}

_SMALL_SIN2 = 1e-6   # below this sin^2(angle) (and cos > 0) rotation_error uses its series


@dataclass(frozen=True, slots=True)
class Quantity:
    """A typed formula value: its kind and the CasADi expression (shape per KIND_SHAPES)."""

    kind: str
    sx: ca.SX

    def __post_init__(self) -> None:
        if self.kind not in KIND_SHAPES:
            msg = f'unknown quantity kind {self.kind!r}; expected one of {", ".join(KIND_SHAPES)}'
            raise ValueError(msg)
        if self.sx.shape != KIND_SHAPES[self.kind]:
            msg = f'a {self.kind} must have shape {KIND_SHAPES[self.kind]}, got {self.sx.shape}'
            raise ValueError(msg)


@dataclass
class FormulaScope:
    """What a formula can refer to besides functions and constants.

    ``held_from[i]`` are the symbols that ``value_now`` freezes and ``held_to[i]`` separate
    symbols of the same shape that the caller feeds with the same numbers, so the value is
    unchanged but has no derivative with respect to ``held_from``.
    """

    model: RobotModel
    names: dict[str, Quantity] = field(default_factory=dict)
    held_from: list[ca.SX] = field(default_factory=list)
    held_to: list[ca.SX] = field(default_factory=list)
    start_to: list[ca.SX] = field(default_factory=list)   # held_from's values at activation


# --------------------------------------------------------------------------------------------
# function table

@dataclass(frozen=True, slots=True)
class _Function:
    params: tuple[tuple[str, str], ...]    # (label, kind); kind 'frame' also takes a link name,
    returns: str                           # 'joint' takes a joint name, 'any' any non-boolean
    about: str
    build: Callable[..., ca.SX]
    uses_time: bool = False                # build gets the scope's 'time' as first argument

    def call_form(self, name: str) -> str:
        return f'{name}({", ".join(label for label, _ in self.params)})'

    def signature(self, name: str) -> str:
        return f'{self.call_form(name)} -> {self.returns}'


def _unit(v: ca.SX) -> ca.SX:
    return v / ca.norm_2(v)


def _rotation_vector(rotation: ca.SX) -> ca.SX:
    """Rotation vector (angle * axis) of a rotation matrix, differentiable at zero angle.

    w = vee(R - R^T) / 2 = sin(angle) * axis, cos(angle) = (trace(R) - 1) / 2. The result is
    w * angle / sin(angle); for small angles angle/sin(angle) = asin(x)/x with x^2 = |w|^2 is
    replaced by its series 1 + x^2/6 + 3x^4/40, and the exact branch is fed a harmless value
    there so that neither branch produces NaN derivatives.
    """
    w = 0.5 * ca.vertcat(rotation[2, 1] - rotation[1, 2], rotation[0, 2] - rotation[2, 0],
                         rotation[1, 0] - rotation[0, 1])
    cos_angle = 0.5 * (rotation[0, 0] + rotation[1, 1] + rotation[2, 2] - 1.0)
    sin2 = ca.dot(w, w)
    small = ca.logic_and(sin2 < _SMALL_SIN2, cos_angle > 0)
    safe_sin = ca.sqrt(ca.if_else(small, 1.0, sin2))
    exact = ca.atan2(safe_sin, cos_angle) / safe_sin
    series = 1.0 + sin2 / 6.0 + 3.0 * sin2 ** 2 / 40.0
    return ca.if_else(small, series, exact) * w


def _ramp_fraction(time: ca.SX, start: ca.SX, duration: ca.SX) -> ca.SX:
    """(time - start) / duration clipped to [0, 1]; a duration <= 0 gives a step at start."""
    return ca.fmin(ca.fmax((time - start) / ca.fmax(duration, 1e-9), 0.0), 1.0)


def _plane(point: ca.SX, normal: ca.SX) -> ca.SX:
    n = _unit(normal)
    return ca.vertcat(n, ca.dot(n, point))


def _distance_to_line(p: ca.SX, line: ca.SX) -> ca.SX:
    return ca.norm_2(ca.cross(p - line[:3], line[3:]))


_S, _V, _F = 'scalar', 'vector', 'frame'
_MATH1: dict[str, tuple[Callable[[ca.SX], ca.SX], str]] = {
    'sin': (ca.sin, 'sine (radians)'), 'cos': (ca.cos, 'cosine (radians)'),
    'tan': (ca.tan, 'tangent (radians)'), 'asin': (ca.asin, 'arc sine, in [-pi/2, pi/2]'),
    'acos': (ca.acos, 'arc cosine, in [0, pi]'), 'atan': (ca.atan, 'arc tangent'),
    'sqrt': (ca.sqrt, 'square root'), 'exp': (ca.exp, 'exponential'),
    'log': (ca.log, 'natural logarithm'), 'abs': (ca.fabs, 'absolute value'),
    'square': (lambda x: x * x, 'x * x'),
}

_TABLE: dict[str, _Function] = {
    # frames ('frame' arguments take a link name or a frame value)
    'frame': _Function((('link', _F),), _F, 'pose of the link frame in base_link',
                       lambda f: f),
    'position': _Function((('link', _F),), _V,
                          'position of the link frame origin in base_link', lambda f: f[:3, 3]),
    'point': _Function((('link', _F), ('x', _S), ('y', _S), ('z', _S)), _V,
                       'point fixed in the link frame at (x, y, z), in base_link',
                       lambda f, x, y, z: f[:3, :3] @ ca.vertcat(x, y, z) + f[:3, 3]),
    'axis_x': _Function((('link', _F),), _V, 'unit x axis of the link frame in base_link',
                        lambda f: f[:3, 0]),
    'axis_y': _Function((('link', _F),), _V, 'unit y axis of the link frame in base_link',
                        lambda f: f[:3, 1]),
    'axis_z': _Function((('link', _F),), _V, 'unit z axis of the link frame in base_link',
                        lambda f: f[:3, 2]),
    'to_frame': _Function((('link', _F), ('p', _V)), _V,
                          'base_link point p expressed in the link frame',
                          lambda f, p: f[:3, :3].T @ (p - f[:3, 3])),
    'rotation_error': _Function(
        (('frame_a', _F), ('frame_b', _F)), _V,
        'rotation vector (angle * axis, base_link) of R_b R_a^T; smooth at zero angle, '
        'undefined at exactly pi', lambda a, b: _rotation_vector(b[:3, :3] @ a[:3, :3].T)),
    'joint': _Function((('name', 'joint'),), _S, 'position of a movable joint (rad or m)',
                       lambda q: q),
    # vectors
    'vector': _Function((('x', _S), ('y', _S), ('z', _S)), _V, 'vector from three scalars',
                        ca.vertcat),
    'dot': _Function((('a', _V), ('b', _V)), _S, 'dot product', ca.dot),
    'cross': _Function((('a', _V), ('b', _V)), _V, 'cross product', ca.cross),
    'norm': _Function((('a', _V),), _S, 'Euclidean length (derivative undefined at zero)',
                      ca.norm_2),
    'normalize': _Function((('a', _V),), _V, 'a / norm(a) (undefined at zero)', _unit),
    # geometry
    'plane_through': _Function(
        (('p1', _V), ('p2', _V), ('p3', _V)), 'plane',
        'plane through three points, normal = normalize(cross(p2 - p1, p3 - p1))',
        lambda p1, p2, p3: _plane(p1, ca.cross(p2 - p1, p3 - p1))),
    'plane': _Function((('point', _V), ('normal', _V)), 'plane',
                       'plane through point with the given normal (normalised)', _plane),
    'distance_to_plane': _Function((('p', _V), ('plane', 'plane')), _S,
                                   'signed distance, positive on the side the normal points to',
                                   lambda p, pl: ca.dot(pl[:3], p) - pl[3]),
    'line_through': _Function((('p1', _V), ('p2', _V)), 'line',
                              'line through p1 in direction normalize(p2 - p1)',
                              lambda p1, p2: ca.vertcat(p1, _unit(p2 - p1))),
    'line': _Function((('point', _V), ('direction', _V)), 'line',
                      'line through point along direction (normalised)',
                      lambda p, d: ca.vertcat(p, _unit(d))),
    'distance_to_line': _Function((('p', _V), ('line', 'line')), _S,
                                  'distance >= 0 (derivative undefined on the line)',
                                  _distance_to_line),
    'angle_between': _Function(
        (('a', _V), ('b', _V)), _S,
        'angle in [0, pi] = atan2(|a x b|, a.b); derivative singular at exactly 0 and pi',
        lambda a, b: ca.atan2(ca.norm_2(ca.cross(a, b)), ca.dot(a, b))),
    # math
    **{name: _Function((('x', _S),), _S, about, fn) for name, (fn, about) in _MATH1.items()},
    'atan2': _Function((('y', _S), ('x', _S)), _S, 'angle of (x, y) in [-pi, pi]', ca.atan2),
    'min': _Function((('a', _S), ('b', _S)), _S, 'smaller of a and b', ca.fmin),
    'max': _Function((('a', _S), ('b', _S)), _S, 'larger of a and b', ca.fmax),
    'clamp': _Function((('x', _S), ('lo', _S), ('hi', _S)), _S, 'min(max(x, lo), hi)',
                       lambda x, lo, hi: ca.fmin(ca.fmax(x, lo), hi)),
    # time shapes (use the scope's 'time')
    'ramp': _Function(
        (('start', _S), ('duration', _S), ('from_value', _S), ('to_value', _S)), _S,
        'from_value until time start, then linear to to_value over duration, then constant',
        lambda t, t0, dt, a, b: a + (b - a) * _ramp_fraction(t, t0, dt), uses_time=True),
    'smooth_ramp': _Function(
        (('start', _S), ('duration', _S), ('from_value', _S), ('to_value', _S)), _S,
        'like ramp but quintic 10s^3 - 15s^4 + 6s^5: zero speed and acceleration at both ends',
        lambda t, t0, dt, a, b: a + (b - a) * _quintic(_ramp_fraction(t, t0, dt)),
        uses_time=True),
    # holding
    'start_value': _Function((('expr', 'any'),), 'same kind as expr',
                             "expr's value when the skill was activated (joints, unknowns and "
                             'time as they were then; inputs as they are now), as a constant',
                             lambda x: x),   # see _Translator.call
    'value_now': _Function((('expr', 'any'),), 'same kind as expr',
                           "expr's value at this tick, as a constant (no derivative wrt "
                           'joints and unknowns)', lambda x: x),   # see _Translator.call
}


def _quintic(s: ca.SX) -> ca.SX:
    return s * s * s * (10.0 + s * (-15.0 + 6.0 * s))


#: Function name -> one-line description with its signature (for docs and ``--help``).
FUNCTIONS: dict[str, str] = {name: f'{fn.signature(name)}: {fn.about}'
                             for name, fn in _TABLE.items()}


# --------------------------------------------------------------------------------------------
# syntax

_BIN_OPS: dict[type[ast.operator], str] = {ast.Add: '+', ast.Sub: '-', ast.Mult: '*',
                                            ast.Div: '/', ast.Pow: '**'}
_COMPARE_OPS: dict[type[ast.cmpop], str] = {ast.Lt: '<', ast.LtE: '<=', ast.Gt: '>',
                                            ast.GtE: '>='}
_UNARY_OPS: dict[type[ast.unaryop], str] = {ast.USub: '-', ast.UAdd: '+', ast.Not: 'not'}
_FORBIDDEN_OPS: dict[type[ast.AST], str] = {
    ast.MatMult: "'@'", ast.Mod: "'%'", ast.FloorDiv: "'//'", ast.LShift: "'<<'",
    ast.RShift: "'>>'", ast.BitOr: "'|'", ast.BitXor: "'^' (use ** for powers)",
    ast.BitAnd: "'&' (use 'and')", ast.Invert: "'~' (use 'not')", ast.Eq: "'=='",
    ast.NotEq: "'!='", ast.Is: "'is'", ast.IsNot: "'is not'", ast.In: "'in'",
    ast.NotIn: "'not in'",
}
_CONSTRUCTS: dict[type[ast.AST], str] = {
    ast.Attribute: "attribute access ('.')", ast.Lambda: 'lambda', ast.IfExp:
    "conditional expression ('a if c else b'; use min, max, clamp or ramp)",
    ast.ListComp: 'list comprehension', ast.SetComp: 'set comprehension',
    ast.DictComp: 'dict comprehension', ast.GeneratorExp: 'generator expression',
    ast.JoinedStr: 'f-string', ast.FormattedValue: 'f-string', ast.NamedExpr: "assignment (':=')",
    ast.Starred: "'*' unpacking", ast.List: 'list', ast.Tuple: "tuple (',')", ast.Set: 'set',
    ast.Dict: 'dict', ast.Slice: "slice (':')", ast.Await: 'await', ast.Yield: 'yield',
    ast.YieldFrom: 'yield', ast.keyword: 'keyword argument',
}
_ARITHMETIC: dict[str, Callable[[ca.SX, ca.SX], ca.SX]] = {
    '+': operator.add, '-': operator.sub, '*': operator.mul, '/': operator.truediv,
    '**': operator.pow}
_ORDERING: dict[str, Callable[[ca.SX, ca.SX], ca.SX]] = {
    '<': operator.lt, '<=': operator.le, '>': operator.gt, '>=': operator.ge}
_EQUALITY_HINT = '; compare with a tolerance instead, e.g. abs(a - b) < 0.001'


def _location(node: ast.AST, text: str) -> str:
    line = getattr(node, 'lineno', 1)
    offset = getattr(node, 'col_offset', 0)
    lines = text.splitlines() or ['']
    source_line = lines[min(line, len(lines)) - 1]
    column = len(source_line.encode('utf-8')[:offset].decode('utf-8', errors='ignore')) + 1
    return f'column {column}' if line == 1 else f'line {line}, column {column}'


def _fail(message: str, node: ast.AST, text: str) -> FormulaError:
    return FormulaError(f'{message} ({_location(node, text)} of {_excerpt(text)})')


def _excerpt(text: str) -> str:
    flat = ' '.join(text.split())
    return repr(flat if len(flat) <= 60 else flat[:57] + '...')


def _parse(text: str) -> ast.Expression:
    if not isinstance(text, str):
        msg = f'a formula must be text, got {type(text).__name__} {text!r:.40}'
        raise FormulaError(msg)
    if len(text) > MAX_LENGTH:
        msg = f'formula is {len(text)} characters long; at most {MAX_LENGTH} are allowed'
        raise FormulaError(msg)
    body = text.strip()
    if not body:
        raise FormulaError('empty formula')
    try:
        with warnings.catch_warnings():
            warnings.simplefilter('ignore')   # e.g. invalid escapes in (rejected) strings
            tree = ast.parse(body, mode='eval')
    except SyntaxError as exc:
        line, column = exc.lineno or 1, exc.offset or 0
        if column < 1:   # the parser reports offset 0 when the text ends too early
            where = ' at the end'
        else:
            where = f' at column {column}' if line == 1 else f' at line {line}, column {column}'
        msg = f'not a valid formula{where}: {exc.msg} in {_excerpt(body)}'
        raise FormulaError(msg) from None
    except (ValueError, RecursionError, MemoryError, OverflowError):
        msg = f'formula {_excerpt(body)} is nested too deeply or malformed'
        raise FormulaError(msg) from None
    _check(tree, body)
    return tree


def _check(tree: ast.Expression, text: str) -> None:
    """Reject everything outside the whitelist; iterative, so depth is checked before recursion."""
    stack: list[tuple[ast.AST, int]] = [(tree.body, 1)]
    while stack:
        node, depth = stack.pop()
        if depth > MAX_DEPTH:
            raise _fail(f'formula is nested more than {MAX_DEPTH} levels deep', node, text)
        _check_node(node, text)
        children: Sequence[ast.AST]
        if isinstance(node, ast.BinOp):
            children = (node.left, node.right)
        elif isinstance(node, ast.UnaryOp):
            children = (node.operand,)
        elif isinstance(node, ast.BoolOp):
            children = node.values
        elif isinstance(node, ast.Compare):
            children = (node.left, *node.comparators)
        elif isinstance(node, ast.Call):
            children = node.args
        elif isinstance(node, ast.Subscript):
            children = (node.value,)
        else:
            children = ()
        stack.extend((child, depth + 1) for child in children)


def _check_node(node: ast.AST, text: str) -> None:
    if isinstance(node, ast.BinOp):
        if type(node.op) not in _BIN_OPS:
            raise _fail(f'operator {_FORBIDDEN_OPS.get(type(node.op), "?")} is not allowed',
                        node, text)
    elif isinstance(node, ast.UnaryOp):
        if type(node.op) not in _UNARY_OPS:
            raise _fail(f'operator {_FORBIDDEN_OPS.get(type(node.op), "?")} is not allowed',
                        node, text)
    elif isinstance(node, ast.Compare):
        for op in node.ops:
            if type(op) not in _COMPARE_OPS:
                hint = _EQUALITY_HINT if isinstance(op, (ast.Eq, ast.NotEq)) else ''
                raise _fail(f'comparison {_FORBIDDEN_OPS.get(type(op), "?")} is not allowed'
                            f'{hint}', node, text)
    elif isinstance(node, ast.Call):
        _check_call(node, text)
    elif isinstance(node, ast.Constant):
        _constant_value(node, text)
    elif isinstance(node, ast.Subscript):
        _subscript_index(node, text)
    elif not isinstance(node, (ast.BoolOp, ast.Name)):
        construct = _CONSTRUCTS.get(type(node), f'{type(node).__name__} expression')
        raise _fail(f'{construct} is not allowed in a formula', node, text)


def _check_call(node: ast.Call, text: str) -> None:
    if not isinstance(node.func, ast.Name):
        raise _fail('only the functions of the formula language can be called, by plain name',
                    node, text)
    name = node.func.id
    if name not in _TABLE:
        close = difflib.get_close_matches(name, _TABLE, n=3)
        hint = f'; did you mean {", ".join(close)}?' if close else '; see the list of functions'
        raise _fail(f'unknown function {name!r}{hint}', node, text)
    if node.keywords:
        raise _fail(f'{name}() takes positional arguments only', node.keywords[0], text)
    for arg in node.args:
        if isinstance(arg, ast.Starred):
            raise _fail("'*' unpacking is not allowed in a formula", arg, text)
    expected = len(_TABLE[name].params)
    if len(node.args) != expected:
        raise _fail(f'{_TABLE[name].call_form(name)} takes {expected} argument'
                    f'{"s" if expected != 1 else ""}, got {len(node.args)}', node, text)


def _constant_value(node: ast.Constant, text: str) -> float:
    value = node.value
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        what = {str: 'text string', bytes: 'bytes string', bool: f'{value!r}',
                complex: 'complex number'}.get(type(value), repr(value))
        raise _fail(f'{what} is not allowed in a formula (only numbers)', node, text)
    try:
        number = float(value)
    except OverflowError:
        number = math.inf
    if not math.isfinite(number):
        raise _fail('number is too large', node, text)
    return number


def _subscript_index(node: ast.Subscript, text: str) -> int:
    index = node.slice
    if (not isinstance(index, ast.Constant) or isinstance(index.value, bool)
            or not isinstance(index.value, int) or not 0 <= index.value <= 2):
        raise _fail('only v[0], v[1] or v[2] (a constant index into a vector) is allowed',
                    node, text)
    return index.value


def check_formula_syntax(text: str) -> None:
    """Check that text is in the language (structure, functions, arity), without resolving names.

    Raises:
        FormulaError: naming the construct and its column.
    """
    _parse(text)


def compile_formula(text: str, scope: FormulaScope,
                    expect: Sequence[str] | None = None) -> Quantity:
    """Translate a formula into a typed CasADi expression.

    Args:
        text: the formula.
        scope: robot model, named quantities and the symbols value_now holds.
        expect: kinds the result may have (e.g. ('scalar', 'vector')); None accepts any.

    Raises:
        FormulaError: not in the language, unknown names, wrong arity or kinds.
    """
    tree = _parse(text)
    body = text.strip()
    try:
        result = _Translator(scope, body).value(tree.body)
    except RuntimeError as exc:    # casadi refused an operation the checks above let through
        msg = f'cannot build {_excerpt(body)}: {str(exc).splitlines()[0]}'
        raise FormulaError(msg) from None
    if expect is not None and result.kind not in expect:
        msg = f'{_excerpt(body)} is a {result.kind}, expected {" or ".join(expect)}'
        raise FormulaError(msg)
    return result


# --------------------------------------------------------------------------------------------
# translation

class _Translator:
    """Translates a checked tree node by node; depth is bounded by MAX_DEPTH."""

    def __init__(self, scope: FormulaScope, text: str) -> None:
        self.scope = scope
        self.text = text

    def fail(self, message: str, node: ast.AST) -> FormulaError:
        return _fail(message, node, self.text)

    def value(self, node: ast.AST) -> Quantity:
        if isinstance(node, ast.Constant):
            return Quantity('scalar', ca.SX(_constant_value(node, self.text)))
        if isinstance(node, ast.Name):
            return self.name(node)
        if isinstance(node, ast.BinOp):
            return self.binary(node)
        if isinstance(node, ast.UnaryOp):
            return self.unary(node)
        if isinstance(node, ast.BoolOp):
            parts = [self.boolean(v, 'and' if isinstance(node.op, ast.And) else 'or')
                     for v in node.values]
            combine = ca.logic_and if isinstance(node.op, ast.And) else ca.logic_or
            result = parts[0]
            for part in parts[1:]:
                result = combine(result, part)
            return Quantity('boolean', result)
        if isinstance(node, ast.Compare):
            return self.compare(node)
        if isinstance(node, ast.Subscript):
            vector = self.value(node.value)
            if vector.kind != 'vector':
                raise self.fail(f'indexing needs a vector, got a {vector.kind}', node)
            return Quantity('scalar', vector.sx[_subscript_index(node, self.text)])
        if isinstance(node, ast.Call):
            return self.call(node)
        raise self.fail(f'{type(node).__name__} is not allowed in a formula', node)

    def name(self, node: ast.Name) -> Quantity:
        name = node.id
        if name in self.scope.names:
            return self.scope.names[name]
        if name in CONSTANTS:
            return Quantity('scalar', ca.SX(CONSTANTS[name]))
        if name in self.scope.model.link_names:
            raise self.fail(f'{name!r} is a link; use it inside a frame function, '
                            f'e.g. position({name})', node)
        if name in self.scope.model.joint_names:
            raise self.fail(f'{name!r} is a joint; write joint({name}) for its position', node)
        if name in _TABLE:
            raise self.fail(f'{name!r} is a function; call it: {FUNCTIONS[name]}', node)
        known = [*self.scope.names, *CONSTANTS]
        close = difflib.get_close_matches(name, known, n=3)
        hint = f'; did you mean {", ".join(close)}?' if close else ''
        listed = ', '.join(sorted(known)[:12]) + (', ...' if len(known) > 12 else '')
        raise self.fail(f'unknown name {name!r}{hint} (known names: {listed})', node)

    def binary(self, node: ast.BinOp) -> Quantity:
        symbol = _BIN_OPS[type(node.op)]
        left, right = self.value(node.left), self.value(node.right)
        kinds = (left.kind, right.kind)
        a, b = left.sx, right.sx
        apply = _ARITHMETIC[symbol]
        if kinds == ('scalar', 'scalar'):
            return Quantity('scalar', apply(a, b))
        if kinds == ('vector', 'vector') and symbol in ('+', '-'):
            return Quantity('vector', apply(a, b))
        if symbol == '*' and 'vector' in kinds and 'scalar' in kinds:
            return Quantity('vector', apply(a, b))
        if symbol == '/' and kinds == ('vector', 'scalar'):
            return Quantity('vector', apply(a, b))
        allowed = {'+': 'two scalars or two vectors', '-': 'two scalars or two vectors',
                   '*': 'two scalars, or a scalar and a vector (use dot or cross for two '
                        'vectors)',
                   '/': 'two scalars, or a vector divided by a scalar',
                   '**': 'two scalars'}[symbol]
        raise self.fail(f"'{symbol}' needs {allowed}, got {left.kind} {symbol} {right.kind}",
                        node)

    def unary(self, node: ast.UnaryOp) -> Quantity:
        if isinstance(node.op, ast.Not):
            return Quantity('boolean', ca.logic_not(self.boolean(node.operand, 'not')))
        operand = self.value(node.operand)
        if operand.kind not in ('scalar', 'vector'):
            symbol = _UNARY_OPS[type(node.op)]
            raise self.fail(f"unary '{symbol}' needs a scalar or a vector, got a {operand.kind}",
                            node)
        return Quantity(operand.kind, -operand.sx if isinstance(node.op, ast.USub)
                        else operand.sx)

    def boolean(self, node: ast.AST, operator: str) -> ca.SX:
        operand = self.value(node)
        if operand.kind != 'boolean':
            raise self.fail(f"'{operator}' needs conditions (comparisons), got a {operand.kind}",
                            node)
        return operand.sx

    def compare(self, node: ast.Compare) -> Quantity:
        operands = [self.value(node.left), *(self.value(c) for c in node.comparators)]
        result: ca.SX | None = None
        for op, left, right in zip(node.ops, operands, operands[1:]):
            symbol = _COMPARE_OPS[type(op)]
            if left.kind != 'scalar' or right.kind != 'scalar':
                raise self.fail(f"'{symbol}' compares two scalars, got {left.kind} {symbol} "
                                f'{right.kind}', node)
            term = _ORDERING[symbol](left.sx, right.sx)
            result = term if result is None else ca.logic_and(result, term)
        assert result is not None   # a Compare has at least one operator
        return Quantity('boolean', result)

    def call(self, node: ast.Call) -> Quantity:
        assert isinstance(node.func, ast.Name)   # guaranteed by _check_call
        name = node.func.id
        function = _TABLE[name]
        args: list[object] = []
        for (label, kind), arg in zip(function.params, node.args):
            args.append(self.argument(name, label, kind, arg))
        if function.uses_time:
            args.insert(0, self.time(name, node))
        if name == 'value_now':
            held = args[0]
            assert isinstance(held, Quantity)
            return Quantity(held.kind, self.hold(held.sx, node))
        if name == 'start_value':
            held = args[0]
            assert isinstance(held, Quantity)
            return Quantity(held.kind, self.at_start(held.sx, node))
        return Quantity(function.returns, function.build(*args))

    def argument(self, function: str, label: str, kind: str, node: ast.AST) -> object:
        model = self.scope.model
        if kind == 'joint':
            if not isinstance(node, ast.Name) or node.id not in model.joint_names:
                given = node.id if isinstance(node, ast.Name) else 'an expression'
                raise self.fail(f'{function}() needs a movable joint name, got {given!r} '
                                f'(joints: {", ".join(model.joint_names) or "none"})', node)
            return model.q[model.joint_index(node.id)]
        if kind == 'frame' and isinstance(node, ast.Name) and node.id in model.link_names:
            return model.pose(node.id)
        if kind == 'frame' and isinstance(node, ast.Name) and node.id not in self.scope.names:
            close = difflib.get_close_matches(node.id, model.link_names, n=3)
            hint = f'; did you mean {", ".join(close)}?' if close else ''
            shown = ', '.join(model.link_names[:10]) + (
                ', ...' if len(model.link_names) > 10 else '')
            raise self.fail(f'{function}(): unknown link {node.id!r}{hint} (links: {shown})',
                            node)
        value = self.value(node)
        if kind == 'any':
            if value.kind == 'boolean':
                raise self.fail(f'{function}() cannot hold a boolean', node)
            return value
        if value.kind != kind:
            expected = 'a link name or a frame' if kind == 'frame' else f'a {kind}'
            raise self.fail(f'{function}(): argument {label!r} must be {expected}, got a '
                            f'{value.kind}', node)
        return value.sx

    def time(self, function: str, node: ast.AST) -> ca.SX:
        time = self.scope.names.get('time')
        if time is None or time.kind != 'scalar':
            raise self.fail(f"{function}() needs the scalar 'time' in the formula scope", node)
        return time.sx

    def hold(self, expression: ca.SX, node: ast.AST) -> ca.SX:
        held_from, held_to = self.scope.held_from, self.scope.held_to
        if not held_from or len(held_from) != len(held_to):
            raise self.fail('value_now() is not available here: the scope declares no held '
                            'symbols (FormulaScope.held_from/held_to)', node)
        return ca.substitute([expression], list(held_from), list(held_to))[0]

    def at_start(self, expression: ca.SX, node: ast.AST) -> ca.SX:
        held_from, start_to = self.scope.held_from, self.scope.start_to
        if not held_from or len(held_from) != len(start_to):
            raise self.fail('start_value() is not available here: the scope declares no start '
                            'symbols (FormulaScope.held_from/start_to)', node)
        time = self.scope.names.get('time')
        frm, to = list(held_from), list(start_to)
        if time is not None and time.sx.is_symbolic():
            frm.append(time.sx)
            to.append(ca.SX(0.0))
        return ca.substitute([expression], frm, to)[0]
