"""Tests of schedule/parallel.py: same results, bit for bit, on every backend.

Reference: the plain in-process loop (jobs=1) computes the same function; the
other backends (joblib/loky processes, a real dask LocalCluster) must return
identical bytes.
"""

from __future__ import annotations

import math

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
