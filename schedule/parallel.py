"""Run independent chunks of work in this process, on local workers or on a dask cluster.

The caller splits its work into chunks (a fixed split, so results never depend
on the backend or the number of workers), passes one top-level function and
the chunk arguments, and receives ``(chunk_index, result)`` pairs as chunks
finish (in completion order, which may differ from submission order).

Backends
--------
- ``jobs=1`` and no cluster: a plain loop in the calling process.
- ``jobs=N > 1``: N local worker processes (loky's reusable process pool, the one
  joblib uses), one BLAS thread each; :func:`prestart` starts them early.
- ``cluster=ADDRESS``: a dask.distributed scheduler (``Client(ADDRESS)``); the
  optional ``cluster`` extra must be installed. A ``distributed.Client`` or
  ``LocalCluster`` object may be given instead of an address.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Sequence
from typing import Any

from .errors import InputError


def run_chunks(func: Callable[..., Any], chunks: Sequence[tuple], jobs: int = 1,
               cluster: Any = None) -> Iterator[tuple[int, Any]]:
    """Apply ``func(*chunks[i])`` to every chunk and yield ``(i, result)`` as each finishes.

    Parameters
    ----------
    func : a module-level (picklable) function.
    chunks : one argument tuple per chunk.
    jobs : number of local worker processes; 1 runs in this process.
    cluster : a dask.distributed scheduler address (``"tcp://host:8786"``), a
        ``Client`` or a cluster object; overrides ``jobs``.

    Raises
    ------
    InputError
        For ``jobs < 1``, a missing dask installation or an unreachable scheduler.
    """
    jobs = _check_jobs(jobs)
    if not chunks:
        return iter(())
    if cluster is not None:
        return _run_dask(func, chunks, cluster)
    if jobs == 1 or len(chunks) == 1:
        return ((i, func(*args)) for i, args in enumerate(chunks))
    return _run_joblib(func, chunks, jobs)


def _check_jobs(jobs) -> int:
    try:
        value = int(jobs)
    except (TypeError, ValueError):
        raise InputError(f"jobs={jobs!r} is not an integer; give a number of workers >= 1"
                         ) from None
    if value < 1 or value != jobs:
        raise InputError(f"jobs={jobs!r} must be an integer >= 1")
    return value


def _indexed(func, i, args, caller_pid: int = -1):
    if os.getpid() != caller_pid:  # a worker process (not threads of the caller's process)
        _limit_blas_threads()
    return i, func(*args)


_BLAS_LIMITED = False
_WORKER_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
_IDLE_TIMEOUT = 60  # seconds an idle local worker lives before it exits


def _limit_blas_threads() -> None:
    """One BLAS/OpenMP thread per worker process (two processes must not fight over two
    cores with their thread pools); done once per worker process, never in the caller's
    own process (``jobs=1`` and in-process dask workers keep the user's setting)."""
    global _BLAS_LIMITED
    if _BLAS_LIMITED:
        return
    _BLAS_LIMITED = True
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return
    threadpool_limits(1)


def _executor(jobs: int):
    from joblib.externals.loky import get_reusable_executor

    return get_reusable_executor(max_workers=jobs, timeout=_IDLE_TIMEOUT, env=_WORKER_ENV)


def _noop() -> None:
    _limit_blas_threads()


def prestart(jobs: int = 1, cluster: Any = None) -> None:
    """Start the local worker processes now, in the background, so their start-up
    (interpreter, numpy, scipy, this package) overlaps with work the caller still does
    in its own process (e.g. building the plants). No effect for ``jobs=1`` or a cluster."""
    jobs = _check_jobs(jobs)
    if cluster is not None or jobs == 1:
        return
    executor = _executor(jobs)
    for _ in range(jobs):
        executor.submit(_noop)


def _run_joblib(func, chunks, jobs) -> Iterator[tuple[int, Any]]:
    """Local worker processes (loky's reusable process pool, as used by joblib).

    Each chunk is one task; the pool is reused between calls (the gamma and the
    controller phase of a family run share the workers) and the workers limit BLAS
    to one thread.
    """
    from concurrent.futures import as_completed

    executor = _executor(jobs)
    pid = os.getpid()
    futures = [executor.submit(_indexed, func, i, args, pid) for i, args in enumerate(chunks)]
    try:
        for future in as_completed(futures):
            yield future.result()
    finally:
        for future in futures:
            future.cancel()


def _run_dask(func, chunks, cluster) -> Iterator[tuple[int, Any]]:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise InputError("--cluster needs dask.distributed; install the extra with "
                         "pip install 'schedule[cluster]'") from None
    own_client = False
    if isinstance(cluster, Client):
        client = cluster
    else:
        try:
            client = Client(cluster, timeout="10s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError(f"cannot reach the dask scheduler at {cluster!r} "
                             f"({type(exc).__name__}); check the address and that it runs"
                             ) from None
        own_client = True
    try:
        pid = os.getpid()
        futures = [client.submit(_indexed, func, i, args, pid, pure=False)
                   for i, args in enumerate(chunks)]
        for future in as_completed(futures):
            yield future.result()
    finally:
        if own_client:
            client.close()
