"""Tests of schedule/store.py: the family file round trip and damaged files.

The outside references here are the HDF5 library itself (h5py reads back what
was written, independently of our reader) and the SHA-256 of the file bytes.
"""

from __future__ import annotations

import hashlib
import shutil

import h5py
import numpy as np
import pytest

from schedule.errors import InputError
from schedule.store import FORMAT_NAME, read_family, read_partial, write_family, write_partial
from schedule.types import Family, SchedulingVariable

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")


def make_family(N: int = 6, seed: int = 0, grid: bool = True) -> Family:
    rng = np.random.default_rng(seed)
    n, nw, nu, nz, ny = 3, 2, 1, 2, 2
    shapes = {"A": (n, n), "B1": (n, nw), "B2": (n, nu), "C1": (nz, n), "C2": (ny, n),
              "D11": (nz, nw), "D12": (nz, nu), "D21": (ny, nw), "D22": (ny, nu)}
    status = np.array(["ok"] * (N - 1) + ["failed"])
    points = rng.random((N, 2)) * [10, 1] + [0, 1]
    breakpoints = (np.array([0.0, 5.0, 10.0]), np.array([1.0, 2.0])) if grid else None
    grid_index = rng.integers(0, 2, size=(N, 2)) if grid else None
    if grid:  # grid points lie on the breakpoints
        points = np.column_stack([b[i] for b, i in zip(breakpoints, grid_index.T, strict=True)])
    return Family(
        variables=(SchedulingVariable("speed", "m/s", 0.0, 10.0),
                   SchedulingVariable("load", "kg", 1.0, 2.0)),
        points=points, status=status,
        reasons=("",) * (N - 1) + ("model: solver diverged (ünïcode ok)",),
        gamma_opt=np.r_[rng.random(N - 1) + 1, np.nan], gamma=2.5,
        plant={k: rng.normal(size=(N,) + s) for k, s in shapes.items()},
        controller={"A": rng.normal(size=(N, n, n)), "B": rng.normal(size=(N, n, ny)),
                    "C": rng.normal(size=(N, nu, n)), "D": rng.normal(size=(N, nu, ny))},
        pieces={"F": rng.normal(size=(N, nu, n)), "Z": rng.normal(size=(N, n, n))},
        measured_names=("y1", "y2"), control_names=("u",), exogenous_names=("d:w", "n:y1"),
        performance_names=("e:y1", "u:u"), state_names=("x1", "x2", "w_perf:y1"),
        breakpoints=breakpoints, grid_index=grid_index,
        design_text='title = "t"\n', tool_version="9.9", created="2024-01-02T03:04:05+00:00",
        interpolant={"arrays": {"coef": rng.normal(size=(4, 3)), "knots/speed": np.arange(3.0),
                                "labels": np.array(["a", "b"])},
                     "attrs": {"kind": "spline", "order": 3, "smoothing": 0.5}},
        design_base_dir="/x/y", extra={"loo_error": rng.random(N), "loo_kind": "spline"})


def assert_same(a: Family, b: Family) -> None:
    assert a.variables == b.variables
    np.testing.assert_array_equal(a.points, b.points)
    np.testing.assert_array_equal(a.status, b.status)
    assert a.reasons == b.reasons
    np.testing.assert_array_equal(a.gamma_opt, b.gamma_opt)
    assert a.gamma == b.gamma
    for group in ("plant", "controller", "pieces"):
        da, db = getattr(a, group), getattr(b, group)
        assert set(da) == set(db)
        for k in da:
            np.testing.assert_array_equal(da[k], db[k])
    for attr in ("measured_names", "control_names", "exogenous_names", "performance_names",
                 "state_names", "design_text", "tool_version", "created"):
        assert getattr(a, attr) == getattr(b, attr), attr
    if a.breakpoints is None:
        assert b.breakpoints is None
    else:
        for x, y in zip(a.breakpoints, b.breakpoints, strict=True):
            np.testing.assert_array_equal(x, y)
    if a.grid_index is None:
        assert b.grid_index is None
    else:
        np.testing.assert_array_equal(a.grid_index, b.grid_index)
    assert a.interpolant["attrs"] == b.interpolant["attrs"]
    assert set(a.interpolant["arrays"]) == set(b.interpolant["arrays"])
    for k, v in a.interpolant["arrays"].items():
        np.testing.assert_array_equal(v, b.interpolant["arrays"][k])
    assert set(a.extra) == set(b.extra)
    for k, v in a.extra.items():
        if isinstance(v, str):
            assert b.extra[k] == v
        else:
            np.testing.assert_array_equal(v, b.extra[k])


@pytest.mark.parametrize("grid", [True, False])
def test_round_trip_all_fields(tmp_path, grid):
    fam = make_family(grid=grid)
    path = tmp_path / "family.h5"
    write_family(path, fam)
    assert_same(fam, read_family(path))


def test_layout_read_by_plain_h5py(tmp_path):
    # Independent reader: h5py directly, against the layout of docs/format.md.
    fam = make_family()
    path = tmp_path / "family.h5"
    write_family(path, fam)
    with h5py.File(path, "r") as f:
        assert f.attrs["format"] == FORMAT_NAME
        assert int(f.attrs["format_version"]) == 1
        assert f["plant/A"].shape == (6, 3, 3)
        assert f["controller/B"].shape == (6, 3, 2)
        assert f["points/values"].shape == (6, 2)
        assert [s.decode() for s in f["points/status"][()]] == list(fam.status)
        assert f["names/states"].shape == (3,)
        assert f.attrs["design_base_dir"] == "/x/y"
        for k in PLANT_KEYS:
            np.testing.assert_array_equal(f["plant"][k][()], fam.plant[k])


