"""Optimiser timing figures (prints a table; not a pytest module).

    python tests/perf/bench_plan.py            # all cases
    python tests/perf/bench_plan.py --quick    # skip the 1,000+-bus case
    python tests/perf/bench_plan.py --full     # also enumerate all 3-site placements (about 100 s)
    python tests/perf/bench_plan.py --big      # also the 10,000-bus grid with 200 candidate sites
                                               # (time against one load flow, peak memory)

Per case: wall time of planner.optimize.engine.plan, AC load flows and MILP solves it used,
the AC-verified result, the relaxation bound's relative gap (planner.optimize.bound), and the
time of the same problem solved by the independent reference (tests/reference: scipy SLSQP,
or exhaustive enumeration) with the ratio of the two. The 3-site feeder case is run twice and
the two plans compared (determinism). Timings on a shared machine are noisy. Targets:
IEEE 30 voltage schedule < 2 s; 33-bus placement, all 32 candidate buses, up to 3 sites < 10 s;
1,000+-bus synthetic case with 50 candidate sites < 60 s.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

TESTS = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(TESTS))

from planner.flow.newton import solve_flow  # noqa: E402
from planner.flow.result import branch_flows  # noqa: E402
from planner.network.cdf import read_cdf  # noqa: E402
from planner.network.compile import PQ  # noqa: E402
from planner.network.io import read_network  # noqa: E402
from planner.network.synthetic import meshed_grid  # noqa: E402
from planner.optimize.engine import LevelCase, plan as make_plan  # noqa: E402
from planner.optimize.levers import BankSite, Levers, Limits  # noqa: E402
from reference.ac_opf import ieee30_voltage_schedule  # noqa: E402
from reference.sweep import enumerate_feeder33  # noqa: E402

DATA = TESTS / "data"
ROWS = []


def timed(fn, *a, **kw):
    t = time.perf_counter()
    out = fn(*a, **kw)
    return out, time.perf_counter() - t


def row(case, plan, secs, value, ref_value, ref_secs, unit, target):
    ratio = f"{secs / ref_secs:6.2f}" if ref_secs else "   n/a"
    ref_v = f"{ref_value:11.4f}" if ref_value is not None else "        n/a"
    ref_t = f"{ref_secs:8.2f}" if ref_secs else "     n/a"
    gap = plan.bound.get("relative_gap")
    gap_t = f"{gap:8.2%}" if gap is not None else "     n/a"
    ROWS.append(f"{case:<38} {secs:8.2f} {plan.ac_flows:6d} {plan.milp_solves:6d} {value:11.4f} {ref_v} {unit:<3} "
                f"{gap_t} {ref_t} {ratio}  {'ok' if secs < target else 'over'} (<{target:g} s)  "
                f"{plan.status.name}{' TIME-LIMITED' if plan.time_limited else ''}")
    print(ROWS[-1], flush=True)


def ieee30():
    net = read_cdf(DATA / "ieee30cdf.txt")
    plan, secs = timed(make_plan, [LevelCase("base", net)], Levers(gen_v_range={"*": (0.95, 1.10)}),
                       Limits(v_min=0.95, v_max=1.05))
    ref, ref_secs = timed(ieee30_voltage_schedule)
    row("IEEE 30 voltage schedule", plan, secs, plan.losses_after_mw["base"], ref.losses_mw, ref_secs, "MW", 2.0)


def feeder33(max_sites, full=False, unit=0.15, units=10):
    net = read_network(DATA / "feeder33_tables")
    sites = [BankSite(b, unit, units) for b in range(2, 34)]
    plan, secs = timed(make_plan, [LevelCase("base", net)], Levers(sites=sites, max_new_sites=max_sites),
                       Limits(v_min=0.0, v_max=2.0))
    if unit != 0.15:
        ref_v, ref_secs = None, None
    elif max_sites <= 2 or full:
        # three sites: 6.6 million cases, about 100 s; only with --full
        ref, ref_secs = timed(enumerate_feeder33, sites=max_sites, unit_mvar=0.15, max_units=10)
        ref_v = ref.losses_kw
    else:
        ref_v, ref_secs = None, None
    row(f"33-bus {unit * 1000:g} kvar x {units}, <= {max_sites} sites", plan, secs,
        plan.losses_after_mw["base"] * 1e3, ref_v, ref_secs, "kW", 10.0)
    return plan


def repeat_check(first):
    """The 3-site feeder plan again: identical apart from timings?"""
    net = read_network(DATA / "feeder33_tables")
    sites = [BankSite(b, 0.15, 10) for b in range(2, 34)]
    again = make_plan([LevelCase("base", net)], Levers(sites=sites, max_new_sites=3), Limits(v_min=0.0, v_max=2.0))
    a, b = first.to_dict(), again.to_dict()
    a.pop("seconds")
    b.pop("seconds")
    print(f"33-bus 3 sites run twice: {'identical plans' if a == b else 'PLANS DIFFER'}", flush=True)


def big_grid():
    """10,000-bus meshed grid, 200 candidate sites: plan time against one load flow, in a child
    process each so that the peak resident memory of the plan is its own."""
    import subprocess
    code = r"""
