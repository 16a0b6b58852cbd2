"""Sweeps: serial, local pool and a two-worker Dask cluster give identical tables."""
from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from planner.contingency.n1 import outage_list, verify_n1
from planner.hourly.profile import profile_from_factors
from planner.hourly.verify import verify_profile
from planner.network.cdf import read_cdf
from planner.network.io import read_network
from planner.sweep.engine import TerminalProgress, chunked, run_chunks

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def net30():
    return read_cdf(ROOT / "tests" / "data" / "ieee30cdf.txt")


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None,
                                  silence_logs=50) as lc, distributed.Client(lc) as client:
        yield client


def _factors():
    return 0.5 + 0.5 * np.abs(np.sin(np.arange(60) / 7.0))


def test_n1_serial_and_cluster_identical(net30, cluster):
    outs = outage_list(net30, kinds=("line", "transformer"))
    plain = verify_n1(net30, outs)
    serial = verify_n1(net30, outs, where="serial", chunk_size=7)
    seen = []
    dask_run = verify_n1(net30, outs, client=cluster, chunk_size=7, progress=lambda d, t: seen.append((d, t)))
    pd.testing.assert_frame_equal(plain.outcomes, serial.outcomes)
    pd.testing.assert_frame_equal(serial.outcomes, dask_run.outcomes)
    pd.testing.assert_frame_equal(serial.violations, dask_run.violations)
    assert seen[-1] == (6, 6) and len(seen) == 6


def test_study_n1_runs_through_the_sweep_scheduler_with_identical_results(net30, cluster):
    # the N-1 section of a study (base case and a plan, two levels) in this process and as chunks
    # of outages on a two-worker cluster
    from planner.optimize.engine import LevelCase, plan
    from planner.optimize.levers import BankSite, Levers, Limits
    from planner.proof.run import prove_study
    from planner.proof.spec import OutageSpec, ProofSpec
    from planner.study.run import scaled_network
    from planner.study.spec import AlternativeSpec
    cases = [LevelCase("peak", net30), LevelCase("light", scaled_network(net30, 0.6, 0.6))]
    p = plan(net30, Levers(sites=[BankSite(30, 1.0, 5, kinds=("fixed",))]), Limits(v_min=0.9, v_max=1.1))
    assert p.banks
    proof = ProofSpec(outages=OutageSpec(elements=("line", "transformer")), scheduler="serial", chunk_size=7)
    serial_data, serial = prove_study(None, net30, cases, [(AlternativeSpec("A"), p)], proof)

    class Recorder:                 # the command line's progress: text lines and bar steps
        def __init__(self):
            self.lines, self.steps = [], []

        def __call__(self, text):
            self.lines.append(text)

        def step(self, done, total):
            self.steps.append((done, total))
    seen = Recorder()
    dask_data, dask_run = prove_study(None, net30, cases, [(AlternativeSpec("A"), p)], proof, client=cluster,
                                      progress=seen)
    # the bar moves with every finished chunk of outages: 41 outages in chunks of 7, four sweeps
    assert seen.steps.count((6, 6)) == 4 and len(seen.steps) == 4 * 6
    for name in ("n1_outcomes.csv", "n1_violations.csv"):
        pd.testing.assert_frame_equal(serial[name], dask_run[name])
    # the serial run says where its sweeps ran (the study asked for this process); the numbers agree
    assert serial_data.pop("sweep") == {"where": "serial", "bus_flows": 30 * 41 * 2 * 2, "chosen": False,
                                        "in_process_up_to": 10_000_000}
    assert serial_data == dask_data
    assert len(serial["n1_outcomes.csv"]) == 2 * 2 * 41      # base and plan, two levels, 41 branches
    assert serial_data["outages"]["cases"]["base"]["peak"]["count"] > 0


def test_hourly_serial_and_cluster_identical(cluster):
    net = read_network(ROOT / "models" / "wrenfold")
    prof = profile_from_factors(_factors())
    serial = verify_profile(net, prof, where="serial", chunk_size=16)
    dask_run = verify_profile(net, prof, client=cluster, chunk_size=16)
    pd.testing.assert_frame_equal(serial.intervals, dask_run.intervals)
    assert serial.energy_loss_mwh == dask_run.energy_loss_mwh
    # one pass warm-started hour by hour agrees to solver tolerance
    one = verify_profile(net, prof)
    assert one.energy_loss_mwh == pytest.approx(serial.energy_loss_mwh, rel=1e-8)


