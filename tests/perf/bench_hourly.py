"""Benchmark: 8,760 hourly load flows of the demo network (target < 10 s on two cores).

Run: .venv/bin/python tests/perf/bench_hourly.py
An invented year of hourly factors (daily and seasonal shape, fixed seed); prints the time of the
serial run, and of the voltage-controlled rule (sequential by nature).
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
    for name, rule in (("fixed banks", "schedule"), ("voltage rule", VoltageRule(0.97, 1.03, 2.0))):
        t0 = time.perf_counter()
        res = verify_profile(net, prof, rule=rule)
        dt = time.perf_counter() - t0
        print(f"{name:13}: {len(prof.start_h)} flows in {dt:.2f} s ({1e3 * dt / len(prof.start_h):.3f} ms/flow), "
              f"{res.iterations / len(prof.start_h):.2f} Newton iterations per flow; {res.message}")
        print(f"               lowest {res.lowest}, highest {res.highest}, operations "
              f"{res.banks.operations.tolist()}")


if __name__ == "__main__":
    main()
