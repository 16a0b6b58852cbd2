"""Networks and result tables as .xlsx workbooks (planner.network.workbook).

Reference values: the 33-bus feeder's losses, 202.67 kW, are from Baran and Wu (1989), as in
tests/test_tabular.py; everything else here checks that a workbook says exactly what the CSV
tables (or the JSON output) say, value for value.
"""
from __future__ import annotations

import builtins
import csv
import json
import math
import os
import stat
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import example, given, settings, strategies as st

openpyxl = pytest.importorskip("openpyxl")

from planner.cli import main                                          # noqa: E402
from planner.errors import InputError                                 # noqa: E402
from planner.flow.newton import solve_flow                            # noqa: E402
from planner.network.io import read_network, write_network            # noqa: E402
from planner.network.model import TABLES, Network, make_table         # noqa: E402
from planner.network.workbook import MissingExtra, write_tables_workbook  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
FEEDER = ROOT / "tests" / "data" / "feeder33_tables"
WRENFOLD = ROOT / "models" / "wrenfold"


def assert_same_network(a: Network, b: Network):
    assert (a.name, a.base_mva) == (b.name, b.base_mva)
    for kind in TABLES:
        pd.testing.assert_frame_equal(a.table(kind), b.table(kind), check_exact=True)


def csv_rows(path: Path):
    with open(path, newline="") as fh:
        return list(csv.reader(fh))


def typed(cell: str):
    """A CSV cell as a person would type it into a spreadsheet: numbers as numbers."""
    try:
        return int(cell)
    except ValueError:
        pass
    try:
        return float(cell)
    except ValueError:
        return cell


def save(path: Path, sheets: dict) -> Path:
    """A workbook from {sheet: [rows]} made with openpyxl directly, as another program would."""
    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for name, rows in sheets.items():
        ws = wb.create_sheet(name)
        for row in rows:
            ws.append(row)
    wb.save(path)
    return path


def feeder_sheets(with_settings=True) -> dict:
    """The 33-bus feeder's CSV tables (ohm and kW columns) as sheets of typed cells."""
    sheets = {}
    if with_settings:
        sheets["network"] = [["key", "value"], ["name", "33-bus feeder (Baran and Wu 1989)"], ["base_mva", 10]]
    for f in sorted(FEEDER.glob("*.csv")):
        rows = csv_rows(f)
        sheets[f.stem] = [rows[0]] + [[typed(c) for c in r] for r in rows[1:]]
    return sheets


# --- round trips ----------------------------------------------------------------------------------

@pytest.mark.parametrize("source", [FEEDER, WRENFOLD], ids=["feeder33", "wrenfold"])
def test_round_trip_gives_identical_tables_and_losses(tmp_path, source):
    net = read_network(source)
    target = tmp_path / "net.xlsx"
    write_network(net, target)
    back = read_network(target)
    assert_same_network(net, back)
    assert back.source == str(target)
    wb = openpyxl.load_workbook(target, read_only=True)
    assert wb.sheetnames == ["network", *TABLES]
    wb.close()
    a, b = solve_flow(net), solve_flow(back)
    assert a.converged and b.converged
    assert a.losses_mw == b.losses_mw and a.losses_mvar == b.losses_mvar
    if source == FEEDER:
        assert a.losses_mw == pytest.approx(0.20267, abs=1e-5)   # Baran and Wu (1989): 202.67 kW
    # written twice, read twice: still the same
    write_network(back, target)
    assert_same_network(net, read_network(target))


@settings(max_examples=10, deadline=None)
@given(st.lists(st.floats(min_value=1e-12, max_value=50.0, allow_nan=False), min_size=2, max_size=2),
       st.text(alphabet=st.characters(blacklist_categories=("Cs", "Cc")), max_size=12))
