"""Read and write the IEEE Common Data Format (an open standard, IEEE Trans. PAS-92(6), 1973).

Fields sit in fixed columns; see ``BUS_FIELDS`` and ``BRANCH_FIELDS`` (1-based, inclusive).
The reader is tolerant of what real files contain: CRLF or mixed line endings, a leading ``TAPE``
line, lines shorter than the last field (missing fields read as 0 or blank), blank numeric fields
(read as 0), and the trailing sections (loss zones, interchange, tie lines, ``END OF DATA``), which
carry nothing a load flow needs and are skipped. Anything it cannot read is an ``InputError``
naming the file, the line and the field.

Mapping to the model:

* bus type 0 or 1 -> ``PQ``, 2 -> ``PV``, 3 -> ``slack``;
* a load ``D<bus>`` (constant power) where load MW or Mvar is non-zero;
* a generator ``G<bus>`` where there is generation or the bus is type 2 or 3; its setpoint is the
  desired voltage (the final voltage if that is 0); type 2 and 3 buses take their reactive limits
  from the max/min Mvar fields (both 0 means no limits given: +/-9999 Mvar);
* shunt G and B (pu on the system base) -> ``shunt_draw_mw``/``shunt_supply_mvar`` of the bus;
* branch type 0 with ratio 0 (and no phase shift) -> a line; anything else -> a transformer whose
  ratio sits on the tap bus (``tap_side="from"``, ``from_bus`` = tap bus); ratio 0 means 1.0;
  tap limits from the min/max tap fields (0.9/1.1 when both are 0 or for phase shifters); the
  ratio is ``adjustable`` for types 2 and 3 (variable tap), not for types 0, 1 and 4;
* branch ids are ``"<tap>-<Z>"``; parallel branches between the same buses get
  ``"<tap>-<Z>#<circuit>"``;
* the stored solution (final voltage and angle) -> ``buses.v_pu`` / ``buses.angle_deg``.

A section header that states its number of items (``20 ITEMS``) is checked against the records
found: a mismatch means a record was lost or added, and is an error.

>>> import os, tempfile
>>> from planner.network.model import DEFAULTS, TABLES, Network, make_table
>>> net = Network(base_mva=100.0, name="two-bus",
...     buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
...                                {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.02}]),
...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
...     lines=make_table("lines", [{"line_id": "1-2", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
>>> path = os.path.join(tempfile.mkdtemp(), "two.cdf")
>>> write_cdf(net, path)
>>> back = read_cdf(path)
>>> back.buses.kind.tolist(), float(back.generators.v_set_pu[0]), float(back.loads.mw[0])
(['slack', 'PQ'], 1.02, 50.0)
>>> import shutil; shutil.rmtree(os.path.dirname(path))
"""
from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pandas as pd

from planner.atomic import write_file
from planner.inputs import read_input_bytes
from planner.errors import InputError, PlannerError
from planner.network.model import DEFAULTS, TABLES, Network, make_table

