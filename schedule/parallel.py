"""Run independent chunks of work in this process, on local workers or on a dask cluster.

The caller splits its work into chunks (a fixed split, so results never depend
on the backend or the number of workers), passes one top-level function and
the chunk arguments, and receives ``(chunk_index, result)`` pairs as chunks
finish (in completion order, which may differ from submission order).

Backends
--------
- ``jobs=1`` and no cluster: a plain loop in the calling process.
- ``jobs=N > 1``: N local worker processes (loky's reusable process pool, the one
  joblib uses), one BLAS thread each; :func:`prestart` starts them early. Every
  worker watches its parent and exits within a second when the parent dies (even by
  SIGKILL), so no worker outlives an interrupted run.
- ``cluster=ADDRESS``: a dask.distributed scheduler (``Client(ADDRESS)``); the
  optional ``cluster`` extra must be installed. A ``distributed.Client`` or
  ``LocalCluster`` object may be given instead of an address. :func:`session`
  checks the address and connects once for a block of work (a design run).

Tasks and chunks
----------------
A task sent to a worker runs a *batch* of consecutive chunks, each exactly as it
would run alone, so batching never changes a result. The batch size is chosen
from the measured cost of the chunks already finished: a task should last about
:data:`TASK_SECONDS` (longer on dask, whose per-task cost is higher), and at most
:data:`IN_FLIGHT` tasks per worker are outstanding at a time, so the chunk
arguments are built only shortly before they are sent (``chunks`` may be a lazy
sequence) and memory stays bounded whatever the number of chunks. On dask,
arguments common to every chunk (``shared``) are scattered to the workers once,
and chunk arguments larger than :data:`SCATTER_BYTES` are scattered to a worker
(measured: cheaper than inside the task graph). Callers cut independent
items with :func:`work_chunk` (few large chunks: a batched kernel call has a fixed
cost) and may stop reading the results early (closing the generator cancels the
rest).

Starting a cluster of several machines (the ``cluster`` extra installed on each,
with this package and the model's module importable at the same paths)::

    dask scheduler --port 8786                       # on one machine
    dask worker tcp://SCHEDULER:8786 --nthreads 1 --nworkers 4   # on every machine
    schedule design envelope.toml --out family.h5 --cluster tcp://SCHEDULER:8786

``--nthreads 1`` with several ``--nworkers`` keeps one process per core (the work
holds the GIL); ``--death-timeout 60`` lets workers leave when the scheduler goes.
"""

from __future__ import annotations

import math
import os
import re
import socket
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

import numpy as np

from .errors import InputError

TASK_SECONDS = {"local": 0.1, "dask": 0.5}  # target duration of one task
SHORTEST_TASK = 5  # ... and the shortest is this many times shorter (per-task cost)
IN_FLIGHT = 2  # outstanding tasks per worker
CHUNKS_PER_WORKER = 3  # work_chunk: at least this many chunks per worker
SCATTER_BYTES = 256 * 1024  # larger dask task arguments are scattered to the workers
CONNECT_TIMEOUT = 5.0  # seconds to reach a dask scheduler


def run_chunks(func: Callable[..., Any], chunks: Sequence[tuple], jobs: int = 1,
               cluster: Any = None, shared: tuple = ()) -> Iterator[tuple[int, Any]]:
    """Apply ``func(*shared, *chunks[i])`` to every chunk and yield ``(i, result)`` as each
    finishes.

    Parameters
    ----------
    func : a module-level (picklable) function.
    chunks : one argument tuple per chunk; any sequence (``len`` and indexing), indexed
        only when the chunk is about to be sent.
    jobs : number of local worker processes; 1 runs in this process.
    cluster : a dask.distributed scheduler address (``"tcp://host:8786"``), a
        ``Client`` or a cluster object; overrides ``jobs``.
    shared : leading arguments common to every chunk (a design, settings); on dask they
        are scattered to the workers once, not sent with every task.

    Returns
    -------
    A generator: closing it before the end (``close()``) cancels the tasks not started
    yet and drops the results of those running, so a caller may stop reading as soon as
    it knows enough (the leave-one-out norms of a candidate that already lost).

    Raises
    ------
    InputError
        For ``jobs < 1``, a missing dask installation or an unreachable scheduler.
    """
    jobs = _check_jobs(jobs)
    if not len(chunks):
        return (r for r in ())
    shared = tuple(shared)
    if cluster is not None:
        return _run_dask(func, chunks, cluster, shared)
    if jobs == 1 or len(chunks) == 1:
        return ((i, func(*shared, *chunks[i])) for i in range(len(chunks)))
    return _run_local(func, chunks, jobs, shared)


