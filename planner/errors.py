"""Errors raised by the planner.

Every error prints as one line that says where the problem is (file, line or record, field) and
what is wrong, so a user can go straight to the bad value:

>>> from planner.errors import InputError, NetworkError
>>> str(InputError("cannot read 'abc' as a number", file="case.txt", line=5, field="load MW"))
"case.txt:5: load MW: cannot read 'abc' as a number"
>>> str(InputError("unknown column 'r_ohms'", file="lines.csv"))
"lines.csv: unknown column 'r_ohms'"
>>> e = NetworkError(["lines '1-2': to_bus: unknown bus 99", "buses 3: base_kv: must be positive, got 0"])
>>> str(e), len(e.problems)
("lines '1-2': to_bus: unknown bus 99 (and 1 more)", 2)
"""
from __future__ import annotations


def _one_line(text) -> str:
    # Messages may quote raw file content; keep the error on one line whatever it holds.
    return " ".join(str(text).split()) if text is not None else ""


class PlannerError(Exception):
    """Base class of every error the planner raises on purpose."""


class InputError(PlannerError):
    """Bad input: the message names the file, the line or record, and the field.

    ``str(err)`` is ``"<file>:<line>: <record>: <field>: <message>"`` with the parts that are
    ``None`` left out. The parts are kept as attributes for programs that want them.
    """

    def __init__(self, message, *, file=None, line=None, field=None, record=None):
        self.message = _one_line(message)
        self.file = None if file is None else str(file)
        self.line = line
        self.field = field
        self.record = record
        super().__init__(self._text())

    def _text(self) -> str:
        where = self.file or ""
        if self.line is not None:
            where = f"{where}:{self.line}" if where else f"line {self.line}"
        parts = [p for p in (where, self.record, self.field) if p not in (None, "")]
        parts.append(self.message)
        return ": ".join(_one_line(p) for p in parts)

    def __str__(self) -> str:
        return self._text()

    def __reduce__(self):
        # Keyword-only arguments would be lost by the default exception pickling.
        return (_rebuild_input_error, (type(self), self.message, self.file, self.line, self.field,
                                       self.record))


def _rebuild_input_error(cls, message, file, line, field, record):
    return cls(message, file=file, line=line, field=field, record=record)


class NetworkError(InputError):
    """A network that failed validation. ``.problems`` lists every problem found, one line each;
    ``str()`` shows the first one and how many more there are."""

    def __init__(self, problems, *, file=None):
        self.problems = [_one_line(p) for p in problems] or ["invalid network"]
        first = self.problems[0]
        more = len(self.problems) - 1
        super().__init__(first + (f" (and {more} more)" if more else ""), file=file)

    def __reduce__(self):
        return (type(self), (self.problems,), {"file": self.file})

    def __setstate__(self, state):
        self.file = state["file"]


class OutputError(PlannerError, ValueError):
    """An output cannot be written where the user asked (a folder where a file should be, a
    read-only folder, a folder holding other files). The message names the option or study key
    that chose the place, then the path. (It is also a ``ValueError``, which the writers raised
    before this class existed.)

    >>> str(OutputError("is a folder; give a file name", option="--json", path="out"))
    '--json out: is a folder; give a file name'
    """

    def __init__(self, message, *, option=None, path=None):
        self.message = _one_line(message)
        self.option = option
        self.path = None if path is None else str(path)
        super().__init__(self._text())

    def _text(self) -> str:
        where = " ".join(_one_line(p) for p in (self.option, self.path) if p)
        return f"{where}: {self.message}" if where else self.message

    def __str__(self) -> str:
        return self._text()

    def __reduce__(self):
        return (_rebuild_output_error, (self.message, self.option, self.path))


def _rebuild_output_error(message, option, path):
    return OutputError(message, option=option, path=path)
