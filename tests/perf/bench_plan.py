"""Optimiser timing figures (prints a table; not a pytest module).

    python tests/perf/bench_plan.py            # the standard cases (about 2-4 minutes)
    python tests/perf/bench_plan.py --quick    # skip the 1,000+-bus and 120-bus cases
    python tests/perf/bench_plan.py --full     # also enumerate all 3-site placements (about 100 s)
    python tests/perf/bench_plan.py --scale    # also the 10,000-bus grid with 200 candidate sites
                                               # (--big is the same flag)
    python tests/perf/bench_plan.py --only ring120   # one case by name (see CASES)

Every case runs in a child process of its own, so that its peak memory (resident set) and
CPU seconds are its own; BLAS is held to one thread in every child (OPENBLAS_NUM_THREADS=1,
OMP_NUM_THREADS=1, MKL_NUM_THREADS=1), the same for the tool and the references.

Columns: wall seconds and CPU seconds of planner.optimize.engine.plan inside its process;
AC load flows and MILP solves it used; the AC-verified result; the relaxation bound's relative
gap (planner.optimize.bound); the independent reference's value and seconds (tests/reference:
scipy SLSQP, or exhaustive enumeration) and the ratio of the two times; peak memory (MB) of the
case's process; the plan's status.

Two cases compare whole processes, as a user meets them:
  * ring120: the voltage schedule of four IEEE 30 copies in a ring (120 buses, 24 setpoints).
    The tool's process (import, build, plan) against the reduced-space SLSQP reference with
    exact adjoint gradients (``python -m reference.schedule 4``), both timed whole; the
    ratio column is tool / SLSQP (target <= 0.5) and the losses must agree to 1e-4 relative.
    A second line times the classic full-space SLSQP (``python -m reference.full_schedule 4``:
    angles, magnitudes and generator outputs as variables, power balance as equalities, exact
    dense Jacobians) as a whole process too, and prints both ratios.
  * grid10k (--scale): a 10,000-bus meshed grid (planner.network.synthetic.meshed_grid 100 x
    100, seed 0, loads x 1.5 so that 49 buses sit below 0.95 pu), 200 candidate sites (the
    lowest-voltage load buses, 6 x 5 Mvar each), at most 20 new sites, voltage band
    0.95-1.05. Plan process against one ``solve_flow`` process of the same network (target:
    plan at most 10 x), peak memory (target < 1 GB).

The 3-site feeder case is run twice and the two plans compared (determinism). Timings on a
shared machine are noisy: compare CPU seconds, and say whether the machine was loaded.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

TESTS = Path(__file__).resolve().parents[1]
ROOT = TESTS.parent
sys.path.insert(0, str(TESTS))
sys.path.insert(0, str(ROOT))

DATA = TESTS / "data"
ONE_THREAD = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
RING = dict(copies=4, ties_per_link=2, tie_r_pu=0.005, tie_x_pu=0.05)


def _cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def _peak_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def timed_plan(*a, **kw):
    from planner.optimize.engine import plan as make_plan
    t, c = time.perf_counter(), _cpu()
    out = make_plan(*a, **kw)
    return out, time.perf_counter() - t, _cpu() - c


def figures(plan, secs, cpu, value, unit, target, ref_value=None, ref_secs=None, **extra):
    return dict(secs=secs, cpu=cpu, flows=plan.ac_flows, milps=plan.milp_solves, value=value, unit=unit,
                gap=plan.bound.get("relative_gap"), ref_value=ref_value, ref_secs=ref_secs, target=target,
                status=plan.status.name + (" TIME-LIMITED" if plan.time_limited else ""), **extra)


# --- cases (each runs inside its own child process) --------------------------------------

def bench_ieee30():
    from planner.network.cdf import read_cdf
    from planner.optimize.engine import LevelCase
    from planner.optimize.levers import Levers, Limits
    from reference.ac_opf import ieee30_voltage_schedule
    net = read_cdf(DATA / "ieee30cdf.txt")
    plan, secs, cpu = timed_plan([LevelCase("base", net)], Levers(gen_v_range={"*": (0.95, 1.10)}),
                                 Limits(v_min=0.95, v_max=1.05))
    t = time.perf_counter()
    ref = ieee30_voltage_schedule()
    return figures(plan, secs, cpu, plan.losses_after_mw["base"], "MW", 2.0, ref.losses_mw,
                   time.perf_counter() - t, name="IEEE 30 voltage schedule")


def _feeder33(max_sites, unit=0.15, units=10, full=False):
    from planner.network.io import read_network
    from planner.optimize.engine import LevelCase
    from planner.optimize.levers import BankSite, Levers, Limits
    from reference.sweep import enumerate_feeder33
    net = read_network(DATA / "feeder33_tables")
    sites = [BankSite(b, unit, units) for b in range(2, 34)]
    args = ([LevelCase("base", net)], Levers(sites=sites, max_new_sites=max_sites), Limits(v_min=0.0, v_max=2.0))
    plan, secs, cpu = timed_plan(*args)
    ref_v = ref_s = None
    if unit == 0.15 and (max_sites <= 2 or full):
        # three sites: 6.6 million cases, about 100 s; only with --full
        t = time.perf_counter()
        ref_v = enumerate_feeder33(sites=max_sites, unit_mvar=0.15, max_units=10).losses_kw
        ref_s = time.perf_counter() - t
    out = figures(plan, secs, cpu, plan.losses_after_mw["base"] * 1e3, "kW", 10.0, ref_v, ref_s,
                  name=f"33-bus {unit * 1000:g} kvar x {units}, <= {max_sites} sites")
    if max_sites == 3 and unit == 0.15:
        from planner.optimize.engine import plan as make_plan
        again = make_plan(*args)
        a, b = plan.to_dict(), again.to_dict()
        a.pop("seconds")
        b.pop("seconds")
        out["note"] = "run twice: " + ("identical plans" if a == b else "PLANS DIFFER")
    return out


def bench_feeder33_1(full=False):
    return _feeder33(1)


def bench_feeder33_2(full=False):
    return _feeder33(2)


def bench_feeder33_3(full=False):
    return _feeder33(3, full=full)


def bench_feeder33_small_units(full=False):
    return _feeder33(3, unit=0.05, units=40)


def bench_grid1024():
    from planner.flow.newton import solve_flow
    from planner.flow.result import branch_flows
    from planner.network.compile import PQ
    from planner.network.synthetic import meshed_grid
    from planner.optimize.engine import LevelCase
    from planner.optimize.levers import BankSite, Levers, Limits
    net = meshed_grid(32, 32, seed=0)
    base = solve_flow(net, build_tables=False)
    c = base.compiled
    load = np.flatnonzero((c.kind == PQ) & c.alive)
    # 50 candidate sites: the lowest-voltage load buses (where banks are usually proposed)
    cand = c.bus_ids[load[np.argsort(base.vm[load])[:50]]]
    sites = [BankSite(int(b), 5.0, 6) for b in cand]
    # two lines of the synthetic grid carry more than their 150 MVA in its base case; that is a
    # thermal reinforcement, not a job for shunt banks, so they are re-rated to 125 % of their
    # base flow (rounded up to 10 MVA) before planning, as a planner would assume
    s_from, s_to = branch_flows(c, base.v)
    s_mva = np.maximum(np.abs(s_from), np.abs(s_to)) * c.base_mva
    over = s_mva > c.rating
    lines = net.lines.copy()
    new_rating = dict(zip(c.branch_ids[over], np.ceil(1.25 * s_mva[over] / 10.0) * 10.0))
    hit = lines["line_id"].isin(new_rating)
    lines.loc[hit, "rating_mva"] = lines.loc[hit, "line_id"].map(new_rating)
    net.lines = lines
    plan, secs, cpu = timed_plan([LevelCase("base", net)], Levers(sites=sites, max_new_sites=10),
                                 Limits(v_min=0.95, v_max=1.05))
    return figures(plan, secs, cpu, plan.losses_after_mw["base"], "MW", 60.0,
                   name=f"meshed grid 32x32 ({c.n} buses), 50 sites")


def ring_network():
    from planner.network.cdf import read_cdf
    from planner.network.synthetic import ring_copies
    return ring_copies(read_cdf(DATA / "ieee30cdf.txt"), **RING)


def bench_ring120_tool():
    """The tool's whole process for the 120-bus schedule (imports included)."""
    from planner.optimize.engine import LevelCase
    from planner.optimize.levers import Levers, Limits
    plan, secs, cpu = timed_plan([LevelCase("base", ring_network())], Levers(gen_v_range={"*": (0.95, 1.10)}),
                                 Limits(v_min=0.95, v_max=1.05))
    return figures(plan, secs, cpu, plan.losses_after_mw["base"], "MW", None, name="ring120 tool")


