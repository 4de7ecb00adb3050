"""The formula language: every function against numpy/scipy on numbers, types and rejections.

Formulas are evaluated through casadi Functions of plain symbols ('a', 'b', 'p' vectors, 'x'
scalar, 'A'/'B' frames, 'time') so each function is compared with an independent numpy
computation of its textbook definition.
"""
from __future__ import annotations

import ast
import math
from pathlib import Path

import casadi as ca
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from constraint_ctrl.errors import FormulaError, SkillError
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.skill.formula import (FUNCTIONS, FormulaScope, Quantity,
                                           check_formula_syntax, compile_formula)

ARM = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'
MODEL = RobotModel.from_urdf(ARM)
T = ca.SX.sym('time')
X = ca.SX.sym('x')
A_VEC, B_VEC, P_VEC = ca.SX.sym('a', 3), ca.SX.sym('b', 3), ca.SX.sym('p', 3)
A_FRAME, B_FRAME = ca.SX.sym('A', 4, 4), ca.SX.sym('B', 4, 4)
Q_NOW = ca.SX.sym('q_now', MODEL.n_joints)
Q_START = ca.SX.sym('q_start', MODEL.n_joints)
INPUTS = [MODEL.q, Q_NOW, T, X, A_VEC, B_VEC, P_VEC, A_FRAME, B_FRAME]


def scope() -> FormulaScope:
    names = {'time': Quantity('scalar', T), 'x': Quantity('scalar', X),
             'a': Quantity('vector', A_VEC), 'b': Quantity('vector', B_VEC),
             'p': Quantity('vector', P_VEC), 'A': Quantity('frame', A_FRAME),
             'B': Quantity('frame', B_FRAME)}
    return FormulaScope(MODEL, names, [MODEL.q], [Q_NOW], [Q_START])


IDENTITY = np.eye(4)   # default pose of frames a and b (read only)


def evaluate(text: str, q: np.ndarray | None = None, time: float = 0.0, x: float = 0.0,
             a=(0.0, 0.0, 0.0), b=(0.0, 0.0, 0.0), p=(0.0, 0.0, 0.0),
             frame_a=IDENTITY, frame_b=IDENTITY, q_now: np.ndarray | None = None) -> np.ndarray:
    q = np.zeros(MODEL.n_joints) if q is None else q
    q_now = q if q_now is None else q_now
    result = compile_formula(text, scope())
    function = ca.Function('f', INPUTS, [result.sx])
    return np.array(function(q, q_now, time, x, a, b, p, frame_a, frame_b))


def value(text: str, **kwargs: object) -> float:
    return float(evaluate(text, **kwargs)[0, 0])


def vector(text: str, **kwargs: object) -> np.ndarray:
    return evaluate(text, **kwargs).ravel()


def derivative(text: str, wrt: ca.SX, **kwargs: object) -> np.ndarray:
    """Jacobian of the formula with respect to one of the input symbols (casadi AD)."""
    result = compile_formula(text, scope())
    function = ca.Function('d', INPUTS, [ca.jacobian(result.sx, wrt)])
    q = np.zeros(MODEL.n_joints)
    args = {'q': q, 'q_now': q, 'time': 0.0, 'x': 0.0, 'a': np.zeros(3), 'b': np.zeros(3),
            'p': np.zeros(3), 'frame_a': np.eye(4), 'frame_b': np.eye(4), **kwargs}
    return np.array(function(args['q'], args['q_now'], args['time'], args['x'], args['a'],
                             args['b'], args['p'], args['frame_a'], args['frame_b']))


def pose(rotation: np.ndarray, position=(0.0, 0.0, 0.0)) -> np.ndarray:
    out = np.eye(4)
    out[:3, :3], out[:3, 3] = rotation, position
    return out


RNG = np.random.default_rng(11)
Q_RANDOM = RNG.uniform(MODEL.lower, MODEL.upper)


# -- frames -----------------------------------------------------------------------------------

