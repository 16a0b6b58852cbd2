"""Many intervals of one network solved together: chord Newton-Raphson across a block of hours.

The hours of a year differ from each other only in their load factors (and, under the schedule
rule, in the bank steps of their load level). So they are solved in blocks:

* the hours are grouped by load level and bank steps, then into bins of nearby mean load factor
  (:func:`block_plan`: the grouping depends only on the profile, never on chunking or timing);
* each bin has a reference hour, solved by the full Newton-Raphson load flow with
  reactive-limit enforcement (:meth:`planner.sweep.repeated.RepeatedFlow.solve`);
* :func:`solve_block` then solves every hour of the bin at once: one Jacobian, at the reference
  solution, factorised once; each iteration forms the mismatches of all hours as one sparse
  matrix times a dense block of voltages and corrects them with one multi-column solve (chord,
  or "dishonest", Newton). Convergence is tested on the true mismatch of every hour with the
  load flow's tolerance, so a converged hour is a load-flow solution to that tolerance whatever
  Jacobian was used;
* an hour is accepted only if it converged and its generators keep the reference's
  reactive-limit state (no voltage-controlled bus past a limit, no held bus whose voltage
  would return it to control) and no bus is below the low-voltage-solution threshold; any
  other hour is handed back for its own full Newton-Raphson solve.

>>> from planner.network.model import Network, make_table
>>> from planner.network.compile import compile_network
>>> from planner.sweep.repeated import RepeatedFlow
>>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
...                                          {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0}]),
...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
>>> rf = RepeatedFlow(compile_network(net))
>>> ref = rf.solve(load_scale=0.9)
>>> blk = solve_block(rf, rf.y0, ref, np.array([[1.0, 1.0], [0.8, 0.8]]), ref_factors=0.9)
>>> blk.accepted.tolist(), [round(float(x), 4) for x in blk.losses_mw]
([True, True], [0.3063, 0.1937])
>>> round(rf.solve(load_scale=0.8).losses_mw, 4)
0.1937
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
import scipy.sparse.linalg as spla
from threadpoolctl import ThreadpoolController

from ..flow.jacobian import LU_OPTIONS, JacobianPattern
from ..network.compile import PQ, PV, SLACK
from ..sweep.repeated import DENSE_UP_TO, LOW_VOLTAGE_SOLUTION_PU

CHORD_MAX_ITER = 25         # chord steps before an hour is handed to its own Newton solve
CHORD_MIN_CONTRACTION = 0.5  # a step that shrinks the mismatch less than this: Newton is quicker
BIN_WIDTH = 0.04            # span of mean load factor whose hours share one reference Jacobian
BLOCK_ENTRIES = 2_000_000   # buses x hours held in one block (memory: ~16 bytes an entry, a few arrays)
LIMIT_TOL = 1e-9            # pu; the load flow's reactive-limit test


_CONTROLLER = None


def _one_blas_thread():
    """A context holding BLAS to one thread (the libraries are looked up once per process: a
    fresh look-up costs milliseconds, more than a block's solve)."""
    global _CONTROLLER
    if _CONTROLLER is None:
        _CONTROLLER = ThreadpoolController()
    return _CONTROLLER.limit(limits=1, user_api="blas")


@dataclass
class BlockSolution:
    """What :func:`solve_block` found for each hour of a block (arrays of length B, ``v`` n x B).

    ``accepted``: converged with the reference's reactive-limit state (the others need their own
    solve); ``iterations``: chord steps taken.
    """
    accepted: np.ndarray
    iterations: np.ndarray
    v: np.ndarray
    losses_mw: np.ndarray
    mismatch_mva: np.ndarray
    worst_bus: np.ndarray

    def __repr__(self):
        return f"BlockSolution(hours={len(self.accepted)}, accepted={int(self.accepted.sum())})"


def block_plan(factors, groups, width: float = BIN_WIDTH):
    """Bins of hours sharing one reference: returns ``(bin_of_hour, reference_hours)``.

    ``groups`` (one integer per hour) keeps hours of different load levels or bank steps apart;
    within a group, hours fall in bins of ``width`` of mean load factor. The reference of a bin
    is its hour of median mean factor (ties by hour order). Depends only on the inputs.

    >>> f = np.array([[0.98], [0.99], [0.5], [0.51], [1.0]])
    >>> b, r = block_plan(f, np.array([0, 0, 0, 0, 1]))
    >>> b.tolist(), r.tolist()
    ([0, 0, 1, 1, 2], [0, 2, 4])
    """
    factors = np.asarray(factors, float)
    groups = np.asarray(groups, np.int64)
    mean = factors.mean(axis=1)
    cell = np.floor(mean / width).astype(np.int64)
    keys = np.stack([groups, -cell])           # highest load first within a group
    _, bin_of = np.unique(keys.T, axis=0, return_inverse=True)
    bin_of = bin_of.reshape(-1)
    refs = []
    for b in range(int(bin_of.max()) + 1 if len(bin_of) else 0):
        hours = np.flatnonzero(bin_of == b)
        order = hours[np.argsort(mean[hours], kind="stable")]
        refs.append(int(order[(len(order) - 1) // 2]))
    return bin_of, np.array(refs, np.int64)


class ChordSystem:
    """The reference Jacobian of one bin, factorised once: a dense LU up to ``DENSE_UP_TO``
    unknowns (SuperLU's solve with thousands of right-hand sides was 6-20 x slower than LAPACK's
    on the 50-bus demo network, measured), a sparse LU above. ``solve(rhs)`` solves for a block
    of columns; BLAS runs on one thread inside, so the numbers never depend on thread settings."""

    def __init__(self, rf, y, ref, ref_factors=1.0):
        c = rf.c
        self.kind = np.where(ref.at_limit != 0, PQ, c.kind)
        alive = c.alive
        self.pvpq = np.flatnonzero((self.kind != SLACK) & alive)
        self.pq = np.flatnonzero((self.kind == PQ) & alive)
        self.q_fixed = np.where(ref.at_limit > 0, c.q_max, np.where(ref.at_limit < 0, c.q_min, 0.0))
        self.at_limit = ref.at_limit
        self.ref = ref
        self.lu, self._dense = None, False
        if len(self.pvpq):
            vm = np.abs(ref.v)
            scale = np.broadcast_to(np.asarray(ref_factors, float), (c.n,))
            dload = (c.s_load_i * scale + 2.0 * c.s_load_z * scale * vm)
            jac = JacobianPattern(y, self.pvpq, self.pq).matrix(ref.v, dload)
            try:
                if jac.shape[0] <= DENSE_UP_TO:
                    with _one_blas_thread():
                        dense = sla.lu_factor(jac.toarray(), check_finite=True)
                    if np.all(np.isfinite(dense[0])) and np.all(np.abs(np.diag(dense[0])) > 0):
                        self.lu = dense
                        self._dense = True
                else:
                    self.lu = spla.splu(jac.tocsc(), **LU_OPTIONS)
                    self._dense = False
            except (RuntimeError, ValueError, sla.LinAlgError):
                self.lu = None          # singular at the reference: every hour gets its own solve

    def solve(self, rhs):
        if self._dense:
            with _one_blas_thread():
                return sla.lu_solve(self.lu, rhs, check_finite=False)
        return self.lu.solve(rhs)


def solve_block(rf, y, ref, factors, *, ref_factors=1.0, system: ChordSystem | None = None,
                max_iter: int = CHORD_MAX_ITER) -> BlockSolution:
    """Solve the hours of ``factors`` (B x n load factors) by chord steps from ``ref``, a solved
    :class:`~planner.sweep.repeated.PointSolution` of the same network ``y`` at load factors
    ``ref_factors`` (see module docstring); ``system`` a :class:`ChordSystem` made before."""
    c = rf.c
    sysm = system if system is not None else ChordSystem(rf, y, ref, ref_factors)
    fac = np.asarray(factors, float).T                      # n x B
    B = fac.shape[1]
    alive = c.alive
    sl_p, sl_i, sl_z = c.s_load_p[:, None] * fac, c.s_load_i[:, None] * fac, c.s_load_z[:, None] * fac
    s_spec = (c.s_gen + 1j * sysm.q_fixed)[:, None]
    pvpq, pq = sysm.pvpq, sysm.pq
    na = len(pvpq)
    v = np.repeat(ref.v[:, None], B, axis=1)
    vm, va = np.abs(v), np.angle(v)
    iters = np.zeros(B, np.int64)
    active = np.ones(B, bool)
    failed = np.zeros(B, bool) if sysm.lu is not None else np.ones(B, bool)
    last = np.full(B, np.inf)
    while True:
        inj = v * np.conj(y @ v)
        load = sl_p + sl_i * vm + sl_z * vm * vm
        mis = inj - (s_spec - load)
        resid = np.concatenate([mis.real[pvpq], mis.imag[pq]])
        norm = np.abs(resid).max(axis=0) if len(resid) else np.zeros(B)
        active &= ~(norm <= rf.tol) & ~failed
        stalled = active & (iters >= 2) & (norm > CHORD_MIN_CONTRACTION * last)
        failed |= stalled | (active & ((iters >= max_iter) | ~np.isfinite(norm)))
        active &= ~failed
        if not active.any():
            break
        cols = np.flatnonzero(active)
        dx = -sysm.solve(resid[:, cols])
        va_c, vm_c = va[:, cols], vm[:, cols]
        va_c[pvpq] += dx[:na]
        vm_c[pq] += dx[na:]
        va[:, cols], vm[:, cols] = va_c, vm_c
        v[:, cols] = vm_c * np.exp(1j * va_c)
        last[cols] = norm[cols]
        iters[cols] += 1
    converged = ~failed
    # the reactive-limit state must be the reference's: the load flow would otherwise switch
    q_gen = inj.imag + load.imag - c.s_gen.imag[:, None]
    pv_now = ((sysm.kind == PV) & alive)[:, None]
    past = pv_now & ((q_gen > c.q_max[:, None] + LIMIT_TOL) | (q_gen < c.q_min[:, None] - LIMIT_TOL))
    held = sysm.at_limit[:, None]
    back = ((held > 0) & (vm > c.v_set[:, None] + LIMIT_TOL)) | ((held < 0) & (vm < c.v_set[:, None] - LIMIT_TOL))
    low = (vm[alive].min(axis=0) < LOW_VOLTAGE_SOLUTION_PU) if alive.any() else np.zeros(B, bool)
    accepted = converged & ~(past | back).any(axis=0) & ~low
    err = np.abs(np.where(((sysm.kind != SLACK) & alive)[:, None], mis.real, 0.0)) \
        + 1j * np.abs(np.where(((sysm.kind == PQ) & alive)[:, None], mis.imag, 0.0))
    worst = np.argmax(np.abs(err), axis=0) if c.n else np.zeros(B, np.int64)
    yff, yft, ytf, ytt = (a[:, None] for a in rf._yb)
    vf, vt = v[c.f], v[c.t]
    loss = (vf * np.conj(yff * vf + yft * vt) + vt * np.conj(ytf * vf + ytt * vt)).real.sum(axis=0) * c.base_mva
    return BlockSolution(accepted=accepted, iterations=iters, v=v, losses_mw=loss,
                         mismatch_mva=np.abs(err[worst, np.arange(B)]) * c.base_mva,
                         worst_bus=c.bus_ids[worst] if c.n else np.full(B, -1))


def block_columns(n: int) -> int:
    """Hours per block for a network of ``n`` buses (a count, so every run blocks alike).

    >>> block_columns(50), block_columns(10_000)
    (40000, 200)
    """
    return max(1, BLOCK_ENTRIES // max(int(n), 1))
