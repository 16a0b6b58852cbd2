"""Batched backward/forward sweep load flow of the radial 33-bus feeder, and exhaustive
enumeration of capacitor units at one, two or three sites (three: about 6.6 million
cases, a benchmark rather than a test).

Independent of ``planner`` and of ``ac_opf``'s Newton method: a different algorithm
(branch-current sweep on the feeder tree) on the raw feeder data from ``raw_cases``.
Vectorised across cases; the loop over the 32 branches is kept (reference code,
not the tool's hot path).

Public functions
----------------
sweep_feeder33(mvar, tol)  -> batched load flow, mvar shape [cases, buses]
enumerate_feeder33(sites, unit_mvar, max_units) -> exhaustive best bank placement

Import layout: ``tests/`` is not a package; use ``from reference.sweep import ...``
with ``tests/`` on ``sys.path`` (``tests/test_reference.py`` does this), or
``from tests.reference.sweep import ...`` from the repo root.
"""
from __future__ import annotations

import itertools
import time

import numpy as np
from scipy.optimize import OptimizeResult

from .raw_cases import SLACK, feeder33


def _tree(case):
    """Parent of every bus and a root-first ordering of the non-root buses (radial network)."""
    n = case.n
    root = int(np.flatnonzero(case.btype == SLACK)[0])
    adj = [[] for _ in range(n)]
    for k, (a, b) in enumerate(zip(case.f, case.t)):
        adj[a].append((b, k))
        adj[b].append((a, k))
    parent = np.full(n, -1)
    pbranch = np.full(n, -1)
    order, stack, seen = [], [root], {root}
    while stack:
        u = stack.pop()
        for v, k in adj[u]:
            if v not in seen:
                seen.add(v)
                parent[v], pbranch[v] = u, k
                order.append(v)
                stack.append(v)
    if len(seen) != n or len(case.f) != n - 1:
        raise ValueError(f"{case.name}: network is not a single radial tree")
    return root, parent, pbranch, np.array(order)


def sweep_feeder33(mvar=None, tol=1e-10, max_iter=100, case=None):
    """Backward/forward sweep of the 33-bus feeder for many capacitor settings at once.

    ``mvar``: array [cases, buses] of shunt bank ratings (Mvar at 1.0 pu, injecting
    Q V^2, i.e. constant impedance), columns in bus order 1..33; None means one base case.
    Iterates until the largest voltage change of every case is below ``tol`` pu.

    Returns an OptimizeResult: v (complex, [cases, buses]), losses_kw [cases],
    vmin [cases], vmin_bus [cases], iterations, success.
    """
    case = feeder33() if case is None else case
    n = case.n
    q = np.zeros((1, n)) if mvar is None else np.atleast_2d(np.asarray(mvar, float))
    if q.shape[1] != n:
        raise ValueError(f"mvar must have {n} columns (one per bus), got {q.shape[1]}")
    root, parent, pbranch, order = _tree(case)
    z = case.r + 1j * case.x
    # Work in [buses, cases] so every per-bus row is contiguous.
    bsh = (q / case.base_mva).T                    # shunt susceptance, pu
    sload = (case.pd + 1j * case.qd)[:, None]
    v = np.ones((n, q.shape[0]), dtype=complex)
    ok = False
    for it in range(1, max_iter + 1):
        # Current drawn at each bus: constant-power load plus the bank (shunt j B draws +j B V, leading).
        cur = np.conj(sload / v) + 1j * bsh * v
        for u in order[::-1]:                      # leaves first: branch current = all current beyond it
            cur[parent[u]] += cur[u]
        vnew = np.empty_like(v)
        vnew[root] = 1.0
        for u in order:                            # root first: drop along each branch
            vnew[u] = vnew[parent[u]] - z[pbranch[u]] * cur[u]
        dv = np.max(np.abs(vnew - v))
        v = vnew
        if dv < tol:
            ok = True
            break
    # Losses from the converged state: I^2 R on every branch with the final voltages.
    cur = np.conj(sload / v) + 1j * bsh * v
    for u in order[::-1]:
        cur[parent[u]] += cur[u]
    rb = np.zeros(n)
    rb[order] = case.r[pbranch[order]]
    losses = (np.abs(cur[order]) ** 2 * rb[order, None]).sum(axis=0)
    vm = np.abs(v)
    k = np.argmin(vm, axis=0)
    return OptimizeResult(v=v.T, losses_kw=losses * case.base_mva * 1000.0, vmin=vm.min(axis=0),
                          vmin_bus=case.bus[k], iterations=it, success=ok, max_dv=float(dv))


def enumerate_feeder33(sites=1, unit_mvar=0.15, max_units=10, batch=20000, tol=1e-10):
    """Exhaustive search of bank placement on the 33-bus feeder.

    Every candidate bus (2..33), pair or triple of buses, every unit count 0..``max_units`` at each;
    bank = units * ``unit_mvar`` Mvar at 1.0 pu (constant impedance). Every case is
    converged by the batched sweep to a voltage change below ``tol``.

    Returns an OptimizeResult: buses (tuple), units (tuple), losses_kw, vmin, cases,
    time_s, base_losses_kw.
    """
    if sites not in (1, 2, 3):
        raise ValueError("sites must be 1, 2 or 3")
    t0 = time.perf_counter()
    case = feeder33()
    cand = [int(b) for b in case.bus if case.btype[case.index(int(b))] != SLACK]
    col = {b: case.index(b) for b in cand}
    units = np.arange(max_units + 1)
    combos = list(itertools.combinations(cand, sites))
    grid = np.array(list(itertools.product(units, repeat=sites)))      # [u^sites, sites]
    # Case table: bus pair index and unit counts, flattened.
    bus_cols = np.array([[col[b] for b in c] for c in combos])          # [combos, sites]
    ci = np.repeat(np.arange(len(combos)), len(grid))
    ui = np.tile(np.arange(len(grid)), len(combos))
    total = len(ci)
    losses = np.empty(total)
    vmin = np.empty(total)
    for s in range(0, total, batch):
        e = min(total, s + batch)
        q = np.zeros((e - s, case.n))
        rows = np.arange(e - s)
        for j in range(sites):
            q[rows, bus_cols[ci[s:e], j]] += grid[ui[s:e], j] * unit_mvar
        r = sweep_feeder33(q, tol=tol, case=case)
        if not r.success:
            raise RuntimeError("enumerate_feeder33: sweep did not converge")
        losses[s:e] = r.losses_kw
        vmin[s:e] = r.vmin
    best = int(np.argmin(losses))
    base = sweep_feeder33(case=case)
    return OptimizeResult(buses=combos[ci[best]], units=tuple(int(u) for u in grid[ui[best]]),
                          losses_kw=float(losses[best]), vmin=float(vmin[best]), cases=total,
                          time_s=time.perf_counter() - t0, base_losses_kw=float(base.losses_kw[0]))
