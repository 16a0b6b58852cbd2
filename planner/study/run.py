"""Run a loss-reduction study: every alternative optimised across the load levels (side by side
in worker processes), verified by AC load flow at each level, and priced.

Public functions: :func:`level_cases`, :func:`candidate_sites`, :func:`plan_alternatives` (the
plans only, for ``planner plan``), :func:`run_study` (a typed
:class:`~planner.study.result.StudyResult`). The report is made from the result by
:func:`planner.report.convert.report_data`; the ``planner study`` command is
:mod:`planner.commands.study`.
"""
from __future__ import annotations

import datetime as _dt
import os
import re
import sys
import signal
from pathlib import Path

import numpy as np

from ..network.compile import PQ, compile_network
from ..network.io import read_network
from ..optimize.engine import LevelCase, PlanResult, plan as make_plan
from ..optimize.levers import BankSite, Levers, Limits, Objective, Options
from .economics import Economics, capital_recovery_factor, evaluate, npv_sensitivity
from .result import AlternativeResult, BaseLevel, InputFile, StudyResult, StudyStatus, sha256_of
from .spec import StudySpec, check_buses


def scaled_network(net, p_scale=1.0, q_scale=1.0, bus_scale=None):
    """A copy of ``net`` with its loads scaled (P and Q, then an extra factor per bus).

    Generation other than the slack keeps its schedule; the slack takes up the change.

    >>> from planner.network.model import Network, make_table
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 11.0, "kind": "slack"}]),
    ...               loads=make_table("loads", [{"load_id": "D", "bus": 1, "mw": 2.0, "mvar": 1.0}]))
    >>> float(scaled_network(net, 0.5, 0.4).loads.loc[0, "mvar"]), float(net.loads.loc[0, "mvar"])
    (0.4, 1.0)
    """
    out = net.copy()
    ld = out.loads
    factor = np.ones(len(ld))
    if bus_scale:
        factor = ld["bus"].map(lambda b: bus_scale.get(int(b), 1.0)).to_numpy(float)
    ld["mw"] = ld["mw"].to_numpy(float) * p_scale * factor
    ld["mvar"] = ld["mvar"].to_numpy(float) * q_scale * factor
    return out


def level_cases(net, spec: StudySpec, weights=None) -> list:
    """One :class:`LevelCase` per load level of the study (loads scaled, per-level bands)."""
    cases = []
    for i, lv in enumerate(spec.levels):
        cases.append(LevelCase(name=lv.name, network=scaled_network(net, lv.p_scale, lv.q_scale, lv.bus_scale),
                               weight=float(weights[i]) if weights is not None else lv.hours,
                               v_min=lv.v_min_pu, v_max=lv.v_max_pu))
    return cases


def candidate_sites(net, spec: StudySpec) -> list:
    """Bank sites from the study's catalogue: listed buses (or every PQ bus with load) with
    the catalogue's unit size and costs, per-site overrides applied."""
    bk = spec.banks
    if bk.candidates == "all-pq":
        c = compile_network(net)
        has_load = np.abs(c.s_load_p + c.s_load_i + c.s_load_z) > 0
        buses = [int(b) for b in c.bus_ids[(c.kind == PQ) & c.alive & has_load]]
    else:
        buses = list(bk.candidates)
    buses += [b for b in bk.overrides if b not in buses]
    sites = []
    for b in buses:
        o = bk.overrides.get(b)
        sites.append(BankSite(
            bus=int(b), unit_mvar=o.unit_mvar if o else bk.unit_mvar,
            max_units=o.max_units if o else bk.max_units, kinds=o.kinds if o else bk.kinds,
            fixed_cost=bk.per_site, cost_per_mvar=bk.per_mvar,
            switched_cost_per_mvar=bk.switched_per_mvar, switched_fixed_cost=bk.switched_per_site))
    return sites


def _economics(spec: StudySpec) -> Economics:
    e = spec.economics
    return Economics(energy_value_per_mwh=e["energy_value_per_mwh"],
                     demand_value_per_kw_year=e["demand_value_per_kw_year"],
                     discount_rate=e["discount_rate"], horizon_years=e["horizon_years"],
                     bank_life_years=e["bank_life_years"], om_fraction=e["om_fraction"])


