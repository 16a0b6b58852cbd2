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

pyo = None   # pyomo.environ, imported on first use: importing Pyomo costs seconds (see _load)


def _load():
    """Import Pyomo when a model is first built, so reading or solving a network never pays
    for it."""
    global pyo
    if pyo is None:
        import pyomo.environ as _pyo
        pyo = _pyo
    return pyo


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
    levels: list = field(default_factory=list)   # list[LevelData]
    # lever changes (one (L, m) array each) at which the loss cuts start out exact: earlier
    # steps' solutions, so the cut refinement does not have to find that region again
    seeds: list = field(default_factory=list)


def _lin(coefs, terms, rel_tol=1e-9):
    """quicksum of coef*term, dropping coefficients far below the row's largest (they only
    hurt the solver's numerics)."""
    coefs = np.asarray(coefs, float)
    tol = rel_tol * (np.abs(coefs).max() if coefs.size else 0.0)
    return pyo.quicksum(float(c) * t for c, t in zip(coefs, terms) if abs(c) > tol)


def objective_scale(spec: "StepSpec") -> float:
    """Cost of the present point's losses: the model's objective is divided by it, so HiGHS
    sees numbers near one whatever the currency or the size of the network."""
    total = sum(lev.weight * spec.base_mva * (float(lev.d @ lev.d) + lev.const) for lev in spec.levels)
    return total if total > 0 else 1.0


def build_model(spec: StepSpec):
    """A Pyomo model of one trust-region step over all load levels."""
    _load()
    m = pyo.ConcreteModel(name="loss_step")
    S = range(len(spec.unit_pu))
    E = range(len(spec.exist_step_pu))
    G = range(len(spec.v_lo))
    T = range(len(spec.tap_step))
    L = range(len(spec.levels))
    nmax = spec.max_units
    m.z = pyo.Var(S, within=pyo.Binary)
    m.zs = pyo.Var(S, within=pyo.Binary)
    m.nf = pyo.Var(S, domain=lambda _, s: pyo.NonNegativeReals if spec.continuous[s] else pyo.NonNegativeIntegers,
                   bounds=lambda _, s: (0, int(nmax[s]) if spec.allow_fixed[s] else 0))
    m.ns = pyo.Var(S, within=pyo.NonNegativeIntegers,
                   bounds=lambda _, s: (0, int(nmax[s]) if spec.allow_switched[s] else 0))
    m.k = pyo.Var(L, S, within=pyo.NonNegativeIntegers, bounds=lambda _, l, s: (0, int(nmax[s])))
    m.site_cap = pyo.Constraint(S, rule=lambda m, s: m.nf[s] + m.ns[s] <= int(nmax[s]) * m.z[s])
    m.sw_cap = pyo.Constraint(S, rule=lambda m, s: m.ns[s] <= int(nmax[s]) * m.zs[s])
    m.steps_cap = pyo.Constraint(L, S, rule=lambda m, l, s: m.k[l, s] <= m.ns[s])
    new = [s for s in S if not spec.existing_sites[s]]
    if spec.max_new_sites is not None and len(new) > spec.max_new_sites:
        m.sites_cap = pyo.Constraint(expr=pyo.quicksum(m.z[s] for s in new) <= int(spec.max_new_sites))
    mvar = {s: spec.unit_pu[s] * spec.base_mva for s in S}
    capital = pyo.quicksum(spec.site_cost[s] * m.z[s] + spec.sw_site_cost[s] * m.zs[s]
                           + spec.mvar_cost[s] * mvar[s] * (m.nf[s] + m.ns[s])
                           + spec.sw_mvar_cost[s] * mvar[s] * m.ns[s] for s in S)
    m.capital = pyo.Expression(expr=capital)
    if spec.budget is not None and len(S):
        m.budget_cap = pyo.Constraint(expr=m.capital <= float(spec.budget))

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
    obj_terms = [spec.capital_weight / scale * m.capital]
    tie = []
    m.levels = pyo.Block(L)
    for l in L:
        lev = spec.levels[l]
        b = m.levels[l]
        vl = 0 if spec.common_setpoints else l
        du = ([spec.unit_pu[s] * (m.nf[s] + m.k[l, s] - float(lev.cur_units[s])) for s in S]
              + [spec.exist_step_pu[e] * (m.e[l, e] - int(lev.cur_exist[e])) for e in E]
              + [m.v[vl, g] - float(lev.v_now[g]) for g in G]
              + [(spec.tap_step[t] if spec.tap_step[t] > 0 else 1.0) * m.d[l, t] for t in T])
        # trust region on bank units at each site
        b.unit_tr = pyo.ConstraintList()
        for s in S:
            b.unit_tr.add(m.nf[s] + m.k[l, s] - float(lev.cur_units[s]) <= spec.unit_radius_of[s])
            b.unit_tr.add(m.nf[s] + m.k[l, s] - float(lev.cur_units[s]) >= -spec.unit_radius_of[s])
        lo_du, hi_du = _du_ranges(spec, lev, l)
        # loss model: tangent cuts of each square term
        K = range(len(lev.d))
        b.s = pyo.Var(K)
        b.w = pyo.Var(K, within=pyo.NonNegativeReals)
        b.s_def = pyo.Constraint(K, rule=lambda _, k: b.s[k] == root * float(lev.d[k]) + _lin(root * lev.R[k], du))
        b.cuts = pyo.ConstraintList()
        for k in K:
            span = root * (np.abs(lev.R[k]) @ np.maximum(np.abs(lo_du), np.abs(hi_du)))
            lo, hi = root * lev.d[k] - span, root * lev.d[k] + span
            pts = np.unique(np.concatenate([np.linspace(lo, hi, spec.tangent_points), [root * lev.d[k], 0.0]]))
            for p in pts:
                b.cuts.add(b.w[k] >= 2.0 * p * b.s[k] - p * p)
        for seed in spec.seeds:
            for k, p in enumerate(root * (lev.d + lev.R @ seed[l])):
                b.cuts.add(b.w[k] >= 2.0 * p * b.s[k] - p * p)
        b.loss = pyo.Expression(expr=pyo.quicksum(b.w[k] for k in K) + spec.base_mva * float(lev.const))  # MW
        # voltage, reactive and loading rows, each with a penalised slack
        viol = (_limit_rows(b, "v", lev.v0, lev.dv, lev.v_lo, lev.v_hi, du)
                + _limit_rows(b, "q", lev.q0, lev.dq, lev.q_lo, lev.q_hi, du)
                + _limit_rows(b, "s", lev.s0, lev.ds, None, lev.s_hi, du))
        for j, (x0, slopes, lo, hi) in enumerate(lev.extra_rows or ()):
            viol = viol + _limit_rows(b, f"extra{j}", x0, slopes, lo, hi, du)
        obj_terms.append(lev.weight / scale * b.loss + spec.penalty / scale * viol)
        tie.append(pyo.quicksum(m.k[l, s] for s in S))
    obj_terms.append(spec.tie_break * (pyo.quicksum(m.nf[s] + 2 * m.ns[s] for s in S) + pyo.quicksum(tie)))
    m.objective = pyo.Objective(expr=pyo.quicksum(obj_terms), sense=pyo.minimize)
    return m


