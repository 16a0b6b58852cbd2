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


def _write_file(path: Path, content: str | bytes) -> None:
    data = content.encode("utf-8") if isinstance(content, str) else bytes(content)
    with open(path, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())


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
    names = [_atomic._check_name(n) for n in files]
    if MARKER in names:
        raise ValueError(f"report folder: invalid file name {MARKER!r}")
    if len(set(n.lower() for n in names)) != len(names):
        raise ValueError("report folder: file names differ only by case")

    def fill(tmp: Path) -> None:
        for name in names:
            _write_file(tmp / name, files[name])
            os.chmod(tmp / name, 0o666 & ~_atomic._umask())
    return _atomic.write_folder(folder, fill, marker=MARKER)
