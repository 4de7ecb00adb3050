"""One QP per priority level with quadprog, on buffers prepared when the skill is loaded.

Decision variables z = [x, slacks]: x = [q_dot, s_dot] and one slack per soft inequality row of
the level being solved. Objective (quadprog: minimise 1/2 z^T G z - a^T z subject to C^T z >= b):

    sum_soft_equal w_i (J_i x - v_i)^2 + sum_soft_inequal w_i slack_i^2 + lambda^2 sum_j r_j x_j^2

so G = H^T H + lambda^2 diag(r) with H = sqrt(w) J, a = H^T sqrt(w) v. A soft equality row needs
no slack variable (its slack is the residual J x - v), which keeps the QP as small as the robot.
For one soft equality task with r = 1 the minimiser is the damped least-squares solution
x = J^T (J J^T + lambda^2 I)^-1 v.

Priority levels are solved lexicographically: after level k the equality rows of levels <= k are
held at the values they reached (J x = J x_k) by optimising only in the null space of all held
and hard equality rows, x = x_k + N y, and their inequality rows are held with the slacks they
needed. So a lower level can never degrade a higher one.

Failure is data, not an exception: an infeasible set of hard rows, non-finite inputs or a
non-finite result give a status other than OK and a zero command (the caller stops).
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from enum import Enum

import numpy as np
import quadprog

from ..skill.compile import FUNCTION_INPUTS, FUNCTION_OUTPUTS, CompiledSkill

#: Outputs read as 2-D arrays (all others are vectors).
MATRIX_OUTPUTS = frozenset({'J', 'hj', 'C', 'G'})
#: Rank tolerance (relative to the largest singular value) for held equality rows.
RANK_TOLERANCE = 1e-9
#: Held inequality rows get this much room so round-off never makes a lower level infeasible.
HOLD_MARGIN = 1e-9


class SolveStatus(str, Enum):
    """Outcome of one tick's solve; anything but OK comes with a zero command."""

    OK = 'ok'
    INFEASIBLE = 'infeasible'          # the hard rows and limits cannot all hold
    BAD_INPUT = 'bad_input'            # NaN or inf among q, s, inputs, time or the last command
    BAD_OUTPUT = 'bad_output'          # the skill's formulas produced NaN/inf, or the QP did
    NOT_CONVEX = 'not_convex'          # G lost positive definiteness (should not happen: damping > 0)


@dataclass(slots=True)
class RowReport:
    """Per-row diagnostics of one tick (arrays indexed like CompiledSkill.rows)."""

    value: np.ndarray
    error: np.ndarray
    slack: np.ndarray
    active: np.ndarray


@dataclass(slots=True)
class SolveResult:
    """What one tick produced. ``x`` is owned by the caller (a fresh array)."""

    x: np.ndarray
    status: SolveStatus
    message: str
    eval_ns: int
    solve_ns: int
    iterations: int

    @property
    def ok(self) -> bool:
        return self.status is SolveStatus.OK