import resource, sys, time
import numpy as np
sys.path.insert(0, %r)
from planner.network.synthetic import meshed_grid
from planner.flow.newton import solve_flow
from planner.network.compile import PQ
from planner.optimize.engine import plan, LevelCase
from planner.optimize.levers import BankSite, Levers, Limits, Options
net = meshed_grid(100, 100, seed=0)
t = time.perf_counter(); base = solve_flow(net); flow_s = time.perf_counter() - t
c = base.compiled
load = np.flatnonzero((c.kind == PQ) & c.alive)
cand = c.bus_ids[load[np.argsort(base.vm[load])[:200]]]
sites = [BankSite(int(b), 5.0, 6) for b in cand]
t = time.perf_counter()
p = plan(net, Levers(sites=sites, max_new_sites=20), Limits(v_min=0.9, v_max=1.1, ratings=False))
plan_s = time.perf_counter() - t
rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(f"10,000-bus grid ({c.n} buses), 200 sites: flow {flow_s:.2f} s, plan {plan_s:.1f} s "
      f"({plan_s / flow_s:.1f} x one flow), peak memory {rss:.0f} MB, {p.status.name}, "
      f"{p.losses_before_mw['base']:.3f} -> {p.losses_after_mw['base']:.3f} MW, "
      f"gap {p.bound.get('relative_gap', float('nan')):.2%%}, {p.ac_flows} flows, {p.milp_solves} MILPs")
""" % str(TESTS.parent)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    print(out.stdout.strip() or out.stderr.strip()[-2000:], flush=True)


def synthetic():
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
    plan, secs = timed(make_plan, [LevelCase("base", net)], Levers(sites=sites, max_new_sites=10),
                       Limits(v_min=0.95, v_max=1.05))
    row(f"meshed grid 32x32 ({c.n} buses), 50 sites", plan, secs, plan.losses_after_mw["base"], None, None,
        "MW", 60.0)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="skip the 1,000+-bus case")
    ap.add_argument("--big", action="store_true", help="also the 10,000-bus grid with 200 candidate sites")
    ap.add_argument("--full", action="store_true",
                    help="also enumerate every 3-site placement as the reference (about 100 s)")
    args = ap.parse_args(argv)
    print(f"{'case':<38} {'wall s':>8} {'flows':>6} {'MILPs':>6} {'value':>11} {'reference':>11} {'':3} "
          f"{'gap':>8} {'ref s':>8} {'ratio':>6}")
    ieee30()
    for k in (1, 2, 3):
        last = feeder33(k, full=args.full)
    repeat_check(last)
    feeder33(3, unit=0.05, units=40)
    if not args.quick:
        synthetic()
    if args.big:
        big_grid()


if __name__ == "__main__":
    main()
