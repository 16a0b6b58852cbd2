"""Report sections and output files for the proof of a plan (N-1, every hour, bank checks).

:func:`proof_sections` turns ``data["proof"]`` (from :func:`planner.proof.run.prove_study`) into
HTML sections with inline SVG charts; :func:`proof_files` gives the CSV outputs.
"""
from __future__ import annotations

import io

from ..report.markup import esc
from ..report.svg import line_chart


def _fmt(v, spec):
    if v is None:
        return ""
    try:
        x = float(v)
        return "" if x != x else format(x, spec)       # NaN: nothing to show
    except (TypeError, ValueError):
        return str(v)


def _table(headers, rows, caption=""):
    out = ['<div class="tablewrap"><table class="data">']
    if caption:
        out.append(f"<caption>{esc(caption)}</caption>")
    out.append("<thead><tr>" + "".join(f"<th>{esc(h)}</th>" for h in headers) + "</tr></thead><tbody>")
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{esc(c)}</td>" for c in r) + "</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


def _section(title, anchor, body):
    return f'<section id="{esc(anchor)}" class="newpage"><h2>{esc(title)}</h2>' + "".join(body) + "</section>"


def _p(text):
    return f"<p>{esc(text)}</p>"


def sweep_note(d: dict) -> str:
    """Where the N-1 and hourly sweeps ran, and why (a count decides, never timing).

    >>> sweep_note({"where": "serial", "bus_flows": 2_200_000, "chosen": True, "in_process_up_to": 10_000_000})
    'The N-1 and hourly load flows ran in this process: 2,200,000 bus-flows (buses x load flows), at most 10,000,000, cost less than starting a cluster. Every place gives the same numbers.'
    """
    where = {"serial": "in this process", "local": "on this machine's cores"}.get(d["where"],
                                                                              f"on the Dask scheduler {d['where']}")
    why = ("as the study or command line asks" if not d["chosen"] else
           f"{d['bus_flows']:,} bus-flows (buses x load flows), at most {d['in_process_up_to']:,}, cost less "
           "than starting a cluster" if d["where"] == "serial" else
           f"{d['bus_flows']:,} bus-flows (buses x load flows), more than {d['in_process_up_to']:,}")
    return f"The N-1 and hourly load flows ran {where}: {why}. Every place gives the same numbers."


