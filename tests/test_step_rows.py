"""The step model's bulk rows (planner.optimize.rows), checked against brute force."""
import itertools

import numpy as np
import pytest

from planner.optimize.rows import ROW_TOL, Columns, add_limit_rows, box_reach, kept_coefficients


def test_box_reach_is_the_extreme_over_the_box_corners():
    rng = np.random.default_rng(3)
    C = rng.normal(size=(5, 4))
    lo, hi = -rng.random(4), rng.random(4)
    corners = np.array(list(itertools.product(*zip(lo, hi))))      # every vertex of the box
    values = C @ corners.T
    low, high = box_reach(C, lo, hi)
    np.testing.assert_allclose(low, values.min(axis=1), rtol=0, atol=1e-12)
    np.testing.assert_allclose(high, values.max(axis=1), rtol=0, atol=1e-12)


def test_dropped_coefficients_move_a_row_by_at_most_the_tolerance_when_few_sites_move():
    # 30 site columns of which at most 3 may move at once, and 2 free columns
    rng = np.random.default_rng(7)
    n_sites = 30
    C = rng.normal(size=(8, n_sites + 2)) * np.logspace(-9, -3, n_sites + 2)
    width = np.full(n_sites + 2, 0.3)
    limited = np.arange(n_sites + 2) < n_sites
    keep = kept_coefficients(C, width, limited, 3, tol=ROW_TOL)
    assert 0 < keep.sum() < keep.size              # something is dropped, something kept
    dropped = np.abs(np.where(keep, 0.0, C)) * width
    worst = np.sort(dropped[:, :n_sites], axis=1)[:, -3:].sum(axis=1) + dropped[:, n_sites:].sum(axis=1)
    assert worst.max() <= ROW_TOL * (1 + 1e-12)
    # and the largest coefficient of every row survives
    assert keep[np.arange(8), np.abs(C).argmax(axis=1)].all()


def test_limit_rows_leave_out_sides_no_change_can_reach_and_keep_unavoidable_breaches_out_of_the_gap():
    pyo = pytest.importorskip("pyomo.environ")
    m = pyo.ConcreteModel()
    m.x = pyo.Var([0, 1], bounds=(0, 2))
    cols = Columns([m.x[0], m.x[1]], scale=[0.01, 0.01], offset=[0.0, 0.0], lo=[0.0, 0.0], hi=[0.02, 0.02],
                   limited=[True, True], k_limited=None)
    # row 0: 0.96 + ... rises with x, lower side 0.95 unreachable, upper 1.05 unreachable -> no row
    # row 1: 0.90 + 0.5 du0 + 0.5 du1 <= at most 0.92 < 0.95 -> lower side kept, least breach 0.03
    # row 2: 1.04 + 1.0 du0 can pass 1.05 -> upper side kept, no fixed breach
    x0 = np.array([0.96, 0.90, 1.04])
    C = np.array([[1.0, 1.0], [0.5, 0.5], [1.0, 0.0]])
    fixed = add_limit_rows(pyo, m, "v", x0, C, np.full(3, 0.95), np.full(3, 1.05), cols)
    assert fixed == pytest.approx(0.03, abs=1e-12)
    assert len(m.v_limit_lo) == 1 and len(m.v_limit_hi) == 1
    # at x = (2, 2) (du = 0.02 each) row 1 sits at 0.92: the slack beyond the least breach is zero
    m.x[0].fix(2.0)
    m.x[1].fix(2.0)
    con = m.v_limit_lo[0]
    m.v_slack_lo[0].set_value(0.0)
    assert pyo.value(con.body) >= con.lower - 1e-12
    # and at x = 0 the row needs the extra 0.02
    m.x[0].fix(0.0)
    m.x[1].fix(0.0)
    m.v_slack_lo[0].set_value(0.02)
    assert pyo.value(con.body) == pytest.approx(con.lower, abs=1e-12)


def test_a_lever_column_with_no_room_to_move_reads_back_at_its_present_position():
    # an existing switchable bank with the unit trust radius at 0: its box has zero width, all
    # its coefficients are dropped and it is in no row, yet the step must report it unchanged
    import pandas as pd
    from pathlib import Path
    from planner.network.cdf import read_cdf
    from planner.optimize import milp
    from planner.optimize.ac_check import evaluate
    from planner.optimize.engine import LevelCase
    from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
    from planner.optimize.problem import PlanProblem
    net = read_cdf(Path(__file__).parent / "data" / "ieee14cdf.txt")
    net.shunts = pd.DataFrame({"shunt_id": ["c9"], "bus": [9], "mvar_per_step": [5.0], "steps_max": [4],
                               "steps_on": [2], "switchable": [True], "energised": [True]})
    pb = PlanProblem([LevelCase("base", net)], Levers(sites=[BankSite(14, 5.0, 4)]), Limits(v_min=0.9, v_max=1.1),
                     Objective(), Options())
    st = pb.initial_settings()
    ev = evaluate(pb, st)
    spec = pb.step_spec(st, ev.flows, 0.0, 0, 0, 0.0)
    sol = milp.solve_model(milp.build_model(spec), spec)
    assert sol.ok
    assert sol.exist.tolist() == [[2]]          # the bank's present steps
    assert sol.fixed.tolist() == [0.0] and sol.steps.tolist() == [[0]]
