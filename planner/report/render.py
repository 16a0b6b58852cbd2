"""Render a loss-reduction study as a self-contained HTML report, plus CSV and JSON.

The report loads nothing from outside: CSS and SVG charts are inline, there is no script. Every
string from the data is HTML-escaped. Result figures come from AC load flows; linear predictions
appear beside them, labelled as such.

Flow
----
``StudyResult`` --:func:`planner.report.convert.report_data`--> report data (plain, JSON-ready)
--:func:`build_tables` (once)--> tables --> the HTML sections, one CSV per table, report.json.

Public functions
----------------
``report_files(data) -> dict``          every file of the report folder (tables built once)
``build_tables(data) -> dict``          name -> :class:`~planner.report.markup.Table`
``render_report(data, tables=None)``    the HTML page
``report_tables(data, tables=None)``    name -> CSV text (every number in the HTML is in one of them)
``report_json(data, tables=None)``      the data plus all tables, as strict JSON
``SECTIONS``                            the report's sections in order (see "Adding a section")

Report data (written by ``report_data``; units in the key names; ``?`` optional)
------------------------------------------------------------------------------
::

    title, network?, created?, question?, currency?, peak_level?
    criteria: {v_min_pu, v_max_pu, <other key>: number | text}
    levels: [{name, hours, p_scale?, q_scale?, v_min_pu?, v_max_pu?}]
    inputs?: {files: [{role, file, sha256}], tool_version, command, solver: {...},
              economics: {...}, catalogue: {...}, candidates: [{bus, name, base_kv, unit_mvar,
              max_units, kinds}], bus_bands: [{bus, name, v_min_pu, v_max_pu}],
              generator_ranges: [{bus, v_min_pu, v_max_pu}]}
    network_drawing?: {buses: [{bus, name, base_kv}], branches: [{from_bus, to_bus, element, id}],
                       slack_buses: [...], generator_buses: [...]}
    base: {level: FLOW}
    alternatives: [{name, description?, verified, message?, status?, capital_cost?,
                    sites?: [{bus, name, base_kv, unit_mvar, fixed_units, switched_units,
                              fixed_mvar, switched_mvar, mvar, switched_on_by_level: {level: n}}],
                    setpoints?: {level: [{gen_id, bus, v_pu, v_pu_before?}]},
                    taps?: {level: [{xfmr_id, from_bus, to_bus, ratio, ratio_before?, tap_side?,
                                     ratio_step_pu?, position?, position_before?}]},
                    existing_steps?: {level: [{shunt_id, bus, steps_on}]},
                    levels: {level: FLOW + {verified, predicted_mw?}},
                    convergence?: [{iteration, predicted_mw, ac_mw, trust_radius_pu?, accepted?,
                                    worst_violation?}],
                    remaining_violations?: [text], ac_flows?, milp_solves?, seconds?,
                    economics?: EconomicResult.as_dict(), sensitivity?: [npv_sensitivity rows]}]
    assumptions?: [text], cautions?: [text]

    FLOW = {converged, losses_mw (None when not converged), losses_mvar?, v_min_pu, v_min_bus,
            v_max_pu, v_max_bus, violations: [{bus, name, v_pu, limit_pu}],
            other_limits_broken?: [{kind, element, value, limit_value, excess, text}],
            profile?: [{bus, name, base_kv, v_pu, v_min_pu, v_max_pu}],   # each bus's own band
            generators?: [{gen_id, bus, mw, mvar, power_factor, q_min_mvar, q_max_mvar, at_limit,
                           supply_point}],
            branches?: [{branch_id, element, from_bus, to_bus, rating_mva, loading_pct}],
            loss_breakdown?: [{base_kv, element, loss_mw}]}

Bad input raises ``ValueError`` with one line naming the path of the field, e.g.
``report data: alternatives[1].levels['peak'].losses_mw: missing``.

Adding a section
----------------
Write ``def _my_section(ctx: Context) -> list[str] | None`` returning HTML pieces (escape every
text with ``esc``; tables from ``ctx.T`` through ``ctx.table``), add its rows to
:func:`build_tables` if it shows new numbers (so they reach CSV and JSON), and insert
``Section("anchor", "Title", _my_section)`` in ``SECTIONS`` where it belongs. Return ``None``
to leave the section out of a report that has nothing for it.

>>> data = {"title": "Demo", "criteria": {"v_min_pu": 0.95, "v_max_pu": 1.05},
...         "levels": [{"name": "peak", "hours": 8760}],
...         "base": {"peak": {"converged": True, "losses_mw": 0.2, "v_min_pu": 0.93,
...                           "v_min_bus": 18, "v_max_pu": 1.0, "v_max_bus": 1}},
...         "alternatives": []}
>>> page = render_report(data)
>>> page.startswith("<!DOCTYPE html>") and "0.200" in page
True
>>> sorted(report_tables(data))[:3]
['alternative_levels.csv', 'bank_sites.csv', 'base_case.csv']
"""
from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from typing import Any, Callable

from . import svg
from .markup import CSS, Table, csv_text, esc, fmt, html_table, clean_number

__all__ = ["render_report", "report_tables", "report_json", "report_files", "build_tables",
           "SECTIONS", "Section", "Context", "SCOPE_CAUTIONS"]

SCHEMA_VERSION = 2

SCOPE_CAUTIONS = [
    "This is a planning-level, steady-state study: balanced positive-sequence load flow at the "
    "load levels listed, with the loads and limits given in the study data.",
    "Outside its scope, to be checked separately before any bank is bought or a setting is changed: "
    "harmonics and harmonic resonance with the new capacitance, switching transients and "
    "back-to-back energisation, protection settings and coordination, equipment ratings "
    "(voltage, current, short-circuit) and local codes and utility standards.",
    "The study informs a decision; the decision and the detailed design rest with licensed "
    "engineers working under the rules that apply locally.",
]


# ---------------------------------------------------------------------------------------------
# input checking

def _err(path: str, msg: str) -> ValueError:
    return ValueError(f"report data: {path}: {msg}")


def _need(obj: Any, key: str, path: str) -> Any:
    if not isinstance(obj, dict):
        raise _err(path, f"expected a mapping, got {type(obj).__name__}")
    if key not in obj:
        raise _err(f"{path}.{key}" if path else key, "missing")
    return obj[key]


def _number(v: Any, path: str, allow_none: bool = False) -> float | None:
    if v is None and allow_none:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _err(path, f"expected a number, got {v!r}")
    return float(v)


def _check(data: dict) -> list[str]:
    """Validate the parts every section relies on; returns the level names in order."""
    if not isinstance(data, dict):
        raise _err("(top)", "expected a mapping")
    _need(data, "title", "")
    crit = _need(data, "criteria", "")
    for k in ("v_min_pu", "v_max_pu"):
        _number(_need(crit, k, "criteria"), f"criteria.{k}")
    levels = _need(data, "levels", "")
    if not isinstance(levels, list) or not levels:
        raise _err("levels", "expected a non-empty list")
    names = []
    for i, lv in enumerate(levels):
        name = _need(lv, "name", f"levels[{i}]")
        _number(_need(lv, "hours", f"levels[{i}]"), f"levels[{i}].hours")
        if name in names:
            raise _err(f"levels[{i}].name", f"duplicate level {name!r}")
        names.append(name)
    base = _need(data, "base", "")
    for name in names:
        b = _need(base, name, "base")
        ok = b.get("converged", True) if isinstance(b, dict) else True
        for k in ("losses_mw", "v_min_pu", "v_max_pu"):
            _number(_need(b, k, f"base[{name!r}]") if ok else b.get(k), f"base[{name!r}].{k}", allow_none=not ok)
    alts = _need(data, "alternatives", "")
    if not isinstance(alts, list):
        raise _err("alternatives", "expected a list")
    seen = set()
    for i, a in enumerate(alts):
        p = f"alternatives[{i}]"
        aname = _need(a, "name", p)
        if aname in seen:
            raise _err(f"{p}.name", f"duplicate alternative {aname!r}")
        seen.add(aname)
        _need(a, "verified", p)
        alv = _need(a, "levels", p)
        for name in names:
            r = _need(alv, name, f"{p}.levels")
            q = f"{p}.levels[{name!r}]"
            _need(r, "verified", q)
            _number(_need(r, "losses_mw", q), f"{q}.losses_mw", allow_none=r.get("converged") is False)
        for j, s in enumerate(a.get("sites") or []):
            for k in ("bus", "fixed_units", "switched_units", "mvar"):
                _need(s, k, f"{p}.sites[{j}]")
    return names


# ---------------------------------------------------------------------------------------------
# derived tables (one source for HTML, CSV and JSON), built once per report

def _f(v):
    if v is None or isinstance(v, bool):
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _ok(a: dict, names: list[str]) -> bool:
    """The plan meets every limit at every level (AC load flow)."""
    return bool(a.get("verified")) and all(bool(a["levels"][n].get("verified")) for n in names)


def _solved(r: dict) -> bool:
    return r.get("converged", True) is not False and r.get("losses_mw") is not None


def _broken(r: dict) -> int | None:
    """Limits broken at one level by the AC load flow, None when it did not solve."""
    if not _solved(r):
        return None
    return len(r.get("violations") or []) + len(r.get("other_limits_broken") or [])


def _mvar_decimals(data: dict) -> int:
    """Mvar shown to the precision of the smallest unit size (0.6 -> 1 decimal, 0.15 -> 2)."""
    units = [s.get("unit_mvar") for a in data["alternatives"] for s in a.get("sites") or []]
    units += [c.get("unit_mvar") for c in (data.get("inputs") or {}).get("candidates") or []]
    d = 1
    for u in units:
        if u:
            for k in range(0, 4):
                if abs(round(float(u), k) - float(u)) < 1e-9:
                    d = max(d, k)
                    break
            else:
                d = 3
    return d