# (key, label, first column, last column, kind) with columns 1-based inclusive, as in the standard.
TITLE_FIELDS = [
    ("base_mva", "system MVA base", 32, 37, "float"),
    ("case", "case identification", 46, 73, "str"),
]
BUS_FIELDS = [
    ("bus", "bus number", 1, 4, "int"),
    ("name", "name", 6, 17, "str"),
    ("area", "area", 19, 20, "int"),
    ("zone", "loss zone", 21, 23, "int"),
    ("type", "type", 25, 26, "int"),
    ("v", "final voltage", 28, 33, "float"),
    ("angle", "final angle", 34, 40, "float"),
    ("load_mw", "load MW", 41, 49, "float"),
    ("load_mvar", "load Mvar", 50, 59, "float"),
    ("gen_mw", "generation MW", 60, 67, "float"),
    ("gen_mvar", "generation Mvar", 68, 75, "float"),
    ("base_kv", "base kV", 77, 83, "float"),
    ("v_desired", "desired voltage", 85, 90, "float"),
    ("q_max", "maximum Mvar or voltage", 91, 98, "float"),
    ("q_min", "minimum Mvar or voltage", 99, 106, "float"),
    ("g", "shunt G", 107, 114, "float"),
    ("b", "shunt B", 115, 122, "float"),
    ("remote", "remote controlled bus", 124, 127, "int"),
]
BRANCH_FIELDS = [
    ("tap_bus", "tap bus", 1, 4, "int"),
    ("z_bus", "Z bus", 6, 9, "int"),
    ("area", "area", 11, 12, "int"),
    ("zone", "loss zone", 13, 14, "int"),
    ("circuit", "circuit", 17, 17, "int"),
    ("type", "type", 19, 19, "int"),
    ("r", "R", 20, 29, "float"),
    ("x", "X", 30, 40, "float"),
    ("b", "line charging B", 41, 50, "float"),
    ("rating1", "rating 1", 51, 55, "float"),
    ("rating2", "rating 2", 57, 61, "float"),
    ("rating3", "rating 3", 63, 67, "float"),
    ("ctrl_bus", "controlled bus", 69, 72, "int"),
    ("side", "side", 74, 74, "int"),
    ("ratio", "final turns ratio", 77, 82, "float"),
    ("shift", "final phase shift", 84, 90, "float"),
    ("tap_min", "minimum tap", 91, 97, "float"),
    ("tap_max", "maximum tap", 98, 104, "float"),
    ("step", "tap step", 106, 111, "float"),
    ("ctrl_min", "minimum controlled value", 113, 119, "float"),
    ("ctrl_max", "maximum controlled value", 120, 126, "float"),
]

# A number with an explicit decimal point or an integer, optional exponent (E or Fortran D).
# Stricter than float(): rejects "nan", "inf" and "1_0", which float() would accept.
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eEdD][+-]?\d+)?", re.ASCII)
_ITEMS = re.compile(r"(\d+)\s+ITEMS", re.IGNORECASE)
_WIDE_Q = 9999.0
# Fields a load flow does not need are not read: real files are not always aligned there (the
# archive files put the maximum controlled value at columns 119-121, overlapping the minimum),
# and garbage in a field nobody uses should not stop a study. The writer still fills them.
_NOT_READ = {"zone", "rating2", "rating3", "ctrl_bus", "side", "ctrl_min", "ctrl_max", "remote"}


def _parse_fields(text: str, fields, file, lineno, section):
    """Slice one fixed-column record into a dict; blank or missing numeric fields read as 0."""
    out = {}
    for key, label, a, b, kind in fields:
        if key in _NOT_READ:
            continue
        raw = text[a - 1:b].strip()
        if kind == "str":
            out[key] = raw
            continue
        where = f"{section} section, field '{label}' (cols {a}-{b})" if a != b else \
            f"{section} section, field '{label}' (col {a})"
        if raw == "":
            out[key] = 0 if kind == "int" else 0.0
            continue
        if not _NUMBER.fullmatch(raw):
            raise InputError(f"cannot read {raw!r} as a number", file=file, line=lineno, field=where)
        value = float(raw.replace("d", "e").replace("D", "e"))
        if not np.isfinite(value):
            raise InputError(f"{raw!r} is out of range", file=file, line=lineno, field=where)
        if kind == "int":
            if value != int(value) or abs(value) >= 2 ** 63:   # beyond int64: no table can hold it
                raise InputError(f"{raw!r} is not a whole number", file=file, line=lineno, field=where)
            if abs(value) >= 2 ** 53:
                raise InputError(f"{raw!r} is out of range for a whole number", file=file, line=lineno,
                                 field=where)
            value = int(value)
        out[key] = value
    return out


_ALLOWED = np.zeros(256, bool)
_ALLOWED[np.frombuffer(b"0123456789+-.eEdD ", np.uint8)] = True
_SPACE, _LOWER_D, _UPPER_D, _E = ord(" "), ord("d"), ord("D"), ord("e")


