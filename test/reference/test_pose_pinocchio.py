"""`constraint-ctrl pose` against Pinocchio (PyPI `pin`), the reference for forward kinematics.

The command solves with the package's own engine; every check here recomputes the tool pose of
the printed joints with Pinocchio (q mapped by joint name, Pinocchio's own URDF parser) and
compares it with the asked target:
- position within the command's tolerance (1e-5 m);
- --tool-down: the tool z axis along -z of the base (angle below 1e-5 rad);
- --rpy: the whole rotation (angle of R_target^T R from pinocchio.log3 below 1e-5 rad), with
  the roll-pitch-yaw convention of URDF, which Pinocchio's rpy module uses too
  (R = Rz(yaw) Ry(pitch) Rx(roll), Pinocchio documentation of pinocchio::rpy);
- every joint inside the URDF limits as Pinocchio reads them.
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest
import yaml

pin = pytest.importorskip('pinocchio')

from constraint_ctrl.cli import main  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
ARM = ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'
TOOL = 'tool_tip'
POSITION_TOL = 1e-5    # m, the command's default tolerance
ANGLE_TOL = 1e-5       # rad


class Reference:
    """Pinocchio's model of a URDF, evaluated at joints given by name."""

    def __init__(self, urdf: Path) -> None:
        self.model = pin.buildModelFromUrdf(str(urdf))
        self.data = self.model.createData()
        self.frame = self.model.getFrameId(TOOL)

    def q(self, joints: dict[str, float]) -> np.ndarray:
        q = pin.neutral(self.model)
        for name, value in joints.items():
            joint = self.model.joints[self.model.getJointId(name)]
            if joint.nq == 2:                        # continuous: (cos, sin)
                q[joint.idx_q:joint.idx_q + 2] = (math.cos(value), math.sin(value))
            else:
                q[joint.idx_q] = value
        return q

    def pose(self, joints: dict[str, float]) -> pin.SE3:
        pin.framesForwardKinematics(self.model, self.data, self.q(joints))
        return self.data.oMf[self.frame]

    def within_limits(self, joints: dict[str, float]) -> bool:
        q = self.q(joints)
        return bool(np.all(q >= self.model.lowerPositionLimit - 1e-9)
                    and np.all(q <= self.model.upperPositionLimit + 1e-9))

    def random_joints(self, rng: np.random.Generator, names: list[str]) -> dict[str, float]:
        out = {}
        for name in names:
            joint = self.model.joints[self.model.getJointId(name)]
            lo = self.model.lowerPositionLimit[joint.idx_q]
            hi = self.model.upperPositionLimit[joint.idx_q]
            out[name] = float(rng.uniform(0.8 * lo, 0.8 * hi))
        return out


def pose_cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(['pose', *args])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def printed_joints(out: str) -> dict[str, float]:
    """The last line is the flow mapping meant for offline.start; it must be YAML."""
    doc = yaml.safe_load(out)
    assert isinstance(doc, dict), out
    return {str(k): float(v) for k, v in doc.items()}


JOINTS = [f'joint_{i}' for i in range(1, 7)]


@pytest.fixture(scope='module')
def ref() -> Reference:
    return Reference(ARM)


@pytest.mark.parametrize('target', [(0.50, -0.20, 0.26), (0.58, 0.25, 0.212),
                                    (0.45, 0.38, 0.25), (0.35, 0.0, 0.45)])
def test_tool_down_targets(ref: Reference, capsys, target) -> None:
    code, out, err = pose_cli(capsys, str(ARM), '--tool', TOOL, '--at', *map(str, target),
                              '--tool-down')
    assert code == 0, out + err
    joints = printed_joints(out)
    assert sorted(joints) == JOINTS
    pose = ref.pose(joints)
    assert np.linalg.norm(pose.translation - np.array(target)) <= POSITION_TOL
    z_axis = pose.rotation[:, 2]
    assert math.acos(min(1.0, float(-z_axis[2]))) <= ANGLE_TOL    # along -z of the base
    assert ref.within_limits(joints)


def test_full_orientation_of_reachable_poses(ref: Reference, capsys) -> None:
    """Targets made by Pinocchio from random joints inside the limits: each is reachable."""
    rng = np.random.default_rng(20240611)
    for _ in range(6):
        goal = ref.pose(ref.random_joints(rng, JOINTS))
        rpy = pin.rpy.matrixToRpy(goal.rotation)
        code, out, err = pose_cli(capsys, str(ARM), '--tool', TOOL,
                                  '--at', *map(repr, goal.translation.tolist()),
                                  '--rpy', *map(repr, rpy.tolist()))
        assert code == 0, out + err
        joints = printed_joints(out)
        pose = ref.pose(joints)
        assert np.linalg.norm(pose.translation - goal.translation) <= POSITION_TOL
        assert np.linalg.norm(pin.log3(goal.rotation.T @ pose.rotation)) <= ANGLE_TOL
        assert ref.within_limits(joints)


