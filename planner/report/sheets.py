"""The report folder's tables as one .xlsx workbook, written directly as its XML parts.

A study's hourly table alone has some half a million cells; a general spreadsheet library builds
an object per cell and took 7-11 s for the demo's workbook (measured), more than the rest of the
proof stage. This writer formats each column in one pass and zips the parts itself: the same
sheets (one per CSV table, named after the file), a bold frozen header row, numbers at full
precision (the shortest text that reads back to the same float), NaN as an empty cell,
infinities as the text ``inf`` / ``-inf``, text always as text (inline strings: "=..." never
becomes a formula), no time stamps (the same tables always give the same bytes).

>>> import io, pandas as pd
>>> data = csv_tables_xlsx({"losses.csv": "level,losses_mw,note\\npeak,0.2027,=x\\n", "report.html": "<p>"})
>>> pd.read_excel(io.BytesIO(data), sheet_name=None)["losses"].values.tolist()
[['peak', 0.2027, '=x']]
"""
from __future__ import annotations

import io
import math
import re
import zipfile
from typing import Mapping

import numpy as np
import pandas as pd

_BAD_SHEET_CHARS = set("[]:*?/\\")
_CONTROL = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")
_FIXED_TIME = (1980, 1, 1, 0, 0, 0)
_MAIN = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_PKG = "http://schemas.openxmlformats.org/package/2006"
_XML = '<?xml version="1.0" encoding="UTF-8" standalone="yes"?>\n'


def column_letter(k: int) -> str:
    """Spreadsheet column letter of 0-based column ``k``.

    >>> column_letter(0), column_letter(25), column_letter(26), column_letter(701), column_letter(702)
    ('A', 'Z', 'AA', 'ZZ', 'AAA')
    """
    k += 1
    out = ""
    while k:
        k, r = divmod(k - 1, 26)
        out = chr(65 + r) + out
    return out


