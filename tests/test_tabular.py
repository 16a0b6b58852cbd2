"""The tabular network format (folder of CSV tables) and read_network/write_network.

Feeder values: Baran and Wu, IEEE Trans. Power Delivery 4(2), 1989 (33-bus, 12.66 kV feeder;
total load 3715 kW + j2300 kvar; branch 1-2 is 0.0922 + j0.0470 ohm), copied in tests/data.
"""
import hashlib
import shutil
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from conftest import apply_byte_edits
from planner.errors import InputError, NetworkError
from planner.network import tabular
from planner.network.cdf import read_cdf
from planner.network.io import read_network, write_network
from planner.network.model import TABLES
from planner.network.tabular import read_tables, write_tables

DATA = Path(__file__).parent / "data"
FEEDER = DATA / "feeder33_tables"


def same(a, b):
    assert a.base_mva == b.base_mva and a.name == b.name
    for kind in TABLES:
        pd.testing.assert_frame_equal(a.table(kind), b.table(kind), check_exact=True)


def copy_feeder(tmp_path):
    dst = tmp_path / "feeder"
    shutil.copytree(FEEDER, dst)
    return dst


def digest(folder):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(Path(folder).iterdir())}


# --- the 33-bus feeder in engineering units -----------------------------------------------

def test_feeder33_loads_in_engineering_units():
    net = read_network(FEEDER)   # Baran and Wu 1989
    assert net.base_mva == 10.0
    assert len(net.buses) == 33 and len(net.lines) == 32
    assert (net.buses.base_kv == 12.66).all()
    assert net.buses.set_index("bus").kind[1] == "slack"
    assert (net.generators.bus.tolist(), net.generators.v_set_pu.tolist()) == ([1], [1.0])
    assert net.loads.mw.sum() * 1000 == pytest.approx(3715.0, abs=1e-9)
    assert net.loads.mvar.sum() * 1000 == pytest.approx(2300.0, abs=1e-9)
    l12 = net.lines.set_index("line_id").loc["1-2"]
    assert l12.r_pu == pytest.approx(0.0922 / (12.66 ** 2 / 10), rel=1e-12)
    assert l12.x_pu == pytest.approx(0.0470 / (12.66 ** 2 / 10), rel=1e-12)


def test_feeder33_any_base_gives_the_same_ohms(tmp_path):
    folder = copy_feeder(tmp_path)
    (folder / "network.toml").write_text('name = "f"\nbase_mva = 100.0\n')
    net = read_tables(folder)
    z_base = 12.66 ** 2 / 100.0
    ohm = pd.read_csv(FEEDER / "lines.csv")
    assert (net.lines.r_pu * z_base).to_numpy() == pytest.approx(ohm.r_ohm.to_numpy(), rel=1e-12)
    assert (net.lines.x_pu * z_base).to_numpy() == pytest.approx(ohm.x_ohm.to_numpy(), rel=1e-12)


def test_other_unit_columns(tmp_path):
    folder = copy_feeder(tmp_path)
    (folder / "lines.csv").write_text("line_id,from_bus,to_bus,r_ohm,x_ohm,b_us\n1-2,1,2,1.6029,3.2058,100\n"
                                      + "".join(f"{a}-{a+1},{a},{a+1},0.1,0.1,\n" for a in range(2, 33)))
    (folder / "shunts.csv").write_text("shunt_id,bus,kvar_per_step,steps_max,steps_on\nC30,30,300,4,2\n")
    (folder / "generators.csv").write_text("gen_id,bus,kw,kvar,v_set_pu\nS1,1,0,0,1.0\nDG18,18,250,-50,1.0\n")
    net = read_tables(folder)
    z_base = 12.66 ** 2 / 10.0
    l12 = net.lines.set_index("line_id").loc["1-2"]
    assert l12.b_pu == pytest.approx(100e-6 * z_base, rel=1e-12)
    assert net.lines.b_pu.iloc[1] == 0.0                        # empty cell: default
    s = net.shunts.iloc[0]
    assert (s.mvar_per_step, s.steps_max, s.steps_on, bool(s.switchable)) == (0.3, 4, 2, False)
    g = net.generators.set_index("gen_id").loc["DG18"]
    assert (g.mw, g.mvar) == (0.25, -0.05)


# --- exact round trip ----------------------------------------------------------------------

@pytest.mark.parametrize("source", ["feeder", "ieee14", "ieee30"])
def test_read_write_read_is_identical(tmp_path, source):
    net = read_tables(FEEDER) if source == "feeder" else read_cdf(DATA / f"{source}cdf.txt")
    write_tables(net, tmp_path / "a")
    first = read_tables(tmp_path / "a")
    same(first, net)
    write_tables(first, tmp_path / "b")
    same(read_tables(tmp_path / "b"), first)
    assert digest(tmp_path / "a") == digest(tmp_path / "b")


