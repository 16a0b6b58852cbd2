"""Sensitivities of a solved AC operating point to the levers.

At a solved point the mismatch equations g(x, u) = 0 hold; for a lever change du the state
moves by dx = -J^{-1} (dg/du) du, with J the load-flow Jacobian. One sparse LU of J serves
every lever (one solve per lever column, all in one call).

Levers (columns of the result, in this order):
  * shunt susceptance at a bus, pu (a bank of rating B Mvar injects B V^2);
  * voltage magnitude held at a generator bus, pu;
  * off-nominal ratio of a transformer, pu.

Every generator bus is linearised as voltage-controlled at its present voltage, including a
bus the load flow holds at a reactive limit: locally that state is the same, and the
reactive-limit rows then tell the optimiser how far a setpoint may move.

From dx the module returns what the optimiser needs, all linear in du:
  * bus voltage magnitudes (every bus);
  * reactive output of every generator bus;
  * series current of every branch (in the frame of its from-bus voltage), whose squares
    weighted by resistance are the losses:
    ``losses = sum r_b |I_b|^2`` exactly, so ``sum r_b |I_b + dI_b du|^2`` is a convex quadratic
    model of the losses that keeps their curvature in the levers (first order exact).
The gradient of the losses is also available by one adjoint solve (:func:`loss_gradient`),
which cross-checks the quadratic model's slope.
"""
from __future__ import annotations

import copy
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.linalg.lapack
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..flow.jacobian import LU_ORDERED, JacobianPattern, bus_derivatives, csc_structure, factorize
from ..flow.newton import load_power
from ..flow.result import FlowResult
from ..network.compile import PQ, PV, SLACK


# Above this many entries in the explicit (2 branches x levers) current-slope matrix the loss
# model is formed from the state-space Gram matrix instead (see Sensitivity.loss_model).
EXPLICIT_LIMIT = 2_000_000

