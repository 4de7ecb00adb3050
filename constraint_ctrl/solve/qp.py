"""One QP per priority level, on buffers prepared when the skill is loaded.

Decision variables z = [x, slacks]: x = [q_dot, s_dot] and one slack per soft inequality row of
the level being solved. Objective (quadprog: minimise 1/2 z^T G z - a^T z subject to C^T z >= b):

    sum_soft_equal w_i (J_i x - v_i)^2 + sum_soft_inequal w_i slack_i^2 + lambda^2 sum_j r_j x_j^2

so G = H^T H + lambda^2 diag(r) with H = sqrt(w) J, a = H^T sqrt(w) v. A soft equality row needs
no slack variable (its slack is the residual J x - v), which keeps the QP as small as the robot.
For one soft equality task with r = 1 the minimiser is the damped least-squares solution
x = J^T (J J^T + lambda^2 I)^-1 v.

Priority levels are solved lexicographically: after level k the rows of levels <= k are held as
they were solved (equality rows at J x = J x_k, inequality rows with the slacks they needed), so a
lower level can never degrade a higher one. Each lower level's QP is formed by its own compiled
function from the rows and the solutions above (skill/compile.py: ``_lower_level_function``), so
a tick is one compiled call and one QP call per level. Every bound a lower level repeats from
above gets a margin of 1e-9 (relative), because the level above may sit ~1e-13 outside an active
bound after round-off.

Failure is data, not an exception. Level 1 failing (infeasible hard rows and limits, non-finite
inputs, a non-finite result) gives a status other than OK and a zero command (the caller stops).
A lower level failing never stops the arm: the tick returns the solution of the last level that
was solved, status OK, and says in ``levels_solved``, the message and ``RowReport.solved`` which
rows were not solved.

Two QP solvers are available, on the same matrices: quadprog (Goldfarb-Idnani dual active set, the
default) and DAQP (PyPI ``daqp``, a dual active-set solver for many inequalities), chosen with
``qp_solver``.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from enum import Enum
from collections.abc import Callable

import numpy as np
import quadprog

from ..skill.compile import (FUNCTION_INPUTS, FUNCTION_OUTPUTS, LOWER_LEVEL_INPUTS,
                             LOWER_LEVEL_OUTPUTS, CompiledSkill, LowerLevel)

#: Outputs read as 2-D arrays (all others are vectors).
MATRIX_OUTPUTS = frozenset({'J', 'hj', 'C', 'G', 'X'})
#: The QP solvers a skill can be solved with; the first is the default.
QP_SOLVERS = ('quadprog', 'daqp')
#: Infinity for DAQP's bounds (its own constant DAQP_INF).
DAQP_INF = 1e30
#: DAQP's sense flag of an equality row.
DAQP_EQUALITY = 5
#: DAQP's primal feasibility tolerance: far below the 1e-6 agreement asked of the two solvers.
DAQP_PRIMAL_TOL = 1e-10


class SolveStatus(str, Enum):
    """Outcome of one tick's solve; anything but OK comes with a zero command."""

    OK = 'ok'
    INFEASIBLE = 'infeasible'          # the hard rows and limits cannot all hold
    BAD_INPUT = 'bad_input'            # NaN or inf among q, s, inputs, time or the last command
    BAD_OUTPUT = 'bad_output'          # the skill's formulas produced NaN/inf, or the QP did
    NOT_CONVEX = 'not_convex'          # G lost positive definiteness (not with damping > 0)


@dataclass(slots=True)
class RowReport:
    """Per-row diagnostics of one tick (arrays indexed like CompiledSkill.rows).

    ``solved`` is False for the rows of a priority level that could not be solved this tick (and
    of every level below it): the command then comes from the levels above, which were solved.
    """

    value: np.ndarray
    error: np.ndarray
    slack: np.ndarray
    active: np.ndarray
    solved: np.ndarray


@dataclass(slots=True)
class SolveResult:
    """What one tick produced. ``x`` is owned by the caller (a fresh array).

    ``levels_solved`` counts the priority levels whose QP was solved (all of them on a normal
    tick); when it is short of the skill's level count, ``message`` says why and x is the
    solution of the last solved level.
    """

    x: np.ndarray
    status: SolveStatus
    message: str
    eval_ns: int
    solve_ns: int
    iterations: int
    levels_solved: int = 0

    @property
    def ok(self) -> bool:
        return self.status is SolveStatus.OK


class QpFailure(Exception):
    """A QP call that gave no solution (internal: becomes a status, never leaves this module)."""

    def __init__(self, status: SolveStatus, text: str) -> None:
        super().__init__(text)
        self.status = status


