"""Benchmark: the whole demo study as a user runs it (target: under 30 s wall on two cores).

Runs ``planner study studies/wrenfold-2027.toml -q`` as a separate process ``--runs`` times (default
2) and prints, per run: wall seconds, the load average
before it (others' work on the machine inflates the wall time; say so when you report), each
alternative's seconds and MILP solves (optimiser_runs.csv), and the NPV of every alternative
(comparison.csv). Then whether the runs' plans.json are identical apart from timings (they must be).

``--plans-cpu`` also optimises each alternative alone in this process, one after the other, and
prints its CPU seconds: the figure to compare between versions on a busy machine.

    python tests/perf/bench_demo.py [--runs 2] [--plans-cpu]
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
STUDY = ROOT / "studies" / "wrenfold-2027.toml"


def _rows(path: Path) -> list:
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def _plans_without_timings(path: Path):
    plans = json.loads(path.read_text())
    for p in plans:
        p.pop("seconds", None)
    return plans


def run_once(out: Path) -> dict:
    planner = Path(sys.executable).with_name("planner")
    cmd = [str(planner) if planner.exists() else sys.executable, *([] if planner.exists() else ["-m", "planner"]),
           "study", str(STUDY), "-q", "--out", str(out)]
    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True)
    wall = time.perf_counter() - t0
    folder = next(p for p in out.iterdir() if p.is_dir())
    return {"wall": wall, "load": load, "folder": folder,
            "runs": _rows(folder / "optimiser_runs.csv"), "comparison": _rows(folder / "comparison.csv")}


def plans_cpu():
    from planner.study import run as study_run
    from planner.study.spec import read_study
    spec = read_study(STUDY)
    for alt in list(spec.alternatives):
        spec.alternatives = [alt]
        c0, t0 = time.process_time(), time.perf_counter()
        _, plan = study_run.plan_alternatives(spec, jobs=1)[0]
        print(f"  {alt.name:24s} {time.process_time() - c0:6.2f} s CPU {time.perf_counter() - t0:6.2f} s wall "
              f"{plan.milp_solves:3d} MILPs  objective {plan.objective_after:,.1f}  {plan.status.name}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2)
    ap.add_argument("--plans-cpu", action="store_true")
    args = ap.parse_args()
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(args.runs):
            r = run_once(Path(tmp) / f"run{k}")
            results.append(r)
            print(f"run {k + 1}: {r['wall']:.1f} s wall, load average before {r['load']:.2f}")
            for row in r["runs"]:
                print(f"  {row['alternative']:24s} {float(row['seconds']):6.2f} s  {row['milp_solves']:>3s} MILPs  "
                      f"{row['ac_flows']:>3s} AC flows")
            for row in r["comparison"]:
                if row.get("npv"):
                    print(f"  NPV {row['alternative']:20s} {float(row['npv']):14,.0f}  capital "
                          f"{float(row['capital_cost']):,.0f}")
        if len(results) > 1:
            same = all(_plans_without_timings(r["folder"] / "plans.json")
                       == _plans_without_timings(results[0]["folder"] / "plans.json") for r in results[1:])
            print(f"plans.json identical apart from timings across {len(results)} runs: {same}")
    if args.plans_cpu:
        print("plans alone, one process, one after the other:")
        plans_cpu()


if __name__ == "__main__":
    main()