def grid10k_network():
    from planner.network.synthetic import meshed_grid
    return meshed_grid(100, 100, seed=0, load_scale=1.5)


def bench_grid10k_flow():
    """One load flow of the 10,000-bus grid, as its own process (imports and reading included)."""
    from planner.flow.newton import solve_flow
    net = grid10k_network()
    t, c = time.perf_counter(), _cpu()
    fr = solve_flow(net)
    return dict(secs=time.perf_counter() - t, cpu=_cpu() - c, converged=bool(fr.converged),
                vmin=float(fr.vm.min()), low=int((fr.vm < 0.95).sum()), losses=fr.losses_mw)


def bench_grid10k_plan():
    from planner.flow.newton import solve_flow
    from planner.network.compile import PQ
    from planner.optimize.engine import LevelCase
    from planner.optimize.levers import BankSite, Levers, Limits
    net = grid10k_network()
    base = solve_flow(net, build_tables=False)
    c = base.compiled
    load = np.flatnonzero((c.kind == PQ) & c.alive)
    cand = c.bus_ids[load[np.argsort(base.vm[load], kind="stable")[:200]]]
    sites = [BankSite(int(b), 5.0, 6) for b in cand]
    plan, secs, cpu = timed_plan([LevelCase("base", net)], Levers(sites=sites, max_new_sites=20),
                                 Limits(v_min=0.95, v_max=1.05, ratings=False))
    return figures(plan, secs, cpu, plan.losses_after_mw["base"], "MW", None, name="grid10k plan",
                   before=plan.losses_before_mw["base"], violations=len(plan.violations),
                   low_after=int((plan.flows_after["base"].vm < 0.95).sum()), banks=len(plan.banks))


