"""Networks and result tables as workbooks (.xlsx), one sheet per table, through openpyxl.

A network workbook holds the tabular format's tables as sheets, with the same column names, units,
unit alternatives (``r_ohm``, ``x_ohm``, ``b_us``, ``kw``, ``kvar``, ``kvar_per_step``) and
defaults (see ``planner.network.tabular``)::

    network       optional; header row "key | value", then rows "name | ..." and "base_mva | ..."
                  (defaults: 100 MVA, the file name without .xlsx)
    buses         required
    loads, generators, lines, transformers, shunts      optional

The first non-empty row of a sheet is its header; empty rows are skipped. Cells may be numbers,
TRUE/FALSE or text. A formula is read as the value the spreadsheet program last saved with it.
A sheet with another name is an error, so a misspelt sheet is never ignored. Every error names the
file, the sheet, the row (as the spreadsheet numbers it) and the column (letter and name).

The writer writes every table with its canonical columns and full-precision numbers, so a network
written and read again is identical. All writes are atomic: a temporary file beside the target, then
renamed over it.

openpyxl is an optional extra (``pip install 'planner[xlsx]'``); without it these functions raise
``MissingExtra`` with that hint, and nothing else in the package needs it.

>>> import os, tempfile
>>> from planner.network.model import Network, make_table
>>> net = Network(base_mva=10.0, name="two-bus",
...     buses=make_table("buses", [{"bus": 1, "base_kv": 12.66, "kind": "slack"},
...                                {"bus": 2, "base_kv": 12.66, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "S1", "bus": 1, "mw": 0.0}]),
...     lines=make_table("lines", [{"line_id": "1-2", "from_bus": 1, "to_bus": 2, "r_pu": 0.1 + 0.2, "x_pu": 0.2}]))
>>> d = tempfile.mkdtemp()
>>> write_workbook(net, os.path.join(d, "two.xlsx"))
>>> back = read_workbook(os.path.join(d, "two.xlsx"))
>>> back.name, back.lines.r_pu.tolist()
('two-bus', [0.30000000000000004])
>>> import shutil; shutil.rmtree(d)
"""
from __future__ import annotations

import io
import math
import re
import zipfile
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from planner.errors import InputError, PlannerError
from planner.inputs import MAX_NETWORK_BYTES, read_input_bytes
from planner.network.model import TABLES, Network
from planner.network.tabular import table_from_cells

SETTINGS_SHEET = "network"
SHEETS = (SETTINGS_SHEET, *TABLES)
SUFFIX = ".xlsx"
_SETTINGS_HEADER = ("key", "value")
_BAD_SHEET_CHARS = set('[]:*?/\\')


class MissingExtra(PlannerError, ImportError):
    """An optional library this feature needs is not installed; the message says how to get it."""


def need_openpyxl(action: str):
    """The openpyxl module, or ``MissingExtra`` saying how to install it (``action`` is
    "reading" or "writing"), so a command can fail before any work."""
    try:
        import openpyxl
    except ImportError:
        raise MissingExtra(f"{action} .xlsx needs openpyxl: pip install 'planner[xlsx]'") from None
    return openpyxl


def _letter(k: int) -> str:
    """Spreadsheet column letter of 0-based column ``k`` (0 -> A, 26 -> AA)."""
    from openpyxl.utils import get_column_letter
    return get_column_letter(k + 1)


# --- reading --------------------------------------------------------------------------------

class SheetPlaces:
    """Where a value of a sheet is, for error messages (the same methods as
    ``tabular.CsvPlaces``): file, sheet, spreadsheet row number, column letter and name."""

    def __init__(self, path: Path, sheet: str, header_row: int, rows):
        self.path, self.sheet, self.header_row, self.rows = path, sheet, header_row, rows

    def _at(self, row: int) -> str:
        return f"sheet {self.sheet!r} row {row}"

    def table(self) -> dict:
        return {"file": self.path, "record": self._at(self.header_row)}

    def column(self, k: int) -> dict:
        return {"file": self.path, "record": self._at(self.header_row), "field": f"column {_letter(k)}"}

    def cell(self, i: int, k: int, name: str) -> dict:
        return {"file": self.path, "record": self._at(self.rows[i]), "field": f"column {_letter(k)} ({name})"}


