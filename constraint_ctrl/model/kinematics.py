"""Symbolic forward kinematics of a URDF tree in CasADi SX.

Poses are built once as expressions of the joint vector ``q``; every derivative the controller
needs is then taken by ``casadi.jacobian`` (automatic differentiation), never written by hand.
Constant factors are multiplied out numerically and zero terms are left out, so that the
expressions stay small without a separate simplification pass.
"""
from __future__ import annotations

import difflib
import math
import os
from collections.abc import Sequence

import casadi as ca
import numpy as np

from ..errors import ModelError
from .urdf import JointSpec, RobotDescription, parse_urdf, parse_urdf_string


def rpy_matrix(rpy: Sequence[float]) -> np.ndarray:
    """URDF fixed-axis roll-pitch-yaw: R = Rz(yaw) @ Ry(pitch) @ Rx(roll)."""
    roll, pitch, yaw = rpy
    cr, sr = math.cos(roll), math.sin(roll)
    cp, sp = math.cos(pitch), math.sin(pitch)
    cy, sy = math.cos(yaw), math.sin(yaw)
    rx = np.array([[1.0, 0.0, 0.0], [0.0, cr, -sr], [0.0, sr, cr]])
    ry = np.array([[cp, 0.0, sp], [0.0, 1.0, 0.0], [-sp, 0.0, cp]])
    rz = np.array([[cy, -sy, 0.0], [sy, cy, 0.0], [0.0, 0.0, 1.0]])
    return rz @ ry @ rx


def _axis_rotation(axis: Sequence[float], angle: ca.SX) -> ca.SX:
    """Rodrigues' formula R = a a^T + cos(q) (I - a a^T) + sin(q) [a]x, skipping zero terms."""
    a = np.asarray(axis, dtype=float)
    constant = np.outer(a, a)
    cos_part = np.eye(3) - constant
    skew = np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])
    c, s = ca.cos(angle), ca.sin(angle)
    rows = []
    for i in range(3):
        row = []
        for j in range(3):
            entry = ca.SX(0.0)
            if constant[i, j] != 0.0:
                entry = entry + constant[i, j]
            if cos_part[i, j] != 0.0:
                entry = entry + cos_part[i, j] * c
            if skew[i, j] != 0.0:
                entry = entry + skew[i, j] * s
            row.append(entry)
        rows.append(ca.horzcat(*row))
    return ca.vertcat(*rows)


def _homogeneous(rotation: ca.SX, position: ca.SX) -> ca.SX:
    return ca.vertcat(ca.horzcat(rotation, position), ca.DM([[0.0, 0.0, 0.0, 1.0]]))