def test_frame_functions_follow_homogeneous_transform_algebra() -> None:
    """p_base = R p_link + o; axes are the columns of R; to_frame is the inverse map."""
    tip = np.array(MODEL.fk_function(['tool_tip'])(Q_RANDOM))
    rotation, origin = tip[:3, :3], tip[:3, 3]
    np.testing.assert_allclose(evaluate('frame(tool_tip)', q=Q_RANDOM), tip, atol=1e-12)
    np.testing.assert_allclose(vector('position(tool_tip)', q=Q_RANDOM), origin, atol=1e-12)
    local = np.array([0.01, -0.02, 0.15])
    np.testing.assert_allclose(vector('point(tool_tip, 0.01, -0.02, 0.15)', q=Q_RANDOM),
                               rotation @ local + origin, atol=1e-12)
    for k, name in enumerate(('axis_x', 'axis_y', 'axis_z')):
        np.testing.assert_allclose(vector(f'{name}(tool_tip)', q=Q_RANDOM), rotation[:, k],
                                   atol=1e-12)
    base_point = np.array([0.3, 0.1, 0.4])
    np.testing.assert_allclose(vector('to_frame(tool_tip, p)', q=Q_RANDOM, p=base_point),
                               rotation.T @ (base_point - origin), atol=1e-12)


def test_frame_arguments_accept_frame_values() -> None:
    """A 'frame' quantity works wherever a link name does."""
    frame = pose(Rotation.from_euler('xyz', [0.1, 0.2, 0.3]).as_matrix(), (1.0, 2.0, 3.0))
    np.testing.assert_allclose(vector('position(A)', frame_a=frame), [1.0, 2.0, 3.0])
    np.testing.assert_allclose(vector('axis_y(A)', frame_a=frame), frame[:3, 1])
    np.testing.assert_allclose(vector('position(frame(A))', frame_a=frame), [1.0, 2.0, 3.0])


def test_joint_reads_the_joint_position() -> None:
    """joint(joint_3) is q[2] (third movable joint in file order)."""
    assert value('joint(joint_3)', q=Q_RANDOM) == pytest.approx(Q_RANDOM[2], abs=0)
    np.testing.assert_allclose(derivative('joint(joint_3)', MODEL.q).ravel(),
                               [0, 0, 1, 0, 0, 0])


ROTATION_CASES = [
    # relative rotations R_b R_a^T: large, moderate, near the series threshold, tiny, zero
    Rotation.from_rotvec([0.4, -1.2, 2.1]),          # angle ~2.45 rad
    Rotation.from_rotvec([1.0, 0.5, -0.2]),
    Rotation.from_rotvec([1.2e-3, -0.3e-3, 0.4e-3]),  # just above the small-angle branch
    Rotation.from_rotvec([0.7e-3, 0.2e-3, -0.3e-3]),  # just inside it
    Rotation.from_rotvec([1e-9, -2e-9, 3e-9]),
    Rotation.identity(),
]


@pytest.mark.parametrize('relative', ROTATION_CASES)
def test_rotation_error_matches_scipy_rotvec(relative: Rotation) -> None:
    """rotation_error(A, B) = rotvec(R_B R_A^T), reference scipy Rotation.as_rotvec."""
    rotation_a = Rotation.from_euler('zyx', [0.3, -0.7, 1.1]).as_matrix()
    rotation_b = relative.as_matrix() @ rotation_a
    got = vector('rotation_error(A, B)', frame_a=pose(rotation_a), frame_b=pose(rotation_b))
    expected = Rotation.from_matrix(rotation_b @ rotation_a.T).as_rotvec()
    np.testing.assert_allclose(got, expected, atol=1e-12, rtol=1e-9)


def test_rotation_error_random_rotations_match_scipy() -> None:
    """30 seeded random pairs with relative angle below 3 rad (away from the pi ambiguity)."""
    rotations = Rotation.random(60, random_state=5).as_matrix()
    checked = 0
    for rotation_a, rotation_b in zip(rotations[::2], rotations[1::2]):
        expected = Rotation.from_matrix(rotation_b @ rotation_a.T).as_rotvec()
        if np.linalg.norm(expected) > 3.0:
            continue
        got = vector('rotation_error(A, B)', frame_a=pose(rotation_a), frame_b=pose(rotation_b))
        np.testing.assert_allclose(got, expected, atol=1e-10)
        checked += 1
    assert checked >= 15


