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
import os
import re
import shutil
import tempfile
import tomllib
import uuid
from pathlib import Path

import numpy as np
import pandas as pd

from planner.errors import InputError
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
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_TRUE = {"true", "t", "yes", "y", "1"}
_FALSE = {"false", "f", "no", "n", "0"}
_CANONICAL = {"kind": {"pq": "PQ", "pv": "PV", "slack": "slack"},
              "tap_side": {"from": "from", "to": "to"}}


# --- reading --------------------------------------------------------------------------------

def _read_text(path: Path) -> str:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read file: {exc.strerror or exc}", file=path) from None
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise InputError(f"not UTF-8 text (byte 0x{data[exc.start]:02x})", file=path, line=line) from None


def _read_csv(path: Path):
    """Header and data rows of a CSV file: rows are (data row number, line number, cells).
    Rows with nothing in them are skipped."""
    text = _read_text(path)
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


def _read_table(kind: str, path: Path, bus_kv: dict | None, base_mva: float) -> pd.DataFrame:
    header, rows = _read_csv(path)
    cols, units, defaults = TABLES[kind], UNIT_COLUMNS[kind], DEFAULTS[kind]
    for name in header:
        if name not in cols and name not in units:
            raise InputError(f"unknown column {name!r}", file=path)
    for name, (pu, _) in units.items():
        if name in header and pu in header:
            raise InputError(f"columns {pu!r} and {name!r} both given: use one of them", file=path)
    given = {units[h][0] if h in units else h for h in header}
    for c in cols:
        if c not in given and c not in defaults:
            alt = [u for u, (pu, _) in units.items() if pu == c]
            hint = f" (or {alt[0]!r})" if alt else ""
            raise InputError(f"missing required column {c!r}{hint}", file=path)

    columns = _convert_columns(header, rows, cols, units, defaults, bus_kv, base_mva, path)
    df = pd.DataFrame(columns, columns=[c for c in cols if c in given])
    return make_table(kind, df)


def _record_values(header, cells, rno, lno, cols, units, defaults, bus_kv, base_mva, path) -> dict:
    """One row converted cell by cell; raises the row's first error (header order)."""
    rec = {}
    for name, raw in zip(header, cells):
        target, how = units.get(name, (name, None))
        where = {"file": path, "line": lno, "record": f"row {rno}", "field": name}
        if raw == "":
            if target in defaults:
                rec[target] = defaults[target]
                continue
            raise InputError("value missing in a required column", **where)
        dtype = "float64" if how else cols[name]
        value = _parse(raw, dtype, where)
        if name in _CANONICAL:
            value = _CANONICAL[name].get(value.lower(), value)
        if how == _KILO:
            value = value / 1000.0
        elif how in (_OHM, _MICROSIEMENS):
            value = _ohm_or_us_to_pu(value, how, rec, bus_kv, base_mva, path, lno, rno)
        rec[target] = value
    return rec


_NUMBER_BYTES = np.zeros(256, bool)
_NUMBER_BYTES[np.frombuffer(b"0123456789+-.eE", np.uint8)] = True


def _plain_number_chars(cells) -> np.ndarray:
    """Per cell: only digits, signs, point and exponent letters (no ``inf``, ``nan``, ``1_0``),
    checked on the bytes of the whole column at once. The numeric conversion then refuses any
    arrangement of these characters that is not a number."""
    text = "".join(cells)
    joined = text.encode("utf-8")
    if text.isascii():
        lengths = np.fromiter(map(len, cells), np.int64, len(cells))
    else:
        lengths = np.fromiter((len(c.encode("utf-8")) for c in cells), np.int64, len(cells))
    bad_byte = ~_NUMBER_BYTES[np.frombuffer(joined, np.uint8)]
    row_of_byte = np.repeat(np.arange(len(cells)), lengths)
    return np.bincount(row_of_byte[bad_byte], minlength=len(cells)) == 0


