"""Hourly AC verification: one load flow per profile interval, banks following a control rule.

Public functions
----------------
* :func:`verify_hours` - the core: compiled level cases (the plan's settings at each level, loads
  as in the network file), a factor per interval and bus, and bank controls; returns an
  :class:`HourlyResult`.
* :func:`verify_profile` - the same for one network and a :class:`~planner.hourly.profile.LoadProfile`
  (no plan: every interval uses the network as given, switched banks by a voltage rule or fixed).

Control rules for switched banks
--------------------------------
* ``"schedule"``: each interval takes the steps of its load level (the plan's per-level schedule
  mapped to the hours of each level).
* :class:`VoltageRule`: on/off control by the bank bus voltage. After each interval the
  controller compares the voltage with the band: below ``v_on_pu`` for at least ``delay_h``
  hours in a row switches one step in, above ``v_off_pu`` as long switches one out (within the
  bank's steps); the change applies from the next interval.

Modelling choices: loads scale with the factor (all ZIP parts alike); generators other than the
slack keep their schedule and the slack takes up the change, as at the study's load levels.
Under the schedule rule the intervals are solved in blocks (:mod:`planner.hourly.batch`: bins of
nearby load share one factorised reference Jacobian, chord steps to the load flow's tolerance, a
full Newton-Raphson solve for any interval a block does not accept); every interval's answer
depends only on the profile, never on how the work is split. Under the voltage rule each interval
is one Newton-Raphson solve warm-started from the one before, reusing the Jacobian ordering.

>>> from planner.network.model import Network, make_table
>>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 33.0, "kind": "slack"},
...                                          {"bus": 2, "base_kv": 33.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "G", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}]),
...     loads=make_table("loads", [{"load_id": "D", "bus": 2, "mw": 20.0, "mvar": 10.0}]),
...     lines=make_table("lines", [{"line_id": "L", "from_bus": 1, "to_bus": 2, "r_pu": 0.05, "x_pu": 0.2}]),
...     shunts=make_table("shunts", [{"shunt_id": "C2", "bus": 2, "mvar_per_step": 2.0, "steps_max": 3,
...                                   "steps_on": 0, "switchable": True}]))
>>> from planner.hourly.profile import profile_from_factors
>>> res = verify_profile(net, profile_from_factors([0.5, 1.0, 1.0, 1.0, 0.5, 0.5]), band=(0.97, 1.05),
...                      rule=VoltageRule(v_on_pu=0.97, v_off_pu=0.985, delay_h=1))
>>> res
HourlyResult(status=outside_band, intervals=6, energy_loss_mwh=0.9441, hours_outside_band=1)
>>> res.intervals["steps C2"].tolist(), res.banks.operations.tolist()
([0, 0, 1, 1, 1, 0], [2])
"""
from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..network.compile import compile_network
from ..network.model import Network
from ..sweep.repeated import RepeatedFlow
from .batch import ChordSystem, block_columns, block_plan, solve_block
from .profile import LoadProfile


class HourlyStatus(enum.Enum):
    """Outcome of an hourly verification.

    ``WITHIN_BAND``: every interval solved and every bus inside its band. ``OUTSIDE_BAND``: every
    interval solved, some with a bus outside the band. ``FAILED_INTERVALS``: some intervals have
    no load-flow solution (listed in the interval table with their worst bus and mismatch).
    """
    WITHIN_BAND = "within_band"
    OUTSIDE_BAND = "outside_band"
    FAILED_INTERVALS = "failed_intervals"


@dataclass(frozen=True)
class VoltageRule:
    """Voltage-controlled on/off switching (see module docstring)."""
    v_on_pu: float = 0.97
    v_off_pu: float = 1.03
    delay_h: float = 1.0

    def __post_init__(self):
        if not self.v_on_pu < self.v_off_pu:
            raise ValueError(f"voltage rule: v_on_pu {self.v_on_pu} must be below v_off_pu {self.v_off_pu}")
        if self.delay_h < 0:
            raise ValueError(f"voltage rule: delay_h must be at least 0, got {self.delay_h}")


@dataclass(frozen=True)
class BankControl:
    """A switched bank: ``steps_by_level`` are its steps in each level case (as compiled); the
    controller keeps the steps within ``steps_min`` .. ``steps_max``."""
    bank_id: str
    bus: int
    mvar_per_step: float
    steps_max: int
    steps_by_level: tuple
    steps_min: int = 0


