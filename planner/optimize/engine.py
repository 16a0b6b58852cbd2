"""The optimiser's outer loop: linearize, MILP step, full AC check, accept or shrink; then the
model-screened final search, the bound, and the result.

Works on one or several load levels at once. Sites and bank sizes are common to all
levels; fixed units are in service at every level; switched units, existing switchable
banks, generator setpoints and transformer taps may be set per level. A proposal counts only
after a full AC load flow (reactive limits enforced) of exactly its discrete settings at every
level: the merit that decides acceptance is computed from those AC results.

No decision depends on elapsed time: each MILP is bounded by counts (cut rounds, HiGHS nodes,
one thread, a fixed seed), every loop runs in a fixed order, and the wall-clock limit is an
emergency stop that, when it fires, is recorded in the result (``time_limited``).

Module map: :mod:`.problem` (levers, limits, linear model), :mod:`.milp` (the step model),
:mod:`.ac_check` (AC load flows and limits), :mod:`.search` (final search), :mod:`.bound`
(lower bound), :mod:`.results` (result types).
"""
from __future__ import annotations

import time

import numpy as np

from .ac_check import close_pool, evaluate, learn_voltage_margins
from .bound import plan_bound
from .levers import Levers, Limits, Objective, Options
from .milp import solve_step
from .problem import Evaluation, LevelCase, PlanProblem, Settings
from .results import PlanResult, PlanStatus, StepRecord, Violation
from .rows import ROW_TOL
from .search import local_search, worst

__all__ = ["plan", "LevelCase", "PlanResult", "PlanStatus", "Violation", "StepRecord",
           "Settings", "Evaluation"]

_SEEDS = 12   # earlier proposals whose loss cuts a new step starts with


def plan(network_or_levels, levers: Levers | None = None, limits: Limits | None = None,
         objective: Objective | None = None, options: Options | None = None, progress=None, *,
         security=None, side_constraints=()) -> PlanResult:
    """Choose bank sites and units, switching, setpoints and taps across load levels.

    ``network_or_levels`` is a :class:`~planner.network.model.Network` (one level named
    ``"base"``, weight 1) or a list of :class:`LevelCase`. Every accepted step, and the final
    plan, is a full AC load flow of the exact discrete settings at every level. ``progress``
    (optional) is called with each :class:`StepRecord`. The same inputs give the same plan on
    every run.

    ``security`` (a :class:`planner.contingency.secure.SecurityRequest`) asks for an N-1-secure
    plan: post-outage voltage rows are added in rounds and the plan is AC-proved under every
    outage of the set; the result's ``security`` field says whether it is secure.
    ``side_constraints``: objects giving extra linear rows and AC breaches (see
    :class:`planner.contingency.secure.PostOutageRows`).

    >>> from pathlib import Path
    >>> from planner.network.io import read_network
    >>> from planner.optimize.levers import BankSite, Levers, Limits
    >>> net = read_network(Path("tests/data/feeder33_tables"))
    >>> result = plan(net, Levers(sites=[BankSite(30, 0.15, 10)]), Limits(v_min=0.0, v_max=2.0))
    >>> result.status.name, [(b["bus"], b["units"]) for b in result.banks]
    ('VERIFIED', [(30, 9)])
    >>> round(result.losses_after_mw["base"] * 1000, 1)    # kW, AC-verified
    143.6
    """
    levels = network_or_levels if isinstance(network_or_levels, (list, tuple)) \
        else [LevelCase("base", network_or_levels)]
    if security is not None:
        from ..contingency.secure import plan_secure
        return plan_secure(list(levels), levers, limits, objective, options, security, progress)
    pb = PlanProblem(list(levels), levers or Levers(), limits or Limits(), objective or Objective(),
                     options or Options())
    pb.side_constraints = list(side_constraints)
    try:
        with _blas_threads(pb.options):
            return _run(pb, progress)
    finally:
        close_pool(pb)


class _blas_threads:
    """Cap BLAS threads inside a plan (``Options.blas_threads``) with threadpoolctl when it is
    installed; without it the library leaves the process's setting alone (a library cannot set
    the environment before numpy is imported -- set OPENBLAS_NUM_THREADS in the shell)."""

    def __init__(self, options):
        self.n = getattr(options, "blas_threads", 1)
        self.ctx = None

    def __enter__(self):
        if self.n:
            try:
                from threadpoolctl import threadpool_limits
            except ImportError:
                return self
            self.ctx = threadpool_limits(limits=int(self.n), user_api="blas")
        return self

    def __exit__(self, *exc):
        if self.ctx is not None:
            self.ctx.unregister() if hasattr(self.ctx, "unregister") else self.ctx.__exit__(*exc)
        return False


