"""Report: content, escaping, self-containment, CSV/JSON agreement, atomic folder writes, charts,
and a headless-browser load of a report made from a real (invented, demo-only) feeder study."""
from __future__ import annotations

import copy
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

from planner import atomic as shared_atomic
from planner.report import atomic, svg
from planner.report.atomic import MARKER, write_report_folder
from planner.report.convert import report_data
from planner.report.render import SECTIONS, build_tables, render_report, report_files, report_json, \
    report_tables
from planner.study.run import run_study
from planner.study.spec import read_study

DATA = Path(__file__).parent / "data"
STUDY = (DATA / "studies" / "feeder33_two_levels.toml").read_text()
# a third alternative whose capital cap (3000) is below the cheapest site (2000 + 8000 x 0.15):
# its least-violation plan builds nothing, so its AC load flows solve and still break the band
STUDY += """
[[alternatives]]
name = "Tiny <cap>"
description = "capital at most 3000"
budget = 3000.0
"""


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    folder = tmp_path_factory.mktemp("study")
    path = folder / "feeder.toml"
    path.write_text(STUDY.replace('network = "../feeder33_tables"',
                                  f'network = "{(DATA / "feeder33_tables").as_posix()}"'))
    result = run_study(read_study(path), jobs=1)
    return result, report_data(result)


@pytest.fixture
def data(study):
    return copy.deepcopy(study[1])


def _csv(files, name):
    return list(csv.DictReader(io.StringIO(files[name])))


def _section(page, anchor):
    return page.split(f'<section id="{anchor}">')[1].split("</section>")[0]


# ---------------------------------------------------------------------------------------------
# content

def test_sections_in_order_and_recommendation_first(data):
    page = render_report(data)
    heads = re.findall(r'<h2 class="[^"]*">([^<]*)</h2>', page)
    assert heads == [s.title for s in SECTIONS]
    assert heads[0] == "Recommendation" and heads[-1] == "Appendix: optimiser convergence"
    rec = _section(page, "recommendation")
    best = max((a for a in data["alternatives"] if a["verified"]), key=lambda a: a["economics"]["npv"])
    assert f"Recommended: <strong>{best['name']}</strong>" in rec
    # its banks, one row per site, with bus, name, fixed and switched units
    sites = rec.split('data-table="bank_sites"')[1].split("</table>")[0]
    assert sites.count("<tr>") == 1 + len(best["sites"])
    for s in best["sites"]:
        assert f'<td class="num">{s["bus"]}</td><td class="txt">{s["name"]}</td>' in sites
    # the incremental comparison with the runner-up and its benefit/cost ratio
    inc = rec.split('data-table="increment"')[1].split("</table>")[0]
    other = next(a for a in data["alternatives"] if a["verified"] and a is not best)
    assert other["name"] in inc and f"{other['economics']['bcr']:.2f}" in inc
    assert "Smallest margin of a load bus to its own band" in rec
    # harmonics/protection scope caution is always present
    assert "harmonic resonance" in page and "licensed" in page


def test_least_violation_plan_shows_its_ac_figures_and_no_money(data):
    page = render_report(data)
    tiny = next(a for a in data["alternatives"] if a["name"] == "Tiny <cap>")
    assert not tiny["verified"] and tiny["sites"] == []
    sec = page.split("Tiny &lt;cap&gt;</h3>")[1].split("<h3")[0]
    n = len(tiny["remaining_violations"])
    assert n > 0 and f"The AC load flows of this plan solved and still break {n} limits" in sec
    assert "not confirmed by AC load flow" not in page
    rows = sec.split('data-table="alternative_levels"')[1].split("</table>")[0]
    peak = next(r for r in rows.split("<tr") if ">peak<" in r)
    assert f"{tiny['levels']['peak']['losses_mw']:.4f}" in peak         # AC losses shown
    files = report_files(data)
    comp = {r["alternative"]: r for r in _csv(files, "comparison.csv")}
    t = comp["Tiny <cap>"]
    assert t["meets_limits"] == "false" and t["capital_cost"] == "" and t["npv"] == ""
    assert float(t["loss_energy_mwh"]) > 0 and t["note"] == "limits still broken, so no money figures"
    # the base case is not "verified": it counts its broken limits
    assert comp["base case"]["meets_limits"] == "false"
    base_broken = sum(len(b["violations"]) + len(b["other_limits_broken"]) for b in data["base"].values())
    assert int(comp["base case"]["limits_broken"]) == base_broken > 0


