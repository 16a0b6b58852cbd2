"""Sparse polar power-flow Jacobian with a fixed sparsity pattern.

The pattern of the Jacobian depends only on the admittance matrix and on which buses are PV
or PQ, so it is worked out once (:class:`JacobianPattern`) and every Newton iteration only
fills the data array by one gather: no sparse construction, sorting or Python loops per
iteration.

Unknowns are ``[angle at PV and PQ buses, |V| at PQ buses]``; equations are
``[P mismatch at PV and PQ buses, Q mismatch at PQ buses]``.

The same fixed pattern lets :class:`NewtonLinearSolver` compute a fill-reducing ordering once
(at the first factorisation) and fill later Jacobians directly in that order.
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..network.compile import diagonal_positions


def bus_derivatives(y: sp.csr_matrix, v: np.ndarray, diag_pos: np.ndarray, rows: np.ndarray,
                    dload_dvm: np.ndarray | None = None):
    """Data arrays (aligned with ``y.data``) of dS/dVa and dS/dVm, S = V conj(Y V).

    ``dload_dvm`` (per bus) is added to the diagonal of dS/dVm: the derivative of the
    voltage-dependent part of the load, which enters the mismatch with a plus sign.
    """
    cols = y.indices
    vm = np.abs(v)
    unit = np.divide(v, vm, out=np.ones_like(v), where=vm > 0)
    ibus = y @ v
    vr = v[rows]
    d_vm = vr * np.conj(y.data * unit[cols])
    d_va = -1j * vr * np.conj(y.data * v[cols])
    d_vm[diag_pos] += np.conj(ibus) * unit
    d_va[diag_pos] += 1j * v * np.conj(ibus)
    if dload_dvm is not None:
        d_vm[diag_pos] += dload_dvm
    return d_va, d_vm


# The Jacobian has the symmetric sparsity of the bus graph (two unknowns per PQ bus) and a
# strong diagonal, so a minimum-degree ordering of J + J^T with diagonal pivots preferred gives
# about half the fill of the default column ordering (measured: 0.98M vs 2.1M entries in L+U on
# a 10,000-bus meshed grid, LU 2x faster); threshold partial pivoting is kept for stability.
LU_OPTIONS = dict(permc_spec="MMD_AT_PLUS_A", options=dict(SymmetricMode=True))


# for a matrix already in a fill-reducing order: no ordering work, same pivoting rule. The
# Jacobians of power networks factorise into many tiny supernodes, for which SuperLU's default
# panel of 10 columns does wasted dense work: panels of 4 columns took 30-50 % less time on
# 10,000-bus ring-tied standard cases and no more on a meshed grid (measured, scipy 1.17).
# The diagonal is strong, so a threshold of 0.1 keeps every pivot on it along a Newton path
# (SuperLU's default 1.0 took ~300 off-diagonal pivots per LU on those cases, each adding fill)
# while bounding growth per step by 10, a common practice threshold for sparse LU.
LU_PANEL = 4
LU_PIVOT_THRESHOLD = 0.1
LU_ORDERED = dict(permc_spec="NATURAL", panel_size=LU_PANEL, diag_pivot_thresh=LU_PIVOT_THRESHOLD,
                   options=dict(SymmetricMode=True))


def factorize(jac: sp.csc_matrix):
    """Sparse LU (SuperLU) of a Jacobian with the ordering used by the load flow."""
    return spla.splu(jac, **LU_OPTIONS)


class JacobianPattern:
    """Precomputed CSC structure of the Jacobian for one set of PV / PQ buses."""

    def __init__(self, y: sp.csr_matrix, pvpq: np.ndarray, pq: np.ndarray):
        n = y.shape[0]
        self.y = y
        self.pvpq, self.pq = pvpq, pq
        self.n_angle, self.n_mag = len(pvpq), len(pq)
        self.size = self.n_angle + self.n_mag
        self.rows = np.repeat(np.arange(n), np.diff(y.indptr))
        self.diag_pos = diagonal_positions(y)
        cols = y.indices
        p_row = np.full(n, -1)
        p_row[pvpq] = np.arange(self.n_angle)
        q_row = np.full(n, -1)
        q_row[pq] = self.n_angle + np.arange(self.n_mag)
        nnz = len(y.data)
        k = np.arange(nnz)
        pieces_r, pieces_c, pieces_src = [], [], []
        # (row map, column map, offset into the stacked value array)
        # stacked values: [Re dS/dVa, Re dS/dVm, Im dS/dVa, Im dS/dVm]
        for row_map, col_map, offset in ((p_row, p_row, 0), (p_row, q_row, 1),
                                         (q_row, p_row, 2), (q_row, q_row, 3)):
            m = (row_map[self.rows] >= 0) & (col_map[cols] >= 0)
            pieces_r.append(row_map[self.rows[m]])
            pieces_c.append(col_map[cols[m]])
            pieces_src.append(k[m] + offset * nnz)
        self.indices, self.indptr, self.src = csc_structure(
            np.concatenate(pieces_r), np.concatenate(pieces_c), np.concatenate(pieces_src), self.size)

    def matrix(self, v: np.ndarray, dload_dvm: np.ndarray | None = None) -> sp.csc_matrix:
        """The Jacobian at voltage ``v`` (complex, all buses)."""
        d_va, d_vm = bus_derivatives(self.y, v, self.diag_pos, self.rows, dload_dvm)
        stacked = np.concatenate([d_va.real, d_vm.real, d_va.imag, d_vm.imag])
        return sp.csc_matrix((stacked[self.src], self.indices, self.indptr), shape=(self.size, self.size))

    def permuted(self, order: np.ndarray) -> "JacobianPattern":
        """The same pattern with unknowns and equations both taken in ``order``.

        ``matrix`` of the result is ``J[order][:, order]`` of this pattern's ``J``, filled by
        the same single gather.
        """
        new = object.__new__(JacobianPattern)
        new.__dict__.update(self.__dict__)
        inv = np.empty(self.size, np.int64)
        inv[order] = np.arange(self.size)
        cols = np.repeat(np.arange(self.size), np.diff(self.indptr))
        new.indices, new.indptr, new.src = csc_structure(inv[self.indices], inv[cols], self.src, self.size)
        return new


def csc_structure(r, c, src, size):
    """(indices, indptr, src) of distinct entries ``(r, c)`` in CSC order, rows sorted.

    scipy's compiled COO-to-CSC conversion does the sorting (several times faster than a
    lexsort); the data carried through it is ``src + 1``, so no entry is an explicit zero.
    """
    m = sp.csc_matrix((src + 1, (r, c)), shape=(size, size))
    m.sort_indices()
    if m.nnz != len(src):
        raise ValueError("Jacobian pattern has repeated entries")
    return m.indices.astype(np.int32), m.indptr.astype(np.int32), m.data - 1


class NewtonLinearSolver:
    """Solves ``J(v) x = b`` for successive voltages on one Jacobian pattern.

    The first call orders and factorises as :func:`factorize` does; later calls reuse that
    fill-reducing ordering by filling the Jacobian directly in permuted order, so SuperLU
    skips the ordering step (the pattern is fixed, only the values change). Raises
    ``RuntimeError`` for a singular Jacobian, as ``splu`` does.
    """

    def __init__(self, pattern: JacobianPattern):
        self.pattern = pattern
        self.order = None
        self._ordered = None

    def solve(self, v: np.ndarray, dload_dvm: np.ndarray | None, rhs: np.ndarray) -> np.ndarray:
        if self.order is None:
            lu = factorize(self.pattern.matrix(v, dload_dvm))
            self.order = np.argsort(lu.perm_c)     # old index at each new position
            return lu.solve(rhs)
        if self._ordered is None:                 # built on second use: many rounds need one LU only
            self._ordered = self.pattern.permuted(self.order)
        lu = spla.splu(self._ordered.matrix(v, dload_dvm), **LU_ORDERED)
        x = np.empty_like(rhs)
        x[self.order] = lu.solve(rhs[self.order])
        return x


# --- symbolic work kept across reactive-limit rounds and repeated solves -------------------

class JacobianSymbolic:
    """Sparsity pattern and fill-reducing ordering of the Jacobian of one network topology.

    Built on the *full* unknown set ``[angle, |V|]`` of every live non-slack bus, as if every
    such bus were PQ. A PV bus only removes its ``|V|`` row and column, so the Jacobian of any
    PV / PQ split is a principal submatrix of the full one: its pattern in permuted order is the
    full permuted pattern with some rows and columns masked out (one vectorised pass, no
    sorting), and the restriction of the full ordering stays a good fill-reducing ordering.
    The ordering is computed once, at the first factorisation; every later Newton step, every
    reactive-limit round and every solve of a network with the same branches (other shunts,
    setpoints, taps, loads) only fills values and factorises in that order.
    """

    def __init__(self, y: sp.csr_matrix, free: np.ndarray):
        self.n = y.shape[0]
        self.free = free                        # live non-slack buses, ascending
        self.m = len(free)
        self.full = JacobianPattern(y, free, free)
        self.y_indices = y.indices
        self.cols = y.indices.astype(np.intp)  # for gathers: numpy converts int32 indices per call
        self.key = _topology_key(y, free)
        self.order = None                       # full index at each permuted position
        self._permuted = None
        self._systems: dict[bytes, _ReducedSystem] = {}

    def matches(self, y: sp.csr_matrix, free: np.ndarray) -> bool:
        k = self.key
        return (k[0] == y.shape[0] and np.array_equal(k[1], y.indptr) and np.array_equal(k[2], y.indices)
                and np.array_equal(k[3], free))

    def system(self, y: sp.csr_matrix, pq_mask: np.ndarray) -> "_ReducedSystem":
        """The linear solver for the split where ``pq_mask`` (per bus) marks the PQ buses."""
        keep_mag = pq_mask[self.free]
        tag = np.packbits(keep_mag).tobytes()
        sysm = self._systems.get(tag)
        if sysm is None:
            if len(self._systems) > 32:         # a long sweep of splits: keep memory bounded
                self._systems.clear()
            sysm = _ReducedSystem(self, keep_mag)
            self._systems[tag] = sysm
        sysm.y = y
        return sysm

    def set_order_from(self, keep_full: np.ndarray, reduced_order: np.ndarray) -> None:
        """Adopt the ordering of the first factorised split for the full unknown set.

        ``reduced_order`` lists reduced indices in elimination order. Buses are taken in the
        order their first unknown appears there; each bus's |V| unknown comes right after the
        *next* bus's angle (angle 1, angle 2, |V| 1, angle 3, |V| 2, ...). The angle and |V| of a
        bus couple to the same neighbours, so this keeps the fill of the order the LU chose
        (measured: the same number of entries in L + U on ring-tied standard cases), but it
        stops SuperLU from gathering the two into a two-column supernode: for each of those its
        triangular solves call dense BLAS, whose fixed cost per call exceeds the arithmetic of a
        2 x 2 block. Split, the transposed triangular solve took a third less time on 10,000-bus
        ring-tied standard cases and the factorisation no more.
        """
        m = self.m
        seq = np.flatnonzero(keep_full)[reduced_order]        # full indices in elimination order
        bus = np.where(seq < m, seq, seq - m)
        _, first = np.unique(bus, return_index=True)          # first position of each bus
        rank = np.empty(m, np.int64)
        rank[np.argsort(first, kind="stable")] = np.arange(m)
        keys = np.concatenate([2 * rank, 2 * rank + 3])       # angles, then |V| one bus later
        self.order = np.argsort(keys, kind="stable")
        self._permuted = self.full.permuted(self.order)


def _topology_key(y, free):
    return (y.shape[0], y.indptr.copy(), y.indices.copy(), np.asarray(free).copy())


class _ReducedSystem:
    """Jacobian of one PV / PQ split, filled directly in the kept ordering.

    Every Newton step refills one matrix (J^T, see :meth:`solve_ordered`) in place (its values
    array, its structure kept), so an iteration allocates no sparse structure and SuperLU is
    handed a matrix it needs not check or copy."""

    def __init__(self, sym: JacobianSymbolic, keep_mag: np.ndarray):
        self.sym = sym
        m = sym.m
        keep_full = np.concatenate([np.ones(m, bool), keep_mag])
        # reduced layout: [angle at every free bus, |V| at the PQ ones], both ascending by bus
        red_index = np.cumsum(keep_full) - 1
        self.size = int(keep_full.sum())
        self.keep_full = keep_full
        self.red_index = red_index
        self.n_angle = m
        self.mag_buses = sym.free[keep_mag]      # bus of each |V| unknown, in reduced order
        self.y = None
        self._y_key = None
        self._ycdj = None
        self._buf = None
        self._sbuf = None
        self._yconj_key = None
        self._jac = None
        self._built = False

    def _natural(self):
        """Structure of this split's Jacobian in its own (unpermuted) layout."""
        p = self.sym.full
        indices, indptr, src = _restrict(p.indices, p.indptr, p.src, self.keep_full, self.size)
        return indices, indptr, _pair_layout(src, len(p.rows))

    def _build(self):
        sym = self.sym
        order = sym.order
        kept_perm = self.keep_full[order]                 # kept flag at each permuted position
        p = sym._permuted
        self.indices, self.indptr, src = _restrict(p.indices, p.indptr, p.src, kept_perm, self.size)
        self.src = _pair_layout(src, len(p.rows))
        # the transpose's structure, for the factorisation the solver uses (see solve), filled
        # from the scaled derivatives (see _scaled_derivatives)
        self.t_indices, self.t_indptr, t_src = _transposed(self.indices, self.indptr, src, self.size)
        self.t_src = _scaled_layout(t_src, sym.full.rows, sym.y_indices, sym.n)
        # reduced index of the unknown at each reduced permuted position
        self.perm = self.red_index[order[kept_perm]]
        self._built = True

    def _derivatives(self, v: np.ndarray, dload_dvm: np.ndarray | None,
                     ibus: np.ndarray | None = None) -> np.ndarray:
        """:func:`derivative_pairs` at ``v`` as a float view, for gathers by ``src``."""
        full = self.sym.full
        if self._y_key is not self.y:            # admittance values changed (shunts, taps)
            self._y_key = self.y
            self._ycdj = -1j * np.conj(self.y.data)
        if self._buf is None:
            self._buf = np.empty(2 * len(full.rows), complex)
        derivative_pairs(self.y, self._ycdj, v, full.diag_pos, full.rows, dload_dvm, self._buf, ibus)
        return self._buf.view(np.float64)

    def _values(self, v: np.ndarray, dload_dvm: np.ndarray | None, src: np.ndarray,
                ibus: np.ndarray | None = None) -> np.ndarray:
        """Jacobian values at ``v`` gathered by ``src`` (pair layout) from the derivatives."""
        return np.take(self._derivatives(v, dload_dvm, ibus), src)

    def _scaled_derivatives(self, v: np.ndarray, dload_dvm: np.ndarray | None,
                            ibus: np.ndarray | None, s_bus: np.ndarray | None = None) -> np.ndarray:
        """Derivatives with respect to the angles and to ln |V|, as a float view for gathers by
        ``t_src`` (:func:`_scaled_layout`).

        Off the diagonal both are made of one number per admittance entry,
        ``w = V_i conj(Y_ij V_j)``: ``dS_i/dVa_j = -j w`` and ``dS_i/dln|V_j| = w``. So the
        Jacobian in the unknowns ``[angle, ln |V|]`` (the usual one with each |V| column scaled
        by that |V|) needs ``w``, ``-w`` and the two diagonals: fewer passes over the entries
        than the derivatives by |V|. The step for ln |V| times |V| is the step for |V|.
        """
        full = self.sym.full
        y = self.y
        if self._yconj_key is not y:              # admittance values changed (shunts, taps)
            self._yconj_key = y
            self._yconj = np.conj(y.data)
        nnz, n = len(y.data), len(v)
        if self._sbuf is None:
            self._sbuf = np.empty(2 * nnz + 2 * n, complex)
        buf = self._sbuf
        w, neg_w = buf[:nnz], buf[nnz:2 * nnz]
        np.take(v, full.rows, out=w, mode="clip")
        w *= self._yconj
        np.take(np.conj(v), self.sym.cols, out=neg_w, mode="clip")
        w *= neg_w
        np.negative(w.view(np.float64), out=neg_w.view(np.float64))   # as floats: vectorised
        if s_bus is None:                         # V conj(Y V), unless the caller has it
            s_bus = v * np.conj(y @ v if ibus is None else ibus)
        w_diag = w[full.diag_pos]
        d_ang = np.subtract(s_bus, w_diag, out=buf[2 * nnz:2 * nnz + n])
        d_ang *= 1j
        d_mag = np.add(s_bus, w_diag, out=buf[2 * nnz + n:])
        if dload_dvm is not None:
            d_mag += np.abs(v) * dload_dvm
        return buf.view(np.float64)

    def matrix(self, v: np.ndarray, dload_dvm: np.ndarray | None = None) -> tuple[sp.csc_matrix, np.ndarray]:
        """This split's Jacobian at ``v`` in the kept fill-reducing order, and that order
        (reduced index of the unknown at each position); for benchmarks and checks."""
        if not self._built:
            self._build()
        j = sp.csc_matrix((self._values(v, dload_dvm, self.src), self.indices, self.indptr),
                          shape=(self.size, self.size))
        return j, self.perm

    def solve(self, v: np.ndarray, dload_dvm: np.ndarray | None, rhs: np.ndarray,
              ibus: np.ndarray | None = None) -> np.ndarray:
        """Solve ``J(v) x = rhs`` in the reduced layout (``x``: angle steps, then |V| steps);
        ``ibus`` (``Y v``, if the caller has it) saves one product."""
        sym = self.sym
        if sym.order is None:
            # first factorisation of this topology: let SuperLU choose the ordering, keep it
            indices, indptr, src = self._natural()
            lu = factorize(sp.csc_matrix((self._values(v, dload_dvm, src), indices, indptr),
                                         shape=(self.size, self.size)))
            sym.set_order_from(self.keep_full, np.argsort(lu.perm_c))
            return lu.solve(rhs)
        if not self._built:
            self._build()
        x = np.empty_like(rhs)
        x[self.perm] = self.solve_ordered(v, dload_dvm, rhs[self.perm], ibus)
        x[self.n_angle:] *= np.abs(v[self.mag_buses])      # ln |V| step to |V| step
        return x

    @property
    def ordered(self) -> bool:
        """Whether :meth:`solve_ordered` can be used (the topology's ordering is known)."""
        if self.sym.order is None:
            return False
        if not self._built:
            self._build()
        return True

    def solve_ordered(self, v: np.ndarray, dload_dvm: np.ndarray | None, rhs: np.ndarray,
                      ibus: np.ndarray | None = None, s_bus: np.ndarray | None = None) -> np.ndarray:
        """Solve ``J(v) x = rhs`` with ``rhs`` and ``x`` in the kept order (position ``k`` holds
        the unknown / equation ``perm[k]`` of the reduced layout) and the |V| unknowns as steps of
        ln |V| (times |V| they are steps of |V|); only when :attr:`ordered`. The Newton loop works
        in this order throughout, so no permutation is applied per iteration. ``ibus`` (``Y v``)
        and ``s_bus`` (``v conj(Y v)``), if the caller has them, save their products."""
        jac_t = self._jac
        if jac_t is None:
            jac_t = sp.csc_matrix((np.empty(len(self.t_src)), self.t_indices, self.t_indptr),
                                  shape=(self.size, self.size))
            jac_t.has_canonical_format = True      # sorted, no duplicates: built so
            self._jac = jac_t
        # J^T is factorised and J x = b solved as (J^T)^T x = b: the same factors transposed
        # (the pattern is symmetric, the pivots stay on the diagonal, so the same fill and work),
        # but SuperLU's transposed triangular solves run in its own loops, while the plain ones
        # call dense BLAS on every supernode, which for the many tiny supernodes of a power
        # network costs more than the arithmetic: half the solve time on 10,000-bus ring-tied
        # standard cases (measured, scipy 1.17 with its OpenBLAS).
        # mode="clip": no bounds-check buffer (every index is valid by construction)
        np.take(self._scaled_derivatives(v, dload_dvm, ibus, s_bus), self.t_src, out=jac_t.data, mode="clip")
        lu = spla.splu(jac_t, **LU_ORDERED)
        return lu.solve(rhs, trans="T")