def _parse_section(records, fields, file, section):
    """Slice every record of a section at once: {key: array} for the fields that are read.

    Numbers are converted column by column (numpy); a value that the column conversion cannot
    take, or that fails a check (characters other than digits, sign, point, exponent; not
    finite; not whole in an integer field), marks its record, and the first marked record is
    re-read by :func:`_parse_fields`, which raises the same one-line error, naming file, line
    and field, that a record-by-record reader would. Returns (columns, first bad row or None):
    the caller raises it only if no earlier record has another error.
    """
    n = len(records)
    width = max(b for _, _, _, b, _ in fields)
    texts = [t for _, t in records]
    if n:
        # a fixed-width unicode array (C-level copy, short lines padded with NUL): one byte per
        # character, since the text was decoded as latin-1
        wide = np.array(texts, dtype=f"<U{width}").view(np.uint32).reshape(n, width)
        lengths = np.fromiter(map(len, texts), np.int64, n)
        wide[np.arange(width) >= lengths[:, None]] = _SPACE
        mat = wide.astype(np.uint8)
    else:
        wide = np.zeros((0, width), np.uint32)
        mat = np.zeros((0, width), np.uint8)
    out, bad = {}, np.zeros(n, bool)
    numeric = []
    num_fields = []
    for key, label, a, b, kind in fields:
        if key in _NOT_READ:
            continue
        if kind == "str":
            # the field's characters of every record as one fixed-width string array, stripped
            # in one numpy pass
            cells = np.ascontiguousarray(wide[:, a - 1:b]).view(f"<U{b - a + 1}").ravel()
            out[key] = np.strings.strip(cells).astype(object)
            continue
        num_fields.append((key, kind, a - 1, b))
    if num_fields:
        # the checks of every numeric field at once: per field counts from running sums along
        # the record of non-blank characters, characters other than digits, sign, point and
        # exponent, and starts of runs of non-blank characters (more than one: a space between
        # two non-blank characters would make two numbers of one field)
        work = mat.copy()
        work[(work == _LOWER_D) | (work == _UPPER_D)] = _E
        # the checks run on the transposed matrix (one row per column of the record), so each
        # per-field sum adds whole rows of n values
        work_t = np.ascontiguousarray(work.T)
        nonblank = work_t != _SPACE
        lo = [a for _, _, a, _ in num_fields]
        hi = [b for _, _, _, b in num_fields]
        run_start = nonblank.copy()
        run_start[1:] &= ~nonblank[:-1]

        def per_field(x):
            x = x.view(np.uint8)
            out = np.empty((n, len(lo)), np.uint8)      # fields are at most 11 wide
            for k, (a, b) in enumerate(zip(lo, hi)):
                np.sum(x[a:b], axis=0, dtype=np.uint8, out=out[:, k])
            return out
        blank_all = per_field(nonblank) == 0
        flagged_all = (per_field(~_ALLOWED[work_t]) > 0) | (
            per_field(run_start) + (nonblank[lo] & ~run_start[lo]).T > 1)
        for k, (key, kind, a, b) in enumerate(num_fields):
            sub = work[:, a:b].copy()
            flagged = flagged_all[:, k].copy()
            fill = blank_all[:, k] | flagged
            sub[fill, -1] = ord("0")
            sub[fill, :-1] = _SPACE
            numeric.append((key, kind, sub, flagged))
    values = _block_floats([sub for _, _, sub, _ in numeric])
    for k, (key, kind, sub, flagged) in enumerate(numeric):
        vals = values[:, k].copy() if values is not None else None
        if vals is None:
            text = np.ascontiguousarray(sub).view(f"S{sub.shape[1]}").ravel()
            vals = np.array([_float_or_nan(x) for x in text])
            flagged |= np.isnan(vals)
        with np.errstate(invalid="ignore"):
            flagged |= ~np.isfinite(vals)
            if kind == "int":
                flagged |= (vals != np.round(vals)) | (np.abs(vals) >= 2 ** 53)
        vals[flagged] = 0.0
        out[key] = vals.astype(np.int64) if kind == "int" else vals
        bad |= flagged
    # the record-by-record parser names the exact field of the first bad record; a marked record
    # it reads without complaint (it is the stricter of the two) takes its values
    error = None
    for row in np.flatnonzero(bad):
        lineno, text = records[row]
        try:
            f = _parse_fields(text, fields, file, lineno, section)
        except InputError as exc:
            error = (int(row), exc)
            break
        for k, v in f.items():
            out[k][row] = v
    return out, error


