"""Render a loss-reduction study result as a self-contained HTML report, plus CSV and JSON.

The report loads nothing from outside: CSS and SVG charts are inline, there is no script. Every
string from the data is HTML-escaped. Only AC-verified figures are presented as results; linear
predictions appear beside them, labelled as such.

Public functions
----------------
``render_report(data) -> str``          the HTML page
``report_tables(data) -> dict``         name -> CSV text (every number in the HTML is in one of them)
``report_json(data) -> str``            the input data plus all derived tables, as strict JSON
``report_files(data) -> dict``          the three above as a folder's files
``write_report(folder, data) -> Path``  writes ``report_files`` atomically (see ``atomic``)

Input schema (a JSON-like dict; units in the key names; ``?`` marks optional keys)
-------------------------------------------------------------------------------
::

    {
      "title": str,
      "network"?: str,                 # network name or file
      "created"?: str,                 # date/time text, shown as given
      "question"?: str,                # the study question in plain words
      "currency"?: str,                # label for money, e.g. "EUR"
      "peak_level"?: str,              # level whose loss reduction earns the demand value
      "criteria": {"v_min_pu": float, "v_max_pu": float, <other name>: number | str, ...},
      "levels": [{"name": str, "hours": float, "scale_p"?: float, "scale_q"?: float}, ...],
      "base": {                        # one entry per level name
        level: {
          "losses_mw": float,
          "v_min_pu": float, "v_min_bus": int|str, "v_max_pu": float, "v_max_bus": int|str,
          "converged"?: bool,
          "violations"?: [{"bus", "name"?, "v_pu", "limit"}],   # limit = the broken limit, pu
          "gens_at_limit"?: [{"gen", "bus", "mvar", "limit"}], # limit = "q_min" | "q_max" | text
          "profile"?: [{"bus", "name"?, "v_pu"}],
        }
      },
      "alternatives": [
        {
          "name": str, "description"?: str,
          "verified": bool,            # AC load flow confirmed the plan at every level
          "capital_cost"?: float,      # used when "economics" has no capital_cost
          "banks"?: [{"bus", "name"?, "units": int, "mvar": float,      # mvar = installed total
                      "kind": "fixed" | "switched", "steps_by_level"?: {level: int}}],
          "setpoints"?: {level: [{"gen", "bus", "v_pu"}]},
          "taps"?: {level: [{"branch", "ratio"}]},
          "levels": {level: {"verified": bool, "losses_mw": float | None,   # AC figure
                             "predicted_mw"?: float,                         # linear model
                             "converged"?: bool,                             # AC load flow solved
                             "v_min_pu"?, "v_min_bus"?, "v_max_pu"?, "v_max_bus"?,
                             "violations"?: [...], "other_violations"?: [str, ...],
                             "profile"?: [...]}},
          "message"?: str,             # the optimiser's verdict in one line
          "remaining_violations"?: [str, ...],   # limits still broken, one line each (when
                                       # absent, built from the levels' violation lists)
          "status"?: str, "ac_flows"?: int, "milp_solves"?: int, "seconds"?: float,
          "existing_steps"?: {level: [{"shunt_id", "bus", "steps"}]},  # existing switched banks
          "convergence"?: [{"iteration": int, "predicted_mw": float | None, "ac_mw": float | None,
                            "trust"?: float, "accepted"?: bool, "worst_violation"?: str}],   # losses as the optimiser
                                       # weighs them: hour-weighted mean over the levels
          "economics"?: planner.study.economics.EconomicResult.as_dict(),
        }, ...
      ],
      "assumptions"?: [str, ...],
      "cautions"?: [str, ...],
    }

Bad input raises ``ValueError`` with one line naming the path of the field, e.g.
``report data: alternatives[1].levels['peak'].losses_mw: missing``.

>>> data = {"title": "Demo", "criteria": {"v_min_pu": 0.95, "v_max_pu": 1.05},
...         "levels": [{"name": "peak", "hours": 8760}],
...         "base": {"peak": {"losses_mw": 0.2, "v_min_pu": 0.93, "v_min_bus": 18,
...                           "v_max_pu": 1.0, "v_max_bus": 1}},
...         "alternatives": []}
>>> page = render_report(data)
>>> page.startswith("<!DOCTYPE html>") and "0.200" in page
True
>>> sorted(report_tables(data))[:3]
['alternative_levels.csv', 'banks.csv', 'base_case.csv']
"""
from __future__ import annotations

import json
import math
import re
from pathlib import Path
from typing import Any

from . import svg
from .atomic import write_report_folder
from .markup import CSS, Table, csv_text, esc, fmt, html_table

__all__ = ["render_report", "report_tables", "report_json", "report_files", "write_report",
           "SCOPE_CAUTIONS"]

SCHEMA_VERSION = 1

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
        for k in ("losses_mw", "v_min_pu", "v_max_pu"):
            _number(_need(b, k, f"base[{name!r}]"), f"base[{name!r}].{k}")
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
            _number(_need(r, "losses_mw", q), f"{q}.losses_mw", allow_none=not r["verified"])
        for j, bk in enumerate(a.get("banks") or []):
            for k in ("bus", "units", "mvar"):
                _need(bk, k, f"{p}.banks[{j}]")
    return names


# ---------------------------------------------------------------------------------------------
# derived tables (one source for HTML, CSV and JSON)

def _f(v):
    return None if v is None else float(v)


def _alt_verified(a: dict, names: list[str]) -> bool:
    return bool(a.get("verified")) and all(bool(a["levels"][n].get("verified")) for n in names)