def test_inputs_section_lets_a_reviewer_rerun(data, study):
    page = render_report(data)
    sec = _section(page, "inputs")
    result = study[0]
    for f in result.inputs:
        assert f.sha256 in sec and len(f.sha256) == 64
    assert {f.role for f in result.inputs} == {"study", "network"}
    assert "0.1.0" in sec or result.tool_version in sec
    assert "peak TST 90, light TST 45 per MWh" in sec and "TST 60 per kW a year" in sec
    cand = sec.split('data-table="candidate_sites"')[1].split("</table>")[0]
    assert cand.count("<tr>") == 1 + 4                        # candidates 14, 18, 30, 33


def test_precision_and_names_in_csv(data):
    files = report_files(data)
    noise = re.compile(r"\d\.\d*(?:9999999|0000001)\d*")
    for name, text in files.items():
        if name.endswith(".csv"):
            assert not noise.search(text), name
            assert "inf" not in text.split(",") and "nan" not in text.lower().split(","), name
            header = text.split("\n")[0].split(",")
            assert all(" " not in h for h in header), name
            # retired names
            for old in ("scale_p", "limit", "violations", "branch", "gen", "steps", "verified"):
                assert old not in header, (name, old)
    # the same names in report.json's data as in the CSV files
    doc = json.loads(files["report.json"])

    def keys(x):
        if isinstance(x, dict):
            return set(x) | set().union(*(keys(v) for v in x.values()))
        if isinstance(x, list):
            return set().union(*(keys(v) for v in x)) if x else set()
        return set()
    assert not keys(doc["data"]) & {"gen", "branch", "transformer", "steps", "limit", "scale_p", "trust"}
    base = _csv(files, "base_case.csv")
    assert base[0]["v_min_bus"] == "18" and "v_min_bus_name" in base[0]     # number and name apart
    html = files["report.html"]
    # money to three significant figures, energy whole MWh
    best = max((a for a in data["alternatives"] if a["verified"]), key=lambda a: a["economics"]["npv"])
    npv = best["economics"]["npv"]
    digits = 3 - int(math.floor(math.log10(abs(npv)))) - 1
    assert f"TST {round(npv, digits):,.0f}" in html
    e = sum(data["base"][n]["losses_mw"] * h for n, h in (("peak", 2000), ("light", 6760)))
    assert f">{e:,.0f}<" in html


def test_payback_never_and_no_money_wording(data):
    alt = next(a for a in data["alternatives"] if a["verified"])
    alt["economics"]["payback_years"] = math.inf
    files = report_files(data)
    row = next(r for r in _csv(files, "comparison.csv") if r["alternative"] == alt["name"])
    assert row["payback_years"] == "" and "never pays back" in row["note"]
    assert "payback never years" not in files["report.html"]
    doc = json.loads(files["report.json"])
    assert next(r for r in doc["tables"]["comparison"] if r["alternative"] == alt["name"])["payback_years"] is None


def test_study_without_money_shows_no_money_figures():
    result = run_study(read_study(DATA / "studies" / "feeder33_plan.toml"), jobs=1)   # losses objective, no costs
    files = report_files(report_data(result))
    plan = next(r for r in _csv(files, "comparison.csv") if r["alternative"] != "base case")
    assert plan["meets_limits"] == "true" and float(plan["energy_saved_mwh"]) > 0
    assert plan["capital_cost"] == plan["npv"] == plan["payback_years"] == ""
    assert plan["note"] == "no costs or values in the study"
    page = files["report.html"]
    assert "saves the most loss energy of the plans that meet every limit" in page
    assert "No money figures" in _section(page, "economics") and "never" not in page
    assert files["economics_summary.csv"].count("\n") == 1           # header only


