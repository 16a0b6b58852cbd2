"""Benchmark: everything of the demo study except the plans (target: about 10 s wall on two cores).

Run: .venv/bin/python tests/perf/bench_study_proof.py [--plans FILE] [--scheduler WHERE]

The plans of ``studies/wrenfold-2027.toml`` are made once and kept in FILE (default: a file in the
system's temporary folder; delete it after changing the optimiser); every later run reuses them,
so the figures are those of the rest of ``planner study``: the base case and economics, the N-1
sweep (outages x 5 cases at peak), the hourly proof (5 cases x 8,760 hours), the bank checks, the
report data, HTML and CSV files, results.xlsx and the folder written. Prints the seconds of each
stage, the total wall and CPU time of this process, and a checksum of each CSV table (two runs
must print the same checksums).
"""
from __future__ import annotations

import argparse
import hashlib
import pickle
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
STUDY = ROOT / "studies" / "wrenfold-2027.toml"


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--plans", default=str(Path(tempfile.gettempdir()) / "planner-demo-plans.pkl"))
    ap.add_argument("--scheduler", default=None, help="serial, local or an address (default: by size)")
    args = ap.parse_args()
    import planner.proof.run as proof_run
    from planner.atomic import to_json
    from planner.report.atomic import write_report_folder
    from planner.report.convert import report_data
    from planner.report.render import report_files
    from planner.report.sheets import csv_tables_xlsx
    from planner.study import run as study_run
    from planner.study.spec import read_study

    cache = Path(args.plans)
    if not cache.exists():
        t = time.perf_counter()
        plans = study_run.plan_alternatives(read_study(STUDY), jobs=2)
        for _, p in plans:
            study_run._without_solver_caches(p)
        cache.write_bytes(pickle.dumps(plans))
        print(f"plans made once in {time.perf_counter() - t:.1f} s and kept in {cache}")
    plans = pickle.loads(cache.read_bytes())
    study_run.plan_alternatives = lambda spec, net=None, progress=None, jobs=None: plans

    seconds = {}

    def timed(module, name, label):
        fn = getattr(module, name)

        def wrapper(*a, **k):
            t = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                seconds[label] = seconds.get(label, 0.0) + time.perf_counter() - t
        setattr(module, name, wrapper)
    timed(proof_run, "verify_n1", "N-1 sweep")
    timed(proof_run, "verify_hours", "hourly proof")
    timed(proof_run, "check_banks", "bank checks")
    timed(proof_run, "prove_study", "proof stage in all")

    t0, c0 = time.perf_counter(), time.process_time()
    spec = read_study(STUDY)
    if args.scheduler:
        spec.proof.scheduler = args.scheduler
    result = study_run.run_study(spec, jobs=1)
    seconds["study run (no plans)"] = time.perf_counter() - t0
    t = time.perf_counter()
    data = report_data(result)
    files = report_files(data)
    files["plans.json"] = to_json([study_run.plan_to_dict(p) for _, p in plans])
    seconds["report data, HTML, CSV"] = time.perf_counter() - t
    t = time.perf_counter()
    files["results.xlsx"] = csv_tables_xlsx(files)
    seconds["results.xlsx"] = time.perf_counter() - t
    with tempfile.TemporaryDirectory() as d:
        t = time.perf_counter()
        write_report_folder(Path(d) / "report", files)
        seconds["folder written"] = time.perf_counter() - t
    seconds["TOTAL wall"] = time.perf_counter() - t0
    seconds["TOTAL CPU of this process"] = time.process_time() - c0
    sweep = result.proof[0].get("sweep", {})
    print(f"sweeps ran: {sweep.get('where')} ({sweep.get('bus_flows', 0):,} bus-flows)")
    for k, v in seconds.items():
        print(f"{k:28} {v:7.2f} s")
    for name in sorted(files):
        if name.endswith(".csv"):
            print(f"  {name:28} {hashlib.sha256(files[name].encode()).hexdigest()[:16]}")


if __name__ == "__main__":
    main()