def _objective_weights(spec: StudySpec, econ: Economics):
    """Per-level weights (money per MW of losses per year) and the capital factor."""
    if spec.objective == "losses":
        return np.array([lv.hours for lv in spec.levels], float), Objective(kind="losses")
    w = np.array([lv.hours * econ.energy_value(lv.name) for lv in spec.levels], float)
    for i, lv in enumerate(spec.levels):
        if lv.name == spec.peak_level:
            w[i] += 1000.0 * econ.demand_value_per_kw_year
    # a year's cost of capital: recovery of the investment over the bank life, plus O&M
    factor = capital_recovery_factor(econ.discount_rate, econ.life) + econ.om_fraction
    return w, Objective(kind="cost", loss_value_per_mw=1.0, capital_factor=factor)


def _band_source(spec: StudySpec, plans) -> int:
    """Index of the plan whose bands the base case is checked against: one with the setpoint lever
    when the study gives generator ranges (the optimiser then holds those buses to the range)."""
    if spec.gen_range:
        for k, (alt, _) in enumerate(plans):
            if alt.setpoints:
                return k
    return 0


def _levers(spec: StudySpec, alt, sites) -> Levers:
    return Levers(
        sites=sites if alt.banks else [],
        max_new_sites=alt.max_new_sites if alt.max_new_sites is not None else spec.banks.max_new_sites,
        budget=alt.budget if alt.budget is not None else spec.banks.budget,
        existing_shunts=spec.banks.existing_switchable and alt.banks,
        gen_v_range=spec.gen_range if alt.setpoints else None,
        taps=spec.taps and alt.taps, setpoints_per_level=spec.setpoints_per_level)


def _security(spec: StudySpec, alt, cases):
    """The N-1 security request of an alternative that asks for it (the study's [outages] set)."""
    if not getattr(alt, "secure_against_outages", False):
        return None
    from ..proof.spec import security_request
    return security_request(spec.proof, cases[0].network)


def _merit_text(objective: str, currency: str, weight_sum: float, entry) -> str:
    """The optimiser's objective in the units it has: money a year, or hour-weighted mean MW.
    While limits are broken a penalty in the same units is part of it, and the text says so."""
    merit = entry["merit"]
    if merit is None:
        return "proposed before, not solved again" if entry.get("repeat") else "not checked by AC load flow"
    if not np.isfinite(merit):
        return "no converged load flow"
    if objective == "cost":
        cur = f"{currency} " if currency else ""
        text = f"objective {cur}{merit:,.0f} a year"
    else:
        text = f"objective {merit / (weight_sum or 1.0):.4f} MW mean losses"
    if (entry.get("violation") or 0) > 1e-9:
        text += ", limits broken (penalty included)"
    return text


def _progress_line(alt_name: str, entry: dict, merit=("losses", "", 1.0)) -> str:
    """One progress line per optimiser step: the objective in its units and the worst breach.

    >>> _progress_line("A", {"iteration": 2, "accepted": True, "merit": 0.5, "violation": 0.0},
    ...                ("losses", "", 2.0))
    '  A: iteration 2 accepted, objective 0.2500 MW mean losses; every limit met'
    """
    worst = entry.get("worst_violation")
    what = _merit_text(*merit, entry) + (f"; worst breach {worst}" if worst else "; every limit met")
    if entry.get("polish"):
        return f"  {alt_name}: one-unit move kept, {what}"
    return (f"  {alt_name}: iteration {entry['iteration']} "
            f"{'accepted' if entry['accepted'] else 'rejected'}, {what}")


_QUEUE = None       # progress queue of a worker process (set by _worker_init)


def _worker_init(queue):
    global _QUEUE
    _QUEUE = queue
    # Ctrl-C at a terminal reaches the whole process group: the parent stops the workers
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _optimize_one(args):
    """Worker: optimise one alternative (runs in a child process when ``jobs > 1``)."""
    cases, levers, limits, objective, options, alt_name, merit, *extra = args
    security = extra[0] if extra else None
    queue = _QUEUE

    def log(entry):
        queue.put(_progress_line(alt_name, entry, merit))
    plan = make_plan(cases, levers, limits, objective, options, progress=log if queue is not None else None,
                     security=security)
    return _without_solver_caches(plan)


def _without_solver_caches(plan):
    """The plan without the load flow's working caches (sparse LU factors, orderings): they cannot
    be pickled back to the parent process, and nothing after the optimiser needs them."""
    for fr in list(plan.flows_before.values()) + list(plan.flows_after.values()):
        c = getattr(fr, "compiled", None)
        if c is not None and isinstance(getattr(c, "_cache", None), dict):
            c._cache.clear()        # in the worker, whose copies are about to go
    return plan


