"""N-1 security as a constraint of the optimiser: post-outage voltage rows added in rounds.

:func:`plan_secure` (also reached by ``plan(..., security=SecurityRequest(...))``) works in
rounds:

1. optimise as usual (round 0: no outage rows);
2. prove the plan under every outage of the set at every level with the independent N-1
   verification (:func:`~planner.contingency.n1.verify_n1`, full AC Newton-Raphson);
3. if some outage still takes a bus outside its emergency band, the worst of those outages not
   yet tracked (by excess, then level, element and id: a stable order) join the tracked set, and
   the plan is made again. For every tracked outage the optimiser now solves the post-outage AC
   load flow at each point it considers, linearises the post-outage bus voltages to the levers
   (``v_post = v_post0 + S_post du`` from the post-outage Jacobian: bank susceptance, generator
   setpoints and transformer ratios) and holds them inside the emergency band in every MILP
   step; the AC check of every step counts post-outage breaches of the tracked outages with the
   same penalty as the normal limits, so a step that cures them is accepted;
4. stop when the N-1 verification finds no voltage breach, when no new outage can be added
   (then the levers cannot cure what remains: the result says so, never "secure"), or after
   ``max_rounds`` rounds.

The result is the last round's :class:`~planner.optimize.results.PlanResult`, with a
:class:`SecurityResult` in its ``security`` field: the status, the rounds, the outages that drove
rows (and in which round) and the breaches that remain.

Only voltages are constrained: banks, setpoints and taps hardly move branch loadings, so an
emergency-rating breach, load cut off by an islanding outage or an outage without a load-flow
solution is reported, not optimised (status ``VOLTAGES_SECURE`` or ``NOT_SECURE``).
"""
from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp

from ..flow.jacobian import JacobianPattern, bus_derivatives, factorize
from ..network.compile import PQ, SLACK, replace
from .n1 import EMERGENCY_BAND_PU, Outage, _alive_without, _bands, outage_list, verify_n1

CAUTION = ("N-1 security here means: under each studied outage, the AC load flow keeps every bus in "
           "the stated emergency band (common practice: 0.90-1.10 pu). It is a planning-grade screen, "
           "not a protection, stability or switching study; confirm it against local codes and "
           "licensed engineering practice before relying on it.")
NEAR_BAND_PU = 0.03       # buses this close to the emergency band (or beyond it) get a row
MAX_ROWS_PER_OUTAGE = 40  # rows per outage and level, nearest to the band first
MARGIN_STEP_PU = 5e-4     # a row moves inside the band by the AC breach plus this
MARGIN_CAP_PU = 0.02


class SecurityStatus(enum.Enum):
    """Outcome of an N-1-secured plan.

    ``SECURE``: the independent N-1 verification finds no broken limit under any outage of the
    set at any level (voltages, emergency ratings, no load cut, every outage solved).
    ``VOLTAGES_SECURE``: no bus leaves its emergency band under any outage, but an outage still
    overloads a branch, cuts load or has no load-flow solution (the levers do not act on those).
    ``NOT_SECURE``: voltage breaches remain after the rounds allowed, or no further outage row
    could be added: the levers cannot cure them (see ``remaining``).
    """
    SECURE = "secure"
    VOLTAGES_SECURE = "voltages secure"
    NOT_SECURE = "not secure"


@dataclass
class SecurityRequest:
    """Ask :func:`planner.optimize.engine.plan` for an N-1-secure plan.

    ``outages``: list of :class:`~planner.contingency.n1.Outage` (default: every line,
    transformer and generator in service). ``band`` / ``bus_bands``: the emergency band and
    per-bus overrides. ``max_rounds``: rounds of rows after the first plan; ``per_round``:
    outages added per round. ``ratings``: the N-1 proof also checks emergency ratings.
    ``where``: where the N-1 proof runs (``None``: this process; else as
    :func:`planner.sweep.engine.run_chunks`). ``levels``: level names to secure and prove
    (default every level). ``watch_pu``: outages whose worst post-outage voltage is inside the
    band by less than this also join the tracked set (after the breaching ones), so the next
    plan does not push them over; 0 tracks breaching outages only.
    """
    outages: list | None = None
    levels: list | None = None
    band: tuple = EMERGENCY_BAND_PU
    bus_bands: dict = field(default_factory=dict)
    max_rounds: int = 4
    per_round: int = 4
    ratings: bool = True
    where: str | None = None
    chunk_size: int = 200
    watch_pu: float = 0.0


