"""Atomic writing of output files and folders: readers see the old output or the new one, never a part.

One module for every writer in the package (results JSON, network files, CSV tables, report
folders):

* :func:`write_file` writes into a temporary file beside the target (same file system) and
  renames it over the target; :func:`write_json` does the same for plain data.
* :func:`write_folder` builds a temporary folder beside the target, then swaps it in (old folder
  renamed to a backup name, new folder renamed into place, backup deleted). An existing folder is
  replaced only if it is empty, holds nothing but files this writer would write itself, or
  carries the given marker file, so pointing it at an unrelated folder cannot delete anything.

Outputs honour the umask (a new file is ``0666 & ~umask``, a folder ``0777 & ~umask``; a replaced
file keeps its mode), so colleagues on a shared drive can read them as with any other tool.

Temporaries are named ``.<target>.part-<pid>-<random>``. If a run is killed (``kill -9``, a power
cut) they stay behind; the next write to the same target removes those whose process is gone
(:func:`sweep`), and a backup left between the two renames of a folder swap is put back if the
target went missing. :func:`remove_live_temporaries` removes the current process's own
temporaries; the commands call it from their signal handlers.

>>> import tempfile, pathlib
>>> with tempfile.TemporaryDirectory() as d:
...     p = write_file(pathlib.Path(d) / "out.txt", "hello")
...     f = write_folder(pathlib.Path(d) / "tables", {"a.csv": "x\\n1\\n"}, own_names={"a.csv"})
...     p.read_text(), sorted(x.name for x in f.iterdir()), sorted(x.name for x in pathlib.Path(d).iterdir())
('hello', ['a.csv'], ['out.txt', 'tables'])
"""
from __future__ import annotations

import json
import math
import os
import re
import secrets
import shutil
from pathlib import Path
from typing import Callable, Iterable, Mapping

__all__ = ["write_file", "write_json", "to_json", "write_folder", "sweep", "check_file_target",
           "check_folder_target", "remove_live_temporaries", "OutputError"]

from .errors import OutputError

_LIVE: dict[Path, Path] = {}     # temporary of this process not yet renamed into place -> its target


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _tmp_name(target: Path, kind: str = "part") -> Path:
    return target.parent / f".{target.name}.{kind}-{os.getpid()}-{secrets.token_hex(4)}"


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return pid > 0 and not isinstance(pid, bool) and pid < 2**31   # someone else's process
    return True


def _remove(path: Path) -> None:
    try:
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path, ignore_errors=True)
        else:
            path.unlink()
    except FileNotFoundError:
        pass
    except OSError:
        pass            # best effort: a stale temporary we cannot remove is not worth failing for


def sweep(target) -> list[Path]:
    """Remove temporaries that interrupted runs left beside ``target``; returns what was removed.

    Current temporaries carry their process id and are removed only when that process is gone.
    Names written by earlier versions (``.NAME.new-*``, ``.NAME.old-*``, ``.NAME.tmp-*``,
    ``.NAME.*.tmp``) carry none and are removed as they are. A backup (``.NAME.old-*``) is put back
    in place instead when the target itself is missing (the run was killed between the renames).

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     t = pathlib.Path(d) / "r"
    ...     (pathlib.Path(d) / ".r.part-999999999-ab12cd34").mkdir()
    ...     _ = (pathlib.Path(d) / ".r.json.x1y2.tmp").write_text("")  # another target's
    ...     [p.name for p in sweep(t)], sorted(p.name for p in pathlib.Path(d).iterdir())
    (['.r.part-999999999-ab12cd34'], ['.r.json.x1y2.tmp'])
    """
    target = Path(target)
    parent = target.parent if str(target.parent) else Path(".")
    try:
        entries = list(parent.iterdir())
    except OSError:
        return []
    name = re.escape(target.name)
    ours = re.compile(rf"^\.{name}\.(part|old)-(\d+)-[0-9a-f]{{8}}$")
    legacy = re.compile(rf"^\.{name}\.((new|old|tmp)-[A-Za-z0-9_]{{4,}}|[A-Za-z0-9_]{{6,}}\.tmp)$")
    removed = []
    for p in sorted(entries):
        m = ours.match(p.name)
        if m:
            if _pid_alive(int(m.group(2))):
                continue
            is_backup = m.group(1) == "old"
        elif legacy.match(p.name):
            is_backup = ".old-" in p.name
        else:
            continue
        if is_backup and not os.path.lexists(target):
            try:
                os.rename(p, target)
                continue
            except OSError:
                pass
        _remove(p)
        removed.append(p)
    return removed


