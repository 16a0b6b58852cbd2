"""``planner study``: run a loss-reduction study and write its report folder."""
from __future__ import annotations

from . import options
from .console import NOT_SUCCESS, OK, Console, Progress, check_interrupted, warn_about_model


def add_parser(sub):
    st = sub.add_parser("study", help="run a loss-reduction study across load levels and write its report",
                        description="Optimise and verify every alternative of a study file across its load "
                        "levels, price them, and write the report folder.",
                        epilog=options.EXIT_EPILOG, formatter_class=options.Formatter)
    st.add_argument("study", help="study file (TOML)")
    st.add_argument("--out", metavar="FOLDER", help="parent folder of the report (default: the study's "
                    "output key, else reports/ beside the study file)")
    st.add_argument("-q", "--quiet", action="store_true", help="no progress or summary: only errors and warnings")
    options.add_jobs(st)
    st.add_argument("--scheduler", type=options.scheduler, metavar="ADDRESS",
                    help="where the N-1 and hourly sweeps run: a Dask scheduler address (tcp://HOST:8786), "
                    "local (this machine's cores) or serial (this process); overrides the study's "
                    "[sweep] scheduler; every choice gives the same results")
    st.set_defaults(run=run)
    return st


def run(args) -> int:
    return run_study_file(args.study, out_dir=args.out, quiet=args.quiet, jobs=getattr(args, "jobs", None),
                          scheduler=getattr(args, "scheduler", None))


def output_option(spec, out_dir) -> str:
    """How the user chose the report's place, for error messages."""
    if out_dir:
        return "--out"
    return f"{spec.path.name}: study.output" if spec.output else "default report folder"


def run_study_file(path, out_dir=None, quiet=False, jobs=None, scheduler=None) -> int:
    """Run the study, write the report folder atomically, say where it is.

    The report folder is checked before the study runs: it must be new, empty, or an earlier
    report (it holds the report marker file); anything else is refused, naming ``--out`` or the
    study's ``output`` key. ``scheduler`` (``--scheduler``) replaces the study's ``[sweep]
    scheduler`` for the N-1 and hourly sweeps.
    """
    from ..atomic import check_folder_target, to_json
    from ..report.atomic import MARKER, write_report_folder
    from ..report.render import report_files
    from ..study.run import plan_to_dict, report_folder, run_study
    from ..study.spec import read_study

    con = Console(quiet)
    spec = read_study(path)
    if scheduler is not None and spec.proof is not None:
        spec.proof.scheduler = scheduler
    option = output_option(spec, out_dir)
    target = report_folder(spec, out_dir)
    check_folder_target(target, option, marker=MARKER)
    warn_about_model(con, spec.network_path)
    from ..optimize.milp import keep_scipy_deferred
    keep_scipy_deferred()   # before the progress bar's thread starts (see its docstring)
    progress = Progress(quiet, iterations=spec.max_iterations)
    try:
        result = run_study(spec, progress=progress, jobs=jobs)
    finally:
        progress.close()
    check_interrupted()       # a stop during the last solver call must not pass for a result
    from ..report.convert import report_data
    data = report_data(result)
    plans = [(a.spec, a.plan) for a in result.alternatives]
    files = report_files(data)
    files["plans.json"] = to_json([plan_to_dict(p) for _, p in plans])
    from ..network.workbook import have_openpyxl
    from ..report.sheets import csv_tables_xlsx
    if have_openpyxl():   # with the xlsx extra: the same tables as the CSV files, one sheet each
        files["results.xlsx"] = csv_tables_xlsx(files)
    with options.output_errors(option, target):
        folder = write_report_folder(target, files)
    for alt in data["alternatives"]:
        con.out(alternative_line(alt))
    con.out(f"report: {folder / 'report.html'}", width=None)
    # alternatives that cannot meet the limits are findings of the study, not failures of the run
    return OK if any(verified(a) for a in data["alternatives"]) else NOT_SUCCESS


def verified(alt: dict) -> bool:
    """An alternative is verified only if its plan is and its optimisation did not fail."""
    from .plan import optimizer_failed
    return bool(alt["verified"]) and not optimizer_failed(alt.get("status", ""), alt.get("convergence", []))


def alternative_line(alt: dict) -> str:
    """One line per alternative: verified or not, losses after at each level.

    >>> alternative_line({"name": "Banks", "verified": True, "message": "",
    ...                   "levels": {"peak": {"losses_mw": 0.13912}, "light": {"losses_mw": None}}})
    'Banks: verified; losses after: peak 0.1391 MW, light not converged'
    """
    lv = ", ".join(f"{n} {d['losses_mw']:.4f} MW" if d.get("losses_mw") is not None else f"{n} not converged"
                   for n, d in alt["levels"].items())
    state = "verified" if verified(alt) else "NOT verified: " + str(alt["message"])
    return f"{alt['name']}: {state}; losses after: {lv}"