def _bus_label(bus, names_by_bus: dict) -> str:
    if bus is None:
        return ""
    name = names_by_bus.get(str(bus))
    return f"{bus} ({name})" if name and str(name) != str(bus) else str(bus)


def _names_by_bus(data: dict) -> dict:
    out = {}
    for b in data["base"].values():
        for p in b.get("profile") or []:
            if p.get("name"):
                out[str(p["bus"])] = p["name"]
    return out


def _other(r: dict) -> list:
    o = r.get("other_violations")
    return list(o) if isinstance(o, (list, tuple)) else []


def _level_limits_broken(r: dict) -> int | None:
    """Limits broken at one level by the AC load flow, None when it did not solve."""
    if r.get("converged") is False:
        return None
    return len(r.get("violations") or []) + len(_other(r))


def _remaining_lines(a: dict, names: list[str], nb: dict) -> list[str]:
    """The alternative's broken limits as text lines (given, or built from the level data)."""
    if isinstance(a.get("remaining_violations"), (list, tuple)):
        return [str(x) for x in a["remaining_violations"]]
    out = []
    for n in names:
        r = a["levels"][n]
        if r.get("converged") is False:
            continue
        for v in r.get("violations") or []:
            vp, lim = _f(v.get("v_pu")), _f(v.get("limit"))
            txt = f"{n}: voltage at bus {_bus_label(v.get('bus'), nb)}"
            if vp is not None:
                txt += f": {vp:.4f} pu"
            if lim is not None:
                txt += f" against limit {lim:.4f} pu"
            out.append(txt)
        out += [str(x) if str(x).startswith(f"{n}:") else f"{n}: {x}" for x in _other(r)]
    return out


