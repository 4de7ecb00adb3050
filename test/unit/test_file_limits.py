"""Size limits of our YAML formats (skills, plans, scenes) and linear-time merge keys.

Outside references used by the checks (named again beside each one):
- the YAML 1.1 merge key type (yaml.org/type/merge.html, from memory): explicit keys win over
  merged ones, earlier merged mappings win over later ones;
- PyYAML's ``yaml.safe_load`` as the reference reader of the values a merge produces;
- the "billion laughs" pattern (nested aliases that each repeat the previous level ten times) is
  the well-known way an alias-based format expands exponentially (common practice to refuse).
Expected lines are counted from the generated texts.
"""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from constraint_ctrl import located_yaml
from constraint_ctrl.errors import PlanError, SkillError
from constraint_ctrl.located_yaml import (MAX_EXPANDED_VALUES, MAX_FILE_BYTES,
                                          load_located)
from constraint_ctrl.plan.plan import load_plan
from constraint_ctrl.sim.scene import SceneError, load_scene
from constraint_ctrl.skill import loader as skill_loader
from constraint_ctrl.skill.compile import MAX_ROWS, compile_skill
from constraint_ctrl.skill.loader import MAX_CONSTRAINTS, load_skill, load_skill_text

CONFIG = Path(__file__).resolve().parents[2] / 'config'
ROBOT = CONFIG / 'robots' / 'six_axis_arm.urdf'
HEADER = f'skill: limits\nrobot: {ROBOT}\n'


def merge_chain(levels: int) -> str:
    """Tunables t0..t<levels>, each merging the previous one twice (2**levels naive pairs)."""
    lines = [HEADER.rstrip('\n'), 'tunables:', '  t0: &t0 {value: 1.5, unit: m}']
    lines += [f'  t{i}: &t{i} {{<<: [*t{i - 1}, *t{i - 1}]}}' for i in range(1, levels + 1)]
    lines += ['constraints:', '  - {name: a, function: joint(joint_1), target: 0}']
    return '\n'.join(lines) + '\n'


def test_nested_merge_keys_are_expanded_in_linear_time(monkeypatch: pytest.MonkeyPatch) -> None:
    # Each level merges the previous mapping twice: a reader that re-expands every merge does
    # 2**levels steps. Counted deterministically: how many keys the reader reads.
    levels = 16
    calls = 0
    original = skill_loader._Reader.key

    def counting(self, at, key_node):  # noqa: ANN001, ANN202 - same signature as the method
        nonlocal calls
        calls += 1
        return original(self, at, key_node)

    monkeypatch.setattr(skill_loader._Reader, 'key', counting)
    text = merge_chain(levels)
    spec = load_skill_text(text, source='chain.yaml', base_dir=CONFIG)
    # Reference: PyYAML's safe_load applies the merge keys (yaml.org/type/merge.html).
    reference = yaml.safe_load(text)['tunables']
    assert [(t.name, t.value, t.unit) for t in spec.tunables] == [
        (name, value['value'], value['unit']) for name, value in reference.items()]
    # linear: a few key reads per written mapping entry, not 2**16 = 65536
    assert calls < 20 * (levels + 10), calls


def test_a_31_level_merge_chain_of_1_kB_loads() -> None:
    # The file of the report (about 1 kB, 31 levels): 2**31 naive steps would never finish.
    text = merge_chain(31)
    assert len(text.encode()) < 1400
    spec = load_skill_text(text, source='chain.yaml', base_dir=CONFIG)
    assert len(spec.tunables) == 32 and spec.tunables[-1].value == 1.5


def laughs(levels: int, indent: str = '') -> list[str]:
    """Lists l0..l<levels>, each holding ten aliases of the previous one (10**levels values)."""
    lines = [f'{indent}l0: &l0 [x, x, x, x, x, x, x, x, x, x]']
    for i in range(1, levels + 1):
        lines.append(f'{indent}l{i}: &l{i} [' + ', '.join([f'*l{i - 1}'] * 10) + ']')
    return lines


def test_plan_file_that_expands_beyond_the_budget_is_refused(tmp_path: Path) -> None:
    # 10**6 values from a 500-byte text; the budget is MAX_EXPANDED_VALUES (100,000).
    path = tmp_path / 'plan.yaml'
    path.write_text('plan: p\n' + '\n'.join(laughs(6)) + '\n')
    with pytest.raises(PlanError, match='holds more than 100,000 values') as info:
        load_located(path, PlanError)
    # located at the first list that is too big: l<n> holds 1 + 10 * size(l<n-1>) values, so
    # l3 holds 11,111 and l4 111,111 (line 2 + 4 = 6)
    assert info.value.file == str(path) and info.value.line == 6
    assert MAX_EXPANDED_VALUES == 100_000


