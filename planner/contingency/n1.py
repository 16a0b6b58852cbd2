"""N-1 verification: the network with one element out at a time, checked against emergency limits.

Public functions
----------------
* :func:`outage_list` - the outages to study: every line, transformer and generator (or some
  kinds, or listed ids, or only elements at or above a voltage).
* :func:`verify_n1` - solve every outage and check post-outage voltages against an emergency band
  and branch loadings against emergency ratings; returns an :class:`N1Result`.
* :func:`compare_n1` - before/after a plan: which broken limits the plan cures, which it creates.

Modelling choices (stated in the report):

* Post-outage band: 0.90-1.10 pu by default (common practice for emergency conditions), with
  per-bus overrides. Branch loading is checked against ``rating_emergency_mva``, or the normal
  ``rating_mva`` where no emergency rating is given.
* An outage that splits the network leaves the part without the slack bus unsupplied; its load
  is reported as cut (MW and buses) and the rest is solved and checked. Lost generation is taken
  up by the slack bus (no governor or reserve model).
* The slack bus stands for the wider grid: an outage of a generator at the slack bus is listed
  as not studied.
* Each branch outage is first estimated by one exact Newton step from the base case, using the
  base Jacobian's LU with a low-rank (Woodbury) correction for the branch's rows; outages whose
  estimate is clearly inside every limit (margins ``screen_margin_pu`` and
  ``screen_margin_loading``) are reported as "estimate" and not solved; the rest are solved by a
  full AC Newton-Raphson load flow warm-started from the base case, reusing its ordering.

>>> from planner.network.model import Network, make_table
>>> net = Network(buses=make_table("buses", [{"bus": b, "base_kv": 33.0, "kind": k}
...                                          for b, k in ((1, "slack"), (2, "PQ"), (3, "PQ"))]),
...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.03}]),
...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 20.0, "mvar": 8.0},
...                                {"load_id": "D3", "bus": 3, "mw": 5.0, "mvar": 2.0}]),
...     lines=make_table("lines", [{"line_id": "A", "from_bus": 1, "to_bus": 2, "r_pu": 0.02, "x_pu": 0.1},
...                                {"line_id": "B", "from_bus": 1, "to_bus": 2, "r_pu": 0.02, "x_pu": 0.1},
...                                {"line_id": "C", "from_bus": 2, "to_bus": 3, "r_pu": 0.02, "x_pu": 0.1}]))
>>> res = verify_n1(net, screen=False)
>>> res
N1Result(status=limits_broken, outages=4, breaking=1, islanded=1, failed=0)
>>> res.outcomes[["element_id", "outcome", "load_cut_mw"]].values.tolist()
[['A', 'secure', 0.0], ['B', 'secure', 0.0], ['C', 'islanded', 5.0], ['G1', 'not studied', 0.0]]
>>> round(float(res.outcomes.v_min_pu[0]), 4)
1.012
"""
from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import connected_components

from ..flow.jacobian import JacobianPattern
from ..flow.result import FlowStatus
from ..network.compile import PQ, PV, SLACK, Compiled, compile_network
from ..network.model import Network
from ..sweep.repeated import PointSolution, RepeatedFlow

EMERGENCY_BAND_PU = (0.90, 1.10)     # common practice for post-outage conditions
ELEMENT_KINDS = ("line", "transformer", "generator")


class N1Status(enum.Enum):
    """Outcome of an N-1 verification.

    ``SECURE``: every studied outage keeps every bus in its emergency band and every branch
    within its emergency rating, and no outage cuts load. ``LIMITS_BROKEN``: at least one outage
    breaks a limit, cuts load or has no load-flow solution. ``BASE_FAILED``: the base case
    itself has no solution, so no outage was studied.
    """
    SECURE = "secure"
    LIMITS_BROKEN = "limits_broken"
    BASE_FAILED = "base_failed"


@dataclass(frozen=True)
class Outage:
    """One element taken out: ``element`` is "line", "transformer" or "generator"."""
    element: str
    element_id: str

    def __str__(self):
        return f"{self.element} {self.element_id}"


