"""Read a URDF robot description into plain, validated data.

Only the kinematic part is kept (links, joints, limits). Everything a controller cannot use safely
is rejected here, once, with a message that names the file and the element, so that later stages
can trust the tree: exactly one root, every link reached from it exactly once.
"""
from __future__ import annotations

import math
import os
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

from ..errors import ModelError

#: Joint types of the URDF specification that this package can drive.
SUPPORTED_JOINT_TYPES: tuple[str, ...] = ('revolute', 'continuous', 'prismatic', 'fixed')
_UNSUPPORTED_JOINT_TYPES: tuple[str, ...] = ('floating', 'planar')
_XACRO_NAMESPACE = '{http://www.ros.org/wiki/xacro}'

Vec3 = tuple[float, float, float]


@dataclass(frozen=True, slots=True)
class JointSpec:
    """One URDF joint; limits are +-inf where the file gives none (continuous, fixed)."""

    name: str
    kind: str                 # 'revolute' | 'continuous' | 'prismatic' | 'fixed'
    parent: str
    child: str
    origin_xyz: Vec3
    origin_rpy: Vec3
    axis: Vec3                # unit length; (1, 0, 0) when absent (URDF default) or fixed
    lower: float
    upper: float
    velocity: float
    effort: float


@dataclass(frozen=True, slots=True)
class RobotDescription:
    """The kinematic tree of a URDF file, checked to be a tree with one root."""

    name: str
    root: str
    links: tuple[str, ...]
    joints: tuple[JointSpec, ...]

    @property
    def movable_joints(self) -> tuple[JointSpec, ...]:
        """Non-fixed joints in file order; this order is the order of q."""
        return tuple(j for j in self.joints if j.kind != 'fixed')


def parse_urdf(source: str | os.PathLike[str]) -> RobotDescription:
    """Parse a URDF file path, or URDF XML text (a string starting with '<').

    Raises:
        ModelError: the file cannot be read, is not XML, or is not a usable kinematic tree; the
            message names the file (when there is one) and the offending element.
    """
    if isinstance(source, str) and source.lstrip().startswith('<'):
        return _Parser(None).parse_text(source)
    path = Path(source)
    try:
        text = path.read_text(encoding='utf-8')
    except (OSError, UnicodeDecodeError) as exc:
        msg = f'{path}: cannot read robot description: {exc}'
        raise ModelError(msg) from exc
    return _Parser(str(path)).parse_text(text)


def parse_urdf_string(text: str, source: str = 'robot_description') -> RobotDescription:
    """Parse URDF XML text that did not come from a file, e.g. the `robot_description` topic
    (std_msgs/String) that robot_state_publisher offers.

    Raises:
        ModelError: the text is empty, not XML, or not a usable kinematic tree; the message
            starts with `source` (where the text came from) and names the offending element.
    """
    if not isinstance(text, str):
        msg = f'{source}: expected URDF text, got {type(text).__name__}'
        raise ModelError(msg)
    if not text.strip():
        msg = f'{source}: the robot description is empty'
        raise ModelError(msg)
    return _Parser(source).parse_text(text)


def _tag(element: ET.Element) -> str:
    name = element.get('name')
    return f'<{element.tag} name="{name}">' if name is not None else f'<{element.tag}>'


