"""The final search: moves screened by the linear model, the best few checked by AC load flow.

After the MILP loop stops, whole-unit levers may still sit one move from a better plan that
the trust region did not reach (a bank better at a bus three branches away, one unit more
here and one less there). The search lists moves of every kind -- a unit more or less at a
used site, a site's bank moved to any other candidate bus (same units, one more or one
fewer), a site dropped, a new site opened where the site limit allows, a switched unit's
step at one level, an existing bank's step, a tap step at one level or at all levels --
ranks them all with the linear model built at the present point (losses, capital, penalised
limit rows), and AC-checks them best first, a few at a time. The best AC-checked improvement
of a batch is taken and the model is rebuilt there; the search stops when a batch holds no
improvement and the model sees none further down the list, or when its load-flow budget is
spent. Ties keep the order of the list, so a search is the same on every run.
"""
from __future__ import annotations

import numpy as np

from .ac_check import evaluate
from .problem import Evaluation, PlanProblem, Settings
from .results import StepRecord


def candidate_moves(pb: PlanProblem, st: Settings):
    """Every move the search considers from ``st``, in a fixed order (settings, one per move)."""
    L, S = st.steps.shape
    sites = pb.sites
    used = np.flatnonzero(st.fixed + st.switched > 0)
    n_used = len(used)
    cap = pb.levers.max_new_sites
    for s in used:
        site = sites[s]
        if site.continuous:
            continue
        for dlt in (-1, 1):
            if "fixed" in site.kinds or st.fixed[s]:
                n = st.copy()
                n.fixed[s] += dlt
                if 0 <= n.fixed[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    yield n
            if st.switched[s] or "switched" in site.kinds:
                n = st.copy()
                n.switched[s] += dlt
                if 0 <= n.switched[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    # a unit added comes in service at every level; step moves can then turn it off
                    n.steps[:, s] = np.minimum(n.steps[:, s] + max(dlt, 0), n.switched[s])
                    yield n
            for l in range(L):
                if st.switched[s]:
                    n = st.copy()
                    n.steps[l, s] += dlt
                    if 0 <= n.steps[l, s] <= n.switched[s]:
                        yield n
        if L > 1 and st.fixed[s] >= 1 and "switched" in site.kinds:
            # a fixed unit made switched and turned off at one level: alone, each half of
            # this move only costs (more capital, or a unit off where the plan wants it on)
            for l in range(L):
                n = st.copy()
                n.fixed[s] -= 1
                n.switched[s] += 1
                n.steps[:, s] += 1
                n.steps[l, s] -= 1
                yield n
        if st.switched[s] and st.steps[:, s].min() >= 1 and "fixed" in site.kinds:
            # a switched unit in service at every level made fixed: the same losses for less
            n = st.copy()
            n.fixed[s] += 1
            n.switched[s] -= 1
            n.steps[:, s] -= 1
            yield n
        # the site dropped
        n = st.copy()
        n.fixed[s] = n.switched[s] = 0
        n.steps[:, s] = 0
        yield n
        # the whole bank moved to any other free candidate bus, same units or one more / fewer
        for t in range(S):
            other = sites[t]
            if (t == s or st.fixed[t] + st.switched[t] or other.continuous
                    or (st.fixed[s] and "fixed" not in other.kinds)
                    or (st.switched[s] and "switched" not in other.kinds)):
                continue
            for extra in (0, -1, 1):
                fixed = st.fixed[s] + (extra if st.fixed[s] else 0)
                switched = st.switched[s] + (extra if not st.fixed[s] else 0)
                if fixed < 0 or switched < 0 or fixed + switched == 0 or fixed + switched > other.max_units:
                    continue
                if extra and other.unit_mvar != site.unit_mvar:
                    continue
                n = st.copy()
                n.fixed[t], n.switched[t] = fixed, switched
                n.steps[:, t] = np.minimum(st.steps[:, s], switched)
                n.fixed[s], n.switched[s], n.steps[:, s] = 0, 0, 0
                yield n
    # a new site, where the site limit allows
    if cap is None or n_used < cap:
        for t in range(S):
            site = sites[t]
            if st.fixed[t] + st.switched[t] or site.continuous:
                continue
            for u in range(1, site.max_units + 1):
                n = st.copy()
                if "fixed" in site.kinds:
                    n.fixed[t] = u
                else:
                    n.switched[t] = u
                    n.steps[:, t] = u
                yield n
    for e in range(st.exist.shape[1]):
        for l in range(L):
            for dlt in (-1, 1):
                n = st.copy()
                n.exist[l, e] += dlt
                if 0 <= n.exist[l, e] <= pb.exist_max[e]:
                    yield n
    for t in range(st.ratio.shape[1]):
        step = pb.tap_step[t]
        if step <= 0:
            continue
        for dlt in (-step, step):
            for l in list(range(L)) + ([None] if L > 1 else []):
                n = st.copy()
                if l is None:
                    n.ratio[:, t] += dlt
                else:
                    n.ratio[l, t] += dlt
                if np.all((pb.tap_lo[t] - 1e-9 <= n.ratio[:, t]) & (n.ratio[:, t] <= pb.tap_hi[t] + 1e-9)):
                    yield n


def within_budget(pb: PlanProblem, st: Settings) -> bool:
    """The plan keeps the capital budget and the limit on new sites."""
    lv = pb.levers
    if lv.budget is not None and pb.capital(st) > lv.budget + 1e-9:
        return False
    if lv.max_new_sites is not None and int(np.sum(st.fixed + st.switched > 0)) > lv.max_new_sites:
        return False
    return True


_SCREEN_CHUNK = 512   # moves screened at a time: bounds the (moves x rows) arrays whatever the case size


def capital_of(pb: PlanProblem, fixed: np.ndarray, switched: np.ndarray) -> np.ndarray:
    """:meth:`PlanProblem.capital` of many settings at once: rows of ``fixed`` / ``switched``."""
    sites = pb.sites
    if not sites:
        return np.zeros(len(fixed))
    unit = np.array([s.unit_mvar for s in sites], float)
    site_cost = np.array([s.fixed_cost for s in sites], float)
    per_mvar = np.array([s.cost_per_mvar for s in sites], float)
    sw_site = np.array([s.switched_fixed_cost for s in sites], float)
    sw_mvar = np.array([s.switched_cost_per_mvar for s in sites], float)
    units = fixed + switched
    return (np.where(units != 0, site_cost + per_mvar * unit * units, 0.0)
            + np.where(switched != 0, sw_site + sw_mvar * unit * switched, 0.0)).sum(axis=1)


def screen(pb: PlanProblem, st: Settings, flows, moves: list):
    """Predicted merit and per-level losses (MW) of each move by the linear model at ``st``.

    Vectorised over the moves, in chunks of ``_SCREEN_CHUNK`` so that memory stays bounded
    on large networks (thousands of moves times thousands of monitored rows)."""
    L = len(pb.levels)
    N = len(moves)
    units = max([s.max_units for s in pb.sites] + list(pb.exist_max) + [1])
    fixed = np.array([n.fixed for n in moves], float).reshape(N, -1)
    switched = np.array([n.switched for n in moves], float).reshape(N, -1)
    merit = pb.capital_weight() * capital_of(pb, fixed, switched)
    losses = np.zeros((N, L))
    weights = pb.loss_weights()
    unit_pu = pb.unit_pu()
    for l in range(L):
        lev = pb.level_data(l, st, flows[l], 1.0, units)
        v_now = np.abs(flows[l].v[pb.vset_bus])
        du = np.concatenate([
            unit_pu * (fixed + np.array([n.steps[l] for n in moves], float).reshape(N, -1)
                       - st.fixed - st.steps[l]),
            pb.exist_step * (np.array([n.exist[l] for n in moves], float).reshape(N, -1) - st.exist[l]),
            np.array([n.vset[l] for n in moves], float).reshape(N, -1) - v_now,
            np.array([n.ratio[l] for n in moves], float).reshape(N, -1) - st.ratio[l]], axis=1)
        viol = np.zeros(N)
        for a in range(0, N, _SCREEN_CHUNK):
            part = du[a:a + _SCREEN_CHUNK]
            s = lev.d[None, :] + part @ lev.R.T if len(lev.d) else np.zeros((len(part), 0))
            losses[a:a + _SCREEN_CHUNK, l] = (np.sum(s * s, axis=1) + lev.const) * pb.base
            for x0, slope, lo, hi in ((lev.v0, lev.dv, lev.v_lo, lev.v_hi), (lev.q0, lev.dq, lev.q_lo, lev.q_hi),
                                      (lev.s0, lev.ds, None, lev.s_hi)):
                if x0 is None or not len(x0):
                    continue
                x = x0[None, :] + part @ slope.T
                if lo is not None:
                    viol[a:a + _SCREEN_CHUNK] += np.maximum(lo[None, :] - x, 0.0).sum(axis=1)
                viol[a:a + _SCREEN_CHUNK] += np.maximum(x - hi[None, :], 0.0).sum(axis=1)
        merit += weights[l] * losses[:, l] + pb.penalty() * viol
    return merit, losses


def local_search(pb: PlanProblem, cur: Settings, ev: Evaluation, options, log: list, progress=None,
                 seen: dict | None = None):
    """Improve ``cur`` by model-screened, AC-checked moves. Returns (settings, evaluation,
    predicted losses of the final settings by the model that proposed them, or None)."""
    names = [lc.name for lc in pb.levels]
    budget = options.max_polish_flows
    batch = max(1, int(getattr(options, "search_checks", 6)))
    used = 0
    seen = {} if seen is None else seen
    predicted = None
    while used < budget:
        moves = [n for n in candidate_moves(pb, cur) if within_budget(pb, n)]
        if not moves:
            break
        merit, losses = screen(pb, cur, ev.flows, moves + [cur])
        # the model's own figure for the present point is what a move must beat in the model
        here, merit, losses = merit[-1], merit[:-1], losses[:-1]
        order = np.argsort(merit, kind="stable")
        best = None
        pos = 0
        while pos < len(order) and used < budget:
            chunk = []
            while pos < len(order) and len(chunk) < batch:
                j = int(order[pos])
                pos += 1
                if moves[j].key() not in seen:
                    chunk.append(j)
            for j in chunk:
                new = evaluate(pb, moves[j], warm=ev.flows, chord=True)
                used += len(pb.levels)
                seen[moves[j].key()] = new.merit
                if new.converged and new.merit < (best[1].merit if best else ev.merit) - 1e-12:
                    best = (j, new)
            if best is not None:
                break
            # nothing in this batch: go on only while the model still expects an improvement
            if pos >= len(order) or merit[order[pos]] >= here - 1e-12 * max(1.0, abs(here)):
                break
        if best is None:
            break
        j, new = best
        cur, ev = moves[j], new
        predicted = dict(zip(names, map(float, losses[j])))
        log.append(StepRecord(iteration=len(log), accepted=True, merit=ev.merit, polish=True,
                              predicted_mw=predicted, ac_mw=dict(zip(names, map(float, ev.losses_mw))),
                              violation=ev.violation_total, worst_violation=worst(ev)))
        if progress:
            progress(log[-1])
    return cur, ev, predicted


def worst(ev: Evaluation):
    """The largest limit breach of an AC evaluation, as text (None when every limit holds)."""
    if not ev.violations:
        return None
    return max(ev.violations, key=lambda v: v.excess).text()