def derivative_pairs(y: sp.csr_matrix, ycdj: np.ndarray, v: np.ndarray, diag_pos: np.ndarray,
                     rows: np.ndarray, dload_dvm: np.ndarray | None, out: np.ndarray,
                     ibus: np.ndarray | None = None) -> np.ndarray:
    """``[dS/dVa, dS/dVm]`` (complex, each aligned with ``y.data``) into ``out`` (2 nnz).

    The same values as :func:`bus_derivatives` in fewer passes over the entries: off the
    diagonal ``dS/dVa = -j V_i conj(Y_ij V_j)`` and ``dS/dVm = j dS/dVa / |V_j|``. ``ycdj`` is
    ``-1j * conj(y.data)``; ``ibus`` is ``y @ v`` if already known. Entries in the column of a
    dead bus (0 V) are left at 0 in ``dS/dVm``; the Jacobian never uses them. A float view of
    ``out`` holds, for entry k, Re/Im dS/dVa at 2k, 2k+1 and Re/Im dS/dVm at 2 nnz + 2k, +1
    (:func:`_pair_layout` maps the pattern's gather indices to it).
    """
    nnz = len(ycdj)
    cols = y.indices
    d_va, d_vm = out[:nnz], out[nnz:]
    vm = np.abs(v)
    inv_vm = np.divide(1.0, vm, out=np.zeros_like(vm), where=vm > 0)
    np.take(v, rows, out=d_va, mode="clip")
    d_va *= ycdj
    np.take(np.conj(v), cols, out=d_vm, mode="clip")
    d_va *= d_vm
    np.take(1j * inv_vm, cols, out=d_vm, mode="clip")
    d_vm *= d_va
    i_conj = np.conj(y @ v if ibus is None else ibus)
    v_ic = v * i_conj
    d_va[diag_pos] += 1j * v_ic
    diag = v_ic * inv_vm
    if dload_dvm is not None:
        diag += dload_dvm
    d_vm[diag_pos] += diag
    return out


