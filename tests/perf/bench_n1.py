"""Benchmark: N-1 of a 1,000-bus synthetic grid, every branch out (target < 60 s on two cores).

Run: .venv/bin/python tests/perf/bench_n1.py [rows cols]
Prints the time with screening, without screening (every outage by full AC), and the outcome
counts; both runs must report the same broken limits.
"""
from __future__ import annotations

import sys
import time

from planner.contingency.n1 import outage_list, verify_n1
from planner.network.synthetic import meshed_grid


def main(rows=25, cols=40):
    net = meshed_grid(rows, cols)
    outs = outage_list(net, kinds=("line", "transformer"))
    print(f"grid: {len(net.buses)} buses, {len(outs)} branch outages")
    runs = {}
    for screen in (True, False):
        t0, c0 = time.perf_counter(), time.process_time()
        res = verify_n1(net, outs, screen=screen)
        dt, cpu = time.perf_counter() - t0, time.process_time() - c0
        runs[screen] = res
        o = res.outcomes
        print(f"screen={screen!s:5}: {dt:6.2f} s wall, {cpu:6.2f} s CPU ({1e3 * dt / len(outs):.2f} ms/outage wall)"
              f"  {res.message}")
        print(f"   outcomes: {o.outcome.value_counts().to_dict()}  checked by: {o.checked_by.value_counts().to_dict()}")
    cols_ = ["element_id", "limit_kind", "where"]
    same = runs[True].violations[cols_].values.tolist() == runs[False].violations[cols_].values.tolist()
    print(f"same broken limits with and without screening: {same}")
    try:
        import distributed
    except ImportError:
        print("two-worker LocalCluster: skipped (dask not installed)")
        return
    serial = verify_n1(net, outs, where="serial", chunk_size=200)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=50) as lc, distributed.Client(lc) as client:
        t0 = time.perf_counter()
        res = verify_n1(net, outs, client=client, chunk_size=200)
        dt = time.perf_counter() - t0
    print(f"two-worker LocalCluster: {dt:.2f} s wall (cluster already started); identical to the serial "
          f"chunked run: {res.outcomes.equals(serial.outcomes) and res.violations.equals(serial.violations)}")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    main(*args)
