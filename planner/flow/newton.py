"""Polar Newton-Raphson load flow with reactive-limit enforcement.

One public function, :func:`solve_flow`, returns a :class:`~planner.flow.result.FlowResult`
whether or not the case converged; it never raises on a numerical failure.

Method
------
* Unknowns: bus angles at PV and PQ buses, magnitudes at PQ buses. Mismatch
  ``V conj(Y V) - (S_gen - S_load(|V|))`` with voltage-dependent (ZIP) loads.
* Each iteration: one Jacobian fill on a fixed sparsity pattern, one sparse LU (SuperLU).
* Step control: a backtracking line search on the 2-norm of the mismatch, so a poor start
  does not run away to a far-off solution; a solution with a live bus below 0.5 pu is not
  accepted as the normal operating point.
* Reactive limits (on by default): PV buses whose generators would exceed their summed limits
  become PQ at the limit; a limited bus returns to PV when its voltage would move back past the
  setpoint. The limits are first checked once the mismatch falls below
  ``LIMIT_CHECK_PU`` (with a margin of the current mismatch, so an unconverged point does not
  switch a bus that sits on the edge), so each switching round need not converge fully; a
  round that changes nothing carries on to full convergence, and the converged point is
  checked again without a margin. Repeated until no bus changes.
"""
from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..network.compile import PQ, PV, SLACK, Compiled, compile_network
from .jacobian import JacobianPattern, NewtonLinearSolver
from .result import FlowResult, build_result

LOW_VOLTAGE_SOLUTION_PU = 0.5     # below this a "converged" point is a low-voltage solution
MAX_LIMIT_ROUNDS = 20
LIMIT_CHECK_PU = 1e-3             # mismatch at which limits are first checked in each round
LINE_SEARCH_STEPS = 10


def solve_flow(net=None, *, compiled: Compiled | None = None, tol_mva: float | None = None,
               max_iter: int = 30, enforce_q_limits: bool = True, start="flat",
               build_tables: bool = True) -> FlowResult:
    """Solve the AC load flow of a network by Newton-Raphson.

    Parameters
    ----------
    net : Network, optional
        The network; compiled here unless ``compiled`` is given.
    compiled : Compiled, optional
        Arrays of the network (from :func:`~planner.network.compile.compile_network`), for
        callers that change levers between solves.
    tol_mva : float, optional
        Convergence tolerance on the largest bus mismatch, MW or Mvar. Default 1e-8 pu of
        the system base.
    max_iter : int
        Newton iterations allowed in total (all reactive-limit rounds together).
    enforce_q_limits : bool
        Hold generator reactive output within limits by turning PV buses into PQ buses.
    start : "flat", "dc", "stored" or FlowResult
        Initial voltages: flat (1.0 pu or setpoint, angle 0); angles from a DC load flow;
        the voltages stored in the bus table; or a previous solution (warm start).
    build_tables : bool
        Build the pandas result tables (turn off inside optimisation loops).

    Examples
    --------
    >>> from planner.network.model import Network, make_table
    >>> net = Network(base_mva=100.0,
    ...     buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
    ...                                {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}]),
    ...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
    ...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
    >>> res = solve_flow(net)
    >>> res.converged, res.iterations
    (True, 3)
    >>> round(res.losses_mw, 4)
    0.3063
    """
    c = compiled if compiled is not None else compile_network(net)
    tol = (1e-8 * c.base_mva if tol_mva is None else float(tol_mva)) / c.base_mva
    t0 = time.perf_counter()
    v = initial_voltage(c, start)
    kind = c.kind.copy()
    q_fixed = np.zeros(c.n)          # reactive output (pu) of buses held at a limit
    at_limit = np.zeros(c.n, np.int8)  # +1 at max, -1 at min
    if isinstance(start, FlowResult) and enforce_q_limits and start.compiled is not None \
            and start.compiled.n == c.n:
        # a warm start keeps the limit states it had
        at_limit = start.limit_state.copy()
        kind = np.where(at_limit != 0, PQ, kind)
        q_fixed = np.where(at_limit > 0, c.q_max, np.where(at_limit < 0, c.q_min, 0.0))
        # a bus held at a limit starts from its solved voltage, not from its setpoint
        held = (at_limit != 0) & c.alive
        v[held] = start.v[held]
    y = c.ybus()
    history: list[float] = []
    iters = 0
    status, message = 1, ""

    def early_check(vv, margin):
        return _update_limits(c, y, vv, kind, q_fixed, at_limit, margin=margin)

    for _ in range(MAX_LIMIT_ROUNDS + 1):
        v, iters, status, message = _newton(c, y, v, kind, q_fixed, tol, max_iter, iters, history,
                                            early_check if enforce_q_limits else None)
        if status == SWITCHED:
            continue
        if status != 0 or not enforce_q_limits:
            break
        changed = _update_limits(c, y, v, kind, q_fixed, at_limit)
        if not changed:
            break
    else:
        status, message = 5, "reactive-limit switching did not settle"
    alive = c.alive
    if status == 0 and alive.any() and np.abs(v[alive]).min() < LOW_VOLTAGE_SOLUTION_PU:
        k = np.flatnonzero(alive)[np.argmin(np.abs(v[alive]))]
        status = 4
        message = (f"converged to a low-voltage solution (bus {c.bus_ids[k]} at {abs(v[k]):.3f} pu); "
                   "not the normal operating point")
    seconds = time.perf_counter() - t0
    if status == 0:
        message = f"converged in {iters} iterations"
    return build_result(c, y, v, kind, q_fixed, at_limit, status=status, message=message,
                        iterations=iters, history=history, seconds=seconds, build_tables=build_tables)


