"""``planner plan``: optimise the levers of a study file at one load level and write the plan."""
from __future__ import annotations

import sys
from pathlib import Path


def add_parser(sub):
    pl = sub.add_parser("plan", help="optimise banks, setpoints and taps at one load level")
    pl.add_argument("study", help="study file (TOML)")
    pl.add_argument("--json", metavar="FILE", help="where to write the plan (default: beside the study file)")
    pl.add_argument("--level", help="load level to optimise (default: the heaviest)")
    pl.add_argument("-q", "--quiet", action="store_true")
    pl.set_defaults(run=run)
    return pl


def run(args) -> int:
    return run_plan_file(args.study, json_path=args.json, quiet=args.quiet, level=args.level)


def run_plan_file(path, json_path=None, quiet=False, level=None) -> int:
    """Read the study file, optimise one level with every lever it enables, write the plan JSON.

    Exit status: 0 when the plan is AC-verified with every limit met; 1 when the final load
    flow converged but limits remain broken (the least-violation plan is still written);
    3 when the final AC load flow failed.
    """
    from ..errors import InputError
    from ..outputs import write_json_atomic
    from ..study.run import plan_to_dict, run_study
    from ..study.spec import AlternativeSpec, read_study

    spec = read_study(path)
    if level is not None:
        chosen = [lv for lv in spec.levels if lv.name == level]
        if not chosen:
            raise InputError(f"no load level named {level!r}", file=Path(path).name, field="levels")
    else:
        chosen = [max(spec.levels, key=lambda lv: lv.p_scale)]
    spec.levels = chosen
    spec.peak_level = chosen[0].name
    spec.alternatives = [AlternativeSpec(name="plan", description="every lever the study file enables")]
    show = (not quiet) and sys.stderr.isatty()
    progress = (lambda text: print(text, file=sys.stderr, flush=True)) if show else None
    _, plans = run_study(spec, progress=progress)
    plan = plans[0][1]
    out = Path(json_path) if json_path else Path(path).with_suffix(".plan.json")
    write_json_atomic(out, plan_to_dict(plan))
    if not quiet:
        n = chosen[0].name
        print(f"level {n}: losses {plan.losses_before_mw[n]:.4f} MW before, "
              f"{plan.losses_after_mw[n]:.4f} MW after (AC-verified), "
              f"{plan.losses_predicted_mw.get(n, float('nan')):.4f} MW predicted by the linear model")
        for b in plan.banks:
            print(f"  bank at bus {b['bus']}: {b['units']} x {b['unit_mvar']:g} Mvar = {b['mvar']:.3f} Mvar")
        for s in plan.setpoints[n]:
            print(f"  generator bus {s['bus']}: setpoint {s['v_pu']:.4f} pu")
        for t in plan.taps[n]:
            print(f"  transformer {t['xfmr_id']} ({t['from_bus']}-{t['to_bus']}): ratio {t['ratio']:.4f}")
        print(f"  {plan.message}")
        print(f"plan: {out}")
    if not plan.flows_after[chosen[0].name].converged:
        return 3
    return 0 if plan.verified else 1
