"""Report renderer: content, escaping, self-containment, CSV/JSON agreement, atomic folder writes,
charts, and a headless-browser load of a realistic (invented, demo-only) study."""
from __future__ import annotations

import csv
import io
import json
import math
import os
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from planner.report import atomic, svg
from planner.report.atomic import MARKER, write_report_folder
from planner.report.render import render_report, report_json, report_tables, \
    write_report
from planner.study.economics import Economics, evaluate

# ---------------------------------------------------------------------------------------------
# invented sample study (demo data only): a 33-bus radial feeder, three load levels

LEVELS = [{"name": "peak", "hours": 1500, "scale_p": 1.0, "scale_q": 1.0},
          {"name": "mid", "hours": 4260, "scale_p": 0.7, "scale_q": 0.7},
          {"name": "light", "hours": 3000, "scale_p": 0.4, "scale_q": 0.45}]
HOURS = {lv["name"]: lv["hours"] for lv in LEVELS}
SCALE = {lv["name"]: lv["scale_p"] for lv in LEVELS}


def _drop(bus: int) -> float:
    """Invented per-unit voltage drop at full load along a radial feeder with laterals."""
    if bus <= 18:
        return 0.0870 * (1 - (1 - (bus - 1) / 17) ** 1.6)
    if bus <= 22:
        return 0.0015 + 0.0035 * (bus - 18)
    if bus <= 25:
        return 0.0050 + 0.0060 * (bus - 22)
    return 0.0300 + 0.0068 * (bus - 25)


def _profile(level: str, lift=lambda b: 0.0, names=None):
    s = SCALE[level]
    names = names or {}
    return [{"bus": b, "name": names.get(b, f"N{b:02d}"),
             "v_pu": round(1.0 - _drop(b) * s + lift(b) * (1.0 if s > 0.5 else 0.6), 5)}
            for b in range(1, 34)]


def _summary(profile, v_min, v_max):
    lo = min(profile, key=lambda p: p["v_pu"])
    hi = max(profile, key=lambda p: p["v_pu"])
    viol = [{"bus": p["bus"], "name": p["name"], "v_pu": p["v_pu"],
             "limit": v_min if p["v_pu"] < v_min else v_max}
            for p in profile if p["v_pu"] < v_min or p["v_pu"] > v_max]
    return {"v_min_pu": lo["v_pu"], "v_min_bus": lo["bus"], "v_max_pu": hi["v_pu"],
            "v_max_bus": hi["bus"], "violations": viol, "profile": profile}