def outage_section(d: dict, note: str = "") -> str:
    body = [_p(f"Each of {d['outages']} elements ({', '.join(d['elements'])}"
               + (f", at or above {d['min_kv']:g} kV" if d["min_kv"] else "")
               + f") is taken out in turn at the {', '.join(d['levels'])} level(s). After an outage every bus "
               f"must stay within {d['band'][0]:.2f}-{d['band'][1]:.2f} pu (an emergency band, common practice) "
               "and every branch within its emergency rating (its normal rating where none is given). An "
               "outage that islands buses cuts their load; lost generation is taken up by the slack bus.")]
    if note:
        body.append(_p(note))
    rows = []
    for case, levels in d["cases"].items():
        for lv, e in levels.items():
            rows.append([case, lv, e["count"], e.get("cured", ""), e.get("created", ""),
                         len(e["islanded"]), len(e["failed"])])
    body.append(_table(["case", "level", "outages breaking a limit", "cured by the plan", "created by the plan",
                        "cutting load", "no solution"], rows, "N-1 summary: base case and each plan"))
    for case, levels in d["cases"].items():
        for lv, e in levels.items():
            if not e["worst"]:
                continue
            rows = [[w["element"], w["element_id"], w["limit_kind"], w["where"],
                     _fmt(w["value"], ".4f" if w["limit_kind"] != "loading" else ".1f"),
                     _fmt(w["limit"], ".3f" if w["limit_kind"] != "loading" else ".0f")] for w in e["worst"]]
            body.append(_table(["element out", "id", "limit", "worst bus / branch", "value", "limit value"], rows,
                               f"{case}, {lv}: worst {len(rows)} (voltage in pu, loading in % of emergency rating)"))
            if e["islanded"]:
                body.append(_p(f"{case}, {lv}: outages cutting load: " + "; ".join(
                    f"{i['element']} {i['element_id']} cuts {i['load_cut_mw']:.1f} MW (buses {i['buses_cut']})"
                    for i in e["islanded"])))
            if e["failed"]:
                body.append(_p(f"{case}, {lv}: outages without a load-flow solution: " + "; ".join(
                    f"{i['element']} {i['element_id']} (worst bus {i['worst_bus']}, mismatch "
                    f"{i['mismatch_mva']:.3g} MVA)" for i in e["failed"])))
            if e.get("changes"):
                rows = [[c["element"], c["element_id"], c["limit_kind"], c["change"],
                         _fmt(c["value_before"], ".4f"), _fmt(c["value_after"], ".4f")] for c in e["changes"]]
                body.append(_table(["element out", "id", "limit", "change", "value before", "value after"], rows,
                                   f"{case}, {lv}: contingency problems the plan cures or creates"))
    for case, s in (d.get("secured") or {}).items():
        body.append(_p(f"{case} was optimised with N-1 security as a constraint: {s['message']} "
                       f"({s['rounds']} round(s) of post-outage voltage rows, linearised at each step from the "
                       "post-outage Jacobian, and every outage of the set proved by full AC load flows)."))
        if s["tracked"]:
            body.append(_table(["element out", "id", "rows added in round"],
                               [[t["element"], t["element_id"], t["round"]] for t in s["tracked"]],
                               f"{case}: outages whose post-outage voltage rows the optimiser held"))
        if s["remaining"]:
            body.append(_table(["level", "element out", "id", "limit", "worst bus / branch", "value"],
                               [[r["level"], r["element"], r["element_id"], r["limit_kind"], r["where"],
                                 _fmt(r["value"], ".4f")] for r in s["remaining"][:10]],
                               f"{case}: limits still broken under outages (the levers could not cure these)"))
        body.append(_p(s["caution"]))
    return _section("Outages (N-1)", "outages", body)


def hourly_section(d: dict, note: str = "") -> str:
    rule = ("each switched bank follows the plan's schedule for the load level nearest each interval"
            if d["control"] == "schedule" else
            f"switched banks are voltage controlled: a step in after {d['rule']['delay_h']:g} h below "
            f"{d['rule']['v_on_pu']:.3f} pu, out after as long above {d['rule']['v_off_pu']:.3f} pu")
    body = [_p(f"Every interval of the profile {d['file']} ({d['intervals']} intervals, {d['hours']:,.0f} h) is "
               f"solved by a full AC load flow; {rule}. Hours of the profile nearest each study level: " +
               ", ".join(f"{k} {v:,.0f} h" for k, v in d["hours_by_level"].items()) + ".")]
    if note:
        body.append(_p(note))
    rows = []
    for case, e in d["cases"].items():
        lo, hi = e["lowest"], e["highest"]
        rows.append([case, _fmt(e["energy_loss_mwh"], ",.0f"), _fmt(e["level_estimate_mwh"], ",.0f"),
                     _fmt(e["difference_mwh"], "+,.0f"), _fmt(e["hours_outside_band"], ",.0f"),
                     f"{lo.get('v_pu', float('nan')):.4f} at bus {lo.get('bus', '')}, {lo.get('when', '')}",
                     f"{hi.get('v_pu', float('nan')):.4f} at bus {hi.get('bus', '')}, {hi.get('when', '')}",
                     e["failed_intervals"]])
    body.append(_table(["case", "energy loss, MWh (every hour)", "level estimate, MWh", "difference, MWh",
                        f"hours outside {d['band'][0]:.2f}-{d['band'][1]:.2f} pu", "lowest voltage of the year",
                        "highest voltage of the year", "intervals without solution"], rows,
                       "Annual energy loss from every hour beside the level-based estimate"))
    ops = [[case, o["bank_id"], o["bus"], o["operations"], _fmt(o["operations_per_year"], ",.0f")]
           for case, e in d["cases"].items() for o in e["operations"]]
    if ops:
        body.append(_table(["case", "bank", "bus", "switching operations", "per year"], ops,
                           "Switching duty of each switched bank (one operation per step in or out)"))
    series = [{"name": case, "x": e["loss_curve"]["hours"], "y": e["loss_curve"]["mw"]}
              for case, e in d["cases"].items()]
    body.append(line_chart(series, title="Loss-duration curve", x_label="hours of the year",
                           y_label="losses, MW"))
    series = [{"name": case, "x": e["voltage_curve"]["hours"], "y": e["voltage_curve"]["v_pu"]}
              for case, e in d["cases"].items()]
    body.append(line_chart(series, title="Voltage-duration curve (lowest bus voltage of each hour)",
                           x_label="hours of the year", y_label="lowest voltage, pu",
                           band=(d["band"][0], d["band"][1], "planning band")))
    return _section("Every hour of the year", "hourly", body)


