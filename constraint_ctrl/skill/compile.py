"""Compile a SkillSpec into one CasADi function evaluated once per tick.

Row convention. Each constraint gives one row per component of its task function f(q, s, u, t).
With the bound b (target, lower or upper; a formula, may depend on time, inputs and tunables) the
task function is e = f - b, and its rate is de/dt = J x + e_t with x = [q_dot, s_dot],
J = de/d(q, s) and e_t = de/dt|explicit (the feedforward of a moving target). Inputs are held
constant over a tick (their rate is unknown), so they add no feedforward.

Behaviours turn e into a bound on J x (the row's velocity target):
- first order, gain K:  J x = -K e - e_t  (equal); <= for at_most; >= for at_least.
- second order, natural frequency w and damping ratio z: the error rate during the last tick is
  estimated from the last command x_prev, e_dot_prev = J x_prev + e_t - dt * jdx, where jdx is
  d(J x_prev + e_t)/dt along the motion (the dJ/dt x term, from automatic differentiation). The
  rate asked for this tick is one semi-implicit Euler step of e_ddot = -2 z w e_dot - w^2 e:
  J x = e_dot_prev + dt * (-2 z w e_dot_prev - w^2 e) - e_t.
  With e_{k+1} = e_k + dt * e_dot_k this is the symplectic Euler discretisation of the damped
  oscillator, so the closed loop converges to the continuous response as dt -> 0.
- 'within' uses the lower bound's row for its >= side and the upper bound's for its <= side; its
  bounds may not depend on joints or unknowns, so both sides share one Jacobian row.

Joint and unknown limits become box bounds on x: speed limits, first-order position-limit rows
(q_dot <= K_p (q_max - q)) and, when the skill sets one, an acceleration limit relative to x_prev.
When they conflict the position limit wins (the box is never empty).

The function also returns the level-1 QP blocks in quadprog's form (see solve/qp.py) so the tick
does almost no numpy work. Each lower priority level has a second compiled function of its own
(``LowerLevel``): it reads the rows the first function wrote (J, lo, hi, weight, box) and the
solutions of the levels above, and returns that level's QP in the same form, with the rows of the
levels above held (see ``_lower_level_function``). So a tick with L levels is L compiled calls and
L QP calls, with no matrix work in numpy between them.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from collections.abc import Sequence

import casadi as ca
import numpy as np

from ..errors import FormulaError, SkillError
from ..model.kinematics import RobotModel
from .formula import FormulaScope, Quantity, compile_formula
from .robot import robot_model
from .schema import ConstraintSpec, SkillSpec

#: Stand-in for an infinite speed limit, so the QP never sees inf (rad/s or m/s).
UNLIMITED_SPEED = 1.0e3
#: Velocity bound used for one-sided rows on the absent side (never enters the QP).
NO_BOUND = float('inf')

FUNCTION_INPUTS = ('q', 's', 'q_now', 's_now', 'q_start', 's_start', 'u', 't', 'dt', 'x_prev',
                   'p')
FUNCTION_OUTPUTS = ('value', 'error', 'J', 'e_t', 'jdx', 'lo', 'hi', 'weight', 'events',
                    'box_lo', 'box_hi', 'hj', 'hv', 'C', 'b', 'G', 'a')
LOWER_LEVEL_INPUTS = ('J', 'lo', 'hi', 'weight', 'box_lo', 'box_hi', 'X', 'p')
LOWER_LEVEL_OUTPUTS = ('G', 'a', 'C', 'b')

#: Room given to every bound a lower level repeats from the levels above (held rows, hard rows,
#: the box), relative to the bound's size: the active-set solver returns solutions up to ~1e-13
#: outside an active bound, and a lower level that repeated the bound exactly could then be
#: infeasible although the level above is feasible (issue 8 item 3).
HOLD_MARGIN = 1e-9
#: Half-width of the band a held equality row keeps, relative to the size of the terms of its dot
#: product J_i x (a bound on its round-off, with a factor of ~1000 to spare over n * 2.2e-16):
#: the level above's solution meets the band by construction, so it need not cover solver
#: tolerance, and a narrow band keeps the lower level from sliding along nearly singular
#: directions of the held rows.
HOLD_BAND = 1e-12

#: Below this many Jacobian entries the whole tick function is flattened into one SX graph
#: (fastest to evaluate); above it, G = H^T H stays a dense matrix product (fastest to build).
EXPAND_LIMIT = 4000
#: Most QP rows one skill may have (a vector function counts its components): about 10 s of
#: compile time on a busy 2-core machine (measured: 2000 rows of position(tool_tip), 9 s).
MAX_ROWS = 2000


@dataclass(frozen=True, slots=True)
class RowInfo:
    """Static description of one QP row (one component of one constraint)."""

    name: str
    constraint: str
    kind: str
    hard: bool
    level: int
    order: int


@dataclass(frozen=True, slots=True)
class ParamInfo:
    """One run-time changeable value (a tunable): declared by the user or made from a number."""

    name: str
    value: float
    lower: float
    upper: float
    unit: str = ''
    description: str = ''
    strictly_positive: bool = False

    def check(self, value: float) -> str | None:
        """Why ``value`` is not acceptable, or None when it is."""
        if not np.isfinite(value):
            return f'{self.name} must be a finite number, got {value!r}'
        if self.strictly_positive and value <= 0.0:
            return f'{self.name} must be > 0, got {value!r}'
        if value < self.lower or value > self.upper:
            return f'{self.name} must be within [{self.lower}, {self.upper}], got {value!r}'
        return None


@dataclass(frozen=True, slots=True)
class QpLayout:
    """Where each row of the skill ends up in the level-1 QP (static per skill).

    Decision variables z = [x (n_x), one slack per soft inequality row of level 1].
    Constraint columns of C (C.T z >= b), in this order: hard equality rows (the first ``meq``),
    hard >= sides, hard <= sides, soft >= sides, soft <= sides, box lower, box upper.
    """

    n_x: int
    levels: tuple[int, ...]
    soft_eq: tuple[int, ...]          # level-1 soft equality rows (objective)
    soft_ineq: tuple[int, ...]        # level-1 soft inequality rows (one slack each)
    hard_eq: tuple[int, ...]
    hard_lo: tuple[int, ...]
    hard_hi: tuple[int, ...]
    soft_lo: tuple[int, ...]
    soft_hi: tuple[int, ...]
    meq: int
    n_con: int
    # (n_con,) row index of each constraint column, -1 = box
    con_row: np.ndarray = field(repr=False)

    @property
    def n_z(self) -> int:
        return self.n_x + len(self.soft_ineq)


@dataclass(frozen=True, slots=True)
class LowerLevel:
    """The QP of one lower priority level, formed by its own compiled function.

    Inputs of ``function`` (``LOWER_LEVEL_INPUTS``): the level-1 function's outputs J, lo, hi,
    weight, box_lo, box_hi, the solutions of the levels above as the columns of X (level 1 first)
    and the tunables p. Outputs (``LOWER_LEVEL_OUTPUTS``): G, a, C, b in quadprog's form over
    z = [x, one slack per soft inequality row of this level], with no equality columns (meq = 0).
    """

    level: int
    index: int                        # position in layout.levels (1 = the second level)
    function: ca.Function
    rows: tuple[int, ...]             # soft rows of this level
    n_z: int
    n_con: int
    con_row: np.ndarray = field(repr=False)  # row index of each column, -1 = box


@dataclass(slots=True)
class CompiledSkill:
    """Everything the solver needs for one skill, built once when the skill is loaded."""

    spec: SkillSpec
    model: RobotModel
    function: ca.Function
    rows: tuple[RowInfo, ...]
    params: tuple[ParamInfo, ...]
    layout: QpLayout
    joint_names: tuple[str, ...]
    unknown_names: tuple[str, ...]
    input_names: tuple[str, ...]
    event_names: tuple[str, ...]
    reg_diag: np.ndarray            # (n_x,) lambda**2-free regularisation weights per variable
    damping_param: int              # index of regularisation.damping in p
    lower_levels: tuple[LowerLevel, ...] = ()
    compile_seconds: float = 0.0

    @property
    def n_q(self) -> int:
        return len(self.joint_names)

    @property
    def n_s(self) -> int:
        return len(self.unknown_names)

    @property
    def n_x(self) -> int:
        return self.n_q + self.n_s

    @property
    def n_rows(self) -> int:
        return len(self.rows)

    def param_index(self, name: str) -> int:
        for i, info in enumerate(self.params):
            if info.name == name:
                return i
        msg = f'skill {self.spec.name!r} has no tunable {name!r}'
        raise KeyError(msg)

    def default_params(self) -> np.ndarray:
        return np.array([info.value for info in self.params], dtype=float)

    def start_unknowns(self) -> np.ndarray:
        return np.array([f.start for f in self.spec.unknowns], dtype=float)


class _ParamTable:
    """Collects tunables while compiling; every value the user may change becomes a p entry."""

    def __init__(self) -> None:
        self.infos: list[ParamInfo] = []
        self.symbols: list[ca.SX] = []

    def add(self, info: ParamInfo) -> ca.SX:
        sym = ca.SX.sym(info.name)
        self.infos.append(info)
        self.symbols.append(sym)
        return sym

    def lookup(self, name: str) -> ca.SX | None:
        for info, sym in zip(self.infos, self.symbols):
            if info.name == name:
                return sym
        return None


def compile_skill(spec: SkillSpec, model: RobotModel | None = None) -> CompiledSkill:
    """Build the per-tick CasADi function of a skill; SkillError names file, line and field."""
    import time as _time

    started = _time.perf_counter()
    if model is None:
        model = robot_model(spec)   # URDF and base_link problems located in the skill file
    builder = _Builder(spec, model)
    compiled = builder.build()
    compiled.compile_seconds = _time.perf_counter() - started
    return compiled


class _Builder:
    def __init__(self, spec: SkillSpec, model: RobotModel) -> None:
        self.spec = spec
        self.model = model
        self.q = model.q
        n_s = len(spec.unknowns)
        self.s = ca.SX.sym('s', n_s)
        self.q_now = ca.SX.sym('q_now', model.n_joints)
        self.s_now = ca.SX.sym('s_now', n_s)
        self.q_start = ca.SX.sym('q_start', model.n_joints)
        self.s_start = ca.SX.sym('s_start', n_s)
        self.u = ca.SX.sym('u', len(spec.inputs))
        self.t = ca.SX.sym('t')
        self.dt = ca.SX.sym('dt')
        self.x_prev = ca.SX.sym('x_prev', model.n_joints + n_s)
        self.params = _ParamTable()
        self.x_sym = ca.vertcat(self.q, self.s)

    # ----------------------------------------------------------------- scope
    def _scope(self) -> FormulaScope:
        names: dict[str, Quantity] = {'time': Quantity('scalar', self.t)}
        for i, inp in enumerate(self.spec.inputs):
            names[inp.name] = Quantity('scalar', self.u[i])
        for i, feat in enumerate(self.spec.unknowns):
            names[feat.name] = Quantity('scalar', self.s[i])
        for tun in self.spec.tunables:
            sym = self.params.add(ParamInfo(tun.name, tun.value, tun.lower, tun.upper,
                                            tun.unit, tun.description))
            names[tun.name] = Quantity('scalar', sym)
        return FormulaScope(model=self.model, names=names,
                            held_from=[self.q, self.s], held_to=[self.q_now, self.s_now],
                            start_to=[self.q_start, self.s_start])

    def _formula(self, text: str | float, scope: FormulaScope, field_path: str) -> Quantity:
        if isinstance(text, (int, float)) and not isinstance(text, bool):
            return Quantity('scalar', ca.SX(float(text)))
        try:
            return compile_formula(str(text), scope)
        except SkillError as err:
            raise err.located(file=self.spec.source, line=self.spec.line_of(field_path),
                              field=field_path) from None

    def _number_or_tunable(self, value: float | str, name: str, field_path: str, *,
                           description: str, unit: str = '') -> ca.SX:
        if isinstance(value, str):
            sym = self.params.lookup(value)
            if sym is None:
                raise self.spec.error(f'{value!r} is not a declared tunable', field_path)
            return sym
        return self.params.add(ParamInfo(name, float(value), 0.0, float('inf'), unit,
                                         description, strictly_positive=True))

    # ------------------------------------------------------------------ rows
    def build(self) -> CompiledSkill:
        spec = self.spec
        scope = self._scope()
        for name, text in spec.formulas:
            scope.names[name] = self._formula(text, scope, f'formulas.{name}')

        rows: list[RowInfo] = []
        pending: list[tuple[ca.SX | None, ca.SX | None, ConstraintSpec, tuple[ca.SX, ...]]] = []
        values: list[ca.SX] = []
        weights: list[ca.SX] = []
        for index, con in enumerate(spec.constraints):
            path = f'constraints[{index}]'
            made = self._constraint_rows(con, scope, path)
            if len(rows) + len(made) > MAX_ROWS:
                raise spec.error(f'more than {MAX_ROWS} rows: a skill is limited to {MAX_ROWS} '
                                 'rows (a vector function counts its components)',
                                 f'{path}.function')
            gains = self._behaviour_params(con, path)
            weight = self._number_or_tunable(con.weight, f'{con.name}.weight', f'{path}.weight',
                                             description=f'weight of {con.name}')
            for comp, (e_lo, e_hi, f_sx) in enumerate(made):
                suffix = f'[{comp}]' if len(made) > 1 else ''
                rows.append(RowInfo(con.name + suffix, con.name, con.kind, con.hard,
                                    con.priority, con.behaviour.order))
                pending.append((e_lo, e_hi, con, gains))
                values.append(f_sx)
                weights.append(weight)

        events = []
        for index, ev in enumerate(spec.events):
            path = f'events[{index}].condition'
            cond = self._formula(ev.condition, scope, path)
            if cond.kind != 'boolean':
                raise spec.error(f'an event condition must be true/false (a comparison), '
                                 f'got a {cond.kind}', path)
            events.append(cond.sx)

        n_x = self.model.n_joints + len(spec.unknowns)
        if rows:
            # Reference task function of each row: its >= side, else its <= side. Both sides
            # share J (checked for 'within'); they differ only in explicit time dependence.
            e_ref = ca.vertcat(*[lo_e if lo_e is not None else hi_e
                                 for lo_e, hi_e, _, _ in pending])
            J = ca.jacobian(e_ref, self.x_sym)
            e_t = ca.jacobian(e_ref, self.t)
            rate = ca.mtimes(J, self.x_prev) + e_t
            # d(J x_prev + e_t)/dt along the motion: second derivatives, so only for the rows
            # with a second-order behaviour (the others never read it)
            second = [i for i, (_, _, con, _) in enumerate(pending) if con.behaviour.order == 2]
            jdx = ca.SX.zeros(len(pending), 1)
            if second:
                rate2 = rate[second]
                jdx[second] = (ca.mtimes(ca.jacobian(rate2, self.x_sym), self.x_prev)
                               + ca.jacobian(rate2, self.t))
            bounds = [self._row_bounds(lo_e, hi_e, e_ref[i], e_t[i], rate[i], jdx[i], con, gains)
                      for i, (lo_e, hi_e, con, gains) in enumerate(pending)]
            value = ca.vertcat(*values)
            error = ca.vertcat(*[_violation(lo_e, hi_e, con.kind)
                                 for lo_e, hi_e, con, _ in pending])
            lo = ca.vertcat(*[b[0] for b in bounds])
            hi = ca.vertcat(*[b[1] for b in bounds])
            w = ca.vertcat(*weights)
        else:
            value = error = e_t = jdx = lo = hi = w = ca.SX(0, 1)
            J = ca.SX(0, n_x)

        box_lo, box_hi, reg_diag, damping = self._limits()
        layout = _layout(rows, n_x)
        hj, hv, C, b = _level_one_blocks(layout, J, lo, hi, w, box_lo, box_hi)

        p = ca.vertcat(*self.params.symbols) if self.params.symbols else ca.SX(0, 1)
        ev = ca.vertcat(*events) if events else ca.SX(0, 1)
        outputs = [value, error, J, e_t, jdx, lo, hi, w, ev, box_lo, box_hi, hj, hv, C, b]
        outputs = [ca.densify(o) for o in outputs]
        inputs = [self.q, self.s, self.q_now, self.s_now, self.q_start, self.s_start, self.u,
                  self.t, self.dt, self.x_prev, p]
        rows_fn = ca.Function(f'rows_{spec.name}', inputs, outputs, list(FUNCTION_INPUTS),
                              list(FUNCTION_OUTPUTS[:-2]), {'cse': True})
        fn = _with_objective(rows_fn, layout, reg_diag, damping, f'skill_{spec.name}')
        lower = tuple(_lower_level_function(tuple(rows), layout, index, reg_diag, damping,
                                            len(self.params.symbols), f'{spec.name}_level')
                      for index in range(1, len(layout.levels)))
        return CompiledSkill(
            spec=spec, model=self.model, function=fn, rows=tuple(rows),
            params=tuple(self.params.infos), layout=layout,
            joint_names=tuple(self.model.joint_names),
            unknown_names=tuple(f.name for f in spec.unknowns),
            input_names=tuple(i.name for i in spec.inputs),
            event_names=tuple(ev.name for ev in spec.events),
            reg_diag=reg_diag, damping_param=damping, lower_levels=lower)

    def _constraint_rows(self, con: ConstraintSpec, scope: FormulaScope, path: str
                         ) -> list[tuple[ca.SX | None, ca.SX | None, ca.SX]]:
        """Per component: (task function of the >= side, of the <= side, raw value f)."""
        f = self._formula(con.function, scope, f'{path}.function')
        if f.kind not in ('scalar', 'vector'):
            raise self.spec.error(f'a task function must be a number or a vector, '
                                  f'got a {f.kind}', f'{path}.function')
        size = f.sx.numel()

        def bound(value: float | str | None, key: str) -> ca.SX:
            quantity = self._formula(value, scope, f'{path}.{key}')
            if quantity.kind not in ('scalar', 'vector'):
                raise self.spec.error(f'a bound must be a number or a vector, got a '
                                      f'{quantity.kind}', f'{path}.{key}')
            sx = quantity.sx
            if sx.numel() == 1 and size > 1:
                # A number bound of an inequality bounds every component (a box), and the
                # number 0 is the zero vector; any other single target is ambiguous.
                if key == 'target' and not (isinstance(value, (int, float)) and value == 0):
                    raise self.spec.error(f'the target is 1 value but the function has {size} '
                                          f'components; give a vector of {size} (vector(x, y, '
                                          'z)), or 0 for the zero vector', f'{path}.{key}')
                sx = ca.repmat(sx, size, 1)
            if sx.numel() != size:
                raise self.spec.error(f'bound has {sx.numel()} components but the function has '
                                      f'{size}', f'{path}.{key}')
            return sx

        if con.kind == 'equal':
            e = f.sx - bound(con.target, 'target')
            sides = [(e[i], e[i]) for i in range(size)]
        elif con.kind == 'at_most':
            e = f.sx - bound(con.upper, 'upper')
            sides = [(None, e[i]) for i in range(size)]
        elif con.kind == 'at_least':
            e = f.sx - bound(con.lower, 'lower')
            sides = [(e[i], None) for i in range(size)]
        else:  # within
            lower = bound(con.lower, 'lower')
            upper = bound(con.upper, 'upper')
            for key, sx in (('lower', lower), ('upper', upper)):
                if ca.depends_on(sx, self.x_sym):
                    raise self.spec.error('the bounds of a "within" constraint may not depend on '
                                          'joints or unknowns; move that part into the '
                                          'function', f'{path}.{key}')
            sides = [(f.sx[i] - lower[i], f.sx[i] - upper[i]) for i in range(size)]
        return [(lo_e, hi_e, f.sx[i]) for i, (lo_e, hi_e) in enumerate(sides)]

    def _behaviour_params(self, con: ConstraintSpec, path: str) -> tuple[ca.SX, ...]:
        beh = con.behaviour
        if beh.order == 1:
            return (self._number_or_tunable(beh.gain, f'{con.name}.gain',
                                            f'{path}.behaviour.gain', unit='1/s',
                                            description=f'first-order gain of {con.name}'),)
        omega = self._number_or_tunable(beh.natural_frequency, f'{con.name}.natural_frequency',
                                        f'{path}.behaviour.natural_frequency', unit='rad/s',
                                        description=f'natural frequency of {con.name}')
        zeta = self._number_or_tunable(beh.damping_ratio, f'{con.name}.damping_ratio',
                                       f'{path}.behaviour.damping_ratio',
                                       description=f'damping ratio of {con.name}')
        return (omega, zeta)

    def _row_bounds(self, e_lo: ca.SX | None, e_hi: ca.SX | None, e_ref: ca.SX, et_ref: ca.SX,
                    rate_ref: ca.SX, jdx_ref: ca.SX, con: ConstraintSpec,
                    gains: tuple[ca.SX, ...]) -> tuple[ca.SX, ca.SX]:
        """Velocity bounds (lo, hi) on J x of one row from its behaviour (module docstring)."""

        def side(e_side: ca.SX | None, no_bound: float) -> ca.SX:
            if e_side is None:
                return ca.SX(no_bound)
            et_side = et_ref + ca.jacobian(e_side - e_ref, self.t)
            if con.behaviour.order == 1:
                (gain,) = gains
                return -gain * e_side - et_side
            omega, zeta = gains
            prev = rate_ref + (et_side - et_ref) - self.dt * jdx_ref
            return prev + self.dt * (-2.0 * zeta * omega * prev - omega ** 2 * e_side) - et_side

        return side(e_lo, -NO_BOUND), side(e_hi, NO_BOUND)

    # ---------------------------------------------------------------- limits
    def _limits(self) -> tuple[ca.SX, ca.SX, np.ndarray, int]:
        spec, model = self.spec, self.model
        lim = spec.limits
        speed = np.where(np.isfinite(model.velocity_limit), model.velocity_limit, UNLIMITED_SPEED)
        for joint, value in lim.joint_speeds.items():
            if joint not in model.joint_names:
                raise spec.error(f'{joint!r} is not a joint of the robot (joints: '
                                 f'{", ".join(model.joint_names)})', f'limits.joint_speeds.{joint}')
            j = model.joint_names.index(joint)
            speed[j] = min(speed[j], value)
        speed_sx = ca.SX(ca.DM(speed))
        if lim.joint_speed is not None:
            # Safety limits may be lowered at run time and restored, never raised above the
            # file's value; nor above the loosest URDF velocity limit, beyond which a cap (the
            # URDF limit of each joint applies too) changes nothing.
            finite = model.velocity_limit[np.isfinite(model.velocity_limit)]
            top = min(lim.joint_speed, float(finite.max())) if finite.size else lim.joint_speed
            cap = self.params.add(ParamInfo('limits.joint_speed', top, 0.0, top,
                                            'rad/s or m/s', 'speed cap of every joint (may be '
                                            "lowered at run time, not raised above the file's "
                                            'value)', strictly_positive=True))
            speed_sx = ca.fmin(speed_sx, cap)
        kp = self.params.add(ParamInfo('limits.position_gain', lim.position_gain, 0.0,
                                       float('inf'), '1/s', 'gain of the position-limit rows',
                                       strictly_positive=True))
        feat_speed = ca.SX(ca.DM([f.max_speed for f in spec.unknowns])) if spec.unknowns \
            else ca.SX(0, 1)
        lower = np.concatenate([model.lower, [f.lower for f in spec.unknowns]])
        upper = np.concatenate([model.upper, [f.upper for f in spec.unknowns]])
        vmax = ca.vertcat(speed_sx, feat_speed)
        pos = ca.vertcat(self.q, self.s)
        lo = -vmax
        hi = vmax
        for i in range(pos.numel()):
            if np.isfinite(lower[i]):
                lo[i] = ca.fmax(lo[i], -kp * (pos[i] - float(lower[i])))
            if np.isfinite(upper[i]):
                hi[i] = ca.fmin(hi[i], kp * (float(upper[i]) - pos[i]))
        if lim.joint_acceleration is not None:
            # URDF <limit> has no acceleration: the file's value is the upper bound at run time
            acc = self.params.add(ParamInfo('limits.joint_acceleration', lim.joint_acceleration,
                                            0.0, lim.joint_acceleration, 'rad/s^2 or m/s^2',
                                            'acceleration limit of every joint (may be lowered '
                                            "at run time, not raised above the file's value)",
                                            strictly_positive=True))
            n_q = model.n_joints
            step = acc * self.dt
            lo_q = ca.fmax(lo[:n_q], self.x_prev[:n_q] - step)
            hi_q = ca.fmin(hi[:n_q], self.x_prev[:n_q] + step)
            # position limits win over the acceleration limit: keep lo <= hi
            lo = ca.vertcat(ca.fmin(lo_q, hi[:n_q]), lo[n_q:])
            hi = ca.vertcat(ca.fmax(hi_q, lo[:n_q]), hi[n_q:])
        # a joint already past a limit gets lo > hi from the position rows: keep it moving inward
        lo = ca.fmin(lo, hi)
        reg = np.ones(model.n_joints + len(spec.unknowns))
        for joint, value in spec.regularisation.joint_weights.items():
            if joint not in model.joint_names:
                raise spec.error(f'{joint!r} is not a joint of the robot',
                                 f'regularisation.joint_weights.{joint}')
            reg[model.joint_names.index(joint)] = value
        reg[model.n_joints:] = spec.regularisation.unknown_weight
        self.params.add(ParamInfo('regularisation.damping', spec.regularisation.damping, 0.0,
                                  float('inf'), '', 'damping of the velocity regularisation',
                                  strictly_positive=True))
        return lo, hi, reg, len(self.params.infos) - 1


def _with_objective(rows_fn: ca.Function, layout: QpLayout, reg_diag: np.ndarray,
                    damping_index: int, name: str) -> ca.Function:
    """Append quadprog's G = H^T H + diag(lambda^2 r, w_slack) and a = H^T h to the outputs."""
    args = [ca.MX.sym(rows_fn.name_in(i), rows_fn.sparsity_in(i)) for i in range(rows_fn.n_in())]
    res = rows_fn(*args)
    out = dict(zip(FUNCTION_OUTPUTS, res))
    hj, hv, w, p = out['hj'], out['hv'], out['weight'], args[-1]
    damping = p[damping_index]
    n_x = layout.n_x
    G_x = ca.mtimes(hj.T, hj) + ca.diag(damping ** 2 * ca.DM(reg_diag))
    a_x = ca.mtimes(hj.T, hv)
    if layout.soft_ineq:
        slack_w = ca.vertcat(*[w[i] for i in layout.soft_ineq])
        G = ca.diagcat(G_x, ca.diag(slack_w))
        a = ca.vertcat(a_x, ca.MX.zeros(len(layout.soft_ineq), 1))
    else:
        G, a = G_x, a_x
    outputs = list(res) + [ca.densify(G), ca.densify(a)]
    fn = ca.Function(name, args, outputs, list(FUNCTION_INPUTS), list(FUNCTION_OUTPUTS))
    if rows_fn.size1_out(2) * max(n_x, 1) <= EXPAND_LIMIT:
        fn = fn.expand()
    return fn