class RobotModel:
    """Joint vector symbol, limits and memoised symbolic link poses of one robot.

    ``q`` follows the file order of the movable joints. Poses are expressed in ``base_link``
    (the URDF root unless given): T_base_link = inv(T_root_base) @ T_root_link.
    """

    def __init__(self, description: RobotDescription, base_link: str | None = None) -> None:
        self.description = description
        self.link_names: tuple[str, ...] = description.links
        movable = description.movable_joints
        self.joint_names: tuple[str, ...] = tuple(j.name for j in movable)
        self.n_joints: int = len(movable)
        self.q: ca.SX = ca.SX.sym('q', self.n_joints)
        self.lower = np.array([j.lower for j in movable], dtype=float)
        self.upper = np.array([j.upper for j in movable], dtype=float)
        self.velocity_limit = np.array([j.velocity for j in movable], dtype=float)
        self.is_prismatic = np.array([j.kind == 'prismatic' for j in movable], dtype=bool)
        self._index = {name: i for i, name in enumerate(self.joint_names)}
        self._parent_joint: dict[str, JointSpec] = {j.child: j for j in description.joints}
        # root-relative (rotation, position) per link, filled on demand
        self._from_root: dict[str, tuple[ca.SX, ca.SX]] = {}
        self._poses: dict[str, ca.SX] = {}
        self.base_link: str = description.root
        if base_link is not None:
            self._check_link(base_link)
            self.base_link = base_link

    @classmethod
    def from_urdf(cls, source: str | os.PathLike[str],
                  base_link: str | None = None) -> RobotModel:
        """Parse a URDF path or text and build its model."""
        return cls(parse_urdf(source), base_link)

    @classmethod
    def from_urdf_string(cls, text: str, base_link: str | None = None,
                         source: str = 'robot_description') -> RobotModel:
        """Build the model from URDF text received at run time (the `robot_description`
        topic); errors (ModelError) start with `source` and name the element."""
        return cls(parse_urdf_string(text, source), base_link)

    def joint_index(self, name: str) -> int:
        """Position of a movable joint in q."""
        if name not in self._index:
            known = ', '.join(self.joint_names) or '(none)'
            msg = f'unknown joint {name!r}; movable joints are: {known}'
            raise ModelError(msg)
        return self._index[name]

    # -- poses ----------------------------------------------------------------------------

    def pose(self, link: str) -> ca.SX:
        """4x4 homogeneous transform from base_link to ``link`` as an expression of q."""
        if link not in self._poses:
            self._check_link(link)
            rotation, position = self._root_pose(link)
            if self.base_link != self.description.root:
                base_r, base_p = self._root_pose(self.base_link)
                rotation, position = base_r.T @ rotation, base_r.T @ (position - base_p)
            self._poses[link] = _homogeneous(rotation, position)
        return self._poses[link]

    def position(self, link: str) -> ca.SX:
        """3x1 position of the link frame origin in base_link coordinates."""
        return self.pose(link)[:3, 3]

    def rotation(self, link: str) -> ca.SX:
        """3x3 rotation: columns are the link frame axes in base_link coordinates."""
        return self.pose(link)[:3, :3]

    def fk_function(self, links: Sequence[str]) -> ca.Function:
        """casadi Function 'fk': q -> one dense 4x4 pose per link (in the given order)."""
        outputs = [ca.densify(self.pose(link)) for link in links]
        return ca.Function('fk', [self.q], outputs, ['q'], [f'pose_{i}' for i in range(len(links))])

    def points_function(self, points: Sequence[tuple[str, Sequence[float]]]) -> ca.Function:
        """casadi Function 'points': q -> (P: 3 x k positions in base, J: 3k x n Jacobians).

        Each point is given as (link, xyz in that link's frame); J stacks the 3 x n Jacobians of
        the points in order, obtained by automatic differentiation.
        """
        columns = []
        for link, xyz in points:
            local = np.asarray(xyz, dtype=float).reshape(3)
            columns.append(self.rotation(link) @ ca.DM(local) + self.position(link))
        if columns:
            positions = ca.horzcat(*columns)
            jacobian = ca.vertcat(*[ca.jacobian(p, self.q) for p in columns])
        else:
            positions = ca.SX(3, 0)
            jacobian = ca.SX(0, self.n_joints)
        return ca.Function('points', [self.q], [ca.densify(positions), ca.densify(jacobian)],
                           ['q'], ['P', 'J'])

    # -- internals ------------------------------------------------------------------------

    def _check_link(self, link: str) -> None:
        if link in self.link_names:
            return
        close = difflib.get_close_matches(link, self.link_names, n=3)
        hint = f'; did you mean {", ".join(close)}?' if close else ''
        shown = ', '.join(self.link_names[:8]) + (', ...' if len(self.link_names) > 8 else '')
        msg = f'unknown link {link!r} in robot {self.description.name!r}{hint} (links: {shown})'
        raise ModelError(msg)

    def _root_pose(self, link: str) -> tuple[ca.SX, ca.SX]:
        """Walk up to the first link with a known pose, then compose downwards."""
        chain: list[JointSpec] = []
        current = link
        while current not in self._from_root and current in self._parent_joint:
            joint = self._parent_joint[current]
            chain.append(joint)
            current = joint.parent
        if current not in self._from_root:   # the root
            self._from_root[current] = (ca.SX.eye(3), ca.SX.zeros(3, 1))
        rotation, position = self._from_root[current]
        for joint in reversed(chain):
            rotation, position = self._joint_step(joint, rotation, position)
            self._from_root[joint.child] = (rotation, position)
        return self._from_root[link]

    def _joint_step(self, joint: JointSpec, rotation: ca.SX,
                    position: ca.SX) -> tuple[ca.SX, ca.SX]:
        """Child pose = parent pose * origin(xyz, rpy) * motion along/about the joint axis."""
        origin_r = ca.DM(rpy_matrix(joint.origin_rpy))
        position = position + rotation @ ca.DM(np.asarray(joint.origin_xyz, dtype=float))
        rotation = rotation @ origin_r
        if joint.kind in ('revolute', 'continuous'):
            rotation = rotation @ _axis_rotation(joint.axis, self.q[self._index[joint.name]])
        elif joint.kind == 'prismatic':
            offset = ca.DM(np.asarray(joint.axis, dtype=float)) * self.q[self._index[joint.name]]
            position = position + rotation @ offset
        return rotation, position
