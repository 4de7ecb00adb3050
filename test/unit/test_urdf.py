"""URDF parsing: accepted structures and every rejected one.

Outside source for the accepted semantics: the URDF XML specification, ROS wiki pages
"urdf/XML/joint" and "urdf/XML/link" (from memory): joint types revolute/continuous/prismatic/
fixed/floating/planar; <origin> xyz/rpy default to zero; <axis> defaults to (1, 0, 0) and is
ignored by fixed joints; <limit> is required for revolute and prismatic joints; continuous joints
have no position limits; a robot description is a tree with a single root link.
"""
from __future__ import annotations

import math
from pathlib import Path

import pytest

from constraint_ctrl.errors import ModelError
from constraint_ctrl.model.urdf import parse_urdf

ARM = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'
LIMIT = '<limit lower="-1" upper="1" velocity="2" effort="10"/>'


def robot(*parts: str) -> str:
    return '<robot name="r">' + ''.join(parts) + '</robot>'


def links(*names: str) -> str:
    return ''.join(f'<link name="{n}"/>' for n in names)


def joint(name: str, kind: str, parent: str, child: str, inner: str = LIMIT) -> str:
    return (f'<joint name="{name}" type="{kind}"><parent link="{parent}"/>'
            f'<child link="{child}"/>{inner}</joint>')


def test_example_arm_is_read_with_its_limits_and_order() -> None:
    """The example arm: 6 revolute joints in file order, 5 fixed mounts, root base_link."""
    description = parse_urdf(ARM)
    assert description.name == 'six_axis_arm'
    assert description.root == 'base_link'
    assert len(description.links) == 12  # base, 6 arm links, flange, tip, 3 sensors
    movable = description.movable_joints
    assert [j.name for j in movable] == [f'joint_{i}' for i in range(1, 7)]
    # values as written in config/robots/six_axis_arm.urdf
    assert (movable[0].lower, movable[0].upper, movable[0].velocity) == (-2.97, 2.97, 2.0)
    assert movable[1].axis == (0.0, 1.0, 0.0)
    assert movable[1].origin_xyz == (0.05, 0.0, 0.25)
    tool = next(j for j in description.joints if j.name == 'tool_mount')
    assert tool.kind == 'fixed' and tool.origin_rpy == (0.0, pytest.approx(math.pi / 2), 0.0)


def test_xml_text_with_leading_whitespace_is_parsed_as_text() -> None:
    """Text starting with '<' after whitespace is XML, not a path."""
    description = parse_urdf('\n  ' + robot(links('a')))
    assert description.root == 'a' and description.joints == ()


def test_defaults_continuous_prismatic_fixed() -> None:
    """URDF spec defaults (from memory): origin 0, axis (1,0,0); continuous unbounded."""
    text = robot(
        links('a', 'b', 'c', 'd', 'e'),
        joint('spin', 'continuous', 'a', 'b', ''),
        joint('slide', 'prismatic', 'b', 'c', '<axis xyz="0 0 2"/>' + LIMIT),
        joint('mount', 'fixed', 'c', 'd', '<axis xyz="0 0 0"/>'),  # fixed: axis ignored
        joint('wheel', 'continuous', 'd', 'e', '<limit velocity="3" effort="1"/>'),
    )
    spin, slide, mount, wheel = parse_urdf(text).joints
    assert spin.origin_xyz == (0.0, 0.0, 0.0) and spin.origin_rpy == (0.0, 0.0, 0.0)
    assert spin.axis == (1.0, 0.0, 0.0)
    assert (spin.lower, spin.upper, spin.velocity) == (-math.inf, math.inf, math.inf)
    assert slide.axis == (0.0, 0.0, 1.0)  # normalised
    assert (slide.lower, slide.upper, slide.velocity, slide.effort) == (-1.0, 1.0, 2.0, 10.0)
    assert mount.kind == 'fixed'
    assert (wheel.lower, wheel.upper, wheel.velocity) == (-math.inf, math.inf, 3.0)
    assert [j.name for j in parse_urdf(text).movable_joints] == ['spin', 'slide', 'wheel']


def test_branched_tree_keeps_file_order() -> None:
    """Trees, not only chains: two branches on one torso; q order is file order."""
    text = robot(links('base', 'torso', 'left', 'right'),
                 joint('right_j', 'revolute', 'torso', 'right'),
                 joint('torso_j', 'revolute', 'base', 'torso'),
                 joint('left_j', 'revolute', 'torso', 'left'))
    description = parse_urdf(text)
    assert description.root == 'base'
    assert [j.name for j in description.movable_joints] == ['right_j', 'torso_j', 'left_j']


def test_missing_effort_means_unlimited() -> None:
    """Our choice: a missing effort is taken as unlimited (the controller does not use it)."""
    text = robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b',
                                        '<limit lower="0" upper="1" velocity="1"/>'))
    assert parse_urdf(text).joints[0].effort == math.inf


