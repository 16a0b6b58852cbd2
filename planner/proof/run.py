"""Prove a study's plans: N-1 outages, every hour of the profile, bank engineering checks.

:func:`prove_study` takes the study, its network and the alternatives' plans and returns
``(data, frames)``: ``data`` a JSON-ready dict for the report, ``frames`` the full tables (CSV
outputs). :func:`plan_network` applies a plan's settings at one level to a network.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..bankcheck import CAUTION, check_banks
from ..contingency.n1 import compare_n1, outage_list, verify_n1
from ..hourly.profile import read_profile
from ..hourly.verify import BankControl, VoltageRule, verify_hours
from ..network.compile import compile_network
from ..network.model import make_table

CURVE_POINTS = 240          # points kept on a duration curve in the report
# Sweeps up to this many bus-flows (buses x load flows, N-1 and hourly together) run in this
# process unless a scheduler is named: starting a local Dask cluster and sending it the network
# costs seconds, more than the whole sweep of a network this size (the 50-bus demo, 5 cases x
# (8,760 hours + 100 outages), is 2.2 million bus-flows: about 3 s of one core in this process,
# measured with tests/perf/bench_study_proof.py).
IN_PROCESS_UP_TO = 10_000_000


def plan_network(net, plan, level: str):
    """A copy of ``net`` with a plan's settings at ``level``: new banks (fixed and switched parts as
    separate shunts, ``NEW-<bus>-F`` / ``NEW-<bus>-S``), existing switchable steps, generator
    setpoints and transformer ratios. Loads are left as in ``net``."""
    out = net.copy()
    sh = out.shunts
    for e in plan.existing_steps.get(level, []):
        sh.loc[sh.shunt_id.astype(str) == str(e["shunt_id"]), "steps_on"] = int(e["steps"])
    rows = []
    for b in plan.banks:
        fixed_mvar = float(b["fixed_units"]) * float(b["unit_mvar"])   # units may be continuous
        switched = int(round(b["switched_units"]))
        if fixed_mvar > 1e-12:
            rows.append(dict(shunt_id=f"NEW-{b['bus']}-F", bus=int(b["bus"]), mvar_per_step=fixed_mvar,
                             steps_max=1, steps_on=1, switchable=False, energised=True))
        if switched:
            rows.append(dict(shunt_id=f"NEW-{b['bus']}-S", bus=int(b["bus"]), mvar_per_step=float(b["unit_mvar"]),
                             steps_max=switched, steps_on=int(round(b["steps_by_level"][level])), switchable=True,
                             energised=True))
    if rows:
        out.shunts = make_table("shunts", pd.concat([sh, pd.DataFrame(rows)], ignore_index=True))
    g = out.generators
    for s in plan.setpoints.get(level, []):
        g.loc[g.bus.astype(int) == int(s["bus"]), "v_set_pu"] = float(s["v_pu"])
    tr = out.transformers
    for t in plan.taps.get(level, []):
        tr.loc[tr.xfmr_id.astype(str) == str(t["xfmr_id"]), "ratio_pu"] = float(t["ratio"])
    return out


def _switched_controls(net_by_level, names):
    """BankControl for every switchable shunt, with its steps at each level."""
    first = net_by_level[names[0]].shunts
    out = []
    for r in first[first.switchable.astype(bool) & first.energised.astype(bool)].itertuples(index=False):
        steps = tuple(int(net_by_level[n].shunts.loc[net_by_level[n].shunts.shunt_id == r.shunt_id, "steps_on"]
                          .iloc[0]) for n in names)
        out.append(BankControl(str(r.shunt_id), int(r.bus), float(r.mvar_per_step), int(r.steps_max), steps))
    return out


def _bands(spec, c):
    lo = np.full(c.n, spec.v_min_pu)
    hi = np.full(c.n, spec.v_max_pu)
    for b, (a, z) in spec.bus_limits.items():
        k = c.index_of([b])[0]
        lo[k], hi[k] = a, z
    return lo, hi


def _curve(values, hours, descending):
    order = np.argsort(-values if descending else values, kind="stable")
    x = np.cumsum(hours[order])
    y = values[order]
    if len(x) > CURVE_POINTS:
        pick = np.unique(np.linspace(0, len(x) - 1, CURVE_POINTS).round().astype(int))
        x, y = x[pick], y[pick]
    return [float(v) for v in x], [float(v) for v in y]


def prove_study(spec, net, cases, plans, proof, progress=None, scaled=None, client=None):
    """Run the sections the study asks for; returns ``(data, frames)`` (see module docstring).

    ``cases``: the study's level cases (``.name``, ``.network`` scaled to the level); ``plans``:
    list of ``(alternative spec, PlanResult)``; ``proof``: the study's ProofSpec. The N-1 and
    hourly sweeps run where ``[sweep]`` says (this process, this machine's cores or a Dask
    scheduler; unset: chosen by size, :func:`sweep_place`, and recorded in ``data["sweep"]``), or on
    ``client`` (a ``distributed.Client``) when given; every choice gives the same numbers.
    """
    if client is None and (proof.outages is not None or proof.profile is not None):
        where, work = sweep_place(net, cases, plans, proof)
        if where == "serial":
            data, frames = _prove(spec, net, cases, plans, proof, progress, None)
        else:
            from ..sweep.engine import sweep_client
            with sweep_client(where) as cl:
                data, frames = _prove(spec, net, cases, plans, proof, progress, cl)
                where = where if cl is not None else "serial"
        data["sweep"] = {"where": where, "bus_flows": work, "chosen": proof.scheduler is None,
                         "in_process_up_to": IN_PROCESS_UP_TO}
        return data, frames
    return _prove(spec, net, cases, plans, proof, progress, client)


def sweep_work(net, cases, plans, proof) -> int:
    """Bus-flows of a study's N-1 and hourly sweeps: buses x (outages x their levels + profile
    intervals) x (base case + plans). A count, so the choice it feeds is the same on every run."""
    n = len(net.buses)
    flows = 0
    if proof.outages is not None:
        o = proof.outages
        outs = outage_list(net, kinds=o.elements, ids=o.ids, min_kv=o.min_kv)
        flows += len(outs) * len(o.levels or [lc.name for lc in cases])
    if proof.profile is not None:
        flows += len(read_profile(proof.profile.file).start_h)
    return int(n * flows * (1 + len(plans)))


def sweep_place(net, cases, plans, proof):
    """Where the sweeps run and their work: ``(where, bus_flows)``. A scheduler named in the study
    (or by ``--scheduler``) is used as named; without one, sweeps of at most
    :data:`IN_PROCESS_UP_TO` bus-flows run in this process ("serial") and larger ones on this
    machine's cores ("local")."""
    work = sweep_work(net, cases, plans, proof)
    if proof.scheduler is not None:
        return proof.scheduler, work
    return ("serial" if work <= IN_PROCESS_UP_TO else "local"), work


