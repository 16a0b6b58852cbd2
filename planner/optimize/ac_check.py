"""AC checking: full Newton-Raphson load flows of a plan at every level, its limit breaches
and the merit that decides acceptance; the voltage margins the linear model learns from them.

The load flows of the levels of one proposal are independent: with ``Options.jobs`` > 1 they
run in a pool of worker processes (created once per plan). The results are exactly the serial
run's: a worker gets the level's Jacobian ordering (the symbolic cache without its factors), and
the first ordering a worker chooses comes back to this process, so every load flow factorises
in the order the serial run uses.
"""
from __future__ import annotations

import copy
import dataclasses

import numpy as np

from ..flow.equations import bus_mismatch, injection, load_power
from ..flow.newton import solve_flow
from ..flow.result import FlowResult, FlowStatus, build_result
from ..network.compile import PQ, PV, SLACK
from .problem import Evaluation, PlanProblem, Settings
from .sensitivity import jacobian_factor
from .results import Violation

_MARGIN_STEP = 5e-5   # pu added to a voltage row's margin beyond the breach that AC showed
_MARGIN_CAP = 0.01    # pu: the most a row is moved inside the band


def _solve_level(job):
    """One level's AC load flow (a module-level function, so worker processes can run it)."""
    c, start, tables, *portable = job
    fr = solve_flow(compiled=c, start=start, build_tables=tables)
    runs = 1
    if not fr.converged and not isinstance(start, str):
        fr = solve_flow(compiled=c, start="flat", build_tables=tables)
        runs += 1
    if portable:
        # back across the process line: the ordering (plain arrays) but no factor objects
        fr.compiled = dataclasses.replace(fr.compiled, _cache={})
        return fr, runs, _ordering(c)
    return fr, runs


def _ordering(c):
    """The symbolic cache of a compiled network's load flows without its factor objects (or None)."""
    cache = c._cache.get("shared", {}).get("flow_symbolic")
    sym = getattr(cache, "sym", None)
    if sym is None or getattr(sym, "order", None) is None:
        return None
    out = copy.copy(cache)
    out.sym = copy.copy(sym)
    out.sym._systems = {}
    out.extra = {}
    return out


def _portable(job):
    """A job without the caches that cannot cross to a worker process (the ordering goes along)."""
    c, start, tables = job
    if not isinstance(start, str):
        start = copy.copy(start)
        start.compiled = dataclasses.replace(start.compiled, _cache={})
    sym = _ordering(c)
    return dataclasses.replace(c, _cache={"shared": {"flow_symbolic": sym}} if sym else {}), start, tables, True


def level_pool(pb: PlanProblem):
    """The plan's worker pool, or None for a serial run (one job or one level)."""
    jobs = int(getattr(pb.options, "jobs", 1) or 1)
    if jobs <= 1 or len(pb.levels) <= 1:
        return None
    if getattr(pb, "_pool", None) is None:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor
        ctx = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() else None
        pb._pool = ProcessPoolExecutor(max_workers=min(jobs, len(pb.levels)), mp_context=ctx)
    return pb._pool


def close_pool(pb: PlanProblem):
    pool = getattr(pb, "_pool", None)
    if pool is not None:
        pool.shutdown()
        pb._pool = None


CHORD_ITERATIONS = 10     # chord steps allowed before a check falls back to full Newton
CHORD_RATE = 0.5          # ... and the least mismatch reduction each step must give
CHORD_TIGHTER = 1e-3      # chord solutions go this far below the load flow's tolerance: linear
                          # convergence would otherwise stop just under it, where a Newton step
                          # lands far below (the figures of a move must not depend on the path)


class _ChordBase:
    """The factorised Jacobian of one solved point, for chord checks of small moves from it.

    Built for the point's own PV / PQ split (generators held at a reactive limit stay PQ), so a
    move that keeps every limit state converges to the full Newton solution of the moved
    settings; one sparse LU serves every move checked from this point. ``lu``: that LU if
    already made (:func:`planner.optimize.sensitivity.jacobian_factor` of the point with its own
    bus kinds, e.g. :meth:`PlanProblem.point_factor` with ``own_kinds``).
    """

    def __init__(self, fr: FlowResult, lu=None):
        c = fr.compiled
        self.flow = fr
        kind = fr.kind
        # unknowns ordered as the linearisation has them (PV angles, PQ angles, PQ magnitudes)
        self.pvpq = np.concatenate([np.flatnonzero((kind == PV) & c.alive), np.flatnonzero((kind == PQ) & c.alive)])
        self.pq = np.flatnonzero((kind == PQ) & c.alive)
        self.held = fr.limit_state != 0
        self.q_fixed = np.where(fr.limit_state > 0, c.q_max, np.where(fr.limit_state < 0, c.q_min, 0.0))
        if lu is None:
            lu = jacobian_factor(fr, kind)
        self.lu = lu


