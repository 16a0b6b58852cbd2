"""Load-flow scaling figures on synthetic networks (prints a table; not a pytest module).

    python tests/perf/bench_flow.py            # tiled IEEE 30-bus and meshed grid, 300 .. 20,000 buses
    python tests/perf/bench_flow.py --quick    # sizes up to 3,000 only
    python tests/perf/bench_flow.py --repeat 5 # best of 5 solves per case (default 3)

For each case: buses, branches, Newton iterations, total solve time (FlowResult.solve_seconds,
best of ``--repeat`` identical solves, since the machine may be shared),
the time of one sparse LU factorisation of the solver's own Jacobian at the solution, with the
solver's own ordering (planner.flow.jacobian.factorize), the ratio solve / (iterations x one
LU), the same LU with scipy's default splu options for comparison, and whether a flat start
converged (a DC start is tried when it did not). Finally the import time of the solver module
in a fresh interpreter, and the import time of a small ``planner flow`` run per package.
"""
from __future__ import annotations

import argparse
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse.linalg as spla

from planner.flow.jacobian import JacobianPattern, factorize
from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.network.compile import PQ, PV, compile_network
from planner.network.synthetic import meshed_grid, tiled_network

DATA = Path(__file__).resolve().parents[1] / "data"
SIZES = (300, 1_000, 3_000, 10_000, 20_000)


def jacobian_at(res):
    """The solver's Jacobian at a solved point, with the final PV / PQ split."""
    c = res.compiled
    kind = np.where(res.limit_state != 0, PQ, c.kind)
    pv = np.flatnonzero((kind == PV) & c.alive)
    pq = np.flatnonzero((kind == PQ) & c.alive)
    y = c.ybus()
    pattern = JacobianPattern(y, np.concatenate([pv, pq]), pq)
    vm = np.abs(res.v)
    return pattern.matrix(res.v, c.s_load_i + 2.0 * c.s_load_z * vm)


def time_lu(j, repeat=5, lu=factorize):
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        lu(j)
        best = min(best, time.perf_counter() - t0)
    return best


def cases(sizes):
    ieee30 = read_cdf(DATA / "ieee30cdf.txt")
    for n in sizes:
        copies = max(1, round(n / len(ieee30.buses)))
        yield f"ieee30 x{copies}", lambda copies=copies: tiled_network(ieee30, copies, seed=0)
    for n in sizes:
        side = int(round(np.sqrt(n)))
        yield f"grid {side}x{side}", lambda side=side: meshed_grid(side, side, seed=0)


def best_solve(c, start, repeat):
    """The result of the fastest of ``repeat`` identical solves (all give the same answer)."""
    best = None
    for _ in range(repeat):
        res = solve_flow(compiled=c, start=start, build_tables=False)
        if best is None or res.solve_seconds < best.solve_seconds:
            best = res
    return best


def run(sizes, repeat=3):
    head = (f"{'case':<14}{'buses':>8}{'branches':>10}{'iters':>7}{'solve s':>10}{'one LU s':>10}"
            f"{'ratio':>8}{'splu dflt s':>12}  {'flat start':<12}{'compile s':>10}")
    print(head)
    print("-" * len(head))
    for label, make in cases(sizes):
        net = make()
        t0 = time.perf_counter()
        c = compile_network(net)
        t_compile = time.perf_counter() - t0
        res = best_solve(c, "flat", repeat)
        flat = "yes" if res.converged else "no"
        if not res.converged:
            res = best_solve(c, "dc", repeat)
            flat = "no; dc " + ("yes" if res.converged else "no")
        jac = jacobian_at(res)
        t_lu = time_lu(jac)
        t_lu_default = time_lu(jac, repeat=3, lu=spla.splu)
        ratio = res.solve_seconds / (max(res.iterations, 1) * t_lu)
        print(f"{label:<14}{c.n:>8}{len(c.f):>10}{res.iterations:>7}{res.solve_seconds:>10.3f}{t_lu:>10.4f}"
              f"{ratio:>8.2f}{t_lu_default:>12.4f}  {flat:<12}{t_compile:>10.3f}", flush=True)


HEAVY = ("pyomo", "matplotlib", "highspy")   # must not be imported by ``planner flow``


def import_breakdown(args):
    """Seconds of import time per top-level package (sum of -X importtime self times)."""
    out = subprocess.run([sys.executable, "-X", "importtime", *args], capture_output=True, text=True,
                         cwd=Path(__file__).resolve().parents[2]).stderr
    per: dict[str, float] = {}
    for m in re.finditer(r"^import time:\s+(\d+) \|\s+\d+ \|\s*([\w.]+)\s*$", out, re.M):
        root = m.group(2).split(".")[0]
        per[root] = per.get(root, 0.0) + int(m.group(1)) / 1e6
    return per


def import_times():
    out = subprocess.run([sys.executable, "-X", "importtime", "-c", "import planner.flow.newton"],
                         capture_output=True, text=True, check=True).stderr
    cum = [int(m.group(1)) for m in re.finditer(r"import time:\s+\d+ \|\s+(\d+) \| planner\.flow\.newton\s*$",
                                                 out, re.M)]
    if cum:
        print(f"import planner.flow.newton (fresh interpreter, -X importtime cumulative): {cum[-1] / 1e6:.3f} s")
    for mod in ("planner.flow.newton", "planner.cli"):
        best = np.inf
        for _ in range(3):
            t0 = time.perf_counter()
            r = subprocess.run([sys.executable, "-c", f"import {mod}"], capture_output=True, text=True)
            best = min(best, time.perf_counter() - t0)
        if r.returncode == 0:
            print(f"python -c 'import {mod}' wall time (best of 3, includes interpreter start): {best:.3f} s")
        else:
            print(f"python -c 'import {mod}' failed: {r.stderr.strip().splitlines()[-1]}")
    # what a small `planner flow` run pays for, package by package (best of 3 per package)
    runs = [import_breakdown(["-m", "planner", "flow", str(DATA / "ieee14cdf.txt"), "-q"]) for _ in range(3)]
    names = sorted(set().union(*runs), key=lambda k: -min(r.get(k, 0.0) for r in runs))
    best = {k: min(r.get(k, 0.0) for r in runs) for k in names}
    top = [k for k in names if best[k] >= 0.005]
    print("planner flow ieee14 imports (s, best of 3): " + ", ".join(f"{k} {best[k]:.3f}" for k in top)
          + f", all others {sum(best[k] for k in names if k not in top):.3f}")
    heavy = [k for k in HEAVY if k in names]
    print("planner flow imports " + (", ".join(heavy) if heavy else f"none of {', '.join(HEAVY)}"))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="sizes up to 3,000 buses only")
    ap.add_argument("--repeat", type=int, default=3, help="solves per case, the fastest is shown (default 3)")
    args = ap.parse_args(argv)
    run(SIZES[:3] if args.quick else SIZES, repeat=max(1, args.repeat))
    print()
    import_times()


if __name__ == "__main__":
    main()
