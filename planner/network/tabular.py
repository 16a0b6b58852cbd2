"""The project's own network format: a folder of CSV tables plus ``network.toml``.

Layout::

    network.toml       base_mva = 100.0 and name = "..." (optional: defaults 100 MVA, folder name)
    buses.csv          required
    loads.csv, generators.csv, lines.csv, transformers.csv, shunts.csv   optional

Column names are the model's (see ``planner.network.model``); they carry their units (``_pu``,
``_mw``, ``_mvar``, ``_kv``, ``_deg``). Missing optional columns take the model's defaults and an
empty cell in an optional column takes its default too; unknown columns are an error.

So that a feeder given in engineering units loads without hand arithmetic, the reader also
accepts, in place of the per-unit column (never both):

* lines and transformers: ``r_ohm``, ``x_ohm`` (on the from-bus base kV and the system base) and
  ``b_us`` (total charging, microsiemens);
* loads and generators: ``kw``, ``kvar``;
* shunts: ``kvar_per_step``.

Every error names the file, the data row (1-based) with its CSV line number, and the column.
The writer writes the canonical columns with full-precision floats, so a network read, written and
read again is identical; it writes a whole folder atomically (into a temporary folder beside the
target, then swapped in).

>>> import os, tempfile
>>> from planner.network.model import Network, make_table
>>> net = Network(base_mva=10.0, name="two-bus",
...     buses=make_table("buses", [{"bus": 1, "base_kv": 12.66, "kind": "slack"},
...                                {"bus": 2, "base_kv": 12.66, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "S1", "bus": 1, "mw": 0.0}]),
...     lines=make_table("lines", [{"line_id": "1-2", "from_bus": 1, "to_bus": 2, "r_pu": 0.1, "x_pu": 0.2}]))
>>> folder = os.path.join(tempfile.mkdtemp(), "two")
>>> write_tables(net, folder)
>>> sorted(os.listdir(folder))[:3]
['buses.csv', 'generators.csv', 'lines.csv']
>>> read_tables(folder).lines.x_pu.tolist()
[0.2]
>>> import shutil; shutil.rmtree(os.path.dirname(folder))
"""
from __future__ import annotations

import csv
import io
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd

from planner.atomic import write_folder
from planner.errors import InputError
from planner.inputs import parse_toml, read_input_bytes
from planner.network.model import DEFAULTS, TABLES, Network, make_table

TOML_NAME = "network.toml"
FILES = {kind: f"{kind}.csv" for kind in TABLES}
_OUR_FILES = set(FILES.values()) | {TOML_NAME}

# unit column -> (per-unit column it replaces, how it converts)
_OHM, _MICROSIEMENS, _KILO = "ohm", "microsiemens", "kilo"
UNIT_COLUMNS = {
    "lines": {"r_ohm": ("r_pu", _OHM), "x_ohm": ("x_pu", _OHM), "b_us": ("b_pu", _MICROSIEMENS)},
    "transformers": {"r_ohm": ("r_pu", _OHM), "x_ohm": ("x_pu", _OHM), "b_us": ("b_pu", _MICROSIEMENS)},
    "loads": {"kw": ("mw", _KILO), "kvar": ("mvar", _KILO)},
    "generators": {"kw": ("mw", _KILO), "kvar": ("mvar", _KILO)},
    "shunts": {"kvar_per_step": ("mvar_per_step", _KILO)},
    "buses": {},
}
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)   # ASCII digits only: other scripts' digits are not numbers in a table
_TRUE = {"true", "t", "yes", "y", "1"}
_FALSE = {"false", "f", "no", "n", "0"}
_CANONICAL = {"kind": {"pq": "PQ", "pv": "PV", "slack": "slack"},
              "tap_side": {"from": "from", "to": "to"}}


# --- reading --------------------------------------------------------------------------------

def _read_text(path: Path) -> str:
    data = read_input_bytes(path, what="table file")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise InputError(f"not UTF-8 text (byte 0x{data[exc.start]:02x})", file=path, line=line) from None