def _block_floats(subs):
    """Numbers of several fixed-width fields (one block of bytes per field, no inner spaces,
    blanks filled) for all records in one pass of pandas' C reader: the fields of a record are
    joined by commas, records by newlines. None if any field is not a plain number; the caller
    then converts field by field to find it."""
    n = subs[0].shape[0] if subs else 0
    if n == 0:
        return np.zeros((0, len(subs)))
    width = sum(sb.shape[1] + 1 for sb in subs)
    buf = np.empty((n, width), np.uint8)
    pos = 0
    for sb in subs:
        w = sb.shape[1]
        buf[:, pos:pos + w] = sb
        buf[:, pos + w] = ord(",")
        pos += w + 1
    buf[:, -1] = ord("\n")
    try:
        df = pd.read_csv(io.BytesIO(buf.tobytes()), header=None, dtype=np.float64, engine="c",
                         na_filter=False, skipinitialspace=True)
    except (ValueError, pd.errors.ParserError):
        return None
    vals = df.to_numpy(np.float64)
    return vals if vals.shape == (n, len(subs)) else None


def _float_or_nan(x: bytes) -> float:
    try:
        return float(x)
    except ValueError:
        return float("nan")


def _raise_first(candidates):
    """Raise the error of the earliest record among ``(row, error)`` pairs (None skipped); on the
    same record the earlier candidate wins, as in a record-by-record reader."""
    live = [(row, k, exc) for k, cand in enumerate(candidates) if cand is not None for row, exc in [cand]]
    if live:
        raise min(live, key=lambda t: (t[0], t[1]))[2]


def _first_row(mask):
    return int(np.argmax(mask)) if mask.any() else None


def _split_lines(data: bytes):
    # latin-1 maps every byte to one character, so the fixed columns stay byte columns and no
    # byte sequence can fail to decode; CR, LF and CRLF all end a line.
    text = data.decode("latin-1")
    if not any(b in data for b in _OTHER_BREAKS):
        # str.splitlines ends lines at CR, LF and CRLF in one C pass (3x faster than replacing
        # CRs first); it also ends them at the bytes in _OTHER_BREAKS, absent here
        lines = text.splitlines()
        if text.endswith(("\n", "\r")):
            lines.append("")
        return lines
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    return text.split("\n")


# bytes that str.splitlines takes as line ends besides CR and LF (in latin-1 text)
_OTHER_BREAKS = (b"\x0b", b"\x0c", b"\x1c", b"\x1d", b"\x1e", b"\x85")     # each found by memchr


def _section(lines, start, file, name):
    """Records of the section whose header is at index ``start``: (line number, text) pairs up
    to the ``-999`` terminator; blank lines are skipped."""
    # one pass of C-level string methods finds the terminator; then the records in one slice
    i = next((j for j in range(start + 1, len(lines)) if lines[j].lstrip().startswith("-999")), None)
    if i is not None:
        seg = lines[start + 1:i]
        records = list(zip(range(start + 2, i + 2), seg))
        if "" in seg or any(map(str.isspace, seg)):
            records = [(ln, t) for ln, t in records if t and not t.isspace()]
    else:
        raise InputError(f"{name} section that starts at line {start + 1} has no closing -999 line",
                         file=file, line=len(lines), field=f"{name} section")
    m = _ITEMS.search(lines[start])
    if m and int(m.group(1)) != len(records):
        hint = ""
        seen = {}
        for ln, text in records:
            key = text.rstrip()
            if key in seen:
                hint = f"; line {ln} repeats line {seen[key]} exactly"
                break
            seen[key] = ln
        raise InputError(f"header declares {int(m.group(1))} items but the section has "
                         f"{len(records)} records{hint}",
                         file=file, line=start + 1, field=f"{name} section header")
    return records, i


