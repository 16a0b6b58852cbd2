"""Network workbook (.xlsx) read and write times beside the CSV folder's (prints a table; not a
pytest module). No speed target: the figures say what a workbook costs on synthetic meshed grids.

    python tests/perf/bench_workbook.py             # 16 x 16, 32 x 32 and 64 x 64 grids
    python tests/perf/bench_workbook.py --repeat 5  # best of 5 (default 3): the machine may be shared

For each grid and format: buses, branches, cells written, best write time, best read time
(``read_network``, so validation included), and whether the tables read back equal the ones written.
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import pandas as pd

from planner.network.io import read_network, write_network
from planner.network.model import TABLES
from planner.network.synthetic import meshed_grid


def best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def same(a, b) -> bool:
    try:
        for kind in TABLES:
            pd.testing.assert_frame_equal(a.table(kind), b.table(kind), check_exact=True)
    except AssertionError:
        return False
    return True


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    print(f"{'grid':>8} {'format':>7} {'buses':>6} {'branches':>8} {'cells':>7} {'write s':>8} {'read s':>7}  same")
    with tempfile.TemporaryDirectory() as d:
        for n in (16, 32, 64):
            net = meshed_grid(n, n)
            cells = sum(net.table(k).size for k in TABLES)
            for fmt, path in (("xlsx", Path(d) / f"g{n}.xlsx"), ("csv", Path(d) / f"g{n}")):
                w = best(lambda: write_network(net, path), args.repeat)
                r = best(lambda: read_network(path), args.repeat)
                print(f"{n:>3} x {n:<3} {fmt:>7} {len(net.buses):>6} {len(net.lines) + len(net.transformers):>8} "
                      f"{cells:>7} {w:>8.2f} {r:>7.2f}  {same(net, read_network(path))}")


if __name__ == "__main__":
    main()
