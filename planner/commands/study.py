"""``planner study``: run a loss-reduction study and write its report folder."""
from __future__ import annotations

import sys


def add_parser(sub):
    st = sub.add_parser("study", help="run a loss-reduction study across load levels and write its report")
    st.add_argument("study", help="study file (TOML)")
    st.add_argument("--out", metavar="FOLDER", help="parent folder of the report (default: beside the study file)")
    st.add_argument("-q", "--quiet", action="store_true", help="no progress or summary output")
    st.set_defaults(run=run)
    return st


def run(args) -> int:
    return run_study_file(args.study, out_dir=args.out, quiet=args.quiet)


def run_study_file(path, out_dir=None, quiet=False) -> int:
    """Run the study, write the report folder atomically, say where it is."""
    from ..outputs import to_json
    from ..report.atomic import write_report_folder
    from ..report.render import report_files
    from ..study.run import plan_to_dict, report_folder, run_study
    from ..study.spec import read_study

    spec = read_study(path)
    show = (not quiet) and sys.stderr.isatty()
    progress = (lambda text: print(text, file=sys.stderr, flush=True)) if show else None
    data, plans = run_study(spec, progress=progress)
    files = report_files(data)
    files["plans.json"] = to_json([plan_to_dict(p) for _, p in plans])
    folder = write_report_folder(report_folder(spec, out_dir), files)
    if not quiet:
        for alt in data["alternatives"]:
            lv = ", ".join(f"{n} {alt['levels'][n]['losses_mw']:.4f} MW" if alt["levels"][n]["losses_mw"] is not None
                           else f"{n} not converged" for n in alt["levels"])
            state = "verified" if alt["verified"] else "NOT verified: " + alt["message"]
            print(f"{alt['name']}: {state}; losses after: {lv}")
        print(f"report: {folder / 'report.html'}")
    # alternatives that cannot meet the limits are findings of the study, not failures of the run
    return 0 if any(a["verified"] for a in data["alternatives"]) else 1
