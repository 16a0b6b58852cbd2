"""The optimisation problem as data: lever indexing, limits per bus and level, the networks of
a settings vector, capital cost, and the linear model of one step (:meth:`PlanProblem.step_spec`).

Nothing here solves a MILP or decides a step; :mod:`planner.optimize.ac_check` runs the AC load
flows and :mod:`planner.optimize.engine` the loop.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..flow.result import FlowResult
from ..network.compile import PQ, compile_network, replace
from .levers import Levers, Limits, Objective, Options
from .milp import LevelData, StepSpec
from .sensitivity import (flow_magnitude_slopes, jacobian_factor, lifted_kinds, linearize, loss_gradient,
                          point_values)

# Above this many (Jacobian rows x lever columns) the final search's screen does not relinearize
# at every point it reaches (one solve per lever column): it keeps the slopes of the last full
# linearisation and takes the new point's own values and exact loss gradient (one adjoint
# solve). Below it every screen uses the exact model of its point. See PlanProblem.screen_data.
SCREEN_REFRESH_LIMIT = 1_000_000


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
    ratio: np.ndarray       # (L, T) transformer ratio per tap lever (one lever per parallel group)

    _FIELDS = ("fixed", "switched", "steps", "exist", "vset", "ratio")

    def copy(self):
        return Settings(*(getattr(self, f).copy() for f in self._FIELDS))

    def key(self):
        return tuple(np.round(getattr(self, f), 9).tobytes() for f in self._FIELDS)


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
    time_limited: bool = False


class PlanProblem:
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
        # transformer taps: adjustable transformers between the same two buses (same tap side,
        # ratio, step and range) form one lever unless the levers say otherwise, so paralleled
        # units never get different taps and drive circulating Mvar between them
        if levers.taps and len(net0.transformers):
            adj = net0.transformers["adjustable"].to_numpy(bool)
            rows = c0.xfmr_rows
            tap_all = np.flatnonzero((rows >= 0) & adj[np.maximum(rows, 0)])
        else:
            tap_all = np.zeros(0, np.int64)
        tr = net0.transformers
        tr_rows = c0.xfmr_rows[tap_all]
        lo_all = tr["ratio_min_pu"].to_numpy(float)[tr_rows] if len(tr_rows) else np.zeros(0)
        hi_all = tr["ratio_max_pu"].to_numpy(float)[tr_rows] if len(tr_rows) else np.zeros(0)
        step_all = tr["ratio_step_pu"].to_numpy(float)[tr_rows] if len(tr_rows) else np.zeros(0)
        groups = {}
        for j, k in enumerate(tap_all):
            key = (int(c0.f[k]), int(c0.t[k]), bool(c0.tap_from[k]), round(float(c0.ratio[k]), 9),
                   round(float(step_all[j]), 9), round(float(lo_all[j]), 9), round(float(hi_all[j]), 9))
            if not getattr(levers, "parallel_taps_together", True):
                key = key + (j,)
            groups.setdefault(key, []).append(j)     # dict keeps first-seen (branch) order
        members = list(groups.values())
        self.tap_members = [tap_all[g] for g in members]       # compiled branch indices per lever
        first = np.array([g[0] for g in members], np.int64)
        self.tap_br = tap_all[first] if len(first) else np.zeros(0, np.int64)
        self.tap_lo, self.tap_hi, self.tap_step = (lo_all[first], hi_all[first], step_all[first]) \
            if len(first) else (np.zeros(0), np.zeros(0), np.zeros(0))
        # columns of the per-transformer sensitivities summed into one column per lever
        self.tap_all = tap_all
        self.tap_sum = np.zeros((len(tap_all), len(members)))
        for g, js in enumerate(members):
            self.tap_sum[js, g] = 1.0
        # limits per bus
        self.vlim = [self._voltage_limits(c0, lc) for lc in levels]
        # per level and bus: how far inside the band the linear voltage rows aim (lower, upper)
        self.v_margin = [(np.zeros(c0.n), np.zeros(c0.n)) for _ in levels]
        self.flows_run = 0
        # side constraints (e.g. planner.contingency.secure.PostOutageRows): each gives linear
        # rows per level (``rows``) and its AC breaches for the merit (``violations``)
        self.side_constraints = []
        # per level: the latest AC point's Jacobian factor, and the latest full linearisation
        # (flow, sensitivity, loss model), so that a step, the final search and the chord checks
        # at one point share one LU and one set of slopes
        self._factor = {}
        self._linear = {}

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
        for g, br in enumerate(self.tap_members):
            ratio[br] = st.ratio[l, g]
        out = replace(c, ysh=ysh, v_set=v_set, ratio=ratio)
        if np.array_equal(ratio, c.ratio):
            # the same branches at the same ratios: the branch admittance matrix is the level's
            # own (its cache entry is keyed by the ratios, so a later change rebuilds it)
            c.ybranch()
            out._cache["ybranch"] = c._cache["ybranch"]
        return out

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

    # ---- linear model ---------------------------------------------------------------------
    def point_factor(self, l: int, fr: FlowResult, own_kinds: bool = False):
        """Sparse LU (:class:`~planner.optimize.sensitivity.OrderedFactor`) of the Jacobian at
        ``fr`` (level ``l``) with generator limits lifted, or (``own_kinds``) with ``fr``'s own bus
        kinds (generators held at a limit as PQ: the chord checks' Jacobian); one LU where the two
        agree. Kept while ``fr`` is the level's latest point. The linearisation makes its own."""
        c = fr.compiled
        own = own_kinds and not np.array_equal(fr.kind[c.alive], lifted_kinds(c)[c.alive])
        got = self._factor.get((l, own))
        if got is None or got[0] is not fr:
            got = (fr, jacobian_factor(fr, fr.kind if own else None))
            self._factor[(l, own)] = got
        return got[1]

    def linearization(self, l: int, fr: FlowResult):
        """(sensitivity, loss model ``(R, d, const)``) at ``fr``, computed once per point (the
        same settings solved again, e.g. the final plan's check with tables, reuse it)."""
        got = self._linear.get(l)
        if got is None or not (got[0] is fr or same_point(got[0], fr)):
            # its own LU (linearize's plain factor): the step model is the same to the last bit
            # whatever factor the checks at this point use
            sens = self.sensitivity(fr)
            # |c + M du|^2 = |d + R du|^2 + const exactly (sensitivity.Sensitivity.loss_model: an
            # R-only QR on small networks, a Gram matrix from sparse products on large ones)
            got = (fr, sens, sens.loss_model())
            self._linear[l] = got
        return got[1], got[2]

    def level_data(self, l: int, st: Settings, fr: FlowResult, radius_v: float, radius_units: int,
                   model=None) -> LevelData:
        """The linear model of level ``l`` at ``fr`` for a step of the given radii. ``model``
        (sensitivity, loss model): use these instead of the exact ones of ``fr``."""
        c = fr.compiled
        sens, (R, d, const) = model if model is not None else self.linearization(l, fr)
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
        # (inside = within the AC check's own 1e-6 pu tolerance: a bus on the band's edge that
        # the AC check passes must not pay the model's penalty at the present point)
        vmin = np.where(vm >= vmin - 1e-6, np.minimum(lo_m, vm), lo_m)
        vmax = np.where(vm <= vmax + 1e-6, np.maximum(hi_m, vm), hi_m)
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
            extra_rows=[r for side in self.side_constraints for r in side.rows(self, l, st, fr)],
        )

    def screen_exact(self, l: int, fr: FlowResult) -> bool:
        """Whether :meth:`screen_data` at ``fr`` gives the exact model of ``fr``."""
        last = self._linear.get(l)
        n_cols = len(self.site_bus) + len(self.exist_bus) + len(self.vset_bus) + len(self.tap_all)
        return last is None or last[0] is fr or 2 * fr.compiled.n * n_cols <= SCREEN_REFRESH_LIMIT

    def screen_data(self, l: int, st: Settings, fr: FlowResult, radius_units: int, exact=False) -> LevelData:
        """The model the final search ranks its moves with at ``fr`` (level ``l``).

        The exact model of ``fr`` where it is cheap (``SCREEN_REFRESH_LIMIT``) or already built.
        Otherwise the slopes of the level's last full linearisation with ``fr``'s own values
        (voltages, reactive outputs, losses) and ``fr``'s exact loss gradient: the losses are
        ``L(fr) + g du + |R du|^2`` with the old curvature ``R``, exact to first order at ``fr``.
        The field ``loss_linear`` of the result (absent on an exact model) holds the part of
        the gradient that ``|d + R du|^2`` lacks. Moves are only ranked by it: every move taken
        is AC-checked. ``exact``: the exact model of ``fr`` in any case.
        """
        if exact or self.screen_exact(l, fr):
            return self.level_data(l, st, fr, 1.0, radius_units)
        _, sens_b, (R, d, _) = self._linear[l]
        vm, gen_buses, q0, losses = point_values(fr)
        if not np.array_equal(gen_buses, sens_b.gen_buses):
            return self.level_data(l, st, fr, 1.0, radius_units)
        sens = dataclasses.replace(sens_b, vm0=vm, v=fr.v, q0=q0, losses0=losses)
        grad = self.loss_gradient(l, fr, own_kinds=not len(self.vset_bus))
        lev = self.level_data(l, st, fr, 1.0, radius_units, model=(sens, (R, d, losses - float(d @ d))))
        lev.loss_linear = grad - 2.0 * (R.T @ d)
        return lev

    def loss_gradient(self, l: int, fr: FlowResult, own_kinds: bool = False) -> np.ndarray:
        """Exact gradient of the series losses (pu) per lever column at ``fr``: one adjoint solve.
        ``own_kinds``: with generators held at a reactive limit kept there (``fr``'s own bus
        kinds, as the AC checks have them; the chord checks' LU serves), not lifted."""
        shunt_buses = np.concatenate([self.site_bus, self.exist_bus]).astype(np.int64)
        g = loss_gradient(fr, shunt_buses=shunt_buses, vset_buses=self.vset_bus, xfmr_branches=self.tap_all,
                          lu=self.point_factor(l, fr, own_kinds), kind=fr.kind if own_kinds else None)
        if len(self.tap_all) and self.tap_sum.shape[0] != self.tap_sum.shape[1]:
            k = len(shunt_buses) + len(self.vset_bus)
            g = np.concatenate([g[:k], g[k:] @ self.tap_sum])
        return g

    def sensitivity(self, fr: FlowResult, lu=None):
        """Sensitivities at a solved point, one column per lever (a parallel group's members
        summed: they move together). ``lu``: the point's Jacobian factor, if already made."""
        shunt_buses = np.concatenate([self.site_bus, self.exist_bus]).astype(np.int64)
        sens = linearize(fr, shunt_buses=shunt_buses, vset_buses=self.vset_bus, xfmr_branches=self.tap_all,
                         lu=lu)
        if len(self.tap_all) and self.tap_sum.shape[0] != self.tap_sum.shape[1]:
            sens.fold(len(shunt_buses) + len(self.vset_bus), self.tap_sum)
        return sens

    def lever_changes(self, l: int, st: Settings, to: Settings, flow: FlowResult) -> np.ndarray:
        """Change of the lever columns at level ``l`` from ``st`` (solved as ``flow``) to ``to``,
        in the linear model's units (setpoints from the present voltage, as the model has it)."""
        return np.concatenate([self.unit_pu() * (to.fixed + to.steps[l] - st.fixed - st.steps[l]),
                               self.exist_step * (to.exist[l] - st.exist[l]),
                               to.vset[l] - np.abs(flow.v[self.vset_bus]), to.ratio[l] - st.ratio[l]])

    def step_spec(self, st: Settings, flows, radius_v, radius_units, radius_tap, radius_cont=None,
                  seeds=(), radius_sites=None) -> StepSpec:
        """The MILP data of one step at ``st``; ``radius_sites``: at most this many sites opened
        or closed (None: no limit)."""
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
            max_nodes=self.options.max_nodes,
            site_radius=None if radius_sites is None else int(radius_sites),
            used_sites=(st.fixed + st.switched) > 0,
            # several levels: the refinement keeps the first round's sites (see milp.solve_step);
            # at one level the switched units are left out, rounds are cheap and stay as they were
            keep_sites_in_refinement=L > 1,
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


def same_point(a: FlowResult, b: FlowResult, tol: float = 1e-9) -> bool:
    """Two converged load flows of the same network data (every array equal) whose voltages
    agree to ``tol`` pu: one operating point solved twice (to the load flow's tolerance)."""
    if not (a.converged and b.converged) or a.v.shape != b.v.shape:
        return False
    ca, cb = a.compiled, b.compiled
    if ca is not cb:
        for f in dataclasses.fields(ca):
            x, y = getattr(ca, f.name), getattr(cb, f.name)
            if isinstance(x, np.ndarray) and not np.array_equal(x, y):
                return False
    return bool(np.max(np.abs(a.v - b.v), initial=0.0) <= tol) and np.array_equal(a.kind, b.kind)
