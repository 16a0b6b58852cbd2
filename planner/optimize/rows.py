"""Linear rows of the step model, built in bulk from arrays.

A row is ``x0 + C du`` over the lever changes ``du`` of one load level, and every lever column
is one model variable: ``du_j = scale_j * var_j - offset_j``. Each row goes to Pyomo as one
flat ``LinearExpression`` (coefficient list, variable list), which the solver interface reads
without walking a tree of sums and products.

Two reductions keep the rows few and short. Both are exact up to the AC check's own
tolerance on a limit (``ROW_TOL``, the 1e-6 pu of :func:`planner.optimize.ac_check.violations`):

* a side of a limit row that no lever change inside the step's box of changes can reach is
  left out: its slack is zero at every point the model may choose, so the row cannot bind;
* a row's smallest coefficients are left out while the most they can move the row, anywhere
  in the box, stays within ``ROW_TOL``. Where at most ``k`` of the bank-site columns can move
  at once (a limit on new sites), that most is the sum of the ``k`` largest dropped terms, not
  of all of them.
"""
from __future__ import annotations

import numpy as np

ROW_TOL = 1e-6       # pu of the row's quantity: the AC check's tolerance on a limit
REL_TOL = 1e-9       # coefficients this far below a row's largest only hurt the numerics


def box_reach(C: np.ndarray, lo: np.ndarray, hi: np.ndarray):
    """Lowest and highest value of ``C du`` (one per row) over the box ``lo <= du <= hi``."""
    if C.shape[1] == 0:
        z = np.zeros(C.shape[0])
        return z, z.copy()
    pos, neg = np.maximum(C, 0.0), np.minimum(C, 0.0)
    return pos @ lo + neg @ hi, pos @ hi + neg @ lo


def _droppable(mag: np.ndarray, budget: float, k: int | None) -> np.ndarray:
    """Mask of the smallest entries of each row of ``mag`` whose worst joint effect stays within
    ``budget``: the sum of all of them, or (``k`` given) of the ``k`` largest of them."""
    rows, n = mag.shape
    if n == 0 or budget <= 0:
        return np.zeros(mag.shape, bool)
    order = np.argsort(mag, axis=1, kind="stable")
    srt = np.take_along_axis(mag, order, axis=1)
    cum = np.concatenate([np.zeros((rows, 1)), np.cumsum(srt, axis=1)], axis=1)   # cum[:, p]: first p
    p = np.arange(n + 1)
    if k is not None and k < n:
        err = cum - cum[:, np.maximum(p - k, 0)]      # the k largest of the first p
    else:
        err = cum
    count = (err <= budget).sum(axis=1) - 1           # err is non-decreasing in p, err[:, 0] = 0
    rank = np.empty_like(order)
    np.put_along_axis(rank, order, np.broadcast_to(np.arange(n), (rows, n)), axis=1)
    return rank < count[:, None]


def kept_coefficients(C: np.ndarray, width: np.ndarray, limited: np.ndarray, k_limited: int | None,
                      tol: float = ROW_TOL) -> np.ndarray:
    """Mask of the coefficients of ``C`` (rows x columns) a row keeps.

    ``width``: the largest ``|du_j|`` the box allows; ``limited``: columns of which at most
    ``k_limited`` can move at once (None: no such limit). Half the tolerance goes to each group.
    """
    absC = np.abs(C)
    keep = absC > REL_TOL * absC.max(axis=1, keepdims=True) if C.size else np.zeros(C.shape, bool)
    mag = absC * width
    drop = np.zeros(C.shape, bool)
    for cols, k in ((np.flatnonzero(limited), k_limited), (np.flatnonzero(~limited), None)):
        if len(cols):
            drop[:, cols] = _droppable(mag[:, cols], 0.5 * tol, k)
    return keep & ~drop


