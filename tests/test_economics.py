"""Economics checked against hand calculations with the standard closed formulas.

The arithmetic is written beside each check; the closed formulas (annuity present value,
capital recovery factor, straight-line residual value) are standard engineering-economics
formulas, common practice.
"""
import math

import pytest

from planner.study.economics import (
    Economics,
    annual_loss_energy_mwh,
    annualised_capital_cost,
    benefit_cost_ratio,
    capital_recovery_factor,
    evaluate,
    life_cycle_present_values,
    loss_factor,
    net_present_value,
    pv_annuity_factor,
    simple_payback_years,
)


def test_loss_factor_buller_woodrow_common_practice():
    # LsF = k LF + (1-k) LF^2 (Buller-Woodrow form, common practice)
    # LF = 0.5, k = 0.2: 0.2*0.5 + 0.8*0.25 = 0.1 + 0.2 = 0.3
    assert loss_factor(0.5) == pytest.approx(0.3, abs=1e-12)
    # LF = 0.7, k = 0.3: 0.21 + 0.7*0.49 = 0.21 + 0.343 = 0.553
    assert loss_factor(0.7, k=0.3) == pytest.approx(0.553, abs=1e-12)
    # the loss factor lies between LF^2 and LF
    for lf in (0.1, 0.4, 0.9):
        assert lf ** 2 <= loss_factor(lf) <= lf
    with pytest.raises(ValueError, match="load_factor"):
        loss_factor(1.2)


def test_annual_loss_energy():
    # 0.30 MW * 1500 h + 0.12 MW * 4000 h + 0.05 MW * 3260 h = 450 + 480 + 163 = 1093 MWh
    e = annual_loss_energy_mwh({"peak": 0.30, "mid": 0.12, "light": 0.05},
                               {"peak": 1500, "mid": 4000, "light": 3260})
    assert e == pytest.approx(1093.0, abs=1e-9)
    with pytest.raises(ValueError, match="levels"):
        annual_loss_energy_mwh({"peak": 0.3}, {"light": 100})


def test_pv_annuity_factor_closed_formula():
    # (1 - 1.05^-20) / 0.05: 1.05^20 = 2.653298, 1/2.653298 = 0.376889,
    # (1 - 0.376889) / 0.05 = 12.46221
    assert pv_annuity_factor(0.05, 20) == pytest.approx(12.46221, abs=1e-5)
    # 10 %, 10 years: 1.1^10 = 2.593742, 1/.. = 0.385543, 0.614457/0.1 = 6.14457
    assert pv_annuity_factor(0.10, 10) == pytest.approx(6.14457, abs=1e-5)
    # zero rate: the factor is the number of years
    assert pv_annuity_factor(0.0, 7) == 7.0
    # a small rate tends to n (continuity at r = 0)
    assert pv_annuity_factor(1e-9, 7) == pytest.approx(7.0, rel=1e-6)


def test_capital_recovery_and_annualised_cost():
    # CRF(8 %, 15) = 0.08 / (1 - 1.08^-15); 1.08^15 = 3.172169, 1/.. = 0.315242,
    # 0.08 / 0.684758 = 0.116830
    assert capital_recovery_factor(0.08, 15) == pytest.approx(0.116830, abs=1e-6)
    assert capital_recovery_factor(0.08, 15) * pv_annuity_factor(0.08, 15) == pytest.approx(1.0)
    # 250 000 * 0.116830 = 29 207.4 a year
    assert annualised_capital_cost(250_000, 0.08, 15) == pytest.approx(29_207.4, abs=0.5)
    assert capital_recovery_factor(0.0, 20) == pytest.approx(0.05)


def test_npv_life_equal_to_horizon():
    # 12 000 a year, 5 %, 20 years, capital 100 000: 12000*12.46221 - 100000 = 49 546.5
    assert net_present_value(12_000, 100_000, 0.05, 20) == pytest.approx(49_546.5, abs=1.0)


def test_npv_life_shorter_than_horizon_replacement_and_residual():
    # capital 80 000, life 12 years, horizon 20, 6 %: replaced at year 12 (cost 80 000),
    # the replacement has 12 - 8 = 4 years left at year 20: residual 80000*4/12 = 26 666.67.
    # 1.06^12 = 2.012196 -> 80000/2.012196 = 39 757.55
    # 1.06^20 = 3.207135 -> 26666.67/3.207135 = 8 314.82
    # PV costs = 80000 + 39757.55 - 8314.82 = 111 442.73
    # PV savings = 10000 * (1 - 1/3.207135)/0.06 = 10000 * 11.469921 = 114 699.21
    pv = life_cycle_present_values(10_000, 80_000, 0.06, 20, 12)
    assert pv.replacement_years == (12,)
    assert pv.residual_value == pytest.approx(26_666.67, abs=0.01)
    assert pv.pv_costs == pytest.approx(111_442.73, abs=0.05)
    assert pv.pv_savings == pytest.approx(114_699.21, abs=0.05)
    assert net_present_value(10_000, 80_000, 0.06, 20, 12) == pytest.approx(
        114_699.21 - 111_442.73, abs=0.1)