def _lower_level_function(rows: tuple[RowInfo, ...], layout: QpLayout, index: int,
                          reg_diag: np.ndarray, damping_index: int, n_p: int,
                          name: str) -> LowerLevel:
    """The QP of level ``layout.levels[index]`` given the solutions of the levels above.

    Lexicographic definition: minimise this level's objective (its soft equality rows, its soft
    inequality slacks, the damping) over all x that keep every row of the levels above as it was
    solved. Written over the full x (not a null-space basis), so no factorisation is needed:
    - an equality row i of a level above (or a hard equality row) is held at J_i x = J_i x_k, with
      x_k the solution of its own level, as two inequality columns with the band
      HOLD_BAND * (1 + sum_j |J_ij x_kj|). Not as quadprog equality columns: held rows are often
      linearly dependent (a cross() task has three rows of rank two), and the active-set method
      declares dependent equality columns inconsistent;
    - an inequality row of a level above keeps the slack its level needed: lo - slack <= J x <=
      hi + slack, widened by the margin; hard inequality rows likewise (their slack is round-off);
    - the box (speed, position and acceleration limits) is widened by the margin too, so the
      level above's solution, which may lie ~1e-13 outside an active bound, is always feasible
      here. The solver clips the final command back into the box.
    Variables z = [x, one slack per soft inequality row of this level]; columns of C in this
    order: held equality rows (>= side, then <= side), held >= sides, held <= sides, this level's
    soft >= sides, soft <= sides, box lower, box upper.
    """
    levels = layout.levels
    level = levels[index]
    n_x = layout.n_x
    n_rows = len(rows)
    J = ca.MX.sym('J', n_rows, n_x)
    lo = ca.MX.sym('lo', n_rows)
    hi = ca.MX.sym('hi', n_rows)
    w = ca.MX.sym('weight', n_rows)
    box_lo = ca.MX.sym('box_lo', n_x)
    box_hi = ca.MX.sym('box_hi', n_x)
    X = ca.MX.sym('X', n_x, index)
    p = ca.MX.sym('p', n_p)

    def source(r: RowInfo) -> int:
        """Column of X the row is held at: its own level's solution (hard rows: level 1)."""
        return 0 if r.hard else levels.index(r.level)

    held = [i for i, r in enumerate(rows) if r.hard or r.level in levels[:index]]
    now = [i for i, r in enumerate(rows) if not r.hard and r.level == level]
    eq = [i for i in now if rows[i].kind == 'equal']
    ineq = [i for i in now if rows[i].kind != 'equal']
    # J_i x_k of every held row, each at the solution of its own level
    reached = ca.MX.zeros(n_rows, 1)
    terms = ca.MX.zeros(n_rows, 1)     # sum_j |J_ij x_j|: the scale of J_i x's round-off
    for k in range(index):
        idx = [i for i in held if source(rows[i]) == k]
        if idx:
            reached[idx] = ca.mtimes(J[idx, :], X[:, k])
            terms[idx] = ca.mtimes(ca.fabs(J[idx, :]), ca.fabs(X[:, k]))

    def margin(bound: ca.MX) -> ca.MX:
        return HOLD_MARGIN * (1.0 + ca.fabs(bound))

    held_eq = [i for i in held if rows[i].kind == 'equal']
    held_lo = [i for i in held if rows[i].kind in ('at_least', 'within')]
    held_hi = [i for i in held if rows[i].kind in ('at_most', 'within')]
    slack = ca.fmax(0.0, lo - reached) + ca.fmax(0.0, reached - hi)
    blocks: list[tuple[list[int], float, ca.MX, bool]] = []   # rows, sign, bound, with slack
    if held_eq:
        v = reached[held_eq]
        band = HOLD_BAND * (1.0 + terms[held_eq])
        blocks.append((held_eq, 1.0, v - band, False))
        blocks.append((held_eq, -1.0, -(v + band), False))
    if held_lo:
        bound = lo[held_lo] - slack[held_lo]
        blocks.append((held_lo, 1.0, bound - margin(bound), False))
    if held_hi:
        bound = hi[held_hi] + slack[held_hi]
        blocks.append((held_hi, -1.0, -(bound + margin(bound)), False))
    soft_lo = [i for i in ineq if rows[i].kind in ('at_least', 'within')]
    soft_hi = [i for i in ineq if rows[i].kind in ('at_most', 'within')]
    if soft_lo:
        blocks.append((soft_lo, 1.0, lo[soft_lo], True))
    if soft_hi:
        blocks.append((soft_hi, -1.0, -hi[soft_hi], True))

    n_s = len(ineq)
    n_z = n_x + n_s
    slack_of = {row: k for k, row in enumerate(ineq)}
    x_cols: list[ca.MX] = []
    s_cols: list[np.ndarray] = []
    rhs: list[ca.MX] = []
    con_row: list[int] = []
    for idx, sign, bound, with_slack in blocks:
        x_cols.append(sign * J[idx, :].T)
        sel = np.zeros((n_s, len(idx)))
        if with_slack:
            for c, row in enumerate(idx):
                sel[slack_of[row], c] = 1.0
        s_cols.append(sel)
        rhs.append(bound)
        con_row.extend(idx)
    eye = np.eye(n_x)
    x_cols += [ca.MX(ca.DM(eye)), ca.MX(ca.DM(-eye))]
    s_cols += [np.zeros((n_s, n_x)), np.zeros((n_s, n_x))]
    rhs += [box_lo - margin(box_lo), -(box_hi + margin(box_hi))]
    con_row += [-1] * (2 * n_x)
    C = ca.vertcat(ca.horzcat(*x_cols), ca.MX(ca.DM(np.hstack(s_cols)))) if n_s \
        else ca.horzcat(*x_cols)
    b = ca.vertcat(*rhs)

    damping = p[damping_index]
    sw = ca.sqrt(w[eq]) if eq else ca.MX(0, 1)
    H = J[eq, :] * ca.repmat(sw, 1, n_x) if eq else ca.MX(0, n_x)
    G_x = ca.mtimes(H.T, H) + ca.diag(damping ** 2 * ca.DM(reg_diag))
    a_x = ca.mtimes(H.T, sw * lo[eq]) if eq else ca.MX.zeros(n_x, 1)
    if n_s:
        G = ca.diagcat(G_x, ca.diag(w[ineq]))
        a = ca.vertcat(a_x, ca.MX.zeros(n_s, 1))
    else:
        G, a = G_x, a_x
    fn = ca.Function(f'{name}_{level}', [J, lo, hi, w, box_lo, box_hi, X, p],
                     [ca.densify(G), ca.densify(a), ca.densify(C), ca.densify(b)],
                     list(LOWER_LEVEL_INPUTS), list(LOWER_LEVEL_OUTPUTS))
    if n_rows * max(n_x, 1) <= EXPAND_LIMIT:
        fn = fn.expand()
    return LowerLevel(level=level, index=index, function=fn, rows=tuple(now), n_z=n_z,
                      n_con=len(con_row), con_row=np.array(con_row, dtype=int))