def test_round_trip_keeps_awkward_values(tmp_path):
    net = read_tables(FEEDER)
    net.name = 'odd "name" \\ with\ttab'
    net.buses.loc[3, "name"] = "Bus, with comma"
    net.lines.loc[0, "r_pu"] = 0.1 + 0.2                       # not a short decimal
    net.lines.loc[1, "energised"] = False
    net.loads.loc[0, "p_share_z"] = 1 / 3
    write_tables(net, tmp_path / "t")
    same(read_tables(tmp_path / "t"), net)


# --- atomic writes, inputs untouched -------------------------------------------------------

def test_reading_never_touches_the_input(tmp_path):
    folder = copy_feeder(tmp_path)
    before = digest(folder)
    read_network(folder)
    assert digest(folder) == before


def test_write_replaces_a_tables_folder_and_leaves_no_temp(tmp_path):
    net14 = read_cdf(DATA / "ieee14cdf.txt")
    target = tmp_path / "case"
    write_tables(read_tables(FEEDER), target)
    write_tables(net14, target)
    same(read_tables(target), net14)
    assert [p.name for p in tmp_path.iterdir()] == ["case"]


def test_failed_write_leaves_the_old_folder(tmp_path, monkeypatch):
    target = tmp_path / "case"
    write_tables(read_tables(FEEDER), target)
    before = digest(target)

    def half_then_fail(net, folder):
        (folder / "buses.csv").write_text("bus\n1\n")
        raise OSError("disk full")

    monkeypatch.setattr(tabular, "_write_into", half_then_fail)
    with pytest.raises(OSError, match="disk full"):
        write_tables(read_cdf(DATA / "ieee14cdf.txt"), target)
    assert digest(target) == before
    assert [p.name for p in tmp_path.iterdir()] == ["case"]


def test_write_refuses_a_folder_with_other_files(tmp_path):
    target = tmp_path / "mine"
    target.mkdir()
    (target / "notes.txt").write_text("keep me")
    with pytest.raises(InputError, match="notes.txt"):
        write_tables(read_tables(FEEDER), target)
    assert (target / "notes.txt").read_text() == "keep me"


# --- errors --------------------------------------------------------------------------------

def error_of(folder, **files):
    for name, text in files.items():
        (folder / name.replace("_csv", ".csv").replace("_toml", ".toml")).write_text(text)
    with pytest.raises(InputError) as info:
        read_tables(folder)
    assert "\n" not in str(info.value)
    return str(info.value)


def test_bad_value_names_file_row_line_and_column(tmp_path):
    f = copy_feeder(tmp_path)
    text = (FEEDER / "lines.csv").read_text().splitlines()
    text[7] = text[7].replace("0.2351", "0.23x1")                # data row 7 on line 8
    msg = error_of(f, lines_csv="\n".join(text) + "\n")
    assert msg == f"{f / 'lines.csv'}:8: row 7: x_ohm: cannot read '0.23x1' as a number"