def test_engineering_tables(data):
    files = report_files(data)
    gens = _csv(files, "generators.csv")
    sp = [g for g in gens if g["case"] == "base case" and g["level"] == "peak" and g["supply_point"] == "true"]
    assert len(sp) == 1
    p, q = float(sp[0]["mw"]), float(sp[0]["mvar"])
    # feeder33 peak load 3.715 MW + 2.300 Mvar plus losses 202.67 kW / 135.1 kvar (Baran and Wu 1989)
    assert p == pytest.approx(3.715 + 0.20267, abs=1e-3) and q == pytest.approx(2.300 + 0.1351, abs=2e-3)
    assert float(sp[0]["power_factor"]) == pytest.approx(p / math.hypot(p, q), abs=1e-9)
    lb = _csv(files, "loss_breakdown.csv")
    for case in {r["case"] for r in lb}:
        for lv in ("peak", "light"):
            part = sum(float(r["loss_mw"]) for r in lb if r["case"] == case and r["level"] == lv)
            ref = data["base"][lv] if case == "base case" else \
                next(a for a in data["alternatives"] if a["name"] == case)["levels"][lv]
            assert part == pytest.approx(ref["losses_mw"], abs=1e-9)
    page = files["report.html"]
    assert page.count('class="breach"') > 0                     # base peak under 0.92 pu is ringed
    net = _section(page, "network")
    best = max((a for a in data["alternatives"] if a["verified"]), key=lambda a: a["economics"]["npv"])
    assert net.count('class="site"') == len(best["sites"]) and net.count('class="bus"') == 33


def test_tables_built_once(data, monkeypatch):
    import planner.report.render as render
    calls = []
    real = render.build_tables
    monkeypatch.setattr(render, "build_tables", lambda d: calls.append(1) or real(d))
    render.report_files(data)
    assert calls == [1]


def test_escaping_of_user_strings(data):
    evil = "<script>alert(1)</script>"
    data["title"] = "Losses & <b>bold</b> plan"
    for lv in data["base"].values():
        for p in lv["profile"]:
            if p["bus"] == 18:
                p["name"] = evil
    data["alternatives"][0]["name"] = "Alt <img src=x onerror=alert(2)>"
    data["network"] = "<iframe>"
    page = render_report(data)
    assert "<script" not in page
    assert "<b>bold</b>" not in page and "Losses &amp; &lt;b&gt;bold&lt;/b&gt; plan" in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "<img" not in page and "<iframe" not in page
    svgs = re.findall(r"<svg.*?</svg>", page, flags=re.S)
    assert any("Alt &lt;img src=x onerror=alert(2)&gt;" in s for s in svgs)
    for s in svgs:
        ET.fromstring(s)    # still well-formed XML after escaping


def test_report_is_self_contained(data):
    page = render_report(data)
    assert "<script" not in page.lower()
    assert not re.search(r"\b(src)\s*=", page, flags=re.I)
    assert set(re.findall(r'href="([^"]*)"', page)) == {f"#{s.anchor}" for s in SECTIONS}   # in-page only
    assert "@import" not in page and "url(" not in page and "@font-face" not in page
    urls = set(re.findall(r"https?://[^\s\"'<>]+", page))
    assert urls == {"http://www.w3.org/2000/svg"}
    assert "default-src 'none'" in page


def test_csv_and_json_hold_the_html_numbers(data):
    files = report_files(data)
    doc = json.loads(files["report.json"])          # strict JSON (no Infinity/NaN)
    comp = _csv(files, "comparison.csv")
    assert [r["alternative"] for r in comp] == [r["alternative"] for r in doc["tables"]["comparison"]]
    html_comp = files["report.html"].split('data-table="comparison"')[1].split("</table>")[0]
    for r in comp:
        if r["loss_energy_mwh"]:
            assert f"{float(r['loss_energy_mwh']):,.0f}" in html_comp
    prof = _csv(files, "profiles.csv")
    assert len(prof) == 33 * 2 * 4                    # 33 buses x 2 levels x (base + 3 plans)
    assert {r["v_min_pu"] for r in prof} == {"0.92"}


def test_bad_input_names_the_field(data):
    bad = copy.deepcopy(data)
    del bad["alternatives"][1]["levels"]["light"]["losses_mw"]
    with pytest.raises(ValueError, match=r"alternatives\[1\]\.levels\['light'\]\.losses_mw: missing"):
        render_report(bad)
    bad = copy.deepcopy(data)
    bad["criteria"]["v_min_pu"] = "low"
    with pytest.raises(ValueError, match=r"criteria\.v_min_pu: expected a number"):
        build_tables(bad)
    bad = copy.deepcopy(data)
    del bad["base"]["light"]
    with pytest.raises(ValueError, match=r"base\.light: missing"):
        report_json(bad)


def test_csv_formula_cells_are_neutralised(data):
    for p in data["base"]["peak"]["profile"]:
        if p["bus"] == 7:
            p["name"] = '=HYPERLINK("x")'
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