def _violation(e_lo: ca.SX | None, e_hi: ca.SX | None, kind: str) -> ca.SX:
    """Signed error for equalities; amount outside the allowed side(s) for inequalities."""
    if kind == 'equal':
        return e_lo
    out = ca.SX(0)
    if e_lo is not None:
        out = out + ca.fmin(0, e_lo)
    if e_hi is not None:
        out = out + ca.fmax(0, e_hi)
    return out


def _layout(rows: Sequence[RowInfo], n_x: int) -> QpLayout:
    levels = tuple(sorted({r.level for r in rows if not r.hard})) or (1,)
    first = levels[0]
    soft = [i for i, r in enumerate(rows) if not r.hard and r.level == first]
    soft_eq = tuple(i for i in soft if rows[i].kind == 'equal')
    soft_ineq = tuple(i for i in soft if rows[i].kind != 'equal')
    hard_eq = tuple(i for i, r in enumerate(rows) if r.hard and r.kind == 'equal')
    hard_lo = tuple(i for i, r in enumerate(rows) if r.hard and r.kind in ('at_least', 'within'))
    hard_hi = tuple(i for i, r in enumerate(rows) if r.hard and r.kind in ('at_most', 'within'))
    soft_lo = tuple(i for i in soft_ineq if rows[i].kind in ('at_least', 'within'))
    soft_hi = tuple(i for i in soft_ineq if rows[i].kind in ('at_most', 'within'))
    con_row = np.array(list(hard_eq) + list(hard_lo) + list(hard_hi) + list(soft_lo)
                       + list(soft_hi) + [-1] * (2 * n_x), dtype=int)
    return QpLayout(n_x=n_x, levels=levels, soft_eq=soft_eq, soft_ineq=soft_ineq,
                    hard_eq=hard_eq, hard_lo=hard_lo, hard_hi=hard_hi, soft_lo=soft_lo,
                    soft_hi=soft_hi, meq=len(hard_eq), n_con=len(con_row), con_row=con_row)


