"""Newton-Raphson load flow: published cases, hand-checkable cases, limits, failures, starts.

Every solution is also checked independently (``flowcheck`` fixture in conftest.py): a dense
Ybus rebuilt from the raw branch data with plain complex numpy, every bus mismatch against the
scheduled injections and the loss balance.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.network.model import Network, kvar_to_mvar, kw_to_mw, make_table, ohm_to_pu
from reference import raw_cases

DATA = Path(__file__).resolve().parent / "data"


# --- fixtures ---------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def net14():
    return read_cdf(DATA / "ieee14cdf.txt")


@pytest.fixture(scope="module")
def net30():
    return read_cdf(DATA / "ieee30cdf.txt")


FEEDER_BASE_MVA, FEEDER_KV = 10.0, 12.66


def build_feeder33() -> Network:
    """The 33-bus feeder from its CSV files (ohms, kW, kvar), bus 1 the substation at 1.0 pu."""
    br = pd.read_csv(DATA / "feeder33" / "branches.csv")
    ld = pd.read_csv(DATA / "feeder33" / "loads.csv")
    ids = sorted(set(br.from_bus) | set(br.to_bus))
    buses = make_table("buses", [{"bus": b, "base_kv": FEEDER_KV, "kind": "slack" if b == 1 else "PQ",
                                  "v_min_pu": 0.9, "v_max_pu": 1.05} for b in ids])
    lines = make_table("lines", [{"line_id": f"{r.from_bus}-{r.to_bus}", "from_bus": r.from_bus,
                                  "to_bus": r.to_bus,
                                  "r_pu": ohm_to_pu(r.r_ohm, FEEDER_KV, FEEDER_BASE_MVA),
                                  "x_pu": ohm_to_pu(r.x_ohm, FEEDER_KV, FEEDER_BASE_MVA)}
                                 for r in br.itertuples()])
    loads = make_table("loads", [{"load_id": f"D{r.bus}", "bus": r.bus, "mw": kw_to_mw(r.kw),
                                  "mvar": kvar_to_mvar(r.kvar)} for r in ld.itertuples()])
    gens = make_table("generators", [{"gen_id": "S1", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}])
    return Network(base_mva=FEEDER_BASE_MVA, name="feeder33", buses=buses, lines=lines, loads=loads,
                   generators=gens)


@pytest.fixture(scope="module")
def net33():
    # the tabular copy of the feeder when it exists, else built here from the CSV files
    folder = DATA / "feeder33_tables"
    if folder.is_dir():
        try:
            from planner.network.tabular import read_tables
        except ImportError:
            read_tables = None
        if read_tables is not None:
            return read_tables(folder)
    return build_feeder33()


def two_bus(*, load=(50.0, 20.0), r=0.0, x=0.1, shares=None, gen2=None, kind2="PQ", v1=1.0) -> Network:
    """Slack bus 1 at ``v1`` feeding bus 2 through one line; optional generator(s) at bus 2."""
    ld = {"load_id": "D2", "bus": 2, "mw": load[0], "mvar": load[1], **(shares or {})}
    gens = [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": v1}] + list(gen2 or [])
    return Network(base_mva=100.0,
                   buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
                                              {"bus": 2, "base_kv": 110.0, "kind": kind2}]),
                   generators=make_table("generators", gens),
                   loads=make_table("loads", [ld]),
                   lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2,
                                               "r_pu": r, "x_pu": x}]))


def pq_voltage(v1, r, x, p, q):
    """Closed form |V2| of a constant-power load P + jQ (pu) behind R + jX from a source |V1|:
    |V2|^4 + (2(RP + XQ) - V1^2)|V2|^2 + (R^2 + X^2)(P^2 + Q^2) = 0, upper root."""
    bcoef = v1 ** 2 - 2 * (r * p + x * q)
    disc = bcoef ** 2 - 4 * (r * r + x * x) * (p * p + q * q)
    return math.sqrt((bcoef + math.sqrt(disc)) / 2)


# --- published cases ------------------------------------------------------------------------

def test_ieee14_matches_cdf_final_columns_and_losses(net14, flowcheck):
    res = solve_flow(net14)
    assert res.converged and res.status == 0
    raw = raw_cases.ieee14()
    b = res.buses.set_index("bus").loc[raw.bus]
    # IEEE CDF file: published final voltages (0.002 pu) and angles (0.05 deg)
    assert np.abs(b.v_pu.to_numpy() - raw.vfinal).max() < 0.002
    assert np.abs(b.angle_deg.to_numpy() - raw.afinal_deg).max() < 0.05
    # total losses 13.393 MW (from memory)
    assert res.losses_mw == pytest.approx(13.393, abs=0.001)
    assert res.limited_buses == []
    flowcheck.check(res, flowcheck.from_raw(raw))


def test_ieee30_with_reactive_limits_matches_cdf(net30, flowcheck):
    res = solve_flow(net30)
    assert res.converged
    raw = raw_cases.ieee30()
    b = res.buses.set_index("bus").loc[raw.bus]
    # IEEE CDF file: 0.002 pu; angles 0.5 deg (published angles differ from a modern solution
    # by up to ~0.45 deg)
    assert np.abs(b.v_pu.to_numpy() - raw.vfinal).max() < 0.002
    assert np.abs(b.angle_deg.to_numpy() - raw.afinal_deg).max() < 0.5
    # IEEE CDF file (and its data notes): bus 2 sits at its upper limit, 50 Mvar
    assert res.limited_buses == [2]
    g2 = res.generators.set_index("gen_id").loc["G2"]
    assert g2.mvar == pytest.approx(50.0, abs=1e-6) and g2.at_limit == "max"
    assert b.loc[2, "kind"] == "PQ" and b.loc[2, "v_pu"] < 1.045
    flowcheck.check(res, flowcheck.from_raw(raw))


def test_ieee30_without_limits_losses(net30, flowcheck):
    res = solve_flow(net30, enforce_q_limits=False)
    assert res.converged and res.limited_buses == []
    # total active losses 17.557 MW, limits not enforced (from memory)
    assert res.losses_mw == pytest.approx(17.557, abs=0.001)
    g2 = res.generators.set_index("gen_id").loc["G2"]
    assert g2.mvar > 50.0                      # what bus 2 would need to hold 1.045 pu
    assert res.buses.set_index("bus").loc[2, "v_pu"] == pytest.approx(1.045, abs=1e-12)
    flowcheck.check(res, flowcheck.from_raw(raw_cases.ieee30()), limits=False)


def test_feeder33_losses_and_lowest_voltage(net33, flowcheck):
    res = solve_flow(net33)
    assert res.converged
    b = res.buses
    # Baran and Wu 1989: 202.67 kW losses, lowest voltage 0.9131 pu at bus 18
    assert res.losses_mw * 1000 == pytest.approx(202.67, abs=0.05)
    low = b.loc[b.v_pu.idxmin()]
    assert int(low.bus) == 18 and low.v_pu == pytest.approx(0.9131, abs=0.0001)
    # Baran and Wu 1989 data notes: total load 3715 kW + j2300 kvar
    assert b.p_load_mw.sum() == pytest.approx(3.715, abs=1e-9)
    assert b.q_load_mvar.sum() == pytest.approx(2.300, abs=1e-9)
    flowcheck.check(res, flowcheck.from_raw(raw_cases.feeder33(base_mva=float(net33.base_mva))))


def test_feeder33_built_from_csv_agrees_with_the_tabular_copy(net33, flowcheck):
    built = solve_flow(build_feeder33())
    res = solve_flow(net33)
    a = built.buses.set_index("bus").sort_index()
    b = res.buses.set_index("bus").sort_index()
    np.testing.assert_allclose(a.v_pu, b.v_pu, atol=1e-9)
    np.testing.assert_allclose(a.angle_deg, b.angle_deg, atol=1e-7)
    assert built.losses_mw == pytest.approx(res.losses_mw, abs=1e-9)
    flowcheck.check(built, flowcheck.from_network(build_feeder33()))


# --- voltage-dependent loads, by hand ---------------------------------------------------------

def test_constant_impedance_load_closed_form(flowcheck):
    # 50 MW + j20 Mvar at 1 pu, all constant impedance, behind j0.1 pu from a 1.0 pu source
    net = two_bus(load=(50.0, 20.0), x=0.1, shares={"p_share_z": 1.0, "q_share_z": 1.0})
    res = solve_flow(net)
    assert res.converged
    z_load = 1.0 / np.conj(0.5 + 0.2j)           # |V|^2 / conj(S) at |V| = 1
    v_exact = z_load / (z_load + 0.1j)           # voltage divider, exact
    v2 = res.v[res.compiled.index_of([2])[0]]
    assert abs(v2 - v_exact) < 1e-10
    b = res.buses.set_index("bus").loc[2]
    vm2 = abs(v_exact)
    assert b.p_load_mw == pytest.approx(50.0 * vm2 ** 2, abs=1e-8)
    assert b.q_load_mvar == pytest.approx(20.0 * vm2 ** 2, abs=1e-8)
    # the load drawn is |V|^2 conj(1/Z_load)
    s_load = abs(v_exact) ** 2 * np.conj(1.0 / z_load) * 100.0
    assert complex(b.p_load_mw, b.q_load_mvar) == pytest.approx(s_load, abs=1e-8)
    assert vm2 < 0.99                             # the case is not trivially at 1 pu
    flowcheck.check(res, flowcheck.from_network(net))


def test_constant_current_load_closed_form(flowcheck):
    # S = S0 |V|: the current has fixed magnitude |S0| and fixed angle relative to V, so
    # V e^{j0} = 1 - Z conj(S0) e^{j theta}  =>  | |V| + Z conj(S0) | = 1
    s0 = 0.5 + 0.2j
    zl = 0.02 + 0.1j
    net = two_bus(load=(50.0, 20.0), r=0.02, x=0.1, shares={"p_share_i": 1.0, "q_share_i": 1.0})
    res = solve_flow(net)
    assert res.converged
    w = zl * np.conj(s0)
    vm_exact = -w.real + math.sqrt(1.0 - w.imag ** 2)
    theta_exact = -np.angle(vm_exact + w)
    b = res.buses.set_index("bus").loc[2]
    assert b.v_pu == pytest.approx(vm_exact, abs=1e-10)
    assert math.radians(b.angle_deg) == pytest.approx(theta_exact, abs=1e-10)
    assert b.p_load_mw == pytest.approx(50.0 * vm_exact, abs=1e-8)
    assert b.q_load_mvar == pytest.approx(20.0 * vm_exact, abs=1e-8)
    flowcheck.check(res, flowcheck.from_network(net))


def test_constant_power_two_bus_closed_form(flowcheck):
    net = two_bus(load=(40.0, 30.0), r=0.02, x=0.1)
    res = solve_flow(net)
    assert res.converged
    assert res.buses.set_index("bus").loc[2, "v_pu"] == pytest.approx(
        pq_voltage(1.0, 0.02, 0.1, 0.4, 0.3), abs=1e-10)
    flowcheck.check(res, flowcheck.from_network(net))


# --- reactive limits ---------------------------------------------------------------------------

R2, X2 = 0.02, 0.1
LOAD2 = (40.0, 50.0)          # MW, Mvar at bus 2


def gen_at_2(q_max, q_min=-9999.0, v_set=1.0):
    return [{"gen_id": "G2", "bus": 2, "mw": 0.0, "v_set_pu": v_set, "q_min_mvar": q_min,
             "q_max_mvar": q_max}]


def test_pv_bus_over_its_maximum_becomes_pq_at_the_limit(flowcheck):
    net = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gen_at_2(q_max=20.0))
    res = solve_flow(net)
    assert res.converged and res.limited_buses == [2]
    b = res.buses.set_index("bus").loc[2]
    assert b.kind == "PQ" and b.q_gen_mvar == pytest.approx(20.0, abs=1e-9)
    assert res.generators.set_index("gen_id").loc["G2", "at_limit"] == "max"
    assert res.generators.set_index("gen_id").loc["G2", "mvar"] == pytest.approx(20.0, abs=1e-9)
    # closed form: constant-power load 40 + j(50 - 20) behind R + jX
    v_exact = pq_voltage(1.0, R2, X2, 0.4, 0.3)
    assert b.v_pu == pytest.approx(v_exact, abs=1e-10) and b.v_pu < 1.0
    flowcheck.check(res, flowcheck.from_network(net))


def needed_q_to_hold(v_set, v1=1.0, r=R2, x=X2, p=0.4, q=0.5):
    """Bisection on Q_gen: the reactive generation at bus 2 that puts the PQ voltage at v_set."""
    lo, hi = -2.0, q + 2.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if pq_voltage(v1, r, x, p, q - mid) < v_set:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def test_pv_bus_within_its_range_stays_pv(flowcheck):
    q_need = needed_q_to_hold(1.0) * 100.0
    assert 20.0 < q_need < 80.0                   # the limit cases below bracket it
    net = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gen_at_2(q_max=80.0))
    res = solve_flow(net)
    assert res.converged and res.limited_buses == []
    b = res.buses.set_index("bus").loc[2]
    assert b.kind == "PV" and b.v_pu == pytest.approx(1.0, abs=1e-12)
    assert b.q_gen_mvar == pytest.approx(q_need, abs=1e-6)
    assert res.generators.set_index("gen_id").loc["G2", "at_limit"] == ""
    flowcheck.check(res, flowcheck.from_network(net))


def test_limits_off_keeps_the_setpoint(flowcheck):
    net = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gen_at_2(q_max=20.0))
    res = solve_flow(net, enforce_q_limits=False)
    assert res.converged and res.limited_buses == []
    b = res.buses.set_index("bus").loc[2]
    assert b.kind == "PV" and b.v_pu == pytest.approx(1.0, abs=1e-12)
    assert b.q_gen_mvar == pytest.approx(needed_q_to_hold(1.0) * 100.0, abs=1e-6)
    assert b.q_gen_mvar > 20.0
    flowcheck.check(res, flowcheck.from_network(net), limits=False)


def test_pv_bus_under_its_minimum_becomes_pq_at_the_minimum(flowcheck):
    # a light load with a setpoint below the source voltage: the generator must absorb
    net = two_bus(load=(10.0, 0.0), r=R2, x=X2, kind2="PV", v1=1.05,
                  gen2=gen_at_2(q_max=50.0, q_min=-5.0, v_set=1.0))
    res = solve_flow(net)
    assert res.converged and res.limited_buses == [2]
    b = res.buses.set_index("bus").loc[2]
    assert b.q_gen_mvar == pytest.approx(-5.0, abs=1e-9)
    assert b.v_pu == pytest.approx(pq_voltage(1.05, R2, X2, 0.1, 0.05), abs=1e-10)
    assert b.v_pu > 1.0
    assert res.generators.set_index("gen_id").loc["G2", "at_limit"] == "min"
    flowcheck.check(res, flowcheck.from_network(net))


def test_warm_start_from_limited_state_returns_to_pv(flowcheck):
    heavy = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gen_at_2(q_max=20.0))
    first = solve_flow(heavy)
    assert first.limited_buses == [2]
    light = two_bus(load=(40.0, 10.0), r=R2, x=X2, kind2="PV", gen2=gen_at_2(q_max=20.0))
    # at 20 Mvar the lighter load would lift bus 2 above its setpoint, so it must go back to PV
    assert pq_voltage(1.0, R2, X2, 0.4, 0.1 - 0.2) > 1.0
    res = solve_flow(light, start=first)
    assert res.converged and res.limited_buses == []
    b = res.buses.set_index("bus").loc[2]
    assert b.kind == "PV" and b.v_pu == pytest.approx(1.0, abs=1e-12)
    assert b.q_gen_mvar == pytest.approx(needed_q_to_hold(1.0, q=0.1) * 100.0, abs=1e-6)
    assert b.q_gen_mvar < 20.0
    flowcheck.check(res, flowcheck.from_network(light))


def test_warm_start_keeps_a_limit_that_still_binds(flowcheck):
    heavy = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gen_at_2(q_max=20.0))
    first = solve_flow(heavy)
    res = solve_flow(heavy, start=first)
    assert res.converged and res.limited_buses == [2] and res.iterations <= 1
    flowcheck.check(res, flowcheck.from_network(heavy))


# --- several generators, out-of-service elements ----------------------------------------------

def test_several_generators_share_q_in_proportion_to_their_ranges(flowcheck):
    gens = [{"gen_id": "A", "bus": 2, "mw": 10.0, "v_set_pu": 1.0, "q_min_mvar": -10.0, "q_max_mvar": 60.0},
            {"gen_id": "B", "bus": 2, "mw": 5.0, "v_set_pu": 1.0, "q_min_mvar": -10.0, "q_max_mvar": 20.0},
            {"gen_id": "C", "bus": 2, "mw": 7.0, "v_set_pu": 1.0, "q_min_mvar": 0.0, "q_max_mvar": 0.0,
             "energised": False}]
    net = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gens)
    res = solve_flow(net)
    assert res.converged and res.limited_buses == []
    q_bus = res.buses.set_index("bus").loc[2, "q_gen_mvar"]
    g = res.generators.set_index("gen_id")
    assert "C" not in g.index
    # result.py generator_table: Q_g = Qmin_g + (Q_bus - Qmin_bus) * range_g / range_bus
    assert 40.0 < q_bus < 80.0                   # both generators produce, neither at a limit
    assert g.loc["A", "mvar"] == pytest.approx(-10.0 + (q_bus + 20.0) * 70.0 / 100.0, abs=1e-9)
    assert g.loc["B", "mvar"] == pytest.approx(-10.0 + (q_bus + 20.0) * 30.0 / 100.0, abs=1e-9)
    assert g.loc[["A", "B"], "mvar"].sum() == pytest.approx(q_bus, abs=1e-9)
    assert list(g.at_limit) == ["", "", ""]
    assert g.loc["A", "mw"] == 10.0 and g.loc["B", "mw"] == 5.0
    assert res.buses.set_index("bus").loc[2, "p_gen_mw"] == pytest.approx(15.0, abs=1e-12)
    flowcheck.check(res, flowcheck.from_network(net))


def test_several_generators_at_the_summed_limit_each_at_its_own_limit(flowcheck):
    gens = [{"gen_id": "A", "bus": 2, "mw": 0.0, "v_set_pu": 1.0, "q_min_mvar": -10.0, "q_max_mvar": 12.0},
            {"gen_id": "B", "bus": 2, "mw": 0.0, "v_set_pu": 1.0, "q_min_mvar": -4.0, "q_max_mvar": 8.0}]
    net = two_bus(load=LOAD2, r=R2, x=X2, kind2="PV", gen2=gens)
    res = solve_flow(net)
    assert res.limited_buses == [2]
    g = res.generators.set_index("gen_id")
    assert g.loc["A", "mvar"] == pytest.approx(12.0, abs=1e-9)
    assert g.loc["B", "mvar"] == pytest.approx(8.0, abs=1e-9)
    assert list(g.loc[["A", "B"], "at_limit"]) == ["max", "max"] and g.loc["G1", "at_limit"] == ""
    assert res.buses.set_index("bus").loc[2, "v_pu"] == pytest.approx(
        pq_voltage(1.0, R2, X2, 0.4, 0.3), abs=1e-10)
    flowcheck.check(res, flowcheck.from_network(net))


def triangle(**line_service) -> Network:
    buses = make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
                                 {"bus": 2, "base_kv": 110.0, "kind": "PV"},
                                 {"bus": 3, "base_kv": 110.0, "kind": "PQ"}])
    lines = make_table("lines", [
        {"line_id": "L12", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.08, "b_pu": 0.02},
        {"line_id": "L13", "from_bus": 1, "to_bus": 3, "r_pu": 0.02, "x_pu": 0.10, "b_pu": 0.02},
        {"line_id": "L23", "from_bus": 2, "to_bus": 3, "r_pu": 0.015, "x_pu": 0.09, "b_pu": 0.02,
         "energised": line_service.get("L23", True)}])
    gens = make_table("generators", [
        {"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.02},
        {"gen_id": "G2", "bus": 2, "mw": 40.0, "v_set_pu": 1.01, "energised": line_service.get("G2", True)}])
    loads = make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 20.0, "mvar": 10.0},
                                 {"load_id": "D3", "bus": 3, "mw": 60.0, "mvar": 25.0}])
    return Network(buses=buses, lines=lines, generators=gens, loads=loads)


def test_out_of_service_line_is_left_out(flowcheck):
    net = triangle(L23=False)
    res = solve_flow(net)
    assert res.converged
    assert list(res.branches.branch_id) == ["L12", "L13"]
    # the same network with the line deleted gives the same solution
    cut = net.copy()
    cut.lines = cut.lines[cut.lines.line_id != "L23"].reset_index(drop=True)
    ref = solve_flow(cut)
    np.testing.assert_allclose(res.v, ref.v, atol=1e-12)
    full = solve_flow(triangle())
    assert abs(full.buses.v_pu[2] - res.buses.v_pu[2]) > 1e-3   # the line mattered
    flowcheck.check(res, flowcheck.from_network(net))


def test_pv_bus_whose_only_generator_is_out_solves_as_pq(flowcheck):
    net = triangle(G2=False)
    res = solve_flow(net)
    assert res.converged
    b = res.buses.set_index("bus").loc[2]
    assert b.kind == "PQ" and b.p_gen_mw == 0.0 and b.q_gen_mvar == 0.0
    assert abs(b.v_pu - 1.01) > 1e-3
    assert list(res.generators.gen_id) == ["G1"]
    # generator out = no generator at all
    gone = net.copy()
    gone.generators = gone.generators[gone.generators.gen_id != "G2"].reset_index(drop=True)
    np.testing.assert_allclose(res.v, solve_flow(gone).v, atol=1e-12)
    flowcheck.check(res, flowcheck.from_network(net))


def test_network_is_not_modified_by_a_solve(net14):
    before = {k: net14.table(k).copy() for k in ("buses", "generators", "loads", "lines", "transformers")}
    solve_flow(net14)
    for k, t in before.items():
        pd.testing.assert_frame_equal(net14.table(k), t)


# --- failure ---------------------------------------------------------------------------------

def test_heavily_overloaded_case_fails_cleanly(net14):
    over = net14.copy()
    over.loads["mw"] *= 20.0
    over.loads["mvar"] *= 20.0
    res = solve_flow(over)
    assert res.converged is False and res.status != 0
    assert res.message and not res.message.startswith("converged in")
    assert any(w in res.message for w in ("no convergence", "diverged", "singular", "low-voltage"))
    assert res.worst_bus in set(over.buses.bus) and res.worst_mismatch_mva > 1e-3
    assert len(res.mismatch_history) > 0 and res.mismatch_history[-1] > 1e-3
    assert "worst bus" in res.summary()


# --- starts ---------------------------------------------------------------------------------------

def test_warm_start_from_a_solution(net14, net30, flowcheck):
    for net, raw in ((net14, raw_cases.ieee14()), (net30, raw_cases.ieee30())):
        first = solve_flow(net)
        again = solve_flow(net, start=first)
        assert again.converged and again.iterations <= 1
        assert again.limited_buses == first.limited_buses
        np.testing.assert_allclose(again.v, first.v, atol=1e-8)
        flowcheck.check(again, flowcheck.from_raw(raw))


def test_dc_start_converges(net14, net30, flowcheck):
    for net, raw in ((net14, raw_cases.ieee14()), (net30, raw_cases.ieee30())):
        flat = solve_flow(net)
        res = solve_flow(net, start="dc")
        assert res.converged and res.iterations <= flat.iterations
        np.testing.assert_allclose(res.v, flat.v, atol=1e-8)
        flowcheck.check(res, flowcheck.from_raw(raw))
