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
          "gens_at_limit"?: [{"gen", "bus", "q_mvar", "limit"}], # limit = "q_min" | "q_max" | text
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
                             "v_min_pu"?, "v_min_bus"?, "v_max_pu"?, "v_max_bus"?,
                             "violations"?: [...], "profile"?: [...]}},
          "convergence"?: [{"iteration": int, "predicted_mw": float | None, "ac_mw": float | None,
                            "trust"?: float, "accepted"?: bool}],
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
                         "q_mvar": _f(g.get("q_mvar")), "limit": g.get("limit", "")})
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
                        "violations": len(r.get("violations") or [])})
            if ac is not None:
                alt_energy += ac * hours[n]
            if r.get("v_min_pu") is not None:
                vmins.append(float(r["v_min_pu"]))
            if r.get("v_max_pu") is not None:
                vmaxs.append(float(r["v_max_pu"]))
            nviol += len(r.get("violations") or [])
            for v in r.get("violations") or []:
                viol.append({"case": an, "level": n, "bus": v.get("bus"), "name": v.get("name", ""),
                             "v_pu": _f(v.get("v_pu")), "limit_pu": _f(v.get("limit"))})
            for p in r.get("profile") or []:
                prof.append({"case": an, "level": n, "bus": p["bus"], "name": p.get("name", ""),
                             "v_pu": _f(p.get("v_pu"))})
        for c in a.get("convergence") or []:
            conv.append({"alternative": an, "iteration": c.get("iteration"),
                         "predicted_mw": _f(c.get("predicted_mw")), "ac_mw": _f(c.get("ac_mw")),
                         "trust": _f(c.get("trust")), "accepted": c.get("accepted")})
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
                     "violations": nviol if ok else None,
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
        ("violations", "Buses outside band", "int")], res)
    T["violations"] = Table("violations", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("bus", "Bus", "text"),
        ("name", "Bus name", "text"), ("v_pu", "V (pu)", "pu"), ("limit_pu", "Limit (pu)", "pu")], viol)
    T["generators_at_limit"] = Table("generators_at_limit", [
        ("case", "Case", "text"), ("level", "Load level", "text"), ("gen", "Generator", "text"),
        ("bus", "Bus", "text"), ("q_mvar", "Q (Mvar)", "mvar"), ("limit", "Limit", "text")], gens)
    T["profiles"] = Table("profiles", [("case", "Case", "text"), ("level", "Load level", "text"),
                                       ("bus", "Bus", "text"), ("name", "Bus name", "text"),
                                       ("v_pu", "V (pu)", "pu")], prof)
    T["convergence"] = Table("convergence", [
        ("alternative", "Alternative", "text"), ("iteration", "Iteration", "int"),
        ("predicted_mw", "Linear prediction (MW)", "mw"), ("ac_mw", "AC load flow (MW)", "mw"),
        ("trust", "Trust region", "scale"), ("accepted", "Accepted", "bool")], conv)
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
        ("violations", "Band violations", "int"), ("annual_saving", "Saving (/yr)", "money"),
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
    files = {"report.html": render_report(data), "report.json": report_json(data)}
    files.update(report_tables(data))
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
    return svg.line_chart(series, title=f"Voltage profile, {level}", x_label="bus",
                          y_label="voltage (pu)", x_categories=buses,
                          band=(lo, hi, f"planning band {lo:.3f} to {hi:.3f} pu"),
                          hlines=[(lo, f"min {lo:.3f} pu"), (hi, f"max {hi:.3f} pu")])


_CRITERIA_LABELS = {"v_min_pu": "Lowest allowed bus voltage (pu)",
                    "v_max_pu": "Highest allowed bus voltage (pu)"}


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


def _section(title: str, body: list[str], anchor: str) -> str:
    return (f'<section id="{esc(anchor)}"><h2 class="section">{esc(title)}</h2>'
            + "".join(body) + "</section>")