def sample_data(title="Feeder F7 capacitor study", names=None):
    v_min, v_max = 0.95, 1.05
    base_loss = {"peak": 0.20267, "mid": 0.09580, "light": 0.03098}
    base = {}
    for lv in HOURS:
        base[lv] = {"losses_mw": base_loss[lv], "converged": True, "gens_at_limit": [],
                    **_summary(_profile(lv, names=names), v_min, v_max)}

    def lift_a(b):   # three fixed banks: lift grows towards the feeder ends
        return 0.030 * min(b, 18) / 18 if b <= 18 else (0.026 if b >= 26 else 0.008)

    def lift_b(b):
        return 0.022 * min(b, 18) / 18 if b <= 18 else (0.020 if b >= 26 else 0.006)

    econ = Economics(energy_value_per_mwh={"peak": 140.0, "mid": 90.0, "light": 60.0},
                     demand_value_per_kw_year=55.0, discount_rate=0.06, horizon_years=20,
                     bank_life_years=15, om_fraction=0.015)

    def alt(name, desc, lift, losses, predicted, banks, capital, verified=True, conv=None,
            unverified_levels=()):
        levels = {}
        for lv in HOURS:
            ok = lv not in unverified_levels
            levels[lv] = {"verified": ok, "losses_mw": losses[lv] if ok else None,
                          "predicted_mw": predicted[lv],
                          **_summary(_profile(lv, lift, names=names), v_min, v_max)}
        e = evaluate(base_loss, {lv: losses[lv] for lv in HOURS}, HOURS, capital, econ, "peak")
        return {"name": name, "description": desc, "verified": verified, "banks": banks,
                "setpoints": {lv: [{"gen": "G1", "bus": 1, "v_pu": 1.0}] for lv in HOURS},
                "levels": levels, "convergence": conv or [], "economics": e.as_dict()}

    a = alt("A: three fixed banks", "Fixed banks at buses 14, 24 and 30, sized for the mid level.",
            lift_a, {"peak": 0.13899, "mid": 0.06612, "light": 0.02401},
            {"peak": 0.13650, "mid": 0.06590, "light": 0.02380},
            [{"bus": 14, "name": "N14", "units": 2, "mvar": 0.6, "kind": "fixed"},
             {"bus": 24, "name": "N24", "units": 3, "mvar": 0.9, "kind": "fixed"},
             {"bus": 30, "name": "N30", "units": 4, "mvar": 1.2, "kind": "fixed"}],
            capital=96_000.0,
            conv=[{"iteration": 0, "predicted_mw": None, "ac_mw": 0.20267, "trust": 1.0},
                  {"iteration": 1, "predicted_mw": 0.1310, "ac_mw": 0.1452, "trust": 1.0},
                  {"iteration": 2, "predicted_mw": 0.1381, "ac_mw": 0.1401, "trust": 0.5},
                  {"iteration": 3, "predicted_mw": 0.1389, "ac_mw": 0.13905, "trust": 0.5},
                  {"iteration": 4, "predicted_mw": 0.13898, "ac_mw": 0.13899, "trust": 0.25}])
    b = alt("B: two switched banks", "Switched banks at buses 12 and 30; steps follow the load.",
            lift_b, {"peak": 0.14620, "mid": 0.06840, "light": 0.02350},
            {"peak": 0.14500, "mid": 0.06800, "light": 0.02330},
            [{"bus": 12, "name": "N12", "units": 4, "mvar": 1.2, "kind": "switched",
              "steps_by_level": {"peak": 4, "mid": 3, "light": 1}},
             {"bus": 30, "name": "N30", "units": 3, "mvar": 0.9, "kind": "switched",
              "steps_by_level": {"peak": 3, "mid": 2, "light": 1}}],
            capital=118_000.0,
            conv=[{"iteration": 0, "predicted_mw": None, "ac_mw": 0.20267, "trust": 1.0},
                  {"iteration": 1, "predicted_mw": 0.1440, "ac_mw": 0.1480, "trust": 1.0},
                  {"iteration": 2, "predicted_mw": 0.1461, "ac_mw": 0.1462, "trust": 0.5}])
    c = alt("C: four banks (not converged)", "Four banks; the AC load flow at light load did not "
            "confirm the proposal.", lift_a, {"peak": 0.1301, "mid": 0.0640, "light": 0.0239},
            {"peak": 0.1290, "mid": 0.0630, "light": 0.0230},
            [{"bus": b_, "name": f"N{b_}", "units": 2, "mvar": 0.6, "kind": "fixed"}
             for b_ in (10, 16, 24, 31)], capital=140_000.0, verified=False,
            unverified_levels=("light",))
    return {
        "title": title, "network": "feeder33 (invented demo data)", "created": "2024-05-06 10:00",
        "question": "Which capacitor banks on feeder F7 bring bus voltages into the planning band "
                    "at all load levels, and do the loss savings pay for them?",
        "currency": "EUR", "peak_level": "peak",
        "criteria": {"v_min_pu": v_min, "v_max_pu": v_max, "bank unit size (kvar)": 300,
                     "max banks": 4},
        "levels": LEVELS, "base": base, "alternatives": [a, b, c],
        "assumptions": ["Loads are constant power.", "Substation voltage held at 1.00 pu."],
        "cautions": ["Demo data: the network and costs are invented."],
    }


# ---------------------------------------------------------------------------------------------
# content

