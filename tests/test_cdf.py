"""IEEE Common Data Format reader and writer.

Reference values are the IEEE 14- and 30-bus CDF files (public test case archive, University of
Washington; format of IEEE Trans. PAS-92(6), 1973), copied in tests/data.
"""
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from conftest import apply_byte_edits
from planner.errors import InputError, NetworkError
from planner.network.cdf import read_cdf, write_cdf
from planner.network.io import read_network
from planner.network.model import TABLES, Network, make_table

DATA = Path(__file__).parent / "data"
IEEE14 = DATA / "ieee14cdf.txt"
IEEE30 = DATA / "ieee30cdf.txt"


def lines_of(path):
    return path.read_bytes().decode("latin-1").replace("\r\n", "\n").split("\n")


def write_variant(tmp_path, lines, name="ieee14cdf.txt", eol="\r\n"):
    p = tmp_path / name
    p.write_bytes(eol.join(lines).encode("latin-1"))
    return p


def set_field(line, a, b, text):
    """Put text right-justified into columns a..b (1-based) of a fixed-column line."""
    line = line.ljust(b)
    return line[:a - 1] + text.rjust(b - a + 1) + line[b:]


# --- the published cases ------------------------------------------------------------------

def test_ieee14_published_case():
    # Values from the IEEE 14-bus CDF file.
    net = read_cdf(IEEE14)
    assert net.base_mva == 100.0
    assert len(net.buses) == 14
    assert len(net.lines) + len(net.transformers) == 20
    assert len(net.transformers) == 3
    t = net.transformers.set_index("xfmr_id")
    assert t.loc[["4-7", "4-9", "5-6"], "ratio_pu"].tolist() == [0.978, 0.969, 0.932]
    assert (t.tap_side == "from").all() and not t.adjustable.any()
    assert net.loads.mw.sum() == pytest.approx(259.0, abs=1e-9)
    assert net.loads.mvar.sum() == pytest.approx(73.5, abs=1e-9)
    b = net.buses.set_index("bus")
    assert b.loc[9, "shunt_supply_mvar"] == pytest.approx(19.0, abs=1e-12)
    assert (b.shunt_supply_mvar.drop(9) == 0).all()
    assert b.kind.to_dict() == {1: "slack", 2: "PV", 3: "PV", 4: "PQ", 5: "PQ", 6: "PV", 7: "PQ",
                                8: "PV", 9: "PQ", 10: "PQ", 11: "PQ", 12: "PQ", 13: "PQ", 14: "PQ"}
    # Stored solution of the published case.
    assert (b.loc[14, "v_pu"], b.loc[14, "angle_deg"]) == (1.036, -16.04)
    g = net.generators.set_index("gen_id")
    assert list(g.index) == ["G1", "G2", "G3", "G6", "G8"]
    assert g.loc["G1", "mw"] == 232.4
    assert (g.loc["G2", "q_min_mvar"], g.loc["G2", "q_max_mvar"], g.loc["G2", "v_set_pu"]) == (-40.0, 50.0, 1.045)
    # The slack bus of the file gives 0/0 reactive limits: read as unlimited.
    assert (g.loc["G1", "q_min_mvar"], g.loc["G1", "q_max_mvar"]) == (-9999.0, 9999.0)
    ln = net.lines.set_index("line_id")
    assert tuple(ln.loc["1-2", ["r_pu", "x_pu", "b_pu"]]) == (0.01938, 0.05917, 0.0528)


def test_ieee30_published_case():
    # Values from the IEEE 30-bus CDF file.
    net = read_cdf(IEEE30)
    assert len(net.buses) == 30
    assert len(net.lines) + len(net.transformers) == 41
    assert sorted(net.transformers.ratio_pu) == [0.932, 0.968, 0.969, 0.978]
    assert net.loads.mw.sum() == pytest.approx(283.4, abs=1e-9)
    assert net.loads.mvar.sum() == pytest.approx(126.2, abs=1e-9)
    b = net.buses.set_index("bus")
    assert b.loc[10, "shunt_supply_mvar"] == pytest.approx(19.0) and b.loc[24, "shunt_supply_mvar"] == pytest.approx(4.3)
    assert b.loc[9, "base_kv"] == 1.0 and b.loc[1, "base_kv"] == 132.0
    assert b.loc[1, "name"] == "Glen Lyn 132"
    g = net.generators.set_index("gen_id")
    assert (g.loc["G2", "q_max_mvar"], g.loc["G2", "mvar"]) == (50.0, 50.0)


