"""`constraint-ctrl check`: validate a skill file and look at it at its start state.

Beyond loading and compiling (which already name file, line and field of any mistake), the check
evaluates the skill once at its offline start pose and reports what would bite at run time:
hard rows that cannot hold together, near-singular Jacobians, limits already violated, inputs
without a value to check with, no limits set, and behaviours too fast for the control rate and
the inputs' delay (skill/stability.py). The result is clean only when there is nothing to
report (notes do not count).

Behaviours against the control rate: each row's delay is that of the slowest input its error
depends on (found from the compiled function's sparsity), taken as one sample period 1 / rate_hz
(a held sample is up to one period old when the next one arrives; its timeout is the age at
which the node stops, not the age it runs with), in whole ticks of the control period (rows of
joints and unknowns only: no delay). A first-order gain or a second-order natural frequency at
or beyond the discrete stability limit is a warning naming the largest stable value; within a
factor 2 of it, a note (the response rings). Gains given as tunables are checked at their value
and at their upper bound (a value they may be set to at run time).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import casadi as ca
import numpy as np

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel
from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..skill.robot import robot_model
from ..skill.schema import SkillSpec
from ..skill.stability import delay_ticks, first_order_limit, second_order_limit
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


#: The controller node's default control rate (parameter rate_hz), Hz.
NODE_RATE_HZ = 500.0


def check_file(path: Path, rate_hz: float = NODE_RATE_HZ,
               robot: RobotModel | None = None) -> CheckReport:
    """Load, compile and inspect one skill file. Loading errors propagate (SkillError).

    ``robot``: the model for a skill without ``robot:`` (check --robot FILE); a skill that
    names its robot uses its own."""
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        msg = f'--rate must be a finite number > 0 (Hz), got {rate_hz!r}'
        raise ConstraintCtrlError(msg)
    spec = load_skill(path)
    skill = compile_skill(spec, robot_model(spec, robot))
    return check_compiled(skill, rate_hz)


def check_compiled(skill: CompiledSkill, rate_hz: float = NODE_RATE_HZ) -> CheckReport:
    spec = skill.spec
    report = CheckReport(skill=spec.name, source=spec.source)
    report.notes.append(f'{skill.n_rows} rows, {skill.n_q} joints, {skill.n_s} unknowns, '
                        f'levels {list(skill.layout.levels)}, compiled in '
                        f'{skill.compile_seconds * 1000:.0f} ms')
    if not spec.constraints:
        report.errors.append(located(spec, 'the skill has no constraints: it would only hold '
                                           'the arm still; give it at least one', 'constraints'))
    _check_limits_given(skill, report)
    _check_behaviours(skill, 1.0 / rate_hz, report)
    q = np.array([float(spec.offline.start.get(j, 0.0)) for j in skill.joint_names])
    for joint in spec.offline.start:
        if joint not in skill.joint_names:
            report.errors.append(located(
                spec, f'{joint!r} is not a joint of the robot (joints: '
                      f'{", ".join(skill.joint_names)})', f'offline.start.{joint}'))
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
    with np.errstate(invalid='ignore', over='ignore'):   # non-finite rows are reported below
        result = solver.solve(q, s, u, 0.0, 0.002, np.zeros(skill.n_x))
    out = solver.outputs
    not_finite = _check_finite(skill, out, report)
    if result.status is SolveStatus.INFEASIBLE:
        report.errors.append('the hard rows and limits cannot all hold at the start: '
                             + _conflicting_hard_rows(skill, q, s, u))
    elif not result.ok:
        if not not_finite:       # else the rows that are not finite already say why
            report.errors.append(f'solve failed at the start: {result.status.value} '
                                 f'{result.message}')
    elif result.levels_solved < len(skill.layout.levels):
        # only a lower priority level failed: the tick runs on the levels above, and the hard
        # rows are not to blame (they are part of level 1, which was solved)
        with np.errstate(invalid='ignore', over='ignore'):
            solved = solver.diagnostics().solved
        missed = [r.name for r, ok in zip(skill.rows, solved) if not ok]
        report.warnings.append(f'at the start {result.message}: rows {", ".join(missed)} are '
                               'not served there')
    with np.errstate(invalid='ignore', over='ignore'):
        diag = solver.diagnostics()
    if result.ok:
        _check_singular(skill, solver, q, s, u, report)
    for i, row in enumerate(skill.rows):
        if row.kind != 'equal' and abs(diag.error[i]) > 1e-9:
            report.warnings.append(f'row {row.name} ({row.kind}) is already violated at the '
                                   f'start by {diag.error[i]:.4g}')
    return report


def located(spec: SkillSpec, message: str, field_path: str) -> str:
    """``file:line: field: message`` for a finding that belongs to one field of the file."""
    return str(spec.error(message, field_path))


def _constraint_index(skill: CompiledSkill, name: str) -> int:
    return [c.name for c in skill.spec.constraints].index(name)


def _check_finite(skill: CompiledSkill, out: dict[str, np.ndarray], report: CheckReport) -> bool:
    """Name each row whose value, error or Jacobian is NaN or inf at the start, with its line.

    The value and Jacobian come from the task function, the error also from the target or
    bounds: the field named is the one that made the number. Returns whether any row was.
    """
    found = False
    for i, row in enumerate(skill.rows):
        con = _constraint_index(skill, row.constraint)
        function_bad = not (np.isfinite(out['value'][i]) and np.isfinite(out['J'][i]).all())
        if function_bad:
            field = 'function'
        elif not np.isfinite(out['error'][i]):
            field = {'equal': 'target', 'at_most': 'upper', 'at_least': 'lower'}.get(
                row.kind, 'lower')
        else:
            continue
        found = True
        report.errors.append(located(
            skill.spec, f'row {row.name}: not finite at the start pose (value '
                        f'{out["value"][i]:.4g}, error {out["error"][i]:.4g}); e.g. an overflow '
                        'such as 10 ** 400, 0 / 0, or normalising a zero vector',
            f'constraints[{con}].{field}'))
    return found


def _row_delays(skill: CompiledSkill) -> tuple[np.ndarray, list[str]]:
    """Per row: the sample period of the slowest input its error depends on (s, 0 if none),
    and that input's name ('' if none)."""
    n_u = len(skill.input_names)
    delays = np.zeros(skill.n_rows)
    names = [''] * skill.n_rows
    if not n_u or not skill.n_rows:
        return delays, names
    fn = skill.function
    pattern = fn.jac_sparsity(fn.index_out('error'), fn.index_in('u'))
    depends = np.array(ca.DM(pattern, 1).full(), dtype=bool)
    periods = np.array([1.0 / inp.rate_hz for inp in skill.spec.inputs])
    for i in range(skill.n_rows):
        used = np.flatnonzero(depends[i])
        if used.size:
            worst = used[np.argmax(periods[used])]
            delays[i], names[i] = periods[worst], skill.input_names[worst]
    return delays, names


