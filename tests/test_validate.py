"""Network validation: each kind of problem is caught and named by record and field."""
from pathlib import Path

import numpy as np
import pytest

from planner.errors import NetworkError
from planner.network.cdf import read_cdf
from planner.network.model import Network, make_table
from planner.network.tabular import read_tables
from planner.network.validate import check, model_warnings, validate

DATA = Path(__file__).parent / "data"


def base_net() -> Network:
    """Four buses in a ring fed from bus 1, a PV generator at 3, a load and a bank at 4."""
    return Network(base_mva=100.0, name="ring", source="ring-case",
        buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
                                   {"bus": 2, "base_kv": 110.0, "kind": "PQ"},
                                   {"bus": 3, "base_kv": 110.0, "kind": "PV"},
                                   {"bus": 4, "base_kv": 20.0, "kind": "PQ"}]),
        generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0},
                                             {"gen_id": "G3", "bus": 3, "mw": 30.0, "v_set_pu": 1.02,
                                              "q_min_mvar": -10.0, "q_max_mvar": 20.0}]),
        loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 40.0, "mvar": 10.0},
                                   {"load_id": "D4", "bus": 4, "mw": 20.0, "mvar": 5.0}]),
        lines=make_table("lines", [{"line_id": "1-2", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1},
                                   {"line_id": "2-3", "from_bus": 2, "to_bus": 3, "r_pu": 0.01, "x_pu": 0.1},
                                   {"line_id": "3-1", "from_bus": 3, "to_bus": 1, "r_pu": 0.01, "x_pu": 0.1}]),
        transformers=make_table("transformers", [{"xfmr_id": "T2-4", "from_bus": 2, "to_bus": 4, "x_pu": 0.08,
                                                  "ratio_pu": 1.0}]),
        shunts=make_table("shunts", [{"shunt_id": "C4", "bus": 4, "mvar_per_step": 2.0, "steps_max": 3,
                                      "steps_on": 1}]))


def test_a_sound_network_has_no_problems():
    assert validate(base_net(), include_warnings=True) == []
    assert check(base_net()) is not None


@pytest.mark.parametrize("case", ["ieee14", "ieee30", "feeder33"])
def test_reference_cases_are_valid(case):
    net = read_tables(DATA / "feeder33_tables") if case == "feeder33" else read_cdf(DATA / f"{case}cdf.txt")
    assert validate(net) == []


def set_(table, row, **values):
    def edit(net):
        for k, v in values.items():
            net.table(table).loc[row, k] = v
    return edit


def add(table, record):
    def edit(net):
        df = net.table(table)
        setattr(net, table, make_table(table, list(df.to_dict("records")) + [record]))
    return edit