class _QuadprogCall:
    """quadprog.solve_qp(G, a, C, b, meq) -> (z, iterations, 1-based active columns)."""

    def __init__(self, n_con: int, meq: int) -> None:
        self.meq = meq

    def __call__(self, G: np.ndarray, a: np.ndarray, C: np.ndarray, b: np.ndarray
                 ) -> tuple[np.ndarray, int, np.ndarray]:
        try:
            z, _, _, iterations, _, iact = quadprog.solve_qp(G, a, C, b, self.meq)
        except ValueError as err:
            text = str(err)
            raise QpFailure(SolveStatus.NOT_CONVEX if 'positive definite' in text
                            else SolveStatus.INFEASIBLE, text) from None
        return z, int(iterations[0]), iact


class _DaqpCall:
    """The same QP with DAQP: H = G, f = -a, blower = b <= C^T z (<= b for the first meq)."""

    EXIT_TEXT = {-1: 'infeasible', -2: 'cycling', -3: 'unbounded', -4: 'iteration limit',
                 -5: 'not convex', -6: 'overdetermined initial active set'}

    def __init__(self, n_con: int, meq: int) -> None:
        import daqp  # imported here: an optional solver need not be installed for quadprog

        self._solve = daqp.solve
        self.meq = meq
        self.upper = np.full(n_con, DAQP_INF)
        self.sense = np.zeros(n_con, dtype=np.intc)
        self.sense[:meq] = DAQP_EQUALITY
        self.f = np.zeros(0)

    def __call__(self, G: np.ndarray, a: np.ndarray, C: np.ndarray, b: np.ndarray
                 ) -> tuple[np.ndarray, int, np.ndarray]:
        if self.f.shape != a.shape:
            self.f = np.empty_like(a)
        np.negative(a, out=self.f)
        if self.meq:
            self.upper[:self.meq] = b[:self.meq]
        # C is column-major (CasADi's layout), so C.T is the row-major A DAQP wants: no copy
        z, _, flag, info = self._solve(G, self.f, C.T, self.upper, b, self.sense,
                                       primal_tol=DAQP_PRIMAL_TOL)
        if flag < 1:
            status = SolveStatus.NOT_CONVEX if flag == -5 else SolveStatus.INFEASIBLE
            raise QpFailure(status, f'daqp: {self.EXIT_TEXT.get(flag, f"exit flag {flag}")}')
        return z, int(info['iterations']), np.flatnonzero(info['lam']) + 1


def _qp_call(name: str) -> Callable[[int, int], Callable[..., tuple[np.ndarray, int, np.ndarray]]]:
    if name == 'quadprog':
        return _QuadprogCall
    if name == 'daqp':
        return _DaqpCall
    msg = f'unknown QP solver {name!r}; choose one of {", ".join(QP_SOLVERS)}'
    raise ValueError(msg)


class _LevelBuffers:
    """A lower level's compiled function bound to the buffers it reads and writes."""

    def __init__(self, level: LowerLevel, read: dict[str, np.ndarray],
                 make_call: Callable[[int, int], Callable[..., tuple[np.ndarray, int, np.ndarray]]]
                 ) -> None:
        self.level = level
        fn = level.function
        buf, self.evaluate = fn.buffer()
        self._buffer = buf
        # every input is a flat view of a buffer the solver owns (no copy per tick)
        for i, name in enumerate(LOWER_LEVEL_INPUTS):
            buf.set_arg(i, memoryview(read[name]))
        self.out: dict[str, np.ndarray] = {}
        for i, name in enumerate(LOWER_LEVEL_OUTPUTS):
            rows, cols = fn.size1_out(i), fn.size2_out(i)
            flat = np.zeros(rows * cols)
            buf.set_res(i, memoryview(flat))
            self.out[name] = flat.reshape((rows, cols), order='F') if name in ('G', 'C') else flat
        self.qp = make_call(level.n_con, 0)


