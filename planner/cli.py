"""Command line: ``planner flow``, ``planner plan``, ``planner study``.

Thin on purpose: each command maps to one public function of the package. Heavy modules
(the optimiser, Pyomo, the report) are imported inside the command that needs them, so
``planner flow`` on a small case does not pay for them.
"""
from __future__ import annotations

import argparse
import sys


def _flow(args) -> int:
    from .flow.export import flow_tables, flow_to_dict
    from .flow.newton import solve_flow
    from .network.io import read_network
    from .outputs import write_json_atomic

    net = read_network(args.model)
    res = solve_flow(net, enforce_q_limits=not args.no_q_limits, start=args.start,
                     max_iter=args.max_iter, tol_mva=args.tol_mva)
    if not args.quiet:
        print(f"network: {net.name or args.model} ({len(net.buses)} buses)")
        print(res.summary())
    if args.json:
        write_json_atomic(args.json, flow_to_dict(res))
    if args.csv:
        from .report.atomic import write_report_folder
        write_report_folder(args.csv, flow_tables(res))
    if args.xlsx:
        from .network.workbook import write_tables_workbook
        write_tables_workbook(args.xlsx, {"buses": res.buses, "generators": res.generators,
                                          "branches": res.branches})
    if not res.converged:
        print(f"error: load flow did not converge: {res.message}; worst bus {res.worst_bus}, "
              f"mismatch {res.worst_mismatch_mva:.4g} MVA", file=sys.stderr)
        return 2
    return 0


def _plan(args) -> int:
    from .optimize.study_file import run_plan_file
    return run_plan_file(args.study, json_path=args.json, quiet=args.quiet, level=args.level)


def _study(args) -> int:
    from .study.run import run_study_file
    return run_study_file(args.study, out_dir=args.out, quiet=args.quiet)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="planner", description="Loss-reduction planning: load flow, "
                                "optimised capacitor banks and voltage setpoints, study reports.")
    sub = p.add_subparsers(dest="command", required=True)

    f = sub.add_parser("flow", help="solve the AC load flow of a network file")
    f.add_argument("model", help="IEEE CDF file, .xlsx workbook, or a folder (or network.toml) in the tabular format")
    f.add_argument("--json", metavar="FILE", help="write the full results as JSON")
    f.add_argument("--csv", metavar="FOLDER", help="write bus, generator and branch tables as CSV")
    f.add_argument("--xlsx", metavar="FILE", help="write bus, generator and branch tables as one workbook "
                   "(needs openpyxl)")
    f.add_argument("--no-q-limits", action="store_true", help="do not hold generators within reactive limits")
    f.add_argument("--start", choices=["flat", "dc", "stored"], default="flat", help="initial voltages")
    f.add_argument("--max-iter", type=int, default=30, help="Newton iteration limit (default 30)")
    f.add_argument("--tol-mva", type=float, default=None, help="mismatch tolerance, MW/Mvar (default 1e-8 pu)")
    f.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    f.set_defaults(run=_flow)

    pl = sub.add_parser("plan", help="optimise banks, setpoints and taps at one load level")
    pl.add_argument("study", help="study file (TOML)")
    pl.add_argument("--json", metavar="FILE", help="where to write the plan (default: beside the study file)")
    pl.add_argument("--level", help="load level to optimise (default: the heaviest)")
    pl.add_argument("-q", "--quiet", action="store_true")
    pl.set_defaults(run=_plan)

    st = sub.add_parser("study", help="run a loss-reduction study across load levels and write its report")
    st.add_argument("study", help="study file (TOML)")
    st.add_argument("--out", metavar="FOLDER", help="parent folder of the report (default: beside the study file)")
    st.add_argument("-q", "--quiet", action="store_true", help="no progress or summary output")
    st.set_defaults(run=_study)
    return p


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    from .errors import PlannerError
    try:
        return args.run(args)
    except PlannerError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except (OSError, ValueError, KeyError) as exc:
        # input problems that escaped a reader's own checks: still one line, never a trace
        print(f"error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
