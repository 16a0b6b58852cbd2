"""Checks of the optimiser (planner.optimize) against independent references.

References (tests/reference/, sharing no code with planner):
  * ac_opf.ieee30_voltage_schedule / feeder33_bank_sizing -- full-AC optima with scipy SLSQP on
    the polar power-flow equations;
  * sweep.enumerate_feeder33 / sweep_feeder33 -- exhaustive enumeration of bank units at one or
    two sites (three in the benchmark) with a backward/forward sweep load flow.
Limits of every AC-verified plan are checked here directly on the final FlowResult, not only
through the plan's own verdict.
"""
from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.network.compile import PQ, compile_network, replace
from planner.network.io import read_network
from planner.optimize.ac_check import evaluate, learn_voltage_margins
from planner.optimize.engine import LevelCase
from planner.optimize.engine import plan as optimize_plan
from planner.optimize.problem import PlanProblem
from planner.optimize.search import candidate_moves
from planner.optimize.levers import BankSite, Levers, Limits, Objective
from planner.optimize.sensitivity import linearize, loss_gradient
from reference.ac_opf import feeder33_bank_sizing, ieee30_voltage_schedule
from reference.sweep import enumerate_feeder33, sweep_feeder33

DATA = Path(__file__).resolve().parent / "data"
NO_V_LIMITS = Limits(v_min=0.0, v_max=2.0)     # as in the enumeration: no voltage limits
ALL_BUSES = range(2, 34)                        # every bus of the feeder but the substation


@pytest.fixture(scope="module")
def f33():
    return read_network(DATA / "feeder33_tables")


@pytest.fixture(scope="module")
def n30():
    return read_cdf(DATA / "ieee30cdf.txt")


def sites_at(buses, unit=0.15, units=10, **kw):
    return [BankSite(int(b), unit, units, **kw) for b in buses]


def placement(plan):
    return sorted((b["bus"], b["units"]) for b in plan.banks)


def scaled(net, k):
    """A copy of ``net`` with every load scaled by ``k`` (the input is not modified)."""
    out = copy.deepcopy(net)
    out.loads = out.loads.copy()
    out.loads["mw"] = out.loads["mw"] * k
    out.loads["mvar"] = out.loads["mvar"] * k
    return out


def vm_at(flow, buses):
    return flow.vm[flow.compiled.index_of(list(buses))]


def losses_kw(plan, level="base"):
    return plan.losses_after_mw[level] * 1000.0


# --- continuous problems against full-AC SLSQP optima ------------------------------------------

def test_ieee30_voltage_schedule_vs_scipy_slsqp_reference(n30):
    ref = ieee30_voltage_schedule()          # independent full-AC SLSQP optimum (tests/reference/ac_opf.py)
    plan = optimize_plan([LevelCase("base", n30)], Levers(gen_v_range={"*": (0.95, 1.10)}),
                    Limits(v_min=0.95, v_max=1.05))
    assert plan.verified and not plan.violations, plan.message
    got = plan.losses_after_mw["base"]
    assert got == pytest.approx(ref.losses_mw, rel=2e-3)
    assert got < plan.losses_before_mw["base"] - 0.5          # the schedule does save losses
    # the final AC flow, checked against the limits here
    fr = plan.flows_after["base"]
    c = fr.compiled
    assert fr.converged
    alive = c.alive
    gen = (c.kind != PQ) & alive
    load = (c.kind == PQ) & alive
    vm = fr.vm
    assert vm[load].min() >= 0.95 - 1e-6 and vm[load].max() <= 1.05 + 1e-6
    assert vm[gen].min() >= 0.95 - 1e-6 and vm[gen].max() <= 1.10 + 1e-6
    q = fr.bus_q_gen[gen]
    assert (q <= c.q_max[gen] + 1e-6).all() and (q >= c.q_min[gen] - 1e-6).all()
    # and the reference's own point is within the same limits
    vlo, vhi, qlo, qhi = ref.bounds
    assert (ref.vm >= vlo - 1e-6).all() and (ref.vm <= vhi + 1e-6).all()
    pv = np.isfinite(qlo) & np.isfinite(qhi) & (ref.qg_mvar != 0)
    assert (ref.qg_mvar[pv] <= qhi[pv] + 1e-4).all() and (ref.qg_mvar[pv] >= qlo[pv] - 1e-4).all()