def bank_section(d: dict) -> str:
    body = [_p(f"Common-practice checks of each bank: the voltage step of one switched step is about "
               f"Q_step / S_sc, flagged above {d['step_limit_pct']:g} %; the parallel resonance order of the bank "
               f"with the network is h = sqrt(S_sc / Q), flagged within {d['margin']:g} of "
               f"{', '.join(str(o) for o in d['orders'])}. S_sc is the short-circuit strength at the bank bus from "
               "the network's Thevenin impedance.")]
    for case, e in d["cases"].items():
        rows = [[r["bank_id"], r["bus"], _fmt(r["base_kv"], "g"), r["steps"], _fmt(r["bank_mvar"], ".2f"),
                 _fmt(r["s_sc_mva"], ",.0f"), _fmt(r["step_pct"], ".2f"), "yes" if r["step_flag"] else "",
                 _fmt(r["harmonic_order"], ".2f"), r["near_order"] or "", "yes" if r["resonance_flag"] else ""]
                for r in e["rows"]]
        if rows:
            body.append(_table(["bank", "bus", "kV", "steps in", "Mvar in", "S_sc, MVA", "step, %", "step flag",
                                "h", "near order", "resonance flag"], rows, f"{case}: {e['message']}"))
        for a in e["assumptions"]:
            body.append(_p(f"{case}: assumption: {a}"))
    body.append(f'<p class="caution">{esc(d["caution"])}</p>')
    return _section("Bank engineering checks", "bankchecks", body)


def proof_sections(proof: dict) -> str:
    """HTML of every proof section present in ``proof``."""
    parts = []
    note = sweep_note(proof["sweep"]) if proof.get("sweep") else ""
    if "outages" in proof:
        parts.append(outage_section(proof["outages"], "" if "hourly" in proof else note))
    if "hourly" in proof:
        parts.append(hourly_section(proof["hourly"], note))
    if "bank_checks" in proof:
        parts.append(bank_section(proof["bank_checks"]))
    return "".join(parts)


def proof_files(frames: dict) -> dict:
    """CSV text of each full table (file name -> text)."""
    out = {}
    for name, df in frames.items():
        buf = io.StringIO()
        _six_digits(df).to_csv(buf, index=False)
        out[name] = buf.getvalue()
    return out


def _six_digits(df):
    """``df`` with its float columns as text of six significant digits, NaN as an empty field: the
    text of ``to_csv(float_format="%.6g")``, made once per column (pandas formats each value
    through a slower path: a second of the demo's 43,800-row hourly table, measured).

    >>> import pandas as pd
    >>> _six_digits(pd.DataFrame({"x": [0.1234567, float("nan"), 1e-9], "n": [1, 2, 3]})).x.tolist()
    ['0.123457', '', '1e-09']
    """
    out = df.copy()
    for col in df.columns:
        if df[col].dtype.kind == "f":
            out[col] = ["" if v != v else "%.6g" % v for v in df[col].tolist()]
    return out