def test_report_sections_and_key_figures():
    data = sample_data()
    page = render_report(data)
    for heading in ("Study question and criteria", "Base case", "Alternatives", "Voltage profiles",
                    "Losses by load level", "Economics", "Comparison of alternatives",
                    "Assumptions and cautions"):
        assert f">{heading}</h2>" in page
    # base peak losses with 4 decimals (feeder losses below 1 MW) and the lowest voltage
    assert "0.2027" in page
    lowest = data["base"]["peak"]["v_min_pu"]
    assert f"{lowest:.4f}" in page and 0.91 < lowest < 0.915
    # 3 profile charts, 1 bar chart, 2 convergence charts (C has no convergence data)
    assert page.count("<svg") == 6
    # harmonics/protection scope caution is always present
    assert "harmonic resonance" in page and "licensed" in page
    # economics of A: NPV from the economic result shown as whole currency units
    npv_a = data["alternatives"][0]["economics"]["npv"]
    assert f"EUR {npv_a:,.0f}" in page


def test_unverified_figures_not_shown_as_results():
    data = sample_data()
    page = render_report(data)
    tables = report_tables(data)
    comp = list(csv.DictReader(io.StringIO(tables["comparison.csv"])))
    c = next(r for r in comp if r["alternative"].startswith("C:"))
    assert c["verified"] == "false" and c["npv"] == "" and c["loss_energy_mwh"] == ""
    a = next(r for r in comp if r["alternative"].startswith("A:"))
    assert a["verified"] == "true" and float(a["npv"]) > 0
    # C's light level was not confirmed: its AC figure is not printed, the prediction is;
    # the confirmed peak level shows its AC figure
    c_section = page.split("C: four banks (not converged)</h3>")[1].split("</section>")[0]
    c_rows = c_section.split('data-table="alternative_levels"')[1].split("</table>")[0]
    light = next(r for r in c_rows.split("<tr") if ">light<" in r)
    peak = next(r for r in c_rows.split("<tr") if ">peak<" in r)
    assert "not verified" in light and "0.0239" not in light and "0.0230" in light
    assert "0.1301" in peak and "not verified" not in peak
    assert "was not confirmed by AC load flow" in c_section
    # the losses bar chart leaves the unverified alternative out
    bars = page.partition('id="losses"')[2].partition("</svg>")[0]
    assert "C: four banks" not in bars and bars.count('class="bar"') == 9   # 3 levels x 3 series


def _alt_section(page: str, name_html: str) -> str:
    return page.split(f"{name_html}</h3>")[1].split("<h3")[0]


def test_remaining_violations_and_run_line_shown_for_each_alternative():
    data = sample_data(names={18: "Mill <11>"})
    c = data["alternatives"][2]
    c.update(message="limits cannot all be met: 2 violation(s) remain; worst: light: voltage at "
                     "bus 18: 0.9406 pu against limit 0.9500 pu",
             status="converged (no further change)", ac_flows=99, milp_solves=6, seconds=5.5388,
             remaining_violations=["light: voltage at bus 18: 0.9406 pu against limit 0.9500 pu",
                                   "light: branch 3-4 loading 104.2 % of rating <A&B>"])
    c["levels"]["light"]["converged"] = True
    page = render_report(data)
    sec = _alt_section(page, "C: four banks (not converged)")
    warn = sec.split('<div class="warn">')[1].split("</div>")[0]
    # both broken limits, escaped, with the bus name added where the number is known
    assert "<li>light: voltage at bus 18 (Mill &lt;11&gt;): 0.9406 pu against limit 0.9500 pu</li>" \
        in warn
    assert "<li>light: branch 3-4 loading 104.2 % of rating &lt;A&amp;B&gt;</li>" in warn
    assert "2 limits still broken" in warn and "Optimiser's verdict: limits cannot all be met" in warn
    # near the top: the box and the run line come before the results table and the bank table
    run = ("How the optimiser got here: converged (no further change); 99 AC load flows; "
           "6 mixed-integer (MILP) solves; 5.5 s.")
    assert run in sec
    assert sec.index("limits still broken") < sec.index(run) < sec.index('data-table="alternative_levels"') \
        < sec.index('data-table="banks"')
    # the comparison table counts them for every plan, verified or not
    comp = page.split('data-table="comparison"')[1].split("</table>")[0]
    row = next(r for r in comp.split("<tr") if ">Limits broken<" in r)
    cells = re.findall(r'<td class="num">([^<]*)</td>', row)
    assert cells == ["24", "9", "11", "2"]         # base 16 + 8; A, B from their level lists; C given
    tables = report_tables(data)
    rv = list(csv.DictReader(io.StringIO(tables["remaining_violations.csv"])))
    assert [r["violation"] for r in rv if r["alternative"].startswith("C:")] == \
        c["remaining_violations"]
    runs = {r["alternative"]: r for r in csv.DictReader(io.StringIO(tables["optimiser_runs.csv"]))}
    assert runs[c["name"]]["ac_flows"] == "99" and runs[c["name"]]["limits_broken"] == "2"
    assert runs[c["name"]]["status"] == "converged (no further change)"
    # a verified plan says so plainly instead
    a_sec = _alt_section(page, "A: three fixed banks")
    assert '<div class="good">Confirmed by AC load flow at every load level.</div>' in a_sec
    assert "How the optimiser got here" not in a_sec           # no run data given for A