class SkillSolver:
    """Evaluates a compiled skill and solves its QP(s); one instance per loaded skill.

    Inputs are written into preallocated buffers that CasADi reads directly; outputs are read
    from buffers CasADi writes directly (no allocation in the evaluation). ``diagnostics()``
    computes the per-row report from the last tick's buffers on demand, so the tick itself stays
    lean; call it before the next ``solve``.
    """

    def __init__(self, skill: CompiledSkill) -> None:
        self.skill = skill
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
        for i, name in enumerate(FUNCTION_OUTPUTS):
            rows, cols = fn.size1_out(i), fn.size2_out(i)
            flat = np.zeros(rows * cols)
            buf.set_res(i, memoryview(flat))
            # CasADi writes column-major: a Fortran-ordered view gives the matrix
            self._outputs[name] = flat.reshape((rows, cols), order='F') \
                if name in MATRIX_OUTPUTS else flat
        self.p = self._inputs['p']
        self.p[:] = skill.default_params()
        lay = skill.layout
        self._is_eq = np.array([r.kind == 'equal' for r in skill.rows], dtype=bool)
        self._multi_level = len(lay.levels) > 1
        # row sets of the lower levels: static per skill, so built once here, not per tick
        rows = skill.rows
        self._hard_eq = [i for i, r in enumerate(rows) if r.hard and r.kind == 'equal']
        self._hard_in = [i for i, r in enumerate(rows) if r.hard and r.kind != 'equal']
        self._level_rows: dict[int, tuple[list[int], list[int], list[int]]] = {}
        for level in lay.levels:
            now = [i for i, r in enumerate(rows) if not r.hard and r.level == level]
            self._level_rows[level] = (now, [i for i in now if rows[i].kind == 'equal'],
                                       [i for i in now if rows[i].kind != 'equal'])
        self.last_x = np.zeros(lay.n_x)
        self.last_iact = np.zeros(0, dtype=int)
        self.last_status = SolveStatus.OK

    # ------------------------------------------------------------ buffers
    @property
    def outputs(self) -> dict[str, np.ndarray]:
        """The last evaluation's outputs (views, overwritten by the next solve)."""
        return self._outputs

    def set_param(self, index: int, value: float) -> None:
        self.p[index] = value

    def set_start(self, q: np.ndarray, s: np.ndarray) -> None:
        """Joint and unknown values at activation, read by start_value() in formulas."""
        self._inputs['q_start'][:] = q
        self._inputs['s_start'][:] = s

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
        n_x = self.skill.layout.n_x
        if not np.isfinite(self._in_block).all():
            return self._fail(SolveStatus.BAD_INPUT, _which_bad(inp), 0, 0)
        started = time.perf_counter_ns()
        self._evaluate()
        evaluated = time.perf_counter_ns()
        out = self._outputs
        lay = self.skill.layout
        try:
            z, _, _, iterations, _, iact = quadprog.solve_qp(out['G'], out['a'], out['C'],
                                                             out['b'], lay.meq)
        except ValueError as err:
            text = str(err)
            status = SolveStatus.NOT_CONVEX if 'positive definite' in text \
                else SolveStatus.INFEASIBLE
            if not (np.isfinite(out['C']).all() and np.isfinite(out['b']).all()):
                status, text = SolveStatus.BAD_OUTPUT, 'non-finite row data: ' + _bad_rows(self)
            return self._fail(status, text, evaluated - started,
                              time.perf_counter_ns() - evaluated)
        x = z[:n_x]
        if self._multi_level:
            x, status, text = self._lower_levels(x, z, iact)
            if status is not SolveStatus.OK:
                return self._fail(status, text, evaluated - started,
                                  time.perf_counter_ns() - evaluated)
        solved = time.perf_counter_ns()
        if not np.isfinite(x).all():
            return self._fail(SolveStatus.BAD_OUTPUT, 'non-finite solution: ' + _bad_rows(self),
                              evaluated - started, solved - evaluated)
        self.last_x = x
        self.last_iact = iact
        self.last_status = SolveStatus.OK
        return SolveResult(x=x.copy(), status=SolveStatus.OK, message='',
                           eval_ns=evaluated - started, solve_ns=solved - evaluated,
                           iterations=int(iterations[0]))

    def _fail(self, status: SolveStatus, message: str, eval_ns: int, solve_ns: int
              ) -> SolveResult:
        self.last_x = np.zeros(self.skill.layout.n_x)
        self.last_iact = np.zeros(0, dtype=int)
        self.last_status = status
        return SolveResult(x=np.zeros(self.skill.layout.n_x), status=status, message=message,
                           eval_ns=eval_ns, solve_ns=solve_ns, iterations=0)

    # ------------------------------------------------------ lower levels
    def _lower_levels(self, x: np.ndarray, z: np.ndarray, iact: np.ndarray
                      ) -> tuple[np.ndarray, SolveStatus, str]:
        """Solve levels 2.. in the null space of everything held so far (module docstring)."""
        skill, out = self.skill, self._outputs
        rows = skill.rows
        J, lo, hi, w = out['J'], out['lo'], out['hi'], out['weight']
        n_x = skill.layout.n_x
        damping = self.p[skill.damping_param]
        reg = damping * damping * skill.reg_diag
        levels = skill.layout.levels
        held_eq = list(self._hard_eq)
        held_in: list[tuple[int, float, float]] = [(i, lo[i], hi[i]) for i in self._hard_in]
        box_lo, box_hi = out['box_lo'], out['box_hi']
        done = self._level_rows[levels[0]][0]
        for level_index in range(1, len(levels)):
            jx = J @ x
            for i in done:
                if rows[i].kind == 'equal':
                    held_eq.append(i)
                else:
                    slack = max(0.0, lo[i] - jx[i]) + max(0.0, jx[i] - hi[i])
                    held_in.append((i, lo[i] - slack - HOLD_MARGIN, hi[i] + slack + HOLD_MARGIN))
            E = J[held_eq] if held_eq else np.zeros((0, n_x))
            if E.shape[0]:
                _, sv, vt = np.linalg.svd(E)
                rank = int((sv > RANK_TOLERANCE * max(sv[0], 1e-300)).sum())
                N = vt[rank:].T
            else:
                N = np.eye(n_x)
            if N.shape[1] == 0:
                break
            level = levels[level_index]
            now, eq, ineq = self._level_rows[level]
            sw = np.sqrt(w[eq])
            H = J[eq] * sw[:, None]
            Gx = H.T @ H + np.diag(reg)
            ax = H.T @ (sw * lo[eq])
            n_y, n_s = N.shape[1], len(ineq)
            G = np.zeros((n_y + n_s, n_y + n_s))
            G[:n_y, :n_y] = N.T @ Gx @ N
            G[n_y:, n_y:] = np.diag(w[ineq]) if n_s else np.zeros((0, 0))
            a = np.concatenate([N.T @ (ax - Gx @ x), np.zeros(n_s)])
            cols, rhs = [], []

            def add(row_vec: np.ndarray, bound: float, slack_at: int | None) -> None:
                col = np.zeros(n_y + n_s)
                col[:n_y] = N.T @ row_vec
                if slack_at is not None:
                    col[n_y + slack_at] = 1.0
                cols.append(col)
                rhs.append(bound - row_vec @ x)

            for i, low, high in held_in:
                if np.isfinite(low):
                    add(J[i], low, None)
                if np.isfinite(high):
                    add(-J[i], -high, None)
            for k, i in enumerate(ineq):
                if np.isfinite(lo[i]):
                    add(J[i], lo[i], k)
                if np.isfinite(hi[i]):
                    add(-J[i], -hi[i], k)
            eye = np.eye(n_x)
            for j in range(n_x):
                add(eye[j], box_lo[j], None)
                add(-eye[j], -box_hi[j], None)
            C = np.array(cols).T
            try:
                y = quadprog.solve_qp(G, a, C, np.array(rhs), 0)[0]
            except ValueError as err:
                return x, SolveStatus.INFEASIBLE, f'level {level}: {err}'
            x = x + N @ y[:n_y]
            done = now
        return x, SolveStatus.OK, ''

    # -------------------------------------------------------- diagnostics
    def diagnostics(self) -> RowReport:
        """Per-row value, error, slack and active flag of the last solve (fresh arrays)."""
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
        rows_hit = con_row[hits]
        active[rows_hit[rows_hit >= 0]] = True
        if self.last_status is not SolveStatus.OK:
            active[:] = False
        return RowReport(value=out['value'].copy(), error=out['error'].copy(), slack=slack,
                         active=active)


def _which_bad(inp: dict[str, np.ndarray]) -> str:
    bad = [name for name in ('q', 's', 'q_start', 's_start', 'u', 't', 'dt', 'x_prev', 'p')
           if not np.isfinite(inp[name]).all()]
    return 'non-finite ' + ', '.join(bad)


def _bad_rows(solver: SkillSolver) -> str:
    out = solver.outputs
    names = [r.name for i, r in enumerate(solver.skill.rows)
             if not (np.isfinite(out['value'][i]) and np.isfinite(out['J'][i]).all())]
    return ', '.join(names) if names else 'limits'


__all__ = ['RowReport', 'SkillSolver', 'SolveResult', 'SolveStatus']
