"""Load profiles: load factors per interval of the year, read from a CSV file.

File layout (one header line, then one line per interval)::

    hour,duration_h,when,network
    0,1,2027-01-01 00:00,0.62
    1,1,2027-01-01 01:00,0.58

* ``hour`` (required): start of the interval in hours from the start of the study year, strictly
  increasing; intervals must not overlap (``hour + duration_h <= next hour``).
* ``duration_h`` (optional, default 1): length of the interval in hours, positive.
* ``when`` (optional): a label for people (a date and time), shown where the report says when
  something happened; otherwise "hour N".
* factor columns (at least one): ``network`` scales every load; ``area_N`` the loads of buses in
  area N; any other name the loads of a bus group named in the study. A bus takes the factor of
  its group, else of its area, else of ``network``. A factor multiplies the loads as given in
  the network file (1.0 = the network file's load).

The whole profile may cover at most one (leap) year: 8,784 hours.

>>> import os, tempfile
>>> d = tempfile.mkdtemp(); p = os.path.join(d, "p.csv")
>>> _ = open(p, "w").write("hour,network\\n0,0.5\\n1,0.75\\n2,1.0\\n")
>>> prof = read_profile(p)
>>> prof
LoadProfile(intervals=3, hours=3.0, columns=['network'])
>>> _ = open(p, "w").write("hour,network\\n0,0.5\\n1,abc\\n")
>>> read_profile(p)
Traceback (most recent call last):
...
planner.errors.InputError: ...p.csv:3: network: cannot read 'abc' as a number
>>> import shutil; shutil.rmtree(d)
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError

MAX_HOURS = 8784.0           # a leap year
MAX_FACTOR = 10.0            # a factor above this is taken as a typing error
RESERVED = ("hour", "duration_h", "when")


@dataclass
class LoadProfile:
    """Intervals of the year with load factors per column (see module docstring)."""
    start_h: np.ndarray          # [T]
    duration_h: np.ndarray       # [T]
    labels: list                 # [T] text for people
    columns: list                # factor column names
    factors: np.ndarray          # [T, len(columns)]
    source: str = ""

    def __repr__(self):
        return (f"LoadProfile(intervals={len(self.start_h)}, hours={float(self.duration_h.sum())}, "
                f"columns={self.columns})")

    @property
    def total_hours(self) -> float:
        return float(self.duration_h.sum())

    def bus_factors(self, bus_ids, bus_areas, groups=None) -> np.ndarray:
        """Factor per interval and bus, ``[T, n]``, by the rule group > area > network.

        Raises ``InputError`` naming a bus no column covers, or a group bus that is unknown.
        """
        bus_ids = np.asarray(bus_ids, np.int64)
        n = len(bus_ids)
        which = np.full(n, -1)
        col = {c: k for k, c in enumerate(self.columns)}
        if "network" in col:
            which[:] = col["network"]
        areas = np.asarray(bus_areas, np.int64)
        for name, k in col.items():
            if name.startswith("area_"):
                try:
                    a = int(name[5:])
                except ValueError:
                    raise InputError(f"area column {name!r} needs a whole area number", file=self.source,
                                     field=name) from None
                which[areas == a] = k
        pos = {int(b): i for i, b in enumerate(bus_ids)}
        for name, buses in (groups or {}).items():
            if name not in col:
                continue
            for b in buses:
                if int(b) not in pos:
                    raise InputError(f"group {name!r} lists unknown bus {b}", file=self.source, field=name)
                which[pos[int(b)]] = col[name]
        unknown = [c for c in self.columns if c != "network" and not c.startswith("area_")
                   and c not in (groups or {})]
        if unknown:
            raise InputError(f"column {unknown[0]!r} is neither 'network', an area_N column nor a bus group "
                             "of the study", file=self.source, field=unknown[0])
        if (which < 0).any():
            b = bus_ids[np.flatnonzero(which < 0)[0]]
            raise InputError(f"bus {b} is covered by no factor column (add a 'network' column)",
                             file=self.source)
        return self.factors[:, which]

    def label(self, k: int) -> str:
        return self.labels[k] or f"hour {self.start_h[k]:g}"


def read_profile(path) -> LoadProfile:
    """Read and check a load-profile CSV file (see module docstring); the file is not changed.

    Every error is one line naming the file, the line and the field.
    """
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise InputError("no such file", file=path) from None
    except UnicodeDecodeError as exc:
        raise InputError(f"not UTF-8 text (byte {exc.start})", file=path) from None
    except OSError as exc:
        raise InputError(f"cannot read file: {exc.strerror or exc}", file=path) from None
    rows = list(csv.reader(io.StringIO(text)))
    rows = [(i + 1, r) for i, r in enumerate(rows) if any(cell.strip() for cell in r)]
    if not rows:
        raise InputError("empty profile: expected a header line and one line per interval", file=path)
    head_line, header = rows[0]
    header = [h.strip() for h in header]
    if "hour" not in header:
        raise InputError("missing column 'hour'", file=path, line=head_line)
    seen = set()
    for h in header:
        if not h:
            raise InputError("empty column name", file=path, line=head_line)
        if h in seen:
            raise InputError(f"column {h!r} given twice", file=path, line=head_line)
        seen.add(h)
    factor_cols = [h for h in header if h not in RESERVED]
    if not factor_cols:
        raise InputError("no factor column (e.g. 'network')", file=path, line=head_line)
    if len(rows) < 2:
        raise InputError("no intervals after the header", file=path)
    idx = {h: k for k, h in enumerate(header)}
    T = len(rows) - 1
    start = np.empty(T)
    dur = np.ones(T)
    labels = [""] * T
    fac = np.empty((T, len(factor_cols)))
    for j, (lineno, r) in enumerate(rows[1:]):
        if len(r) != len(header):
            raise InputError(f"{len(r)} fields, the header has {len(header)}", file=path, line=lineno)

        def number(name, lo=None, hi=None, strict_lo=False):
            raw = r[idx[name]].strip()
            try:
                x = float(raw)
            except ValueError:
                raise InputError(f"cannot read {raw!r} as a number", file=path, line=lineno, field=name) from None
            if not math.isfinite(x):
                raise InputError(f"must be finite, got {raw!r}", file=path, line=lineno, field=name)
            if lo is not None and (x <= lo if strict_lo else x < lo):
                raise InputError(f"must be {'above' if strict_lo else 'at least'} {lo:g}, got {x:g}", file=path,
                                 line=lineno, field=name)
            if hi is not None and x > hi:
                raise InputError(f"must be at most {hi:g}, got {x:g}", file=path, line=lineno, field=name)
            return x

        start[j] = number("hour", 0.0, MAX_HOURS)
        if "duration_h" in idx:
            dur[j] = number("duration_h", 0.0, MAX_HOURS, strict_lo=True)
        if "when" in idx:
            labels[j] = r[idx["when"]].strip()
        for k, name in enumerate(factor_cols):
            fac[j, k] = number(name, 0.0, MAX_FACTOR)
        if j and start[j] < start[j - 1] + dur[j - 1] - 1e-9:
            raise InputError(f"interval starts at hour {start[j]:g}, before the previous one ends "
                             f"({start[j - 1] + dur[j - 1]:g})", file=path, line=lineno, field="hour")
        if start[j] + dur[j] > MAX_HOURS + 1e-9:
            raise InputError(f"interval ends after hour {MAX_HOURS:g} (one year at most)", file=path,
                             line=lineno, field="duration_h" if "duration_h" in idx else "hour")
    return LoadProfile(start, dur, labels, factor_cols, fac, str(path))


def profile_from_factors(factors, duration_h=1.0, column: str = "network") -> LoadProfile:
    """A whole-network profile from an array of factors (consecutive intervals from hour 0).

    >>> profile_from_factors([0.5, 0.8], duration_h=2.0).start_h.tolist()
    [0.0, 2.0]
    """
    f = np.asarray(factors, float).reshape(-1)
    d = np.broadcast_to(np.asarray(duration_h, float), f.shape).copy()
    start = np.concatenate([[0.0], np.cumsum(d)[:-1]])
    return LoadProfile(start, d, [""] * len(f), [column], f[:, None].copy())