def chord_flow(base: _ChordBase, c, tol: float = 1e-8 * CHORD_TIGHTER) -> FlowResult | None:
    """Load flow of ``c`` (the base point's network with other shunts, setpoints or taps) by
    chord iterations on the base point's factorised Jacobian, or None when the chord does not
    settle within ``CHORD_ITERATIONS`` steps, or the solution would change a reactive-limit
    state (the caller then runs the full Newton load flow). The tolerance is the load flow's
    times ``CHORD_TIGHTER``."""
    fr = base.flow
    y = c.ybus()
    pvpq, pq = base.pvpq, base.pq
    na = len(pvpq)
    kind = fr.kind
    vm = np.abs(fr.v)
    va = np.angle(fr.v)
    ctrl = (kind != PQ) & c.alive
    vm[ctrl] = c.v_set[ctrl]
    history = []
    with np.errstate(all="ignore"):
        for it in range(CHORD_ITERATIONS + 1):
            v = vm * np.exp(1j * va)
            mis = bus_mismatch(c, y, v, base.q_fixed)
            F = np.concatenate([mis.real[pvpq], mis.imag[pq]])
            norm = float(np.abs(F).max()) if F.size else 0.0
            history.append(norm * c.base_mva)
            if not np.isfinite(norm) or (it and norm > CHORD_RATE * history[-2] / c.base_mva):
                return None
            if norm <= tol:
                break
            if it == CHORD_ITERATIONS:
                return None
            dx = base.lu.solve(F)
            va[pvpq] -= dx[:na]
            vm[pq] -= dx[na:]
        # the limit states must stand: no PV generator past a limit, no held one wanting back
        q_gen = injection(y, v).imag + load_power(c, vm).imag - c.s_gen.imag
        pv = (kind == PV) & c.alive
        if np.any(pv & ((q_gen > c.q_max + 1e-9) | (q_gen < c.q_min - 1e-9))):
            return None
        at = fr.limit_state
        if np.any(((at > 0) & (vm > c.v_set + 1e-9)) | ((at < 0) & (vm < c.v_set - 1e-9))):
            return None
    return build_result(c, y, v, kind.copy(), base.q_fixed.copy(), at.copy(), status=FlowStatus.CONVERGED,
                        message=f"converged in {it} chord iterations", iterations=it, history=history,
                        seconds=0.0, build_tables=False, equations_solved=True, oscillating_buses=[],
                        continuation_steps=0, strategy="chord")


def _chord_base_or_none(pb, l, fr):
    """A chord base for a converged flow; None (full Newton for every move) when there is no
    converged flow or its Jacobian cannot be factorised."""
    if fr is None or not fr.converged:
        return None
    try:
        return _ChordBase(fr, pb.point_factor(l, fr, own_kinds=True))
    except (RuntimeError, ValueError):
        return None


def chord_bases(pb: PlanProblem, flows) -> list:
    """The chord factorisations of the present point's flows, kept on ``pb`` while they are the
    present point (one LU per level, rebuilt only when the point moves; the same LU as the
    point's linearisation where the bus kinds agree)."""
    cache = getattr(pb, "_chord", None)
    if cache is None or len(cache) != len(flows) or any((b.flow if b is not None else None) is not f for b, f in zip(cache, flows)):
        cache = [_chord_base_or_none(pb, l, f) for l, f in enumerate(flows)]
        pb._chord = cache
    return cache


def evaluate(pb: PlanProblem, st: Settings, warm: list | None = None, tables=False, chord=False) -> Evaluation:
    """Full AC load flows (reactive limits enforced) of ``st`` at every level, and the merit
    that decides acceptance. With ``pb.options.jobs`` > 1 the levels run in parallel processes.

    ``chord`` (for small moves from the converged ``warm`` flows): each level is solved first by
    chord iterations on the warm point's factorised Jacobian (:func:`chord_flow`), to the load
    flow's tolerance; a level where the chord does not settle, or a reactive limit would switch,
    gets the full Newton load flow. The final plan is always checked by full Newton."""
    flows, losses, viols = [], [], []
    total = 0.0
    ok = True
    jobs = []
    for l in range(len(pb.levels)):
        start = warm[l] if warm is not None and warm[l] is not None and warm[l].converged else "flat"
        jobs.append((pb.compiled_for(l, st), start, tables))
    pool = level_pool(pb)
    if chord and warm is not None and not tables:
        bases = chord_bases(pb, warm)
        solved = []
        for l, job in enumerate(jobs):
            fr = chord_flow(bases[l], job[0]) if bases[l] is not None else None
            if fr is not None:
                pb.chord_flows = getattr(pb, "chord_flows", 0) + 1
            solved.append((fr, 1) if fr is not None else _solve_level(job))
    elif pool is not None:
        # workers get the level's ordering but no factor objects; the flows they return are
        # given back this process's compiled networks (and, the first time, the ordering)
        solved = list(pool.map(_solve_level, [_portable(j) for j in jobs]))
        for k, ((c, _, _), (fr, runs, sym)) in enumerate(zip(jobs, solved)):
            fr.compiled = c
            shared = c._cache.setdefault("shared", {})
            if sym is not None and _ordering(c) is None:
                shared["flow_symbolic"] = sym      # the ordering the serial run would have chosen
            solved[k] = (fr, runs)
    else:
        solved = [_solve_level(j) for j in jobs]
    for l, lc in enumerate(pb.levels):
        fr, runs = solved[l]
        pb.flows_run += runs
        flows.append(fr)
        if not fr.converged:
            ok = False
            losses.append(np.inf)
            viols.append(Violation(lc.name, "no convergence", fr.message, np.nan, np.nan, np.inf))
            total = np.inf
            continue
        losses.append(fr.losses_mw)
        v, t = violations(pb, l, fr)
        viols.extend(v)
        total += t
        for side in getattr(pb, "side_constraints", ()):
            v, t = side.violations(pb, l, st, fr)
            viols.extend(v)
            total += t
    losses = np.array(losses)
    cap = pb.capital(st)
    merit = (float(pb.loss_weights() @ losses) + pb.capital_weight() * cap
             + pb.penalty() * total) if ok else np.inf
    return Evaluation(flows, losses, viols, total, cap, merit, ok)