@dataclass
class Sensitivity:
    """Linear model of one operating point: value at the point and slope per lever.

    Only real arrays of (buses x levers) are held: the angle and magnitude slopes. Complex
    slopes (bus voltages, branch currents) are formed on request, for the rows asked for, and
    the quadratic loss model comes from :meth:`loss_model` without any (branches x levers)
    array on large networks.
    """
    vm0: np.ndarray            # (n,) bus voltage magnitudes
    dvm: np.ndarray            # (n, m) magnitude slopes
    dva: np.ndarray            # (n, m) angle slopes, rad
    gen_buses: np.ndarray      # compiled indices of generator (PV and slack) buses
    q0: np.ndarray             # (g,) reactive output at those buses, pu
    dq: np.ndarray             # (g, m)
    i0: np.ndarray             # (nb,) complex series current of every branch, from-bus voltage frame
    r: np.ndarray              # (nb,) series resistance seen by the current (pu)
    losses0: float             # pu, sum r |i0|^2
    v: np.ndarray = None       # (n,) complex bus voltages of the point
    lu: object = None          # the sparse LU of the Jacobian it was solved with (for adjoint solves)
    _parts: tuple = None       # what the current slopes are built from (see _current_operator)
    _di: np.ndarray = None

    @property
    def m(self) -> int:
        return self.dvm.shape[1]

    def dv_rows(self, rows) -> np.ndarray:
        """Complex bus-voltage slopes of the given buses, (len(rows), m)."""
        rows = np.asarray(rows, dtype=np.int64)
        v = self.v[rows]
        vm = np.abs(v)
        return v[:, None] * (self.dvm[rows] / np.where(vm > 0, vm, 1.0)[:, None] + 1j * self.dva[rows])

    @property
    def dv(self) -> np.ndarray:
        """(n, m) complex bus-voltage slopes (formed on request; small networks and tests)."""
        return self.dv_rows(np.arange(len(self.v)))

    @property
    def di(self) -> np.ndarray:
        """(nb, m) complex series-current slopes in the from-bus frame (formed on request)."""
        if self._di is None:
            B, direct = self._current_operator()
            X = np.vstack([self.dva, self.dvm])
            self._di = B @ X + direct.toarray()
        return self._di

    def _current_operator(self):
        """Sparse complex map from [angle slopes; magnitude slopes] (2n) to the current slopes of
        every branch in its from-bus frame, and the levers' direct part (sparse, nb x m)."""
        return self._parts

    def fold(self, k: int, tap_sum: np.ndarray) -> None:
        """Sum the columns from ``k`` on by ``tap_sum`` (levers that move together)."""
        def f(a):
            return np.concatenate([a[:, :k], a[:, k:] @ tap_sum], axis=1)
        B, direct = self._parts
        direct = sp.hstack([direct[:, :k], direct[:, k:] @ sp.csr_matrix(tap_sum)]).tocsc()
        self._parts = (B, direct)
        self.dvm, self.dva, self.dq = f(self.dvm), f(self.dva), f(self.dq)
        self._di = None

    def loss_model(self):
        """(R, d, const) with ``sum r |I + dI du|^2 = |d + R du|^2 + const`` exactly.

        Small networks: R-only QR of the explicit weighted current slopes ``[M c]`` (no Q is
        formed). Large ones (more than ``EXPLICIT_LIMIT`` entries in M): the Gram matrix
        ``M^T M = X^T H X + ...`` from the sparse state-space Hessian ``H = B^T W B`` of the
        losses and the (2n x m) real state slopes X, then a pivoted Cholesky factor; no
        (branches x levers) array is formed.
        """
        m = self.m
        w = np.sqrt(np.maximum(self.r, 0.0))
        nb = len(w)
        c = np.concatenate([w * self.i0.real, w * self.i0.imag])
        if m == 0:
            return np.zeros((0, 0)), np.zeros(0), float(c @ c)
        if 2 * nb * (m + 1) <= EXPLICIT_LIMIT:
            di = self.di
            A = np.empty((2 * nb, m + 1))
            A[:nb, :m] = w[:, None] * di.real
            A[nb:, :m] = w[:, None] * di.imag
            A[:, m] = c
            Ra = scipy.linalg.qr(A, mode="r", overwrite_a=True, check_finite=False)[0]
            Ra = np.vstack([Ra, np.zeros((max(0, m + 1 - Ra.shape[0]), m + 1))])
            return Ra[:m, :m].copy(), Ra[:m, m].copy(), float(Ra[m, m] ** 2)
        B, direct = self._parts
        Wb = sp.diags(w) @ B
        Br = sp.vstack([Wb.real, Wb.imag]).tocsr()                       # (2 nb, 2 n) real
        Dr = sp.vstack([sp.diags(w) @ direct.real, sp.diags(w) @ direct.imag]).tocsc()
        X = np.vstack([self.dva, self.dvm])
        H = (Br.T @ Br).tocsr()
        HX = H @ X
        G = X.T @ HX
        BD = (Br.T @ Dr)
        if BD.nnz:
            cross = X.T @ BD.toarray()
            G += cross + cross.T + (Dr.T @ Dr).toarray()
        g = X.T @ (Br.T @ c) + Dr.T @ c
        G = 0.5 * (G + G.T)
        return _factor_gram(G, np.asarray(g).ravel(), float(c @ c))


def _factor_gram(G, g, cc):
    """(R, d, const) from ``|c + M du|^2 = du' G du + 2 g' du + cc`` by a pivoted Cholesky
    factor (LAPACK ?pstrf), so a rank-deficient G (two levers at one bus) is no obstacle."""
    m = len(g)
    scale = max(float(np.max(np.abs(np.diag(G)))), 1e-300)
    u, piv, rank, info = scipy.linalg.lapack.dpstrf(G / scale, lower=0, tol=1e-13)
    piv = piv - 1
    rank = int(rank)
    U = np.triu(u)[:rank] * np.sqrt(scale)
    R = np.zeros((m, m))
    R[:rank, piv] = U
    gp = g[piv]
    d = np.zeros(m)
    if rank:
        d[:rank] = scipy.linalg.solve_triangular(U[:, :rank], gp[:rank], trans="T", check_finite=False)
    const = max(cc - float(d @ d), 0.0)
    return R, d, const


