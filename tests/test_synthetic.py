"""Synthetic network generators and the demo network."""
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from planner.network.cdf import read_cdf
from planner.network.synthetic import meshed_grid, tiled_network

DATA = Path(__file__).parent / "data"
DEMO = Path(__file__).parent.parent / "models" / "wrenfold"

try:
    from planner.flow.newton import solve_flow
except ImportError:  # pragma: no cover - only while the solver is being written
    solve_flow = None
needs_solver = pytest.mark.skipif(solve_flow is None, reason="planner.flow.newton not available")


def n_components(net):
    """Connected components of the in-service branch graph, counting isolated buses."""
    ids = net.buses.bus.to_numpy()
    pos = pd.Index(ids)
    br = pd.concat([net.lines[net.lines.energised][["from_bus", "to_bus"]],
                    net.transformers[net.transformers.energised][["from_bus", "to_bus"]]])
    f = pos.get_indexer(br.from_bus)
    t = pos.get_indexer(br.to_bus)
    assert (f >= 0).all() and (t >= 0).all(), "branch to an unknown bus"
    g = sp.coo_matrix((np.ones(len(f)), (f, t)), shape=(len(ids), len(ids)))
    return connected_components(g, directed=False)[0]


def check_wellformed(net):
    b = net.buses
    assert b.bus.is_unique
    for kind, col in [("loads", "load_id"), ("generators", "gen_id"), ("lines", "line_id"),
                      ("transformers", "xfmr_id"), ("shunts", "shunt_id")]:
        assert net.table(kind)[col].is_unique, kind
    assert int((b.kind == "slack").sum()) == 1
    assert n_components(net) == 1
    # every PV or slack bus has an in-service plant
    ctrl = set(b.bus[b.kind != "PQ"])
    assert ctrl <= set(net.generators.bus[net.generators.energised])
    assert (net.lines.x_pu > 0).all() and (net.lines.r_pu >= 0).all()


@pytest.fixture(scope="module")
def ieee30():
    return read_cdf(DATA / "ieee30cdf.txt")


# --- meshed_grid ------------------------------------------------------------------------

