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
        t0 = time.perf_counter()
        res = verify_n1(net, outs, screen=screen)
        dt = time.perf_counter() - t0
        runs[screen] = res
        o = res.outcomes
        print(f"screen={screen!s:5}: {dt:6.2f} s  ({1e3 * dt / len(outs):.2f} ms/outage)  {res.message}")
        print(f"   outcomes: {o.outcome.value_counts().to_dict()}  checked by: {o.checked_by.value_counts().to_dict()}")
    cols_ = ["element_id", "limit_kind", "where"]
    same = runs[True].violations[cols_].values.tolist() == runs[False].violations[cols_].values.tolist()
    print(f"same broken limits with and without screening: {same}")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    main(*args)