def _jacobian_at(c, v, kind):
    """The load-flow Jacobian at ``v`` for the given bus kinds: (pattern, matrix, pvpq, pq, dload)."""
    pv = np.flatnonzero((kind == PV) & c.alive)
    pq = np.flatnonzero((kind == PQ) & c.alive)
    pvpq = np.concatenate([pv, pq])
    pat = _pattern(c, c.ybus(), pvpq, pq)
    dload = c.s_load_i + 2.0 * c.s_load_z * np.abs(v)
    return pat, pat.matrix(v, dload), pvpq, pq, dload


def _pattern(c, y, pvpq, pq):
    """:class:`JacobianPattern` of ``y`` for this PV / PQ split, its structure kept in the compiled
    network's shared cache (copies with other shunts, setpoints or taps have the same admittance
    pattern); the returned pattern carries ``y``'s own values."""
    kept = c._cache.setdefault("shared", {}).setdefault("optimizer_patterns", {})
    key = (pvpq.tobytes(), pq.tobytes())
    pat = kept.get(key)
    if pat is None or not (np.array_equal(pat.y.indptr, y.indptr) and np.array_equal(pat.y.indices, y.indices)):
        pat = JacobianPattern(y, pvpq, pq)
        if len(kept) > 8:
            kept.clear()
        kept[key] = pat
    out = copy.copy(pat)
    out.y = y
    return out


def series_current_parts(c):
    """Per branch: series admittance, resistance and the tap factor on the from / to side.

    Series current ``I = ys (V_f k_f - V_t k_t)`` with ``k = 1/a`` on the tap side and 1 on
    the other; losses are ``Re(1/ys) |I|^2``.
    """
    a = c.ratio * np.exp(1j * c.shift)
    k_f = np.where(c.tap_from, 1.0 / a, 1.0)
    k_t = np.where(c.tap_from, 1.0, 1.0 / a)
    r = np.real(1.0 / c.ys)
    return c.ys, r, k_f, k_t


def lifted_kinds(c):
    """Bus kinds of the linearisation: every generator bus voltage-controlled (limits lifted)."""
    return np.where(c.kind == SLACK, SLACK, np.where(c.kind == PV, PV, PQ))


class OrderedFactor:
    """Sparse LU of a Jacobian ``J`` made in a kept fill-reducing order, solving as SuperLU does
    (``solve(b)``: ``J x = b``; ``solve(b, trans="T")``: ``J^T x = b``).

    The order is chosen once per sparsity pattern (minimum degree on ``J + J^T``, as
    :func:`planner.flow.jacobian.factorize`) and kept in ``orders`` (a dict, e.g. the compiled
    network's shared cache), so later points of the same pattern skip the ordering. ``J^T`` is
    factorised in that order, with the load flow's own settings for ordered matrices (small
    panels, threshold pivoting preferring the diagonal), and ``J x = b`` is solved as
    ``(J^T)^T x = b``: SuperLU's transposed triangular solves run in its own loops, the plain
    ones call dense BLAS per supernode, which on the many tiny supernodes of a power network
    costs more than the arithmetic (see planner.flow.jacobian). Measured on the 10,000-bus grid
    of tests/perf/bench_plan.py: LU 31 ms instead of 59 ms, one solve 1.1 ms instead of 1.9 ms.
    """

    def __init__(self, jac: sp.csc_matrix, orders: dict | None = None):
        jac = jac.tocsc()
        jac.sort_indices()
        size = jac.shape[0]
        key = (size, jac.indptr.tobytes(), jac.indices.tobytes())
        hit = orders.get(key) if orders is not None else None
        if hit is None:
            order = np.argsort(factorize(jac).perm_c)          # old index at each new position
            inv = np.empty(size, np.int64)
            inv[order] = np.arange(size)
            # where each entry of J lands in (J[order][:, order])^T, in CSC order
            cols = np.repeat(np.arange(size), np.diff(jac.indptr))
            hit = (order, *csc_structure(inv[cols], inv[jac.indices], np.arange(jac.nnz), size))
            if orders is not None:
                orders[key] = hit
        self.order, indices, indptr, src = hit
        jt = sp.csc_matrix((jac.data[src], indices, indptr), shape=(size, size))
        jt.has_canonical_format = True
        self.lu = spla.splu(jt, **LU_ORDERED)
        self.shape = jac.shape

    def solve(self, rhs: np.ndarray, trans: str = "N") -> np.ndarray:
        o = self.order
        rhs = np.asarray(rhs, dtype=np.float64)
        x = np.empty_like(rhs, dtype=np.float64)
        x[o] = self.lu.solve(rhs[o], trans="N" if trans == "T" else "T")
        return x