def test_rotation_error_derivative_is_finite_and_exact_at_zero() -> None:
    """For B = Rot(u, theta) A, d rotvec / d theta = u at theta = 0 (rotvec = theta u)."""
    theta = ca.SX.sym('theta')
    axis = np.array([2.0, -1.0, 0.5]) / np.linalg.norm([2.0, -1.0, 0.5])
    skew = ca.DM([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    rodrigues = ca.DM.eye(3) + ca.sin(theta) * skew + (1 - ca.cos(theta)) * (skew @ skew)
    rotation_a = Rotation.from_euler('xyz', [0.5, 0.1, -0.4]).as_matrix()
    frame_b = ca.vertcat(ca.horzcat(rodrigues @ ca.DM(rotation_a), ca.DM.zeros(3, 1)),
                         ca.DM([[0, 0, 0, 1]]))
    names = {'A': Quantity('frame', ca.SX(ca.DM(pose(rotation_a)))),
             'B': Quantity('frame', frame_b)}
    error = compile_formula('rotation_error(A, B)', FormulaScope(MODEL, names)).sx
    function = ca.Function('d', [theta], [error, ca.jacobian(error, theta)])
    for angle in (0.0, 1e-8, 1e-4, 0.3):
        rotvec, slope = (np.array(v).ravel() for v in function(angle))
        np.testing.assert_allclose(rotvec, angle * axis, atol=1e-12)   # rotvec = theta u
        np.testing.assert_allclose(slope, axis, atol=1e-9)


# -- vectors and geometry ---------------------------------------------------------------------

A_NUM, B_NUM = np.array([0.3, -1.2, 0.8]), np.array([-0.5, 0.4, 2.0])


def test_vector_algebra_matches_numpy() -> None:
    """dot, cross, norm, normalize, vector(), components and vector arithmetic vs numpy."""
    assert value('dot(a, b)', a=A_NUM, b=B_NUM) == pytest.approx(np.dot(A_NUM, B_NUM))
    np.testing.assert_allclose(vector('cross(a, b)', a=A_NUM, b=B_NUM), np.cross(A_NUM, B_NUM))
    assert value('norm(a)', a=A_NUM) == pytest.approx(np.linalg.norm(A_NUM))
    np.testing.assert_allclose(vector('normalize(a)', a=A_NUM), A_NUM / np.linalg.norm(A_NUM))
    np.testing.assert_allclose(vector('vector(1, x, 3)', x=2.5), [1.0, 2.5, 3.0])
    assert value('a[1]', a=A_NUM) == A_NUM[1]
    np.testing.assert_allclose(vector('2 * a - b / 4 + -a * x', a=A_NUM, b=B_NUM, x=0.5),
                               2 * A_NUM - B_NUM / 4 - A_NUM * 0.5)


def test_planes_and_signed_distance() -> None:
    """Plane z = 0.5 through three points: normal +z (right-hand rule), distance n.p - d."""
    plane = 'plane_through(vector(0, 0, 0.5), vector(1, 0, 0.5), vector(0, 1, 0.5))'
    assert value(f'distance_to_plane(p, {plane})', p=[0.3, 0.2, 0.9]) == pytest.approx(0.4)
    assert value(f'distance_to_plane(p, {plane})', p=[5.0, -3.0, 0.1]) == pytest.approx(-0.4)
    # point-normal plane with a non-unit normal: distance = n.(p - p0) / |n| (analytic geometry)
    normal, origin, point = np.array([1.0, 2.0, -2.0]), np.array([0.1, 0.2, 0.3]), B_NUM
    expected = np.dot(normal, point - origin) / np.linalg.norm(normal)
    got = value('distance_to_plane(p, plane(a, b))', a=origin, b=normal, p=point)
    assert got == pytest.approx(expected, abs=1e-12)


def test_lines_and_distance() -> None:
    """Distance to a line = |(p - a) x u| (analytic geometry); x axis to (1, 3, 4) is 5."""
    assert value('distance_to_line(p, line(vector(0, 0, 0), vector(2, 0, 0)))',
                 p=[1.0, 3.0, 4.0]) == pytest.approx(5.0)
    direction = (B_NUM - A_NUM) / np.linalg.norm(B_NUM - A_NUM)
    point = np.array([0.7, 0.7, -0.3])
    expected = np.linalg.norm(np.cross(point - A_NUM, direction))
    assert value('distance_to_line(p, line_through(a, b))', a=A_NUM, b=B_NUM,
                 p=point) == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize(('a', 'b', 'angle'), [
    ((1, 0, 0), (0, 1, 0), math.pi / 2), ((1, 0, 0), (-1, 0, 0), math.pi),
    ((1, 1, 0), (1, 0, 0), math.pi / 4), ((0, 0, 2), (0, 0, 5), 0.0),
    ((0.3, -1.2, 0.8), (-0.5, 0.4, 2.0),
     math.acos(np.dot(A_NUM, B_NUM) / np.linalg.norm(A_NUM) / np.linalg.norm(B_NUM))),
])
def test_angle_between_known_vectors(a: tuple, b: tuple, angle: float) -> None:
    """Angles of known vector pairs; the general pair against arccos of the normalised dot."""
    assert value('angle_between(a, b)', a=a, b=b) == pytest.approx(angle, abs=1e-12)


# -- math -------------------------------------------------------------------------------------

@pytest.mark.parametrize(('text', 'expected'), [
    ('sin(0.3)', math.sin(0.3)), ('cos(0.3)', math.cos(0.3)), ('tan(0.3)', math.tan(0.3)),
    ('asin(0.3)', math.asin(0.3)), ('acos(0.3)', math.acos(0.3)), ('atan(0.3)', math.atan(0.3)),
    ('atan2(-1, -1)', math.atan2(-1, -1)), ('sqrt(2)', math.sqrt(2)), ('exp(1.5)', math.exp(1.5)),
    ('log(7)', math.log(7)), ('abs(-2.5)', 2.5), ('min(3, -1)', -1.0), ('max(3, -1)', 3.0),
    ('clamp(5, 0, 2)', 2.0), ('clamp(-5, 0, 2)', 0.0), ('clamp(1.5, 0, 2)', 1.5),
    ('square(-3)', 9.0), ('2 ** 10', 1024.0), ('7 / 2', 3.5), ('-pi', -math.pi),
    ('+3 - 5 * 2', -7.0),
])
def test_math_functions_match_python_math(text: str, expected: float) -> None:
    """Scalar math against Python's math module / plain arithmetic."""
    assert value(text) == pytest.approx(expected, rel=1e-14, abs=1e-14)


# -- time shapes ------------------------------------------------------------------------------

@pytest.mark.parametrize(('time', 'expected', 'slope'), [
    (0.0, 0.0, 0.0), (1.0, 0.0, 5.0), (2.0, 5.0, 5.0), (3.0, 10.0, 0.0), (4.0, 10.0, 0.0)])
def test_ramp_is_linear_and_clipped(time: float, expected: float, slope: float) -> None:
    """ramp(1, 2, 0, 10): 0 before t=1, slope 10/2 = 5 on (1, 3), 10 after (kinks not probed)."""
    assert value('ramp(1, 2, 0, 10)', time=time) == pytest.approx(expected)
    if time not in (1.0, 3.0):
        assert derivative('ramp(1, 2, 0, 10)', T, time=time)[0, 0] == pytest.approx(slope)


def test_smooth_ramp_quintic_values_and_derivatives() -> None:
    """Quintic time scaling 10s^3 - 15s^4 + 6s^5 (e.g. Lynch & Park, Modern Robotics, 9.2,
    from memory): s(0.5) = 0.5, zero speed and acceleration at both ends, peak speed 15/8
    (to-from)/duration at the middle."""
    text = 'smooth_ramp(1, 2, 3, 7)'          # from 3 to 7 over t in [1, 3]
    assert value(text, time=0.0) == pytest.approx(3.0)
    assert value(text, time=2.0) == pytest.approx(5.0)
    assert value(text, time=5.0) == pytest.approx(7.0)
    s = 0.25
    quintic = 10 * s**3 - 15 * s**4 + 6 * s**5
    assert value(text, time=1.0 + 2 * s) == pytest.approx(3 + 4 * quintic)
    assert derivative(text, T, time=2.0)[0, 0] == pytest.approx(15 / 8 * 4 / 2)
    second = ca.Function('dd', [T], [ca.jacobian(ca.jacobian(
        compile_formula(text, scope()).sx, T), T)])
    for edge in (1.0 + 1e-7, 3.0 - 1e-7):
        assert abs(derivative(text, T, time=edge)[0, 0]) < 1e-9
        assert abs(float(second(edge))) < 1e-4


def test_time_shapes_need_time_in_scope() -> None:
    """Without a 'time' quantity ramp() is refused with a clear message."""
    with pytest.raises(FormulaError, match="ramp\\(\\) needs the scalar 'time'"):
        compile_formula('ramp(0, 1, 0, 1)', FormulaScope(MODEL))


# -- value_now --------------------------------------------------------------------------------

def test_value_now_keeps_the_value_and_drops_the_derivative() -> None:
    """value_now(position(tool_tip)) equals position(tool_tip) when q_now = q; d/dq is zero."""
    held = vector('value_now(position(tool_tip))', q=Q_RANDOM)
    np.testing.assert_allclose(held, vector('position(tool_tip)', q=Q_RANDOM), atol=1e-15)
    assert np.all(derivative('value_now(position(tool_tip))', MODEL.q, q=Q_RANDOM) == 0.0)
    assert np.abs(derivative('position(tool_tip)', MODEL.q, q=Q_RANDOM)).max() > 0.1
    # mixed: only the held part loses its derivative
    moving = derivative('position(tool_tip)[2] - value_now(position(tool_tip)[2])', MODEL.q,
                        q=Q_RANDOM)
    np.testing.assert_allclose(moving, derivative('position(tool_tip)[2]', MODEL.q, q=Q_RANDOM))
    assert compile_formula('value_now(plane(a, b))', scope()).kind == 'plane'


def test_start_value_is_the_value_at_activation() -> None:
    """start_value(f) = f at q_start and time 0, as a constant (no derivative wrt q or time)."""
    text = 'start_value(position(tool_tip)[2] + time)'
    result = compile_formula(text, scope())
    q_start = Q_RANDOM + 0.1
    fn = ca.Function('f', [MODEL.q, Q_START, T], [result.sx, ca.jacobian(result.sx, MODEL.q),
                                                  ca.jacobian(result.sx, T)])
    val, dq, dt = fn(Q_RANDOM, q_start, 3.0)
    # reference: the same expression evaluated directly at the start pose and time 0
    plain = ca.Function('g', [MODEL.q], [compile_formula('position(tool_tip)[2]', scope()).sx])
    assert float(val) == pytest.approx(float(plain(q_start)), abs=1e-15)
    assert np.all(np.array(dq) == 0.0) and float(dt) == 0.0


def test_value_now_without_held_symbols_is_refused() -> None:
    """A scope with nothing to hold cannot silently return a moving value."""
    with pytest.raises(FormulaError, match='value_now\\(\\) is not available'):
        compile_formula('value_now(joint(joint_1))', FormulaScope(MODEL))


# -- booleans ---------------------------------------------------------------------------------

@pytest.mark.parametrize(('text', 'expected'), [
    ('x < 1', 1.0), ('x > 1', 0.0), ('x <= 0.5', 1.0), ('x >= 0.6', 0.0),
    ('0 < x < 1', 1.0), ('0 < x < 0.2', 0.0), ('x > 0 and x < 0.2', 0.0),
    ('x > 0 or x < 0.2', 1.0), ('not x > 1', 1.0), ('not (x > 0 and x < 1)', 0.0),
])
def test_conditions_give_booleans(text: str, expected: float) -> None:
    """Comparisons and and/or/not evaluate to 1/0 (x = 0.5), Python's chaining semantics."""
    result = compile_formula(text, scope())
    assert result.kind == 'boolean'
    assert value(text, x=0.5) == expected


# -- errors -----------------------------------------------------------------------------------

@pytest.mark.parametrize(('text', 'fragment'), [
    ('a + x', "'+' needs two scalars or two vectors, got vector + scalar"),
    ('a * b', 'use dot or cross'),
    ('x / a', "'/' needs two scalars, or a vector divided by a scalar, got scalar / vector"),
    ('a ** 2', "'**' needs two scalars"),
    ('(x < 1) + 1', 'got boolean + scalar'),
    ('x and x > 1', "'and' needs conditions (comparisons), got a scalar"),
    ('a < 1', "'<' compares two scalars, got vector < scalar"),
    ('-A', "unary '-' needs a scalar or a vector, got a frame"),
    ('x[0]', 'indexing needs a vector, got a scalar'),
    ('sin(a)', "sin(): argument 'x' must be a scalar, got a vector"),
    ('position(x)', "position(): argument 'link' must be a link name or a frame, got a scalar"),
    ('distance_to_plane(p, a)', "argument 'plane' must be a plane, got a vector"),
    ('position(tool)', "position(): unknown link 'tool'; did you mean tool_tip?"),
    ('position(zzzz)', "position(): unknown link 'zzzz' (links: "),
    ('joint(joint_9)', "joint() needs a movable joint name, got 'joint_9'"),
    ('joint(tool_mount)', "got 'tool_mount'"),
    ('speed + 1', "unknown name 'speed'"),
    ('tme', "unknown name 'tme'; did you mean time?"),
    ('tool_tip', "'tool_tip' is a link; use it inside a frame function"),
    ('joint_2', "'joint_2' is a joint; write joint(joint_2)"),
    ('cross', "'cross' is a function; call it"),
])
def test_type_and_name_errors_say_what_was_given(text: str, fragment: str) -> None:
    """Mistakes are reported in the words of the formula, with the given and expected kinds."""
    with pytest.raises(FormulaError) as info:
        compile_formula(text, scope())
    assert fragment in str(info.value)


@pytest.mark.parametrize(('text', 'fragment'), [
    ('a.real', "attribute access ('.') is not allowed in a formula (column 1"),
    ('lambda: 1', 'lambda is not allowed'),
    ('[x for x in a]', 'list comprehension'),
    ('"text"', 'text string is not allowed'),
    ('f"{x}"', 'f-string'),
    ('(y := 1)', "assignment (':=')"),
    ('sin(*a)', "'*' unpacking"),
    ('sin(x=1)', 'positional arguments only'),
    ('x if x else 1', 'conditional expression'),
    ('(1, 2)', 'tuple'),
    ('{1: 2}', 'dict'),
    ('a[0:2]', 'only v[0], v[1] or v[2]'),
    ('a[-1]', 'only v[0], v[1] or v[2]'),
    ('a[3]', 'only v[0], v[1] or v[2]'),
    ('a[x]', 'only v[0], v[1] or v[2]'),
    ('x == 1', "'==' is not allowed; compare with a tolerance"),
    ('x is x', "'is' is not allowed"),
    ('x % 2', "operator '%' is not allowed"),
    ('x ^ 2', "use ** for powers"),
    ('~x', "operator '~' (use 'not')"),
    ('True', 'True is not allowed in a formula (only numbers)'),
    ('None', 'None is not allowed'),
    ('1j', 'complex number'),
    ('1e999', 'number is too large'),
    ('x.__class__', 'attribute access'),
    ('__import__("os")', "unknown function '__import__'"),
    ('sinus(1)', "unknown function 'sinus'; did you mean sin"),
    ('sin(1, 2)', 'sin(x) takes 1 argument, got 2'),
    ('clamp(1)', 'clamp(x, lo, hi) takes 3 arguments, got 1'),
    ('a.b(1)', 'only the functions of the formula language can be called'),
    ('x +', 'not a valid formula at the end'),
    ('x + * 2', 'not a valid formula at column 5'),
    ('import os', 'not a valid formula'),
    ('', 'empty formula'),
    ('x' * 2001, 'at most 2000 are allowed'),
    ('-' * 60 + 'x', 'nested more than 50 levels deep'),
    ('(' * 300 + 'x' + ')' * 300, 'not a valid formula'),
])
def test_forbidden_constructs_are_rejected_with_their_name(text: str, fragment: str) -> None:
    """The whitelist: everything else is a FormulaError naming the construct (and column)."""
    with pytest.raises(FormulaError) as info:
        check_formula_syntax(text)
    assert fragment in str(info.value)
    with pytest.raises(FormulaError):
        compile_formula(text, scope())


def test_error_column_points_at_the_construct() -> None:
    """Columns are 1-based characters; multi-line formulas also give the line."""
    with pytest.raises(FormulaError, match='column 9 of'):
        check_formula_syntax('x + 1 + a.b')
    with pytest.raises(FormulaError, match='line 2, column 3'):
        check_formula_syntax('(x +\n  a.b)')


def test_formula_errors_are_skill_errors_that_can_be_located() -> None:
    """FormulaError is a SkillError, so the compiler can attach file/line/field."""
    with pytest.raises(SkillError) as info:
        compile_formula('nothing_here', scope())
    located = info.value.located(file='skill.yaml', line=12, field='constraints[0].function')
    assert isinstance(located, FormulaError)
    assert str(located).startswith('skill.yaml:12: constraints[0].function: unknown name')


def test_expected_kinds_are_checked() -> None:
    """compile_formula(expect=...) refuses other kinds (conditions must be booleans)."""
    assert compile_formula('x < 1', scope(), expect=('boolean',)).kind == 'boolean'
    with pytest.raises(FormulaError, match="'x' is a scalar, expected boolean"):
        compile_formula('x', scope(), expect=('boolean',))


SAMPLE_CALLS = {
    'frame': 'frame(tool_tip)', 'position': 'position(A)', 'point': 'point(tool_tip, 0, 0, x)',
    'axis_x': 'axis_x(link_3)', 'axis_y': 'axis_y(B)', 'axis_z': 'axis_z(tool_tip)',
    'to_frame': 'to_frame(range_left, a)', 'rotation_error': 'rotation_error(A, tool_tip)',
    'joint': 'joint(joint_1)', 'vector': 'vector(1, x, 2)', 'dot': 'dot(a, b)',
    'cross': 'cross(a, b)', 'norm': 'norm(a)', 'normalize': 'normalize(a)',
    'plane_through': 'plane_through(a, b, p)', 'plane': 'plane(a, b)',
    'distance_to_plane': 'distance_to_plane(p, plane(a, b))', 'line_through': 'line_through(a, b)',
    'line': 'line(a, b)', 'distance_to_line': 'distance_to_line(p, line(a, b))',
    'angle_between': 'angle_between(a, b)', 'sin': 'sin(x)', 'cos': 'cos(x)', 'tan': 'tan(x)',
    'asin': 'asin(x)', 'acos': 'acos(x)', 'atan': 'atan(x)', 'sqrt': 'sqrt(x)', 'exp': 'exp(x)',
    'log': 'log(x)', 'abs': 'abs(x)', 'square': 'square(x)', 'atan2': 'atan2(x, 1)',
    'min': 'min(x, 1)', 'max': 'max(x, 1)', 'clamp': 'clamp(x, 0, 1)',
    'ramp': 'ramp(0, 1, x, 2)', 'smooth_ramp': 'smooth_ramp(0, 1, x, 2)',
    'value_now': 'value_now(a)',
    'start_value': 'start_value(a)',
}


def test_every_function_is_documented_and_compiles() -> None:
    """FUNCTIONS describes every function as 'name(params) -> kind: text'; each one compiles."""
    assert set(FUNCTIONS) == set(SAMPLE_CALLS)
    for name, description in FUNCTIONS.items():
        call, arrow, about = description.partition(' -> ')
        assert call.startswith(f'{name}(') and call.endswith(')') and arrow and about, name
        n_params = len([s for s in call[len(name) + 1:-1].split(',') if s.strip()])
        sample = SAMPLE_CALLS[name]
        assert len(ast.parse(sample, mode='eval').body.args) == n_params, name
        kind = about.split(':')[0]
        result = compile_formula(sample, scope())
        assert kind in (result.kind, 'same kind as expr'), (name, kind, result.kind)
