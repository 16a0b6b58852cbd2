"""The final search's rounds: the kept-order Jacobian factor, the sparse screen and combined moves
(planner.optimize.sensitivity.OrderedFactor, planner.optimize.search).

References: scipy's SuperLU with its own default ordering (an independent factorisation of the
same Jacobian); the linear model of the point written out move by move here (dense products,
one move at a time); settings added up by hand.
"""
from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.network.io import read_network
from planner.optimize.ac_check import evaluate
from planner.optimize.engine import LevelCase
from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
from planner.optimize.problem import PlanProblem
from planner.optimize.search import MoveSet, _joined, candidate_moves, combine, screen
from planner.optimize.sensitivity import OrderedFactor, _jacobian_at, lifted_kinds

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(scope="module")
def f33():
    return read_network(DATA / "feeder33_tables")


def test_ordered_factor_solves_as_superlu_with_its_own_ordering():
    # IEEE 30-bus case (tests/data/ieee30cdf.txt): the Jacobian at the solved point and at a
    # second point (same pattern, other values); one and several right-hand sides
    fr = solve_flow(read_cdf(DATA / "ieee30cdf.txt"), build_tables=False)
    c = fr.compiled
    orders = {}
    rng = np.random.default_rng(3)
    for v in (fr.v, fr.v * (1.0 + 0.02 * rng.standard_normal(c.n))):
        jac = _jacobian_at(c, v, lifted_kinds(c))[1]
        ref = spla.splu(jac.tocsc())
        got = OrderedFactor(jac, orders)
        b = rng.standard_normal(jac.shape[0])
        B = rng.standard_normal((jac.shape[0], 7))
        for trans in ("N", "T"):
            np.testing.assert_allclose(got.solve(b, trans), ref.solve(b, trans=trans), rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(got.solve(B, trans), ref.solve(B, trans=trans), rtol=1e-9, atol=1e-12)
        # the residual of the system itself, not only agreement with SuperLU
        assert np.abs(jac @ got.solve(b) - b).max() < 1e-10 * max(1.0, np.abs(b).max())
        assert np.abs(jac.T @ got.solve(b, "T") - b).max() < 1e-10 * max(1.0, np.abs(b).max())
    assert len(orders) == 1            # the second point reused the first point's order


def _dense_model_merit(pb, st, fr, lev, move):
    """The model's merit of one move, written out: quadratic losses plus penalised limit rows."""
    du = pb.lever_changes(0, st, move, fr)
    s = lev.d + lev.R @ du
    losses = (float(s @ s) + lev.const + float(du @ getattr(lev, "loss_linear", np.zeros_like(du)))) * pb.base
    breach = 0.0
    for x0, slope, lo, hi in ((lev.v0, lev.dv, lev.v_lo, lev.v_hi), (lev.q0, lev.dq, lev.q_lo, lev.q_hi)):
        if x0 is None or not len(x0):
            continue
        x = x0 + slope @ du
        breach += float(np.maximum(lo - x, 0.0).sum() + np.maximum(x - hi, 0.0).sum())
    return pb.loss_weights()[0] * losses + pb.penalty() * breach, losses


def test_sparse_screen_equals_the_model_written_out_move_by_move(f33):
    # 33-bus feeder with a 0.95-1.05 band, so that voltage rows bind and the penalty counts
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=[BankSite(b, 0.15, 10) for b in range(2, 34)],
                                                     max_new_sites=3),
                     Limits(v_min=0.95, v_max=1.05), Objective(), Options())
    st = pb.initial_settings()
    st.fixed[18 - 2], st.fixed[30 - 2] = 3, 5
    ev = evaluate(pb, st)
    moves = candidate_moves(pb, st)
    merit, losses = screen(pb, st, ev.flows, moves, exact=True)
    lev = pb.screen_data(0, st, ev.flows[0], 10, exact=True)
    assert len(lev.v_rows) > 0
    assert len(moves) > 100
    penalised = 0
    for j in range(0, len(moves), 7):
        m_ref, l_ref = _dense_model_merit(pb, st, ev.flows[0], lev, moves[j])
        assert merit[j] == pytest.approx(m_ref, rel=1e-10, abs=1e-12)
        assert losses[j, 0] == pytest.approx(l_ref, rel=1e-10)
        penalised += m_ref > l_ref * (1 + 1e-9)
    assert penalised > 0              # some moves break a row: the penalty part was compared too


def test_combined_moves_add_up_on_separate_sites_and_skip_a_site_already_moved(f33):
    sites = [BankSite(b, 0.15, 10) for b in range(2, 34)]
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=sites), Limits(v_min=0.0, v_max=2.0),
                     Objective(), Options())
    cur = pb.initial_settings()
    cur.fixed[10 - 2] = 4
    a = cur.copy()
    a.fixed[10 - 2] = 0
    a.fixed[12 - 2] = 4             # the bank at 10 moved to 12
    b = cur.copy()
    b.fixed[30 - 2] = 6             # a new bank at 30
    same_site = cur.copy()
    same_site.switched[10 - 2] = 1  # another lever of the site that move a already changes
    same_site.steps[:, 10 - 2] = 1
    got = combine(cur, [a, same_site, b])
    want = cur.copy()
    want.fixed[10 - 2] = 0
    want.fixed[12 - 2] = 4
    want.fixed[30 - 2] = 6
    assert got.key() == want.key()
    assert combine(cur, [a, same_site]) is None      # only one move combines
    assert cur.fixed[10 - 2] == 4 and a.fixed[12 - 2] == 4 and b.fixed[30 - 2] == 6   # inputs untouched


def test_a_move_joins_only_when_its_gain_outweighs_the_models_interaction(f33):
    # two banks dropped on the 33-bus feeder with a 0.95-1.05 band: the model sees their
    # effects compound (losses and voltage rows), so the second joins the first only if its own
    # AC gain is larger than that interaction (written out here by the dense model)
    pb = PlanProblem([LevelCase("base", f33)], Levers(sites=[BankSite(b, 0.15, 10) for b in range(2, 34)]),
                     Limits(v_min=0.95, v_max=1.05), Objective(), Options())
    cur = pb.initial_settings()
    cur.fixed[18 - 2], cur.fixed[30 - 2] = 3, 5
    ev = evaluate(pb, cur)
    drop_18, drop_30 = cur.copy(), cur.copy()
    drop_18.fixed[18 - 2] = 0
    drop_30.fixed[30 - 2] = 0
    both = combine(cur, [drop_18, drop_30])
    fr = ev.flows[0]
    lev = pb.screen_data(0, cur, fr, 10, exact=True)
    m = {k: _dense_model_merit(pb, cur, fr, lev, st)[0] for k, st in
         (("here", cur), ("18", drop_18), ("30", drop_30), ("both", both))}
    interaction = (m["both"] - m["18"]) - (m["30"] - m["here"])
    assert interaction > 1e-6
    moves = MoveSet.of([drop_18, drop_30])
    merit, _ = screen(pb, cur, ev.flows, moves, exact=True, with_present=True)
    here, merit = merit[-1], merit[:-1]

    def fake(gain):
        return dataclasses.replace(ev, merit=ev.merit - gain)
    joined = _joined(pb, cur, ev, moves, [(0, fake(3.0 * interaction)), (1, fake(2.0 * interaction))],
                     merit, here, True)
    assert joined is not None and joined.key() == both.key()
    alone = _joined(pb, cur, ev, moves, [(0, fake(3.0 * interaction)), (1, fake(0.5 * interaction))],
                    merit, here, True)
    assert alone is None
