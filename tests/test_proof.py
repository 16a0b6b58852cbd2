"""Proof sections of a study (N-1, hourly profile, bank checks): study keys, a run on the 33-bus
feeder study, the plan applied to the network, report sections and CSV outputs."""
from __future__ import annotations

from pathlib import Path

import pytest

from planner.errors import InputError
from planner.flow.newton import solve_flow
from planner.proof.run import plan_network
from planner.report.render import report_files
from planner.study.run import run_study
from planner.study.spec import read_study

STUDIES = Path(__file__).resolve().parent / "data" / "studies"

SECTIONS = """
[outages]
elements = ["line"]
band = [0.93, 1.10]
levels = ["peak"]

[profile]
file = "prof.csv"
control = "schedule"

[bank_checks]
step_limit_pct = 2.0

[sweep]
chunk_size = 5
scheduler = "serial"     # in this process: the suite stays light; cluster runs are compared in test_sweep
"""


def _study(tmp_path, extra=SECTIONS, profile="hour,network\n0,1.0\n1,0.4\n2,0.5\n3,0.95\n"):
    text = (STUDIES / "feeder33_two_levels.toml").read_text()
    text = text.replace('network = "../feeder33_tables"', f'network = "{(STUDIES.parent / "feeder33_tables").as_posix()}"')
    p = tmp_path / "study.toml"
    p.write_text(text + extra)
    (tmp_path / "prof.csv").write_text(profile)
    return p


@pytest.fixture(scope="module")
def feeder_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("proof")
    spec = read_study(_study(d))
    from planner.report.convert import report_data
    result = run_study(spec, jobs=1)
    return spec, report_data(result), [(a.spec, a.plan) for a in result.alternatives]


def test_plan_network_reproduces_the_plan_losses(feeder_run):
    spec, data, plans = feeder_run
    from planner.network.io import read_network
    from planner.study.run import level_cases
    net = read_network(spec.network_path)
    for lc in level_cases(net, spec):
        for _, plan in plans:
            got = solve_flow(plan_network(lc.network, plan, lc.name), build_tables=False).losses_mw
            assert got == pytest.approx(plan.losses_after_mw[lc.name], rel=1e-6)


def test_proof_sections_in_data_report_and_csv(feeder_run):
    spec, data, plans = feeder_run
    proof = data["proof"]
    n1 = proof["outages"]
    # the feeder is radial: every line outage cuts the load beyond it
    base = n1["cases"]["base"]["peak"]
    assert n1["outages"] == 32 and len(base["islanded"]) == 32
    assert base["islanded"][0]["load_cut_mw"] > 0
    hourly = proof["hourly"]
    assert set(hourly["cases"]) == {"base"} | {a.name for a, _ in plans}
    # exact energy of the base case: the sum of four independent load flows
    from planner.network.io import read_network
    net = read_network(spec.network_path)
    ref = 0.0
    for f in (1.0, 0.4, 0.5, 0.95):
        n = net.copy()
        n.loads["mw"] *= f
        n.loads["mvar"] *= f
        ref += solve_flow(n, build_tables=False).losses_mw
    assert hourly["cases"]["base"]["energy_loss_mwh"] == pytest.approx(ref, rel=1e-7)
    assert hourly["hours_by_level"] == {"peak": 2.0, "light": 2.0}
    bc = proof["bank_checks"]["cases"]
    assert bc["base"]["rows"] == []
    for alt, plan in plans:
        assert len({r["bus"] for r in bc[alt.name]["rows"]}) == len(plan.banks)
    files = report_files(data)
    html = files["report.html"]
    for title in ("Outages (N-1)", "Every hour of the year", "Bank engineering checks", "Loss-duration curve",
                  "Voltage-duration curve", "specialists"):
        assert title in html
    for name in ("n1_outcomes.csv", "n1_violations.csv", "hourly.csv", "bank_checks.csv"):
        assert name in files and files[name].count("\n") > 1
    assert "proof_frames" not in files["report.json"]
    # where the sweeps ran, as the study's [sweep] section asked (this process)
    assert proof["sweep"]["where"] == "serial" and not proof["sweep"]["chosen"]
    assert "The N-1 and hourly load flows ran in this process: as the study or command line asks." in html


@pytest.mark.parametrize("extra, where", [
    ('\n[outages]\nelements = ["cable"]\n', "outages.elements"),
    ('\n[outages]\nlevels = ["winter"]\n', "outages.levels"),
    ('\n[outages]\nband = [1.1, 0.9]\n', "outages.band"),
    ('\n[profile]\ncontrol = "schedule"\n', "profile.file: missing"),
    ('\n[profile]\nfile = "p.csv"\nv_on_pu = 1.05\nv_off_pu = 1.0\n', "profile.v_on_pu"),
    ('\n[bank_checks]\norders = [1]\n', "bank_checks.orders"),
    ('\n[sweep]\nchunk_size = 0\n', "sweep.chunk_size"),
    ('\n[sweep]\nworkers = 2\n', "sweep.workers: unknown key"),
])
def test_bad_proof_keys_name_the_key(tmp_path, extra, where):
    with pytest.raises(InputError) as err:
        read_study(_study(tmp_path, extra))
    assert where in str(err.value) and "study.toml" in str(err.value)