@example(rx=[0.1, 0.2], name=" ")          # a trailing blank on the network name is dropped like any cell's
def test_any_float_and_name_survive_a_round_trip(tmp_path_factory, rx, name):
    net = Network(base_mva=100.0 / 3.0, name="=SUM(A1:A2)" + name,
                  buses=make_table("buses", [{"bus": 1, "base_kv": 11.0, "kind": "slack", "name": "=1+1"},
                                             {"bus": 2 ** 62 + 1, "base_kv": 11.0 / 7.0, "kind": "PQ",
                                              "name": name}]),
                  generators=make_table("generators", [{"gen_id": "007", "bus": 1, "mw": 0.0}]),
                  lines=make_table("lines", [{"line_id": " L1 ", "from_bus": 1, "to_bus": 2 ** 62 + 1,
                                              "r_pu": rx[0], "x_pu": rx[1]}]))
    target = tmp_path_factory.mktemp("wb") / "n.xlsx"
    write_network(net, target, format="xlsx")
    back = read_network(target)
    assert back.lines.r_pu[0] == rx[0] and back.lines.x_pu[0] == rx[1]
    assert back.base_mva == 100.0 / 3.0 and back.buses.base_kv[1] == 11.0 / 7.0
    assert back.buses.bus.tolist() == [1, 2 ** 62 + 1]
    assert back.name == ("=SUM(A1:A2)" + name).strip()         # text stays text, never a formula
    assert back.buses.name.tolist() == ["=1+1", name.strip()]
    assert back.generators.gen_id.tolist() == ["007"]


# --- workbooks made by people ------------------------------------------------------------------

def test_ohm_and_kw_columns_load_like_the_csv_tables(tmp_path):
    from_csv = read_network(FEEDER)
    from_xlsx = read_network(save(tmp_path / "feeder.xlsx", feeder_sheets()))
    assert_same_network(from_csv, from_xlsx)
    # line 1-2: 0.0922 ohm on 12.66 kV, 10 MVA -> 0.0922 / 16.02756 pu
    assert from_xlsx.lines.r_pu[0] == pytest.approx(0.0922 / (12.66 ** 2 / 10.0), rel=1e-15)
    assert from_xlsx.loads.mw[0] == pytest.approx(0.1, rel=1e-15)


def test_settings_sheet_is_optional_and_columns_may_come_in_any_order(tmp_path):
    sheets = feeder_sheets(with_settings=False)
    lines = sheets["lines"]
    order = [3, 4, 0, 2, 1]      # r_ohm, x_ohm before from_bus: conversion waits for the row's bus
    sheets["lines"] = [[row[k] for k in order] for row in lines]
    sheets["lines"].insert(0, [])                   # empty rows are skipped
    net = read_network(save(tmp_path / "my feeder.xlsx", sheets))
    assert net.name == "my feeder" and net.base_mva == 100.0
    ref = read_network(FEEDER)
    scale = 100.0 / 10.0      # ohm -> pu scales with the MVA base
    assert net.lines.r_pu.tolist() == pytest.approx((ref.lines.r_pu * scale).tolist(), rel=1e-14)


def test_spreadsheet_cell_types(tmp_path):
    sheets = {
        "buses": [["bus", "base_kv", "kind", "name"], [1, 11, "Slack", 42], [2, "11.0", "pq", True]],
        "generators": [["gen_id", "bus", "mw", "energised"], [7, 1, 0, True]],
        "loads": [["load_id", "bus", "kw", "kvar", "energised"], [2.5, 2, 100, "60", 1], ["off", 2, 5, 1, False]],
        "lines": [["line_id", "from_bus", "to_bus", "r_pu", "x_pu"], ["L", 1, 2.0, 0.01, 0.1]],
    }
    net = read_network(save(tmp_path / "t.xlsx", sheets))
    assert net.buses.kind.tolist() == ["slack", "PQ"]
    assert net.buses.name.tolist() == ["42", "TRUE"]
    assert net.generators.gen_id.tolist() == ["7"]
    assert net.loads.load_id.tolist() == ["2.5", "off"]
    assert net.loads.mw.tolist() == [0.1, 0.005] and net.loads.mvar.tolist() == [0.06, 0.001]
    assert net.loads.energised.tolist() == [True, False]
    assert net.lines.to_bus.tolist() == [2]


# --- errors name file, sheet, row and column ------------------------------------------------------

def error_of(tmp_path, sheets) -> tuple[str, Path]:
    p = save(tmp_path / "bad.xlsx", sheets)
    with pytest.raises(InputError) as info:
        read_network(p)
    msg = str(info.value)
    assert "\n" not in msg
    return msg, p