def test_failure_mid_write_leaves_earlier_report_identical(tmp_path, monkeypatch, data):
    target = tmp_path / "report"
    write_report_folder(target, report_files(data))
    before = _snapshot(target)
    assert "report.html" in before and "comparison.csv" in before

    real = shared_atomic._write_bytes
    calls = {"n": 0}

    def failing(path, data, mode):
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError("disk full (simulated)")
        real(path, data, mode)

    monkeypatch.setattr(shared_atomic, "_write_bytes", failing)
    with pytest.raises(OSError, match="simulated"):
        write_report_folder(target, report_files(dict(data, title="A newer study")))
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


def test_browser_renders_report(chromium, tmp_path, data):
    folder = tmp_path / "report"
    write_report_folder(folder, report_files(data))
    url = (folder / "report.html").as_uri()
    dom = chromium("--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    html = dom.stdout
    for s in SECTIONS:
        assert f'<section id="{s.anchor}">' in html, s.anchor
    # 2 profiles, 1 losses bar chart, 1 tornado, 1 network sketch, 3 convergence charts
    assert html.count("<svg") == 8
    assert "Bus voltages at the peak level" in html and "NPV sensitivity" in html
    assert "Network by voltage level" in html and "Optimiser convergence, Tiny &lt;cap&gt;" in html
    assert "0.2027" in html and "TST" in html

    png = tmp_path / "report.png"
    shot = chromium(f"--screenshot={png}", "--window-size=1366,3000", "--hide-scrollbars", url)
    assert shot.returncode == 0, shot.stderr[-2000:]
    raw = png.read_bytes()
    assert raw[:8] == b"\x89PNG\r\n\x1a\n" and len(raw) > 50_000
    keep = os.environ.get("PLANNER_KEEP_SCREENSHOT")
    if keep:
        shutil.copy(png, keep)


def _margins_blank(png, width, margin):
    Image = pytest.importorskip("PIL.Image")
    im = Image.open(png).convert("L")
    w, h = im.size
    right = im.crop((width - margin, 0, w, h))
    left = im.crop((0, 0, margin, h))
    body = im.crop((margin + 40, 0, width - margin - 40, h))
    return right.getextrema() == (255, 255) and left.getextrema() == (255, 255) and body.getextrema()[0] < 100


def test_browser_tables_fit_a_laptop_screen(chromium, tmp_path, data):
    """Long bus names used to push tables past the right edge of the page column."""
    pytest.importorskip("PIL.Image")
    for lv in list(data["base"].values()) + [x for a in data["alternatives"] for x in a["levels"].values()]:
        for p in lv["profile"]:
            p["name"] = f"Ravensholm North Industrial Estate {p['bus']} kV busbar"
    for a in data["alternatives"]:
        for s in a["sites"]:
            s["name"] = f"Ravensholm North Industrial Estate {s['bus']} kV busbar"
    folder = tmp_path / "report"
    write_report_folder(folder, report_files(data))
    png = tmp_path / "wide.png"
    shot = chromium(f"--screenshot={png}", "--window-size=1366,16000", "--hide-scrollbars",
                    (folder / "report.html").as_uri(), timeout=90)
    assert shot.returncode == 0, shot.stderr[-2000:]
    # the page column is 1040 px wide and centred: (1366 - 1040) / 2 = 163 px margins
    assert _margins_blank(png, 1366, 150)


def test_browser_prints_to_a4(chromium, tmp_path, data):
    folder = tmp_path / "report"
    write_report_folder(folder, report_files(data))
    pdf = tmp_path / "report.pdf"
    out = chromium(f"--print-to-pdf={pdf}", "--no-pdf-header-footer", (folder / "report.html").as_uri(),
                   timeout=90)
    assert out.returncode == 0, out.stderr[-2000:]
    raw = pdf.read_bytes()
    assert raw[:5] == b"%PDF-"
    # A4 portrait media box: 595 x 842 points
    box = re.search(rb"/MediaBox\s*\[\s*0 0 (\d+(?:\.\d+)?) (\d+(?:\.\d+)?)\s*\]", raw)
    assert box and abs(float(box.group(1)) - 595) < 2 and abs(float(box.group(2)) - 842) < 2
    pages = len(re.findall(rb"/Type\s*/Page[^s]", raw))
    assert 5 <= pages <= 30, pages
