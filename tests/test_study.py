"""Study files and the study runner: ``read_study``, ``run_study``, ``run_study_file``.

The study files under tests/data/studies/ are invented for these tests. Every AC figure the runner
reports is re-derived here with an independent load flow of the exact settings (loads scaled and
banks added as bus shunts by this file, not by the runner), and the economics are recomputed from
the same numbers.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from planner.errors import InputError
from planner.flow.newton import solve_flow
from planner.network.io import read_network, write_network
from planner.study.economics import Economics, evaluate
from planner.commands.study import run_study_file
from planner.report.convert import report_data
from planner.study.result import StudyStatus
from planner.study.run import plan_alternatives, run_study
from planner.study.spec import read_study

DATA = Path(__file__).resolve().parent / "data"
FEEDER = DATA / "feeder33_tables"
STUDIES = DATA / "studies"
EVERY_KEY = STUDIES / "every_key.toml"
TWO_LEVELS = STUDIES / "feeder33_two_levels.toml"


def write_study(tmp_path, text, name="case.toml") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def every_key_with(tmp_path, old, new) -> Path:
    """A copy of every_key.toml with the first ``old`` replaced by ``new`` (``old`` must occur)."""
    text = EVERY_KEY.read_text()
    assert old in text, old
    return write_study(tmp_path, text.replace(old, new, 1))


def read_error(path) -> str:
    with pytest.raises(InputError) as info:
        read_study(path)
    msg = str(info.value)
    assert "\n" not in msg
    return msg


# --- read_study: accepted keys ------------------------------------------------------------------

def test_every_documented_key_is_read():
    s = read_study(EVERY_KEY)
    assert s.title == "Every key (test)" and s.currency == "TST"
    assert s.question.startswith("Does the reader")
    assert s.network_path == STUDIES / "../feeder33_tables"
    assert s.output == STUDIES / "out"
    assert (s.v_min_pu, s.v_max_pu, s.ratings, s.q_limits) == (0.93, 1.06, False, False)
    assert s.bus_limits == {18: (0.90, 1.05), 33: (0.91, 1.04)}
    assert [lv.name for lv in s.levels] == ["peak", "shoulder", "light"]
    peak, shoulder, light = s.levels
    assert (peak.hours, peak.p_scale, peak.q_scale) == (1500.0, 1.0, 1.0)
    assert peak.bus_scale == {18: 1.2, 33: 0.8}
    assert (peak.v_min_pu, peak.v_max_pu) == (0.92, 1.05)
    assert (shoulder.p_scale, shoulder.q_scale, shoulder.hours) == (0.7, 0.6, 4000.0)
    assert (light.p_scale, light.q_scale) == (0.4, 0.4)
    assert s.peak_level == "peak"
    b = s.banks
    assert b.candidates == [14, 18, 30]
    assert (b.unit_mvar, b.max_units, b.kinds, b.max_new_sites, b.budget) == \
        (0.15, 8, ("fixed", "switched"), 2, 50000.0)
    assert b.existing_switchable is False
    assert (b.per_site, b.per_mvar, b.switched_per_mvar, b.switched_per_site) == (2000.0, 8000.0, 3000.0, 1500.0)
    assert set(b.overrides) == {33}
    o = b.overrides[33]
    assert (o.unit_mvar, o.max_units, tuple(o.kinds)) == (0.3, 3, ("switched",))
    assert s.gen_range == {"*": (0.98, 1.04), 1: (1.00, 1.03)}
    assert s.setpoints_per_level is False and s.taps is True
    e = s.economics
    assert e["energy_value_per_mwh"] == {"peak": 90.0, "shoulder": 60.0, "light": 40.0}
    assert (e["demand_value_per_kw_year"], e["discount_rate"], e["horizon_years"],
            e["bank_life_years"], e["om_fraction"]) == (55.0, 0.06, 15, 10, 0.015)
    assert s.objective == "cost" and s.max_iterations == 12
    assert (s.rel_tolerance, s.mip_gap, s.step_seconds) == (0.001, 0.002, 5.0)
    a1, a2 = s.alternatives
    assert (a1.name, a1.description, a1.banks, a1.setpoints, a1.taps, a1.budget, a1.max_new_sites) == \
        ("Banks", "banks only", True, False, False, 20000.0, 1)
    assert (a2.name, a2.banks, a2.setpoints, a2.taps, a2.budget, a2.max_new_sites) == \
        ("All", True, True, True, None, None)


def test_defaults_of_a_minimal_study(tmp_path):
    s = read_study(write_study(tmp_path, '[study]\ntitle = "M"\nnetwork = "n"\n'
                                         '[[levels]]\nname = "only"\nhours = 8760\n'))
    assert (s.v_min_pu, s.v_max_pu) == (0.95, 1.05)
    assert (s.banks.unit_mvar, s.banks.max_units, s.banks.kinds) == (0.3, 4, ("fixed", "switched"))
    assert s.banks.candidates == [] and s.gen_range is None and s.taps is False
    assert s.objective == "cost" and s.max_iterations == 30
    assert (s.rel_tolerance, s.mip_gap, s.step_seconds) == (1e-4, 5e-4, 120.0)
    assert s.economics["discount_rate"] == 0.07 and s.economics["horizon_years"] == 20
    assert [a.name for a in s.alternatives] == ["Plan"]
    # the [generators] section alone makes setpoints levers, with the documented default range
    s = read_study(write_study(tmp_path, '[study]\ntitle = "M"\nnetwork = "n"\n'
                                         '[[levels]]\nname = "only"\nhours = 8760\n'
                                         '[generators]\nper_level = true\n', "g.toml"))
    assert s.gen_range == {"*": (0.95, 1.05)}


# --- read_study: bad values ---------------------------------------------------------------------

BAD_VALUES = [
    # (old text, new text, key path in the message, words in the message)
    ("hours = 4000", "hours = -5", "levels[1].hours", "positive"),
    ("hours = 4000", 'hours = "many"', "levels[1].hours", "number"),
    ("load_scale = 0.4", "load_scale = 0", "levels[2].load_scale", "positive"),
    ('bus_scale = { "18" = 1.2', 'bus_scale = { "18" = -1.2', "levels[0].bus_scale.18", "positive"),
    ('bus_scale = { "18" = 1.2', 'bus_scale = { "x18" = 1.2', "levels[0].bus_scale.x18", "bus number"),
    ('name = "light"', 'name = "peak"', "levels[2].name", "twice"),
    ("unit_mvar = 0.15", 'unit_mvar = "big"', "banks.unit_mvar", "number"),
    ("unit_mvar = 0.15", "unit_mvar = 0", "banks.unit_mvar", "positive"),
    ("max_units = 8", "max_units = 0", "banks.max_units", "1-1000"),
    ("max_units = 8", "max_units = 2.5", "banks.max_units", "whole number"),
    ('kinds = ["fixed", "switched"]', 'kinds = ["fixd"]', "banks.kinds", "fixd"),
    ("candidates = [14, 18, 30]", 'candidates = [14, "x"]', "banks.candidates", "bus numbers"),
    ("max_new_sites = 2", "max_new_sites = -1", "banks.max_new_sites", "negative"),
    ("budget = 50000.0", 'budget = "lots"', "banks.budget", "number"),
    ("per_mvar = 8000.0", "per_mvar = -1.0", "banks.costs.per_mvar", "negative"),
    ("unit_mvar = 0.3", "unit_mvar = 0", "banks.site[0].unit_mvar", "positive"),
    ("bus = 33", 'bus = "33"', "banks.site[0].bus", "whole number"),
    ("existing_switchable = false", "existing_switchable = 0", "banks.existing_switchable", "true or false"),
    ('"18" = [0.90, 1.05]', '"18" = "high"', "limits.buses.18", "[low, high]"),
    ('"33" = [0.91, 1.04]', '"33" = [1.04, 0.91]', "limits.buses.33", "[low, high]"),
    ('"33" = [0.91, 1.04]', '"abc" = [0.91, 1.04]', "limits.buses.abc", "bus number"),
    ("v_min_pu = 0.93", 'v_min_pu = "low"', "limits.v_min_pu", "number"),
    ("v_min_pu = 0.93", "v_min_pu = 1.06", "limits.v_min_pu", "below v_max_pu"),
    ("v_min_pu = 0.93", "v_min_pu = 1.1", "limits.v_min_pu", "below v_max_pu"),
    ("branch_ratings = false", 'branch_ratings = "no"', "limits.branch_ratings", "true or false"),
    ("v_min_pu = 0.98", "v_min_pu = 1.04", "generators.v_min_pu", "low < high"),
    ('"1" = [1.00, 1.03]', '"1" = [1.03]', "generators.buses.1", "[low, high]"),
    ("per_level = false", "per_level = 3", "generators.per_level", "true or false"),
    ("adjust = true", 'adjust = "yes"', "generators.adjust", "true or false"),
    ("discount_rate = 0.06", "discount_rate = 1.5", "economics.discount_rate", "fraction"),
    ("horizon_years = 15", "horizon_years = 2.5", "economics.horizon_years", "whole number"),
    ("bank_life_years = 10", "bank_life_years = 0", "economics.bank_life_years", "1-100"),
    ("demand_value_per_kw_year = 55.0", "demand_value_per_kw_year = -55.0",
     "economics.demand_value_per_kw_year", "negative"),
    ("light = 40.0 }", "light = 40.0, winter = 1.0 }", "economics.energy_value_per_mwh.winter", "not a load level"),
    ("peak = 90.0,", "peak = -90.0,", "economics.energy_value_per_mwh.peak", "non-negative"),
    (", light = 40.0 }", " }", "economics.energy_value_per_mwh", "'light'"),
    ('kind = "cost"', 'kind = "money"', "objective.kind", "money"),
    ("max_iterations = 12", "max_iterations = 0", "solver.max_iterations", "1-500"),
    ("mip_gap = 0.002", "mip_gap = 0", "solver.mip_gap", "between 0 and 0.1"),
    ("rel_tolerance = 0.001", 'rel_tolerance = "small"', "solver.rel_tolerance", "number"),
    ("step_seconds = 5.0", "step_seconds = 0.1", "solver.step_seconds", "0.5-3600"),
    ('description = "every lever"', 'description = "every lever"\nbudget = -1.0', "alternatives[1].budget",
     "negative"),
    ('name = "All"', 'name = "Banks"', "alternatives[1].name", "twice"),
    ("setpoints = false", 'setpoints = "no"', "alternatives[0].setpoints", "true or false"),
    ('output = "out"', "output = 5", "study.output", "text"),
    ('title = "Every key (test)"', "title = 7", "study.title", "text"),
    ("[taps]\nadjust = true", '[taps]\nadjust = "on"', "taps.adjust", "true or false"),
]


@pytest.mark.parametrize("old,new,key,words", BAD_VALUES, ids=[f"{c[2]}={c[1][-20:]}" for c in BAD_VALUES])
def test_bad_value_names_file_and_key(tmp_path, old, new, key, words):
    msg = read_error(every_key_with(tmp_path, old, new))
    assert msg.startswith(f"case.toml: {key}: "), msg
    assert words in msg, msg


UNKNOWN = [
    ('currency = "TST"', 'currency = "TST"\ncurency = "X"', "study.curency"),
    ("existing_switchable = false", "existing_switchable = false\nunits = 3", "banks.units"),
    ("per_site = 2000.0", "per_site = 2000.0\nper_sites = 1.0", "banks.costs.per_sites"),
    ("max_units = 3", "max_units = 3\nsize = 3", "banks.site[0].size"),
    ('name = "shoulder"', 'name = "shoulder"\nhour = 5', "levels[1].hour"),
    ("om_fraction = 0.015", "om_fraction = 0.015\ninterest = 0.05", "economics.interest"),
    ("banks = true", "bank = true", "alternatives[0].bank"),
    ("[taps]\nadjust = true", "[taps]\nadjust = true\nstep = 1", "taps.step"),
    ('kind = "cost"', 'kind = "cost"\nweight = 1', "objective.weight"),
    ("max_iterations = 12", "max_iterations = 12\ntolerance = 1", "solver.tolerance"),
    ("reactive_limits = false", "reactive_limits = false\nthermal = true", "limits.thermal"),
    ("[generators]\n", "[generators]\nspeed = 1\n", "generators.speed"),
]


@pytest.mark.parametrize("old,new,key", UNKNOWN, ids=[c[2] for c in UNKNOWN])
def test_unknown_key_is_named(tmp_path, old, new, key):
    msg = read_error(every_key_with(tmp_path, old, new))
    assert msg.startswith(f"case.toml: {key}: unknown key"), msg


def test_unknown_section_is_named(tmp_path):
    msg = read_error(write_study(tmp_path, EVERY_KEY.read_text() + '\n[bankz]\nunit_mvar = 1\n'))
    assert msg.startswith("case.toml: bankz: unknown section"), msg
    msg = read_error(write_study(tmp_path, 'flavour = "x"\n' + EVERY_KEY.read_text()))
    assert msg.startswith("case.toml: flavour: unknown section"), msg


@pytest.mark.parametrize("old,key", [('title = "Every key (test)"\n', "study.title"),
                                     ('network = "../feeder33_tables"\n', "study.network"),
                                     ("hours = 1500\n", "levels[0].hours"),
                                     ('name = "shoulder"\n', "levels[1].name")])
def test_missing_required_key_is_named(tmp_path, old, key):
    msg = read_error(every_key_with(tmp_path, old, ""))
    assert msg == f"case.toml: {key}: missing (required)"


def test_missing_study_or_levels_section(tmp_path):
    msg = read_error(write_study(tmp_path, '[[levels]]\nname = "p"\nhours = 1\n'))
    assert msg == "case.toml: study: missing (required)"
    msg = read_error(write_study(tmp_path, '[study]\ntitle = "t"\nnetwork = "n"\n'))
    assert msg == "case.toml: levels: missing (required)"
    msg = read_error(write_study(tmp_path, '[study]\ntitle = "t"\nnetwork = "n"\n[levels]\nname = "p"\n'))
    assert msg.startswith("case.toml: levels: must be a list")
    msg = read_error(write_study(tmp_path, 'study = "x"\n[[levels]]\nname = "p"\nhours = 1\n'))
    assert msg.startswith("case.toml: study: must be a table")


def test_hours_over_a_year_rejected(tmp_path):
    msg = read_error(every_key_with(tmp_path, "hours = 4000", "hours = 6000"))   # 1500 + 6000 + 3260
    assert msg.startswith("case.toml: levels: hours add up to 10760"), msg
    assert "year" in msg
    # exactly a year is fine
    s = read_study(every_key_with(tmp_path, "hours = 4000", "hours = 4000"))
    assert sum(lv.hours for lv in s.levels) == 8760.0


def test_malformed_toml_one_line_with_file_name(tmp_path):
    msg = read_error(every_key_with(tmp_path, 'title = "Every key (test)"', 'title = "Every key (test)'))
    assert msg.startswith("case.toml: not valid TOML"), msg
    assert "line 3" in msg, msg


def test_missing_or_undecodable_study_file(tmp_path):
    with pytest.raises(InputError) as info:
        read_study(tmp_path / "absent.toml")
    assert "absent.toml" in str(info.value) and "not found" in str(info.value)
    p = tmp_path / "latin.toml"
    p.write_bytes('[study]\ntitle = "Caf\u00e9"\n'.encode("latin-1"))
    with pytest.raises(InputError) as info:
        read_study(p)
    assert str(info.value).startswith("latin.toml: not UTF-8")


# Per-level band and per-site kinds are documented keys but read without checks (see report).

def test_level_band_inverted_rejected(tmp_path):
    msg = read_error(every_key_with(tmp_path, "v_min_pu = 0.92", "v_min_pu = 1.07"))   # level v_max 1.05
    assert msg.startswith("case.toml: levels[0].v_min_pu: "), msg


def test_level_band_out_of_range_rejected(tmp_path):
    msg = read_error(every_key_with(tmp_path, "v_max_pu = 1.05\n\n[[levels]]", "v_max_pu = 7.0\n\n[[levels]]"))
    assert msg.startswith("case.toml: levels[0].v_max_pu: "), msg


def test_site_kinds_checked(tmp_path):
    msg = read_error(every_key_with(tmp_path, 'kinds = ["switched"]', 'kinds = ["swiched"]'))
    assert msg.startswith("case.toml: banks.site[0].kinds: "), msg


# --- bus numbers that the network does not have -------------------------------------------------

SMALL = ('[study]\ntitle = "small"\nnetwork = "{net}"\n[limits]\nv_min_pu = 0.90\n'
         '[objective]\nkind = "losses"\n[solver]\nmax_iterations = 3\n'
         '[banks]\ncandidates = [18]\nunit_mvar = 0.15\nmax_units = 4\n'
         '[[levels]]\nname = "peak"\nhours = 2000\n{extra}')


@pytest.mark.parametrize("extra,key", [
    ("[banks.costs]\nper_site = 1.0\n", None),           # control: a good file runs
    ('bus_scale = { "999" = 2.0 }\n', "levels[0].bus_scale.999"),
    ('[limits.buses]\n"999" = [0.9, 1.1]\n', "limits.buses.999"),
    ("[[banks.site]]\nbus = 999\n", "banks.site[0].bus"),
    ('[generators.buses]\n"999" = [0.9, 1.1]\n', "generators.buses.999"),
], ids=["control", "bus_scale", "limits.buses", "banks.site", "generators.buses"])
def test_unknown_bus_in_study_is_input_error(tmp_path, extra, key):
    path = write_study(tmp_path, SMALL.format(net=FEEDER.as_posix(), extra=extra))
    if key is None:
        result = run_study(read_study(path), jobs=1)
        assert result.alternatives[0].verified is True
        return
    with pytest.raises(InputError) as info:
        run_study(read_study(path))
    msg = str(info.value)
    assert msg.startswith(f"case.toml: {key}"), msg
    assert "999" in msg


def test_unknown_candidate_bus_is_input_error(tmp_path):
    path = write_study(tmp_path, SMALL.format(net=FEEDER.as_posix(), extra="").replace("[18]", "[18, 999]"))
    with pytest.raises(InputError) as info:
        run_study(read_study(path))
    assert str(info.value).startswith("case.toml: banks.candidates: bus 999 is not in the network")


# --- run_study on a two-level feeder study ------------------------------------------------------

@pytest.fixture(scope="module")
def two_level():
    spec = read_study(TWO_LEVELS)
    result = run_study(spec, jobs=1)
    plans = [(a.spec, a.plan) for a in result.alternatives]
    return spec, report_data(result), plans, result


HOURS = {"peak": 2000.0, "light": 6760.0}
SCALE = {"peak": 1.0, "light": 0.4}
BAND = (0.92, 1.05)
CANDIDATES = {14, 18, 30, 33}


def solve_level(level, mvar_by_bus=None):
    """Independent AC load flow of the feeder at a level: loads scaled here, banks as bus shunts."""
    net = read_network(FEEDER).copy()
    net.loads["mw"] = net.loads["mw"] * SCALE[level]
    net.loads["mvar"] = net.loads["mvar"] * SCALE[level]
    for bus, mvar in (mvar_by_bus or {}).items():
        net.buses.loc[net.buses["bus"] == bus, "shunt_supply_mvar"] += mvar
    res = solve_flow(net)
    assert res.converged
    return res


def bank_mvar_at(alt, level):
    """Mvar in service at a level: every fixed unit plus the switched units on."""
    return {s["bus"]: (s["fixed_units"] + s["switched_on_by_level"][level]) * s["unit_mvar"] for s in alt["sites"]}


def test_run_study_base_case(two_level):
    _, data, plans, result = two_level
    assert result.success and result.status is StudyStatus.VERIFIED
    assert repr(result).startswith("StudyResult(status=VERIFIED, levels=['peak', 'light'], alternatives=2")
    # the base case is solved once, and agrees with the optimiser's own base flows
    for alt, plan in plans:
        for n, b in result.base.items():
            assert b.flow.losses_mw == pytest.approx(plan.losses_before_mw[n], abs=1e-9)
    frames = result.to_frames()
    assert list(frames["alternatives"]["alternative"]) == ["Banks, two sites", "Banks, one site"]
    assert data["title"] == "Feeder 33 two-level study (test)"
    assert [lv["name"] for lv in data["levels"]] == ["peak", "light"]
    assert data["peak_level"] == "peak"
    assert [a["name"] for a in data["alternatives"]] == ["Banks, two sites", "Banks, one site"]
    assert len(plans) == 2
    base = data["base"]
    # Baran and Wu 1989: 202.67 kW, lowest voltage 0.9131 pu at bus 18
    assert base["peak"]["losses_mw"] == pytest.approx(0.20267, abs=1e-5)
    assert base["peak"]["v_min_pu"] == pytest.approx(0.9131, abs=1e-4) and base["peak"]["v_min_bus"] == 18
    light = solve_level("light")
    assert base["light"]["losses_mw"] == pytest.approx(light.losses_mw, abs=1e-9)
    assert base["light"]["v_min_pu"] == pytest.approx(light.vm.min(), abs=1e-9)
    # the base peak breaks the 0.92 pu band at the far end of the main feeder, the light level does not
    broken = {v["bus"] for v in base["peak"]["violations"]}
    assert 18 in broken and all(v["v_pu"] < 0.92 for v in base["peak"]["violations"])
    assert base["light"]["violations"] == []


def test_every_alternative_level_verified_by_ac(two_level):
    _, data, _, _ = two_level
    for alt in data["alternatives"]:
        assert alt["verified"] is True, alt["message"]
        assert alt["remaining_violations"] == []
        assert alt["sites"], alt["name"]
        for level in ("peak", "light"):
            lv = alt["levels"][level]
            assert lv["verified"] is True
            res = solve_level(level, bank_mvar_at(alt, level))
            assert lv["losses_mw"] == pytest.approx(res.losses_mw, abs=1e-7), (alt["name"], level)
            mine = dict(zip(res.compiled.bus_ids.tolist(), res.vm.tolist()))
            theirs = {p["bus"]: p["v_pu"] for p in lv["profile"]}
            assert set(theirs) == set(mine)
            assert max(abs(theirs[b] - mine[b]) for b in mine) < 1e-7
            assert BAND[0] - 1e-6 <= min(mine.values()) and max(mine.values()) <= BAND[1] + 1e-6
            assert lv["v_min_pu"] == pytest.approx(min(mine.values()), abs=1e-7)
            assert lv["violations"] == []


def test_alternatives_respect_catalogue_and_caps(two_level):
    _, data, _, _ = two_level
    caps = {"Banks, two sites": (2, None), "Banks, one site": (1, 12000.0)}
    for alt in data["alternatives"]:
        sites = {s["bus"] for s in alt["sites"]}
        assert sites <= CANDIDATES and len(sites) == len(alt["sites"])     # one row per site
        max_sites, budget = caps[alt["name"]]
        assert len(sites) <= max_sites
        capital = 0.0
        for s in alt["sites"]:
            assert s["fixed_units"] + s["switched_units"] <= 8
            assert s["unit_mvar"] == 0.15
            assert s["fixed_mvar"] == pytest.approx(0.15 * s["fixed_units"])
            assert s["mvar"] == pytest.approx(s["fixed_mvar"] + s["switched_mvar"])
            assert all(0 <= n <= s["switched_units"] for n in s["switched_on_by_level"].values())
            fixed, switched = s["fixed_mvar"], s["switched_mvar"]
            # invented catalogue costs of the study file
            capital += 2000.0 + 8000.0 * (fixed + switched) + (1500.0 + 3000.0 * switched if switched else 0.0)
        assert alt["capital_cost"] == pytest.approx(capital, abs=1e-6)
        if budget is not None:
            assert alt["capital_cost"] <= budget + 1e-6


def test_economics_match_evaluate(two_level):
    spec, data, _, _ = two_level
    econ = Economics(energy_value_per_mwh={"peak": 90.0, "light": 45.0}, demand_value_per_kw_year=60.0,
                     discount_rate=0.08, horizon_years=15, bank_life_years=20, om_fraction=0.02)
    for alt in data["alternatives"]:
        assert alt["verified"] and "economics" in alt
        before = {n: data["base"][n]["losses_mw"] for n in HOURS}
        after = {n: alt["levels"][n]["losses_mw"] for n in HOURS}
        ref = evaluate(before, after, HOURS, alt["capital_cost"], econ, "peak").as_dict()
        got = alt["economics"]
        for k, v in ref.items():
            if isinstance(v, float):
                assert got[k] == pytest.approx(v, rel=1e-9, abs=1e-9), k
            else:
                assert got[k] == v, k
        # the same figures by hand
        saved = {n: (before[n] - after[n]) * HOURS[n] for n in HOURS}
        annual = saved["peak"] * 90.0 + saved["light"] * 45.0 + (before["peak"] - after["peak"]) * 1000 * 60.0
        assert got["annual_saving"] == pytest.approx(annual, rel=1e-9)
        assert got["annual_om"] == pytest.approx(0.02 * alt["capital_cost"], rel=1e-12)
        assert got["energy_before_mwh"]["light"] == pytest.approx(before["light"] * 6760.0, rel=1e-12)
        assert got["annual_saving"] > 0 and got["npv"] > 0
        # sensitivity: the value row moves NPV by +-25 % of the PV of savings (capital unchanged)
        val = next(r for r in alt["sensitivity"] if r["input"] == "energy and demand value")
        assert val["npv_base"] == pytest.approx(got["npv"], rel=1e-12)
        assert val["npv_high"] - val["npv_base"] == pytest.approx(0.25 * got["pv_savings"], rel=1e-9)
        assert val["npv_base"] - val["npv_low"] == pytest.approx(0.25 * got["pv_savings"], rel=1e-9)
        rate = next(r for r in alt["sensitivity"] if r["input"] == "discount rate")
        assert (rate["low"], rate["high"]) == pytest.approx((0.06, 0.10))
        assert rate["npv_low"] > got["npv"] > rate["npv_high"]


def test_parallel_run_gives_the_serial_plans_in_order(two_level):
    _, _, plans, _ = two_level
    result = run_study(read_study(TWO_LEVELS), jobs=2)
    assert [a.name for a in result.alternatives] == [alt.name for alt, _ in plans]
    for a, (_, serial) in zip(result.alternatives, plans):
        assert a.plan.banks == serial.banks
        assert a.plan.losses_after_mw == serial.losses_after_mw          # exactly, not approximately
        assert [e["merit"] for e in a.plan.log] == [e["merit"] for e in serial.log]


def plan_json(plan) -> str:
    """A plan's JSON as ``planner plan`` writes it, without its timing."""
    from planner.atomic import to_json
    from planner.study.run import plan_to_dict
    d = plan_to_dict(plan)
    d.pop("seconds")
    return to_json(d)