def violations(pb: PlanProblem, l: int, fr: FlowResult):
    """Limit breaches of a converged flow at level ``l``, and their sum in pu (for the merit)."""
    c = fr.compiled
    level = pb.levels[l].name
    vmin, vmax = pb.vlim[l]
    out = []
    tol_v = 1e-6
    vm = np.abs(fr.v)
    alive = c.alive
    lo = alive & (vm < vmin - tol_v)
    hi = alive & (vm > vmax + tol_v)
    total = float(np.sum(np.where(lo, vmin - vm, 0.0)) + np.sum(np.where(hi, vm - vmax, 0.0)))
    for i in np.flatnonzero(lo):
        out.append(Violation(level, "voltage", f"bus {c.bus_ids[i]}", vm[i], vmin[i], vmin[i] - vm[i]))
    for i in np.flatnonzero(hi):
        out.append(Violation(level, "voltage", f"bus {c.bus_ids[i]}", vm[i], vmax[i], vm[i] - vmax[i]))
    if pb.limits.q_limits:
        # enforcement keeps PV buses inside; the slack bus can still break its limits
        gb = np.flatnonzero((c.kind != PQ) & alive)
        q = fr.bus_q_gen[gb]
        tol_q = 1e-6
        for i, qi in zip(gb, q):
            if qi > c.q_max[i] + tol_q:
                out.append(Violation(level, "reactive", f"bus {c.bus_ids[i]}", qi * c.base_mva,
                                     c.q_max[i] * c.base_mva, (qi - c.q_max[i]) * c.base_mva))
                total += qi - c.q_max[i]
            elif qi < c.q_min[i] - tol_q:
                out.append(Violation(level, "reactive", f"bus {c.bus_ids[i]}", qi * c.base_mva,
                                     c.q_min[i] * c.base_mva, (c.q_min[i] - qi) * c.base_mva))
                total += c.q_min[i] - qi
    if pb.limits.ratings:
        from ..flow.result import branch_flows
        sf, stt = branch_flows(c, fr.v)
        s = np.maximum(np.abs(sf), np.abs(stt)) * c.base_mva
        rated = c.rating > 0
        over = rated & (s > c.rating * (1 + 1e-6))
        for k in np.flatnonzero(over):
            pct = 100 * s[k] / c.rating[k]
            out.append(Violation(level, "loading", f"branch {c.branch_ids[k]}", pct, 100.0, pct - 100.0))
            total += (s[k] - c.rating[k]) / c.base_mva
    return out, total


def learn_voltage_margins(pb: PlanProblem, ev: Evaluation):
    """Tighten the voltage rows at buses where an AC check broke the band.

    A linear row can sit exactly on its limit while the AC voltage lands a little past it;
    every such point then pays the violation penalty and the step is wasted. Each breach
    moves that bus's row inside the band by the breach plus a little (capped), a usual
    remedy in successive linear programming.
    """
    if not ev.converged:
        return
    for l, fr in enumerate(ev.flows):
        vmin, vmax = pb.vlim[l]
        lo, hi = pb.v_margin[l]
        vm = np.abs(fr.v)
        alive = fr.compiled.alive
        below = alive & (vm < vmin)
        above = alive & (vm > vmax)
        lo[below] = np.minimum(lo[below] + (vmin - vm)[below] + _MARGIN_STEP, _MARGIN_CAP)
        hi[above] = np.minimum(hi[above] + (vm - vmax)[above] + _MARGIN_STEP, _MARGIN_CAP)