def _build(data: dict) -> dict[str, Table]:
    names = _check(data)
    hours = {lv["name"]: float(lv["hours"]) for lv in data["levels"]}
    nb = _names_by_bus(data)
    T: dict[str, Table] = {}

    T["criteria"] = Table("criteria", [("criterion", "Criterion", "text"), ("value", "Value", "text")],
                          [{"criterion": k, "value": v} for k, v in data["criteria"].items()])
    T["levels"] = Table("levels", [("level", "Load level", "text"), ("hours", "Hours a year", "hours"),
                                   ("scale_p", "Active load scale", "scale"),
                                   ("scale_q", "Reactive load scale", "scale")],
                        [{"level": lv["name"], "hours": hours[lv["name"]],
                          "scale_p": _f(lv.get("scale_p")), "scale_q": _f(lv.get("scale_q"))}
                         for lv in data["levels"]])

    base_rows, viol, gens, prof = [], [], [], []
    for n in names:
        b = data["base"][n]
        base_rows.append({
            "level": n, "losses_mw": float(b["losses_mw"]),
            "loss_energy_mwh": float(b["losses_mw"]) * hours[n],
            "v_min_pu": float(b["v_min_pu"]), "v_min_bus": _bus_label(b.get("v_min_bus"), nb),
            "v_max_pu": float(b["v_max_pu"]), "v_max_bus": _bus_label(b.get("v_max_bus"), nb),
            "violations": len(b.get("violations") or []),
            "gens_at_limit": len(b.get("gens_at_limit") or []),
            "converged": b.get("converged", True)})
        for v in b.get("violations") or []:
            viol.append({"case": "base case", "level": n, "bus": v.get("bus"),
                         "name": v.get("name", ""), "v_pu": _f(v.get("v_pu")),
                         "limit_pu": _f(v.get("limit"))})
        for g in b.get("gens_at_limit") or []:
            gens.append({"case": "base case", "level": n, "gen": g.get("gen"), "bus": g.get("bus"),
                         "mvar": _f(g.get("mvar")), "limit": g.get("limit", "")})
        for p in b.get("profile") or []:
            prof.append({"case": "base case", "level": n, "bus": p["bus"],
                         "name": p.get("name", ""), "v_pu": _f(p.get("v_pu"))})
    T["base_case"] = Table("base_case", [
        ("level", "Load level", "text"), ("losses_mw", "Losses (MW)", "mw"),
        ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh"),
        ("v_min_pu", "Lowest V (pu)", "pu"), ("v_min_bus", "at bus", "text"),
        ("v_max_pu", "Highest V (pu)", "pu"), ("v_max_bus", "at bus", "text"),
        ("violations", "Buses outside band", "int"), ("gens_at_limit", "Gens at Q limit", "int"),
        ("converged", "Converged", "bool")], base_rows)

    banks, setp, taps, res, conv, eco, eco_sum, comp = [], [], [], [], [], [], [], []
    remaining, runs, existing = [], [], []
    base_energy = sum(r["loss_energy_mwh"] for r in base_rows)
    comp.append({"alternative": "base case", "verified": True, "banks": 0, "installed_mvar": 0.0,
                 "capital_cost": 0.0, "loss_energy_mwh": base_energy, "energy_saved_mwh": 0.0,
                 "energy_reduction_pct": 0.0,
                 "worst_v_min_pu": min(r["v_min_pu"] for r in base_rows),
                 "worst_v_max_pu": max(r["v_max_pu"] for r in base_rows),
                 "violations": sum(r["violations"] for r in base_rows),
                 "annual_saving": None, "payback_years": None, "npv": None, "bcr": None})
    for a in data["alternatives"]:
        an = a["name"]
        ok = _alt_verified(a, names)
        for bk in a.get("banks") or []:
            row = {"alternative": an, "bus": bk["bus"], "name": bk.get("name", ""),
                   "kind": bk.get("kind", "fixed"), "units": int(bk["units"]),
                   "mvar": float(bk["mvar"])}
            steps = bk.get("steps_by_level") or {}
            for n in names:
                s = steps.get(n, row["units"] if row["kind"] == "fixed" else None)
                row[f"units_on_{n}"] = s
            banks.append(row)
        for n, lst in (a.get("setpoints") or {}).items():
            for s in lst:
                setp.append({"alternative": an, "level": n, "gen": s.get("gen"),
                             "bus": s.get("bus"), "v_pu": _f(s.get("v_pu"))})
        for n, lst in (a.get("taps") or {}).items():
            for s in lst:
                taps.append({"alternative": an, "level": n, "branch": s.get("branch"),
                             "ratio": _f(s.get("ratio"))})
        alt_energy, vmins, vmaxs, nviol = 0.0, [], [], 0
        for n in names:
            r = a["levels"][n]
            base_mw = float(data["base"][n]["losses_mw"])
            ac = _f(r.get("losses_mw")) if r.get("verified") else None
            red = None if ac is None else base_mw - ac
            res.append({"alternative": an, "level": n, "verified": bool(r.get("verified")),
                        "base_losses_mw": base_mw, "losses_mw": ac,
                        "predicted_mw": _f(r.get("predicted_mw")), "reduction_mw": red,
                        "reduction_pct": None if red is None or base_mw == 0 else 100 * red / base_mw,
                        "v_min_pu": _f(r.get("v_min_pu")),
                        "v_min_bus": _bus_label(r.get("v_min_bus"), nb),
                        "v_max_pu": _f(r.get("v_max_pu")),
                        "v_max_bus": _bus_label(r.get("v_max_bus"), nb),
                        "ac_converged": r.get("converged"),
                        "limits_broken": _level_limits_broken(r)})
            if ac is not None:
                alt_energy += ac * hours[n]
            if r.get("v_min_pu") is not None:
                vmins.append(float(r["v_min_pu"]))
            if r.get("v_max_pu") is not None:
                vmaxs.append(float(r["v_max_pu"]))
            for v in r.get("violations") or []:
                viol.append({"case": an, "level": n, "bus": v.get("bus"), "name": v.get("name", ""),
                             "v_pu": _f(v.get("v_pu")), "limit_pu": _f(v.get("limit"))})
            for p in r.get("profile") or []:
                prof.append({"case": an, "level": n, "bus": p["bus"], "name": p.get("name", ""),
                             "v_pu": _f(p.get("v_pu"))})
        lines = _remaining_lines(a, names, nb)
        nviol = len(lines)
        remaining += [{"alternative": an, "violation": t} for t in lines]
        runs.append({"alternative": an, "verified": ok, "status": a.get("status"),
                     "ac_flows": a.get("ac_flows"), "milp_solves": a.get("milp_solves"),
                     "seconds": _f(a.get("seconds")), "limits_broken": nviol,
                     "message": a.get("message")})
        for n, lst in (a.get("existing_steps") or {}).items():
            for x in lst or []:
                existing.append({"alternative": an, "level": n, "bank": x.get("shunt_id"),
                                 "bus": x.get("bus"), "steps": x.get("steps")})
        for c in a.get("convergence") or []:
            conv.append({"alternative": an, "iteration": c.get("iteration"),
                         "predicted_mw": _f(c.get("predicted_mw")), "ac_mw": _f(c.get("ac_mw")),
                         "trust": _f(c.get("trust")), "accepted": c.get("accepted"),
                         "worst_violation": c.get("worst_violation") or ""})
        e = a.get("economics") or {}
        capital = _f(e.get("capital_cost", a.get("capital_cost")))
        if e:
            for n in e.get("levels", names):
                eco.append({"alternative": an, "level": n,
                            "energy_before_mwh": _f(e["energy_before_mwh"].get(n)),
                            "energy_after_mwh": _f(e["energy_after_mwh"].get(n)),
                            "energy_saved_mwh": _f(e["energy_saved_mwh"].get(n)),
                            "value_saved": _f((e.get("energy_value_saved_by_level") or {}).get(n))})
            eco_sum.append({"alternative": an, "verified": ok,
                            **{k: e.get(k) for k in _ECO_KEYS if k != "energy_saved_mwh"},
                            "energy_saved_mwh": sum(e["energy_saved_mwh"].values()),
                            "capital_cost": capital})
        mvar = sum(float(b["mvar"]) for b in a.get("banks") or [])
        comp.append({"alternative": an, "verified": ok, "banks": len(a.get("banks") or []),
                     "installed_mvar": mvar, "capital_cost": capital,
                     "loss_energy_mwh": alt_energy if ok else None,
                     "energy_saved_mwh": base_energy - alt_energy if ok else None,
                     "energy_reduction_pct": (100 * (base_energy - alt_energy) / base_energy
                                              if ok and base_energy else None),
                     "worst_v_min_pu": min(vmins) if ok and vmins else None,
                     "worst_v_max_pu": max(vmaxs) if ok and vmaxs else None,
                     "violations": nviol,      # shown for every plan: why it is not a result
                     "annual_saving": _f(e.get("annual_saving")) if ok and e else None,
                     "payback_years": _f(e.get("payback_years")) if ok and e else None,
                     "npv": _f(e.get("npv")) if ok and e else None,
                     "bcr": _f(e.get("bcr")) if ok and e else None})

    bank_cols = [("alternative", "Alternative", "text"), ("bus", "Bus", "text"),
                 ("name", "Bus name", "text"), ("kind", "Kind", "text"), ("units", "Units", "int"),
                 ("mvar", "Installed (Mvar)", "mvar")]
    bank_cols += [(f"units_on_{n}", f"Units on, {n}", "int") for n in names]
    T["banks"] = Table("banks", bank_cols, banks)
    T["setpoints"] = Table("setpoints", [("alternative", "Alternative", "text"),
                                         ("level", "Load level", "text"), ("gen", "Generator", "text"),
                                         ("bus", "Bus", "text"), ("v_pu", "Voltage set-point (pu)", "pu")],
                           setp)
    T["taps"] = Table("taps", [("alternative", "Alternative", "text"), ("level", "Load level", "text"),
                               ("branch", "Transformer", "text"), ("ratio", "Ratio (pu)", "pu")], taps)
    T["alternative_levels"] = Table("alternative_levels", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"),
        ("verified", "AC verified", "bool"), ("base_losses_mw", "Base losses (MW)", "mw"),
        ("losses_mw", "Losses, AC (MW)", "mw"), ("predicted_mw", "Linear prediction (MW)", "mw"),
        ("reduction_mw", "Reduction (MW)", "mw"), ("reduction_pct", "Reduction", "pct"),
        ("v_min_pu", "Lowest V (pu)", "pu"), ("v_min_bus", "at bus", "text"),
        ("v_max_pu", "Highest V (pu)", "pu"), ("v_max_bus", "at bus", "text"),
        ("ac_converged", "AC load flow solved", "bool"),
        ("limits_broken", "Limits broken", "int")], res)
    T["remaining_violations"] = Table("remaining_violations", [
        ("alternative", "Alternative", "text"), ("violation", "Limit still broken", "text")],
        remaining)
    T["optimiser_runs"] = Table("optimiser_runs", [
        ("alternative", "Alternative", "text"), ("verified", "AC verified", "bool"),
        ("status", "Optimiser status", "text"), ("ac_flows", "AC load flows", "int"),
        ("milp_solves", "Mixed-integer solves", "int"), ("seconds", "Run time (s)", "years"),
        ("limits_broken", "Limits broken", "int"), ("message", "Verdict", "text")], runs)
    T["existing_banks"] = Table("existing_banks", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"),
        ("bank", "Bank", "text"), ("bus", "Bus", "text"), ("steps", "Steps in service", "int")],
        existing)
    T["violations"] = Table("violations", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("bus", "Bus", "text"),
        ("name", "Bus name", "text"), ("v_pu", "V (pu)", "pu"), ("limit_pu", "Limit (pu)", "pu")], viol)
    T["generators_at_limit"] = Table("generators_at_limit", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("gen", "Generator", "text"),
        ("bus", "Bus", "text"), ("mvar", "Q (Mvar)", "mvar"), ("limit", "Limit", "text")], gens)
    T["profiles"] = Table("profiles", [("case", "Case", "text"), ("level", "Load level", "text"),
                                       ("bus", "Bus", "text"), ("name", "Bus name", "text"),
                                       ("v_pu", "V (pu)", "pu")], prof)
    T["convergence"] = Table("convergence", [
        ("alternative", "Alternative", "text"), ("iteration", "Iteration", "int"),
        ("predicted_mw", "Linear prediction (MW)", "mw"), ("ac_mw", "AC load flow (MW)", "mw"),
        ("trust", "Trust region", "scale"), ("accepted", "Accepted", "bool"),
        ("worst_violation", "Worst limit breach", "text")], conv)
    T["economics"] = Table("economics", [
        ("alternative", "Alternative", "text"), ("level", "Load level", "text"),
        ("energy_before_mwh", "Loss energy before (MWh/yr)", "mwh"),
        ("energy_after_mwh", "Loss energy after (MWh/yr)", "mwh"),
        ("energy_saved_mwh", "Saved (MWh/yr)", "mwh"), ("value_saved", "Value saved (/yr)", "money")],
        eco)
    T["economics_summary"] = Table("economics_summary", [
        ("alternative", "Alternative", "text"), ("verified", "AC verified", "bool")]
        + [(k, h, kind) for k, h, kind in _ECO_COLS], eco_sum)
    T["comparison"] = Table("comparison", [
        ("alternative", "Alternative", "text"), ("verified", "AC verified", "bool"),
        ("banks", "Banks", "int"), ("installed_mvar", "Installed (Mvar)", "mvar"),
        ("capital_cost", "Capital", "money"), ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh"),
        ("energy_saved_mwh", "Saved (MWh/yr)", "mwh"), ("energy_reduction_pct", "Reduction", "pct"),
        ("worst_v_min_pu", "Lowest V (pu)", "pu"), ("worst_v_max_pu", "Highest V (pu)", "pu"),
        ("violations", "Limits broken", "int"), ("annual_saving", "Saving (/yr)", "money"),
        ("payback_years", "Payback (years)", "years"), ("npv", "NPV", "money"),
        ("bcr", "Benefit/cost", "ratio")], comp)
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