@pytest.mark.parametrize("edit, expected", [
    (set_("lines", 1, to_bus=9), "lines '2-3': to_bus: unknown bus 9"),
    (set_("transformers", 0, from_bus=7), "transformers 'T2-4': from_bus: unknown bus 7"),
    (set_("loads", 0, bus=8), "loads 'D2': bus: unknown bus 8"),
    (set_("generators", 1, bus=6), "generators 'G3': bus: unknown bus 6"),
    (set_("shunts", 0, bus=5), "shunts 'C4': bus: unknown bus 5"),
    (add("buses", {"bus": 2, "base_kv": 110.0, "kind": "PQ"}), "buses 2: bus: duplicate id"),
    (add("loads", {"load_id": "D2", "bus": 4, "mw": 1.0, "mvar": 0.0}), "loads 'D2': load_id: duplicate id"),
    (add("transformers", {"xfmr_id": "1-2", "from_bus": 1, "to_bus": 4, "x_pu": 0.1}),
     "transformers '1-2': xfmr_id: same id as a line (branch ids must be unique)"),
    (set_("lines", 0, r_pu=0.0, x_pu=0.0), "lines '1-2': r_pu, x_pu: zero impedance (r = x = 0)"),
    (set_("lines", 2, to_bus=3), "lines '3-1': from_bus, to_bus: connects bus 3 to itself"),
    (set_("loads", 1, mvar=np.inf), "loads 'D4': mvar: not a finite number (inf)"),
    (set_("buses", 1, v_max_pu=np.nan), "buses 2: v_max_pu: not a finite number (nan)"),
    (set_("buses", 3, base_kv=-20.0), "buses 4: base_kv: must be positive, got -20.0"),
    (set_("lines", 0, x_pu=150.0), "lines '1-2': x_pu: |x_pu| = 150.0 pu is absurd (> 100)"),
    (set_("generators", 1, v_set_pu=10.2), "generators 'G3': v_set_pu: setpoint 10.2 pu outside 0.5-1.5"),
    (set_("generators", 1, q_min_mvar=30.0), "generators 'G3': q_min_mvar, q_max_mvar: q_min 30.0 is above q_max 20.0"),
    (set_("shunts", 0, steps_on=-1), "shunts 'C4': steps_on: negative steps -1"),
    (set_("shunts", 0, steps_max=-2, steps_on=0), "shunts 'C4': steps_max: negative steps -2"),
    (set_("shunts", 0, steps_on=5), "shunts 'C4': steps_on: 5 steps on but only 3 exist"),
    (set_("transformers", 0, ratio_min_pu=1.2), "transformers 'T2-4': ratio_min_pu, ratio_max_pu: minimum 1.2 is above maximum 1.1"),
    (set_("transformers", 0, ratio_pu=0.0), "transformers 'T2-4': ratio_pu: ratio 0.0 outside 0.5-1.5 pu"),
    (set_("transformers", 0, tap_side="middle"), "transformers 'T2-4': tap_side: must be 'from' or 'to', got 'middle'"),
    (set_("buses", 1, kind="pq"), "buses 2: kind: unknown bus kind 'pq' (expected PQ, PV or slack)"),
    (set_("buses", 1, v_min_pu=1.1), "buses 2: v_min_pu, v_max_pu: lower limit 1.1 is not below upper limit 1.05"),
    (set_("loads", 0, p_share_z=0.7, p_share_i=0.5), "loads 'D2': p_share_i, p_share_z: shares 0.5 and 0.7 must be >= 0 with sum <= 1"),
    (set_("buses", 0, kind="PQ"), "buses: kind: no slack bus in the network"),
    (set_("generators", 0, energised=False), "buses 1: kind: slack bus with no in-service generator"),
    (set_("generators", 1, energised=False), "buses 3: kind: PV bus with no in-service generator"),
    (set_("transformers", 0, energised=False), "island of 1 bus with no slack bus: buses 4"),
])
def test_each_problem_is_named(edit, expected):
    net = base_net()
    edit(net)
    problems = validate(net)
    assert expected in problems, problems
    with pytest.raises(NetworkError) as info:
        check(net)
    assert expected in info.value.problems
    assert str(info.value).startswith("ring-case: ")
    assert "\n" not in str(info.value)


def test_no_slack_also_reports_the_island():
    net = base_net()
    net.buses.loc[0, "kind"] = "PQ"
    problems = validate(net)
    assert "island of 4 buses with no slack bus: buses 1, 2, 3, 4" in problems


def test_large_island_names_first_buses_and_count():
    net = base_net()
    extra = [{"bus": b, "base_kv": 20.0, "kind": "PQ"} for b in range(10, 22)]
    net.buses = make_table("buses", list(net.buses.to_dict("records")) + extra)
    net.lines = make_table("lines", list(net.lines.to_dict("records")) +
                           [{"line_id": f"{b}-{b+1}", "from_bus": b, "to_bus": b + 1, "r_pu": 0.01, "x_pu": 0.1}
                            for b in range(10, 21)])
    problems = validate(net)
    assert problems == ["island of 12 buses with no slack bus: buses 10, 11, 12, 13, 14, 15, 16, 17, ... (12 buses)"]
    err = pytest.raises(NetworkError, check, net).value
    assert str(err) == "ring-case: " + problems[0]


def test_out_of_service_elements_are_skipped():
    net = base_net()
    net.loads.loc[0, ["bus", "energised"]] = [99, False]
    net.lines.loc[0, ["x_pu", "r_pu", "energised"]] = [0.0, 0.0, False]
    net.shunts.loc[0, ["steps_on", "energised"]] = [-4, False]
    assert validate(net, include_warnings=True) == []
    # ... but their ids still count
    net.lines.loc[0, "line_id"] = "2-3"
    assert validate(net) == ["lines '2-3': line_id: duplicate id"]


def test_out_of_service_branch_splits_the_network():
    net = base_net()
    net.lines.loc[[0, 2], "energised"] = False    # bus 1 now stands alone with its slack
    assert validate(net) == ["island of 3 buses with no slack bus: buses 2, 3, 4"]