def solve_step(spec: StepSpec, *, max_rounds: int = 12, rel_tol: float = 1e-5):
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
    # the first solve has no start (one at the present point changed which of the near-equal
    # solutions inside the gap a node-limited solve returns: plans up to 1e-4 worse on the
    # demo, see DEVELOPERS.md); later rounds start from the previous round's solution
    start = None
    for _ in range(max_rounds):
        sol = solve_model(m, spec, solver, start=start)
        solves += 1
        timed_out = timed_out or sol.time_limited
        sol.time_limited = timed_out
        if not sol.ok:
            return sol, solves, rounds
        rounds.append(sol)
        gap = 0.0
        total = 0.0
        added = False
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
        same = prev is not None and _same_solution(prev, sol)
        # HiGHS holds each cut only to its feasibility tolerance (1e-7), so a tiny gap remains
        # cuts closer than half the MILP's own optimality gap cannot change what it may return
        tol = max(rel_tol, 0.5 * spec_mip_gap(spec))
        if not added or gap <= tol * max(total, 1e-12) or same:
            break
        prev = sol
    return sol, solves, rounds


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


def _limit_rows(b, tag, x0, slopes, lo, hi, du):
    """Rows ``lo - slack <= x0 + slopes du <= hi + slack`` on block ``b`` (``lo`` None: upper
    side only); returns the sum of the slacks for the objective."""
    rows = range(0 if x0 is None else len(x0))
    total = 0
    for side, bound in (("lo", lo), ("hi", hi)):
        if bound is None:
            continue
        slack = pyo.Var(rows, within=pyo.NonNegativeReals)
        b.add_component(f"{tag}_slack_{side}", slack)
        if side == "lo":
            rule = lambda _, i: float(x0[i]) + _lin(slopes[i], du) >= float(bound[i]) - slack[i]  # noqa: E731
        else:
            rule = lambda _, i: float(x0[i]) + _lin(slopes[i], du) <= float(bound[i]) + slack[i]  # noqa: E731
        b.add_component(f"{tag}_limit_{side}", pyo.Constraint(rows, rule=rule))
        total = total + pyo.quicksum(slack[i] for i in rows)
    return total


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
    from pyomo.contrib.solver.common.factory import SolverFactory

    return SolverFactory("highs")


def deterministic_options(spec) -> dict:
    """HiGHS options that make a solve depend on the model only: one thread, a fixed seed, a
    node limit as the work bound (the best solution within it is used)."""
    return {"mip_rel_gap": spec_mip_gap(spec), "output_flag": False, "threads": 1, "random_seed": 0,
            "mip_max_nodes": int(getattr(spec, "max_nodes", 20000)),
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
    pred = []
    for l, lev in enumerate(spec.levels):
        du = np.concatenate([spec.unit_pu * (fixed + steps[l] - lev.cur_units),
                             spec.exist_step_pu * (exist[l] - lev.cur_exist),
                             vset[l] - lev.v_now, tap[l]])
        s = lev.d + lev.R @ du if len(lev.d) else np.zeros(0)
        pred.append(float(s @ s + lev.const))
    return StepSolution(True, status, fixed, switched, steps, exist, vset, tap, np.array(pred),
                        float(pyo.value(m.objective)), timed_out, float(bound))


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