@dataclass
class N1Result:
    """Result of :func:`verify_n1`.

    ``outcomes``: one row per outage (worst voltages, loading, load cut, how it was checked);
    ``violations``: one row per outage and limit broken (low voltage, high voltage, loading) at
    its worst bus or branch. ``base`` is the base-case solution.
    """
    success: bool
    status: N1Status
    message: str
    outcomes: pd.DataFrame
    violations: pd.DataFrame
    band: tuple
    base: PointSolution | None = field(default=None, repr=False)
    iterations: int = 0

    @property
    def count(self) -> int:
        """Number of outages that break at least one limit (load cut and failed flows count)."""
        return int((self.outcomes.outcome.isin(["breaks limits", "no solution"])
                    | (self.outcomes.load_cut_mw > 0)).sum())

    def worst(self, n: int = 10) -> pd.DataFrame:
        """The ``n`` worst violations, by excess over the limit (pu for voltage, % for loading
        divided by 100, so both are shares of their limit)."""
        v = self.violations
        if v.empty:
            return v
        share = np.where(v.limit_kind == "loading", v.excess / 100.0, v.excess)
        return v.assign(_s=share).sort_values(["_s", "element_id"], ascending=[False, True]) \
            .head(n).drop(columns="_s").reset_index(drop=True)

    def to_frames(self) -> dict:
        return {"n1_outcomes": self.outcomes.copy(), "n1_violations": self.violations.copy()}

    def __repr__(self):
        o = self.outcomes.outcome
        return (f"N1Result(status={self.status.value}, outages={len(o)}, breaking={self.count}, "
                f"islanded={int((o == 'islanded').sum())}, failed={int((o == 'no solution').sum())})")


def outage_list(net: Network, kinds=ELEMENT_KINDS, ids=None, min_kv: float = 0.0) -> list:
    """Outages to study, one per element in service.

    ``kinds`` picks element kinds; ``ids`` (optional) keeps only those element ids; ``min_kv``
    keeps branches whose lower-voltage end is at or above it and generators on buses at or
    above it (e.g. 33 for the 132 and 33 kV elements of a 132/33/11 kV area).

    >>> from planner.network.model import Network, make_table
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 132.0, "kind": "slack"},
    ...                                          {"bus": 2, "base_kv": 11.0, "kind": "PQ"}]),
    ...     transformers=make_table("transformers", [{"xfmr_id": "T1", "from_bus": 1, "to_bus": 2, "x_pu": 0.1}]))
    >>> [str(o) for o in outage_list(net)], outage_list(net, min_kv=33)
    (['transformer T1'], [])
    """
    kv = dict(zip(net.buses.bus.astype(int), net.buses.base_kv.astype(float)))
    wanted = None if ids is None else {str(i) for i in ids}
    out = []
    for kind, table, col in (("line", net.lines, "line_id"), ("transformer", net.transformers, "xfmr_id"),
                             ("generator", net.generators, "gen_id")):
        if kind not in kinds:
            continue
        t = table[table.energised.astype(bool)]
        for row in t.itertuples(index=False):
            eid = str(getattr(row, col))
            if wanted is not None and eid not in wanted:
                continue
            if kind == "generator":
                low = kv[int(row.bus)]
            else:
                low = min(kv[int(row.from_bus)], kv[int(row.to_bus)])
            if low + 1e-9 < min_kv:
                continue
            out.append(Outage(kind, eid))
    if wanted is not None:
        found = {o.element_id for o in out}
        missing = sorted(wanted - found)
        if missing:
            raise KeyError(f"outage: no element in service with id {missing[0]!r}")
    return out


def emergency_ratings(net: Network, c: Compiled) -> np.ndarray:
    """Emergency rating (MVA) of each compiled branch: ``rating_emergency_mva`` where given,
    else the normal rating (0 = no rating)."""
    ln = net.lines[net.lines.energised.astype(bool)]
    tr = net.transformers[net.transformers.energised.astype(bool)]
    em = np.concatenate([ln.rating_emergency_mva.to_numpy(float), tr.rating_emergency_mva.to_numpy(float)])
    return np.where(em > 0, em, c.rating)


