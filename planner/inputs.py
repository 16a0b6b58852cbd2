"""Guards every reader applies before parsing: only regular files, a size limit, a TOML shape limit.

A careless or hostile input must cost no more than its size says: a named pipe or a device would
block a reader forever, a huge file would fill memory, and a small TOML file nested hundreds of
levels deep (or with a key of thousands of dotted parts) costs the standard parser a recursion
overflow or seconds and gigabytes. These checks run first and fail with one :class:`InputError`
line naming the file.

>>> import tempfile, os
>>> d = tempfile.mkdtemp()
>>> p = os.path.join(d, "s.toml")
>>> _ = open(p, "w").write("a = [" * 100 + "]" * 100)
>>> try:
...     parse_toml(read_input_bytes(p).decode(), p)
... except InputError as e:
...     print(str(e).replace(d, "D"))
D/s.toml:1: nested more than 64 levels deep (arrays or inline tables; not accepted)
>>> os.mkfifo(os.path.join(d, "pipe"))
>>> try:
...     read_input_bytes(os.path.join(d, "pipe"))
... except InputError as e:
...     print(str(e).replace(d, "D"))
D/pipe: not a regular file (a named pipe); give the path of a file
>>> import shutil; shutil.rmtree(d)
"""
from __future__ import annotations

import os
import stat
import tomllib

from .errors import InputError

MAX_NETWORK_BYTES = 256 * 2**20     # a network file or table: ~2 million CDF records
MAX_TOML_BYTES = 2**20              # a study file or network.toml: 1 MiB is far more than any needs
MAX_TOML_DEPTH = 64                 # nesting of arrays and inline tables
MAX_KEY_PARTS = 32                  # parts of one dotted key or table header


def _kind_of(mode: int) -> str:
    if stat.S_ISFIFO(mode):
        return "a named pipe"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    if stat.S_ISDIR(mode):
        return "a folder"
    return "not a file"


def check_regular(path, what: str = "file") -> os.stat_result:
    """The ``stat`` of ``path`` if it is a regular file (symbolic links followed); else an
    ``InputError``. Never opens the path, so a pipe cannot block."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise InputError("cannot read file: no such file", file=path) from None
    except OSError as exc:
        raise InputError(f"cannot read {what}: {(exc.strerror or str(exc)).lower()}", file=path) from None
    if not stat.S_ISREG(st.st_mode):
        raise InputError(f"not a regular file ({_kind_of(st.st_mode)}); give the path of a file", file=path)
    return st


def read_input_bytes(path, *, what: str = "file", max_bytes: int = MAX_NETWORK_BYTES) -> bytes:
    """The bytes of a regular file of at most ``max_bytes``, or an ``InputError`` naming it."""
    st = check_regular(path, what)
    if st.st_size > max_bytes:
        raise InputError(f"{what} is {st.st_size:,} bytes, more than the {max_bytes:,} accepted", file=path)
    try:
        # O_NONBLOCK: should the path turn into a pipe after the check, open still returns
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as exc:
        raise InputError(f"cannot read {what}: {(exc.strerror or str(exc)).lower()}", file=path) from None
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise InputError("not a regular file; give the path of a file", file=path)
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, 1 << 20)
            if not chunk:
                break
            total += len(chunk)
            if total > max_bytes:
                raise InputError(f"{what} is more than the {max_bytes:,} bytes accepted", file=path)
            chunks.append(chunk)
    except OSError as exc:
        raise InputError(f"cannot read {what}: {(exc.strerror or str(exc)).lower()}", file=path) from None
    finally:
        os.close(fd)
    return b"".join(chunks)


def check_toml_shape(text: str, file=None, *, max_depth: int = MAX_TOML_DEPTH,
                     max_key_parts: int = MAX_KEY_PARTS) -> None:
    """Refuse TOML nested deeper than ``max_depth`` or with a key of more than ``max_key_parts``
    dotted parts, in one linear pass that skips strings and comments (before the parser sees it).

    >>> check_toml_shape('a.b.c = 1\\n[x.y]\\nz = [[1, 2], {q = "[[[["}]  # [[[[')
    >>> try:
    ...     check_toml_shape("k" + ".k" * 40 + " = 1", "s.toml")
    ... except InputError as e:
    ...     print(e)
    s.toml:1: a key of more than 32 dotted parts (not accepted)
    """
    depth, parts, line = 0, 1, 1
    at_key = True          # between the start of a line (or a table header) and its "="

    def one_more_part(parts: int) -> int:
        if parts + 1 > max_key_parts:
            raise InputError(f"a key of more than {max_key_parts} dotted parts (not accepted)",
                             file=file, line=line)
        return parts + 1
    in_header = False
    i, n = 0, len(text)
    while i < n:
        ch = text[i]
        if ch == "\n":
            line += 1
            if depth == 0:
                at_key, parts, in_header = True, 1, False
            i += 1
            continue
        if ch == "#":
            j = text.find("\n", i)
            i = n if j < 0 else j
            continue
        if ch in "\"'":
            triple = text.startswith(ch * 3, i)
            quote = ch * 3 if triple else ch
            j = i + len(quote)
            while j < n:
                if ch == '"' and text[j] == "\\":
                    j += 2
                    continue
                if text.startswith(quote, j):
                    break
                if not triple and text[j] == "\n":
                    break
                j += 1
            line += text.count("\n", i, j)
            i = j + len(quote)
            continue
        if at_key and depth == 0:
            if ch == "[" and not in_header:
                in_header = True
                i += 2 if text.startswith("[[", i) else 1
                continue
            if ch == "]" and in_header:
                at_key, in_header = False, False
                i += 1
                continue
            if ch == ".":
                parts = one_more_part(parts)
            elif ch == "=":
                at_key = False
            i += 1
            continue
        if ch in "[{":
            depth += 1
            if depth > max_depth:
                raise InputError(f"nested more than {max_depth} levels deep (arrays or inline tables; "
                                 "not accepted)", file=file, line=line)
            if ch == "{":
                at_key, parts = True, 1          # keys of an inline table may be dotted too
        elif ch in "]}":
            depth = max(0, depth - 1)
        elif ch == "." and at_key:
            parts = one_more_part(parts)
        elif ch == "=":
            at_key = False
        elif ch == "," and depth > 0:
            at_key, parts = True, 1
        i += 1


def parse_toml(text: str, file=None) -> dict:
    """``tomllib.loads`` behind the shape check; a parse error is one ``InputError`` line."""
    check_toml_shape(text, file)
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", file=file) from None
    except (RecursionError, MemoryError):
        raise InputError("too complex to read (nesting or size)", file=file) from None