def test_feeder33_continuous_sizing_vs_scipy_slsqp_reference(f33):
    ref = feeder33_bank_sizing((14, 24, 30))  # independent full-AC SLSQP optimum (tests/reference/ac_opf.py)
    plan = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at((14, 24, 30), continuous=True)), NO_V_LIMITS)
    assert plan.verified, plan.message
    assert losses_kw(plan) == pytest.approx(ref.losses_kw, rel=2e-3)
    # the ratings themselves are close too (the loss surface is flat near the optimum)
    got = {b["bus"]: b["mvar"] for b in plan.banks}
    for bus, mvar in ref.ratings_mvar.items():
        assert got[bus] == pytest.approx(mvar, abs=0.05)


# --- discrete placement against exhaustive enumeration -----------------------------------------

@pytest.mark.parametrize("n_sites", [1, 2])
def test_feeder33_placement_vs_exhaustive_enumeration(f33, n_sites):
    ref = enumerate_feeder33(sites=n_sites, unit_mvar=0.15, max_units=10)   # tests/reference/sweep.py
    plan = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES), max_new_sites=n_sites),
                    NO_V_LIMITS)
    assert plan.verified, plan.message
    assert losses_kw(plan) == pytest.approx(ref.losses_kw, rel=1e-3)
    assert losses_kw(plan) <= ref.losses_kw * (1 + 1e-6)     # an exact method cannot do worse
    # the enumerated optimum is unique at these settings (one site: bus 30, 9 units;
    # two sites: buses 13 and 30, 3 and 8 units)
    assert placement(plan) == sorted(zip(ref.buses, ref.units))


@pytest.fixture(scope="module")
def three_sites(f33):
    return optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES), max_new_sites=3), NO_V_LIMITS)


def test_feeder33_three_sites_within_published_range(three_sites):
    plan = three_sites
    assert plan.verified, plan.message
    assert len(plan.banks) == 3
    # published three-bank results: roughly 138-145 kW (from memory, a sanity range, see checks.md);
    # the exact method must do at least as well
    assert losses_kw(plan) <= 138.0
    # and at least as well as the best two-site plan (exhaustive enumeration, tests/reference/sweep.py)
    assert losses_kw(plan) <= enumerate_feeder33(sites=2).losses_kw
    # the AC figures are the final flow's own
    assert plan.flows_after["base"].losses_mw * 1000.0 == pytest.approx(losses_kw(plan), abs=1e-9)
    # exhaustive enumeration of all 6.6 million three-site plans with the reference sweep
    # (tests/reference/sweep.py; `python tests/perf/bench_plan.py --full`, about 100 s, too slow
    # for this run) gives buses 13, 24, 30 with 3, 4, 8 units and 132.380 kW
    assert placement(plan) == [(13, 3), (24, 4), (30, 8)]
    assert losses_kw(plan) == pytest.approx(132.380, abs=0.001)


def test_same_plan_twice_even_beside_a_cpu_hog(f33, three_sites):
    # no decision depends on elapsed time: the same study run again while another process
    # keeps a core busy gives the identical plan, log and figures (timings apart)
    import subprocess
    import sys
    hog = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        again = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES), max_new_sites=3),
                              NO_V_LIMITS)
    finally:
        hog.kill()
        hog.wait()
    first, second = three_sites.to_dict(), again.to_dict()
    first.pop("seconds")
    second.pop("seconds")
    assert not first["time_limited"] and first["iterations"]
    assert first == second


