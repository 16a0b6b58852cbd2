"""The command line: ``planner flow`` and ``planner plan``, as a user runs them.

Commands run as subprocesses (``python -m planner``) where the exit status, stderr and imports of
a real process matter, and through ``planner.cli.main`` otherwise (faster). Every figure the
commands report is also checked against the source named beside it or re-derived here with an
independent load flow of the exact settings.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import re
import shutil
import signal
import stat
import subprocess
import time
import sys
from pathlib import Path

import pytest

from planner.cli import main
from planner.flow.newton import solve_flow
from planner.network.io import read_network, write_network

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data"
CDF14 = DATA / "ieee14cdf.txt"
CDF30 = DATA / "ieee30cdf.txt"
FEEDER = DATA / "feeder33_tables"
STUDIES = DATA / "studies"


def run_cli(*args, cwd=ROOT):
    """``python -m planner ARGS`` in a fresh process; returns the CompletedProcess."""
    return subprocess.run([sys.executable, "-m", "planner", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def one_error_line(stderr: str) -> str:
    """The single stderr line of a failed command (and proof that there is no trace)."""
    assert "Traceback" not in stderr, stderr
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, stderr
    assert lines[0].startswith("error:"), stderr
    return lines[0]


def published_cdf_solution(path: Path) -> dict:
    """Final voltage (cols 28-33) and angle (cols 34-40) of each bus, sliced straight from the
    IEEE CDF file's bus section (not through the planner's reader)."""
    lines = path.read_text().splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.startswith("BUS DATA FOLLOWS")) + 1
    out = {}
    for ln in lines[start:]:
        if ln.strip().startswith("-999"):
            break
        out[int(ln[0:4])] = (float(ln[27:33]), float(ln[33:40]))
    return out


# --- planner flow -------------------------------------------------------------------------------

def test_flow_ieee14_cdf_prints_and_writes_results(tmp_path):
    out_json, out_csv = tmp_path / "out.json", tmp_path / "tables"
    before = hashlib.sha256(CDF14.read_bytes()).hexdigest()
    p = run_cli("flow", CDF14, "--json", out_json, "--csv", out_csv)
    assert p.returncode == 0, p.stderr
    assert p.stderr == ""
    text = p.stdout
    assert "converged" in text and "not converge" not in text
    # losses 13.393 MW: from memory; extremes: the IEEE CDF file's own solution (bus 3 at 1.010,
    # bus 8 at 1.090 pu); no generator of this case sits at a reactive limit
    assert re.search(r"losses: 13\.393\d* MW", text), text
    assert re.search(r"lowest voltage: 1\.010\d* pu at bus 3\b", text), text
    assert re.search(r"highest voltage: 1\.090\d* pu at bus 8\b", text), text
    assert re.search(r"generators at a reactive limit: none", text), text

    d = json.loads(out_json.read_text())
    assert d["converged"] is True
    assert isinstance(d["iterations"], int) and 1 <= d["iterations"] <= 10
    assert isinstance(d["losses_mw"], float) and d["losses_mw"] == pytest.approx(13.393, abs=1e-3)
    assert isinstance(d["solve_seconds"], float) and 0 < d["solve_seconds"] < 5
    assert [b["bus"] for b in d["buses"]] == list(range(1, 15))
    by_bus = {b["bus"]: b for b in d["buses"]}
    assert by_bus[1]["v_pu"] == pytest.approx(1.06, abs=1e-12)
    assert by_bus[1]["angle_deg"] == pytest.approx(0.0, abs=1e-12)
    # IEEE CDF file: published voltages (3 decimals) and angles (2 decimals)
    for bus, (v, a) in published_cdf_solution(CDF14).items():
        assert by_bus[bus]["v_pu"] == pytest.approx(v, abs=2e-3), bus
        assert by_bus[bus]["angle_deg"] == pytest.approx(a, abs=0.05), bus
    assert len(d["branches"]) == 20 and len(d["generators"]) == 5

    assert sorted(f.name for f in out_csv.iterdir() if not f.name.startswith(".")) == \
        ["branches.csv", "buses.csv", "generators.csv"]
    import pandas as pd
    buses = pd.read_csv(out_csv / "buses.csv")
    assert buses["bus"].tolist() == list(range(1, 15))
    assert buses["v_pu"].tolist() == pytest.approx([b["v_pu"] for b in d["buses"]], abs=1e-12)
    branches = pd.read_csv(out_csv / "branches.csv")
    assert branches["loss_mw"].sum() == pytest.approx(d["losses_mw"], abs=1e-6)
    assert len(pd.read_csv(out_csv / "generators.csv")) == 5
    assert hashlib.sha256(CDF14.read_bytes()).hexdigest() == before     # input never modified


def test_flow_names_generator_at_reactive_limit(capsys):
    # IEEE CDF file (30-bus): bus 2 sits at its upper reactive limit in the published solution
    assert main(["flow", str(CDF30)]) == 0
    out = capsys.readouterr().out
    assert re.search(r"generators at a reactive limit: bus 2 \(max\)", out), out


def test_flow_tabular_feeder(tmp_path, capsys):
    out_json, out_csv = tmp_path / "f.json", tmp_path / "csv"
    assert main(["flow", str(FEEDER), "--json", str(out_json), "--csv", str(out_csv)]) == 0
    text = capsys.readouterr().out
    # Baran and Wu 1989: 202.67 kW, lowest voltage 0.9131 pu at bus 18
    assert re.search(r"losses: 0\.2027 MW", text), text
    assert re.search(r"lowest voltage: 0\.913\d pu at bus 18\b", text), text
    assert re.search(r"highest voltage: 1\.0000 pu at bus 1\b", text), text
    d = json.loads(out_json.read_text())
    assert d["converged"] is True and isinstance(d["iterations"], int)
    assert d["losses_mw"] == pytest.approx(0.20267, abs=1e-5)
    assert d["solve_seconds"] > 0
    assert [b["bus"] for b in d["buses"]] == list(range(1, 34))
    assert min(b["v_pu"] for b in d["buses"]) == pytest.approx(0.9131, abs=1e-4)
    assert {f.name for f in out_csv.iterdir()} >= {"buses.csv", "generators.csv", "branches.csv"}


def test_flow_does_not_import_pyomo():
    code = ("import sys, planner.cli; planner.cli.main(['flow', 'tests/data/ieee14cdf.txt', '-q']); "
            "print('pyomo' in sys.modules)")
    p = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip() == "False"


def test_flow_not_converged_exits_nonzero_with_worst_bus(tmp_path):
    net = read_network(CDF14).copy()
    net.loads["mw"] *= 20.0
    net.loads["mvar"] *= 20.0
    write_network(net, tmp_path / "heavy14")
    p = run_cli("flow", tmp_path / "heavy14", "--json", tmp_path / "heavy.json")
    assert p.returncode != 0
    line = one_error_line(p.stderr)
    assert "did not converge" in line
    m = re.search(r"worst bus (\d+)", line)
    assert m and int(m.group(1)) in range(1, 15), line
    d = json.loads((tmp_path / "heavy.json").read_text())     # the failed solve is still reported
    assert d["converged"] is False and d["worst_bus"] == int(m.group(1))
    assert d["worst_mismatch_mva"] > 1.0


def _cdf_with(tmp_path, name, line_no, old, new):
    src = CDF14.read_bytes().split(b"\n")
    line = src[line_no - 1].decode()
    assert old in line
    src[line_no - 1] = line.replace(old, new, 1).encode()
    path = tmp_path / name
    path.write_bytes(b"\n".join(src))
    return path


def _tables_with(tmp_path, file, line_no, old, new):
    folder = tmp_path / "feeder"
    shutil.copytree(FEEDER, folder)
    lines = (folder / file).read_text().split("\n")
    assert old in lines[line_no - 1]
    lines[line_no - 1] = lines[line_no - 1].replace(old, new, 1)
    (folder / file).write_text("\n".join(lines))
    return folder


BAD_INPUTS = {
    # a letter in bus 3's load MW field (line 5, cols 41-49)
    "cdf letter in number": (lambda t: _cdf_with(t, "bad14.txt", 5, "   94.2  ", "   9x.2  "),
                             ["bad14.txt:5", "load MW", "9x.2"]),
    "missing file": (lambda t: t / "nowhere.txt", ["nowhere.txt", "no such file"]),
    "tabular unknown column": (lambda t: _tables_with(t, "lines.csv", 1, "r_ohm", "r_ohms"),
                               ["lines.csv", "r_ohms"]),
    "tabular letter in number": (lambda t: _tables_with(t, "loads.csv", 4, "120", "1x0"),
                                 ["loads.csv:4", "kw", "1x0"]),
    # branch record 1-2 (line 19) made to start at bus 99, which the file does not have
    "cdf branch to unknown bus": (lambda t: _cdf_with(t, "orphan14.txt", 19, "   1    2", "  99    2"),
                                  ["orphan14.txt", "'99-2'", "from_bus", "99"]),
    "tabular line to unknown bus": (lambda t: _tables_with(t, "lines.csv", 5, "4-5,4,5,", "4-5,4,55,"),
                                    ["feeder", "'4-5'", "to_bus", "55"]),
}


@pytest.mark.parametrize("case", list(BAD_INPUTS))
def test_flow_bad_input_one_line_error(tmp_path, case):
    make, expected = BAD_INPUTS[case]
    path = make(tmp_path)
    snapshot = {f: f.read_bytes() for f in ([path] if path.is_file() else path.glob("*"))}
    p = run_cli("flow", path, "--json", tmp_path / "out.json")
    assert p.returncode != 0
    line = one_error_line(p.stderr)
    for part in expected:
        assert part in line, (part, line)
    assert not (tmp_path / "out.json").exists()
    assert {f: f.read_bytes() for f in snapshot} == snapshot    # input never modified


# --- planner plan -------------------------------------------------------------------------------

def _with_banks(net, mvar_by_bus):
    """A copy of ``net`` with capacitor banks added as bus shunts (Mvar at 1.0 pu)."""
    out = net.copy()
    for bus, mvar in mvar_by_bus.items():
        out.buses.loc[out.buses["bus"] == bus, "shunt_supply_mvar"] += mvar
    return out


def test_plan_feeder_banks(tmp_path):
    study = STUDIES / "feeder33_plan.toml"
    out = tmp_path / "plan.json"
    p = run_cli("plan", study, "--json", out)
    assert p.returncode == 0, p.stderr
    assert "Traceback" not in p.stderr
    d = json.loads(out.read_text())
    assert d["verified"] is True
    assert d["violations"] == []
    assert d["setpoints"] == [] and d["taps"] == []
    # Baran and Wu 1989: 202.67 kW before any bank
    assert d["losses_before_mw"] == pytest.approx(0.20267, abs=1e-5)
    assert d["losses_after_mw"] < d["losses_before_mw"] - 0.03
    assert math.isfinite(d["losses_predicted_mw"])
    assert 1 <= len(d["banks"]) <= 2                                   # max_new_sites = 2
    for b in d["banks"]:
        assert b["bus"] in (18, 30, 33)
        assert isinstance(b["units"], int) and 1 <= b["units"] <= 10
        assert b["mvar"] == pytest.approx(0.15 * b["units"], abs=1e-12)
    # the reported losses are those of an AC load flow of exactly these banks
    res = solve_flow(_with_banks(read_network(FEEDER), {b["bus"]: b["mvar"] for b in d["banks"]}))
    assert res.converged
    assert res.losses_mw == pytest.approx(d["losses_after_mw"], abs=1e-7)
    assert res.vm.min() >= 0.95 - 1e-6                                # default planning band
    assert "plan:" in p.stdout and str(out) in p.stdout


def test_plan_ieee14_generator_setpoints(tmp_path, capsys):
    out = tmp_path / "plan14.json"
    assert main(["plan", str(STUDIES / "ieee14_setpoints.toml"), "--json", str(out)]) == 0
    d = json.loads(out.read_text())
    assert d["verified"] is True and d["violations"] == [] and d["banks"] == []
    sp = {s["bus"]: s["v_pu"] for s in d["setpoints"]}
    assert set(sp) == {1, 2, 3, 6, 8}                                 # the file's generator buses
    assert 1.00 - 1e-9 <= sp[1] <= 1.06 + 1e-9                          # per-bus range
    for bus in (2, 3, 6, 8):
        assert 0.98 - 1e-9 <= sp[bus] <= 1.10 + 1e-9
    assert d["losses_before_mw"] == pytest.approx(13.393, abs=1e-3)     # from memory
    assert d["losses_after_mw"] < d["losses_before_mw"]
    # an AC load flow with exactly these setpoints gives the reported losses
    net = read_network(CDF14).copy()
    net.generators["v_set_pu"] = net.generators["bus"].map(sp).astype(float)
    res = solve_flow(net)
    assert res.converged
    assert res.losses_mw == pytest.approx(d["losses_after_mw"], abs=1e-6)
    assert res.vm.max() <= 1.10 + 1e-6 and res.vm.min() >= 0.94 - 1e-6
    assert "generator bus 8: setpoint" in capsys.readouterr().out


def test_plan_limits_unreachable_exits_1_with_violations(tmp_path):
    # one small site at bus 14 cannot lift bus 18 (0.913 pu) to 0.95 pu: least-violation plan
    study = tmp_path / "tight.toml"
    study.write_text(f'[study]\ntitle = "tight"\nnetwork = "{FEEDER.as_posix()}"\n'
                     '[[levels]]\nname = "peak"\nhours = 8760\n'
                     '[banks]\ncandidates = [14]\nunit_mvar = 0.1\nmax_units = 2\n'
                     '[objective]\nkind = "losses"\n')
    out = tmp_path / "tight.json"
    assert main(["plan", str(study), "--json", str(out), "-q"]) == 1
    d = json.loads(out.read_text())
    assert d["verified"] is False
    kinds = {v["kind"] for v in d["violations"]}
    assert "voltage" in kinds
    assert all(v["excess"] > 0 and v["level"] == "peak" for v in d["violations"])


def test_plan_one_level_switched_only_sites_still_used(tmp_path):
    # a catalogue of switched banks only: at a single level a switched bank is simply in service,
    # so the plan must still place banks (the same sizes as fixed ones would be)
    text = (STUDIES / "feeder33_plan.toml").read_text().replace('kinds = ["fixed"]', 'kinds = ["switched"]')
    text = text.replace('"../feeder33_tables"', f'"{FEEDER.as_posix()}"')
    study = tmp_path / "switched.toml"
    study.write_text(text)
    out = tmp_path / "switched.json"
    assert main(["plan", str(study), "--json", str(out), "-q"]) == 0
    d = json.loads(out.read_text())
    assert d["verified"] is True and d["banks"]
    assert d["losses_after_mw"] < d["losses_before_mw"] - 0.03


def test_plan_unknown_level_is_input_error(tmp_path, capsys):
    out = tmp_path / "p.json"
    code = main(["plan", str(STUDIES / "feeder33_plan.toml"), "--level", "winter", "--json", str(out)])
    assert code == 2
    line = one_error_line(capsys.readouterr().err)
    assert "feeder33_plan.toml" in line and "levels" in line and "winter" in line
    assert not out.exists()


def test_plan_bad_study_file_one_line(tmp_path):
    study = tmp_path / "typo.toml"
    study.write_text('[study]\ntitle = "t"\nnetwork = "x"\n[[levels]]\nname = "peak"\nhours = 100\n'
                     '[banks]\nunit_mvr = 0.3\n')
    p = run_cli("plan", study, "--json", tmp_path / "p.json")
    assert p.returncode == 2
    line = one_error_line(p.stderr)
    assert "typo.toml" in line and "banks.unit_mvr" in line and "unknown key" in line


# --- planner study ------------------------------------------------------------------------------

def test_study_command_writes_report_and_says_where(tmp_path, capsys):
    out = tmp_path / "reports"
    assert main(["study", str(STUDIES / "feeder33_plan.toml"), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    report = out / "feeder33-plan" / "report.html"
    assert report.is_file()
    assert f"report: {report}" in text
    assert re.search(r"Plan: verified; losses after: peak 0\.1\d{3} MW", text), text
    data = json.loads((out / "feeder33-plan" / "report.json").read_text())["data"]
    assert data["base"]["peak"]["losses_mw"] == pytest.approx(0.20267, abs=1e-5)   # Baran and Wu 1989


# --- exit statuses, options, output places (command-line manners) ---------------------------------

def test_version_and_exit_codes_in_help(capsys):
    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0
    assert capsys.readouterr().out.strip() == "planner 0.1.0"
    for args in (["--help"], ["flow", "--help"], ["plan", "--help"], ["study", "--help"]):
        with pytest.raises(SystemExit):
            main(args)
        text = capsys.readouterr().out
        for code in ("0 ", "1 ", "2 ", "3 ", "130 "):
            assert f"\n  {code}" in text, (args, code)


@pytest.mark.parametrize("option, value", [("--max-iter", "-5"), ("--max-iter", "0"), ("--max-iter", "2.5"),
                                           ("--tol-mva", "inf"), ("--tol-mva", "nan"), ("--tol-mva", "-1"),
                                           ("--tol-mva", "1e9")])
def test_bad_solver_options_are_bad_input_naming_the_option(option, value):
    # --tol-mva inf reported the flat start as the solution; nan or -1 never converged; -5 was accepted
    p = run_cli("flow", CDF14, option, value)
    assert p.returncode == 2
    line = one_error_line(p.stderr)
    assert option in line and repr(value) in line and "must be" in line


def test_not_converged_and_bad_input_have_different_codes(tmp_path):
    net = read_network(CDF14).copy()
    net.loads["mw"] *= 20.0
    write_network(net, tmp_path / "heavy14")
    assert main(["flow", str(tmp_path / "heavy14"), "-q"]) == 1
    assert main(["flow", str(tmp_path / "nowhere.txt"), "-q"]) == 2


@pytest.mark.parametrize("option", ["--json", "--csv"])
def test_output_problem_found_before_the_work_names_the_option(tmp_path, option, capsys, monkeypatch):
    import planner.flow.newton as newton
    monkeypatch.setattr(newton, "solve_flow", lambda *a, **k: pytest.fail("solved before checking outputs"))
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    target = blocker / "out" if option == "--csv" else tmp_path       # under a file / a folder
    assert main(["flow", str(CDF14), option, str(target)]) == 3
    line = one_error_line(capsys.readouterr().err)
    assert line.startswith(f"error: {option} ") and "Error" not in line and ".part-" not in line


def test_csv_folder_with_other_files_is_refused_and_kept(tmp_path, capsys):
    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "notes.txt").write_text("keep me")
    assert main(["flow", str(CDF14), "--csv", str(folder), "-q"]) == 3
    assert "--csv" in one_error_line(capsys.readouterr().err)
    assert (folder / "notes.txt").read_text() == "keep me"
    # a plain CSV folder gets no report marker, and may be rewritten
    out = tmp_path / "tables"
    assert main(["flow", str(CDF14), "--csv", str(out), "-q"]) == 0
    assert main(["flow", str(CDF14), "--csv", str(out), "-q"]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["branches.csv", "buses.csv", "generators.csv"]


def test_outputs_honour_the_umask(tmp_path):
    old = os.umask(0o022)
    try:
        assert main(["flow", str(CDF14), "--json", str(tmp_path / "r.json"), "--csv", str(tmp_path / "t"),
                     "-q"]) == 0
    finally:
        os.umask(old)
    assert stat.S_IMODE((tmp_path / "r.json").stat().st_mode) == 0o644        # not 0600
    assert stat.S_IMODE((tmp_path / "t").stat().st_mode) == 0o755             # not 0700
    assert stat.S_IMODE((tmp_path / "t" / "buses.csv").stat().st_mode) == 0o644


def test_stale_temporaries_of_a_killed_run_are_swept(tmp_path):
    (tmp_path / ".t.new-ab12cd34").mkdir()                 # an earlier version's folder temporary
    (tmp_path / ".t.part-999999999-0123abcd").mkdir()      # ours, of a process that is gone
    (tmp_path / ".r.json.k2j3h4.tmp").write_text("{")      # an earlier version's file temporary
    (tmp_path / ".other.part-999999999-0123abcd").mkdir()  # not beside our targets: left alone
    assert main(["flow", str(CDF14), "--json", str(tmp_path / "r.json"), "--csv", str(tmp_path / "t"),
                 "-q"]) == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == [".other.part-999999999-0123abcd", "r.json", "t"]


def test_control_characters_in_names_are_escaped(tmp_path):
    src = CDF14.read_text().splitlines()
    k = next(i for i, ln in enumerate(src) if ln.startswith("   3 Bus 3"))
    src[k] = src[k][:5] + "\x1b]0;x\x07\x1b[5m" + src[k][5 + 10:]
    p = tmp_path / "esc.txt"
    p.write_bytes(("\n".join(src) + "\n").encode("latin-1"))
    r = run_cli("flow", p)
    assert r.returncode == 0, r.stderr
    assert "\x1b" not in r.stdout and "\x07" not in r.stdout
    assert "\\x1b]0;x\\x07\\x1b[5m" in r.stdout                 # bus 3 is the lowest voltage
    assert all(len(line) <= 100 for line in r.stdout.splitlines())
    assert re.search(r"at bus 8 Bus 8 HV$|at bus 8 Bus 8\s+TV$|at bus 8 Bus 8 TV$", r.stdout, re.M), r.stdout


def test_two_slacks_that_disagree_are_a_warning_line(tmp_path):
    net = read_network(CDF14).copy()
    net.buses.loc[net.buses.bus == 2, "kind"] = "slack"
    write_network(net, tmp_path / "two")
    r = run_cli("flow", tmp_path / "two")
    assert r.returncode == 0
    warn = [ln for ln in r.stderr.splitlines() if ln.startswith("warning:")]
    assert warn == ["warning: island with 2 slack buses: 1, 2 at different voltages 1.06, 1.045 pu and "
                    "angles 0, -4.98 deg: they will exchange power to hold both"], r.stderr


def test_closed_pipe_ends_quietly_with_the_usual_status():
    r = subprocess.run(f"'{sys.executable}' -m planner flow tests/data/ieee14cdf.txt | head -1; "
                       "exit ${PIPESTATUS[0]}", shell=True, executable="/bin/bash", cwd=ROOT,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0
    assert r.stdout.startswith("network: ") and len(r.stdout.splitlines()) == 1
    assert r.stderr == ""


def _demo_study_until(out, text, *args, **popen):
    """Start the demo study writing under ``out``; return it once a progress line holds ``text``,
    with the lines seen so far."""
    proc = subprocess.Popen([sys.executable, "-m", "planner", "study", str(ROOT / "studies" / "wrenfold-2027.toml"),
                             "--out", str(out), *args], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True,
                            # as at a terminal: a test runner started in the background inherits
                            # an ignored SIGINT, which Python would keep
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL), **popen)
    seen = []
    while not any(text in ln for ln in seen):
        line = proc.stderr.readline()
        assert line, "the study ended before it said anything: " + "".join(seen)
        seen.append(line)
    return proc, seen


def _interrupted(proc, seen):
    """The interrupted study ends with 130, one "interrupted" line and no traceback."""
    _, err = proc.communicate(timeout=60)
    err = "".join(seen) + err
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    assert err.strip().splitlines()[-1].startswith("interrupted")


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_interrupt_stops_cleanly_removes_partial_output_and_exits_130(tmp_path, sig):
    # the demo study runs for minutes: the interrupt lands in the middle of the optimisation
    out = tmp_path / "reports"
    # wait until the optimisation is under way (its first progress line), however busy the machine
    proc, seen = _demo_study_until(out, "alternative")
    proc.send_signal(sig)
    _interrupted(proc, seen)
    assert not out.exists() or [p.name for p in out.iterdir()] == []


def _session_members(sid: int) -> list:
    """Processes (other than zombies) of session ``sid``, from /proc."""
    out = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                stat = (d / "stat").read_text()
            except OSError:
                continue
            fields = stat[stat.rindex(")") + 2:].split()
            if int(fields[3]) == sid and fields[0] != "Z":
                out.append(int(d.name))
    return out


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc to list the session's processes")
def test_interrupt_while_workers_start_exits_130_and_leaves_no_process(tmp_path):
    # Ctrl-C at a terminal reaches the whole process group; here it lands right after the line
    # that says the workers are starting, before any worker has said anything
    out = tmp_path / "reports"
    proc, seen = _demo_study_until(out, "on 2 processes", "--jobs", "2", start_new_session=True)
    os.killpg(proc.pid, signal.SIGINT)
    _interrupted(proc, seen)
    left = _session_members(proc.pid)
    for _ in range(100):            # workers may take a moment to go after their parent
        if not left:
            break
        time.sleep(0.1)
        left = _session_members(proc.pid)
    assert left == [], f"processes left behind: {left}"


def test_plan_with_failing_base_case_says_so_without_inf(tmp_path):
    net = read_network(FEEDER).copy()
    net.loads["mw"] *= 12.0
    net.loads["mvar"] *= 12.0
    write_network(net, tmp_path / "heavy")
    study = tmp_path / "heavy.toml"
    study.write_text((STUDIES / "feeder33_plan.toml").read_text().replace('"../feeder33_tables"', '"heavy"'))
    r = run_cli("plan", study, "--json", tmp_path / "p.json")
    assert r.returncode == 1, r.stderr
    assert "inf MW" not in r.stdout and "nan MW" not in r.stdout and "AC-verified" not in r.stdout
    assert "base-case load flow (before any change) did not converge" in r.stdout
    d = json.loads((tmp_path / "p.json").read_text())
    assert d["verified"] is False


def test_plan_writes_into_the_study_output_folder_by_default(tmp_path):
    study = tmp_path / "case.toml"
    study.write_text((STUDIES / "feeder33_plan.toml").read_text()
                     .replace('"../feeder33_tables"', f'"{FEEDER.as_posix()}"'))
    assert main(["plan", str(study), "-q"]) == 0
    assert (tmp_path / "reports" / "case.plan.json").is_file()
    assert not (tmp_path / "case.plan.json").exists()


def test_study_output_key_problems_name_the_key(tmp_path, capsys):
    study = tmp_path / "base.toml"
    text = (STUDIES / "feeder33_plan.toml").read_text().replace('"../feeder33_tables"', f'"{FEEDER.as_posix()}"')
    study.write_text(text.replace("[study]\n", '[study]\noutput = "base.toml"\n', 1))
    assert main(["study", str(study), "-q"]) == 3
    line = one_error_line(capsys.readouterr().err)
    assert "base.toml: study.output" in line and "FileExistsError" not in line
    # a folder that holds anything but an earlier report is refused before the study runs
    (tmp_path / "mine" / "base").mkdir(parents=True)
    (tmp_path / "mine" / "base" / "thesis.txt").write_text("precious")
    study.write_text(text.replace("[study]\n", '[study]\noutput = "mine"\n', 1))
    assert main(["study", str(study), "-q"]) == 3
    assert "not written by the planner" in one_error_line(capsys.readouterr().err)
    assert (tmp_path / "mine" / "base" / "thesis.txt").read_text() == "precious"


def test_study_report_files_honour_the_umask(tmp_path):
    old = os.umask(0o022)
    try:
        assert main(["study", str(STUDIES / "feeder33_plan.toml"), "--out", str(tmp_path), "-q"]) == 0
    finally:
        os.umask(old)
    folder = tmp_path / "feeder33-plan"
    assert stat.S_IMODE(folder.stat().st_mode) == 0o755
    assert stat.S_IMODE((folder / "report.html").stat().st_mode) == 0o644


def test_progress_is_plain_timestamped_lines_on_a_pipe(tmp_path):
    r = run_cli("plan", STUDIES / "feeder33_plan.toml", "--json", tmp_path / "p.json")
    assert r.returncode == 0
    lines = r.stderr.splitlines()
    assert lines and all(re.match(r"\d\d:\d\d:\d\d ", ln) for ln in lines), r.stderr
    assert any("MW mean losses" in ln for ln in lines), r.stderr       # the objective in MW
    q = run_cli("plan", STUDIES / "feeder33_plan.toml", "--json", tmp_path / "p.json", "-q")
    assert q.returncode == 0 and q.stderr == "" and q.stdout == ""


def test_read_only_output_folder_found_before_the_work(tmp_path, capsys, monkeypatch):
    # as root permission bits do not stop a write, so the probe's answer is given here; the
    # probe itself is a real create-and-delete in the folder
    import planner.atomic as atomic
    monkeypatch.setattr(atomic, "_probe_writable", lambda folder: "Read-only file system")
    assert main(["study", str(STUDIES / "feeder33_plan.toml"), "--out", str(tmp_path / "r"), "-q"]) == 3
    line = one_error_line(capsys.readouterr().err)
    assert line.startswith("error: --out ") and "read-only file system" in line
    assert not (tmp_path / "r").exists()


def test_study_scheduler_option_overrides_the_sweep_section(tmp_path, monkeypatch):
    # --scheduler sends the N-1 sweep where it says, whatever the study's [sweep] section holds
    import planner.sweep.engine as engine
    seen = []
    real = engine.sweep_client

    def recording(where, *args, **kwargs):
        seen.append(where)
        return real("serial", *args, **kwargs)
    monkeypatch.setattr(engine, "sweep_client", recording)
    out = tmp_path / "reports"
    assert main(["study", str(STUDIES / "ieee30_secure.toml"), "--out", str(out), "--jobs", "1",
                 "--scheduler", "tcp://127.0.0.1:1", "-q"]) == 0
    assert seen == ["tcp://127.0.0.1:1"]
    assert (out / "ieee30-secure" / "n1_outcomes.csv").is_file()


def test_study_scheduler_option_needs_dask_for_an_address(tmp_path, monkeypatch, capsys):
    import planner.sweep.engine as engine
    monkeypatch.setattr(engine, "dask_available", lambda: False)
    with pytest.raises(SystemExit) as stop:
        main(["study", str(STUDIES / "ieee30_secure.toml"), "--out", str(tmp_path), "--scheduler",
              "tcp://10.0.0.5:8786"])
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert "--scheduler" in err and "needs Dask" in err and "distributed" in err