def read_cdf(path) -> Network:
    """Read an IEEE Common Data Format file into a ``Network``.

    Raises ``InputError`` (one line: file, line number, field) for anything it cannot read.
    See the module docstring for how records map to the model's tables.
    """
    file = str(path)
    data = read_input_bytes(path, what="network file")
    lines = _split_lines(data)

    bus_hdr = next((i for i, t in enumerate(lines) if t.lstrip().upper().startswith("BUS")), None)
    if bus_hdr is None:
        raise InputError("no bus section (a line starting 'BUS DATA FOLLOWS'): not an IEEE CDF file",
                         file=file)
    # The title is the line before the bus section, unless that is the optional TAPE line.
    base_mva, case = 100.0, ""
    title_idx = bus_hdr - 1
    if title_idx >= 0 and lines[title_idx].strip().upper() != "TAPE":
        title = _parse_fields(lines[title_idx], TITLE_FIELDS, file, title_idx + 1, "title")
        base_mva, case = title["base_mva"], title["case"]
        if base_mva <= 0:
            raise InputError(f"system MVA base must be positive, got {base_mva:g}", file=file,
                             line=title_idx + 1, field="title line, field 'system MVA base' (cols 32-37)")

    bus_records, bus_end = _section(lines, bus_hdr, file, "bus")
    br_hdr = next((i for i in range(bus_end + 1, len(lines))
                   if lines[i].lstrip().upper().startswith("BRANCH")), None)
    if br_hdr is None:
        raise InputError("no branch section (a line starting 'BRANCH DATA FOLLOWS') after the bus section",
                         file=file, line=bus_end + 1)
    branch_records, _ = _section(lines, br_hdr, file, "branch")

    bus, perr = _parse_section(bus_records, BUS_FIELDS, file, "bus")
    bus_lines = np.array([ln for ln, _ in bus_records], np.int64)
    n = bus["bus"]
    nonpositive = n <= 0
    # a repeated bus number: every occurrence after the first
    order = np.argsort(n, kind="stable")
    dup_sorted = np.r_[False, n[order][1:] == n[order][:-1]]
    repeated = np.zeros(len(n), bool)
    repeated[order[dup_sorted]] = True
    btype = bus["type"]
    bad_type = ~np.isin(btype, (0, 1, 2, 3))
    bus_field = "bus section, field 'bus number' (cols 1-4)"

    def err_nonpositive(row):
        return InputError(f"bus number must be positive, got {n[row]}", file=file, line=int(bus_lines[row]),
                          field=bus_field)

    def err_repeated(row):
        first = int(bus_lines[np.flatnonzero(n == n[row])[0]])
        return InputError(f"bus {n[row]} is already defined at line {first}", file=file,
                          line=int(bus_lines[row]), field=bus_field)

    def err_type(row):
        return InputError(f"bus type must be 0, 1, 2 or 3, got {btype[row]}", file=file,
                          line=int(bus_lines[row]), field="bus section, field 'type' (cols 25-26)")

    # per record the checks run in this order: fields, bus number, repetition, type
    _raise_first([perr] + [(r, mk(r)) if r is not None else None for r, mk in
                           ((_first_row(nonpositive), err_nonpositive),
                            (_first_row(repeated & ~nonpositive), err_repeated),
                            (_first_row(bad_type), err_type))])

    kind = np.array(["PQ", "PQ", "PV", "slack"], dtype=object)[btype] if len(btype) else np.array([], object)
    v_final = np.where(bus["v"] > 0, bus["v"], 1.0)   # 0 (blank) is no stored solution: start at 1 pu
    buses = pd.DataFrame({"bus": n, "name": bus["name"], "base_kv": bus["base_kv"], "kind": kind,
                          "shunt_draw_mw": bus["g"] * base_mva, "shunt_supply_mvar": bus["b"] * base_mva,
                          "area": bus["area"], "v_pu": v_final, "angle_deg": bus["angle"]})
    has_load = (bus["load_mw"] != 0) | (bus["load_mvar"] != 0)
    loads = pd.DataFrame({"load_id": _prefixed("D", n[has_load]), "bus": n[has_load],
                          "mw": bus["load_mw"][has_load], "mvar": bus["load_mvar"][has_load]})
    controlled = (btype == 2) | (btype == 3)
    has_gen = controlled | (bus["gen_mw"] != 0) | (bus["gen_mvar"] != 0)
    given = controlled & ((bus["q_max"] != 0) | (bus["q_min"] != 0))
    gens = pd.DataFrame({"gen_id": _prefixed("G", n[has_gen]), "bus": n[has_gen],
                         "mw": bus["gen_mw"][has_gen], "mvar": bus["gen_mvar"][has_gen],
                         "v_set_pu": np.where(bus["v_desired"] > 0, bus["v_desired"], v_final)[has_gen],
                         "q_min_mvar": np.where(given, bus["q_min"], -_WIDE_Q)[has_gen],
                         "q_max_mvar": np.where(given, bus["q_max"], _WIDE_Q)[has_gen]})

    br, perr = _parse_section(branch_records, BRANCH_FIELDS, file, "branch")
    br_lines = np.array([ln for ln, _ in branch_records], np.int64)
    bt = br["type"]
    bad_bt = _first_row(~np.isin(bt, (0, 1, 2, 3, 4)))
    _raise_first([perr, None if bad_bt is None else (bad_bt, InputError(
        f"branch type must be 0 to 4, got {bt[bad_bt]}", file=file, line=int(br_lines[bad_bt]),
        field="branch section, field 'type' (col 19)"))])
    ids = _branch_ids_vectorized(br["tap_bus"], br["z_bus"], br["circuit"])
    is_line = (bt == 0) & (br["ratio"] == 0) & (br["shift"] == 0)
    common = {"from_bus": br["tap_bus"], "to_bus": br["z_bus"], "r_pu": br["r"], "x_pu": br["x"],
              "b_pu": br["b"], "rating_mva": br["rating1"]}
    lines_out = pd.DataFrame({"line_id": ids[is_line], **{k: v[is_line] for k, v in common.items()}})
    tr = ~is_line
    shifter = bt == 4
    lo, hi = br["tap_min"], br["tap_max"]
    default_taps = shifter | ((lo == 0) & (hi == 0))
    variable = (bt == 2) | (bt == 3)
    xfmrs = pd.DataFrame({"xfmr_id": ids[tr], **{k: v[tr] for k, v in common.items()},
                          "ratio_pu": np.where(br["ratio"] != 0, br["ratio"], 1.0)[tr], "tap_side": "from",
                          "shift_deg": br["shift"][tr],
                          "ratio_min_pu": np.where(default_taps, 0.9, lo)[tr],
                          "ratio_max_pu": np.where(default_taps, 1.1, hi)[tr],
                          "ratio_step_pu": np.where(variable, br["step"], 0.0)[tr],
                          "adjustable": variable[tr]})

    def table(kind, df):
        return _standard_table(kind, df) if len(df) else None

    net = Network(base_mva=float(base_mva), name=case or Path(file).stem, source=file,
                  **{k: v for k, v in (("buses", table("buses", buses)), ("loads", table("loads", loads)),
                                       ("generators", table("generators", gens)),
                                       ("lines", table("lines", lines_out)),
                                       ("transformers", table("transformers", xfmrs))) if v is not None})
    return net