def _read_csv_columns(text: str):
    """Fast path of :func:`_read_table`: (header, line numbers, columns of stripped text cells) by
    pandas' compiled parser, or None when the file needs the careful row-by-row reader (quotes,
    NUL bytes, rows of another length, blank rows, no header): that reader then reads it, or
    raises the error naming the line."""
    if not text or '"' in text or "\x00" in text:
        return None
    if "\r" in text:
        text = text.replace("\r\n", "\n")
        if "\r" in text:                          # old Mac line ends
            return None
    # every line must hold as many cells as the header: count the commas of each line at once
    raw = np.frombuffer(text.encode("utf-8"), np.uint8)
    ends = np.flatnonzero(raw == 10)
    n_lines = len(ends) + (0 if text.endswith("\n") else 1)
    commas = np.bincount(np.searchsorted(ends, np.flatnonzero(raw == 44)), minlength=n_lines)
    if n_lines == 0 or len(commas) != n_lines or not np.all(commas == commas[0]):
        return None
    try:
        df = pd.read_csv(io.StringIO(text), header=None, dtype=str, na_filter=False, keep_default_na=False,
                         skip_blank_lines=False, quoting=csv.QUOTE_NONE, engine="c")
    except (ValueError, pd.errors.ParserError):
        return None
    if len(df) != n_lines or df.shape[1] != commas[0] + 1:
        return None
    columns = [_stripped(df[k].to_numpy(object)) for k in df.columns]
    if not columns or not all(set(map(type, col)) <= {str} for col in columns):
        return None
    header = [col[0] for col in columns]
    if not all(header):                          # a blank first line or an empty column name
        return None
    body = [col[1:] for col in columns]
    filled = np.zeros(len(df) - 1, bool)
    for col in body:
        filled |= np.fromiter(map(bool, col), bool, len(col))
    if not filled.all():                         # a blank row: the careful reader skips it
        return None
    for k, name in enumerate(header):
        if name in header[:k]:
            return None
    return header, list(range(2, len(df) + 1)), body


def _read_csv(path: Path):
    """Header and data rows of a CSV file: rows are (data row number, line number, cells).
    Rows with nothing in them are skipped."""
    text = _read_text(path)
    return _read_csv_text(path, text)


def _read_csv_text(path: Path, text: str):
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header, rows = None, []
    try:
        for cells in reader:
            cells = [c.strip() for c in cells]
            if not any(cells):
                continue
            if header is None:
                header = cells
                hline = reader.line_num
                continue
            rows.append((len(rows) + 1, reader.line_num, cells))
    except csv.Error as exc:
        raise InputError(f"not a readable CSV file ({exc})", file=path, line=reader.line_num + 1) from None
    if header is None:
        raise InputError("empty file: expected a header line with column names", file=path)
    for k, name in enumerate(header):
        if not name:
            raise InputError(f"empty column name in the header (column {k + 1})", file=path, line=hline)
        if name in header[:k]:
            raise InputError(f"column {name!r} appears twice in the header", file=path, line=hline)
    for rno, lno, cells in rows:
        if len(cells) != len(header):
            raise InputError(f"row has {len(cells)} values but the header has {len(header)} columns",
                             file=path, line=lno, record=f"row {rno}")
    return header, rows


def _parse(raw: str, dtype: str, where: dict):
    if dtype == "object":
        return raw
    if dtype == "bool":
        low = raw.lower()
        if low in _TRUE:
            return True
        if low in _FALSE:
            return False
        raise InputError(f"cannot read {raw!r} as true/false", **where)
    if not _NUMBER.fullmatch(raw):
        raise InputError(f"cannot read {raw!r} as a number", **where)
    value = float(raw)
    if not math.isfinite(value):
        raise InputError(f"{raw!r} is out of range", **where)
    if dtype == "int64":
        if value != int(value) or abs(value) >= 2 ** 63:
            raise InputError(f"{raw!r} is not a whole number", **where)
        return int(value)
    return value


