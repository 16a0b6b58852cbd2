"""Large synthetic test networks, for solver scaling tests and benchmarks.

Two generators:

* :func:`tiled_network` copies a real base network (the demo area or a standard test case)
  many times and joins neighbouring copies by high-voltage tie lines. Every copy keeps the
  base's realistic mix of voltage levels, transformers and loads.
* :func:`meshed_grid` builds a single-voltage 132 kV meshed grid of any size from nothing but
  a seed, with plants spread across it.

Both are reproducible: the same arguments and seed give identical tables.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.sparse.csgraph import minimum_spanning_tree
from scipy.spatial import cKDTree

from .model import TABLES, Network, make_table

# 132 kV overhead line per kilometre: common practice magnitudes for a single circuit
R_OHM_KM, X_OHM_KM, B_US_KM = 0.08, 0.40, 2.8
TIE_KM = (20.0, 60.0)
TIE_RATING_MVA = 150.0
LOSS_ALLOWANCE = 0.025   # share of load scheduled on top for losses, so little flows to the one slack
GRID_LOSS_SHARE = 0.014  # losses of meshed_grid cases are 1.3-2.0 % of load (measured, 100 to 20,000 buses)

# which columns hold bus ids, and which hold element ids, per table
_BUS_COLS = {"buses": ["bus"], "loads": ["bus"], "generators": ["bus"], "lines": ["from_bus", "to_bus"],
             "transformers": ["from_bus", "to_bus"], "shunts": ["bus"]}
_ID_COL = {"loads": "load_id", "generators": "gen_id", "lines": "line_id", "transformers": "xfmr_id",
           "shunts": "shunt_id"}


def _power_of_ten_above(x: int) -> int:
    """Smallest power of ten strictly greater than ``x`` (x >= 0)."""
    return 10 ** len(str(int(max(x, 0))))


def _line_pu(km, kv, base_mva, r_km=R_OHM_KM, x_km=X_OHM_KM, b_us_km=B_US_KM):
    """(r, x, b) in per unit of an overhead line of length ``km`` at ``kv``."""
    zb = kv * kv / base_mva
    return r_km * km / zb, x_km * km / zb, b_us_km * 1e-6 * km * zb


def tiled_network(base: Network, copies: int, *, ties_per_copy: int = 2, seed: int = 0) -> Network:
    """A large meshed network made of ``copies`` copies of ``base`` joined by tie lines.

    Copy ``k`` (``k = 0 .. copies-1``) renumbers bus ``b`` as ``k * offset + b``, where
    ``offset`` is the smallest power of ten above the largest bus id, so copy 0 keeps the base
    numbering. Element ids of copy ``k >= 1`` get the suffix ``/k``; areas are renumbered the
    same way as buses. Only copy 0 keeps its slack bus: in every other copy the slack becomes
    a PV bus whose plant schedules enough power to cover that copy's load (so the copies are
    roughly balanced and only losses flow to the one slack).

    Copies are laid out on a square grid, row by row; each copy ``k >= 1`` is joined to its
    west and north neighbours (those that exist) by ``ties_per_copy`` tie lines shared out in
    turn between them. A tie runs between two randomly drawn buses of the highest voltage
    level of the base, as a 20-60 km overhead line of that voltage (0.08 + j0.40 ohm/km).

    Raises ``ValueError`` if the base does not have exactly one slack bus, if ``copies < 1``
    or if ``ties_per_copy < 1`` with more than one copy.

    >>> from planner.network.synthetic import meshed_grid, tiled_network
    >>> big = tiled_network(meshed_grid(3, 4), copies=5)
    >>> len(big.buses), int((big.buses.kind == "slack").sum()), len(big.lines) - 5 * len(meshed_grid(3, 4).lines)
    (60, 1, 8)
    >>> int(big.buses.bus.max())
    412
    """
    copies = int(copies)
    if copies < 1:
        raise ValueError(f"copies must be at least 1, got {copies}")
    if copies > 1 and ties_per_copy < 1:
        raise ValueError(f"ties_per_copy must be at least 1 to join copies, got {ties_per_copy}")
    b = base.buses
    slack = b.bus[b.kind == "slack"].to_numpy()
    if len(slack) != 1:
        raise ValueError(f"base network must have exactly one slack bus, it has {len(slack)}")
    if b.empty:
        raise ValueError("base network has no buses")
    offset = _power_of_ten_above(int(b.bus.max()))
    area_offset = _power_of_ten_above(int(b.area.max()))
    k = np.arange(copies)

    tables = {}
    for kind in TABLES:
        src = base.table(kind)
        n = len(src)
        df = src.loc[np.tile(np.arange(n), copies)].reset_index(drop=True)
        kk = np.repeat(k, n)
        for col in _BUS_COLS[kind]:
            df[col] = kk * offset + df[col].to_numpy()
        if kind in _ID_COL:
            col = _ID_COL[kind]
            suffix = np.where(kk == 0, "", "/" + kk.astype(str).astype(object))
            df[col] = df[col].astype(str).to_numpy().astype(object) + suffix
        if kind == "buses":
            df["area"] = kk * area_offset + df["area"].to_numpy()
            suffix = np.where(kk == 0, "", " /" + kk.astype(str).astype(object))
            df["name"] = df["name"].astype(str).to_numpy().astype(object) + suffix
        tables[kind] = df

    # one slack: the others become PV with a plant scheduled to balance their copy
    buses = tables["buses"]
    other_slacks = (buses.kind == "slack").to_numpy() & (buses.bus.to_numpy() >= offset)
    buses.loc[other_slacks, "kind"] = "PV"
    g = base.generators[base.generators.energised]
    ld = base.loads[base.loads.energised]
    at_slack = g.bus.to_numpy() == slack[0]
    balance = float(ld.mw.sum() - g.mw[~at_slack].sum())
    gens = tables["generators"]
    gslack = (gens.bus.to_numpy() % offset == slack[0]) & (gens.bus.to_numpy() >= offset) \
        & gens.energised.to_numpy()
    n_at_slack = max(int(at_slack.sum()), 1)
    # a slack's stored output usually includes its copy's losses; otherwise allow some
    need = balance * (1.0 + LOSS_ALLOWANCE) / n_at_slack
    gens.loc[gslack, "mw"] = np.maximum(gens.loc[gslack, "mw"].to_numpy(), need)

    ties = _tie_lines(base, copies, offset, ties_per_copy, seed)
    tables["lines"] = pd.concat([tables["lines"], ties], ignore_index=True)
    name = f"{base.name or 'network'} x{copies}"
    return Network(base_mva=base.base_mva, name=name, **tables)


def _tie_lines(base: Network, copies: int, offset: int, ties_per_copy: int, seed: int) -> pd.DataFrame:
    """Tie lines between neighbouring copies (see :func:`tiled_network`)."""
    if copies < 2:
        return make_table("lines", [])
    rng = np.random.default_rng(seed)
    b = base.buses
    kv_top = float(b.base_kv.max())
    hv = b.bus[b.base_kv == kv_top].to_numpy()
    width = int(np.ceil(np.sqrt(copies)))
    k = np.arange(1, copies)
    west = np.where(k % width > 0, k - 1, -1)
    north = np.where(k >= width, k - width, -1)
    # neighbour of the j-th tie of copy k: alternate west / north, falling back to the one that exists
    j = np.arange(ties_per_copy)
    kk = np.repeat(k, ties_per_copy)
    jj = np.tile(j, len(k))
    w = np.repeat(west, ties_per_copy)
    nth = np.repeat(north, ties_per_copy)
    prefer_west = (jj % 2 == 0)
    nb = np.where(prefer_west, np.where(w >= 0, w, nth), np.where(nth >= 0, nth, w))
    from_bus = kk * offset + rng.choice(hv, size=len(kk))
    to_bus = nb * offset + rng.choice(hv, size=len(kk))
    km = rng.uniform(*TIE_KM, size=len(kk))
    if kv_top > 0:
        r, x, bch = _line_pu(km, kv_top, base.base_mva)
    else:  # no kV in the data: a modest impedance in per unit
        r, x, bch = 0.01 * km / 40, 0.05 * km / 40, 0.0 * km
    ids = np.char.add(np.char.add("TIE", kk.astype(str)), np.char.add("-", jj.astype(str)))
    return make_table("lines", pd.DataFrame({
        "line_id": ids.astype(object), "from_bus": from_bus, "to_bus": to_bus,
        "r_pu": np.round(r, 6), "x_pu": np.round(x, 6), "b_pu": np.round(bch, 6),
        "rating_mva": TIE_RATING_MVA, "energised": True}))


def ring_copies(base: Network, copies: int, *, ties_per_link: int = 1, slack_mw: float | None = None,
                tie_r_pu: float = 0.001, tie_x_pu: float = 0.01) -> Network:
    """``copies`` copies of ``base`` joined in a ring by short ties between the same buses.

    Copy ``k`` is joined to copy ``k + 1`` (and the last to the first) by ``ties_per_link``
    lossless-charging ties (``tie_r_pu + j tie_x_pu``, no charging) between the same bus numbers:
    the first ``ties_per_link`` buses, in bus order, of the highest voltage level of the base.
    Numbering and ids follow :func:`tiled_network`. Only copy 0 keeps the slack bus; in the other
    copies it becomes a PV bus whose generators produce ``slack_mw`` in all (shared equally), at
    the slack's setpoint and reactive limits. With ``slack_mw`` equal to the slack output of the
    base case's own solution, every copy balances by itself and the ring's solution is known:
    every copy has the voltages of the single case and no tie carries current. ``slack_mw=None``
    keeps the slack generators' stored output.

    >>> from planner.network.synthetic import meshed_grid, ring_copies
    >>> ring = ring_copies(meshed_grid(3, 4), copies=4, ties_per_link=2)
    >>> len(ring.buses), int((ring.buses.kind == "slack").sum()), len(ring.lines) - 4 * len(meshed_grid(3, 4).lines)
    (48, 1, 8)
    """
    copies = int(copies)
    if copies < 2:
        raise ValueError(f"a ring needs at least two copies, got {copies}")
    if ties_per_link < 1:
        raise ValueError(f"ties_per_link must be at least 1, got {ties_per_link}")
    b = base.buses
    slack = b.bus[b.kind == "slack"].to_numpy()
    if len(slack) != 1:
        raise ValueError(f"base network must have exactly one slack bus, it has {len(slack)}")
    big = tiled_network(base, copies, ties_per_copy=1)
    offset = _power_of_ten_above(int(b.bus.max()))
    # drop the grid ties of tiled_network: the ring has its own
    lines = big.lines[~big.lines.line_id.astype(str).str.startswith("TIE")]
    gens = big.generators
    at_slack = (gens.bus.to_numpy() % offset == slack[0]) & gens.energised.to_numpy()
    if slack_mw is not None:
        share = float(slack_mw) / max(int((base.generators.bus == slack[0]).sum()), 1)
        gens.loc[at_slack, "mw"] = share
    else:
        stored = base.generators.set_index("gen_id").mw
        gens.loc[at_slack, "mw"] = [stored[g.split("/")[0]] for g in gens.gen_id[at_slack]]
    top = b.bus[b.base_kv == b.base_kv.max()].sort_values().to_numpy()[:ties_per_link]
    k = np.arange(copies)
    nxt = (k + 1) % copies
    if copies == 2:
        k, nxt = k[:1], nxt[:1]
    kk = np.repeat(k, len(top))
    nn = np.repeat(nxt, len(top))
    tb = np.tile(top, len(k))
    ties = make_table("lines", pd.DataFrame({
        "line_id": [f"RING{a}-{z}/{t}" for a, z, t in zip(kk, nn, tb)],
        "from_bus": kk * offset + tb, "to_bus": nn * offset + tb,
        "r_pu": tie_r_pu, "x_pu": tie_x_pu, "b_pu": 0.0, "rating_mva": 0.0, "energised": True}))
    return Network(base_mva=base.base_mva, name=f"{base.name or 'network'} ring x{copies}",
                   buses=big.buses, loads=big.loads, generators=gens,
                   lines=pd.concat([lines, ties], ignore_index=True), transformers=big.transformers,
                   shunts=big.shunts)


def meshed_grid(rows: int, cols: int, seed: int = 0, *, load_scale: float = 1.0) -> Network:
    """A synthetic 132 kV meshed grid of ``rows x cols`` buses, reproducible from ``seed``.

    Buses sit on a rectangular lattice, numbered ``r * cols + c + 1`` row by row. Lines join
    lattice neighbours (15-45 km, 0.06-0.10 + j0.38-0.42 ohm/km, 150 MVA); about one in six
    of the lines outside a random spanning tree is left out and a few diagonals are added, so
    the mesh is irregular but always connected. A plant stands on roughly one bus in sixteen
    (a jittered coarse lattice) with 1.02-1.05 pu setpoints and reactive limits of -30 % /
    +60 % of its rating; the plant nearest the centre is the slack. About 85 % of the other
    buses carry a load of 4-30 MW at power factor 0.90-0.97, a third of them voltage
    dependent. Each plant is dispatched to cover the load of the buses nearest to it plus
    expected losses, with a rating 20-60 % above that output, so power flows stay regional and
    the slack takes up only the remainder, whatever the size of the grid.

    ``load_scale`` multiplies every load and every plant's dispatch and rating (the random
    draws are the same for every scale): above 1 the same grid carries heavier flows, voltages
    sag and more plants reach their reactive limits.

    >>> from planner.network.synthetic import meshed_grid
    >>> net = meshed_grid(4, 5, seed=1)
    >>> len(net.buses), int((net.buses.kind == "slack").sum())
    (20, 1)
    >>> bool(net.generators.mw.sum() >= 0.9 * net.loads.mw.sum())
    True
    """
    rows, cols = int(rows), int(cols)
    if rows < 1 or cols < 1 or rows * cols < 2:
        raise ValueError(f"meshed_grid needs at least two buses, got {rows} x {cols}")
    rng = np.random.default_rng(seed)
    kv, base_mva = 132.0, 100.0
    n = rows * cols
    r_of, c_of = np.divmod(np.arange(n), cols)
    bus_ids = np.arange(1, n + 1)

    # lattice edges: horizontal, vertical, and a sprinkling of diagonals
    idx = np.arange(n).reshape(rows, cols)
    edges = [np.c_[idx[:, :-1].ravel(), idx[:, 1:].ravel()], np.c_[idx[:-1, :].ravel(), idx[1:, :].ravel()]]
    diag = np.c_[idx[:-1, :-1].ravel(), idx[1:, 1:].ravel()]
    edges.append(diag[rng.random(len(diag)) < 0.05])
    e = np.concatenate(edges)
    # keep a random spanning tree, drop some of the rest
    wts = rng.random(len(e)) + 1e-3
    g = sp.coo_matrix((wts, (e[:, 0], e[:, 1])), shape=(n, n)).tocsr()
    tree = minimum_spanning_tree(g).tocoo()
    in_tree = set(zip(np.minimum(tree.row, tree.col).tolist(), np.maximum(tree.row, tree.col).tolist()))
    key = list(zip(np.minimum(e[:, 0], e[:, 1]).tolist(), np.maximum(e[:, 0], e[:, 1]).tolist()))
    keep = np.array([kk in in_tree for kk in key]) | (rng.random(len(e)) > 1 / 6)
    e = e[keep]
    km = rng.uniform(15.0, 45.0, len(e)) * np.where(e[:, 1] - e[:, 0] == cols + 1, np.sqrt(2), 1.0)
    r, x, b = _line_pu(km, kv, base_mva, r_km=rng.uniform(0.06, 0.10, len(e)),
                       x_km=rng.uniform(0.38, 0.42, len(e)), b_us_km=rng.uniform(2.6, 3.0, len(e)))
    lines = pd.DataFrame({"line_id": [f"L{bus_ids[a]}-{bus_ids[z]}" for a, z in e],
                          "from_bus": bus_ids[e[:, 0]], "to_bus": bus_ids[e[:, 1]],
                          "r_pu": np.round(r, 6), "x_pu": np.round(x, 6), "b_pu": np.round(b, 6),
                          "rating_mva": 150.0})

    # plants on a jittered coarse lattice (every 4th row and column)
    gr = np.arange(min(2, rows - 1), rows, 4)
    gc = np.arange(min(2, cols - 1), cols, 4)
    pr, pc = np.meshgrid(gr, gc, indexing="ij")
    pr = np.clip(pr.ravel() + rng.integers(-1, 2, pr.size), 0, rows - 1)
    pc = np.clip(pc.ravel() + rng.integers(-1, 2, pc.size), 0, cols - 1)
    gbus = np.unique(pr * cols + pc)
    centre = np.argmin((r_of[gbus] - (rows - 1) / 2) ** 2 + (c_of[gbus] - (cols - 1) / 2) ** 2)

    # loads on most non-plant buses
    is_gen = np.zeros(n, bool)
    is_gen[gbus] = True
    has_load = ~is_gen & (rng.random(n) < 0.85)
    if not has_load.any():
        has_load[np.flatnonzero(~is_gen)[:1]] = True
    lb = np.flatnonzero(has_load)
    p = np.round(rng.uniform(4.0, 30.0, len(lb)), 2)
    pf = rng.uniform(0.90, 0.97, len(lb))
    q = np.round(p * np.tan(np.arccos(pf)), 2)
    zip_ = rng.random(len(lb)) < 1 / 3
    loads = pd.DataFrame({"load_id": [f"D{bus_ids[i]}" for i in lb], "bus": bus_ids[lb], "mw": p, "mvar": q,
                          "p_share_i": np.where(zip_, 0.3, 0.0), "p_share_z": np.where(zip_, 0.2, 0.0),
                          "q_share_i": np.where(zip_, 0.1, 0.0), "q_share_z": np.where(zip_, 0.5, 0.0)})

    # each plant covers the load of the buses nearest to it (plus expected losses), so flows
    # stay regional and any size of grid solves; ratings leave 20-60 % headroom
    if not (np.isfinite(load_scale) and load_scale > 0):
        raise ValueError(f"load_scale must be a positive number, got {load_scale}")
    if load_scale != 1.0:
        p = np.round(p * load_scale, 3)
        q = np.round(q * load_scale, 3)
        loads["mw"], loads["mvar"] = p, q
    nearest = cKDTree(np.c_[r_of[gbus], c_of[gbus]]).query(np.c_[r_of[lb], c_of[lb]])[1]
    pg = np.bincount(nearest, p, len(gbus)) * (1.0 + GRID_LOSS_SHARE)
    rating = pg * rng.uniform(1.2, 1.6, len(gbus)) + 10.0
    pg = np.round(pg, 2)
    gens = pd.DataFrame({"gen_id": [f"G{bus_ids[i]}" for i in gbus], "bus": bus_ids[gbus], "mw": pg,
                         "v_set_pu": np.round(rng.uniform(1.02, 1.05, len(gbus)), 3),
                         "q_min_mvar": np.round(-0.3 * rating, 1), "q_max_mvar": np.round(0.6 * rating, 1)})
    kind = np.full(n, "PQ", dtype=object)
    kind[gbus] = "PV"
    kind[gbus[centre]] = "slack"
    buses = pd.DataFrame({"bus": bus_ids, "name": [f"Grid {rr + 1}-{cc + 1}" for rr, cc in zip(r_of, c_of)],
                          "base_kv": kv, "kind": kind, "v_min_pu": 0.95, "v_max_pu": 1.05,
                          "area": 1 + (r_of // 8) * (1 + (cols - 1) // 8) + c_of // 8})
    return Network(base_mva=base_mva, name=f"synthetic grid {rows}x{cols} (seed {seed})",
                   buses=buses, loads=loads, generators=gens, lines=lines)
