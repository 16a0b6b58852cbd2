"""What every command shares: exit statuses, safe terminal output, progress display, signals.

Exit statuses (also in ``planner --help`` and the README):

====  =====================================================================================
0     done: the load flow converged / the plan or at least one study alternative is verified
1     done, but the answer is not a success: the load flow did not converge, the plan is not
      verified (limits remain broken or its final load flow failed), no study alternative is
      verified. Outputs are still written so the failure can be studied.
2     bad input or usage: a file, a field, a study key or a command-line option is wrong
3     an output cannot be written where asked (the error names the option or study key)
4     internal error (a bug: please report it with the input that caused it)
130   interrupted (Ctrl-C, or a termination signal); partial outputs are removed
====  =====================================================================================
"""
from __future__ import annotations

import os
import re
import signal
import sys
import time

OK, NOT_SUCCESS, BAD_INPUT, OUTPUT_PROBLEM, INTERNAL, INTERRUPTED = 0, 1, 2, 3, 4, 130

EXIT_CODES_HELP = """exit status:
  0    done: load flow converged / plan verified / a study alternative verified
  1    done, not a success: no convergence, plan not verified, no alternative verified
  2    bad input or usage (the message names file, line or record, and field)
  3    an output cannot be written where asked (the message names the option)
  4    internal error (please report it)
  130  interrupted (Ctrl-C or a termination signal); partial outputs removed"""

WIDTH = 100          # summary lines are kept within this many columns

# C0 and C1 control characters, DEL, and the Unicode controls that reorder or hide text
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u200b-\u200f\u2028-\u202e\u2066-\u2069\ufeff]")


def clean(text) -> str:
    """``text`` safe for a terminal: control characters shown escaped, not acted on.

    >>> clean("bus \\x1b]0;owned\\x07 name\\tX")
    'bus \\\\x1b]0;owned\\\\x07 name\\\\tX'
    >>> clean("Millhaven \\u202e") == "Millhaven \\\\u202e"
    True
    """
    def esc(m):
        ch = m.group(0)
        named = {"\t": "\\t", "\n": "\\n", "\r": "\\r"}
        if ch in named:
            return named[ch]
        return f"\\x{ord(ch):02x}" if ord(ch) < 0x100 else f"\\u{ord(ch):04x}"
    return _CONTROL.sub(esc, str(text))


def fit(text: str, width: int = WIDTH) -> str:
    """Shorten one line to ``width`` columns, marking the cut.

    >>> fit("x" * 120)[-5:], len(fit("x" * 120))
    ('xx...', 100)
    """
    return text if len(text) <= width else text[:width - 3] + "..."


def plural(n: int, word: str, many: str | None = None) -> str:
    """``"1 iteration"``, ``"3 iterations"``.

    >>> plural(1, "iteration"), plural(0, "bus", "buses")
    ('1 iteration', '0 buses')
    """
    return f"{n} {word if n == 1 else (many or word + 's')}"


class Console:
    """Printing for the commands: every line cleaned; a closed stdout (``planner ... | head``)
    silences further output instead of raising, and the command keeps its exit status."""

    def __init__(self, quiet: bool = False):
        self.quiet = quiet
        self.stdout_closed = False

    def out(self, line: str = "", *, width: int | None = WIDTH) -> None:
        if self.quiet or self.stdout_closed:
            return
        text = clean(line)
        self._write(sys.stdout, fit(text, width) if width else text)

    def err(self, line: str) -> None:
        try:
            sys.stderr.write(clean(" ".join(str(line).split())) + "\n")
            sys.stderr.flush()
        except (BrokenPipeError, ValueError, OSError):
            pass

    def _write(self, stream, text: str) -> None:
        try:
            stream.write(text + "\n")
            stream.flush()
        except BrokenPipeError:
            self.stdout_closed = True
            _silence(stream)


def _silence(stream) -> None:
    # Point the closed descriptor at /dev/null so the interpreter's final flush stays quiet.
    try:
        fd = stream.fileno()
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, fd)
        os.close(null)
    except (OSError, ValueError):
        pass