def test_remaining_violations_built_from_levels_when_not_given():
    data = sample_data()
    c = data["alternatives"][2]
    c["levels"]["light"]["other_violations"] = ["generator G2 reactive output above its limit"]
    page = render_report(data)
    warn = _alt_section(page, "C: four banks (not converged)").split('<div class="warn">')[1]
    warn = warn.split("</div>")[0]
    peak = c["levels"]["peak"]["violations"]
    assert warn.count("<li>") == len(peak) + 1 and len(peak) == 9
    v = peak[0]
    assert (f"<li>peak: voltage at bus {v['bus']} ({v['name']}): {v['v_pu']:.4f} pu against limit "
            f"{v['limit']:.4f} pu</li>") in warn
    assert "<li>light: generator G2 reactive output above its limit</li>" in warn
    # per level: the unverified light level still shows its count of broken limits
    rows = _alt_section(page, "C: four banks (not converged)").split(
        'data-table="alternative_levels"')[1].split("</table>")[0]
    light = next(r for r in rows.split("<tr") if ">light<" in r)
    assert re.findall(r'<td class="num">([^<]*)</td>', light)[-1] == "1"
    # a level whose AC load flow did not solve says so rather than counting
    c["levels"]["light"]["converged"] = False
    page = render_report(data)
    rows = _alt_section(page, "C: four banks (not converged)").split(
        'data-table="alternative_levels"')[1].split("</table>")[0]
    light = next(r for r in rows.split("<tr") if ">light<" in r)
    assert "AC not solved" in light


def test_voltage_and_bus_share_a_cell_and_settings_are_pivoted_by_level():
    data = sample_data(names={18: "Far End 11"})
    page = render_report(data)
    base = page.split('data-table="base_case"')[1].split("</table>")[0]
    lo = data["base"]["peak"]["v_min_pu"]
    assert f'<td class="txt">{lo:.4f} at 18 (Far End 11)</td>' in base
    assert "at bus</th>" in base and base.count("<th ") == 8      # no separate bus columns
    a_sec = _alt_section(page, "A: three fixed banks")
    sp = a_sec.split('data-table="setpoints"')[1].split("</table>")[0]
    assert sp.count("<tr>") == 2                                   # header + one generator
    assert re.findall(r"<th[^>]*>([^<]*)</th>", sp) == ["Generator", "Bus", "peak", "mid", "light"]
    assert sp.count(">1.0000<") == 3
    rows = a_sec.split('data-table="alternative_levels"')[1].split("</table>")[0]
    peak = next(r for r in rows.split("<tr") if ">peak<" in r)
    red = 0.20267 - 0.13899
    assert f">{red:.4f} ({100 * red / 0.20267:.1f} %)<" in peak


def test_escaping_of_user_strings():
    evil = "<script>alert(1)</script>"
    names = {18: evil, 5: 'Q"uote & <i>'}
    data = sample_data(title="Losses & <b>bold</b> plan", names=names)
    data["alternatives"][0]["name"] = "Alt <img src=x onerror=alert(2)>"
    data["network"] = "<iframe>"
    page = render_report(data)
    assert "<script" not in page
    assert "<b>bold</b>" not in page and "&lt;b&gt;bold&lt;/b&gt;" in page
    assert "Losses &amp; &lt;b&gt;bold&lt;/b&gt; plan" in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page       # bus 18 is the lowest voltage
    assert "<img" not in page and "<iframe" not in page and "<i>" not in page
    # inside SVG text too (the alternative name is a legend entry and a chart title)
    svgs = re.findall(r"<svg.*?</svg>", page, flags=re.S)
    assert any("Alt &lt;img src=x onerror=alert(2)&gt;" in s for s in svgs)
    for s in svgs:
        ET.fromstring(s)    # still well-formed XML after escaping