def test_read_network_validates_the_published_cases():
    for p in (IEEE14, IEEE30):
        assert len(read_network(p).buses) in (14, 30)


# --- tolerance -----------------------------------------------------------------------------

def frames_equal(a: Network, b: Network, exact=True):
    for kind in TABLES:
        pd.testing.assert_frame_equal(a.table(kind), b.table(kind), check_exact=exact, rtol=1e-9)


@pytest.mark.parametrize("eol", ["\n", "\r", "\r\n"])
def test_line_endings_do_not_matter(tmp_path, eol):
    ref = read_cdf(IEEE14)
    frames_equal(read_cdf(write_variant(tmp_path, lines_of(IEEE14), eol=eol)), ref)


def test_tape_line_short_lines_and_blank_fields(tmp_path):
    lines = lines_of(IEEE14)
    lines.insert(0, "TAPE")
    # bus 4 (line 6 after the TAPE line): cut after the base kV; blank its final angle.
    i4 = 6
    assert lines[i4].startswith("   4 ")
    lines[i4] = set_field(lines[i4][:83], 34, 40, "")
    # branch 1-2: cut after the charging B (no ratings, no ratio and the rest).
    ib = next(i for i, t in enumerate(lines) if t.startswith("   1    2"))
    lines[ib] = lines[ib][:50]
    # Remove everything after the branch section but END OF DATA.
    end = next(i for i in range(ib, len(lines)) if lines[i].startswith("-999"))
    lines = lines[: end + 1] + ["END OF DATA"]
    net = read_cdf(write_variant(tmp_path, lines))
    b = net.buses.set_index("bus")
    assert b.loc[4, "angle_deg"] == 0.0 and b.loc[4, "v_pu"] == 1.019 and b.loc[4, "shunt_supply_mvar"] == 0.0
    ln = net.lines.set_index("line_id")
    assert tuple(ln.loc["1-2", ["r_pu", "x_pu", "b_pu", "rating_mva"]]) == (0.01938, 0.05917, 0.0528, 0.0)
    assert len(net.lines) == 17 and len(net.transformers) == 3
    assert net.base_mva == 100.0


def test_mapping_rules_on_edited_records(tmp_path):
    lines = lines_of(IEEE14)
    i2 = 3   # bus 2: desired voltage 0 -> setpoint from final voltage; limits 0/0 -> unlimited
    lines[i2] = set_field(set_field(set_field(lines[i2], 85, 90, "0.0"), 91, 98, "0.0"), 99, 106, "0.0")
    ib = next(i for i, t in enumerate(lines) if t.startswith("   4    7"))
    # transformer 4-7 made a variable tap (type 2) with step 0.0125 and no limits given
    lines[ib] = set_field(set_field(lines[ib], 19, 19, "2"), 106, 111, "0.0125")
    # line 1-2 gets a second circuit
    i12 = next(i for i, t in enumerate(lines) if t.startswith("   1    2"))
    lines.insert(i12 + 1, set_field(lines[i12], 17, 17, "2"))
    hdr = next(i for i, t in enumerate(lines) if t.startswith("BRANCH"))
    lines[hdr] = lines[hdr].replace("20 ITEMS", "21 ITEMS")
    net = read_cdf(write_variant(tmp_path, lines))
    g = net.generators.set_index("gen_id")
    assert (g.loc["G2", "v_set_pu"], g.loc["G2", "q_min_mvar"], g.loc["G2", "q_max_mvar"]) == (1.045, -9999.0, 9999.0)
    t = net.transformers.set_index("xfmr_id")
    assert bool(t.loc["4-7", "adjustable"]) and t.loc["4-7", "ratio_step_pu"] == 0.0125
    assert (t.loc["4-7", "ratio_min_pu"], t.loc["4-7", "ratio_max_pu"]) == (0.9, 1.1)
    assert not t.loc["4-9", "adjustable"]
    assert {"1-2#1", "1-2#2"} <= set(net.lines.line_id)
    assert "1-2" not in set(net.lines.line_id)
    assert net.lines.line_id.is_unique


