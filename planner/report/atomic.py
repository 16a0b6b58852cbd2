"""Write a whole report folder so that readers see either the old report or the new one, never a mix.

A thin layer over :func:`planner.atomic.write_folder` (temporary folder beside the target, then a
swap; the earlier report is untouched if anything fails). A folder is replaced only if it is
empty or was written by this function (it holds the marker file ``MARKER``), so pointing the
writer at an unrelated folder cannot delete it.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Mapping

from .. import atomic as _atomic

__all__ = ["write_report_folder", "MARKER"]

MARKER = ".planner-report"


def write_report_folder(folder: str | os.PathLike, files: Mapping[str, str | bytes]) -> Path:
    """Write ``files`` (name -> text or bytes) as the complete content of ``folder``, atomically.

    Text is written as UTF-8. The previous content of ``folder`` is replaced as a whole.
    Returns the folder path.

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as top:
    ...     d = pathlib.Path(top) / "report"
    ...     _ = write_report_folder(d, {"a.txt": "one"})
    ...     _ = write_report_folder(d, {"b.txt": b"two"})
    ...     sorted(p.name for p in d.iterdir() if not p.name.startswith("."))
    ['b.txt']
    """
    return _atomic.write_folder(folder, files, marker=MARKER)