@dataclass
class HourlyResult:
    """Result of :func:`verify_hours`. ``intervals``: one row per interval; ``banks``: switching
    operations per bank over the profile; ``energy_loss_mwh``: the sum over the intervals of
    losses x duration; ``level_estimate_mwh``: level losses x level hours, when level cases were
    solved at their own factors (NaN otherwise)."""
    success: bool
    status: HourlyStatus
    message: str
    intervals: pd.DataFrame
    banks: pd.DataFrame
    energy_loss_mwh: float
    level_estimate_mwh: float
    hours_outside_band: float
    lowest: dict = field(default_factory=dict)     # {"v_pu", "bus", "when"}
    highest: dict = field(default_factory=dict)
    iterations: int = 0

    def __repr__(self):
        return (f"HourlyResult(status={self.status.value}, intervals={len(self.intervals)}, "
                f"energy_loss_mwh={self.energy_loss_mwh:.4f}, hours_outside_band={self.hours_outside_band:g})")

    def to_frames(self) -> dict:
        return {"hourly_intervals": self.intervals.copy(), "hourly_banks": self.banks.copy()}

    def duration_curves(self) -> pd.DataFrame:
        """Loss-duration and voltage-duration curves: losses and lowest voltage sorted (losses
        descending, voltage ascending) against cumulative hours."""
        iv = self.intervals
        lo = iv.sort_values("losses_mw", ascending=False, kind="stable")
        vo = iv.sort_values("v_min_pu", ascending=True, kind="stable")
        return pd.DataFrame({"hours": lo.duration_h.cumsum().to_numpy(), "losses_mw": lo.losses_mw.to_numpy(),
                             "hours_v": vo.duration_h.cumsum().to_numpy(), "v_min_pu": vo.v_min_pu.to_numpy()})


def _span(rfs, factors, level_of, banks, steps, lo, hi, first, last, start_sol=None, keep_last=False, cache=None):
    """Solve intervals ``first .. last-1`` with fixed bank steps (``steps[t, b]``); returns
    per-interval arrays (and, with ``keep_last``, the last solution). Stateless apart from the
    warm start, so spans can run anywhere."""
    c = rfs[0].c
    T = last - first
    out = {k: np.empty(T) for k in ("losses_mw", "v_min_pu", "v_max_pu", "mismatch_mva")}
    out.update({k: np.empty(T, np.int64) for k in ("v_min_bus", "v_max_bus", "iterations", "worst_bus",
                                                    "status")})
    prev = [start_sol] * len(rfs)
    cache = {} if cache is None else cache       # bank arrays and shunt changes, kept across calls
    if "bus_idx" not in cache:
        cache["bus_idx"] = np.array([c.index_of([b.bus])[0] for b in banks], np.int64) if banks else np.zeros(0, np.int64)
        cache["step_pu"] = np.array([b.mvar_per_step for b in banks]) / c.base_mva if banks else np.zeros(0)
        cache["level_steps"] = np.array([b.steps_by_level for b in banks], np.int64).T if banks else None
    bus_idx, step_pu = cache["bus_idx"], cache["step_pu"]
    ysh_cache = cache.setdefault("ysh", {})
    for j, t in enumerate(range(first, last)):
        l = int(level_of[t])
        rf = rfs[l]
        delta = None
        if len(banks):
            d = steps[t] - cache["level_steps"][l]
            if d.any():
                key = (l, d.tobytes())
                delta = ysh_cache.get(key)
                if delta is None:
                    delta = np.zeros(c.n, complex)
                    np.add.at(delta, bus_idx, 1j * d * step_pu)
                    ysh_cache[key] = delta
        sol = rf.solve(load_scale=factors[t], ysh_delta=delta, start=prev[l])
        if sol.success:
            prev[l] = sol
        _record(out, j, sol, rf.c, lo, hi)
    return (out, sol) if keep_last else out


def _hour_chunk(shared, bins):
    """Bins of intervals on a worker (see :func:`_solve_bins`); repeated-flow structures are
    built once per worker and kept in ``shared``."""
    rfs = shared.get("_rfs")
    if rfs is None:
        rfs = shared["_rfs"] = [RepeatedFlow(c) for c in shared["cases"]]
    return _solve_bins(rfs, shared["factors"], shared["level_of"], shared["setup"], shared["lo"], shared["hi"],
                       bins)


