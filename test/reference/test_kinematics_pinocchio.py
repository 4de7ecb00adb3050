"""Symbolic forward kinematics and AD Jacobians against Pinocchio (PyPI `pin`), the reference.

Pinocchio orders its joints depth-first and stores a continuous joint as (cos, sin), so q is
mapped by joint name. Jacobians are compared with Pinocchio's LOCAL_WORLD_ALIGNED frame Jacobian
(rows 0-2: velocity of the frame origin in world axes; rows 3-5: angular velocity in world
axes, Pinocchio documentation of ReferenceFrame). For the rotation the check is the
rotation-matrix derivative dR/dq_i = [w_i]x R (definition of angular velocity).
"""
from __future__ import annotations

from pathlib import Path

import casadi as ca
import numpy as np
import pytest

pin = pytest.importorskip('pinocchio')

from constraint_ctrl.model.kinematics import RobotModel  # noqa: E402
from constraint_ctrl.skill.formula import FormulaScope, compile_formula  # noqa: E402

ARM = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'
TOL = 1e-9
N_CONFIGS = 20

# Two arms on one torso; the file lists the right arm first so that file order differs from
# Pinocchio's depth-first order. Mixed joint types, non-unit axes and non-trivial rpy origins.
TWO_ARMS = """<robot name="two_arms">
  <link name="base"/><link name="torso"/>
  <link name="r_upper"/><link name="r_lower"/><link name="r_hand"/>
  <link name="l_upper"/><link name="l_lower"/><link name="l_hand"/>
  <joint name="r_shoulder" type="continuous">
    <parent link="torso"/><child link="r_upper"/>
    <origin xyz="0 -0.2 0.3" rpy="0.3 -0.2 0.5"/><axis xyz="0 1 1"/>
  </joint>
  <joint name="r_elbow" type="prismatic">
    <parent link="r_upper"/><child link="r_lower"/>
    <origin xyz="0.25 0 0" rpy="0 0.7 0"/><axis xyz="1 0 0"/>
    <limit lower="0" upper="0.2" velocity="0.5" effort="50"/>
  </joint>
  <joint name="r_wrist_mount" type="fixed">
    <parent link="r_lower"/><child link="r_hand"/>
    <origin xyz="0.1 0.02 -0.01" rpy="1.0 0.4 -0.3"/>
  </joint>
  <joint name="waist" type="revolute">
    <parent link="base"/><child link="torso"/>
    <origin xyz="0 0 0.5" rpy="0 0 0.1"/><axis xyz="0 0 1"/>
    <limit lower="-2" upper="2" velocity="1" effort="100"/>
  </joint>
  <joint name="l_shoulder" type="revolute">
    <parent link="torso"/><child link="l_upper"/>
    <origin xyz="0 0.2 0.3" rpy="-0.4 0.1 0.2"/><axis xyz="0.2 -0.3 0.9"/>
    <limit lower="-2" upper="2" velocity="1" effort="100"/>
  </joint>
  <joint name="l_elbow" type="revolute">
    <parent link="l_upper"/><child link="l_lower"/>
    <origin xyz="0.3 0 0.05" rpy="0 0 0"/><axis xyz="0 1 0"/>
    <limit lower="-2" upper="2" velocity="1" effort="100"/>
  </joint>
  <joint name="l_hand_mount" type="fixed">
    <parent link="l_lower"/><child link="l_hand"/>
    <origin xyz="0.2 0 0" rpy="0 1.5707963267948966 0"/>
  </joint>
</robot>"""


def skew(w: np.ndarray) -> np.ndarray:
    return np.array([[0.0, -w[2], w[1]], [w[2], 0.0, -w[0]], [-w[1], w[0], 0.0]])