def test_warnings_are_separate_and_do_not_fail_check():
    net = base_net()
    net.buses = make_table("buses", list(net.buses.to_dict("records")) +
                           [{"bus": 9, "base_kv": 0.0, "kind": "PQ"}])   # isolated, nothing on it, no kV
    assert validate(net) == []
    assert validate(net, include_warnings=True) == [
        "warning: buses 9: isolated bus with nothing connected to it",
        "warning: buses 9: base_kv: not given (0); conversions to kV and ohms are not available for them"]
    assert model_warnings(net) == ["buses 9: isolated bus with nothing connected to it"]   # no format notes
    check(net)
    # two slack buses in one island: a warning too
    net.buses.loc[1, "kind"] = "slack"
    net.generators = make_table("generators", list(net.generators.to_dict("records")) +
                                [{"gen_id": "G2", "bus": 2, "mw": 0.0}])
    assert "warning: island with 2 slack buses: 1, 2 (they share the balancing)" in \
        validate(net, include_warnings=True)
    # ... which says so when they hold different voltages or angles (issue: two slacks disagree)
    net.generators.loc[net.generators.gen_id == "G2", "v_set_pu"] = 1.03
    net.buses.loc[1, "angle_deg"] = -5.0
    assert [w for w in model_warnings(net) if "slack" in w] == [
        "island with 2 slack buses: 1, 2 at different voltages 1, 1.03 pu and angles 0, -5 deg: "
        "they will exchange power to hold both"]
    net.generators.loc[net.generators.gen_id == "G2", "v_set_pu"] = 1.0
    net.buses.loc[1, "angle_deg"] = 0.0
    # an isolated bus that has a load is a real problem
    net.loads = make_table("loads", list(net.loads.to_dict("records")) +
                           [{"load_id": "D9", "bus": 9, "mw": 1.0, "mvar": 0.0}])
    assert "island of 1 bus with no slack bus: buses 9" in validate(net)


def test_empty_and_bad_base():
    assert validate(Network()) == ["buses: no buses"]
    net = base_net()
    net.base_mva = 0.0
    assert validate(net) == ["network: base_mva: must be a positive number, got 0.0"]


# --- physical bounds (issue: absurd numbers gave "converged" answers) -----------------------------

@pytest.mark.parametrize("edit, expected", [
    (set_("lines", 0, r_pu=-0.05), "lines '1-2': r_pu: -0.05 pu is below 0 pu "
                                   "(negative resistance would make negative losses)"),
    (set_("transformers", 0, r_pu=-0.001), "transformers 'T2-4': r_pu: -0.001 pu is below 0 pu"),
    (set_("buses", 3, base_kv=5000.0), "buses 4: base_kv: 5000.0 kV is above 2000 kV"),
    (set_("loads", 0, mw=3e7), "loads 'D2': mw: 30000000.0 MW is outside -1e+06 to 1e+06 MW"),
    (set_("generators", 1, q_max_mvar=1e9), "generators 'G3': q_max_mvar: 1000000000.0 Mvar is outside"),
    (set_("transformers", 0, shift_deg=720.0), "transformers 'T2-4': shift_deg: 720.0 deg is outside"),
    (set_("shunts", 0, steps_max=10**6, steps_on=1), "shunts 'C4': steps_max: 1000000 is outside 0 to 1000"),
])
def test_values_outside_physical_bounds_are_problems(edit, expected):
    net = base_net()
    edit(net)
    problems = validate(net)
    assert any(p.startswith(expected) for p in problems), problems
    with pytest.raises(NetworkError):
        check(net)


def test_negative_reactance_is_allowed_for_series_compensation():
    net = base_net()
    net.lines.loc[1, "x_pu"] = -0.03        # a series capacitor in line 2-3
    assert validate(net) == []


@pytest.mark.parametrize("base, ok", [(1e300, False), (1e-6, False), (0.1, True), (100.0, True), (1e5, True)])
def test_base_mva_must_be_plausible(base, ok):
    net = base_net()
    net.base_mva = base
    problems = validate(net)
    assert (problems == []) is ok, problems
    if not ok:
        assert problems[0].startswith("network: base_mva:") and "plausible" in problems[0]


def test_bus_number_zero_is_refused_as_in_cdf():
    net = base_net()
    net.buses.loc[3, "bus"] = 0
    net.loads.loc[1, "bus"] = 0
    net.transformers.loc[0, "to_bus"] = 0
    net.shunts.loc[0, "bus"] = 0
    assert "buses 0: bus: 0 is below 1 (bus numbers are whole numbers from 1)" in validate(net)


def test_two_generators_on_one_bus_with_different_setpoints_warn():
    net = base_net()
    net.generators = make_table("generators", list(net.generators.to_dict("records")) +
                                [{"gen_id": "G3b", "bus": 3, "mw": 5.0, "v_set_pu": 1.04}])
    assert validate(net) == []
    assert model_warnings(net) == [
        "generators 'G3b': v_set_pu: setpoint 1.04 pu differs from 1.02 pu of generator 'G3' on the same "
        "bus 3; the first one ('G3') is used"]
