"""Command-line option types with stated ranges, and the mapping of output failures to the option.

Each type raises ``argparse.ArgumentTypeError`` with the range, so a bad value is reported as bad
input (exit status 2) naming the option:

>>> max_iter("30"), tol_mva("0.001")
(30, 0.001)
>>> for bad in ("0", "-5", "3.5", "x"):
...     try:
...         max_iter(bad)
...     except Exception as e:
...         print(e)
must be a whole number 1-1000, got '0'
must be a whole number 1-1000, got '-5'
must be a whole number 1-1000, got '3.5'
must be a whole number 1-1000, got 'x'
>>> for bad in ("inf", "nan", "-1", "0", "1e9"):
...     try:
...         tol_mva(bad)
...     except Exception as e:
...         print(e)
must be a number 1e-10 to 1 MW/Mvar, got 'inf'
must be a number 1e-10 to 1 MW/Mvar, got 'nan'
must be a number 1e-10 to 1 MW/Mvar, got '-1'
must be a number 1e-10 to 1 MW/Mvar, got '0'
must be a number 1e-10 to 1 MW/Mvar, got '1e9'
"""
from __future__ import annotations

import argparse
import contextlib
import math

from .console import EXIT_CODES_HELP

MAX_ITER_RANGE = "1-1000"
TOL_MVA_RANGE = "1e-10 to 1"
EXIT_EPILOG = EXIT_CODES_HELP


class Formatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the exit-status table of the epilog as written."""


def max_iter(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = None
    if n is None or not 1 <= n <= 1000:
        raise argparse.ArgumentTypeError(f"must be a whole number {MAX_ITER_RANGE}, got {text!r}")
    return n


def tol_mva(text: str) -> float:
    # A tolerance of 1 MVA or more would accept a flat start as the solution; below 1e-10 the
    # mismatch of a large case cannot get there in floating point.
    try:
        x = float(text)
    except ValueError:
        x = math.nan
    if not (math.isfinite(x) and 1e-10 <= x <= 1.0):
        raise argparse.ArgumentTypeError(f"must be a number {TOL_MVA_RANGE} MW/Mvar, got {text!r}")
    return x


@contextlib.contextmanager
def output_errors(option: str, path):
    """Turn an operating-system failure while writing an output into an :class:`OutputError`
    naming the option (exit status 3), not a Python class or a temporary file name."""
    from ..errors import OutputError
    try:
        yield
    except OSError as exc:
        why = exc.strerror or str(exc)
        raise OutputError(f"cannot write: {why.lower()}", option=option, path=path) from None


def jobs(text: str) -> int:
    """Worker processes for ``--jobs``: a whole number 1-256.

    >>> jobs("2")
    2
    """
    try:
        n = int(text)
    except ValueError:
        n = None
    if n is None or not 1 <= n <= 256:
        raise argparse.ArgumentTypeError(f"must be a whole number 1-256, got {text!r}")
    return n


def scheduler(text: str) -> str:
    """Where ``--scheduler`` sends the N-1 and hourly sweeps: ``serial`` (this process), ``local``
    (this machine's cores) or a Dask scheduler address, which needs the ``distributed`` extra.

    >>> scheduler("serial"), scheduler(" tcp://10.0.0.5:8786 ")
    ('serial', 'tcp://10.0.0.5:8786')
    """
    where = text.strip()
    if not where:
        raise argparse.ArgumentTypeError("must be serial, local or a Dask scheduler address, got ''")
    if where not in ("serial", "local"):
        from ..sweep.engine import dask_available
        if not dask_available():
            raise argparse.ArgumentTypeError(f"a scheduler address ({where}) needs Dask: "
                                             "pip install -e '.[distributed]'")
    return where


def add_jobs(parser) -> None:
    parser.add_argument("--jobs", type=jobs, metavar="N", help="worker processes: alternatives (or the load "
                        "levels of a single one) run side by side; the plans are the same for any N "
                        "(default: every core)")