class CsvPlaces:
    """Where a value of a CSV table is, for error messages: the file, then the line, data row and
    column of a value. (``planner.network.workbook`` has the same three methods for a sheet.)"""

    def __init__(self, path: Path, lines):
        self.path, self.lines = path, lines

    def table(self) -> dict:
        return {"file": self.path}

    def column(self, k: int) -> dict:
        return {"file": self.path}

    def cell(self, i: int, k: int, name: str) -> dict:
        return {"file": self.path, "line": self.lines[i], "record": f"row {i + 1}", "field": name}


def _read_table(kind: str, path: Path, bus_kv: dict | None, base_mva: float) -> pd.DataFrame:
    text = _read_text(path)
    fast = _read_csv_columns(text)
    if fast is not None:
        header, lines, columns = fast
        return table_from_cells(kind, header, _ColumnRows(columns), bus_kv, base_mva, CsvPlaces(path, lines),
                                columns=columns)
    header, rows = _read_csv_text(path, text)
    places = CsvPlaces(path, [lno for _, lno, _ in rows])
    return table_from_cells(kind, header, [cells for _, _, cells in rows], bus_kv, base_mva, places)


class _ColumnRows:
    """Rows of a table held as columns, for the few rows re-read one by one."""

    def __init__(self, columns):
        self.columns = columns

    def __len__(self):
        return len(self.columns[0]) if self.columns else 0

    def __getitem__(self, i):
        return [col[i] for col in self.columns]


def table_from_cells(kind: str, header, rows, bus_kv: dict | None, base_mva: float, places,
                     columns=None) -> pd.DataFrame:
    """The standard table of ``kind`` from a header (column names) and data rows (lists of cells).

    Shared by every reader of the tabular layout (CSV files, workbook sheets), so unit columns,
    defaults and errors are the same whatever the container. Cells are text as read from a file
    (``""`` = empty); a workbook may also hand over numbers, true/false or ``None`` (empty), which
    are taken as they are. ``places`` says where things are for error messages: ``table()``,
    ``column(k)`` and ``cell(i, k, name)`` return the ``InputError`` location of the whole table, of
    header column ``k`` and of the value in data row ``i``, column ``k`` (both 0-based).
    ``bus_kv`` (bus -> base kV) and ``base_mva`` are needed only for ohm and microsiemens columns.
    ``columns`` (optional): the same cells as one sequence per header column, text only.
    """
    cols, units, defaults = TABLES[kind], UNIT_COLUMNS[kind], DEFAULTS[kind]
    for k, name in enumerate(header):
        if name not in cols and name not in units:
            raise InputError(f"unknown column {name!r}", **places.column(k))
    for name, (pu, _) in units.items():
        if name in header and pu in header:
            raise InputError(f"columns {pu!r} and {name!r} both given: use one of them",
                             **places.column(header.index(name)))
    given = {units[h][0] if h in units else h for h in header}
    for c in cols:
        if c not in given and c not in defaults:
            alt = [u for u, (pu, _) in units.items() if pu == c]
            hint = f" (or {alt[0]!r})" if alt else ""
            raise InputError(f"missing required column {c!r}{hint}", **places.table())

    if columns is not None or all(set(map(type, col)) <= {str} for col in zip(*rows)):   # all text
        columns = _convert_columns(header, rows, cols, units, defaults, bus_kv, base_mva, places, columns)
        df = pd.DataFrame(columns, columns=[c for c in cols if c in given])
    else:   # a workbook's typed cells: row by row
        records = [_row_values(i, cells, header, cols, units, defaults, bus_kv, base_mva, places)
                   for i, cells in enumerate(rows)]
        df = pd.DataFrame(records, columns=[c for c in cols if c in given])
    return make_table(kind, df)