class SkillSolver:
    """Evaluates a compiled skill and solves its QP(s); one instance per loaded skill.

    Inputs are written into preallocated buffers that CasADi reads directly; outputs are read
    from buffers CasADi writes directly (no allocation in the evaluation). The lower levels'
    functions read the first function's output buffers directly too. ``diagnostics()``
    computes the per-row report from the last tick's buffers on demand, so the tick itself stays
    lean; call it before the next ``solve``. ``qp_solver`` picks the QP solver (``QP_SOLVERS``).
    """

    def __init__(self, skill: CompiledSkill, qp_solver: str = 'quadprog') -> None:
        self.skill = skill
        make_call = _qp_call(qp_solver)
        self.qp_solver = qp_solver
        fn = skill.function
        self._inputs: dict[str, np.ndarray] = {}
        self._outputs: dict[str, np.ndarray] = {}
        buf, self._evaluate = fn.buffer()
        self._buffer = buf  # keeps the memory views alive
        # one contiguous input block so a single isfinite() checks everything
        sizes = [fn.numel_in(i) for i in range(fn.n_in())]
        self._in_block = np.zeros(sum(sizes))
        offset = 0
        for i, name in enumerate(FUNCTION_INPUTS):
            view = self._in_block[offset:offset + sizes[i]]
            offset += sizes[i]
            self._inputs[name] = view
        # q_now/s_now are fed the very same numbers as q/s (value_now() in formulas)
        for i, name in enumerate(FUNCTION_INPUTS):
            source = {'q_now': 'q', 's_now': 's'}.get(name, name)
            buf.set_arg(i, memoryview(self._inputs[source]))
        self._flat: dict[str, np.ndarray] = {}
        for i, name in enumerate(FUNCTION_OUTPUTS):
            rows, cols = fn.size1_out(i), fn.size2_out(i)
            flat = np.zeros(rows * cols)
            buf.set_res(i, memoryview(flat))
            self._flat[name] = flat
            # CasADi writes column-major: a Fortran-ordered view gives the matrix
            self._outputs[name] = flat.reshape((rows, cols), order='F') \
                if name in MATRIX_OUTPUTS else flat
        self.p = self._inputs['p']
        self.p[:] = skill.default_params()
        lay = skill.layout
        self._is_eq = np.array([r.kind == 'equal' for r in skill.rows], dtype=bool)
        self._qp = make_call(lay.n_con, lay.meq)
        # lower levels: X holds the solution of each level above as a column
        n_lower = len(skill.lower_levels)
        self._x_flat = np.zeros(lay.n_x * max(n_lower, 1))
        self._X = self._x_flat.reshape((lay.n_x, max(n_lower, 1)), order='F')
        self._levels: list[_LevelBuffers] = []
        for level in skill.lower_levels:
            read = {name: self._flat[name] for name in LOWER_LEVEL_INPUTS
                    if name not in ('X', 'p')}
            read['X'] = self._x_flat[:lay.n_x * level.index]
            read['p'] = self.p
            self._levels.append(_LevelBuffers(level, read, make_call))
        self._level_of_row = np.array([lay.levels.index(r.level) if not r.hard else 0
                                       for r in skill.rows], dtype=int)
        self.last_x = np.zeros(lay.n_x)
        self.last_iact = np.zeros(0, dtype=int)
        self.last_status = SolveStatus.OK
        self.last_levels_solved = 0

    # ------------------------------------------------------------ buffers
    @property
    def outputs(self) -> dict[str, np.ndarray]:
        """The last evaluation's outputs (views, overwritten by the next solve)."""
        return self._outputs

    def level_outputs(self, index: int) -> dict[str, np.ndarray]:
        """G, a, C, b of lower level ``index`` (1 = the second level) from the last solve."""
        return self._levels[index - 1].out

    def set_param(self, index: int, value: float) -> None:
        self.p[index] = value

    def set_start(self, q: np.ndarray, s: np.ndarray) -> None:
        """Joint and unknown values at activation, read by start_value() in formulas."""
        self._inputs['q_start'][:] = q
        self._inputs['s_start'][:] = s

    def input_values(self) -> dict[str, np.ndarray]:
        """Copies of the function inputs of the last solve, by name (FUNCTION_INPUTS): what a
        drawing of the skill's geometry evaluates (skill/geometry.py); call it on the tick.
        q_now and s_now are q and s, as the function is fed them."""
        return {name: self._inputs[{'q_now': 'q', 's_now': 's'}.get(name, name)].copy()
                for name in FUNCTION_INPUTS}

    # -------------------------------------------------------------- solve
    def solve(self, q: np.ndarray, s: np.ndarray, u: np.ndarray, t: float, dt: float,
              x_prev: np.ndarray) -> SolveResult:
        """One tick: evaluate rows, solve every level; a zero command unless status is OK."""
        inp = self._inputs
        inp['q'][:] = q
        inp['s'][:] = s
        inp['u'][:] = u
        inp['t'][0] = t
        inp['dt'][0] = dt
        inp['x_prev'][:] = x_prev
        if not np.isfinite(self._in_block).all():
            return self._fail(SolveStatus.BAD_INPUT, _which_bad(inp), 0, 0)
        started = time.perf_counter_ns()
        self._evaluate()
        evaluated = time.perf_counter_ns()
        out = self._outputs
        try:
            z, iterations, iact = self._qp(out['G'], out['a'], out['C'], out['b'])
        except QpFailure as err:
            status, text = err.status, str(err)
            if not (np.isfinite(out['C']).all() and np.isfinite(out['b']).all()):
                status, text = SolveStatus.BAD_OUTPUT, 'non-finite row data: ' + _bad_rows(self)
            return self._fail(status, text, evaluated - started,
                              time.perf_counter_ns() - evaluated)
        n_x = self.skill.layout.n_x
        x = z[:n_x]
        if not np.isfinite(x).all():
            return self._fail(SolveStatus.BAD_OUTPUT, 'non-finite solution: ' + _bad_rows(self),
                              evaluated - started, time.perf_counter_ns() - evaluated)
        levels_solved, message = 1, ''
        if self._levels:
            x, levels_solved, message = self._lower_levels(x)
        solved = time.perf_counter_ns()
        self.last_x = x
        self.last_iact = iact
        self.last_status = SolveStatus.OK
        self.last_levels_solved = levels_solved
        return SolveResult(x=x.copy(), status=SolveStatus.OK, message=message,
                           eval_ns=evaluated - started, solve_ns=solved - evaluated,
                           iterations=iterations, levels_solved=levels_solved)

    def _fail(self, status: SolveStatus, message: str, eval_ns: int, solve_ns: int
              ) -> SolveResult:
        self.last_x = np.zeros(self.skill.layout.n_x)
        self.last_iact = np.zeros(0, dtype=int)
        self.last_status = status
        self.last_levels_solved = 0
        return SolveResult(x=np.zeros(self.skill.layout.n_x), status=status, message=message,
                           eval_ns=eval_ns, solve_ns=solve_ns, iterations=0)

    # ------------------------------------------------------ lower levels
    def _lower_levels(self, x: np.ndarray) -> tuple[np.ndarray, int, str]:
        """Levels 2..: each one compiled call and one QP call (module docstring).

        Returns the solution of the last level solved, how many levels were solved and, when
        one failed, why. A failed lower level never fails the tick.
        """
        X = self._X
        n_x = x.size
        X[:, 0] = x
        lay = self.skill.layout
        for k, level in enumerate(self._levels, start=1):
            level.evaluate()
            out = level.out
            try:
                z, _, _ = level.qp(out['G'], out['a'], out['C'], out['b'])
            except QpFailure as err:
                return self._clip(X[:, k - 1]), k, _not_solved(lay.levels[k], str(err),
                                                               lay.levels[k - 1])
            if not np.isfinite(z).all():
                return self._clip(X[:, k - 1]), k, _not_solved(
                    lay.levels[k], 'non-finite solution: ' + _bad_rows(self), lay.levels[k - 1])
            if k < X.shape[1]:
                X[:, k] = z[:n_x]
            else:
                x = z[:n_x]
        return self._clip(x), len(lay.levels), ''

    def _clip(self, x: np.ndarray) -> np.ndarray:
        """Back into the box: lower levels see the box widened by the hold margin."""
        out = self._outputs
        return np.clip(x, out['box_lo'], out['box_hi'])

    # -------------------------------------------------------- diagnostics
    def diagnostics(self) -> RowReport:
        """Per-row value, error, slack, active and solved flags of the last solve (fresh arrays)."""
        out = self._outputs
        x = self.last_x
        jx = out['J'] @ x if out['J'].size else np.zeros(0)
        lo, hi = out['lo'], out['hi']
        with np.errstate(invalid='ignore'):
            slack = np.where(self._is_eq, jx - lo,
                             np.maximum(lo - jx, 0.0) + np.maximum(jx - hi, 0.0))
        active = self._is_eq.copy()
        con_row = self.skill.layout.con_row
        hits = self.last_iact[self.last_iact > 0] - 1
        rows_hit = con_row[hits[hits < con_row.size]]
        active[rows_hit[rows_hit >= 0]] = True
        solved = self._level_of_row < self.last_levels_solved
        if self.last_status is not SolveStatus.OK:
            active[:] = False
        active &= solved
        return RowReport(value=out['value'].copy(), error=out['error'].copy(), slack=slack,
                         active=active, solved=solved)


def _not_solved(level: int, why: str, used: int) -> str:
    return f'level {level} not solved ({why}); the solution of level {used} is used'


def _which_bad(inp: dict[str, np.ndarray]) -> str:
    bad = [name for name in ('q', 's', 'q_start', 's_start', 'u', 't', 'dt', 'x_prev', 'p')
           if not np.isfinite(inp[name]).all()]
    return 'non-finite ' + ', '.join(bad)


def _bad_rows(solver: SkillSolver) -> str:
    out = solver.outputs
    names = [r.name for i, r in enumerate(solver.skill.rows)
             if not (np.isfinite(out['value'][i]) and np.isfinite(out['J'][i]).all())]
    return ', '.join(names) if names else 'limits'


__all__ = ['QP_SOLVERS', 'RowReport', 'SkillSolver', 'SolveResult', 'SolveStatus']