def test_report_is_self_contained():
    page = render_report(sample_data())
    assert "<script" not in page.lower()
    assert not re.search(r"\b(src|href)\s*=", page, flags=re.I)
    assert "@import" not in page and "url(" not in page and "@font-face" not in page
    # the only URL is the SVG namespace name, which is never fetched
    urls = set(re.findall(r"https?://[^\s\"'<>]+", page))
    assert urls == {"http://www.w3.org/2000/svg"}
    assert "default-src 'none'" in page     # the page also forbids loads by its own policy


def test_csv_and_json_hold_the_html_numbers():
    data = sample_data()
    page = render_report(data)
    tables = report_tables(data)
    doc = json.loads(report_json(data))          # strict JSON (no Infinity/NaN)
    comp_csv = list(csv.DictReader(io.StringIO(tables["comparison.csv"])))
    assert [r["alternative"] for r in comp_csv] == [r["alternative"]
                                                   for r in doc["tables"]["comparison"]]
    html_comp = page.split('data-table="comparison"')[1].split("</table>")[0]
    for r in comp_csv:
        if r["loss_energy_mwh"]:
            assert f"{float(r['loss_energy_mwh']):,.1f}" in html_comp
        if r["npv"]:
            assert f"{float(r['npv']):,.0f}" in html_comp
    # every profile point of every case is in profiles.csv: 33 buses x 3 levels x 4 cases
    prof = list(csv.DictReader(io.StringIO(tables["profiles.csv"])))
    assert len(prof) == 33 * 3 * 4
    peak18 = next(r for r in prof if r["case"] == "base case" and r["level"] == "peak"
                  and r["bus"] == "18")
    assert float(peak18["v_pu"]) == data["base"]["peak"]["profile"][17]["v_pu"]
    # per-level loss energy in economics.csv equals losses * hours
    eco = list(csv.DictReader(io.StringIO(tables["economics.csv"])))
    row = next(r for r in eco if r["alternative"].startswith("A:") and r["level"] == "mid")
    assert float(row["energy_before_mwh"]) == pytest.approx(0.09580 * 4260)
    assert float(row["energy_saved_mwh"]) == pytest.approx((0.09580 - 0.06612) * 4260)
    conv = [r for r in doc["tables"]["convergence"] if r["alternative"].startswith("A:")]
    assert [r["ac_mw"] for r in conv][-1] == 0.13899 and conv[0]["predicted_mw"] is None


def test_never_paying_plan_payback_is_null_in_json_and_never_in_html():
    data = sample_data()
    alt = data["alternatives"][1]
    alt["economics"]["payback_years"] = math.inf
    page = render_report(data)
    doc = json.loads(report_json(data))
    row = next(r for r in doc["tables"]["comparison"] if r["alternative"] == alt["name"])
    assert row["payback_years"] is None
    assert ">never<" in page


def test_bad_input_names_the_field():
    data = sample_data()
    del data["alternatives"][1]["levels"]["mid"]["losses_mw"]
    with pytest.raises(ValueError, match=r"alternatives\[1\]\.levels\['mid'\]\.losses_mw: missing"):
        render_report(data)
    data = sample_data()
    data["criteria"]["v_min_pu"] = "low"
    with pytest.raises(ValueError, match=r"criteria\.v_min_pu: expected a number"):
        report_tables(data)
    data = sample_data()
    del data["base"]["light"]
    with pytest.raises(ValueError, match=r"base\.light: missing"):
        report_json(data)


def test_csv_formula_cells_are_neutralised():
    data = sample_data(names={7: "=HYPERLINK(\"x\")"})
    prof = report_tables(data)["profiles.csv"]
    assert "'=HYPERLINK" in prof and "\n=HYPERLINK" not in prof and ",=HYPERLINK" not in prof