def _standard_table(kind: str, df: pd.DataFrame) -> pd.DataFrame:
    """``make_table(kind, df)`` built in one step: every standard column in order and of its
    dtype, defaults filled as whole columns (no per-column checks and conversions after)."""
    n = len(df)
    cols = {}
    for col, dtype in TABLES[kind].items():
        if col in df.columns:
            values = df[col].to_numpy()
        else:
            values = np.full(n, DEFAULTS[kind][col], dtype=object if dtype == "object" else None)
        # object columns stay object (pandas 3 would infer its string dtype from an array)
        cols[col] = pd.Series(values, dtype=object) if dtype == "object" else values.astype(dtype, copy=False)
    return pd.DataFrame(cols, copy=False)       # Network() checks it as make_table does


def _prefixed(prefix: str, numbers: np.ndarray) -> np.ndarray:
    return np.array([f"{prefix}{x}" for x in numbers.tolist()], dtype=object) if len(numbers) else \
        np.array([], object)


def _branch_ids_vectorized(a: np.ndarray, b: np.ndarray, circuit: np.ndarray) -> np.ndarray:
    """:func:`_branch_ids` for whole columns: ``"i-j"`` built at once for the (usual) pairs with
    one branch; the few parallel branches go through the record-by-record rule."""
    if not len(a):
        return np.array([], object)
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    top = int(hi.max()) + 1
    if 0 <= int(lo.min()) and top < 2 ** 31:
        # one integer per unordered pair (CDF bus numbers have four digits): a hash, no MultiIndex
        single = ~pd.Series(lo.astype(np.int64) * top + hi).duplicated(keep=False).to_numpy()
    else:
        single = ~pd.MultiIndex.from_arrays([lo, hi]).duplicated(keep=False)
    ids = np.array([f"{x}-{y}" for x, y in zip(a.tolist(), b.tolist())], dtype=object)
    if not single.all():
        multi = np.flatnonzero(~single)
        ids[multi] = _branch_ids([(int(a[k]), int(b[k]), int(circuit[k])) for k in multi],
                                 used=set(ids[single]))
    return ids