def _blank(v) -> bool:
    return v is None or (isinstance(v, str) and not v.strip())


def _sheet_rows(ws, path: Path):
    """Header (names), header row number, data row numbers and data rows (lists of cells as
    openpyxl gives them, padded with None to the header's width) of a sheet."""
    ws.reset_dimensions()   # trust the cells, not a stored size that some programs get wrong
    header, hrow, numbers, rows = None, None, [], []
    for r, values in enumerate(ws.iter_rows(values_only=True), start=1):
        values = list(values)
        if all(_blank(v) for v in values):
            continue
        if header is None:
            while values and _blank(values[-1]):
                values.pop()
            header, hrow = [], r
            for k, v in enumerate(values):
                name = "" if v is None else str(v).strip()
                where = {"file": path, "record": f"sheet {ws.title!r} row {r}", "field": f"column {_letter(k)}"}
                if not name:
                    raise InputError("empty column name in the header", **where)
                if name in header:
                    raise InputError(f"column {name!r} appears twice in the header", **where)
                header.append(name)
            continue
        for k in range(len(header), len(values)):
            if not _blank(values[k]):
                raise InputError("value in a column with no name in the header", file=path,
                                 record=f"sheet {ws.title!r} row {r}", field=f"column {_letter(k)}")
        values = values[:len(header)] + [None] * (len(header) - len(values))
        numbers.append(r)
        rows.append(values)
    if header is None:
        raise InputError("empty sheet: expected a header row with column names", file=path,
                         record=f"sheet {ws.title!r}")
    return header, hrow, numbers, rows


def _read_settings(ws, path: Path):
    header, hrow, numbers, rows = _sheet_rows(ws, path)
    if tuple(header) != _SETTINGS_HEADER:
        raise InputError(f"header must be {' | '.join(_SETTINGS_HEADER)}, got {' | '.join(header)}",
                         file=path, record=f"sheet {ws.title!r} row {hrow}")
    found = {}
    for r, (key, value) in zip(numbers, rows):
        key = "" if key is None else str(key).strip()
        where = {"file": path, "record": f"sheet {ws.title!r} row {r}"}
        if key not in ("base_mva", "name"):
            raise InputError(f"unknown key {key!r} (expected base_mva, name)", field="column A (key)", **where)
        if key in found:
            raise InputError(f"key {key!r} given twice", field="column A (key)", **where)
        found[key] = (value, where)
    base_mva, name = 100.0, path.stem
    if "base_mva" in found:
        value, where = found["base_mva"]
        try:
            base_mva = float(value.strip() if isinstance(value, str) else value)
        except (TypeError, ValueError):
            base_mva = math.nan
        if isinstance(value, bool) or not (math.isfinite(base_mva) and base_mva > 0):
            raise InputError(f"base_mva must be a positive number, got {value!r}", field="column B (value)",
                             **where)
    if "name" in found:
        value, _ = found["name"]
        # surrounding blanks are dropped, as in every other text cell of a workbook
        name = "" if value is None else (str(int(value)) if isinstance(value, float) and value.is_integer()
                                         else str(value).strip())
    return base_mva, name