def _bands(c: Compiled, band, bus_bands):
    lo = np.full(c.n, float(band[0]))
    hi = np.full(c.n, float(band[1]))
    for bus, (a, b) in (bus_bands or {}).items():
        k = c.index_of([int(bus)])[0]
        lo[k], hi[k] = float(a), float(b)
    return lo, hi


class _Screen:
    """One exact Newton step of a branch outage from the base point: base LU plus a Woodbury
    correction for the (at most four) Jacobian rows the branch touches."""

    def __init__(self, rf: RepeatedFlow, base: PointSolution, kind):
        c = rf.c
        self.rf, self.base = rf, base
        alive = c.alive
        pv = np.flatnonzero((kind == PV) & alive)
        pq = np.flatnonzero((kind == PQ) & alive)
        self.pvpq, self.pq = np.concatenate([pv, pq]), pq
        self.kind = kind
        self.pattern = JacobianPattern(rf.y0, self.pvpq, pq)
        self.dload = c.s_load_i + 2.0 * c.s_load_z * np.abs(base.v)
        self.j0 = self.pattern.matrix(base.v, self.dload)
        self.lu = spla.splu(self.j0.tocsc(), permc_spec="MMD_AT_PLUS_A", options=dict(SymmetricMode=True))
        na = len(self.pvpq)
        self.p_row = np.full(c.n, -1)
        self.p_row[self.pvpq] = np.arange(na)
        self.q_row = np.full(c.n, -1)
        self.q_row[pq] = na + np.arange(len(pq))
        self.q_fixed = np.where(base.at_limit > 0, c.q_max, np.where(base.at_limit < 0, c.q_min, 0.0))

    def _outage_system(self, k: int):
        """Admittance, residual function and Woodbury-corrected solver of branch ``k`` out, with
        the Jacobian held at the base point (the base LU plus a correction of rank <= 4)."""
        rf, c = self.rf, self.rf.c
        y = rf.y_with(branches_out=[k])
        s_spec = c.s_gen + 1j * self.q_fixed
        pvpq, pq = self.pvpq, self.pq

        def residual(v):
            vm = np.abs(v)
            mis = v * np.conj(y @ v) - (s_spec - (c.s_load_p + c.s_load_i * vm + c.s_load_z * vm * vm))
            return np.concatenate([mis.real[pvpq], mis.imag[pq]])

        pat = self.pattern
        saved = pat.y
        pat.y = y
        try:
            dj = (pat.matrix(self.base.v, self.dload) - self.j0).tocsr()
        finally:
            pat.y = saved
        rows = np.array([r for r in (self.p_row[c.f[k]], self.p_row[c.t[k]], self.q_row[c.f[k]],
                                     self.q_row[c.t[k]]) if r >= 0], dtype=np.int64)
        rows = np.unique(rows)
        lu = self.lu
        if len(rows):
            u = np.zeros((self.j0.shape[0], len(rows)))
            u[rows, np.arange(len(rows))] = 1.0
            w = lu.solve(u)
            d = dj[rows].toarray()
            small = np.linalg.inv(np.eye(len(rows)) + d @ w)

            def solve(F):
                z = lu.solve(F)
                return z - w @ (small @ (d @ z))
        else:
            solve = lu.solve
        return y, residual, solve

    def _step(self, v, dx):
        na = len(self.pvpq)
        vm, va = np.abs(v), np.angle(v)
        va[self.pvpq] -= dx[:na]
        vm[self.pq] -= dx[na:]
        return vm * np.exp(1j * va)

    def estimate(self, k: int) -> np.ndarray:
        """Voltages after one exact Newton step from the base point with branch ``k`` out."""
        _, residual, solve = self._outage_system(k)
        self._last = (k, residual, solve)
        return self._step(self.base.v, solve(residual(self.base.v)))

    def chord(self, k: int, v: np.ndarray, tol: float, max_iter: int = 12):
        """Continue from ``v`` with the Jacobian held at the base point (no new factorisation).

        Returns a converged :class:`PointSolution`, or None when the iteration is slow, a
        generator would pass a reactive limit, or anything looks off (the caller then runs a full
        Newton solve).
        """
        if getattr(self, "_last", (None,))[0] != k:
            self.estimate(k)
        _, residual, solve = self._last
        c = self.rf.c
        prev = np.inf
        for it in range(1, max_iter + 1):
            F = residual(v)
            norm = float(np.abs(F).max()) if F.size else 0.0
            if not np.isfinite(norm) or norm > 0.5 * prev:
                return None
            if norm <= tol:
                break
            prev = norm
            v = self._step(v, solve(F))
        else:
            return None
        y = self.rf.y_with(branches_out=[k])
        vm = np.abs(v)
        if vm[c.alive].min() < 0.5:
            return None
        q = (v * np.conj(y @ v)).imag + (c.s_load_p + c.s_load_i * vm + c.s_load_z * vm * vm).imag - c.s_gen.imag
        pv = (self.kind == PV) & c.alive
        if (pv & ((q > c.q_max + 1e-9) | (q < c.q_min - 1e-9))).any():
            return None
        held = self.base.at_limit != 0
        back = ((self.base.at_limit > 0) & (vm > c.v_set + 1e-9)) | ((self.base.at_limit < 0) & (vm < c.v_set - 1e-9))
        if (held & back).any():
            return None
        s_f, s_t = self.rf.branch_power(v, [k])
        return PointSolution(True, FlowStatus.CONVERGED, f"converged in {it} chord iterations", it, v, self.base.at_limit.copy(),
                             -1, float(norm * c.base_mva), float((s_f + s_t).real.sum() * c.base_mva))


