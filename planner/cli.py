"""Command line entry point: ``planner flow``, ``planner plan``, ``planner study``.

Thin on purpose: the commands live in :mod:`planner.commands`, one module each. Heavy modules
(the optimiser, Pyomo, the report) are imported inside the command that needs them, so
``planner flow`` on a small case does not pay for them. This module maps every failure to one
line on stderr and an exit status (:mod:`planner.commands.console` lists them).
"""
from __future__ import annotations

import argparse
import sys
import warnings

from .commands import flow, plan, study
from .commands.console import (BAD_INPUT, INTERNAL, INTERRUPTED, OUTPUT_PROBLEM, Console,
                               ignore_further_interrupts, install_signal_handlers, restore_signal_handlers)
from .commands.options import EXIT_EPILOG, Formatter


class _Parser(argparse.ArgumentParser):
    """Usage errors as one line, like every other error, with exit status 2."""

    def error(self, message):
        Console().err(f"error: {self.prog}: {message} (see {self.prog} --help)")
        raise SystemExit(BAD_INPUT)


def _version() -> str:
    from . import __version__
    return __version__


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="planner", description="Loss-reduction planning: load flow, optimised capacitor "
                "banks, generator voltage setpoints and transformer taps, study reports.",
                epilog=EXIT_EPILOG, formatter_class=Formatter)
    p.add_argument("--version", action="version", version=f"planner {_version()}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)
    flow.add_parser(sub)
    plan.add_parser(sub)
    study.add_parser(sub)
    return p


def _one_line_warning(message, category, filename, lineno, file=None, line=None):
    # Library warnings reach the user as one clean line, never with source lines.
    Console().err(f"warning: {message}")


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    from .errors import OutputError, PlannerError
    con = Console()
    handlers = install_signal_handlers()
    old_show = warnings.showwarning
    warnings.showwarning = _one_line_warning
    try:
        return args.run(args)
    except KeyboardInterrupt:
        handlers = {**ignore_further_interrupts(), **handlers}
        from .atomic import remove_live_temporaries
        remove_live_temporaries()
        con.err("interrupted: stopped; no partial output left behind")
        return INTERRUPTED
    except OutputError as exc:
        con.err(f"error: {exc}")
        return OUTPUT_PROBLEM
    except PlannerError as exc:
        con.err(f"error: {exc}")
        return BAD_INPUT
    except (RecursionError, MemoryError) as exc:
        # the readers guard size and depth first; this is the last line of defence
        what = "too deeply nested" if isinstance(exc, RecursionError) else "too large for memory"
        con.err(f"error: input {what} to process")
        return BAD_INPUT
    except (OSError, ValueError, KeyError, UnicodeError, OverflowError) as exc:
        # input problems that escaped a reader's own checks: still one line, never a trace
        con.err(f"error: {_describe(exc)}")
        return BAD_INPUT
    except Exception as exc:         # a bug: one line, the status says so
        con.err(f"error: internal error ({type(exc).__name__}: {exc}); please report it with the input")
        return INTERNAL
    finally:
        warnings.showwarning = old_show
        restore_signal_handlers(handlers)     # main() may be called from a program that has its own


def _describe(exc) -> str:
    if isinstance(exc, OSError) and exc.strerror:
        where = f"{exc.filename}: " if exc.filename else ""
        return f"{where}{exc.strerror.lower()}"
    return f"{exc}" if str(exc) else type(exc).__name__


if __name__ == "__main__":
    sys.exit(main())
