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
from schedule.parallel import run_chunks


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