@pytest.mark.parametrize("name, content, needle", [
    ("lines_csv", "line_id,from_bus,to_bus,r_ohm,x_ohms\n", "lines.csv: unknown column 'x_ohms'"),
    ("lines_csv", "line_id,from_bus,to_bus,r_ohm,r_pu,x_pu\n", "columns 'r_pu' and 'r_ohm' both given"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu\n", "missing required column 'x_pu' (or 'x_ohm')"),
    ("lines_csv", "line_id,from_bus,to_bus,r_ohm,x_ohm\n1-2,99,2,1,1\n",
     "lines.csv:2: row 1: from_bus: unknown bus 99: its base kV is needed"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu,x_pu\n1-2,1,2,0.1\n", "lines.csv:2: row 1: row has 4 values"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu,x_pu\n,1,2,0.1,0.2\n",
     "lines.csv:2: row 1: line_id: value missing in a required column"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu,x_pu,energised\n1-2,1,2,0.1,0.2,maybe\n",
     "row 1: energised: cannot read 'maybe' as true/false"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu,x_pu\n1-2,1.5,2,0.1,0.2\n", "from_bus: '1.5' is not a whole number"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu,x_pu\n1-2,1,2,inf,0.2\n", "r_pu: cannot read 'inf' as a number"),
    ("loads_csv", "load_id,bus,kw,kvar\nD2,2,1e999,1\n", "loads.csv:2: row 1: kw: '1e999' is out of range"),
    ("loads_csv", "load_id,bus,kw,kvar\n\nD2,2,5,1\nD3,3,x,1\n", "loads.csv:4: row 2: kw"),
    ("loads_csv", "load_id,load_id\n", "column 'load_id' appears twice"),
    ("loads_csv", "", "loads.csv: empty file"),
    ("network_toml", "base_mva = -10\n", "network.toml: base_mva: must be a positive number"),
    ("network_toml", "base_mva = 10\nbase_kv = 11\n", "network.toml: unknown key 'base_kv'"),
    ("network_toml", "base_mva = = 10\n", "network.toml: "),
])
def test_input_errors(tmp_path, name, content, needle):
    assert needle in error_of(copy_feeder(tmp_path), **{name: content})


def test_not_utf8_names_the_line(tmp_path):
    f = copy_feeder(tmp_path)
    (f / "loads.csv").write_bytes(b"load_id,bus,kw,kvar\nD2,2,1,1\nD\xff3,3,1,1\n")
    with pytest.raises(InputError, match=r"loads.csv:3: not UTF-8"):
        read_tables(f)


def test_zero_base_kv_blocks_ohm_conversion(tmp_path):
    f = copy_feeder(tmp_path)
    (f / "buses.csv").write_text((FEEDER / "buses.csv").read_text().replace("1,12.66,slack", "1,0,slack"))
    with pytest.raises(InputError, match="bus 1 has base_kv 0.0: cannot convert ohms"):
        read_tables(f)


def test_buses_csv_is_required_and_other_tables_optional(tmp_path):
    f = tmp_path / "tiny"
    f.mkdir()
    with pytest.raises(InputError, match="missing buses.csv"):
        read_tables(f)
    (f / "buses.csv").write_text("bus,base_kv,kind\n1,11,slack\n")
    net = read_tables(f)
    assert (net.base_mva, net.name, len(net.lines)) == (100.0, "tiny", 0)
    assert net.buses.v_min_pu.tolist() == [0.95]               # model default


# --- read_network / write_network -----------------------------------------------------------

def test_read_network_detects_the_format(tmp_path):
    by_folder = read_network(FEEDER)
    same(read_network(FEEDER / "network.toml"), by_folder)
    same(read_network(FEEDER / "lines.csv"), by_folder)
    cdf_copy = tmp_path / "fourteen.dat"                            # no telling extension: by content
    cdf_copy.write_bytes((DATA / "ieee14cdf.txt").read_bytes())
    assert len(read_network(cdf_copy).buses) == 14
    write_network(by_folder, tmp_path / "f.cdf", format="cdf")
    assert read_network(tmp_path / "f.cdf").loads.mw.sum() == pytest.approx(3.715, abs=1e-9)


def test_read_network_errors_name_the_path(tmp_path):
    with pytest.raises(InputError, match="nothing-here: no such file or folder"):
        read_network(tmp_path / "nothing-here")
    odd = tmp_path / "data.bin"
    odd.write_bytes(b"\x00\x01 not a network")
    with pytest.raises(InputError, match="data.bin: unknown network format"):
        read_network(odd)
    with pytest.raises(InputError, match="format: unknown format 'ods'"):
        write_network(read_tables(FEEDER), tmp_path / "x", format="ods")


def test_read_network_runs_validation(tmp_path):
    f = copy_feeder(tmp_path)
    (f / "generators.csv").write_text("gen_id,bus,mw,v_set_pu\nS1,2,0.0,1.0\n")   # source off the slack
    with pytest.raises(NetworkError, match="buses 1: kind: slack bus with no in-service generator"):
        read_network(f)


# --- robustness ----------------------------------------------------------------------------

_CSV = (FEEDER / "lines.csv").read_bytes()


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(target=st.sampled_from(["lines.csv", "loads.csv", "buses.csv", "network.toml"]),
       edits=st.lists(st.tuples(st.sampled_from(["set", "insert", "delete"]), st.integers(0, 10_000),
                                st.binary(min_size=1, max_size=3)), min_size=1, max_size=6))
def test_random_corruption_raises_only_input_errors(tmp_path, target, edits):
    folder = tmp_path / "f"
    if folder.exists():
        shutil.rmtree(folder)
    shutil.copytree(FEEDER, folder)
    data = apply_byte_edits((FEEDER / target).read_bytes(), edits)
    (folder / target).write_bytes(bytes(data))
    try:
        net = read_network(folder)
    except (InputError, NetworkError) as exc:
        assert "\n" not in str(exc) and str(exc)
    else:
        assert len(net.buses) > 0


# Column names of an earlier release (spelt in pieces so that the names themselves stay out of the
# source): each must be refused as an unknown column, never read silently under its old meaning.
_RETIRED = [
    ("loads_csv", "load_id,bus,{}\nD2,2,1\n", "p_" + "mw"),
    ("loads_csv", "load_id,bus,mw,{}\nD2,2,1,1\n", "q_" + "mvar"),
    ("lines_csv", "line_id,from_bus,to_bus,r_pu,x_pu,{}\n1-2,1,2,0.1,0.2,true\n", "in_" + "service"),
    ("buses_csv", "bus,base_kv,kind,{}\n1,12.66,slack,0\n", "gs_" + "mw"),
    ("buses_csv", "bus,base_kv,kind,{}\n1,12.66,slack,0\n", "bs_" + "mvar"),
]


@pytest.mark.parametrize("name, template, old", _RETIRED)
def test_retired_column_names_are_unknown(tmp_path, name, template, old):
    msg = error_of(copy_feeder(tmp_path), **{name: template.format(old)})
    assert f"unknown column {old!r}" in msg