REFERENCE_ROUNDS = 3     # references per bin at most (the first, then for the hours it left)


def _schedule_setup(rfs, factors, level_of, banks, steps, base_sol):
    """Bins of intervals and their reference solutions, worked out once before any chunking so
    that every interval's answer depends only on the profile (not on chunks or workers).

    Intervals are grouped by level and bank steps (a bank step changes the admittance matrix),
    then binned by mean load factor (:func:`planner.hourly.batch.block_plan`); each bin's
    reference hour is solved by the full Newton-Raphson load flow."""
    c = rfs[0].c
    T = len(level_of)
    if banks:
        bus_idx = np.array([c.index_of([b.bus])[0] for b in banks], np.int64)
        step_pu = np.array([b.mvar_per_step for b in banks]) / c.base_mva
        level_steps = np.array([b.steps_by_level for b in banks], np.int64).T
        d = steps - level_steps[level_of]
    else:
        d = np.zeros((T, 0), np.int64)
    _, group = np.unique(np.column_stack([level_of, d]), axis=0, return_inverse=True)
    bin_of, ref_hours = block_plan(factors, group.reshape(-1))
    refs, deltas = [], []
    for t in ref_hours:
        l = int(level_of[t])
        delta = None
        if d.shape[1] and d[t].any():
            delta = np.zeros(c.n, complex)
            np.add.at(delta, bus_idx, 1j * d[t] * step_pu)
        sol = rfs[l].solve(load_scale=factors[t], ysh_delta=delta, start=base_sol)
        if not sol.success:
            cold = rfs[l].solve(load_scale=factors[t], ysh_delta=delta)
            sol = cold if cold.success else sol
        refs.append(sol)
        deltas.append(delta)
    return dict(bin_of=bin_of, ref_hours=ref_hours, refs=refs, deltas=deltas, base=base_sol)


def _bin_tasks(setup, chunk_size):
    """Consecutive bins packed into tasks of about ``chunk_size`` intervals (whole bins, so a bin
    is solved by the same arithmetic whichever way the work is split)."""
    sizes = np.bincount(setup["bin_of"], minlength=len(setup["ref_hours"]))
    tasks, now, count = [], [], 0
    for b, k in enumerate(sizes):
        now.append(b)
        count += int(k)
        if count >= chunk_size:
            tasks.append(now)
            now, count = [], 0
    if now:
        tasks.append(now)
    return tasks


def _empty_out(T):
    out = {k: np.empty(T) for k in ("losses_mw", "v_min_pu", "v_max_pu", "mismatch_mva")}
    out.update({k: np.empty(T, np.int64) for k in ("v_min_bus", "v_max_bus", "iterations", "worst_bus",
                                                    "status")})
    out["_outside"] = np.zeros(T, bool)
    return out