def test_feeder33_three_sites_no_single_site_change_improves(three_sites):
    # a certificate computed here by the independent sweep: keep two of the three banks, and
    # try the third at every other bus with every unit count (0-10); then every unit count at
    # the three buses together. None may beat the tool's AC-verified plan.
    plan = three_sites
    found = placement(plan)
    col = {b: b - 1 for b in range(1, 34)}          # sweep columns: buses 1..33 in order
    rows = []
    for i in range(3):
        keep = [found[j] for j in range(3) if j != i]
        for bus in ALL_BUSES:
            if bus in [b for b, _ in keep]:
                continue
            for u in range(11):
                q = np.zeros(33)
                for b, n in keep + [(bus, u)]:
                    q[col[b]] += 0.15 * n
                rows.append(q)
    buses = [b for b, _ in found]
    for units in np.ndindex(11, 11, 11):
        q = np.zeros(33)
        q[[col[b] for b in buses]] = 0.15 * np.array(units)
        rows.append(q)
    res = sweep_feeder33(np.array(rows))
    assert res.success
    assert len(rows) > 2000
    assert losses_kw(plan) <= res.losses_kw.min() * (1 + 1e-6)
    # and the sweep agrees with the tool's Newton-Raphson on the plan itself
    q = np.zeros(33)
    for b, n in found:
        q[col[b]] = 0.15 * n
    assert sweep_feeder33(q[None, :]).losses_kw[0] == pytest.approx(losses_kw(plan), rel=1e-6)


def test_quadratic_loss_model_predicts_large_bank_steps(f33):
    # the loss model built at the base case (no banks) for steps as large as a whole plan: its
    # prediction misses the AC loss change by under 10 % (it improves as the outer loop
    # re-linearises). Branch currents in the from-bus voltage frame matter here: in the slack's
    # frame the three-bank step below was missed by about 13 %.
    from planner.optimize.levers import Options
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES)), NO_V_LIMITS, Objective(), Options())
    st = pb.initial_settings()
    ev = evaluate(pb, st)
    model = pb.level_data(0, st, ev.flows[0], 0.05, 10)
    for banks in ({30: 9}, {13: 3, 30: 8}, {14: 3, 24: 4, 30: 9}):
        new = st.copy()
        for b, u in banks.items():
            new.fixed[b - 2] = u
        du = pb.lever_changes(0, st, new, ev.flows[0])
        predicted = (np.sum((model.d + model.R @ du) ** 2) + model.const) * pb.base
        ac = evaluate(pb, new).losses_mw[0]
        change = ev.losses_mw[0] - ac
        assert change > 0.05                                   # a large step (over 50 kW saved)
        assert abs(ac - predicted) < 0.10 * change, banks


# --- limits ------------------------------------------------------------------------------------

def test_ieee30_lower_load_bus_limit_binds_and_costs_losses(n30):
    levers = Levers(gen_v_range={"*": (0.95, 1.10)})
    free = optimize_plan([LevelCase("base", n30)], levers, Limits(v_min=0.95, v_max=1.05))
    tight = optimize_plan([LevelCase("base", n30)], levers, Limits(v_min=0.95, v_max=1.03))
    fr = free.flows_after["base"]
    load = (fr.compiled.kind == PQ) & fr.compiled.alive
    assert fr.vm[load].max() > 1.03 + 1e-3           # the unconstrained schedule breaks the lower limit
    assert tight.verified, tight.message
    ft = tight.flows_after["base"]
    assert ft.vm[load].max() <= 1.03 + 1e-6 and ft.vm[load].min() >= 0.95 - 1e-6
    assert tight.losses_after_mw["base"] > free.losses_after_mw["base"] + 1e-3


def test_feeder33_upper_limit_at_the_bank_bus_binds(f33):
    free = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES), max_new_sites=1), NO_V_LIMITS)
    v_free = float(vm_at(free.flows_after["base"], [30])[0])
    assert placement(free) == [(30, 9)] and v_free > 0.95
    cap = 0.945                                        # below what the loss-optimal plan gives at bus 30
    lim = Limits(v_min=0.0, v_max=2.0, per_bus={30: (0.0, cap)})
    plan = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES), max_new_sites=1), lim)
    assert plan.verified, plan.message
    assert vm_at(plan.flows_after["base"], [30])[0] <= cap + 1e-6
    assert losses_kw(plan) > losses_kw(free) + 0.1
    assert losses_kw(plan) < plan.losses_before_mw["base"] * 1000.0   # still a useful bank