def _convert_columns(header, rows, cols, units, defaults, bus_kv, base_mva, path) -> dict:
    """Whole columns converted at once (pandas / numpy). Cells a column conversion cannot take
    (or takes too generously: ``inf``, ``nan``, ``1_0``) mark their row; marked rows are re-read
    by :func:`_record_values` in file order, which raises the same one-line error (file, row,
    line, column) as a row-by-row reader, or supplies the row's values if it finds nothing."""
    n = len(rows)
    cells_by_col = list(zip(*[r[2] for r in rows])) if n else [() for _ in header]
    out: dict[str, np.ndarray] = {}
    bad = np.zeros(n, bool)
    kv = None
    for j, name in enumerate(header):
        target, how = units.get(name, (name, None))
        raw = pd.Series(cells_by_col[j], dtype=object) if n else pd.Series([], dtype=object)
        blank = (raw == "").to_numpy()
        flagged = blank & (target not in defaults)
        dtype = "float64" if how else cols[name]
        default = defaults.get(target)
        if dtype == "object":
            vals = raw.to_numpy(object).copy()
            if name in _CANONICAL:
                low = raw.str.lower()
                vals = low.map(_CANONICAL[name]).where(low.isin(list(_CANONICAL[name])), raw).to_numpy(object)
        elif dtype == "bool":
            low = raw.str.lower()
            is_true, is_false = low.isin(_TRUE).to_numpy(), low.isin(_FALSE).to_numpy()
            flagged |= ~blank & ~is_true & ~is_false
            vals = is_true
        else:
            ok = _plain_number_chars(cells_by_col[j]) if n else np.zeros(0, bool)
            num = pd.to_numeric(raw.where(ok & ~blank, "0"), errors="coerce").to_numpy(np.float64)
            flagged |= ~blank & (~ok | ~np.isfinite(num))
            if dtype == "int64":
                with np.errstate(invalid="ignore"):
                    flagged |= ~blank & ((num != np.round(num)) | (np.abs(num) >= 2 ** 63))
            vals = num
            if how == _KILO:
                vals = vals / 1000.0
            elif how in (_OHM, _MICROSIEMENS):
                if "from_bus" not in out:          # the row-by-row reader needs from_bus first
                    flagged |= ~blank
                else:
                    if kv is None:
                        lookup = pd.Series(bus_kv, dtype=np.float64) if bus_kv else pd.Series(dtype=np.float64)
                        kv = lookup.reindex(out["from_bus"]).to_numpy(np.float64)
                    usable = np.isfinite(kv) & (kv > 0)
                    flagged |= ~blank & ~usable
                    with np.errstate(all="ignore"):
                        z_base = kv * kv / base_mva
                        vals = np.where(usable, vals / z_base if how == _OHM else vals * 1e-6 * z_base, 0.0)
                        flagged |= ~blank & usable & ~np.isfinite(vals)
        if default is not None or target in defaults:
            vals = np.where(blank, default, vals) if dtype != "object" else np.where(blank, default, vals)
        if dtype == "int64":
            vals = np.where(flagged, 0, vals).astype(np.int64)
        elif dtype == "bool":
            vals = np.where(flagged, False, vals).astype(bool)
        elif dtype != "object":
            vals = np.where(flagged, 0.0, vals).astype(np.float64)
        out[target] = vals
        bad |= flagged
    for row in np.flatnonzero(bad):
        rno, lno, cells = rows[row]
        rec = _record_values(header, cells, rno, lno, cols, units, defaults, bus_kv, base_mva, path)
        for k, v in rec.items():
            out[k][row] = v
    return out


def _ohm_or_us_to_pu(value, how, rec, bus_kv, base_mva, path, lno, rno):
    where = {"file": path, "line": lno, "record": f"row {rno}", "field": "from_bus"}
    bus = rec.get("from_bus")
    if bus not in bus_kv:
        raise InputError(f"unknown bus {bus}: its base kV is needed to convert ohms to per unit", **where)
    kv = bus_kv[bus]
    if not (math.isfinite(kv) and kv > 0):
        raise InputError(f"bus {bus} has base_kv {kv}: cannot convert ohms to per unit", **where)
    z_base = kv * kv / base_mva
    return value / z_base if how == _OHM else value * 1e-6 * z_base


def _read_toml(path: Path, folder: Path):
    if not path.exists():
        return 100.0, folder.name
    try:
        doc = tomllib.loads(_read_text(path))
    except tomllib.TOMLDecodeError as exc:
        raise InputError(str(exc), file=path) from None
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
    parent = target.parent
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.tmp-", dir=parent))
    try:
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, (target.stat().st_mode & 0o7777) if target.exists() else (0o777 & ~mask))
        _write_into(net, tmp)
        if target.exists():
            old = parent / f".{target.name}.old-{uuid.uuid4().hex[:8]}"
            os.rename(target, old)
            try:
                os.rename(tmp, target)
            except BaseException:
                os.rename(old, target)
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, target)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