def report_tables(data: dict) -> dict[str, str]:
    """Every table of the report as CSV text, keyed by file name (``<table>.csv``)."""
    return {f"{name}.csv": csv_text(t) for name, t in sorted(_build(data).items())}


def _clean(v):
    """Strict-JSON copy: non-finite floats become null, tuples lists, keys strings."""
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, dict):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if v is None or isinstance(v, (bool, int, str)):
        return v
    if hasattr(v, "item"):          # numpy scalar
        return _clean(v.item())
    return str(v)


def report_json(data: dict) -> str:
    """The input data and every derived table as strict JSON (``inf``/``nan`` written as null)."""
    tables = _build(data)
    doc = {"schema_version": SCHEMA_VERSION, "data": _clean(data),
           "tables": {name: _clean(t.rows) for name, t in sorted(tables.items())}}
    return json.dumps(doc, indent=1, allow_nan=False, ensure_ascii=False)


def report_files(data: dict) -> dict[str, str]:
    """``report.html``, ``report.json`` and one CSV per table."""
    frames = data.get("proof_frames") or {}
    data = {k: v for k, v in data.items() if k != "proof_frames"}
    files = {"report.html": render_report(data), "report.json": report_json(data)}
    files.update(report_tables(data))
    if frames:                      # N-1, hourly and bank-check tables (planner/proof)
        from ..proof.report import proof_files
        files.update(proof_files(frames))
    return files