def test_infeasible_limits_give_the_least_violation_plan(f33):
    plan = optimize_plan([LevelCase("base", f33)], Levers(sites=[BankSite(18, 0.15, 2)]),
                    Limits(v_min=0.97, v_max=1.05))
    assert plan.success and not plan.verified
    assert "limits cannot all be met" in plan.message
    assert plan.violations
    for v in plan.violations:
        assert v.kind == "voltage" and v.element.startswith("bus ") and v.excess > 0
        assert v.value == pytest.approx(v.limit - v.excess)
    fr = plan.flows_after["base"]
    low = [int(v.element.split()[1]) for v in plan.violations]
    np.testing.assert_allclose(vm_at(fr, low), [v.value for v in plan.violations], atol=1e-12)
    # every bus below 0.97 in the final flow is named
    assert set(low) == set(int(b) for b in fr.compiled.bus_ids[fr.vm < 0.97 - 1e-6])
    before = sum(v.excess for v in plan.violations_before)
    after = sum(v.excess for v in plan.violations)
    assert after < before - 0.05
    assert placement(plan) == [(18, 2)]               # the whole bank helps
    # the iteration log names the worst breach of each AC-checked point: at the start the
    # lowest voltage (bus 18, the feeder end); the last accepted point is the final plan
    first = plan.log[0]["worst_violation"]
    assert first.startswith("base: voltage at bus 18:")
    checked = [e for e in plan.log if e["accepted"] and e["worst_violation"]]
    worst_excess = max(v.excess for v in plan.violations)
    assert f"by {worst_excess:.4f} pu" in checked[-1]["worst_violation"]


# --- sensitivities ---------------------------------------------------------------------------

def _ieee14_levers():
    net = read_cdf(DATA / "ieee14cdf.txt")
    net.transformers = net.transformers.copy()
    net.transformers.loc[net.transformers.xfmr_id == "4-9", "adjustable"] = True
    c = compile_network(net)
    shunt = c.index_of([9, 14])
    vset = c.index_of([2, 6])
    row = int(np.flatnonzero(net.transformers.adjustable.to_numpy())[0])
    xf = np.flatnonzero(c.xfmr_rows == row)
    return c, shunt, vset, xf


def _flow(c, dysh=None, dvset=None, dratio=None):
    kw = {}
    if dysh is not None:
        kw["ysh"] = c.ysh + dysh
    if dvset is not None:
        kw["v_set"] = c.v_set + dvset
    if dratio is not None:
        kw["ratio"] = c.ratio + dratio
    fr = solve_flow(compiled=replace(c, **kw), enforce_q_limits=False, build_tables=False, tol_mva=1e-11)
    assert fr.converged
    return fr


def test_loss_gradient_quadratic_model_adjoint_and_finite_differences_agree():
    # physics: three ways to the same derivative (no outside source needed)
    c, shunt, vset, xf = _ieee14_levers()
    fr = _flow(c)
    sens = linearize(fr, shunt_buses=shunt, vset_buses=vset, xfmr_branches=xf)
    quad = 2.0 * np.sum(sens.r[:, None] * np.real(np.conj(sens.i0)[:, None] * sens.di), axis=0)
    adj = loss_gradient(fr, shunt_buses=shunt, vset_buses=vset, xfmr_branches=xf)
    assert sens.losses0 * c.base_mva == pytest.approx(fr.losses_mw, rel=1e-9)
    h = 1e-5
    fd, dv_fd, dq_fd = [], [], []
    n = c.n
    for j in range(len(shunt) + len(vset) + len(xf)):
        pair = []
        for sgn in (1, -1):
            dysh, dvs, drt = np.zeros(n, complex), np.zeros(n), np.zeros(len(c.ratio))
            if j < len(shunt):
                dysh[shunt[j]] = 1j * sgn * h
            elif j < len(shunt) + len(vset):
                dvs[vset[j - len(shunt)]] = sgn * h
            else:
                drt[xf[j - len(shunt) - len(vset)]] = sgn * h
            pair.append(_flow(c, dysh, dvs, drt))
        up, dn = pair
        fd.append((up.losses_mw - dn.losses_mw) / c.base_mva / (2 * h))
        dv_fd.append((up.vm - dn.vm) / (2 * h))
        gb = sens.gen_buses
        dq_fd.append((up.bus_q_gen[gb] - dn.bus_q_gen[gb]) / (2 * h))
    fd = np.array(fd)
    scale = np.abs(fd).max()
    assert scale > 1e-3                                        # the levers do move the losses
    np.testing.assert_allclose(quad, adj, atol=1e-8 * scale + 1e-12, rtol=1e-7)
    np.testing.assert_allclose(adj, fd, atol=1e-6 * scale, rtol=1e-5)
    np.testing.assert_allclose(sens.dvm, np.array(dv_fd).T, atol=1e-6)
    np.testing.assert_allclose(sens.dq, np.array(dq_fd).T, atol=1e-5)
    # the columns are really distinct levers (shunt, setpoint, tap all matter)
    assert (np.abs(fd) > 1e-4).all()


