"""The optimiser's voltage schedule against an independent reduced-space SLSQP with exact gradients.

Reference: tests/reference/schedule.py (shares no code with planner): generator setpoints as
the only variables, a dense Newton load flow per point, the loss gradient by the adjoint of
the load-flow equations and the constraint Jacobians by direct sensitivities. It is itself
checked against the full-space SLSQP of tests/reference/ac_opf.py (IEEE 30, 16.5959 MW) and
against central differences of its own load flow.

Case: four copies of the IEEE 30-bus system (tests/data/ieee30cdf.txt, the published IEEE
Common Data Format file) in a ring, 120 buses and 24 generator setpoints; the planner builds it
with planner.network.synthetic.ring_copies, the reference with its own ring_case.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.network.compile import PQ
from planner.network.synthetic import ring_copies
from planner.optimize.engine import LevelCase, plan
from planner.optimize.levers import Levers, Limits
from reference.ac_opf import ieee30_voltage_schedule
from reference.raw_cases import ieee30
from reference.full_schedule import full_space_schedule
from reference.schedule import _Schedule, ring_case, voltage_schedule

DATA = Path(__file__).resolve().parent / "data"
TIE_R, TIE_X = 0.005, 0.05


@pytest.fixture(scope="module")
def ring_ref():
    return voltage_schedule(ring_case(copies=4, tie_buses=(1, 2), tie_r=TIE_R, tie_x=TIE_X))


@pytest.fixture(scope="module")
def ring_net():
    return ring_copies(read_cdf(DATA / "ieee30cdf.txt"), 4, ties_per_link=2, tie_r_pu=TIE_R, tie_x_pu=TIE_X)


def test_reduced_space_reference_matches_full_space_slsqp_on_ieee30():
    reduced = voltage_schedule(ieee30())
    full = ieee30_voltage_schedule()
    assert reduced.success and reduced.worst_violation < 1e-7
    assert reduced.losses_mw == pytest.approx(full.losses_mw, rel=1e-6)
    assert reduced.losses_mw == pytest.approx(16.5959, abs=1e-4)
    assert reduced.losses_mw < reduced.base_losses_mw - 0.9


@pytest.mark.parametrize("copies", [2, 4])
def test_full_space_ring_optimum_equals_reduced_space(copies, ring_ref):
    """The two independent formulations (full space: angles, magnitudes and outputs as
    variables, power balance as equalities; reduced space: setpoints only, state by Newton)
    reach the same ring optimum (4 copies: 66.383690 MW, measured by both)."""
    case = ring_case(copies=copies, tie_buses=(1, 2), tie_r=TIE_R, tie_x=TIE_X)
    full = full_space_schedule(case)
    reduced = ring_ref if copies == 4 else voltage_schedule(case)
    assert full.success and full.max_mismatch < 1e-8 and full.bound_violation < 1e-8, full.message
    assert reduced.success
    assert full.losses_mw == pytest.approx(reduced.losses_mw, rel=1e-6)
    assert full.losses_mw < full.base_losses_mw - 1.0
    if copies == 4:
        assert full.losses_mw == pytest.approx(66.383690, abs=1e-5)
    # the same setpoints, generator by generator
    np.testing.assert_allclose(full.vset, reduced.vset, atol=1e-4)


def test_reference_gradients_are_exact():
    """Adjoint loss gradient and direct constraint Jacobians against central differences."""
    case = ring_case(copies=4, tie_buses=(1, 2), tie_r=TIE_R, tie_x=TIE_X)
    pb = _Schedule(case)
    rng = np.random.default_rng(3)
    u = case.vset[pb.gen] + rng.uniform(-0.02, 0.02, len(pb.gen))
    g = pb.losses_grad(u)
    jv = pb.load_vm_jac(u).copy()
    jq = pb.gen_q_jac(u).copy()
    h = 1e-6
    for k in range(0, len(u), 5):
        e = np.zeros(len(u))
        e[k] = h
        fd = (pb.losses(u + e) - pb.losses(u - e)) / (2 * h)
        assert g[k] == pytest.approx(fd, rel=1e-5, abs=1e-8)
        dv = (pb.load_vm(u + e) - pb.load_vm(u - e)) / (2 * h)
        np.testing.assert_allclose(jv[:, k], dv, atol=1e-7)
        dq = (pb.gen_q(u + e) - pb.gen_q(u - e)) / (2 * h)
        np.testing.assert_allclose(jq[:, k], dq, atol=1e-6)


def test_ring_case_is_the_same_network_in_both(ring_ref, ring_net):
    """Same losses at the file setpoints (reactive limits off in both) before any optimising."""
    fr = solve_flow(ring_net, enforce_q_limits=False, build_tables=False)
    assert fr.compiled.n == 120
    assert fr.losses_mw == pytest.approx(ring_ref.base_losses_mw, rel=1e-9)


def test_tool_schedule_matches_reference_on_120_bus_ring(ring_ref, ring_net):
    assert ring_ref.success, ring_ref.message
    p = plan([LevelCase("base", ring_net)], Levers(gen_v_range={"*": (0.95, 1.10)}), Limits(v_min=0.95, v_max=1.05))
    assert p.verified and not p.violations, p.message
    got = p.losses_after_mw["base"]
    # as good as the reference optimum to 1e-4 relative (lower is allowed: both are local optima)
    assert got <= ring_ref.losses_mw * (1 + 1e-4)
    assert got == pytest.approx(ring_ref.losses_mw, rel=1e-3)
    assert got < p.losses_before_mw["base"] - 3.0
    fr = p.flows_after["base"]
    c = fr.compiled
    load = (c.kind == PQ) & c.alive
    assert fr.vm[load].min() >= 0.95 - 1e-6 and fr.vm[load].max() <= 1.05 + 1e-6
    gen = (c.kind != PQ) & c.alive
    assert fr.vm[gen].min() >= 0.95 - 1e-6 and fr.vm[gen].max() <= 1.10 + 1e-6


def test_setpoint_only_steps_are_exact_qps_and_stop_at_the_reference_optimum(ring_ref, ring_net):
    # Setpoints only: every step is a convex QP solved once (no tangent cuts, no refinement
    # rounds), so the plan reaches the reduced-space SLSQP optimum to its own tolerances. The
    # loop then stops on the model's own expected gain: generators held at a reactive limit sit
    # on it only to the load flow's tolerance and must not look like a breach the next step
    # could cure (that phantom gain kept 8 more steps running, each rejected by the AC check).
    p = plan([LevelCase("base", ring_net)], Levers(gen_v_range={"*": (0.95, 1.10)}), Limits(v_min=0.95, v_max=1.05))
    assert p.verified and not p.violations, p.message
    assert p.losses_after_mw["base"] == pytest.approx(ring_ref.losses_mw, rel=2e-8)
    assert p.milp_solves == sum(1 for r in p.log if r.iteration > 0) <= 5
    assert p.stop_reason.startswith("converged (the model expects no gain"), p.stop_reason