def _mw_decimals(data: dict) -> int:
    peak = max((float(b["losses_mw"]) for b in data["base"].values() if b.get("losses_mw") is not None),
               default=1.0)
    return 4 if peak < 1.0 else 3


def _npv_note(e: dict) -> str:
    pb = e.get("payback_years")
    if pb is not None and not math.isfinite(float(pb)):
        return "never pays back: the yearly saving does not exceed O&M"
    return ""


def build_tables(data: dict) -> dict[str, Table]:
    """Every table of the report, built once (HTML, CSV and JSON all read these rows)."""
    names = _check(data)
    hours = {lv["name"]: float(lv["hours"]) for lv in data["levels"]}
    T: dict[str, Table] = {}
    T["criteria"] = Table("criteria", [("criterion", "Criterion", "text"), ("value", "Value", "text")],
                          [{"criterion": k, "value": v} for k, v in data["criteria"].items()])
    T["levels"] = Table("levels", [("level", "Load level", "text"), ("hours", "Hours a year", "hours"),
                                   ("p_scale", "Active load scale", "scale"),
                                   ("q_scale", "Reactive load scale", "scale"),
                                   ("v_min_pu", "Band low (pu)", "pu"), ("v_max_pu", "Band high (pu)", "pu")],
                        [{"level": lv["name"], "hours": hours[lv["name"]], "p_scale": _f(lv.get("p_scale")),
                          "q_scale": _f(lv.get("q_scale")),
                          "v_min_pu": _f(lv.get("v_min_pu")) if lv.get("v_min_pu") is not None
                          else _f(data["criteria"]["v_min_pu"]),
                          "v_max_pu": _f(lv.get("v_max_pu")) if lv.get("v_max_pu") is not None
                          else _f(data["criteria"]["v_max_pu"])} for lv in data["levels"]])
    inp = data.get("inputs") or {}
    T["input_files"] = Table("input_files", [("role", "Role", "text"), ("file", "File", "text"),
                                             ("sha256", "SHA-256", "text")], list(inp.get("files") or []))
    T["candidate_sites"] = Table("candidate_sites", [
        ("bus", "Bus", "int"), ("name", "Name", "text"), ("base_kv", "kV", "kv"),
        ("unit_mvar", "Unit (Mvar)", "mvar"), ("max_units", "Units at most", "int"),
        ("kinds", "Kinds allowed", "text")], list(inp.get("candidates") or []))
    T["bus_bands"] = Table("bus_bands", [("bus", "Bus", "int"), ("name", "Name", "text"),
                                         ("v_min_pu", "Band low (pu)", "pu"), ("v_max_pu", "Band high (pu)", "pu")],
                           list(inp.get("bus_bands") or []))

    cases = [("base case", data["base"])] + [(a["name"], a["levels"]) for a in data["alternatives"]]
    lv_rows, viol, other, gens, prof, branches, losses = [], [], [], [], [], [], []
    for case, per in cases:
        for n in names:
            r = per[n]
            solved = _solved(r)
            row = {"case": case, "level": n, "ac_converged": solved,
                   "losses_mw": _f(r.get("losses_mw")) if solved else None,
                   "loss_energy_mwh": _f(r["losses_mw"]) * hours[n] if solved else None,
                   "v_min_pu": _f(r.get("v_min_pu")) if solved else None,
                   "v_min_bus": r.get("v_min_bus") if solved else None,
                   "v_max_pu": _f(r.get("v_max_pu")) if solved else None,
                   "v_max_bus": r.get("v_max_bus") if solved else None,
                   "limits_broken": _broken(r),
                   "gens_at_limit": sum(1 for g in r.get("generators") or [] if g.get("at_limit"))}
            nb = {p["bus"]: p.get("name", "") for p in r.get("profile") or []}
            row["v_min_bus_name"] = nb.get(row["v_min_bus"], "")
            row["v_max_bus_name"] = nb.get(row["v_max_bus"], "")
            lv_rows.append(row)
            if not solved:
                continue
            for v in r.get("violations") or []:
                viol.append({"case": case, "level": n, "bus": v.get("bus"), "name": v.get("name", ""),
                             "v_pu": _f(v.get("v_pu")), "limit_pu": _f(v.get("limit_pu"))})
            for v in r.get("other_limits_broken") or []:
                other.append({"case": case, "level": n, "kind": v.get("kind"), "element": v.get("element"),
                              "value": _f(v.get("value")), "limit_value": _f(v.get("limit_value")),
                              "excess": _f(v.get("excess")),
                              "unit": {"loading": "% of rating", "reactive": "Mvar"}.get(v.get("kind"), "")})
            for g in r.get("generators") or []:
                gens.append({"case": case, "level": n, "gen_id": g.get("gen_id"), "bus": g.get("bus"),
                             "supply_point": bool(g.get("supply_point")), "mw": _f(g.get("mw")),
                             "mvar": _f(g.get("mvar")), "power_factor": _f(g.get("power_factor")),
                             "q_min_mvar": _f(g.get("q_min_mvar")), "q_max_mvar": _f(g.get("q_max_mvar")),
                             "at_limit": g.get("at_limit") or ""})
            for p in r.get("profile") or []:
                prof.append({"case": case, "level": n, "bus": p["bus"], "name": p.get("name", ""),
                             "base_kv": _f(p.get("base_kv")), "v_pu": _f(p.get("v_pu")),
                             "v_min_pu": _f(p.get("v_min_pu")), "v_max_pu": _f(p.get("v_max_pu"))})
            for b in r.get("branches") or []:
                branches.append({"case": case, "level": n, "branch_id": b.get("branch_id"),
                                 "element": b.get("element"), "from_bus": b.get("from_bus"),
                                 "to_bus": b.get("to_bus"), "rating_mva": _f(b.get("rating_mva")),
                                 "loading_pct": _f(b.get("loading_pct"))})
            for x in r.get("loss_breakdown") or []:
                losses.append({"case": case, "level": n, "base_kv": _f(x.get("base_kv")),
                               "element": x.get("element"), "loss_mw": _f(x.get("loss_mw")),
                               "loss_energy_mwh": _f(x.get("loss_mw")) * hours[n]
                               if _f(x.get("loss_mw")) is not None else None})
    T["case_levels"] = Table("case_levels", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("ac_converged", "AC load flow solved", "bool"),
        ("losses_mw", "Losses (MW)", "mw"), ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh"),
        ("v_min_pu", "Lowest V (pu)", "pu"), ("v_min_bus", "at bus", "int"), ("v_min_bus_name", "bus name", "text"),
        ("v_max_pu", "Highest V (pu)", "pu"), ("v_max_bus", "at bus", "int"), ("v_max_bus_name", "bus name", "text"),
        ("limits_broken", "Limits broken", "int"), ("gens_at_limit", "Generators at a Mvar limit", "int")], lv_rows)
    T["base_case"] = Table("base_case", T["case_levels"].columns,
                           [r for r in lv_rows if r["case"] == "base case"])
    T["voltage_breaches"] = Table("voltage_breaches", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("bus", "Bus", "int"),
        ("name", "Bus name", "text"), ("v_pu", "V (pu)", "pu"), ("limit_pu", "Limit broken (pu)", "pu")], viol)
    T["other_breaches"] = Table("other_breaches", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("kind", "Limit", "text"),
        ("element", "Element", "text"), ("value", "Value", "num"), ("limit_value", "Limit value", "num"),
        ("excess", "Excess", "num"), ("unit", "Unit", "text")], other)
    T["generators"] = Table("generators", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("gen_id", "Generator", "text"),
        ("bus", "Bus", "int"), ("supply_point", "Supply point", "bool"), ("mw", "MW", "mw"),
        ("mvar", "Mvar", "mvar"), ("power_factor", "Power factor", "pf"),
        ("q_min_mvar", "Mvar min", "mvar"), ("q_max_mvar", "Mvar max", "mvar"),
        ("at_limit", "At limit", "text")], gens)
    T["profiles"] = Table("profiles", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("bus", "Bus", "int"),
        ("name", "Bus name", "text"), ("base_kv", "kV", "kv"), ("v_pu", "V (pu)", "pu"),
        ("v_min_pu", "Band low (pu)", "pu"), ("v_max_pu", "Band high (pu)", "pu")], prof)
    T["branch_loading"] = Table("branch_loading", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("branch_id", "Branch", "text"),
        ("element", "Element", "text"), ("from_bus", "From bus", "int"), ("to_bus", "To bus", "int"),
        ("rating_mva", "Rating (MVA)", "mvar"), ("loading_pct", "Loading (% of rating)", "pct1")], branches)
    T["loss_breakdown"] = Table("loss_breakdown", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("base_kv", "kV", "kv"),
        ("element", "Element", "text"), ("loss_mw", "Losses (MW)", "mw"),
        ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh")], losses)

    sites, setp, taps, conv, eco, eco_sum, comp, sens, remaining, runs, existing, alt_levels = \
        [], [], [], [], [], [], [], [], [], [], [], []
    base_energy = sum(r["loss_energy_mwh"] or 0.0 for r in T["base_case"].rows)
    base_rows = T["base_case"].rows
    comp.append({"alternative": "base case", "meets_limits": all(r["limits_broken"] == 0 for r in base_rows),
                 "sites": 0, "fixed_mvar": 0.0, "switched_mvar": 0.0, "capital_cost": None,
                 "loss_energy_mwh": base_energy, "energy_saved_mwh": None, "energy_reduction_pct": None,
                 "worst_v_min_pu": min((r["v_min_pu"] for r in base_rows if r["v_min_pu"] is not None), default=None),
                 "worst_v_max_pu": max((r["v_max_pu"] for r in base_rows if r["v_max_pu"] is not None), default=None),
                 "limits_broken": sum(r["limits_broken"] or 0 for r in base_rows),
                 "annual_saving": None, "payback_years": None, "npv": None, "bcr": None, "note": ""})
    for a in data["alternatives"]:
        an = a["name"]
        ok = _ok(a, names)
        for s in a.get("sites") or []:
            row = {"alternative": an, "bus": s["bus"], "name": s.get("name", ""), "base_kv": _f(s.get("base_kv")),
                   "unit_mvar": _f(s.get("unit_mvar")), "fixed_units": s["fixed_units"],
                   "switched_units": s["switched_units"], "fixed_mvar": _f(s.get("fixed_mvar")),
                   "switched_mvar": _f(s.get("switched_mvar")), "mvar": _f(s["mvar"])}
            for n in names:
                row[f"switched_on_{n}"] = (s.get("switched_on_by_level") or {}).get(n)
            sites.append(row)
        for n, lst in (a.get("setpoints") or {}).items():
            for s in lst:
                setp.append({"alternative": an, "level": n, "gen_id": s.get("gen_id"), "bus": s.get("bus"),
                             "v_pu_before": _f(s.get("v_pu_before")), "v_pu": _f(s.get("v_pu"))})
        for n, lst in (a.get("taps") or {}).items():
            for s in lst:
                taps.append({"alternative": an, "level": n, "xfmr_id": s.get("xfmr_id"),
                             "from_bus": s.get("from_bus"), "to_bus": s.get("to_bus"),
                             "tap_side": s.get("tap_side"), "ratio_step_pu": _f(s.get("ratio_step_pu")),
                             "ratio_before": _f(s.get("ratio_before")), "ratio": _f(s.get("ratio")),
                             "position_before": s.get("position_before"), "position": s.get("position")})
        for n, lst in (a.get("existing_steps") or {}).items():
            for x in lst or []:
                existing.append({"alternative": an, "level": n, "shunt_id": x.get("shunt_id"),
                                 "bus": x.get("bus"), "steps_on": x.get("steps_on")})
        energy, vmins, vmaxs, solved_all = 0.0, [], [], True
        for n in names:
            r = a["levels"][n]
            solved = _solved(r)
            solved_all &= solved
            base_mw = _f(data["base"][n].get("losses_mw"))
            ac = _f(r.get("losses_mw")) if solved else None
            red = None if ac is None or base_mw is None else base_mw - ac
            alt_levels.append({"alternative": an, "level": n, "meets_limits": bool(r.get("verified")),
                               "ac_converged": solved, "base_losses_mw": base_mw, "losses_mw": ac,
                               "predicted_mw": _f(r.get("predicted_mw")), "reduction_mw": red,
                               "reduction_pct": None if red is None or not base_mw else 100 * red / base_mw,
                               "v_min_pu": _f(r.get("v_min_pu")) if solved else None,
                               "v_min_bus": r.get("v_min_bus") if solved else None,
                               "v_max_pu": _f(r.get("v_max_pu")) if solved else None,
                               "v_max_bus": r.get("v_max_bus") if solved else None,
                               "limits_broken": _broken(r)})
            if solved:
                energy += ac * hours[n]
                vmins.append(_f(r.get("v_min_pu")))
                vmaxs.append(_f(r.get("v_max_pu")))
        lines = [str(x) for x in a.get("remaining_violations") or []]
        if not isinstance(a.get("remaining_violations"), list):
            lines = [f"{n}: voltage at bus {v['bus']}: {v['v_pu']:.4f} pu against limit {v['limit_pu']:.4f} pu"
                     for v in viol if v["case"] == an for n in [v["level"]]]
            lines += [f"{v['level']}: {v['kind']} at {v['element']}" for v in other if v["case"] == an]
        remaining += [{"alternative": an, "limit_broken": t} for t in lines]
        runs.append({"alternative": an, "meets_limits": ok, "status": a.get("status"),
                     "time_limited": bool(a.get("time_limited")),
                     "ac_flows": a.get("ac_flows"), "milp_solves": a.get("milp_solves"),
                     "seconds": _f(a.get("seconds")), "limits_broken": len(lines), "message": a.get("message")})
        for c in a.get("convergence") or []:
            conv.append({"alternative": an, "iteration": c.get("iteration"),
                         "predicted_mw": _f(c.get("predicted_mw")), "ac_mw": _f(c.get("ac_mw")),
                         "trust_radius_pu": _f(c.get("trust_radius_pu")), "accepted": c.get("accepted"),
                         "worst_violation": c.get("worst_violation") or ""})
        e = a.get("economics") or {}
        # a study without costs or values has no money figures to show (not a row of zeros)
        priced = bool(ok and e and ((_f(e.get("capital_cost")) or 0) > 0 or (_f(e.get("annual_saving")) or 0) != 0))
        if priced:
            for n in e.get("levels", names):
                eco.append({"alternative": an, "level": n,
                            "energy_before_mwh": _f(e["energy_before_mwh"].get(n)),
                            "energy_after_mwh": _f(e["energy_after_mwh"].get(n)),
                            "energy_saved_mwh": _f(e["energy_saved_mwh"].get(n)),
                            "value_saved": _f((e.get("energy_value_saved_by_level") or {}).get(n))})
            eco_sum.append({"alternative": an, **{k: _f(e.get(k)) for k in _ECO_KEYS if k != "energy_saved_mwh"},
                            "energy_saved_mwh": sum(e["energy_saved_mwh"].values()), "note": _npv_note(e)})
            for s in a.get("sensitivity") or []:
                sens.append({"alternative": an, "input": s["input"], "low": _f(s["low"]), "high": _f(s["high"]),
                             "unit": s.get("unit", ""), "npv_low": _f(s["npv_low"]), "npv_base": _f(s["npv_base"]),
                             "npv_high": _f(s["npv_high"])})
        st = a.get("sites") or []
        comp.append({"alternative": an, "meets_limits": ok, "sites": len(st),
                     "fixed_mvar": sum(_f(s.get("fixed_mvar")) or 0.0 for s in st),
                     "switched_mvar": sum(_f(s.get("switched_mvar")) or 0.0 for s in st),
                     "capital_cost": _f(e.get("capital_cost", a.get("capital_cost"))) if priced else None,
                     "loss_energy_mwh": energy if solved_all else None,
                     "energy_saved_mwh": base_energy - energy if solved_all else None,
                     "energy_reduction_pct": (100 * (base_energy - energy) / base_energy
                                              if solved_all and base_energy else None),
                     "worst_v_min_pu": min(vmins) if solved_all and vmins else None,
                     "worst_v_max_pu": max(vmaxs) if solved_all and vmaxs else None,
                     "limits_broken": len(lines),
                     "annual_saving": _f(e.get("annual_saving")) if priced else None,
                     "payback_years": _f(e.get("payback_years")) if priced else None,
                     "npv": _f(e.get("npv")) if priced else None,
                     "bcr": _f(e.get("bcr")) if priced else None,
                     "note": (_npv_note(e) if priced else "no costs or values in the study" if ok and e else
                              "" if ok else "limits still broken, so no money figures")})

    site_cols = [("alternative", "Alternative", "text"), ("bus", "Bus", "int"), ("name", "Bus name", "text"),
                 ("base_kv", "kV", "kv"), ("unit_mvar", "Unit (Mvar)", "mvar"),
                 ("fixed_units", "Fixed units", "int"), ("switched_units", "Switched units", "int"),
                 ("fixed_mvar", "Fixed (Mvar)", "mvar"), ("switched_mvar", "Switched (Mvar)", "mvar"),
                 ("mvar", "Installed (Mvar)", "mvar")]
    site_cols += [(f"switched_on_{n}", f"Switched units on, {n}", "int") for n in names]
    T["bank_sites"] = Table("bank_sites", site_cols, sites)
    T["setpoints"] = Table("setpoints", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"), ("gen_id", "Generator", "text"),
        ("bus", "Bus", "int"), ("v_pu_before", "Set-point today (pu)", "pu"), ("v_pu", "Set-point (pu)", "pu")], setp)
    T["taps"] = Table("taps", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"), ("xfmr_id", "Transformer", "text"),
        ("from_bus", "From bus", "int"), ("to_bus", "To bus", "int"), ("tap_side", "Ratio on side", "text"),
        ("ratio_step_pu", "Step (pu)", "pu"), ("ratio_before", "Ratio today (pu)", "pu"), ("ratio", "Ratio (pu)", "pu"),
        ("position_before", "Position today", "int"), ("position", "Position", "int")], taps)
    T["existing_banks"] = Table("existing_banks", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"), ("shunt_id", "Bank", "text"),
        ("bus", "Bus", "int"), ("steps_on", "Steps in service", "int")], existing)
    T["alternative_levels"] = Table("alternative_levels", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"),
        ("meets_limits", "Meets every limit", "bool"), ("ac_converged", "AC load flow solved", "bool"),
        ("base_losses_mw", "Base losses (MW)", "mw"), ("losses_mw", "Losses, AC (MW)", "mw"),
        ("predicted_mw", "Linear prediction (MW)", "mw"), ("reduction_mw", "Reduction (MW)", "mw"),
        ("reduction_pct", "Reduction", "pct"), ("v_min_pu", "Lowest V (pu)", "pu"), ("v_min_bus", "at bus", "int"),
        ("v_max_pu", "Highest V (pu)", "pu"), ("v_max_bus", "at bus", "int"),
        ("limits_broken", "Limits broken", "int")], alt_levels)
    T["limits_broken"] = Table("limits_broken", [("alternative", "Alternative", "text"),
                                                 ("limit_broken", "Limit still broken", "text")], remaining)
    T["optimiser_runs"] = Table("optimiser_runs", [
        ("alternative", "Alternative", "text"), ("meets_limits", "Meets every limit", "bool"),
        ("status", "Optimiser status", "text"), ("ac_flows", "AC load flows", "int"),
        ("milp_solves", "Mixed-integer solves", "int"), ("seconds", "Run time (s)", "years"),
        ("time_limited", "A step hit its time limit", "bool"),
        ("limits_broken", "Limits broken", "int"), ("message", "Verdict", "text")], runs)
    T["convergence"] = Table("convergence", [
        ("alternative", "Alternative", "text"), ("iteration", "Iteration", "int"),
        ("predicted_mw", "Linear prediction (MW)", "mw"), ("ac_mw", "AC load flow (MW)", "mw"),
        ("trust_radius_pu", "Trust radius (pu)", "scale"), ("accepted", "Accepted", "bool"),
        ("worst_violation", "Worst limit breach", "text")], conv)
    T["economics"] = Table("economics", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"),
        ("energy_before_mwh", "Loss energy before (MWh/yr)", "mwh"),
        ("energy_after_mwh", "Loss energy after (MWh/yr)", "mwh"),
        ("energy_saved_mwh", "Saved (MWh/yr)", "mwh"), ("value_saved", "Value saved (/yr)", "money")], eco)
    T["economics_summary"] = Table("economics_summary", [("alternative", "Alternative", "text")]
                                   + [(k, h, kind) for k, h, kind in _ECO_COLS] + [("note", "Note", "text")],
                                   eco_sum)
    T["npv_sensitivity"] = Table("npv_sensitivity", [
        ("alternative", "Alternative", "text"), ("input", "Input moved", "text"), ("low", "Low", "num"),
        ("high", "High", "num"), ("unit", "Unit", "text"), ("npv_low", "NPV at low", "money"),
        ("npv_base", "NPV as studied", "money"), ("npv_high", "NPV at high", "money")], sens)
    T["comparison"] = Table("comparison", [
        ("alternative", "Alternative", "text"), ("meets_limits", "Meets every limit (AC)", "bool"),
        ("limits_broken", "Limits broken", "int"), ("sites", "Bank sites", "int"),
        ("fixed_mvar", "Fixed (Mvar)", "mvar"), ("switched_mvar", "Switched (Mvar)", "mvar"),
        ("capital_cost", "Capital", "money"), ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh"),
        ("energy_saved_mwh", "Saved (MWh/yr)", "mwh"), ("energy_reduction_pct", "Reduction", "pct"),
        ("worst_v_min_pu", "Lowest V (pu)", "pu"), ("worst_v_max_pu", "Highest V (pu)", "pu"),
        ("annual_saving", "Saving (/yr)", "money"), ("payback_years", "Payback (years)", "years"),
        ("npv", "NPV", "money"), ("bcr", "Benefit/cost", "ratio"), ("note", "Note", "text")], comp)
    return T