# --- objective and load levels ---------------------------------------------------------------

def test_cost_objective_drops_a_bank_that_saves_too_little(f33):
    buses = (14, 24, 30)
    by_losses = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(buses)), NO_V_LIMITS)
    assert len(by_losses.banks) == 3
    # 1e6 money per MW of loss held over the period; 10,000 per site: a site must save over 10 kW
    costly = sites_at(buses, fixed_cost=10_000.0, cost_per_mvar=1_000.0)
    obj = Objective(kind="cost", loss_value_per_mw=1e6, capital_factor=1.0)
    plan = optimize_plan([LevelCase("base", f33)], Levers(sites=costly), NO_V_LIMITS, obj)
    assert plan.verified, plan.message
    assert 1 <= len(plan.banks) < 3
    assert plan.capital_cost == pytest.approx(
        sum(10_000.0 + 1_000.0 * b["mvar"] for b in plan.banks))
    assert plan.objective_after == pytest.approx(plan.losses_after_mw["base"] * 1e6 + plan.capital_cost)
    # the loss-optimal placement priced the same way costs more
    loss_plan_cost = by_losses.losses_after_mw["base"] * 1e6 + sum(10_000.0 + 1_000.0 * b["mvar"]
                                                                   for b in by_losses.banks)
    assert plan.objective_after < loss_plan_cost
    # every site kept pays for itself: dropping it (AC load flow) costs more than its capital
    for b in plan.banks:
        c = compile_network(f33)
        ysh = c.ysh.copy()
        for other in plan.banks:
            if other is not b:
                ysh[c.index_of([other["bus"]])[0]] += 1j * other["mvar"] / c.base_mva
        without = solve_flow(compiled=replace(c, ysh=ysh), build_tables=False)
        saving = (without.losses_mw - plan.losses_after_mw["base"]) * 1e6
        assert saving > 10_000.0 + 1_000.0 * b["mvar"]


def test_two_levels_switch_units_so_light_load_stays_within_limits(f33):
    buses = (14, 24, 30)
    ends = {b: (0.0, 0.99) for b in range(26, 34)}     # upper limit at the end of the lateral with bus 30
    lim = Limits(v_min=0.0, v_max=2.0, per_bus=ends)
    light_net = scaled(f33, 0.4)
    levels = [LevelCase("peak", f33, 2000.0), LevelCase("light", light_net, 6760.0)]
    # the peak-optimal fixed banks overvolt the lateral at light load (AC load flow)
    peak = optimize_plan([levels[0]], Levers(sites=sites_at(buses)), lim)
    c = compile_network(light_net)
    ysh = c.ysh.copy()
    for b in peak.banks:
        ysh[c.index_of([b["bus"]])[0]] += 1j * b["mvar"] / c.base_mva
    assert vm_at(solve_flow(compiled=replace(c, ysh=ysh), build_tables=False), ends).max() > 0.99 + 1e-3
    peak_mvar = sum(b["mvar"] for b in peak.banks)

    for kinds in (("fixed", "switched"), ("fixed",)):
        plan = optimize_plan(levels, Levers(sites=sites_at(buses, kinds=kinds)), lim)
        assert plan.verified, plan.message
        for name, fr in plan.flows_after.items():
            assert fr.converged and vm_at(fr, ends).max() <= 0.99 + 1e-6, name
        light_mvar = sum(b["mvar_by_level"]["light"] for b in plan.banks)
        assert light_mvar < peak_mvar - 0.1
        if kinds == ("fixed",):
            assert all(b["switched_units"] == 0 for b in plan.banks)
        else:
            assert sum(b["switched_units"] for b in plan.banks) > 0
        # the bank in service at light load, run on its own, gives the verified light flow
        ysh = c.ysh.copy()
        for b in plan.banks:
            ysh[c.index_of([b["bus"]])[0]] += 1j * b["mvar_by_level"]["light"] / c.base_mva
        check = solve_flow(compiled=replace(c, ysh=ysh), build_tables=False)
        assert check.losses_mw == pytest.approx(plan.losses_after_mw["light"], abs=1e-7)  # solver tolerance
        assert plan.losses_after_mw["peak"] < plan.losses_before_mw["peak"]