def factor_orders(c) -> dict:
    """The kept Jacobian orders of a compiled network (shared by its copies with other
    shunts, setpoints or taps: the same sparsity pattern)."""
    return c._cache.setdefault("shared", {}).setdefault("optimizer_orders", {})


def jacobian_factor(flow: FlowResult, kind=None):
    """Sparse LU (:class:`OrderedFactor`) of the load-flow Jacobian at ``flow`` with the kinds
    :func:`linearize` uses (or the given bus kinds, e.g. the flow's own with generators held
    at a limit as PQ)."""
    c = flow.compiled
    return OrderedFactor(_jacobian_at(c, flow.v, lifted_kinds(c) if kind is None else kind)[1], factor_orders(c))


def linearize(flow: FlowResult, *, shunt_buses, vset_buses, xfmr_branches, lu=None) -> Sensitivity:
    """Sensitivities at a solved point.

    One sparse LU of the Jacobian and one solve with a right-hand side per lever column (real
    arrays only, all columns in one call: blocked calls change the slopes' last bits, see
    DEVELOPERS.md); everything else is formed from those slopes on request.

    Parameters
    ----------
    flow : a converged FlowResult
    shunt_buses : compiled bus indices with a shunt-susceptance lever (may repeat)
    vset_buses : compiled indices of generator buses whose voltage is a lever
    xfmr_branches : compiled branch indices of transformers whose ratio is a lever
    lu : optional, :func:`jacobian_factor` of ``flow`` already computed (saves the LU)
    """
    c = flow.compiled
    v = flow.v
    n = c.n
    vm = np.abs(v)
    kind = lifted_kinds(c)
    shunt_buses = np.asarray(shunt_buses, dtype=np.int64)
    vset_buses = np.asarray(vset_buses, dtype=np.int64)
    xfmr_branches = np.asarray(xfmr_branches, dtype=np.int64)
    ms, mv, mt = len(shunt_buses), len(vset_buses), len(xfmr_branches)
    m = ms + mv + mt

    y = c.ybus()
    pat, J, pvpq, pq, dload = _jacobian_at(c, v, kind)
    if lu is None:
        # SuperLU's own ordering and plain solves, all columns in one call: the step model's
        # last bits, and so the node-limited MILP's path, stay those of the plain factor (see
        # DEVELOPERS.md); the kept-order factor serves the search's checks and gradients
        lu = factorize(J)
    na = len(pvpq)

    # direct change of the computed bus injection S = V conj(Y V) per lever, holding the state
    # (sparse: a shunt touches its bus, a setpoint its bus's row of Y, a ratio its two ends)
    d_va, d_vm = bus_derivatives(y, v, pat.diag_pos, pat.rows, dload)
    dS_dVa = sp.csr_matrix((d_va, y.indices, y.indptr), shape=(n, n))
    dS_dVm = sp.csr_matrix((d_vm, y.indices, y.indptr), shape=(n, n))
    blocks = [sp.csc_matrix((-1j * vm[shunt_buses] ** 2, (shunt_buses, np.arange(ms))), shape=(n, ms))]
    blocks.append(dS_dVm[:, vset_buses].tocsc() if mv else sp.csc_matrix((n, 0), dtype=complex))
    blocks.append(ratio_injection_sparse(c, v, xfmr_branches) if mt
                  else sp.csc_matrix((n, 0), dtype=complex))
    ds_direct = sp.hstack(blocks).tocsr()

    rhs = np.empty((na + len(pq), m), order="F")
    if m:
        rhs[:na] = ds_direct[pvpq].real.toarray()
        rhs[na:] = ds_direct[pq].imag.toarray()
    dx = -lu.solve(rhs) if rhs.size else np.zeros((pat.size, m))
    del rhs

    dva = np.zeros((n, m))
    dvm = np.zeros((n, m))
    dva[pvpq] = dx[:na]
    dvm[pq] = dx[na:]
    del dx
    dvm[vset_buses, ms + np.arange(mv)] = 1.0

    # generator reactive output Q = Im(S_calc) + Q_load(V)
    gen_buses = np.flatnonzero((kind != PQ) & c.alive)
    s_calc = v * np.conj(y @ v)
    q0 = s_calc.imag[gen_buses] + load_power(c, vm).imag[gen_buses] - c.s_gen.imag[gen_buses]
    # dS_dVm already holds the load derivative on its diagonal, so it gives dQ directly.
    # A setpoint column's direct effect is already in dvm (its unit entry at the bus), so only
    # the shunt and ratio columns add their direct part here.
    direct = ds_direct[gen_buses].toarray()
    direct[:, ms:ms + mv] = 0.0
    dq = (dS_dVa[gen_buses] @ dva).imag + (dS_dVm[gen_buses] @ dvm).imag + direct.imag

    # series currents of every branch, in the frame of its from-bus voltage (|I|, hence the
    # losses, do not depend on the frame). In the slack's frame a large reactive current
    # rotates with the bus angles, so a linear model of it mixes reactive into active current
    # and misses the product of the two changes; in the local frame the parts stay close to
    # P/|V| and Q/|V|, which move nearly linearly with shunt injections.
    ys, r, k_f, k_t = series_current_parts(c)
    i_raw = ys * (v[c.f] * k_f - v[c.t] * k_t)
    vf = v[c.f]
    vmf = np.abs(vf)
    rot = np.where(vmf > 0, np.conj(vf) / np.where(vmf > 0, vmf, 1.0), 1.0)
    B, direct_i = _current_operator(c, v, vm, ys, k_f, k_t, rot, i_raw, xfmr_branches, ms + mv, m)
    i0 = rot * i_raw
    return Sensitivity(vm0=vm, dvm=dvm, dva=dva, gen_buses=gen_buses, q0=q0, dq=dq, i0=i0, r=r,
                       losses0=float(np.sum(r * np.abs(i0) ** 2)), v=v, lu=lu, _parts=(B, direct_i))