_ECO_COLS = [
    ("energy_saved_mwh", "Loss energy saved (MWh/yr)", "mwh"),
    ("energy_value_saved", "Energy value saved (/yr)", "money"),
    ("peak_reduction_mw", "Peak loss reduction (MW)", "mw"),
    ("demand_value_saved", "Demand value saved (/yr)", "money"),
    ("annual_saving", "Total saving (/yr)", "money"),
    ("annual_om", "O&M (/yr)", "money"),
    ("net_annual_saving", "Net saving (/yr)", "money"),
    ("capital_cost", "Capital", "money"),
    ("annualised_capital", "Annualised capital (/yr)", "money"),
    ("payback_years", "Simple payback (years)", "years"),
    ("pv_savings", "PV of savings", "money"),
    ("pv_costs", "PV of costs", "money"),
    ("npv", "Net present value", "money"),
    ("bcr", "Benefit/cost ratio", "ratio"),
    ("discount_rate", "Discount rate", "rate"),
    ("horizon_years", "Horizon (years)", "int"),
    ("bank_life_years", "Bank life (years)", "int"),
    ("residual_value", "Residual value at horizon end", "money"),
]
_ECO_KEYS = [c[0] for c in _ECO_COLS]


# ---------------------------------------------------------------------------------------------
# public: tables and JSON