CASES = {"ieee30": bench_ieee30, "feeder33_1": bench_feeder33_1, "feeder33_2": bench_feeder33_2,
         "feeder33_3": bench_feeder33_3, "feeder33_small_units": bench_feeder33_small_units,
         "grid1024": bench_grid1024, "ring120_tool": bench_ring120_tool,
         "grid10k_flow": bench_grid10k_flow, "grid10k_plan": bench_grid10k_plan}


# --- the parent: one child process per case ----------------------------------------------

def child(name, *extra):
    """Run one case in a child process; returns (its result dict, whole-process wall seconds,
    whole-process CPU seconds, its peak resident memory in MB)."""
    env = dict(os.environ, **ONE_THREAD)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), str(TESTS), env.get("PYTHONPATH", "")])
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    out = subprocess.run([sys.executable, __file__, "--case", name, *extra], capture_output=True, text=True,
                         env=env, cwd=ROOT)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    lines = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT ")]
    if out.returncode or not lines:
        raise RuntimeError(f"case {name} failed:\n{out.stderr[-3000:]}")
    res = json.loads(lines[-1][7:])
    return res, wall, cpu, res.pop("peak_mb")


def reference_process(args):
    """A whole reference process (``python -m reference...``): (stdout, wall s, CPU s, peak MB)."""
    env = dict(os.environ, **ONE_THREAD)
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", "import resource, runpy, sys; sys.argv = sys.argv[1:]; "
                          "runpy.run_module(sys.argv[0], run_name='__main__'); "
                          "print('PEAK', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)", *args],
                         capture_output=True, text=True, env=env, cwd=TESTS)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if out.returncode:
        raise RuntimeError(f"reference {args} failed:\n{out.stderr[-3000:]}")
    lines = out.stdout.splitlines()
    peak = float(lines[-1].split()[1])
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return lines[-2], wall, cpu, peak