def test_npv_life_shorter_several_replacements_and_exact_end():
    # life 5, horizon 15: replacements at 5 and 10; the third bank ends exactly at 15 -> no residual
    pv = life_cycle_present_values(0.0, 1000.0, 0.0, 15, 5)
    assert pv.replacement_years == (5, 10)
    assert pv.residual_value == 0.0
    assert pv.pv_costs == pytest.approx(3000.0)   # zero rate: 3 banks bought


def test_npv_life_longer_than_horizon_residual():
    # life 30, horizon 20: no replacement; residual 60000 * 10/30 = 20 000 at year 20
    # at 5 %: 20000 * 0.376889 = 7 537.79; PV costs = 60000 - 7537.79 = 52 462.21
    pv = life_cycle_present_values(5_000, 60_000, 0.05, 20, 30)
    assert pv.replacement_years == ()
    assert pv.residual_value == pytest.approx(20_000.0)
    assert pv.pv_costs == pytest.approx(52_462.21, abs=0.05)


def test_payback_and_bcr():
    # 90 000 / 15 000 = 6 years
    assert simple_payback_years(90_000, 15_000) == pytest.approx(6.0)
    assert simple_payback_years(90_000, -10.0) == math.inf
    # 124 622.1 / 100 000 = 1.246221
    assert benefit_cost_ratio(124_622.1, 100_000) == pytest.approx(1.246221)
    assert benefit_cost_ratio(10.0, 0.0) == math.inf


def test_evaluate_per_level_and_totals():
    econ = Economics(energy_value_per_mwh={"peak": 120.0, "light": 60.0},
                     demand_value_per_kw_year=40.0, discount_rate=0.07, horizon_years=15,
                     bank_life_years=20, om_fraction=0.02)
    before = {"peak": 0.210, "light": 0.060}
    after = {"peak": 0.150, "light": 0.048}
    hours = {"peak": 3000, "light": 5760}
    r = evaluate(before, after, hours, 75_000.0, econ, "peak")
    # MWh: peak 0.210*3000 = 630, after 450, saved 180; light 0.060*5760 = 345.6, after 276.48,
    # saved 69.12
    assert r.energy_before_mwh["peak"] == pytest.approx(630.0)
    assert r.energy_after_mwh["light"] == pytest.approx(276.48)
    assert r.energy_saved_mwh == pytest.approx({"peak": 180.0, "light": 69.12})
    # value: 180*120 = 21 600, 69.12*60 = 4 147.2 -> 25 747.2
    assert r.energy_value_saved == pytest.approx(25_747.2)
    # demand: (0.210-0.150) MW = 60 kW * 40 = 2 400
    assert r.peak_reduction_mw == pytest.approx(0.060)
    assert r.demand_value_saved == pytest.approx(2_400.0)
    assert r.annual_saving == pytest.approx(28_147.2)
    # O&M 2 % of 75 000 = 1 500; net 26 647.2; payback 75000/26647.2 = 2.81455 years
    assert r.annual_om == pytest.approx(1_500.0)
    assert r.payback_years == pytest.approx(2.81455, abs=1e-5)
    # 7 %, 15 years: 1.07^15 = 2.759032, 1/.. = 0.362446, AF = 0.637554/0.07 = 9.107914
    # life 20 > horizon 15: residual 75000*5/20 = 18 750 -> 18750*0.362446 = 6 795.86
    # PV savings = 28147.2*9.107914 = 256 362.3
    # PV costs = 75000 + 1500*9.107914 - 6795.86 = 75000 + 13661.87 - 6795.86 = 81 866.01
    assert r.pv_savings == pytest.approx(256_362.3, abs=0.5)
    assert r.pv_costs == pytest.approx(81_866.01, abs=0.05)
    assert r.npv == pytest.approx(256_362.3 - 81_866.01, abs=0.5)
    assert r.bcr == pytest.approx(256_362.3 / 81_866.01, rel=1e-5)
    # annualised over the 20-year life: 75000 * 0.07/(1-1.07^-20); 1.07^20 = 3.869684,
    # 1 - 0.258419 = 0.741581 -> CRF 0.094393 -> 7 079.5
    assert r.annualised_capital == pytest.approx(7_079.5, abs=0.5)
    d = r.as_dict()
    assert d["npv"] == r.npv and d["energy_saved_mwh"]["light"] == pytest.approx(69.12)


def test_evaluate_bad_input_names_the_field():
    econ = Economics(energy_value_per_mwh={"peak": 100.0})
    with pytest.raises(ValueError, match="light"):
        evaluate({"peak": 1, "light": 1}, {"peak": 1, "light": 1},
                 {"peak": 1, "light": 1}, 10.0, econ, "peak")
    with pytest.raises(ValueError, match="peak_level"):
        evaluate({"a": 1}, {"a": 1}, {"a": 1}, 10.0, Economics(50.0), "peak")
    with pytest.raises(ValueError, match="losses_after_mw"):
        evaluate({"a": 1}, {"b": 1}, {"a": 1}, 10.0, Economics(50.0), "a")


def test_evaluate_no_saving_never_pays_back():
    r = evaluate({"a": 0.1}, {"a": 0.1}, {"a": 8760}, 10_000.0, Economics(50.0), "a")
    assert r.payback_years == math.inf
    assert r.npv == pytest.approx(-10_000.0)
