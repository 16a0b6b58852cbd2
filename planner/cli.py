"""Command line entry point: ``planner flow``, ``planner plan``, ``planner study``.

Thin on purpose: the commands live in :mod:`planner.commands`, one module each. Heavy modules
(the optimiser, Pyomo, the report) are imported inside the command that needs them, so
``planner flow`` on a small case does not pay for them.
"""
from __future__ import annotations

import argparse
import sys

from .commands import flow, plan, study


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="planner", description="Loss-reduction planning: load flow, "
                                "optimised capacitor banks and voltage setpoints, study reports.")
    sub = p.add_subparsers(dest="command", required=True)
    flow.add_parser(sub)
    plan.add_parser(sub)
    study.add_parser(sub)
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