def _pair_layout(src: np.ndarray, nnz: int) -> np.ndarray:
    """Gather indices into ``[Re dVa, Re dVm, Im dVa, Im dVm]`` blocks (the pattern's layout)
    mapped to the float view of :func:`derivative_pairs`' output."""
    block, k = np.divmod(src, nnz)
    return 2 * k + (block & 1) * (2 * nnz) + (block >> 1)


def _transposed(indices, indptr, src, size):
    """CSC structure (rows sorted) and gather indices of the transpose of a CSC structure."""
    m = sp.csc_matrix((src + 1, indices, indptr), shape=(size, size)).T.tocsc()
    m.sort_indices()
    return m.indices.astype(np.int32), m.indptr.astype(np.int32), m.data - 1


def _scaled_layout(src: np.ndarray, rows: np.ndarray, cols: np.ndarray, n: int) -> np.ndarray:
    """Gather indices into the float view of :meth:`_ReducedSystem._scaled_derivatives`' buffer
    ``[w, -w, dS/dVa diagonal, dS/dln|V| diagonal]`` (complex; ``nnz``, ``nnz``, ``n``, ``n``)
    for pattern entries given in the stacked layout ``[Re dVa, Re dVm, Im dVa, Im dVm]``."""
    nnz = len(rows)
    block, k = np.divmod(src, nnz)
    bus = rows[k]
    # off the diagonal: Re dVa = Im w, Re dlnV = Re w, Im dVa = -Re w, Im dlnV = Im w
    off = 2 * k + np.array([1, 0, 2 * nnz, 1])[block]
    on = 4 * nnz + 2 * bus + np.array([0, 2 * n, 1, 2 * n + 1])[block]
    return np.where(bus == cols[k], on, off)