HEADER = (f"{'case':<38} {'wall s':>7} {'cpu s':>7} {'flows':>5} {'MILPs':>5} {'value':>12} {'reference':>12} "
          f"{'':3} {'gap':>8} {'ref s':>7} {'ratio':>6} {'peak MB':>7}  status / target")


def row(name, r, peak, *, secs=None, cpu=None, ratio=None, ref_value=None, ref_secs=None, target_text=""):
    secs = r["secs"] if secs is None else secs
    cpu = r["cpu"] if cpu is None else cpu
    ref_value = r.get("ref_value") if ref_value is None else ref_value
    ref_secs = r.get("ref_secs") if ref_secs is None else ref_secs
    if ratio is None and ref_secs:
        ratio = secs / ref_secs
    gap = r.get("gap")
    if not target_text and r.get("target"):
        target_text = f"{'ok' if secs < r['target'] else 'over'} (<{r['target']:g} s)"
    line = (f"{name:<38} {secs:7.2f} {cpu:7.2f} {r['flows']:5d} {r['milps']:5d} {r['value']:12.6f} "
            f"{ref_value if ref_value is not None else float('nan'):12.6f} {r['unit']:<3} "
            f"{'     n/a' if gap is None else f'{gap:8.2e}'} "
            f"{ref_secs if ref_secs else float('nan'):7.2f} {ratio if ratio else float('nan'):6.2f} {peak:7.0f}  "
            f"{r['status']} {target_text}")
    print(line, flush=True)
    if r.get("note"):
        print(f"{'':<38} {r['note']}", flush=True)


def ring120():
    tool, wall, cpu, peak = child("ring120_tool")
    out, rwall, rcpu, rpeak = reference_process(["reference.schedule", "4"])
    ref_losses = float(out.split()[0])
    rel = (tool["value"] - ref_losses) / ref_losses
    row("120-bus ring schedule (whole processes)", tool, peak, secs=wall, cpu=cpu, ratio=wall / rwall,
        ref_value=ref_losses, ref_secs=rwall,
        target_text=f"ratio {'ok' if wall <= 0.5 * rwall else 'over'} (<= 0.5); losses {rel:+.1e} rel "
                    f"({'ok' if rel <= 1e-4 else 'over'} <= 1e-4)")
    print(f"{'':<38} inside the tool's process: plan {tool['secs']:.2f} s wall, {tool['cpu']:.2f} s CPU; "
          f"SLSQP process {rcpu:.2f} s CPU, {rpeak:.0f} MB; CPU ratio {cpu / rcpu:.2f}", flush=True)
    # the classic full-space formulation (tests/reference/full_schedule.py): angles, magnitudes
    # and generator outputs as variables, power balance as equality constraints, exact dense
    # Jacobians; started from the Newton solution at the file setpoints
    fout, fwall, fcpu, fpeak = reference_process(["reference.full_schedule", "4"])
    f_losses, f_nit = float(fout.split()[0]), int(fout.split()[1])
    frel = (tool["value"] - f_losses) / f_losses
    print(f"{'':<38} full-space SLSQP process: {fwall:.2f} s wall, {fcpu:.2f} s CPU, {f_nit} SLSQP iterations, "
          f"{f_losses:.6f} MW (tool {frel:+.1e} rel), {fpeak:.0f} MB", flush=True)
    # the floor under the tool's process: what it imports before any work (numpy, SciPy's
    # sparse solvers, pandas for the network tables, Pyomo and HiGHS for the step models)
    env = dict(os.environ, **ONE_THREAD)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import planner.optimize.engine, planner.network.cdf\n"
                    "from planner.optimize import milp; milp.keep_scipy_deferred(); milp._load(); milp.new_solver()"],
                   check=True, env=env, cwd=ROOT)
    iwall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    icpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    print(f"{'':<38} the tool's imports alone (a process that only imports what a plan needs): {iwall:.2f} s "
          f"wall, {icpu:.2f} s CPU = {iwall / fwall:.2f} / {icpu / fcpu:.2f} x the full-space SLSQP process",
          flush=True)
    print(f"{'':<38} whole-process ratios, tool / reference: vs full-space SLSQP {wall / fwall:.2f} "
          f"({'ok' if wall <= 0.5 * fwall else 'over'} <= 0.5), vs reduced-space SLSQP {wall / rwall:.2f}; "
          f"CPU {cpu / fcpu:.2f} / {cpu / rcpu:.2f}", flush=True)


