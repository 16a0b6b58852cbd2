"""Process settings the load flow needs to run at full speed: freed memory kept for reuse, and
one BLAS thread.

Memory
------
Each Newton iteration allocates and frees the same large blocks: SuperLU's working storage
for the factors, and numpy arrays of one value per admittance entry. With the GNU C library's
default settings, blocks above a moving threshold (128 KiB at first) are mapped from the
operating system afresh and unmapped when freed, and free memory at the top of the heap is
handed back; every new iteration then touches fresh pages, each a page fault that the kernel
fills with zeros. Measured on a 9,996-bus network (ring-tied IEEE 14 copies, 7 iterations):
about 6,500 page faults per solve and a fifth of its CPU time in the kernel. With blocks up to
``MMAP_THRESHOLD`` served from the heap and up to ``TRIM_THRESHOLD`` of free heap kept, the same
solve takes under 30 page faults and about a third less CPU time; results are unchanged (only
where memory comes from changes).

:func:`keep_freed_memory` sets these two allocator parameters once per process, on Linux with
the GNU C library only, and not when the person running the program has set either through the
``MALLOC_MMAP_THRESHOLD_`` / ``MALLOC_TRIM_THRESHOLD_`` environment variables, nor when
``PLANNER_DEFAULT_ALLOCATOR`` is set (to any value). The cost: up to ``TRIM_THRESHOLD`` of freed
memory stays with the process instead of going back to the system; the peak is not raised.

BLAS threads
------------
SuperLU hands each supernode of the factors to BLAS; on power-network Jacobians these are
tiny (a few columns), too small to share between threads, yet a multi-threaded OpenBLAS wakes
its threads for them and lets them spin. Measured on the same network, same machine (2 cores):
Newton took 55-68 ms of wall time with one BLAS thread and 84-175 ms with the default two,
burning twice the CPU time. :func:`one_blas_thread` holds BLAS to one thread for the duration
of a solve (threadpoolctl, a dependency already; one controller per process, about 0.03 ms per
use) and restores the previous setting after it. One thread also makes every BLAS sum run in
one order, so two runs give the same bits.
"""
from __future__ import annotations

import ctypes
import contextlib
import ctypes.util
import os
import sys

MMAP_THRESHOLD = 32 * 2 ** 20     # the largest block glibc's dynamic threshold would reach anyway
TRIM_THRESHOLD = 128 * 2 ** 20
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3      # mallopt parameter numbers (malloc.h)
_done: list[bool] = []


def keep_freed_memory() -> bool:
    """Set the allocator as the module docstring says, once; True if it was set (now or before).

    >>> import os, sys
    >>> opted_out = any(k in os.environ for k in ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_",
    ...                                           "PLANNER_DEFAULT_ALLOCATOR"))
    >>> keep_freed_memory() == (sys.platform.startswith("linux") and not opted_out)   # glibc Linux
    True
    """
    if _done:
        return _done[0]
    _done.append(_apply())
    return _done[0]


def _apply() -> bool:
    if not sys.platform.startswith("linux"):
        return False
    if any(k in os.environ for k in ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_",
                                     "PLANNER_DEFAULT_ALLOCATOR")):
        return False
    libc = _glibc()
    if libc is None:
        return False
    mallopt = libc.mallopt
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    ok = mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1
    ok &= mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD) == 1
    return bool(ok)


def _glibc():
    """The GNU C library loaded through ctypes, once per process (None elsewhere: musl and
    others have no mallopt / malloc_trim to speak of)."""
    if not _libc:
        try:
            lib = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
            lib.gnu_get_libc_version
            lib.mallopt, lib.malloc_trim
            _libc.append(lib)
        except (OSError, AttributeError):
            _libc.append(None)
    return _libc[0]


_libc: list = []


def release_free_memory() -> bool:
    """Hand freed heap pages back to the system (glibc ``malloc_trim``); True if it ran.

    The optimiser's final search frees a Jacobian LU (SuperLU's many allocations) and move
    arrays of several MB every round; with the thresholds above such blocks stay in the heap, so
    the resident set grew by 20-60 MB a round on the 10,000-bus grid (830 MB over 11 rounds
    against 700 MB for the rest of the plan). Trimming after each round keeps it at the plan's
    other peaks. It changes no result.

    >>> release_free_memory() == (_glibc() is not None)
    True
    """
    libc = _glibc()
    if libc is None:
        return False
    libc.malloc_trim(0)
    return True


_controller: list = []


def one_blas_thread():
    """A context manager that holds BLAS to one thread (no-op without threadpoolctl).

    >>> with one_blas_thread():
    ...     pass
    """
    if not _controller:
        try:
            from threadpoolctl import ThreadpoolController
            _controller.append(ThreadpoolController())
        except Exception:          # threadpoolctl missing or unable to inspect this process
            _controller.append(None)
    ctl = _controller[0]
    if ctl is None:
        return contextlib.nullcontext()
    return ctl.limit(limits=1, user_api="blas")