def _run(pb: PlanProblem, progress) -> PlanResult:
    options = pb.options
    t0 = time.perf_counter()
    names = [lc.name for lc in pb.levels]
    cur = pb.initial_settings()
    before = evaluate(pb, cur)
    if not before.converged:
        return _result(pb, cur, before, before, {}, "", [], 0, PlanStatus.FAILED,
                       "the base-case load flow did not converge at every level; nothing was optimized",
                       "base case does not converge", False, t0)
    ev = before
    log = [StepRecord(iteration=0, accepted=True, merit=before.merit,
                      predicted_mw=dict(zip(names, map(float, before.losses_mw))),
                      ac_mw=dict(zip(names, map(float, before.losses_mw))), violation=before.violation_total,
                      worst_violation=worst(before), radius_v=options.voltage_radius_pu)]
    if progress:
        progress(log[-1])
    r_v = options.voltage_radius_pu
    r_u = max([s.max_units for s in pb.sites] + list(pb.exist_max) + [1])
    r_t = options.tap_radius_steps
    r_c = float(r_u)      # continuous bank sizes: a real-valued radius in units
    # sites opened or closed per step after the first (the first places the banks from nothing)
    r_s = options.site_radius
    milps = 0
    predicted, note = None, "no step changed the plan"
    seen = {cur.key(): ev.merit}
    tried = {}            # every MILP round's proposal: later steps start their loss cuts there
    stop = "iteration limit"
    failed = False
    time_limited = False
    # with whole-unit levers only, a shrinking region soon repeats the search's one-unit moves
    discrete_only = not len(pb.vset_bus) and not any(s.continuous for s in pb.sites) and \
        not np.any(pb.tap_step <= 0)
    rejections = 0
    has_continuous = any(s.continuous for s in pb.sites)

    for it in range(1, options.max_iterations + 1):
        spec = pb.step_spec(cur, ev.flows, r_v, r_u, r_t, r_c, seeds=list(tried.values())[-_SEEDS:],
                            radius_sites=r_s if it > 1 else None)
        sol, solves, rounds = solve_step(spec)
        milps += solves
        time_limited = time_limited or sol.time_limited
        if not sol.ok:
            stop = f"MILP step failed ({sol.status})"
            failed = True
            break
        for r in rounds:
            p = pb.settings_from(r, cur, ev.flows)
            tried.pop(p.key(), None)
            tried[p.key()] = p           # most recent last
        cand = pb.settings_from(sol, cur, ev.flows)
        # the model's own expected gain of this proposal (losses, capital, penalised rows): when
        # it is below the acceptance tolerance, a smaller region cannot do better by the
        # model's own account, so this is the last step (checked by AC if it expects any gain)
        # instead of a long tail of shrinking, rejected steps
        expected = _model_merit(pb, spec, cur, None, ev.flows) - _model_merit(pb, spec, cur, cand, ev.flows)
        last = expected < _tolerance(pb, ev.merit)
        pred = dict(zip(names, map(float, sol.predicted_loss_pu * pb.base)))
        rec = dict(iteration=it, predicted_mw=pred, radius_v=r_v, radius_units=r_u)
        if cand.key() == cur.key():
            stop = "converged (no further change)"
            log.append(StepRecord(accepted=False, merit=ev.merit, ac_mw=dict(zip(names, map(float, ev.losses_mw))),
                                  violation=ev.violation_total, worst_violation=worst(ev), **rec))
            if progress:
                progress(log[-1])
            break
        last_stop = "converged (the model expects no gain above the tolerance)"
        if last and (expected <= 0 or cand.key() in seen):
            stop = last_stop
            log.append(StepRecord(accepted=False, merit=ev.merit, ac_mw=dict(zip(names, map(float, ev.losses_mw))),
                                  violation=ev.violation_total, worst_violation=worst(ev), **rec))
            if progress:
                progress(log[-1])
            break
        if cand.key() in seen:
            # proposed before and not better then: no load flow needed, shrink the region
            accept = False
            log.append(StepRecord(accepted=False, merit=seen[cand.key()], repeat=True, **rec))
        else:
            new = evaluate(pb, cand, warm=ev.flows)
            seen[cand.key()] = new.merit
            learn_voltage_margins(pb, new)
            accept = new.converged and new.merit < ev.merit - 1e-12
            log.append(StepRecord(accepted=bool(accept), merit=new.merit,
                                  ac_mw=dict(zip(names, map(float, new.losses_mw))),
                                  violation=new.violation_total, worst_violation=worst(new), **rec))
        if progress:
            progress(log[-1])
        if last:
            if accept:
                cur, ev = cand, new
                predicted, note = pred, f"predicted by the MILP step of iteration {it}"
            stop = last_stop
            break
        rejections = 0 if accept else rejections + 1
        if discrete_only and rejections >= 1:
            # the model cannot rank the nearby plans better than its own error: the AC-checked
            # final search takes over
            stop = "converged (step rejected; the final search checks moves next)"
            break
        if accept:
            gain = ev.merit - new.merit
            loss_change = float(np.abs(new.losses_mw - ev.losses_mw).max())
            if it > 1 and r_s and np.array_equal(_sites(cand), _sites(cur)):
                # a step free to move sites kept them: later steps only size and set the banks
                # (the final search still AC-checks moves of a bank to any candidate bus)
                r_s = 0
            cur, ev = cand, new
            predicted, note = pred, f"predicted by the MILP step of iteration {it}"
            if loss_change < options.loss_tolerance_mw and \
                    gain < options.loss_tolerance_mw * max(1.0, pb.loss_weights().max()):
                stop = "converged (AC loss change below tolerance)"
                break
            if gain < options.merit_rel_tolerance * abs(new.merit):
                stop = "converged (relative improvement below tolerance)"
                break
        else:
            r_v *= 0.5
            r_c *= 0.5
            r_u = max(1, r_u // 2) if r_u > 1 else 0
            r_t = max(1, r_t // 2) if r_t > 1 else 0
            r_s = r_s // 2 if r_s else r_s
            # every lever's radius below a size that means something for it: whole units and
            # tap steps at zero, setpoints below min_voltage_radius_pu, continuous banks below
            # 1e-4 of a unit (only where there are such levers)
            v_done = r_v < options.min_voltage_radius_pu or not len(pb.vset_bus)
            c_done = r_c < 1e-4 or not has_continuous
            if r_u == 0 and r_t == 0 and v_done and c_done:
                stop = "converged (trust region collapsed)"
                break
    if options.polish and not failed:
        cur, ev, moved = local_search(pb, cur, ev, options, log, progress, seen)
        if moved is not None:
            predicted, note = moved, "predicted by the final search's model for the move that reached this plan"
    final = evaluate(pb, cur, warm=ev.flows, tables=True)
    if predicted is None:
        note = "no prediction: " + note + " (the AC figures are the base case's)"
    if failed:
        status = PlanStatus.FAILED
    elif not final.converged:
        status = PlanStatus.NOT_VERIFIED
    elif final.violations:
        status = PlanStatus.LEAST_VIOLATION
    else:
        status = PlanStatus.VERIFIED
    bound = plan_bound(pb, cur, final) if options.bound and not failed else {}
    return _result(pb, cur, before, final, predicted or {}, note, log, milps, status, "", stop,
                   not failed, t0, bound=bound, time_limited=time_limited)


def _sites(st: Settings) -> np.ndarray:
    """Which candidate sites hold units."""
    return (st.fixed + st.switched) > 0


def _tolerance(pb: PlanProblem, merit: float) -> float:
    """The smallest gain of the merit worth a step: the acceptance test's own tolerances."""
    options = pb.options
    return max(options.loss_tolerance_mw * max(1.0, float(pb.loss_weights().max())),
               options.merit_rel_tolerance * abs(float(merit)))


def _model_merit(pb: PlanProblem, spec, cur: Settings, to: Settings | None, flows) -> float:
    """The step model's merit of ``to`` (model built at ``cur``; None: the model's own point,
    no lever change): quadratic losses, capital and the penalised breaches of its linear limit
    rows, as the MILP scores them (without its cuts and tie-break). A row counts as breached only
    beyond the AC check's own tolerance on a limit (``rows.ROW_TOL``): a generator held on its
    reactive limit sits a hair outside its model bound at the present point (to the load flow's
    tolerance), and removing that phantom breach is no gain to expect (on a setpoint-only case
    it kept eight more steps running, each rejected by the AC check)."""
    total = pb.capital_weight() * pb.capital(cur if to is None else to)
    for l, lev in enumerate(spec.levels):
        du = pb.lever_changes(l, cur, cur if to is None else to, flows[l])
        if to is None:
            du = np.zeros_like(du)
        s = lev.d + lev.R @ du if len(lev.d) else np.zeros(0)
        total += lev.weight * spec.base_mva * (float(s @ s) + lev.const)
        breach = 0.0
        rows = [(lev.v0, lev.dv, lev.v_lo, lev.v_hi), (lev.q0, lev.dq, lev.q_lo, lev.q_hi),
                (lev.s0, lev.ds, None, lev.s_hi)] + list(lev.extra_rows or ())
        for x0, slopes, lo, hi in rows:
            if x0 is None or not len(x0):
                continue
            x = x0 + slopes @ du
            if lo is not None:
                breach += float(np.maximum(lo - ROW_TOL - x, 0.0).sum())
            breach += float(np.maximum(x - hi - ROW_TOL, 0.0).sum())
        total += spec.penalty * breach
    return float(total)


def _result(pb: PlanProblem, st: Settings, before: Evaluation, final: Evaluation, predicted, note, log, milps,
            status: PlanStatus, message, stop, success, t0, bound=None, time_limited=False) -> PlanResult:
    names = [lc.name for lc in pb.levels]
    c0 = pb.compiled[0]
    banks = []
    for s, site in enumerate(pb.sites):
        units = float(st.fixed[s] + st.switched[s]) if site.continuous else int(st.fixed[s] + st.switched[s])
        if units <= 1e-9:
            continue
        banks.append({
            "bus": int(site.bus), "units": units,
            "fixed_units": float(st.fixed[s]) if site.continuous else int(st.fixed[s]),
            "switched_units": int(st.switched[s]), "unit_mvar": float(site.unit_mvar),
            "mvar": float(units * site.unit_mvar),
            "steps_by_level": {n: int(st.steps[l, s]) for l, n in enumerate(names)},
            "mvar_by_level": {n: float((st.fixed[s] + st.steps[l, s]) * site.unit_mvar) for l, n in enumerate(names)},
        })
    setpoints = {}
    for l, n in enumerate(names):
        fr = final.flows[l]
        rows = []
        for g, i in enumerate(pb.vset_bus):
            state = int(fr.limit_state[i]) if fr.converged and fr.limit_state is not None else 0
            rows.append({"bus": int(c0.bus_ids[i]), "v_pu": float(st.vset[l, g]),
                         # a generator held at a reactive limit does not reach its setpoint
                         "v_reached_pu": float(abs(fr.v[i])) if fr.converged else None,
                         "at_limit": {1: "max Mvar", -1: "min Mvar"}.get(state)})
        setpoints[n] = rows
    taps = {}
    for l, n in enumerate(names):
        rows = []
        for j, members in enumerate(pb.tap_members):
            step = float(pb.tap_step[j])
            ratio = float(st.ratio[l, j])
            for k in members:
                side = c0.f[k] if c0.tap_from[k] else c0.t[k]
                rows.append({"from_bus": int(c0.bus_ids[c0.f[k]]), "to_bus": int(c0.bus_ids[c0.t[k]]),
                             "xfmr_id": str(c0.branch_ids[k]), "ratio": ratio,
                             # step number from neutral (ratio 1.0); None for a continuous ratio
                             "position": int(round((ratio - 1.0) / step)) if step > 0 else None,
                             "ratio_side": int(c0.bus_ids[side]),
                             "parallel_group": j if len(members) > 1 else None})
        taps[n] = rows
    exist = {n: [{"shunt_id": str(pb.exist_ids[e]), "bus": int(c0.bus_ids[pb.exist_bus[e]]),
                  "steps": int(st.exist[l, e])} for e in range(len(pb.exist_rows))] for l, n in enumerate(names)}
    if not message:
        if status is PlanStatus.FAILED:
            message = f"the optimizer stopped: {stop}; the plan shown is the best AC-checked point before that"
        elif not final.converged:
            message = "the final AC load flow did not converge at every level"
        elif final.violations:
            message = (f"limits cannot all be met with the levers available: {len(final.violations)} "
                       f"violation(s) remain in the least-violation plan; worst: {worst(final)}")
        else:
            message = "every level verified by AC load flow; all limits hold"
    if time_limited:
        message += "; stopped by the time limit, a re-run may differ"
    return PlanResult(
        success=success, status=status, message=message, levels=names, banks=banks,
        setpoints=setpoints, taps=taps, existing_steps=exist,
        losses_before_mw=dict(zip(names, map(float, before.losses_mw))),
        losses_after_mw=dict(zip(names, map(float, final.losses_mw))),
        losses_predicted_mw={k: float(v) for k, v in predicted.items()}, predicted_note=note,
        capital_cost=float(final.capital), objective_before=float(before.merit), objective_after=float(final.merit),
        violations=final.violations, violations_before=before.violations,
        flows_before=dict(zip(names, before.flows)), flows_after=dict(zip(names, final.flows)),
        log=log, ac_flows=pb.flows_run, milp_solves=milps, seconds=time.perf_counter() - t0,
        bound=bound or {}, time_limited=time_limited, stop_reason=stop, settings=st,
        bands={n: pb.vlim[l] for l, n in enumerate(names)})
