"""Turn a :class:`~planner.network.model.Network` into the arrays the solvers work on.

Compilation happens once per network (or per change of a lever); the load flow and the
optimiser never touch the tables. Per unit on the system base throughout.

Branch model (lines and transformers alike), with series admittance ``ys``, total charging
``b`` and complex ratio ``a = t e^{j phi}`` on the tap side::

    tap on the from side:  Yff = (ys + j b/2) / |a|^2   Yft = -ys / conj(a)
                           Ytf = -ys / a                Ytt = ys + j b/2

A ratio on the to side mirrors these formulas. Lines have ``a = 1``.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from .model import Network

PQ, PV, SLACK = 0, 1, 2
KIND_CODES = {"PQ": PQ, "PV": PV, "slack": SLACK}
KIND_NAMES = np.array(["PQ", "PV", "slack"], dtype=object)


@dataclass(frozen=True)
class Compiled:
    """Arrays of one network, in compiled bus order (the order of ``Network.buses``).

    ``ysh`` (bus shunts) and ``ratio`` / ``shift`` (branch taps) are kept apart from the
    fixed branch data so a lever can be moved by :func:`dataclasses.replace` without
    recompiling the tables; :meth:`ybus` rebuilds the admittance matrix from them.
    """
    base_mva: float
    bus_ids: np.ndarray          # int bus numbers, compiled order
    names: np.ndarray
    kind: np.ndarray             # PQ / PV / SLACK codes after checking generator availability
    alive: np.ndarray            # False for buses in an island with no slack (dead, held at 0 V)
    v_set: np.ndarray            # setpoint for PV and slack buses (1.0 elsewhere)
    vm_stored: np.ndarray
    va_stored: np.ndarray        # radians
    v_min: np.ndarray
    v_max: np.ndarray
    s_gen: np.ndarray            # complex scheduled generation per bus (Q only used at PQ buses)
    s_load_p: np.ndarray         # constant-power part of load at 1 pu (complex)
    s_load_i: np.ndarray         # constant-current part, scaled by |V|
    s_load_z: np.ndarray         # constant-impedance part, scaled by |V|^2
    q_min: np.ndarray            # summed reactive limits of in-service generators per bus
    q_max: np.ndarray
    ysh: np.ndarray              # complex shunt admittance per bus (fixed shunts + banks in service)
    # branches (in-service lines then in-service transformers)
    f: np.ndarray
    t: np.ndarray
    ys: np.ndarray
    bc: np.ndarray               # total charging susceptance
    ratio: np.ndarray
    shift: np.ndarray            # radians
    tap_from: np.ndarray         # bool: ratio sits on the from side
    branch_ids: np.ndarray
    branch_element: np.ndarray   # "line" / "transformer"
    rating: np.ndarray           # MVA, 0 = none
    xfmr_rows: np.ndarray        # position in ``Network.transformers`` of each transformer branch (-1 lines)
    # generators (in service)
    gen_ids: np.ndarray
    gen_bus: np.ndarray          # compiled bus index
    gen_p: np.ndarray            # pu
    gen_q: np.ndarray            # pu, fixed output at PQ buses
    gen_q_min: np.ndarray
    gen_q_max: np.ndarray
    gen_rows: np.ndarray         # position in ``Network.generators``
    _cache: dict = field(default_factory=dict, compare=False, repr=False)

    @property
    def n(self) -> int:
        return len(self.bus_ids)

    def index_of(self, bus_ids) -> np.ndarray:
        """Compiled indices of bus numbers; raises KeyError naming an unknown bus."""
        lookup = self._cache.get("lookup")
        if lookup is None:
            lookup = pd.Index(self.bus_ids)
            self._cache["lookup"] = lookup
        idx = lookup.get_indexer(np.atleast_1d(np.asarray(bus_ids)))
        if (idx < 0).any():
            bad = np.atleast_1d(np.asarray(bus_ids))[idx < 0][0]
            raise KeyError(f"unknown bus {bad}")
        return idx

    def branch_admittances(self):
        """(Yff, Yft, Ytf, Ytt) of every branch at the current ratios."""
        a = self.ratio * np.exp(1j * self.shift)
        inner = self.ys + 0.5j * self.bc
        on_tap = inner / np.abs(a) ** 2
        cross_1 = -self.ys / np.conj(a)   # from the tap side towards the other side
        cross_2 = -self.ys / a
        yff = np.where(self.tap_from, on_tap, inner)
        ytt = np.where(self.tap_from, inner, on_tap)
        yft = np.where(self.tap_from, cross_1, cross_2)
        ytf = np.where(self.tap_from, cross_2, cross_1)
        return yff, yft, ytf, ytt

    def ybranch(self) -> sp.csr_matrix:
        """Bus admittance of the branches alone (no shunts), CSR with an explicit diagonal."""
        key = ("ybranch", self.ratio.tobytes(), self.shift.tobytes())
        hit = self._cache.get("ybranch")
        if hit is not None and hit[0] == key:
            return hit[1]
        n = self.n
        yff, yft, ytf, ytt = self.branch_admittances()
        diag = np.arange(n)
        rows = np.concatenate([self.f, self.f, self.t, self.t, diag])
        cols = np.concatenate([self.f, self.t, self.f, self.t, diag])
        vals = np.concatenate([yff, yft, ytf, ytt, np.zeros(n, complex)])
        y = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
        y.sum_duplicates()
        y.sort_indices()
        self._cache["ybranch"] = (key, y)
        return y

    def ybus(self) -> sp.csr_matrix:
        """Full bus admittance matrix: branches plus bus shunts (same sparsity as ybranch)."""
        y = self.ybranch().copy()
        y.data[diagonal_positions(y)] += self.ysh
        return y


def diagonal_positions(y: sp.csr_matrix) -> np.ndarray:
    """Index into ``y.data`` of each diagonal entry (the diagonal must be stored)."""
    n = y.shape[0]
    rows = np.repeat(np.arange(n), np.diff(y.indptr))
    pos = np.flatnonzero(rows == y.indices)
    if len(pos) != n:
        raise ValueError("admittance matrix lacks a stored diagonal entry")
    return pos


def compile_network(net: Network) -> Compiled:
    """Compile a network's tables into solver arrays.

    Out-of-service elements are left out. A PV bus with no generator in service is solved
    as PQ; buses in an island without a slack bus are marked dead and held at zero volts.

    >>> from planner.network.model import Network, make_table
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
    ...                                          {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0}]),
    ...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.0, "x_pu": 0.1}]))
    >>> c = compile_network(net)
    >>> c.ybus().toarray().round(3).tolist()
    [[-10j, 10j], [10j, -10j]]
    """
    base = float(net.base_mva)
    b = net.buses
    n = len(b)
    bus_ids = b["bus"].to_numpy(np.int64)
    lookup = pd.Index(bus_ids)

    def idx(col):
        return lookup.get_indexer(col.to_numpy(np.int64))

    kind = b["kind"].map(KIND_CODES).to_numpy()
    if pd.isna(kind).any():
        bad = b.loc[pd.isna(kind), "bus"].iloc[0]
        raise ValueError(f"bus {bad}: unknown kind")
    kind = kind.astype(np.int64)

    # generators in service
    g = net.generators[net.generators["energised"].astype(bool)]
    g_bus = idx(g["bus"])
    gen_p = g["mw"].to_numpy(float) / base
    gen_q = g["mvar"].to_numpy(float) / base
    gq_min = g["q_min_mvar"].to_numpy(float) / base
    gq_max = g["q_max_mvar"].to_numpy(float) / base
    has_gen = np.bincount(g_bus, minlength=n) > 0
    kind = np.where((kind == PV) & ~has_gen, PQ, kind)

    # voltage setpoint: the first in-service generator of the bus decides
    v_set = np.ones(n)
    first = pd.Series(np.arange(len(g_bus))).groupby(g_bus).first()
    v_set[first.index.to_numpy()] = g["v_set_pu"].to_numpy(float)[first.to_numpy()]
    controlled = kind != PQ
    q_min = np.bincount(g_bus, gq_min, n)
    q_max = np.bincount(g_bus, gq_max, n)
    # generation: P always; Q only where the bus does not control voltage
    s_gen = np.bincount(g_bus, gen_p, n) + 1j * np.where(controlled, 0.0, np.bincount(g_bus, gen_q, n))

    # loads
    ld = net.loads[net.loads["energised"].astype(bool)]
    l_bus = idx(ld["bus"])
    p = ld["mw"].to_numpy(float) / base
    q = ld["mvar"].to_numpy(float) / base
    pi, pz = ld["p_share_i"].to_numpy(float), ld["p_share_z"].to_numpy(float)
    qi, qz = ld["q_share_i"].to_numpy(float), ld["q_share_z"].to_numpy(float)

    def per_bus(vals):
        return np.bincount(l_bus, vals, n)

    s_load_p = per_bus(p * (1 - pi - pz)) + 1j * per_bus(q * (1 - qi - qz))
    s_load_i = per_bus(p * pi) + 1j * per_bus(q * qi)
    s_load_z = per_bus(p * pz) + 1j * per_bus(q * qz)

    # shunts: bus columns plus banks in service (Mvar at 1 pu = susceptance in pu x base)
    ysh = (b["shunt_draw_mw"].to_numpy(float) + 1j * b["shunt_supply_mvar"].to_numpy(float)) / base
    sh = net.shunts[net.shunts["energised"].astype(bool)]
    if len(sh):
        ysh = ysh + 1j * np.bincount(idx(sh["bus"]), sh["mvar_per_step"].to_numpy(float)
                                     * sh["steps_on"].to_numpy(float), n) / base

    # branches
    ln = net.lines[net.lines["energised"].astype(bool)]
    tr_all = net.transformers
    tr_mask = tr_all["energised"].astype(bool).to_numpy()
    tr = tr_all[tr_mask]
    f = np.concatenate([idx(ln["from_bus"]), idx(tr["from_bus"])]).astype(np.int64)
    t = np.concatenate([idx(ln["to_bus"]), idx(tr["to_bus"])]).astype(np.int64)
    z = np.concatenate([ln["r_pu"].to_numpy(float) + 1j * ln["x_pu"].to_numpy(float),
                        tr["r_pu"].to_numpy(float) + 1j * tr["x_pu"].to_numpy(float)])
    ys = 1.0 / z
    bc = np.concatenate([ln["b_pu"].to_numpy(float), tr["b_pu"].to_numpy(float)])
    nl = len(ln)
    ratio = np.concatenate([np.ones(nl), tr["ratio_pu"].to_numpy(float)])
    shift = np.concatenate([np.zeros(nl), np.deg2rad(tr["shift_deg"].to_numpy(float))])
    tap_from = np.concatenate([np.ones(nl, bool), (tr["tap_side"] != "to").to_numpy()])
    branch_ids = np.concatenate([ln["line_id"].astype(str).to_numpy(), tr["xfmr_id"].astype(str).to_numpy()])
    element = np.array(["line"] * nl + ["transformer"] * len(tr), dtype=object)
    rating = np.concatenate([ln["rating_mva"].to_numpy(float), tr["rating_mva"].to_numpy(float)])
    xfmr_rows = np.concatenate([-np.ones(nl, np.int64), np.flatnonzero(tr_mask)])

    # islands: a component with no slack carries no solution
    adj = sp.coo_matrix((np.ones(len(f)), (f, t)), shape=(n, n))
    _, comp = connected_components(adj, directed=False)
    has_slack = np.bincount(comp, kind == SLACK) > 0
    alive = has_slack[comp]

    vm = b["v_pu"].to_numpy(float)
    va = np.deg2rad(b["angle_deg"].to_numpy(float))
    return Compiled(
        base_mva=base, bus_ids=bus_ids, names=b["name"].astype(str).to_numpy(), kind=kind, alive=alive,
        v_set=v_set, vm_stored=vm, va_stored=va,
        v_min=b["v_min_pu"].to_numpy(float), v_max=b["v_max_pu"].to_numpy(float),
        s_gen=s_gen, s_load_p=s_load_p, s_load_i=s_load_i, s_load_z=s_load_z,
        q_min=q_min, q_max=q_max, ysh=ysh,
        f=f, t=t, ys=ys, bc=bc, ratio=ratio, shift=shift, tap_from=tap_from,
        branch_ids=branch_ids, branch_element=element, rating=rating, xfmr_rows=xfmr_rows,
        gen_ids=g["gen_id"].astype(str).to_numpy(), gen_bus=g_bus.astype(np.int64), gen_p=gen_p,
        gen_q=gen_q, gen_q_min=gq_min, gen_q_max=gq_max,
        gen_rows=np.flatnonzero(net.generators["energised"].astype(bool).to_numpy()),
    )


def replace(c: Compiled, **changes) -> Compiled:
    """A copy of ``c`` with some arrays replaced (a fresh cache; the original is untouched).

    One entry is shared by ``c`` and all copies made from it: ``"shared"``, a dict for caches
    that check their own validity at each use (the load flow's symbolic work), so a sweep of
    lever changes reuses them."""
    shared = c._cache.setdefault("shared", {})
    return dataclasses.replace(c, _cache={"shared": shared}, **changes)
