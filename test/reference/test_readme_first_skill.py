"""The README's walkthrough "A first skill, start to finish", offline part, from the README's text.

The skill file, the `pose` command and the `check` / `simulate` commands are read out of the
README and run as written (in a temporary copy of the package's config folder). What they
produce is checked against Pinocchio (PyPI `pin`, Pinocchio's own URDF parser), the reference
for forward kinematics:
- `pose` puts the tool tip at the asked point, tool z axis along -z of the base (1e-5 m, rad);
- the `start:` pasted in the README is what `pose` prints today (so the text stays true);
- after `simulate`, the tip is at the set height straight above where it started, within the
  skill's own event tolerance (2 mm; the event needs the height within it for 0.2 s, and the
  first-order behaviour only shrinks the error afterwards), and the tool still points down
  (1e-3 rad), with the event `lifted` reported.
"""
from __future__ import annotations

import json
import math
import re
import shlex
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

pin = pytest.importorskip('pinocchio')

from constraint_ctrl.cli import main  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
SECTION = '### A first skill, start to finish'


def walkthrough() -> tuple[str, str, list[str]]:
    """(pose command, skill YAML, offline commands) as the README writes them."""
    text = (ROOT / 'README.md').read_text()
    assert SECTION in text, 'README lost its walkthrough'
    part = text.split(SECTION, 1)[1].split('\n## ', 1)[0]
    blocks = re.findall(r'```(sh|yaml)\n(.*?)```', part, flags=re.S)
    shell = [b for kind, b in blocks if kind == 'sh']
    skill = next(b for kind, b in blocks if kind == 'yaml')
    pose = next(line for line in shell[0].splitlines() if line.startswith('constraint-ctrl pose'))
    offline = [line.split('  #')[0].strip() for line in shell[1].splitlines()
               if line.startswith(('constraint-ctrl check', 'constraint-ctrl simulate'))]
    return pose, skill, offline


def tool_pose(urdf: Path, joints: dict[str, float]) -> pin.SE3:
    model = pin.buildModelFromUrdf(str(urdf))
    data = model.createData()
    q = pin.neutral(model)
    for name, value in joints.items():
        joint = model.joints[model.getJointId(name)]
        if joint.nq == 2:                        # continuous: (cos, sin)
            q[joint.idx_q:joint.idx_q + 2] = (math.cos(value), math.sin(value))
        else:
            q[joint.idx_q] = value
    pin.framesForwardKinematics(model, data, q)
    return data.oMf[model.getFrameId('tool_tip')]


def down_angle(pose: pin.SE3) -> float:
    return float(np.arccos(np.clip(-pose.rotation[2, 2], -1.0, 1.0)))


def test_readme_walkthrough_offline(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    pose_cmd, skill_text, offline = walkthrough()
    shutil.copytree(ROOT / 'config', tmp_path / 'my_cell')
    monkeypatch.chdir(tmp_path)
    urdf = tmp_path / 'my_cell' / 'robots' / 'six_axis_arm.urdf'

    assert main(shlex.split(pose_cmd)[1:]) == 0
    printed = yaml.safe_load(capsys.readouterr().out.strip().splitlines()[-1])
    at = [float(v) for v in pose_cmd.split('--at')[1].split()[:3]]
    reached = tool_pose(urdf, printed)
    assert np.allclose(reached.translation, at, atol=1e-5)
    assert down_angle(reached) < 1e-5

    skill = yaml.safe_load(skill_text)
    pasted = skill['offline']['start']
    assert set(pasted) == set(printed)
    assert max(abs(pasted[j] - printed[j]) for j in printed) < 1e-5, (pasted, printed)

    (tmp_path / 'my_cell' / 'skills' / 'lift_tool.yaml').write_text(skill_text)
    assert [c.split()[1] for c in offline] == ['check', 'simulate']
    for command in offline:
        assert main(shlex.split(command)[1:]) == 0, command
    out_dir = Path(shlex.split(offline[1]).pop(shlex.split(offline[1]).index('--out') + 1))
    report = json.loads((tmp_path / out_dir / 'report.json').read_text())
    assert [e['event'] for e in report['events']] == ['lifted']
    final = tool_pose(urdf, report['final_joint_positions'])
    start = tool_pose(urdf, pasted)
    height = skill['tunables']['height']['value']
    assert abs(final.translation[2] - height) < 0.002
    assert np.allclose(final.translation[:2], start.translation[:2], atol=0.002)
    assert down_angle(final) < 1e-3