def _branch_ids(keys, used=None):
    """Ids for branches given as (tap bus, Z bus, circuit): ``"i-j"`` when a pair of buses has one
    branch, ``"i-j#c"`` for parallel ones (c is the circuit, or the next free number)."""
    pair = [frozenset((a, b)) for a, b, _ in keys]
    counts = pd.Series(pair, dtype=object).value_counts() if keys else {}
    used, out = (set() if used is None else set(used)), []
    for (a, b, c), p in zip(keys, pair):
        if counts[p] == 1:
            bid = f"{a}-{b}"
        else:
            c = c if c > 0 else 1
            bid = f"{a}-{b}#{c}"
            while bid in used:
                c += 1
                bid = f"{a}-{b}#{c}"
        used.add(bid)
        out.append(bid)
    return out


# --- writer ---------------------------------------------------------------------------------

def _fmt(value, a, b, record, label, kind="float"):
    """Right-justify a number in columns a..b. The exact (shortest round-trip) decimal is used when
    it fits; otherwise the value is rounded to fit, keeping a leading space so fields stay apart."""
    width = b - a + 1
    if kind == "int":
        s = str(int(value))
        if len(s) > width:
            raise PlannerError(f"{record}: {label}: {s} does not fit in CDF columns {a}-{b}")
        return s.rjust(width)
    v = float(value)
    if not np.isfinite(v):
        raise PlannerError(f"{record}: {label}: non-finite value {v} cannot be written")
    if v == 0:
        v = 0.0   # no "-0.0"
    exact = np.format_float_positional(v, trim="-")
    exact = exact if "." in exact else exact + ".0"
    if len(exact) <= width:
        return exact.rjust(width)
    for room in (width - 1, width):
        for d in range(room, -1, -1):
            s = f"{v:.{d}f}" + ("." if d == 0 else "")
            if len(s) <= room:
                head, tail = s.split(".")
                return f"{head}.{tail.rstrip('0') or '0'}".rjust(width)
    raise PlannerError(f"{record}: {label}: {v} does not fit in CDF columns {a}-{b}")


def _record(fields, values, record):
    line = [" "] * max(b for _, _, _, b, _ in fields)
    for key, label, a, b, kind in fields:
        if kind == "str":
            s = str(values.get(key, ""))[: b - a + 1].ljust(b - a + 1)
        else:   # fields with nothing to say are written as 0, never blank
            s = _fmt(values.get(key, 0), a, b, record, label, kind)
        line[a - 1:b] = s
    return "".join(line).rstrip()