def _p(text: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f"<p{c}>{esc(text)}</p>"


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
    hdr.append(f'<p class="meta">Load levels: {esc(", ".join(names))}; alternatives studied: '
               f"{len(alts)}, confirmed by AC load flow: {len(verified)}</p></header>")

    # summary for a reader who stops here
    summ = ['<div class="summary"><strong>Summary</strong><ul>']
    base_c = comp["base case"]
    summ.append(f"<li>Base case: loss energy {esc(fmt(base_c['loss_energy_mwh'], 'mwh'))} MWh a year; "
                f"lowest voltage {esc(fmt(base_c['worst_v_min_pu'], 'pu'))} pu; "
                f"{base_c['violations']} bus voltages outside the planning band, counted over "
                f"all load levels.</li>")
    for a in alts:
        c = comp[a["name"]]
        if not c["verified"]:
            summ.append(f"<li>{esc(a['name'])}: <span class=\"bad\">not confirmed by AC load flow at "
                        f"every level</span>; no result figures are given for it.</li>")
            continue
        bits = [f"loss energy down {esc(fmt(c['energy_saved_mwh'], 'mwh'))} MWh a year "
                f"({esc(fmt(c['energy_reduction_pct'], 'pct'))})",
                f"lowest voltage {esc(fmt(c['worst_v_min_pu'], 'pu'))} pu"]
        if c["npv"] is not None:
            bits.append(f"NPV {esc(fmt(c['npv'], 'money', currency=cur))}, payback "
                        f"{esc(fmt(c['payback_years'], 'years'))} years")
        summ.append(f"<li>{esc(a['name'])}: " + "; ".join(bits) + ".</li>")
    summ.append("</ul></div>")

    sections = []
    # 1 question and criteria
    body = []
    if data.get("question"):
        body.append(_p(data["question"]))
    body.append('<dl class="criteria">' + "".join(
        f"<dt>{esc(_CRITERIA_LABELS.get(r['criterion'], r['criterion']))}</dt>"
        f"<dd>{esc(r['value'])}</dd>" for r in T["criteria"].rows)
        + "</dl>")
    body.append("<h3>Load levels</h3>" + tab(T["levels"]))
    sections.append(_section("Study question and criteria", body, "question"))

    # 2 base case
    body = [tab(T["base_case"])]
    bv = [r for r in T["violations"].rows if r["case"] == "base case"]
    if bv:
        body.append(tab(T["violations"], rows=bv, show=["level", "bus", "name", "v_pu", "limit_pu"],
                        caption="Bus voltages outside the planning band, base case"))
    else:
        body.append(_p("No bus voltage is outside the planning band in the base case."))
    bg = [r for r in T["generators_at_limit"].rows if r["case"] == "base case"]
    if bg:
        body.append(tab(T["generators_at_limit"], rows=bg,
                        show=["level", "gen", "bus", "q_mvar", "limit"],
                        caption="Generators held at a reactive limit, base case"))
    sections.append(_section("Base case", body, "base"))

    # 3 alternatives
    body = []
    if not alts:
        body.append(_p("No alternatives were studied."))
    for a in alts:
        an = a["name"]
        ok = comp[an]["verified"]
        body.append(f"<h3>{esc(an)}</h3>")
        if a.get("description"):
            body.append(_p(a["description"]))
        if not ok:
            body.append('<div class="warn">This plan was not confirmed by AC load flow at every '
                        "load level. Its figures below are not results; levels without AC "
                        "confirmation show the linear prediction only.</div>")
        rows = [r for r in T["banks"].rows if r["alternative"] == an]
        if rows:
            body.append(tab(T["banks"], rows=rows, show=[k for k in T["banks"].keys()
                                                         if k != "alternative"],
                            caption="Capacitor banks"))
        rows = [r for r in T["setpoints"].rows if r["alternative"] == an]
        if rows:
            body.append(tab(T["setpoints"], rows=rows, show=["level", "gen", "bus", "v_pu"],
                            caption="Generator voltage set-points"))
        rows = [r for r in T["taps"].rows if r["alternative"] == an]
        if rows:
            body.append(tab(T["taps"], rows=rows, show=["level", "branch", "ratio"],
                            caption="Transformer ratios"))
        rows = [dict(r) for r in T["alternative_levels"].rows if r["alternative"] == an]
        for r in rows:
            if not r["verified"]:   # only AC-confirmed figures are shown as results
                r.update(losses_mw="not verified", v_min_pu=None, v_min_bus=None, v_max_pu=None,
                         v_max_bus=None, violations=None)
        ok_levels = {r["level"] for r in rows if r["verified"]}
        body.append(tab(T["alternative_levels"], rows=rows,
                        show=[k for k in T["alternative_levels"].keys() if k != "alternative"],
                        caption="Results by load level (AC load flow; linear prediction beside it)",
                        row_class=lambda r: "" if r["verified"] else "unverified"))
        av = [r for r in T["violations"].rows if r["case"] == an and r["level"] in ok_levels]
        if av:
            body.append(tab(T["violations"], rows=av,
                            show=["level", "bus", "name", "v_pu", "limit_pu"],
                            caption="Bus voltages outside the planning band"))
        conv = a.get("convergence") or []
        if conv:
            body.append("<figure>" + svg.convergence_chart(
                [c.get("iteration") for c in conv], [_f(c.get("predicted_mw")) for c in conv],
                [_f(c.get("ac_mw")) for c in conv], title=f"Optimiser convergence, {an}")
                + "<figcaption>Loss objective at each outer iteration: the linear model's "
                "prediction and the AC load flow of the same proposal. The full table is in "
                "convergence.csv.</figcaption></figure>")
    sections.append(_section("Alternatives", body, "alternatives"))

    # 4 voltage profiles
    body = []
    for n in names:
        chart = _profile_chart(data, names, n, verified)
        if chart:
            body.append(f"<figure>{chart}<figcaption>Bus voltages at the {esc(n)} level, base case "
                        "and each AC-verified alternative; shaded: planning band.</figcaption>"
                        "</figure>")
    if not body:
        body.append(_p("No voltage profiles were supplied."))
    sections.append(_section("Voltage profiles", body, "profiles"))

    # 5 losses by level
    series = [{"name": "base case", "values": [float(data["base"][n]["losses_mw"]) for n in names],
               "color": svg.BASE_COLOR}]
    for k, a in enumerate(verified):
        series.append({"name": a["name"], "values": [_f(a["levels"][n]["losses_mw"]) for n in names],
                       "color": svg.PALETTE[k % len(svg.PALETTE)]})
    chart = svg.bar_chart(names, series, title="Active losses by load level", y_label="losses (MW)",
                          x_label="load level", value_format=lambda v: f"{v:.{mwd}f}")
    body = [f"<figure>{chart}<figcaption>AC load-flow losses; alternatives not confirmed by AC load "
            "flow are left out.</figcaption></figure>"]
    sections.append(_section("Losses by load level", body, "losses"))

    # 6 economics
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

    # 7 comparison
    verified_names = {a["name"] for a in verified}
    best = max((r for r in T["comparison"].rows if r["alternative"] in verified_names
                and r["npv"] is not None), key=lambda r: r["npv"], default=None)
    comp_cols = [c for c in T["comparison"].columns if c[0] != "alternative"]
    body = [html_table(_transposed("comparison", T["comparison"].rows, comp_cols, mwd=mwd,
                                   cur=cur), css_class="data wide")]
    if best is not None:
        body.append(_p(f"Highest net present value among the AC-verified alternatives: "
                       f"{best['alternative']}."))
    body.append(_p("Figures for alternatives not confirmed by AC load flow are left blank.", "note"))
    sections.append(_section("Comparison of alternatives", body, "comparison"))

    # 8 assumptions and cautions
    body = []
    if data.get("assumptions"):
        body.append("<h3>Assumptions</h3><ul>" + "".join(
            f"<li>{esc(s)}</li>" for s in data["assumptions"]) + "</ul>")
    body.append("<h3>Cautions</h3><ul>" + "".join(
        f"<li>{esc(s)}</li>" for s in list(data.get("cautions") or []) + SCOPE_CAUTIONS) + "</ul>")
    sections.append(_section("Assumptions and cautions", body, "cautions"))

    foot = ("<footer>Every figure in this report is also in report.json and the CSV files written "
            "beside it. Results are AC load-flow figures; linear-model predictions are shown only "
            "for comparison.</footer>")
    return "\n".join(head + hdr + summ + sections + [foot, "</main></body></html>"]) + "\n"