def report_tables(data: dict, tables: dict | None = None) -> dict[str, str]:
    """Every table of the report as CSV text, keyed by file name (``<table>.csv``)."""
    tables = tables if tables is not None else build_tables(data)
    return {f"{name}.csv": csv_text(t) for name, t in sorted(tables.items())}


def _clean(v):
    """Strict-JSON copy: non-finite floats become null, float noise rounded off (12 significant
    digits), tuples lists, keys strings."""
    if isinstance(v, float):
        return clean_number(v) if math.isfinite(v) else None
    if isinstance(v, dict):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if v is None or isinstance(v, (bool, int, str)):
        return v
    if hasattr(v, "item"):          # numpy scalar
        return _clean(v.item())
    return str(v)


def report_json(data: dict, tables: dict | None = None) -> str:
    """The input data and every derived table as strict JSON (``inf``/``nan`` written as null)."""
    tables = tables if tables is not None else build_tables(data)
    doc = {"schema_version": SCHEMA_VERSION, "data": _clean(data),
           "tables": {name: _clean(t.rows) for name, t in sorted(tables.items())}}
    return json.dumps(doc, indent=1, allow_nan=False, ensure_ascii=False)


def report_files(data: dict) -> dict[str, str]:
    """``report.html``, ``report.json`` and one CSV per table; the tables are built once."""
    frames = data.get("proof_frames") or {}       # N-1, hourly and bank-check tables (planner/proof)
    data = {k: v for k, v in data.items() if k != "proof_frames"}
    tables = build_tables(data)
    files = {"report.html": render_report(data, tables), "report.json": report_json(data, tables)}
    files.update(report_tables(data, tables))
    if frames:
        from ..proof.report import proof_files
        files.update(proof_files(frames))
    return files


# ---------------------------------------------------------------------------------------------
# HTML: the context every section reads, and the sections

@dataclass
class Context:
    """What every section function reads: the data, the tables, and a few derived facts."""
    data: dict
    T: dict
    names: list
    cur: str
    mwd: int          # MW decimals
    qd: int           # Mvar decimals
    comp: dict        # alternative -> comparison row
    best: dict | None        # comparison row of the recommended alternative
    runner_up: dict | None   # next verified alternative by NPV
    controlled: frozenset = frozenset()   # generator and supply buses (voltage held at a set-point)

    def table(self, t: Table, **kw) -> str:
        return html_table(t, mw_decimals=self.mwd, mvar_decimals=self.qd, currency=self.cur, **kw)

    def fmt(self, v, kind) -> str:
        return fmt(v, kind, mw_decimals=self.mwd, mvar_decimals=self.qd, currency=self.cur)

    def alt(self, name: str) -> dict:
        return next(a for a in self.data["alternatives"] if a["name"] == name)

    @property
    def money(self) -> bool:
        """The study has money figures (some capital or some value saved)."""
        return any((r.get("capital_cost") or 0) > 0 or (r.get("annual_saving") or 0) > 0
                   for r in self.T["comparison"].rows)


@dataclass
class Section:
    anchor: str
    title: str
    render: Callable[[Context], list | None]
    new_page: bool = True


