"""`constraint-ctrl check`: validate a skill file and look at it at its start state.

Beyond loading and compiling (which already name file, line and field of any mistake), the check
evaluates the skill once at its offline start pose and reports what would bite at run time:
hard rows that cannot hold together, near-singular Jacobians, limits already violated, and
inputs without a value to check with. The result is clean only when there is nothing to report.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import ConstraintCtrlError
from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..solve.qp import SkillSolver, SolveStatus

#: Smallest singular value (relative to the largest) below which a Jacobian counts as
#: near-singular; common practice for a warning threshold, not a standard value.
SINGULAR_RATIO = 1e-3
#: A row whose Jacobian is (numerically) zero cannot be driven by any motion.
ZERO_ROW = 1e-9


@dataclass(slots=True)
class CheckReport:
    skill: str
    source: str
    errors: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def clean(self) -> bool:
        return not self.errors and not self.warnings

    def lines(self) -> list[str]:
        out = [f'{self.source}: skill {self.skill!r}']
        out += [f'  error: {m}' for m in self.errors]
        out += [f'  warning: {m}' for m in self.warnings]
        out += [f'  note: {m}' for m in self.notes]
        out.append('  clean' if self.clean else
                   f'  {len(self.errors)} error(s), {len(self.warnings)} warning(s)')
        return out


def check_file(path: Path) -> CheckReport:
    """Load, compile and inspect one skill file. Loading errors propagate (SkillError)."""
    spec = load_skill(path)
    skill = compile_skill(spec)
    return check_compiled(skill)


def check_compiled(skill: CompiledSkill) -> CheckReport:
    spec = skill.spec
    report = CheckReport(skill=spec.name, source=spec.source)
    report.notes.append(f'{skill.n_rows} rows, {skill.n_q} joints, {skill.n_s} unknowns, '
                        f'levels {list(skill.layout.levels)}, compiled in '
                        f'{skill.compile_seconds * 1000:.0f} ms')
    q = np.array([float(spec.offline.start.get(j, 0.0)) for j in skill.joint_names])
    unknown = sorted(set(spec.offline.start) - set(skill.joint_names))
    if unknown:
        report.errors.append(f'offline.start names unknown joints {unknown}')
    if not spec.offline.start:
        report.notes.append('no offline.start: checking at all joints = 0')
    u = np.zeros(len(skill.input_names))
    for i, name in enumerate(skill.input_names):
        if name in spec.offline.inputs:
            u[i] = float(spec.offline.inputs[name])
        elif spec.offline.scene is None:
            report.warnings.append(f'input {name!r} has no offline value; checked with 0')
    if spec.offline.scene is not None:
        u = _scene_values(skill, q, u, report)
    s = skill.start_unknowns()
    _check_limits(skill, q, s, report)
    solver = SkillSolver(skill)
    solver.set_start(q, s)
    result = solver.solve(q, s, u, 0.0, 0.002, np.zeros(skill.n_x))
    out = solver.outputs
    if result.status is SolveStatus.INFEASIBLE:
        report.errors.append('the hard rows and limits cannot all hold at the start: '
                             + _conflicting_hard_rows(skill, q, s, u))
    elif not result.ok:
        report.errors.append(f'solve failed at the start: {result.status.value} '
                             f'{result.message}')
    elif result.levels_solved < len(skill.layout.levels):
        # only a lower priority level failed: the tick runs on the levels above, and the hard
        # rows are not to blame (they are part of level 1, which was solved)
        missed = [r.name for r, ok in zip(skill.rows, solver.diagnostics().solved) if not ok]
        report.warnings.append(f'at the start {result.message}: rows {", ".join(missed)} are '
                               'not served there')
    for i, row in enumerate(skill.rows):
        if not np.isfinite(out['value'][i]) or not np.isfinite(out['J'][i]).all():
            report.errors.append(f'row {row.name}: not finite at the start pose '
                                 '(e.g. normalising a zero vector)')
    diag = solver.diagnostics()
    if result.ok:
        _check_singular(skill, solver, q, s, u, report)
    for i, row in enumerate(skill.rows):
        if row.kind != 'equal' and abs(diag.error[i]) > 1e-9:
            report.warnings.append(f'row {row.name} ({row.kind}) is already violated at the '
                                   f'start by {diag.error[i]:.4g}')
    return report


def _scene_values(skill: CompiledSkill, q: np.ndarray, u: np.ndarray,
                  report: CheckReport) -> np.ndarray:
    """Input values the skill's offline scene gives at the start pose."""
    try:
        from .simulate import ScenePlant
        plant = ScenePlant(skill)
        _, values = plant.measured()
    except ConstraintCtrlError as err:
        report.errors.append(str(err))
        return u
    for name, value in zip(skill.input_names, values):
        if not np.isfinite(value):
            report.warnings.append(f'input {name!r} reads {value} in the scene at the start pose '
                                   '(no detection); the skill cannot run there')
    return values