# --- errors --------------------------------------------------------------------------------

def read_error(tmp_path, lines):
    p = write_variant(tmp_path, lines)
    with pytest.raises(InputError) as info:
        read_cdf(p)
    text = str(info.value)
    assert "\n" not in text
    return p, text


def test_bad_number_names_file_line_and_field(tmp_path):
    lines = lines_of(IEEE14)
    lines[4] = set_field(lines[4], 41, 49, "abc")   # line 5 of the file: bus 3
    p, text = read_error(tmp_path, lines)
    assert text == f"{p}:5: bus section, field 'load MW' (cols 41-49): cannot read 'abc' as a number"


def test_bad_branch_number(tmp_path):
    lines = lines_of(IEEE14)
    i = next(i for i, t in enumerate(lines) if t.startswith("   2    3"))
    lines[i] = set_field(lines[i], 30, 40, "0.19.797")
    p, text = read_error(tmp_path, lines)
    assert text == f"{p}:{i + 1}: branch section, field 'X' (cols 30-40): cannot read '0.19.797' as a number"


@pytest.mark.parametrize("edit, line, needle", [
    (lambda L: L.__setitem__(5, set_field(L[5], 25, 26, "7")), 6, "field 'type' (cols 25-26): bus type must be 0, 1, 2 or 3, got 7"),
    (lambda L: L.__setitem__(5, set_field(L[5], 1, 4, "3")), 6, "bus 3 is already defined at line 5"),
    (lambda L: L.__setitem__(5, set_field(L[5], 41, 49, "nan")), 6, "cannot read 'nan' as a number"),
    (lambda L: L.__setitem__(5, set_field(L[5], 1, 4, "2.5")), 6, "'2.5' is not a whole number"),
    (lambda L: L.__setitem__(0, set_field(L[0], 32, 37, "0.0")), 1, "system MVA base must be positive"),
])
def test_bus_record_errors(tmp_path, edit, line, needle):
    lines = lines_of(IEEE14)
    edit(lines)
    p, text = read_error(tmp_path, lines)
    assert text.startswith(f"{p}:{line}: ") and needle in text


def test_section_structure_errors(tmp_path):
    lines = lines_of(IEEE14)
    # a branch record lost: the header count disagrees
    i = next(i for i, t in enumerate(lines) if t.startswith("   2    3"))
    p, text = read_error(tmp_path, lines[:i] + lines[i + 1:])
    assert text == f"{p}:18: branch section header: header declares 20 items but the section has 19 records"
    # a record repeated: the message points at the copy
    _, text = read_error(tmp_path, lines[:i + 1] + [lines[i]] + lines[i + 1:])
    assert f"line {i + 2} repeats line {i + 1} exactly" in text
    # a file cut inside the branch section
    _, text = read_error(tmp_path, lines[:i + 1])
    assert "branch section that starts at line 18 has no closing -999 line" in text
    # no bus section at all
    _, text = read_error(tmp_path, ["hello", "world"])
    assert "no bus section" in text
    # bus section but no branch section
    bus_end = next(i for i, t in enumerate(lines) if t.startswith("-999"))
    _, text = read_error(tmp_path, lines[: bus_end + 1])
    assert "no branch section" in text


def test_missing_file():
    with pytest.raises(InputError, match="nope.txt: cannot read file"):
        read_cdf(DATA / "nope.txt")


# --- writer --------------------------------------------------------------------------------

@pytest.mark.parametrize("src", [IEEE14, IEEE30])
def test_write_read_round_trip(tmp_path, src):
    before = src.read_bytes()
    net = read_cdf(src)
    out = tmp_path / "case.cdf"
    write_cdf(net, out)
    back = read_cdf(out)
    frames_equal(back, net, exact=False)
    assert back.base_mva == net.base_mva and back.name == net.name
    assert src.read_bytes() == before                      # the input is never touched
    assert sorted(x.name for x in tmp_path.iterdir()) == ["case.cdf"]   # no temp file left