def initial_voltage(c: Compiled, start) -> np.ndarray:
    """Starting complex voltages for ``start`` (see :func:`solve_flow`)."""
    controlled = c.kind != PQ
    if isinstance(start, FlowResult):
        v = start.v.copy()
        if len(v) != c.n:
            raise ValueError("warm start from a result of a different network")
        vm = np.abs(v)
        vm[controlled] = c.v_set[controlled]
        v = vm * np.exp(1j * np.angle(v))
    elif start == "stored":
        vm = np.where(controlled, c.v_set, c.vm_stored)
        v = vm * np.exp(1j * c.va_stored)
    elif start in ("flat", "dc"):
        vm = np.where(controlled, c.v_set, 1.0)
        va = np.where(c.kind == SLACK, c.va_stored, 0.0)
        if start == "dc":
            va = dc_angles(c, va)
        v = vm * np.exp(1j * va)
    else:
        raise ValueError(f"unknown start {start!r}: use 'flat', 'dc', 'stored' or a FlowResult")
    return np.where(c.alive, v, 0.0)


def dc_angles(c: Compiled, va_slack: np.ndarray) -> np.ndarray:
    """Bus angles of a DC load flow (lossless, 1 pu, series reactance only, phase shifts kept)."""
    n = c.n
    bser = 1.0 / np.imag(1.0 / c.ys)  # 1/x
    bser = np.where(np.isfinite(bser), bser, 0.0)
    b = sp.csr_matrix((np.concatenate([bser, bser, -bser, -bser]),
                       (np.concatenate([c.f, c.t, c.f, c.t]), np.concatenate([c.f, c.t, c.t, c.f]))),
                      shape=(n, n))
    # a phase shifter on the from side injects b*phi at its ends
    p_shift = np.bincount(c.f, -bser * c.shift, n) + np.bincount(c.t, bser * c.shift, n)
    p = (c.s_gen - c.s_load_p - c.s_load_i - c.s_load_z).real - c.ysh.real - p_shift
    free = np.flatnonzero((c.kind != SLACK) & c.alive)
    fixed = np.flatnonzero((c.kind == SLACK) & c.alive)
    va = va_slack.copy()
    if len(free):
        rhs = p[free] - b[free][:, fixed] @ va[fixed]
        try:
            va[free] = spla.spsolve(b[free][:, free].tocsc(), rhs)
        except RuntimeError:
            return va_slack
        if not np.all(np.isfinite(va)):
            return va_slack
    return va


def load_power(c: Compiled, vm: np.ndarray) -> np.ndarray:
    """Complex load at voltage magnitudes ``vm`` (ZIP model)."""
    return c.s_load_p + c.s_load_i * vm + c.s_load_z * vm ** 2


def bus_mismatch(c: Compiled, y, v: np.ndarray, q_fixed: np.ndarray) -> np.ndarray:
    """Complex mismatch per bus: computed injection minus scheduled injection (pu)."""
    vm = np.abs(v)
    s_spec = c.s_gen + 1j * q_fixed - load_power(c, vm)
    return v * np.conj(y @ v) - s_spec


SWITCHED = -1                     # internal status: the early limit check changed bus kinds