def _check_limits(skill: CompiledSkill, q: np.ndarray, s: np.ndarray,
                  report: CheckReport) -> None:
    model = skill.model
    for j, name in enumerate(skill.joint_names):
        if q[j] < model.lower[j] or q[j] > model.upper[j]:
            report.warnings.append(f'joint {name} starts at {q[j]:.4g}, outside its limits '
                                   f'[{model.lower[j]:.4g}, {model.upper[j]:.4g}]')
    for k, feat in enumerate(skill.spec.unknowns):
        if s[k] < feat.lower or s[k] > feat.upper:
            report.warnings.append(f'unknown {feat.name} starts at {s[k]:.4g}, outside '
                                   f'[{feat.lower:.4g}, {feat.upper:.4g}]')
    for info in skill.params:
        problem = info.check(info.value)
        if problem:
            report.errors.append(f'tunable default: {problem}')


def _rank(block: np.ndarray) -> int:
    if block.size == 0 or not np.isfinite(block).all():
        return 0   # a non-finite row is reported on its own ('not finite at the start pose')
    sv = np.linalg.svd(block, compute_uv=False)
    return int((sv > SINGULAR_RATIO * max(sv[0], ZERO_ROW)).sum())


def _check_singular(skill: CompiledSkill, solver: SkillSolver, q: np.ndarray, s: np.ndarray,
                    u: np.ndarray, report: CheckReport) -> None:
    """Warn where a Jacobian loses rank at the start compared with poses around it.

    A row set can lack full rank by design (a cross product has rank 2; a free rotation about
    the tool axis is no row's business); only a rank *drop* at the start pose, relative to the
    generic rank seen at nearby poses, marks a singular configuration.
    """
    J_start = solver.outputs['J'][:, :skill.n_q].copy()
    groups = {con.name: [i for i, r in enumerate(skill.rows) if r.constraint == con.name]
              for con in skill.spec.constraints}
    groups['all soft equality rows'] = [i for i, r in enumerate(skill.rows)
                                        if r.kind == 'equal' and not r.hard]
    generic = dict.fromkeys(groups, 0)
    rng = np.random.default_rng(0)
    for _ in range(8):
        q_near = q + rng.uniform(-0.2, 0.2, q.size)
        if not solver.solve(q_near, s, u, 0.0, 0.002, np.zeros(skill.n_x)).ok:
            continue
        J = solver.outputs['J'][:, :skill.n_q]
        for name, idx in groups.items():
            generic[name] = max(generic[name], _rank(J[idx]))
    for name, idx in groups.items():
        at_start = _rank(J_start[idx])
        if at_start < generic[name] and np.isfinite(J_start[idx]).all():
            sv = np.linalg.svd(J_start[idx], compute_uv=False)
            report.warnings.append(
                f'{name}: Jacobian loses rank at the start pose ({at_start} < {generic[name]} '
                f'nearby; singular values {np.array2string(sv, precision=3)}): a singular '
                'configuration')
    for i, row in enumerate(skill.rows):
        if np.linalg.norm(J_start[i]) < ZERO_ROW and row.kind == 'equal':
            report.notes.append(f'row {row.name} has a zero Jacobian at the start '
                                '(no motion changes it there)')


def _conflicting_hard_rows(skill: CompiledSkill, q: np.ndarray, s: np.ndarray,
                           u: np.ndarray) -> str:
    """Name hard rows whose removal makes the start feasible (a hint, not a proof)."""
    from dataclasses import replace

    hard = [c for c in skill.spec.constraints if c.hard]
    culprits = []
    for con in hard:
        relaxed = replace(skill.spec, constraints=tuple(
            replace(c, hard=False) if c is con else c for c in skill.spec.constraints))
        trial = SkillSolver(compile_skill(relaxed, skill.model))
        trial.set_start(q, s)
        if trial.solve(q, s, u, 0.0, 0.002, np.zeros(skill.n_x)).ok:
            culprits.append(con.name)
    if culprits:
        return 'making any one of ' + ', '.join(culprits) + ' soft resolves it'
    return 'the joint/unknown limits conflict with the hard rows ' + \
        ', '.join(c.name for c in hard)


__all__ = ['CheckReport', 'check_compiled', 'check_file']
