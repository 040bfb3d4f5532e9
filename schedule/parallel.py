"""Run independent chunks of work in this process, on local workers or on a dask cluster.

The caller splits its work into chunks (a fixed split, so results never depend
on the backend or the number of workers), passes one top-level function and
the chunk arguments, and receives ``(chunk_index, result)`` pairs as chunks
finish (in completion order, which may differ from submission order).

Backends
--------
- ``jobs=1`` and no cluster: a plain loop in the calling process.
- ``jobs=N > 1``: joblib with the loky process backend (N worker processes).
- ``cluster=ADDRESS``: a dask.distributed scheduler (``Client(ADDRESS)``); the
  optional ``cluster`` extra must be installed. A ``distributed.Client`` or
  ``LocalCluster`` object may be given instead of an address.
"""

from __future__ import annotations

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


def _indexed(func, i, args):
    return i, func(*args)


def _run_joblib(func, chunks, jobs) -> Iterator[tuple[int, Any]]:
    from joblib import Parallel, delayed

    parallel = Parallel(n_jobs=jobs, backend="loky", return_as="generator_unordered")
    yield from parallel(delayed(_indexed)(func, i, args) for i, args in enumerate(chunks))


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
        futures = [client.submit(_indexed, func, i, args, pure=False)
                   for i, args in enumerate(chunks)]
        for future in as_completed(futures):
            yield future.result()
    finally:
        if own_client:
            client.close()
