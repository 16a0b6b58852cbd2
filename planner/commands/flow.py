"""``planner flow``: solve the AC load flow of a network file and print or write the results."""
from __future__ import annotations

import sys


def add_parser(sub):
    f = sub.add_parser("flow", help="solve the AC load flow of a network file")
    f.add_argument("model", help="IEEE CDF file, or a folder (or network.toml) in the tabular format")
    f.add_argument("--json", metavar="FILE", help="write the full results as JSON")
    f.add_argument("--csv", metavar="FOLDER", help="write bus, generator and branch tables as CSV")
    f.add_argument("--no-q-limits", action="store_true", help="do not hold generators within reactive limits")
    f.add_argument("--start", choices=["flat", "dc", "stored"], default="flat", help="initial voltages")
    f.add_argument("--max-iter", type=int, default=30, help="Newton iteration limit (default 30)")
    f.add_argument("--tol-mva", type=float, default=None, help="mismatch tolerance, MW/Mvar (default 1e-8 pu)")
    f.add_argument("--no-continuation", action="store_true",
                   help="do not retry from light load when Newton fails or its solution looks inoperable")
    f.add_argument("--accept-suspect", action="store_true",
                   help="exit 0 for a solution the plausibility check marks suspect (likely inoperable)")
    f.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    f.set_defaults(run=run)
    return f


def run(args) -> int:
    from ..flow.export import flow_tables, flow_to_dict
    from ..flow.newton import solve_flow
    from ..network.io import read_network
    from ..outputs import write_json_atomic

    net = read_network(args.model)
    res = solve_flow(net, enforce_q_limits=not args.no_q_limits, start=args.start,
                     max_iter=args.max_iter, tol_mva=args.tol_mva,
                     continuation=not args.no_continuation)
    if not args.quiet:
        print(f"network: {net.name or args.model} ({len(net.buses)} buses)")
        print(res.summary())
    if args.json:
        write_json_atomic(args.json, flow_to_dict(res))
    if args.csv:
        from ..report.atomic import write_report_folder
        write_report_folder(args.csv, flow_tables(res))
    if res.status.name == "SUSPECT":
        if args.accept_suspect:
            print(f"warning: {res.message} (accepted with --accept-suspect)", file=sys.stderr)
            return 0
        print(f"error: {res.message}; use --accept-suspect to accept this solution", file=sys.stderr)
        return 2
    if not res.converged:
        print(f"error: load flow did not converge: {res.message}; worst bus {res.worst_bus}, "
              f"mismatch {res.worst_mismatch_mva:.4g} MVA", file=sys.stderr)
        return 2
    return 0
