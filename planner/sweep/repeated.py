"""Many load flows of one network that differ only in values: loads, bank steps, a branch out.

A study proving a plan solves the same network thousands of times (every hour of a year, every
outage). The admittance matrix keeps one sparsity structure for all of them: a bank step only
changes a diagonal value, and a branch outage is modelled by subtracting the branch's
admittances from the entries it touches (they stay stored, as numeric zeros). So the load
flow's own symbolic work (:class:`planner.flow.jacobian.SymbolicCache`: Jacobian pattern and
fill-reducing ordering, one per set of live buses) serves every solve; each Newton iteration is
one gather, one LU without ordering work, and one solve.

:class:`RepeatedFlow` holds that shared structure; :meth:`RepeatedFlow.solve` runs one
warm-started Newton-Raphson load flow with reactive-limit enforcement (the rule of
:func:`planner.flow.newton.solve_flow`: a PV bus past a limit becomes PQ at the limit and returns
when its voltage would move back past the setpoint) and returns a small :class:`PointSolution`.

>>> from planner.network.model import Network, make_table
>>> from planner.network.compile import compile_network
>>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
...                                          {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0}]),
...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
>>> rf = RepeatedFlow(compile_network(net))
>>> sol = rf.solve()
>>> sol.success, round(sol.losses_mw, 4)
(True, 0.3063)
>>> half = rf.solve(load_scale=0.5, start=sol)
>>> half.success, round(half.losses_mw, 4)
(True, 0.0744)
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..flow.equations import injection
from ..flow.jacobian import JacobianPattern, SymbolicCache, bus_derivatives
from ..flow.newton import apply_limit_switches
from ..flow.result import FlowStatus
from ..network.compile import PQ, PV, SLACK, Compiled, diagonal_positions

LINE_SEARCH_STEPS = 10
MAX_LIMIT_ROUNDS = 20
LOW_VOLTAGE_SOLUTION_PU = 0.5


@dataclass
class PointSolution:
    """One solved point: complex voltages and what a sweep keeps of it.

    ``status``: a :class:`~planner.flow.result.FlowStatus` (CONVERGED, ITERATION_LIMIT, DIVERGED,
    SINGULAR, SUSPECT for a low-voltage solution, LIMITS_UNSETTLED).
    """
    success: bool
    status: FlowStatus
    message: str
    iterations: int
    v: np.ndarray
    at_limit: np.ndarray
    worst_bus: int
    worst_mismatch_mva: float
    losses_mw: float            # branch losses (series and charging), MW

    def __repr__(self):
        return (f"PointSolution(success={self.success}, status={self.status.name}, iterations={self.iterations}, "
                f"losses_mw={self.losses_mw:.4f})")


DENSE_UP_TO = 400   # unknowns; below this a dense LAPACK solve beats building a sparse LU (Python overhead)


class _DenseSystem:
    """Jacobian of one PV / PQ split of a small network as a dense matrix (positions worked out
    once from the load flow's :class:`~planner.flow.jacobian.JacobianPattern`); same unknowns
    and ``solve(v, dload, rhs)`` as the load flow's sparse systems. No ordering is involved, so
    every run gives the same numbers whatever order the splits come in."""

    def __init__(self, y, free, pq):
        pattern = JacobianPattern(y, free, pq)
        self.size = pattern.size
        cols = np.repeat(np.arange(self.size), np.diff(pattern.indptr))
        self.flat = pattern.indices.astype(np.int64) * self.size + cols
        self.src, self.diag_pos, self.rows = pattern.src, pattern.diag_pos, pattern.rows
        self.y = y

    def solve(self, v, dload, rhs):
        d_va, d_vm = bus_derivatives(self.y, v, self.diag_pos, self.rows, dload)
        stacked = np.concatenate([d_va.real, d_vm.real, d_va.imag, d_vm.imag])
        jac = np.zeros(self.size * self.size)
        jac[self.flat] = stacked[self.src]
        try:
            return np.linalg.solve(jac.reshape(self.size, self.size), rhs)
        except np.linalg.LinAlgError:
            raise RuntimeError("singular Jacobian") from None


class RepeatedFlow:
    """Shared structure for repeated load flows of one compiled network (see module docstring).

    Parameters
    ----------
    compiled : Compiled
        The network as compiled; its loads, shunts and branches are the base values.
    tol_mva : float, optional
        Largest bus mismatch accepted, MW or Mvar (default 1e-8 pu of the base).
    max_iter : int
        Newton iterations allowed per solve (all reactive-limit rounds together).
    enforce_q_limits : bool
        Hold generator reactive output within limits.
    """

    def __init__(self, compiled: Compiled, *, tol_mva: float | None = None, max_iter: int = 30,
                 enforce_q_limits: bool = True):
        c = compiled
        self.c = c
        self.y0 = c.ybus().copy()
        self.y0.sort_indices()
        n = c.n
        self.rows = np.repeat(np.arange(n), np.diff(self.y0.indptr))
        self.diag_pos = diagonal_positions(self.y0)
        self.tol = (1e-8 * c.base_mva if tol_mva is None else float(tol_mva)) / c.base_mva
        self.max_iter = int(max_iter)
        self.enforce_q_limits = bool(enforce_q_limits)
        self._symbolic: dict = {}      # live-bus mask -> the load flow's SymbolicCache
        self._dense: dict = {}         # split -> _DenseSystem (small networks)
        # position in y.data of each branch's (ff, ft, tf, tt) entries, for outages
        keys = self.rows.astype(np.int64) * n + self.y0.indices
        self._branch_pos = np.stack([np.searchsorted(keys, a.astype(np.int64) * n + b)
                                     for a, b in ((c.f, c.f), (c.f, c.t), (c.t, c.f), (c.t, c.t))])
        self._yb = np.stack(c.branch_admittances())

    # -- admittance variants ------------------------------------------------------------------
    def y_with(self, *, branches_out=(), ysh_delta=None) -> sp.csr_matrix:
        """The admittance matrix with branches (compiled indices) out and bus shunts changed
        (``ysh_delta``, pu per bus); same sparsity structure as the base."""
        y = self.y0.copy()
        for k in np.atleast_1d(np.asarray(branches_out, dtype=np.int64)):
            y.data[self._branch_pos[:, k]] -= self._yb[:, k]
        if ysh_delta is not None:
            y.data[self.diag_pos] += ysh_delta
        return y

    def _system(self, y, kind, alive):
        """The linear solver of one PV / PQ split.

        Large networks use the load flow's own symbolic work
        (:class:`~planner.flow.jacobian.SymbolicCache`, one per set of live buses): its ordering
        is fixed at the split as compiled, before any solve, so it is the same in every process
        whatever split a worker meets first (identical numbers in serial and cluster runs).
        Small ones use :class:`_DenseSystem`.
        """
        key = kind.tobytes() + alive.tobytes()
        sysm = self._dense.get(key)
        if sysm is not None:
            sysm.y = y
            return sysm
        free = np.flatnonzero((kind != SLACK) & alive)
        pq_mask = (kind == PQ) & alive
        if len(free) + int(pq_mask.sum()) <= DENSE_UP_TO:
            sysm = self._dense[key] = _DenseSystem(y, free, np.flatnonzero(pq_mask))
            return sysm
        cache = self._symbolic.get(alive.tobytes())
        if cache is None:
            cache = self._symbolic[alive.tobytes()] = SymbolicCache()
            self._prime(cache, alive)
        return cache.get(y, free).system(y, pq_mask)

    def _prime(self, cache, alive):
        """Fix the cache's ordering by one factorisation at the compiled split (flat voltages)."""
        c = self.c
        free = np.flatnonzero((c.kind != SLACK) & alive)
        pq_mask = (c.kind == PQ) & alive
        system = cache.get(self.y0, free).system(self.y0, pq_mask)
        v = np.where(alive, np.where(c.kind != PQ, c.v_set, 1.0), 0.0).astype(complex)
        try:
            system.solve(v, None, np.zeros(len(free) + int(pq_mask.sum())))
        except RuntimeError:
            pass          # singular at flat voltages: the first real solve orders instead

    # -- one solve --------------------------------------------------------------------------
    def solve(self, *, load_scale=1.0, branches_out=(), ysh_delta=None, alive=None, start=None,
              s_gen=None, kind=None) -> PointSolution:
        """Solve one point.

        ``load_scale`` multiplies every load (a number or one factor per bus); ``branches_out``
        (compiled branch indices) are taken out and ``ysh_delta`` (pu per bus) is added to the bus
        shunts, as in :meth:`y_with`; ``alive`` marks buses still
        supplied (default: as compiled); ``start`` a previous :class:`PointSolution` (warm start,
        keeping its reactive-limit states) or complex voltages; ``s_gen`` and ``kind`` replace the
        scheduled generation and bus kinds.
        """
        c = self.c
        branches_out = np.atleast_1d(np.asarray(branches_out, dtype=np.int64))
        y = self.y0 if (not len(branches_out) and ysh_delta is None) else \
            self.y_with(branches_out=branches_out, ysh_delta=ysh_delta)
        alive = c.alive if alive is None else alive
        kind = (c.kind if kind is None else kind).copy()
        s_gen = c.s_gen if s_gen is None else s_gen
        scale = np.broadcast_to(np.asarray(load_scale, float), (c.n,))
        sl_p, sl_i, sl_z = c.s_load_p * scale, c.s_load_i * scale, c.s_load_z * scale
        controlled = kind != PQ
        at_limit = np.zeros(c.n, np.int8)
        if isinstance(start, PointSolution):
            v = start.v.copy()
            if self.enforce_q_limits:
                at_limit = start.at_limit.copy()
        elif start is None:
            v = np.where(controlled, c.v_set, 1.0) * np.exp(1j * np.where(kind == SLACK, c.va_stored, 0.0))
        else:
            v = np.asarray(start, complex).copy()
        at_limit[~controlled | ~alive] = 0
        kind[at_limit != 0] = PQ
        q_fixed = np.where(at_limit > 0, c.q_max, np.where(at_limit < 0, c.q_min, 0.0))
        vm = np.abs(v)
        # voltage-controlled buses start at their setpoint; a fresh supply at a dead bus at 1 pu
        on_set = (kind != PQ)
        vm = np.where(on_set, c.v_set, np.where(vm > 0.05, vm, 1.0))
        v = np.where(alive, vm * np.exp(1j * np.angle(v)), 0.0)

        iters = 0
        status, message = 0, ""
        for _ in range(MAX_LIMIT_ROUNDS + 1):
            v, iters, status, message = self._newton(y, v, kind, alive, q_fixed, s_gen, sl_p, sl_i, sl_z, iters)
            if status != 0 or not self.enforce_q_limits:
                break
            if not _update_limits(c, y, v, kind, alive, q_fixed, at_limit, s_gen, sl_p, sl_i, sl_z):
                break
        else:
            status, message = 5, "reactive-limit switching did not settle"
        vm = np.abs(v)
        if status == 0 and alive.any() and vm[alive].min() < LOW_VOLTAGE_SOLUTION_PU:
            k = np.flatnonzero(alive)[np.argmin(vm[alive])]
            status = 4
            message = (f"converged to a low-voltage solution (bus {c.bus_ids[k]} at {vm[k]:.3f} pu); "
                       "not the normal operating point")
        mis = _mismatch(y, v, s_gen + 1j * q_fixed, sl_p, sl_i, sl_z)
        err = np.abs(np.where((kind != SLACK) & alive, mis.real, 0.0)) \
            + 1j * np.abs(np.where((kind == PQ) & alive, mis.imag, 0.0))
        worst = int(np.argmax(np.abs(err))) if c.n else 0
        s_f, s_t = self.branch_power(v, branches_out)
        loss = float((s_f + s_t).real.sum() * c.base_mva)
        if status == 0:
            message = f"converged in {iters} iterations"
        return PointSolution(success=status == 0, status=FlowStatus(status), message=message, iterations=iters, v=v,
                             at_limit=at_limit, worst_bus=int(c.bus_ids[worst]) if c.n else -1,
                             worst_mismatch_mva=float(np.abs(err[worst]) * c.base_mva) if c.n else 0.0,
                             losses_mw=loss)

    def branch_power(self, v, branches_out=()):
        """(S_from, S_to) in pu for every compiled branch; zero for branches out. Their sum over
        branches is the loss (series and charging; bus shunts are not losses here, as in the
        load flow)."""
        c = self.c
        yff, yft, ytf, ytt = self._yb
        vf, vt = v[c.f], v[c.t]
        s_f = vf * np.conj(yff * vf + yft * vt)
        s_t = vt * np.conj(ytf * vf + ytt * vt)
        k = np.atleast_1d(np.asarray(branches_out, dtype=np.int64))
        s_f[k] = 0.0
        s_t[k] = 0.0
        return s_f, s_t

    def _newton(self, y, v, kind, alive, q_fixed, s_gen, sl_p, sl_i, sl_z, iters):
        # unknowns in the load flow's layout: angle at every live non-slack bus, |V| at PQ buses
        pvpq = np.flatnonzero((kind != SLACK) & alive)
        pq = np.flatnonzero((kind == PQ) & alive)
        na = len(pvpq)
        s_spec0 = s_gen + 1j * q_fixed

        def residual(vv):
            mis = _mismatch(y, vv, s_spec0, sl_p, sl_i, sl_z)
            return np.concatenate([mis.real[pvpq], mis.imag[pq]])

        vm, va = np.abs(v), np.angle(v)
        F = residual(v)
        system = None
        while True:
            norm = float(np.abs(F).max()) if F.size else 0.0
            if not np.isfinite(norm):
                return v, iters, 2, "the iteration diverged (non-finite mismatch)"
            if norm <= self.tol:
                return v, iters, 0, ""
            if iters >= self.max_iter:
                return v, iters, 1, f"no convergence within {self.max_iter} iterations"
            dload = sl_i + 2.0 * sl_z * vm
            try:
                if system is None:
                    system = self._system(y, kind, alive)
                dx = -system.solve(v, dload, F)
            except RuntimeError:
                return v, iters, 3, "the Jacobian is singular (voltage collapse or an unsupported island)"
            if not np.all(np.isfinite(dx)):
                return v, iters, 3, "the Jacobian is singular (voltage collapse or an unsupported island)"
            iters += 1
            f0 = float(F @ F)
            alpha = 1.0
            for _ in range(LINE_SEARCH_STEPS):
                va_new = va.copy()
                vm_new = vm.copy()
                va_new[pvpq] += alpha * dx[:na]
                vm_new[pq] += alpha * dx[na:]
                ok = vm_new[pq].size == 0 or vm_new[pq].min() > 0.05
                if ok:
                    v_new = vm_new * np.exp(1j * va_new)
                    F_new = residual(v_new)
                    f1 = float(F_new @ F_new)
                    if np.isfinite(f1) and f1 <= (1.0 - 1e-4 * alpha) * f0:
                        break
                alpha *= 0.5
            else:
                if not ok:
                    return v, iters, 2, "the iteration diverged (voltages collapsing towards zero)"
            v, vm, va, F = v_new, vm_new, va_new, F_new


def _mismatch(y, v, s_spec0, sl_p, sl_i, sl_z):
    vm = np.abs(v)
    return injection(y, v) - (s_spec0 - (sl_p + sl_i * vm + sl_z * vm * vm))


def _update_limits(c, y, v, kind, alive, q_fixed, at_limit, s_gen, sl_p, sl_i, sl_z) -> bool:
    """Move PV buses past a reactive limit to PQ at the limit, and held buses whose voltage
    would pass the setpoint back to PV (the rule of the load flow). True if any bus changed."""
    vm = np.abs(v)
    q_gen = injection(y, v).imag + (sl_p + sl_i * vm + sl_z * vm * vm).imag - s_gen.imag
    tol = 1e-9
    pv_now = (kind == PV) & alive
    over = pv_now & (q_gen > c.q_max + tol)
    under = pv_now & (q_gen < c.q_min - tol)
    back = ((at_limit > 0) & (vm > c.v_set + tol)) | ((at_limit < 0) & (vm < c.v_set - tol))
    if not (over.any() or under.any() or back.any()):
        return False
    apply_limit_switches(c, v, kind, at_limit, q_fixed, over, under, back)
    return True
