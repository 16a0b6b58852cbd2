"""``planner flow``: solve the AC load flow of a network file and print or write the results."""
from __future__ import annotations

from . import options
from .console import NOT_SUCCESS, OK, Console, plural

TABLE_FILES = ("buses.csv", "generators.csv", "branches.csv")


def add_parser(sub):
    f = sub.add_parser("flow", help="solve the AC load flow of a network file",
                       description="Solve the AC load flow (Newton-Raphson) of a network file.",
                       epilog=options.EXIT_EPILOG, formatter_class=options.Formatter)
    f.add_argument("model", help="IEEE CDF file, .xlsx workbook, or a folder (or network.toml) in the tabular format")
    f.add_argument("--json", metavar="FILE", help="write the full results as JSON")
    f.add_argument("--csv", metavar="FOLDER", help="write bus, generator and branch tables as CSV files "
                   "into FOLDER (new, empty, or holding only these tables)")
    f.add_argument("--xlsx", metavar="FILE", help="write bus, generator and branch tables as one workbook "
                   "(needs openpyxl)")
    f.add_argument("--no-q-limits", action="store_true", help="do not hold generators within reactive limits")
    f.add_argument("--start", choices=["flat", "dc", "stored"], default="flat", help="initial voltages")
    f.add_argument("--max-iter", type=options.max_iter, default=30, metavar="N",
                   help=f"Newton iteration limit, {options.MAX_ITER_RANGE} (default 30)")
    f.add_argument("--tol-mva", type=options.tol_mva, default=None, metavar="MVA",
                   help=f"mismatch tolerance in MW/Mvar, {options.TOL_MVA_RANGE} (default 1e-8 pu of the base)")
    f.add_argument("--no-continuation", action="store_true",
                   help="do not retry from light load when Newton fails or its solution looks inoperable")
    f.add_argument("--accept-suspect", action="store_true",
                   help="exit 0 for a solution the plausibility check marks suspect (likely inoperable)")
    f.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors and warnings")
    f.set_defaults(run=run)
    return f


def check_outputs(args) -> None:
    """Output places are checked before the load flow runs (errors name the option)."""
    from ..atomic import check_file_target, check_folder_target
    if args.json:
        check_file_target(args.json, "--json")
    if args.csv:
        check_folder_target(args.csv, "--csv", own_names=TABLE_FILES)
    if args.xlsx:
        check_file_target(args.xlsx, "--xlsx")
        from ..network.workbook import need_openpyxl
        need_openpyxl("writing")


def run(args) -> int:
    from ..flow.export import flow_tables, flow_to_dict
    from ..flow.newton import solve_flow
    from ..network.io import read_network
    from ..network.validate import model_warnings

    con = Console(args.quiet)
    check_outputs(args)
    net = read_network(args.model)
    for w in model_warnings(net):
        con.err(f"warning: {w}")
    res = solve_flow(net, enforce_q_limits=not args.no_q_limits, start=args.start,
                     max_iter=args.max_iter, tol_mva=args.tol_mva,
                     continuation=not args.no_continuation)
    ok = bool(getattr(res, "success", res.converged))
    con.out(f"network: {net.name or args.model} ({plural(len(net.buses), 'bus', 'buses')})")
    for line in summary_lines(res):
        con.out(line)
    from ..atomic import write_folder, write_json
    with options.output_errors("--json", args.json):
        if args.json:
            write_json(args.json, flow_to_dict(res))
    with options.output_errors("--csv", args.csv):
        if args.csv and res.buses is not None:
            write_folder(args.csv, flow_tables(res), own_names=TABLE_FILES)
    with options.output_errors("--xlsx", args.xlsx):
        if args.xlsx and res.buses is not None:
            from ..network.workbook import write_tables_workbook
            write_tables_workbook(args.xlsx, {"buses": res.buses, "generators": res.generators,
                                              "branches": res.branches})
    if res.status.name == "SUSPECT":
        if args.accept_suspect:
            con.err(f"warning: {res.message} (accepted with --accept-suspect)")
            return OK
        con.err(f"error: {res.message}; use --accept-suspect to accept this solution")
        return NOT_SUCCESS
    if not ok:
        con.err(f"error: load flow did not converge: {res.message}; worst bus {res.worst_bus}, "
                f"mismatch {res.worst_mismatch_mva:.4g} MVA")
        return NOT_SUCCESS
    return OK