def _newton(c, y, v, kind, q_fixed, tol, max_iter, iters, history, early_check=None):
    """Newton iterations for one set of bus kinds. Returns (v, iterations, status, message).

    ``early_check(v, margin)``, if given, is called once, when the mismatch first falls below
    ``LIMIT_CHECK_PU``; if it returns True (bus kinds changed, ``v`` possibly adjusted in
    place) the iterations stop with status ``SWITCHED``.
    """
    alive = c.alive
    pv = np.flatnonzero((kind == PV) & alive)
    pq = np.flatnonzero((kind == PQ) & alive)
    pvpq = np.concatenate([pv, pq])
    system = NewtonLinearSolver(JacobianPattern(y, pvpq, pq))
    na = len(pvpq)

    def residual(vv):
        mis = bus_mismatch(c, y, vv, q_fixed)
        return np.concatenate([mis.real[pvpq], mis.imag[pq]])

    def dload(vm):
        return (c.s_load_i + 2.0 * c.s_load_z * vm)

    vm, va = np.abs(v), np.angle(v)
    F = residual(v)
    while True:
        norm = float(np.abs(F).max()) if F.size else 0.0
        history.append(norm * c.base_mva)
        if not np.isfinite(norm):
            return v, iters, 2, "the iteration diverged (non-finite mismatch)"
        if norm <= tol:
            return v, iters, 0, ""
        if early_check is not None and norm <= LIMIT_CHECK_PU:
            if early_check(v, norm):
                return v, iters, SWITCHED, ""
            early_check = None
        if iters >= max_iter:
            return v, iters, 1, f"no convergence within {max_iter} iterations"
        try:
            dx = -system.solve(v, dload(vm), F)
        except RuntimeError:
            return v, iters, 3, "the Jacobian is singular (voltage collapse or an unsupported island)"
        if not np.all(np.isfinite(dx)):
            return v, iters, 3, "the Jacobian is singular (voltage collapse or an unsupported island)"
        iters += 1
        # backtracking on the 2-norm keeps a poor start from running away
        f0 = float(F @ F)
        alpha = 1.0
        for _ in range(LINE_SEARCH_STEPS):
            va_new = va.copy()
            vm_new = vm.copy()
            va_new[pvpq] += alpha * dx[:na]
            vm_new[pq] += alpha * dx[na:]
            if vm_new[pq].size == 0 or vm_new[pq].min() > 0.05:
                v_new = vm_new * np.exp(1j * va_new)
                F_new = residual(v_new)
                f1 = float(F_new @ F_new)
                if np.isfinite(f1) and f1 <= (1.0 - 1e-4 * alpha) * f0:
                    break
            alpha *= 0.5
        else:
            # no decrease along the Newton direction: take the shortest step and let the
            # next iteration (or the iteration limit) decide
            if not (vm_new[pq].size == 0 or vm_new[pq].min() > 0.05):
                return v, iters, 2, "the iteration diverged (voltages collapsing towards zero)"
        v, vm, va, F = v_new, vm_new, va_new, F_new


def _update_limits(c, y, v, kind, q_fixed, at_limit, margin: float = 0.0) -> bool:
    """Switch PV buses at a reactive limit to PQ and back; True if anything changed.

    ``margin`` (pu of Mvar and of voltage) widens both tests, for a point not yet converged.
    """
    vm = np.abs(v)
    q_gen = (v * np.conj(y @ v)).imag + load_power(c, vm).imag - c.s_gen.imag
    tol_q = 1e-9 + margin
    pv_now = (kind == PV) & c.alive
    over = pv_now & (q_gen > c.q_max + tol_q)
    under = pv_now & (q_gen < c.q_min - tol_q)
    # a bus held at its maximum whose voltage is above the setpoint could give less: back to PV
    tol_v = 1e-9 + margin
    back = ((at_limit > 0) & (vm > c.v_set + tol_v)) | ((at_limit < 0) & (vm < c.v_set - tol_v))
    if not (over.any() or under.any() or back.any()):
        return False
    kind[over | under] = PQ
    at_limit[over] = 1
    at_limit[under] = -1
    q_fixed[over] = c.q_max[over]
    q_fixed[under] = c.q_min[under]
    kind[back] = PV
    at_limit[back] = 0
    q_fixed[back] = 0.0
    # a bus back on voltage control starts from its setpoint
    v[back] = c.v_set[back] * np.exp(1j * np.angle(v[back]))
    return True
