"""The complete, commented skill example in README.md loads, compiles and passes `check`."""
from __future__ import annotations

import re
from pathlib import Path

from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.loader import load_skill_text
from constraint_ctrl.tools.check import check_compiled

ROOT = Path(__file__).resolve().parents[2]


def _example() -> str:
    text = (ROOT / 'README.md').read_text()
    blocks = re.findall(r'```yaml\n(.*?)```', text, flags=re.S)
    skills = [b for b in blocks if b.startswith('skill:')]
    assert len(skills) == 1, 'README.md should hold exactly one skill example'
    return skills[0]


def test_readme_skill_example_loads_compiles_and_checks_clean() -> None:
    spec = load_skill_text(_example(), source='README.md', base_dir=ROOT / 'config' / 'skills')
    skill = compile_skill(spec)
    names = [c.name for c in spec.constraints]
    assert names == ['keep_standoff', 'face_surface', 'left_in_range', 'on_mid_circle', 'advance']
    assert [e.name for e in spec.events] == ['flange_done']
    report = check_compiled(skill)
    assert report.clean, report.lines()