def test_plan_just_below_the_budget_loads(tmp_path: Path) -> None:
    path = tmp_path / 'plan.yaml'
    path.write_text('plan: p\n' + '\n'.join(laughs(3)) + '\n')   # about 11,000 values
    data, _ = load_located(path, PlanError)
    assert data == yaml.safe_load(path.read_text())   # reference reader, same values


def test_skill_file_that_expands_beyond_the_budget_is_refused() -> None:
    text = HEADER + 'description: &d text\ntunables:\n' + '\n'.join(laughs(6, '  ')) + '\n'
    with pytest.raises(SkillError, match='holds more than 100,000 values') as info:
        load_skill_text(text, source='laughs.yaml', base_dir=CONFIG)
    assert info.value.line == 9      # l4 (111,111 values): header, description, tunables, l0..l4


def test_alias_to_its_own_parent_is_refused() -> None:
    text = HEADER + 'tunables: &t\n  a: *t\n'
    with pytest.raises(SkillError, match='refers to itself'):
        load_skill_text(text, source='loop.yaml', base_dir=CONFIG)


def padded(text: str, size: int) -> str:
    """``text`` followed by comment lines up to ``size`` bytes (comments change no value)."""
    line = '# ' + 'x' * 97 + '\n'
    body = text + line * ((size - len(text)) // len(line) + 1)
    return body[:size - 1] + '\n'


def test_skill_file_over_the_size_limit_is_refused(tmp_path: Path) -> None:
    path = tmp_path / 'big.yaml'
    path.write_text(padded(HEADER, MAX_FILE_BYTES + 1))
    with pytest.raises(SkillError, match=r'larger than the limit of 1,000,000 bytes') as info:
        load_skill(path)
    assert info.value.file == str(path)
    path.write_text(padded(HEADER, MAX_FILE_BYTES))      # exactly at the limit: accepted
    assert load_skill(path).name == 'limits'


def test_plan_and_scene_files_over_the_size_limit_are_refused(tmp_path: Path) -> None:
    plan = tmp_path / 'plan.yaml'
    plan.write_text(padded('plan: p\n', MAX_FILE_BYTES + 1))
    with pytest.raises(PlanError, match='larger than the limit') as info:
        load_plan(plan)
    assert info.value.file == str(plan)
    scene = tmp_path / 'scene.yaml'
    scene.write_text(padded((CONFIG / 'scenes' / 'gearbox_cell.yaml').read_text(),
                            MAX_FILE_BYTES + 1))
    with pytest.raises(SceneError, match='larger than the limit') as info:
        load_scene(scene)
    assert info.value.file == str(scene)


def test_scene_file_that_expands_beyond_the_budget_is_refused(tmp_path: Path) -> None:
    scene = tmp_path / 'scene.yaml'
    text = (CONFIG / 'scenes' / 'gearbox_cell.yaml').read_text()
    scene.write_text(text + '\n'.join(laughs(6)) + '\n')
    with pytest.raises(SceneError, match='holds more than 100,000 values'):
        load_scene(scene)


def test_too_many_constraints_are_refused_at_the_first_one_too_many() -> None:
    assert MAX_CONSTRAINTS == 2000
    items = [f'  - {{name: r{i}, function: joint(joint_1), kind: at_most, upper: 1}}'
             for i in range(MAX_CONSTRAINTS + 1)]
    text = HEADER + 'constraints:\n' + '\n'.join(items) + '\n'
    with pytest.raises(SkillError, match='more than 2000 constraints') as info:
        load_skill_text(text, source='many.yaml', base_dir=CONFIG)
    assert info.value.line == 3 + MAX_CONSTRAINTS + 1      # the 2001st item
    assert info.value.field == f'constraints[{MAX_CONSTRAINTS}]'


def test_too_many_rows_are_refused_when_compiling() -> None:
    # 667 three-component functions make 2001 rows (a vector function counts its components)
    assert MAX_ROWS == 2000
    n = MAX_ROWS // 3 + 1
    items = [f'  - {{name: r{i}, function: "position(tool_tip)", kind: at_most, upper: 5}}'
             for i in range(n)]
    text = HEADER + 'constraints:\n' + '\n'.join(items) + '\n'
    spec = load_skill_text(text, source='rows.yaml', base_dir=CONFIG)
    with pytest.raises(SkillError, match='more than 2000 rows') as info:
        compile_skill(spec)
    assert info.value.line == 3 + n and info.value.field == f'constraints[{n - 1}].function'


def test_the_limits_are_stated_in_the_readme() -> None:
    readme = (CONFIG.parent / 'README.md').read_text()
    for text in ('1,000,000 bytes', '100,000 values', '2,000 rows', '2,000 constraints'):
        assert text in readme, text
    assert located_yaml.MAX_FILE_BYTES == 1_000_000