def grid10k():
    flow, fwall, fcpu, fpeak = child("grid10k_flow")
    plan, wall, cpu, peak = child("grid10k_plan")
    row(f"10,000-bus grid, 200 sites (processes)", plan, peak, secs=wall, cpu=cpu, ratio=wall / fwall,
        ref_secs=fwall, target_text=f"plan/flow {'ok' if wall <= 10 * fwall else 'over'} (<= 10 x); peak "
                                    f"{'ok' if peak < 1024 else 'over'} (< 1024 MB)")
    print(f"{'':<38} one flow process {fwall:.2f} s wall / {fcpu:.2f} s CPU (solve {flow['secs']:.2f} s, "
          f"{flow['low']} buses < 0.95 pu, peak {fpeak:.0f} MB); plan inside its process {plan['secs']:.1f} s "
          f"wall / {plan['cpu']:.1f} s CPU; losses {plan['before']:.3f} -> {plan['value']:.3f} MW, "
          f"{plan['banks']} banks, {plan['low_after']} buses < 0.95 pu after, {plan['violations']} violations",
          flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="skip the 1,000+-bus and 120-bus cases")
    ap.add_argument("--scale", "--big", action="store_true", dest="scale",
                    help="also the 10,000-bus grid with 200 candidate sites")
    ap.add_argument("--full", action="store_true",
                    help="also enumerate every 3-site placement as the reference (about 100 s)")
    ap.add_argument("--only", help="run only this case (ieee30, feeder33_1, feeder33_2, feeder33_3, "
                                   "feeder33_small_units, grid1024, ring120, grid10k)")
    ap.add_argument("--case", help=argparse.SUPPRESS)    # internal: run one case in this process
    args, extra = ap.parse_known_args(argv)
    if args.case:
        fn = CASES[args.case]
        res = fn(full=True) if "--full" in (argv or sys.argv) and "full" in fn.__code__.co_varnames else fn()
        res["peak_mb"] = _peak_mb()
        print("RESULT " + json.dumps(res), flush=True)
        return
    load = os.getloadavg()
    print(f"load average at start: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} on {os.cpu_count()} cores; "
          f"BLAS 1 thread in every process")
    print(HEADER)
    plain = ["ieee30", "feeder33_1", "feeder33_2", "feeder33_3", "feeder33_small_units"]
    todo = [args.only] if args.only else plain + ([] if args.quick else ["grid1024", "ring120"]) + \
        (["grid10k"] if args.scale else [])
    for name in todo:
        if name == "ring120":
            ring120()
        elif name == "grid10k":
            grid10k()
        else:
            r, wall, cpu, peak = child(name, *(["--full"] if args.full else []))
            row(r.pop("name"), r, peak)
    load = os.getloadavg()
    print(f"load average at end: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")


if __name__ == "__main__":
    main()