def write_cdf(net: Network, path) -> None:
    """Write a network as an IEEE Common Data Format file that ``read_cdf`` reads back to the same
    network, within the precision of the fixed columns. The file is written atomically.

    What the format cannot hold: out-of-service elements are left out; several loads or
    generators on one bus are summed (the first generator's setpoint is kept); voltage-dependent
    load shares are dropped; shunt banks are written as fixed bus susceptance (steps on x Mvar per
    step); a transformer with its ratio on the "to" side is written with its buses swapped.
    """
    base = float(net.base_mva)
    buses = net.buses
    loads = net.loads[net.loads.energised]
    gens = net.generators[net.generators.energised]
    shunts = net.shunts[net.shunts.energised]
    ld = loads.groupby("bus")[["mw", "mvar"]].sum()
    gp = gens.groupby("bus")[["mw", "mvar", "q_min_mvar", "q_max_mvar"]].sum()
    gv = gens.groupby("bus")["v_set_pu"].first()
    sh = (shunts.mvar_per_step * shunts.steps_on).groupby(shunts.bus).sum()

    out = [_record(TITLE_FIELDS, {"case": net.name, "base_mva": base}, "title"),
           f"BUS DATA FOLLOWS                            {len(buses)} ITEMS"]
    for row in buses.itertuples(index=False):
        n = row.bus
        btype = {"PQ": 0, "PV": 2, "slack": 3}.get(row.kind, 0)
        vals = {"bus": n, "name": row.name, "area": row.area, "zone": 1, "type": btype,
                "v": row.v_pu, "angle": row.angle_deg, "base_kv": row.base_kv,
                "g": row.shunt_draw_mw / base, "b": (row.shunt_supply_mvar + sh.get(n, 0.0)) / base, "remote": 0,
                "load_mw": ld.mw.get(n, 0.0), "load_mvar": ld.mvar.get(n, 0.0)}
        if n in gp.index:
            vals.update(gen_mw=gp.mw[n], gen_mvar=gp.mvar[n], v_desired=gv[n])
            if btype in (2, 3):
                lo, hi = gp.q_min_mvar[n], gp.q_max_mvar[n]
                wide = lo <= -_WIDE_Q and hi >= _WIDE_Q
                vals.update(q_max=0.0 if wide else hi, q_min=0.0 if wide else lo)
        out.append(_record(BUS_FIELDS, vals, f"bus {n}"))
    out.append("-999")

    branches = []
    for row in net.lines[net.lines.energised].itertuples(index=False):
        branches.append({"tap_bus": row.from_bus, "z_bus": row.to_bus, "type": 0, "r": row.r_pu,
                         "x": row.x_pu, "b": row.b_pu, "rating1": row.rating_mva, "ratio": 0.0,
                         "shift": 0.0, "id": row.line_id})
    for row in net.transformers[net.transformers.energised].itertuples(index=False):
        a, b = (row.from_bus, row.to_bus) if row.tap_side == "from" else (row.to_bus, row.from_bus)
        branches.append({"tap_bus": a, "z_bus": b, "type": 2 if row.adjustable else 1,
                         "r": row.r_pu, "x": row.x_pu, "b": row.b_pu, "rating1": row.rating_mva,
                         "ratio": row.ratio_pu, "shift": row.shift_deg, "tap_min": row.ratio_min_pu,
                         "tap_max": row.ratio_max_pu, "step": row.ratio_step_pu, "id": row.xfmr_id})
    out.append(f"BRANCH DATA FOLLOWS                         {len(branches)} ITEMS")
    for br in branches:
        m = re.search(r"#(\d)$", str(br.pop("id")))
        br.update(area=1, zone=1, circuit=int(m.group(1)) if m else 1)
        out.append(_record(BRANCH_FIELDS, br, f"branch {br['tap_bus']}-{br['z_bus']}"))
    out += ["-999", "LOSS ZONES FOLLOWS                     0 ITEMS", "-99",
            "INTERCHANGE DATA FOLLOWS                 0 ITEMS", "-9",
            "TIE LINES FOLLOWS                     0 ITEMS", "-999", "END OF DATA"]
    _atomic_write_text(path, "\r\n".join(out) + "\r\n")


def _atomic_write_text(path, text: str) -> None:
    # CDF files are Latin-1 text; characters outside it are written as '?'
    write_file(path, text, encoding="latin-1")