def _row_values(i, cells, header, cols, units, defaults, bus_kv, base_mva, places) -> dict:
    """One data row converted cell by cell; raises the row's first error (header order)."""
    rec, per_unit = {}, []
    for k, (name, raw) in enumerate(zip(header, cells)):
        target, how = units.get(name, (name, None))
        where = places.cell(i, k, name)
        if raw is None or (isinstance(raw, str) and raw.strip() == ""):
            if target in defaults:
                rec[target] = defaults[target]
                continue
            raise InputError("value missing in a required column", **where)
        dtype = "float64" if how else cols[name]
        value = _parse(raw.strip(), dtype, where) if isinstance(raw, str) else _take(raw, dtype, where)
        if name in _CANONICAL:
            value = _CANONICAL[name].get(value.lower(), value)
        if how == _KILO:
            value = value / 1000.0
        elif how in (_OHM, _MICROSIEMENS):
            per_unit.append((target, how))   # after the row: needs from_bus, wherever it stands
        rec[target] = value
    for target, how in per_unit:
        k = header.index("from_bus")
        rec[target] = _ohm_or_us_to_pu(rec[target], how, rec.get("from_bus"), bus_kv, base_mva,
                                       places.cell(i, k, "from_bus"))
    return rec


_NUMBER_BYTES = np.zeros(256, bool)
_NUMBER_BYTES[np.frombuffer(b"0123456789+-.eE", np.uint8)] = True


def _plain_number_chars(cells) -> np.ndarray:
    """Per cell: only digits, signs, point and exponent letters (no ``inf``, ``nan``, ``1_0``),
    checked on the bytes of the whole column at once. The numeric conversion then refuses any
    arrangement of these characters that is not a number."""
    text = "".join(cells)
    if text.isascii():
        lengths = np.fromiter(map(len, cells), np.int64, len(cells))
    else:
        lengths = np.fromiter((len(c.encode("utf-8")) for c in cells), np.int64, len(cells))
    bad_byte = ~_NUMBER_BYTES[np.frombuffer(text.encode("utf-8"), np.uint8)]
    row_of_byte = np.repeat(np.arange(len(cells)), lengths)
    return np.bincount(row_of_byte[bad_byte], minlength=len(cells)) == 0


_EDGE_SPACE = re.compile(r"(?:^|\x00)\s|\s(?:\x00|$)")


def _stripped(cells) -> list:
    """The cells without surrounding white space; one regular-expression scan of the joined
    column finds whether any cell has some (a CSV file's cells are stripped already)."""
    if _EDGE_SPACE.search("\x00".join(cells)) is None:
        return list(cells)
    return [c.strip() for c in cells]