def verify_n1(net: Network, outages=None, *, band=EMERGENCY_BAND_PU, bus_bands=None, ratings: bool = True,
              screen: bool = True, screen_margin_pu: float = 0.02, screen_margin_loading: float = 0.10,
              tol_mva: float | None = None, max_iter: int = 30, where: str | None = None,
              chunk_size: int = 200, progress=None, client=None) -> N1Result:
    """Solve the network with each outage in turn and check emergency limits.

    Parameters
    ----------
    net : Network
    outages : list of Outage, optional
        Default: :func:`outage_list` of every element in service.
    band : (low, high)
        Emergency voltage band, pu (default 0.90-1.10, common practice).
    bus_bands : dict, optional
        Per-bus band overrides ``{bus: (low, high)}``.
    ratings : bool
        Check branch loadings against emergency ratings (normal rating where none is given).
    screen : bool
        Estimate branch outages first and skip full AC where the estimate is clearly secure.
    screen_margin_pu, screen_margin_loading : float
        How far inside the band (pu) and below the rating (share) an estimate must be to skip AC.
    where, chunk_size, progress, client
        Run the outages as chunks of ``chunk_size`` through :func:`planner.sweep.engine.run_chunks`
        (``where`` = "serial", "local" or a Dask scheduler address); default: in this process
        without chunking. Every choice gives the same numbers.

    See the module docstring for an example and the modelling choices.
    """
    outages = outage_list(net) if outages is None else list(outages)
    options = dict(band=band, bus_bands=bus_bands, ratings=ratings, screen=screen,
                   screen_margin_pu=screen_margin_pu, screen_margin_loading=screen_margin_loading,
                   tol_mva=tol_mva, max_iter=max_iter)
    ctx = _Context(net, **options)
    base = ctx.base
    if not base.success:
        msg = f"base case has no load-flow solution: {base.message}; worst bus {base.worst_bus} " \
              f"mismatch {base.worst_mismatch_mva:.4g} MVA"
        return N1Result(False, N1Status.BASE_FAILED, msg, _outcome_frame([]), _violation_frame([]),
                        tuple(band), base)
    for o in outages:
        ctx.check_known(o)
    if where is None and client is None:
        rows, viol = ctx.run(outages)
    else:
        from ..sweep.engine import chunked, run_chunks
        parts = run_chunks(_n1_chunk, chunked(outages, chunk_size), shared={"net": net, "options": options},
                           where=where or "local", progress=progress, client=client)
        rows = [r for p in parts for r in p[0]]
        viol = [v for p in parts for v in p[1]]
    outcomes = _outcome_frame(rows)
    violations = _violation_frame(viol)
    res = N1Result(True, N1Status.SECURE, "", outcomes, violations, tuple(band), base,
                   int(outcomes.iterations.sum()))
    if res.count:
        res.status = N1Status.LIMITS_BROKEN
    res.message = (f"{len(outcomes)} outages studied, {res.count} break a limit "
                   f"({int((outcomes.outcome == 'islanded').sum())} cut load, "
                   f"{int((outcomes.outcome == 'no solution').sum())} without a solution, "
                   f"{int((outcomes.checked_by == 'estimate').sum())} cleared by the estimate)")
    return res


