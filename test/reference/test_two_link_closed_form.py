"""Two-link planar arm against its textbook closed form.

Source: Spong, Hutchinson & Vidyasagar, "Robot Modeling and Control", two-link planar arm
(forward kinematics, Jacobian and its singularities; chapter from memory: ch. 3 and 4):
    x = l1 c1 + l2 c12,  y = l1 s1 + l2 s12
    J = [[-l1 s1 - l2 s12, -l2 s12], [l1 c1 + l2 c12, l2 c12]],  det J = l1 l2 sin(q2)
so the arm is singular exactly at q2 = 0 and q2 = pi.
"""
from __future__ import annotations

import casadi as ca
import numpy as np

from constraint_ctrl.model.kinematics import RobotModel

L1, L2 = 0.7, 0.45
PLANAR = f"""<robot name="planar">
  <link name="base"/><link name="upper"/><link name="fore"/><link name="tip"/>
  <joint name="q1" type="revolute"><parent link="base"/><child link="upper"/>
    <axis xyz="0 0 1"/><limit lower="-3.2" upper="3.2" velocity="1"/></joint>
  <joint name="q2" type="revolute"><parent link="upper"/><child link="fore"/>
    <origin xyz="{L1} 0 0"/><axis xyz="0 0 1"/><limit lower="-3.2" upper="3.2" velocity="1"/>
  </joint>
  <joint name="tip_mount" type="fixed"><parent link="fore"/><child link="tip"/>
    <origin xyz="{L2} 0 0"/></joint>
</robot>"""


def closed_form(q1: float, q2: float) -> tuple[np.ndarray, np.ndarray]:
    c1, s1 = np.cos(q1), np.sin(q1)
    c12, s12 = np.cos(q1 + q2), np.sin(q1 + q2)
    position = np.array([L1 * c1 + L2 * c12, L1 * s1 + L2 * s12])
    jacobian = np.array([[-L1 * s1 - L2 * s12, -L2 * s12], [L1 * c1 + L2 * c12, L2 * c12]])
    return position, jacobian


def planar_function() -> ca.Function:
    model = RobotModel.from_urdf(PLANAR)
    function = model.points_function([('tip', (0.0, 0.0, 0.0))])
    assert model.joint_names == ('q1', 'q2')
    return function


def test_position_and_jacobian_match_closed_form() -> None:
    """FK and AD Jacobian equal the closed form at seeded random angles (1e-12)."""
    function = planar_function()
    rng = np.random.default_rng(7)
    for q1, q2 in rng.uniform(-np.pi, np.pi, size=(25, 2)):
        positions, jacobian = (np.array(v) for v in function([q1, q2]))
        expected_position, expected_jacobian = closed_form(q1, q2)
        np.testing.assert_allclose(positions[:2, 0], expected_position, atol=1e-12)
        assert abs(positions[2, 0]) < 1e-12                      # stays in the plane
        np.testing.assert_allclose(jacobian[:2], expected_jacobian, atol=1e-12)
        np.testing.assert_allclose(jacobian[2], 0.0, atol=1e-12)  # no z motion
        np.testing.assert_allclose(np.linalg.det(jacobian[:2]), L1 * L2 * np.sin(q2), atol=1e-12)


def test_singular_exactly_at_stretched_and_folded() -> None:
    """Smallest singular value ~0 at q2 = 0 and pi (det = l1 l2 sin q2), positive elsewhere."""
    function = planar_function()
    for q1 in (-1.0, 0.0, 0.4, 2.5):
        for q2 in (0.0, np.pi, -np.pi):
            _, jacobian = function([q1, q2])
            sigma = np.linalg.svd(np.array(jacobian)[:2], compute_uv=False)
            assert sigma[-1] < 1e-12, (q1, q2, sigma)
        for q2 in (0.1, 0.5 * np.pi, 2.0, -0.3, -3.0):
            _, jacobian = function([q1, q2])
            sigma = np.linalg.svd(np.array(jacobian)[:2], compute_uv=False)
            # for a 2x2 matrix sigma_min * sigma_max = |det| = l1 l2 |sin q2|
            np.testing.assert_allclose(sigma[0] * sigma[1], L1 * L2 * abs(np.sin(q2)), rtol=1e-9)
            assert sigma[-1] > 1e-3
