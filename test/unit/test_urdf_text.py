"""A robot model from URDF text (the robot_description topic) instead of a file.

Outside reference: Pinocchio (PyPI `pin`) builds its model from the same text
(pinocchio.buildModelFromXML); the link placements must agree with ours.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.errors import ModelError
from constraint_ctrl.model import RobotModel, parse_urdf, parse_urdf_string

ARM = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'


def test_file_and_string_give_identical_kinematics() -> None:
    text = ARM.read_text(encoding='utf-8')
    from_file = RobotModel.from_urdf(ARM)
    from_text = RobotModel.from_urdf_string(text)
    assert from_text.description == from_file.description == parse_urdf_string(text)
    links = list(from_file.link_names)
    fk_file, fk_text = from_file.fk_function(links), from_text.fk_function(links)
    rng = np.random.default_rng(4)
    for q in rng.uniform(from_file.lower, from_file.upper, (10, from_file.n_joints)):
        for a, b in zip(fk_file(q), fk_text(q)):
            np.testing.assert_array_equal(np.array(a), np.array(b))
    # base_link is honoured the same way
    tip = RobotModel.from_urdf_string(text, base_link='tool_flange').fk_function(['tool_tip'])
    tip_file = RobotModel.from_urdf(ARM, base_link='tool_flange').fk_function(['tool_tip'])
    q = np.zeros(from_file.n_joints)
    np.testing.assert_array_equal(np.array(tip(q)), np.array(tip_file(q)))


def test_string_model_matches_pinocchio_built_from_the_same_text() -> None:
    pin = pytest.importorskip('pinocchio')
    text = ARM.read_text(encoding='utf-8')
    ours = RobotModel.from_urdf_string(text)
    reference = pin.buildModelFromXML(text)
    data = reference.createData()
    links = list(ours.link_names)
    fk = ours.fk_function(links)
    rng = np.random.default_rng(8)
    for q in rng.uniform(ours.lower, ours.upper, (5, ours.n_joints)):
        q_pin = pin.neutral(reference)
        for name, value in zip(ours.joint_names, q):   # all revolute: one q each
            q_pin[reference.joints[reference.getJointId(name)].idx_q] = value
        pin.framesForwardKinematics(reference, data, q_pin)
        for link, pose in zip(links, fk(q)):
            expected = data.oMf[reference.getFrameId(link, pin.BODY)].homogeneous
            np.testing.assert_allclose(np.array(pose), expected, atol=1e-9, err_msg=link)


@pytest.mark.parametrize(('text', 'expected'), [
    # the element and its problem are named, after the source
    ('<robot name="r"><link name="a"/><link name="b"/><joint name="j" type="revolute">'
     '<parent link="a"/><child link="b"/></joint></robot>',
     r'^robot_description: <joint name="j">: a revolute joint needs <limit'),
    ('<robot name="r"><link name="a"/><joint name="j" type="fixed"><parent link="a"/>'
     '<child link="ghost"/></joint></robot>',
     r'^robot_description: <joint name="j">: <child link="ghost"> is not a declared <link>'),
    ('<robot name="r">\n<link name="a">\n</robot>',
     r'^robot_description:3:3: not well-formed XML'),
    ('', r'^robot_description: the robot description is empty'),
    ('<model/>', r'^robot_description: the top element is <model>, expected <robot>'),
])
def test_a_bad_string_names_the_source_and_the_element(text: str, expected: str) -> None:
    with pytest.raises(ModelError, match=expected):
        RobotModel.from_urdf_string(text)


def test_the_source_name_is_the_callers() -> None:
    with pytest.raises(ModelError, match=r'^/arm/robot_description: '):
        parse_urdf_string('<robot name="r"/>', source='/arm/robot_description')
    # parse_urdf keeps taking text that starts with '<' (no source name then)
    assert parse_urdf('<robot name="r"><link name="a"/></robot>').root == 'a'
