"""Run many independent chunks of load flows: serially, on this machine's cores, or on a Dask
cluster, with identical results.

:func:`run_chunks` calls ``fn(shared, task)`` for every task and returns the results in task
order. ``shared`` (the compiled network and everything the chunks have in common) travels once
to each worker, not once per task; a worker may keep things it builds from it (ordering, factors)
in ``shared`` between tasks. The chunking is decided by the caller, never by the number of
workers or by timing, so serial, local and cluster runs compute exactly the same numbers.

Where the work runs (``where``):

* ``"serial"`` - in this process;
* ``"local"`` (default) - every core of this machine: a Dask ``LocalCluster`` of one process per
  core when Dask is installed (``pip install -e '.[distributed]'``), else a process pool from the
  standard library;
* ``"tcp://host:8786"`` (any other text) - the address of a running Dask scheduler.

``progress(done, total)`` (optional) is called after each finished chunk.

>>> def double(shared, task):
...     return [shared["k"] * x for x in task]
>>> run_chunks(double, [[1, 2], [3]], shared={"k": 2}, where="serial")
[[2, 4], [6]]
"""
from __future__ import annotations

import hashlib
import os
import pickle
import sys
import threading
import time

_LOCAL = None          # a worker process's copy of ``shared`` (process-pool fallback)


def dask_available() -> bool:
    try:
        import distributed  # noqa: F401
    except ImportError:
        return False
    return True


def chunked(items, size: int) -> list:
    """Consecutive chunks of ``size`` items (the last may be shorter).

    >>> chunked(list(range(5)), 2)
    [[0, 1], [2, 3], [4]]
    """
    items = list(items)
    size = max(1, int(size))
    return [items[i:i + size] for i in range(0, len(items), size)]


def run_chunks(fn, tasks, *, shared=None, where: str = "local", workers: int | None = None, progress=None,
               client=None) -> list:
    """Run ``fn(shared, task)`` for each task; results in task order (see module docstring).

    ``workers`` caps the local workers (default: all cores); ``client`` is an existing
    ``distributed.Client`` to use instead of ``where``.
    """
    tasks = list(tasks)
    total = len(tasks)
    if client is None and (where == "serial" or total <= 1):
        out = []
        for i, t in enumerate(tasks):
            out.append(fn(shared, t))
            if progress:
                progress(i + 1, total)
        return out
    if client is not None:
        return _run_dask(client, fn, tasks, shared, progress)
    if where == "local":
        n = workers or os.cpu_count() or 1
        if dask_available():
            from distributed import Client, LocalCluster
            with LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None,
                              silence_logs=50) as cluster, Client(cluster) as cl:
                return _run_dask(cl, fn, tasks, shared, progress)
        return _run_pool(fn, tasks, shared, n, progress)
    if not dask_available():
        raise RuntimeError(f"a scheduler address ({where}) needs Dask: pip install -e '.[distributed]'")
    from distributed import Client
    with Client(where) as cl:
        return _run_dask(cl, fn, tasks, shared, progress)


class sweep_client:
    """Context manager: a Dask client for several sweeps in a row (one cluster start), or None.

    ``where`` "local" starts a ``LocalCluster`` of one process per core when Dask is installed
    (None without Dask: the caller then runs in this process); any other text but "serial" is a
    scheduler address.
    """

    def __init__(self, where: str = "local", workers: int | None = None):
        self.where, self.workers = where, workers
        self._cluster = self._client = None

    def __enter__(self):
        if self.where == "serial" or not dask_available():
            if self.where not in ("serial", "local"):
                raise RuntimeError(f"a scheduler address ({self.where}) needs Dask: pip install -e '.[distributed]'")
            return None
        from distributed import Client, LocalCluster
        if self.where == "local":
            self._cluster = LocalCluster(n_workers=self.workers or os.cpu_count() or 1, threads_per_worker=1,
                                         processes=True, dashboard_address=None, silence_logs=50)
            self._client = Client(self._cluster)
        else:
            self._client = Client(self.where)
        return self._client

    def __exit__(self, *exc):
        if self._client is not None:
            self._client.close()
        if self._cluster is not None:
            self._cluster.close()
        return False


def _call_with(fn, shared, task):
    return fn(shared, task)


WORKER_WAIT_S = 60.0    # an emergency stop only: how long a sweep waits for a cluster's first worker


