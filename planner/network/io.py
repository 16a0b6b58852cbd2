"""Read and write a network in any supported format, chosen from the path.

``read_network(path)`` reads

* a folder (or its ``network.toml`` or one of its table files) as the project's tabular format;
* an ``.xlsx`` workbook with one sheet per table (``planner.network.workbook``; needs openpyxl);
* a file whose first few kilobytes contain ``BUS DATA FOLLOWS``, or any ``.cdf``/``.txt`` file,
  as the IEEE Common Data Format;

then validates the network (``check``) and returns it. A missing path or a file in no known
format is an ``InputError`` naming the path.

>>> import os, tempfile
>>> from planner.network.model import Network, make_table
>>> net = Network(base_mva=100.0, name="two-bus",
...     buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
...                                {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0}]),
...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
...     lines=make_table("lines", [{"line_id": "1-2", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
>>> d = tempfile.mkdtemp()
>>> write_network(net, os.path.join(d, "two"))
>>> write_network(net, os.path.join(d, "two.cdf"), format="cdf")
>>> [float(read_network(os.path.join(d, p)).loads.mw.sum()) for p in ("two", "two.cdf")]
[50.0, 50.0]
>>> import shutil; shutil.rmtree(d)
"""
from __future__ import annotations

from pathlib import Path

from planner.errors import InputError
from planner.inputs import check_regular
from planner.network.cdf import read_cdf, write_cdf
from planner.network.model import Network
from planner.network.tabular import FILES, TOML_NAME, read_tables, write_tables
from planner.network.validate import check
from planner.network.workbook import SUFFIX as XLSX_SUFFIX, read_workbook, write_workbook

FORMATS = ("tables", "cdf", "xlsx")
_SNIFF_BYTES = 8192


def _detect(path: Path) -> str:
    if not path.exists():
        raise InputError("no such file or folder", file=path)
    if path.is_dir():
        return "tables"
    if path.suffix.lower() == XLSX_SUFFIX:
        return "xlsx"
    if path.name == TOML_NAME or path.name in FILES.values():
        return "tables"
    check_regular(path, "network file")     # a pipe or device would block the sniffing read
    try:
        with open(path, "rb") as fh:
            head = fh.read(_SNIFF_BYTES)
    except OSError as exc:
        raise InputError(f"cannot read file: {exc.strerror or exc}", file=path) from None
    if b"BUS DATA FOLLOWS" in head.upper() or path.suffix.lower() in (".cdf", ".txt"):
        return "cdf"
    raise InputError("unknown network format: expected a folder of tables or an IEEE CDF file", file=path)


def read_network(path) -> Network:
    """Read a network (tabular folder, .xlsx workbook or IEEE CDF file, detected from the path),
    validate it and return it. Raises ``InputError`` for unreadable input and ``NetworkError`` (a subclass) when
    the network is read but fails validation."""
    path = Path(path)
    fmt = _detect(path)
    if fmt == "tables":
        net = read_tables(path if path.is_dir() or path.name == TOML_NAME else path.parent)
    elif fmt == "xlsx":
        net = read_workbook(path)
    else:
        net = read_cdf(path)
    return check(net)


def write_network(net: Network, path, format: str | None = None) -> None:
    """Write a network as a folder of tables (``format="tables"``), an .xlsx workbook
    (``format="xlsx"``) or an IEEE CDF file (``format="cdf"``); every write is atomic. Without
    ``format``, a path ending in ``.xlsx`` is a workbook and any other path a folder of tables."""
    if format is None:
        format = "xlsx" if Path(path).suffix.lower() == XLSX_SUFFIX else "tables"
    if format == "xlsx":
        write_workbook(net, path)
    elif format == "tables":
        write_tables(net, path)
    elif format == "cdf":
        write_cdf(net, path)
    else:
        raise InputError(f"unknown format {format!r} (expected one of {', '.join(FORMATS)})",
                         field="format")
