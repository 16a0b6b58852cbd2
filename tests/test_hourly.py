"""Hourly verification: exact annual energy against independent load flows, control rules,
profile reading and load-duration clustering.

Reference for the energy: one separate load flow (planner.flow.newton.solve_flow, its own
compile of a scaled copy of the network) per interval, losses x duration summed here.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.errors import InputError
from planner.flow.newton import solve_flow
from planner.hourly.cluster import cluster_levels
from planner.hourly.profile import profile_from_factors, read_profile
from planner.hourly.verify import BankControl, HourlyStatus, VoltageRule, verify_hours, verify_profile
from planner.network.compile import compile_network
from planner.network.io import read_network

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def demo():
    return read_network(ROOT / "models" / "wrenfold")


def _scaled(net, factor, area_factor=None):
    out = net.copy()
    f = np.full(len(out.loads), float(factor))
    if area_factor:
        area = out.loads.bus.map(dict(zip(out.buses.bus, out.buses.area)))
        for a, x in area_factor.items():
            f[(area == a).to_numpy()] = x
    out.loads["mw"] *= f
    out.loads["mvar"] *= f
    return out


def test_energy_equals_sum_of_independent_flows(demo):
    rng = np.random.default_rng(7)
    factors = 0.4 + 0.6 * rng.random(12)
    dur = rng.integers(1, 5, 12).astype(float)
    res = verify_profile(demo, profile_from_factors(factors, dur))
    ref = sum(solve_flow(_scaled(demo, f), build_tables=False).losses_mw * d for f, d in zip(factors, dur))
    assert res.success and res.status is not HourlyStatus.FAILED_INTERVALS
    assert res.energy_loss_mwh == pytest.approx(ref, rel=1e-7)
    lows = [solve_flow(_scaled(demo, f), build_tables=False).vm.min() for f in factors]
    assert res.lowest["v_pu"] == pytest.approx(min(lows), abs=1e-9)
    assert res.lowest["when"] == f"hour {np.concatenate([[0], np.cumsum(dur)])[int(np.argmin(lows))]:g}"


def test_level_estimate_beside_exact(demo):
    factors = np.array([1.0, 0.98, 0.7, 0.72, 0.45, 0.47, 0.46])
    prof = profile_from_factors(factors)
    lv = cluster_levels(prof, 3)
    res = verify_profile(demo, prof, levels=lv)
    est = sum(solve_flow(_scaled(demo, row.network), build_tables=False).losses_mw * row.hours
              for row in lv.table.itertuples())
    assert res.level_estimate_mwh == pytest.approx(est, rel=1e-7)
    exact = sum(solve_flow(_scaled(demo, f), build_tables=False).losses_mw for f in factors)
    assert res.energy_loss_mwh == pytest.approx(exact, rel=1e-7)
    # losses grow faster than load, so averaging load within a level underestimates energy
    assert res.level_estimate_mwh < res.energy_loss_mwh


def test_schedule_rule_maps_level_steps_and_counts_operations(demo):
    c0 = compile_network(demo)
    bus = 302                                   # C-ORRINSGATE-SW, 1.2 Mvar steps, 1 on in the file
    k = c0.index_of([bus])[0]
    cases = []
    for steps in (3, 1):                       # level 0: 3 steps, level 1: 1 step (as in the file)
        ysh = c0.ysh.copy()
        ysh[k] += 1j * (steps - 1) * 1.2 / c0.base_mva
        from planner.network.compile import replace
        cases.append(replace(c0, ysh=ysh))
    level_of = np.array([0, 0, 1, 1, 0, 1])
    f = np.array([1.0, 0.9, 0.5, 0.5, 1.0, 0.6])
    bank = BankControl("C-ORRINSGATE-SW", bus, 1.2, 3, (3, 1))
    res = verify_hours(cases, np.repeat(f[:, None], c0.n, axis=1), level_of, np.ones(6), band=(0.95, 1.05),
                       banks=[bank])
    assert res.intervals["steps C-ORRINSGATE-SW"].tolist() == [3, 3, 1, 1, 3, 1]
    assert res.banks.operations.tolist() == [6]          # 3->1, 1->3, 3->1: two steps each
    ref = 0.0
    for t in range(6):
        net = _scaled(demo, f[t])
        net.shunts.loc[net.shunts.shunt_id == "C-ORRINSGATE-SW", "steps_on"] = 3 if level_of[t] == 0 else 1
        ref += solve_flow(net, build_tables=False).losses_mw
    assert res.energy_loss_mwh == pytest.approx(ref, rel=1e-7)


def test_voltage_rule_delay(demo):
    # hold the bank bus low for three hours: with a two-hour delay one step goes in after hour 2
    rule = VoltageRule(v_on_pu=1.2, v_off_pu=1.3, delay_h=2)    # always "low": steps rise every 2 h
    res = verify_profile(_scaled(demo, 1.0), profile_from_factors(np.ones(7)), rule=rule)
    assert res.intervals["steps C-ORRINSGATE-SW"].tolist() == [1, 1, 2, 2, 3, 3, 3]
    assert res.banks.operations.tolist() == [2]
    with pytest.raises(ValueError, match="must be below"):
        VoltageRule(v_on_pu=1.0, v_off_pu=0.99)


def test_area_columns_and_bus_factors(demo, tmp_path):
    p = tmp_path / "prof.csv"
    p.write_text("hour,when,network,area_2\n0,Jan 1 00:00,0.5,0.9\n1,Jan 1 01:00,0.6,0.8\n")
    prof = read_profile(p)
    areas = demo.buses.area.to_numpy()
    f = prof.bus_factors(demo.buses.bus, areas)
    assert f.shape == (2, len(demo.buses))
    assert set(np.unique(f[0])) <= {0.5, 0.9}
    if (areas == 2).any():
        assert (f[0][areas == 2] == 0.9).all()
    res = verify_profile(demo, prof)
    ref = sum(solve_flow(_scaled(demo, a, {2: b}), build_tables=False).losses_mw for a, b in ((0.5, 0.9), (0.6, 0.8)))
    assert res.energy_loss_mwh == pytest.approx(ref, rel=1e-7)
    assert res.intervals.when.tolist() == ["Jan 1 00:00", "Jan 1 01:00"]


@pytest.mark.parametrize("text, where", [
    ("hour,network\n0,0.5\n0.5,0.6\n", "prof.csv:3: hour: interval starts at hour 0.5"),
    ("hour,network\n0,-1\n", "prof.csv:2: network: must be at least 0"),
    ("hour,duration_h,network\n0,0,1\n", "prof.csv:2: duration_h: must be above 0"),
    ("hour,network\n0,1,2\n", "prof.csv:2: 3 fields, the header has 2"),
    ("network\n1\n", "prof.csv:1: missing column 'hour'"),
    ("hour,network\n8784,1\n", "prof.csv:2: hour: interval ends after hour 8784"),
    ("hour,network,network\n0,1,1\n", "prof.csv:1: column 'network' given twice"),
    ("hour,network\n0,nan\n", "prof.csv:2: network: must be finite"),
])
def test_profile_errors_name_file_line_field(tmp_path, text, where):
    p = tmp_path / "prof.csv"
    p.write_text(text)
    with pytest.raises(InputError) as err:
        read_profile(p)
    msg = str(err.value)
    assert "\n" not in msg and msg.endswith(msg.split(str(tmp_path))[-1])
    assert where in msg
    assert p.read_text() == text                         # input never modified


def test_unknown_group_column(demo, tmp_path):
    p = tmp_path / "prof.csv"
    p.write_text("hour,north\n0,1\n")
    with pytest.raises(InputError, match="column 'north' is neither"):
        read_profile(p).bus_factors(demo.buses.bus, demo.buses.area)
    f = read_profile(p).bus_factors([1, 2], [1, 1], groups={"north": [1, 2]})
    assert f.tolist() == [[1.0, 1.0]]


def test_cluster_levels_weighted_and_reproducible():
    rng = np.random.default_rng(3)
    x = np.concatenate([rng.normal(1.0, 0.02, 50), rng.normal(0.6, 0.02, 200), rng.normal(0.3, 0.02, 100)])
    prof = profile_from_factors(x, duration_h=2.0)
    a, b = cluster_levels(prof, 3), cluster_levels(prof, 3)
    assert a.table.equals(b.table)
    assert a.table.hours.tolist() == [100.0, 400.0, 200.0]
    assert a.table.network.tolist() == pytest.approx([x[:50].mean(), x[50:250].mean(), x[250:].mean()])


def test_blocks_of_hours_equal_one_newton_solve_per_hour(demo, monkeypatch):
    # Reference: the per-interval path (one warm-started Newton-Raphson solve with reactive-limit
    # enforcement per hour, planner.hourly.verify._span) and, for a few hours, the load flow's own
    # solve_flow on a scaled copy of the network. The block (chord) path must agree to the solve
    # tolerance: energy, every hour's losses and extreme voltages, hours outside the band.
    import planner.hourly.verify as hv
    from planner.sweep.repeated import RepeatedFlow
    rng = np.random.default_rng(11)
    T = 300
    factors = np.clip(0.3 + 0.75 * rng.random(T), 0.3, 1.05)      # light load to peak
    prof = profile_from_factors(factors)
    seen = []
    real = hv.solve_block

    def spy(*a, **k):
        blk = real(*a, **k)
        seen.append((int(blk.accepted.sum()), int((~blk.accepted).sum())))
        return blk
    monkeypatch.setattr(hv, "solve_block", spy)
    res = verify_profile(demo, prof, band=(0.95, 1.05))
    accepted, handed_back = map(sum, zip(*seen))
    # both paths run: G-TALLOWMERE sits at its Mvar limit at peak and leaves it at light load
    assert accepted > T // 2 and handed_back > 0
    c = compile_network(demo)
    f = prof.bus_factors(c.bus_ids, demo.buses.set_index("bus").loc[c.bus_ids, "area"].to_numpy())
    rfs = [RepeatedFlow(c)]
    lo, hi = np.full(c.n, 0.95), np.full(c.n, 1.05)
    ref = hv._span(rfs, f, np.zeros(T, np.int64), [], np.zeros((T, 0), np.int64), lo, hi, 0, T,
                   rfs[0].solve(load_scale=f[0]))
    iv = res.intervals
    # both stop at a largest bus mismatch of 1e-8 pu (1 W on the 100 MVA base): the answers may
    # differ by about that at each of the 50 buses, never by a visible amount
    assert np.abs(iv.losses_mw.to_numpy() - ref["losses_mw"]).max() < 5e-6          # MW
    assert np.abs(iv.v_min_pu.to_numpy() - ref["v_min_pu"]).max() < 5e-8
    assert np.abs(iv.v_max_pu.to_numpy() - ref["v_max_pu"]).max() < 5e-8
    assert res.energy_loss_mwh == pytest.approx(float(ref["losses_mw"].sum()), rel=1e-8)
    assert iv.outside_band.to_numpy().tolist() == ref["_outside"].tolist()
    assert 0 < res.hours_outside_band < T
    for t in (0, 57, 123, 299):
        flow = solve_flow(_scaled(demo, factors[t]), build_tables=False)
        assert iv.losses_mw[t] == pytest.approx(flow.losses_mw, abs=5e-6)
        assert iv.v_min_pu[t] == pytest.approx(flow.vm.min(), abs=5e-8)


def test_one_pass_and_any_chunking_give_identical_tables(demo):
    # every interval's answer depends only on the profile: bins are solved whole, whatever the split
    rng = np.random.default_rng(3)
    prof = profile_from_factors(np.clip(0.3 + 0.75 * rng.random(200), 0.3, 1.05))
    one = verify_profile(demo, prof)
    for size in (1, 37, 5000):
        other = verify_profile(demo, prof, where="serial", chunk_size=size)
        assert other.intervals.equals(one.intervals)


def test_sparse_chord_factorisation_of_large_networks_gives_the_same_hours(demo, monkeypatch):
    # networks above DENSE_UP_TO unknowns factorise the reference Jacobian as a sparse LU;
    # forced here on the demo network, the hours agree with the dense path to the solve tolerance
    import planner.hourly.batch as hb
    rng = np.random.default_rng(5)
    prof = profile_from_factors(np.clip(0.3 + 0.75 * rng.random(60), 0.3, 1.05))
    dense = verify_profile(demo, prof)
    monkeypatch.setattr(hb, "DENSE_UP_TO", 0)
    import planner.hourly.verify as hv
    accepted, real = [], hv.solve_block
    monkeypatch.setattr(hv, "solve_block", lambda *a, **k: accepted.append(real(*a, **k)) or accepted[-1])
    sparse = verify_profile(demo, prof)
    assert sum(int(b.accepted.sum()) for b in accepted) > 40          # the chord steps did the work
    assert np.abs(sparse.intervals.losses_mw - dense.intervals.losses_mw).max() < 5e-6
    assert np.abs(sparse.intervals.v_min_pu - dense.intervals.v_min_pu).max() < 5e-8
    assert sparse.hours_outside_band == dense.hours_outside_band
