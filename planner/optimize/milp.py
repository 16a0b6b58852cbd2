"""Build the mixed-integer model of one optimiser step from linearised data, and solve it.

Following Pyomo's own guidance, :func:`build_model` only builds (from plain arrays) and
:func:`solve_model` only solves; nothing here runs a load flow.

The loss model of each load level is the convex quadratic ``sum_k s_k^2 + const`` where
``s = d + R du`` (see :mod:`planner.optimize.sensitivity`: ``R`` comes from a thin QR of the
resistance-weighted series-current slopes). Each square is replaced by its tangent cuts, so
the model stays linear; the cuts underestimate by at most ``h^2 / 4`` for spacing ``h``, and
the outer loop re-linearises anyway.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

pyo = None   # pyomo.core, imported on first use: importing Pyomo costs seconds (see _load)


def _load():
    """Import Pyomo when a model is first built, so reading or solving a network never pays
    for it. Only its modelling core, the relaxation transformation (planner.optimize.bound)
    and the HiGHS interface are imported, not ``pyomo.environ`` with every plugin package:
    0.7-0.9 s instead of 1.1-1.4 s on the development machine."""
    global pyo
    if pyo is None:
        keep_scipy_deferred()
        import pyomo.core as _pyo
        import pyomo.core.plugins.transform.discrete_vars  # noqa: F401  (registers core.relax_integer_vars)
        pyo = _pyo
    return pyo


def keep_scipy_deferred():
    """Let Pyomo register SciPy as a deferred import, as it does when SciPy is not loaded yet.

    Pyomo's dependency table imports an optional package at once when it is already in
    ``sys.modules``, and for SciPy that means ``scipy.stats``, ``scipy.integrate`` and
    ``scipy.spatial`` as well (about 0.8 s on a quiet machine; the tool uses none of them).
    The planner has always loaded SciPy first, so every plan paid for it. Hiding the top-level
    module while that one table is built keeps SciPy deferred; it is put back before any other
    code runs, and the modules Pyomo later asks for resolve to the very same SciPy. Skipped
    when other threads run (one could import SciPy inside the window) or the table is built;
    the commands that make plans call it before they start a progress bar's thread.

    >>> keep_scipy_deferred()     # returns at once once Pyomo's table exists
    >>> import sys; "pyomo.common.dependencies" in sys.modules
    True
    """
    import sys
    import threading

    if "pyomo.common.dependencies" in sys.modules or "scipy" not in sys.modules \
            or threading.active_count() > 1:
        return
    scipy = sys.modules.pop("scipy")
    try:
        import pyomo.common.dependencies  # noqa: F401  (builds the deferred-import table)
    finally:
        sys.modules["scipy"] = scipy


@dataclass
class LevelData:
    """Linear model of one load level at the current settings (all pu)."""
    weight: float                 # objective units per MW of losses at this level
    d: np.ndarray                 # (k,) square-term offsets
    R: np.ndarray                 # (k, m) square-term slopes
    const: float                  # constant part of the losses, pu
    v_rows: np.ndarray            # bus indices with a voltage row
    v0: np.ndarray                # their present voltages
    dv: np.ndarray                # (rows, m)
    v_lo: np.ndarray
    v_hi: np.ndarray
    q_rows: np.ndarray            # generator-bus rows
    q0: np.ndarray
    dq: np.ndarray
    q_lo: np.ndarray
    q_hi: np.ndarray
    cur_units: np.ndarray         # (S,) units in service now at each site (fixed + switched on; fractional for continuous sites)
    cur_exist: np.ndarray         # (E,) steps on now of each existing bank
    v_now: np.ndarray             # (G,) present voltage at each setpoint lever
    s_rows: np.ndarray = None     # branch rows with a rating that can bind
    s0: np.ndarray = None         # their |S| now, pu
    ds: np.ndarray = None         # (rows, m)
    s_hi: np.ndarray = None       # their ratings, pu
    # further linear limit rows (x0, slopes (rows, m), lo, hi), penalised like the voltage rows:
    # e.g. post-outage voltages of an N-1-secured plan (planner.contingency.secure)
    extra_rows: list = field(default_factory=list)


@dataclass
class StepSpec:
    """Everything one MILP needs besides the per-level data."""
    base_mva: float
    unit_pu: np.ndarray           # (S,) unit size of each site, pu
    max_units: np.ndarray         # (S,)
    allow_fixed: np.ndarray       # (S,) bool
    allow_switched: np.ndarray
    site_cost: np.ndarray         # money per site
    mvar_cost: np.ndarray         # money per Mvar
    sw_mvar_cost: np.ndarray
    sw_site_cost: np.ndarray
    existing_sites: np.ndarray    # (S,) bool: already built (does not count as new)
    continuous: np.ndarray        # (S,) bool: fixed units sized continuously
    max_new_sites: int | None
    budget: float | None
    capital_weight: float         # objective units per money
    exist_step_pu: np.ndarray     # (E,)
    exist_max: np.ndarray         # (E,)
    v_lo: np.ndarray              # (G,) setpoint range
    v_hi: np.ndarray
    common_setpoints: bool
    tap_step: np.ndarray          # (T,) pu per step; 0 = continuous
    tap_lo: np.ndarray            # (L, T) lowest allowed change from now (pu)
    tap_hi: np.ndarray
    unit_radius: int
    unit_radius_of: np.ndarray    # (S,) trust radius in units per site (fractional for continuous sites)
    v_radius: float
    tap_radius: float             # pu
    tangent_points: int
    penalty: float
    tie_break: float = 1e-7       # per unit installed, to prefer the smaller of equal plans
    time_limit: float = 60.0      # emergency stop per MILP solve (seconds); recorded when it fires
    mip_gap: float = 1e-7
    max_nodes: int = 20000        # deterministic work bound per MILP solve (branch-and-bound nodes)
    # site trust region: at most this many sites may be opened or closed in one step (None: no
    # limit); ``used_sites`` (S,) bool marks the sites holding units at the present point
    site_radius: int | None = None
    used_sites: np.ndarray | None = None
    # cut-refinement rounds after the first keep the first round's sites (see solve_step)
    keep_sites_in_refinement: bool = False
    levels: list = field(default_factory=list)   # list[LevelData]
    # lever changes (one (L, m) array each) at which the loss cuts start out exact: earlier
    # steps' solutions, so the cut refinement does not have to find that region again
    seeds: list = field(default_factory=list)


def objective_scale(spec: "StepSpec") -> float:
    """Cost of the present point's losses: the model's objective is divided by it, so HiGHS
    sees numbers near one whatever the currency or the size of the network."""
    total = sum(lev.weight * spec.base_mva * (float(lev.d @ lev.d) + lev.const) for lev in spec.levels)
    return total if total > 0 else 1.0


def build_model(spec: StepSpec):
    """A Pyomo model of one trust-region step over all load levels, built from the spec's arrays.

    Every dense row (loss square terms, voltage / reactive / loading / extra limit rows) is one
    flat linear expression over one variable per lever column (see :mod:`.rows`), and a limit
    side that no change inside the step can reach is left out.
    """
    _load()
    from .rows import Columns, add_limit_rows, box_reach, linear

    m = pyo.ConcreteModel(name="loss_step")
    nS, nL = len(spec.unit_pu), len(spec.levels)
    # With continuous levers only (setpoints, continuous taps) the step is a convex QP: HiGHS
    # solves the exact quadratic loss model, with no tangent cuts and no refinement rounds.
    # Any integer lever needs the cuts: HiGHS solves no mixed-integer QP.
    m.exact_quadratic = is_continuous_step(spec)
    S, E, G, T, L = range(nS), range(len(spec.exist_step_pu)), range(len(spec.v_lo)), range(len(spec.tap_step)), range(nL)
    nmax = np.asarray(spec.max_units, int)
    cur = np.array([lev.cur_units for lev in spec.levels], float).reshape(nL, nS)
    radius = np.asarray(spec.unit_radius_of, float)
    tr_lo, tr_hi = np.maximum(cur - radius, 0.0), np.minimum(cur + radius, nmax)   # (L, S) units
    fixed_ok = np.asarray(spec.allow_fixed, bool)
    # At a single level a switched unit does what a fixed unit does, costs no less and carries
    # a larger tie-break, so no optimum uses one: switched units are left out there (exact).
    dominated = (nL == 1) & fixed_ok & (np.asarray(spec.sw_mvar_cost) >= 0) & (np.asarray(spec.sw_site_cost) >= 0)
    sw_ok = np.asarray(spec.allow_switched, bool) & ~dominated
    # the units in service at level l: nf alone where switched units are out, k alone where fixed
    # units are, else a variable u[l, s] = nf + k; the unit trust region is that variable's bounds
    only_nf = ~sw_ok
    only_k = sw_ok & ~fixed_ok
    both = sw_ok & fixed_ok

    def nf_bounds(_, s):
        if not fixed_ok[s]:
            return (0, 0)
        if only_nf[s]:
            return _ordered((tr_lo[:, s].max(), tr_hi[:, s].min()))
        return (0, int(nmax[s]))

    def k_bounds(_, l, s):
        if not sw_ok[s]:
            return (0, 0)
        if only_k[s]:
            return _ordered((tr_lo[l, s], tr_hi[l, s]))
        return (0, int(nmax[s]))

    m.z = pyo.Var(S, within=pyo.Binary)
    m.zs = pyo.Var(S, within=pyo.Binary, bounds=lambda _, s: (0, 1 if sw_ok[s] else 0))
    m.nf = pyo.Var(S, domain=lambda _, s: pyo.NonNegativeReals if spec.continuous[s] else pyo.NonNegativeIntegers,
                   bounds=nf_bounds)
    m.ns = pyo.Var(S, within=pyo.NonNegativeIntegers, bounds=lambda _, s: (0, int(nmax[s]) if sw_ok[s] else 0))
    m.k = pyo.Var(L, S, within=pyo.NonNegativeIntegers, bounds=k_bounds)
    both_idx = [(l, s) for l in L for s in np.flatnonzero(both).tolist()]
    m.u = pyo.Var(both_idx, domain=lambda _, l, s: pyo.NonNegativeReals if spec.continuous[s] else pyo.NonNegativeIntegers,
                  bounds=lambda _, l, s: _ordered((tr_lo[l, s], tr_hi[l, s])))
    m.u_def = pyo.Constraint(both_idx, rule=lambda m, l, s: (0.0, linear([1.0, -1.0, -1.0], [m.u[l, s], m.nf[s], m.k[l, s]]), 0.0))

    def unit_var(l, s):
        return m.u[l, s] if both[s] else (m.k[l, s] if only_k[s] else m.nf[s])

    m.site_cap = pyo.Constraint(S, rule=lambda m, s: (None, linear(
        [1.0, 1.0, -float(nmax[s])], [m.nf[s], m.ns[s], m.z[s]]), 0.0))
    sw_sites = np.flatnonzero(sw_ok).tolist()
    m.sw_cap = pyo.Constraint(sw_sites, rule=lambda m, s: (None, linear([1.0, -float(nmax[s])], [m.ns[s], m.zs[s]]), 0.0))
    m.steps_cap = pyo.Constraint([(l, s) for l in L for s in sw_sites],
                                 rule=lambda m, l, s: (None, linear([1.0, -1.0], [m.k[l, s], m.ns[s]]), 0.0))
    new = [s for s in S if not spec.existing_sites[s]]
    if spec.max_new_sites is not None and len(new) > spec.max_new_sites:
        m.sites_cap = pyo.Constraint(expr=(None, linear([1.0] * len(new), [m.z[s] for s in new]),
                                           float(int(spec.max_new_sites))))
    used = np.zeros(nS, bool) if spec.used_sites is None else np.asarray(spec.used_sites, bool)
    if spec.site_radius is not None and used.any() and spec.site_radius < nS:
        # Hamming distance of the site choice from the present one: sites closed + sites opened
        m.site_moves = pyo.Constraint(expr=(None, linear(
            np.where(used, -1.0, 1.0).tolist(), [m.z[s] for s in S], float(used.sum())), float(spec.site_radius)))
    mvar = np.asarray(spec.unit_pu, float) * spec.base_mva
    cap_coef = ([float(c) for c in spec.site_cost] + [float(c) for c in spec.sw_site_cost]
                + (np.asarray(spec.mvar_cost) * mvar).tolist()
                + ((np.asarray(spec.mvar_cost) + np.asarray(spec.sw_mvar_cost)) * mvar).tolist())
    cap_vars = [m.z[s] for s in S] + [m.zs[s] for s in S] + [m.nf[s] for s in S] + [m.ns[s] for s in S]
    m.capital = pyo.Expression(expr=linear(cap_coef, cap_vars))
    if spec.budget is not None and nS:
        m.budget_cap = pyo.Constraint(expr=(None, linear(cap_coef, cap_vars), float(spec.budget)))

    # setpoints: one variable per level, or shared
    lv = [0] if spec.common_setpoints else list(L)
    v_now = {l: spec.levels[l].v_now for l in L}

    def v_bounds(_, l, g):
        ref = v_now[l][g]
        return (max(spec.v_lo[g], ref - spec.v_radius), min(spec.v_hi[g], ref + spec.v_radius))
    m.v = pyo.Var(lv, G, bounds=lambda _, l, g: _ordered(v_bounds(_, l, g)))
    m.e = pyo.Var(L, E, within=pyo.NonNegativeIntegers, bounds=lambda _, l, e: (
        max(0, int(spec.levels[l].cur_exist[e]) - spec.unit_radius),
        min(int(spec.exist_max[e]), int(spec.levels[l].cur_exist[e]) + spec.unit_radius)))

    def tap_domain(_, l, t):
        return pyo.Integers if spec.tap_step[t] > 0 else pyo.Reals

    def tap_bounds(_, l, t):
        lo, hi = max(spec.tap_lo[l, t], -spec.tap_radius), min(spec.tap_hi[l, t], spec.tap_radius)
        if spec.tap_step[t] > 0:
            return _ordered((np.ceil(lo / spec.tap_step[t] - 1e-9), np.floor(hi / spec.tap_step[t] + 1e-9)))
        return _ordered((lo, hi))
    m.d = pyo.Var(L, T, domain=tap_domain, bounds=tap_bounds)

    scale = objective_scale(spec)
    root = np.sqrt(spec.base_mva)   # square terms in units whose squares are MW
    obj_coef, obj_vars, obj_const = [], [], 0.0
    offset = 0.0      # the breaches no decision changes (see rows.add_limit_rows)
    obj_coef += [spec.capital_weight / scale * c for c in cap_coef]
    obj_vars += cap_vars
    m.levels = pyo.Block(L)
    level_columns = []
    # at most this many bank sites can change at once: the new ones the site limit allows and
    # those with units now (which may go to none)
    for l in L:
        lev = spec.levels[l]
        b = m.levels[l]
        vl = 0 if spec.common_setpoints else l
        moving = int(np.count_nonzero((cur[l] > 0) | np.asarray(spec.existing_sites, bool)))
        k_sites = None if spec.max_new_sites is None else int(spec.max_new_sites) + moving
        col_vars = [unit_var(l, s) for s in S] + [m.e[l, e] for e in E] + [m.v[vl, g] for g in G] + [m.d[l, t] for t in T]
        col_scale = np.concatenate([spec.unit_pu, spec.exist_step_pu, np.ones(len(G)),
                                    np.where(spec.tap_step > 0, spec.tap_step, 1.0)])
        col_offset = np.concatenate([spec.unit_pu * cur[l], spec.exist_step_pu * np.asarray(lev.cur_exist, float),
                                     np.asarray(lev.v_now, float), np.zeros(len(T))])
        # the box of du from the variables' own bounds, so it holds every change the model can
        # make (a shared setpoint variable is bounded around the first level's voltage, which
        # differs from this level's where a generator sits at a reactive limit)
        lo_du, hi_du = _du_ranges(spec, lev, l)
        for j, var in enumerate(col_vars):
            if var.lb is not None:
                lo_du[j] = min(col_scale[j] * var.lb - col_offset[j], 0.0)
            if var.ub is not None:
                hi_du[j] = max(col_scale[j] * var.ub - col_offset[j], 0.0)
        cols = Columns(col_vars, col_scale, col_offset, lo_du, hi_du, np.arange(len(lo_du)) < nS, k_sites)
        level_columns.append((col_vars, col_scale, col_offset))
        # every column starts at "no change" (clipped to its bounds): a column whose
        # coefficients are all dropped (a zero-width box) is in no row, the solver never sees
        # it, and it must still read back as the present position
        for var, sc, off in zip(col_vars, col_scale, col_offset):
            if var.value is None:
                x = off / sc
                x = max(x, var.lb) if var.lb is not None else x
                x = min(x, var.ub) if var.ub is not None else x
                var.set_value(round(x) if var.is_integer() else x, skip_validation=True)
        # loss model: s_k = root (d_k + R_k du), each square under-estimated by its tangent cuts
        K = range(len(lev.d))
        b.s = pyo.Var(K)
        b.w = pyo.Var(K, within=pyo.NonNegativeReals)
        Rr = root * np.asarray(lev.R, float).reshape(len(lev.d), -1)
        s_lo, s_hi = box_reach(Rr, lo_du, hi_du)
        s_lo, s_hi = s_lo + root * lev.d, s_hi + root * lev.d
        # the dropped slopes move each square by at most 2 |s| e + e^2: keep that below 1e-7 of
        # the level's losses in all (far inside the MILP gap and the cut-refinement tolerance)
        loss_now = spec.base_mva * (float(lev.d @ lev.d) + lev.const)
        s_big = np.maximum(np.abs(s_lo), np.abs(s_hi))
        e_tol = 1e-7 * max(loss_now, 1e-12) / max(len(lev.d), 1) / (2.0 * (s_big.max() if len(K) else 0.0) + 1.0)
        const, terms, _ = cols.terms(Rr, tol=e_tol)
        b.s_def = pyo.Constraint(K, rule=lambda _, k: (
            float(root * lev.d[k] + const[k]), linear([1.0] + [-c for c in terms[k][0]], [b.s[k]] + terms[k][1]),
            float(root * lev.d[k] + const[k])))
        b.cuts = pyo.ConstraintList()
        if m.exact_quadratic:
            b.w.fix(0.0)     # unused: the objective holds the squares themselves (below)
        count = _cut_counts(spec, s_hi - s_lo, loss_now)
        for k in ([] if m.exact_quadratic else K):
            pts = np.linspace(s_lo[k], s_hi[k], count[k]) if s_hi[k] > s_lo[k] else np.array([s_lo[k]])
            pts = np.unique(np.concatenate([pts, [root * lev.d[k]]]))
            for p in pts[pts != 0.0]:     # the cut at 0 is w >= 0, the variable's own bound
                b.cuts.add((None, linear([2.0 * p, -1.0], [b.s[k], b.w[k]]), p * p))
        for seed in ([] if m.exact_quadratic else spec.seeds):
            for k, p in enumerate(root * (lev.d + lev.R @ seed[l])):
                if p != 0.0:
                    b.cuts.add((None, linear([2.0 * p, -1.0], [b.s[k], b.w[k]]), p * p))
        b.loss = pyo.Expression(expr=linear([1.0] * len(K), [b.w[k] for k in K], spec.base_mva * float(lev.const)))  # MW
        # voltage, reactive and loading rows, each with a penalised slack
        breach = (add_limit_rows(pyo, b, "v", lev.v0, lev.dv, lev.v_lo, lev.v_hi, cols)
                  + add_limit_rows(pyo, b, "q", lev.q0, lev.dq, lev.q_lo, lev.q_hi, cols)
                  + add_limit_rows(pyo, b, "s", lev.s0, lev.ds, None, lev.s_hi, cols))
        for j, (x0, slopes, lo, hi) in enumerate(lev.extra_rows or ()):
            breach += add_limit_rows(pyo, b, f"extra{j}", x0, slopes, lo, hi, cols)
        offset += spec.penalty / scale * breach
        obj_coef += [lev.weight / scale] * len(K)
        obj_vars += [b.w[k] for k in K]
        obj_const += lev.weight / scale * spec.base_mva * float(lev.const)
        for comp in b.component_objects(pyo.Var, descend_into=False):
            if "_slack_" in comp.local_name:
                obj_coef += [spec.penalty / scale] * len(comp)
                obj_vars += list(comp.values())
        obj_coef += [spec.tie_break] * nS
        obj_vars += [m.k[l, s] for s in S]
    obj_coef += [spec.tie_break] * nS + [2.0 * spec.tie_break] * nS
    obj_vars += [m.nf[s] for s in S] + [m.ns[s] for s in S]
    expr = linear(obj_coef, obj_vars, obj_const)
    if m.exact_quadratic:
        expr = expr + pyo.quicksum(spec.levels[l].weight / scale * m.levels[l].s[k] ** 2
                                   for l in L for k in range(len(spec.levels[l].d)))
    m.objective = pyo.Objective(expr=expr, sense=pyo.minimize)
    # objective value = the solver's objective + this constant (solve_model adds it back)
    m.objective_offset = float(offset)
    # per level: the lever columns (variables, scale, offset; du = scale * var - offset), read
    # by reduce_candidates to evaluate the loss model at a relaxed solution
    m.level_columns = level_columns
    return m


def is_continuous_step(spec: StepSpec) -> bool:
    """True when no lever of the step is an integer: no bank sites, no existing banks, no
    stepped taps (the step model is then a convex QP, solved exactly)."""
    return (len(spec.unit_pu) == 0 and len(spec.exist_step_pu) == 0
            and not np.any(np.asarray(spec.tap_step, float) > 0))


def _cut_counts(spec: StepSpec, width: np.ndarray, loss_mw: float) -> np.ndarray:
    """Tangent points per square term, evenly spaced over the term's range ``width``.

    Between tangent points ``h`` apart a square is under-estimated by at most ``h^2 / 4``. The
    spacing keeps the sum of those errors within a quarter of the tolerance at which
    :func:`solve_step` stops refining the cuts; a square with a narrow range needs fewer cuts
    (at least 2); the most per square is capped (see below).
    """
    if not len(width):
        return np.zeros(0, int)
    tol = max(REFINE_TOL, 0.5 * spec_mip_gap(spec))
    budget = 0.25 * tol * max(loss_mw, 1e-12) / len(width)      # MW per square term
    need = np.ceil(np.maximum(width, 0.0) / (2.0 * np.sqrt(budget))) + 1
    # chosen by measurement: at one level up to 4 x tangent_points (the 10,000-bus grid's plan
    # stays verified), over several levels tangent_points (the demo study's three-level LPs grew
    # to ~3,000 rows and slowed more than the saved refinement rounds gained)
    cap = (4 if len(spec.levels) == 1 else 1) * max(int(spec.tangent_points), 2)
    return np.clip(need, 2, cap).astype(int)


REFINE_TOL = 1e-5    # relative error of the cut model at which solve_step stops refining


def solve_step(spec: StepSpec, *, max_rounds: int = 12, rel_tol: float = REFINE_TOL):
    """Build and solve one step, tightening the loss cuts until they are exact enough.

    The tangent cuts underestimate each square between tangent points. After each solve,
    cuts are added at the solution's own square-term values (an outer-approximation
    refinement) until the cut model agrees with the exact quadratic at the solution within
    ``rel_tol`` of the losses, or within half the MILP gap if that is wider. Returns (solution,
    number of MILP solves, every round's solution in order).

    The work is bounded by counts only (rounds, branch-and-bound nodes per solve), so the same
    step gives the same solution on a quiet or a loaded machine; the time limit of each solve
    is an emergency stop whose firing the solution records (``time_limited``).
    """
    m = build_model(spec)
    solver = new_solver()
    solves = 0
    sol = prev = None
    rounds = []
    timed_out = False
    # many candidate sites: the MILP runs on those its relaxation ranks best (reduce_candidates);
    # the relaxation's optimum stays the step's lower bound, valid for every candidate
    relaxed_bound = reduce_candidates(m, spec, solver)
    timed_out = bool(getattr(m, "reduction_time_limited", False))
    # the first solve has no start (one at the present point changed which of the near-equal
    # solutions inside the gap a node-limited solve returns: plans up to 1e-4 worse on the
    # demo, see DEVELOPERS.md), except in the later steps of a large placement
    # (present_point_start); later rounds start from the previous round's solution
    start = present_point_start(m, spec) if relaxed_bound is None else None
    for _ in range(max_rounds):
        sol = solve_model(m, spec, solver, start=start)
        solves += 1
        if relaxed_bound is not None and not rounds and sol.ok and \
                sol.objective - relaxed_bound > REDUCE_ACCEPT * spec_mip_gap(spec) * abs(sol.objective):
            # the reduced choice is far from the relaxation's bound: the dropped sites may be the
            # ones the step needs, so the full MILP runs, started at the reduced choice
            timed_out = timed_out or sol.time_limited
            for s in m.reduced_away:
                m.z[s].unfix()
                m.zs[s].unfix()
            sol = solve_model(m, spec, solver, start=_decision_values(m))
            solves += 1
        timed_out = timed_out or sol.time_limited
        sol.time_limited = timed_out
        if relaxed_bound is not None and sol.ok:
            sol.bound = min(sol.bound, relaxed_bound)
        if not sol.ok:
            return sol, solves, rounds
        rounds.append(sol)
        gap = 0.0
        total = 0.0
        added = False
        if m.exact_quadratic:
            break        # the exact quadratic: nothing to refine
        for l, lev in enumerate(spec.levels):
            b = m.levels[l]
            total += lev.weight * float(sol.predicted_loss_pu[l]) * spec.base_mva
            for k in range(len(lev.d)):
                sk = pyo.value(b.s[k])
                excess = sk * sk - pyo.value(b.w[k])
                if excess > 1e-14:
                    gap += excess * lev.weight      # MW x weight
                    b.cuts.add(b.w[k] >= 2.0 * sk * b.s[k] - sk * sk)
                    added = True
        # the next round starts from this solution: still feasible after the added cuts once
        # HiGHS completes the continuous columns (its partial-start completion)
        start = _decision_values(m)
        if added and spec.keep_sites_in_refinement and len(rounds) == 1:
            # The added cuts correct the loss model by about its cut error (a few 1e-4 of the
            # losses); re-opening the choice of sites for that re-runs the whole tree search
            # (on the demo's first step about 5 s a round, against 0.1-0.4 s with the sites
            # kept). Units, switching, setpoints and taps stay free; later steps and the final
            # search move sites again.
            for v in list(m.z.values()) + list(m.zs.values()):
                v.fix(int(round(v.value)))
        same = prev is not None and _same_solution(prev, sol)
        # HiGHS holds each cut only to its feasibility tolerance (1e-7), so a tiny gap remains
        # cuts closer than half the MILP's own optimality gap cannot change what it may return
        tol = max(rel_tol, 0.5 * spec_mip_gap(spec))
        if not added or gap <= tol * max(total, 1e-12) or same:
            break
        prev = sol
    return sol, solves, rounds


# Candidate reduction (first step of a large placement). Above REDUCE_ABOVE free candidate
# sites the site choice's relaxation is weak (it spreads compensation fractionally over many
# sites) and branch-and-bound spends its node budget proving a bound over all of them. The
# step's MILP instead runs on the sites its LP relaxation ranks best: every site the relaxation
# opens at all, at least KEEP_MIN and at most KEEP_MAX times the site limit. Ranked by relaxed
# opening (z) first, then by the loss model's slope at the relaxed point (the most loss saved
# per unit first), then by index. Sites holding units now are always kept. Later steps and the
# final search see every candidate again. The reduced choice is kept only when its objective is
# within REDUCE_ACCEPT x the MILP gap of the relaxation's bound; otherwise (a relaxation that
# serves breached limits fractionally from many sites ranks the sites poorly) the full MILP
# runs, started at the reduced choice.
REDUCE_ABOVE = 100
KEEP_MIN, KEEP_MAX = 2, 3
REDUCE_ACCEPT = 10


def reduce_candidates(m, spec: StepSpec, solver) -> float | None:
    """Restrict a large first-step site choice to the candidates its relaxation ranks best.

    Applies when a site limit is given, no site trust region is active (the first step; every
    step when ``Options.site_radius`` is None) and more than ``REDUCE_ABOVE`` (and ``KEEP_MAX``
    x the limit) new sites are free. Solves the LP relaxation of ``m`` on ``solver``, fixes the
    site binaries of the dropped candidates at zero and returns the relaxation's objective
    (model units): a lower bound of the step model over every candidate. Returns None where
    nothing was reduced. Sets ``m.reduction_time_limited`` when the emergency time limit
    stopped the relaxation (the full MILP then runs, and the step records the stop).
    """
    cap = spec.max_new_sites
    nS = len(spec.unit_pu)
    used = np.zeros(nS, bool) if spec.used_sites is None else np.asarray(spec.used_sites, bool)
    locked = used | np.asarray(spec.existing_sites, bool)
    free = np.flatnonzero(~locked)
    if cap is None or (spec.site_radius is not None and used.any()) or \
            len(free) <= max(REDUCE_ABOVE, KEEP_MAX * int(cap)):
        return None
    opts = dict(deterministic_options(spec), solve_relaxation=True)
    try:
        res = solver.solve(m, load_solutions=False, time_limit=spec_time_limit(spec),
                           raise_exception_on_nonoptimal_result=False, solver_options=opts)
        if "TimeLimit" in str(res.termination_condition):
            m.reduction_time_limited = True
        if str(res.solution_status).split(".")[-1] != "optimal":
            return None
        res.solution_loader.load_vars()
    except Exception:  # the full MILP runs instead
        return None
    opened = np.array([max(pyo.value(m.z[s]), pyo.value(m.zs[s])) for s in range(nS)], float)
    # slope of the exact quadratic loss model at the relaxed point, per unit at each site
    slope = np.zeros(nS)
    for lev, (col_vars, scale, offset) in zip(spec.levels, m.level_columns):
        if not len(lev.d):
            continue
        du = scale * np.array([pyo.value(v) for v in col_vars], float) - offset
        r = lev.d + lev.R @ du
        slope += lev.weight * 2.0 * (lev.R[:, :nS].T @ r) * np.asarray(spec.unit_pu, float)
    rank = free[np.lexsort((free, slope[free], -np.round(opened[free], 9)))]
    support = int(np.count_nonzero(opened[free] > 1e-6))
    keep = int(np.clip(support, KEEP_MIN * int(cap), KEEP_MAX * int(cap)))
    m.reduced_away = rank[keep:].tolist()
    for s in m.reduced_away:
        m.z[s].fix(0)
        m.zs[s].fix(0)
    return float(pyo.value(m.objective)) + float(getattr(m, "objective_offset", 0.0))


def present_point_start(m, spec: StepSpec) -> list | None:
    """A MIP start at "no change" for a later step of a large one-level placement (sites in
    use, more than ``REDUCE_ABOVE`` candidates), or None.

    There HiGHS otherwise spends most of the step finding its first incumbent (sub-MIPs at the
    root: on the 10,000-bus grid's second step 1.2-1.5 s of HiGHS against 0.4 s with the
    start, the same solution). The present point is feasible in every step model (its
    limit rows carry slacks). Several levels keep no start: the present split into fixed,
    switched and per-level steps is not in the spec, and the demo's multi-level steps moved
    with a start (see DEVELOPERS.md).
    """
    used = np.zeros(len(spec.unit_pu), bool) if spec.used_sites is None else np.asarray(spec.used_sites, bool)
    if len(spec.levels) != 1 or not used.any() or len(spec.unit_pu) <= REDUCE_ABOVE or \
            any(not v.fixed and v.ub for v in m.zs.values()):
        return None
    # build_model set every lever column to its present position
    start = [(m.z[s], float(used[s])) for s in range(len(spec.unit_pu))]
    return start + _decision_values(m)


def _decisions(m):
    """The lever columns of a step model (integers and setpoints): a MIP start fixes these and
    leaves the loss and slack columns for HiGHS to complete."""
    for comp in (m.z, m.zs, m.nf, m.ns, m.k, m.v, m.e, m.d):
        yield from comp.values()


def _decision_values(m) -> list:
    return [(v, float(v.value)) for v in _decisions(m) if v.value is not None]


def _same_solution(a, b) -> bool:
    return (np.allclose(a.fixed, b.fixed, atol=1e-7, rtol=0) and np.array_equal(a.switched, b.switched)
            and np.array_equal(a.steps, b.steps) and np.array_equal(a.exist, b.exist)
            and np.allclose(a.vset, b.vset, atol=1e-7, rtol=0) and np.allclose(a.tap_change, b.tap_change, atol=1e-7, rtol=0))


def _ordered(bounds):
    lo, hi = bounds
    return (lo, hi) if lo <= hi else (hi, hi)


def _du_ranges(spec: StepSpec, lev: LevelData, l: int):
    """Widest change of each lever column allowed in this step (for placing cuts)."""
    lo, hi = [], []
    for s in range(len(spec.unit_pu)):
        cur = lev.cur_units[s]
        lo.append(spec.unit_pu[s] * max(-cur, -spec.unit_radius_of[s]))
        hi.append(spec.unit_pu[s] * min(spec.max_units[s] - cur, spec.unit_radius_of[s]))
    for e in range(len(spec.exist_step_pu)):
        cur = lev.cur_exist[e]
        lo.append(spec.exist_step_pu[e] * max(-cur, -spec.unit_radius))
        hi.append(spec.exist_step_pu[e] * min(spec.exist_max[e] - cur, spec.unit_radius))
    for g in range(len(spec.v_lo)):
        lo.append(max(spec.v_lo[g] - lev.v_now[g], -spec.v_radius))
        hi.append(min(spec.v_hi[g] - lev.v_now[g], spec.v_radius))
    for t in range(len(spec.tap_step)):
        lo.append(max(spec.tap_lo[l, t], -spec.tap_radius))
        hi.append(min(spec.tap_hi[l, t], spec.tap_radius))
    return np.minimum(np.array(lo, float), 0.0), np.maximum(np.array(hi, float), 0.0)


@dataclass
class StepSolution:
    ok: bool
    status: str
    fixed: np.ndarray
    switched: np.ndarray
    steps: np.ndarray      # (L, S)
    exist: np.ndarray      # (L, E)
    vset: np.ndarray       # (L, G)
    tap_change: np.ndarray  # (L, T) pu
    predicted_loss_pu: np.ndarray  # (L,) exact quadratic model at the solution
    objective: float
    time_limited: bool = False     # the emergency time limit stopped this solve: a re-run may differ
    bound: float = -np.inf         # HiGHS's lower bound of the model objective (model units)


def new_solver():
    """A persistent HiGHS interface: re-solves after added cuts update the model in place."""
    from pyomo.contrib.solver.solvers.highs import Highs

    return Highs()


def deterministic_options(spec) -> dict:
    """HiGHS options that make a solve depend on the model only: one thread, a fixed seed, a
    node limit as the work bound (the best solution within it is used)."""
    return {"mip_rel_gap": spec_mip_gap(spec), "output_flag": False, "threads": 1, "random_seed": 0,
            "mip_max_nodes": int(getattr(spec, "max_nodes", 20000)), "solve_relaxation": False,
            # primal heuristics cost most of the time of these small models and rarely beat
            # branching on them (measured on the 33-bus placement cases)
            "mip_heuristic_effort": 0.01}


def solve_model(m, spec: StepSpec, solver=None, time_limit=None, start: list | None = None) -> StepSolution:
    """Solve with HiGHS and read the solution back as arrays (integers rounded). The node limit
    bounds the work; the time limit is only an emergency stop, recorded in the solution.
    ``start``: values of some columns ([(Pyomo variable, value)]) handed to HiGHS as a MIP start
    (HiGHS fixes them and completes the others; an infeasible start is ignored)."""
    _load()
    solver = solver or new_solver()
    if start:
        _with_start(solver, start)
    try:
        res = solver.solve(m, load_solutions=False,
                           time_limit=time_limit if time_limit is not None else spec_time_limit(spec),
                           raise_exception_on_nonoptimal_result=False,
                           solver_options=deterministic_options(spec))
        status = str(res.termination_condition).split(".")[-1]
        sol = str(res.solution_status).split(".")[-1]
        ok = sol in ("optimal", "feasible")
        timed_out = "maxTimeLimit" in status or "TimeLimit" in status
        bound = res.objective_bound if res.objective_bound is not None else -np.inf
        if ok:
            res.solution_loader.load_vars()
    except Exception as exc:  # HiGHS or Pyomo failure: report it, the outer loop decides
        return _empty_solution(spec, f"solver error: {exc}")
    if not ok:
        return _empty_solution(spec, status)
    S = len(spec.unit_pu)
    E = len(spec.exist_step_pu)
    G = len(spec.v_lo)
    T = len(spec.tap_step)
    L = len(spec.levels)
    rnd = lambda x: int(round(pyo.value(x)))  # noqa: E731
    fixed = np.array([pyo.value(m.nf[s]) if spec.continuous[s] else rnd(m.nf[s]) for s in range(S)], float)
    switched = np.array([rnd(m.ns[s]) for s in range(S)], int)
    steps = np.array([[rnd(m.k[l, s]) for s in range(S)] for l in range(L)], int).reshape(L, S)
    exist = np.array([[rnd(m.e[l, e]) for e in range(E)] for l in range(L)], int).reshape(L, E)
    vset = np.array([[pyo.value(m.v[0 if spec.common_setpoints else l, g]) for g in range(G)]
                     for l in range(L)], float).reshape(L, G)
    tap = np.array([[(pyo.value(m.d[l, t]) * spec.tap_step[t] if spec.tap_step[t] > 0
                      else pyo.value(m.d[l, t])) for t in range(T)] for l in range(L)], float).reshape(L, T)
    if T:
        step = np.where(spec.tap_step > 0, spec.tap_step, 1.0)
        tap = np.where(spec.tap_step > 0, np.round(tap / step) * step, tap)
    offset = float(getattr(m, "objective_offset", 0.0))   # constant kept out of HiGHS (build_model)
    pred = []
    for l, lev in enumerate(spec.levels):
        du = np.concatenate([spec.unit_pu * (fixed + steps[l] - lev.cur_units),
                             spec.exist_step_pu * (exist[l] - lev.cur_exist),
                             vset[l] - lev.v_now, tap[l]])
        s = lev.d + lev.R @ du if len(lev.d) else np.zeros(0)
        pred.append(float(s @ s + lev.const))
    return StepSolution(True, status, fixed, switched, steps, exist, vset, tap, np.array(pred),
                        float(pyo.value(m.objective)) + offset, timed_out, float(bound) + offset)


def _with_start(solver, start: list):
    """Hand ``start`` to HiGHS just before its next run (after Pyomo has brought the persistent
    model up to date, so the column numbers are current). Pyomo's HiGHS interface has no MIP
    start option; this uses its persistent highspy model."""
    run = type(solver)._solve

    def _solve():
        del solver._solve                     # one run only
        h = getattr(solver, "_solver_model", None)
        cols = getattr(solver, "_pyomo_var_to_solver_var_map", {})
        pairs = sorted((cols[id(v)], x) for v, x in start if id(v) in cols)
        if h is not None and pairs:
            idx = np.array([p[0] for p in pairs], np.int32)
            h.setSolution(len(idx), idx, np.array([p[1] for p in pairs], float))
        return run(solver)
    solver._solve = _solve


def spec_time_limit(spec) -> float:
    return float(getattr(spec, "time_limit", 60.0))


def spec_mip_gap(spec) -> float:
    return float(getattr(spec, "mip_gap", 1e-7))


def _empty_solution(spec, status):
    L = len(spec.levels)
    return StepSolution(False, status, np.zeros(0, int), np.zeros(0, int), np.zeros((L, 0), int),
                        np.zeros((L, 0), int), np.zeros((L, 0)), np.zeros((L, 0)), np.zeros(L), np.inf)