def resolve_jobs(jobs: int | None) -> int:
    """Worker processes for ``jobs``: None means every core (:func:`default_jobs`).

    >>> resolve_jobs(3), resolve_jobs(0) >= 1, resolve_jobs(None) == default_jobs()
    (3, True, True)
    """
    return default_jobs() if jobs is None or int(jobs) < 1 else int(jobs)


def default_jobs() -> int:
    """Every core the process may use (a value for ``jobs``)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:      # not on every platform
        return max(1, os.cpu_count() or 1)


def plan_alternatives(spec: StudySpec, net=None, progress=None, jobs: int | None = None) -> list:
    """Optimise and AC-verify every alternative of a study; returns ``[(AlternativeSpec, PlanResult)]``
    in study-file order. Builds no report data (``planner plan`` uses this).

    ``jobs`` worker processes (default: every core, :func:`default_jobs`; 1 = everything in this
    process) run the alternatives side by side; with a single alternative they run the AC checks
    of its load levels instead. The plans are byte-for-byte those of a serial run (no optimiser
    decision depends on which process runs it) and come back in study-file order. ``progress``
    is called with short text lines.
    """
    say = progress or (lambda text: None)
    if net is None:
        net = read_network(spec.network_path)
        check_buses(spec, net)
    econ = _economics(spec)
    weights, objective = _objective_weights(spec, econ)
    cases = level_cases(net, spec, weights)
    sites = candidate_sites(net, spec)
    limits = Limits(v_min=spec.v_min_pu, v_max=spec.v_max_pu, per_bus=spec.bus_limits,
                    ratings=spec.ratings, q_limits=spec.q_limits)
    alts = list(spec.alternatives)
    workers = resolve_jobs(jobs)
    jobs = min(workers, max(1, len(alts)))
    options = Options(max_iterations=spec.max_iterations, mip_gap=spec.mip_gap, time_limit_s=spec.step_seconds,
                      merit_rel_tolerance=spec.rel_tolerance,
                      # one alternative: its load levels' AC checks take the cores instead
                      jobs=min(workers, len(cases)) if len(alts) == 1 else 1)
    merit = (spec.objective, spec.currency, float(np.sum(weights)))
    say(f"{len(cases)} load levels: " + ", ".join(lc.name for lc in cases)
        + f"; {len(alts)} alternatives" + (f" on {jobs} processes" if jobs > 1 else ""))
    if jobs == 1:
        plans = []
        for k, alt in enumerate(alts):
            say(f"alternative {k + 1}/{len(alts)}: {alt.name}")
            plan = make_plan(cases, _levers(spec, alt, sites), limits, objective, options,
                             security=_security(spec, alt, cases),
                            progress=lambda e, _n=alt.name: say(_progress_line(_n, e, merit)))
            plans.append((alt, plan))
        return plans
    return list(zip(alts, _run_parallel(spec, alts, cases, sites, limits, objective, options, jobs, say, merit)))


class _signals_deferred:
    """Hold Ctrl-C / SIGTERM while worker processes start, then deliver them: a worker started
    half-way when its parent stops would be missed by the clean-up and print a traceback."""

    def __enter__(self):
        import threading
        self.got, self.old = [], {}
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, getattr(signal, "SIGTERM", None)):
                if sig is not None:
                    self.old[sig] = signal.signal(sig, lambda num, frame: self.got.append(num))
        return self

    def __exit__(self, *exc):
        for sig, handler in self.old.items():
            signal.signal(sig, handler)
        for num in self.got:
            signal.raise_signal(num)     # now handled as the caller would have handled it
        return False


def _size(levers: Levers) -> int:
    """A rough measure of an alternative's work, for the order workers take them in."""
    return len(levers.sites) * (2 if levers.gen_v_range or levers.taps else 1) \
        + (10 if levers.gen_v_range else 0) + (10 if levers.taps else 0)


_BLAS_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


class _worker_environment:
    """The environment of the worker processes started inside; this process's own is given back
    afterwards.

    * One BLAS thread (set before the workers import numpy). The plans also cap BLAS threads
      themselves (threadpoolctl), so a fork server started earlier is covered too.
    * ``PYTHONSAFEPATH=1`` when the current folder is not on this process's import path (the
      ``planner`` command): the fork server is a ``python -c`` process, which would put the
      current folder first on its path and import ``planner.study.run`` from a ``planner``
      folder there (another checkout, or a user's data folder of that name) instead of the
      package this process runs. Measured: a study run from another checkout's folder made its
      plans with that checkout's code.
    """
    _VARS = _BLAS_VARS + ("PYTHONSAFEPATH",)

    def __enter__(self):
        self.saved = {k: os.environ.get(k) for k in self._VARS}
        for k in _BLAS_VARS:
            os.environ.setdefault(k, "1")
        if not {"", os.getcwd()} & {os.path.abspath(p) if p else p for p in sys.path}:
            os.environ["PYTHONSAFEPATH"] = "1"
        return self

    def __exit__(self, *exc):
        for k, v in self.saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        return False