BAD_CASES = [
    # (urdf text, expected message fragment)
    ('<model name="x"/>', 'expected <robot>'),
    (robot(), 'declares no <link>'),
    (robot('<link/>'), 'without a name'),
    (robot(links('a', 'a')), '<link name="a">: a link with this name is already declared'),
    (robot(links('a', 'b'), '<joint type="fixed"><parent link="a"/><child link="b"/></joint>'),
     'without a name'),
    (robot(links('a', 'b'), '<joint name="j"><parent link="a"/><child link="b"/></joint>'),
     '<joint name="j">: missing type'),
    (robot(links('a', 'b'), joint('j', 'floating', 'a', 'b')),
     '<joint name="j">: type="floating" is not supported'),
    (robot(links('a', 'b'), joint('j', 'planar', 'a', 'b')),
     '<joint name="j">: type="planar" is not supported'),
    (robot(links('a', 'b'), joint('j', 'hinge', 'a', 'b')),
     '<joint name="j">: unknown type="hinge"'),
    (robot(links('a', 'b', 'c'), joint('j', 'revolute', 'a', 'b'),
           joint('m', 'revolute', 'b', 'c', LIMIT + '<mimic joint="j"/>')),
     "joint 'm' uses <mimic>, which is not supported: "),
    (robot(links('a', 'b'), '<joint name="j" type="fixed"><child link="b"/></joint>'),
     '<joint name="j">: missing <parent'),
    (robot(links('a', 'b'), '<joint name="j" type="fixed"><parent/><child link="b"/></joint>'),
     '<joint name="j">: <parent> without a link'),
    (robot(links('a', 'b'), joint('j', 'fixed', 'a', 'ghost')),
     '<joint name="j">: <child link="ghost"> is not a declared <link>'),
    (robot(links('a', 'b'), joint('j', 'fixed', 'ghost', 'b')),
     '<joint name="j">: <parent link="ghost"> is not a declared <link>'),
    (robot(links('a', 'b', 'c'), joint('j1', 'fixed', 'a', 'c'), joint('j2', 'fixed', 'b', 'c')),
     '<joint name="j2">: link "c" already has a parent through joint "j1"'),
    (robot(links('a', 'b', 'c'), joint('j1', 'fixed', 'a', 'b')), 'more than one root link (a, c)'),
    (robot(links('a', 'b'), joint('j1', 'fixed', 'a', 'b'), joint('j2', 'fixed', 'b', 'a')),
     'no root link: the joints form a cycle'),
    (robot(links('r', 'b', 'c'), joint('j1', 'fixed', 'b', 'c'), joint('j2', 'fixed', 'c', 'b')),
     'form a cycle through links b, c'),
    (robot(links('a'), joint('j', 'fixed', 'a', 'a')), 'parent and child are the same link'),
    (robot(links('a', 'b', 'c'), joint('j', 'fixed', 'a', 'b'), joint('j', 'fixed', 'b', 'c')),
     '<joint name="j">: a joint with this name is already declared'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b', '')),
     '<joint name="j">: a revolute joint needs <limit'),
    (robot(links('a', 'b'), joint('j', 'prismatic', 'a', 'b', '')),
     '<joint name="j">: a prismatic joint needs <limit'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b', '<limit upper="1" velocity="1"/>')),
     '<joint name="j"> <limit>: missing lower'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b', '<limit lower="0" upper="1"/>')),
     '<joint name="j"> <limit>: missing velocity'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b',
                                  '<limit lower="0" upper="1" velocity="fast"/>')),
     'velocity="fast" is not a finite number'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b',
                                  '<limit lower="0" upper="1" velocity="-1"/>')),
     'velocity="-1" must be positive'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b',
                                  '<limit lower="2" upper="1" velocity="1"/>')),
     'lower="2" is above upper="1"'),
    (robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b',
                                  '<limit lower="nan" upper="1" velocity="1"/>')),
     'lower="nan" is not a finite number'),
    (robot(links('a', 'b'), joint('j', 'fixed', 'a', 'b', '<origin xyz="0 0"/>')),
     '<joint name="j">: <origin xyz="0 0"> needs three numbers'),
    (robot(links('a', 'b'), joint('j', 'fixed', 'a', 'b', '<origin rpy="0 x 0"/>')),
     "<joint name=\"j\">: <origin rpy=\"0 x 0\">: 'x' is not a finite number"),
    (robot(links('a', 'b'), joint('joint_3', 'revolute', 'a', 'b', '<axis xyz="0 0 0"/>' + LIMIT)),
     '<joint name="joint_3">: <axis xyz="0 0 0"> is not a direction'),
    ('<robot name="r" xmlns:xacro="http://www.ros.org/wiki/xacro"><xacro:property name="a" '
     'value="1"/><link name="a"/></robot>', 'expand it first'),
]


@pytest.mark.parametrize(('text', 'fragment'), BAD_CASES)
def test_bad_descriptions_name_the_element(text: str, fragment: str) -> None:
    """Each rule of the URDF tree is enforced with a message naming the element."""
    with pytest.raises(ModelError) as info:
        parse_urdf(text)
    assert fragment in str(info.value)


def test_errors_from_a_file_name_the_file(tmp_path: Path) -> None:
    """A structural error in a file is prefixed with the file path."""
    path = tmp_path / 'broken.urdf'
    path.write_text(robot(links('a', 'b'), joint('j', 'revolute', 'a', 'b', '')))
    with pytest.raises(ModelError, match=f'^{path}: <joint name="j">'):
        parse_urdf(path)


def test_xml_syntax_error_names_file_line_and_column(tmp_path: Path) -> None:
    """Not-well-formed XML (expat) reports file:line:column; the second '<' is line 3, column 4."""
    path = tmp_path / 'syntax.urdf'
    path.write_text('<robot name="r">\n  <link name="a"/>\n  <<link name="b"/>\n</robot>\n')
    with pytest.raises(ModelError, match=f'^{path}:3:4: not well-formed XML'):
        parse_urdf(str(path))


def test_missing_file_names_the_path(tmp_path: Path) -> None:
    """A path that cannot be read is reported with the path."""
    missing = tmp_path / 'nowhere.urdf'
    with pytest.raises(ModelError, match='nowhere.urdf: cannot read robot description'):
        parse_urdf(missing)