def _prove(spec, net, cases, plans, proof, progress, client):
    say = progress or (lambda text: None)
    names = [lc.name for lc in cases]
    level_net = {lc.name: lc.network for lc in cases}
    data, frames = {}, {}
    step = getattr(progress, "step", None)

    if proof.outages is not None:
        o = proof.outages
        outs = outage_list(net, kinds=o.elements, ids=o.ids, min_kv=o.min_kv)
        levels = o.levels or names
        say(f"N-1: {len(outs)} outages x {len(levels)} levels x {1 + len(plans)} cases")
        kw = dict(band=o.band, bus_bands=o.bus_bands, ratings=o.ratings, screen=o.screen,
                  chunk_size=proof.chunk_size)
        # chunks of outages on the cluster, or in this process (the same chunks, the same numbers)
        kw.update(client=client) if client is not None else kw.update(where="serial")
        if step:                  # the bar counts finished chunks of outages
            kw.update(progress=lambda d, t: step(d, t))
        base_res = {n: verify_n1(level_net[n], outs, **kw) for n in levels}
        out = {"band": list(o.band), "levels": levels, "outages": len(outs), "min_kv": o.min_kv,
               "elements": list(o.elements), "cases": {}}
        all_rows, all_viol = [], []

        def record(case, n, res, cmp=None):
            entry = {"status": res.status.value, "message": res.message, "count": res.count,
                     "worst": res.worst(10).to_dict("records"),
                     "islanded": res.outcomes[res.outcomes.load_cut_mw > 0][
                         ["element", "element_id", "load_cut_mw", "buses_cut"]].to_dict("records"),
                     "failed": res.outcomes[res.outcomes.outcome == "no solution"][
                         ["element", "element_id", "worst_bus", "mismatch_mva"]].to_dict("records")}
            if cmp is not None:
                entry["cured"] = int((cmp.change == "cured").sum())
                entry["created"] = int((cmp.change == "created").sum())
                entry["changes"] = cmp[cmp.change != "remains"].head(20).to_dict("records")
            out["cases"].setdefault(case, {})[n] = entry
            all_rows.append(res.outcomes.assign(case=case, level=n))
            all_viol.append(res.violations.assign(case=case, level=n))

        for n in levels:
            record("base", n, base_res[n])
        for alt, plan in plans:
            for n in levels:
                res = verify_n1(plan_network(level_net[n], plan, n), outs, **kw)
                record(alt.name, n, res, compare_n1(base_res[n], res))
            if getattr(plan, "security", None) is not None:     # an N-1-secured alternative
                out.setdefault("secured", {})[alt.name] = plan.security.to_dict()
        data["outages"] = out
        frames["n1_outcomes.csv"] = pd.concat(all_rows, ignore_index=True)
        frames["n1_violations.csv"] = pd.concat(all_viol, ignore_index=True)

    if proof.profile is not None:
        _hourly(spec, net, plans, proof, names, data, frames, say, client, step)

    if proof.bank_checks is not None:
        b = proof.bank_checks
        out = {"step_limit_pct": b.step_limit_pct, "margin": b.resonance_margin, "orders": list(b.orders),
               "caution": CAUTION, "cases": {}}
        tabs = []
        existing = net.shunts[net.shunts.energised.astype(bool) & (net.shunts.mvar_per_step > 0)]
        base_banks = [dict(bank_id=str(r.shunt_id), bus=int(r.bus), mvar_per_step=float(r.mvar_per_step),
                           steps_max=int(r.steps_max)) for r in existing.itertuples(index=False)]
        variants = [("base", base_banks)]
        for alt, plan in plans:
            new = []
            for bk in plan.banks:
                fixed_mvar = float(bk["fixed_units"]) * float(bk["unit_mvar"])
                switched = int(round(bk["switched_units"]))
                if fixed_mvar > 1e-12:   # a fixed bank is energised in one step
                    new.append(dict(bank_id=f"NEW-{bk['bus']}-F", bus=int(bk["bus"]),
                                    mvar_per_step=fixed_mvar, steps_max=1))
                if switched:
                    new.append(dict(bank_id=f"NEW-{bk['bus']}-S", bus=int(bk["bus"]),
                                    mvar_per_step=float(bk["unit_mvar"]), steps_max=switched))
            variants.append((alt.name, base_banks + new))
        for case, banks in variants:
            res = check_banks(net, banks, step_limit_pct=b.step_limit_pct, orders=b.orders, margin=b.resonance_margin)
            out["cases"][case] = {"status": res.status.value, "message": res.message,
                                  "rows": res.table.to_dict("records"), "assumptions": res.assumptions}
            tabs.append(res.table.assign(case=case))
        data["bank_checks"] = out
        frames["bank_checks.csv"] = pd.concat(tabs, ignore_index=True)
    return data, frames