def _convert_columns(header, rows, cols, units, defaults, bus_kv, base_mva, places, columns=None) -> dict:
    """Whole columns of text cells converted at once (pandas / numpy). Cells a column conversion
    cannot take (or would take too generously: ``inf``, ``nan``, ``1_0``) mark their row; marked
    rows are re-read by :func:`_row_values` in file order, which raises the same one-line error
    (file, row, line, column) as a row-by-row reader, or supplies the row's values."""
    n = len(rows)
    if columns is not None:
        cells_by_col = columns
    else:
        cells_by_col = list(zip(*rows)) if n else [() for _ in header]
    out: dict[str, np.ndarray] = {}
    bad = np.zeros(n, bool)
    per_unit = []
    for j, name in enumerate(header):
        target, how = units.get(name, (name, None))
        raw = pd.Series(_stripped(cells_by_col[j]), dtype=object)
        blank = (raw == "").to_numpy(bool)
        flagged = blank & (target not in defaults)
        dtype = "float64" if how else cols[name]
        if dtype == "object":
            vals = raw.to_numpy(object)
            if name in _CANONICAL:
                low = raw.str.lower()
                vals = low.map(_CANONICAL[name]).where(low.isin(list(_CANONICAL[name])), raw).to_numpy(object)
        elif dtype == "bool":
            low = raw.str.lower()
            is_true, is_false = low.isin(_TRUE).to_numpy(bool), low.isin(_FALSE).to_numpy(bool)
            flagged |= ~blank & ~is_true & ~is_false
            vals = is_true
        else:
            ok = _plain_number_chars(list(raw)) if n else np.zeros(0, bool)
            vals = pd.to_numeric(raw.where(ok & ~blank, "0"), errors="coerce").to_numpy(np.float64)
            with np.errstate(invalid="ignore"):
                flagged |= ~blank & (~ok | ~np.isfinite(vals))
                if dtype == "int64":
                    flagged |= ~blank & ((vals != np.round(vals)) | (np.abs(vals) >= 2 ** 63))
            if how == _KILO:
                vals = vals / 1000.0
            elif how in (_OHM, _MICROSIEMENS):
                per_unit.append((target, how, blank))
        if target in defaults:
            vals = np.where(blank, defaults[target], vals)
        if dtype == "int64":
            vals = np.where(flagged, 0, vals).astype(np.int64)
        elif dtype == "bool":
            vals = np.where(flagged, False, vals).astype(bool)
        elif dtype == "float64" or how:
            vals = np.where(flagged, 0.0, vals).astype(np.float64)
        else:
            vals = np.asarray(vals, dtype=object)
        out[target] = vals
        bad |= flagged
    for target, how, blank in per_unit:          # after the row, as the row-by-row reader does
        if "from_bus" not in out:
            bad |= ~blank
            continue
        lookup = pd.Series(bus_kv or {}, dtype=np.float64)
        kv = lookup.reindex(out["from_bus"]).to_numpy(np.float64)
        usable = np.isfinite(kv) & (kv >= 0.01) & (kv <= 2000)
        bad |= ~blank & ~usable
        z_base = np.where(usable, kv * kv / base_mva, 1.0)
        conv = out[target] / z_base if how == _OHM else out[target] * 1e-6 * z_base
        out[target] = np.where(blank, out[target], conv)
    for k, arr in out.items():                        # vectorised results may be read-only views
        if isinstance(arr, np.ndarray) and not arr.flags.writeable:
            out[k] = arr.copy()
    for i in np.flatnonzero(bad):
        rec = _row_values(int(i), rows[i], header, cols, units, defaults, bus_kv, base_mva, places)
        for k, v in rec.items():
            out[k][i] = v
    return out


def _take(raw, dtype: str, where: dict):
    """A cell a workbook gave as a number, true/false or a date rather than as text."""
    if dtype == "object":   # an id typed as a number: 7 -> "7", 2.5 -> "2.5"
        if isinstance(raw, bool):
            return "TRUE" if raw else "FALSE"
        if isinstance(raw, (int, float)) and math.isfinite(raw):
            return str(int(raw)) if float(raw).is_integer() else repr(float(raw))
        return str(raw)
    if dtype == "bool":
        if isinstance(raw, bool) or (isinstance(raw, (int, float)) and raw in (0, 1)):
            return bool(raw)
        raise InputError(f"cannot read {raw!r} as true/false", **where)
    if isinstance(raw, bool):
        raise InputError(f"cannot read {'TRUE' if raw else 'FALSE'} as a number", **where)
    if not isinstance(raw, (int, float)):
        return _parse(str(raw).strip(), dtype, where)
    if not math.isfinite(raw):
        raise InputError(f"{raw!r} is out of range", **where)
    if dtype == "int64":
        if raw != int(raw) or abs(raw) >= 2 ** 63:
            raise InputError(f"{raw!r} is not a whole number", **where)
        return int(raw)
    return float(raw)


def _ohm_or_us_to_pu(value, how, bus, bus_kv, base_mva, where):
    if bus not in bus_kv:
        raise InputError(f"unknown bus {bus}: its base kV is needed to convert ohms to per unit", **where)
    kv = bus_kv[bus]
    if not (math.isfinite(kv) and 0.01 <= kv <= 2000):   # below 10 V kV^2 would underflow the base
        raise InputError(f"bus {bus} has base_kv {kv}: cannot convert ohms to per unit "
                         "(base kV must be 0.01-2000)", **where)
    z_base = kv * kv / base_mva
    return value / z_base if how == _OHM else value * 1e-6 * z_base