@dataclass
class SecurityResult:
    """What the rounds did and what the N-1 proof of the final plan found."""
    success: bool
    status: SecurityStatus
    message: str
    rounds: int                   # rounds with outage rows (0: the first plan was already secure)
    tracked: pd.DataFrame         # element, element_id, round: the outages whose rows were added
    remaining: pd.DataFrame       # level + the N-1 violation columns, of the final plan
    checks: dict = field(repr=False, default_factory=dict)    # level -> N1Result of the final plan
    history: list = field(default_factory=list)               # per round: voltage breaches found
    caution: str = CAUTION

    @property
    def secure(self) -> bool:
        return self.status is SecurityStatus.SECURE

    def to_frames(self) -> dict:
        return {"n1_tracked": self.tracked.copy(), "n1_remaining": self.remaining.copy()}

    def to_dict(self) -> dict:
        return {"status": self.status.value, "message": self.message, "rounds": self.rounds,
                "tracked": self.tracked.to_dict("records"), "remaining": self.remaining.to_dict("records"),
                "history": list(self.history), "caution": self.caution}

    def __repr__(self):
        return (f"SecurityResult(status={self.status.value}, rounds={self.rounds}, tracked={len(self.tracked)}, "
                f"remaining={len(self.remaining)})")


# --- the rows -------------------------------------------------------------------------------

