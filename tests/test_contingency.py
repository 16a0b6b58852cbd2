"""N-1 verification checked against an independent dense load flow.

Reference: the IEEE 30-bus case (tests/data/ieee30cdf.txt, see tests/data/README.md) with each
line and transformer out in turn, solved by a dense Newton-Raphson written here (finite-difference
Jacobian, dense complex Ybus built by ``conftest.dense_from_network`` with its own loop over the
table rows, islands found by a breadth-first search from the slack bus). Worst post-outage
voltage per outage must agree within 1e-4 pu.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from conftest import dense_from_network
from planner.contingency.n1 import N1Status, Outage, compare_n1, outage_list, verify_n1
from planner.network.cdf import read_cdf
from planner.network.model import Network, make_table

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(scope="module")
def net30():
    return read_cdf(DATA / "ieee30cdf.txt")


def _supplied(net) -> dict:
    """Buses connected to the slack bus by branches in service (breadth-first search)."""
    adj = {int(b): set() for b in net.buses.bus}
    for tab in (net.lines, net.transformers):
        for r in tab.itertuples(index=False):
            if r.energised:
                adj[int(r.from_bus)].add(int(r.to_bus))
                adj[int(r.to_bus)].add(int(r.from_bus))
    start = int(net.buses.bus[net.buses.kind == "slack"].iloc[0])
    seen, todo = {start}, [start]
    while todo:
        for m in adj[todo.pop()]:
            if m not in seen:
                seen.add(m)
                todo.append(m)
    return seen


def dense_flow(net, tol=1e-11):
    """Dense Newton-Raphson with reactive limits; returns |V| of supplied buses {bus: vm}, or
    None when it finds no solution."""
    case = dense_from_network(net)
    supplied = _supplied(net)
    alive = np.array([int(b) in supplied for b in case.bus])
    n = len(case.bus)
    controlled = case.controlled & alive
    at = np.zeros(n)                       # +1 at max, -1 at min
    vm = np.where(controlled, case.vset, 1.0)
    va = np.zeros(n)
    for _ in range(20):
        pq = alive & ~(controlled & (at == 0))
        ang = np.flatnonzero(alive & ~case.slack)
        mag = np.flatnonzero(pq & ~case.slack)
        q_sched = np.where(at > 0, case.qmax, np.where(at < 0, case.qmin, case.q_gen))

        def mism(x):
            a, m = va.copy(), vm.copy()
            a[ang] = x[:len(ang)]
            m[mag] = x[len(ang):]
            v = np.where(alive, m * np.exp(1j * a), 0)
            s = v * np.conj(case.y @ v)
            load = case.load_p + case.load_i * m + case.load_z * m * m
            d = s - (case.p_gen + 1j * q_sched - load)
            return np.concatenate([d.real[ang], d.imag[mag]]), v, s, load

        x = np.concatenate([va[ang], vm[mag]])
        for _ in range(30):
            f = mism(x)[0]
            if np.abs(f).max() < tol:
                break
            jac = np.empty((len(x), len(x)))
            for k in range(len(x)):
                e = np.zeros(len(x))
                e[k] = 1e-7
                jac[:, k] = (mism(x + e)[0] - mism(x - e)[0]) / 2e-7
            x = x - np.linalg.solve(jac, f)
        va[ang], vm[mag] = x[:len(ang)], x[len(ang):]
        f, v, s, load = mism(x)
        if not np.abs(f).max() < 1e-8 or vm[alive].min() < 0.5:
            return None
        q_gen = s.imag + load.imag
        free = controlled & (at == 0) & ~case.slack
        over = free & (q_gen > case.qmax + 1e-9)
        under = free & (q_gen < case.qmin - 1e-9)
        back = controlled & (((at > 0) & (vm > case.vset + 1e-9)) | ((at < 0) & (vm < case.vset - 1e-9)))
        if not (over.any() or under.any() or back.any()):
            break
        at[over], at[under], at[back] = 1, -1, 0
        vm[back] = case.vset[back]
    return {int(b): float(vm[k]) for k, b in enumerate(case.bus) if alive[k]}


def _with_out(net, element, eid):
    out = net.copy()
    tab, col = (out.lines, "line_id") if element == "line" else (out.transformers, "xfmr_id")
    tab.loc[tab[col].astype(str) == eid, "energised"] = False
    return out


def test_ieee30_every_branch_out_matches_dense_reference(net30):
    outages = outage_list(net30, kinds=("line", "transformer"))
    assert len(outages) == 41
    res = verify_n1(net30, outages, screen=False)
    assert res.success
    by_id = res.outcomes.set_index(["element", "element_id"])
    failed = []
    for o in outages:
        ref = dense_flow(_with_out(net30, o.element, o.element_id))
        row = by_id.loc[(o.element, o.element_id)]
        assert row.checked_by == "AC"
        if ref is None:
            # with generator reactive limits held, losing line 1-2 (the largest flow out of
            # the slack) leaves no solution for either solver
            assert row.outcome == "no solution" and row.mismatch_mva > 1.0
            failed.append(o.element_id)
            continue
        assert abs(row.v_min_pu - min(ref.values())) < 1e-4, o
        assert abs(row.v_max_pu - max(ref.values())) < 1e-4, o
        assert ref[int(row.v_min_bus)] == pytest.approx(row.v_min_pu, abs=1e-4)
    assert failed == ["1-2"]


def test_ieee30_islanding_outages_report_cut_load(net30):
    res = verify_n1(net30, outage_list(net30, kinds=("line", "transformer")), screen=False)
    isl = res.outcomes[res.outcomes.outcome == "islanded"].set_index("element_id")
    # bus 26 hangs on branch 25-26 alone (3.5 MW in the CDF file); buses 11 and 13 are
    # synchronous condensers on radial transformers (no load)
    by_buses = dict(zip(isl.buses_cut, isl.load_cut_mw))
    assert by_buses["26"] == pytest.approx(3.5)
    assert by_buses["11"] == 0.0 and by_buses["13"] == 0.0
    assert len(isl) == 3
    assert res.status is N1Status.LIMITS_BROKEN


def test_screening_never_hides_a_broken_limit(net30):
    outs = outage_list(net30, kinds=("line", "transformer"))
    band = (0.97, 1.11)                   # tight low end, so several outages break it
    full = verify_n1(net30, outs, band=band, screen=False)
    fast = verify_n1(net30, outs, band=band, screen=True)
    assert (fast.outcomes.checked_by == "estimate").sum() > 5
    assert len(full.violations) > 0
    cols = ["element_id", "limit_kind", "where"]
    assert full.violations[cols].values.tolist() == fast.violations[cols].values.tolist()
    ac = fast.outcomes.checked_by == "AC"
    assert np.allclose(fast.outcomes.v_min_pu[ac], full.outcomes.v_min_pu[ac], atol=1e-7, equal_nan=True)
    # the estimate itself is close to the full AC answer where it was used
    est = ~ac
    assert np.abs(fast.outcomes.v_min_pu[est] - full.outcomes.v_min_pu[est]).max() < 5e-3


def _radial_pair(rating_em=0.0):
    """Two parallel 33 kV lines feeding one load: hand-checkable loading after an outage."""
    return Network(
        buses=make_table("buses", [{"bus": 1, "base_kv": 33.0, "kind": "slack"},
                                   {"bus": 2, "base_kv": 33.0, "kind": "PQ"}]),
        generators=make_table("generators", [{"gen_id": "G", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}]),
        loads=make_table("loads", [{"load_id": "D", "bus": 2, "mw": 30.0, "mvar": 0.0}]),
        lines=make_table("lines", [
            {"line_id": k, "from_bus": 1, "to_bus": 2, "r_pu": 0.0, "x_pu": 0.05, "rating_mva": 20.0,
             "rating_emergency_mva": rating_em} for k in ("A", "B")]))


def test_emergency_rating_used_and_normal_rating_as_fallback():
    # lossless line: the remaining line carries the 30 MW load plus its own Q; > 20 MVA normal
    res = verify_n1(_radial_pair(), [Outage("line", "A")], screen=False)
    v = res.violations
    assert v.limit_kind.tolist() == ["loading"] and v["where"].tolist() == ["B"]
    assert v.value[0] > 150.0                         # at least 30/20
    res2 = verify_n1(_radial_pair(rating_em=40.0), [Outage("line", "A")], screen=False)
    assert res2.violations.empty
    assert res2.outcomes.loading_max_pct[0] == pytest.approx(v.value[0] * 20.0 / 40.0, rel=1e-9)
    assert res2.status is N1Status.SECURE and res2.count == 0


def test_per_bus_band_override_and_compare():
    net = _radial_pair(rating_em=40.0)
    net.loads["mvar"] = 10.0                # about 0.05 x 0.1 = 0.5 % drop on one line
    before = verify_n1(net, [Outage("line", "A")], bus_bands={2: (0.998, 1.1)}, screen=False)
    assert before.violations.limit_kind.tolist() == ["low voltage"]
    assert before.violations["where"].tolist() == ["2"]
    after_net = net.copy()
    after_net.loads["mvar"] = -3.0          # a "plan" that raises the voltage at bus 2
    after = verify_n1(after_net, [Outage("line", "A")], bus_bands={2: (0.998, 1.1)}, screen=False)
    cmp = compare_n1(before, after)
    assert cmp.change.tolist() == ["cured"]


def test_failed_outage_reports_worst_bus_and_mismatch():
    net = _radial_pair(rating_em=40.0)
    net.loads["mw"] = 1500.0   # unity-pf limit V^2/(2x): 20 pu on two lines, 10 pu on one
    res = verify_n1(net, [Outage("line", "A")], screen=False)
    row = res.outcomes.iloc[0]
    assert row.outcome == "no solution" and row.worst_bus == 2 and row.mismatch_mva > 0
    assert res.count == 1


def test_generator_outage_and_unknown_id(net30):
    res = verify_n1(net30, outage_list(net30, kinds=("generator",)), screen=False)
    o = res.outcomes.set_index("element_id")
    slack_gen = net30.generators.gen_id[net30.generators.bus == 1].iloc[0]
    assert o.loc[slack_gen, "outcome"] == "not studied"
    other = net30.generators.gen_id[net30.generators.bus == 2].iloc[0]
    net2 = net30.copy()
    net2.generators.loc[net2.generators.gen_id == other, "energised"] = False
    ref = dense_flow(net2)
    assert o.loc[other, "v_min_pu"] == pytest.approx(min(ref.values()), abs=1e-4)
    with pytest.raises(KeyError, match="no element in service with id 'nope'"):
        outage_list(net30, ids=["nope"])
