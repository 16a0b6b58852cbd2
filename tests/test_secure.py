"""N-1 security as an optimiser constraint (planner.contingency.secure).

Case: the IEEE 30-bus case (tests/data/ieee30cdf.txt, see tests/data/README.md) with two outages
that break the 0.90-1.10 pu emergency band (common practice) in the base case: transformer 28-27
(bus 30 falls to about 0.864 pu) and line 2-5 (bus 5 to about 0.899 pu). A loss-valued plan with a
low value on losses builds no bank and leaves both breaches; the secured plan must cure them, as
shown by the independent N-1 verification (full AC of every outage, not the optimiser's rows).
The post-outage slopes are checked against finite differences of AC post-outage load flows.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planner.contingency.n1 import outage_list, verify_n1
from planner.contingency.secure import PostOutageRows, SecurityRequest, SecurityStatus, post_outage_slopes
from planner.flow.newton import solve_flow
from planner.network.cdf import read_cdf
from planner.optimize.engine import LevelCase, plan
from planner.optimize.levers import BankSite, Levers, Limits, Objective, Options
from planner.optimize.problem import PlanProblem
from planner.proof.run import plan_network

DATA = Path(__file__).resolve().parent / "data"
LIMITS = Limits(v_min=0.90, v_max=1.10)
CHEAP_LOSSES = Objective(kind="cost", loss_value_per_mw=10.0, capital_factor=1.0)


@pytest.fixture(scope="module")
def net30():
    return read_cdf(DATA / "ieee30cdf.txt")


@pytest.fixture(scope="module")
def outages(net30):
    return outage_list(net30, ids=["28-27", "2-5"])


def _voltage_breaches(net, result, outages):
    res = verify_n1(plan_network(net, result, "base"), outages, ratings=False, screen=False)
    return res.violations[res.violations.limit_kind.isin(["low voltage", "high voltage"])]


def test_secured_plan_cures_post_outage_breaches_the_plain_plan_leaves(net30, outages):
    levers = Levers(sites=[BankSite(30, 1.0, 10, cost_per_mvar=1.0), BankSite(5, 5.0, 10, cost_per_mvar=1.0)])
    plain = plan(net30, levers, LIMITS, CHEAP_LOSSES)
    before = _voltage_breaches(net30, plain, outages)
    assert sorted(before.element_id) == ["2-5", "28-27"]
    assert before.value.min() < 0.87                      # bus 30 with 28-27 out

    secured = plan(net30, levers, LIMITS, CHEAP_LOSSES, security=SecurityRequest(outages=outages, ratings=False))
    sec = secured.security
    assert sec.status is SecurityStatus.SECURE and sec.secure and sec.success
    assert sec.rounds == 1
    assert sorted(sec.tracked.element_id) == ["2-5", "28-27"] and set(sec.tracked["round"]) == {1}
    assert sec.remaining.empty
    assert sec.history[0]["voltage_breaches"] == 2 and sec.history[-1]["voltage_breaches"] == 0
    assert secured.verified and secured.banks
    # the independent check, with no screening estimate
    after = verify_n1(plan_network(net30, secured, "base"), outages, ratings=False, screen=False)
    assert after.violations.empty
    assert after.outcomes.v_min_pu.min() >= 0.90 - 1e-9
    assert secured.capital_cost > plain.capital_cost      # security costs banks the losses alone do not pay for
    d = secured.to_dict()["security"]
    assert d["status"] == "secure" and "licensed engineering practice" in d["caution"]


def test_levers_that_cannot_cure_say_not_secure(net30, outages):
    # one small bank far from bus 30 and bus 5: the breaches stay, and the result says so
    levers = Levers(sites=[BankSite(21, 0.5, 2, cost_per_mvar=1.0)])
    res = plan(net30, levers, LIMITS, CHEAP_LOSSES,
               security=SecurityRequest(outages=outages, ratings=False, max_rounds=2))
    sec = res.security
    assert sec.status is SecurityStatus.NOT_SECURE and not sec.success and not sec.secure
    assert set(sec.remaining.element_id) == {"2-5", "28-27"}
    assert (sec.remaining.excess > 0).all()
    assert "not N-1 secure" in sec.message
    # the optimiser's own AC check saw the post-outage breaches of the tracked outages too
    assert any(v.kind == "post-outage voltage" for v in res.violations)


def test_post_outage_slopes_match_finite_differences(net30, outages):
    levers = Levers(sites=[BankSite(30, 1.0, 10), BankSite(26, 1.0, 10)], gen_v_range={5: (0.95, 1.10)})
    pb = PlanProblem([LevelCase("base", net30)], levers, Limits(), Objective(), Options())
    st = pb.initial_settings()
    fr = solve_flow(compiled=pb.compiled_for(0, st))
    o = outages[1]                                        # transformer 28-27
    side = PostOutageRows(pb.levels, [o])
    rf, sol, br, alive = side._solve(pb, 0, st, fr, o)
    slopes = post_outage_slopes(pb, rf, sol, br, alive)
    vm0 = np.abs(sol.v)
    for col, move in ((0, "fixed"), (2, "vset")):
        st2 = st.copy()
        if move == "fixed":
            st2.fixed[0] = 1                              # 1 Mvar = 0.01 pu at bus 30
            du = 0.01
        else:
            st2.vset[0, 0] += 0.002
            du = 0.002
        fr2 = solve_flow(compiled=pb.compiled_for(0, st2), start=fr)
        _, sol2, _, _ = side._solve(pb, 0, st2, fr2, o)
        dv = np.abs(sol2.v) - vm0
        pred = slopes[:, col] * du
        assert np.abs(dv).max() > 1e-4
        assert np.abs(dv - pred).max() < 0.03 * np.abs(dv).max()
    # bus 30 is the most sensitive bus to its own bank
    assert int(np.argmax(slopes[:, 0])) == int(pb.compiled[0].index_of([30])[0])
    # a generator held at its reactive limit after the outage (bus 2) does not hold its voltage:
    # its setpoint column is zero
    held = PlanProblem([LevelCase("base", net30)], Levers(gen_v_range={2: (0.95, 1.10)}), Limits(), Objective(),
                       Options())
    st = held.initial_settings()
    side = PostOutageRows(held.levels, [o])
    rf, sol, br, alive = side._solve(held, 0, st, solve_flow(compiled=held.compiled_for(0, st)), o)
    assert sol.at_limit[held.vset_bus[0]] != 0
    assert np.all(post_outage_slopes(held, rf, sol, br, alive)[:, 0] == 0.0)


STUDIES = DATA / "studies"


def test_study_alternative_secured_against_its_outages():
    from planner.report.convert import report_data
    from planner.report.render import report_files
    from planner.study.run import run_study
    from planner.study.spec import read_study
    spec = read_study(STUDIES / "ieee30_secure.toml")
    assert [a.secure_against_outages for a in spec.alternatives] == [False, True]
    res = run_study(spec, jobs=1)
    plain, secured = (a.plan for a in res.alternatives)
    assert plain.security is None and secured.security.status is SecurityStatus.SECURE
    n1 = res.proof[0]["outages"]
    assert n1["cases"]["base"]["peak"]["count"] == 2
    assert n1["cases"]["Losses only"]["peak"]["count"] == 2          # the plain plan leaves both
    assert n1["cases"]["N-1 secure"]["peak"]["count"] == 0
    assert n1["cases"]["N-1 secure"]["peak"]["cured"] == 2
    assert set(n1["secured"]) == {"N-1 secure"}
    html = report_files(report_data(res))["report.html"]
    assert "optimised with N-1 security as a constraint" in html
    assert "licensed engineering practice" in html


def test_secure_key_needs_an_outage_section(tmp_path):
    from planner.errors import InputError
    from planner.study.spec import read_study
    text = (STUDIES / "ieee30_secure.toml").read_text()
    text = text[:text.index("[outages]")].replace('network = "../ieee30cdf.txt"',
                                                   f'network = "{(DATA / "ieee30cdf.txt").as_posix()}"')
    p = tmp_path / "s.toml"
    p.write_text(text)
    with pytest.raises(InputError) as err:
        read_study(p)
    assert "alternatives[1].secure_against_outages" in str(err.value) and "[outages]" in str(err.value)


def test_outages_near_the_band_are_tracked_after_the_breaching_ones(net30):
    # base case: 28-27 and 2-5 break the band; 27-30 leaves bus 30 at about 0.937 pu (inside by
    # 0.037) and 6-7 bus 7 at about 0.953 pu (inside by 0.053)
    outs = outage_list(net30, ids=["28-27", "2-5", "27-30", "6-7"])
    levers = Levers(sites=[BankSite(30, 1.0, 10, cost_per_mvar=1.0), BankSite(5, 5.0, 10, cost_per_mvar=1.0)])
    res = plan(net30, levers, LIMITS, CHEAP_LOSSES,
               security=SecurityRequest(outages=outs, ratings=False, watch_pu=0.04))
    sec = res.security
    assert list(sec.tracked.element_id) == ["28-27", "2-5", "27-30"]     # worst breach first, then nearest
    assert sec.status is SecurityStatus.SECURE
