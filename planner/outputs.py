"""Single output files: kept for existing imports; the writer is :mod:`planner.atomic`."""
from __future__ import annotations

from .atomic import to_json, write_file, write_json

__all__ = ["write_text_atomic", "write_json_atomic", "to_json"]


def write_text_atomic(path, text: str):
    """Write ``text`` to ``path`` atomically (:func:`planner.atomic.write_file`).

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = pathlib.Path(d) / "out.txt"
    ...     _ = write_text_atomic(p, "hello")
    ...     p.read_text()
    'hello'
    """
    return write_file(path, text)


def write_json_atomic(path, data):
    """Write plain data as JSON atomically (:func:`planner.atomic.write_json`)."""
    return write_json(path, data)
