"""Write a whole report folder so that readers see either the old report or the new one, never a mix.

Steps: build a temporary folder beside the target (same file system, so renames are atomic), write
and flush every file there, then swap: rename the old folder to a backup name, rename the new one
into place, delete the backup. If anything fails before the swap, the temporary folder is removed
and the earlier report is untouched; if the second rename fails, the backup is renamed back.

A folder is replaced only if it is empty or was written by this function (it holds the marker file
``MARKER``), so pointing the writer at an unrelated folder cannot delete it.
"""
from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path
from typing import Mapping

__all__ = ["write_report_folder", "MARKER"]

MARKER = ".planner-report"


def _check_name(name: str) -> str:
    if not isinstance(name, str) or not name or name in (".", "..") or name == MARKER:
        raise ValueError(f"report folder: invalid file name {name!r}")
    if "/" in name or "\\" in name or "\x00" in name:
        raise ValueError(f"report folder: file name {name!r} must not contain a path separator")
    return name


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
    target = Path(folder)
    names = [_check_name(n) for n in files]
    if len(set(n.lower() for n in names)) != len(names):
        raise ValueError("report folder: file names differ only by case")
    if target.exists():
        if not target.is_dir():
            raise ValueError(f"report folder: {target} exists and is not a folder")
        if any(target.iterdir()) and not (target / MARKER).exists():
            raise ValueError(f"report folder: {target} is not empty and was not written by the "
                             f"planner (no {MARKER} file); refusing to replace it")
    parent = target.parent if str(target.parent) else Path(".")
    parent.mkdir(parents=True, exist_ok=True)

    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.new-", dir=parent))
    try:
        for name in names:
            _write_file(tmp / name, files[name])
        _write_file(tmp / MARKER, "written by planner\n")
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise

    backup = None
    try:
        if target.exists():
            # mkdtemp reserves a unique name; rmdir it so rename can take the name.
            backup = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=parent))
            backup.rmdir()
            os.rename(target, backup)
        try:
            os.rename(tmp, target)
        except BaseException:
            if backup is not None:
                os.rename(backup, target)
                backup = None
            raise
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if backup is not None:
        shutil.rmtree(backup, ignore_errors=True)
    return target
