"""Run a loss-reduction study: every alternative optimised across the load levels, verified
by AC load flow at each level, priced, and written up as a report folder.

Public functions: :func:`level_cases`, :func:`candidate_sites`, :func:`run_study` (returns the
report data and the plans). The ``planner study`` command is :mod:`planner.commands.study`.
"""
from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path

import numpy as np

from ..network.compile import PQ, compile_network
from ..network.io import read_network
from ..optimize.engine import LevelCase, PlanResult, plan as make_plan
from ..optimize.levers import BankSite, Levers, Limits, Objective, Options
from .economics import Economics, capital_recovery_factor, evaluate
from .spec import StudySpec, check_buses, read_study


def scaled_network(net, p_scale=1.0, q_scale=1.0, bus_scale=None):
    """A copy of ``net`` with its loads scaled (P and Q, then an extra factor per bus).

    Generation other than the slack keeps its schedule; the slack takes up the change.

    >>> from planner.network.model import Network, make_table
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 11.0, "kind": "slack"}]),
    ...               loads=make_table("loads", [{"load_id": "D", "bus": 1, "mw": 2.0, "mvar": 1.0}]))
    >>> float(scaled_network(net, 0.5, 0.4).loads.loc[0, "mvar"]), float(net.loads.loc[0, "mvar"])
    (0.4, 1.0)
    """
    out = net.copy()
    ld = out.loads
    factor = np.ones(len(ld))
    if bus_scale:
        factor = ld["bus"].map(lambda b: bus_scale.get(int(b), 1.0)).to_numpy(float)
    ld["mw"] = ld["mw"].to_numpy(float) * p_scale * factor
    ld["mvar"] = ld["mvar"].to_numpy(float) * q_scale * factor
    return out


def level_cases(net, spec: StudySpec, weights=None) -> list:
    """One :class:`LevelCase` per load level of the study (loads scaled, per-level bands)."""
    cases = []
    for i, lv in enumerate(spec.levels):
        cases.append(LevelCase(name=lv.name, network=scaled_network(net, lv.p_scale, lv.q_scale, lv.bus_scale),
                               weight=float(weights[i]) if weights is not None else lv.hours,
                               v_min=lv.v_min_pu, v_max=lv.v_max_pu))
    return cases


def candidate_sites(net, spec: StudySpec) -> list:
    """Bank sites from the study's catalogue: listed buses (or every PQ bus with load) with
    the catalogue's unit size and costs, per-site overrides applied."""
    bk = spec.banks
    if bk.candidates == "all-pq":
        c = compile_network(net)
        has_load = np.abs(c.s_load_p + c.s_load_i + c.s_load_z) > 0
        buses = [int(b) for b in c.bus_ids[(c.kind == PQ) & c.alive & has_load]]
    else:
        buses = list(bk.candidates)
    buses += [b for b in bk.overrides if b not in buses]
    sites = []
    for b in buses:
        o = bk.overrides.get(b)
        sites.append(BankSite(
            bus=int(b), unit_mvar=o.unit_mvar if o else bk.unit_mvar,
            max_units=o.max_units if o else bk.max_units, kinds=o.kinds if o else bk.kinds,
            fixed_cost=bk.per_site, cost_per_mvar=bk.per_mvar,
            switched_cost_per_mvar=bk.switched_per_mvar, switched_fixed_cost=bk.switched_per_site))
    return sites


def _economics(spec: StudySpec) -> Economics:
    e = spec.economics
    return Economics(energy_value_per_mwh=e["energy_value_per_mwh"],
                     demand_value_per_kw_year=e["demand_value_per_kw_year"],
                     discount_rate=e["discount_rate"], horizon_years=e["horizon_years"],
                     bank_life_years=e["bank_life_years"], om_fraction=e["om_fraction"])


def _objective_weights(spec: StudySpec, econ: Economics):
    """Per-level weights (money per MW of losses per year) and the capital factor."""
    if spec.objective == "losses":
        return np.array([lv.hours for lv in spec.levels], float), Objective(kind="losses")
    w = np.array([lv.hours * econ.energy_value(lv.name) for lv in spec.levels], float)
    for i, lv in enumerate(spec.levels):
        if lv.name == spec.peak_level:
            w[i] += 1000.0 * econ.demand_value_per_kw_year
    # a year's cost of capital: recovery of the investment over the bank life, plus O&M
    factor = capital_recovery_factor(econ.discount_rate, econ.life) + econ.om_fraction
    return w, Objective(kind="cost", loss_value_per_mw=1.0, capital_factor=factor)