def remove_live_temporaries() -> None:
    """Remove the temporaries this process has open (for a signal handler; safe to call twice)."""
    for p, target in list(_LIVE.items()):
        if p.name.startswith(f".{target.name}.old-") and not os.path.lexists(target):
            try:
                os.rename(p, target)        # interrupted between the renames: keep the old output
            except OSError:
                _remove(p)
        else:
            _remove(p)
        _LIVE.pop(p, None)


def _raise_output(option, target, text):
    raise OutputError(text, option=option, path=target) from None


def _nearest_existing(path: Path) -> Path:
    p = path
    while not os.path.lexists(p):
        if p.parent == p:
            break
        p = p.parent
    return p


def _probe_writable(folder: Path) -> str | None:
    """None if a file can be created in ``folder`` (a real try: root ignores permission bits, and
    a read-only mount shows only on writing), else the reason."""
    probe = folder / f".planner-probe-{os.getpid()}-{secrets.token_hex(4)}"
    try:
        fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        return exc.strerror or str(exc)
    return None


def _check_parent(target: Path, option: str | None) -> None:
    parent = target.parent if str(target.parent) else Path(".")
    base = _nearest_existing(parent)
    if not base.is_dir():
        _raise_output(option, target, f"{base} is not a folder, so the output cannot go under it")
    why = _probe_writable(base)
    if why:
        _raise_output(option, target, f"cannot write in folder {base} ({why.lower()})")


def check_file_target(path, option: str | None = None) -> Path:
    """Check, before any work, that ``path`` can be written as a file; raise :class:`OutputError`
    naming ``option`` (e.g. ``"--json"``) if not. Missing parent folders are allowed (they are
    created on writing) if the nearest existing one is writable.

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     _ = (pathlib.Path(d) / "a.txt").write_text("x")
    ...     for p in ("new/out.json", "", "a.txt/out.json"):
    ...         try:
    ...             print(check_file_target(pathlib.Path(d) / p, "--json").name)
    ...         except OutputError as e:
    ...             print(str(e).replace(d, "D"))
    out.json
    --json D: is a folder; give a file name
    --json D/a.txt/out.json: D/a.txt is not a folder, so the output cannot go under it
    """
    target = Path(path)
    if target.name in ("", ".", ".."):
        _raise_output(option, target, "needs a file name")
    if os.path.isdir(target):
        _raise_output(option, target, "is a folder; give a file name")
    if os.path.lexists(target) and not os.path.isfile(target):
        _raise_output(option, target, "exists and is not a regular file")
    _check_parent(target, option)
    return target


def check_folder_target(folder, option: str | None = None, *, own_names: Iterable[str] = (),
                        marker: str | None = None) -> Path:
    """Check, before any work, that ``folder`` may be written (or replaced) by :func:`write_folder`
    with the same ``own_names`` / ``marker``; raise :class:`OutputError` naming ``option`` if not.

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     mine = pathlib.Path(d) / "mine"
    ...     mine.mkdir()
    ...     _ = (mine / "notes.txt").write_text("keep")
    ...     try:
    ...         check_folder_target(mine, "--csv", own_names={"buses.csv"})
    ...     except OutputError as e:
    ...         print(str(e).replace(d, "D"))
    --csv D/mine: folder holds 'notes.txt', which is not a file this command writes; refusing to replace it (choose a new or empty folder)
    """
    target = Path(folder)
    if target.name in ("", ".", ".."):
        _raise_output(option, target, "needs a folder name")
    if os.path.lexists(target):
        if not target.is_dir():
            _raise_output(option, target, "exists and is not a folder")
        foreign = _foreign_entries(target, set(own_names), marker)
        if foreign:
            _raise_output(option, target, _foreign_text(foreign, marker) + " (choose a new or empty folder)")
    _check_parent(target, option)
    return target


def _foreign_text(foreign, marker) -> str:
    if marker:
        return (f"folder holds {foreign[0]!r} and was not written by the planner (no {marker} "
                "marker of an earlier report); refusing to replace it")
    return f"folder holds {foreign[0]!r}, which is not a file this command writes; refusing to replace it"


def _foreign_entries(target: Path, own: set, marker: str | None) -> list[str]:
    try:
        names = sorted(p.name for p in target.iterdir())
    except OSError as exc:
        raise OutputError(f"cannot list the folder ({exc.strerror})", path=target) from None
    if marker and marker in names:
        return []
    return [n for n in names if n not in own]


def _file_mode(target: Path) -> int:
    try:
        return os.stat(target).st_mode & 0o7777
    except OSError:
        return 0o666 & ~_umask()


def _write_bytes(path: Path, data: bytes, mode: int) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        os.fchmod(fd, mode)
        with os.fdopen(fd, "wb", closefd=False) as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    finally:
        os.close(fd)