def test_writer_keeps_ids_taps_and_parallel_circuits(tmp_path):
    net = Network(base_mva=50.0, name="edge cases",
        buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack", "name": "Alpha"},
                                   {"bus": 2, "base_kv": 20.0, "kind": "PV"},
                                   {"bus": 3, "base_kv": 20.0, "kind": "PQ", "shunt_supply_mvar": 2.5}]),
        generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.03},
                                             {"gen_id": "G2", "bus": 2, "mw": 12.5, "v_set_pu": 1.01,
                                              "q_min_mvar": -5.0, "q_max_mvar": 8.0}]),
        loads=make_table("loads", [{"load_id": "D3", "bus": 3, "mw": 20.0, "mvar": 7.25}]),
        lines=make_table("lines", [{"line_id": "2-3#1", "from_bus": 2, "to_bus": 3, "r_pu": 0.02, "x_pu": 0.06},
                                   {"line_id": "2-3#2", "from_bus": 2, "to_bus": 3, "r_pu": 0.025, "x_pu": 0.07,
                                    "b_pu": 0.003, "rating_mva": 40.0}]),
        transformers=make_table("transformers", [{"xfmr_id": "1-2", "from_bus": 1, "to_bus": 2, "x_pu": 0.1,
                                                  "ratio_pu": 1.025, "adjustable": True, "ratio_step_pu": 0.0125,
                                                  "ratio_min_pu": 0.95, "ratio_max_pu": 1.05}]))
    out = tmp_path / "edge.txt"
    write_cdf(net, out)
    back = read_network(out)
    frames_equal(back, net, exact=False)
    assert back.base_mva == 50.0


def test_writer_refuses_non_finite(tmp_path):
    net = read_cdf(IEEE14)
    net.lines.loc[0, "r_pu"] = np.nan
    with pytest.raises(Exception, match="non-finite"):
        write_cdf(net, tmp_path / "x.cdf")
    assert not any(tmp_path.iterdir())


# --- robustness ----------------------------------------------------------------------------

_CLEAN = IEEE14.read_bytes()


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(st.sampled_from(["set", "insert", "delete"]),
                          st.integers(0, len(_CLEAN) - 1), st.binary(min_size=1, max_size=3)),
                min_size=1, max_size=6))
def test_random_corruption_raises_only_input_errors(tmp_path, edits):
    data = apply_byte_edits(_CLEAN, edits)
    p = tmp_path / "corrupt.txt"
    p.write_bytes(bytes(data))
    try:
        net = read_network(p)
    except (InputError, NetworkError) as exc:
        assert "\n" not in str(exc) and str(exc)
    else:
        assert len(net.buses) > 0


def test_names_with_latin1_and_line_break_like_bytes_and_blank_lines_in_sections(tmp_path):
    # str.splitlines would end a line at \x85 or \x0c: the reader must not, and must keep them in
    # the name; blank and whitespace-only lines inside a section are skipped, line numbers kept
    lines = lines_of(IEEE14)
    i1 = next(i for i, t in enumerate(lines) if t.startswith("   1 "))
    lines[i1] = lines[i1][:5] + "Sch\xf6n\x85ee\x0cX".ljust(12) + lines[i1][17:]
    lines.insert(i1 + 1, "")
    lines.insert(i1 + 2, "   \t ")
    net = read_cdf(write_variant(tmp_path, lines))
    assert net.buses.name[0] == "Sch\xf6n\x85ee\x0cX"
    assert net.buses.name.dtype == object and net.loads.load_id.dtype == object
    assert len(net.buses) == 14 and net.buses.bus.tolist() == list(range(1, 15))
    # the error for a bad field after the inserted lines still names the file's own line number
    j = next(i for i, t in enumerate(lines) if t.startswith("   5 "))
    lines[j] = set_field(lines[j], 41, 49, "1.2.3")
    with pytest.raises(InputError, match=f":{j + 1}: bus section, field 'load MW'"):
        read_cdf(write_variant(tmp_path, lines))
