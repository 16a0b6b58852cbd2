"""Economics of loss reduction: what the saved energy and peak demand are worth against the capital.

Plain functions on plain numbers, plus :func:`evaluate`, which turns per-level losses before and
after a plan into one :class:`EconomicResult`.

Conventions (stated once, used everywhere here):

* Money is in one currency unit throughout, in constant (real) prices: the discount rate is a real
  rate and a replacement bank costs the same as the first one.
* Capital is spent at the start of year 1 (time 0). Savings and O&M fall at the end of each year
  1..horizon.
* Bank life shorter than the horizon: the bank is replaced at the end of each life (years L, 2L, ...
  strictly before the horizon) at the full capital cost.
* Whatever life is left in the last bank at the horizon end is credited as residual value,
  straight-line: ``capital * remaining_life / life``, discounted from the horizon year. A bank whose
  life ends exactly at the horizon has no residual value; a life longer than the horizon leaves
  ``capital * (life - horizon) / life``.
* Present value of costs = capital + replacements + O&M - residual value (the residual value is
  capital given back, so it lowers the cost). Present value of savings = energy and demand value
  saved each year. NPV = PV(savings) - PV(costs); benefit-cost ratio = PV(savings) / PV(costs).
* Simple payback = capital / (annual saving - annual O&M), undiscounted; ``inf`` when that net
  saving is zero or negative (the plan never pays back).
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Mapping, NamedTuple

__all__ = [
    "loss_factor",
    "annual_loss_energy_mwh",
    "pv_annuity_factor",
    "capital_recovery_factor",
    "annualised_capital_cost",
    "life_cycle_present_values",
    "net_present_value",
    "simple_payback_years",
    "benefit_cost_ratio",
    "Economics",
    "EconomicResult",
    "evaluate",
    "npv_sensitivity",
]


def _check_finite(name: str, value: float) -> float:
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"economics: {name} must be a finite number, got {value!r}")
    return value


def loss_factor(load_factor: float, k: float = 0.2) -> float:
    """Loss factor from load factor, ``LsF = k LF + (1 - k) LF^2``.

    Buller-Woodrow form, common practice; ``k`` is usually taken between 0.15 and 0.3. The loss
    factor is the ratio of average to peak losses, so peak losses (MW) times the loss factor times
    8760 h gives annual loss energy when only the peak is solved.

    >>> round(loss_factor(0.6), 4)          # 0.2*0.6 + 0.8*0.36
    0.408
    >>> loss_factor(1.0), loss_factor(0.0)
    (1.0, 0.0)
    """
    lf = _check_finite("load_factor", load_factor)
    k = _check_finite("k", k)
    if not 0.0 <= lf <= 1.0:
        raise ValueError(f"economics: load_factor must be between 0 and 1, got {lf}")
    if not 0.0 <= k <= 1.0:
        raise ValueError(f"economics: k must be between 0 and 1, got {k}")
    return k * lf + (1.0 - k) * lf * lf


def annual_loss_energy_mwh(losses_mw: Mapping[str, float], hours: Mapping[str, float]) -> float:
    """Annual energy of losses, ``sum(losses_mw[level] * hours[level])`` in MWh.

    Each load level stands for ``hours[level]`` hours a year at its solved losses.

    >>> annual_loss_energy_mwh({"peak": 0.20, "light": 0.05}, {"peak": 2000, "light": 6760})
    738.0
    """
    _same_levels({"losses_mw": losses_mw, "hours": hours})
    total = 0.0
    for level, mw in losses_mw.items():
        h = _check_finite(f"hours[{level!r}]", hours[level])
        if h < 0:
            raise ValueError(f"economics: hours[{level!r}] must not be negative, got {h}")
        total += _check_finite(f"losses_mw[{level!r}]", mw) * h
    return total


def pv_annuity_factor(rate: float, years: float) -> float:
    """Present value of 1 a year for ``years`` years at ``rate``: ``(1 - (1 + r)^-n) / r``.

    With ``rate == 0`` the factor is simply ``years``.

    >>> round(pv_annuity_factor(0.05, 20), 4)   # (1 - 1.05**-20) / 0.05
    12.4622
    >>> pv_annuity_factor(0.0, 15)
    15.0
    """
    r = _check_finite("discount rate", rate)
    n = _check_finite("years", years)
    if r <= -1.0:
        raise ValueError(f"economics: discount rate must be above -1, got {r}")
    if n < 0:
        raise ValueError(f"economics: years must not be negative, got {n}")
    if r == 0.0:
        return n
    return (1.0 - (1.0 + r) ** -n) / r


def capital_recovery_factor(rate: float, years: float) -> float:
    """Equal yearly payment that repays 1 over ``years`` at ``rate``: ``r / (1 - (1 + r)^-n)``.

    The reciprocal of :func:`pv_annuity_factor`; ``1 / years`` at zero rate.

    >>> round(capital_recovery_factor(0.08, 10), 6)   # 0.08 / (1 - 1.08**-10)
    0.149029
    >>> capital_recovery_factor(0.0, 4)
    0.25
    """
    f = pv_annuity_factor(rate, years)
    if f == 0.0:
        raise ValueError("economics: capital recovery needs years > 0")
    return 1.0 / f


def annualised_capital_cost(capital: float, rate: float, life_years: float) -> float:
    """Capital spread into equal yearly amounts over the equipment life: ``capital * CRF(r, life)``.

    >>> round(annualised_capital_cost(100_000, 0.08, 10), 2)
    14902.95
    """
    return _check_finite("capital", capital) * capital_recovery_factor(rate, life_years)


class LifeCyclePV(NamedTuple):
    """Present values of one plan's cash flows (see the module docstring for the rule)."""

    pv_savings: float
    pv_capital: float          # first bank, at time 0
    pv_replacements: float
    pv_om: float
    pv_residual: float         # credited, so it lowers pv_costs
    pv_costs: float
    replacement_years: tuple
    residual_value: float      # undiscounted, at the horizon end