def _n1_chunk(shared, outages):
    """One chunk of outages on a worker; the context is built once per worker and kept."""
    ctx = shared.get("_ctx")
    if ctx is None:
        ctx = shared["_ctx"] = _Context(shared["net"], **shared["options"])
    return ctx.run(outages)


class _Context:
    """Everything the outages of one network share: compiled arrays, base solution, limits."""

    def __init__(self, net, *, band, bus_bands, ratings, screen, screen_margin_pu, screen_margin_loading,
                 tol_mva, max_iter):
        self.net = net
        c = self.c = compile_network(net)
        self.rf = RepeatedFlow(c, tol_mva=tol_mva, max_iter=max_iter)
        self.base = self.rf.solve()
        self.lo, self.hi = _bands(c, band, bus_bands)
        self.rate = emergency_ratings(net, c) if ratings else np.zeros(len(c.f))
        self.margins = (screen_margin_pu, screen_margin_loading)
        self.tol_mva, self.max_iter = tol_mva, max_iter
        self.branch_index = {(str(e), str(b)): i for i, (e, b) in enumerate(zip(c.branch_element, c.branch_ids))}
        self.load_mw = (c.s_load_p + c.s_load_i + c.s_load_z).real * c.base_mva
        self.screener = None
        if screen and self.base.success:
            self.screener = _Screen(self.rf, self.base, np.where(self.base.at_limit != 0, PQ, c.kind))

    def check_known(self, o):
        if o.element != "generator" and (o.element, o.element_id) not in self.branch_index:
            raise KeyError(f"outage: no {o.element} in service with id {o.element_id!r}")

    def run(self, outages):
        rows, viol = [], []
        for o in outages:
            row, broken = self.one(o)
            rows.append(row)
            viol.extend(broken)
        return rows, viol

    def one(self, o):
        c, rf, base = self.c, self.rf, self.base
        lo, hi, rate = self.lo, self.hi, self.rate
        row = dict(element=o.element, element_id=o.element_id, outcome="secure", checked_by="AC", iterations=0,
                   v_min_pu=np.nan, v_min_bus=-1, v_max_pu=np.nan, v_max_bus=-1, loading_max_pct=np.nan,
                   loading_max_branch="", load_cut_mw=0.0, buses_cut="", worst_bus=-1, mismatch_mva=0.0,
                   message="")
        if o.element == "generator":
            sol, alive, out_k, rf_used = _generator_outage(self.net, c, o, base, row, self.tol_mva, self.max_iter)
            if sol is None:
                return row, []
        else:
            self.check_known(o)
            k = self.branch_index[(o.element, o.element_id)]
            out_k = [k]
            rf_used = rf
            alive = _alive_without(c, None, k)
            cut = c.alive & ~alive
            if cut.any():
                row["outcome"] = "islanded"
                row["load_cut_mw"] = float(self.load_mw[cut].sum())
                row["buses_cut"] = " ".join(str(b) for b in c.bus_ids[cut])
            start = base
            if self.screener is not None and not cut.any():
                v_est = self.screener.estimate(k)
                # the estimate is Newton's first step: a full solve continues from it
                start = PointSolution(True, FlowStatus.CONVERGED, "", 0, v_est, base.at_limit, -1, 0.0, 0.0)
                if _clearly_inside(rf, v_est, k, alive, lo, hi, rate, *self.margins, self.screener):
                    row["checked_by"] = "estimate"
                    row["iterations"] = 1
                    _fill_extremes(row, c, rf, v_est, out_k, alive, rate)
                    row.pop("_vm", None), row.pop("_alive", None)
                    return row, []
            sol = None
            if start is not base:
                # chord iterations on the corrected base LU; a full Newton solve if they stall
                sol = self.screener.chord(k, start.v, rf.tol)
            if sol is None:
                sol = rf.solve(branches_out=out_k, alive=alive, start=start)
            if start is not base and sol.message.find("chord") < 0:
                sol.iterations += 1       # the step taken by the estimate
                if not sol.success:       # a poor estimate: start again from the base case
                    sol = rf.solve(branches_out=out_k, alive=alive, start=base)
        row["iterations"] = sol.iterations
        if not sol.success:
            row.update(outcome="no solution", worst_bus=sol.worst_bus, mismatch_mva=sol.worst_mismatch_mva,
                       message=sol.message)
            return row, []
        _fill_extremes(row, rf_used.c, rf_used, sol.v, out_k, alive, rate)
        broken = _violations(o, row, c.bus_ids, lo, hi)
        if broken and row["outcome"] == "secure":
            row["outcome"] = "breaks limits"
        return row, broken