def _run_parallel(spec, alts, cases, sites, limits, objective, options, jobs, say, merit) -> list:
    import multiprocessing as mp
    import queue as _queue

    # Not fork: a parent that has already solved holds solver threads, and a forked copy of a
    # threaded process can deadlock. A fork server (one clean process that has imported the
    # optimiser) starts workers quickly where it exists; elsewhere spawn. Either way a script
    # calling run_study with jobs > 1 needs the usual ``if __name__ == "__main__":`` guard.
    if "forkserver" in mp.get_all_start_methods():
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(["planner.study.run"])
    else:
        ctx = mp.get_context("spawn")
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    pool = q = None
    try:
        # every worker is known before an interrupt can stop them: a signal that arrives while
        # they start is delivered on leaving this block, inside the try, so the clean-up below
        # stops them all (and waits for them) before this process lets go of the shared queue
        with _signals_deferred(), _worker_environment():
            q = ctx.Queue()
            pool = ProcessPoolExecutor(max_workers=jobs, mp_context=ctx, initializer=_worker_init, initargs=(q,))
            levers = [_levers(spec, alt, sites) for alt in alts]
            # the largest problems first, so a long one does not start last (results keep file order)
            first = sorted(range(len(alts)), key=lambda k: -_size(levers[k]))
            futures = {pool.submit(_optimize_one, (cases, levers[k], limits, objective, options,
                                                   alts[k].name, merit, _security(spec, alts[k], cases))): k
                       for k in first}
        results = [None] * len(alts)
        pending = set(futures)

        def drain():
            while True:
                try:
                    say(q.get_nowait())
                except _queue.Empty:
                    return
        while pending:
            done, pending = wait(pending, timeout=0.3, return_when=FIRST_COMPLETED)
            drain()
            for f in sorted(done, key=lambda f: futures[f]):
                k = futures[f]
                results[k] = f.result()
                say(f"alternative {k + 1}/{len(alts)} done: {alts[k].name}")
        drain()
    except BaseException:
        # an interrupt (Ctrl-C) or a failed alternative: stop every worker now, not after minutes
        # of optimisation nobody will read (the executor has no public call for this)
        if pool is not None:
            for proc in list((getattr(pool, "_processes", None) or {}).values()):
                proc.terminate()
            pool.shutdown(wait=True, cancel_futures=True)
        raise
    finally:
        if pool is not None:
            pool.shutdown(wait=True)
        if q is not None:
            q.close()
    return results


def _input_files(spec: StudySpec) -> list:
    """The study file and every network file, with SHA-256 checksums."""
    root = spec.path.parent
    files = [("study", spec.path)]
    np_ = Path(spec.network_path)
    if np_.is_dir():
        files += [("network", p) for p in sorted(np_.iterdir()) if p.is_file() and not p.name.startswith(".")]
    else:
        files.append(("network", np_))
    out = []
    for role, p in files:
        try:
            shown = os.path.relpath(p, root)
        except ValueError:          # another drive
            shown = str(p)
        out.append(InputFile(role=role, path=shown.replace(os.sep, "/"), sha256=sha256_of(p)))
    return out