def life_cycle_present_values(annual_saving: float, capital: float, rate: float,
                              horizon_years: int, life_years: int,
                              annual_om: float = 0.0) -> LifeCyclePV:
    """Present values of savings and costs over the study horizon.

    Replacement at each end of life strictly before the horizon; straight-line residual value of the
    last bank at the horizon end.

    >>> pv = life_cycle_present_values(10_000, 50_000, 0.05, 20, 15)
    >>> pv.replacement_years, pv.residual_value     # replaced at year 15, 10 of 15 years left
    ((15,), 33333.333333333336)
    >>> round(pv.pv_costs, 2)   # 50000 + 50000*1.05**-15 - 33333.33*1.05**-20
    61487.87
    """
    s = _check_finite("annual saving", annual_saving)
    c = _check_finite("capital", capital)
    om = _check_finite("annual O&M", annual_om)
    r = _check_finite("discount rate", rate)
    n = int(horizon_years)
    life = int(life_years)
    if n != horizon_years or n < 1:
        raise ValueError(f"economics: horizon_years must be a whole number >= 1, got {horizon_years}")
    if life != life_years or life < 1:
        raise ValueError(f"economics: bank life must be a whole number of years >= 1, got {life_years}")
    if c < 0:
        raise ValueError(f"economics: capital must not be negative, got {c}")

    af = pv_annuity_factor(r, n)
    disc = lambda year: (1.0 + r) ** -year  # noqa: E731  (discount factor of a year-end amount)
    replacement_years = tuple(range(life, n, life))
    pv_repl = sum(c * disc(y) for y in replacement_years)
    last_install = replacement_years[-1] if replacement_years else 0
    residual = c * (last_install + life - n) / life
    pv_res = residual * disc(n)
    pv_cap = c
    pv_om = om * af
    pv_costs = pv_cap + pv_repl + pv_om - pv_res
    return LifeCyclePV(s * af, pv_cap, pv_repl, pv_om, pv_res, pv_costs, replacement_years, residual)