def test_units_round_trip_and_files_without_units(tmp_path):
    """docs/format.md: ``/names/units/<group>``, one unit per name, read back by h5py;
    a family without units (as every file written before units existed) has no such
    group and reads as "no units"."""
    import dataclasses

    units = {"measured": ("m", "rad"), "controls": ("kN",), "exogenous": ("m/s", "m"),
             "performance": ("m", "kN"), "states": ("m", "m/s", "m")}
    fam = dataclasses.replace(make_family(), units=units)
    path = tmp_path / "family.h5"
    write_family(path, fam)
    with h5py.File(path, "r") as f:
        assert [u.decode() for u in f["names/units/controls"][()]] == ["kN"]
        assert [u.decode() for u in f["names/units/measured"][()]] == ["m", "rad"]
    back = read_family(path)
    assert back.units == units and back.units_of("controls") == ("kN",)
    plain = tmp_path / "plain.h5"
    write_family(plain, make_family())
    with h5py.File(plain, "r") as f:
        assert "units" not in f["names"]
    assert read_family(plain).units == {} and read_family(plain).units_of("measured") == ("", "")
    wrong = dataclasses.replace(make_family(), units={"controls": ("kN", "kN")})
    with pytest.raises(InputError, match="2 units for 1 controls signals"):
        write_family(tmp_path / "wrong.h5", wrong)


def test_reproducible_bytes_except_created(tmp_path):
    # Same content written twice -> identical bytes (SHA-256 of the files).
    fam = make_family()
    write_family(tmp_path / "a.h5", fam)
    write_family(tmp_path / "b.h5", fam)
    digest = [hashlib.sha256((tmp_path / n).read_bytes()).hexdigest() for n in ("a.h5", "b.h5")]
    assert digest[0] == digest[1]


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_family(tmp_path / "nope.h5")


def test_truncated_file(tmp_path):
    path = tmp_path / "family.h5"
    write_family(path, make_family())
    data = path.read_bytes()
    for cut in (len(data) // 2, len(data) - 100, 500):
        bad = tmp_path / f"cut{cut}.h5"
        bad.write_bytes(data[:cut])
        with pytest.raises(InputError, match="corrupt|truncated") as err:
            read_family(bad)
        assert "\n" not in str(err.value)


def test_flipped_bytes_detected(tmp_path):
    path = tmp_path / "family.h5"
    write_family(path, make_family())
    data = bytearray(path.read_bytes())
    rng = np.random.default_rng(1)
    positions = rng.choice(np.arange(len(data)), size=25, replace=False)
    detected = 0
    for pos in positions:
        bad_bytes = bytearray(data)
        bad_bytes[pos] ^= 0xFF
        bad = tmp_path / "flip.h5"
        bad.write_bytes(bytes(bad_bytes))
        try:
            fam = read_family(bad)
        except InputError as exc:
            assert "\n" not in str(exc)
            detected += 1
            continue
        # A flip in unused padding may be harmless; then the content must be intact.
        assert_same(make_family(), fam)
    # Flips inside the raw data of the plant/controller arrays must be caught by the digest.
    with h5py.File(path, "r") as f:
        offset = f["plant/A"].id.get_offset()
    bad_bytes = bytearray(data)
    bad_bytes[offset + 3] ^= 0x01
    (tmp_path / "flip2.h5").write_bytes(bytes(bad_bytes))
    with pytest.raises(InputError, match="digest"):
        read_family(tmp_path / "flip2.h5")
    assert detected >= 1


def test_wrong_format_and_version(tmp_path):
    path = tmp_path / "family.h5"
    write_family(path, make_family())
    other = tmp_path / "other.h5"
    shutil.copy(path, other)
    with h5py.File(other, "a") as f:
        f.attrs["format"] = "something-else"
    with pytest.raises(InputError, match="not a family file"):
        read_family(other)
    shutil.copy(path, other)
    with h5py.File(other, "a") as f:
        f.attrs["format_version"] = 99
    with pytest.raises(InputError, match="version 99"):
        read_family(other)
    plain = tmp_path / "plain.h5"
    plain.write_text("not hdf5 at all")
    with pytest.raises(InputError, match="not an HDF5 file"):
        read_family(plain)


def test_inconsistent_family_rejected_and_old_file_kept(tmp_path):
    path = tmp_path / "family.h5"
    fam = make_family()
    write_family(path, fam)
    before = path.read_bytes()
    bad = make_family()
    bad.controller["A"] = bad.controller["A"][:3]
    with pytest.raises(InputError, match="controller/A"):
        write_family(path, bad)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["family.h5"]


def test_partial_file_round_trip(tmp_path):
    path = tmp_path / "x.partial.h5"
    assert read_partial(path) is None
    arrays = {"gamma/done": np.array([1, 0], dtype=np.int8), "gamma/reasons": np.array(["", "b"]),
              "controller/matrices/A": np.ones((2, 3, 3))}
    write_partial(path, arrays, {"fingerprint": "abc", "points": 2})
    got, attrs = read_partial(path)
    assert attrs["fingerprint"] == "abc" and attrs["points"] == 2
    np.testing.assert_array_equal(got["gamma/done"], arrays["gamma/done"])
    assert list(got["gamma/reasons"]) == ["", "b"]
    np.testing.assert_array_equal(got["controller/matrices/A"], np.ones((2, 3, 3)))
