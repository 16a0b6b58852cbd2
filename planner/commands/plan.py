"""``planner plan``: optimise the levers of a study file at one load level and write the plan."""
from __future__ import annotations

import math
from pathlib import Path

from . import options
from .console import NOT_SUCCESS, OK, Console, Progress, check_interrupted, warn_about_model


def add_parser(sub):
    pl = sub.add_parser("plan", help="optimise banks, setpoints and taps at one load level",
                        description="Optimise banks, generator setpoints and transformer taps of a study "
                        "file at one load level, verify the plan by AC load flow, write it as JSON.",
                        epilog=options.EXIT_EPILOG, formatter_class=options.Formatter)
    pl.add_argument("study", help="study file (TOML)")
    pl.add_argument("--json", metavar="FILE", help="where to write the plan (default: STUDY.plan.json in the "
                    "study's output folder, the parent of its report folder)")
    pl.add_argument("--level", help="load level to optimise (default: the heaviest)")
    pl.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors and warnings")
    options.add_jobs(pl)
    pl.set_defaults(run=run)
    return pl


def run(args) -> int:
    return run_plan_file(args.study, json_path=args.json, quiet=args.quiet, level=args.level,
                         jobs=getattr(args, "jobs", None))


def default_plan_path(spec) -> Path:
    """``STUDY.plan.json`` in the study's output folder (where its report folders go)."""
    parent = spec.output or spec.path.parent / "reports"
    return Path(parent) / f"{spec.path.stem}.plan.json"


def run_plan_file(path, json_path=None, quiet=False, level=None, jobs=None) -> int:
    """Read the study file, optimise one level with every lever it enables, write the plan JSON.

    Exit status: 0 when the plan is AC-verified with every limit met; 1 when it is not (limits
    remain broken, the least-violation plan is still written; or a load flow failed).
    """
    from ..atomic import check_file_target, write_json
    from ..errors import InputError
    from ..study.run import plan_alternatives, plan_to_dict
    from ..study.spec import AlternativeSpec, read_study

    con = Console(quiet)
    spec = read_study(path)
    if level is not None:
        chosen = [lv for lv in spec.levels if lv.name == level]
        if not chosen:
            raise InputError(f"no load level named {level!r}", file=Path(path).name, field="levels")
    else:
        chosen = [max(spec.levels, key=lambda lv: lv.p_scale)]
    out = Path(json_path) if json_path else default_plan_path(spec)
    option = "--json" if json_path else (f"{spec.path.name}: study.output" if spec.output else
                                         "default plan file")
    check_file_target(out, option)
    warn_about_model(con, spec.network_path)
    spec.levels = chosen
    spec.peak_level = chosen[0].name
    spec.alternatives = [AlternativeSpec(name="plan", description="every lever the study file enables")]
    from ..optimize.milp import keep_scipy_deferred
    keep_scipy_deferred()   # before the progress bar's thread starts (see its docstring)
    progress = Progress(quiet)
    try:
        plans = plan_alternatives(spec, progress=progress, jobs=jobs)
    finally:
        progress.close()
    check_interrupted()       # a stop during the last solver call must not pass for a result
    plan = plans[0][1]
    with options.output_errors(option, out):
        write_json(out, plan_to_dict(plan))
    n = chosen[0].name
    for line in summary_lines(plan, n):
        con.out(line)
    con.out(f"plan: {out}", width=None)
    return OK if plan_verified(plan, n) else NOT_SUCCESS


def plan_verified(plan, level: str) -> bool:
    """Verified means: the optimiser succeeded, the final AC load flow converged and every limit
    holds. A failed optimisation step is never called verified, whatever else says so."""
    fr = plan.flows_after.get(level)
    flow_ok = fr is not None and bool(getattr(fr, "success", getattr(fr, "converged", False)))
    steps = [{"iteration": e.get("iteration", 0), "accepted": e.get("accepted")} for e in plan.log]
    return bool(plan.verified) and bool(getattr(plan, "success", True)) and flow_ok \
        and not optimizer_failed(plan.status, steps)


def optimizer_failed(status, steps=()) -> bool:
    """True when the optimiser's status says a step failed (e.g. the MILP could not be solved)
    before any step was accepted: nothing was optimised, so the plan is not a verified plan,
    whatever the load flows of the unchanged network show. ``steps`` are the log entries
    (``iteration``, ``accepted``).

    >>> optimizer_failed("MILP step failed (error)", [{"iteration": 0, "accepted": True}])
    True
    >>> optimizer_failed("MILP step failed (time limit)", [{"iteration": 1, "accepted": True}])
    False
    >>> optimizer_failed("converged (no further change)")
    False
    """
    name = getattr(status, "name", None) or str(status)
    if "fail" not in name.lower():
        return False
    return not any(s.get("accepted") and s.get("iteration", 0) >= 1 for s in steps)


def _num(x) -> float | None:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def summary_lines(plan, n: str) -> list[str]:
    """What ``planner plan`` prints: losses before and after with what backs them, then the levers."""
    before = plan.flows_before.get(n)
    if before is not None and not bool(getattr(before, "success", getattr(before, "converged", True))):
        return [f"level {n}: the base-case load flow (before any change) did not converge: {before.message}",
                f"  {plan.message}"]
    b, a, p = (_num(plan.losses_before_mw.get(n)), _num(plan.losses_after_mw.get(n)),
               _num(plan.losses_predicted_mw.get(n)))
    ok = plan_verified(plan, n)
    head = f"level {n}: losses {b:.4f} MW before" if b is not None else f"level {n}: losses before not known"
    if a is None:
        head += "; the plan's AC load flow did not converge"
    else:
        head += f", {a:.4f} MW after ({'AC-verified' if ok else 'AC load flow; limits NOT met'})"
        if p is not None:
            head += f"; linear model predicted {p:.4f} MW"
    lines = [head]
    for bk in plan.banks:
        lines.append(f"  bank at bus {bk['bus']}: {bk['units']} x {bk['unit_mvar']:g} Mvar = {bk['mvar']:.3f} Mvar")
    for s in plan.setpoints.get(n, []):
        lines.append(f"  generator bus {s['bus']}: setpoint {s['v_pu']:.4f} pu")
    for t in plan.taps.get(n, []):
        lines.append(f"  transformer {t['xfmr_id']} ({t['from_bus']}-{t['to_bus']}): ratio {t['ratio']:.4f}")
    if not ok:
        for v in list(plan.violations)[:10]:
            lines.append(f"  limit broken: {v.text()}")
        more = len(plan.violations) - 10
        if more > 0:
            lines.append(f"  ... and {more} more limits broken (see the plan file)")
    lines.append(f"  {plan.message}")
    return lines
