"""Site moves inside a step: the site trust region of later steps, the sites kept by the cut
refinement of a multi-level step, and the final search's fixed-to-switched moves."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.network.io import read_network
from planner.optimize import milp
from planner.optimize.ac_check import evaluate
from planner.optimize.engine import LevelCase
from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
from planner.optimize.problem import PlanProblem
from planner.optimize.search import candidate_moves

DATA = Path(__file__).resolve().parent / "data"
BUSES = (8, 13, 24, 25, 30, 31)


@pytest.fixture(scope="module")
def f33():
    return read_network(DATA / "feeder33_tables")


def _problem(levels, max_new_sites=None):
    sites = [BankSite(b, 0.15, 10, fixed_cost=1.0, cost_per_mvar=1.0) for b in BUSES]
    return PlanProblem(levels, Levers(sites=sites, max_new_sites=max_new_sites), Limits(v_min=0.0, v_max=2.0),
                       Objective(), Options())


def _step(pb, st, radius_sites):
    ev = evaluate(pb, st)
    spec = pb.step_spec(st, ev.flows, 0.05, 10, 4, radius_sites=radius_sites)
    sol, _, _ = milp.solve_step(spec)
    assert sol.ok
    return (sol.fixed + sol.switched) > 0


def test_site_radius_bounds_the_sites_opened_or_closed(f33):
    pb = _problem([LevelCase("base", f33)], max_new_sites=3)
    st = pb.initial_settings()
    st.fixed[0] = 10                                    # 1.5 Mvar at bus 8, a poor place
    here = (st.fixed + st.switched) > 0
    free = _step(pb, st, None)
    # unbounded, the step moves more than one site (it opens the three best buses)
    assert np.count_nonzero(free != here) >= 3
    assert np.count_nonzero(free) == 3
    for radius in (0, 1, 2):
        moved = _step(pb, st, radius)
        assert np.count_nonzero(moved != here) <= radius
    # radius 0 keeps the sites exactly
    assert np.array_equal(_step(pb, st, 0), here)


def test_cut_refinement_of_a_multi_level_step_keeps_the_first_rounds_sites(f33):
    heavy = f33.copy()
    heavy.loads["mw"] = heavy.loads["mw"] * 1.3
    heavy.loads["mvar"] = heavy.loads["mvar"] * 1.3
    pb = _problem([LevelCase("light", f33, 0.5), LevelCase("heavy", heavy, 0.5)], max_new_sites=2)
    st = pb.initial_settings()
    ev = evaluate(pb, st)
    spec = pb.step_spec(st, ev.flows, 0.05, 10, 4)
    assert spec.keep_sites_in_refinement
    sol, solves, rounds = milp.solve_step(spec)
    assert sol.ok and len(rounds) == solves
    assert solves >= 2                                 # the refinement ran (else nothing to check)
    first = (rounds[0].fixed + rounds[0].switched) > 0
    assert 1 <= np.count_nonzero(first) <= 2
    for r in rounds[1:]:
        assert np.array_equal((r.fixed + r.switched) > 0, first)


def test_search_offers_a_fixed_unit_made_switched_and_off_at_one_level(f33):
    pb = _problem([LevelCase("light", f33, 0.5), LevelCase("heavy", f33, 0.5)])
    st = pb.initial_settings()
    st.fixed[2] = 4                                     # 4 fixed units at bus 24
    moves = list(candidate_moves(pb, st))
    converted = [n for n in moves if n.fixed[2] == 3 and n.switched[2] == 1]
    # one per level, the new switched unit off at that level only
    assert sorted(n.steps[:, 2].tolist() for n in converted) == [[0, 1], [1, 0]]
    # and back: a switched unit on at every level made fixed again
    st.fixed[2], st.switched[2], st.steps[:, 2] = 3, 1, 1
    back = [n for n in candidate_moves(pb, st) if n.fixed[2] == 4 and n.switched[2] == 0]
    assert len(back) == 1 and back[0].steps[:, 2].tolist() == [0, 0]