def _as_bytes(content, encoding) -> bytes:
    return content.encode(encoding, errors="replace" if encoding != "utf-8" else "strict") \
        if isinstance(content, str) else bytes(content)


def write_file(path, content: str | bytes, *, encoding: str = "utf-8") -> Path:
    """Write ``content`` (text or bytes) to ``path`` atomically; returns the path.

    Missing parent folders are created. Text is written with ``encoding`` and without newline
    translation (the caller chooses the line ends).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    sweep(target)
    data = _as_bytes(content, encoding)
    mode = _file_mode(target)
    tmp = _tmp_name(target)
    _LIVE[tmp] = target
    try:
        _write_bytes(tmp, data, mode)
        os.replace(tmp, target)
    except BaseException:
        _remove(tmp)
        raise
    finally:
        _LIVE.pop(tmp, None)
    return target


def _plain(obj):
    """JSON encoder hook for numpy scalars and arrays (numpy imported only if one shows up)."""
    import numpy as np
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def _clean(x):
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, float) or type(x).__name__ in ("float64", "float32", "float16"):
        return float(x) if math.isfinite(float(x)) else None
    return x


def to_json(data) -> str:
    """JSON text of plain data that may hold numpy values; NaN and inf become null.

    >>> to_json({"a": float("inf"), "b": [1, 2.5]})
    '{\\n  "a": null,\\n  "b": [\\n    1,\\n    2.5\\n  ]\\n}\\n'
    """
    return json.dumps(_clean(data), indent=2, default=_plain, allow_nan=False) + "\n"


def write_json(path, data) -> Path:
    """Write plain data as JSON (see :func:`to_json`), atomically."""
    return write_file(path, to_json(data))


def _check_name(name: str) -> str:
    if not isinstance(name, str) or not name or name in (".", ".."):
        raise ValueError(f"output folder: invalid file name {name!r}")
    if "/" in name or "\\" in name or "\x00" in name:
        raise ValueError(f"output folder: file name {name!r} must not contain a path separator")
    return name


def write_folder(folder, files: Mapping[str, str | bytes] | Callable[[Path], None], *,
                 own_names: Iterable[str] = (), marker: str | None = None) -> Path:
    """Write ``files`` (name -> text or bytes, or a function that fills a given folder) as the
    whole content of ``folder``, atomically; returns the folder.

    An existing ``folder`` is replaced only if it is empty, holds only names in ``own_names`` (and
    the names of ``files``), or holds the ``marker`` file; otherwise :class:`OutputError`. With a
    ``marker`` the new folder carries that file too (so a later run may replace it).

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as top:
    ...     d = pathlib.Path(top) / "report"
    ...     _ = write_folder(d, {"a.txt": "one"}, marker=".mark")
    ...     _ = write_folder(d, {"b.txt": b"two"}, marker=".mark")
    ...     sorted(p.name for p in d.iterdir())
    ['.mark', 'b.txt']
    """
    target = Path(folder)
    if callable(files):
        fill, names = files, []
    else:
        names = [_check_name(n) for n in files]
        if marker in names:
            raise ValueError(f"output folder: invalid file name {marker!r}")
        if len(set(n.lower() for n in names)) != len(names):
            raise ValueError("output folder: file names differ only by case")

        def fill(tmp_dir: Path) -> None:
            for n in names:
                _write_bytes(tmp_dir / n, _as_bytes(files[n], "utf-8"), 0o666 & ~_umask())
    own = set(own_names) | set(names)
    if os.path.lexists(target):
        if not target.is_dir():
            raise OutputError("exists and is not a folder", path=target)
        foreign = _foreign_entries(target, own, marker)
        if foreign:
            raise OutputError(_foreign_text(foreign, marker), path=target)
    parent = target.parent if str(target.parent) else Path(".")
    parent.mkdir(parents=True, exist_ok=True)
    sweep(target)

    tmp = _tmp_name(target)
    _LIVE[tmp] = target
    backup = None
    try:
        os.mkdir(tmp, 0o700)
        os.chmod(tmp, 0o777 & ~_umask())
        fill(tmp)
        if marker:
            _write_bytes(tmp / marker, b"written by planner\n", 0o666 & ~_umask())
        if os.path.lexists(target):
            backup = _tmp_name(target, "old")
            _LIVE[backup] = target
            os.rename(target, backup)
        try:
            os.rename(tmp, target)
        except BaseException:
            if backup is not None:
                os.rename(backup, target)
                _LIVE.pop(backup, None)
                backup = None
            raise
    except BaseException:
        _remove(tmp)
        raise
    finally:
        _LIVE.pop(tmp, None)
    if backup is not None:
        _remove(backup)
        _LIVE.pop(backup, None)
    return target