def test_local_process_pool_identical():
    # the standard-library pool (used when Dask is absent) through the same entry point
    from planner.sweep import engine
    net = read_network(ROOT / "models" / "wrenfold")
    prof = profile_from_factors(_factors()[:20])
    serial = verify_profile(net, prof, where="serial", chunk_size=5)
    f = prof.bus_factors(net.buses.bus, net.buses.area)
    from planner.hourly.verify import _bin_tasks, _hour_chunk, _schedule_setup
    from planner.network.compile import compile_network
    from planner.sweep.repeated import RepeatedFlow
    c = compile_network(net)
    level_of, steps = np.zeros(20, np.int64), np.zeros((20, 0), np.int64)
    rfs = [RepeatedFlow(c)]
    setup = _schedule_setup(rfs, f, level_of, [], steps, rfs[0].solve(load_scale=f[0]))
    shared = dict(cases=[c], factors=f, level_of=level_of, setup=setup, lo=np.full(c.n, 0.95), hi=np.full(c.n, 1.05))
    tasks = _bin_tasks(setup, 5)
    assert len(tasks) >= 2                       # the pool really gets several tasks
    parts = engine._run_pool(_hour_chunk, tasks, shared, 2, None)
    losses = np.full(20, np.nan)
    for hours, part in parts:
        losses[hours] = part["losses_mw"]
    assert np.array_equal(losses, serial.intervals.losses_mw.to_numpy())


def _square(shared, task):
    return [shared["k"] * x * x for x in task]


def test_progress_bar_only_on_terminal():
    class Tty(io.StringIO):
        def isatty(self):
            return True
    tty = Tty()
    bar = TerminalProgress(tty, "flows", scale=100)
    bar(1, 4)
    bar(4, 4)
    text = tty.getvalue()
    assert "100/400 flows" in text and "400/400 flows" in text and "s left" in text and text.endswith("\n")
    quiet = TerminalProgress(Tty(), quiet=True)
    quiet(1, 2)
    assert quiet.stream.getvalue() == ""
    pipe = io.StringIO()
    TerminalProgress(pipe)(1, 2)
    assert pipe.getvalue() == ""


def test_study_progress_bar_shows_the_rate():
    # the command line's bar (rich, the progress extra) shows count, rate and time left
    import time as _time
    from planner.commands.console import Progress
    p = Progress(stream=io.StringIO(), bar=True)
    try:
        for i in range(1, 5):
            p.step(i, 10)
            _time.sleep(0.02)
        task = p._bar.tasks[0]
        rate = [str(c.render(task)) for c in p._bar.columns if type(c).__name__ == "RateColumn"]
        assert task.completed == 4 and task.total == 10
        assert len(rate) == 1 and rate[0].endswith("/s") and float(rate[0][:-2].replace(",", "")) > 0
    finally:
        p.close()


def test_chunks_and_serial_order():
    assert chunked(range(7), 3) == [[0, 1, 2], [3, 4, 5], [6]]
    assert run_chunks(_square, chunked(range(5), 2), shared={"k": 1}, where="serial") == [[0, 1], [4, 9], [16]]


def test_sweeps_run_in_this_process_when_small_else_on_the_cores_or_where_named(net30, monkeypatch):
    # the choice is a count (buses x load flows), never a timing
    from planner.optimize.engine import LevelCase
    from planner.proof import run as pr
    from planner.proof.spec import OutageSpec, ProofSpec
    from planner.study.spec import AlternativeSpec
    cases = [LevelCase("peak", net30), LevelCase("light", net30)]
    plans = [(AlternativeSpec("A"), None), (AlternativeSpec("B"), None)]
    proof = ProofSpec(outages=OutageSpec(elements=("line", "transformer"), levels=["peak"]))
    outs = len(outage_list(net30, kinds=("line", "transformer")))
    work = 30 * outs * 1 * 3                      # buses x outages x one level x (base + two plans)
    assert pr.sweep_place(net30, cases, plans, proof) == ("serial", work)
    monkeypatch.setattr(pr, "IN_PROCESS_UP_TO", work - 1)
    assert pr.sweep_place(net30, cases, plans, proof) == ("local", work)
    proof.scheduler = "serial"
    assert pr.sweep_place(net30, cases, plans, proof) == ("serial", work)
    proof.scheduler = "tcp://10.1.2.3:8786"
    assert pr.sweep_place(net30, cases, plans, proof) == ("tcp://10.1.2.3:8786", work)


def test_scheduler_without_workers_is_a_clear_error_not_a_hang(monkeypatch):
    distributed = pytest.importorskip("distributed")
    from planner.sweep import engine
    monkeypatch.setattr(engine, "WORKER_WAIT_S", 0.5)
    with distributed.LocalCluster(n_workers=0, processes=False, dashboard_address=":0", silence_logs=50) as lc, \
            distributed.Client(lc) as client:
        with pytest.raises(RuntimeError, match=r"has no worker \(waited 0.5 s\)"):
            run_chunks(_square, [[1], [2]], shared={"k": 1}, client=client)