def test_final_search_lists_moves_to_every_candidate_bus(f33):
    # the final search considers the used bank at every other candidate bus (not only the
    # buses next door), with the same units or one more or fewer, and unit changes in place
    from planner.optimize.levers import Options
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES, kinds=("fixed",))), NO_V_LIMITS,
                     Objective(), Options())
    st = pb.initial_settings()
    st.fixed[13 - 2] = 3
    moves = list(candidate_moves(pb, st))
    moved = {}
    for n in moves:
        if np.count_nonzero(n.fixed) == 1 and n.fixed[13 - 2] == 0:
            moved.setdefault(int(np.flatnonzero(n.fixed)[0]) + 2, set()).add(int(n.fixed.sum()))
    assert sorted(moved) == [b for b in ALL_BUSES if b != 13]
    assert all(units == {2, 3, 4} for units in moved.values())
    units = sorted(int(n.fixed[13 - 2]) for n in moves if np.count_nonzero(n.fixed) == 1 and n.fixed[13 - 2] > 0)
    assert units == [2, 4]
    assert any(not n.fixed.any() for n in moves)            # dropping the site is a move too
    # no site limit: a second site of 1-10 units at every other bus is listed as well
    assert sum(np.count_nonzero(n.fixed) == 2 for n in moves) == 31 * 10


def test_voltage_rows_move_inside_the_band_where_ac_broke_it(f33):
    # after an AC point breaks the band at a bus, that bus's linear row aims inside the band
    # by the breach (plus 5e-5 pu, capped at 0.01 pu); a bus inside the band is never held
    # tighter than its present voltage, so the present point stays feasible in the model
    from planner.optimize.levers import Options
    limits = Limits(v_min=0.92, v_max=1.05)
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=sites_at([18])), limits, Objective(), Options())
    st = pb.initial_settings()
    ev = evaluate(pb, st)
    vm = ev.flows[0].vm
    low = np.flatnonzero(vm < 0.92)
    assert len(low) >= 5                                 # the feeder end is below 0.92 pu
    learn_voltage_margins(pb, ev)
    margin = pb.v_margin[0][0]
    np.testing.assert_allclose(margin[low], np.minimum(0.92 - vm[low] + 5e-5, 0.01))
    assert not margin[vm >= 0.92].any()
    rows = pb.level_data(0, st, ev.flows[0], 0.05, 10)
    lo = dict(zip(rows.v_rows, rows.v_lo))
    for i in low:
        assert lo[i] == pytest.approx(0.92 + margin[i])
    # a bus that broke the band once but is inside it now is held at most at its voltage
    pb.v_margin[0][0][:] = 0.005
    inside = int(np.flatnonzero((vm > 0.92) & (vm < 0.925))[0])
    rows = pb.level_data(0, st, ev.flows[0], 0.05, 10)
    lo = dict(zip(rows.v_rows, rows.v_lo))
    assert lo[inside] == pytest.approx(vm[inside])



# --- honest fields and paralleled transformers -------------------------------------------------