class PostOutageRows:
    """Side constraint of the optimiser for a set of tracked outages (see module docstring).

    The optimiser calls :meth:`rows` when it builds a step at settings ``st`` (one list of
    ``(x0, slopes, lo, hi)`` per level, added like its own voltage rows) and :meth:`violations`
    in every AC check. Post-outage solutions are kept for the last settings seen, so the two
    calls at one point solve each outage once.
    """

    def __init__(self, levels, outages, band=EMERGENCY_BAND_PU, bus_bands=None, only=None):
        self.outages = list(outages)
        self.only = None if only is None else set(only)      # level names with rows (None: all)
        self.band, self.bus_bands = tuple(band), dict(bus_bands or {})
        self._variants = {}     # (level, outage) -> (compiled base of the outage, branches out, alive)
        self._solved = {}       # (level, outage) -> (settings key, PointSolution-like tuple)
        self._margin = {}       # (level, outage) -> (lo, hi) margins per bus
        self._levels = levels

    # the outage network at level l, levers as in pb.compiled[l]
    def _variant(self, pb, l, o: Outage):
        key = (l, o)
        hit = self._variants.get(key)
        if hit is None:
            c = pb.compiled[l]
            if o.element == "generator":
                from ..network.compile import compile_network
                net = self._levels[l].network.copy()
                g = net.generators
                mask = (g.gen_id.astype(str) == o.element_id) & g.energised.astype(bool)
                net.generators.loc[mask, "energised"] = False
                hit = (compile_network(net), [], None)
            else:
                k = int(np.flatnonzero((c.branch_element == o.element) & (c.branch_ids.astype(str) == o.element_id))[0])
                hit = (c, [k], _alive_without(c, None, k))
            self._variants[key] = hit
        return hit

    def _solve(self, pb, l, st, fr, o):
        from ..sweep.repeated import RepeatedFlow
        skey = (l, o)
        stk = st.key()
        hit = self._solved.get(skey)
        if hit is not None and hit[0] == stk:
            return hit[1]
        c_out, br, alive = self._variant(pb, l, o)
        cl = pb.compiled_for(l, st)
        base = pb.compiled[l]
        c = replace(c_out, ysh=c_out.ysh + (cl.ysh - base.ysh),
                    v_set=np.where(c_out.kind != PQ, cl.v_set, c_out.v_set), ratio=cl.ratio)
        rf = RepeatedFlow(c)
        prev = hit[1] if hit is not None else None
        start = prev[1] if prev is not None and prev[1] is not None else fr.v
        sol = rf.solve(branches_out=br, alive=alive, start=start)
        if not sol.success and start is not fr.v:
            sol = rf.solve(branches_out=br, alive=alive, start=fr.v)
        out = (rf, sol if sol.success else None, br, c.alive if alive is None else alive)
        self._solved[skey] = (stk, out)
        return out

    def _limits(self, c, l, o):
        lo, hi = _bands(c, self.band, self.bus_bands)
        m = self._margin.get((l, o))
        return lo, hi, m

    def violations(self, pb, l, st, fr):
        """Post-outage voltage breaches of the tracked outages at level ``l`` (AC), as the
        optimiser's ``Violation`` rows, and their sum in pu."""
        from ..optimize.results import Violation
        out, total = [], 0.0
        level = pb.levels[l].name
        for o in (self.outages if self.only is None or level in self.only else ()):
            rf, sol, br, alive = self._solve(pb, l, st, fr, o)
            c = rf.c
            if sol is None:
                out.append(Violation(level, "post-outage voltage", f"{o} out: no load-flow solution",
                                     np.nan, np.nan, 1.0))
                total += 1.0
                continue
            lo, hi, _ = self._limits(c, l, o)
            vm = np.abs(sol.v)
            below = alive & (vm < lo - 1e-6)
            above = alive & (vm > hi + 1e-6)
            total += float(np.sum((lo - vm)[below]) + np.sum((vm - hi)[above]))
            for i in np.flatnonzero(below):
                out.append(Violation(level, "post-outage voltage", f"bus {c.bus_ids[i]} ({o} out)",
                                     float(vm[i]), float(lo[i]), float(lo[i] - vm[i])))
            for i in np.flatnonzero(above):
                out.append(Violation(level, "post-outage voltage", f"bus {c.bus_ids[i]} ({o} out)",
                                     float(vm[i]), float(hi[i]), float(vm[i] - hi[i])))
            # a linear row on the limit can land just past it in AC: aim that bus further inside
            mlo, mhi = self._margin.setdefault((l, o), (np.zeros(c.n), np.zeros(c.n)))
            mlo[below] = np.minimum(mlo[below] + (lo - vm)[below] + MARGIN_STEP_PU, MARGIN_CAP_PU)
            mhi[above] = np.minimum(mhi[above] + (vm - hi)[above] + MARGIN_STEP_PU, MARGIN_CAP_PU)
        return out, total

    def rows(self, pb, l, st, fr):
        """Linear post-outage voltage rows ``lo <= v0 + slopes du <= hi`` at level ``l``."""
        out = []
        if self.only is not None and pb.levels[l].name not in self.only:
            return out
        for o in self.outages:
            rf, sol, br, alive = self._solve(pb, l, st, fr, o)
            if sol is None:
                continue
            c = rf.c
            lo, hi, m = self._limits(c, l, o)
            if m is not None:
                lo, hi = lo + m[0], hi - m[1]
            vm = np.abs(sol.v)
            held = (c.kind != PQ) & (sol.at_limit == 0)       # buses whose voltage a generator holds
            dist = np.minimum(vm - lo, hi - vm)
            cand = np.flatnonzero(alive & ~held & (dist < NEAR_BAND_PU))
            if not len(cand):
                continue
            cand = cand[np.argsort(dist[cand], kind="stable")][:MAX_ROWS_PER_OUTAGE]
            cand.sort()
            slopes = post_outage_slopes(pb, rf, sol, br, alive)[cand]
            raw_lo, raw_hi = _bands(c, self.band, self.bus_bands)
            v0 = vm[cand]
            # never exclude the present point where it is inside the band itself (as the normal rows)
            lo_r = np.where(v0 >= raw_lo[cand], np.minimum(lo[cand], v0), lo[cand])
            hi_r = np.where(v0 <= raw_hi[cand], np.maximum(hi[cand], v0), hi[cand])
            out.append((v0, slopes, lo_r, hi_r))
        return out


