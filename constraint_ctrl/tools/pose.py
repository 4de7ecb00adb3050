"""`constraint-ctrl pose`: joint positions that put a tool at a given pose, or a tool's pose.

Solved with the package's own engine: the target becomes a small skill (a position row and,
when asked for, orientation rows), compiled like any skill file, and run in lockstep with the
joint positions integrated exactly (q += dt * q_dot), as `simulate` does. Each tick is one
damped least-squares step of the QP the controller solves, so the URDF joint limits hold on the
way (the QP's first-order position-limit rows with gain * dt < 1 never step past a limit), and
the answer is a pose the controller itself converges to from the start guess.

Orientation rows use the difference of tool axes and target axes (``axis_z(tool) - z_target``;
for a full orientation also the x axis): unlike the cross product of the two axes, the difference
is zero only at the target, not at the flipped pose. A start whose tool axis points exactly away
from the target is a stationary point of every such row; several start guesses (the given one,
then deterministic offsets within the joint limits) avoid it and other local minima.

Output is YAML: comment lines, then one flow mapping ``{joint_1: ..., ...}`` that pastes into a
skill's ``offline.start`` (values rounded to PRINT_DIGITS decimals, more for a tolerance below
1e-5; the residual reported is that of the rounded values).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from collections.abc import Mapping, Sequence

import numpy as np
import yaml

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel, rpy_matrix

#: Integration step of the lockstep iteration (s of the skill's clock; not a real time).
STEP = 0.1
#: First-order gain of every row (1/s): GAIN * STEP = 0.6 of the error removed per step.
GAIN = 6.0
#: Gain of the joint-limit rows (1/s): POSITION_GAIN * STEP = 0.5 < 1, so no step passes a limit.
POSITION_GAIN = 5.0
#: Damping of the velocity regularisation (lambda; every row has weight 1).
DAMPING = 1e-3
#: Stop when both residuals are below these (m and rad), before rounding for print.
SOLVE_TOLERANCE = 1e-9
#: Default acceptance of the printed answer (m and rad).
TOLERANCE = 1e-5
#: Iterations per start guess; an attempt also ends when it stops making progress.
MAX_STEPS = 600
STALL_STEPS = 60
#: Start guesses tried in all (the first is --near or the default pose).
ATTEMPTS = 6
PRINT_DIGITS = 6


def print_digits(tolerance: float) -> int:
    """Decimals that keep rounding well inside the tolerance (a 1 m lever, six joints)."""
    return max(PRINT_DIGITS, min(12, math.ceil(-math.log10(tolerance)) + 2))


class PoseError(ConstraintCtrlError):
    """A bad request to `pose` (unknown link or joint, unparsable --near)."""


@dataclass(frozen=True, slots=True)
class ToolPose:
    """Pose of a link in the base frame: position (m), rotation matrix, URDF roll-pitch-yaw
    (rad)."""

    position: np.ndarray
    rotation: np.ndarray

    @property
    def rpy(self) -> np.ndarray:
        return matrix_rpy(self.rotation)


@dataclass(frozen=True, slots=True)
class Target:
    """Where the tool should go: a position and optionally its z axis or its whole rotation."""

    position: np.ndarray
    z_axis: np.ndarray | None = None       # unit vector in base; None = any
    x_axis: np.ndarray | None = None       # with z_axis: the whole rotation

    @classmethod
    def make(cls, at: Sequence[float], *, tool_down: bool = False,
             rpy: Sequence[float] | None = None) -> Target:
        position = np.asarray(at, dtype=float).reshape(3)
        if tool_down and rpy is not None:
            raise PoseError('give either --tool-down or --rpy, not both')
        if tool_down:
            return cls(position, np.array([0.0, 0.0, -1.0]))
        if rpy is not None:
            rotation = rpy_matrix([float(v) for v in rpy])
            return cls(position, rotation[:, 2].copy(), rotation[:, 0].copy())
        return cls(position)

    def describe(self) -> str:
        text = 'at (' + ', '.join(f'{v:g}' for v in self.position) + ') m'
        if self.x_axis is not None:
            return text + ', rpy (' + ', '.join(f'{v:.6g}' for v in matrix_rpy(
                self.rotation())) + ') rad'
        if self.z_axis is not None:
            return text + ', tool z axis along -z of the base'
        return text + ', any orientation'

    def rotation(self) -> np.ndarray:
        assert self.z_axis is not None and self.x_axis is not None
        return np.column_stack([self.x_axis, np.cross(self.z_axis, self.x_axis), self.z_axis])


@dataclass(frozen=True, slots=True)
class Solution:
    joints: dict[str, float]            # rounded as printed
    position_error: float               # m, of the rounded joints
    orientation_error: float            # rad, of the rounded joints (0 without an orientation)
    steps: int                          # lockstep iterations of the best attempt
    attempts: int
    reached: bool


def matrix_rpy(rotation: np.ndarray) -> np.ndarray:
    """Inverse of rpy_matrix (R = Rz(yaw) Ry(pitch) Rx(roll)); pitch in [-pi/2, pi/2].

    At pitch = +-pi/2 only roll -+ yaw is defined; roll is then set to 0.
    """
    r = np.asarray(rotation, dtype=float)
    pitch = math.atan2(-r[2, 0], math.hypot(r[0, 0], r[1, 0]))
    if math.hypot(r[0, 0], r[1, 0]) < 1e-12:
        return np.array([0.0, pitch, math.atan2(-r[0, 1], r[1, 1])])
    return np.array([math.atan2(r[2, 1], r[2, 2]), pitch, math.atan2(r[1, 0], r[0, 0])])


def default_joints(model: RobotModel) -> np.ndarray:
    """Zero for every joint whose limits allow it, else the middle of its range."""
    q = np.zeros(model.n_joints)
    for i in range(model.n_joints):
        lo, hi = model.lower[i], model.upper[i]
        if not lo <= 0.0 <= hi:
            q[i] = 0.5 * (lo + hi) if np.isfinite(lo) and np.isfinite(hi) else \
                (lo if np.isfinite(lo) else hi)
    return q


def parse_joints(text: str, model: RobotModel, option: str = '--near') -> np.ndarray:
    """A YAML mapping of joint name -> position, e.g. '{joint_2: 0.8, joint_3: 0.2}'.

    The same syntax as ``offline.start`` and as this command's output, so either pastes in.
    Joints left out keep their default (zero, or the middle of their range).
    """
    try:
        values = yaml.safe_load(text)
    except yaml.YAMLError as err:
        raise PoseError(f"{option}: expected a YAML mapping such as '{{joint_1: 0.1, "
                        f"joint_2: -0.4}}', got {text!r} ({err.__class__.__name__})") from None
    if not isinstance(values, dict) or not values:
        raise PoseError(f"{option}: expected a YAML mapping such as '{{joint_1: 0.1, "
                        f"joint_2: -0.4}}', got {text!r}")
    q = default_joints(model)
    for name, value in values.items():
        if str(name) not in model.joint_names:
            raise PoseError(f'{option}: {name!r} is not a movable joint of '
                            f'{model.description.name!r} (joints: '
                            f'{", ".join(model.joint_names)})')
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            raise PoseError(f'{option}: {name}: expected a number (rad or m), got {value!r}')
        i = model.joint_index(str(name))
        if not model.lower[i] - 1e-9 <= value <= model.upper[i] + 1e-9:
            raise PoseError(f'{option}: {name} = {value} is outside its URDF limits '
                            f'[{model.lower[i]}, {model.upper[i]}]')
        q[i] = float(value)
    return q


def check_tool(model: RobotModel, tool: str) -> None:
    """An unknown link is a ModelError with close matches; it must also be usable in a formula."""
    model.pose(tool)   # raises ModelError naming the robot and suggesting close link names
    if not tool.isidentifier():
        raise PoseError(f'link {tool!r} cannot be named in a formula (letters, digits and _ '
                        'only); add a fixed child link with such a name to the URDF')


def tool_pose(model: RobotModel, tool: str, q: np.ndarray) -> ToolPose:
    pose = np.array(model.fk_function([tool])(q))
    return ToolPose(pose[:3, 3].copy(), pose[:3, :3].copy())


def residuals(pose: ToolPose, target: Target) -> tuple[float, float]:
    """Position error (m) and the largest angle (rad) between a tool axis and its target."""
    position = float(np.linalg.norm(pose.position - target.position))
    angle = 0.0
    for column, wanted in ((2, target.z_axis), (0, target.x_axis)):
        if wanted is not None:
            cos = float(np.clip(pose.rotation[:, column] @ wanted, -1.0, 1.0))
            angle = max(angle, math.acos(cos) if cos < 0.999 else
                        2.0 * math.asin(min(1.0, 0.5 * float(np.linalg.norm(
                            pose.rotation[:, column] - wanted)))))
    return position, angle


def _vector(v: np.ndarray) -> str:
    return 'vector(' + ', '.join(repr(float(x)) for x in v) + ')'


def pose_skill_spec(urdf: Path, tool: str, target: Target, base_link: str | None = None):
    """The target as a skill: soft first-order equality rows, no inputs, no events."""
    from ..skill.schema import (BehaviourSpec, ConstraintSpec, LimitsSpec, RegularisationSpec,
                                SkillSpec)
    behaviour = BehaviourSpec(order=1, gain=GAIN)
    rows = [ConstraintSpec(name='tool_position', function=f'position({tool})', kind='equal',
                           target=_vector(target.position), behaviour=behaviour)]
    if target.z_axis is not None:
        rows.append(ConstraintSpec(name='tool_z_axis', function=f'axis_z({tool})', kind='equal',
                                   target=_vector(target.z_axis), behaviour=behaviour))
    if target.x_axis is not None:
        rows.append(ConstraintSpec(name='tool_x_axis', function=f'axis_x({tool})', kind='equal',
                                   target=_vector(target.x_axis), behaviour=behaviour))
    return SkillSpec(name='pose', robot=Path(urdf), source='<pose>', base_link=base_link,
                     description=f'{tool} {target.describe()}', constraints=tuple(rows),
                     limits=LimitsSpec(position_gain=POSITION_GAIN),
                     regularisation=RegularisationSpec(damping=DAMPING))


def _starts(model: RobotModel, first: np.ndarray, count: int) -> list[np.ndarray]:
    """The given start, then deterministic offsets (a fixed seed) clipped into the limits."""
    rng = np.random.default_rng(12345)
    lo = np.where(np.isfinite(model.lower), model.lower, -math.pi)
    hi = np.where(np.isfinite(model.upper), model.upper, math.pi)
    starts = [first.copy()]
    for k in range(1, count):
        spread = 0.25 * k / max(1, count - 1)       # up to a quarter of each joint's range
        offset = rng.uniform(-1.0, 1.0, model.n_joints) * spread * (hi - lo)
        starts.append(np.clip(first + offset, lo, hi))
    return starts


def _wrap_continuous(model: RobotModel, q: np.ndarray) -> np.ndarray:
    q = q.copy()
    for i, joint in enumerate(model.description.movable_joints):
        if joint.kind == 'continuous':
            q[i] = math.remainder(q[i], 2.0 * math.pi)
    return q


def solve(urdf: Path, tool: str, target: Target, start: np.ndarray | None = None, *,
          base_link: str | None = None, tolerance: float = TOLERANCE,
          attempts: int = ATTEMPTS, model: RobotModel | None = None) -> Solution:
    """Iterate the pose skill from each start guess until both residuals are tiny."""
    from ..runtime.runner import SkillRunner
    from ..skill.compile import compile_skill

    if model is None:
        model = RobotModel.from_urdf(urdf, base_link=base_link)
    check_tool(model, tool)
    skill = compile_skill(pose_skill_spec(urdf, tool, target, base_link), model)
    runner = SkillRunner(skill)
    first = default_joints(model) if start is None else np.asarray(start, dtype=float)
    best: tuple[float, np.ndarray, int] | None = None
    tried = 0
    for q0 in _starts(model, first, attempts):
        tried += 1
        q = q0.copy()
        runner.activate(q, np.zeros(skill.n_q))
        lowest, since, steps = math.inf, 0, 0
        for steps in range(1, MAX_STEPS + 1):
            result = runner.tick(q, np.zeros(0), STEP)
            if not result.ok:
                break
            runner.commit(result.joint_velocity, 1.0, STEP)
            q = q + STEP * result.joint_velocity
            pos, ang = residuals(tool_pose(model, tool, q), target)
            score = pos + ang
            if pos < SOLVE_TOLERANCE and ang < SOLVE_TOLERANCE:
                lowest = score
                break
            if score < lowest * (1.0 - 1e-3):
                lowest, since = score, steps
            elif steps - since > STALL_STEPS:
                break
        pos, ang = residuals(tool_pose(model, tool, q), target)
        if best is None or pos + ang < best[0]:
            best = (pos + ang, q, steps)
        if pos < SOLVE_TOLERANCE * 10 and ang < SOLVE_TOLERANCE * 10:
            break
    assert best is not None
    q = _wrap_continuous(model, np.clip(best[1], model.lower, model.upper))
    rounded = np.round(q, print_digits(tolerance))
    pos, ang = residuals(tool_pose(model, tool, rounded), target)
    joints = {name: float(v) + 0.0 for name, v in zip(model.joint_names, rounded)}
    return Solution(joints, pos, ang, best[2], tried, pos <= tolerance and ang <= tolerance)


def flow_mapping(values: Mapping[str, float], digits: int = PRINT_DIGITS) -> str:
    """'{joint_1: 0.1, joint_2: -0.4}': YAML, pastes into offline.start."""
    return '{' + ', '.join(f'{k}: {_number(v, digits)}' for k, v in values.items()) + '}'


def _number(value: float, digits: int = PRINT_DIGITS) -> str:
    text = f'{float(value) + 0.0:.{digits}f}'.rstrip('0')
    if text in ('-0.', '0.'):
        return '0.0'
    return text + '0' if text.endswith('.') else text


def describe_pose(model: RobotModel, tool: str, q: np.ndarray) -> list[str]:
    """YAML lines with the tool pose for the joints q (and the options that ask for it)."""
    pose = tool_pose(model, tool, q)
    x, y, z = (_number(v) for v in pose.position)
    roll, pitch, yaw = (_number(v) for v in pose.rpy)
    return [
        f'# {tool} in {model.base_link} for joints '
        + flow_mapping(dict(zip(model.joint_names, q.tolist()))),
        f'position: {{x: {x}, y: {y}, z: {z}}}   # m',
        f'rpy: {{roll: {roll}, pitch: {pitch}, yaw: {yaw}}}   # rad, URDF fixed axes: '
        'R = Rz(yaw) Ry(pitch) Rx(roll)',
        f'z_axis: [{", ".join(_number(v) for v in pose.rotation[:, 2])}]   # tool z axis in '
        f'{model.base_link}',
        f'# the same target: --tool {tool} --at {x} {y} {z} --rpy {roll} {pitch} {yaw}',
    ]


def run_pose(urdf: Path, tool: str, at: Sequence[float] | None, *, tool_down: bool = False,
             rpy: Sequence[float] | None = None, near: str | None = None,
             base_link: str | None = None, tolerance: float = TOLERANCE) -> tuple[int, list[str],
                                                                                  str | None]:
    """(exit code, stdout lines, stderr message) of the `pose` command."""
    if not SOLVE_TOLERANCE * 10 <= tolerance <= 0.1:
        raise PoseError(f'--tolerance {tolerance:g}: expected a value between '
                        f'{SOLVE_TOLERANCE * 10:g} and 0.1 (m and rad)')
    model = RobotModel.from_urdf(urdf, base_link=base_link)
    check_tool(model, tool)
    start = parse_joints(near, model) if near is not None else default_joints(model)
    if at is None:
        if tool_down or rpy is not None:
            raise PoseError('--tool-down and --rpy describe a target: give --at X Y Z too')
        return 0, describe_pose(model, tool, start), None
    target = Target.make(at, tool_down=tool_down, rpy=rpy)
    sol = solve(urdf, tool, target, start, base_link=base_link, tolerance=tolerance,
                model=model)
    digits = print_digits(tolerance)
    residual = (f'position off by {sol.position_error:.2g} m'
                + (f', orientation by {sol.orientation_error:.2g} rad'
                   if target.z_axis is not None else ''))
    lines = [f'# {tool} in {model.base_link} {target.describe()}']
    if sol.reached:
        lines.append(f'# reached: {residual} (values rounded to {digits} decimals; '
                     f'{sol.steps} steps)')
        lines.append(flow_mapping(sol.joints, digits))
        return 0, lines, None
    lines.append(f'# NOT reached: the closest pose found ({sol.attempts} start guesses) has its '
                 f'{residual}')
    lines.append(flow_mapping(sol.joints, digits))
    message = (f'{tool} cannot reach the target within {tolerance:g} (m, rad): closest pose '
               f'found has its {residual}; printed above. Is the target within reach and the '
               'orientation possible there? Try --near with a start guess close to it.')
    return 1, lines, message


__all__ = ['PoseError', 'Solution', 'Target', 'ToolPose', 'default_joints', 'describe_pose',
           'flow_mapping', 'matrix_rpy', 'parse_joints', 'pose_skill_spec', 'run_pose', 'solve',
           'tool_pose']