class Columns:
    """The lever columns of one level: ``du_j = scale_j * var_j - offset_j``, and the box of
    ``du`` the step allows (``lo``, ``hi``)."""

    def __init__(self, variables, scale, offset, lo, hi, limited, k_limited):
        self.vars = list(variables)
        self.scale = np.asarray(scale, float)
        self.offset = np.asarray(offset, float)
        self.lo = np.asarray(lo, float)
        self.hi = np.asarray(hi, float)
        self.limited = np.asarray(limited, bool)
        self.k_limited = k_limited

    @property
    def width(self):
        return np.maximum(np.abs(self.lo), np.abs(self.hi))

    def terms(self, C, tol=ROW_TOL):
        """Per row of ``C``: the constant ``-C offset`` over the kept columns (what ``x0`` is
        shifted by), the kept (coefficients, variables) of ``C du`` in the model's variables,
        and the mask of kept coefficients."""
        keep = kept_coefficients(C, self.width, self.limited, self.k_limited, tol)
        # a dropped column keeps du_j = 0 (not var_j = 0): only kept columns shift the constant
        const = -(np.where(keep, C, 0.0) @ self.offset) if C.shape[1] else np.zeros(C.shape[0])
        coef = C * self.scale
        out = []
        for i in range(C.shape[0]):
            idx = np.flatnonzero(keep[i])
            out.append((coef[i, idx].tolist(), [self.vars[j] for j in idx]))
        return const, out, keep


def linear(coefs, variables, constant=0.0):
    """A flat Pyomo LinearExpression (read by the solver interfaces without a tree walk)."""
    from pyomo.core.expr.numeric_expr import LinearExpression
    return LinearExpression(constant=constant, linear_coefs=coefs, linear_vars=variables)


def add_limit_rows(pyo, block, tag, x0, C, lo, hi, cols: Columns) -> float:
    """Penalised rows ``lo - slack <= x0 + C du <= hi + slack`` (``lo`` None: upper side only),
    leaving out every side no change in the box can reach. Slack variables are named
    ``{tag}_slack_lo`` / ``{tag}_slack_hi``.

    Where a side is broken at every point of the box, the least breach is a constant no
    decision changes: the slack variable measures only the breach beyond it, and the sum of
    those constants is returned (the caller keeps it out of the solver's objective, so the
    MILP's relative gap is taken over what the levers can change, and adds it back to the
    objective's value).
    """
    if x0 is None or not len(x0):
        return 0.0
    x0 = np.asarray(x0, float)
    C = np.asarray(C, float).reshape(len(x0), -1)
    low, high = box_reach(C, cols.lo, cols.hi)
    sides = []
    if lo is not None:
        lo = np.asarray(lo, float)
        sides.append(("lo", np.flatnonzero(np.isfinite(lo) & (x0 + low < lo)), lo))
    if hi is not None:
        hi = np.asarray(hi, float)
        sides.append(("hi", np.flatnonzero(np.isfinite(hi) & (x0 + high > hi)), hi))
    used = np.array(sorted(set().union(*[set(r.tolist()) for _, r, _ in sides])), np.int64)
    if not len(used):
        return 0.0
    pos = {int(r): i for i, r in enumerate(used)}
    const, terms, keep = cols.terms(C[used])
    # the reach of each row as the model holds it (kept coefficients only)
    k_low, k_high = box_reach(np.where(keep, C[used], 0.0), cols.lo, cols.hi)
    fixed_breach = 0.0
    for side, rows, bound in sides:
        if not len(rows):
            continue
        at = np.array([pos[int(r)] for r in rows], np.int64)
        rhs = bound[rows] - x0[rows] - const[at]          # the row is  C_kept u (+/-) slack  vs  rhs
        # breach left at the best point of the box (x0 + C_kept du at its highest / lowest)
        if side == "lo":
            least = np.maximum(bound[rows] - x0[rows] - k_high[at], 0.0)
            rhs, sign = rhs - least, 1.0
        else:
            least = np.maximum(x0[rows] + k_low[at] - bound[rows], 0.0)
            rhs, sign = rhs + least, -1.0
        fixed_breach += float(least.sum())
        slack = pyo.Var(range(len(rows)), within=pyo.NonNegativeReals)
        block.add_component(f"{tag}_slack_{side}", slack)

        def rule(_, i, at=at, rhs=rhs, slack=slack, side=side, sign=sign):
            c, v = terms[at[i]]
            body = linear(c + [sign], v + [slack[i]])
            return (float(rhs[i]), body, None) if side == "lo" else (None, body, float(rhs[i]))
        block.add_component(f"{tag}_limit_{side}", pyo.Constraint(range(len(rows)), rule=rule))
    return fixed_breach
