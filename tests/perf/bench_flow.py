"""Load flow at utility scale: convergence, Newton time against the LU, reading time, memory.

    python tests/perf/bench_flow.py              # every case below, limits on and off
    python tests/perf/bench_flow.py --quick      # the 10,000-bus cases only
    python tests/perf/bench_flow.py --repeat 3   # best of 3 solves per case (default 2)
    python tests/perf/bench_flow.py --only "grid 224" --limits on --repeat 1   # one case

Cases (built from the two standard cases the project holds, tests/data/ieee14cdf.txt and
ieee30cdf.txt, in the shapes of issue 8):

* ``ring14 x714`` / ``ring14 x3574``: copies of IEEE 14 joined in a ring by two short ties between the
  same buses of neighbouring copies (9,996 / 50,036 buses). Each copy balances by itself, so the
  known solution is the single case's, copy by copy ("dev" = largest |V - V_known| in pu).
* ``ring30 x330`` / ``ring30 x1667``: the same with IEEE 30 (9,900 / 50,010 buses).
* ``grid 100x100`` / ``grid 224x224``: the meshed synthetic grid (10,000 / 50,176 buses), at normal
  loading and at 1.5 x load and generation (``heavy``).

For each case and reactive-limit setting: status, Newton iterations, continuation steps, Newton time
(``FlowResult.solve_seconds``: the whole solve, limit rounds, continuation and plausibility check
included; best of ``--repeat``), one sparse LU of the final Jacobian with the best of SuperLU's
orderings (MMD on J+J^T with diagonal pivots preferred, COLAMD; best of 3), and the ratio
Newton time / (iterations x one LU); target <= 1.5.

Reading: the 10,000-bus cases written as IEEE CDF files (buses renumbered 1..N, since the format holds
four-digit bus numbers), read time (best of 3) plus result-table building time against the Newton
time; target read + tables <= Newton. Memory: peak resident set of a fresh process that reads a
50,000-bus network from tabular CSV files, solves it and builds the result tables (target < 500 MB;
the interpreter and libraries are included). The machine is shared: times are noisy.
"""
from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse.linalg as spla

from planner.flow.jacobian import JacobianPattern
from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf, write_cdf
from planner.network.compile import PQ, PV, compile_network
from planner.network.model import Network
from planner.network.synthetic import meshed_grid, ring_copies
from planner.network.tabular import read_tables, write_tables

DATA = Path(__file__).resolve().parents[1] / "data"
BASES = {"ring14": "ieee14cdf.txt", "ring30": "ieee30cdf.txt"}


def ring_case(tag: str, copies: int, limits: bool):
    base = read_cdf(DATA / BASES[tag])
    single = solve_flow(base, enforce_q_limits=limits)
    slack_mw = float(single.generators.mw[single.compiled.kind[single.compiled.gen_bus] == 2].sum())
    return ring_copies(base, copies, slack_mw=slack_mw, ties_per_link=2), np.tile(single.v, copies)


def cases(quick: bool):
    out = [("ring14 x714", lambda lim: ring_case("ring14", 714, lim)),
           ("ring30 x330", lambda lim: ring_case("ring30", 330, lim)),
           ("grid 100x100", lambda lim: (meshed_grid(100, 100), None)),
           ("grid 100x100 heavy", lambda lim: (meshed_grid(100, 100, load_scale=1.5), None))]
    if not quick:
        out += [("ring14 x3574", lambda lim: ring_case("ring14", 3574, lim)),
                ("ring30 x1667", lambda lim: ring_case("ring30", 1667, lim)),
                ("grid 224x224", lambda lim: (meshed_grid(224, 224), None)),
                ("grid 224x224 heavy", lambda lim: (meshed_grid(224, 224, load_scale=1.5), None))]
    return out


def final_jacobian(res):
    """The solver's Jacobian at its solution, with the final PV / PQ split."""
    c = res.compiled
    kind = res.kind
    pv = np.flatnonzero((kind == PV) & c.alive)
    pq = np.flatnonzero((kind == PQ) & c.alive)
    pattern = JacobianPattern(c.ybus(), np.sort(np.concatenate([pv, pq])), pq)
    vm = np.abs(res.v)
    return pattern.matrix(res.v, c.s_load_i + 2.0 * c.s_load_z * vm)


def best_lu_seconds(j, repeat=3):
    best = np.inf
    for spec, sym in (("MMD_AT_PLUS_A", True), ("COLAMD", False)):
        for _ in range(repeat):
            t0 = time.perf_counter()
            spla.splu(j, permc_spec=spec, options=dict(SymmetricMode=sym))
            best = min(best, time.perf_counter() - t0)
    return best