_UNPACKED: dict = {}     # (token, thread) -> shared data, per worker (the last few sweeps' data)


def _call_packed(fn, blob, token, task):
    """Run one task on a worker with the sweep's shared data, unpickled once per worker thread:
    the chunk functions keep working state (factorisations, solver caches) in it, which two
    threads of one process (a cluster of thread workers) must not share."""
    key = (token, threading.get_ident())
    shared = _UNPACKED.get(key)
    if shared is None:
        if len(_UNPACKED) >= 8:
            _UNPACKED.clear()
        shared = _UNPACKED[key] = pickle.loads(blob)
    return fn(shared, task)


def _wait_for_a_worker(client):
    """A broadcast to a cluster whose workers have not yet registered once hung (a LocalCluster
    started inside a unit test): wait for one worker first; a scheduler without any worker is a
    clear error after :data:`WORKER_WAIT_S`, not a hang. Which worker runs what never changes
    the numbers."""
    if client.scheduler_info().get("workers"):
        return
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT_S)
    except TimeoutError:
        raise RuntimeError(f"the Dask scheduler {client.scheduler.address} has no worker "
                           f"(waited {WORKER_WAIT_S:g} s): start workers or use --scheduler serial") from None


def _run_dask(client, fn, tasks, shared, progress):
    from distributed import as_completed
    if shared is None:
        futures = [client.submit(_call_with, fn, None, t, pure=False) for t in tasks]
    else:
        # The shared data travels as one pickled bytes object. The chunk functions keep working
        # state (factorisations) inside the shared dict, and Dask hands tasks the stored object
        # itself: scattering the dict let a later, equal sweep reuse a mutated copy that then
        # had to be serialised to reach the other worker (seen as a hang in Client.scatter).
        # Bytes cannot be mutated and are sized in constant time; each worker thread unpickles
        # its own copy once (_call_packed).
        blob = pickle.dumps(shared, protocol=pickle.HIGHEST_PROTOCOL)
        token = hashlib.sha256(blob).hexdigest()
        _wait_for_a_worker(client)
        blob_f = client.scatter(blob, broadcast=True, hash=False)
        futures = [client.submit(_call_packed, fn, blob_f, token, t, pure=False) for t in tasks]
    index = {f.key: i for i, f in enumerate(futures)}
    out = [None] * len(tasks)
    done = 0
    for f in as_completed(futures):
        out[index[f.key]] = f.result()
        done += 1
        if progress:
            progress(done, len(tasks))
    return out


def _init_pool(shared):
    global _LOCAL
    _LOCAL = shared


def _pool_call(fn, task):
    return fn(_LOCAL, task)


def _run_pool(fn, tasks, shared, n, progress):
    from concurrent.futures import ProcessPoolExecutor, as_completed
    import multiprocessing as mp
    ctx = mp.get_context("spawn" if sys.platform == "darwin" else "fork")
    out = [None] * len(tasks)
    with ProcessPoolExecutor(max_workers=n, mp_context=ctx, initializer=_init_pool, initargs=(shared,)) as pool:
        futs = {pool.submit(_pool_call, fn, t): i for i, t in enumerate(tasks)}
        for done, f in enumerate(as_completed(futs), 1):
            out[futs[f]] = f.result()
            if progress:
                progress(done, len(tasks))
    return out


class TerminalProgress:
    """A one-line progress bar (count, rate, time left) for a terminal; silent on a pipe or a
    file, or when ``quiet``. For the command-line layer: the library itself never prints.

    >>> import io
    >>> bar = TerminalProgress(io.StringIO(), "flows")
    >>> bar(5, 10); bar.stream.getvalue()
    ''
    """

    def __init__(self, stream=None, label: str = "chunks", quiet: bool = False, scale: int = 1):
        self.stream = stream if stream is not None else sys.stderr
        self.label = label
        self.scale = scale            # items per chunk, so the count reads in flows
        self.on = (not quiet) and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.t0 = time.perf_counter()

    def __call__(self, done: int, total: int):
        if not self.on:
            return
        dt = max(time.perf_counter() - self.t0, 1e-9)
        rate = done * self.scale / dt
        left = (total - done) * dt / max(done, 1)
        width = 30
        fill = int(width * done / max(total, 1))
        self.stream.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {done * self.scale}/{total * self.scale} "
                          f"{self.label}  {rate:,.0f}/s  {left:5.0f} s left ")
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()