def _behaviour_values(skill: CompiledSkill, value: float | str) -> list[tuple[float, str]]:
    """(value, how it is given) to check: a number, or a tunable's value and its upper bound."""
    if not isinstance(value, str):
        return [(float(value), '')]
    info = skill.params[skill.param_index(value)]
    checked = [(info.value, f' (tunable {value})')]
    if math.isfinite(info.upper) and info.upper > info.value:
        checked.append((info.upper, f' (tunable {value} at its upper bound, settable at run '
                                    'time)'))
    return checked


def _check_behaviours(skill: CompiledSkill, dt: float, report: CheckReport) -> None:
    """Each behaviour against the discrete stability limit at the control rate (module doc)."""
    delays, inputs = _row_delays(skill)
    rate = 1.0 / dt
    for index, con in enumerate(skill.spec.constraints):
        rows = [i for i, r in enumerate(skill.rows) if r.constraint == con.name]
        if not rows:
            continue
        worst = max(rows, key=lambda i: delays[i])
        ticks = delay_ticks(delays[worst], dt)
        why = (f'at {rate:g} Hz with {ticks} tick(s) of input delay (input {inputs[worst]!r} '
               f'at {1.0 / delays[worst]:g} Hz: a sample is up to {delays[worst] * 1000:g} ms '
               'old)' if ticks else f'at {rate:g} Hz (no input in this row: no delay)')
        beh = con.behaviour
        if beh.order == 1:
            limit = first_order_limit(ticks) / dt
            for gain, given in _behaviour_values(skill, beh.gain):
                _compare(report, skill, f'constraints[{index}].behaviour.gain',
                         f'first-order gain {gain:g} 1/s{given}', gain, limit, '1/s', why)
            continue
        for zeta, zeta_given in _behaviour_values(skill, beh.damping_ratio):
            limit = second_order_limit(zeta, ticks) / dt
            for omega, given in _behaviour_values(skill, beh.natural_frequency):
                _compare(report, skill, f'constraints[{index}].behaviour.natural_frequency',
                         f'natural frequency {omega:g} rad/s{given} with damping ratio '
                         f'{zeta:g}{zeta_given}', omega, limit, 'rad/s', why)


def _compare(report: CheckReport, skill: CompiledSkill, field_path: str, what: str,
             value: float, limit: float, unit: str, why: str) -> None:
    if limit <= 0.0:
        report.warnings.append(located(
            skill.spec, f'{what} {why}: an undamped second-order row with input delay grows '
                        'at any frequency; give it a damping ratio > 0', field_path))
    elif value >= limit:
        report.warnings.append(located(
            skill.spec, f'{what} {why} is beyond the discrete stability limit: the error would '
                        f'oscillate and grow; the largest stable value is {limit:.4g} {unit} '
                        '(skill/stability.py)', field_path))
    elif value > 0.5 * limit:
        report.notes.append(located(
            skill.spec, f'{what} {why} is within a factor 2 of the stability limit '
                        f'{limit:.4g} {unit}: the response will ring', field_path))


def _check_limits_given(skill: CompiledSkill, report: CheckReport) -> None:
    """Warn when the skill leaves its speeds to the robot: name the limits that then apply."""
    limits = skill.spec.limits
    if limits.joint_speed is not None or limits.joint_speeds or \
            limits.joint_acceleration is not None:
        return
    from ..runtime.watchdog_setup import DEFAULTS
    model = skill.model
    units = ['m/s' if p else 'rad/s' for p in model.is_prismatic]
    speeds = ', '.join(f'{j} {v:g} {unit}' for j, v, unit in
                       zip(skill.joint_names, model.velocity_limit, units))
    report.warnings.append(
        'the skill sets no limits: the solver may command up to the URDF velocity limits '
        f'({speeds}) and any acceleration; on the robot (and in simulate) the watchdog then caps '
        f'the acceleration at {DEFAULTS["joint_acceleration"]:g} rad/s^2 (the node\'s default '
        'watchdog.joint_acceleration). Set limits.joint_speed and limits.joint_acceleration '
        'for the task')


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
    # All columns: a row that only moves unknowns (d s / d s = 1) is driven by them
    J_start = solver.outputs['J'].copy()
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
        J = solver.outputs['J']
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