def _alive_without(c: Compiled, adj, k):
    keep = np.ones(len(c.f), bool)
    keep[k] = False          # parallel branches keep the others
    a = sp.csr_matrix((np.ones(int(keep.sum())), (c.f[keep], c.t[keep])), shape=(c.n, c.n))
    _, comp = connected_components(a, directed=False)
    has_slack = np.bincount(comp, (c.kind == SLACK) & c.alive) > 0
    return has_slack[comp] & c.alive


def _generator_outage(net, c, o, base, row, tol_mva, max_iter):
    g = net.generators
    mask = (g.gen_id.astype(str) == o.element_id) & g.energised.astype(bool)
    if not mask.any():
        raise KeyError(f"outage: no generator in service with id {o.element_id!r}")
    bus = int(g.loc[mask, "bus"].iloc[0])
    if c.kind[c.index_of([bus])[0]] == SLACK:
        row.update(outcome="not studied", checked_by="",
                   message="generator at the slack bus, which stands for the wider grid")
        return None, None, None, None
    net2 = net.copy()
    net2.generators.loc[mask, "energised"] = False
    c2 = compile_network(net2)
    rf2 = RepeatedFlow(c2, tol_mva=tol_mva, max_iter=max_iter)
    sol = rf2.solve(start=base.v)
    return sol, c2.alive, [], rf2


def _fill_extremes(row, c, rf, v, out_k, alive, rate):
    vm = np.abs(v)
    live = np.flatnonzero(alive)
    if len(live):
        a, b = live[np.argmin(vm[live])], live[np.argmax(vm[live])]
        row.update(v_min_pu=float(vm[a]), v_min_bus=int(c.bus_ids[a]), v_max_pu=float(vm[b]),
                   v_max_bus=int(c.bus_ids[b]))
        row["_vm"] = vm
        row["_alive"] = alive
    s_f, s_t = rf.branch_power(v, out_k)
    s = np.maximum(np.abs(s_f), np.abs(s_t)) * c.base_mva
    rated = rate > 0
    if rated.any():
        pct = np.where(rated, 100.0 * s / np.where(rated, rate, 1.0), -np.inf)
        k = int(np.argmax(pct))
        row.update(loading_max_pct=float(pct[k]), loading_max_branch=str(c.branch_ids[k]))


