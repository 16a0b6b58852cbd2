"""The report folder's workbook writer (planner/report/sheets.py) against the general workbook
writer (planner/network/workbook.py, openpyxl): the same sheets and values read back."""
from __future__ import annotations

import io

import pandas as pd
import pytest

openpyxl = pytest.importorskip("openpyxl")

from planner.network.workbook import csv_files_workbook  # noqa: E402
from planner.report.sheets import csv_tables_xlsx, tables_xlsx  # noqa: E402

FILES = {
    "report.html": "<p>not a table</p>",
    "levels.csv": "level,hours,losses_mw,note,ok\npeak,1000,0.20267,,True\nlight,7760,0.0473,NA,False\n",
    "odd.csv": "text,x,big\n=SUM(A1),0.30000000000000004,123456789012345678\n<a & b>,inf,1\n"
               " padded ,-inf,2\n\"quote \"\"q\"\"\",1e-300,3\n",
    "empty.csv": "a,b\n",
}


def _read(data):
    return pd.read_excel(io.BytesIO(data), sheet_name=None, keep_default_na=False, na_values=[""])


def test_same_values_as_the_general_workbook_writer():
    ours, theirs = _read(csv_tables_xlsx(FILES)), _read(csv_files_workbook(FILES))
    assert list(ours) == list(theirs) == ["empty", "levels", "odd"]
    for name in ours:
        pd.testing.assert_frame_equal(ours[name], theirs[name], obj=name)
    odd = ours["odd"]
    assert odd.text.tolist() == ["=SUM(A1)", "<a & b>", " padded ", 'quote "q"']    # text stays text
    assert odd.x[0] == 0.30000000000000004 and odd.x[3] == 1e-300                  # full precision
    ws = openpyxl.load_workbook(io.BytesIO(csv_tables_xlsx(FILES)))["odd"]
    assert (ws["B3"].value, ws["B4"].value) == ("inf", "-inf")                       # infinities as text
    assert ws["A2"].value == "=SUM(A1)" and ws["A2"].data_type != "f"
    assert pd.isna(ours["levels"].note[0]) and ours["levels"].note[1] == "NA"       # empty cell; "NA" is text
    assert ours["levels"].ok.tolist() == [True, False]


def test_bold_frozen_header_and_widths():
    wb = openpyxl.load_workbook(io.BytesIO(csv_tables_xlsx(FILES)))
    ws = wb["levels"]
    assert ws.freeze_panes == "A2"
    assert ws["A1"].font.b and not ws["A2"].font.b
    assert ws.column_dimensions["C"].width == len("losses_mw") + 2
    assert ws["C2"].data_type == "n" and ws["A2"].data_type in ("s", "inlineStr")


def test_same_tables_same_bytes_and_bad_names_refused():
    assert csv_tables_xlsx(FILES) == csv_tables_xlsx(dict(reversed(list(FILES.items()))))
    with pytest.raises(ValueError, match="cannot be a sheet name"):
        tables_xlsx({"a/b": pd.DataFrame({"x": [1]})})
    with pytest.raises(ValueError, match=r"sheet 't' row 3 column B: text with a control character"):
        tables_xlsx({"t": pd.DataFrame({"x": [1, 2], "y": ["ok", "bad\x07"]})})
