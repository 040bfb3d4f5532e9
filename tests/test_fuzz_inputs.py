"""A fuzzer over design files, operating-point files and family files (mutations of valid ones).

Hypothesis draws mutations of a valid file: byte changes, truncation, insertions
of troublesome text (design files), and structural edits with h5py (datasets
replaced by other shapes, dtypes, NaN, text, links, undeclared-size arrays;
attributes changed; for family files with or without recomputing the digest,
as an attacker can). The command line then reads the file in-process. Every run
must end with exit code 0, 1 or 2, no traceback and no unexpected exception,
no output or temporary file left behind on failure, and bounded memory (the
growth of the process's peak resident size, ``ru_maxrss``, stays under 300 MB
per run; a declared size bomb would need gigabytes).
"""

from __future__ import annotations

import resource
import shutil
import tempfile
from pathlib import Path

import h5py
import numpy as np
import pytest
from _files import LAG_DESIGN, forge, lag_design, lag_family, run_cli
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from schedule.oppoints import OperatingPoints, write_operating_points
from schedule.types import SchedulingVariable

FUZZ = settings(max_examples=30, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])
MEMORY_GROWTH_KB = 300_000  # ru_maxrss is in kB on Linux


@pytest.fixture(scope="module")
def bases(tmp_path_factory):
    folder = tmp_path_factory.mktemp("bases")
    family = lag_family(folder / "lag")
    points = folder / "points.h5"
    poles = np.array([1.0, 1.5, 2.0])
    write_operating_points(points, OperatingPoints(
        variables=(SchedulingVariable("pole", "1/s", 1.0, 2.0),), values=poles[:, None],
        A=-poles[:, None, None], B=np.ones((3, 1, 2)), C=np.ones((3, 1, 1)),
        D=np.zeros((3, 1, 2)), state_names=("x",), input_names=("u", "d"), output_names=("y",)))
    return {"family": family, "points": points, "lag": family.parent / "lag.py"}


# ----------------------------------------------------------------------------- mutations
def _bytes_mutation():
    flips = st.lists(st.tuples(st.floats(0, 1, exclude_max=True), st.integers(1, 255)),
                     min_size=1, max_size=6).map(lambda f: ("flip", f))
    cut = st.floats(0, 1, exclude_max=True).map(lambda x: ("truncate", x))
    return st.one_of(flips, cut)


def _apply_bytes(data: bytes, mutation) -> bytes:
    kind, arg = mutation
    out = bytearray(data)
    if kind == "flip":
        for where, mask in arg:
            out[int(where * len(out))] ^= mask
        return bytes(out)
    return bytes(out[:int(arg * len(out))])


TEXT_PIECES = ["[", "]", "[[", "{", "}", "=", '"', "'''", "\\", "\n", "\r", "\x00", "\x1b",
               "\ufeff", "\u202e", "1e308", "-1", "nan", "inf", "100000000000", "true", "[]",
               "= [" * 200, "x = 1\n", "[check]\n", '[source]\nmodel = "os:getcwd"\n', "#",
               'operating_points = "points.h5"\n', '"/dev/zero"', "\u00e9"]


def _text_mutation():
    insert = st.tuples(st.just("insert"), st.floats(0, 1), st.sampled_from(TEXT_PIECES))
    delete = st.tuples(st.just("delete"), st.floats(0, 1), st.integers(1, 40))
    line = st.tuples(st.just("line"), st.floats(0, 1, exclude_max=True), st.booleans())
    return st.lists(st.one_of(insert, delete, line), min_size=1, max_size=5)


def _apply_text(text: str, mutations) -> str:
    for kind, where, arg in mutations:
        if kind == "insert":
            at = int(where * len(text))
            text = text[:at] + arg + text[at:]
        elif kind == "delete":
            at = int(where * len(text))
            text = text[:at] + text[at + arg:]
        else:
            lines = text.splitlines(keepends=True)
            k = int(where * len(lines))
            lines[k:k + 1] = [lines[k]] * 2 if arg else []
            text = "".join(lines)
    return text