def post_outage_slopes(pb, rf, sol, branches_out, alive) -> np.ndarray:
    """d|V| / d(lever) at a post-outage solution, one column per optimiser lever (sites,
    existing banks, setpoints, tap groups), from the post-outage Jacobian.

    Generators held at a reactive limit are PQ here (they do not hold their voltage), so their
    setpoint columns are zero; so are the columns of a tap whose transformer is the outage.
    """
    c = rf.c
    y = rf.y_with(branches_out=branches_out)
    v = sol.v
    vm = np.abs(v)
    n = c.n
    kind = np.where(sol.at_limit != 0, PQ, c.kind)
    controlled = (kind != PQ) & alive
    pvpq = np.flatnonzero((kind != SLACK) & alive)
    pq = np.flatnonzero((kind == PQ) & alive)
    pat = JacobianPattern(y, pvpq, pq)
    dload = c.s_load_i + 2.0 * c.s_load_z * vm
    shunt = np.concatenate([pb.site_bus, pb.exist_bus]).astype(np.int64)
    vset = np.asarray(pb.vset_bus, np.int64)
    taps = np.asarray(pb.tap_all, np.int64)
    ms, mv, mt = len(shunt), len(vset), len(taps)
    ds = np.zeros((n, ms + mv + mt), complex)
    ds[shunt, np.arange(ms)] += -1j * vm[shunt] ** 2
    d_va, d_vm = bus_derivatives(y, v, pat.diag_pos, pat.rows, dload)
    held = controlled[vset]
    if mv:
        dS_dVm = sp.csr_matrix((d_vm, y.indices, y.indptr), shape=(n, n))
        ds[:, ms:ms + mv] = dS_dVm[:, vset].toarray() * held[None, :]
    if mt:
        from ..optimize.sensitivity import ratio_injection_derivative
        ds[:, ms + mv:] = ratio_injection_derivative(c, v, taps)
        ds[:, ms + mv + np.flatnonzero(np.isin(taps, branches_out))] = 0.0
    dvm = np.zeros((n, ds.shape[1]))
    if pat.size:
        rhs = np.vstack([ds.real[pvpq], ds.imag[pq]])
        dx = -factorize(pat.matrix(v, dload)).solve(rhs)
        dvm[pq] = dx[len(pvpq):]
    dvm[vset[held], ms + np.flatnonzero(held)] = 1.0
    if mt:      # one column per tap lever (a parallel group moves together)
        dvm = np.concatenate([dvm[:, :ms + mv], dvm[:, ms + mv:] @ pb.tap_sum], axis=1)
    return dvm


# --- the rounds -----------------------------------------------------------------------------

def _voltage_breaches(checks: dict, names) -> list:
    """(excess, level index, element, element_id) of every outage whose post-outage voltages
    leave the band, worst first in a stable order."""
    out = []
    for li, n in enumerate(names):
        v = checks[n].violations
        v = v[v.limit_kind.isin(["low voltage", "high voltage"])]
        for r in v.itertuples(index=False):
            out.append((float(r.excess), li, str(r.element), str(r.element_id)))
    out.sort(key=lambda t: (-round(t[0], 9), t[1], t[2], t[3]))
    return out


def _near_band(checks: dict, names, band, watch_pu, held) -> list:
    """(closeness, level index, element, element_id) of solved outages whose worst voltage is
    inside the (global) band by less than ``watch_pu``, closest first in a stable order. Buses
    a generator holds (``held``) do not count: the rows leave them to their setpoints."""
    out = []
    if watch_pu <= 0:
        return out
    for li, n in enumerate(names):
        oc = checks[n].outcomes
        for r in oc.itertuples(index=False):
            if r.outcome != "secure" or not np.isfinite(r.v_min_pu):
                continue
            gaps = [g for g, bus in ((r.v_min_pu - band[0], r.v_min_bus), (band[1] - r.v_max_pu, r.v_max_bus))
                    if int(bus) not in held]
            if not gaps:
                continue
            gap = min(gaps)
            if 0 <= gap < watch_pu:
                out.append((float(gap), li, str(r.element), str(r.element_id)))
    out.sort(key=lambda t: (round(t[0], 9), t[1], t[2], t[3]))
    return out