def _flow_summary(res, limits_lo, limits_hi, names_by_bus):
    c = res.compiled
    vm = np.abs(res.v)
    alive = np.flatnonzero(c.alive)
    lo = alive[np.argmin(vm[alive])]
    hi = alive[np.argmax(vm[alive])]
    viol = []
    for i in alive:
        if vm[i] < limits_lo[i] - 1e-6 or vm[i] > limits_hi[i] + 1e-6:
            viol.append({"bus": int(c.bus_ids[i]), "name": names_by_bus.get(int(c.bus_ids[i]), ""),
                         "v_pu": float(vm[i]),
                         "limit": float(limits_lo[i] if vm[i] < limits_lo[i] else limits_hi[i])})
    gens = []
    if res.generators is not None:
        for g in res.generators.itertuples():
            if g.at_limit:
                gens.append({"gen": str(g.gen_id), "bus": int(g.bus), "mvar": float(g.mvar),
                             "limit": "q_max" if g.at_limit == "max" else "q_min"})
    return {
        "converged": bool(res.converged), "losses_mw": float(res.losses_mw),
        "v_min_pu": float(vm[lo]), "v_min_bus": int(c.bus_ids[lo]),
        "v_max_pu": float(vm[hi]), "v_max_bus": int(c.bus_ids[hi]),
        "violations": viol, "gens_at_limit": gens,
        "profile": [{"bus": int(c.bus_ids[i]), "name": names_by_bus.get(int(c.bus_ids[i]), ""),
                     "v_pu": float(vm[i])} for i in alive],
    }


def _band_arrays(spec: StudySpec, c, level):
    lo = np.full(c.n, level.v_min_pu if level.v_min_pu is not None else spec.v_min_pu)
    hi = np.full(c.n, level.v_max_pu if level.v_max_pu is not None else spec.v_max_pu)
    for b, (a, z) in spec.bus_limits.items():
        i = c.index_of([b])[0]
        lo[i], hi[i] = a, z
    return lo, hi


