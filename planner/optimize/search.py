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

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..flow.runtime import release_free_memory
from .ac_check import evaluate
from .problem import Evaluation, PlanProblem, Settings
from .results import StepRecord


_FIELDS = Settings._FIELDS


@dataclass
class MoveSet:
    """Many settings stacked as arrays, one row per move (the fields of :class:`Settings` with a
    leading move axis), in the search's fixed order. Indexing gives a :class:`Settings`."""
    fixed: np.ndarray       # (N, S)
    switched: np.ndarray    # (N, S)
    steps: np.ndarray       # (N, L, S)
    exist: np.ndarray       # (N, L, E)
    vset: np.ndarray        # (N, L, G)
    ratio: np.ndarray       # (N, L, T)

    @classmethod
    def of(cls, settings: list, like: Settings | None = None) -> "MoveSet":
        """The settings of a list, stacked (``like`` gives the shapes of an empty list)."""
        if not settings:
            return cls(*(np.zeros((0,) + getattr(like, f).shape, getattr(like, f).dtype) for f in _FIELDS))
        return cls(*(np.stack([getattr(n, f) for n in settings]) for f in _FIELDS))

    @classmethod
    def join(cls, parts: list) -> "MoveSet":
        return cls(*(np.concatenate([getattr(p, f) for p in parts]) for f in _FIELDS))

    def __len__(self) -> int:
        return len(self.fixed)

    def __getitem__(self, j) -> Settings:
        return Settings(*(getattr(self, f)[j].copy() for f in _FIELDS))

    def __iter__(self):
        return (self[j] for j in range(len(self)))

    def take(self, rows) -> "MoveSet":
        return MoveSet(*(getattr(self, f)[rows] for f in _FIELDS))


def _copies(st: Settings, k: int) -> MoveSet:
    return MoveSet(*(np.repeat(getattr(st, f)[None], k, axis=0) for f in _FIELDS))


