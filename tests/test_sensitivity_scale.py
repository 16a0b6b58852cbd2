"""Large-network paths of the optimiser's linear algebra, checked against the small-network ones.

* The quadratic loss model from the state-space Gram matrix and a pivoted Cholesky factor
  (used on large networks) equals the one from an R-only QR of the explicit current slopes
  (used on small ones) -- and both equal the exact sum of r |I + dI du|^2 at any lever change.
* Chord load flows on a factorised base Jacobian (the final search's AC checks of small moves)
  reach the full Newton solution, and hand over to full Newton when a reactive limit switches.
Cases: IEEE 14 (tests/data/ieee14cdf.txt) with shunt, setpoint and tap levers, IEEE 30.
Physics only; no outside source needed.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.network.compile import compile_network, replace
from planner.optimize import sensitivity
from planner.optimize.ac_check import _ChordBase, chord_flow
from planner.optimize.sensitivity import linearize

DATA = Path(__file__).resolve().parent / "data"


def _levers14():
    net = read_cdf(DATA / "ieee14cdf.txt")
    net.transformers = net.transformers.copy()
    net.transformers.loc[net.transformers.xfmr_id.isin(["4-9", "4-7"]), "adjustable"] = True
    c = compile_network(net)
    rows = np.flatnonzero(net.transformers.adjustable.to_numpy())
    xf = np.flatnonzero(np.isin(c.xfmr_rows, rows))
    # bus 9 twice: two levers at one bus make the Gram matrix singular
    return c, c.index_of([9, 14, 9, 12]), c.index_of([2, 6]), xf


def test_gram_loss_model_equals_qr_loss_model_and_exact_quadratic(monkeypatch):
    c, shunt, vset, xf = _levers14()
    fr = solve_flow(compiled=c, enforce_q_limits=False, build_tables=False)
    sens = linearize(fr, shunt_buses=shunt, vset_buses=vset, xfmr_branches=xf)
    R1, d1, c1 = sens.loss_model()                       # explicit: R-only QR
    monkeypatch.setattr(sensitivity, "EXPLICIT_LIMIT", 0)
    R2, d2, c2 = sens.loss_model()                       # Gram + pivoted Cholesky
    rng = np.random.default_rng(0)
    di, i0, r = sens.di, sens.i0, sens.r
    for _ in range(5):
        du = rng.normal(0, 0.05, sens.m)
        exact = float(np.sum(r * np.abs(i0 + di @ du) ** 2))
        q1 = float(np.sum((d1 + R1 @ du) ** 2) + c1)
        q2 = float(np.sum((d2 + R2 @ du) ** 2) + c2)
        assert q1 == pytest.approx(exact, rel=1e-10)
        assert q2 == pytest.approx(exact, rel=1e-9)
    assert c2 >= 0.0 and c1 >= 0.0     # (split between d and const differs when G is singular)


def test_folded_columns_keep_the_loss_model(monkeypatch):
    c, shunt, vset, xf = _levers14()
    fr = solve_flow(compiled=c, enforce_q_limits=False, build_tables=False)
    sens = linearize(fr, shunt_buses=shunt, vset_buses=vset, xfmr_branches=xf)
    di = sens.di.copy()
    k = len(shunt) + len(vset)
    fold = np.ones((len(xf), 1))                      # both taps as one lever
    sens.fold(k, fold)
    want = np.concatenate([di[:, :k], di[:, k:] @ fold], axis=1)
    np.testing.assert_allclose(sens.di, want, atol=1e-12)
    monkeypatch.setattr(sensitivity, "EXPLICIT_LIMIT", 0)
    R, d, const = sens.loss_model()
    du = np.linspace(-0.03, 0.03, sens.m)
    exact = float(np.sum(sens.r * np.abs(sens.i0 + want @ du) ** 2))
    assert float(np.sum((d + R @ du) ** 2) + const) == pytest.approx(exact, rel=1e-9)


def test_chord_flow_reaches_the_newton_solution_of_a_small_move():
    net = read_cdf(DATA / "ieee30cdf.txt")
    c = compile_network(net)
    base = solve_flow(compiled=c, build_tables=False)
    ysh = c.ysh.copy()
    ysh[c.index_of([30])] += 0.05j                        # a 5 Mvar bank at bus 30
    moved = replace(c, ysh=ysh)
    got = chord_flow(_ChordBase(base), moved)
    want = solve_flow(compiled=moved, start=base, build_tables=False)
    assert got is not None and got.converged and got.strategy == "chord"
    assert 1 <= got.iterations <= 8
    np.testing.assert_allclose(got.v, want.v, atol=1e-8)
    assert got.losses_mw == pytest.approx(want.losses_mw, rel=1e-9)
    assert np.array_equal(got.limit_state, want.limit_state)


def test_chord_flow_hands_over_when_a_limit_switches():
    net = read_cdf(DATA / "ieee30cdf.txt")
    c = compile_network(net)
    base = solve_flow(compiled=c, build_tables=False)
    # a large reactor at a condenser bus pushes its generator past its limits
    ysh = c.ysh.copy()
    i = c.index_of([11])[0]
    ysh[i] -= 0.6j
    moved = replace(c, ysh=ysh)
    want = solve_flow(compiled=moved, start=base, build_tables=False)
    assert not np.array_equal(want.limit_state, base.limit_state)      # the move does switch a limit
    assert chord_flow(_ChordBase(base), moved) is None



def test_search_evaluation_by_chord_equals_full_newton_evaluation():
    from planner.network.io import read_network
    from planner.optimize.ac_check import evaluate
    from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
    from planner.optimize.problem import LevelCase, PlanProblem
    net = read_network(DATA / "feeder33_tables")
    pb = PlanProblem([LevelCase("base", net)], Levers(sites=[BankSite(30, 0.15, 10), BankSite(14, 0.15, 10)]),
                     Limits(v_min=0.0, v_max=2.0), Objective(), Options())
    st = pb.initial_settings()
    ev = evaluate(pb, st)
    move = st.copy()
    move.fixed[0] = 2
    by_chord = evaluate(pb, move, warm=ev.flows, chord=True)
    by_newton = evaluate(pb, move, warm=ev.flows)
    assert by_chord.flows[0].strategy == "chord" and by_newton.flows[0].strategy != "chord"
    assert by_chord.merit == pytest.approx(by_newton.merit, rel=1e-11)
    assert by_chord.merit < ev.merit                          # two units at bus 30 do cut the losses
    np.testing.assert_allclose(by_chord.flows[0].v, by_newton.flows[0].v, atol=1e-10)
