"""Bank checks on hand-calculable cases.

A bank on an 11 kV bus fed through one known impedance from an ideal source:
S_sc = V^2 / |Z| (MVA with kV and ohms), step dV ~ Q/S_sc, h = sqrt(S_sc/Q) (common practice
formulas; the arithmetic is done by hand in the comments). The voltage step is also compared
with the change given by two AC load flows.
"""
from __future__ import annotations

import math

import pytest

from planner.bankcheck import BankCheckStatus, check_banks, short_circuit_mva
from planner.flow.newton import solve_flow
from planner.network.model import Network, make_table, ohm_to_pu


def feeder(x_ohm=0.605, r_ohm=0.0, x_source_pu=0.0, steps_on=0, load_mw=0.0):
    # 11 kV, 100 MVA base: Z_base = 1.21 ohm; 0.605 ohm = 0.5 pu -> S_sc = 11^2 / 0.605 = 200 MVA
    return Network(
        buses=make_table("buses", [{"bus": 1, "base_kv": 11.0, "kind": "slack"},
                                   {"bus": 2, "base_kv": 11.0, "kind": "PQ"}]),
        generators=make_table("generators", [{"gen_id": "SRC", "bus": 1, "mw": 0.0, "x_source_pu": x_source_pu}]),
        loads=make_table("loads", [{"load_id": "D", "bus": 2, "mw": load_mw, "mvar": 0.0}]),
        lines=make_table("lines", [{"line_id": "F", "from_bus": 1, "to_bus": 2,
                                    "r_pu": ohm_to_pu(r_ohm, 11.0, 100.0), "x_pu": ohm_to_pu(x_ohm, 11.0, 100.0)}]),
        shunts=make_table("shunts", [{"shunt_id": "CB", "bus": 2, "mvar_per_step": 2.0, "steps_max": 4,
                                      "steps_on": steps_on, "switchable": True}]))


def test_hand_calculated_strength_step_and_resonance():
    res = check_banks(feeder(), step_limit_pct=0.9)
    t = res.table
    assert t.s_sc_mva.tolist() == pytest.approx([200.0] * 4)          # 121 / 0.605
    assert t.z_th_ohm[0] == pytest.approx(0.605)
    assert t.step_pct.tolist() == pytest.approx([1.0] * 4)            # 2 / 200
    assert t.step_flag.all()                                           # 1 % > 0.9 %
    # h = sqrt(200 / (2 n)): 10, 7.071, 5.774, 5.0
    assert t.harmonic_order.tolist() == pytest.approx([10.0, 7.0711, 5.7735, 5.0], abs=1e-4)
    assert t.near_order.tolist() == [0, 7, 0, 5]
    assert res.status is BankCheckStatus.FLAGGED
    assert any("ideal source" in a for a in res.assumptions)
    assert "specialists" in res.caution and "local codes" in res.caution


def test_source_reactance_in_series():
    # source 0.5 pu + line 0.5 pu in series: |Z| = 1.0 pu -> 100 MVA; no ideal-source note
    s, z, notes = short_circuit_mva(feeder(x_source_pu=0.5), [2])
    assert s[0] == pytest.approx(100.0) and notes == []
    # resistance adds as a complex impedance: |0.3 + j0.4| ohm = 0.5 ohm -> 242 MVA
    s2, _, _ = short_circuit_mva(feeder(x_ohm=0.4, r_ohm=0.3), [2])
    assert s2[0] == pytest.approx(121.0 / 0.5)


def test_margin_and_orders_settings():
    t = check_banks(feeder(), margin=0.1, orders=(5,)).table
    assert t.near_order.tolist() == [0, 0, 0, 5]
    t2 = check_banks(feeder(), margin=0.0, orders=(11, 13)).table
    assert not t2.resonance_flag.any() and not t2.step_flag.any()      # 1 % < default 3 %


def test_step_estimate_matches_load_flow():
    # at light load the voltage change of one 2 Mvar step is about Q/S_sc = 1 %
    v0 = solve_flow(feeder(steps_on=1)).vm[1]
    v1 = solve_flow(feeder(steps_on=2)).vm[1]
    est = check_banks(feeder()).table.step_pct[0] / 100.0
    assert (v1 - v0) / v0 == pytest.approx(est, rel=0.05)


def test_isolated_bank_bus_has_no_source():
    net = feeder()
    net.lines["energised"] = False
    res = check_banks(net)
    assert res.status is BankCheckStatus.NO_SOURCE and not res.success
    assert (res.table.s_sc_mva == 0).all() and math.isnan(res.table.harmonic_order[0])