def test_bad_number_names_sheet_row_and_column(tmp_path):
    sheets = feeder_sheets()
    sheets["lines"][7][4] = "0.23x1"                     # data row 7: spreadsheet row 8, column E
    msg, p = error_of(tmp_path, sheets)
    assert msg == f"{p}: sheet 'lines' row 8: column E (x_ohm): cannot read '0.23x1' as a number"


@pytest.mark.parametrize("edit, expected", [
    (lambda s: s["lines"][0].__setitem__(4, "x_ohms"),
     "sheet 'lines' row 1: column E: unknown column 'x_ohms'"),
    (lambda s: s.__setitem__("lnes", s.pop("lines")),
     "sheet 'lnes': unknown sheet (expected network, buses, loads, generators, lines, transformers, shunts)"),
    (lambda s: s.__setitem__("lines", [r[:4] for r in s["lines"]]),
     "sheet 'lines' row 1: missing required column 'x_pu' (or 'x_ohm')"),
    (lambda s: s.pop("buses"), "missing sheet 'buses'"),
    (lambda s: s["loads"].__setitem__(3, ["D4", 4, True, 80]),
     "sheet 'loads' row 4: column C (kw): cannot read TRUE as a number"),
    (lambda s: s["loads"].__setitem__(3, ["D4", 4.5, 120, 80]),
     "sheet 'loads' row 4: column B (bus): 4.5 is not a whole number"),
    (lambda s: s["loads"].__setitem__(3, [None, 4, 120, 80]),
     "sheet 'loads' row 4: column A (load_id): value missing in a required column"),
    (lambda s: s["loads"].__setitem__(3, ["D4", 4, 120, 80, 5]),
     "sheet 'loads' row 4: column E: value in a column with no name in the header"),
    (lambda s: s["loads"].__setitem__(0, ["load_id", None, "kw", "kvar"]),
     "sheet 'loads' row 1: column B: empty column name in the header"),
    (lambda s: s["lines"][0].__setitem__(3, "r_pu") or s["lines"][0].append("r_ohm"),
     "sheet 'lines' row 1: column F: columns 'r_pu' and 'r_ohm' both given"),
    (lambda s: s["lines"][5].__setitem__(1, 99),
     "sheet 'lines' row 6: column B (from_bus): unknown bus 99: its base kV is needed"),
    (lambda s: s["network"].__setitem__(2, ["base_mva", -10]),
     "sheet 'network' row 3: column B (value): base_mva must be a positive number, got -10"),
    (lambda s: s["network"].append(["base_kv", 11]),
     "sheet 'network' row 4: column A (key): unknown key 'base_kv'"),
    (lambda s: s.__setitem__("shunts", []), "sheet 'shunts': empty sheet"),
])
def test_input_errors(tmp_path, edit, expected):
    sheets = feeder_sheets()
    edit(sheets)
    msg, p = error_of(tmp_path, sheets)
    assert msg.startswith(f"{p}: ") and expected in msg, msg


def test_validation_problems_and_damaged_files(tmp_path):
    sheets = feeder_sheets()
    sheets["lines"][4][2] = 55                          # a line to a bus that does not exist
    with pytest.raises(InputError, match="to_bus: unknown bus 55"):
        read_network(save(tmp_path / "v.xlsx", sheets))
    junk = tmp_path / "junk.xlsx"
    junk.write_bytes(b"this is not a zip file")
    with pytest.raises(InputError, match=r"junk.xlsx: not a readable .xlsx workbook"):
        read_network(junk)
    with pytest.raises(InputError, match="nothing.xlsx: no such file or folder"):
        read_network(tmp_path / "nothing.xlsx")
    os.mkfifo(tmp_path / "pipe.xlsx")                    # would block a reader that opened it
    with pytest.raises(InputError, match=r"pipe.xlsx: not a regular file \(a named pipe\)"):
        read_network(tmp_path / "pipe.xlsx")