def write_report(folder, data: dict) -> Path:
    """Write :func:`report_files` into ``folder`` atomically (the old report stays on failure)."""
    return write_report_folder(folder, report_files(data))


# ---------------------------------------------------------------------------------------------
# HTML

def _mw_decimals(data: dict) -> int:
    peak = max(float(b["losses_mw"]) for b in data["base"].values())
    return 4 if peak < 1.0 else 3


def _profile_chart(data, names, level, verified_alts) -> str | None:
    base = data["base"][level].get("profile") or []
    if not base:
        return None
    buses = [str(p["bus"]) for p in base]
    index = {b: i for i, b in enumerate(buses)}
    series = [{"name": "base case", "y": [_f(p.get("v_pu")) for p in base], "color": svg.BASE_COLOR,
               "dash": "", "width": 2.6}]
    for k, a in enumerate(verified_alts):
        y = [None] * len(buses)
        for p in a["levels"][level].get("profile") or []:
            i = index.get(str(p["bus"]))
            if i is not None:
                y[i] = _f(p.get("v_pu"))
        series.append({"name": a["name"], "y": y, "color": svg.PALETTE[k % len(svg.PALETTE)],
                       "dash": svg.DASHES[(k + 1) % len(svg.DASHES)]})
    lo, hi = float(data["criteria"]["v_min_pu"]), float(data["criteria"]["v_max_pu"])
    return svg.line_chart(series, title=f"Bus voltages at the {level} level",
                          x_label="bus number (in network order)", y_label="voltage (pu)",
                          x_categories=buses, height=400,
                          band=(lo, hi, f"planning band {lo:.3f} to {hi:.3f} pu"),
                          hlines=[(lo, f"min {lo:.3f} pu"), (hi, f"max {hi:.3f} pu")])


_CRITERIA_LABELS = {"v_min_pu": "Lowest allowed bus voltage (pu)",
                    "v_max_pu": "Highest allowed bus voltage (pu)"}


def _criterion_label(key) -> str:
    text = _CRITERIA_LABELS.get(key, str(key))
    return text[:1].upper() + text[1:]


def _transposed(name: str, rows: list[dict], cols: list[tuple], *, mwd: int, cur: str,
                label_key: str = "alternative") -> Table:
    """Metric rows x case columns (reads better than a very wide table); cells pre-formatted."""
    cases = [r[label_key] for r in rows]
    out = []
    for key, header, kind in cols:
        row = {"item": header}
        for i, r in enumerate(rows):
            row[f"c{i}"] = fmt(r.get(key), kind, mw_decimals=mwd, currency=cur)
        out.append(row)
    return Table(name, [("item", "", "text")] + [(f"c{i}", c, "pre") for i, c in enumerate(cases)],
                 out)


def _v_at(v, bus) -> str:
    """One cell for a voltage and where it is, e.g. ``0.9517 at 413 (Ravensholm North 11)``."""
    if v is None:
        return ""
    return f"{fmt(v, 'pu')} at {bus}" if bus not in (None, "") else fmt(v, "pu")


def _base_display(T: dict) -> Table:
    rows = [dict(r, v_low=_v_at(r["v_min_pu"], r["v_min_bus"]),
                 v_high=_v_at(r["v_max_pu"], r["v_max_bus"])) for r in T["base_case"].rows]
    return Table("base_case", [
        ("level", "Load level", "text"), ("losses_mw", "Losses (MW)", "mw"),
        ("loss_energy_mwh", "Loss energy (MWh/yr)", "mwh"),
        ("v_low", "Lowest voltage (pu) at bus", "text"),
        ("v_high", "Highest voltage (pu) at bus", "text"),
        ("violations", "Buses outside band", "int"), ("gens_at_limit", "Gens at Q limit", "int"),
        ("converged", "AC solved", "bool")], rows)