def _solve_bins(rfs, factors, level_of, setup, lo, hi, bins):
    """The intervals of ``bins``: chord blocks from each bin's reference, a full Newton solve for
    intervals the block does not accept. Returns ``(hours, out)`` (interval indices, arrays)."""
    bin_of = setup["bin_of"]
    hours = np.flatnonzero(np.isin(bin_of, bins))
    out = _empty_out(len(hours))
    pos = {int(t): j for j, t in enumerate(hours)}
    n = rfs[0].c.n
    for b in bins:
        mine = np.flatnonzero(bin_of == b)
        if not len(mine):
            continue
        rf = rfs[int(level_of[mine[0]])]
        ref, delta = setup["refs"][b], setup["deltas"][b]
        ref_hour = setup["ref_hours"][b]
        y = rf.y0 if delta is None else rf.y_with(ysh_delta=delta)
        pending = mine
        step = block_columns(n)
        # the hours a reference's blocks do not accept (most often: a generator on the other
        # side of its reactive limit) get a reference of their own, their median hour, a few times
        for round_ in range(REFERENCE_ROUNDS):
            if not ref.success or not len(pending):
                break
            system = ChordSystem(rf, y, ref, factors[ref_hour])
            rejected = []
            for a in range(0, len(pending), step):
                block = pending[a:a + step]
                blk = solve_block(rf, y, ref, factors[block], system=system)
                _record_block(out, np.array([pos[int(t)] for t in block]), blk, rf.c, lo, hi)
                rejected.extend(block[~blk.accepted].tolist())
            if len(rejected) == len(pending):
                break                                   # no progress: one solve per hour
            pending = np.array(rejected, np.int64)
            if len(pending) and round_ + 1 < REFERENCE_ROUNDS:
                mean = factors[pending].mean(axis=1)
                ref_hour = int(pending[np.argsort(mean, kind="stable")[(len(pending) - 1) // 2]])
                ref = rf.solve(load_scale=factors[ref_hour], ysh_delta=delta, start=ref)
        start = ref if ref.success else (setup["refs"][b] if setup["refs"][b].success else setup["base"])
        for t in pending:
            sol = rf.solve(load_scale=factors[t], ysh_delta=delta, start=start)
            _record(out, pos[int(t)], sol, rf.c, lo, hi)
    return hours, out


def _record_block(out, idx, blk, c, lo, hi):
    """Record the accepted intervals of a chord block (columns of ``blk``) at rows ``idx``."""
    ok = blk.accepted
    idx, cols = idx[ok], np.flatnonzero(ok)
    if not len(cols):
        return
    live = np.flatnonzero(c.alive)
    vm = np.abs(blk.v[np.ix_(live, cols)])
    a, b = np.argmin(vm, axis=0), np.argmax(vm, axis=0)
    k = np.arange(len(cols))
    out["losses_mw"][idx] = blk.losses_mw[cols]
    out["v_min_pu"][idx] = vm[a, k]
    out["v_max_pu"][idx] = vm[b, k]
    out["v_min_bus"][idx] = c.bus_ids[live[a]]
    out["v_max_bus"][idx] = c.bus_ids[live[b]]
    out["iterations"][idx] = blk.iterations[cols]
    out["worst_bus"][idx] = blk.worst_bus[cols]
    out["mismatch_mva"][idx] = blk.mismatch_mva[cols]
    out["status"][idx] = 0
    out["_outside"][idx] = ((vm < lo[live, None] - 1e-9) | (vm > hi[live, None] + 1e-9)).any(axis=0)


def _record(out, j, sol, c, lo, hi):
    vm = np.abs(sol.v)
    alive = c.alive
    live = np.flatnonzero(alive)
    a, b = live[np.argmin(vm[live])], live[np.argmax(vm[live])]
    out["losses_mw"][j] = sol.losses_mw if sol.success else np.nan
    out["v_min_pu"][j] = vm[a] if sol.success else np.nan
    out["v_max_pu"][j] = vm[b] if sol.success else np.nan
    out["v_min_bus"][j] = c.bus_ids[a]
    out["v_max_bus"][j] = c.bus_ids[b]
    out["iterations"][j] = sol.iterations
    out["worst_bus"][j] = sol.worst_bus
    out["mismatch_mva"][j] = sol.worst_mismatch_mva
    out["status"][j] = sol.status
    out.setdefault("_outside", np.zeros(len(out["losses_mw"]), bool))[j] = sol.success and bool(
        ((vm[live] < lo[live] - 1e-9) | (vm[live] > hi[live] + 1e-9)).any())


def verify_hours(cases, factors, level_of, duration_h, *, band, banks=(), rule="schedule", labels=None,
                 start_h=None, level_factors=None, where: str | None = None, chunk_size: int = 400,
                 progress=None, client=None) -> HourlyResult:
    """Hourly verification of level cases over a profile.

    Parameters
    ----------
    cases : list of Compiled
        One per load level, with the plan's settings of that level and loads as in the network
        file (factor 1); all share one bus order.
    factors : ndarray [T, n]
        Load factor per interval and bus.
    level_of : ndarray [T]
        Level index of each interval.
    duration_h : ndarray [T]
    band : (lo, hi) floats or per-bus arrays
    banks : list of BankControl
    rule : "schedule" or VoltageRule
    labels, start_h : per-interval texts and start hours, for the tables.
    level_factors : ndarray [L, n], optional
        Each level's own factors; the level cases are solved at them for the level-based estimate.
    where, chunk_size, progress, client
        With the schedule rule, run the bins of intervals as tasks of about ``chunk_size``
        intervals (whole bins) through :func:`planner.sweep.engine.run_chunks` (``where`` =
        "serial", "local" or a Dask scheduler address); default: every bin in this process. Every
        choice gives identical numbers (the bins and their references are fixed before the split).
        The voltage rule is sequential by nature and always runs in this process.
    """
    cases = list(cases)
    factors = np.asarray(factors, float)
    T, n = factors.shape
    level_of = np.asarray(level_of, np.int64)
    duration_h = np.asarray(duration_h, float)
    lo = np.broadcast_to(np.asarray(band[0], float), (n,))
    hi = np.broadcast_to(np.asarray(band[1], float), (n,))
    banks = list(banks)
    rfs = [RepeatedFlow(c) for c in cases]
    base_sol = rfs[0].solve(load_scale=factors[0])
    if isinstance(rule, VoltageRule):
        out, steps = _voltage_controlled(rfs, factors, level_of, duration_h, banks, rule, lo, hi, base_sol)
    elif rule == "schedule":
        steps = np.array([[b.steps_by_level[l] for b in banks] for l in level_of], np.int64).reshape(T, len(banks))
        setup = _schedule_setup(rfs, factors, level_of, banks, steps, base_sol)
        tasks = _bin_tasks(setup, chunk_size)
        if where is None and client is None:
            parts = [_solve_bins(rfs, factors, level_of, setup, lo, hi, range(len(setup["ref_hours"])))]
        else:
            from ..sweep.engine import run_chunks
            shared = dict(cases=cases, factors=factors, level_of=level_of, setup=setup, lo=lo, hi=hi)
            parts = run_chunks(_hour_chunk, tasks, shared=shared, where=where or "local", progress=progress,
                               client=client)
        out = _empty_out(T)
        for hrs, part in parts:
            for k in out:
                out[k][hrs] = part[k]
    else:
        raise ValueError(f"unknown control rule {rule!r}: use 'schedule' or a VoltageRule")
    labels = list(labels) if labels is not None else [""] * T
    start_h = np.asarray(start_h, float) if start_h is not None else np.concatenate([[0.0], np.cumsum(duration_h)[:-1]])
    when = [labels[t] or f"hour {start_h[t]:g}" for t in range(T)]
    ok = out["status"] == 0
    iv = pd.DataFrame({
        "start_h": start_h, "duration_h": duration_h, "when": when, "level": level_of,
        "converged": ok, "losses_mw": out["losses_mw"], "energy_mwh": out["losses_mw"] * duration_h,
        "v_min_pu": out["v_min_pu"], "v_min_bus": out["v_min_bus"], "v_max_pu": out["v_max_pu"],
        "v_max_bus": out["v_max_bus"], "outside_band": out["_outside"], "iterations": out["iterations"],
        "worst_bus": np.where(ok, -1, out["worst_bus"]), "mismatch_mva": np.where(ok, 0.0, out["mismatch_mva"]),
    })
    for b_i, b in enumerate(banks):
        iv[f"steps {b.bank_id}"] = steps[:, b_i]
    ops = np.abs(np.diff(steps, axis=0)).sum(axis=0) if T > 1 and len(banks) else np.zeros(len(banks), np.int64)
    bank_tab = pd.DataFrame({"bank_id": [b.bank_id for b in banks], "bus": [b.bus for b in banks],
                             "mvar_per_step": [b.mvar_per_step for b in banks],
                             "operations": np.asarray(ops, np.int64),
                             "operations_per_year": np.asarray(ops, float) * 8760.0 / max(duration_h.sum(), 1e-9)})
    energy = float(np.nansum(iv.energy_mwh[ok]))
    estimate = np.nan
    if level_factors is not None:
        lf = np.asarray(level_factors, float)
        estimate = 0.0
        for l, rf in enumerate(rfs):
            hours = float(duration_h[level_of == l].sum())
            if hours:
                estimate += rf.solve(load_scale=lf[l], start=base_sol).losses_mw * hours
    res = HourlyResult(True, HourlyStatus.WITHIN_BAND, "", iv, bank_tab, energy, estimate,
                       float(duration_h[iv.outside_band.to_numpy()].sum()), iterations=int(out["iterations"].sum()))
    if ok.any():
        k = int(np.nanargmin(np.where(ok, iv.v_min_pu, np.inf)))
        res.lowest = {"v_pu": float(iv.v_min_pu[k]), "bus": int(iv.v_min_bus[k]), "when": when[k]}
        k = int(np.nanargmax(np.where(ok, iv.v_max_pu, -np.inf)))
        res.highest = {"v_pu": float(iv.v_max_pu[k]), "bus": int(iv.v_max_bus[k]), "when": when[k]}
    failed = int((~ok).sum())
    if failed:
        res.status = HourlyStatus.FAILED_INTERVALS
        k = int(np.flatnonzero(~ok)[0])
        res.message = (f"{failed} of {T} intervals without a load-flow solution (first: {when[k]}, worst bus "
                       f"{iv.worst_bus[k]}, mismatch {iv.mismatch_mva[k]:.4g} MVA)")
        res.success = False
    else:
        if res.hours_outside_band > 0:
            res.status = HourlyStatus.OUTSIDE_BAND
        res.message = (f"{T} intervals solved; energy loss {energy:.1f} MWh; "
                       f"{res.hours_outside_band:g} h with a bus outside the band")
    return res


def _voltage_controlled(rfs, factors, level_of, duration_h, banks, rule, lo, hi, base_sol):
    """Sequential run: each interval's steps depend on the voltages before it."""
    T = len(level_of)
    c = rfs[0].c
    steps = np.zeros((T, len(banks)), np.int64)
    now = np.array([b.steps_by_level[int(level_of[0])] for b in banks], np.int64)
    low_for = np.zeros(len(banks))
    high_for = np.zeros(len(banks))
    bus_idx = np.array([c.index_of([b.bus])[0] for b in banks], np.int64) if banks else np.zeros(0, np.int64)
    smin = np.array([b.steps_min for b in banks], np.int64)
    smax = np.array([b.steps_max for b in banks], np.int64)
    parts = []
    prev = base_sol
    cache = {}
    for t in range(T):
        steps[t] = now
        part, sol = _span(rfs, factors, level_of, banks, steps, lo, hi, t, t + 1, prev, keep_last=True, cache=cache)
        parts.append(part)
        if sol.success:
            prev = sol
            v = np.abs(sol.v)[bus_idx]
            low_for = np.where(v < rule.v_on_pu, low_for + duration_h[t], 0.0)
            high_for = np.where(v > rule.v_off_pu, high_for + duration_h[t], 0.0)
            up = (low_for >= rule.delay_h) & (now < smax)
            down = (high_for >= rule.delay_h) & (now > smin)
            now = now + up - down
            low_for[up] = 0.0
            high_for[down] = 0.0
    out = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    return out, steps


def bank_controls(net: Network, n_levels: int = 1) -> list:
    """Switchable banks of a network's shunt table, with their present steps at every level."""
    sh = net.shunts[net.shunts.energised.astype(bool) & net.shunts.switchable.astype(bool)]
    return [BankControl(str(r.shunt_id), int(r.bus), float(r.mvar_per_step), int(r.steps_max),
                        (int(r.steps_on),) * n_levels) for r in sh.itertuples(index=False)]


def verify_profile(net: Network, profile: LoadProfile, *, band=(0.95, 1.05), rule="schedule", groups=None,
                   levels=None, **sweep) -> HourlyResult:
    """Hourly verification of one network over a profile (see module docstring).

    With ``rule="schedule"`` and no ``levels`` the switched banks stay at their present steps;
    with ``levels`` (a :class:`~planner.hourly.cluster.LoadLevels`) the level-based estimate is
    computed beside the exact energy. ``sweep`` keywords (``where``, ``chunk_size``, ``progress``,
    ``client``) go to :func:`verify_hours`.
    """
    c = compile_network(net)
    f = profile.bus_factors(c.bus_ids, net.buses.set_index("bus").loc[c.bus_ids, "area"].to_numpy(), groups)
    if levels is not None:
        level_of = levels.level_of_interval
        L = len(levels.table)
        lf = np.stack([np.average(f[level_of == l], axis=0, weights=profile.duration_h[level_of == l])
                       for l in range(L)])
    else:
        level_of, L, lf = np.zeros(len(f), np.int64), 1, None
    return verify_hours([c] * L, f, level_of, profile.duration_h, band=band, banks=bank_controls(net, L), rule=rule,
                        labels=profile.labels, start_h=profile.start_h, level_factors=lf, **sweep)