def _clearly_inside(rf, v, k, alive, lo, hi, rate, margin_pu, margin_loading, screener) -> bool:
    vm = np.abs(v)
    live = alive
    if not np.all(np.isfinite(vm)):
        return False
    # a generator pushed past a reactive limit would lose voltage control: not for an estimate
    c = rf.c
    y = rf.y_with(branches_out=[k])
    q = (v * np.conj(y @ v)).imag + (c.s_load_p + c.s_load_i * vm + c.s_load_z * vm * vm).imag
    pv = (screener.kind == PV) & alive
    if (pv & ((q > c.q_max) | (q < c.q_min))).any():
        return False
    if (vm[live] < lo[live] + margin_pu).any() or (vm[live] > hi[live] - margin_pu).any():
        return False
    if (rate > 0).any():
        s_f, s_t = rf.branch_power(v, [k])
        s = np.maximum(np.abs(s_f), np.abs(s_t)) * rf.c.base_mva
        if (s[rate > 0] > (1.0 - margin_loading) * rate[rate > 0]).any():
            return False
    return True


def _violations(o, row, bus_ids, lo, hi) -> list:
    out = []
    vm, alive = row.pop("_vm", None), row.pop("_alive", None)
    if vm is None:
        return out
    live = np.flatnonzero(alive)
    below = live[vm[live] < lo[live] - 1e-9]
    above = live[vm[live] > hi[live] + 1e-9]
    # worst by excess over its own limit (bands may differ per bus)
    if len(below):
        k = below[np.argmax(lo[below] - vm[below])]
        out.append(dict(element=o.element, element_id=o.element_id, limit_kind="low voltage",
                        where=str(bus_ids[k]), value=float(vm[k]),
                        limit=float(lo[k]), excess=float(lo[k] - vm[k])))
    if len(above):
        k = above[np.argmax(vm[above] - hi[above])]
        out.append(dict(element=o.element, element_id=o.element_id, limit_kind="high voltage",
                        where=str(bus_ids[k]), value=float(vm[k]), limit=float(hi[k]),
                        excess=float(vm[k] - hi[k])))
    if np.isfinite(row["loading_max_pct"]) and row["loading_max_pct"] > 100.0 + 1e-9:
        out.append(dict(element=o.element, element_id=o.element_id, limit_kind="loading",
                        where=row["loading_max_branch"], value=row["loading_max_pct"], limit=100.0,
                        excess=row["loading_max_pct"] - 100.0))
    return out


_OUTCOME_COLUMNS = ["element", "element_id", "outcome", "checked_by", "iterations", "v_min_pu", "v_min_bus",
                    "v_max_pu", "v_max_bus", "loading_max_pct", "loading_max_branch", "load_cut_mw", "buses_cut",
                    "worst_bus", "mismatch_mva", "message"]
_VIOLATION_COLUMNS = ["element", "element_id", "limit_kind", "where", "value", "limit", "excess"]


def _outcome_frame(rows) -> pd.DataFrame:
    return pd.DataFrame([{k: r[k] for k in _OUTCOME_COLUMNS} for r in rows], columns=_OUTCOME_COLUMNS)


def _violation_frame(rows) -> pd.DataFrame:
    return pd.DataFrame([{k: r[k] for k in _VIOLATION_COLUMNS} for r in rows], columns=_VIOLATION_COLUMNS)


def compare_n1(before: N1Result, after: N1Result) -> pd.DataFrame:
    """Limits broken before and after a plan, matched by outage and limit kind.

    ``change`` is "cured" (broken before, not after), "created" (broken after only) or
    "remains"; values are the worst value before and after (NaN where not broken).
    """
    key = ["element", "element_id", "limit_kind"]
    b = before.violations[key + ["where", "value", "limit"]].rename(
        columns={"where": "where_before", "value": "value_before"})
    a = after.violations[key + ["where", "value", "limit"]].rename(
        columns={"where": "where_after", "value": "value_after", "limit": "limit_after"})
    m = b.merge(a, on=key, how="outer", indicator=True)
    m["limit"] = m["limit"].fillna(m.pop("limit_after"))
    m["change"] = m.pop("_merge").map({"left_only": "cured", "right_only": "created", "both": "remains"}) \
        .astype(str)
    cols = key + ["change", "where_before", "value_before", "where_after", "value_after", "limit"]
    return m[cols].sort_values(["change", "element", "element_id", "limit_kind"]).reset_index(drop=True)