def _p(text: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f"<p{c}>{esc(text)}</p>"


def _plural(n: int, one: str, many: str) -> str:
    return f"{n} {one if n == 1 else many}"


def _sentence(text) -> str:
    t = str(text).strip()
    t = t[:1].upper() + t[1:]
    return t if t.endswith((".", "!", "?")) else t + "."


def _names_by_bus(data: dict) -> dict:
    out = {}
    for b in data["base"].values():
        for p in b.get("profile") or []:
            if p.get("name"):
                out[str(p["bus"])] = p["name"]
    return out


def _with_bus_names(line: str, nb: dict) -> str:
    """``bus 452`` -> ``bus 452 (Cobbleston Mill 11)`` where the name is known and not given."""
    def sub(m):
        name = nb.get(m.group(1))
        return f"bus {m.group(1)} ({name})" if name and name != m.group(1) else m.group(0)
    return re.sub(r"\bbus (\w+)\b(?! \()", sub, line)


def _bus_text(bus, name) -> str:
    return f"{bus} {name}".strip() if bus is not None else ""


def _v_at(v, bus, name, ctx) -> str:
    if v is None:
        return ""
    return f"{ctx.fmt(v, 'pu')} at {_bus_text(bus, name)}".strip()


def _transposed(name: str, rows: list[dict], cols: list[tuple], ctx: Context,
                label_key: str = "alternative") -> Table:
    """Metric rows x case columns (reads better than a very wide table); cells pre-formatted."""
    out = []
    for key, header, kind in cols:
        row = {"item": header}
        for i, r in enumerate(rows):
            row[f"c{i}"] = ctx.fmt(r.get(key), kind)
        out.append(row)
    return Table(name, [("item", "", "text")] + [(f"c{i}", r[label_key], "pre") for i, r in enumerate(rows)], out)


def _margin(ctx: Context, alt_name: str):
    """Smallest distance of any bus voltage to its own band over all levels: (pu, bus, level)."""
    best = None
    for r in ctx.T["profiles"].rows:
        if r["case"] != alt_name or r["v_pu"] is None or r["v_min_pu"] is None:
            continue
        if r["bus"] in ctx.controlled:
            continue        # a generator bus sits at its set-point, by choice
        m = min(r["v_pu"] - r["v_min_pu"], r["v_max_pu"] - r["v_pu"])
        if best is None or m < best[0]:
            best = (m, r["bus"], r["name"], r["level"], "low" if r["v_pu"] - r["v_min_pu"] <= r["v_max_pu"] - r["v_pu"]
                    else "high")
    return best


def _changes(ctx: Context, table: str, alt: str, key: str, before: str, after: str, kind: str, label_cols):
    """Settings that change from today, one row per item and a column per level: 'today -> new'."""
    items: dict = {}
    for r in ctx.T[table].rows:
        if r["alternative"] != alt:
            continue
        k = r[key]
        row = items.setdefault(k, {c: r.get(c) for c, _, _ in label_cols})
        b, a = r.get(before), r.get(after)
        same = b is not None and a is not None and abs(a - b) < 1e-9

        def show(v, pos):
            text = ctx.fmt(v, kind)
            return text if pos is None else f"{text} ({pos:+d})".replace("(+0)", "(0)").replace("-", "−")
        pa, pb = r.get("position"), r.get("position_before")
        row[f"lv_{r['level']}"] = show(a, pa) if same or b is None else f"{show(b, pb)} → {show(a, pa)}"
        row["_changed"] = row.get("_changed", False) or not same
    rows = [r for r in items.values() if r.get("_changed")]
    return Table(table, list(label_cols) + [(f"lv_{n}", n, "pre") for n in ctx.names], rows), len(items)


def _settings_changes(ctx: Context, alt: str) -> list:
    """The set-points and transformer ratios that differ from today, a column per load level."""
    out = []
    for table, key, before, after, cols, caption in (
            ("setpoints", "gen_id", "v_pu_before", "v_pu", [("gen_id", "Generator", "text"), ("bus", "Bus", "int")],
             "Generator voltage set-points that change (pu, today → new)"),
            ("taps", "xfmr_id", "ratio_before", "ratio",
             [("xfmr_id", "Transformer", "text"), ("from_bus", "From", "int"), ("to_bus", "To", "int")],
             "Transformer ratios that change (pu, tap position in brackets, today → new)")):
        t, total = _changes(ctx, table, alt, key, before, after, "pu", cols)
        if t.rows:
            out.append(ctx.table(t, css_class="data compact", caption=f"{caption}: {len(t.rows)} of {total}"))
            if table == "taps":
                out.append(_tap_note(ctx, alt))
    return out


def _tap_note(ctx: Context, alt: str) -> str:
    """Which side the ratio is on and which way raises the other side (why a ratio goes down)."""
    sides = {r.get("tap_side") for r in ctx.T["taps"].rows if r["alternative"] == alt}
    if not sides or sides == {None}:
        return ""
    side = "from-bus" if sides == {"from"} else "to-bus" if sides == {"to"} else "named"
    other = "to-bus" if sides == {"from"} else "from-bus" if sides == {"to"} else "other"
    return _p(f"Ratios are on the {side} side; the position counts whole steps from a ratio of 1.0 pu. "
              f"The {other} voltage is about the {side} voltage divided by the ratio, so a lower ratio "
              f"raises the {other} side.", "note")


def _sites_display(ctx: Context, alt: str) -> Table:
    """One row per bank site: bus and name, unit size, fixed and switched units, switched units on."""
    rows = [r for r in ctx.T["bank_sites"].rows if r["alternative"] == alt]
    any_switched = any(r["switched_units"] for r in rows)
    cols = [("bus", "Bus", "int"), ("name", "Name", "text"), ("base_kv", "kV", "kv"),
            ("unit_mvar", "Unit (Mvar)", "mvar"), ("fixed_units", "Fixed units", "int"),
            ("switched_units", "Switched units", "int"), ("mvar", "Total (Mvar)", "mvar")]
    if any_switched:
        cols += [(f"switched_on_{n}", f"On at {n}", "int") for n in ctx.names]
    out = []
    for r in rows:
        d = dict(r)
        if not r["switched_units"]:
            for n in ctx.names:
                d[f"switched_on_{n}"] = "–"
        out.append(d)
    return Table("bank_sites", cols, out)


# ---- sections --------------------------------------------------------------------------------

def _recommendation(ctx: Context) -> list:
    body = []
    best, ru = ctx.best, ctx.runner_up
    alts = ctx.data["alternatives"]
    ok = [a for a in alts if ctx.comp[a["name"]]["meets_limits"]]
    base = ctx.comp["base case"]
    if best is None and not ok:
        body.append('<div class="warn"><strong>No alternative meets every limit at every load level.</strong> '
                    "The least-violation plans are in the Alternatives section with their AC load-flow figures; "
                    "none is recommended.</div>")
        return body
    rec = ctx.alt(best["alternative"]) if best is not None else ok[0]
    rn = rec["name"]
    why = ("highest net present value of the plans that meet every limit" if best is not None and ctx.money
           else "saves the most loss energy of the plans that meet every limit (the study has no money figures)")
    body.append(f'<p class="lead">Recommended: <strong>{esc(rn)}</strong> — {esc(why)}.</p>')
    sites = _sites_display(ctx, rn)
    if sites.rows:
        body.append(ctx.table(sites, css_class="data compact", caption="New capacitor banks (one row per site)"))
    else:
        body.append(_p("No new capacitor banks."))
    body += _settings_changes(ctx, rn)
    m = _margin(ctx, rn)
    bits = []
    if m is not None:
        bits.append(f"Smallest margin of a load bus to its own band: {ctx.fmt(m[0], 'pu')} pu ({m[4]} side) "
                    f"at bus {_bus_text(m[1], m[2])}, {m[3]} level.")
    c = ctx.comp[rn]
    if c.get("capital_cost") is not None and ctx.money:
        bits.append(f"Capital {ctx.fmt(c['capital_cost'], 'money')}; NPV {ctx.fmt(c['npv'], 'money')}; "
                    f"benefit/cost {ctx.fmt(c['bcr'], 'ratio')}; loss energy down "
                    f"{ctx.fmt(c['energy_saved_mwh'], 'mwh')} MWh a year ({ctx.fmt(c['energy_reduction_pct'], 'pct')}).")
    if bits:
        body.append("<ul>" + "".join(f"<li>{esc(b)}</li>" for b in bits) + "</ul>")
    if ru is not None and best is not None and ctx.money:
        dcap = (best["capital_cost"] or 0) - (ru["capital_cost"] or 0)
        dnpv = (best["npv"] or 0) - (ru["npv"] or 0)
        inc = Table("increment", [("item", "", "text"), ("rec", rn, "pre"), ("ru", ru["alternative"], "pre"),
                                  ("d", "Difference", "pre")], [
            {"item": "Capital", "rec": ctx.fmt(best["capital_cost"], "money"),
             "ru": ctx.fmt(ru["capital_cost"], "money"), "d": ctx.fmt(dcap, "money")},
            {"item": "Net present value", "rec": ctx.fmt(best["npv"], "money"), "ru": ctx.fmt(ru["npv"], "money"),
             "d": ctx.fmt(dnpv, "money")},
            {"item": "Benefit/cost ratio", "rec": ctx.fmt(best["bcr"], "ratio"), "ru": ctx.fmt(ru["bcr"], "ratio"),
             "d": ""},
            {"item": "Loss energy saved (MWh/yr)", "rec": ctx.fmt(best["energy_saved_mwh"], "mwh"),
             "ru": ctx.fmt(ru["energy_saved_mwh"], "mwh"),
             "d": ctx.fmt((best["energy_saved_mwh"] or 0) - (ru["energy_saved_mwh"] or 0), "mwh")}])
        body.append(ctx.table(inc, css_class="data compact", caption="Against the runner-up"))
        if dcap > 0:
            body.append(_p(f"The extra capital of {ctx.fmt(dcap, 'money')} over {ru['alternative']} buys "
                           f"{ctx.fmt(dnpv, 'money')} more net present value: each extra unit of capital returns "
                           f"{ctx.fmt(dnpv / dcap, 'ratio')} of net present value on top of itself. "
                           f"{ru['alternative']} has the higher benefit/cost ratio"
                           + (" but leaves that value unclaimed." if (ru["bcr"] or 0) > (best["bcr"] or 0)
                              else ".") if (ru["bcr"] or 0) > (best["bcr"] or 0) else
                           f"The extra capital of {ctx.fmt(dcap, 'money')} over {ru['alternative']} buys "
                           f"{ctx.fmt(dnpv, 'money')} more net present value."))
        else:
            body.append(_p(f"It needs {ctx.fmt(-dcap, 'money')} less capital than {ru['alternative']} "
                           f"and yields {ctx.fmt(dnpv, 'money')} more net present value."))
    n_base = base["limits_broken"]
    body.append(_p(f"Today (base case): {_plural(n_base, 'limit broken', 'limits broken')} over all load "
                   f"levels; loss energy {ctx.fmt(base['loss_energy_mwh'], 'mwh')} MWh a year.", "note"))
    body.append(_p("Install only after the checks listed under Cautions; the recommendation rests on the inputs "
                   "listed under Inputs.", "note"))
    return body


def _question(ctx: Context) -> list:
    body = []
    if ctx.data.get("question"):
        body.append(_p(ctx.data["question"]))
    body.append('<dl class="criteria">' + "".join(
        f"<dt>{esc(_criterion_label(r['criterion']))}</dt><dd>{esc(r['value'])}</dd>"
        for r in ctx.T["criteria"].rows) + "</dl>")
    body.append(ctx.table(ctx.T["levels"], css_class="data compact", caption="Load levels"))
    return body


def _comparison(ctx: Context) -> list:
    rows = ctx.T["comparison"].rows
    cols = [c for c in ctx.T["comparison"].columns if c[0] not in ("alternative", "note")]
    if not ctx.money:
        cols = [c for c in cols if c[0] not in ("capital_cost", "annual_saving", "payback_years", "npv", "bcr")]
    body = [ctx.table(_transposed("comparison", rows, cols, ctx), css_class="data wide")]
    notes = [f"{r['alternative']}: {r['note']}" for r in rows if r.get("note")]
    if notes:
        body.append("<ul class=\"note\">" + "".join(f"<li>{esc(t)}</li>" for t in notes) + "</ul>")
    body.append(_p("Losses and voltages are AC load-flow figures for every plan whose load flows solved, "
                   "including plans that still break limits (marked \"no\" in the first row); money figures "
                   "are given only for plans that meet every limit. Limits broken counts bus voltages outside "
                   "their own band, branch loadings over rating and generator Mvar outside its range, summed "
                   "over the load levels.", "note"))
    return body


def _inputs(ctx: Context) -> list | None:
    inp = ctx.data.get("inputs")
    if not inp:
        return None
    body = []
    meta = [("Tool version", inp.get("tool_version")), ("Command", inp.get("command"))]
    solver = inp.get("solver") or {}
    meta.append(("Optimiser settings", ", ".join(f"{k} = {v}" for k, v in solver.items())))
    e = inp.get("economics") or {}
    ev = e.get("energy_value_per_mwh")
    if isinstance(ev, dict):
        ev_text = ", ".join(f"{k} {ctx.fmt(v, 'money')}" for k, v in ev.items()) + " per MWh"
    elif ev is not None:
        ev_text = f"{ctx.fmt(ev, 'money')} per MWh"
    else:
        ev_text = ""
    if ev_text:
        meta.append(("Energy value", ev_text))
    if e.get("demand_value_per_kw_year") is not None:
        meta.append(("Peak-demand value", f"{ctx.fmt(e['demand_value_per_kw_year'], 'money')} per kW a year "
                                          f"(at the {ctx.data.get('peak_level', '')} level)"))
    for k, label, kind in (("discount_rate", "Discount rate", "rate"), ("horizon_years", "Horizon (years)", "int"),
                           ("bank_life_years", "Bank life (years)", "int"), ("om_fraction", "O&M a year", "rate")):
        if e.get(k) is not None:
            meta.append((label, ctx.fmt(e[k], kind) + (" of capital" if k == "om_fraction" else "")))
    cat = inp.get("catalogue") or {}
    if cat:
        meta.append(("Bank costs", f"{ctx.fmt(cat.get('per_site'), 'money')} per site + "
                                   f"{ctx.fmt(cat.get('per_mvar'), 'money')} per Mvar; switched: "
                                   f"+{ctx.fmt(cat.get('switched_per_site'), 'money')} per site + "
                                   f"{ctx.fmt(cat.get('switched_per_mvar'), 'money')} per Mvar"))
        meta.append(("New sites at most", "no cap" if cat.get("max_new_sites") is None else str(cat["max_new_sites"])))
        meta.append(("Capital cap", "none" if cat.get("budget") is None else ctx.fmt(cat["budget"], "money")))
    for g in inp.get("generator_ranges") or []:
        meta.append(("Generator set-point range, " + ("every generator" if str(g["bus"]) == "*" else f"bus {g['bus']}"),
                     f"{ctx.fmt(g['v_min_pu'], 'pu')} to {ctx.fmt(g['v_max_pu'], 'pu')} pu"))
    body.append('<dl class="criteria">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in meta if v)
                + "</dl>")
    if ctx.T["candidate_sites"].rows:
        body.append(ctx.table(ctx.T["candidate_sites"], css_class="data compact",
                              caption="Candidate bank sites and unit sizes"))
    if ctx.T["bus_bands"].rows:
        body.append(ctx.table(ctx.T["bus_bands"], css_class="data compact",
                              caption="Buses with a band of their own (all others use the load-level band)"))
    if ctx.T["input_files"].rows:
        body.append(ctx.table(ctx.T["input_files"], css_class="data compact hash",
                              caption="Input files (paths relative to the study file) and their SHA-256 checksums"))
    return body


def _base(ctx: Context) -> list:
    t = _case_display(ctx, "base case")
    body = [ctx.table(t, css_class="data compact")]
    bv = [r for r in ctx.T["voltage_breaches"].rows if r["case"] == "base case"]
    if bv:
        body.append(ctx.table(ctx.T["voltage_breaches"], rows=bv, show=["level", "bus", "name", "v_pu", "limit_pu"],
                              css_class="data compact", caption="Bus voltages outside their own band"))
    else:
        body.append(_p("Every bus voltage is inside its own band."))
    ob = [r for r in ctx.T["other_breaches"].rows if r["case"] == "base case"]
    if ob:
        body.append(ctx.table(ctx.T["other_breaches"], rows=ob, show=["level", "kind", "element", "value", "limit_value", "unit"],
                              css_class="data compact", caption="Other limits broken"))
    return body


def _case_display(ctx: Context, case: str) -> Table:
    rows = []
    for r in ctx.T["case_levels"].rows:
        if r["case"] != case:
            continue
        d = dict(r, v_low=_v_at(r["v_min_pu"], r["v_min_bus"], r["v_min_bus_name"], ctx),
                 v_high=_v_at(r["v_max_pu"], r["v_max_bus"], r["v_max_bus_name"], ctx))
        if not r["ac_converged"]:
            d["limits_broken"] = "AC not solved"
        rows.append(d)
    return Table("case_levels", [
        ("level", "Load level", "text"), ("losses_mw", "Losses (MW)", "mw"),
        ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh"), ("v_low", "Lowest voltage (pu) at bus", "text"),
        ("v_high", "Highest voltage (pu) at bus", "text"), ("limits_broken", "Limits broken", "int"),
        ("gens_at_limit", "Generators at a Mvar limit", "int")], rows)


def _alternatives(ctx: Context) -> list:
    body = []
    alts = ctx.data["alternatives"]
    if not alts:
        return [_p("No alternatives were studied.")]
    nb = _names_by_bus(ctx.data)
    lines_by_alt: dict = {}
    for r in ctx.T["limits_broken"].rows:
        lines_by_alt.setdefault(r["alternative"], []).append(r["limit_broken"])
    runs = {r["alternative"]: r for r in ctx.T["optimiser_runs"].rows}
    for a in alts:
        an = a["name"]
        ok = ctx.comp[an]["meets_limits"]
        # the heading, description and verdict stay together on a printed page
        body.append(f'<div class="althead"><h3 class="alt">{esc(an)}</h3>')
        if a.get("description"):
            body.append(_p(_sentence(a["description"])))
        lines = lines_by_alt.get(an, [])
        solved = all(_solved(a["levels"][n]) for n in ctx.names)
        if ok:
            body.append('<div class="good">' + esc(_sentence(a.get("message") or
                                                             "meets every limit at every load level")) + "</div>")
        else:
            head = ("The AC load flows of this plan solved and still break "
                    f"{_plural(len(lines), 'limit', 'limits')}" if solved else
                    "The AC load flow of this plan did not solve at every load level")
            box = [f'<div class="warn"><strong>{esc(head)}</strong>, so it is not a candidate for the '
                   "recommendation and has no money figures; its AC figures are below."]
            if lines:
                box.append("<ul>" + "".join(f"<li>{esc(_with_bus_names(t, nb))}</li>" for t in lines[:12]) + "</ul>")
                if len(lines) > 12:
                    box.append(esc(f"… and {len(lines) - 12} more (limits_broken.csv)."))
            box.append("</div>")
            body.append("".join(box))
        how = _how_line(runs[an], ctx)
        if how:
            body.append(_p(how, "how"))
        body.append("</div>")
        rows = []
        for r in ctx.T["alternative_levels"].rows:
            if r["alternative"] != an:
                continue
            d = dict(r)
            if r["ac_converged"]:
                red = "" if r["reduction_mw"] is None else ctx.fmt(r["reduction_mw"], "mw")
                if red and r["reduction_pct"] is not None:
                    red += f" ({ctx.fmt(r['reduction_pct'], 'pct')})"
                d.update(reduction=red, v_low=_v_at(r["v_min_pu"], r["v_min_bus"], nb.get(str(r["v_min_bus"]), ""), ctx),
                         v_high=_v_at(r["v_max_pu"], r["v_max_bus"], nb.get(str(r["v_max_bus"]), ""), ctx))
            else:
                d.update(losses_mw="AC not solved", reduction="", v_low="", v_high="", limits_broken="")
            rows.append(d)
        body.append(ctx.table(Table("alternative_levels", [
            ("level", "Load level", "text"), ("base_losses_mw", "Base losses (MW)", "mw"),
            ("losses_mw", "AC losses (MW)", "mw"), ("predicted_mw", "Linear prediction (MW)", "mw"),
            ("reduction", "Reduction MW (%)", "pre"), ("v_low", "Lowest voltage (pu) at bus", "text"),
            ("v_high", "Highest voltage (pu) at bus", "text"), ("limits_broken", "Limits broken", "int")], rows),
            css_class="data compact", caption="Results by load level (AC load flow; linear prediction beside it)",
            row_class=lambda r: "" if r["meets_limits"] else "unverified"))
        sites = _sites_display(ctx, an)
        if sites.rows:
            body.append(ctx.table(sites, css_class="data compact", caption="New capacitor banks (one row per site)"))
        elif (a.get("uses") or {}).get("banks", a.get("sites") is not None):
            body.append(_p("No new capacitor banks in this plan."))
        body += _settings_changes(ctx, an)
        ex = [r for r in ctx.T["existing_banks"].rows if r["alternative"] == an]
        if ex:
            piv: dict = {}
            for r in ex:
                piv.setdefault(r["shunt_id"], {"shunt_id": r["shunt_id"], "bus": r["bus"]})[f"lv_{r['level']}"] = r["steps_on"]
            body.append(ctx.table(Table("existing_banks", [("shunt_id", "Existing bank", "text"), ("bus", "Bus", "int")]
                                        + [(f"lv_{n}", n, "int") for n in ctx.names], list(piv.values())),
                                  css_class="data compact", caption="Existing switched banks: steps in service"))
    return body


def _how_line(run: dict, ctx: Context) -> str:
    bits = []
    if run.get("status"):
        bits.append(str(run["status"]))
    if run.get("ac_flows") is not None:
        bits.append(f"{ctx.fmt(run['ac_flows'], 'int')} AC load flows")
    if run.get("milp_solves") is not None:
        bits.append(f"{ctx.fmt(run['milp_solves'], 'int')} mixed-integer (MILP) solves")
    if run.get("seconds") is not None:
        bits.append(f"{run['seconds']:.1f} s")
    if run.get("time_limited"):
        bits.append("a mixed-integer step stopped at its time limit, so a faster or less loaded machine may "
                    "find a different plan")
    return ("How the optimiser got here: " + "; ".join(bits) + " (convergence in the appendix).") if bits else ""


def _shown_cases(ctx: Context) -> list:
    """Base case and every alternative whose AC load flows solved at every level."""
    out = ["base case"]
    for a in ctx.data["alternatives"]:
        if all(_solved(a["levels"][n]) for n in ctx.names):
            out.append(a["name"])
    return out


def _network(ctx: Context) -> list | None:
    nd = ctx.data.get("network_drawing")
    if not nd or not nd.get("buses"):
        return None
    rec = ctx.best["alternative"] if ctx.best is not None else None
    kv: dict = {}
    for b in nd["buses"]:
        kv.setdefault(b.get("base_kv"), []).append(b["bus"])
    layers = [(f"{k:g} kV" if k is not None else "kV unknown", sorted(v))
              for k, v in sorted(kv.items(), key=lambda x: -(x[0] or 0))]
    marks = {}
    if rec:
        for r in ctx.T["bank_sites"].rows:
            if r["alternative"] == rec:
                marks[r["bus"]] = f"{ctx.fmt(r['mvar'], 'mvar')} Mvar"
    names = {b["bus"]: b.get("name", "") for b in nd["buses"]}
    chart = svg.network_chart(layers, nd["branches"], title="Network by voltage level" +
                              (f", bank sites of {rec}" if rec else ""), names=names, marks=marks,
                              sources=list(nd.get("generator_buses") or []) + list(nd.get("slack_buses") or []))
    return [f"<figure>{chart}<figcaption>A sketch from the topology only (no geography): one row per voltage level, "
            "lines within a level as arcs, transformers dashed between levels; squares are generator and supply "
            "buses; orange triangles mark the recommended plan's bank sites with their size.</figcaption></figure>"]


def _operation(ctx: Context) -> list | None:
    """Supply point and generator Mvar, branch loading and losses by voltage level, before and after."""
    cases = _shown_cases(ctx)
    body = []
    # generators: rows = generator, a column per case, per level "Mvar (pf)"
    g = ctx.T["generators"].rows
    if g:
        supply = sorted({r["gen_id"] for r in g if r["supply_point"]})
        for n in ctx.names:
            piv: dict = {}
            for r in g:
                if r["level"] != n or r["case"] not in cases:
                    continue
                row = piv.setdefault(r["gen_id"], {"gen_id": r["gen_id"], "bus": r["bus"]})
                cell = f"{ctx.fmt(r['mvar'], 'mvar')}"
                if r["supply_point"] and r["power_factor"] is not None:
                    cell += f" (pf {ctx.fmt(r['power_factor'], 'pf')})"
                if r["at_limit"]:
                    cell += " at limit"
                row[f"c_{cases.index(r['case'])}"] = cell
            cap = f"Generator Mvar output, {n} level"
            if supply:
                cap += f"; supply point {', '.join(supply)} with its power factor"
            body.append(ctx.table(Table("generators", [("gen_id", "Generator", "text"), ("bus", "Bus", "int")]
                                        + [(f"c_{i}", c, "pre") for i, c in enumerate(cases)], list(piv.values())),
                                  css_class="data compact wrapnum", caption=cap))
    # branch loading: the most loaded rated branches
    br = ctx.T["branch_loading"].rows
    if br:
        peak = ctx.data.get("peak_level") or ctx.names[0]
        worst: dict = {}
        for r in br:
            if r["case"] in cases and r["loading_pct"] is not None:
                worst[r["branch_id"]] = max(worst.get(r["branch_id"], 0.0), r["loading_pct"])
        top = sorted(worst, key=lambda k: -worst[k])[:12]
        piv = {}
        for r in br:
            if r["branch_id"] in top and r["case"] in cases and r["level"] == peak:
                row = piv.setdefault(r["branch_id"], {"branch_id": r["branch_id"], "element": r["element"],
                                                      "ends": f"{r['from_bus']}–{r['to_bus']}",
                                                      "rating_mva": r["rating_mva"]})
                row[f"c_{cases.index(r['case'])}"] = r["loading_pct"]
        rows = sorted(piv.values(), key=lambda r: -worst[r["branch_id"]])
        body.append(ctx.table(Table("branch_loading", [("branch_id", "Branch", "text"), ("element", "Element", "text"),
                                                       ("ends", "Buses", "text"), ("rating_mva", "Rating (MVA)", "mvar")]
                                    + [(f"c_{i}", c, "pct1") for i, c in enumerate(cases)], rows),
                              css_class="data compact",
                              caption=f"Branch loading at the {peak} level, % of rating: the {len(rows)} most "
                                      "loaded branches (every branch and level in branch_loading.csv)"))
    # losses by voltage level and element
    lb = ctx.T["loss_breakdown"].rows
    if lb:
        piv = {}
        for r in lb:
            if r["case"] not in cases:
                continue
            key = (r["base_kv"], r["element"])
            row = piv.setdefault(key, {"where": f"{r['base_kv']:g} kV {r['element']}s"})
            c = f"c_{cases.index(r['case'])}"
            row[c] = (row.get(c) or 0.0) + (r["loss_energy_mwh"] or 0.0)
        rows = [piv[k] for k in sorted(piv, key=lambda k: (-(k[0] or 0), k[1]))]
        total = {"where": "total"}
        for i in range(len(cases)):
            total[f"c_{i}"] = sum(r.get(f"c_{i}") or 0.0 for r in rows)
        body.append(ctx.table(Table("loss_breakdown", [("where", "Where", "text")]
                                    + [(f"c_{i}", c, "mwh") for i, c in enumerate(cases)], rows + [total]),
                              css_class="data compact",
                              caption="Loss energy by voltage level, lines and transformers (MWh a year; "
                                      "transformers counted at their higher voltage)"))
    if not body:
        return None
    body.append(_p("Plans whose AC load flow did not solve at every level are left out of these tables.", "note"))
    return body


def _profiles(ctx: Context) -> list:
    body = []
    cases = _shown_cases(ctx)
    prof = ctx.T["profiles"].rows
    for n in ctx.names:
        rows = [r for r in prof if r["level"] == n]
        base = [r for r in rows if r["case"] == "base case"]
        if not base:
            continue
        order = sorted(base, key=lambda r: (-(r["base_kv"] or 0), r["bus"]))
        groups: dict = {}
        for r in order:
            label = f"{r['base_kv']:g} kV" if r["base_kv"] is not None else "kV unknown"
            groups.setdefault(label, []).append(r)
        buses = [r["bus"] for r in order]
        series = []
        for k, case in enumerate(cases):
            by_bus = {r["bus"]: r["v_pu"] for r in rows if r["case"] == case}
            series.append({"name": case, "y": [by_bus.get(b) for b in buses],
                           "color": svg.BASE_COLOR if k == 0 else svg.PALETTE[(k - 1) % len(svg.PALETTE)]})
        chart = svg.profile_chart([(lab, [str(r["bus"]) for r in rs]) for lab, rs in groups.items()], series,
                                  [r["v_min_pu"] for r in order], [r["v_max_pu"] for r in order],
                                  title=f"Bus voltages at the {n} level")
        body.append(f"<figure>{chart}<figcaption>Each bus's voltage at the {esc(n)} level, buses grouped by voltage "
                    "level; green: that bus's own band; red ring: outside its band. Base case and every plan whose "
                    "AC load flow solved.</figcaption></figure>")
    return body or [_p("No voltage profiles were supplied.")]


def _losses(ctx: Context) -> list:
    cases = _shown_cases(ctx)
    by = {(r["case"], r["level"]): r["losses_mw"] for r in ctx.T["case_levels"].rows}
    series = [{"name": c, "values": [by.get((c, n)) for n in ctx.names],
               "color": svg.BASE_COLOR if k == 0 else svg.PALETTE[(k - 1) % len(svg.PALETTE)]}
              for k, c in enumerate(cases)]
    chart = svg.bar_chart(ctx.names, series, title="Active power losses by load level (AC load flow)",
                          y_label="losses (MW)", x_label="load level",
                          value_format=lambda v: f"{v:.{ctx.mwd}f}")
    return [f"<figure>{chart}<figcaption>AC load-flow losses at each load level.</figcaption></figure>"]


def _economics(ctx: Context) -> list:
    priced = {r["alternative"] for r in ctx.T["comparison"].rows if r["npv"] is not None}
    srows = [r for r in ctx.T["economics_summary"].rows if r["alternative"] in priced]
    if not srows or not ctx.money:
        return [_p("No money figures: the study gives no costs or values, or no plan meets every limit.")]
    body = [ctx.table(_transposed("economics_summary", srows, _ECO_COLS, ctx), css_class="data wide",
                      caption="Economic summary, plans that meet every limit")]
    for r in srows:
        if r.get("note"):
            body.append(_p(f"{r['alternative']}: {r['note']}.", "note"))
    sens = ctx.T["npv_sensitivity"].rows
    rec = ctx.best["alternative"] if ctx.best is not None else None
    mine = [r for r in sens if r["alternative"] == rec]
    if mine:
        def lab(r, side):
            v = r[side]
            return ctx.fmt(v, "rate") if r["input"] == "discount rate" else f"× {v:g}"
        rows = [{"label": r["input"], "low": r["npv_low"], "high": r["npv_high"],
                 "low_text": f"{lab(r, 'low')}: {ctx.fmt(r['npv_low'], 'money')}",
                 "high_text": f"{lab(r, 'high')}: {ctx.fmt(r['npv_high'], 'money')}"} for r in mine]
        chart = svg.tornado_chart(rows, mine[0]["npv_base"], title=f"NPV sensitivity, {rec}",
                                  value_format=lambda v: ctx.fmt(v, "money_axis"))
        body.append(f"<figure>{chart}<figcaption>Net present value with one input moved at a time (blue: the input's "
                    "low value, orange: its high value; vertical line: "
                    f"as studied, {esc(ctx.fmt(mine[0]['npv_base'], 'money'))}); every plan's figures are in "
                    "npv_sensitivity.csv. The load row is an approximation (see Assumptions)."
                    "</figcaption></figure>")
        piv = {}
        for r in sens:
            row = piv.setdefault((r["input"], r["low"], r["high"]), {"input": f"{r['input']}: "
                                 + (f"{ctx.fmt(r['low'], 'rate')} / {ctx.fmt(r['high'], 'rate')}"
                                    if r["input"] == "discount rate" else f"× {r['low']:g} / × {r['high']:g}")})
            row[r["alternative"]] = f"{ctx.fmt(r['npv_low'], 'money')} / {ctx.fmt(r['npv_high'], 'money')}"
        alts = list(dict.fromkeys(r["alternative"] for r in sens))
        body.append(ctx.table(Table("npv_sensitivity", [("input", "Input moved (low / high)", "text")]
                                    + [(a, a, "pre") for a in alts], list(piv.values())), css_class="data compact",
                              caption="NPV at the low / high value of each input"))
    for r in srows:
        rows = [x for x in ctx.T["economics"].rows if x["alternative"] == r["alternative"]]
        body.append(ctx.table(ctx.T["economics"], rows=rows, show=[k for k in ctx.T["economics"].keys()
                                                                   if k != "alternative"],
                              css_class="data compact", caption=f"Loss energy by load level, {r['alternative']}"))
    body.append(_p("Money in constant prices, rounded to three significant figures. Savings and O&M at the end of "
                   "each year; a bank that wears out before the horizon is replaced at the same cost, and the life "
                   "left at the horizon end is credited straight-line as residual value. Payback is capital over net "
                   "yearly saving, undiscounted.", "note"))
    return body


def _cautions(ctx: Context) -> list:
    body = []
    if ctx.data.get("assumptions"):
        body.append("<h3>Assumptions</h3><ul>" + "".join(f"<li>{esc(s)}</li>" for s in ctx.data["assumptions"])
                    + "</ul>")
    body.append("<h3>Cautions</h3><ul>" + "".join(
        f"<li>{esc(s)}</li>" for s in list(ctx.data.get("cautions") or []) + SCOPE_CAUTIONS) + "</ul>")
    return body


def _proof(ctx: Context) -> list | None:
    """N-1, every hour of the year and bank checks (planner/proof), when the study asks for them."""
    if not ctx.data.get("proof"):
        return None
    from ..proof.report import proof_sections
    return [proof_sections(ctx.data["proof"])]


def _appendix(ctx: Context) -> list | None:
    body = []
    body.append(ctx.table(ctx.T["optimiser_runs"], show=["alternative", "status", "ac_flows", "milp_solves",
                                                         "seconds", "time_limited", "limits_broken"],
                          css_class="data compact", caption="Optimiser runs"))
    for a in ctx.data["alternatives"]:
        conv = a.get("convergence") or []
        if not conv:
            continue
        acc = [c.get("accepted") for c in conv]
        body.append("<figure>" + svg.convergence_chart(
            [c.get("iteration") for c in conv], [_f(c.get("predicted_mw")) for c in conv],
            [_f(c.get("ac_mw")) for c in conv], accepted=acc, title=f"Optimiser convergence, {a['name']}",
            y_label="mean losses over the year (MW)")
            + "<figcaption>Losses as the optimiser weighs them (mean over the year, each load level weighted by "
            "its hours) at each outer iteration: the linear model's prediction and the AC load flow of the same "
            "proposal" + ("; a rejected proposal is a hollow ring" if any(x is False for x in acc) else "")
            + ". The full table is in convergence.csv.</figcaption></figure>")
    return body


SECTIONS = [
    Section("recommendation", "Recommendation", _recommendation, new_page=False),
    Section("question", "Study question and criteria", _question, new_page=False),
    Section("comparison", "Comparison of alternatives", _comparison),
    Section("inputs", "Inputs the conclusions rest on", _inputs),
    Section("base", "Base case", _base),
    Section("alternatives", "Alternatives", _alternatives),
    Section("network", "Network and bank sites", _network),
    Section("operation", "Generators, branch loading and losses by voltage level", _operation),
    Section("profiles", "Voltage profiles", _profiles),
    Section("losses", "Losses by load level", _losses, new_page=False),
    Section("economics", "Economics", _economics),
    Section("cautions", "Assumptions and cautions", _cautions),
    Section("appendix", "Appendix: optimiser convergence", _appendix),
]


_CRITERIA_LABELS = {"v_min_pu": "Lowest allowed bus voltage (pu)", "v_max_pu": "Highest allowed bus voltage (pu)",
                    "branch_loading": "Branch loading", "generator_reactive_output": "Generator Mvar output",
                    "objective": "Objective"}


def _criterion_label(key) -> str:
    text = _CRITERIA_LABELS.get(key, str(key).replace("_", " "))
    return text[:1].upper() + text[1:]


def _context(data: dict, tables: dict) -> Context:
    names = _check(data)
    comp = {r["alternative"]: r for r in tables["comparison"].rows}
    ok = [r for r in tables["comparison"].rows if r["alternative"] != "base case" and r["meets_limits"]]
    if any(r["npv"] is not None for r in ok):
        ranked = sorted((r for r in ok if r["npv"] is not None), key=lambda r: -r["npv"])
    else:           # no money figures: the plan that saves the most loss energy
        ranked = sorted((r for r in ok if r["energy_saved_mwh"] is not None), key=lambda r: -r["energy_saved_mwh"])
    nd = data.get("network_drawing") or {}
    controlled = frozenset(list(nd.get("generator_buses") or []) + list(nd.get("slack_buses") or []))
    return Context(data=data, T=tables, names=names, cur=str(data.get("currency", "") or ""), controlled=controlled,
                   mwd=_mw_decimals(data), qd=_mvar_decimals(data), comp=comp,
                   best=ranked[0] if ranked else None, runner_up=ranked[1] if len(ranked) > 1 else None)


def render_report(data: dict, tables: dict | None = None) -> str:
    """The study report as one self-contained HTML page (schema in the module docstring)."""
    tables = tables if tables is not None else build_tables(data)
    ctx = _context(data, tables)
    alts = data["alternatives"]
    n_ok = sum(1 for a in alts if ctx.comp[a["name"]]["meets_limits"])
    head = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
        "style-src 'unsafe-inline'; img-src data:\">",
        f"<title>{esc(data['title'])}</title>", f"<style>{CSS}</style>", "</head><body><main>",
        '<header class="report">', f"<h1>{esc(data['title'])}</h1>"]
    for label, key in (("Network", "network"), ("Created", "created")):
        if data.get(key):
            head.append(f'<p class="meta">{label}: {esc(data[key])}</p>')
    head.append(f'<p class="meta">Load levels: {esc(", ".join(ctx.names))}. Alternatives studied: {len(alts)}; '
                f"meeting every limit in AC load flow: {n_ok}.</p>")
    shown = list(SECTIONS)
    if data.get("proof"):           # N-1, hourly and bank checks (planner/proof), before the cautions
        at = next((i for i, x in enumerate(shown) if x.anchor == "cautions"), len(shown))
        shown.insert(at, Section("proof", "Proving the plans: outages, every hour, bank checks", _proof))
    nav = shown
    head.append('<nav class="toc">' + " · ".join(f'<a href="#{esc(s.anchor)}">{esc(s.title)}</a>' for s in nav)
                + "</nav></header>")
    parts = []
    for s in shown:
        body = s.render(ctx)
        if body is None:
            continue
        cls = "section newpage" if s.new_page else "section"
        parts.append(f'<section id="{esc(s.anchor)}"><h2 class="{cls}">{esc(s.title)}</h2>' + "".join(body)
                     + "</section>")
    foot = ("<footer>Every figure in this report is also in report.json and the CSV files written beside it. "
            "Results are AC load-flow figures; linear-model predictions are shown only for comparison.</footer>")
    return "\n".join(head + parts + [foot, "</main></body></html>"]) + "\n"