def _name(c, i) -> str:
    # CDF names are padded to 12 columns: print them without the padding
    return " ".join(str(c.names[i]).split())


def summary_lines(res) -> list[str]:
    """The lines ``planner flow`` prints: convergence, losses, voltage extremes, limited generators.

    >>> from planner.network.model import Network, make_table
    >>> from planner.flow.newton import solve_flow
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 11.0, "kind": "slack", "name": "Grid  "},
    ...                                          {"bus": 2, "base_kv": 11.0, "kind": "PQ", "name": " Mill  End "}]),
    ...     generators=make_table("generators", [{"gen_id": "G", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}]),
    ...     loads=make_table("loads", [{"load_id": "D", "bus": 2, "mw": 10.0, "mvar": 5.0}]),
    ...     lines=make_table("lines", [{"line_id": "L", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.02}]))
    >>> # by hand: |I|^2 = 0.1118^2 / 0.998^2 = 0.01255 pu, times r 0.01 and x 0.02, times 100 MVA
    >>> for line in summary_lines(solve_flow(net)): print(line)     # doctest: +ELLIPSIS
    load flow: converged in 2 iterations (Newton time ... ms)
    losses: 0.0126 MW, 0.0251 Mvar
    lowest voltage: 0.9980 pu at bus 2 Mill End
    highest voltage: 1.0000 pu at bus 1 Grid
    generators at a reactive limit: none
    """
    import numpy as np
    c = res.compiled
    ok = bool(getattr(res, "success", res.converged))
    ms = f"Newton time {res.solve_seconds * 1000:.1f} ms"
    suspect = res.status.name == "SUSPECT"
    if ok:
        lines = [f"load flow: converged in {plural(int(res.iterations), 'iteration')} ({ms})"]
        if res.strategy != "newton" or "confirmed" in res.message:
            lines.append(f"how: {res.message}")
    elif suspect:
        lines = [f"load flow: SUSPECT solution after {plural(int(res.iterations), 'iteration')} ({ms}): "
                 f"{res.message}"]
    else:
        lines = [f"load flow: NOT converged: {res.message} after {plural(int(res.iterations), 'iteration')}; "
                 f"worst bus {res.worst_bus}, mismatch {res.worst_mismatch_mva:.4g} MVA"]
        return lines
    if res.oscillating_buses:
        lines.append("generators held at a limit after flip-flopping: "
                     + ", ".join(f"bus {b}" for b in res.oscillating_buses))
    vm = np.abs(res.v)
    alive = np.flatnonzero(c.alive)
    lo = alive[np.argmin(vm[alive])]
    hi = alive[np.argmax(vm[alive])]
    lines.append(f"losses: {res.losses_mw:.4f} MW, {res.losses_mvar:.4f} Mvar")
    lines.append(f"lowest voltage: {vm[lo]:.4f} pu at bus {c.bus_ids[lo]} {_name(c, lo)}".rstrip())
    lines.append(f"highest voltage: {vm[hi]:.4f} pu at bus {c.bus_ids[hi]} {_name(c, hi)}".rstrip())
    if res.limited_buses:
        parts = [f"bus {b} ({'max' if s > 0 else 'min'})" for b, s in
                 zip(res.limited_buses, res.limit_state[c.index_of(res.limited_buses)])]
        head = "generators at a reactive limit: "
        shown, more = [], len(parts)
        for p in parts:   # keep the line within the width, say how many are not shown
            if len(head) + len(", ".join(shown + [p])) + 12 > 100:
                break
            shown.append(p)
            more -= 1
        lines.append(head + ", ".join(shown) + (f" and {more} more" if more else ""))
    else:
        lines.append("generators at a reactive limit: none")
    return lines


__all__ = ["add_parser", "run", "summary_lines"]