# ---------------------------------------------------------------------------------------------
# atomic folder writes

def _snapshot(folder: Path) -> dict:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_write_report_folder_replaces_whole_folder(tmp_path):
    target = tmp_path / "out"
    write_report_folder(target, {"a.csv": "x,y\n1,2\n", "b.bin": b"\x00\x01"})
    assert (target / "a.csv").read_text() == "x,y\n1,2\n"
    write_report_folder(target, {"c.txt": "new"})
    assert sorted(p.name for p in target.iterdir()) == [MARKER, "c.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["out"]     # no temp or backup folders left


def test_failure_mid_write_leaves_earlier_report_identical(tmp_path, monkeypatch):
    target = tmp_path / "report"
    write_report(target, sample_data())
    before = _snapshot(target)
    assert "report.html" in before and "comparison.csv" in before

    real = atomic._write_file
    calls = {"n": 0}

    def failing(path, content):
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError("disk full (simulated)")
        real(path, content)

    monkeypatch.setattr(atomic, "_write_file", failing)
    with pytest.raises(OSError, match="simulated"):
        write_report(target, sample_data(title="A newer study"))
    assert calls["n"] == 3
    assert _snapshot(target) == before
    assert [p.name for p in tmp_path.iterdir()] == ["report"]


def test_failure_at_swap_restores_earlier_report(tmp_path, monkeypatch):
    target = tmp_path / "report"
    write_report_folder(target, {"report.html": "<p>old</p>"})
    before = _snapshot(target)
    real_rename = os.rename
    calls = {"n": 0}

    def rename(src, dst):
        calls["n"] += 1
        if calls["n"] == 2:           # first: old -> backup; second: new -> target
            raise OSError("rename refused (simulated)")
        real_rename(src, dst)

    monkeypatch.setattr(atomic.os, "rename", rename)
    with pytest.raises(OSError, match="simulated"):
        write_report_folder(target, {"report.html": "<p>new</p>"})
    assert _snapshot(target) == before
    assert [p.name for p in tmp_path.iterdir()] == ["report"]


def test_refuses_to_replace_unrelated_folder(tmp_path):
    target = tmp_path / "documents"
    target.mkdir()
    (target / "thesis.txt").write_text("precious")
    with pytest.raises(ValueError, match="not written by the planner"):
        write_report_folder(target, {"report.html": "x"})
    assert (target / "thesis.txt").read_text() == "precious"
    with pytest.raises(ValueError, match="path separator"):
        write_report_folder(tmp_path / "r", {"../evil.txt": "x"})


# ---------------------------------------------------------------------------------------------
# charts

def test_line_chart_geometry_and_band():
    s = svg.line_chart([{"name": "base", "y": [1.0, 0.96, 0.93]},
                        {"name": "after", "y": [1.0, None, 0.97]}],
                       title="V", x_categories=["1", "2", "3"], band=(0.95, 1.05, "band"),
                       hlines=[(0.95, "min"), (1.05, "max")], width=600, height=300)
    root = ET.fromstring(s)
    ns = "{http://www.w3.org/2000/svg}"
    paths = root.findall(f".//{ns}path")
    assert len(paths) == 2
    # the gap at the None value splits the second series into two moves
    assert paths[1].get("d").count("M") == 2
    band = root.find(f".//{ns}rect[@class='band']")
    limits = root.findall(f".//{ns}line[@class='limit']")
    assert len(limits) == 2
    # the band spans exactly the pixel rows of the two limit lines
    ys = sorted(float(l.get("y1")) for l in limits)
    assert float(band.get("y")) == pytest.approx(ys[0], abs=0.02)
    assert float(band.get("y")) + float(band.get("height")) == pytest.approx(ys[1], abs=0.02)
    # lower voltage is drawn lower (larger y); first point at 1.0, last at 0.93
    first = paths[0].get("d").split()
    assert float(first[1].split("L")[0]) < float(first[-1])


def test_convergence_chart_joins_accepted_steps_only():
    s = svg.convergence_chart([0, 1, 2, 3], [None, 0.15, 0.16, 0.14], [0.2, 0.15, 0.17, 0.141],
                              accepted=[True, True, False, True], title="c")
    root = ET.fromstring(s)
    ns = "{http://www.w3.org/2000/svg}"
    paths = {p.get("data-name"): p.get("d") for p in root.findall(f".//{ns}path")}
    assert set(paths) == {"AC load flow, accepted step", "linear prediction"}
    assert paths["AC load flow, accepted step"].count("L") == 2          # 3 accepted points
    rings = [c for c in root.findall(f".//{ns}circle") if c.get("fill") == "#ffffff"]
    assert len(rings) == 2                                               # the rejected one + legend
    # integer axis: one tick per iteration, ending at the last one
    ticks = [t.text for t in root.findall(f".//{ns}g[@class='x-axis']/{ns}text")]
    assert ticks[:-1] == ["0", "1", "2", "3"] and ticks[-1] == "optimiser iteration"


def test_nice_ticks_cover_the_range():
    for lo, hi in [(0.0, 0.2027), (0.9131, 1.0), (12.0, 13.4), (-3.0, 7.0), (5.0, 5.0)]:
        a, b, ticks = svg.nice_ticks(lo, hi)
        assert a <= lo and b >= hi and ticks[0] == a and ticks[-1] == pytest.approx(b)
        assert 3 <= len(ticks) <= 12


def test_bar_chart_heights_proportional():
    s = svg.bar_chart(["peak"], [{"name": "x", "values": [0.2]}, {"name": "y", "values": [0.1]}],
                      title="t")
    root = ET.fromstring(s)
    bars = root.findall(".//{http://www.w3.org/2000/svg}rect[@class='bar']")
    h = [float(b.get("height")) for b in bars]
    assert h[0] == pytest.approx(2 * h[1], rel=1e-3)


# ---------------------------------------------------------------------------------------------
# headless browser

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if os.path.exists("/usr/bin/chromium")
                                        else None)