def run_study(spec: StudySpec, progress=None, jobs: int | None = None) -> StudyResult:
    """Optimise, AC-verify and price every alternative of a study; returns a :class:`StudyResult`.

    The network is read once; the base case is solved once per level (with result tables) and
    checked against the same per-bus bands the optimiser used. ``jobs`` as in
    :func:`plan_alternatives` (default: every core).

    >>> from planner.study.spec import read_study
    >>> spec = read_study("tests/data/studies/feeder33_plan.toml")
    >>> res = run_study(spec, jobs=1)
    >>> res.status.name, [a.verified for a in res.alternatives][:1]
    ('VERIFIED', [True])
    """
    import time
    from .. import __version__
    from ..flow.newton import solve_flow

    t0 = time.perf_counter()
    say = progress or (lambda text: None)
    net = read_network(spec.network_path)
    check_buses(spec, net)
    econ = _economics(spec)
    plans = plan_alternatives(spec, net, progress=progress, jobs=jobs)
    weights, _ = _objective_weights(spec, econ)
    cases = level_cases(net, spec, weights)
    hours = {lv.name: lv.hours for lv in spec.levels}
    say("base case and economics")
    base = {}
    if plans:
        ref = plans[_band_source(spec, plans)][1]
        for lc in cases:
            lo, hi = ref.bands.get(lc.name, (None, None)) if ref.bands else (None, None)
            fr = solve_flow(lc.network)
            base[lc.name] = BaseLevel(name=lc.name, hours=hours[lc.name], flow=fr, v_min=lo, v_max=hi,
                                      violations=[v for v in ref.violations_before if v.level == lc.name])
    else:
        for lc in cases:
            base[lc.name] = BaseLevel(name=lc.name, hours=hours[lc.name], flow=solve_flow(lc.network),
                                      v_min=None, v_max=None, violations=[])
    alts = []
    for alt, plan in plans:
        e = sens = None
        if plan.verified:
            e = evaluate(plan.losses_before_mw, plan.losses_after_mw, hours, plan.capital_cost, econ,
                         spec.peak_level)
            sens = npv_sensitivity(plan.losses_before_mw, plan.losses_after_mw, hours, plan.capital_cost,
                                   econ, spec.peak_level)
        alts.append(AlternativeResult(spec=alt, plan=plan, economics=e, sensitivity=sens or []))
    if not all(b.success for b in base.values()):
        status, msg = StudyStatus.BASE_FAILED, "the base-case load flow did not converge at every level"
    elif any(a.verified for a in alts):
        status = StudyStatus.VERIFIED
        msg = f"{sum(a.verified for a in alts)} of {len(alts)} alternatives meet every limit"
    else:
        status, msg = StudyStatus.NONE_VERIFIED, "no alternative meets every limit at every level"
    result = StudyResult(success=status is StudyStatus.VERIFIED, status=status, message=msg, spec=spec,
                       network=net, base=base, alternatives=alts, inputs=_input_files(spec),
                       tool_version=__version__, created=_dt.datetime.now().strftime("%Y-%m-%d %H:%M"),
                       seconds=time.perf_counter() - t0,
                       jobs=min(resolve_jobs(jobs), max(1, len(plans))))
    if spec.proof is not None and spec.proof.any:      # N-1, hourly and bank checks (planner/proof)
        from ..proof.run import prove_study
        result.proof = prove_study(spec, net, cases, plans, spec.proof, progress=progress)
    return result


def slug(text: str) -> str:
    """A folder name from a study title: lower case, words joined by dashes.

    >>> slug("Wrenfold Vale: 2027 loss study!")
    'wrenfold-vale-2027-loss-study'
    """
    s = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")
    return s[:60] or "study"


def report_folder(spec: StudySpec, out_dir=None) -> Path:
    parent = Path(out_dir) if out_dir else (spec.output or spec.path.parent / "reports")
    return parent / slug(spec.path.stem)


def plan_to_dict(plan: PlanResult) -> dict:
    """A plan as plain data (the JSON that ``planner plan`` writes, per level)."""
    first = plan.levels[0]
    return {
        "verified": bool(plan.verified), "status": plan.status.value, "stop_reason": plan.stop_reason,
        "message": plan.message, "time_limited": plan.time_limited, "bound": plan.bound,
        "losses_predicted_note": plan.predicted_note,
        "levels": plan.levels,
        "banks": [{"bus": b["bus"], "units": b["units"], "mvar": b["mvar"], "fixed_units": b["fixed_units"],
                   "switched_units": b["switched_units"], "steps_by_level": b["steps_by_level"]}
                  for b in plan.banks],
        "setpoints": plan.setpoints[first] if len(plan.levels) == 1 else plan.setpoints,
        "taps": plan.taps[first] if len(plan.levels) == 1 else plan.taps,
        "existing_steps": plan.existing_steps,
        "losses_before_mw": _one(plan.losses_before_mw, plan.levels),
        "losses_after_mw": _one(plan.losses_after_mw, plan.levels),
        "losses_predicted_mw": _one(plan.losses_predicted_mw, plan.levels),
        "capital_cost": plan.capital_cost,
        "violations": [{"level": v.level, "kind": v.kind, "element": v.element, "value": v.value,
                        "limit": v.limit, "excess": v.excess, "text": v.text()} for v in plan.violations],
        "iterations": [e.to_dict() for e in plan.log], "ac_flows": plan.ac_flows, "milp_solves": plan.milp_solves,
        "seconds": plan.seconds,
    }


def _one(d, levels):
    return float(d[levels[0]]) if len(levels) == 1 and levels[0] in d else {k: float(v) for k, v in d.items()}