def _levels_display(rows: list[dict], mwd: int) -> Table:
    """Per-level results of one alternative; unverified levels keep only the prediction and the
    count of broken limits (a diagnosis, not a result)."""
    out = []
    for r in rows:
        d = dict(r)
        if r["verified"]:
            red = "" if r["reduction_mw"] is None else fmt(r["reduction_mw"], "mw", mw_decimals=mwd)
            if red and r["reduction_pct"] is not None:
                red += f" ({fmt(r['reduction_pct'], 'pct')})"
            d.update(reduction=red, v_low=_v_at(r["v_min_pu"], r["v_min_bus"]),
                     v_high=_v_at(r["v_max_pu"], r["v_max_bus"]))
        else:
            d.update(losses_mw="not verified", reduction="", v_low="", v_high="")
            if r.get("ac_converged") is False:
                d["limits_broken"] = "AC not solved"
        out.append(d)
    return Table("alternative_levels", [
        ("level", "Load level", "text"), ("verified", "AC verified", "bool"),
        ("base_losses_mw", "Base losses (MW)", "mw"), ("losses_mw", "AC losses (MW)", "mw"),
        ("predicted_mw", "Linear prediction (MW)", "mw"),
        ("reduction", "Reduction MW (%)", "pre"),
        ("v_low", "Lowest voltage (pu) at bus", "text"),
        ("v_high", "Highest voltage (pu) at bus", "text"),
        ("limits_broken", "Limits broken", "int")], out)


def _pivot(name: str, rows: list[dict], keys: list[tuple], value: str, kind: str,
           names: list[str]) -> Table:
    """Long rows (one per item and level) as one row per item with a column per load level."""
    items: dict[tuple, dict] = {}
    for r in rows:
        k = tuple(r.get(c[0]) for c in keys)
        row = items.setdefault(k, {c[0]: r.get(c[0]) for c in keys})
        row[f"lv_{r['level']}"] = r.get(value)
    return Table(name, list(keys) + [(f"lv_{n}", n, kind) for n in names], list(items.values()))


def _section(title: str, body: list[str], anchor: str, new_page: bool = True) -> str:
    """A report section; in print, ``new_page`` starts it on a fresh page."""
    cls = "section newpage" if new_page else "section"
    return (f'<section id="{esc(anchor)}"><h2 class="{cls}">{esc(title)}</h2>'
            + "".join(body) + "</section>")