def _check_jobs(jobs) -> int:
    try:
        value = int(jobs)
    except (TypeError, ValueError):
        raise InputError(f"jobs={jobs!r} is not an integer; give a number of workers >= 1"
                         ) from None
    if value < 1 or value != jobs:
        raise InputError(f"jobs={jobs!r} must be an integer >= 1")
    return value


def worker_count(jobs: int = 1, cluster: Any = None) -> int:
    """Workers that run tasks at once: ``jobs``, or the dask cluster's worker threads."""
    if cluster is None:
        return _check_jobs(jobs)
    with session(cluster) as client:
        return max(1, int(sum(client.nthreads().values())))


def work_chunk(total: int, jobs: int = 1, cluster: Any = None, largest: int = 500,
               smallest: int = 16) -> int:
    """Items per work chunk for ``total`` independent items.

    In this process one chunk of up to ``largest`` items (fewest calls). On workers the
    fewest chunks of at most ``largest`` items that give every worker the same number,
    at least :data:`CHUNKS_PER_WORKER` (not below ``smallest`` items): a batched kernel
    call has a fixed cost (the frozen-point checks: about 11 ms a call against 0.76 ms a
    point, measured, so 150-point chunks took 10% more CPU than 500-point ones), while
    :func:`run_chunks` hands each chunk to whichever worker is free, so a few chunks per
    worker keep all of them busy to the end.
    """
    if cluster is None and jobs == 1:
        return max(1, int(largest))
    workers = worker_count(jobs, cluster)
    per_worker = max(CHUNKS_PER_WORKER, math.ceil(total / (workers * max(1, int(largest)))))
    size = math.ceil(total / (workers * per_worker))
    return max(1, min(int(largest), max(int(smallest), size)))


# ----------------------------------------------------------------------------- workers
_BLAS_LIMITED = False
_WORKER_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
_IDLE_TIMEOUT = 60  # seconds an idle local worker lives before it exits
_PARENT_POLL = 0.25  # seconds between a worker's checks that its parent still lives


def _limit_blas_threads() -> None:
    """Worker start-up, once per worker process, never in the caller's own process
    (``jobs=1`` and in-process dask workers keep the user's settings).

    - One BLAS/OpenMP thread: two processes must not fight over two cores with their
      thread pools.
    - glibc's malloc thresholds back to large values: dask puts
      ``MALLOC_TRIM_THRESHOLD_=65536`` in the environment of its workers (and of the
      process that starts a LocalCluster, so loky workers inherit it too). Setting it
      switches off glibc's dynamic mmap threshold, so every temporary array above
      128 KiB is mapped and unmapped again, page by page; the batched check kernels
      then took 1.6-2 times the CPU of the same work in one process (measured).
    """
    global _BLAS_LIMITED
    if _BLAS_LIMITED:
        return
    _BLAS_LIMITED = True
    _malloc_thresholds()
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return
    threadpool_limits(1)


_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # glibc malloc.h mallopt parameters


def _malloc_thresholds() -> None:
    """Arrays up to 32 MiB from the heap, freed memory kept up to 256 MiB (glibc only;
    elsewhere nothing happens)."""
    import ctypes
    import ctypes.util

    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    mallopt(_M_MMAP_THRESHOLD, 32 * 2**20)
    mallopt(_M_TRIM_THRESHOLD, 256 * 2**20)


def _exit_with_parent(parent_pid: int) -> None:
    """Worker start-up: one BLAS thread, and a daemon thread that ends this process as
    soon as its parent is gone (a killed parent leaves its children to init, which
    changes ``os.getppid()``). Without it loky workers and their resource tracker
    outlive a design run killed with SIGKILL."""
    _limit_blas_threads()

    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(_PARENT_POLL)
        os._exit(1)

    threading.Thread(target=watch, name="schedule-parent-watch", daemon=True).start()


def _executor(jobs: int):
    from joblib.externals.loky import get_reusable_executor

    return get_reusable_executor(max_workers=jobs, timeout=_IDLE_TIMEOUT, env=_WORKER_ENV,
                                 initializer=_exit_with_parent, initargs=(os.getpid(),))


def _noop() -> None:
    pass


