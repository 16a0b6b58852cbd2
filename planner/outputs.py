"""Atomic writing of single output files (a folder of outputs: planner.report.atomic)."""
from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

import numpy as np


def write_text_atomic(path, text: str) -> Path:
    """Write ``text`` to ``path`` so that readers see the old file or the new one, never a part.

    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = pathlib.Path(d) / "out.txt"
    ...     _ = write_text_atomic(p, "hello")
    ...     p.read_text()
    'hello'
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return target


def _plain(obj):
    """JSON encoder hook for numpy scalars and arrays."""
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def to_json(data) -> str:
    """JSON text of plain data that may hold numpy values; NaN and inf become null."""
    return json.dumps(_clean(data), indent=2, default=_plain, allow_nan=False) + "\n"


def _clean(x):
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, (float, np.floating)) and not np.isfinite(x):
        return None
    return x


def write_json_atomic(path, data) -> Path:
    return write_text_atomic(path, to_json(data))