@pytest.fixture
def chromium(tmp_path):
    if CHROMIUM is None:
        pytest.skip("Debian chromium is not installed (no `chromium` on PATH or /usr/bin/chromium)")

    def run(*args, timeout=40):
        cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking", "--disable-component-update",
               "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", *args]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)

    return run


def test_browser_renders_report(chromium, tmp_path):
    folder = tmp_path / "report"
    write_report(folder, sample_data())
    url = (folder / "report.html").as_uri()
    dom = chromium("--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    html = dom.stdout
    assert html.count("<svg") == 6
    assert "Bus voltages at the peak level" in html and "Optimiser convergence, A: three fixed banks" in html
    assert "0.2027" in html and "EUR" in html
    assert html.count('class="series"') == 3 * 3 + 2 * 2   # profile lines + convergence lines

    png = tmp_path / "report.png"
    shot = chromium(f"--screenshot={png}", "--window-size=1366,3000", "--hide-scrollbars", url)
    assert shot.returncode == 0, shot.stderr[-2000:]
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 50_000
    keep = os.environ.get("PLANNER_KEEP_SCREENSHOT")
    if keep:
        shutil.copy(png, keep)


def test_browser_tables_fit_a_laptop_screen(chromium, tmp_path):
    """Long bus names used to push the per-level results table past the right edge."""
    Image = pytest.importorskip("PIL.Image")
    names = {b: f"Ravensholm North Industrial Estate {b} kV busbar" for b in range(1, 34)}
    folder = tmp_path / "report"
    write_report(folder, sample_data(names=names))
    png = tmp_path / "wide.png"
    shot = chromium(f"--screenshot={png}", "--window-size=1366,16000", "--hide-scrollbars",
                    (folder / "report.html").as_uri(), timeout=90)
    assert shot.returncode == 0, shot.stderr[-2000:]
    im = Image.open(png).convert("L")
    w, h = im.size
    # the page column is 1040 px wide and centred: (1366 - 1040) / 2 = 163 px margins
    right = im.crop((1366 - 150, 0, w, h))
    left = im.crop((0, 0, 150, h))
    assert right.getextrema() == (255, 255) and left.getextrema() == (255, 255)
    body = im.crop((200, 0, 1100, h))
    assert body.getextrema()[0] < 100                     # the page itself did draw
