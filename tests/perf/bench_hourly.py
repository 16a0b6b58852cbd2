"""Benchmark: 8,760 hourly load flows of the demo network (target < 10 s on two cores).

Run: .venv/bin/python tests/perf/bench_hourly.py
An invented year of hourly factors (daily and seasonal shape, fixed seed); prints the time of the
serial run (the schedule rule: hours solved in blocks by chord steps, planner/hourly/batch.py), of
the voltage-controlled rule (sequential by nature: one Newton solve per hour), of the same blocks
as chunks, and on a two-worker cluster.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from planner.hourly.profile import profile_from_factors
from planner.hourly.verify import VoltageRule, verify_profile
from planner.network.io import read_network

ROOT = Path(__file__).resolve().parents[2]


def year_factors(seed=0):
    h = np.arange(8760)
    day = 0.75 + 0.2 * np.sin((h % 24 - 7) / 24 * 2 * np.pi)
    season = 1.0 + 0.15 * np.cos((h / 8760) * 2 * np.pi)
    noise = np.random.default_rng(seed).normal(0, 0.02, len(h))
    return np.clip(0.8 * day * season + noise, 0.3, 1.05)


def main():
    net = read_network(ROOT / "models" / "wrenfold")
    prof = profile_from_factors(year_factors())
    T = len(prof.start_h)
    results = {}
    for name, rule, kw in (("one pass", "schedule", {}), ("voltage rule", VoltageRule(0.97, 1.03, 2.0), {}),
                           ("chunks, serial", "schedule", dict(where="serial", chunk_size=730))):
        t0, c0 = time.perf_counter(), time.process_time()
        res = verify_profile(net, prof, rule=rule, **kw)
        dt, cpu = time.perf_counter() - t0, time.process_time() - c0
        results[name] = res
        print(f"{name:15}: {T} flows in {dt:.2f} s wall, {cpu:.2f} s CPU of this process "
              f"({1e3 * cpu / T:.3f} ms CPU/flow), {res.iterations / T:.2f} iterations per flow")
        print(f"                 {res.message}; lowest {res.lowest['v_pu']:.4f} pu at bus {res.lowest['bus']} "
              f"({res.lowest['when']})")
    try:
        import distributed
    except ImportError:
        print("two-worker LocalCluster: skipped (dask not installed)")
        return
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=50) as lc, distributed.Client(lc) as client:
        t0 = time.perf_counter()
        res = verify_profile(net, prof, client=client, chunk_size=730)
        dt = time.perf_counter() - t0
    same = res.intervals.equals(results["chunks, serial"].intervals)
    print(f"two-worker LocalCluster: {T} flows in {dt:.2f} s wall (cluster already started); "
          f"identical to the serial chunked run: {same}")


if __name__ == "__main__":
    main()