def prestart(jobs: int = 1, cluster: Any = None) -> None:
    """Start the local worker processes now, in the background, so their start-up
    (interpreter, numpy, scipy, this package) overlaps with work the caller still does
    in its own process (e.g. building the plants); with a cluster, check the address
    and connect now. No effect for ``jobs=1``."""
    jobs = _check_jobs(jobs)
    if cluster is not None:
        with session(cluster):
            return
    if jobs == 1:
        return
    executor = _executor(jobs)
    for _ in range(jobs):
        executor.submit(_noop)


def _batch(func, first: int, batch: list[tuple], caller_pid: int = -1, shared: tuple = ()):
    """Run consecutive chunks on a worker: ``(first, [results], seconds per chunk)``."""
    if os.getpid() != caller_pid:  # a worker process (not threads of the caller's process)
        _limit_blas_threads()
    t0 = time.perf_counter()
    out = [func(*shared, *args) for args in batch]
    return first, out, (time.perf_counter() - t0) / max(len(batch), 1)


_MEASURED: dict[str, float] = {}  # seconds per chunk last measured, by worker function


class _Planner:
    """Chooses the next batch of chunks from the measured cost of finished ones.

    A batch should last about ``target`` seconds, but near the end at most the share
    of the chunks left that keeps every worker busy (``IN_FLIGHT`` tasks each), and,
    once chunks of this call are measured, not less than ``target`` /
    :data:`SHORTEST_TASK` seconds (the per-task cost). Before a chunk of this call has
    finished, the cost last measured for the same function (another call: the next
    candidate's norms, the next stage) stands in for it.
    """

    def __init__(self, total: int, workers: int, target: float, key: str = ""):
        self.total, self.workers, self.target = total, workers, target
        self.next = 0
        self.seconds: list[float] = []
        self.key = key

    def take(self) -> range | None:
        if self.next >= self.total:
            return None
        left = self.total - self.next
        size = 1
        own = bool(self.seconds)
        per = float(np.median(self.seconds[-8:])) if own else _MEASURED.get(self.key)
        if per is not None:
            per = max(per, 1e-9)
            share = max(1, left // (IN_FLIGHT * self.workers))
            if own:  # a cost measured on other chunks (smaller ones) sets no floor
                share = max(share, math.ceil(self.target / SHORTEST_TASK / per))
            size = min(math.ceil(self.target / per), share)
        r = range(self.next, min(self.total, self.next + size))
        self.next = r.stop
        return r

    def measured(self, seconds_per_chunk: float) -> None:
        self.seconds.append(seconds_per_chunk)
        if self.key:
            _MEASURED[self.key] = seconds_per_chunk


def _key(func) -> str:
    return f"{getattr(func, '__module__', '')}.{getattr(func, '__qualname__', '')}"


def _run_local(func, chunks, jobs, shared: tuple = ()) -> Iterator[tuple[int, Any]]:
    """Local worker processes (loky's reusable process pool, as used by joblib).

    The pool is reused between calls (the stages of a family run share the workers)
    and the workers limit BLAS to one thread.
    """
    from concurrent.futures import FIRST_COMPLETED, wait

    executor = _executor(jobs)
    pid = os.getpid()
    plan = _Planner(len(chunks), jobs, TASK_SECONDS["local"], _key(func))
    running: set = set()
    try:
        while True:
            while len(running) < IN_FLIGHT * jobs and (r := plan.take()) is not None:
                running.add(executor.submit(_batch, func, r.start, [chunks[i] for i in r],
                                            pid, shared))
            if not running:
                return
            done, running = wait(running, return_when=FIRST_COMPLETED)
            for future in done:
                first, results, seconds = future.result()
                plan.measured(seconds)
                for k, res in enumerate(results):
                    yield first + k, res
    finally:
        for future in running:
            future.cancel()


# ----------------------------------------------------------------------------- dask
_ADDRESS = re.compile(r"(?:(tcp|tls|ws|wss|ucx)://)?(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+)"
                      r":(\d{1,5})")


def check_address(address: str) -> tuple[str, str, int]:
    """``(scheme, host, port)`` of a scheduler address, or InputError naming what is wrong.

    Accepted: ``[tcp|tls|ws|wss|ucx]://HOST:PORT`` or ``HOST:PORT`` (tcp). The check is
    syntactic plus a name lookup; it takes no time, unlike a connection attempt.
    """
    text = str(address).strip()
    m = _ADDRESS.fullmatch(text)
    if not m or not 0 < int(m.group(3)) < 65536:
        raise InputError(f"--cluster {address!r} is not a dask scheduler address; give "
                         "tcp://HOST:PORT (start one with `dask scheduler`)")
    scheme, host, port = m.group(1) or "tcp", m.group(2).strip("[]"), int(m.group(3))
    try:
        socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except (OSError, UnicodeError):
        raise InputError(f"--cluster {address!r}: host {host!r} is unknown; check the "
                         "scheduler's address") from None
    return scheme, host, port


@contextmanager
def session(cluster: Any):
    """The ``distributed.Client`` of ``cluster`` for a block of work (None without one).

    ``cluster`` is an address, a ``Client`` (used as it is) or a cluster object. An
    address is checked first (:func:`check_address`) and a plain TCP one probed with
    one socket connection, so a wrong or silent address fails in seconds with one
    line; a client made here is closed at the end of the block. A design run opens one
    session for all its stages.

    Raises
    ------
    InputError
        dask.distributed is not installed, or the scheduler cannot be reached (one line).
    """
    if cluster is None:
        yield None
        return
    try:
        from distributed import Client
    except ImportError:
        raise InputError("--cluster needs dask.distributed; install the extra with "
                         "pip install 'schedule[cluster]'") from None
    if isinstance(cluster, Client):
        yield cluster
        return
    if isinstance(cluster, str) and not cluster.startswith("inproc://"):
        scheme, host, port = check_address(cluster)
        if scheme == "tcp":
            try:
                socket.create_connection((host, port), timeout=CONNECT_TIMEOUT).close()
            except OSError as exc:
                raise InputError(f"cannot reach the dask scheduler at {cluster!r} "
                                 f"({type(exc).__name__}: {exc.strerror or exc}); check the "
                                 "address and that `dask scheduler` runs there") from None
    try:
        client = Client(cluster, timeout=f"{CONNECT_TIMEOUT}s", set_as_default=False)
    except Exception as exc:  # noqa: BLE001 - any failure is one line for the user
        raise InputError(f"cannot reach the dask scheduler at {cluster!r} "
                         f"({type(exc).__name__}); check the address and that it runs"
                         ) from None
    try:
        yield client
    finally:
        client.close()


def _nbytes(args: tuple) -> int:
    total = 0
    for a in args:
        if isinstance(a, np.ndarray):
            total += a.nbytes
        elif isinstance(a, dict):
            total += sum(v.nbytes for v in a.values() if isinstance(v, np.ndarray))
    return total


def _run_dask(func, chunks, cluster, shared: tuple = ()) -> Iterator[tuple[int, Any]]:
    with session(cluster) as client:
        yield from _run_on(func, chunks, client, shared)


def _run_on(func, chunks, client, shared: tuple) -> Iterator[tuple[int, Any]]:
    """The dask loop. A batch larger than :data:`SCATTER_BYTES` is scattered to the worker
    with the fewest of this call's tasks in flight per thread (its task then runs there,
    beside its data): left to itself, the scheduler places scattered data round-robin,
    and the tasks of two scattered batches could queue on one worker while the other
    waits (measured: one worker did 70% of the checks)."""
    from distributed import as_completed

    pid = os.getpid()
    if shared:  # once to every worker, then referenced by each task
        shared = tuple(client.scatter(list(shared), broadcast=True, hash=False))
    threads = {w: max(1, int(n)) for w, n in client.nthreads().items()}
    workers = max(1, sum(threads.values()))
    busy = dict.fromkeys(threads, 0)
    placed: dict = {}  # future -> worker of its scattered batch
    plan = _Planner(len(chunks), workers, TASK_SECONDS["dask"], _key(func))
    pending = as_completed(loop=client.loop)
    count = 0

    def submit() -> bool:
        r = plan.take()
        if r is None:
            return False
        batch, where = [chunks[i] for i in r], None
        if sum(_nbytes(a) for a in batch) > SCATTER_BYTES:
            if busy:
                where = min(busy, key=lambda w: busy[w] / threads[w])
            batch = client.scatter(batch, hash=False, direct=None,
                                   workers=None if where is None else [where])
        future = client.submit(_batch, func, r.start, batch, pid, shared, pure=False)
        if where is not None:
            busy[where] += 1
            placed[future.key] = where
        pending.add(future)
        return True

    try:
        while count < IN_FLIGHT * workers and submit():
            count += 1
        for future in pending:
            first, results, seconds = future.result()
            where = placed.pop(future.key, None)
            if where is not None:
                busy[where] -= 1
            plan.measured(seconds)
            submit()
            for k, res in enumerate(results):
                yield first + k, res
    finally:
        for future in list(pending.futures):
            future.cancel()