def net_present_value(annual_saving: float, capital: float, rate: float, horizon_years: int,
                      life_years: int | None = None, annual_om: float = 0.0) -> float:
    """NPV of a constant yearly saving against the capital, ``PV(savings) - PV(costs)``.

    ``life_years`` defaults to the horizon (no replacement, no residual value).

    >>> round(net_present_value(10_000, 100_000, 0.05, 20), 2)   # 10000*12.46221 - 100000
    24622.1
    """
    life = horizon_years if life_years is None else life_years
    pv = life_cycle_present_values(annual_saving, capital, rate, horizon_years, life, annual_om)
    return pv.pv_savings - pv.pv_costs


def simple_payback_years(capital: float, annual_saving: float) -> float:
    """Years of (undiscounted) saving to recover the capital; ``inf`` when the saving is <= 0.

    >>> simple_payback_years(120_000, 30_000)
    4.0
    >>> simple_payback_years(120_000, 0.0)
    inf
    """
    c = _check_finite("capital", capital)
    s = _check_finite("annual saving", annual_saving)
    if s <= 0.0:
        return math.inf
    return c / s


def benefit_cost_ratio(pv_savings: float, pv_costs: float) -> float:
    """``PV(savings) / PV(costs)``; ``inf`` for a positive saving at no cost, ``nan`` for 0/0.

    >>> round(benefit_cost_ratio(124_622.1, 100_000), 4)
    1.2462
    """
    s = _check_finite("PV of savings", pv_savings)
    c = _check_finite("PV of costs", pv_costs)
    if c <= 0.0:
        return math.inf if s > 0 else math.nan
    return s / c


@dataclass(frozen=True)
class Economics:
    """Economic inputs of a study.

    energy_value_per_mwh: value of one MWh of losses avoided; one number, or one per load level
        (a dict level -> value, e.g. higher at peak).
    demand_value_per_kw_year: value of 1 kW of peak-loss reduction for one year (avoided capacity).
    discount_rate: real rate per year, e.g. 0.05.
    horizon_years: study horizon.
    bank_life_years: equipment life; ``None`` means equal to the horizon.
    om_fraction: yearly operation and maintenance as a fraction of capital (e.g. 0.01).
    """

    energy_value_per_mwh: float | Mapping[str, float]
    demand_value_per_kw_year: float = 0.0
    discount_rate: float = 0.05
    horizon_years: int = 20
    bank_life_years: int | None = None
    om_fraction: float = 0.0

    def energy_value(self, level: str) -> float:
        """Value per MWh at one load level."""
        v = self.energy_value_per_mwh
        if isinstance(v, Mapping):
            if level not in v:
                raise ValueError(f"economics: energy_value_per_mwh has no value for level {level!r}")
            return _check_finite(f"energy_value_per_mwh[{level!r}]", v[level])
        return _check_finite("energy_value_per_mwh", v)

    @property
    def life(self) -> int:
        return self.horizon_years if self.bank_life_years is None else self.bank_life_years


@dataclass
class EconomicResult:
    """Result of :func:`evaluate`; money in the currency of the inputs, energy in MWh per year."""

    levels: list
    energy_before_mwh: dict
    energy_after_mwh: dict
    energy_saved_mwh: dict
    energy_value_saved_by_level: dict
    energy_value_saved: float          # per year, all levels
    peak_level: str
    peak_reduction_mw: float
    demand_value_saved: float          # per year
    annual_saving: float               # energy + demand value, per year
    annual_om: float
    net_annual_saving: float           # annual_saving - annual_om
    capital_cost: float
    annualised_capital: float          # capital * CRF(rate, bank life)
    payback_years: float               # simple, undiscounted; inf if never
    pv_savings: float
    pv_costs: float
    npv: float
    bcr: float
    discount_rate: float
    horizon_years: int
    bank_life_years: int
    replacement_years: list = field(default_factory=list)
    residual_value: float = 0.0

    def as_dict(self) -> dict:
        """Plain dict (JSON-like; non-finite floats stay as ``inf``/``nan`` floats)."""
        return asdict(self)