class Progress:
    """Shows the library's progress callbacks: a bar on a terminal (``rich``, the optional
    ``progress`` extra), plain timestamped lines otherwise (a pipe, a log file, no ``rich``),
    nothing when quiet. Call it with a text line; ``step(done, total)`` moves the bar."""

    def __init__(self, quiet: bool = False, stream=None, bar: bool | None = None, iterations: int = 30):
        self.stream = stream if stream is not None else sys.stderr
        self.quiet = quiet
        self.iterations = max(1, int(iterations))   # the optimiser's iteration limit per alternative
        self._alt = (0, 1)
        self.t0 = time.monotonic()
        self._bar = None
        self._task = None
        self._closed = False
        on_tty = bool(getattr(self.stream, "isatty", lambda: False)())
        if not quiet and (bar if bar is not None else on_tty):
            try:
                from rich.console import Console as _RichConsole
                from rich.progress import (BarColumn, MofNCompleteColumn, Progress as _Bar, TextColumn,
                                           TimeElapsedColumn, TimeRemainingColumn)
            except ImportError:
                pass
            else:
                self._bar = _Bar(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                 _rate_column(), TextColumn("elapsed"), TimeElapsedColumn(), TextColumn("left"),
                                 TimeRemainingColumn(), console=_RichConsole(file=self.stream),
                                 transient=True)
                self._task = self._bar.add_task("starting", total=None)
                self._bar.start()

    @property
    def uses_bar(self) -> bool:
        return self._bar is not None

    def __call__(self, text) -> None:
        check_interrupted()            # the library calls back often: the place to stop it
        if self.quiet or self._closed:
            return
        line = fit(clean(" ".join(str(text).split())), WIDTH - 10)
        self._track(line)
        if self._bar is not None:
            self._bar.update(self._task, description=line[:48])
            return
        stamp = time.strftime("%H:%M:%S")
        try:
            self.stream.write(f"{stamp} {line}\n")
            self.stream.flush()
        except (BrokenPipeError, OSError, ValueError):
            self._closed = True

    def _track(self, line: str) -> None:
        # Steps of the bar: each alternative counts the optimiser's iteration limit (an upper
        # bound: most stop earlier, so the estimate errs long).
        m = _ALTERNATIVE.search(line)
        if m:
            self._alt = (int(m.group(1)), max(1, int(m.group(2))))
            self.step((self._alt[0] - 1) * self.iterations, self._alt[1] * self.iterations)
            return
        m = _ITERATION.search(line)
        if m and self._alt[0]:
            done = (self._alt[0] - 1) * self.iterations + min(int(m.group(1)), self.iterations)
            self.step(done, self._alt[1] * self.iterations)

    def step(self, done: float, total: float | None) -> None:
        if self._bar is not None and not self._closed:
            self._bar.update(self._task, completed=done, total=total)

    def close(self) -> None:
        if self._bar is not None:
            try:
                self._bar.stop()
            except Exception:       # a display problem must not hide the command's result
                pass
            self._bar = None
        self._closed = True


def _rate_column():
    """A rich column with the bar's rate (steps a second), blank until rich has measured one."""
    from rich.progress import ProgressColumn
    from rich.text import Text

    class RateColumn(ProgressColumn):
        def render(self, task):
            return Text(f"{task.speed:,.1f}/s" if task.speed else "")
    return RateColumn()


_ALTERNATIVE = re.compile(r"^alternative (\d+)/(\d+)")
_ITERATION = re.compile(r"\biteration (\d+)\b")


class Interrupted(KeyboardInterrupt):
    """Raised in the main thread when a termination signal arrives (as Ctrl-C raises
    ``KeyboardInterrupt``), so every ``try/finally`` and the atomic writers' clean-up run."""


def warn_about_model(con: "Console", path) -> None:
    """Print the network's likely modelling mistakes (legal, so the work goes on) as warning
    lines on stderr, also under ``-q``."""
    from ..network.io import read_network
    from ..network.validate import model_warnings
    for w in model_warnings(read_network(path)):
        con.err(f"warning: {w}")


_interrupt = {"signal": None}


def check_interrupted() -> None:
    """Raise :class:`Interrupted` if a stop signal arrived, even if the library swallowed the
    exception it raised (the MILP solver turns Ctrl-C into a cancelled solve and carries on)."""
    if _interrupt["signal"] is not None:
        raise Interrupted(f"signal {_interrupt['signal']}")


def install_signal_handlers() -> dict:
    """Ctrl-C (SIGINT), SIGTERM and SIGHUP stop the command: the signal is remembered and
    :class:`Interrupted` raised, so clean-up runs, "interrupted" is printed and the status is 130.
    An ignored SIGINT (a background job) stays ignored. Returns the handlers replaced, for
    :func:`restore_signal_handlers`."""
    _interrupt["signal"] = None

    def handler(signum, frame):
        _interrupt["signal"] = signum
        raise Interrupted(f"signal {signum}")
    old = {}
    for name in ("SIGINT", "SIGTERM", "SIGHUP"):
        sig = getattr(signal, name, None)
        if sig is None:
            continue
        try:
            if sig == signal.SIGINT and signal.getsignal(sig) is signal.SIG_IGN:
                continue
            old[sig] = signal.signal(sig, handler)
        except (ValueError, OSError):      # not the main thread, or not allowed here
            pass
    return old


def restore_signal_handlers(old: dict) -> None:
    for sig, handler in old.items():
        try:
            signal.signal(sig, handler if handler is not None else signal.SIG_DFL)
        except (ValueError, OSError, TypeError):
            pass


def ignore_further_interrupts() -> dict:
    """While cleaning up after one interrupt, a second Ctrl-C must not cut the clean-up short.
    Returns the handlers it replaced."""
    old = {}
    for name in ("SIGINT", "SIGTERM", "SIGHUP"):
        sig = getattr(signal, name, None)
        if sig is not None:
            try:
                old[sig] = signal.signal(sig, signal.SIG_IGN)
            except (ValueError, OSError):
                pass
    return old