def _p(text: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f"<p{c}>{esc(text)}</p>"


def _how_line(run: dict) -> str:
    """'How the optimiser got here' in one line, from the parts the data has."""
    bits = []
    if run.get("status"):
        bits.append(str(run["status"]))
    if run.get("ac_flows") is not None:
        bits.append(f"{fmt(run['ac_flows'], 'int')} AC load flows")
    if run.get("milp_solves") is not None:
        bits.append(f"{fmt(run['milp_solves'], 'int')} mixed-integer (MILP) solves")
    if run.get("seconds") is not None:
        bits.append(f"{run['seconds']:.1f} s")
    return ("How the optimiser got here: " + "; ".join(bits) + ".") if bits else ""


def _sentence(text) -> str:
    """First letter upper case, one full stop at the end (for verdict lines from the optimiser)."""
    t = str(text).strip()
    t = t[:1].upper() + t[1:]
    return t if t.endswith((".", "!", "?")) else t + "."


def _with_bus_names(line: str, nb: dict) -> str:
    """``bus 452`` -> ``bus 452 (Cobbleston Mill 11)`` where the name is known and not given."""
    def sub(m):
        name = nb.get(m.group(1))
        return f"bus {m.group(1)} ({name})" if name and name != m.group(1) else m.group(0)
    return re.sub(r"\bbus (\w+)\b(?! \()", sub, line)


def _plural(n: int, one: str, many: str) -> str:
    return f"{n} {one if n == 1 else many}"


def render_report(data: dict) -> str:
    """The study report as one self-contained HTML page (schema in the module docstring)."""
    names = _check(data)
    T = _build(data)
    cur = str(data.get("currency", "") or "")
    mwd = _mw_decimals(data)
    tab = lambda t, **kw: html_table(t, mw_decimals=mwd, currency=cur, **kw)  # noqa: E731
    alts = data["alternatives"]
    verified = [a for a in alts if _alt_verified(a, names)]
    comp = {r["alternative"]: r for r in T["comparison"].rows}
    runs = {r["alternative"]: r for r in T["optimiser_runs"].rows}
    lines_by_alt: dict[str, list[str]] = {}
    for r in T["remaining_violations"].rows:
        lines_by_alt.setdefault(r["alternative"], []).append(r["violation"])
    nb = _names_by_bus(data)
    verified_names = {a["name"] for a in verified}
    best = max((r for r in T["comparison"].rows if r["alternative"] in verified_names
                and r["npv"] is not None), key=lambda r: r["npv"], default=None)

    head = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
        "style-src 'unsafe-inline'; img-src data:\">",
        f"<title>{esc(data['title'])}</title>", f"<style>{CSS}</style>", "</head><body><main>",
    ]
    hdr = ['<header class="report">', f"<h1>{esc(data['title'])}</h1>"]
    for label, key in (("Network", "network"), ("Created", "created")):
        if data.get(key):
            hdr.append(f'<p class="meta">{label}: {esc(data[key])}</p>')
    hdr.append(f'<p class="meta">Load levels: {esc(", ".join(names))}. Alternatives studied: '
               f"{len(alts)}; confirmed by AC load flow: {len(verified)}.</p></header>")

    # summary for a reader who stops here
    summ = ['<div class="summary"><strong>Summary</strong><ul>']
    base_c = comp["base case"]
    summ.append(f"<li>Base case: loss energy {esc(fmt(base_c['loss_energy_mwh'], 'mwh'))} MWh a year; "
                f"lowest voltage {esc(fmt(base_c['worst_v_min_pu'], 'pu'))} pu; "
                f"{_plural(base_c['violations'], 'bus voltage', 'bus voltages')} outside the "
                f"planning band, counted over all load levels.</li>")
    for a in alts:
        c = comp[a["name"]]
        if not c["verified"]:
            n = c["violations"]
            why = (f"{_plural(n, 'limit is', 'limits are')} still broken (listed in its section)"
                   if n else "the AC load flow did not confirm it")
            summ.append(f"<li>{esc(a['name'])}: <span class=\"bad\">not confirmed by AC load flow "
                        f"at every level</span>: {esc(why)}; no result figures are given for it."
                        "</li>")
            continue
        bits = [f"loss energy down {esc(fmt(c['energy_saved_mwh'], 'mwh'))} MWh a year "
                f"({esc(fmt(c['energy_reduction_pct'], 'pct'))})",
                f"lowest voltage {esc(fmt(c['worst_v_min_pu'], 'pu'))} pu"]
        if c["capital_cost"] is not None:
            bits.append(f"capital {esc(fmt(c['capital_cost'], 'money', currency=cur))}")
        if c["npv"] is not None:
            bits.append(f"NPV {esc(fmt(c['npv'], 'money', currency=cur))}, payback "
                        f"{esc(fmt(c['payback_years'], 'years'))} years")
        summ.append(f"<li>{esc(a['name'])}: " + "; ".join(bits) + ".</li>")
    if best is not None:
        summ.append(f"<li><strong>Highest net present value among the AC-verified alternatives: "
                    f"{esc(best['alternative'])}</strong>.</li>")
    summ.append("</ul></div>")

    sections = []
    # 1 question and criteria
    body = []
    if data.get("question"):
        body.append(_p(data["question"]))
    body.append('<dl class="criteria">' + "".join(
        f"<dt>{esc(_criterion_label(r['criterion']))}</dt>"
        f"<dd>{esc(r['value'])}</dd>" for r in T["criteria"].rows)
        + "</dl>")
    body.append("<h3>Load levels</h3>" + tab(T["levels"]))
    sections.append(_section("Study question and criteria", body, "question", new_page=False))

    # 2 comparison, early: it is the page a decision is made from
    comp_cols = [c for c in T["comparison"].columns if c[0] != "alternative"]
    body = [html_table(_transposed("comparison", T["comparison"].rows, comp_cols, mwd=mwd,
                                   cur=cur), css_class="data wide")]
    if best is not None:
        body.append(_p(f"Highest net present value among the AC-verified alternatives: "
                       f"{best['alternative']}."))
    body.append(_p("Result figures (losses, voltages, money) are given only for plans confirmed by "
                   "AC load flow at every level; for the others they are left blank. \"Limits "
                   "broken\" counts, for every plan, the limits its AC load flows still break "
                   "(for the base case: bus voltages outside the band).", "note"))
    sections.append(_section("Comparison of alternatives", body, "comparison"))

    # 3 base case
    body = [tab(_base_display(T), css_class="data compact")]
    bv = [r for r in T["violations"].rows if r["case"] == "base case"]
    if bv:
        body.append(tab(T["violations"], rows=bv, show=["level", "bus", "name", "v_pu", "limit_pu"],
                        caption="Bus voltages outside the planning band, base case"))
    else:
        body.append(_p("No bus voltage is outside the planning band in the base case."))
    bg = [r for r in T["generators_at_limit"].rows if r["case"] == "base case"]
    if bg:
        body.append(tab(T["generators_at_limit"], rows=bg,
                        show=["level", "gen", "bus", "mvar", "limit"],
                        caption="Generators held at a reactive limit, base case"))
    sections.append(_section("Base case", body, "base"))

    # 4 alternatives
    body = []
    if not alts:
        body.append(_p("No alternatives were studied."))
    for a in alts:
        an = a["name"]
        ok = comp[an]["verified"]
        body.append(f'<h3 class="alt">{esc(an)}</h3>')
        if a.get("description"):
            body.append(_p(a["description"][:1].upper() + a["description"][1:]))
        lines = lines_by_alt.get(an, [])
        if ok:
            body.append('<div class="good">' + esc(_sentence(
                a.get("message") or "confirmed by AC load flow at every load level")) + "</div>")
        else:
            box = ['<div class="warn"><strong>This plan was not confirmed by AC load flow at every '
                   "load level</strong>, so its figures are not results: levels without AC "
                   "confirmation show the linear prediction only."]
            if a.get("message"):
                verdict = str(a["message"]).strip()
                box.append(f"<br>Optimiser's verdict: {esc(verdict.rstrip('.'))}.")
            if lines:
                box.append(f"<br>{esc(_plural(len(lines), 'limit', 'limits'))} still broken in "
                           "the AC load flow:<ul>"
                           + "".join(f"<li>{esc(_with_bus_names(t, nb))}</li>" for t in lines)
                           + "</ul>")
            box.append("</div>")
            body.append("".join(box))
        how = _how_line(runs[an])
        if how:
            body.append(_p(how, "how"))
        rows = [r for r in T["alternative_levels"].rows if r["alternative"] == an]
        ok_levels = {r["level"] for r in rows if r["verified"]}
        body.append(tab(_levels_display(rows, mwd), css_class="data compact",
                        caption="Results by load level (AC load flow; linear prediction beside it)",
                        row_class=lambda r: "" if r["verified"] else "unverified"))
        rows = [r for r in T["banks"].rows if r["alternative"] == an]
        if rows:
            body.append(tab(T["banks"], rows=rows, show=[k for k in T["banks"].keys()
                                                         if k != "alternative"],
                            css_class="data compact", caption="New capacitor banks"))
        elif a.get("banks") is not None:
            body.append(_p("No new capacitor banks in this plan."))
        # per-level settings, one row per item and a column per load level
        for table, keys, value, kind, caption in (
                ("existing_banks", [("bank", "Existing bank", "text"), ("bus", "Bus", "text")], "steps", "int",
                 "Existing switched banks: steps in service"),
                ("setpoints", [("gen", "Generator", "text"), ("bus", "Bus", "text")], "v_pu", "pu",
                 "Generator voltage set-points (pu) by load level"),
                ("taps", [("branch", "Transformer", "text")], "ratio", "pu",
                 "Transformer ratios (pu) by load level")):
            rows = [r for r in T[table].rows if r["alternative"] == an]
            if rows:
                body.append(tab(_pivot(table, rows, keys, value, kind, names), caption=caption))
        av = [r for r in T["violations"].rows if r["case"] == an and r["level"] in ok_levels]
        if av:
            body.append(tab(T["violations"], rows=av,
                            show=["level", "bus", "name", "v_pu", "limit_pu"],
                            caption="Bus voltages outside the planning band"))
        conv = a.get("convergence") or []
        if conv:
            acc = [c.get("accepted") for c in conv]
            body.append("<figure>" + svg.convergence_chart(
                [c.get("iteration") for c in conv], [_f(c.get("predicted_mw")) for c in conv],
                [_f(c.get("ac_mw")) for c in conv], accepted=acc,
                title=f"Optimiser convergence, {an}",
                y_label="mean losses over the year (MW)")
                + "<figcaption>Losses as the optimiser weighs them (mean over the year, each load "
                "level weighted by its hours) at each outer iteration: the linear model's "
                "prediction and the AC load flow of the same proposal"
                + ("; a rejected proposal is a hollow ring and the plan stays at the last "
                   "accepted step" if any(x is False for x in acc) else "")
                + ". The full table is in convergence.csv.</figcaption></figure>")
    sections.append(_section("Alternatives", body, "alternatives"))

    # 5 voltage profiles
    body = []
    for n in names:
        chart = _profile_chart(data, names, n, verified)
        if chart:
            body.append(f"<figure>{chart}<figcaption>Bus voltages at the {esc(n)} level: base case "
                        "and each alternative confirmed by AC load flow; shaded: planning band, "
                        "dashed red: its limits.</figcaption></figure>")
    if not body:
        body.append(_p("No voltage profiles were supplied."))
    sections.append(_section("Voltage profiles", body, "profiles"))

    # 6 losses by level
    series = [{"name": "base case", "values": [float(data["base"][n]["losses_mw"]) for n in names],
               "color": svg.BASE_COLOR}]
    for k, a in enumerate(verified):
        series.append({"name": a["name"], "values": [_f(a["levels"][n]["losses_mw"]) for n in names],
                       "color": svg.PALETTE[k % len(svg.PALETTE)]})
    chart = svg.bar_chart(names, series, title="Active power losses by load level (AC load flow)",
                          y_label="losses (MW)", x_label="load level",
                          value_format=lambda v: f"{v:.{mwd}f}")
    body = [f"<figure>{chart}<figcaption>AC load-flow losses at each load level; alternatives not "
            "confirmed by AC load flow are left out.</figcaption></figure>"]
    sections.append(_section("Losses by load level", body, "losses", new_page=False))

    # 7 economics
    body = []
    srows = [r for r in T["economics_summary"].rows if r["verified"]]
    if srows:
        body.append(html_table(
            _transposed("economics_summary", srows, _ECO_COLS, mwd=mwd, cur=cur),
            css_class="data wide", caption="Economic summary, AC-verified alternatives"))
    for a in alts:
        an = a["name"]
        if not a.get("economics"):
            continue
        if not comp[an]["verified"]:
            body.append(f"<h3>{esc(an)}</h3>")
            body.append('<div class="warn">Not evaluated as a result: the plan was not confirmed '
                        "by AC load flow at every load level.</div>")
            continue
        rows = [r for r in T["economics"].rows if r["alternative"] == an]
        body.append(tab(T["economics"], rows=rows,
                        show=[k for k in T["economics"].keys() if k != "alternative"],
                        caption=f"Loss energy by load level, {an}"))
    if body:
        body.append(_p("Money in constant prices. Savings and O&M at the end of each year; a bank "
                       "that wears out before the horizon is replaced at the same cost, and the life "
                       "left at the horizon end is credited straight-line as residual value. "
                       "Payback is capital over net yearly saving, undiscounted.", "note"))
    else:
        body.append(_p("No economic evaluation was supplied."))
    sections.append(_section("Economics", body, "economics"))

    # 8 assumptions and cautions
    body = []
    if data.get("assumptions"):
        body.append("<h3>Assumptions</h3><ul>" + "".join(
            f"<li>{esc(s)}</li>" for s in data["assumptions"]) + "</ul>")
    body.append("<h3>Cautions</h3><ul>" + "".join(
        f"<li>{esc(s)}</li>" for s in list(data.get("cautions") or []) + SCOPE_CAUTIONS) + "</ul>")
    if data.get("proof"):           # N-1, hourly and bank checks (planner/proof)
        from ..proof.report import proof_sections
        sections.append(proof_sections(data["proof"]))
    sections.append(_section("Assumptions and cautions", body, "cautions"))

    foot = ("<footer>Every figure in this report is also in report.json and the CSV files written "
            "beside it. Results are AC load-flow figures; linear-model predictions are shown only "
            "for comparison.</footer>")
    return "\n".join(head + hdr + summ + sections + [foot, "</main></body></html>"]) + "\n"