def test_meshed_grid_size_and_structure():
    net = meshed_grid(12, 15, seed=3)
    assert len(net.buses) == 180
    assert sorted(net.buses.bus) == list(range(1, 181))
    check_wellformed(net)
    # a mesh, not a tree: at least 1.5 branches per bus (lattice has ~2)
    assert 1.5 * 180 <= len(net.lines) <= 2.1 * 180
    # plants spread over the grid: one per 9-25 buses, in every quarter of it
    g = net.generators
    assert 180 / 25 <= len(g) <= 180 / 9
    rc = (g.bus.to_numpy() - 1)
    quarters = set(zip(rc // 15 >= 6, rc % 15 >= 7))
    assert len(quarters) == 4
    # impedances of 15-64 km of 132 kV line (0.06-0.10 + j0.38-0.42 ohm/km)
    zb = 132.0 ** 2 / 100.0
    assert net.lines.x_pu.min() >= 15 * 0.38 / zb - 1e-9
    assert net.lines.x_pu.max() <= 45 * 1.4143 * 0.42 / zb + 1e-9
    # dispatch covers load and a margin for losses
    assert net.loads.mw.sum() < g.mw.sum() < 1.03 * net.loads.mw.sum()
    assert (g.q_max_mvar > 0).all() and (g.q_min_mvar < 0).all()
    pf = net.loads.mw / np.hypot(net.loads.mw, net.loads.mvar)
    assert pf.between(0.899, 0.971).all()


def test_meshed_grid_reproducible():
    a, b, c = meshed_grid(8, 9, seed=5), meshed_grid(8, 9, seed=5), meshed_grid(8, 9, seed=6)
    for kind in ("buses", "loads", "generators", "lines"):
        pd.testing.assert_frame_equal(a.table(kind), b.table(kind))
    assert not a.lines.equals(c.lines)


def test_meshed_grid_rejects_tiny():
    with pytest.raises(ValueError, match="at least two buses"):
        meshed_grid(1, 1)


# --- tiled_network ----------------------------------------------------------------------

def test_tiled_numbering_ties_and_slack(ieee30):
    big = tiled_network(ieee30, 7, ties_per_copy=3, seed=2)
    assert len(big.buses) == 7 * 30
    assert len(big.loads) == 7 * len(ieee30.loads)
    assert len(big.transformers) == 7 * len(ieee30.transformers)
    check_wellformed(big)
    # offset is 100 (the power of ten above bus 30): copy k holds buses k*100 + 1 .. k*100 + 30
    expect = sorted(k * 100 + b for k in range(7) for b in ieee30.buses.bus)
    assert sorted(big.buses.bus) == expect
    # copy 0 keeps the slack; the other copies' slack bus 1 is PV
    kinds = big.buses.set_index("bus").kind
    assert kinds[1] == "slack"
    assert all(kinds[k * 100 + 1] == "PV" for k in range(1, 7))
    # ties: 3 per copy after the first, between 132 kV buses of different, neighbouring copies
    ties = big.lines[big.lines.line_id.str.startswith("TIE")]
    assert len(ties) == 6 * 3
    assert len(big.lines) == 7 * len(ieee30.lines) + 18
    kf, kt = ties.from_bus // 100, ties.to_bus // 100
    assert (kf != kt).all()
    width = 3  # ceil(sqrt(7))
    d = (kf - kt).abs()
    assert d.isin([1, width]).all()
    kv = big.buses.set_index("bus").base_kv
    assert (kv[ties.from_bus].to_numpy() == 132.0).all() and (kv[ties.to_bus].to_numpy() == 132.0).all()
    # the base network is untouched
    assert len(ieee30.buses) == 30 and int((ieee30.buses.kind == "slack").sum()) == 1


def test_tiled_reproducible(ieee30):
    a = tiled_network(ieee30, 5, seed=1)
    b = tiled_network(ieee30, 5, seed=1)
    c = tiled_network(ieee30, 5, seed=9)
    pd.testing.assert_frame_equal(a.lines, b.lines)
    assert not a.lines.equals(c.lines)


def test_tiled_reaches_ten_thousand_buses(ieee30):
    big = tiled_network(ieee30, 340)
    assert len(big.buses) == 10_200
    assert int(big.buses.bus.max()) == 339 * 100 + 30
    check_wellformed(big)


def test_tiled_demo_base_offset():
    from planner.network.tabular import read_tables
    demo = read_tables(DEMO)
    big = tiled_network(demo, 3)
    # largest demo bus id is 452, so the offset is 1000
    assert sorted(big.buses.bus)[-1] == 2452
    check_wellformed(big)
    # converted slack plant schedules at least its copy's load less the other plants
    g = big.generators.set_index("gen_id")
    need = demo.loads.mw.sum() - demo.generators.mw[demo.buses.set_index("bus").kind[demo.generators.bus].to_numpy() != "slack"].sum()
    assert g.loc["G-WRENFOLD/2", "mw"] >= need


def test_tiled_rejects_bad_input(ieee30):
    with pytest.raises(ValueError, match="copies"):
        tiled_network(ieee30, 0)
    two = ieee30.copy()
    two.buses.loc[two.buses.bus == 2, "kind"] = "slack"
    with pytest.raises(ValueError, match="exactly one slack"):
        tiled_network(two, 3)


# --- load flow on the generated cases ---------------------------------------------------

@needs_solver
def test_meshed_grid_thousand_buses_solves():
    net = meshed_grid(32, 32, seed=0)
    res = solve_flow(net)
    assert res.converged, res.message
    assert res.iterations <= 10
    v = res.buses.v_pu
    assert v.between(0.9, 1.1).all()
    # losses of a 132 kV mesh: a small positive share of the load
    load = net.loads.mw.sum()
    assert 0.005 * load < res.losses_mw < 0.05 * load


@needs_solver
def test_tiled_ieee30_thousand_buses_solves(ieee30):
    net = tiled_network(ieee30, 34, seed=0)
    assert len(net.buses) == 1020
    res = solve_flow(net)
    assert res.converged, res.message
    assert res.buses.v_pu.between(0.9, 1.1).all()
    base = solve_flow(ieee30)
    # copies are balanced: losses grow roughly with the number of copies
    assert 0.7 * 34 * base.losses_mw < res.losses_mw < 1.3 * 34 * base.losses_mw


@needs_solver
def test_demo_network_peak_case():
    """The demo's peak case has the low voltages it is documented to have (models/README.md)."""
    from planner.network.tabular import read_tables
    net = read_tables(DEMO)
    assert len(net.buses) == 50 and net.base_mva == 100.0
    check_wellformed(net)
    res = solve_flow(net, start="flat")
    assert res.converged, res.message
    b = res.buses.set_index("bus")
    low = b[b.v_pu < 0.95]
    assert 8 <= len(low) <= 25
    assert set(b.loc[low.index].index // 100) >= {2, 3, 4}  # 33 kV and 11 kV buses among them
    assert b.v_pu.min() > 0.88
    assert b.v_pu.idxmin() == 443
    assert (b.loc[[101, 102, 103, 104, 105, 106, 107, 108], "v_pu"].between(0.97, 1.06)).all()
    load = res.buses.p_load_mw.sum()
    assert 0.02 * load < res.losses_mw < 0.06 * load
    # the small plant is held at its reactive maximum
    assert res.limited_buses == [106]