def _level_one_blocks(layout: QpLayout, J: ca.SX, lo: ca.SX, hi: ca.SX, w: ca.SX,
                      box_lo: ca.SX, box_hi: ca.SX) -> tuple[ca.SX, ca.SX, ca.SX, ca.SX]:
    """sqrt(w) J and sqrt(w) v of the objective rows, and C, b of quadprog (C.T z >= b)."""
    n_x = layout.n_x
    n_sl = len(layout.soft_ineq)
    eq = list(layout.soft_eq)
    sw = ca.sqrt(w[eq]) if eq else ca.SX(0, 1)
    hj = (J[eq, :] * ca.repmat(sw, 1, n_x)) if eq else ca.SX(0, n_x)
    hv = (sw * lo[eq]) if eq else ca.SX(0, 1)
    slack_col = {row: n_x + k for k, row in enumerate(layout.soft_ineq)}
    cols: list[ca.SX] = []
    rhs: list[ca.SX] = []
    n_z = layout.n_z

    def column(row: int, sign: float, bound: ca.SX, slack: bool) -> None:
        col = ca.SX(n_z, 1)
        col[:n_x] = sign * J[row, :].T
        if slack:
            col[slack_col[row]] = 1.0
        cols.append(col)
        rhs.append(sign * bound)

    for r in layout.hard_eq:
        column(r, 1.0, lo[r], False)
    for r in layout.hard_lo:
        column(r, 1.0, lo[r], False)
    for r in layout.hard_hi:
        column(r, -1.0, hi[r], False)
    for r in layout.soft_lo:
        column(r, 1.0, lo[r], True)
    for r in layout.soft_hi:
        column(r, -1.0, hi[r], True)
    eye = ca.SX.eye(n_x)
    box = ca.vertcat(eye, ca.SX(n_sl, n_x))
    C = ca.horzcat(*(cols + [box, -box])) if cols else ca.horzcat(box, -box)
    b = ca.vertcat(*(rhs + [box_lo, -box_hi]))
    return hj, hv, C, b


__all__ = ['MAX_ROWS', 'CompiledSkill', 'LowerLevel', 'ParamInfo', 'QpLayout', 'RowInfo',
           'compile_skill', 'FUNCTION_INPUTS', 'FUNCTION_OUTPUTS', 'HOLD_BAND', 'HOLD_MARGIN',
           'LOWER_LEVEL_INPUTS', 'LOWER_LEVEL_OUTPUTS', 'FormulaError']