def test_workbook_that_unpacks_too_large_is_refused(tmp_path, monkeypatch):
    import planner.network.workbook as workbook
    p = save(tmp_path / "feeder.xlsx", feeder_sheets())
    read_network(p)                                      # fine at the real limit (256 MiB)
    monkeypatch.setattr(workbook, "MAX_NETWORK_BYTES", 4096)
    with pytest.raises(InputError, match=r"feeder.xlsx: network workbook unpacks to [\d,]+ bytes, "
                                         r"more than the 4,096 accepted"):
        read_network(p)


# --- writing is atomic ---------------------------------------------------------------------------

def test_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "out.xlsx"
    write_tables_workbook(target, {"a": pd.DataFrame({"x": [1.5]})})
    os.chmod(target, 0o640)
    before = target.read_bytes()
    with pytest.raises(ValueError, match="control character"):
        write_tables_workbook(target, {"a": pd.DataFrame({"x": ["bell\x07"]})})
    with pytest.raises(ValueError, match="cannot be a sheet name"):
        write_tables_workbook(target, {"a/b": pd.DataFrame({"x": [1]})})
    assert target.read_bytes() == before
    assert os.listdir(tmp_path) == ["out.xlsx"]
    write_tables_workbook(target, {"b": pd.DataFrame({"y": [float("nan"), math.inf, 2.0]})})
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o640           # the old file's permissions kept
    assert pd.read_excel(target, sheet_name="b").y.tolist()[2] == 2.0
    ws = openpyxl.load_workbook(target)["b"]
    assert [ws["A2"].value, ws["A3"].value] == [None, "inf"]        # NaN: empty; inf: said in words
    assert ws["A1"].font.b and ws.freeze_panes == "A2"


# --- planner flow --xlsx ---------------------------------------------------------------------

@pytest.mark.parametrize("source", [FEEDER, WRENFOLD], ids=["feeder33", "wrenfold"])
def test_flow_xlsx_matches_the_json_output(tmp_path, capsys, source):
    out_json, out_xlsx = tmp_path / "f.json", tmp_path / "f.xlsx"
    assert main(["flow", str(source), "-q", "--json", str(out_json), "--xlsx", str(out_xlsx)]) == 0
    d = json.loads(out_json.read_text())
    sheets = pd.read_excel(out_xlsx, sheet_name=None)
    assert list(sheets) == ["buses", "generators", "branches"]
    for name, frame in sheets.items():
        records = d[name]
        assert list(frame.columns) == list(records[0])
        assert len(frame) == len(records)
        for col in frame.columns:
            for g, w in zip(frame[col].tolist(), [r[col] for r in records]):
                blank = isinstance(g, float) and math.isnan(g)      # an empty cell
                if w is None or w == "":                             # JSON null (no rating) or no name
                    assert blank, (name, col, g, w)
                elif isinstance(w, float):
                    assert g == w, (name, col, g, w)                 # full precision
                else:
                    assert str(g) == str(w), (name, col, g, w)
    assert sheets["branches"].loss_mw.sum() == pytest.approx(d["losses_mw"], rel=1e-12)
    if source == FEEDER:
        assert d["losses_mw"] == pytest.approx(0.20267, abs=1e-5)             # Baran and Wu (1989)
        assert sheets["buses"].v_pu.min() == pytest.approx(0.9131, abs=1e-4)  # at bus 18, same source
    else:
        assert sheets["branches"].loading_pct.notna().all()                    # every demo branch is rated


def test_flow_reads_a_network_workbook(tmp_path, capsys):
    p = save(tmp_path / "feeder.xlsx", feeder_sheets())
    assert main(["flow", str(p)]) == 0
    assert "losses: 0.2027 MW" in capsys.readouterr().out
    assert main(["flow", str(p), "--xlsx", str(tmp_path)]) == 3          # a folder: refused before solving
    assert capsys.readouterr().err.startswith(f"error: --xlsx {tmp_path}: is a folder")


# --- without openpyxl -----------------------------------------------------------------------

