"""The one converter from a :class:`planner.study.result.StudyResult` to the report's input.

:func:`report_data` reads the typed study result and writes the plain, JSON-ready report data
that :mod:`planner.report.render` validates and renders (schema in its module docstring). Every
figure is taken from the study result as computed (AC load flows, the optimiser's bands, the
economics); nothing is solved again here.
"""
from __future__ import annotations

import numpy as np

__all__ = ["report_data"]

from ..network.compile import SLACK as _SLACK
from ..network.validate import model_warnings

ASSUMPTIONS = [
    "Loads are scaled uniformly per level (with any per-bus factors in the study file); "
    "generator active outputs keep their schedule and the slack bus takes up the balance.",
    "A capacitor bank's rating is its output at 1.0 pu voltage; it injects rating x V^2.",
    "Fixed units are in service at every level; switched units are set per level.",
    "Every figure shown as a result comes from a full AC Newton-Raphson load flow of the exact "
    "settings, with generator reactive limits enforced; linear predictions are shown only beside them.",
    "The load row of the NPV sensitivity scales losses before and after with the square of the load "
    "(series losses go with current squared, common practice); the plan is not re-solved for it.",
]


def _bus_number(element: str):
    """``"bus 443"`` -> 443; anything else -> None."""
    parts = str(element).split()
    if len(parts) == 2 and parts[0] == "bus":
        try:
            return int(parts[1])
        except ValueError:
            return None
    return None


def _branch_id(element: str) -> str:
    s = str(element)
    return s[len("branch "):] if s.startswith("branch ") else s


def _violations(violations, names_by_bus) -> tuple[list, list]:
    """Voltage breaches as rows; every other breach as rows with its own columns."""
    volt, other = [], []
    for v in violations:
        if v.kind == "voltage":
            b = _bus_number(v.element)
            volt.append({"bus": b, "name": names_by_bus.get(b, ""), "v_pu": float(v.value),
                         "limit_pu": float(v.limit)})
        else:
            other.append({"kind": v.kind, "element": _branch_id(v.element), "value": float(v.value),
                          "limit_value": float(v.limit), "excess": float(v.excess), "text": v.text()})
    return volt, other


def _flow_data(fr, lo, hi, violations, kv_by_bus, names_by_bus, ratings: bool) -> dict:
    """Everything the report shows about one AC load flow (base case or a plan, one level)."""
    c = fr.compiled
    if not fr.converged:
        return {"converged": False, "losses_mw": None, "message": str(fr.message)}
    vm = np.abs(fr.v)
    alive = np.flatnonzero(c.alive)
    i_lo = alive[np.argmin(vm[alive])]
    i_hi = alive[np.argmax(vm[alive])]
    lo = np.asarray(lo if lo is not None else c.v_min, float)
    hi = np.asarray(hi if hi is not None else c.v_max, float)
    volt, other = _violations(violations, names_by_bus)
    out = {
        "converged": True, "losses_mw": float(fr.losses_mw), "losses_mvar": float(fr.losses_mvar),
        "v_min_pu": float(vm[i_lo]), "v_min_bus": int(c.bus_ids[i_lo]),
        "v_max_pu": float(vm[i_hi]), "v_max_bus": int(c.bus_ids[i_hi]),
        "violations": volt, "other_limits_broken": other,
        "profile": [{"bus": int(c.bus_ids[i]), "name": names_by_bus.get(int(c.bus_ids[i]), ""),
                     "base_kv": kv_by_bus.get(int(c.bus_ids[i])), "v_pu": float(vm[i]),
                     "v_min_pu": float(lo[i]), "v_max_pu": float(hi[i])} for i in alive],
    }
    gens = []
    if fr.generators is not None:
        for g in fr.generators.itertuples():
            p, q = float(g.mw), float(g.mvar)
            s = float(np.hypot(p, q))
            gens.append({"gen_id": str(g.gen_id), "bus": int(g.bus), "mw": p, "mvar": q,
                         "power_factor": abs(p) / s if s > 0 else None,
                         "q_min_mvar": float(g.q_min_mvar), "q_max_mvar": float(g.q_max_mvar),
                         "at_limit": {"max": "q_max", "min": "q_min"}.get(str(g.at_limit), "")})
    slack_buses = {int(b) for b in c.bus_ids[fr.kind == _SLACK]}
    for g in gens:
        g["supply_point"] = g["bus"] in slack_buses
    out["generators"] = gens
    br = []
    loss = []
    if fr.branches is not None:
        t = fr.branches
        for r in t.itertuples():
            kv = kv_by_bus.get(int(r.from_bus))
            kv_to = kv_by_bus.get(int(r.to_bus))
            loss.append({"element": str(r.element), "base_kv": kv if r.element == "line" else
                         max(kv or 0.0, kv_to or 0.0), "loss_mw": float(r.loss_mw)})
            if ratings and float(r.rating_mva) > 0:
                br.append({"branch_id": str(r.branch_id), "element": str(r.element), "from_bus": int(r.from_bus),
                           "to_bus": int(r.to_bus), "rating_mva": float(r.rating_mva),
                           "loading_pct": float(r.loading_pct)})
    out["branches"] = br
    # losses by voltage level (lines at their voltage, transformers at their higher voltage)
    agg: dict = {}
    for x in loss:
        key = (x["base_kv"], x["element"])
        agg[key] = agg.get(key, 0.0) + x["loss_mw"]
    out["loss_breakdown"] = [{"base_kv": k[0], "element": k[1], "loss_mw": v}
                             for k, v in sorted(agg.items(), key=lambda kv: (-(kv[0][0] or 0), kv[0][1]))]
    return out