def _hourly(spec, net, plans, proof, names, data, frames, say, client, step):
    """Every interval of the profile for the base case and each plan (one Dask client for all)."""
    p = proof.profile
    chunk = proof.chunk_size
    prof = read_profile(p.file)
    c0 = compile_network(net)
    areas = net.buses.set_index("bus").loc[c0.bus_ids, "area"].to_numpy()
    f = prof.bus_factors(c0.bus_ids, areas, p.groups)
    mean_f = f.mean(axis=1)
    scales = np.array([lv.p_scale for lv in spec.levels])
    level_of = np.argmin(np.abs(mean_f[:, None] - scales[None, :]), axis=1)
    lo, hi = _bands(spec, c0)
    rule = VoltageRule(p.v_on_pu, p.v_off_pu, p.delay_h) if p.control == "voltage" else "schedule"
    hours = {lv.name: lv.hours for lv in spec.levels}
    out = {"file": p.file.name, "intervals": int(len(prof.start_h)), "hours": prof.total_hours,
           "control": p.control, "rule": ({"v_on_pu": p.v_on_pu, "v_off_pu": p.v_off_pu, "delay_h": p.delay_h}
                                          if p.control == "voltage" else {}),
           "hours_by_level": {n: float(prof.duration_h[level_of == i].sum()) for i, n in enumerate(names)},
           "band": [spec.v_min_pu, spec.v_max_pu], "cases": {}}
    rows = []
    variants = [("base", None)] + [(alt.name, plan) for alt, plan in plans]
    for case, plan in variants:
        nets = {n: (plan_network(net, plan, n) if plan is not None else net) for n in names}
        ccases = [compile_network(nets[n]) for n in names]
        banks = _switched_controls(nets, names)
        band = (lo, hi)
        if plan is not None and getattr(plan, "bands", None):
            # the bands the optimiser verified against (generator buses: their setpoint range);
            # an hour passes if it is inside the widest band of any level
            band = (np.min([plan.bands[n][0] for n in names], axis=0), np.max([plan.bands[n][1] for n in names], axis=0))
        say(f"hourly: {case}, {len(prof.start_h)} intervals")
        bar = (lambda d, t: step(d, t)) if step else None
        place = dict(client=client) if client is not None else dict(where="serial")
        res = verify_hours(ccases, f, level_of, prof.duration_h, band=band, banks=banks, rule=rule,
                           labels=prof.labels, start_h=prof.start_h, chunk_size=chunk, progress=bar,
                           **(place if rule == "schedule" else {}))
        if plan is None:
            losses = plans[0][1].losses_before_mw if plans else {}
        else:
            losses = plan.losses_after_mw
        estimate = float(sum((losses.get(n) or 0.0) * hours[n] for n in names)) if losses else None
        iv = res.intervals
        cx, cy = _curve(iv.losses_mw.to_numpy(), iv.duration_h.to_numpy(), True)
        vx, vy = _curve(iv.v_min_pu.to_numpy(), iv.duration_h.to_numpy(), False)
        out["cases"][case] = {
            "status": res.status.value, "message": res.message, "energy_loss_mwh": res.energy_loss_mwh,
            "level_estimate_mwh": estimate,
            "difference_mwh": (res.energy_loss_mwh - estimate) if estimate is not None else None,
            "hours_outside_band": res.hours_outside_band, "lowest": res.lowest, "highest": res.highest,
            "failed_intervals": int((~iv.converged).sum()),
            "operations": res.banks[["bank_id", "bus", "operations", "operations_per_year"]].to_dict("records"),
            "loss_curve": {"hours": cx, "mw": cy}, "voltage_curve": {"hours": vx, "v_pu": vy}}
        keep = iv[["start_h", "duration_h", "when", "converged", "losses_mw", "v_min_pu", "v_min_bus",
                   "v_max_pu", "v_max_bus", "outside_band"]]
        rows.append(keep.assign(case=case))
    data["hourly"] = out
    frames["hourly.csv"] = pd.concat(rows, ignore_index=True)