def plan_secure(levels, levers=None, limits=None, objective=None, options=None,
                security: SecurityRequest | None = None, progress=None):
    """An N-1-secure plan (see module docstring); returns a PlanResult whose ``security``
    field is a :class:`SecurityResult`."""
    from ..optimize.engine import LevelCase, plan
    from ..proof.run import plan_network
    security = security or SecurityRequest()
    levels = list(levels) if isinstance(levels, (list, tuple)) else [LevelCase("base", levels)]
    names = [lc.name for lc in levels if security.levels is None or lc.name in security.levels]
    net0 = levels[0].network
    outages = outage_list(net0) if security.outages is None else list(security.outages)
    by_key = {(o.element, o.element_id): o for o in outages}
    tracked, added_in, history = [], {}, []
    rnd = 0
    while True:
        side = [PostOutageRows(levels, tracked, security.band, security.bus_bands, names)] if tracked else []
        res = plan(levels, levers, limits, objective, options, progress=progress, side_constraints=side)
        checks = {lc.name: verify_n1(plan_network(lc.network, res, lc.name), outages, band=security.band,
                                     bus_bands=security.bus_bands, ratings=security.ratings,
                                     where=security.where, chunk_size=security.chunk_size)
                  for lc in levels if lc.name in names}
        breaches = _voltage_breaches(checks, names)
        history.append({"round": rnd, "voltage_breaches": len(breaches),
                        "worst_pu": breaches[0][0] if breaches else 0.0, "plan_status": res.status.value})
        if not breaches or rnd >= security.max_rounds:
            break
        new = []
        held = set(net0.buses.bus[net0.buses.kind.astype(str) != "PQ"].astype(int))
        for _, _, el, eid in breaches + _near_band(checks, names, security.band, security.watch_pu, held):
            o = by_key[(el, eid)]
            if o not in tracked and o not in new:
                new.append(o)
        if not new:
            break
        new = new[:max(1, int(security.per_round))]
        rnd += 1
        for o in new:
            added_in[o] = rnd
        tracked = tracked + new
    res.security = _security_result(checks, names, tracked, added_in, rnd, history, breaches)
    return res


def _security_result(checks, names, tracked, added_in, rounds, history, breaches) -> SecurityResult:
    remaining = pd.concat([checks[n].violations.assign(level=n) for n in names], ignore_index=True)
    remaining = remaining[["level"] + [c for c in remaining.columns if c != "level"]]
    tr = pd.DataFrame([{"element": o.element, "element_id": o.element_id, "round": added_in[o]} for o in tracked],
                      columns=["element", "element_id", "round"])
    other = sum(checks[n].count for n in names)
    if not breaches and all(checks[n].status.value == "secure" for n in names):
        status = SecurityStatus.SECURE
        msg = "N-1 secure: every outage of the set keeps every limit at every level (AC-proved)"
    elif not breaches:
        status = SecurityStatus.VOLTAGES_SECURE
        msg = ("post-outage voltages inside the emergency band under every outage, but "
               f"{other} outage/level case(s) still overload a branch, cut load or have no solution")
    else:
        status = SecurityStatus.NOT_SECURE
        worst = breaches[0]
        msg = (f"not N-1 secure: {len(breaches)} post-outage voltage breach(es) remain after {rounds} round(s); "
               f"worst {worst[0]:.4f} pu with {worst[2]} {worst[3]} out at level {names[worst[1]]}")
    if tracked:
        msg += f"; rows from {len(tracked)} outage(s): " + ", ".join(str(o) for o in tracked)
    return SecurityResult(status is not SecurityStatus.NOT_SECURE, status, msg, rounds, tr, remaining,
                          checks, history)
