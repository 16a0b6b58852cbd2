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
    # the reduced choice is kept however far from the bound (the feeder's relaxation gap is
    # 2 %: with the default acceptance the full MILP would run, see the test below)
    monkeypatch.setattr(milp, "REDUCE_ACCEPT", float("inf"))
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


def test_later_steps_of_a_large_placement_start_at_the_present_point(first_step, monkeypatch):
    pb, st, _, spec0 = first_step
    here = st.copy()
    here.fixed[[11, 22, 28]] = [3, 4, 8]             # buses 13, 24, 30
    spec = pb.step_spec(here, evaluate(pb, here).flows, 0.05, 10, 4, radius_sites=2)
    # 32 candidates: below the threshold no start is made
    assert milp.present_point_start(milp.build_model(spec), spec) is None
    assert milp.present_point_start(milp.build_model(spec0), spec0) is None
    monkeypatch.setattr(milp, "REDUCE_ABOVE", 5)
    m = milp.build_model(spec)
    start = milp.present_point_start(m, spec)
    values = {id(v): x for v, x in start}
    assert [values[id(m.z[s])] for s in range(32)] == [1.0 if s in (11, 22, 28) else 0.0 for s in range(32)]
    assert [values[id(m.nf[s])] for s in range(32)] == list(here.fixed.astype(float))
    # the first step (no sites in use) gets none
    assert milp.present_point_start(milp.build_model(spec0), spec0) is None
    with_start, _, _ = milp.solve_step(spec)
    monkeypatch.setattr(milp, "REDUCE_ABOVE", 100)
    without, _, _ = milp.solve_step(spec)
    assert with_start.ok and without.ok
    # both solves end within the MILP gap of each other, and no worse than staying put: the
    # present point's own model objective, every decision fixed at the start
    assert with_start.objective == pytest.approx(without.objective, rel=spec.mip_gap)
    assert with_start.objective <= without.bound * (1.0 + spec.mip_gap) + 1e-12
    monkeypatch.setattr(milp, "REDUCE_ABOVE", 5)
    fixed = milp.build_model(spec)
    for v, x in milp.present_point_start(fixed, spec):
        v.fix(x)
    stay = milp.solve_model(fixed, spec)
    assert stay.ok and np.array_equal(stay.fixed, here.fixed)
    assert with_start.objective <= stay.objective + 1e-12


def test_a_reduced_choice_far_from_the_bound_falls_back_to_the_full_milp(first_step, monkeypatch):
    _, _, _, spec = first_step
    monkeypatch.setattr(milp, "REDUCE_ABOVE", 5)
    monkeypatch.setattr(milp, "REDUCE_ACCEPT", float("inf"))
    reduced, solves_reduced, _ = milp.solve_step(spec)
    # acceptance 0: every reduced choice counts as far, the full MILP runs from it
    monkeypatch.setattr(milp, "REDUCE_ACCEPT", 0)
    fell_back, solves_full, _ = milp.solve_step(spec)
    assert reduced.ok and fell_back.ok
    assert solves_full >= 2 and solves_full >= solves_reduced
    # started at the reduced choice, the full MILP returns one at least as good (within the
    # cut refinement's tolerance), and the bound stays the relaxation's
    assert fell_back.objective <= reduced.objective * (1.0 + 1e-5)
    assert fell_back.bound <= reduced.bound + 1e-12