def _sites(plan, names, names_by_bus, kv_by_bus) -> list:
    """One row per bank site: fixed and switched units side by side, switched steps per level."""
    rows = []
    for b in plan.banks:
        g = b.get if isinstance(b, dict) else (lambda k, d=None, _b=b: getattr(_b, k, d))
        bus = int(g("bus"))
        unit = float(g("unit_mvar"))
        fixed, switched = g("fixed_units", 0), g("switched_units", 0)
        steps = g("steps_by_level", {}) or {}
        rows.append({"bus": bus, "name": names_by_bus.get(bus, ""), "base_kv": kv_by_bus.get(bus),
                     "unit_mvar": unit, "fixed_units": fixed, "switched_units": int(switched),
                     "fixed_mvar": float(fixed) * unit, "switched_mvar": float(switched) * unit,
                     "mvar": float(g("mvar")),
                     "switched_on_by_level": {n: int(steps.get(n, 0)) for n in names}})
    return rows


def _pos(x):
    return getattr(x, "value", x)


def report_data(result) -> dict:
    """The report data of a study result (see :mod:`planner.report.render` for the schema).

    >>> from planner.study.spec import read_study
    >>> from planner.study.run import run_study
    >>> data = report_data(run_study(read_study("tests/data/studies/feeder33_plan.toml"), jobs=1))
    >>> site = data["alternatives"][0]["sites"][0]
    >>> sorted(site)[:4], data["base"]["peak"]["converged"]
    (['base_kv', 'bus', 'fixed_mvar', 'fixed_units'], True)
    """
    spec = result.spec
    net = result.network
    names = [lv.name for lv in spec.levels]
    hours = {lv.name: float(lv.hours) for lv in spec.levels}
    names_by_bus = {int(b): str(n).strip() for b, n in zip(net.buses["bus"], net.buses["name"])}
    kv_by_bus = {int(b): float(k) for b, k in zip(net.buses["bus"], net.buses["base_kv"])}
    gen_names = {}
    for g in net.generators.itertuples():
        gen_names.setdefault(int(g.bus), str(g.gen_id))
    ratings = bool(spec.ratings)

    bk = spec.banks
    from ..study.run import candidate_sites
    sites = candidate_sites(net, spec)
    econ = spec.economics
    data = {
        "title": spec.title, "network": net.name or spec.network_path.name, "created": result.created,
        "question": spec.question, "currency": spec.currency, "peak_level": spec.peak_level,
        "criteria": {"v_min_pu": spec.v_min_pu, "v_max_pu": spec.v_max_pu,
                     "branch_loading": "within rating" if spec.ratings else "not checked",
                     "generator_reactive_output": "within limits" if spec.q_limits else "not checked",
                     "objective": ("value of annual energy and peak-demand losses plus annualised capital"
                                   if spec.objective == "cost" else "annual energy losses")},
        "levels": [{"name": lv.name, "hours": lv.hours, "p_scale": lv.p_scale, "q_scale": lv.q_scale,
                    "v_min_pu": lv.v_min_pu, "v_max_pu": lv.v_max_pu} for lv in spec.levels],
        "inputs": {
            "files": [{"role": f.role, "file": f.path, "sha256": f.sha256} for f in result.inputs],
            "tool_version": result.tool_version,
            "command": f"planner study {spec.path.name}",
            "solver": {"max_iterations": spec.max_iterations, "mip_gap": spec.mip_gap,
                       "rel_tolerance": spec.rel_tolerance, "step_seconds": spec.step_seconds,
                       "processes": result.jobs},
            "economics": {"energy_value_per_mwh": econ.get("energy_value_per_mwh"),
                          "demand_value_per_kw_year": econ.get("demand_value_per_kw_year"),
                          "discount_rate": econ.get("discount_rate"), "horizon_years": econ.get("horizon_years"),
                          "bank_life_years": econ.get("bank_life_years"), "om_fraction": econ.get("om_fraction")},
            "catalogue": {"per_site": bk.per_site, "per_mvar": bk.per_mvar,
                          "switched_per_mvar": bk.switched_per_mvar, "switched_per_site": bk.switched_per_site,
                          "max_new_sites": bk.max_new_sites, "budget": bk.budget},
            "candidates": [{"bus": s.bus, "name": names_by_bus.get(s.bus, ""), "base_kv": kv_by_bus.get(s.bus),
                            "unit_mvar": s.unit_mvar, "max_units": s.max_units, "kinds": "/".join(s.kinds)}
                           for s in sites],
            "bus_bands": [{"bus": int(b), "name": names_by_bus.get(int(b), ""), "v_min_pu": lo, "v_max_pu": hi}
                          for b, (lo, hi) in sorted(spec.bus_limits.items())],
            "generator_ranges": [{"bus": str(b), "v_min_pu": lo, "v_max_pu": hi}
                                 for b, (lo, hi) in sorted((spec.gen_range or {}).items(), key=lambda x: str(x[0]))],
        },
        "network_drawing": _topology(net, kv_by_bus, names_by_bus),
        "base": {}, "alternatives": [],
        # legal but suspicious features of the model (two slacks that disagree, ...) are said in the report
        "assumptions": list(ASSUMPTIONS) + [f"Model warning: {w}." for w in model_warnings(net)],
    }
    for n, b in result.base.items():
        d = _flow_data(b.flow, b.v_min, b.v_max, b.violations, kv_by_bus, names_by_bus, ratings)
        d["hours"] = b.hours
        data["base"][n] = d
    for a in result.alternatives:
        plan = a.plan
        levels = {}
        for n in names:
            fr = plan.flows_after[n]
            lo, hi = plan.bands.get(n, (None, None)) if plan.bands else (None, None)
            viol = [v for v in plan.violations if v.level == n]
            d = _flow_data(fr, lo, hi, viol, kv_by_bus, names_by_bus, ratings)
            d["verified"] = bool(fr.converged and not viol)
            d["predicted_mw"] = plan.losses_predicted_mw.get(n)
            levels[n] = d
        conv = []
        total_h = sum(hours.values())
        for e in plan.log:
            def mean(x):
                if x is None or not all(np.isfinite(x.get(m, np.nan)) for m in names):
                    return None
                return float(sum(x[m] * hours[m] for m in names) / total_h)
            conv.append({"iteration": int(e["iteration"]), "predicted_mw": mean(e.get("predicted_mw")),
                         "ac_mw": mean(e.get("ac_mw")), "trust_radius_pu": e.get("radius_v"),
                         "accepted": bool(e["accepted"]), "worst_violation": e.get("worst_violation")})
        setpoints = {n: [{"gen_id": gen_names.get(int(s["bus"]), ""), "bus": int(s["bus"]), "v_pu": float(s["v_pu"])}
                         for s in plan.setpoints[n]] for n in names}
        taps = {n: [dict(t, xfmr_id=str(t["xfmr_id"])) for t in plan.taps[n]] for n in names}
        sched = {}
        for g in net.generators.itertuples():
            sched.setdefault(int(g.bus), float(g.v_set_pu))
        xf = {str(t.xfmr_id): t for t in net.transformers.itertuples()} if len(net.transformers) else {}
        for n in names:
            for s in setpoints[n]:
                s["v_pu_before"] = sched.get(s["bus"])
            for t in taps[n]:
                row = xf.get(t["xfmr_id"])
                if row is None:
                    continue
                step = float(row.ratio_step_pu)
                t["ratio_before"] = float(row.ratio_pu)
                t["tap_side"] = str(row.tap_side)
                t["ratio_step_pu"] = step
                if step > 0:        # tap position: whole steps from a ratio of 1.0 pu
                    t["position"] = int(round((float(t["ratio"]) - 1.0) / step))
                    t["position_before"] = int(round((float(row.ratio_pu) - 1.0) / step))
        out = {
            "name": a.name, "description": a.spec.description, "verified": a.verified,
            "message": plan.message,
            "status": getattr(plan, "stop_reason", None) or str(_pos(plan.status)),
            "time_limited": bool(getattr(plan, "time_limited", False)),
            "capital_cost": plan.capital_cost if a.verified else None,
            "sites": _sites(plan, names, names_by_bus, kv_by_bus),
            "setpoints": setpoints, "taps": taps, "levels": levels, "convergence": conv,
            "existing_steps": {n: [{"shunt_id": str(x["shunt_id"]), "bus": int(x["bus"]), "steps_on": int(x["steps"])}
                                   for x in lst] for n, lst in plan.existing_steps.items()},
            "ac_flows": plan.ac_flows,
            "milp_solves": plan.milp_solves, "seconds": plan.seconds,
            "remaining_violations": [v.text() for v in plan.violations],
            "uses": {"banks": a.spec.banks, "setpoints": a.spec.setpoints, "taps": a.spec.taps},
        }
        if a.economics is not None:
            out["economics"] = a.economics.as_dict()
            out["sensitivity"] = list(a.sensitivity)
        data["alternatives"].append(out)
    return data


def _topology(net, kv_by_bus, names_by_bus) -> dict:
    """Buses and branches for the layered network drawing (energised elements only)."""
    def on(t):
        return t[t["energised"].astype(bool)] if "energised" in t.columns else t
    edges = []
    for t, kind, idc in ((net.lines, "line", "line_id"), (net.transformers, "transformer", "xfmr_id")):
        if t is None or not len(t):
            continue
        for r in on(t).itertuples():
            edges.append({"from_bus": int(r.from_bus), "to_bus": int(r.to_bus), "element": kind,
                          "id": str(getattr(r, idc))})
    slack = [int(b) for b, k in zip(net.buses["bus"], net.buses["kind"]) if str(k).lower() == "slack"]
    gens = sorted({int(b) for b in on(net.generators)["bus"]}) if len(net.generators) else []
    return {"buses": [{"bus": b, "name": names_by_bus.get(b, ""), "base_kv": kv_by_bus.get(b)}
                      for b in kv_by_bus], "branches": edges, "slack_buses": slack, "generator_buses": gens}
