"""The optimiser's final search against an independent rounding search (own file: the
50-kvar placement takes a while).

References (tests/reference/, sharing no code with planner): ac_opf.feeder33_bank_sizing
(full-AC continuous optimum, scipy SLSQP) and sweep.sweep_feeder33 (backward/forward sweep).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.network.io import read_network
from planner.optimize.engine import LevelCase
from planner.optimize.engine import plan as optimize_plan
from planner.optimize.levers import BankSite, Levers, Limits
from reference.ac_opf import feeder33_bank_sizing
from reference.sweep import sweep_feeder33

DATA = Path(__file__).resolve().parent / "data"
NO_V_LIMITS = Limits(v_min=0.0, v_max=2.0)
ALL_BUSES = range(2, 34)


@pytest.fixture(scope="module")
def f33():
    return read_network(DATA / "feeder33_tables")


def sites_at(buses, unit=0.15, units=10, **kw):
    return [BankSite(int(b), unit, units, **kw) for b in buses]


def losses_kw(plan, level="base"):
    return plan.losses_after_mw[level] * 1000.0


def test_feeder33_small_units_at_least_as_good_as_rounding_the_continuous_optimum(f33):
    # 50-kvar units, up to 40 per site, at most 3 sites anywhere on the feeder. Independent
    # search here: the full-AC continuous optimum (scipy SLSQP, tests/reference/ac_opf.py) at
    # the three buses of the enumerated 150-kvar optimum and at the plan's own buses, each
    # rating rounded down and up to whole units (8 plans per bus set), every rounding solved
    # by the reference backward/forward sweep. The plan must be at least as good as the best.
    plan = optimize_plan([LevelCase("base", f33)], Levers(sites=sites_at(ALL_BUSES, unit=0.05, units=40),
                                                          max_new_sites=3), NO_V_LIMITS)
    assert plan.verified, plan.message
    assert plan.success and plan.status.name == "VERIFIED"
    rows = []
    for buses in ((13, 24, 30), tuple(b["bus"] for b in plan.banks)):
        ratings = feeder33_bank_sizing(buses).ratings_mvar
        for ups in np.ndindex(2, 2, 2):
            q = np.zeros(33)
            for (bus, mvar), up in zip(sorted(ratings.items()), ups):
                q[bus - 1] += 0.05 * min(40, np.floor(mvar / 0.05) + up)
            rows.append(q)
    best = sweep_feeder33(np.array(rows)).losses_kw.min()
    assert 130.0 < best < 133.0
    assert losses_kw(plan) <= best * (1 + 1e-9)
    # the plan's own figure is the AC flow's (and the sweep agrees with it)
    q = np.zeros(33)
    for b in plan.banks:
        q[b["bus"] - 1] = b["mvar"]
    assert sweep_feeder33(q[None, :]).losses_kw[0] == pytest.approx(losses_kw(plan), rel=1e-6)
    # the bound is below the plan, and the plan's predicted losses are for this plan's settings
    assert plan.bound["lower_bound"] <= plan.objective_after + 1e-12
    assert set(plan.losses_predicted_mw) == {"base"}