@pytest.fixture
def no_openpyxl(monkeypatch):
    real = builtins.__import__

    def fake(name, *args, **kwargs):
        if name == "openpyxl" or name.startswith("openpyxl."):
            raise ImportError("No module named 'openpyxl'")
        return real(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", fake)


def test_missing_openpyxl_gives_a_clear_error(tmp_path, no_openpyxl, capsys):
    p = tmp_path / "net.xlsx"
    p.write_bytes(b"")
    with pytest.raises(MissingExtra) as info:
        read_network(p)
    assert str(info.value) == "reading .xlsx needs openpyxl: pip install 'planner[xlsx]'"
    with pytest.raises(MissingExtra, match=r"^writing .xlsx needs openpyxl: pip install 'planner\[xlsx\]'$"):
        write_network(read_network(FEEDER), tmp_path / "out.xlsx")    # CSV tables still read
    assert main(["flow", str(p)]) == 2
    err = capsys.readouterr().err
    assert err == "error: reading .xlsx needs openpyxl: pip install 'planner[xlsx]'\n"
    out_json = tmp_path / "f.json"                     # checked before the load flow: nothing written
    assert main(["flow", str(FEEDER), "-q", "--json", str(out_json), "--xlsx", str(tmp_path / "f.xlsx")]) == 2
    assert capsys.readouterr().err == "error: writing .xlsx needs openpyxl: pip install 'planner[xlsx]'\n"
    assert not out_json.exists()
    assert main(["flow", str(FEEDER), "-q"]) == 0                     # the default path needs none


def test_csv_tables_of_an_output_folder_as_one_workbook():
    from planner.network.workbook import csv_files_workbook
    import io
    files = {"report.html": "<p>not a table</p>",
             "levels.csv": "level,hours,losses_mw,note\npeak,1000,0.20267,\nlight,7760,0.0473,NA\n",
             "banks.csv": "bus,kvar\n30,900\n"}
    sheets = pd.read_excel(io.BytesIO(csv_files_workbook(files)), sheet_name=None, keep_default_na=False)
    assert list(sheets) == ["banks", "levels"]
    assert sheets["levels"].losses_mw.tolist() == [0.20267, 0.0473]
    assert sheets["levels"].hours.tolist() == [1000, 7760]
    assert sheets["levels"].note.tolist() == ["", "NA"]          # "NA" is text, not a missing value
    assert sheets["banks"].to_dict("records") == [{"bus": 30, "kvar": 900}]


def test_same_tables_give_the_same_bytes(tmp_path):
    from planner.network.workbook import workbook_bytes
    frames = {"buses": pd.DataFrame({"bus": [1, 2], "v_pu": [1.0, 0.1 + 0.2], "name": ["a", "=b"]})}
    first = workbook_bytes(frames)
    import time
    time.sleep(1.1)      # the zip format stores times to 2 s; the save time must not show
    assert workbook_bytes(frames) == first


def test_study_folder_has_results_workbook_with_every_csv_table(tmp_path):
    from planner.commands.study import run_study_file
    study = ROOT / "tests" / "data" / "studies" / "feeder33_plan.toml"
    assert run_study_file(study, out_dir=tmp_path, quiet=True) == 0
    folder = tmp_path / "feeder33-plan"
    sheets = pd.read_excel(folder / "results.xlsx", sheet_name=None, keep_default_na=False,
                           na_values=[""])
    csvs = sorted(folder.glob("*.csv"))
    assert csvs and list(sheets) == [p.stem[:31] for p in csvs]
    for p in csvs:
        want = pd.read_csv(p, keep_default_na=False, na_values=[""])
        got = sheets[p.stem[:31]]
        assert list(got.columns) == list(want.columns), p.name
        got = got.replace({"inf": math.inf, "-inf": -math.inf})      # text cells for infinities
        pd.testing.assert_frame_equal(got, want, check_dtype=False, obj=p.name)


def test_damaged_sheet_is_one_line_error(tmp_path):
    import zipfile
    good, bad = tmp_path / "good.xlsx", tmp_path / "bad.xlsx"
    write_network(read_network(FEEDER), good)
    with zipfile.ZipFile(good) as src, zipfile.ZipFile(bad, "w") as dst:
        for info in src.infolist():
            body = src.read(info)
            if info.filename == "xl/worksheets/sheet5.xml":      # the lines sheet, cut short
                body = body[: len(body) * 9 // 10]
            dst.writestr(info, body)
    with pytest.raises(InputError, match=r"bad.xlsx: .*not a readable (sheet|.xlsx workbook) \(ParseError"):
        read_network(bad)
