"""Crash safety: a design run killed with SIGKILL and resumed ends like an uninterrupted run.

Reference: the uninterrupted run of the same design (every dataset and
attribute read back with plain h5py must be equal, except the creation time),
and the point counts reported by the resumed run (computed + taken from the
partial file = all points).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from test_family import write_design

from schedule.family import partial_path
from schedule.store import read_partial

CMD = [sys.executable, "-c", "from schedule.cli.main import main; main()"]
# the model file (tests/test_family.py) imports tests/_helpers.py: the child needs tests/
# on its path, else the design fails at once and nothing can be killed
ENV = {**os.environ, "PYTHONPATH": os.pathsep.join(
    [str(Path(__file__).resolve().parent)] + [p for p in [os.environ.get("PYTHONPATH")] if p])}


def _contents(path) -> dict:
    out = {}
    with h5py.File(path, "r") as f:
        for k, v in f.attrs.items():
            if k != "created":
                out[f"@{k}"] = v.tobytes() if isinstance(v, np.ndarray) else v
        names = []
        f.visit(names.append)
        for name in names:
            if isinstance(f[name], h5py.Dataset):
                data = f[name][()]
                out[name] = data.tobytes() if isinstance(data, np.ndarray) and \
                    data.dtype.kind != "O" else repr(data)
    return out


@pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX signals")
def test_sigkill_then_resume(tmp_path):
    # steps of 1/16 and 1/4 are exact in binary, so the grid holds the two points where
    # msd_flaky fails (stiffness 2 and 3); the run must last long enough to be killed
    stiff = [1.0 + i / 16 for i in range(49)]
    damp = [0.5 + 0.25 * i for i in range(7)]
    n_points, chunk = len(stiff) * len(damp), 8
    n_chunks = -(-n_points // chunk)
    design = write_design(tmp_path, "msd_flaky", stiffness=stiff, damping=damp)
    args = ["design", str(design), "--no-fit", "--quiet", "--json", "--chunk-size", str(chunk)]
    out = tmp_path / "family.h5"
    partial = partial_path(out)

    proc = subprocess.Popen(CMD + args + ["--out", str(out)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, env=ENV)
    killed = False
    deadline = time.monotonic() + 120
    def finished_chunks(state) -> int:
        """Chunks finished in the gamma and controller stages (the partial file is written
        at most every 0.2 s, so the first copy seen may already hold the whole gamma stage:
        then the kill lands in the controller stage)."""
        return int(state[0]["gamma/done"].sum() + state[0]["controller/done"].sum())

    while time.monotonic() < deadline and proc.poll() is None:
        state = read_partial(partial) if partial.exists() else None
        if state is not None and 3 <= finished_chunks(state) < 2 * n_chunks:
            os.kill(proc.pid, signal.SIGKILL)
            killed = True
            break
        time.sleep(0.01)
    proc.wait()
    if not killed:
        pytest.skip("the run finished before it could be killed")
    assert proc.returncode == -signal.SIGKILL
    assert not out.exists()  # never a half-written family file under the output name
    done_before = finished_chunks(read_partial(partial))
    assert 3 <= done_before < 2 * n_chunks

    res = subprocess.run(CMD + args + ["--out", str(out), "--resume"], capture_output=True,
                         text=True, timeout=300, env=ENV)
    assert res.returncode == 0, res.stderr
    info = json.loads(res.stdout)
    n_valid = n_points - 2  # two points fail in the model (see test_family.msd_flaky)
    assert info["resumed"]["gamma_opt"] > 0
    assert info["computed"]["gamma_opt"] + info["resumed"]["gamma_opt"] == n_valid
    assert info["computed"]["gamma_opt"] < n_valid
    # what was finished before the kill is not computed again, in either stage
    computed = info["computed"]["gamma_opt"] + info["computed"]["controllers"]
    assert computed < 2 * n_valid
    assert not partial.exists()

    ref = tmp_path / "reference.h5"
    res = subprocess.run(CMD + args + ["--out", str(ref)], capture_output=True, text=True,
                         timeout=300, env=ENV)
    assert res.returncode == 0, res.stderr
    a, b = _contents(out), _contents(ref)
    assert a.keys() == b.keys()
    different = [k for k in a if a[k] != b[k]]
    assert different == []


class _Stop(Exception):
    pass


def _interrupted(spec, out, chunk):
    """A run stopped at the start of the gamma stage: the partial file holds the plants."""
    from schedule.family import run_design

    def progress(stage, done, total):
        if stage == "gamma":
            raise _Stop

    with pytest.raises(_Stop):
        run_design(spec, out, fit=False, chunk_size=chunk, progress=progress)


def test_bit_flips_in_the_partial_file_are_refused(tmp_path):
    # Every finished chunk carries a SHA-256 digest over its rows; a flipped bit anywhere in
    # the stored plants (raw bytes of the file, found with h5py's storage offsets) must make
    # --resume refuse the file with one line, never reach a family. Reference: the same
    # file unflipped resumes to the family of an uninterrupted run.
    from schedule.design_file import load_design
    from schedule.errors import InputError
    from schedule.family import run_design

    spec = load_design(write_design(tmp_path, "msd_plant", stiffness=(1.0, 2.0, 3.0, 4.0),
                                    damping=(0.5, 1.0, 1.5, 2.0)))
    out = tmp_path / "family.h5"
    _interrupted(spec, out, chunk=4)
    partial = partial_path(out)
    clean = partial.read_bytes()
    regions = []
    with h5py.File(partial, "r") as f:
        for name in ("plants/matrices/A", "plants/matrices/B1", "plants/matrices/D12",
                     "plants/valid"):
            offset, size = f[name].id.get_offset(), f[name].id.get_storage_size()
            assert offset is not None and size > 0
            regions.append((offset, size))
    rng = np.random.default_rng(7)
    for offset, size in regions:
        for _ in range(3):
            byte = offset + int(rng.integers(size))
            data = bytearray(clean)
            data[byte] ^= 1 << int(rng.integers(8))
            partial.write_bytes(bytes(data))
            with pytest.raises(InputError, match="digest|damaged") as err:
                run_design(spec, out, fit=False, chunk_size=4, resume=True)
            assert "\n" not in str(err.value)
            assert not out.exists()
    partial.write_bytes(clean)
    resumed = run_design(spec, out, fit=False, chunk_size=4, resume=True)
    assert resumed.resumed_plants == 16 and resumed.computed_plants == 0
    reference = run_design(spec, None, fit=False, chunk_size=4).family
    for k in reference.controller:
        assert np.array_equal(resumed.family.controller[k], reference.controller[k])