def point_values(flow: FlowResult):
    """The values a :class:`Sensitivity` holds at its point, without any slope: bus voltage
    magnitudes, generator buses and their reactive output (pu), the series losses (pu)."""
    c = flow.compiled
    v = flow.v
    vm = np.abs(v)
    gen_buses = np.flatnonzero((lifted_kinds(c) != PQ) & c.alive)
    s_calc = v * np.conj(c.ybus() @ v)
    q0 = s_calc.imag[gen_buses] + load_power(c, vm).imag[gen_buses] - c.s_gen.imag[gen_buses]
    ys, r, k_f, k_t = series_current_parts(c)
    i_raw = ys * (v[c.f] * k_f - v[c.t] * k_t)
    return vm, gen_buses, q0, float(np.sum(r * np.abs(i_raw) ** 2))


def _current_operator(c, v, vm, ys, k_f, k_t, rot, i_raw, xfmr_branches, first_tap, m):
    """Sparse (nb x 2n) complex map from [d angle; d |V|] to each branch's series-current change in
    its from-bus frame, ``rot (dI - j I dangle_f)``, and the ratio levers' direct part (nb x m).

    ``dV = V (d|V| / |V| + j d angle)``; ``dI = ys (k_f dV_f - k_t dV_t)``."""
    n, nb = c.n, len(c.f)
    f, t = c.f, c.t
    unit = v / np.where(vm > 0, vm, 1.0)
    rows = np.arange(nb)
    a_f = rot * (ys * k_f * 1j * v[f] - 1j * i_raw)
    a_t = -rot * ys * k_t * 1j * v[t]
    m_f = rot * ys * k_f * unit[f]
    m_t = -rot * ys * k_t * unit[t]
    B = sp.csr_matrix((np.concatenate([a_f, a_t, m_f, m_t]),
                       (np.tile(rows, 4), np.concatenate([f, t, n + f, n + t]))), shape=(nb, 2 * n))
    mt = len(xfmr_branches)
    if mt:
        dk_f, dk_t = _tap_factor_derivative(c, xfmr_branches)
        br = xfmr_branches
        val = rot[br] * ys[br] * (v[f[br]] * dk_f - v[t[br]] * dk_t)
        direct = sp.csc_matrix((val, (br, first_tap + np.arange(mt))), shape=(nb, m))
    else:
        direct = sp.csc_matrix((nb, m), dtype=complex)
    return B, direct


