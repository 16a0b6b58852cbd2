"""Candidate reduction of a large first-step site choice (planner.optimize.milp.reduce_candidates).

The 33-bus feeder has 32 candidate buses; with the threshold lowered to 5 the reduction runs on
it, so the reduced step can be compared with the full one in a few seconds. Reference for the
relaxation: the same step model with every integer relaxed by Pyomo's own transformation
(``core.relax_integer_vars``), built and solved separately.
"""
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

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(scope="module")
def first_step():
    net = read_network(DATA / "feeder33_tables")
    sites = [BankSite(b, 0.15, 10) for b in range(2, 34)]
    pb = PlanProblem([LevelCase("base", net)], Levers(sites=sites, max_new_sites=3),
                     Limits(v_min=0.0, v_max=2.0), Objective(), Options())
    st = pb.initial_settings()
    ev = evaluate(pb, st)
    return pb, st, ev, pb.step_spec(st, ev.flows, 0.05, 10, 4)


def test_small_site_choices_are_not_reduced(first_step):
    _, _, _, spec = first_step
    assert len(spec.unit_pu) <= milp.REDUCE_ABOVE
    m = milp.build_model(spec)
    assert milp.reduce_candidates(m, spec, milp.new_solver()) is None
    assert not any(v.fixed for v in m.z.values())


def test_reduced_step_keeps_the_relaxations_best_sites_and_a_valid_bound(first_step, monkeypatch):
    _, _, _, spec = first_step
    full, _, _ = milp.solve_step(spec)
    assert full.ok
    monkeypatch.setattr(milp, "REDUCE_ABOVE", 5)
    m = milp.build_model(spec)
    bound = milp.reduce_candidates(m, spec, milp.new_solver())
    assert bound is not None
    kept = [s for s in range(len(spec.unit_pu)) if not m.z[s].fixed]
    # between 2 and 3 times the limit of 3 new sites
    assert 6 <= len(kept) <= 9
    assert all(m.z[s].value == 0 for s in range(len(spec.unit_pu)) if m.z[s].fixed)
    # the bound is the relaxation of the whole model (every candidate), solved independently
    pyo = milp._load()
    relaxed = milp.build_model(spec)
    pyo.TransformationFactory("core.relax_integer_vars").apply_to(relaxed)
    ref = milp.solve_model(relaxed, spec)
    assert ref.ok
    assert bound == pytest.approx(ref.objective, rel=1e-7)
    # a lower bound of the full step's MILP
    assert bound <= full.objective + 1e-9
    reduced, _, _ = milp.solve_step(spec)
    assert reduced.ok
    assert reduced.bound == pytest.approx(bound, rel=1e-12)
    opened = np.flatnonzero(reduced.fixed > 0)
    assert 1 <= len(opened) <= 3 and set(opened.tolist()) <= set(kept)
    # on this feeder the reduced choice is within the MILP's own gap of the full one
    assert reduced.objective <= full.objective * (1.0 + spec.mip_gap)


def test_later_steps_with_a_site_trust_region_are_not_reduced(first_step, monkeypatch):
    pb, st, ev, _ = first_step
    monkeypatch.setattr(milp, "REDUCE_ABOVE", 5)
    here = st.copy()
    here.fixed[10] = 5
    spec = pb.step_spec(here, evaluate(pb, here).flows, 0.05, 10, 4, radius_sites=2)
    m = milp.build_model(spec)
    assert milp.reduce_candidates(m, spec, milp.new_solver()) is None