def read_workbook(path) -> Network:
    """Read a network from an .xlsx workbook (layout in the module docstring). The network is
    not validated here (``planner.network.io.read_network`` does that). Raises ``InputError``
    naming the file, sheet, row and column of the first value it cannot read."""
    path = Path(path)
    openpyxl = need_openpyxl("reading")
    data = read_input_bytes(path, what="network workbook")    # a regular file, of a bounded size
    try:
        unpacked = sum(info.file_size for info in zipfile.ZipFile(io.BytesIO(data)).infolist())
        if unpacked > MAX_NETWORK_BYTES:   # a few kilobytes may unpack to gigabytes
            raise InputError(f"network workbook unpacks to {unpacked:,} bytes, more than the "
                             f"{MAX_NETWORK_BYTES:,} accepted", file=path)
        wb = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
    except InputError:
        raise
    except Exception as exc:   # openpyxl reports a damaged file in many ways (zip, XML, key errors)
        raise InputError(f"not a readable .xlsx workbook ({type(exc).__name__}: {exc})", file=path) from None
    try:
        for sheet in wb.sheetnames:
            if sheet not in SHEETS:
                raise InputError(f"unknown sheet (expected {', '.join(SHEETS)})", file=path,
                                 record=f"sheet {sheet!r}")
        if "buses" not in wb.sheetnames:
            raise InputError("missing sheet 'buses': a network workbook needs at least its buses", file=path)
        base_mva, name = (_read_settings(wb[SETTINGS_SHEET], path) if SETTINGS_SHEET in wb.sheetnames
                          else (100.0, path.stem))
        tables, bus_kv = {}, None
        for kind in TABLES:   # buses first: ohm columns need the bus base kV
            if kind not in wb.sheetnames:
                continue
            try:   # read-only sheets are parsed lazily: damage deep in a sheet shows up here
                header, hrow, numbers, rows = _sheet_rows(wb[kind], path)
            except InputError:
                raise
            except Exception as exc:
                raise InputError(f"not a readable sheet ({type(exc).__name__}: {exc})", file=path,
                                 record=f"sheet {kind!r}") from None
            places = SheetPlaces(path, kind, hrow, numbers)
            tables[kind] = table_from_cells(kind, header, rows, bus_kv, base_mva, places)
            if kind == "buses":
                b = tables["buses"]
                bus_kv = dict(zip(b.bus.tolist(), b.base_kv.tolist()))
    finally:
        wb.close()
    return Network(base_mva=base_mva, name=name, source=str(path), **tables)


# --- writing --------------------------------------------------------------------------------

def _plain(v):
    """A cell value openpyxl writes as it is: Python numbers, bools, text or None (empty)."""
    if v is None or v is pd.NA or v is pd.NaT:
        return None
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if math.isnan(v):
            return None                            # no number to show: an empty cell
        return v if math.isfinite(v) else ("inf" if v > 0 else "-inf")   # e.g. a payback never reached
    return str(v)


def _cell(ws, value, cell_type):
    c = cell_type(ws, value=value)
    if isinstance(value, str):
        c.data_type = "s"   # text stays text: "=..." must never become a formula
    elif isinstance(value, float) and float("%.16g" % value) != value:
        # openpyxl writes 16 significant digits; these floats need 17, so give it the exact text
        c.value, c.data_type = repr(value), "n"
    elif isinstance(value, int) and not isinstance(value, bool) and abs(value) >= 10 ** 15:
        c.value, c.data_type = str(value), "n"
    return c


def workbook_bytes(frames: Mapping[str, pd.DataFrame]) -> bytes:
    """The .xlsx file content of ``frames`` (sheet name -> table): one sheet per table in the
    given order, the column names as a bold, frozen header row, numbers at full precision,
    NaN as an empty cell, infinities as the text ``inf`` / ``-inf``, text always as text. Raises ``ValueError`` for a name
    a workbook cannot hold (sheet name, or text with control characters)."""
    openpyxl = need_openpyxl("writing")
    from openpyxl.cell import WriteOnlyCell
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE
    from openpyxl.styles import Font

    sheets, seen = [], set()
    for name, df in frames.items():   # check everything before the first byte is written
        if not name or len(name) > 31 or set(name) & _BAD_SHEET_CHARS or name.lower() in seen:
            raise ValueError(f"workbook: {name!r} cannot be a sheet name (1-31 characters, none of "
                             "[]:*?/\\, names differing in more than case)")
        seen.add(name.lower())
        rows = [[str(c) for c in df.columns]]
        rows += [[_plain(v) for v in row] for row in df.itertuples(index=False, name=None)]
        for r, row in enumerate(rows, start=1):
            for k, v in enumerate(row):
                if isinstance(v, str) and ILLEGAL_CHARACTERS_RE.search(v):
                    raise ValueError(f"workbook: sheet {name!r} row {r} column {_letter(k)}: text with a "
                                     "control character that a workbook cannot hold")
        sheets.append((name, rows))

    bold = Font(bold=True)
    wb = openpyxl.Workbook(write_only=True)
    for name, rows in sheets:
        ws = wb.create_sheet(name)
        ws.freeze_panes = "A2"
        for k, col in enumerate(rows[0]):
            ws.column_dimensions[_letter(k)].width = max(10, len(col) + 2)
        head = [_cell(ws, col, WriteOnlyCell) for col in rows[0]]
        for c in head:
            c.font = bold
        ws.append(head)
        for row in rows[1:]:
            ws.append([_cell(ws, v, WriteOnlyCell) for v in row])
    out = io.BytesIO()
    wb.save(out)
    return _reproducible(out.getvalue())


