"""Tests of schedule/parallel.py: same results, bit for bit, on every backend.

Reference: the plain in-process loop (jobs=1) computes the same function; the
other backends (joblib/loky processes, a real dask LocalCluster) must return
identical bytes.
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import time

import numpy as np
import pytest
from test_family import write_design

from schedule.design_file import load_design
from schedule.errors import InputError
from schedule.family import run_design
from schedule.parallel import CHUNKS_PER_WORKER, run_chunks, work_chunk


def _work(a: float, n: int) -> float:
    return sum(math.sin(a * k) for k in range(n))


def test_run_chunks_backends_agree():
    chunks = [(0.1 * i, 50) for i in range(7)]
    ref = {i: _work(*c) for i, c in enumerate(chunks)}
    assert dict(run_chunks(_work, chunks, jobs=1)) == ref
    assert dict(run_chunks(_work, chunks, jobs=2)) == ref


class _Lazy:
    """A sequence that builds its items on demand and counts the builds."""

    def __init__(self, n):
        self.n, self.built = n, []

    def __len__(self):
        return self.n

    def __getitem__(self, i):
        self.built.append(i)
        return (0.01 * i, 30)


def test_many_chunks_are_batched_built_once_and_returned_once():
    # 300 chunks on 2 workers: tasks group several chunks once their cost is measured;
    # every chunk is built once (lazily), computed once and equals the in-process value
    lazy = _Lazy(300)
    got = list(run_chunks(_work, lazy, jobs=2))
    assert sorted(i for i, _ in got) == list(range(300))
    assert sorted(lazy.built) == list(range(300))
    assert all(v == _work(0.01 * i, 30) for i, v in got)


def test_bad_jobs():
    with pytest.raises(InputError, match="jobs"):
        list(run_chunks(_work, [(1.0, 2)], jobs=0))


def _family_bytes(fam) -> dict:
    out = {"gamma": np.float64(fam.gamma).tobytes(), "opt": fam.gamma_opt.tobytes(),
           "status": "|".join(fam.status), "reasons": "|".join(fam.reasons)}
    for group in ("plant", "controller", "pieces"):
        for k, v in getattr(fam, group).items():
            out[f"{group}/{k}"] = np.ascontiguousarray(v).tobytes()
    return out


@pytest.fixture(scope="module")
def small_spec(tmp_path_factory):
    folder = tmp_path_factory.mktemp("par")
    return load_design(write_design(folder, "msd_flaky", stiffness=(1.0, 2.0, 3.0),
                                    damping=(0.5, 1.0, 2.0)))


def test_family_identical_jobs_and_dask(small_spec):
    ref = _family_bytes(run_design(small_spec, None, jobs=1, fit=False, chunk_size=2).family)
    two = _family_bytes(run_design(small_spec, None, jobs=2, fit=False, chunk_size=2).family)
    assert two == ref
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            got = run_design(small_spec, None, cluster=client, fit=False, chunk_size=2).family
    assert _family_bytes(got) == ref


def test_unreachable_cluster(small_spec):
    pytest.importorskip("distributed")
    with pytest.raises(InputError, match="dask scheduler"):
        run_design(small_spec, None, cluster="tcp://127.0.0.1:9", fit=False)


@pytest.mark.parametrize("address", ["not a url", "tcp://", "http//x:1", "host:99999"])
def test_bad_cluster_address_is_one_line_before_any_connection(address, tmp_path,
                                                              monkeypatch):
    distributed = pytest.importorskip("distributed")
    from click.testing import CliRunner

    from schedule.cli.main import main

    class NoClient:  # the address must be refused before any connection is tried
        def __init__(self, *args, **kwargs):
            raise AssertionError("a connection was attempted")

    monkeypatch.setattr(distributed, "Client", NoClient)
    design = write_design(tmp_path, "msd_plant")
    res = CliRunner().invoke(main, ["design", str(design), "--out", str(tmp_path / "f.h5"),
                                    "--cluster", address])
    assert res.exit_code == 2, res.output
    assert res.output.startswith("error: ") and res.output.count("\n") == 1
    assert "scheduler address" in res.output or "unknown" in res.output
    assert not (tmp_path / "f.h5").exists()


def test_checks_identical_serial_workers_and_dask():
    # check_points on 40 points: chunks from parallel.work_chunk, tasks batched by
    # run_chunks; every backend must give the same arrays, bit for bit
    distributed = pytest.importorskip("distributed")
    from test_interpolate import hinf_family as family_fixture

    from schedule.check import CheckSettings, check_points
    from schedule.interpolate import ScheduledController

    fam = family_fixture.__wrapped__()
    sc = ScheduledController.fit(fam, "observer", "multilinear")
    q = np.column_stack([np.linspace(1.0, 4.0, 40), np.linspace(0.2, 1.0, 40)[::-1]])
    P, K = sc.plant_at(q), sc.evaluate(q)
    s = CheckSettings(samples=0, gamma_opt=False, rate=False, classical=False)
    ref = check_points(P, K, fam.gamma, s)
    two = check_points(P, K, fam.gamma, s, jobs=2)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            dask = check_points(P, K, fam.gamma, s, cluster=client)
    for got in (two, dask):
        assert got.keys() == ref.keys()
        for k in ref:
            numeric = np.asarray(ref[k]).dtype.kind in "biufc"
            assert np.array_equal(got[k], ref[k], equal_nan=numeric), k


@pytest.mark.parametrize("total", [999, 2401, 5500, 10000])
def test_work_chunk_gives_every_worker_as_many_chunks_of_at_most_largest(total):
    # rule (common practice for dynamic scheduling of equal-cost items): the fewest
    # chunks of at most `largest` items, at least CHUNKS_PER_WORKER for each worker and
    # the same number for every worker, so that no worker waits for a last odd chunk, and
    # chunks of even size
    size = work_chunk(total, jobs=2, largest=500)
    count = math.ceil(total / size)
    need = max(2 * CHUNKS_PER_WORKER, math.ceil(total / 500))
    assert size <= 500 and count == need + need % 2
    assert math.ceil(total / (size - 1)) > count  # as even as possible: one less is short


def _arrays_bytes(d: dict) -> dict:
    return {k: np.asarray(v).tobytes() if np.asarray(v).dtype.kind != "U" else str(v)
            for k, v in d.items()}


def _pruned_choice(monkeypatch):
    """The interpolant choice of a 12-point family with its norms pruned piece by piece
    (complete evidence off, 2 loops a piece): the early stop is exercised."""
    from test_interpolate import hinf_family as family_fixture

    import schedule.interpolate as interp

    monkeypatch.setattr(interp, "COMPLETE_EVIDENCE_LOOPS", 0)
    monkeypatch.setattr(interp, "NORM_PIECE", 2)
    return family_fixture.__wrapped__(), interp


def _choice_bytes(interpolant: dict, evidence: dict) -> dict:
    return {"arrays": _arrays_bytes(interpolant["arrays"]), "attrs": interpolant["attrs"],
            "evidence": _arrays_bytes(evidence)}


def test_interpolant_choice_identical_serial_workers_and_dask(monkeypatch):
    # the fits, leave-one-out predictions, closed loops and norms of every candidate run
    # through run_chunks; every backend must store the same interpolant and evidence
    distributed = pytest.importorskip("distributed")
    fam, interp = _pruned_choice(monkeypatch)
    interpolant, evidence = interp.fit_for_family(fam)
    ref = _choice_bytes(interpolant, evidence)
    status = [r.norm_status for r in interp.evidence_from_arrays(evidence)]
    assert "bound" in status and "complete" in status
    assert _choice_bytes(*interp.fit_for_family(fam, jobs=2)) == ref
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            assert _choice_bytes(*interp.fit_for_family(fam, cluster=client)) == ref


def test_pruned_norms_are_those_of_the_serial_order_whatever_finishes_first(monkeypatch):
    # workers finish in any order; the norms kept, and the piece after which the search
    # stops, must be those of the in-order run. Norms made up per loop (2 loops a piece,
    # worst matrix error first): 0.5, except 2.0 in pieces 3 and 5; with the bound 1.0
    # the search keeps pieces 0-3 (8 norms) and stops, also when the engine returns the
    # pieces last first
    import schedule.parallel as par

    fam, interp = _pruned_choice(monkeypatch)
    fits = interp._Fits(fam)
    cand = interp._Candidate("matrices", "multilinear")
    interp._evaluate(fam, fits, [cand])
    pos = np.flatnonzero(cand.stable)
    order = pos[np.argsort(-np.nan_to_num(cand.rel_error[pos], nan=np.inf), kind="stable")]
    assert (order.size + 1) // 2 >= 6  # pieces 0-5
    made_up = {cand.K["A"][r].tobytes(): 2.0 if i // 2 in (3, 5) else 0.5
               for i, r in enumerate(order)}
    monkeypatch.setattr(interp, "loop_norm_rows", lambda plant, K: np.array(
        [made_up[a.tobytes()] for a in K["A"]]))
    start = cand.norm.copy()

    def pruned():
        cand.norm, cand.status = start.copy(), "complete"
        interp._norms_of(cand, fits, 1, None, stop_above=1.0)
        return cand.norm.copy(), cand.status

    norms, status = pruned()
    assert status == "bound" and np.isfinite(norms).sum() == 8
    assert np.array_equal(np.sort(np.flatnonzero(np.isfinite(norms))), np.sort(order[:8]))
    engine = par.run_chunks

    def last_first(func, chunks, jobs=1, cluster=None, shared=()):
        yield from reversed(list(engine(func, chunks, jobs=jobs, cluster=cluster,
                                        shared=shared)))

    monkeypatch.setattr(par, "run_chunks", last_first)
    got, got_status = pruned()
    assert got_status == status and np.array_equal(got, norms, equal_nan=True)


def _children(pid: int) -> list[int]:
    out = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as fh:
                    fields = fh.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid and fields[0] != "Z":
                out.append(int(entry))
    return out


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.skipif(not os.path.isdir("/proc") or not hasattr(signal, "SIGKILL"),
                    reason="needs /proc and POSIX signals")
def test_sigkill_of_design_leaves_no_worker(tmp_path):
    # `design --jobs 2` starts two loky workers and resource trackers as its children;
    # after SIGKILL of the parent every one of them must be gone within a few seconds
    from test_resume import CMD, ENV

    stiff = [1.0 + i / 16 for i in range(49)]
    design = write_design(tmp_path, "msd_plant", stiffness=stiff,
                          damping=[0.5 + 0.25 * i for i in range(7)])
    proc = subprocess.Popen(CMD + ["design", str(design), "--out", str(tmp_path / "f.h5"),
                                   "--jobs", "2", "--no-fit", "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=ENV)
    kids: list[int] = []
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        kids = _children(proc.pid)
        if len(kids) >= 3:  # two workers and at least one resource tracker
            break
        time.sleep(0.05)
    if proc.poll() is not None or len(kids) < 3:
        proc.kill()
        proc.wait()
        pytest.skip("the run ended before its workers could be seen")
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and any(_alive(k) for k in kids):
        time.sleep(0.1)
    alive = [k for k in kids if _alive(k)]
    for k in alive:  # leave the machine clean even when the test fails
        os.kill(k, signal.SIGKILL)
    assert alive == []


def _blas_threads() -> list[int]:
    from threadpoolctl import threadpool_info

    return [int(d["num_threads"]) for d in threadpool_info() if d.get("user_api") == "blas"]


def test_workers_use_one_blas_thread_and_prestart_is_harmless():
    # Reference: threadpoolctl's own report of the BLAS pools inside each worker process.
    from schedule.parallel import prestart

    prestart(1)  # no-op in this process
    prestart(2)
    got = dict(run_chunks(_blas_threads, [()] * 4, jobs=2))
    assert len(got) == 4
    for threads in got.values():
        assert threads and all(t == 1 for t in threads), threads
    with pytest.raises(InputError, match="jobs"):
        prestart(0)