def run_study(spec: StudySpec, progress=None) -> tuple[dict, list]:
    """Optimise and verify every alternative of a study; returns (report data, plans).

    ``progress`` is called with short text lines (levels, alternatives, iterations).
    """
    say = progress or (lambda text: None)
    net = read_network(spec.network_path)
    check_buses(spec, net)
    names_by_bus = {int(b): str(n).strip() for b, n in zip(net.buses["bus"], net.buses["name"])}
    econ = _economics(spec)
    weights, objective = _objective_weights(spec, econ)
    cases = level_cases(net, spec, weights)
    hours = {lv.name: lv.hours for lv in spec.levels}
    sites = candidate_sites(net, spec)
    c0 = compile_network(net)
    limits = Limits(v_min=spec.v_min_pu, v_max=spec.v_max_pu, per_bus=spec.bus_limits,
                    ratings=spec.ratings, q_limits=spec.q_limits)
    options = Options(max_iterations=spec.max_iterations, mip_gap=spec.mip_gap, time_limit_s=spec.step_seconds,
                      merit_rel_tolerance=spec.rel_tolerance)
    data = {
        "title": spec.title, "network": net.name or spec.network_path.name,
        "created": _dt.datetime.now().strftime("%Y-%m-%d %H:%M"),
        "question": spec.question, "currency": spec.currency, "peak_level": spec.peak_level,
        "criteria": {"v_min_pu": spec.v_min_pu, "v_max_pu": spec.v_max_pu,
                     "branch loading": "within rating" if spec.ratings else "not checked",
                     "generator reactive output": "within limits" if spec.q_limits else "not checked",
                     "objective": ("value of annual energy and peak-demand losses plus annualised capital"
                                   if spec.objective == "cost" else "annual energy losses")},
        "levels": [{"name": lv.name, "hours": lv.hours, "scale_p": lv.p_scale, "scale_q": lv.q_scale}
                   for lv in spec.levels],
        "base": {}, "alternatives": [],
        "assumptions": [
            "Loads are scaled uniformly per level (with any per-bus factors in the study file); "
            "generator active outputs keep their schedule and the slack bus takes up the balance.",
            "A capacitor bank's rating is its output at 1.0 pu voltage; it injects rating x V^2.",
            "Fixed units are in service at every level; switched units are set per level.",
            f"Economics: discount rate {econ.discount_rate:.1%}, horizon {econ.horizon_years} years, "
            f"bank life {econ.life} years; energy and demand values as in the study file.",
            "Every figure shown as a result comes from a full AC Newton-Raphson load flow of the exact "
            "settings, with generator reactive limits enforced; linear predictions are shown only beside them.",
        ],
    }
    plans = []
    say(f"{len(cases)} load levels: " + ", ".join(lc.name for lc in cases))
    for k, alt in enumerate(spec.alternatives):
        say(f"alternative {k + 1}/{len(spec.alternatives)}: {alt.name}")
        levers = Levers(
            sites=sites if alt.banks else [],
            max_new_sites=alt.max_new_sites if alt.max_new_sites is not None else spec.banks.max_new_sites,
            budget=alt.budget if alt.budget is not None else spec.banks.budget,
            existing_shunts=spec.banks.existing_switchable and alt.banks,
            gen_v_range=spec.gen_range if alt.setpoints else None,
            taps=spec.taps and alt.taps, setpoints_per_level=spec.setpoints_per_level)

        def log(entry, _alt=alt):
            worth = _merit_text(spec, entry, weights)
            if entry.get("polish"):
                say(f"  {_alt.name}: local check of one-unit moves, {worth}")
            else:
                say(f"  {_alt.name}: iteration {entry['iteration']}, "
                    f"{'accepted' if entry['accepted'] else 'rejected'}, {worth}")
        plan = make_plan(cases, levers, limits, objective, options, progress=log)
        plans.append((alt, plan))
        if not data["base"]:
            for l, lc in enumerate(cases):
                lo, hi = _band_arrays(spec, c0, spec.levels[l])
                fr = plan.flows_before[lc.name]
                if fr.generators is None:   # base flows were solved without tables
                    from ..flow.newton import solve_flow
                    fr = solve_flow(lc.network)
                data["base"][lc.name] = _flow_summary(fr, lo, hi, names_by_bus)
        data["alternatives"].append(_alternative_data(spec, alt, plan, cases, c0, names_by_bus, hours, econ))
    if spec.proof is not None and spec.proof.any:      # N-1, hourly and bank checks (planner/proof)
        from ..proof.run import prove_study
        data["proof"], data["proof_frames"] = prove_study(spec, net, cases, plans, spec.proof, progress=progress)
    return data, plans


def _merit_text(spec: StudySpec, entry, weights) -> str:
    """The optimiser's objective in the units it has: money a year, or hour-weighted mean MW.
    While limits are broken a penalty in the same units is part of it, and the text says so."""
    merit = entry["merit"]
    if not np.isfinite(merit):
        return "no converged load flow"
    if spec.objective == "cost":
        cur = f"{spec.currency} " if spec.currency else ""
        text = f"objective {cur}{merit:,.0f} a year"
    else:
        text = f"objective {merit / (float(np.sum(weights)) or 1.0):.4f} MW mean losses"
    if (entry.get("violation") or 0) > 1e-9:
        text += ", limits broken (penalty included)"
    return text