_FIXED_TIME = (1980, 1, 1, 0, 0, 0)
_STAMP = re.compile(rb"(<dcterms:(?:created|modified)[^>]*>)[^<]*(</dcterms:)")


def _reproducible(data: bytes) -> bytes:
    """The same workbook with the save time taken out (zip entry times and the document's
    created/modified stamps set to 1980-01-01), so the same tables always give the same bytes."""
    src, out = zipfile.ZipFile(io.BytesIO(data)), io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            body = src.read(info)
            if info.filename == "docProps/core.xml":
                body = _STAMP.sub(rb"\g<1>1980-01-01T00:00:00Z\g<2>", body)
            dst.writestr(zipfile.ZipInfo(info.filename, date_time=_FIXED_TIME), body,
                         compress_type=zipfile.ZIP_DEFLATED)
    return out.getvalue()


def _write_atomic(path, data: bytes) -> Path:
    # the project's one atomic writer: a reader sees the old file or the new one, never a part
    from ..atomic import write_file
    return write_file(path, data)


def write_tables_workbook(path, frames: Mapping[str, pd.DataFrame]) -> Path:
    """Write ``frames`` (sheet name -> table) as one .xlsx workbook, atomically; returns the path.
    Column names are the header row, so units carried in them (``losses_mw``) stay visible.

    >>> import tempfile, pathlib, pandas as pd
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = write_tables_workbook(pathlib.Path(d) / "r.xlsx", {"buses": pd.DataFrame({"bus": [1, 2], "v_pu": [1.0, 0.97]})})
    ...     pd.read_excel(p, sheet_name=None)["buses"].v_pu.tolist()
    [1.0, 0.97]
    """
    return _write_atomic(path, workbook_bytes(frames))


def have_openpyxl() -> bool:
    """Whether workbooks can be written here (openpyxl installed), for outputs that are extras."""
    try:
        need_openpyxl("writing")
    except MissingExtra:
        return False
    return True


def csv_files_workbook(files: Mapping[str, str]) -> bytes:
    """One workbook of every ``<table>.csv`` in ``files`` (file name -> CSV text; other files
    are ignored), a sheet per table named after the file, the values exactly as in the CSV
    (text that looks like a number becomes a number). For output folders that carry CSV tables,
    so the workbook beside them says the same thing.

    >>> import pandas as pd
    >>> data = csv_files_workbook({"losses.csv": "level,losses_mw\\npeak,0.2027\\n", "report.html": "<p>"})
    >>> import io; pd.read_excel(io.BytesIO(data), sheet_name=None)["losses"].losses_mw.tolist()
    [0.2027]
    """
    frames = {}
    for name in sorted(files):
        if name.endswith(".csv"):
            frames[name[:-4][:31]] = pd.read_csv(io.StringIO(files[name]), keep_default_na=False,
                                                 na_values=[""])
    return workbook_bytes(frames)


def network_frames(net: Network) -> dict:
    """The sheets of a network workbook: settings, then every table with its canonical columns."""
    frames = {SETTINGS_SHEET: pd.DataFrame({"key": ["name", "base_mva"],
                                            "value": [str(net.name), float(net.base_mva)]})}
    for kind, cols in TABLES.items():
        frames[kind] = net.table(kind)[list(cols)]
    return frames


def write_workbook(net: Network, path) -> None:
    """Write a network as an .xlsx workbook (layout in the module docstring), atomically."""
    try:
        write_tables_workbook(path, network_frames(net))
    except ValueError as exc:
        raise InputError(str(exc).removeprefix("workbook: "), file=path) from None
