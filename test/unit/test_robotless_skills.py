"""Skills without `robot:` compile against the controller's model (issue 9.3).

The node's model may come from the robot_description topic, so a skill need not name a URDF.
Checked: such a skill compiles against the model the library is given and its kinematics are
that model's (compared with Pinocchio-free numbers: the same skill naming the URDF explicitly,
compiled from the file, must give the same row values); a skill naming a link or joint the
model lacks is refused at load with its file and line; the offline tools take --robot FILE for
such skills and say so clearly without it; the robot_description source of the node builds
its model from URDF text and names the topic in its errors.
"""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.errors import ConstraintCtrlError
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.nodes.robot_source import ModelSource, load_robot_model
from constraint_ctrl.runtime.library import SkillLibrary
from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.loader import load_skill

ROOT = Path(__file__).resolve().parents[2]
URDF = ROOT / 'config' / 'robots' / 'six_axis_arm.urdf'
JOINTS = tuple(f'joint_{i}' for i in range(1, 7))

ROBOTLESS = """\
skill: reach_marker
description: no robot named; the controller's model is used
formulas:
  tip: position(tool_tip)
constraints:
  - name: tip_height
    function: tip[2]
    kind: equal
    target: 0.3
    behaviour: {order: 1, gain: 2.0}
offline:
  start: {joint_2: 0.6, joint_3: 0.4, joint_5: 0.5}
"""


def write(folder: Path, name: str, text: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(text)
    return path


def test_a_skill_without_robot_compiles_against_the_given_model(tmp_path: Path) -> None:
    path = write(tmp_path / 'skills', 'reach.yaml', ROBOTLESS)
    model = RobotModel.from_urdf(URDF)
    library = SkillLibrary(path.parent, model.joint_names, model=model)
    report = library.reload()
    assert report.ok and report.added == ['reach_marker'], report.summary()
    loaded = library.get('reach_marker')
    assert loaded is not None and loaded.compiled.model is model
    # the same skill naming the URDF: identical row values and Jacobian at a pose
    named = write(tmp_path / 'named', 'reach.yaml',
                  ROBOTLESS.replace('formulas:', f'robot: {URDF}\nformulas:'))
    reference = compile_skill(load_skill(named))
    q = np.array([0.1, 0.6, 0.4, -0.2, 0.5, 0.3])
    ours = loaded.compiled.model.position('tool_tip')
    theirs = reference.model.position('tool_tip')
    import casadi as ca
    f_ours = ca.Function('f', [loaded.compiled.model.q], [ours])
    f_theirs = ca.Function('f', [reference.model.q], [theirs])
    np.testing.assert_allclose(np.array(f_ours(q)), np.array(f_theirs(q)), atol=1e-12)


def test_a_skill_without_robot_and_no_model_is_refused_with_a_hint(tmp_path: Path) -> None:
    path = write(tmp_path / 'skills', 'reach.yaml', ROBOTLESS)
    library = SkillLibrary(path.parent, JOINTS)
    report = library.reload()
    message = report.failed['reach.yaml']
    assert 'reach.yaml:1: skill:' in message and '--robot FILE' in message, message


def test_a_link_the_model_lacks_is_refused_with_file_and_line(tmp_path: Path) -> None:
    text = ROBOTLESS.replace('position(tool_tip)', 'position(camera_mount)')
    path = write(tmp_path / 'skills', 'reach.yaml', text)
    model = RobotModel.from_urdf(URDF)
    library = SkillLibrary(path.parent, model.joint_names, model=model)
    report = library.reload()
    message = report.failed['reach.yaml']
    assert message.startswith(f'{path}:4: formulas.tip:'), message
    assert "unknown link 'camera_mount'" in message
    assert library.names() == []


def test_a_joint_the_model_lacks_is_refused_with_file_and_line(tmp_path: Path) -> None:
    text = ROBOTLESS.replace("function: tip[2]", "function: joint(joint_9)")
    path = write(tmp_path / 'skills', 'reach.yaml', text)
    model = RobotModel.from_urdf(URDF)
    library = SkillLibrary(path.parent, model.joint_names, model=model)
    message = library.reload().failed['reach.yaml']
    assert message.startswith(f'{path}:7: constraints[0].function:'), message
    assert 'joint_9' in message


def test_a_named_robot_with_other_joints_is_refused_at_its_robot_line(tmp_path: Path) -> None:
    urdf = URDF.read_text().replace('joint_6', 'wrist_roll')
    other = write(tmp_path / 'robots', 'other.urdf', urdf)
    path = write(tmp_path / 'skills', 'reach.yaml',
                 ROBOTLESS.replace('formulas:', f'robot: {other}\nformulas:'))
    model = RobotModel.from_urdf(URDF)
    message = SkillLibrary(path.parent, model.joint_names, model=model).reload() \
        .failed['reach.yaml']
    assert message.startswith(f'{path}:3: robot:'), message
    assert 'wrist_roll' in message


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, '-m', 'constraint_ctrl.cli', *args],
                          capture_output=True, text=True, timeout=300)


def test_check_and_simulate_take_robot_for_a_skill_without_one(tmp_path: Path) -> None:
    path = write(tmp_path / 'skills', 'reach.yaml', ROBOTLESS)
    without = run_cli('check', str(path))
    assert without.returncode == 2
    assert f'error: {path}:1: skill: the skill names no robot' in without.stderr
    assert '--robot FILE' in without.stderr
    checked = run_cli('check', str(path), '--robot', str(URDF))
    assert checked.returncode in (0, 1), checked.stderr   # 1: warnings (no limits:)
    assert "skill 'reach_marker'" in checked.stdout
    out = tmp_path / 'sim'
    simulated = run_cli('simulate', str(path), '--robot', str(URDF), '--duration', '2',
                        '--out', str(out), '--quiet')
    assert simulated.returncode == 0, simulated.stderr
    import json
    report = json.loads((out / 'report.json').read_text())
    # the first-order row with gain 2 over 2 s: |e(2)| = |e(0)| exp(-4) (from the closed-loop
    # solution of de/dt = -K e); allow the watchdog's ramp-in to slow it, but it must converge
    assert abs(report['constraints']['tip_height']['final_error']) < 0.05
    missing = run_cli('simulate', str(path), '--duration', '1', '--out', str(tmp_path / 'x'))
    assert missing.returncode == 2 and '--robot FILE' in missing.stderr


# ------------------------------------------------------------------ robot_description source

def test_the_model_from_the_topic_is_built_from_the_received_text() -> None:
    text = URDF.read_text()
    loaded = load_robot_model(None, ModelSource('topic', '', 'robot_description', 1.0),
                              receive=lambda timeout: (text, '/robot_description'))
    assert loaded.model.joint_names == RobotModel.from_urdf(URDF).joint_names
    assert loaded.origin == '/robot_description' and loaded.text == text


def test_no_description_and_a_bad_description_name_the_topic() -> None:
    source = ModelSource('topic', '', 'robot_description', 0.5)
    with pytest.raises(ConstraintCtrlError, match=r'no robot description on /cell/robot_'
                                                  r'description within 0.5 s'):
        load_robot_model(None, source, receive=lambda t: (None, '/cell/robot_description'))
    bad = URDF.read_text().replace('<joint name="joint_3"', '<joint name="joint_2"', 1)
    with pytest.raises(ConstraintCtrlError) as caught:
        load_robot_model(None, source, receive=lambda t: (bad, '/robot_description'))
    assert '/robot_description' in str(caught.value) and 'joint_2' in str(caught.value)