def _alternative_data(spec, alt, plan: PlanResult, cases, c0, names_by_bus, hours, econ):
    names = [lc.name for lc in cases]
    banks = []
    for b in plan.banks:
        for kind, units in (("fixed", b["fixed_units"]), ("switched", b["switched_units"])):
            if units:
                steps = ({n: int(units) for n in names} if kind == "fixed"
                         else {n: int(b["steps_by_level"][n]) for n in names})
                banks.append({"bus": b["bus"], "name": names_by_bus.get(b["bus"], ""), "units": int(round(units)),
                              "unit_mvar": b["unit_mvar"], "mvar": float(units * b["unit_mvar"]), "kind": kind,
                              "steps_by_level": steps})
    gen_names = {}
    for g in cases[0].network.generators.itertuples():
        gen_names.setdefault(int(g.bus), str(g.gen_id))
    setpoints = {n: [{"gen": gen_names.get(s["bus"], ""), "bus": s["bus"], "v_pu": s["v_pu"]}
                     for s in plan.setpoints[n]] for n in names}
    taps = {n: [{"branch": t["xfmr_id"], "from_bus": t["from_bus"], "to_bus": t["to_bus"], "ratio": t["ratio"]}
                for t in plan.taps[n]] for n in names}
    levels = {}
    for l, n in enumerate(names):
        fr = plan.flows_after[n]
        lo, hi = plan.bands[n]      # the bands the optimiser verified against
        ok = bool(fr.converged and not [v for v in plan.violations if v.level == n])
        summary = _flow_summary(fr, lo, hi, names_by_bus) if fr.converged else {"losses_mw": None}
        summary.update({"verified": ok, "predicted_mw": plan.losses_predicted_mw.get(n),
                        "other_violations": [v.text() for v in plan.violations
                                             if v.level == n and v.kind != "voltage"]})
        if not fr.converged:
            summary["losses_mw"] = None
        levels[n] = summary
    total_h = sum(hours.values())
    conv = []
    for e in plan.log:
        ac = e.get("ac_mw")
        pred = e.get("predicted_mw")
        mean = lambda d: (float(sum(d[n] * hours[n] for n in names) / total_h)  # noqa: E731
                          if d is not None and all(np.isfinite(d[n]) for n in names) else None)
        conv.append({"iteration": int(e["iteration"]), "predicted_mw": mean(pred), "ac_mw": mean(ac),
                     "trust": e.get("radius_v"), "accepted": bool(e["accepted"]),
                     "worst_violation": e.get("worst_violation")})
    out = {
        "name": alt.name, "description": alt.description, "verified": bool(plan.verified),
        "message": plan.message, "status": plan.stop_reason or plan.status.value, "capital_cost": plan.capital_cost,
        "banks": banks, "setpoints": setpoints, "taps": taps, "levels": levels, "convergence": conv,
        "existing_steps": plan.existing_steps, "ac_flows": plan.ac_flows, "milp_solves": plan.milp_solves,
        "seconds": plan.seconds,
        "remaining_violations": [v.text() for v in plan.violations],
    }
    if plan.verified:
        res = evaluate(plan.losses_before_mw, plan.losses_after_mw, hours, plan.capital_cost, econ, spec.peak_level)
        out["economics"] = res.as_dict()
    return out


def slug(text: str) -> str:
    """A folder name from a study title: lower case, words joined by dashes.

    >>> slug("Wrenfold Vale: 2027 loss study!")
    'wrenfold-vale-2027-loss-study'
    """
    s = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")
    return s[:60] or "study"


def report_folder(spec: StudySpec, out_dir=None) -> Path:
    parent = Path(out_dir) if out_dir else (spec.output or spec.path.parent / "reports")
    return parent / slug(spec.path.stem)


def plan_to_dict(plan: PlanResult) -> dict:
    """A plan as plain data (the JSON that ``planner plan`` writes, per level)."""
    first = plan.levels[0]
    return {
        "verified": bool(plan.verified), "status": plan.status.value, "stop_reason": plan.stop_reason,
        "message": plan.message, "time_limited": plan.time_limited, "bound": plan.bound,
        "losses_predicted_note": plan.predicted_note,
        "levels": plan.levels,
        "banks": [{"bus": b["bus"], "units": b["units"], "mvar": b["mvar"], "fixed_units": b["fixed_units"],
                   "switched_units": b["switched_units"], "steps_by_level": b["steps_by_level"]}
                  for b in plan.banks],
        "setpoints": plan.setpoints[first] if len(plan.levels) == 1 else plan.setpoints,
        "taps": plan.taps[first] if len(plan.levels) == 1 else plan.taps,
        "existing_steps": plan.existing_steps,
        "losses_before_mw": _one(plan.losses_before_mw, plan.levels),
        "losses_after_mw": _one(plan.losses_after_mw, plan.levels),
        "losses_predicted_mw": _one(plan.losses_predicted_mw, plan.levels),
        "capital_cost": plan.capital_cost,
        "violations": [{"level": v.level, "kind": v.kind, "element": v.element, "value": v.value,
                        "limit": v.limit, "excess": v.excess, "text": v.text()} for v in plan.violations],
        "iterations": [e.to_dict() for e in plan.log], "ac_flows": plan.ac_flows, "milp_solves": plan.milp_solves,
        "seconds": plan.seconds,
    }


def _one(d, levels):
    return float(d[levels[0]]) if len(levels) == 1 and levels[0] in d else {k: float(v) for k, v in d.items()}
