"""HDF5 inputs are checked from their metadata before any data are read.

Attacks on family, operating-point and table files: external links, soft
links, virtual datasets and external raw storage (data that live outside the
file, where the digest does not look), declared sizes the file cannot hold
(a 1.4 kB file declaring 200 MB, a declared 7 TiB array), and values of the
wrong type or shape. Each is refused with one line. "Without reading data" is
measured: the peak of Python-traced memory (numpy arrays are traced,
tracemalloc) during the read stays below 5 % of the declared size. The
reference for sizes and links is h5py/HDF5 itself (what the file declares).
"""

from __future__ import annotations

import os
import tracemalloc

import h5py
import numpy as np
import pytest
from _files import forge, lag_family, run_cli

from schedule.errors import InputError
from schedule.oppoints import OperatingPoints, read_operating_points, write_operating_points
from schedule.store import read_family
from schedule.types import SchedulingVariable

BOMB = 25_000_000  # float64 values: 200 MB declared


@pytest.fixture(scope="module")
def family(tmp_path_factory):
    return lag_family(tmp_path_factory.mktemp("lag"))


@pytest.fixture
def oppoints(tmp_path):
    path = tmp_path / "points.h5"
    A = np.array([[[-1.0]], [[-2.0]]])
    write_operating_points(path, OperatingPoints(
        variables=(SchedulingVariable("pole", "1/s", 1.0, 2.0),), values=np.array([[1.0], [2.0]]),
        A=A, B=np.ones((2, 1, 2)), C=np.ones((2, 1, 1)), D=np.zeros((2, 1, 2)),
        state_names=("x",), input_names=("u", "d"), output_names=("y",)))
    return path


def _refused_cheaply(read, path, match, declared_bytes=BOMB * 8):
    tracemalloc.start()
    try:
        with pytest.raises(InputError, match=match) as err:
            read(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert "\n" not in str(err.value)
    assert peak < 0.05 * declared_bytes, f"peak {peak / 1e6:.1f} MB"
    return str(err.value)


def _unallocated(group, name, shape, layout="chunked"):
    """A dataset declaring ``shape`` float64 values with no storage written."""
    if layout == "chunked":
        return group.create_dataset(name, shape=shape, dtype=float,
                                    chunks=(1,) * (len(shape) - 1) + (min(shape[-1], 1000),))
    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_LATE)
    dcpl.set_layout(h5py.h5d.CONTIGUOUS)
    h5py.h5d.create(group.id, name.encode(), h5py.h5t.NATIVE_DOUBLE,
                    h5py.h5s.create_simple(shape), dcpl=dcpl)


# ----------------------------------------------------------------------------- data elsewhere
def test_external_link_soft_link_virtual_and_external_storage_refused(family, tmp_path):
    side = tmp_path / "side.h5"
    with h5py.File(side, "w") as f:
        _unallocated(f, "data", (BOMB,))
    raw = tmp_path / "side.bin"
    with open(raw, "wb") as fh:
        fh.truncate(BOMB * 8)  # sparse: 200 MB of zeros that take no disk

    def external_link(f):
        f["extra/bomb"] = h5py.ExternalLink(str(side), "/data")

    def soft_link(f):
        f["extra/alias"] = h5py.SoftLink("/plant/A")

    def virtual(f):
        layout = h5py.VirtualLayout(shape=(BOMB,), dtype=float)
        layout[:] = h5py.VirtualSource(str(side), "data", shape=(BOMB,))
        f["extra"].create_virtual_dataset("bomb", layout)

    def external_storage(f):
        f["extra"].create_dataset("bomb", shape=(BOMB,), dtype=float,
                                  external=[(str(raw), 0, BOMB * 8)])

    for edit, match in ((external_link, "external link"), (soft_link, "soft link"),
                        (virtual, "virtual dataset"), (external_storage, "external raw file")):
        bad = forge(family, tmp_path / f"{edit.__name__}.h5", edit, digest=False)
        _refused_cheaply(read_family, bad, match)
    # and through the command line: one line, exit 2
    code, out, exc = run_cli("export", tmp_path / "virtual.h5", "--format", "json", "--out",
                             tmp_path / "t.json")
    assert exc is None and code == 2 and len(out.strip().splitlines()) == 1, out
    assert not (tmp_path / "t.json").exists()


# ----------------------------------------------------------------------------- size bombs
@pytest.mark.parametrize("layout", ["chunked", "contiguous"])
def test_size_bomb_refused_before_the_digest_reads_it(family, oppoints, tmp_path, layout):
    bad = forge(family, tmp_path / "bomb.h5",
                lambda f: _unallocated(f["extra"], "bomb", (BOMB,), layout), digest=False)
    assert os.path.getsize(bad) < 200_000
    _refused_cheaply(read_family, bad, "declares")

    def grow(f):
        del f["points/A"]
        _unallocated(f["points"], "A", (BOMB, 1, 1), layout)

    bad = forge(oppoints, tmp_path / "bomb_points.h5", grow, digest=False)
    _refused_cheaply(read_operating_points, bad, "declares")


def test_seven_tebibyte_array_refused(oppoints, tmp_path):
    def grow(f):
        del f["points/A"]
        f["points"].create_dataset("A", shape=(1_000_000, 1000, 1000), dtype=float,
                                   chunks=(1, 10, 1000))

    bad = forge(oppoints, tmp_path / "huge.h5", grow, digest=False)
    msg = _refused_cheaply(read_operating_points, bad, "declares", declared_bytes=8e12)
    assert "TB" in msg


# ----------------------------------------------------------------------------- wrong types
def _set(name, value):
    def edit(f):
        del f[name]
        f[name] = value
    return edit