def _restrict(indices, indptr, src, keep, size):
    """CSC structure of the principal submatrix on the kept rows and columns (order kept)."""
    renum = np.cumsum(keep) - 1
    cols = np.repeat(np.arange(len(indptr) - 1), np.diff(indptr))
    ent = keep[indices] & keep[cols]
    counts = np.bincount(renum[cols[ent]], minlength=size)
    return (renum[indices[ent]].astype(np.int32),
            np.concatenate([[0], np.cumsum(counts)]).astype(np.int32), src[ent])


class SymbolicCache:
    """Reusable symbolic work of the load flow: pass one to :func:`~planner.flow.newton.solve_flow`
    (``symbolic=``) across many solves of networks with the same branches and bus kinds.

    It holds one :class:`JacobianSymbolic` and checks, at every use, that the admittance
    pattern and the set of live non-slack buses are still those it was built for (a cheap
    array comparison); if not, it is rebuilt. So reusing it is always safe, only faster.

    >>> cache = SymbolicCache()
    >>> cache.builds
    0
    """

    def __init__(self):
        self.sym: JacobianSymbolic | None = None
        self.builds = 0
        self.extra: dict = {}      # other reusable work, each entry checking its own key

    def get(self, y: sp.csr_matrix, free: np.ndarray) -> JacobianSymbolic:
        if self.sym is None or not self.sym.matches(y, free):
            self.sym = JacobianSymbolic(y, free)
            self.builds += 1
        return self.sym