def _same_levels(tables: Mapping[str, Mapping]) -> list:
    names = list(tables)
    ref = list(tables[names[0]])
    for name in names[1:]:
        missing = [lv for lv in ref if lv not in tables[name]]
        extra = [lv for lv in tables[name] if lv not in tables[names[0]]]
        if missing or extra:
            raise ValueError(f"economics: {name} levels {sorted(tables[name])} do not match "
                             f"{names[0]} levels {sorted(ref)}")
    return ref


def evaluate(losses_before_mw: Mapping[str, float], losses_after_mw: Mapping[str, float],
             hours: Mapping[str, float], capital_cost: float, econ: Economics,
             peak_level: str) -> EconomicResult:
    """Value of the loss reduction of one plan.

    Energy saved per level is ``(before - after) * hours``; the demand saving is the loss reduction
    at ``peak_level`` in kW times ``demand_value_per_kw_year``. Present values follow the rule in the
    module docstring.

    >>> e = Economics(energy_value_per_mwh=80.0, demand_value_per_kw_year=50.0,
    ...               discount_rate=0.05, horizon_years=20)
    >>> r = evaluate({"peak": 0.20, "light": 0.05}, {"peak": 0.14, "light": 0.04},
    ...              {"peak": 2000, "light": 6760}, 60_000.0, e, "peak")
    >>> r.energy_saved_mwh["peak"], round(r.energy_saved_mwh["light"], 1)
    (120.0, 67.6)
    >>> round(r.annual_saving, 1)        # 80*(120+67.6) + 50*60 kW
    18008.0
    >>> round(r.payback_years, 3), round(r.npv, 1)   # 60000/18008; 18008*12.46221 - 60000
    (3.332, 164419.5)
    """
    levels = _same_levels({"losses_before_mw": losses_before_mw,
                           "losses_after_mw": losses_after_mw, "hours": hours})
    if peak_level not in losses_before_mw:
        raise ValueError(f"economics: peak_level {peak_level!r} is not one of the levels {levels}")
    capital = _check_finite("capital_cost", capital_cost)
    if capital < 0:
        raise ValueError(f"economics: capital_cost must not be negative, got {capital}")
    om_frac = _check_finite("om_fraction", econ.om_fraction)
    demand_value = _check_finite("demand_value_per_kw_year", econ.demand_value_per_kw_year)

    before, after, saved, value = {}, {}, {}, {}
    for lv in levels:
        h = _check_finite(f"hours[{lv!r}]", hours[lv])
        if h < 0:
            raise ValueError(f"economics: hours[{lv!r}] must not be negative, got {h}")
        before[lv] = _check_finite(f"losses_before_mw[{lv!r}]", losses_before_mw[lv]) * h
        after[lv] = _check_finite(f"losses_after_mw[{lv!r}]", losses_after_mw[lv]) * h
        saved[lv] = before[lv] - after[lv]
        value[lv] = saved[lv] * econ.energy_value(lv)
    energy_value = sum(value.values())
    peak_red = float(losses_before_mw[peak_level]) - float(losses_after_mw[peak_level])
    demand_saved = peak_red * 1000.0 * demand_value
    annual = energy_value + demand_saved
    om = om_frac * capital
    net = annual - om
    life = econ.life
    pv = life_cycle_present_values(annual, capital, econ.discount_rate, econ.horizon_years,
                                   life, om)
    return EconomicResult(
        levels=list(levels),
        energy_before_mwh=before, energy_after_mwh=after, energy_saved_mwh=saved,
        energy_value_saved_by_level=value, energy_value_saved=energy_value,
        peak_level=peak_level, peak_reduction_mw=peak_red, demand_value_saved=demand_saved,
        annual_saving=annual, annual_om=om, net_annual_saving=net, capital_cost=capital,
        annualised_capital=annualised_capital_cost(capital, econ.discount_rate, life),
        payback_years=simple_payback_years(capital, net),
        pv_savings=pv.pv_savings, pv_costs=pv.pv_costs, npv=pv.pv_savings - pv.pv_costs,
        bcr=benefit_cost_ratio(pv.pv_savings, pv.pv_costs),
        discount_rate=float(econ.discount_rate), horizon_years=int(econ.horizon_years),
        bank_life_years=int(life), replacement_years=list(pv.replacement_years),
        residual_value=pv.residual_value,
    )