def test_tool_pose_for_given_joints(ref: Reference, capsys) -> None:
    """Without --at: the printed position and roll-pitch-yaw are Pinocchio's."""
    rng = np.random.default_rng(7)
    for _ in range(4):
        joints = ref.random_joints(rng, JOINTS)
        near = '{' + ', '.join(f'{k}: {v!r}' for k, v in joints.items()) + '}'
        code, out, err = pose_cli(capsys, str(ARM), '--tool', TOOL, '--near', near)
        assert code == 0, err
        doc = yaml.safe_load(out)
        expected = ref.pose(joints)
        position = np.array([doc['position'][k] for k in 'xyz'])
        rpy = [doc['rpy'][k] for k in ('roll', 'pitch', 'yaw')]
        assert np.abs(position - expected.translation).max() <= 1e-6      # printed to 1e-6
        rotation = pin.rpy.rpyToMatrix(*rpy)
        assert np.linalg.norm(pin.log3(expected.rotation.T @ rotation)) <= 1e-5
        assert np.abs(np.array(doc['z_axis']) - expected.rotation[:, 2]).max() <= 1e-6


def test_zero_pose_is_the_default(ref: Reference, capsys) -> None:
    code, out, _ = pose_cli(capsys, str(ARM), '--tool', TOOL)
    assert code == 0
    doc = yaml.safe_load(out)
    expected = ref.pose({j: 0.0 for j in JOINTS})   # every joint's range contains 0
    assert np.abs(np.array([doc['position'][k] for k in 'xyz'])
                  - expected.translation).max() <= 1e-6


def test_unreachable_target_reports_the_closest_pose(ref: Reference, capsys) -> None:
    target = np.array([2.0, 0.0, 0.3])            # beyond the arm's reach (about 1 m)
    code, out, err = pose_cli(capsys, str(ARM), '--tool', TOOL, '--at', '2.0', '0.0', '0.3',
                              '--tool-down')
    assert code == 1
    assert 'cannot reach' in err
    reported = float(re.search(r'position off by ([0-9.e+-]+) m', err).group(1))
    joints = printed_joints(out)                  # the closest pose is still printed
    distance = float(np.linalg.norm(ref.pose(joints).translation - target))
    assert distance == pytest.approx(reported, rel=0.05)     # printed to 2 digits
    assert distance > 0.5
    assert ref.within_limits(joints)


def test_joint_limits_hold_when_they_bind(tmp_path: Path, capsys) -> None:
    """joint_1 limited to +-0.1 rad: the shaft (which needs about -0.38 rad) cannot be faced
    directly; whatever is printed stays inside the limits, and a reached target is reached."""
    text = ARM.read_text()
    text, count = re.subn(r'(<joint name="joint_1".*?<limit )lower="[^"]+" upper="[^"]+"',
                          r'\1lower="-0.1" upper="0.1"', text, count=1, flags=re.S)
    assert count == 1
    urdf = tmp_path / 'narrow.urdf'
    urdf.write_text(text)
    narrow = Reference(urdf)
    target = np.array([0.50, -0.20, 0.26])
    code, out, _ = pose_cli(capsys, str(urdf), '--tool', TOOL, '--at', *map(str, target),
                            '--tool-down')
    joints = printed_joints(out)
    assert narrow.within_limits(joints)
    assert abs(joints['joint_1']) <= 0.1 + 1e-9
    distance = float(np.linalg.norm(narrow.pose(joints).translation - target))
    assert (code == 0) == (distance <= POSITION_TOL)


def test_output_pastes_into_offline_start(capsys) -> None:
    from constraint_ctrl.skill.loader import load_skill_text
    code, out, _ = pose_cli(capsys, str(ARM), '--tool', TOOL, '--at', '0.5', '-0.2', '0.26',
                            '--tool-down')
    assert code == 0
    mapping = out.strip().splitlines()[-1]
    skill = (ROOT / 'config' / 'skills' / 'move_to_point.yaml').read_text()
    skill = re.sub(r'(?m)^  start: .*$', f'  start: {mapping}', skill)
    spec = load_skill_text(skill, source='pasted.yaml', base_dir=ROOT / 'config' / 'skills')
    assert dict(spec.offline.start) == printed_joints(out)


def test_bad_link_and_bad_joint_are_clear_errors(capsys) -> None:
    code, _, err = pose_cli(capsys, str(ARM), '--tool', 'tool_tp', '--at', '0.5', '0', '0.3')
    assert code == 2
    assert "unknown link 'tool_tp'" in err and 'did you mean tool_tip' in err
    code, _, err = pose_cli(capsys, str(ARM), '--tool', TOOL, '--near', '{joint_9: 0.1}')
    assert code == 2
    assert 'joint_9' in err and 'joint_1' in err
    code, _, err = pose_cli(capsys, str(ARM), '--tool', TOOL, '--near', '{joint_2: 5.0}')
    assert code == 2
    assert 'outside its URDF limits' in err


def test_position_only_and_a_tighter_tolerance(ref: Reference, capsys) -> None:
    """Without an orientation only the position is asked for; --tolerance 1e-8 prints more
    decimals so that rounding stays inside it."""
    target = np.array([0.40, 0.15, 0.50])
    code, out, err = pose_cli(capsys, str(ARM), '--tool', TOOL, '--at', *map(str, target),
                              '--tolerance', '1e-8')
    assert code == 0, out + err
    joints = printed_joints(out)
    assert np.linalg.norm(ref.pose(joints).translation - target) <= 1e-8
    assert ref.within_limits(joints)
