"""Check a network before anything is computed with it.

``validate(net)`` returns a list of problems, one line each, naming the record (table and id) and
the field, for example ``"lines '1-2': to_bus: unknown bus 99"``. ``check(net)`` raises
``NetworkError`` carrying that list when it is not empty.

Problems (the network cannot be solved as given): unknown bus kinds, duplicate bus or element ids
(line and transformer ids share one name space, as branches), elements on unknown buses, branches
from a bus to itself, zero-impedance branches, non-finite numbers, values outside the physical bounds of
``BOUNDS`` (negative resistance, base kV < 0 or > 2000, |x| > 100 pu, a base MVA outside
0.01-100,000, a setpoint outside 0.5-1.5 pu, q_min > q_max, negative or inconsistent bank steps,
ratio limits the wrong way round, bus numbers below 1, ...), no slack bus, an island (through in-service
branches) without a slack bus, and a slack or PV bus without an in-service generator.

Out-of-service elements are skipped: their ids must still be unique, but nothing else about them
is checked and an out-of-service branch connects nothing.

Warnings (worth a look, not an error) are returned after the problems, each starting
``"warning: "``, when ``validate(net, include_warnings=True)`` is called; ``check`` never raises on
them. They are: a bus left isolated with nothing connected to it (no load, generator, shunt),
an island with more than one slack bus (saying so when they hold different voltages or angles),
two generators on one bus with different setpoints (the first one is used), and buses whose
base kV is 0 (CDF for "not given"). :func:`model_warnings` returns the likely modelling
mistakes among them (not the base kV note) for the commands and the report to show.

>>> from planner.network.model import Network, make_table
>>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
...                                          {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0}]),
...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 5.0, "mvar": 1.0}]),
...     lines=make_table("lines", [{"line_id": "1-2", "from_bus": 1, "to_bus": 3, "r_pu": 0.0, "x_pu": 0.0}]))
>>> for p in validate(net): print(p)
lines '1-2': to_bus: unknown bus 3
lines '1-2': r_pu, x_pu: zero impedance (r = x = 0)
island of 1 bus with no slack bus: buses 2
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from planner.errors import NetworkError
from planner.network.model import BUS_KINDS, TABLES, Network

ID_COLUMN = {"buses": "bus", "loads": "load_id", "generators": "gen_id", "lines": "line_id",
             "transformers": "xfmr_id", "shunts": "shunt_id"}
_SHOW = 8   # buses named in an island message before "..."


def _rec(kind, rid) -> str:
    return f"{kind} {rid}" if kind == "buses" else f"{kind} {str(rid)!r}"


def _flag(out, kind, df, mask, field, message):
    """Add one problem per row of ``df`` where ``mask`` holds; ``message`` may be a callable of
    the row. Loops only over flagged rows."""
    mask = np.asarray(mask, dtype=bool)
    if not mask.any():
        return
    idcol = ID_COLUMN[kind]
    for _, row in df[mask].iterrows():
        text = message(row) if callable(message) else message
        out.append(f"{_rec(kind, row[idcol])}: {field}: {text}")


def _bus_list(buses) -> str:
    shown = ", ".join(str(b) for b in buses[:_SHOW])
    return shown + (f", ... ({len(buses)} buses)" if len(buses) > _SHOW else "")


# Physical bounds of every number a network carries: (table, column, low, high, unit, why).
# Wide enough for any real network from a low-voltage feeder to a continental grid, narrow enough
# that a typo (a sign, a unit off by 10^3, an exponent) is caught before it becomes an answer.
# Negative reactance is allowed: series capacitors (series compensation) and the star-point
# branches of three-winding transformer equivalents have it. Negative resistance is not: no
# passive branch generates power (it would show as negative losses).
BOUNDS = [
    ("buses", "bus", 1, 2**63 - 1, "", "bus numbers are whole numbers from 1"),
    ("buses", "base_kv", -np.inf, 2000.0, "kV", ""),     # negative: reported below
    ("buses", "v_min_pu", 0.0, 2.0, "pu", ""),
    ("buses", "v_max_pu", 0.0, 2.0, "pu", ""),
    ("buses", "shunt_draw_mw", -1e5, 1e5, "MW", ""),
    ("buses", "shunt_supply_mvar", -1e5, 1e5, "Mvar", ""),
    ("buses", "angle_deg", -360.0, 360.0, "deg", ""),
    ("loads", "mw", -1e6, 1e6, "MW", ""),
    ("loads", "mvar", -1e6, 1e6, "Mvar", ""),
    ("generators", "mw", -1e6, 1e6, "MW", ""),
    ("generators", "mvar", -1e6, 1e6, "Mvar", ""),
    ("generators", "q_min_mvar", -1e6, 1e6, "Mvar", ""),
    ("generators", "q_max_mvar", -1e6, 1e6, "Mvar", ""),
    ("lines", "r_pu", 0.0, np.inf, "pu", "negative resistance would make negative losses"),
    ("lines", "b_pu", -100.0, 100.0, "pu", ""),
    ("lines", "rating_mva", 0.0, 1e6, "MVA", "0 = no rating"),
    ("transformers", "r_pu", 0.0, np.inf, "pu", "negative resistance would make negative losses"),
    ("transformers", "b_pu", -100.0, 100.0, "pu", ""),
    ("transformers", "shift_deg", -180.0, 180.0, "deg", ""),
    ("transformers", "ratio_min_pu", 0.5, 1.5, "pu", ""),
    ("transformers", "ratio_max_pu", 0.5, 1.5, "pu", ""),
    ("transformers", "ratio_step_pu", 0.0, 0.5, "pu", "0 = continuous"),
    ("transformers", "rating_mva", 0.0, 1e6, "MVA", "0 = no rating"),
    ("shunts", "mvar_per_step", -1e5, 1e5, "Mvar", ""),
    ("shunts", "steps_max", 0, 1000, "", ""),
]
BASE_MVA_RANGE = (0.01, 1e5)     # MVA: from a 10 kVA study base to ten times a large grid's


def _bounds(problems, active):
    for kind, col, lo, hi, unit, why in BOUNDS:
        df = active[kind]
        if df.empty:
            continue
        x = df[col].to_numpy(dtype=float)
        bad = np.isfinite(x) & ((x < lo) | (x > hi))      # non-finite values are reported apart
        if col == "bus":
            bad = df[col].to_numpy() < lo                    # exact: int64 bus numbers
        u = f" {unit}" if unit else ""
        note = f" ({why})" if why else ""
        span = (f"below {lo:g}{u}" if hi >= 2**62 else f"above {hi:g}{u}" if lo == -np.inf
                else f"outside {lo:g} to {hi:g}{u}")
        _flag(problems, kind, df, bad, col,
              lambda r, c=col, u=u, note=note, span=span: f"{r[c]!r}{u} is {span}{note}")


def _problems_and_warnings(net: Network):
    """(problems, warnings, notes): warnings are likely modelling mistakes that a person should
    hear about; notes are facts of the format (CDF's base kV 0) that need no action."""
    problems, warns, notes = [], [], []
    if not (np.isfinite(net.base_mva) and net.base_mva > 0):
        problems.append(f"network: base_mva: must be a positive number, got {net.base_mva}")
    elif not BASE_MVA_RANGE[0] <= net.base_mva <= BASE_MVA_RANGE[1]:
        problems.append(f"network: base_mva: {net.base_mva:g} MVA is outside the plausible "
                        f"{BASE_MVA_RANGE[0]:g} to {BASE_MVA_RANGE[1]:g} MVA")
    b = net.buses
    if b.empty:
        problems.append("buses: no buses")
        return problems, warns, notes

    # Ids: unique within each table, and across lines and transformers (both are branches).
    for kind, idcol in ID_COLUMN.items():
        df = net.table(kind)
        dup = df[idcol].duplicated(keep="first").to_numpy()
        _flag(problems, kind, df, dup, idcol, "duplicate id")
    both = set(net.lines.line_id) & set(net.transformers.xfmr_id)
    _flag(problems, "transformers", net.transformers, net.transformers.xfmr_id.isin(both), "xfmr_id",
          "same id as a line (branch ids must be unique)")

    # Non-finite numbers in every float column of the records that are checked.
    active = {kind: (net.table(kind) if kind == "buses" else net.table(kind)[net.table(kind).energised])
              for kind in TABLES}
    for kind, cols in TABLES.items():
        df = active[kind]
        for c, t in cols.items():
            if t == "float64":
                _flag(problems, kind, df, ~np.isfinite(df[c].to_numpy(dtype=float)), c,
                      lambda r, c=c: f"not a finite number ({r[c]})")

    _bounds(problems, active)
    _flag(problems, "buses", b, ~b.kind.isin(BUS_KINDS), "kind",
          lambda r: f"unknown bus kind {r.kind!r} (expected PQ, PV or slack)")
    # base kV 0 is how CDF files say "not given" (the IEEE 14-bus file has it on every bus): the
    # per-unit data are still complete, so that is a warning; a negative base kV is an error.
    _flag(problems, "buses", b, b.base_kv < 0, "base_kv", lambda r: f"must be positive, got {r.base_kv}")
    no_kv = b.bus[b.base_kv == 0].tolist()
    if no_kv:
        notes.append(f"buses {_bus_list(no_kv)}: base_kv: not given (0); conversions to kV and ohms "
                     "are not available for them")
    _flag(problems, "buses", b, b.v_min_pu >= b.v_max_pu, "v_min_pu, v_max_pu",
          lambda r: f"lower limit {r.v_min_pu} is not below upper limit {r.v_max_pu}")
    _flag(problems, "buses", b, (b.v_pu <= 0) | (b.v_pu > 2), "v_pu",
          lambda r: f"stored voltage {r.v_pu} pu is not usable (0 < v <= 2)")

    known = set(b.bus.tolist())
    for kind in ("loads", "generators", "shunts"):
        df = active[kind]
        _flag(problems, kind, df, ~df.bus.isin(known), "bus", lambda r: f"unknown bus {r.bus}")
    for kind in ("lines", "transformers"):
        df = active[kind]
        for end in ("from_bus", "to_bus"):
            _flag(problems, kind, df, ~df[end].isin(known), end, lambda r, e=end: f"unknown bus {r[e]}")
        _flag(problems, kind, df, df.from_bus == df.to_bus, "from_bus, to_bus",
              lambda r: f"connects bus {r.from_bus} to itself")
        _flag(problems, kind, df, (df.r_pu == 0) & (df.x_pu == 0), "r_pu, x_pu", "zero impedance (r = x = 0)")
        for c in ("r_pu", "x_pu"):
            _flag(problems, kind, df, df[c].abs() > 100, c, lambda r, c=c: f"|{c}| = {abs(r[c])} pu is absurd (> 100)")
        _flag(problems, kind, df, df.rating_mva < 0, "rating_mva", lambda r: f"negative rating {r.rating_mva}")

    t = active["transformers"]
    _flag(problems, "transformers", t, ~(t.ratio_pu > 0.5) | (t.ratio_pu > 1.5), "ratio_pu",
          lambda r: f"ratio {r.ratio_pu} outside 0.5-1.5 pu")
    _flag(problems, "transformers", t, t.ratio_min_pu > t.ratio_max_pu, "ratio_min_pu, ratio_max_pu",
          lambda r: f"minimum {r.ratio_min_pu} is above maximum {r.ratio_max_pu}")
    _flag(problems, "transformers", t, t.ratio_step_pu < 0, "ratio_step_pu",
          lambda r: f"negative step {r.ratio_step_pu}")
    _flag(problems, "transformers", t, ~t.tap_side.isin(["from", "to"]), "tap_side",
          lambda r: f"must be 'from' or 'to', got {r.tap_side!r}")

    g = active["generators"]
    _flag(problems, "generators", g, (g.v_set_pu < 0.5) | (g.v_set_pu > 1.5), "v_set_pu",
          lambda r: f"setpoint {r.v_set_pu} pu outside 0.5-1.5")
    _flag(problems, "generators", g, g.q_min_mvar > g.q_max_mvar, "q_min_mvar, q_max_mvar",
          lambda r: f"q_min {r.q_min_mvar} is above q_max {r.q_max_mvar}")
    # Two generators on one bus hold one voltage: the first in-service one decides (compile).
    if len(g) > 1:
        first = g.groupby("bus", sort=False)[["gen_id", "v_set_pu"]].transform("first")
        differs = (g.v_set_pu - first.v_set_pu).abs().to_numpy() > 1e-9
        _flag(warns, "generators", g, differs, "v_set_pu",
              lambda r: f"setpoint {r.v_set_pu:g} pu differs from {first.loc[r.name, 'v_set_pu']:g} pu of "
                        f"generator {first.loc[r.name, 'gen_id']!r} on the same bus {r.bus}; the first one "
                        f"({first.loc[r.name, 'gen_id']!r}) is used")

    ld = active["loads"]
    for q in ("p", "q"):
        i, z = ld[f"{q}_share_i"], ld[f"{q}_share_z"]
        _flag(problems, "loads", ld, (i < 0) | (z < 0) | (i + z > 1), f"{q}_share_i, {q}_share_z",
              lambda r, q=q: f"shares {r[f'{q}_share_i']} and {r[f'{q}_share_z']} must be >= 0 with sum <= 1")

    s = active["shunts"]
    _flag(problems, "shunts", s, s.steps_max < 0, "steps_max", lambda r: f"negative steps {r.steps_max}")
    _flag(problems, "shunts", s, s.steps_on < 0, "steps_on", lambda r: f"negative steps {r.steps_on}")
    _flag(problems, "shunts", s, (s.steps_on > s.steps_max) & (s.steps_max >= 0), "steps_on",
          lambda r: f"{r.steps_on} steps on but only {r.steps_max} exist")

    # Buses that must hold voltage need a generator to do it.
    gen_buses = set(g.bus.tolist())
    for kind in ("slack", "PV"):
        _flag(problems, "buses", b, (b.kind == kind) & ~b.bus.isin(gen_buses), "kind",
              f"{kind} bus with no in-service generator")

    slack = (b.kind == "slack").to_numpy()
    if not slack.any():
        problems.append("buses: kind: no slack bus in the network")
    _islands(net, active, slack, problems, warns)
    return problems, warns, notes


def _islands(net, active, slack, problems, warns):
    b = net.buses
    bus_ids = b.bus.to_numpy()
    # Positions of each bus id (first occurrence if duplicated; duplicates are already reported).
    pos = pd.Series(np.arange(len(b)), index=bus_ids)
    pos = pos[~pos.index.duplicated()]
    ends = [active[k][["from_bus", "to_bus"]] for k in ("lines", "transformers")]
    br = pd.concat(ends, ignore_index=True)
    br = br[br.from_bus.isin(pos.index) & br.to_bus.isin(pos.index)]
    f, t = pos[br.from_bus].to_numpy(), pos[br.to_bus].to_numpy()
    n = len(b)
    graph = coo_matrix((np.ones(len(f)), (f, t)), shape=(n, n))
    ncomp, label = connected_components(graph, directed=False)

    attached = set()
    for k in ("loads", "generators", "shunts"):
        attached |= set(active[k].bus.tolist())
    has_fixed_shunt = ((b.shunt_draw_mw != 0) | (b.shunt_supply_mvar != 0)).to_numpy()
    slack_count = np.bincount(label, weights=slack.astype(float), minlength=ncomp)
    size = np.bincount(label, minlength=ncomp)
    for c in np.flatnonzero(slack_count == 0):
        members = bus_ids[label == c]
        if size[c] == 1 and members[0] not in attached and not has_fixed_shunt[label == c][0]:
            warns.append(f"buses {members[0]}: isolated bus with nothing connected to it")
            continue
        noun = "bus" if size[c] == 1 else "buses"
        problems.append(f"island of {size[c]} {noun} with no slack bus: buses {_bus_list(members)}")
    g = active["generators"]
    vset = g.groupby("bus", sort=False).v_set_pu.first()
    for c in np.flatnonzero(slack_count > 1):
        members = bus_ids[(label == c) & slack]
        volts = [float(vset.get(m, np.nan)) for m in members]
        angles = b.angle_deg.to_numpy(float)[(label == c) & slack]
        detail = []
        if np.nanmax(volts) - np.nanmin(volts) > 1e-9:
            detail.append("voltages " + ", ".join(f"{v:g}" for v in volts) + " pu")
        if angles.max() - angles.min() > 1e-9:
            detail.append("angles " + ", ".join(f"{a:g}" for a in angles) + " deg")
        tail = (f" at different {' and '.join(detail)}: they will exchange power to hold both"
                if detail else " (they share the balancing)")
        warns.append(f"island with {int(slack_count[c])} slack buses: {_bus_list(members)}{tail}")


def validate(net: Network, include_warnings: bool = False) -> list[str]:
    """Problems that stop the network being solved, one line each naming record and field.

    With ``include_warnings=True`` the warnings follow the problems, each starting ``"warning: "``.
    An empty list means the network is fit to compile.
    """
    problems, warns, notes = _problems_and_warnings(net)
    if include_warnings:
        problems = problems + [f"warning: {w}" for w in warns + notes]
    return problems


def model_warnings(net: Network) -> list[str]:
    """Legal but suspicious features of a network, one line each (no ``"warning: "`` prefix):
    the commands print them as warning lines and a report can list them. Empty when the
    network looks as intended. Notes about the format (base kV 0 in CDF files) are left out.

    >>> from planner.network.model import Network, make_table
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 11.0, "kind": "slack"},
    ...                                          {"bus": 2, "base_kv": 11.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "A", "bus": 1, "mw": 0.0, "v_set_pu": 1.02},
    ...                                          {"gen_id": "B", "bus": 1, "mw": 0.0, "v_set_pu": 1.05}]))
    >>> for w in model_warnings(net): print(w)
    generators 'B': v_set_pu: setpoint 1.05 pu differs from 1.02 pu of generator 'A' on the same bus 1; the first one ('A') is used
    buses 2: isolated bus with nothing connected to it
    """
    return _problems_and_warnings(net)[1]


def check(net: Network) -> Network:
    """Raise ``NetworkError`` listing every problem ``validate`` finds; return ``net`` if none.

    >>> from planner.network.model import Network
    >>> try:
    ...     check(Network())
    ... except NetworkError as e:
    ...     print(e)
    buses: no buses
    """
    problems = validate(net)
    if problems:
        raise NetworkError(problems, file=net.source or None)
    return net
