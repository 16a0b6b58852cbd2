"""Minimal readers of the raw test files into plain numpy arrays, and a dense Ybus.

Independent of ``planner``: own fixed-column parser of the IEEE Common Data Format
(column positions from the format definition, IEEE Trans. PAS-92(6), 1973) and an
own reader of the 33-bus feeder CSV files (Baran and Wu 1989).

Import layout: ``tests/`` is not a package; use ``from reference.raw_cases import ...``
with ``tests/`` on ``sys.path`` (``tests/test_reference.py`` does this), or
``from tests.reference.raw_cases import ...`` from the repo root.
"""
from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

DATA_DIR = Path(__file__).resolve().parent.parent / "data"

SLACK, PV, PQ = 3, 2, 0


@dataclass
class RawCase:
    """Bus and branch data as plain arrays (powers in pu on ``base_mva``).

    Bus arrays are indexed 0..n-1 in file order; ``bus`` holds the external numbers.
    Branch ``f`` is the tap side, ``t`` the impedance side (0-based indices).
    """

    name: str
    base_mva: float
    bus: np.ndarray
    btype: np.ndarray
    pd: np.ndarray
    qd: np.ndarray
    pg: np.ndarray
    qg: np.ndarray
    vset: np.ndarray      # setpoint of PV/slack buses, flat 1.0 elsewhere
    qmax: np.ndarray      # pu; +inf where no limit
    qmin: np.ndarray      # pu; -inf where no limit
    gs: np.ndarray
    bs: np.ndarray
    vfinal: np.ndarray    # published solution (CDF) or nan
    afinal_deg: np.ndarray
    f: np.ndarray
    t: np.ndarray
    r: np.ndarray
    x: np.ndarray
    b: np.ndarray
    ratio: np.ndarray     # 1.0 for lines
    shift_deg: np.ndarray

    @property
    def n(self) -> int:
        return len(self.bus)

    def index(self, number: int) -> int:
        """0-based position of external bus ``number``."""
        hits = np.flatnonzero(self.bus == number)
        if len(hits) != 1:
            raise KeyError(f"{self.name}: bus {number} not found")
        return int(hits[0])

    def ybus(self, extra_shunt: np.ndarray | None = None) -> np.ndarray:
        """Dense complex bus admittance matrix (pu), optionally with extra shunt admittance per bus."""
        y = build_ybus(self.n, self.f, self.t, self.r, self.x, self.b, self.ratio,
                       self.shift_deg, self.gs, self.bs)
        if extra_shunt is not None:
            y[np.diag_indices(self.n)] += extra_shunt
        return y


def build_ybus(n, f, t, r, x, b, ratio, shift_deg, gs, bs) -> np.ndarray:
    """Dense Ybus from branch data.

    Transformer with tap on bus i (f), impedance on bus j (t), a = t e^{j phi}:
    Y_ii += y/|a|^2 + jB/2, Y_jj += y + jB/2, Y_ij -= y/conj(a), Y_ji -= y/a.
    """
    y = np.zeros((n, n), dtype=complex)
    ys = 1.0 / (np.asarray(r) + 1j * np.asarray(x))
    a = np.asarray(ratio) * np.exp(1j * np.deg2rad(shift_deg))
    # Explicit accumulation (np.add.at) so parallel branches add up correctly.
    np.add.at(y, (f, f), ys / np.abs(a) ** 2 + 0.5j * b)
    np.add.at(y, (t, t), ys + 0.5j * b)
    np.add.at(y, (f, t), -ys / np.conj(a))
    np.add.at(y, (t, f), -ys / a)
    y[np.diag_indices(n)] += np.asarray(gs) + 1j * np.asarray(bs)
    return y


def _field(line: str, first: int, last: int, path, lineno: int, what: str) -> float:
    """Read 1-based inclusive columns as a float; blank (or beyond line end) reads as 0."""
    text = line[first - 1:last].strip()
    if not text:
        return 0.0
    try:
        return float(text)
    except ValueError:
        raise ValueError(f"{path}: line {lineno}: field '{what}' (columns {first}-{last}) "
                         f"is not a number: {text!r}") from None