def test_serial_and_two_jobs_give_byte_identical_plans(two_level):
    # alternatives side by side (jobs=2), and a single alternative whose two load levels are
    # AC-checked in worker processes: the plan JSON equals the serial run's byte for byte
    _, _, plans, _ = two_level
    par = plan_alternatives(read_study(TWO_LEVELS), jobs=2)
    assert [plan_json(p) for _, p in par] == [plan_json(p) for _, p in plans]
    one = read_study(TWO_LEVELS)
    one.alternatives = one.alternatives[:1]
    levels = plan_alternatives(one, jobs=2)
    assert plan_json(levels[0][1]) == plan_json(plans[0][1])
    assert plans[0][1].verified and plans[0][1].banks


def test_workers_import_this_package_not_a_planner_folder_in_the_current_folder(tmp_path):
    # A `planner` folder in the current folder (another checkout, a data folder of that name)
    # must not be what the worker processes import: the fork server is a `python -c` process,
    # which puts the current folder first on its path. Here the decoy's study module lacks the
    # worker function, so a worker that imported it could not run any plan.
    decoy = tmp_path / "planner"
    (decoy / "study").mkdir(parents=True)
    (decoy / "__init__.py").write_text("")
    (decoy / "study" / "__init__.py").write_text("")
    (decoy / "study" / "run.py").write_text("DECOY = True\n")
    code = ("import sys; sys.path[:] = [p for p in sys.path if p not in ('', '.')]\n"
            "from planner.study.run import plan_alternatives\n"
            "from planner.study.spec import read_study\n"
            "if __name__ == '__main__':\n"
            f"    out = plan_alternatives(read_study({str(TWO_LEVELS)!r}), jobs=2)\n"
            "    print([round(p.losses_after_mw['peak'], 6) for _, p in out])\n")
    import os
    import subprocess
    import sys
    # the package's own folder on the path (no empty entry: that would be the current folder)
    paths = [str(Path(__file__).resolve().parents[1])] + os.environ.get("PYTHONPATH", "").split(os.pathsep)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in paths if p))
    p = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, env=env,
                       timeout=300)
    assert p.returncode == 0, p.stderr[-2000:]
    serial = plan_alternatives(read_study(TWO_LEVELS), jobs=1)
    assert p.stdout.strip() == str([round(pl.losses_after_mw["peak"], 6) for _, pl in serial])


