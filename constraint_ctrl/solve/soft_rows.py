"""Soft inequality rows solved without their slack variables.

The QP of a level (solve/qp.py) gives each soft inequality row a slack variable z_k with the cost
1/2 w_k z_k^2. With many such rows the QP is several times larger than the robot (48 joints and
133 soft inequality rows: 181 variables), and the dual active-set solvers do O(n^2) work per
iteration on the whole variable vector: that was nearly all of the tick (issue 11 item 5).

At the optimum each slack is z_k = max(0, b_c - C_c^T x) over the constraint columns c of its
row (one column, or two for a 'within' row). So for the set V of columns that the optimum
violates, the QP over z is the same as the QP over x alone with those rows turned into weighted
least-squares terms and only the hard columns (hard rows, held rows, the box) as constraints:

    minimise 1/2 x^T (G_x + sum_V w_c C_c C_c^T) x - (a_x + sum_V w_c b_c C_c)^T x
    subject to C_h^T x >= b_h (the first meq with equality)

Given V, this reduced QP is solved by the same library solver; its solution x is the optimum of
the full QP exactly when V is the set of soft columns it violates: then z_k = b_c - C_c^T x > 0
for c in V and z_k = 0 satisfies every other soft column, the multiplier of column c is
w_c z_k >= 0, and with the reduced QP's own optimality conditions these are the full QP's
(Karush-Kuhn-Tucker conditions; e.g. Boyd & Vandenberghe, Convex Optimization, sec. 5.5.3).
The full QP is strictly convex, so that optimum is its unique solution.

So each call guesses V (the set of the last call: from one tick to the next it rarely changes),
solves the reduced QP, and takes the set the solution violates as the next guess until the two
agree (a fixed point: then the answer is exact, not approximate). Columns within a round-off
band of their bound may sit in either set: the solution is continuous there. After
``MAX_ROUNDS`` guesses without agreement (only when the active rows change a lot at once, e.g.
the first tick of a skill), the full QP with the slack variables is solved as before, so the
result never depends on the guess; ``fallbacks`` counts those calls.

The reduced QP has the hard columns only; the feasibility of the full QP depends on them alone
(the slacks are free), so an infeasible reduced QP means an infeasible full QP.
"""
from __future__ import annotations

from collections.abc import Callable

import numpy as np

#: Guesses of the violated set before the full QP (with slack variables) is solved instead.
MAX_ROUNDS = 4
#: A soft column this close to its bound (relative to 1 + |b_c|) counts as on the bound: the
#: solution does not depend on which set it is in (to round-off), so it never forces a round.
ON_BOUND = 1e-10

QpCall = Callable[[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
                  tuple[np.ndarray, int, np.ndarray]]


class SoftRowQp:
    """Solves a level's QP (quadprog's form over z = [x, slacks]) without the slack variables.

    ``soft_cols`` are the columns of C with a slack variable, ``slack_of`` the slack (0-based,
    among the n_z - n_x slacks) of each. Called like the plain QP calls of solve/qp.py:
    (G, a, C, b) -> (z, iterations, 1-based active columns), z over the full variable vector
    (the slacks filled in), the active columns in the full C's numbering.
    """

    def __init__(self, n_x: int, n_z: int, n_con: int, meq: int, soft_cols: np.ndarray,
                 slack_of: np.ndarray, make_call: Callable[[int, int, int], QpCall],
                 n_box: int) -> None:
        self.n_x = n_x
        self.n_z = n_z
        self.soft = np.asarray(soft_cols, dtype=np.intp)
        self.slack_of = np.asarray(slack_of, dtype=np.intp)
        keep = np.ones(n_con, dtype=bool)
        keep[self.soft] = False
        self.hard = np.flatnonzero(keep)
        if self.hard[:meq].tolist() != list(range(meq)):
            msg = 'the equality columns must come first'
            raise ValueError(msg)
        # the slack weights sit on G's diagonal: flat (column-major) indices of G[k, k]
        diag = n_x + self.slack_of
        self._w_index = diag * n_z + diag
        # a 'within' row has two soft columns sharing one slack; they cannot both be violated
        # unless its bounds cross, and then the full QP is solved (see __call__)
        self._shared = np.unique(self.slack_of).size < self.slack_of.size
        self.reduced = make_call(self.hard.size, meq, n_box)
        self.full = make_call(n_con, meq, n_box)
        self.violated = np.zeros(0, dtype=np.intp)   # positions in ``soft``: the guess V
        self._ch = np.zeros((n_x, self.hard.size), order='F')
        self._bh = np.zeros(self.hard.size)
        self._cs = np.zeros((n_x, self.soft.size), order='F')
        self._bs = np.zeros(self.soft.size)
        self._w = np.zeros(self.soft.size)
        self._gx = np.zeros((n_x, n_x))
        self.rounds = 0          # guesses the last call needed (0: it solved the full QP)
        #: the reduced QP (G, a, C, b) of the last call's last guess (for the benchmark)
        self.last_reduced: tuple[np.ndarray, ...] | None = None
        self.fallbacks = 0       # calls that solved the full QP

    def __call__(self, G: np.ndarray, a: np.ndarray, C: np.ndarray, b: np.ndarray
                 ) -> tuple[np.ndarray, int, np.ndarray]:
        n_x = self.n_x
        cx = C[:n_x]
        np.take(cx, self.hard, axis=1, out=self._ch)
        np.take(b, self.hard, out=self._bh)
        np.take(cx, self.soft, axis=1, out=self._cs)
        np.take(b, self.soft, out=self._bs)
        np.take(G.ravel(order='F'), self._w_index, out=self._w)
        gx, ax, cs, bs, w = G[:n_x, :n_x], a[:n_x], self._cs, self._bs, self._w
        guess = self.violated
        iterations = 0
        for round_ in range(1, MAX_ROUNDS + 1):
            if guess.size:
                cv = cs[:, guess]
                wv = w[guess]
                gv, av = gx + (cv * wv) @ cv.T, ax + cv @ (wv * bs[guess])
            else:   # a copy: DAQP reads H as one contiguous block, G[:n_x, :n_x] is not one
                np.copyto(self._gx, gx)
                gv, av = self._gx, ax
            x, its, iact = self.reduced(gv, av, self._ch, self._bh)
            iterations += its
            residual = x @ cs - bs
            new = np.flatnonzero(residual < 0.0)
            if self._shared and np.unique(self.slack_of[new]).size < new.size:
                break    # both sides of a row violated: bounds crossed, leave it to the full QP
            if not np.array_equal(new, guess):
                changed = np.setxor1d(new, guess, assume_unique=True)
                if (np.abs(residual[changed]) > ON_BOUND * (1.0 + np.abs(bs[changed]))).any():
                    guess = new
                    continue
            self.violated = guess
            self.rounds = round_
            self.last_reduced = (gv, av, self._ch, self._bh)
            z = np.zeros(self.n_z)
            z[:n_x] = x
            # slack = b_c - C_c^T x on the violated columns (at most one per slack), 0 elsewhere
            z[n_x + self.slack_of[guess]] = np.maximum(-residual[guess], 0.0)
            active = np.concatenate([self.hard[iact - 1], self.soft[guess]]) + 1
            return z, iterations, active
        z, its, iact = self.full(G, a, C, b)
        self.fallbacks += 1
        self.rounds = 0
        self.violated = np.flatnonzero(z[:n_x] @ cs - bs < 0.0)
        return z, iterations + its, iact


__all__ = ['MAX_ROUNDS', 'ON_BOUND', 'SoftRowQp']
