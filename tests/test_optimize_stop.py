"""The step model at the present point: what the outer loop's stopping test compares against.

Case: the 33-bus radial feeder (tests/data/feeder33_tables, Baran and Wu 1989) with its lowest
bus a hair (5e-7 pu) below the band's lower edge, inside the AC check's 1e-6 pu tolerance, so
the AC check passes it; the model must not charge it a penalty at the present point.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.flow.newton import solve_flow
from planner.network.io import read_network
from planner.optimize.ac_check import evaluate
from planner.optimize.engine import LevelCase, _model_merit, plan
from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
from planner.optimize.problem import PlanProblem

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(scope="module")
def edge_case():
    net = read_network(DATA / "feeder33_tables")
    vmin = float(solve_flow(net, build_tables=False).vm.min())
    return net, Limits(v_min=vmin + 5e-7, v_max=2.0)


def test_band_edge_within_ac_tolerance_costs_no_model_penalty(edge_case):
    net, limits = edge_case
    pb = PlanProblem([LevelCase("base", net)], Levers(sites=[BankSite(30, 0.15, 10)]), limits,
                     Objective(), Options())
    cur = pb.initial_settings()
    ev = evaluate(pb, cur)
    assert ev.converged and not ev.violations           # the AC check passes the edge bus
    spec = pb.step_spec(cur, ev.flows, 0.05, 10, 4)
    lev = spec.levels[0]
    assert len(lev.v0)                                   # the edge bus has a row ...
    assert np.all(lev.v0 >= lev.v_lo)                    # ... that the present point meets
    # the model's merit at the present point is its losses alone: no penalised breach
    here = _model_merit(pb, spec, cur, None, ev.flows)
    assert here == pytest.approx(lev.weight * spec.base_mva * (float(lev.d @ lev.d) + lev.const), rel=1e-12)


def test_band_edge_bus_leaves_the_plan_as_without_the_band(edge_case):
    """The edge bus changes nothing: the plan is the engine doctest's plan (no band at all)."""
    net, limits = edge_case
    p = plan(net, Levers(sites=[BankSite(30, 0.15, 10)]), limits)
    assert p.verified and not p.violations
    assert p.stop_reason.startswith("converged") and p.milp_solves <= 6
    assert [(b["bus"], b["units"]) for b in p.banks] == [(30, 9)]    # as the engine's doctest (no band)
    assert p.losses_after_mw["base"] * 1000 == pytest.approx(143.6, abs=0.05)