def npv_sensitivity(losses_before_mw: Mapping[str, float], losses_after_mw: Mapping[str, float],
                    hours: Mapping[str, float], capital_cost: float, econ: Economics,
                    peak_level: str, *, value_change: float = 0.25, rate_change: float = 0.02,
                    load_change: float = 0.10) -> list:
    """NPV of one plan with one input moved down and up at a time (a tornado table).

    Rows: energy and demand value x (1 -/+ ``value_change``); discount rate -/+ ``rate_change``
    (not below zero); load -/+ ``load_change``. The load row scales the losses before and after
    by the square of the load factor (series losses go with current squared, common practice;
    an approximation: the plan's settings are not re-optimised or re-solved at the new load).

    >>> e = Economics(energy_value_per_mwh=80.0, discount_rate=0.05, horizon_years=20)
    >>> rows = npv_sensitivity({"peak": 0.2}, {"peak": 0.1}, {"peak": 8760}, 50_000.0, e, "peak")
    >>> [r["input"] for r in rows]
    ['energy and demand value', 'discount rate', 'load']
    >>> round(rows[0]["npv_base"])      # 0.1 MW * 8760 h * 80 = 70,080 a year; x 12.46221 - 50,000
    823352
    >>> round(rows[0]["npv_low"]), round(rows[0]["npv_high"])   # 52,560 and 87,600 a year
    (605014, 1041690)
    >>> round(rows[2]["npv_high"])      # losses and savings x 1.21: 84,797 a year (hand sum)
    1006756
    """
    from dataclasses import replace

    def npv(before, after, e):
        return evaluate(before, after, hours, capital_cost, e, peak_level).npv

    base = npv(losses_before_mw, losses_after_mw, econ)

    def scaled_value(f):
        v = econ.energy_value_per_mwh
        v = {k: x * f for k, x in v.items()} if isinstance(v, Mapping) else v * f
        return replace(econ, energy_value_per_mwh=v, demand_value_per_kw_year=econ.demand_value_per_kw_year * f)

    def scaled_load(f):
        return ({k: x * f * f for k, x in losses_before_mw.items()},
                {k: x * f * f for k, x in losses_after_mw.items()})

    r = econ.discount_rate
    r_lo = max(0.0, r - rate_change)
    rows = [
        {"input": "energy and demand value", "low": 1 - value_change, "high": 1 + value_change,
         "unit": "times the study value",
         "npv_low": npv(losses_before_mw, losses_after_mw, scaled_value(1 - value_change)),
         "npv_high": npv(losses_before_mw, losses_after_mw, scaled_value(1 + value_change))},
        {"input": "discount rate", "low": r_lo, "high": r + rate_change, "unit": "per year",
         "npv_low": npv(losses_before_mw, losses_after_mw, replace(econ, discount_rate=r_lo)),
         "npv_high": npv(losses_before_mw, losses_after_mw, replace(econ, discount_rate=r + rate_change))},
        {"input": "load", "low": 1 - load_change, "high": 1 + load_change, "unit": "times the study load",
         "npv_low": npv(*scaled_load(1 - load_change), econ),
         "npv_high": npv(*scaled_load(1 + load_change), econ)},
    ]
    for row in rows:
        row["npv_base"] = base
    return rows