def _read_toml(path: Path, folder: Path):
    if not path.exists():
        return 100.0, folder.name
    doc = parse_toml(_read_text(path), path)
    for key in doc:
        if key not in ("base_mva", "name"):
            raise InputError(f"unknown key {key!r} (expected base_mva, name)", file=path)
    base = doc.get("base_mva", 100.0)
    if isinstance(base, bool) or not isinstance(base, (int, float)) or not (math.isfinite(base) and base > 0):
        raise InputError(f"must be a positive number, got {base!r}", file=path, field="base_mva")
    name = doc.get("name", folder.name)
    if not isinstance(name, str):
        raise InputError(f"must be a string, got {name!r}", file=path, field="name")
    return float(base), name


def read_tables(folder) -> Network:
    """Read a network from a folder of CSV tables (see the module docstring for the layout).

    ``folder`` may also be the path of the folder's ``network.toml``. Raises ``InputError`` naming
    the file, row, line and column of the first value it cannot read.
    """
    folder = Path(folder)
    if folder.name == TOML_NAME and folder.is_file():
        folder = folder.parent
    if not folder.is_dir():
        raise InputError("not a folder of network tables", file=folder)
    base_mva, name = _read_toml(folder / TOML_NAME, folder)
    bus_path = folder / FILES["buses"]
    if not bus_path.is_file():
        raise InputError(f"missing {FILES['buses']}: a network folder needs at least its buses", file=folder)
    tables = {"buses": _read_table("buses", bus_path, None, base_mva)}
    b = tables["buses"]
    bus_kv = dict(zip(b.bus.tolist(), b.base_kv.tolist()))
    for kind in TABLES:
        p = folder / FILES[kind]
        if kind != "buses" and p.is_file():
            tables[kind] = _read_table(kind, p, bus_kv, base_mva)
    return Network(base_mva=base_mva, name=name, source=str(folder), **tables)


# --- writing --------------------------------------------------------------------------------

def _cell(value, dtype: str) -> str:
    if dtype == "float64":
        return repr(float(value))   # repr round-trips a float exactly
    if dtype == "int64":
        return str(int(value))
    if dtype == "bool":
        return "true" if bool(value) else "false"
    return "" if value is None or (isinstance(value, float) and math.isnan(value)) else str(value)


def _toml_string(s: str) -> str:
    out = []
    for ch in s:
        if ch in ('"', "\\"):
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _write_into(net: Network, folder: Path) -> None:
    for kind, cols in TABLES.items():
        df = net.table(kind)
        with open(folder / FILES[kind], "w", encoding="utf-8", newline="") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(list(cols))
            for row in df[list(cols)].itertuples(index=False):
                w.writerow([_cell(v, cols[c]) for v, c in zip(row, cols)])
    with open(folder / TOML_NAME, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(f"name = {_toml_string(str(net.name))}\nbase_mva = {float(net.base_mva)!r}\n")


def write_tables(net: Network, folder) -> None:
    """Write a network as a folder of CSV tables, every table with its canonical columns.

    The folder is written whole into a temporary folder beside it and then swapped in, so a
    reader never sees a half-written folder. An existing target is replaced only if it holds
    nothing but network tables; a folder with other files in it is refused (``InputError``).
    """
    target = Path(folder)
    if target.exists():
        if not target.is_dir():
            raise InputError("exists and is not a folder", file=target)
        extra = sorted(p.name for p in target.iterdir() if p.name not in _OUR_FILES)
        if extra:
            raise InputError(f"folder holds files that are not network tables ({extra[0]!r}): "
                             "refusing to replace it", file=target)
    # the lookup of _write_into at call time keeps it replaceable in tests
    write_folder(target, lambda tmp: _write_into(net, tmp), own_names=_OUR_FILES)