def test_generators_held_at_a_reactive_limit_are_flagged_with_the_voltage_reached(n30):
    plan = optimize_plan(n30, Levers(gen_v_range={"*": (0.95, 1.10)}), Limits(v_min=0.95, v_max=1.05))
    fr = plan.flows_after["base"]
    c = fr.compiled
    rows = plan.setpoints["base"]
    assert len(rows) == 6
    flagged = [r for r in rows if r["at_limit"]]
    assert flagged                                   # IEEE 30 at its loss optimum leans on Q limits
    for r in rows:
        i = c.index_of([r["bus"]])[0]
        assert r["v_reached_pu"] == pytest.approx(fr.vm[i], abs=1e-12)
        state = {"max Mvar": 1, "min Mvar": -1, None: 0}[r["at_limit"]]
        assert fr.limit_state[i] == state
        if state:                                    # held at the limit: Q sits on it
            limit = c.q_max[i] if state > 0 else c.q_min[i]
            assert fr.bus_q_gen[i] == pytest.approx(limit, abs=1e-6)
    frames = plan.to_frames()
    got = [x if isinstance(x, str) else None for x in frames["setpoints"]["at_limit"]]
    assert got == [r["at_limit"] for r in rows]
    assert list(frames["setpoints"]["bus"]) == [r["bus"] for r in rows]
    assert "status=VERIFIED" in repr(plan) and len(repr(plan)) < 200
    # the prediction is for the final plan: its model's figure lies close to the AC figure
    assert plan.losses_predicted_mw["base"] == pytest.approx(plan.losses_after_mw["base"], rel=2e-3)
    # the bound: below the verified objective, within the MILP gap of it on this continuous case
    assert plan.bound["lower_bound"] <= plan.objective_after
    assert plan.bound["relative_gap"] < 5e-4 and not plan.bound["exceeds_mip_gap"]


def test_paralleled_transformers_move_together_and_report_tap_positions():
    net = read_cdf(DATA / "ieee14cdf.txt")
    tr = net.transformers.copy()
    # transformer 4-9 as two identical units in parallel (each twice the reactance), both adjustable
    twin = tr[tr.xfmr_id == "4-9"].copy()
    twin["xfmr_id"] = "4-9b"
    tr = pd.concat([tr, twin], ignore_index=True)
    pair = tr.xfmr_id.isin(["4-9", "4-9b"])
    tr.loc[pair, "x_pu"] *= 2.0
    tr.loc[pair, "adjustable"] = True
    tr.loc[pair, "ratio_step_pu"] = 0.0125
    tr.loc[pair, "ratio_pu"] = 1.0
    net.transformers = tr
    levers = Levers(taps=True, sites=[BankSite(14, 5.0, 4)])
    plan = optimize_plan(net, levers, Limits(v_min=0.94, v_max=1.06))
    taps = {t["xfmr_id"]: t for t in plan.taps["base"]}
    assert set(taps) == {"4-9", "4-9b"}
    assert taps["4-9"]["ratio"] == taps["4-9b"]["ratio"]
    assert taps["4-9"]["parallel_group"] is not None
    assert taps["4-9"]["ratio"] != 1.0                # the pair's tap did move (to 1.025 here)
    for t in taps.values():
        assert t["position"] == round((t["ratio"] - 1.0) / 0.0125)
        assert t["ratio_side"] == 4
    # the AC flow of the plan has the same ratio on both units
    fr = plan.flows_after["base"]
    c = fr.compiled
    both = np.flatnonzero(np.isin(c.branch_ids, ["4-9", "4-9b"]))
    assert fr.compiled.ratio[both[0]] == fr.compiled.ratio[both[1]] == taps["4-9"]["ratio"]
    # told otherwise, the two are separate levers
    apart = optimize_plan(net, Levers(taps=True, sites=[BankSite(14, 5.0, 4)], parallel_taps_together=False),
                          Limits(v_min=0.94, v_max=1.06))
    assert len(apart.taps["base"]) == 2 and all(t["parallel_group"] is None for t in apart.taps["base"])


def test_levels_checked_in_worker_processes_give_the_serial_plan(f33):
    # Options.jobs > 1: the AC checks of the levels of each proposal run in worker processes,
    # which get (and send back) the load flow's ordering: the plan is exactly the serial one
    from planner.optimize.levers import Options
    levels = [LevelCase("peak", f33, 2000.0), LevelCase("light", scaled(f33, 0.4), 6760.0)]
    levers = Levers(sites=sites_at((14, 24, 30)))
    lim = Limits(v_min=0.0, v_max=2.0, per_bus={b: (0.0, 0.99) for b in range(26, 34)})
    serial = optimize_plan(levels, levers, lim, options=Options(jobs=1, bound=False))
    parallel = optimize_plan(levels, levers, lim, options=Options(jobs=2, bound=False))
    a, b = serial.to_dict(), parallel.to_dict()
    a.pop("seconds", None)
    b.pop("seconds", None)
    assert a == b
    assert serial.verified and len(serial.banks) >= 1