def solve_cases(quick, repeat, only=None, limit_choice="both"):
    head = (f"{'case':<20}{'buses':>7} {'limits':<7}{'status':<11}{'iters':>6}{'cont':>5}{'Newton s':>10}"
            f"{'one LU s':>10}{'ratio':>7}{'min V':>7}{'dev pu':>9}")
    print(head)
    print("-" * len(head))
    newton_time = {}
    settings = {"both": (True, False), "on": (True,), "off": (False,)}[limit_choice]
    for label, make in cases(quick):
        if only is not None and only not in label:
            continue
        for limits in settings:
            net, known = make(limits)
            c = compile_network(net)
            best = None
            for _ in range(repeat):
                res = solve_flow(compiled=c, enforce_q_limits=limits, build_tables=False)
                if best is None or res.solve_seconds < best.solve_seconds:
                    best = res
            res = best
            t_lu = best_lu_seconds(final_jacobian(res))
            ratio = res.solve_seconds / (max(res.iterations, 1) * t_lu)
            dev = f"{np.abs(res.v - known).max():9.1e}" if known is not None else f"{'-':>9}"
            print(f"{label:<20}{c.n:>7} {'on' if limits else 'off':<7}{res.status.name:<11}{res.iterations:>6}"
                  f"{res.continuation_steps:>5}{res.solve_seconds:>10.3f}{t_lu:>10.4f}{ratio:>7.2f}"
                  f"{res.vm[c.alive].min():>7.3f}{dev}", flush=True)
            newton_time[(label, limits)] = (res.solve_seconds, net)
    return newton_time


def renumbered(net: Network) -> Network:
    """The same network with buses numbered 1..N (and areas of 1,000 buses), for the CDF's columns."""
    ids = net.buses.bus.to_numpy()
    new = pd.Series(np.arange(1, len(ids) + 1), index=ids)
    tables = {}
    for kind, cols in {"buses": ["bus"], "loads": ["bus"], "generators": ["bus"], "lines": ["from_bus", "to_bus"],
                       "transformers": ["from_bus", "to_bus"], "shunts": ["bus"]}.items():
        df = getattr(net, kind).copy()
        for col in cols:
            df[col] = new[df[col].to_numpy()].to_numpy()
        if kind == "buses":
            df["area"] = 1 + (df["bus"] - 1) // 1000
        tables[kind] = df
    return Network(base_mva=net.base_mva, name=net.name, **tables)


def reading(newton_time):
    print()
    head = f"{'CDF file':<20}{'buses':>7}{'read s':>9}{'tables s':>10}{'Newton s':>10}{'(read+tables)/Newton':>22}"
    print(head)
    print("-" * len(head))
    with tempfile.TemporaryDirectory() as tmp:
        for label in ("ring14 x714", "grid 99x101"):
            # the CDF's bus numbers have four digits: the grid is 9,999 buses here
            net = newton_time[(label, True)][1] if label in [k for k, _ in newton_time] else meshed_grid(99, 101)
            path = Path(tmp) / "case.cdf"
            write_cdf(renumbered(net), path)
            t_read = np.inf
            for _ in range(3):
                t0 = time.perf_counter()
                back = read_cdf(path)
                t_read = min(t_read, time.perf_counter() - t0)
            res = solve_flow(back, build_tables=False)
            t_tables = np.inf
            for _ in range(3):
                res.buses = None
                t0 = time.perf_counter()
                res.to_frames()
                t_tables = min(t_tables, time.perf_counter() - t0)
            print(f"{label:<20}{len(back.buses):>7}{t_read:>9.3f}{t_tables:>10.3f}{res.solve_seconds:>10.3f}"
                  f"{(t_read + t_tables) / res.solve_seconds:>22.2f}", flush=True)


MEMORY_CHILD = """
import resource, sys, time
from planner.network.tabular import read_tables
from planner.flow.newton import solve_flow
t0 = time.perf_counter()
net = read_tables(sys.argv[1])
t_read = time.perf_counter() - t0
res = solve_flow(net)
print(len(net.buses), res.status.name, f"{t_read:.2f}", f"{res.solve_seconds:.2f}",
      resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)
"""


def memory():
    print()
    print(f"{'tabular folder':<20}{'buses':>7} {'status':<11}{'read s':>8}{'Newton s':>10}{'peak RSS MB':>13}")
    with tempfile.TemporaryDirectory() as tmp:
        for label, net in (("grid 224x224", meshed_grid(224, 224)),
                           ("ring30 x1667", ring_case("ring30", 1667, True)[0])):
            folder = Path(tmp) / "net"
            write_tables(net, folder)
            out = subprocess.run([sys.executable, "-c", MEMORY_CHILD, str(folder)], capture_output=True,
                                 text=True, check=True).stdout.split()
            print(f"{label:<20}{out[0]:>7} {out[1]:<11}{float(out[2]):>8.2f}{float(out[3]):>10.2f}"
                  f"{float(out[4]):>13.0f}", flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the 10,000-bus cases only")
    ap.add_argument("--repeat", type=int, default=2, help="solves per case, the fastest is shown (default 2)")
    ap.add_argument("--only", metavar="TEXT", help="only the cases whose name contains TEXT (no reading part)")
    ap.add_argument("--limits", choices=["both", "on", "off"], default="both", help="reactive limits (default both)")
    ap.add_argument("--memory", action="store_true", help="only the peak-memory part")
    args = ap.parse_args(argv)
    if not args.memory:
        newton_time = solve_cases(args.quick, max(1, args.repeat), args.only, args.limits)
        if args.only is None:
            reading(newton_time)
    if args.memory or (not args.quick and args.only is None):
        memory()


if __name__ == "__main__":
    main()