class Reference:
    """Pinocchio model of the same URDF, driven with our q (file order)."""

    def __init__(self, ours: RobotModel, urdf_text: str) -> None:
        self.model = pin.buildModelFromXML(urdf_text)
        self.data = self.model.createData()
        self.ours = ours
        self.idx = []
        for name in ours.joint_names:
            joint = self.model.joints[self.model.getJointId(name)]
            self.idx.append((joint.idx_q, joint.idx_v, joint.nq))

    def q(self, q_ours: np.ndarray) -> np.ndarray:
        q = pin.neutral(self.model)
        for value, (iq, _, nq) in zip(q_ours, self.idx):
            q[iq:iq + nq] = [np.cos(value), np.sin(value)] if nq == 2 else [value]
        return q

    def update(self, q_ours: np.ndarray) -> None:
        q = self.q(q_ours)
        pin.computeJointJacobians(self.model, self.data, q)
        pin.updateFramePlacements(self.model, self.data)

    def frame(self, link: str) -> int:
        return self.model.getFrameId(link, pin.BODY)

    def placement(self, link: str) -> tuple[np.ndarray, np.ndarray]:
        placement = self.data.oMf[self.frame(link)]
        return placement.rotation.copy(), placement.translation.copy()

    def jacobian(self, link: str) -> np.ndarray:
        """6 x n in our joint order (columns picked by velocity index)."""
        full = pin.getFrameJacobian(self.model, self.data, self.frame(link),
                                    pin.LOCAL_WORLD_ALIGNED)
        return full[:, [iv for _, iv, _ in self.idx]]


