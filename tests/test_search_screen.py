"""The final search's move list and screening model (planner.optimize.search, problem.screen_data).

References: a plain listing of the moves written here (loops over sites and buses, one settings
object per move), and the exact linear model of each point (planner.optimize.sensitivity, itself
checked against finite differences in test_optimize.py); the 33-bus enumeration of
tests/reference/sweep.py for the search's result.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import planner.optimize.problem as problem_module
from planner.network.io import read_network
from planner.optimize.ac_check import evaluate
from planner.optimize.bound import plan_bound
from planner.optimize.engine import LevelCase
from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
from planner.optimize.problem import PlanProblem, same_point
from planner.optimize.search import budget_mask, candidate_moves, local_search
from reference.sweep import enumerate_feeder33

DATA = Path(__file__).resolve().parent / "data"
NO_V_LIMITS = Limits(v_min=0.0, v_max=2.0)


@pytest.fixture(scope="module")
def f33():
    return read_network(DATA / "feeder33_tables")


def listed_moves(pb, st):
    """The moves of the final search, one by one in the documented order (reference)."""
    L, S = st.steps.shape
    sites = pb.sites
    used = [s for s in range(S) if st.fixed[s] + st.switched[s] > 0]
    out = []
    for s in used:
        site = sites[s]
        for dlt in (-1, 1):
            if "fixed" in site.kinds or st.fixed[s]:
                n = st.copy()
                n.fixed[s] += dlt
                if 0 <= n.fixed[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    out.append(n)
            if st.switched[s] or "switched" in site.kinds:
                n = st.copy()
                n.switched[s] += dlt
                if 0 <= n.switched[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    n.steps[:, s] = np.minimum(n.steps[:, s] + max(dlt, 0), n.switched[s])
                    out.append(n)
            for l in range(L):
                if st.switched[s]:
                    n = st.copy()
                    n.steps[l, s] += dlt
                    if 0 <= n.steps[l, s] <= n.switched[s]:
                        out.append(n)
        if L > 1 and st.fixed[s] >= 1 and "switched" in site.kinds:
            for l in range(L):              # a fixed unit made switched, off at level l
                n = st.copy()
                n.fixed[s] -= 1
                n.switched[s] += 1
                n.steps[:, s] += 1
                n.steps[l, s] -= 1
                out.append(n)
        if st.switched[s] and st.steps[:, s].min() >= 1 and "fixed" in site.kinds:
            n = st.copy()                   # a switched unit on at every level made fixed
            n.fixed[s] += 1
            n.switched[s] -= 1
            n.steps[:, s] -= 1
            out.append(n)
        n = st.copy()
        n.fixed[s] = n.switched[s] = 0
        n.steps[:, s] = 0
        out.append(n)
        for t in range(S):
            other = sites[t]
            if t == s or st.fixed[t] + st.switched[t] or (st.fixed[s] and "fixed" not in other.kinds) \
                    or (st.switched[s] and "switched" not in other.kinds):
                continue
            for extra in (0, -1, 1):
                fixed = st.fixed[s] + (extra if st.fixed[s] else 0)
                switched = st.switched[s] + (extra if not st.fixed[s] else 0)
                if fixed < 0 or switched < 0 or fixed + switched == 0 or fixed + switched > other.max_units:
                    continue
                if extra and other.unit_mvar != site.unit_mvar:
                    continue
                n = st.copy()
                n.fixed[t], n.switched[t] = fixed, switched
                n.steps[:, t] = np.minimum(st.steps[:, s], switched)
                n.fixed[s], n.switched[s], n.steps[:, s] = 0, 0, 0
                out.append(n)
    cap = pb.levers.max_new_sites
    if cap is None or len(used) < cap:
        for t in range(S):
            if st.fixed[t] + st.switched[t]:
                continue
            for u in range(1, sites[t].max_units + 1):
                n = st.copy()
                if "fixed" in sites[t].kinds:
                    n.fixed[t] = u
                else:
                    n.switched[t] = u
                    n.steps[:, t] = u
                out.append(n)
    return out


def test_move_list_as_arrays_equals_the_plain_listing(f33):
    # random sites (kinds, unit sizes, unit counts), 1-3 levels, site limits and a capital cap
    # that binds for some moves: same moves in the same order, same budget verdicts
    rng = np.random.default_rng(7)
    kinds = [("fixed",), ("switched",), ("fixed", "switched")]
    capped = 0
    for _ in range(12):
        sites = [BankSite(b, float(rng.choice([0.15, 0.3])), int(rng.integers(1, 6)),
                          kinds=kinds[int(rng.integers(3))], fixed_cost=1000.0, cost_per_mvar=10.0)
                 for b in range(2, 34)]
        L = int(rng.integers(1, 4))
        pb = PlanProblem([LevelCase(f"l{i}", f33, weight=1.0 + i) for i in range(L)],
                         Levers(sites=sites, max_new_sites=int(rng.integers(2, 6)), budget=2500.0),
                         NO_V_LIMITS, Objective(), Options())
        st = pb.initial_settings()
        for s in rng.choice(len(sites), int(rng.integers(0, 4)), replace=False):
            u = int(rng.integers(1, sites[s].max_units + 1))
            if "switched" in sites[s].kinds and ("fixed" not in sites[s].kinds or rng.random() < 0.5):
                st.switched[s] = u
                st.steps[:, s] = rng.integers(0, u + 1, L)
            else:
                st.fixed[s] = u
        ref = listed_moves(pb, st)
        got = candidate_moves(pb, st)
        assert len(got) == len(ref) > 0
        assert [n.key() for n in got] == [n.key() for n in ref]
        within = [pb.capital(n) <= 2500.0 + 1e-9 and np.sum(n.fixed + n.switched > 0) <= pb.levers.max_new_sites
                  for n in ref]
        np.testing.assert_array_equal(budget_mask(pb, got), within)
        capped += len(ref) - sum(within)
    assert capped > 0          # the cap was tested, not only the lists


def _model_loss_and_gradient(lev, base_mva):
    grad = 2.0 * (lev.R.T @ lev.d) + getattr(lev, "loss_linear", 0.0)
    return (float(lev.d @ lev.d) + lev.const) * base_mva, grad


def test_screen_model_from_earlier_slopes_is_exact_at_the_new_point(f33, monkeypatch):
    # forced onto the large-case path: the model at a new point keeps the slopes of the last
    # full linearisation but must give the new point's AC losses, voltages and exact loss
    # gradient (the exact model of the new point is the reference)
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=[BankSite(b, 0.15, 10) for b in range(2, 34)]),
                     Limits(v_min=0.95, v_max=1.05), Objective(), Options())
    st0 = pb.initial_settings()
    ev0 = evaluate(pb, st0)
    pb.level_data(0, st0, ev0.flows[0], 0.05, 10)          # the full linearisation at st0
    st1 = st0.copy()
    st1.fixed[30 - 2] = 6
    st1.fixed[13 - 2] = 2
    ev1 = evaluate(pb, st1, warm=ev0.flows, chord=True)
    fr1 = ev1.flows[0]
    monkeypatch.setattr(problem_module, "SCREEN_REFRESH_LIMIT", 0)
    assert not pb.screen_exact(0, fr1)
    upd = pb.screen_data(0, st1, fr1, 10)
    assert hasattr(upd, "loss_linear")
    exact = pb.screen_data(0, st1, fr1, 10, exact=True)
    assert not hasattr(exact, "loss_linear")
    loss_u, grad_u = _model_loss_and_gradient(upd, pb.base)
    loss_x, grad_x = _model_loss_and_gradient(exact, pb.base)
    assert loss_u == pytest.approx(fr1.losses_mw, rel=1e-9)
    assert loss_x == pytest.approx(fr1.losses_mw, rel=1e-9)
    np.testing.assert_allclose(grad_u, grad_x, rtol=1e-7, atol=1e-9 * np.abs(grad_x).max())
    np.testing.assert_allclose(upd.v0, fr1.vm[upd.v_rows], rtol=0, atol=1e-12)
    # the curvature is the earlier point's: close to, not equal to, the new point's
    h_u, h_x = upd.R.T @ upd.R, exact.R.T @ exact.R
    assert 0 < np.abs(h_u - h_x).max() < 0.2 * np.abs(h_x).max()


@pytest.mark.parametrize("forced", [False, True])
def test_search_from_a_poor_two_site_plan_reaches_the_enumerated_optimum(f33, monkeypatch, forced):
    # from banks at buses 9 and 25 the final search alone must reach the exhaustive
    # enumeration's two-site optimum (tests/reference/sweep.py: buses 13 and 30, 3 and 8
    # units), with exact screening and with the large-case screening forced on
    if forced:
        monkeypatch.setattr(problem_module, "SCREEN_REFRESH_LIMIT", 0)
    ref = enumerate_feeder33(sites=2, unit_mvar=0.15, max_units=10)
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=[BankSite(b, 0.15, 10) for b in range(2, 34)],
                                                     max_new_sites=2), NO_V_LIMITS, Objective(), Options())
    st = pb.initial_settings()
    st.fixed[9 - 2], st.fixed[25 - 2] = 5, 4
    ev = evaluate(pb, st)
    pb.level_data(0, st, ev.flows[0], 0.05, 10)       # a full linearisation here, as after a step
    kinds = []
    exact_model = pb.screen_data

    def recorded(*a, **kw):
        lev = exact_model(*a, **kw)
        kinds.append(hasattr(lev, "loss_linear"))
        return lev
    pb.screen_data = recorded
    log = []
    cur, end, _ = local_search(pb, st, ev, pb.options, log)
    assert len(log) >= 2
    assert any(kinds) == forced           # earlier slopes used only where forced
    assert not kinds[-1]                  # the search stops on the exact model of its point
    assert end.losses_mw[0] * 1000 <= ref.losses_kw * (1 + 1e-6)
    got = sorted((int(b) + 2, int(cur.fixed[b])) for b in np.flatnonzero(cur.fixed))
    assert got == sorted(zip(ref.buses, ref.units))


def test_bound_reuses_the_model_of_the_same_settings_solved_again(f33):
    # the final check re-solves the search's last point by full Newton: the bound may use the
    # model already built there; it must equal a bound computed on a fresh problem
    levers = Levers(sites=[BankSite(b, 0.15, 10) for b in (13, 24, 30)])
    pb = PlanProblem([LevelCase("base", f33)], levers, NO_V_LIMITS, Objective(), Options())
    st = pb.initial_settings()
    st.fixed[:] = [3, 4, 8]
    ev = evaluate(pb, st)
    again = evaluate(pb, st, warm=ev.flows, tables=True)
    assert same_point(ev.flows[0], again.flows[0]) and ev.flows[0] is not again.flows[0]
    pb.level_data(0, st, ev.flows[0], 0.05, 10)
    reused = plan_bound(pb, st, again)
    fresh_pb = PlanProblem([LevelCase("base", f33)], levers, NO_V_LIMITS, Objective(), Options())
    fresh = plan_bound(fresh_pb, st, evaluate(fresh_pb, st))
    assert reused["lower_bound"] == pytest.approx(fresh["lower_bound"], rel=1e-9)
    assert reused["lower_bound"] <= reused["objective"] + 1e-9
    # another point is not the same point
    st2 = st.copy()
    st2.fixed[0] = 4
    assert not same_point(ev.flows[0], evaluate(pb, st2).flows[0])