def flow_magnitude_slopes(flow: FlowResult, sens: Sensitivity, branches: np.ndarray):
    """|S| at the more loaded end of each given branch (pu) and its slope per lever.

    Uses the bus-voltage slopes at fixed branch admittance (a ratio lever's own effect on the
    admittance is left out: the trust region and the AC check cover it).
    """
    c = flow.compiled
    v = flow.v
    yff, yft, ytf, ytt = c.branch_admittances()
    f, t = c.f[branches], c.t[branches]
    vf, vt = v[f], v[t]
    i_f = yff[branches] * vf + yft[branches] * vt
    i_t = ytf[branches] * vf + ytt[branches] * vt
    s_f, s_t = vf * np.conj(i_f), vt * np.conj(i_t)
    use_from = np.abs(s_f) >= np.abs(s_t)
    dvf, dvt = sens.dv_rows(f), sens.dv_rows(t)
    di_f = yff[branches, None] * dvf + yft[branches, None] * dvt
    di_t = ytf[branches, None] * dvf + ytt[branches, None] * dvt
    ds_f = dvf * np.conj(i_f)[:, None] + vf[:, None] * np.conj(di_f)
    ds_t = dvt * np.conj(i_t)[:, None] + vt[:, None] * np.conj(di_t)
    s0 = np.where(use_from, s_f, s_t)
    ds = np.where(use_from[:, None], ds_f, ds_t)
    mag = np.abs(s0)
    slope = np.real(np.conj(s0)[:, None] * ds) / np.where(mag > 0, mag, 1.0)[:, None]
    return mag, slope


def _tap_factor_derivative(c, br):
    """d(k_f)/dt and d(k_t)/dt for ratio levers (k = 1/a on the tap side)."""
    a = c.ratio[br] * np.exp(1j * c.shift[br])
    dk = -1.0 / (a * c.ratio[br])           # d(1/(t e^{j phi}))/dt
    tf = c.tap_from[br]
    return np.where(tf, dk, 0.0), np.where(tf, 0.0, dk)


def ratio_injection_derivative(c, v, br):
    """(n, len(br)) change of bus injections per unit change of each lever ratio (dense)."""
    return ratio_injection_sparse(c, v, br).toarray()