def read_cdf(path: str | Path) -> RawCase:
    """Read an IEEE Common Data Format file (bus and branch sections only)."""
    path = Path(path)
    with open(path, newline="") as fh:
        lines = [ln.rstrip("\r\n") for ln in fh]
    base = None
    buses, branches = [], []
    section = None
    for k, line in enumerate(lines, start=1):
        if section is None:
            if line.startswith("BUS DATA FOLLOWS"):
                base = _field(lines[k - 2], 32, 37, path, k - 1, "MVA base")
                section = "bus"
            elif line.startswith("BRANCH DATA FOLLOWS"):
                section = "branch"
            continue
        if line.startswith("-999"):
            section = None
            continue
        if not line.strip():
            continue
        g = lambda a, b_, w: _field(line, a, b_, path, k, w)  # noqa: E731
        if section == "bus":
            buses.append((int(g(1, 4, "bus number")), int(g(25, 26, "type")),
                          g(28, 33, "final voltage"), g(34, 40, "final angle"),
                          g(41, 49, "load MW"), g(50, 59, "load Mvar"),
                          g(60, 67, "generation MW"), g(68, 75, "generation Mvar"),
                          g(85, 90, "desired voltage"), g(91, 98, "max Mvar"),
                          g(99, 106, "min Mvar"), g(107, 114, "shunt G"),
                          g(115, 122, "shunt B")))
        else:
            branches.append((int(g(1, 4, "tap bus")), int(g(6, 9, "Z bus")),
                             g(20, 29, "R"), g(30, 40, "X"), g(41, 50, "B"),
                             g(77, 82, "ratio"), g(84, 90, "shift")))
    if base is None or not buses or not branches:
        raise ValueError(f"{path}: missing title, bus or branch section")
    bd = np.array(buses, dtype=float)
    br = np.array(branches, dtype=float)
    num = bd[:, 0].astype(int)
    pos = {b_: i for i, b_ in enumerate(num)}
    btype = bd[:, 1].astype(int)
    gen = np.isin(btype, (PV, SLACK))
    vset = np.where(gen, bd[:, 8], 1.0)
    pv = btype == PV
    qmax = np.where(pv, bd[:, 9] / base, np.inf)
    qmin = np.where(pv, bd[:, 10] / base, -np.inf)
    ratio = np.where(br[:, 5] == 0.0, 1.0, br[:, 5])
    return RawCase(
        name=path.name, base_mva=base, bus=num, btype=btype,
        pd=bd[:, 4] / base, qd=bd[:, 5] / base, pg=bd[:, 6] / base, qg=bd[:, 7] / base,
        vset=vset, qmax=qmax, qmin=qmin, gs=bd[:, 11], bs=bd[:, 12],
        vfinal=bd[:, 2], afinal_deg=bd[:, 3],
        f=np.array([pos[int(v)] for v in br[:, 0]]), t=np.array([pos[int(v)] for v in br[:, 1]]),
        r=br[:, 2], x=br[:, 3], b=br[:, 4], ratio=ratio, shift_deg=br[:, 6])


def ieee14() -> RawCase:
    return read_cdf(DATA_DIR / "ieee14cdf.txt")


def ieee30() -> RawCase:
    return read_cdf(DATA_DIR / "ieee30cdf.txt")


def _read_csv(path: Path, fields):
    rows = []
    with open(path, newline="") as fh:
        reader = csv.DictReader(fh)
        for k, rec in enumerate(reader, start=2):
            try:
                rows.append([float(rec[c]) for c in fields])
            except (KeyError, TypeError, ValueError):
                raise ValueError(f"{path}: line {k}: bad or missing field among {fields}") from None
    return np.array(rows)


def feeder33(base_mva: float = 10.0, kv: float = 12.66) -> RawCase:
    """33-bus radial feeder (Baran and Wu 1989): 12.66 kV, bus 1 slack at 1.0 pu."""
    d = DATA_DIR / "feeder33"
    br = _read_csv(d / "branches.csv", ["from_bus", "to_bus", "r_ohm", "x_ohm"])
    ld = _read_csv(d / "loads.csv", ["bus", "kw", "kvar"])
    zbase = kv ** 2 / base_mva
    num = np.unique(np.concatenate([br[:, 0], br[:, 1]]).astype(int))
    pos = {b_: i for i, b_ in enumerate(num)}
    n, m = len(num), len(br)
    pd = np.zeros(n)
    qd = np.zeros(n)
    li = np.array([pos[int(v)] for v in ld[:, 0]])
    np.add.at(pd, li, ld[:, 1] / 1000.0 / base_mva)
    np.add.at(qd, li, ld[:, 2] / 1000.0 / base_mva)
    btype = np.full(n, PQ)
    btype[pos[1]] = SLACK
    z = np.zeros(n)
    return RawCase(
        name="feeder33", base_mva=base_mva, bus=num, btype=btype, pd=pd, qd=qd,
        pg=z.copy(), qg=z.copy(), vset=np.ones(n), qmax=np.full(n, np.inf), qmin=np.full(n, -np.inf),
        gs=z.copy(), bs=z.copy(), vfinal=np.full(n, np.nan), afinal_deg=np.full(n, np.nan),
        f=np.array([pos[int(v)] for v in br[:, 0]]), t=np.array([pos[int(v)] for v in br[:, 1]]),
        r=br[:, 2] / zbase, x=br[:, 3] / zbase, b=np.zeros(m), ratio=np.ones(m), shift_deg=np.zeros(m))
