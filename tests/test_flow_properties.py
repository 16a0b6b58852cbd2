"""Property tests of the load flow on random connected networks.

Networks: a random tree plus extra chords, 3 to 30 buses, realistic impedances (R 0.002-0.05 pu,
X/R 1-10), line charging, off-nominal and phase-shifting transformers on tree branches, ZIP
loads, bus shunts and capacitor banks, one slack, some PV buses (some with two generators),
loading scaled to a moderate level (estimated voltage drop along the tree about 0.1 pu).

Properties: the solve converges and the solution satisfies the network equations as
recomputed independently with a dense Ybus (``flowcheck`` in conftest.py); renumbering the
buses and reordering every table leaves the solution unchanged.
"""
from __future__ import annotations

import random

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from planner.flow.newton import solve_flow
from planner.network.model import Network, make_table

SETTINGS = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
BASE = 100.0
TARGET_DROP_PU = 0.1


@st.composite
def networks(draw):
    n = draw(st.integers(3, 30))
    parent = [draw(st.integers(0, i - 1)) for i in range(1, n)]
    n_chords = draw(st.integers(0, max(0, n // 3)))
    chords = []
    for _ in range(n_chords):
        i = draw(st.integers(0, n - 1))
        j = draw(st.integers(0, n - 1))
        if i != j:
            chords.append((i, j))

    def impedance():
        r = draw(st.floats(0.002, 0.05))
        x = max(r * draw(st.floats(1.0, 10.0)), 0.01)
        return r, x, draw(st.floats(0.0, 0.05))

    lines, xfmrs = [], []
    z_tree = np.zeros(n)                  # |z| of the tree branch feeding each bus
    for child, par in enumerate(parent, start=1):
        r, x, b = impedance()
        z_tree[child] = abs(complex(r, x))
        if draw(st.integers(0, 4)) == 0:
            # transformers only on tree branches: a ratio or shift in a loop would drive a
            # circulating flow that has nothing to do with what is being tested
            xfmrs.append({"xfmr_id": f"T{child}", "from_bus": par, "to_bus": child, "r_pu": r, "x_pu": x,
                          "b_pu": b / 10, "ratio_pu": draw(st.floats(0.95, 1.05)),
                          "tap_side": draw(st.sampled_from(["from", "to"])),
                          "shift_deg": draw(st.sampled_from([0.0, 0.0, 4.0, -2.5]))})
        else:
            lines.append({"line_id": f"L{child}", "from_bus": par, "to_bus": child, "r_pu": r, "x_pu": x,
                          "b_pu": b})
    for k, (i, j) in enumerate(chords):
        r, x, b = impedance()
        lines.append({"line_id": f"C{k}", "from_bus": i, "to_bus": j, "r_pu": r, "x_pu": x, "b_pu": b})

    buses, loads, gens, shunts = [], [], [], []
    for k in range(n):
        kind = "slack" if k == 0 else ("PV" if draw(st.integers(0, 4)) == 0 else "PQ")
        buses.append({"bus": k, "base_kv": 110.0, "kind": kind,
                      "shunt_draw_mw": draw(st.sampled_from([0.0, 0.0, 0.0, 2.0])),
                      "shunt_supply_mvar": draw(st.sampled_from([0.0, 0.0, 0.0, 10.0, -5.0])),
                      "angle_deg": draw(st.floats(-20.0, 20.0)) if k == 0 else 0.0})
        if k and draw(st.booleans()):
            p = draw(st.floats(0.0, 40.0))
            pi = draw(st.floats(0.0, 0.5))
            pz = draw(st.floats(0.0, 0.5))
            loads.append({"load_id": f"D{k}", "bus": k, "mw": p, "mvar": p * draw(st.floats(-0.2, 0.6)),
                          "p_share_i": pi, "p_share_z": pz, "q_share_i": pz, "q_share_z": pi})
        if kind != "PQ":
            v_set = draw(st.floats(0.98, 1.05))
            wide = kind == "slack" or draw(st.booleans())
            q_max = 9999.0 if wide else draw(st.floats(10.0, 100.0))
            q_min = -9999.0 if wide else -draw(st.floats(0.0, 50.0))
            p_gen = 0.0 if kind == "slack" else draw(st.floats(0.0, 50.0))
            gens.append({"gen_id": f"G{k}", "bus": k, "mw": p_gen, "v_set_pu": v_set,
                         "q_min_mvar": q_min, "q_max_mvar": q_max})
            if kind == "PV" and draw(st.integers(0, 3)) == 0:
                # a second unit on the same bus, same setpoint
                gens.append({"gen_id": f"G{k}b", "bus": k, "mw": draw(st.floats(0.0, 20.0)),
                             "v_set_pu": v_set, "q_min_mvar": -20.0, "q_max_mvar": 30.0})
        if k and draw(st.integers(0, 5)) == 0:
            shunts.append({"shunt_id": f"S{k}", "bus": k, "mvar_per_step": 3.0, "steps_max": 4,
                           "steps_on": draw(st.integers(0, 4))})

    # moderate loading: scale loads and generation so the estimated drop along the tree
    # (sum over tree branches of |z| x power carried, all of it assumed to flow one way) is small
    power = np.zeros(n)
    for d in loads:
        power[d["bus"]] += abs(complex(d["mw"], d["mvar"])) / BASE
    for g in gens:
        power[g["bus"]] += g["mw"] / BASE
    below = power.copy()
    for child in range(n - 1, 0, -1):      # parents have lower numbers: one backward sweep
        below[parent[child - 1]] += below[child]
    drop = float((z_tree * below)[1:].sum())
    scale = min(1.0, TARGET_DROP_PU / drop) if drop > 0 else 1.0
    for d in loads:
        d["mw"] *= scale
        d["mvar"] *= scale
    for g in gens:
        g["mw"] *= scale

    return Network(base_mva=BASE, name=f"random{n}",
                   buses=make_table("buses", buses), lines=make_table("lines", lines),
                   transformers=make_table("transformers", xfmrs), loads=make_table("loads", loads),
                   generators=make_table("generators", gens), shunts=make_table("shunts", shunts))


@SETTINGS
@given(net=networks())
def test_random_network_solves_and_balances(net, flowcheck):
    res = solve_flow(net)
    assert res.converged, res.message
    case = flowcheck.from_network(net)
    flowcheck.check(res, case)
    # the slack bus keeps its stored angle as the reference
    slack = net.buses[net.buses.kind == "slack"].iloc[0]
    b = res.buses.set_index("bus")
    assert b.loc[slack.bus, "angle_deg"] == pytest.approx(slack.angle_deg, abs=1e-9)
    # generators on one bus add up to the bus generation
    g = res.generators.groupby("bus")[["mw", "mvar"]].sum()
    np.testing.assert_allclose(g.mvar, b.loc[g.index, "q_gen_mvar"], atol=1e-9)
    np.testing.assert_allclose(g.mw, b.loc[g.index, "p_gen_mw"], atol=1e-9)


def renumbered(net: Network, new_ids, rng: random.Random) -> Network:
    """The same network with bus k renamed new_ids[k] and every table's rows shuffled."""
    out = net.copy()
    mapping = dict(zip(net.buses.bus.tolist(), new_ids))
    for kind, cols in (("buses", ["bus"]), ("loads", ["bus"]), ("generators", ["bus"]),
                       ("shunts", ["bus"]), ("lines", ["from_bus", "to_bus"]),
                       ("transformers", ["from_bus", "to_bus"])):
        t = out.table(kind)
        for c in cols:
            t[c] = t[c].map(mapping).astype("int64")
        order = list(range(len(t)))
        rng.shuffle(order)
        setattr(out, kind, t.iloc[order].reset_index(drop=True))
    return out


@SETTINGS
@given(net=networks(), data=st.data())
def test_renumbering_buses_leaves_the_solution_unchanged(net, data):
    n = len(net.buses)
    new_ids = data.draw(st.lists(st.integers(1, 99999), min_size=n, max_size=n, unique=True))
    rng = random.Random(data.draw(st.integers(0, 2 ** 32 - 1)))
    other = renumbered(net, new_ids, rng)
    a = solve_flow(net, tol_mva=1e-8)
    b = solve_flow(other, tol_mva=1e-8)
    assert a.converged and b.converged
    ta = a.buses.assign(bus=a.buses.bus.map(dict(zip(net.buses.bus, new_ids)))).set_index("bus")
    tb = b.buses.set_index("bus").loc[ta.index]
    np.testing.assert_allclose(tb.v_pu, ta.v_pu, atol=1e-9, rtol=0)
    np.testing.assert_allclose(tb.angle_deg, ta.angle_deg, atol=1e-9, rtol=0)
    assert b.losses_mw == pytest.approx(a.losses_mw, abs=1e-9)
    assert sorted(b.limited_buses) == sorted(dict(zip(net.buses.bus, new_ids))[k] for k in a.limited_buses)
    ga = a.generators.set_index("gen_id").sort_index()
    gb = b.generators.set_index("gen_id").loc[ga.index]
    np.testing.assert_allclose(gb.mvar, ga.mvar, atol=1e-7, rtol=0)
