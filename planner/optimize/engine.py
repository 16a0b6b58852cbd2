"""The optimiser's outer loop: linearise, MILP step, full AC check, accept or shrink.

Works on one or several load levels at once. Sites and bank sizes are common to all
levels; fixed units are in service at every level; switched units, existing switchable
banks, generator setpoints and transformer taps may be set per level. A proposal counts only
after a full AC load flow (reactive limits enforced) of exactly its discrete settings at every
level: the merit that decides acceptance is computed from those AC results.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from ..flow.newton import solve_flow
from ..flow.result import FlowResult
from ..network.compile import PQ, compile_network, replace
from .levers import Levers, Limits, Objective, Options
from .milp import LevelData, StepSpec, solve_step
from .sensitivity import flow_magnitude_slopes, linearise


_SEEDS = 12   # earlier proposals whose loss cuts a new step starts with
_MARGIN_STEP = 5e-5   # pu added to a voltage row's margin beyond the breach that AC showed
_MARGIN_CAP = 0.01    # pu: the most a row is moved inside the band


@dataclass
class LevelCase:
    """One load level: its network (loads already scaled) and its weight in the objective
    (hours per year for a study; 1 for a single case)."""
    name: str
    network: object
    weight: float = 1.0
    v_min: float | None = None     # this level's load-bus band, overriding Limits.v_min / v_max
    v_max: float | None = None


@dataclass
class Settings:
    """Lever positions of a whole plan (arrays indexed like the optimiser's lever lists)."""
    fixed: np.ndarray       # (S,) fixed units per site
    switched: np.ndarray    # (S,) switched units installed per site
    steps: np.ndarray       # (L, S) switched units on per level
    exist: np.ndarray       # (L, E) steps on of each existing switchable bank
    vset: np.ndarray        # (L, G) voltage setpoint per lever generator bus
    ratio: np.ndarray       # (L, T) transformer ratio per lever

    def copy(self):
        return Settings(*(getattr(self, f).copy() for f in ("fixed", "switched", "steps", "exist", "vset", "ratio")))

    def key(self):
        return tuple(np.round(getattr(self, f), 9).tobytes() for f in
                     ("fixed", "switched", "steps", "exist", "vset", "ratio"))


@dataclass
class Violation:
    level: str
    kind: str          # "voltage", "reactive", "loading", "no convergence"
    element: str       # bus or branch
    value: float
    limit: float
    excess: float      # in the limit's unit (pu voltage, Mvar, % loading)

    def text(self) -> str:
        unit = {"voltage": " pu", "reactive": " Mvar", "loading": " %"}.get(self.kind, "")
        if self.kind == "no convergence":
            return f"{self.level}: load flow did not converge ({self.element})"
        return (f"{self.level}: {self.kind} at {self.element}: {self.value:.4f}{unit} against limit "
                f"{self.limit:.4f}{unit} (by {self.excess:.4f}{unit})")


@dataclass
class Evaluation:
    """AC results of one settings vector at every level."""
    flows: list
    losses_mw: np.ndarray
    violations: list
    violation_total: float      # sum of excesses, in pu of voltage / Mvar / loading fraction
    capital: float
    merit: float
    converged: bool


@dataclass
class PlanResult:
    """The outcome of an optimisation: the plan, its AC verification and how it was found."""
    success: bool            # the optimiser ran to a stop (even if limits remain broken)
    verified: bool           # final AC load flows converged at every level and every limit holds
    status: str
    message: str
    levels: list             # level names
    banks: list              # [{bus, units, fixed_units, switched_units, unit_mvar, mvar, steps_by_level}]
    setpoints: dict          # level -> [{bus, v_pu}]
    taps: dict               # level -> [{from_bus, to_bus, xfmr_id, ratio}]
    existing_steps: dict     # level -> [{shunt_id, bus, steps}]
    losses_before_mw: dict   # level -> MW (AC)
    losses_after_mw: dict    # level -> MW (AC-verified)
    losses_predicted_mw: dict  # level -> MW from the last linear model
    capital_cost: float
    objective_before: float
    objective_after: float
    violations: list         # list[Violation] of the final plan
    violations_before: list
    flows_before: dict       # level -> FlowResult
    flows_after: dict
    log: list                # per iteration dicts
    ac_flows: int
    milp_solves: int
    seconds: float
    settings: Settings = field(repr=False, default=None)
    bands: dict = field(repr=False, default_factory=dict)   # level -> (v_min, v_max) per bus, compiled order


class _Problem:
    """Lever bookkeeping shared by all levels."""

    def __init__(self, levels, levers: Levers, limits: Limits, objective: Objective, options: Options):
        self.levels = levels
        self.levers, self.limits, self.objective, self.options = levers, limits, objective, options
        self.compiled = [compile_network(lc.network) for lc in levels]
        c0 = self.compiled[0]
        for c in self.compiled[1:]:
            if not np.array_equal(c.bus_ids, c0.bus_ids):
                raise ValueError("load levels must share one network (same buses in the same order)")
        self.base = c0.base_mva
        net0 = levels[0].network
        # new bank sites
        self.sites = list(levers.sites)
        self.site_bus = c0.index_of([s.bus for s in self.sites]) if self.sites else np.zeros(0, np.int64)
        # candidate sites on buses joined by a branch: the final search may move a bank to one
        self.site_next = self._adjacent_sites(c0)
        # existing switchable banks
        sh = net0.shunts
        if levers.existing_shunts and len(sh):
            mask = (sh["energised"] & sh["switchable"]).to_numpy(bool)
        else:
            mask = np.zeros(len(sh), bool)
        self.exist_rows = np.flatnonzero(mask)
        self.exist_ids = sh["shunt_id"].astype(str).to_numpy()[mask]
        self.exist_bus = c0.index_of(sh["bus"].to_numpy()[mask]) if mask.any() else np.zeros(0, np.int64)
        self.exist_step = sh["mvar_per_step"].to_numpy(float)[mask] / self.base
        self.exist_max = sh["steps_max"].to_numpy(int)[mask]
        self.exist_now = sh["steps_on"].to_numpy(int)[mask]
        # generator setpoints
        gen_bus = np.flatnonzero((c0.kind != PQ) & c0.alive)
        rng = levers.gen_v_range
        self.vset_bus, lo, hi = [], [], []
        if rng:
            for i in gen_bus:
                b = int(c0.bus_ids[i])
                r = rng.get(b, rng.get("*"))
                if r is not None:
                    self.vset_bus.append(i)
                    lo.append(float(r[0]))
                    hi.append(float(r[1]))
        self.vset_bus = np.array(self.vset_bus, np.int64)
        self.v_lo, self.v_hi = np.array(lo, float), np.array(hi, float)
        # transformer taps
        if levers.taps and len(net0.transformers):
            adj = net0.transformers["adjustable"].to_numpy(bool)
            rows = c0.xfmr_rows
            self.tap_br = np.flatnonzero((rows >= 0) & adj[np.maximum(rows, 0)])
        else:
            self.tap_br = np.zeros(0, np.int64)
        tr = net0.transformers
        tr_rows = c0.xfmr_rows[self.tap_br]
        self.tap_lo = tr["ratio_min_pu"].to_numpy(float)[tr_rows] if len(tr_rows) else np.zeros(0)
        self.tap_hi = tr["ratio_max_pu"].to_numpy(float)[tr_rows] if len(tr_rows) else np.zeros(0)
        self.tap_step = tr["ratio_step_pu"].to_numpy(float)[tr_rows] if len(tr_rows) else np.zeros(0)
        # limits per bus
        self.vlim = [self._voltage_limits(c0, lc) for lc in levels]
        # per level and bus: how far inside the band the linear voltage rows aim (lower, upper)
        self.v_margin = [(np.zeros(c0.n), np.zeros(c0.n)) for _ in levels]
        self.flows_run = 0

    def _adjacent_sites(self, c):
        by_bus = {}
        for s, i in enumerate(self.site_bus):
            by_bus.setdefault(int(i), []).append(s)
        out = [[] for _ in self.sites]
        is_site = np.zeros(c.n, bool)
        is_site[self.site_bus] = True
        both = is_site[c.f] & is_site[c.t]          # only branches between two candidate buses
        for a, b in zip(c.f[both], c.t[both]):
            for x, y in ((int(a), int(b)), (int(b), int(a))):
                for s in by_bus.get(x, ()):
                    out[s].extend(t for t in by_bus.get(y, ()) if t not in out[s])
        return out

    # ---- limits ----------------------------------------------------------------------------
    def _voltage_limits(self, c, level: LevelCase):
        lim = self.limits
        lo = level.v_min if level.v_min is not None else lim.v_min
        hi = level.v_max if level.v_max is not None else lim.v_max
        vmin = np.full(c.n, lo) if lo is not None else c.v_min.copy()
        vmax = np.full(c.n, hi) if hi is not None else c.v_max.copy()
        for b, (lo, hi) in (lim.per_bus or {}).items():
            i = c.index_of([int(b)])[0]
            vmin[i], vmax[i] = lo, hi
        # generator buses with a setpoint lever are held to the setpoint range
        vmin[self.vset_bus] = self.v_lo
        vmax[self.vset_bus] = self.v_hi
        return vmin, vmax

    # ---- settings -> networks ------------------------------------------------------------
    def initial_settings(self) -> Settings:
        L, S = len(self.levels), len(self.sites)
        c0 = self.compiled[0]
        vset = np.tile(c0.v_set[self.vset_bus], (L, 1))
        ratio = np.tile(c0.ratio[self.tap_br], (L, 1))
        return Settings(np.zeros(S, float), np.zeros(S, int), np.zeros((L, S), int),
                        np.tile(self.exist_now, (L, 1)), vset, ratio)

    def unit_pu(self):
        return np.array([s.unit_mvar for s in self.sites], float) / self.base

    def compiled_for(self, l: int, st: Settings):
        c = self.compiled[l]
        ysh = c.ysh.copy()
        if len(self.sites):
            np.add.at(ysh, self.site_bus, 1j * self.unit_pu() * (st.fixed + st.steps[l]))
        if len(self.exist_rows):
            np.add.at(ysh, self.exist_bus, 1j * self.exist_step * (st.exist[l] - self.exist_now))
        v_set = c.v_set.copy()
        v_set[self.vset_bus] = st.vset[l]
        ratio = c.ratio.copy()
        ratio[self.tap_br] = st.ratio[l]
        return replace(c, ysh=ysh, v_set=v_set, ratio=ratio)

    def capital(self, st: Settings) -> float:
        total = 0.0
        for s, site in enumerate(self.sites):
            units = st.fixed[s] + st.switched[s]
            if units:
                total += site.fixed_cost + site.cost_per_mvar * site.unit_mvar * units
            if st.switched[s]:
                total += site.switched_fixed_cost + site.switched_cost_per_mvar * site.unit_mvar * st.switched[s]
        return total

    def loss_weights(self):
        w = np.array([lc.weight for lc in self.levels], float)
        if self.objective.kind == "cost":
            return w * self.objective.loss_value_per_mw
        return w

    def penalty(self) -> float:
        """Objective units per pu of violation: ``options.penalty`` MW of losses at the
        heaviest-weighted level, so limits dominate whatever the objective's scale."""
        return float(self.options.penalty * max(self.loss_weights().max(), 1e-12))

    def capital_weight(self):
        return self.objective.capital_factor if self.objective.kind == "cost" else 0.0

    # ---- AC evaluation --------------------------------------------------------------------
    def evaluate(self, st: Settings, warm: list | None = None, tables=False) -> Evaluation:
        flows, losses, viols = [], [], []
        total = 0.0
        ok = True
        for l, lc in enumerate(self.levels):
            c = self.compiled_for(l, st)
            start = warm[l] if warm is not None and warm[l] is not None and warm[l].converged else "flat"
            fr = solve_flow(compiled=c, start=start, build_tables=tables)
            self.flows_run += 1
            if not fr.converged and start != "flat":
                fr = solve_flow(compiled=c, start="flat", build_tables=tables)
                self.flows_run += 1
            flows.append(fr)
            if not fr.converged:
                ok = False
                losses.append(np.inf)
                viols.append(Violation(lc.name, "no convergence", fr.message, np.nan, np.nan, np.inf))
                total = np.inf
                continue
            losses.append(fr.losses_mw)
            v, t = self.violations(l, fr)
            viols.extend(v)
            total += t
        losses = np.array(losses)
        cap = self.capital(st)
        merit = (float(self.loss_weights() @ losses) + self.capital_weight() * cap
                 + self.penalty() * total) if ok else np.inf
        return Evaluation(flows, losses, viols, total, cap, merit, ok)

    def violations(self, l: int, fr: FlowResult):
        """Limit breaches of a converged flow at level ``l``, and their sum in pu (for the merit)."""
        c = fr.compiled
        level = self.levels[l].name
        vmin, vmax = self.vlim[l]
        out = []
        tol_v = 1e-6
        vm = np.abs(fr.v)
        alive = c.alive
        lo = alive & (vm < vmin - tol_v)
        hi = alive & (vm > vmax + tol_v)
        total = float(np.sum(np.where(lo, vmin - vm, 0.0)) + np.sum(np.where(hi, vm - vmax, 0.0)))
        for i in np.flatnonzero(lo):
            out.append(Violation(level, "voltage", f"bus {c.bus_ids[i]}", vm[i], vmin[i], vmin[i] - vm[i]))
        for i in np.flatnonzero(hi):
            out.append(Violation(level, "voltage", f"bus {c.bus_ids[i]}", vm[i], vmax[i], vm[i] - vmax[i]))
        if self.limits.q_limits:
            # enforcement keeps PV buses inside; the slack bus can still break its limits
            gb = np.flatnonzero((c.kind != PQ) & alive)
            q = fr.bus_q_gen[gb]
            tol_q = 1e-6
            for i, qi in zip(gb, q):
                if qi > c.q_max[i] + tol_q:
                    out.append(Violation(level, "reactive", f"bus {c.bus_ids[i]}", qi * c.base_mva,
                                         c.q_max[i] * c.base_mva, (qi - c.q_max[i]) * c.base_mva))
                    total += qi - c.q_max[i]
                elif qi < c.q_min[i] - tol_q:
                    out.append(Violation(level, "reactive", f"bus {c.bus_ids[i]}", qi * c.base_mva,
                                         c.q_min[i] * c.base_mva, (c.q_min[i] - qi) * c.base_mva))
                    total += c.q_min[i] - qi
        if self.limits.ratings:
            from ..flow.result import branch_flows
            sf, stt = branch_flows(c, fr.v)
            s = np.maximum(np.abs(sf), np.abs(stt)) * c.base_mva
            rated = c.rating > 0
            over = rated & (s > c.rating * (1 + 1e-6))
            for k in np.flatnonzero(over):
                pct = 100 * s[k] / c.rating[k]
                out.append(Violation(level, "loading", f"branch {c.branch_ids[k]}", pct, 100.0, pct - 100.0))
                total += (s[k] - c.rating[k]) / c.base_mva
        return out, total

    def learn_voltage_margins(self, ev: Evaluation):
        """Tighten the voltage rows at buses where an AC check broke the band.

        A linear row can sit exactly on its limit while the AC voltage lands a little past it;
        every such point then pays the violation penalty and the step is wasted. Each breach
        moves that bus's row inside the band by the breach plus a little (capped), a usual
        remedy in successive linear programming.
        """
        if not ev.converged:
            return
        for l, fr in enumerate(ev.flows):
            vmin, vmax = self.vlim[l]
            lo, hi = self.v_margin[l]
            vm = np.abs(fr.v)
            alive = fr.compiled.alive
            below = alive & (vm < vmin)
            above = alive & (vm > vmax)
            lo[below] = np.minimum(lo[below] + (vmin - vm)[below] + _MARGIN_STEP, _MARGIN_CAP)
            hi[above] = np.minimum(hi[above] + (vm - vmax)[above] + _MARGIN_STEP, _MARGIN_CAP)

    # ---- linear model ---------------------------------------------------------------------
    def level_data(self, l: int, st: Settings, fr: FlowResult, radius_v: float, radius_units: int) -> LevelData:
        c = fr.compiled
        shunt_buses = np.concatenate([self.site_bus, self.exist_bus]).astype(np.int64)
        sens = linearise(fr, shunt_buses=shunt_buses, vset_buses=self.vset_bus, xfmr_branches=self.tap_br)
        w = np.sqrt(np.maximum(sens.r, 0.0))
        M = np.vstack([w[:, None] * sens.di.real, w[:, None] * sens.di.imag])
        cvec = np.concatenate([w * sens.i0.real, w * sens.i0.imag])
        if M.shape[1]:
            Q, R = np.linalg.qr(M, mode="reduced")
            d = Q.T @ cvec
            const = float(cvec @ cvec - d @ d)
        else:
            R, d, const = np.zeros((0, 0)), np.zeros(0), float(cvec @ cvec)
        # rows that can bind inside this trust region (others are dropped to keep the MILP small)
        span_units = np.concatenate([self.unit_pu() * radius_units, self.exist_step * radius_units,
                                     np.full(len(self.vset_bus), radius_v),
                                     np.maximum(self.tap_hi - self.tap_lo, 0.0)])
        reach = np.abs(sens.dvm) @ span_units if sens.dvm.shape[1] else np.zeros(c.n)
        vm = sens.vm0
        vmin, vmax = self.vlim[l]
        # the model's rows hold each bus inside its band less the margin its AC results needed,
        # but never exclude the present point where it is inside the band itself (or a step
        # that only moves back inside the margin would look better than it is)
        lo_m, hi_m = vmin + self.v_margin[l][0], vmax - self.v_margin[l][1]
        vmin = np.where(vm >= vmin, np.minimum(lo_m, vm), lo_m)
        vmax = np.where(vm <= vmax, np.maximum(hi_m, vm), hi_m)
        near = c.alive & ((vm - reach <= vmin + 1e-3) | (vm + reach >= vmax - 1e-3))
        near[self.vset_bus] = False   # held by the setpoint bounds directly
        v_rows = np.flatnonzero(near)
        gb = sens.gen_buses
        if self.limits.q_limits:
            q_reach = np.abs(sens.dq) @ span_units if sens.dq.shape[1] else np.zeros(len(gb))
            wide = (c.q_max[gb] - c.q_min[gb]) > 100.0  # effectively unlimited
            q_near = ~wide & ((sens.q0 - q_reach <= c.q_min[gb] + 1e-3) | (sens.q0 + q_reach >= c.q_max[gb] - 1e-3))
            q_sel = np.flatnonzero(q_near)
        else:
            q_sel = np.zeros(0, np.int64)
        cur_units = st.fixed + st.steps[l]
        s_rows = s0 = ds = s_hi = None
        if self.limits.ratings:
            rated = np.flatnonzero(c.rating > 0)
            if len(rated):
                mag, slope = flow_magnitude_slopes(fr, sens, rated)
                reach = np.abs(slope) @ span_units if slope.shape[1] else np.zeros(len(rated))
                rating = c.rating[rated] / c.base_mva
                near = mag + reach >= 0.95 * rating
                s_rows, s0, ds, s_hi = rated[near], mag[near], slope[near], rating[near]
        return LevelData(
            s_rows=s_rows, s0=s0, ds=ds, s_hi=s_hi,            weight=float(self.loss_weights()[l]), d=d, R=R, const=const,
            v_rows=v_rows, v0=vm[v_rows], dv=sens.dvm[v_rows], v_lo=vmin[v_rows], v_hi=vmax[v_rows],
            q_rows=gb[q_sel], q0=sens.q0[q_sel], dq=sens.dq[q_sel], q_lo=c.q_min[gb][q_sel], q_hi=c.q_max[gb][q_sel],
            cur_units=cur_units.astype(float), cur_exist=st.exist[l].astype(int),
            v_now=np.abs(fr.v[self.vset_bus]),
        )

    def lever_changes(self, l: int, st: Settings, to: Settings, flow: FlowResult) -> np.ndarray:
        """Change of the lever columns at level ``l`` from ``st`` (solved as ``flow``) to ``to``,
        in the linear model's units (setpoints from the present voltage, as the model has it)."""
        return np.concatenate([self.unit_pu() * (to.fixed + to.steps[l] - st.fixed - st.steps[l]),
                               self.exist_step * (to.exist[l] - st.exist[l]),
                               to.vset[l] - np.abs(flow.v[self.vset_bus]), to.ratio[l] - st.ratio[l]])

    def step_spec(self, st: Settings, flows, radius_v, radius_units, radius_tap, radius_cont=None,
                  seeds=()) -> StepSpec:
        if radius_cont is None:
            radius_cont = float(radius_units)
        L = len(self.levels)
        sites = self.sites
        levels = [self.level_data(l, st, flows[l], radius_v, radius_units) for l in range(L)]
        tap_lo = np.tile(self.tap_lo, (L, 1)) - st.ratio
        tap_hi = np.tile(self.tap_hi, (L, 1)) - st.ratio
        step = self.tap_step
        tap_radius = float(radius_tap * (step.max() if len(step) and step.max() > 0 else 0.0125))
        return StepSpec(
            base_mva=self.base, unit_pu=self.unit_pu(),
            max_units=np.array([s.max_units for s in sites], int),
            allow_fixed=np.array(["fixed" in s.kinds for s in sites], bool),
            # at a single level a switched unit is simply in service; it still counts its extra cost
            allow_switched=np.array(["switched" in s.kinds for s in sites], bool),
            site_cost=np.array([s.fixed_cost for s in sites], float),
            mvar_cost=np.array([s.cost_per_mvar for s in sites], float),
            sw_mvar_cost=np.array([s.switched_cost_per_mvar for s in sites], float),
            sw_site_cost=np.array([s.switched_fixed_cost for s in sites], float),
            existing_sites=np.zeros(len(sites), bool),
            continuous=np.array([s.continuous for s in sites], bool),
            unit_radius_of=np.array([radius_cont if s.continuous else radius_units for s in sites], float),
            max_new_sites=self.levers.max_new_sites, budget=self.levers.budget,
            capital_weight=self.capital_weight(),
            exist_step_pu=self.exist_step, exist_max=self.exist_max,
            v_lo=self.v_lo, v_hi=self.v_hi, common_setpoints=not self.levers.setpoints_per_level,
            tap_step=step, tap_lo=tap_lo, tap_hi=tap_hi,
            unit_radius=int(radius_units), v_radius=float(radius_v), tap_radius=tap_radius,
            tangent_points=self.options.tangent_points, penalty=self.penalty(),
            levels=levels, time_limit=self.options.time_limit_s, mip_gap=self.options.mip_gap,
            seeds=[np.array([self.lever_changes(l, st, p, flows[l]) for l in range(L)]) for p in seeds
                   if p.key() != st.key()],
        )

    def settings_from(self, sol, st: Settings, flows) -> Settings:
        new = st.copy()
        new.fixed = sol.fixed.copy()
        new.switched = sol.switched.copy()
        new.steps = sol.steps.copy()
        new.exist = sol.exist.copy()
        new.vset = sol.vset.copy()
        new.ratio = st.ratio + sol.tap_change
        if len(self.tap_br):
            new.ratio = np.clip(new.ratio, self.tap_lo, self.tap_hi)
        return new


def optimise(levels: list, levers: Levers, limits: Limits | None = None, objective: Objective | None = None,
             options: Options | None = None, progress=None) -> PlanResult:
    """Choose bank sites and units, switching, setpoints and taps across load levels.

    Every accepted step, and the final plan, is a full AC load flow of the exact discrete
    settings at every level. ``progress`` (optional) is called with each log entry.
    """
    limits = limits or Limits()
    objective = objective or Objective()
    options = options or Options()
    t0 = time.perf_counter()
    pb = _Problem(levels, levers, limits, objective, options)
    names = [lc.name for lc in levels]
    cur = pb.initial_settings()
    before = pb.evaluate(cur)
    if not before.converged:
        return _result(pb, names, cur, before, before, {}, [], 0, "base case does not converge",
                       "the base-case load flow did not converge at every level; nothing was optimised",
                       False, t0)
    ev = before
    log = [{"iteration": 0, "accepted": True, "predicted_mw": dict(zip(names, before.losses_mw)),
            "ac_mw": dict(zip(names, before.losses_mw)), "merit": before.merit,
            "violation": before.violation_total, "worst_violation": _worst(before),
            "radius_v": options.voltage_radius_pu,
            "radius_units": None}]
    if progress:
        progress(log[-1])
    r_v = options.voltage_radius_pu
    r_u = max([s.max_units for s in pb.sites] + list(pb.exist_max) + [1])
    r_t = options.tap_radius_steps
    r_c = float(r_u)      # continuous bank sizes: a real-valued radius in units
    milps = 0
    predicted = dict(zip(names, before.losses_mw))
    seen = {cur.key(): ev.merit}
    tried = {}            # every MILP round's proposal: later steps start their loss cuts there
    status = "iteration limit"
    # with whole-unit levers only, a shrinking region soon repeats the polish's one-unit moves
    discrete_only = not len(pb.vset_bus) and not any(s.continuous for s in pb.sites) and \
        not np.any(pb.tap_step <= 0)
    rejections = 0

    def record(accepted, evaluation, **extra):
        # one log entry of the current step (reads the loop's it, pred, cand and radii)
        entry = {"iteration": it, "accepted": bool(accepted), "predicted_mw": pred,
                 "ac_mw": dict(zip(names, evaluation.losses_mw)) if evaluation else None,
                 "merit": evaluation.merit if evaluation else seen[cand.key()],
                 "violation": evaluation.violation_total if evaluation else None,
                 "worst_violation": _worst(evaluation) if evaluation else None,
                 "radius_v": r_v, "radius_units": r_u, **extra}
        log.append(entry)
        if progress:
            progress(entry)

    for it in range(1, options.max_iterations + 1):
        spec = pb.step_spec(cur, ev.flows, r_v, r_u, r_t, r_c, seeds=list(tried.values())[-_SEEDS:])
        sol, solves, rounds = solve_step(spec, time_budget=options.time_limit_s)
        milps += solves
        if not sol.ok:
            status = f"MILP step failed ({sol.status})"
            break
        for r in rounds:
            p = pb.settings_from(r, cur, ev.flows)
            tried.pop(p.key(), None)
            tried[p.key()] = p           # most recent last
        cand = pb.settings_from(sol, cur, ev.flows)
        pred = dict(zip(names, sol.predicted_loss_pu * pb.base))
        if cand.key() == cur.key():
            status = "converged (no further change)"
            predicted = pred
            record(False, ev)
            break
        if cand.key() in seen:
            # proposed before and not better then: no load flow needed, shrink the region
            accept = False
            record(False, None, repeat=True)
        else:
            new = pb.evaluate(cand, warm=ev.flows)
            seen[cand.key()] = new.merit
            pb.learn_voltage_margins(new)
            accept = new.converged and new.merit < ev.merit - 1e-12
            record(accept, new)
        rejections = 0 if accept else rejections + 1
        if discrete_only and rejections >= 1:
            # the model cannot rank the nearby plans better than its own error: the AC-checked
            # search over one-unit moves and moves to the next bus takes over
            status = "converged (step rejected; one-step moves checked next)"
            break
        if accept:
            gain = ev.merit - new.merit
            loss_change = float(np.abs(new.losses_mw - ev.losses_mw).max())
            cur, ev, predicted = cand, new, pred
            if loss_change < options.loss_tolerance_mw and gain < options.loss_tolerance_mw * max(1.0, pb.loss_weights().max()):
                status = "converged (AC loss change below tolerance)"
                break
            if gain < options.merit_rel_tolerance * abs(new.merit):
                status = "converged (relative improvement below tolerance)"
                break
        else:
            r_v *= 0.5
            r_c *= 0.5
            r_u = max(1, r_u // 2) if r_u > 1 else 0
            r_t = max(1, r_t // 2) if r_t > 1 else 0
            if r_v < options.min_voltage_radius_pu and r_u == 0 and r_t == 0 and r_c < 1e-4:
                status = "converged (trust region collapsed)"
                break
            if r_u == 0 and not len(pb.vset_bus) and not len(pb.tap_br) and r_c < 1e-4:
                status = "converged (trust region collapsed)"
                break
    if options.polish:
        cur, ev = _polish(pb, cur, ev, options, log, progress)
    final = pb.evaluate(cur, warm=ev.flows, tables=True)
    return _result(pb, names, cur, before, final, predicted, log, milps, status, "", True, t0)


def _worst(ev: Evaluation):
    """The largest limit breach of an AC evaluation, as text (None when every limit holds)."""
    if not ev.violations:
        return None
    return max(ev.violations, key=lambda v: v.excess).text()


def _neighbours(pb: _Problem, st: Settings):
    """Settings one integer step away: a unit more or less at a used site (fixed, switched, or
    switched-on at one level), a used site's bank moved to an adjacent candidate bus, an
    existing bank's step, a tap step at one level."""
    L, S = st.steps.shape
    used = np.flatnonzero(st.fixed + st.switched > 0)
    for s in used:
        site = pb.sites[s]
        if site.continuous:
            continue
        for dlt in (-1, 1):
            if "fixed" in site.kinds or st.fixed[s]:
                n = st.copy()
                n.fixed[s] += dlt
                if 0 <= n.fixed[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    yield n
            if st.switched[s] or "switched" in site.kinds:
                n = st.copy()
                n.switched[s] += dlt
                if 0 <= n.switched[s] and n.fixed[s] + n.switched[s] <= site.max_units:
                    # a unit added comes in service at every level; step moves can then turn it off
                    n.steps[:, s] = np.minimum(n.steps[:, s] + max(dlt, 0), n.switched[s])
                    yield n
            for l in range(L):
                if st.switched[s]:
                    n = st.copy()
                    n.steps[l, s] += dlt
                    if 0 <= n.steps[l, s] <= n.switched[s]:
                        yield n
        # the whole bank moved to a candidate bus next door (same unit size and bank types)
        for t in pb.site_next[s]:
            other = pb.sites[t]
            if (st.fixed[t] + st.switched[t] or other.unit_mvar != site.unit_mvar or other.continuous
                    or st.fixed[s] + st.switched[s] > other.max_units
                    or (st.fixed[s] and "fixed" not in other.kinds)
                    or (st.switched[s] and "switched" not in other.kinds)):
                continue
            n = st.copy()
            n.fixed[t], n.switched[t], n.steps[:, t] = st.fixed[s], st.switched[s], st.steps[:, s]
            n.fixed[s], n.switched[s], n.steps[:, s] = 0, 0, 0
            yield n
    for e in range(st.exist.shape[1]):
        for l in range(L):
            for dlt in (-1, 1):
                n = st.copy()
                n.exist[l, e] += dlt
                if 0 <= n.exist[l, e] <= pb.exist_max[e]:
                    yield n
    for t in range(st.ratio.shape[1]):
        step = pb.tap_step[t]
        if step <= 0:
            continue
        for l in range(L):
            for dlt in (-step, step):
                n = st.copy()
                n.ratio[l, t] += dlt
                if pb.tap_lo[t] - 1e-9 <= n.ratio[l, t] <= pb.tap_hi[t] + 1e-9:
                    yield n


def _feasible_budget(pb: _Problem, st: Settings) -> bool:
    lv = pb.levers
    if lv.budget is not None and pb.capital(st) > lv.budget + 1e-9:
        return False
    if lv.max_new_sites is not None and int(np.sum(st.fixed + st.switched > 0)) > lv.max_new_sites:
        return False
    return True


def _polish(pb: _Problem, cur: Settings, ev: Evaluation, options: Options, log, progress):
    """Best-improvement search over one-step moves, each checked by full AC load flows."""
    budget = options.max_polish_flows
    used = 0
    improved = True
    while improved and used < budget:
        improved = False
        best, best_ev = None, ev
        for n in _neighbours(pb, cur):
            if not _feasible_budget(pb, n):
                continue
            cand = pb.evaluate(n, warm=ev.flows)
            used += len(pb.levels)
            if cand.converged and cand.merit < best_ev.merit - 1e-12:
                best, best_ev = n, cand
            if used >= budget:
                break
        if best is not None:
            cur, ev = best, best_ev
            improved = True
            log.append({"iteration": len(log), "accepted": True, "polish": True,
                        "predicted_mw": None, "ac_mw": dict(zip([lc.name for lc in pb.levels], ev.losses_mw)),
                        "merit": ev.merit, "violation": ev.violation_total,
                        "worst_violation": _worst(ev), "radius_v": None,
                        "radius_units": None})
            if progress:
                progress(log[-1])
    return cur, ev


def _result(pb: _Problem, names, st: Settings, before: Evaluation, final: Evaluation, predicted, log, milps,
            status, message, success, t0) -> PlanResult:
    c0 = pb.compiled[0]
    banks = []
    for s, site in enumerate(pb.sites):
        units = float(st.fixed[s] + st.switched[s]) if site.continuous else int(st.fixed[s] + st.switched[s])
        if units <= 1e-9:
            continue
        banks.append({
            "bus": int(site.bus), "units": units,
            "fixed_units": float(st.fixed[s]) if site.continuous else int(st.fixed[s]),
            "switched_units": int(st.switched[s]), "unit_mvar": float(site.unit_mvar),
            "mvar": float(units * site.unit_mvar),
            "steps_by_level": {n: int(st.steps[l, s]) for l, n in enumerate(names)},
            "mvar_by_level": {n: float((st.fixed[s] + st.steps[l, s]) * site.unit_mvar) for l, n in enumerate(names)},
        })
    setpoints = {n: [{"bus": int(c0.bus_ids[i]), "v_pu": float(st.vset[l, g])}
                     for g, i in enumerate(pb.vset_bus)] for l, n in enumerate(names)}
    taps = {n: [{"from_bus": int(c0.bus_ids[c0.f[k]]), "to_bus": int(c0.bus_ids[c0.t[k]]),
                 "xfmr_id": str(c0.branch_ids[k]), "ratio": float(st.ratio[l, j])}
                for j, k in enumerate(pb.tap_br)] for l, n in enumerate(names)}
    exist = {n: [{"shunt_id": str(pb.exist_ids[e]), "bus": int(c0.bus_ids[pb.exist_bus[e]]),
                  "steps": int(st.exist[l, e])} for e in range(len(pb.exist_rows))] for l, n in enumerate(names)}
    verified = bool(final.converged and not final.violations)
    if not message:
        if not final.converged:
            message = "the final AC load flow did not converge at every level"
        elif final.violations:
            message = (f"limits cannot all be met with the levers available: {len(final.violations)} "
                       f"violation(s) remain in the least-violation plan; worst: {_worst(final)}")
        else:
            message = "every level verified by AC load flow; all limits hold"
    return PlanResult(
        success=success, verified=verified, status=status, message=message, levels=names, banks=banks,
        setpoints=setpoints, taps=taps, existing_steps=exist,
        losses_before_mw=dict(zip(names, map(float, before.losses_mw))),
        losses_after_mw=dict(zip(names, map(float, final.losses_mw))),
        losses_predicted_mw={k: float(v) for k, v in predicted.items()},
        capital_cost=float(final.capital), objective_before=float(before.merit), objective_after=float(final.merit),
        violations=final.violations, violations_before=before.violations,
        flows_before=dict(zip(names, before.flows)), flows_after=dict(zip(names, final.flows)),
        log=log, ac_flows=pb.flows_run, milp_solves=milps, seconds=time.perf_counter() - t0, settings=st,
        bands={n: pb.vlim[l] for l, n in enumerate(names)})