def _poke(name, value):
    def edit(f):
        f[name][0, 0, 0] = value
    return edit


def _attr(name, value):
    def edit(f):
        f.attrs[name] = value
    return edit


@pytest.mark.parametrize("edit,match", [
    (_attr("format", np.array(["schedule-operating-points"] * 2, dtype=h5py.string_dtype())),
     "attribute 'format' is an array"),
    (_attr("format_version", "one"), "'format_version' is the string 'one'"),
    (_attr("format_version", "1"), "'format_version' is the string '1', expected the integer"),
    (_attr("format_version", 1.5), "'format_version' is the number 1.5"),
    (_set("points/A", np.array([[["a"]], [["b"]]], dtype=h5py.string_dtype())), "holds text"),
    (_set("points/A", np.zeros((2, 1, 1), dtype=[("re", float), ("im", float)])), "compound"),
    (_set("points/A", np.zeros((2, 1, 1), dtype=complex)), "complex"),
    (_set("points/A", np.zeros((2, 2, 2))), "points/B has shape"),
    (_set("points/A", np.full((2, 1, 1), np.nan)), "NaN"),
    (_poke("points/B", 2.7e303), "magnitude 2.7e\\+303 at point 0, beyond 1e\\+100"),
    (_set("names/states", np.array(["x\r\n"], dtype=h5py.string_dtype())), "control character"),
])
def test_operating_point_file_damage_is_one_line(oppoints, tmp_path, edit, match):
    bad = forge(oppoints, tmp_path / "bad.h5", edit, digest=False)
    with pytest.raises(InputError, match=match) as err:
        read_operating_points(bad)
    assert "\n" not in str(err.value)


@pytest.mark.parametrize("edit,match", [
    (_set("controller/B", np.zeros((3, 1, 2))), "controller/B has shape"),
    (_set("controller/A", np.array([[["a"]]] * 3, dtype=h5py.string_dtype())), "holds text"),
    (_poke("controller/A", np.nan), "controller/A holds NaN"),
    (_poke("plant/B1", np.inf), "plant/B1 holds NaN or inf"),
    (_set("points/gamma_opt", np.array([1.0, -1.0, 1.0])), "gamma_opt"),
    (_set("interpolant/arrays/ctrl_grid", np.full((3, 4), np.nan)), "interpolant array"),
    (_attr("format_version", "1"), "is the string '1'"),
])
def test_family_file_damage_with_a_recomputed_digest_is_one_line(family, tmp_path, edit, match):
    bad = forge(family, tmp_path / "bad.h5", edit)
    code, out, exc = run_cli("export", bad, "--format", "json", "--out", tmp_path / "t.json")
    assert exc is None and code == 2, out
    assert len(out.strip().splitlines()) == 1 and match in out, out
    assert not (tmp_path / "t.json").exists()


def test_damaged_interpolant_layout_is_one_line(family, tmp_path):
    def edit(f):
        f["interpolant/arrays/ctrl_shape_A"][...] = [1000, 1000]

    bad = forge(family, tmp_path / "bad.h5", edit)
    code, out, exc = run_cli("export", bad, "--format", "json", "--out", tmp_path / "t.json",
                             "--breakpoints", "pole=1:2:5")
    assert exc is None and code == 2 and "interpolant is damaged" in out, out


# ----------------------------------------------------------------------------- not files
def test_devices_folders_and_pipes_are_named_as_such(tmp_path):
    fifo = tmp_path / "pipe.h5"
    os.mkfifo(fifo)
    for path, match in (("/dev/zero", "character device"), (tmp_path, "is a folder"),
                        (fifo, "is a pipe"), (tmp_path / "nothere.h5", "does not exist")):
        with pytest.raises(InputError, match=match):
            read_family(path)
        with pytest.raises(InputError, match=match):
            read_operating_points(path)
    code, out, exc = run_cli("design", "/dev/zero", "--out", tmp_path / "x.h5")
    assert exc is None and code == 2 and "character device" in out, out


def test_text_inputs_that_are_devices_are_refused_before_reading(family, tmp_path):
    # reading /dev/zero as text would never end
    for args in (("check", family, "--points", "/dev/zero"),
                 ("simulate", family, "--model", "x:y", "--trajectory", "/dev/zero", "--out",
                  tmp_path / "sim"),
                 ("simulate", family, "--model", "x:y", "--table", "/dev/zero", "--out",
                  tmp_path / "sim")):
        code, out, exc = run_cli(*args)
        assert exc is None and code == 2, out
        assert "character device" in out, out


def test_string_heap_ending_with_less_than_a_header_of_free_space_is_read(tmp_path):
    """HDF5 writes no free-space object when fewer bytes than an object header (16) are
    left in a global heap collection (HDF5 file format specification, version 2.0, sec.
    III.E; seen with the bundled crane design text, whose strings left 8 bytes)."""
    from schedule.h5util import global_heaps

    total = 4096
    body = total - 16 - 8  # the strings fill all but 8 bytes
    length = body - 16
    heap = (b"GCOL" + b"\x01\x00\x00\x00" + total.to_bytes(8, "little")
            + (1).to_bytes(2, "little") + b"\x01\x00" + b"\0" * 4 + length.to_bytes(8, "little")
            + b"x" * length + b"\0" * 8)
    assert len(heap) == total
    path = tmp_path / "heap.bin"
    path.write_bytes(b"\0" * 64 + heap)
    assert global_heaps(path) == {64: {1: length}}
    longer = heap[:24] + (length + 16).to_bytes(8, "little") + heap[32:]  # runs past the end
    path.write_bytes(b"\0" * 64 + longer)
    with pytest.raises(InputError, match="overruns"):
        global_heaps(path)