def _esc(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;").replace('"', "&quot;")


def _text_cell(ref: str, text: str, style: str = "") -> str:
    return f'<c r="{ref}"{style} t="inlineStr"><is><t xml:space="preserve">{_esc(text)}</t></is></c>'


def _float_cells(letter, values, rows):
    out = []
    for r, x in zip(rows, values):
        if x != x:                                  # NaN: no number to show, an empty cell
            out.append("")
        elif math.isinf(x):
            out.append(_text_cell(f"{letter}{r}", "inf" if x > 0 else "-inf"))
        else:
            out.append(f'<c r="{letter}{r}"><v>{x!r}</v></c>')
    return out


def _any_cells(letter, values, rows, where):
    out = []
    for r, v in zip(rows, values):
        ref = f"{letter}{r}"
        if v is None or v is pd.NA or v is pd.NaT:
            out.append("")
        elif isinstance(v, (bool, np.bool_)):
            out.append(f'<c r="{ref}" t="b"><v>{int(bool(v))}</v></c>')
        elif isinstance(v, (int, np.integer)):
            out.append(f'<c r="{ref}"><v>{int(v)}</v></c>')
        elif isinstance(v, (float, np.floating)):
            out.extend(_float_cells(letter, [float(v)], [r]))
        else:
            text = str(v)
            if _CONTROL.search(text):
                raise ValueError(f"workbook: sheet {where!r} row {r} column {letter}: text with a control "
                                 "character that a workbook cannot hold")
            out.append(_text_cell(ref, text))
    return out


def _sheet_xml(name: str, df: pd.DataFrame) -> bytes:
    rows = range(2, len(df) + 2)
    letters = [column_letter(k) for k in range(len(df.columns))]
    head = "".join(_text_cell(f"{L}1", str(c), ' s="1"') for L, c in zip(letters, df.columns))
    for L, c in zip(letters, df.columns):
        if _CONTROL.search(str(c)):
            raise ValueError(f"workbook: sheet {name!r} row 1 column {L}: text with a control character "
                             "that a workbook cannot hold")
    columns = []
    for L, c in zip(letters, df.columns):
        s = df[c]
        if s.dtype == np.float64:
            columns.append(_float_cells(L, s.tolist(), rows))
        elif s.dtype == np.int64:
            columns.append([f'<c r="{L}{r}"><v>{v}</v></c>' for r, v in zip(rows, s.tolist())])
        else:
            columns.append(_any_cells(L, s.tolist(), rows, name))
    body = [f'<row r="1">{head}</row>'] if len(df.columns) else []
    body += [f'<row r="{r}">{"".join(cells)}</row>' for r, cells in zip(rows, zip(*columns))] if columns else []
    cols = "".join(f'<col min="{k + 1}" max="{k + 1}" width="{max(10, len(str(c)) + 2)}" customWidth="1"/>'
                   for k, c in enumerate(df.columns))
    return (f'{_XML}<worksheet xmlns="{_MAIN}"><sheetViews><sheetView workbookViewId="0">'
            '<pane ySplit="1" topLeftCell="A2" activePane="bottomLeft" state="frozen"/></sheetView></sheetViews>'
            '<sheetFormatPr defaultRowHeight="15"/>' + (f"<cols>{cols}</cols>" if cols else "")
            + "<sheetData>" + "".join(body) + "</sheetData></worksheet>").encode("utf-8")


_STYLES = (f'{_XML}<styleSheet xmlns="{_MAIN}">'
           '<fonts count="2"><font><sz val="11"/><name val="Calibri"/></font>'
           '<font><b/><sz val="11"/><name val="Calibri"/></font></fonts>'
           '<fills count="2"><fill><patternFill patternType="none"/></fill>'
           '<fill><patternFill patternType="gray125"/></fill></fills>'
           '<borders count="1"><border><left/><right/><top/><bottom/><diagonal/></border></borders>'
           '<cellStyleXfs count="1"><xf numFmtId="0" fontId="0" fillId="0" borderId="0"/></cellStyleXfs>'
           '<cellXfs count="2"><xf numFmtId="0" fontId="0" fillId="0" borderId="0" xfId="0"/>'
           '<xf numFmtId="0" fontId="1" fillId="0" borderId="0" xfId="0" applyFont="1"/></cellXfs>'
           '<cellStyles count="1"><cellStyle name="Normal" xfId="0" builtinId="0"/></cellStyles>'
           '</styleSheet>')


def tables_xlsx(frames: Mapping[str, pd.DataFrame]) -> bytes:
    """The .xlsx bytes of ``frames`` (sheet name -> table), one sheet per table in order (see the
    module docstring). Raises ``ValueError`` for a name a workbook cannot hold (sheet name, or text
    with control characters)."""
    seen = set()
    for name in frames:
        if not name or len(name) > 31 or set(name) & _BAD_SHEET_CHARS or name.lower() in seen:
            raise ValueError(f"workbook: {name!r} cannot be a sheet name (1-31 characters, none of "
                             "[]:*?/\\, names differing in more than case)")
        seen.add(name.lower())
    names = list(frames)
    sheets = [_sheet_xml(name, frames[name]) for name in names]
    n = len(names)
    content = (f'{_XML}<Types xmlns="{_PKG}/content-types">'
               '<Default Extension="rels" ContentType="application/vnd.openxmlformats-package.relationships+xml"/>'
               '<Default Extension="xml" ContentType="application/xml"/>'
               '<Override PartName="/xl/workbook.xml" '
               'ContentType="application/vnd.openxmlformats-officedocument.spreadsheetml.sheet.main+xml"/>'
               '<Override PartName="/xl/styles.xml" '
               'ContentType="application/vnd.openxmlformats-officedocument.spreadsheetml.styles+xml"/>'
               + "".join(f'<Override PartName="/xl/worksheets/sheet{i}.xml" '
                         'ContentType="application/vnd.openxmlformats-officedocument.spreadsheetml.worksheet+xml"/>'
                         for i in range(1, n + 1)) + "</Types>")
    root_rels = (f'{_XML}<Relationships xmlns="{_PKG}/relationships">'
                 f'<Relationship Id="rId1" Type="{_REL}/officeDocument" Target="xl/workbook.xml"/></Relationships>')
    book = (f'{_XML}<workbook xmlns="{_MAIN}" xmlns:r="{_REL}"><sheets>'
            + "".join(f'<sheet name="{_esc(nm)}" sheetId="{i}" r:id="rId{i}"/>' for i, nm in enumerate(names, 1))
            + "</sheets></workbook>")
    book_rels = (f'{_XML}<Relationships xmlns="{_PKG}/relationships">'
                 + "".join(f'<Relationship Id="rId{i}" Type="{_REL}/worksheet" Target="worksheets/sheet{i}.xml"/>'
                           for i in range(1, n + 1))
                 + f'<Relationship Id="rId{n + 1}" Type="{_REL}/styles" Target="styles.xml"/></Relationships>')
    parts = [("[Content_Types].xml", content.encode()), ("_rels/.rels", root_rels.encode()),
             ("xl/workbook.xml", book.encode()), ("xl/_rels/workbook.xml.rels", book_rels.encode()),
             ("xl/styles.xml", _STYLES.encode())]
    parts += [(f"xl/worksheets/sheet{i}.xml", body) for i, body in enumerate(sheets, 1)]
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as z:
        for name, body in parts:
            z.writestr(zipfile.ZipInfo(name, date_time=_FIXED_TIME), body, compress_type=zipfile.ZIP_DEFLATED,
                       compresslevel=1)
    return out.getvalue()


def csv_tables_xlsx(files: Mapping[str, str]) -> bytes:
    """One workbook of every ``<table>.csv`` in ``files`` (file name -> CSV text; other files are
    ignored), a sheet per table named after the file (sorted), values as in the CSV (text that
    reads as a number becomes a number; an empty field an empty cell; "NA" stays text)."""
    frames = {}
    for name in sorted(files):
        if name.endswith(".csv"):
            frames[name[:-4][:31]] = pd.read_csv(io.StringIO(files[name]), keep_default_na=False, na_values=[""])
    return tables_xlsx(frames)