def test_plan_alternatives_builds_no_report_data():
    spec = read_study(STUDIES / "feeder33_plan.toml")
    out = plan_alternatives(spec, jobs=1)
    assert len(out) == 1 and out[0][0].name == spec.alternatives[0].name
    assert out[0][1].verified and out[0][1].banks


# --- run_study_file: the report folder -----------------------------------------------------------

def snapshot(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


def test_report_folder_written_then_replaced_whole(tmp_path):
    out = tmp_path / "reports"
    assert run_study_file(STUDIES / "feeder33_plan.toml", out_dir=out, quiet=True) == 0
    folder = out / "feeder33-plan"
    names = {p.name for p in folder.iterdir()}
    assert {"report.html", "report.json", "plans.json"} <= names
    assert any(n.endswith(".csv") for n in names)
    html = (folder / "report.html").read_text()
    assert html.startswith("<!DOCTYPE html>") and "Feeder 33 bank placement (test)" in html
    report = json.loads((folder / "report.json").read_text())
    assert report["data"]["title"] == "Feeder 33 bank placement (test)"
    assert report["data"]["alternatives"][0]["verified"] is True
    plans = json.loads((folder / "plans.json").read_text())
    assert len(plans) == 1 and plans[0]["verified"] is True
    assert plans[0]["losses_before_mw"] == pytest.approx(0.20267, abs=1e-5)   # Baran and Wu 1989

    (folder / "stale.csv").write_text("left over\n")
    assert run_study_file(STUDIES / "feeder33_plan.toml", out_dir=out, quiet=True) == 0
    assert not (folder / "stale.csv").exists()
    assert {p.name for p in folder.iterdir()} == names
    assert [p.name for p in out.iterdir()] == ["feeder33-plan"]     # no temporary folders left


def test_failed_run_leaves_earlier_report_untouched(tmp_path, monkeypatch):
    out = tmp_path / "reports"
    assert run_study_file(STUDIES / "feeder33_plan.toml", out_dir=out, quiet=True) == 0
    before = snapshot(out)

    import planner.report.render as render

    def broken(data, tables=None):
        raise RuntimeError("renderer failed")
    monkeypatch.setattr(render, "render_report", broken)
    with pytest.raises(RuntimeError, match="renderer failed"):
        run_study_file(STUDIES / "feeder33_plan.toml", out_dir=out, quiet=True)
    assert snapshot(out) == before
    assert [p.name for p in out.iterdir()] == ["feeder33-plan"]


def test_bus_names_escaped_in_report(tmp_path):
    net = read_network(FEEDER).copy()
    net.buses["name"] = net.buses["name"].astype(object)
    net.buses.loc[net.buses["bus"] == 18, "name"] = "<script>alert(1)</script>"
    net.buses.loc[net.buses["bus"] == 1, "name"] = 'A & B "q"'     # the highest voltage
    write_network(net, tmp_path / "named")
    study = write_study(tmp_path, SMALL.format(net="named", extra=""), "named.toml")
    assert run_study_file(study, out_dir=tmp_path / "out", quiet=True) == 0
    html = (tmp_path / "out" / "named" / "report.html").read_text()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html      # bus 18 is the lowest voltage
    assert "<script" not in html.lower()
    assert "A &amp; B &quot;q&quot;" in html and "A & B" not in html
    report = json.loads((tmp_path / "out" / "named" / "report.json").read_text())
    assert report["data"]["base"]["peak"]["v_min_bus"] == 18
    row = report["tables"]["base_case"][0]
    assert row["v_min_bus"] == 18 and row["v_min_bus_name"] == "<script>alert(1)</script>"


def test_base_case_checked_against_the_optimisers_bands():
    """Generator buses with a set-point lever are held to their set-point range, in the base case too."""
    result = run_study(read_study(STUDIES / "ieee14_setpoints.toml"), jobs=1)
    base = result.base["peak"]
    plan = result.alternatives[0].plan
    c = base.flow.compiled
    lo, hi = plan.bands["peak"]
    assert (base.v_min == lo).all() and (base.v_max == hi).all()
    band = dict(zip(c.bus_ids.tolist(), zip(base.v_min.tolist(), base.v_max.tolist())))
    assert band[1] == (1.00, 1.06) and band[2] == (0.98, 1.10) and band[4] == (0.94, 1.10)
    # the profile written for the report carries each bus's own band
    prof = {p["bus"]: p for p in report_data(result)["base"]["peak"]["profile"]}
    assert (prof[1]["v_min_pu"], prof[1]["v_max_pu"]) == (1.00, 1.06)


def test_model_warnings_reach_the_report_assumptions(tmp_path):
    # two generators on bus 1 with different setpoints: legal, probably a mistake; said, not refused
    net = read_network(FEEDER).copy()
    from planner.network.model import make_table
    net.generators = make_table("generators", list(net.generators.to_dict("records")) +
                                [{"gen_id": "S1b", "bus": 1, "mw": 0.0, "v_set_pu": 1.02}])
    write_network(net, tmp_path / "twogen")
    study = write_study(tmp_path, SMALL.format(net="twogen", extra=""), "twogen.toml")
    data = report_data(run_study(read_study(study), jobs=1))
    assert [a for a in data["assumptions"] if a.startswith("Model warning:")] == [
        "Model warning: generators 'S1b': v_set_pu: setpoint 1.02 pu differs from 1 pu of generator 'S1' "
        "on the same bus 1; the first one ('S1') is used."]


# --- [profile] derive_levels: load levels clustered from the profile ------------------------------

# Twelve invented hours; the area_1 column must not move the levels (they follow `network` only).
DERIVE_PROFILE = ("hour,duration_h,network,area_1\n0,2,0.50,0.2\n2,1,0.45,0.2\n3,1,0.60,0.2\n4,2,0.95,0.2\n"
                  "6,1,1.00,0.2\n7,1,0.90,0.2\n8,3,0.55,0.2\n11,1,0.92,0.2\n")
DERIVE = ('[study]\ntitle = "derived"\nnetwork = "{net}"\n[limits]\nv_min_pu = 0.90\n'
          '[objective]\nkind = "losses"\n[solver]\nmax_iterations = 3\n'
          '[sweep]\nscheduler = "serial"\n'      # in this process; cluster runs are compared in test_sweep
          '[banks]\ncandidates = [18]\nunit_mvar = 0.15\nmax_units = 4\n'
          '[profile]\nfile = "p.csv"\nderive_levels = 2\n{extra}')


def two_means_by_hand(factors, hours):
    """Independent 2-level load-duration split: sort the factors, try every cut between a low and
    a high group, keep the cut with the least hour-weighted spread about the group means (the
    fixed point the clustering reaches on well-separated data). Returns [(hours, mean)] high first."""
    order = sorted(range(len(factors)), key=lambda i: factors[i])
    best = None
    for cut in range(1, len(order)):
        groups = [order[cut:], order[:cut]]
        stats = []
        spread = 0.0
        for g in groups:
            h = sum(hours[i] for i in g)
            m = sum(factors[i] * hours[i] for i in g) / h
            spread += sum(hours[i] * (factors[i] - m) ** 2 for i in g)
            stats.append((h, m))
        if best is None or spread < best[0]:
            best = (spread, stats)
    return best[1]


def test_levels_derived_from_the_profile(tmp_path):
    (tmp_path / "p.csv").write_text(DERIVE_PROFILE)
    s = read_study(write_study(tmp_path, DERIVE.format(net=FEEDER.as_posix(), extra="")))
    assert [lv.name for lv in s.levels] == ["peak", "light"] and s.peak_level == "peak"
    rows = [r.split(",") for r in DERIVE_PROFILE.splitlines()[1:]]
    factors, hours = [float(r[2]) for r in rows], [float(r[1]) for r in rows]
    expected = two_means_by_hand(factors, hours)
    # by hand: high = {0.95 x 2 h, 1.00, 0.90, 0.92} -> 4.72 / 5 h; low = 3.70 / 7 h
    assert expected == [(5.0, pytest.approx(0.944)), (7.0, pytest.approx(3.70 / 7))]
    for lv, (h, m) in zip(s.levels, expected):
        assert lv.hours == h
        assert lv.p_scale == pytest.approx(m, abs=1e-12) and lv.q_scale == lv.p_scale
        assert lv.bus_scale == {} and lv.v_min_pu is None and lv.v_max_pu is None
    assert sum(lv.hours for lv in s.levels) == sum(hours) == 12.0
    assert s.proof.profile.derive_levels == 2           # the same profile is also checked hour by hour
    # a per-level energy value may name the derived levels
    s = read_study(write_study(tmp_path, DERIVE.format(
        net=FEEDER.as_posix(), extra='[economics]\nenergy_value_per_mwh = { peak = 90, light = 40 }\n')))
    assert s.economics["energy_value_per_mwh"] == {"peak": 90, "light": 40}
    # three levels take the trade's names
    s = read_study(write_study(tmp_path, DERIVE.format(net=FEEDER.as_posix(), extra="")
                               .replace("derive_levels = 2", "derive_levels = 3")))
    assert [lv.name for lv in s.levels] == ["peak", "shoulder", "light"]
    assert sum(lv.hours for lv in s.levels) == 12.0
    assert [lv.p_scale for lv in s.levels] == sorted((lv.p_scale for lv in s.levels), reverse=True)


@pytest.mark.parametrize("change,words", [
    (("", '[[levels]]\nname = "peak"\nhours = 2000\n'), "not both"),
    (('file = "p.csv"\n', ""), "needs a load profile: give [profile] file"),
    (("derive_levels = 2", "derive_levels = 0"), "must be a whole number of levels 1-24, got 0"),
    (("derive_levels = 2", "derive_levels = 2.5"), "must be a whole number, got 2.5"),
], ids=["both", "no-profile", "zero", "not-whole"])
def test_derive_levels_errors_name_the_key(tmp_path, change, words):
    (tmp_path / "p.csv").write_text(DERIVE_PROFILE)
    text = DERIVE.format(net=FEEDER.as_posix(), extra="")
    old, new = change
    text = text + new if old == "" else text.replace(old, new, 1)
    msg = read_error(write_study(tmp_path, text))
    assert msg.startswith("case.toml: profile.derive_levels: "), msg
    assert words in msg, msg


def test_derive_levels_needs_a_network_column(tmp_path):
    (tmp_path / "p.csv").write_text("hour,area_1\n0,0.5\n1,0.9\n")
    msg = read_error(write_study(tmp_path, DERIVE.format(net=FEEDER.as_posix(), extra="")))
    assert msg == "case.toml: profile.derive_levels: needs a 'network' column in the profile p.csv (it has area_1)"


def test_study_with_derived_levels_runs(tmp_path):
    (tmp_path / "p.csv").write_text(DERIVE_PROFILE.replace(",area_1", "").replace(",0.2", ""))
    result = run_study(read_study(write_study(tmp_path, DERIVE.format(net=FEEDER.as_posix(), extra=""))), jobs=1)
    assert sorted(result.base) == ["light", "peak"]
    assert result.alternatives[0].verified is True
    # the hour-by-hour check assigns each hour to the nearest level: the same hours as the clustering
    hourly = result.proof[0]["hourly"]
    assert hourly["hours_by_level"] == {"peak": 5.0, "light": 7.0} and hourly["hours"] == 12.0