class _Parser:
    """Holds the file name so every error can name it."""

    def __init__(self, file: str | None) -> None:
        self.file = file

    def error(self, message: str) -> ModelError:
        return ModelError(f'{self.file}: {message}' if self.file else message)

    def parse_text(self, text: str) -> RobotDescription:
        try:
            root = ET.fromstring(text)
        except ET.ParseError as exc:
            line, column = exc.position
            where = f'{self.file or "<urdf text>"}:{line}:{column + 1}'
            msg = f'{where}: not well-formed XML ({exc})'
            raise ModelError(msg) from None
        if root.tag != 'robot':
            raise self.error(f'the top element is <{root.tag}>, expected <robot>')
        for element in root.iter():
            if isinstance(element.tag, str) and element.tag.startswith(_XACRO_NAMESPACE):
                raise self.error('contains xacro macros; expand it first '
                                 '(e.g. `xacro robot.urdf.xacro > robot.urdf`)')
        name = root.get('name', '')
        links = self.links(root)
        joints = tuple(self.joint(e) for e in root.findall('joint'))
        root_link = self.check_tree(links, joints)
        return RobotDescription(name=name, root=root_link, links=links, joints=joints)

    # -- elements -------------------------------------------------------------------------

    def name_of(self, element: ET.Element, where: str) -> str:
        name = element.get('name')
        if name is None or not name.strip():
            raise self.error(f'{where}: <{element.tag}> without a name attribute')
        return name

    def links(self, root: ET.Element) -> tuple[str, ...]:
        names: list[str] = []
        for index, element in enumerate(root.findall('link')):
            name = self.name_of(element, f'link number {index + 1}')
            if name in names:
                raise self.error(f'{_tag(element)}: a link with this name is already declared')
            names.append(name)
        if not names:
            raise self.error('<robot> declares no <link>')
        return tuple(names)

    def joint(self, element: ET.Element) -> JointSpec:
        name = self.name_of(element, 'a <joint>')
        tag = _tag(element)
        kind = element.get('type')
        if kind is None:
            raise self.error(f'{tag}: missing type attribute '
                             f'(one of {", ".join(SUPPORTED_JOINT_TYPES)})')
        if kind in _UNSUPPORTED_JOINT_TYPES:
            raise self.error(f'{tag}: type="{kind}" is not supported; '
                             f'use one of {", ".join(SUPPORTED_JOINT_TYPES)}')
        if kind not in SUPPORTED_JOINT_TYPES:
            raise self.error(f'{tag}: unknown type="{kind}"; '
                             f'expected one of {", ".join(SUPPORTED_JOINT_TYPES)}')
        if element.find('mimic') is not None:
            raise self.error(f"joint '{name}' uses <mimic>, which is not supported: every movable "
                             'joint must be an independent variable of the controller; '
                             'make it a fixed joint or drive it as its own joint')
        parent = self.link_ref(element, 'parent', tag)
        child = self.link_ref(element, 'child', tag)
        xyz, rpy = (0.0, 0.0, 0.0), (0.0, 0.0, 0.0)
        origin = element.find('origin')
        if origin is not None:
            xyz = self.vec3(origin, 'xyz', tag, (0.0, 0.0, 0.0))
            rpy = self.vec3(origin, 'rpy', tag, (0.0, 0.0, 0.0))
        axis = (1.0, 0.0, 0.0)
        axis_element = element.find('axis')
        if kind != 'fixed' and axis_element is not None:   # URDF: fixed joints ignore <axis>
            axis = self.direction(axis_element, tag)
        lower, upper, velocity, effort = self.limits(element, kind, tag)
        return JointSpec(name=name, kind=kind, parent=parent, child=child, origin_xyz=xyz,
                         origin_rpy=rpy, axis=axis, lower=lower, upper=upper, velocity=velocity,
                         effort=effort)

    def link_ref(self, joint: ET.Element, which: str, tag: str) -> str:
        element = joint.find(which)
        if element is None:
            raise self.error(f'{tag}: missing <{which} link="..."/>')
        link = element.get('link')
        if link is None or not link.strip():
            raise self.error(f'{tag}: <{which}> without a link attribute')
        return link

    def limits(self, joint: ET.Element, kind: str, tag: str) -> tuple[float, float, float, float]:
        inf = math.inf
        element = joint.find('limit')
        if kind == 'fixed':
            return -inf, inf, inf, inf
        if element is None:
            if kind in ('revolute', 'prismatic'):
                raise self.error(f'{tag}: a {kind} joint needs '
                                 '<limit lower="..." upper="..." velocity="..." effort="..."/>')
            return -inf, inf, inf, inf
        where = f'{tag} <limit>'
        velocity = self.number(element, 'velocity', where, None if kind != 'continuous' else inf)
        if not velocity > 0.0:
            raise self.error(f'{where}: velocity="{element.get("velocity")}" must be positive')
        effort = self.number(element, 'effort', where, inf)
        if effort < 0.0:
            raise self.error(f'{where}: effort="{element.get("effort")}" must not be negative')
        if kind == 'continuous':   # URDF: lower/upper are ignored for continuous joints
            return -inf, inf, velocity, effort
        lower = self.number(element, 'lower', where, None)
        upper = self.number(element, 'upper', where, None)
        if lower > upper:
            raise self.error(f'{where}: lower="{element.get("lower")}" is above '
                             f'upper="{element.get("upper")}"')
        return lower, upper, velocity, effort

    # -- numbers --------------------------------------------------------------------------

    def number(self, element: ET.Element, attribute: str, where: str,
               default: float | None) -> float:
        text = element.get(attribute)
        if text is None:
            if default is None:
                raise self.error(f'{where}: missing {attribute} attribute')
            return default
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not math.isfinite(value):
            raise self.error(f'{where}: {attribute}="{text}" is not a finite number')
        return value

    def vec3(self, element: ET.Element, attribute: str, tag: str, default: Vec3) -> Vec3:
        text = element.get(attribute)
        if text is None:
            return default
        where = f'{tag}: <{element.tag} {attribute}="{text}">'
        parts = text.split()
        if len(parts) != 3:
            raise self.error(f'{where} needs three numbers separated by spaces')
        values: list[float] = []
        for part in parts:
            try:
                value = float(part)
            except ValueError:
                value = math.nan
            if not math.isfinite(value):
                raise self.error(f'{where}: {part!r} is not a finite number')
            values.append(value)
        return values[0], values[1], values[2]

    def direction(self, element: ET.Element, tag: str) -> Vec3:
        x, y, z = self.vec3(element, 'xyz', tag, (1.0, 0.0, 0.0))
        length = math.sqrt(x * x + y * y + z * z)
        if length < 1e-9:
            raise self.error(f'{tag}: <axis xyz="{element.get("xyz")}"> is not a direction')
        return x / length, y / length, z / length

    # -- structure ------------------------------------------------------------------------

    def check_tree(self, links: tuple[str, ...], joints: tuple[JointSpec, ...]) -> str:
        known = set(links)
        parent_joint: dict[str, JointSpec] = {}
        joint_names: set[str] = set()
        for joint in joints:
            tag = f'<joint name="{joint.name}">'
            if joint.name in joint_names:
                raise self.error(f'{tag}: a joint with this name is already declared')
            joint_names.add(joint.name)
            for which, link in (('parent', joint.parent), ('child', joint.child)):
                if link not in known:
                    raise self.error(f'{tag}: <{which} link="{link}"> is not a declared <link>')
            if joint.parent == joint.child:
                raise self.error(f'{tag}: parent and child are the same link "{joint.child}"')
            if joint.child in parent_joint:
                other = parent_joint[joint.child].name
                raise self.error(f'{tag}: link "{joint.child}" already has a parent through '
                                 f'joint "{other}"; a link can have only one parent')
            parent_joint[joint.child] = joint
        roots = [link for link in links if link not in parent_joint]
        if len(roots) > 1:
            raise self.error(f'more than one root link ({", ".join(roots)}); connect them with '
                             'joints so that exactly one link has no parent')
        if not roots:
            raise self.error('no root link: the joints form a cycle through every link')
        children: dict[str, list[str]] = {}
        for joint in joints:
            children.setdefault(joint.parent, []).append(joint.child)
        reached = {roots[0]}
        stack = [roots[0]]
        while stack:
            for child in children.get(stack.pop(), []):
                reached.add(child)
                stack.append(child)
        cut_off = [link for link in links if link not in reached]
        if cut_off:
            joint = parent_joint[cut_off[0]]
            raise self.error(f'<joint name="{joint.name}">: the joints form a cycle through '
                             f'links {", ".join(cut_off)}; they cannot be reached from the '
                             f'root link "{roots[0]}"')
        return roots[0]