def candidate_moves(pb: PlanProblem, st: Settings) -> MoveSet:
    """Every move the search considers from ``st``, in a fixed order (one row per move).

    The order: per used site (ascending) its unit changes, step changes, a fixed unit made
    switched and off at one level (each level), a switched unit on at every level made fixed,
    and its drop, then its bank moved to every other free candidate bus (ascending; same units,
    one fewer, one more); then a new site at every free candidate bus (1 to its most units); then existing
    banks' steps; then tap steps. The many-row kinds (moves to other buses, new sites) are
    built as arrays; only the few per-site edits are built one by one.
    """
    L, S = st.steps.shape
    sites = pb.sites
    used = np.flatnonzero(st.fixed + st.switched > 0)
    n_used = len(used)
    cap = pb.levers.max_new_sites
    max_units = np.array([x.max_units for x in sites], np.int64)
    unit_mvar = np.array([x.unit_mvar for x in sites], float)
    continuous = np.array([x.continuous for x in sites], bool)
    fixed_kind = np.array(["fixed" in x.kinds for x in sites], bool)
    switched_kind = np.array(["switched" in x.kinds for x in sites], bool)
    free = (st.fixed + st.switched == 0) & ~continuous
    parts = []
    for s in used:
        site = sites[s]
        if site.continuous:
            continue
        one = []
        for dlt in (-1, 1):
            if "fixed" in site.kinds or st.fixed[s]:
                n = st.copy()
                n.fixed[s] += dlt
                if 0 <= n.fixed[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    one.append(n)
            if st.switched[s] or "switched" in site.kinds:
                n = st.copy()
                n.switched[s] += dlt
                if 0 <= n.switched[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    # a unit added comes in service at every level; step moves can then turn it off
                    n.steps[:, s] = np.minimum(n.steps[:, s] + max(dlt, 0), n.switched[s])
                    one.append(n)
            for l in range(L):
                if st.switched[s]:
                    n = st.copy()
                    n.steps[l, s] += dlt
                    if 0 <= n.steps[l, s] <= n.switched[s]:
                        one.append(n)
        if L > 1 and st.fixed[s] >= 1 and "switched" in site.kinds:
            # a fixed unit made switched and turned off at one level: alone, each half of
            # this move only costs (more capital, or a unit off where the plan wants it on)
            for l in range(L):
                n = st.copy()
                n.fixed[s] -= 1
                n.switched[s] += 1
                n.steps[:, s] += 1
                n.steps[l, s] -= 1
                one.append(n)
        if st.switched[s] and st.steps[:, s].min() >= 1 and "fixed" in site.kinds:
            # a switched unit in service at every level made fixed: the same losses for less
            n = st.copy()
            n.fixed[s] += 1
            n.switched[s] -= 1
            n.steps[:, s] -= 1
            one.append(n)
        # the site dropped
        n = st.copy()
        n.fixed[s] = n.switched[s] = 0
        n.steps[:, s] = 0
        one.append(n)
        parts.append(MoveSet.of(one))
        # the whole bank moved to any other free candidate bus, same units or one more / fewer
        ok_t = free.copy()
        ok_t[s] = False
        if st.fixed[s]:
            ok_t &= fixed_kind
        if st.switched[s]:
            ok_t &= switched_kind
        extra = np.array([0, -1, 1])
        fx = st.fixed[s] + (extra if st.fixed[s] else 0 * extra)
        sw = st.switched[s] + (0 * extra if st.fixed[s] else extra)
        tot = fx + sw
        ok = (ok_t[:, None] & ((fx >= 0) & (sw >= 0) & (tot != 0))[None, :]
              & (tot[None, :] <= max_units[:, None])
              & ((extra == 0)[None, :] | (unit_mvar == unit_mvar[s])[:, None]))
        t_of, e_of = np.nonzero(ok)          # row-major: bus by bus, then (same, fewer, more)
        k = len(t_of)
        if k:
            mv = _copies(st, k)
            rows = np.arange(k)
            mv.fixed[rows, t_of] = fx[e_of]
            mv.switched[rows, t_of] = sw[e_of]
            mv.steps[rows, :, t_of] = np.minimum(st.steps[:, s][None, :], sw[e_of][:, None])
            mv.fixed[:, s] = 0
            mv.switched[:, s] = 0
            mv.steps[:, :, s] = 0
            parts.append(mv)
    # a new site, where the site limit allows
    if cap is None or n_used < cap:
        t_free = np.flatnonzero(free)
        t_of = np.repeat(t_free, max_units[t_free])
        u_of = np.concatenate([np.arange(1, max_units[t] + 1) for t in t_free]) if len(t_free) \
            else np.zeros(0, np.int64)
        k = len(t_of)
        if k:
            mv = _copies(st, k)
            rows = np.arange(k)
            fk = fixed_kind[t_of]
            mv.fixed[rows[fk], t_of[fk]] = u_of[fk]
            mv.switched[rows[~fk], t_of[~fk]] = u_of[~fk]
            mv.steps[rows[~fk], :, t_of[~fk]] = u_of[~fk][:, None]
            parts.append(mv)
    tail = []
    for e in range(st.exist.shape[1]):
        for l in range(L):
            for dlt in (-1, 1):
                n = st.copy()
                n.exist[l, e] += dlt
                if 0 <= n.exist[l, e] <= pb.exist_max[e]:
                    tail.append(n)
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
                    tail.append(n)
    parts.append(MoveSet.of(tail, like=st))
    return MoveSet.join(parts)


def budget_mask(pb: PlanProblem, moves: MoveSet) -> np.ndarray:
    """:func:`within_budget` of every move at once."""
    lv = pb.levers
    ok = np.ones(len(moves), bool)
    if lv.budget is not None:
        ok &= capital_of(pb, moves.fixed, moves.switched) <= lv.budget + 1e-9
    if lv.max_new_sites is not None:
        ok &= np.sum(moves.fixed + moves.switched > 0, axis=1) <= lv.max_new_sites
    return ok


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


def screen(pb: PlanProblem, st: Settings, flows, moves, exact=False, with_present=False):
    """Predicted merit and per-level losses (MW) of each move by the linear model at ``st``
    (:meth:`PlanProblem.screen_data`; ``exact``: the exact model of ``st`` at every level).
    ``moves``: a :class:`MoveSet` or a list of settings; ``with_present``: one more row at the
    end for ``st`` itself (the model's own figure at its point).

    Vectorised over the moves, in chunks of ``_SCREEN_CHUNK`` so that memory stays bounded
    on large networks (thousands of moves times thousands of monitored rows)."""
    if not isinstance(moves, MoveSet):
        moves = MoveSet.of(list(moves), like=st)
    L = len(pb.levels)
    n_moves = len(moves)
    N = n_moves + (1 if with_present else 0)
    units = max([s.max_units for s in pb.sites] + list(pb.exist_max) + [1])
    merit = np.zeros(N)
    if pb.capital_weight():
        merit[:n_moves] = pb.capital_weight() * capital_of(pb, moves.fixed, moves.switched)
        merit[n_moves:] = pb.capital_weight() * capital_of(pb, st.fixed[None], st.switched[None])
    losses = np.zeros((N, L))
    weights = pb.loss_weights()
    unit_pu = pb.unit_pu()
    k0 = len(unit_pu)
    k1 = k0 + len(pb.exist_step)
    k2 = k1 + len(pb.vset_bus)
    for l in range(L):
        lev = _screen_data(pb, l, st, flows[l], units, exact)
        v_now = np.abs(flows[l].v[pb.vset_bus])
        # lever changes of every move (and of the present point, whose setpoints may differ
        # from the voltages reached), written into one array
        du = np.zeros((N, k2 + st.ratio.shape[1]))
        du[:n_moves, :k0] = unit_pu * (moves.fixed + moves.steps[:, l] - st.fixed - st.steps[l])
        du[:n_moves, k0:k1] = pb.exist_step * (moves.exist[:, l] - st.exist[l])
        du[:n_moves, k1:k2] = moves.vset[:, l] - v_now
        du[:n_moves, k2:] = moves.ratio[:, l] - st.ratio[l]
        if with_present:
            du[n_moves, k1:k2] = st.vset[l] - v_now
        linear = getattr(lev, "loss_linear", None)
        viol = np.zeros(N)
        # a move changes one or two levers, so its row of du is sparse: the products with the
        # slopes cost (moves x changed levers x rows), not (moves x every lever x rows)
        du_sparse = sp.csr_matrix(du)
        RT = np.ascontiguousarray(lev.R.T)
        slopes_t = [None if x0 is None or not len(x0) else np.ascontiguousarray(slope.T)
                    for x0, slope in ((lev.v0, lev.dv), (lev.q0, lev.dq), (lev.s0, lev.ds))]
        for a in range(0, N, _SCREEN_CHUNK):
            part = du_sparse[a:a + _SCREEN_CHUNK]
            s = lev.d[None, :] + part @ RT if len(lev.d) else np.zeros((part.shape[0], 0))
            quad = np.sum(s * s, axis=1) + lev.const
            if linear is not None:
                quad += part @ linear
            losses[a:a + _SCREEN_CHUNK, l] = quad * pb.base
            for (x0, _, lo, hi), slope_t in zip(((lev.v0, lev.dv, lev.v_lo, lev.v_hi),
                                                 (lev.q0, lev.dq, lev.q_lo, lev.q_hi),
                                                 (lev.s0, lev.ds, None, lev.s_hi)), slopes_t):
                if slope_t is None:
                    continue
                x = x0[None, :] + part @ slope_t
                if lo is not None:
                    viol[a:a + _SCREEN_CHUNK] += np.maximum(lo[None, :] - x, 0.0).sum(axis=1)
                viol[a:a + _SCREEN_CHUNK] += np.maximum(x - hi[None, :], 0.0).sum(axis=1)
        merit += weights[l] * losses[:, l] + pb.penalty() * viol
    return merit, losses


def _screen_data(pb: PlanProblem, l: int, st: Settings, fr, units: int, exact: bool):
    """:meth:`PlanProblem.screen_data`, kept while ``fr`` is the level's present point (a second
    screen at the same point, e.g. of a combined move, reuses the model)."""
    memo = pb.__dict__.setdefault("_screen_memo", {})
    got = memo.get(l)
    if got is not None and got[0] is fr and got[1] == st.key() and got[2] == units and got[3] == exact:
        return got[4]
    lev = pb.screen_data(l, st, fr, units, exact=exact)
    memo[l] = (fr, st.key(), units, exact, lev)
    return lev


def _changed(cur: Settings, st: Settings) -> np.ndarray:
    """Which levers ``st`` changes from ``cur``: one flag per site (any of its fixed, switched
    or per-level units), existing bank, setpoint and tap lever, at any level."""
    def moved(a, b, lead):
        d = np.abs(np.asarray(a, float) - np.asarray(b, float)) > 1e-12
        return d.any(axis=tuple(range(lead))) if lead else d
    return np.concatenate([moved(st.fixed, cur.fixed, 0) | moved(st.switched, cur.switched, 0)
                           | moved(st.steps, cur.steps, 1), moved(st.exist, cur.exist, 1),
                           moved(st.vset, cur.vset, 1), moved(st.ratio, cur.ratio, 1)])


def combine(cur: Settings, moves: list) -> Settings | None:
    """The settings with every move of ``moves`` (settings one move from ``cur``) applied together,
    taken in the given order and each only if it touches no lever (site, existing bank, setpoint,
    tap) an earlier one touched; None when fewer than two moves combine."""
    out = cur.copy()
    taken = None
    count = 0
    for st in moves:
        mask = _changed(cur, st)
        if taken is not None and np.any(mask & taken):
            continue
        taken = mask if taken is None else taken | mask
        for f in _FIELDS:
            a = getattr(out, f)
            a += getattr(st, f) - getattr(cur, f)
        count += 1
    return out if count >= 2 else None


def _joined(pb: PlanProblem, cur: Settings, ev: Evaluation, moves, better: list, merit, here: float, exact: bool):
    """The improving moves of a batch (``better``: (index, evaluation), best AC merit first) that
    are worth making together, combined (:func:`combine`), or None.

    A move joins when it touches no lever an earlier one did and its own AC gain outweighs its
    interaction with them as the model of the point sees it: ``model(joined + move) -
    model(joined) - (model(move) - model(here))``. Two banks taken out of one area, each an
    improvement alone, can together pull its voltages below the band; the model's limit rows
    see that, and the pair is not checked."""
    first = moves[better[0][0]]
    taken = [first]
    touched = _changed(cur, first)
    for j, new in better[1:]:
        move = moves[j]
        mask = _changed(cur, move)
        if np.any(mask & touched):
            continue
        joined = taken[0] if len(taken) == 1 else combine(cur, taken)
        both = combine(cur, taken + [move])
        m, _ = screen(pb, cur, ev.flows, [both, joined], exact=exact)
        interaction = (m[0] - m[1]) - (merit[j] - here)
        if (new.merit - ev.merit) + interaction < 0.0:
            taken.append(move)
            touched |= mask
    return combine(cur, taken) if len(taken) > 1 else None


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
    exact = False
    while used < budget:
        moves = candidate_moves(pb, cur)
        keep = budget_mask(pb, moves)
        if not keep.all():
            moves = moves.take(keep)
        if not len(moves):
            break
        # large cases screen with an earlier point's slopes (PlanProblem.screen_data) until they
        # find nothing; the search then looks once more with the exact model of the point, so
        # it stops only where the exact model, like the AC checks, sees no better move
        exact = exact or all(pb.screen_exact(l, f) for l, f in enumerate(ev.flows))
        merit, losses = screen(pb, cur, ev.flows, moves, exact=exact, with_present=True)
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
            better = []
            for j in chunk:
                new = evaluate(pb, moves[j], warm=ev.flows, chord=True)
                used += len(pb.levels)
                seen[moves[j].key()] = new.merit
                if new.converged and new.merit < ev.merit - 1e-12:
                    better.append((j, new))
                if new.converged and new.merit < (best[1].merit if best else ev.merit) - 1e-12:
                    best = (j, new)
            if best is not None:
                # improvements on separate levers mostly add up (banks far apart): their
                # combination, best first, is checked too and taken when it beats the best single
                # move, so one round (one new point, one screen) harvests several of them
                better.sort(key=lambda x: x[1].merit)      # stable: ties keep the list order
                comb = _joined(pb, cur, ev, moves, better, merit, here, exact) if len(better) > 1 else None
                if comb is not None and comb.key() not in seen and within_budget(pb, comb) and used < budget:
                    new = evaluate(pb, comb, warm=ev.flows, chord=True)
                    used += len(pb.levels)
                    seen[comb.key()] = new.merit
                    if new.converged and new.merit < best[1].merit - 1e-12:
                        best = (comb, new)
                break
            # nothing in this batch: go on only while the model still expects an improvement
            if pos >= len(order) or merit[order[pos]] >= here - 1e-12 * max(1.0, abs(here)):
                break
        if best is None:
            if not exact:
                exact = True
                continue
            break
        exact_here = exact
        exact = False
        j, new = best
        if isinstance(j, Settings):
            # the combined move: its prediction by the same model of the point it left
            _, comb_losses = screen(pb, cur, ev.flows, [j], exact=exact_here)
            cur, ev = j, new
            predicted = dict(zip(names, map(float, comb_losses[0])))
        else:
            cur, ev = moves[j], new
            predicted = dict(zip(names, map(float, losses[j])))
        log.append(StepRecord(iteration=len(log), accepted=True, merit=ev.merit, polish=True,
                              predicted_mw=predicted, ac_mw=dict(zip(names, map(float, ev.losses_mw))),
                              violation=ev.violation_total, worst_violation=worst(ev)))
        if progress:
            progress(log[-1])
        release_free_memory()
    return cur, ev, predicted


def worst(ev: Evaluation):
    """The largest limit breach of an AC evaluation, as text (None when every limit holds)."""
    if not ev.violations:
        return None
    return max(ev.violations, key=lambda v: v.excess).text()