def random_configurations(model: RobotModel, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lower = np.where(np.isfinite(model.lower), model.lower, -np.pi)
    upper = np.where(np.isfinite(model.upper), model.upper, np.pi)
    return rng.uniform(lower, upper, size=(N_CONFIGS, model.n_joints))


def derivative_functions(model: RobotModel, links: list[str]) -> ca.Function:
    """Per link: pose, d position/dq (3 x n) and d vec(R)/dq (9 x n, column-major vec)."""
    outputs = []
    for link in links:
        outputs += [model.pose(link), ca.jacobian(model.position(link), model.q),
                    ca.jacobian(ca.vec(model.rotation(link)), model.q)]
    return ca.Function('derivatives', [model.q], outputs)


def check_against_pinocchio(ours: RobotModel, urdf_text: str, seed: int) -> None:
    reference = Reference(ours, urdf_text)
    links = list(ours.link_names)
    derivatives = derivative_functions(ours, links)
    for q in random_configurations(ours, seed):
        reference.update(q)
        values = [np.array(v) for v in derivatives(q)]
        for k, link in enumerate(links):
            pose, d_position, d_rotation = values[3 * k:3 * k + 3]
            rotation, position = reference.placement(link)
            jacobian = reference.jacobian(link)
            np.testing.assert_allclose(pose[:3, 3], position, atol=TOL, err_msg=link)
            np.testing.assert_allclose(pose[:3, :3], rotation, atol=TOL, err_msg=link)
            np.testing.assert_allclose(pose[3], [0, 0, 0, 1], atol=0, err_msg=link)
            np.testing.assert_allclose(d_position, jacobian[:3], atol=TOL, err_msg=link)
            for i in range(ours.n_joints):
                expected = skew(jacobian[3:, i]) @ rotation   # dR/dq_i = [w_i]x R
                got = d_rotation[:, i].reshape(3, 3, order='F')
                np.testing.assert_allclose(got, expected, atol=TOL, err_msg=f'{link} q{i}')


def test_six_axis_arm_matches_pinocchio() -> None:
    """Every link frame (incl. tool_tip and range_*) at 20 seeded configurations, to 1e-9."""
    ours = RobotModel.from_urdf(ARM)
    assert {'tool_tip', 'range_left', 'range_right', 'range_front'} <= set(ours.link_names)
    check_against_pinocchio(ours, ARM.read_text(), seed=1)


def test_branched_tree_matches_pinocchio() -> None:
    """Two arms on a torso: continuous, prismatic, unaligned axes, rpy origins, file order."""
    ours = RobotModel.from_urdf(TWO_ARMS)
    assert ours.joint_names == ('r_shoulder', 'r_elbow', 'waist', 'l_shoulder', 'l_elbow')
    assert list(ours.is_prismatic) == [False, True, False, False, False]
    check_against_pinocchio(ours, TWO_ARMS, seed=2)


def test_base_link_other_than_root_matches_pinocchio_relative_placement() -> None:
    """Poses relative to base_link = inverse(oMf[base]) * oMf[link] (Pinocchio SE3 algebra)."""
    ours = RobotModel.from_urdf(TWO_ARMS, base_link='torso')
    reference = Reference(ours, TWO_ARMS)
    fk = ours.fk_function(['l_hand', 'r_hand', 'base'])
    for q in random_configurations(ours, seed=3):
        reference.update(q)
        base = reference.data.oMf[reference.frame('torso')]
        for link, pose in zip(['l_hand', 'r_hand', 'base'], fk(q)):
            expected = (base.inverse() * reference.data.oMf[reference.frame(link)]).homogeneous
            np.testing.assert_allclose(np.array(pose), expected, atol=TOL, err_msg=link)


def test_points_function_matches_pinocchio_frames() -> None:
    """Points fixed in link frames, added to Pinocchio as OP_FRAMEs, positions and Jacobians."""
    ours = RobotModel.from_urdf(ARM)
    points = [('tool_tip', (0.0, 0.0, 0.1)), ('range_left', (0.3, 0.0, 0.0)),
              ('link_3', (0.01, -0.02, 0.03))]
    reference = Reference(ours, ARM.read_text())
    names = []
    for k, (link, xyz) in enumerate(points):
        parent = reference.model.frames[reference.frame(link)]
        placement = parent.placement * pin.SE3(np.eye(3), np.array(xyz))
        names.append(f'point_{k}')
        reference.model.addFrame(pin.Frame(names[-1], parent.parentJoint, placement,
                                           pin.FrameType.OP_FRAME))
    reference.data = reference.model.createData()
    function = ours.points_function(points)
    for q in random_configurations(ours, seed=4):
        reference.update(q)
        positions, jacobian = (np.array(v) for v in function(q))
        assert positions.shape == (3, len(points))
        assert jacobian.shape == (3 * len(points), ours.n_joints)
        for k, name in enumerate(names):
            frame = reference.model.getFrameId(name)
            np.testing.assert_allclose(positions[:, k], reference.data.oMf[frame].translation,
                                       atol=TOL)
            expected = pin.getFrameJacobian(reference.model, reference.data, frame,
                                            pin.LOCAL_WORLD_ALIGNED)[:3]
            expected = expected[:, [iv for _, iv, _ in reference.idx]]
            np.testing.assert_allclose(jacobian[3 * k:3 * k + 3], expected, atol=TOL)


def test_rotation_error_derivative_at_zero_is_the_angular_jacobian() -> None:
    """d/dq rotvec(R(q) R0^T) at R = R0 equals the angular velocity Jacobian (Pinocchio).

    Also shows the formula is differentiable at exactly zero angle (no NaN).
    """
    ours = RobotModel.from_urdf(ARM)
    held = ca.SX.sym('q_now', ours.n_joints)
    scope = FormulaScope(ours, {}, [ours.q], [held])
    error = compile_formula('rotation_error(value_now(frame(tool_tip)), frame(tool_tip))', scope)
    function = ca.Function('e', [ours.q, held], [error.sx, ca.jacobian(error.sx, ours.q)])
    reference = Reference(ours, ARM.read_text())
    for q in random_configurations(ours, seed=5)[:5]:
        reference.update(q)
        value, jacobian = (np.array(v) for v in function(q, q))
        np.testing.assert_allclose(value.ravel(), 0.0, atol=TOL)
        np.testing.assert_allclose(jacobian, reference.jacobian('tool_tip')[3:], atol=TOL)