def _replacement(kind: str, old: h5py.Dataset, folder: Path):
    """What a dataset is replaced by in a structural edit."""
    shape = old.shape or ()
    if kind == "nan":
        return np.full(shape, np.nan) if old.dtype.kind == "f" else np.array([np.nan])
    if kind == "text":
        return np.array(["x\n"] * max(int(np.prod(shape)), 1), dtype=h5py.string_dtype())
    if kind == "compound":
        return np.zeros(shape, dtype=[("re", float), ("im", float)])
    if kind == "shape":
        return np.zeros(tuple(s + 1 for s in shape) or (2,))
    if kind == "rank":
        return np.zeros(shape + (1,))
    if kind == "huge":
        return ("huge", (10_000_000,) + tuple(shape[1:]))
    if kind == "big":
        return np.full(shape, 1e300) if old.dtype.kind == "f" else np.zeros(shape)
    if kind == "link":
        side = folder / "side.h5"
        with h5py.File(side, "w") as f:
            f["data"] = np.zeros(shape or (1,))
        return h5py.ExternalLink(str(side), "/data")
    return h5py.SoftLink("/" + old.name.strip("/").split("/")[0])


EDIT_KINDS = ["nan", "text", "compound", "shape", "rank", "huge", "big", "link", "soft",
              "attr_text", "attr_array", "delete"]


def _structural_edit(name_pick: float, kind: str, folder: Path):
    def edit(f: h5py.File) -> None:
        names: list[str] = []
        f.visit(lambda n: names.append(n) if isinstance(f.get(n, getlink=True), h5py.HardLink)
                and isinstance(f[n], h5py.Dataset) else None)
        name = sorted(names)[int(name_pick * len(names))]
        old = f[name]
        if kind == "attr_text":
            f.attrs[sorted(f.attrs)[int(name_pick * len(f.attrs))]] = "1"
            return
        if kind == "attr_array":
            f.attrs[sorted(f.attrs)[int(name_pick * len(f.attrs))]] = np.arange(3)
            return
        new = None if kind == "delete" else _replacement(kind, old, folder)
        del f[name]
        if isinstance(new, tuple):
            f.create_dataset(name, shape=new[1], dtype=float, chunks=True)
        elif new is not None:
            f[name] = new
    return edit


def _h5_mutation():
    structural = st.tuples(st.just("edit"), st.floats(0, 1, exclude_max=True),
                           st.sampled_from(EDIT_KINDS), st.booleans())
    return st.one_of(_bytes_mutation(), structural)


def _mutate_h5(base: Path, target: Path, mutation, family: bool) -> None:
    if mutation[0] == "edit":
        _, pick, kind, digest = mutation
        forge(base, target, _structural_edit(pick, kind, target.parent), digest=family and digest)
    else:
        target.write_bytes(_apply_bytes(base.read_bytes(), mutation))


# ----------------------------------------------------------------------------- the runs
def _check_run(folder: Path, outputs: list[Path], *args) -> int:
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    code, out, exc = run_cli(*args)
    growth = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before
    assert exc is None, f"{type(exc).__name__}: {exc}"
    assert code in (0, 1, 2), out
    assert "Traceback" not in out, out
    if code == 2:
        assert out.strip().splitlines()[-1].startswith("error: "), out
        assert not any(p.exists() for p in outputs), out
    leftovers = [p.name for p in folder.rglob("*") if p.name.endswith((".part", ".old"))]
    assert not leftovers, leftovers
    assert growth < MEMORY_GROWTH_KB, f"peak memory grew by {growth / 1000:.0f} MB"
    return code


@FUZZ
@given(mutations=_text_mutation())
def test_fuzzed_design_files(bases, mutations):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        lag_design(folder, _apply_text(LAG_DESIGN, mutations))
        shutil.copy(bases["points"], folder / "points.h5")
        out = folder / "family.h5"
        _check_run(folder, [out], "design", folder / "design.toml", "--out", out, "--quiet")


@FUZZ
@given(mutation=_h5_mutation())
def test_fuzzed_operating_point_files(bases, mutation):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        _mutate_h5(bases["points"], folder / "points.h5", mutation, family=False)
        design = LAG_DESIGN.replace('model_file = "lag.py"\nfunction = "plant_at"',
                                    'operating_points = "points.h5"')
        design = design[:design.index("[grid]")] + design[design.index("[channels]"):]
        (folder / "design.toml").write_text(design)
        out = folder / "family.h5"
        _check_run(folder, [out], "design", folder / "design.toml", "--out", out, "--quiet")


@FUZZ
@given(mutation=_h5_mutation())
def test_fuzzed_family_files(bases, mutation):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        fam = folder / "family.h5"
        _mutate_h5(bases["family"], fam, mutation, family=True)
        table = folder / "table.json"
        _check_run(folder, [table], "export", fam, "--format", "json", "--out", table,
                   "--breakpoints", "pole=1:2:4")
        _check_run(folder, [], "inspect", fam, "--no-loo")