def ratio_injection_sparse(c, v, br):
    """:func:`ratio_injection_derivative` as a sparse CSC matrix (each column touches the two
    end buses of its branch), without any (buses x levers) array."""
    n = c.n
    t = c.ratio[br]
    a = t * np.exp(1j * c.shift[br])
    inner = c.ys[br] + 0.5j * c.bc[br]
    # derivatives of the admittance terms with respect to t (tap side first)
    d_on_tap = -2.0 * inner / (np.abs(a) ** 2 * t)
    d_cross_1 = c.ys[br] / (np.conj(a) * t)        # d(-ys/conj(a))/dt
    d_cross_2 = c.ys[br] / (a * t)                 # d(-ys/a)/dt
    tf = c.tap_from[br]
    dyff = np.where(tf, d_on_tap, 0.0)
    dytt = np.where(tf, 0.0, d_on_tap)
    dyft = np.where(tf, d_cross_1, d_cross_2)
    dytf = np.where(tf, d_cross_2, d_cross_1)
    vf, vt = v[c.f[br]], v[c.t[br]]
    cols = np.arange(len(br))
    vals = np.concatenate([vf * np.conj(dyff * vf + dyft * vt), vt * np.conj(dytf * vf + dytt * vt)])
    # duplicates (a branch's two ends on one bus) are summed by the conversion
    return sp.csc_matrix((vals, (np.concatenate([c.f[br], c.t[br]]), np.concatenate([cols, cols]))),
                         shape=(n, len(br)))


def loss_gradient(flow: FlowResult, *, shunt_buses, vset_buses, xfmr_branches, lu=None, kind=None) -> np.ndarray:
    """Gradient of total series losses (pu) with respect to the levers, by one adjoint solve.

    Losses are ``L = sum_i Re(S_i) - sum_i g_i V_i^2`` (bus injections less shunt
    conductance). With lambda solving ``J^T lambda = dL/dx``, ``dL/du = dL/du|direct -
    lambda . dg/du``. ``kind``: the bus kinds of the Jacobian (default: ``flow.compiled``'s
    with limits lifted, as :func:`linearize` has them; ``flow.kind`` gives the gradient with
    generators held at a reactive limit kept there, valid without setpoint levers). ``lu``:
    :func:`jacobian_factor` of ``flow`` with those kinds, if already computed.
    """
    c = flow.compiled
    v = flow.v
    n = c.n
    vm = np.abs(v)
    y = c.ybus()
    pat, J, pvpq, pq, dload = _jacobian_at(c, v, lifted_kinds(c) if kind is None else kind)
    # dL/dx: column sums of Re(dS) (the load derivative must not count: use plain dS)
    d_va, d_vm = bus_derivatives(y, v, pat.diag_pos, pat.rows, None)
    cols = y.indices
    dl_dva = np.bincount(cols, d_va.real, n)
    dl_dvm = np.bincount(cols, d_vm.real, n) - 2.0 * c.ysh.real * vm
    dl_dx = np.concatenate([dl_dva[pvpq], dl_dvm[pq]])
    lam = (lu if lu is not None else OrderedFactor(J, factor_orders(c))).solve(dl_dx, trans="T")
    shunt_buses = np.asarray(shunt_buses, dtype=np.int64)
    vset_buses = np.asarray(vset_buses, dtype=np.int64)
    xfmr_branches = np.asarray(xfmr_branches, dtype=np.int64)
    ms, mv = len(shunt_buses), len(vset_buses)
    m = ms + mv + len(xfmr_branches)
    # the levers' direct change of the injections: sparse (a shunt touches its bus, a setpoint
    # its row of Y, a ratio its two ends), so no (buses x levers) array is formed
    blocks = [sp.csc_matrix((-1j * vm[shunt_buses] ** 2, (shunt_buses, np.arange(ms))), shape=(n, ms))]
    if mv:
        d_va_l, d_vm_l = bus_derivatives(y, v, pat.diag_pos, pat.rows, dload)
        blocks.append(sp.csr_matrix((d_vm_l, y.indices, y.indptr), shape=(n, n))[:, vset_buses].tocsc())
    if len(xfmr_branches):
        blocks.append(ratio_injection_sparse(c, v, xfmr_branches))
    ds = sp.hstack(blocks).tocsr() if m else sp.csr_matrix((n, 0), dtype=complex)
    na = len(pvpq)
    direct = np.asarray(ds.real.sum(axis=0)).ravel()
    adj = -(ds[pvpq].real.T @ lam[:na]) - (ds[pq].imag.T @ lam[na:])
    if mv:
        direct[ms:ms + mv] = dl_dvm[vset_buses]
    return direct + np.asarray(adj).ravel()
