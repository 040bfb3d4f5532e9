"""Small HDF5 helpers shared by the file formats (family, operating-point and table files).

- UTF-8 strings: :data:`STR`, :func:`strings` (to a dataset-ready array),
  :func:`decode_one` and :func:`decode` (back to Python ``str``).
- The ``/variables`` group (names, units, bounds, optional breakpoints) that
  both formats use: :func:`write_variables` and :func:`read_variables`.
- :func:`new_h5` builds a file in memory with fixed creation properties
  (``track_order``, ``libver="earliest"``, so that equal content gives equal
  bytes) and writes its bytes in one plain write; :func:`atomic_h5` does so
  through :func:`schedule.atomic.write_file_atomic`. The HDF5 library never
  writes to disk itself, so a full disk is an ordinary ``OSError`` (one line,
  no temporary left), not a damaged library state.
- :func:`open_checked`: open an HDF5 input only after checking, from the
  metadata alone, that it is safe to read (:func:`inspect_h5`), and turn any
  later h5py failure into a one-line error.
- :func:`expect`, :func:`check_format`: the layout checks the formats build on.

Only plain arrays and UTF-8 strings go through here; nothing is pickled.
"""

from __future__ import annotations

import io
import math
import mmap
import os
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from .errors import InputError, ScheduleError
from .types import SchedulingVariable

__all__ = ["STR", "strings", "decode_one", "decode", "write_variables", "read_variables",
           "atomic_h5", "new_h5", "open_checked", "inspect_h5", "global_heaps", "H5Contents",
           "expect", "check_format", "MAX_OBJECTS"]

STR = h5py.string_dtype("utf-8")
SIGNATURE = b"\x89HDF\r\n\x1a\n"
MAX_OBJECTS = 100_000  # groups + datasets; a family of 10^5 points needs about 100
MAX_DEPTH = 16  # group nesting; the formats use 3
MAX_ATTRIBUTES = 256  # per object
MAX_STRING_ATTR_ELEMENTS = 64  # string attributes are scalars in every format
MAX_ATTR_ELEMENTS = 4096  # numeric attribute arrays


def strings(values) -> np.ndarray:
    """An array of UTF-8 strings (``str(v)`` of every value) ready for h5py."""
    return np.array([str(v) for v in values], dtype=STR)


def decode_one(v) -> str:
    """A string read from h5py (``bytes`` or ``str``) as ``str``."""
    return v.decode("utf-8") if isinstance(v, bytes) else str(v)


def decode(ds) -> tuple[str, ...]:
    """All strings of a string dataset (scalar or any shape, flattened) as a tuple of ``str``."""
    if ds.shape == (0,):
        return ()
    data = ds[()]
    if np.ndim(data) == 0:
        return (decode_one(data),)
    return tuple(decode_one(v) for v in np.ravel(data))


def write_variables(f: h5py.Group, variables: Sequence[SchedulingVariable],
                    breakpoints: Sequence | None = None) -> None:
    """Create ``/variables`` with names, units, lower, upper and (grids only) breakpoints."""
    g = f.create_group("variables", track_order=True)
    g["names"] = strings(v.name for v in variables)
    g["units"] = strings(v.unit for v in variables)
    g["lower"] = np.array([v.lower for v in variables], dtype=float)
    g["upper"] = np.array([v.upper for v in variables], dtype=float)
    if breakpoints is not None:
        b = g.create_group("breakpoints", track_order=True)
        for v, bp in zip(variables, breakpoints, strict=False):
            b[v.name] = np.asarray(bp, dtype=float)


def read_variables(f: h5py.Group) -> tuple[tuple[SchedulingVariable, ...],
                                           tuple[np.ndarray, ...] | None]:
    """Inverse of :func:`write_variables`: ``(variables, breakpoints or None)``."""
    names = decode(f["variables/names"])
    units = decode(f["variables/units"]) if names else ()
    lower = f["variables/lower"][()]
    upper = f["variables/upper"][()]
    variables = tuple(SchedulingVariable(n, u, float(lo), float(hi))
                      for n, u, lo, hi in zip(names, units, lower, upper, strict=False))
    breakpoints = None
    if "variables/breakpoints" in f:
        breakpoints = tuple(np.asarray(f["variables/breakpoints"][n][()], dtype=float)
                            for n in names)
    return variables, breakpoints


@contextmanager
def new_h5(path: str | os.PathLike) -> Iterator[h5py.File]:
    """A new HDF5 file built in memory and written to ``path`` in one plain write on exit.

    The creation properties are fixed (``track_order``, ``libver="earliest"``)
    so that equal content gives equal bytes. The HDF5 library never writes to
    disk itself: a full disk or a file-size limit is an ordinary ``OSError``
    from the final write, not a damaged library state (HDF5 can crash the
    process after a failed write to disk). Use it inside
    :func:`schedule.atomic.write_file_atomic` (``path`` is then the temporary).
    """
    buffer = io.BytesIO()
    # h5py does not store object times by default, so the bytes depend on content only
    with h5py.File(buffer, "w", track_order=True, libver="earliest") as f:
        yield f
    with open(path, "wb") as fh:
        fh.write(buffer.getbuffer())


def atomic_h5(path: str | os.PathLike, fill: Callable[[h5py.File], None],
              what: str = "HDF5 file") -> None:
    """Create ``path`` atomically: ``fill(f)`` writes the content into a :func:`new_h5` file.

    If ``fill`` raises, nothing is written and an existing ``path`` is left as it was.

    Raises
    ------
    InputError
        The output folder does not exist or is not writable, or the write failed
        (disk full, quota, file-size limit); one line, no temporary left behind.
    """
    from .atomic import write_file_atomic

    def writer(tmp: str) -> None:
        with new_h5(tmp) as f:
            fill(f)

    write_file_atomic(path, writer, what)


# ----------------------------------------------------------------------------- safe reading
@dataclass(frozen=True)
class H5Contents:
    """What an inspected file declares, from its metadata: dataset name -> (shape, dtype)."""

    datasets: dict[str, tuple[tuple[int, ...], np.dtype]]
    size: int

    def __contains__(self, name: str) -> bool:
        return name in self.datasets


def _signature_at(path: Path, size: int) -> bool:
    """The HDF5 signature at offset 0 or at a user-block boundary (512, 1024, 2048, ...)."""
    offsets = [0] + [1 << k for k in range(9, 31) if (1 << k) + 8 <= size]
    with open(path, "rb") as fh:
        for off in offsets[:12]:
            fh.seek(off)
            if fh.read(8) == SIGNATURE:
                return True
    return False


class _HeapError(Exception):
    """A malformed global heap collection (the message says where)."""


def global_heaps(path: str | os.PathLike) -> dict[int, dict[int, int]]:
    """The file's global heap collections: ``{address: {object index: object size}}``.

    Variable-length strings live in global heap collections: "GCOL", version 1,
    three reserved bytes, the collection size (8 bytes, at least 4096), then
    objects (index 2 bytes, reference count 2, reserved 4, size 8, data padded
    to 8 bytes) ending with the free-space object (index 0) that fills the
    collection exactly, or, when less than an object header (16 bytes) is left,
    with those few bytes and no free-space object (HDF5 file format specification,
    version 2.0, section III.E). A damaged collection, or a string pointing at something that is not
    one, can make the HDF5 library loop for ever when the string is read, so the
    collections are walked here first, in plain Python.

    Raises
    ------
    InputError
        A collection is malformed.
    """
    path = Path(path)
    size = os.stat(path).st_size
    try:
        with open(path, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as data:
            return _walk_global_heaps(data, size)
    except _HeapError as exc:
        raise InputError(f"{path} is corrupt ({exc})") from None


def _walk_global_heaps(data, size: int) -> dict[int, dict[int, int]]:
    heaps: dict[int, dict[int, int]] = {}
    at = data.find(b"GCOL")
    while at >= 0:
        header = data[at + 4:at + 8]
        total = int.from_bytes(data[at + 8:at + 16], "little") if at + 16 <= size else 0
        if header == b"\x01\x00\x00\x00" and total >= 4096:
            end = at + total
            if end > size:
                raise _HeapError(f"a string heap at byte {at} runs past the end of the file")
            p, objects = at + 16, {}
            while True:
                if p + 16 > end:
                    # less room than an object header is left without a free-space
                    # record (the library only writes one when a header fits)
                    if (end - p) % 8:
                        raise _HeapError(f"the string heap at byte {at} does not end on an "
                                         "object")
                    break
                index = int.from_bytes(data[p:p + 2], "little")
                length = int.from_bytes(data[p + 8:p + 16], "little")
                if index == 0:  # free space: fills the rest of the collection
                    if p + length != end:
                        raise _HeapError(f"the string heap at byte {at} has a damaged "
                                         "free-space record")
                    break
                if index in objects:
                    raise _HeapError(f"the string heap at byte {at} repeats object {index}")
                objects[index] = length
                p += 16 + (length + 7) // 8 * 8
                if p > end:
                    raise _HeapError(f"object {index} of the string heap at byte {at} "
                                     "overruns it")
            heaps[at] = objects
        at = data.find(b"GCOL", at + 4)
    return heaps


def _uint(data, at: int, width: int) -> int:
    return int.from_bytes(data[at:at + width], "little")


def _superblock(data, size: int) -> tuple[int, int, int]:
    """(base address, size of offsets, size of lengths) from the superblock."""
    base = data.find(SIGNATURE)
    version = data[base + 8]
    if version in (0, 1):
        return base, data[base + 13], data[base + 14]
    return base, data[base + 9], data[base + 10]


def _header_attributes(data, size: int, addr: int, offsets: int, lengths: int
                       ) -> dict[str, tuple[int, int]] | None:
    """The compact attributes in the object header at file offset ``addr``.

    Returns ``{name: (start, end)}`` of each attribute's raw data in the file,
    or None where the header cannot be read here (then the caller does not
    rely on it). Object header versions 1 and 2 (HDF5 file format
    specification, version 2.0, sections IV.A.1 and IV.A.2), continuation
    blocks, and attribute messages of versions 1 to 3 (section IV.A.2.m).
    """
    out: dict[str, tuple[int, int]] = {}
    try:
        if data[addr:addr + 4] == b"OHDR":
            if data[addr + 4] != 2:
                return None
            flags = data[addr + 5]
            p = addr + 6 + (16 if flags & 0x20 else 0) + (4 if flags & 0x10 else 0)
            width = 1 << (flags & 3)
            blocks = [(p + width, p + width + _uint(data, p, width))]
            order = 2 if flags & 0x04 else 0
            v2 = True
        elif data[addr] == 1:
            blocks = [(addr + 16, addr + 16 + _uint(data, addr + 8, 4))]
            v2, order = False, 0
        else:
            return None
        seen_blocks = 0
        while blocks:
            start, end = blocks.pop()
            seen_blocks += 1
            if end > size or start > end or seen_blocks > 1000:
                return None
            p = start
            head = 4 + order if v2 else 8
            while p + head <= end:
                if v2:
                    kind, length = data[p], _uint(data, p + 1, 2)
                else:
                    kind, length = _uint(data, p, 2), _uint(data, p + 2, 2)
                body = p + head
                if body + length > end:
                    return None
                if kind == 0x10:  # continuation
                    at, n = _uint(data, body, offsets), _uint(data, body + offsets, lengths)
                    at += _superblock(data, size)[0]
                    if v2:
                        if data[at:at + 4] != b"OCHK":
                            return None
                        blocks.append((at + 4, at + n - 4))
                    else:
                        blocks.append((at, at + n))
                elif kind == 0x0C:  # attribute
                    version = data[body]
                    name_size = _uint(data, body + 2, 2)
                    type_size = _uint(data, body + 4, 2)
                    space_size = _uint(data, body + 6, 2)
                    if version == 1:
                        def pad(k):
                            return (k + 7) // 8 * 8
                        name_at, first = body + 8, body + 8 + pad(name_size)
                        raw = first + pad(type_size) + pad(space_size)
                    elif version in (2, 3):
                        name_at = body + 8 + (version == 3)
                        raw = name_at + name_size + type_size + space_size
                    else:
                        return None
                    name = bytes(data[name_at:name_at + name_size]).split(b"\0")[0]
                    out[name.decode("utf-8", "replace")] = (raw, body + length)
                p = body + length
                if not v2:
                    p = start + (p - start + 7) // 8 * 8
        return out
    except (IndexError, ValueError):
        return None


def _check_descriptors(raw: bytes, n: int, item: int, heaps: dict, base: int) -> int | None:
    """Total string bytes of ``n`` variable-length descriptors of ``item`` bytes (length,
    heap collection address, object index); None if one points at no such string."""
    if n == 0:
        return 0
    if item < 12 or len(raw) < n * item:
        return None
    records = np.frombuffer(raw[:n * item], dtype=np.dtype(
        [("n", "<u4"), ("addr", f"<u{item - 8}"), ("index", "<u4")]))
    for length, addr, index in records.tolist():
        if length and heaps.get(addr + base, {}).get(index, -1) < length:
            return None
    return int(records["n"].sum(dtype=np.int64))


def _dtype_problem(dt: np.dtype) -> str | None:
    """Why a dtype is not one of the plain ones (real numbers, UTF-8/ASCII strings), or None."""
    if h5py.check_string_dtype(dt) is not None:
        return None
    if dt.fields is not None:
        return "a compound (record or complex) type"
    if dt.subdtype is not None:
        return "an array type"
    if h5py.check_vlen_dtype(dt) is not None:
        return "a variable-length sequence type"
    if h5py.check_ref_dtype(dt) is not None:
        return "a reference type"
    enum = h5py.check_enum_dtype(dt)
    if enum is not None and dt.kind != "b":
        return "an enumeration type"
    if dt.kind == "c":
        return "a complex type"
    if dt.kind not in "biuf" or dt.itemsize > 8:
        return f"type {dt}"
    return None


def _describe_bytes(n: float) -> str:
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= scale:
            return f"{n / scale:.3g} {unit}"
    return f"{int(n)} bytes"


def _vlen_lengths(path: Path, ds: h5py.Dataset, n: int, heaps: dict, base: int) -> int:
    """Total bytes of the strings a contiguous variable-length string dataset refers to.

    Each element is stored as a descriptor (length: 4 bytes, then the global-heap
    collection address and the object index); the descriptors are read straight
    from the file and each must name an object of a checked collection
    (:func:`global_heaps`) at least as long as the string, so that neither a
    bogus address nor elements aliasing one large object reach the HDF5 library.
    """
    offset = ds.id.get_offset()
    if offset is None or n == 0:
        return 0
    stored = ds.id.get_storage_size()  # on disk: 4 + address size + 4 bytes per element
    with open(path, "rb") as fh:
        fh.seek(offset)
        raw = fh.read(stored)
    total = _check_descriptors(raw, n, stored // n, heaps, base) \
        if stored % n == 0 and len(raw) == stored else None
    if total is None:
        raise InputError(f"{path}: dataset {ds.name} refers to string data that are not "
                         "there; the file is corrupt")
    return total


def inspect_h5(f: h5py.File, path: str | os.PathLike, what: str,
               heaps: dict[int, dict[int, int]] | None = None) -> H5Contents:
    """Check an open HDF5 file from its metadata before any dataset is read.

    Refused, each with a one-line message naming the object:
    external links and soft links (every object must be stored in this file
    under one name), objects reached twice (hard-link aliases and cycles),
    named types, virtual datasets, datasets in external raw files, dtypes
    other than real numbers and strings (compound, complex, enum, reference,
    opaque, array), datasets declaring more bytes than they store (compressed
    or sparse) or than the file holds, more than :data:`MAX_OBJECTS` objects,
    and string data adding up to more than the file's size. String
    attributes are read here, one at a time, to measure them.

    Returns
    -------
    H5Contents
        Every dataset's name, shape and dtype, for the format's layout checks.
    """
    path = Path(path)
    size = os.stat(path).st_size
    heaps = global_heaps(path) if heaps is None else heaps
    with open(path, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as data:
        base, offsets, lengths = _superblock(data, size)
        return _inspect(f, path, what, heaps, data, size, base, offsets, lengths)


def _inspect(f, path: Path, what: str, heaps: dict, data, size: int, base: int, offsets: int,
             lengths: int) -> H5Contents:
    datasets: dict[str, tuple[tuple[int, ...], np.dtype]] = {}
    seen: set[tuple] = set()
    totals = {"stored": 0, "strings": 0, "objects": 0}
    string_budget = size + (1 << 16)

    def fail(name: str, problem: str, fix: str = "") -> InputError:
        fix = fix or f"give a {what} written by this tool"
        return InputError(f"{path}: {name} {problem}; {fix}")

    def add_strings(name: str, nbytes: int) -> None:
        totals["strings"] += nbytes
        if totals["strings"] > string_budget:
            raise fail(name, f"brings the text stored in the file to "
                       f"{_describe_bytes(totals['strings'])}, more than the file's "
                       f"{_describe_bytes(size)} (strings that alias one another)")

    def check_attrs(obj, name: str) -> None:
        keys = list(obj.attrs.keys())
        if len(keys) > MAX_ATTRIBUTES:
            raise fail(name, f"has {len(keys)} attributes (at most {MAX_ATTRIBUTES})")
        header = None
        for key in keys:
            aid = h5py.h5a.open(obj.id, key.encode("utf-8"))
            label = f"attribute '{key}' of {name}"
            problem = _dtype_problem(aid.dtype)
            if problem:
                raise fail(label, f"has {problem}", "store plain numbers or UTF-8 text")
            shape = aid.shape or ()
            count = math.prod(shape)
            if h5py.check_string_dtype(aid.dtype) is not None:
                if count > MAX_STRING_ATTR_ELEMENTS:
                    raise fail(label, f"holds {count} strings (at most "
                               f"{MAX_STRING_ATTR_ELEMENTS})")
                if h5py.check_string_dtype(aid.dtype).length is None:
                    if header is None:
                        oid = obj["/"].id if isinstance(obj, h5py.File) else obj.id
                        header = _header_attributes(data, size, base + h5py.h5o.get_info(oid)
                                                    .addr, offsets, lengths) or {}
                    where = header.get(key)
                    if where is not None and _check_descriptors(
                            data[where[0]:where[1]], count, 8 + offsets, heaps, base) is None:
                        raise fail(label, "refers to string data that are not there",
                                   "the file is corrupt; restore or regenerate it")
                value = obj.attrs[key]
                texts = [value] if np.ndim(value) == 0 else list(np.ravel(value))
                add_strings(label, sum(len(t) for t in texts if isinstance(t, (str, bytes))))
            else:
                if count > MAX_ATTR_ELEMENTS:
                    raise fail(label, f"holds {count} numbers (at most {MAX_ATTR_ELEMENTS})")
                totals["stored"] += count * aid.dtype.itemsize

    def check_dataset(ds: h5py.Dataset, name: str) -> None:
        dcpl = ds.id.get_create_plist()
        layout = dcpl.get_layout()
        if layout == h5py.h5d.VIRTUAL:
            raise fail(f"dataset {name}", "is a virtual dataset (its data live in other files)",
                       "store the array itself in the file")
        if dcpl.get_external_count():
            raise fail(f"dataset {name}", "keeps its data in an external raw file "
                       f"({dcpl.get_external(0)[0].decode('utf-8', 'replace')!r})",
                       "store the array itself in the file")
        shape = ds.shape
        if shape is None:
            raise fail(f"dataset {name}", "has no dataspace (a null dataset)")
        problem = _dtype_problem(ds.dtype)
        if problem:
            raise fail(f"dataset {name}", f"has {problem}", "store plain numbers or UTF-8 text")
        count = math.prod(shape)
        item = ds.id.get_type().get_size()
        declared = count * item
        stored = ds.id.get_storage_size()
        if declared > size:
            raise fail(f"dataset {name}", f"declares shape {shape} ({_describe_bytes(declared)}) "
                       f"in a file of {_describe_bytes(size)}",
                       "the file is damaged or forged; regenerate it")
        if stored < declared:
            raise fail(f"dataset {name}", f"declares {_describe_bytes(declared)} but stores "
                       f"{_describe_bytes(stored)} (compressed, sparse or damaged)",
                       "store plain uncompressed arrays (h5py's default create_dataset)")
        offset = ds.id.get_offset() if layout == h5py.h5d.CONTIGUOUS else None
        if offset is not None and offset + stored > size:
            raise fail(f"dataset {name}", "lies beyond the end of the file",
                       "the file is truncated; regenerate it")
        totals["stored"] += stored
        if h5py.check_string_dtype(ds.dtype) is not None and \
                h5py.check_string_dtype(ds.dtype).length is None:
            if layout != h5py.h5d.CONTIGUOUS:
                raise fail(f"dataset {name}", "stores variable-length strings compact or in "
                           "chunks", "store string arrays contiguously (h5py's default)")
            add_strings(f"dataset {name}", _vlen_lengths(path, ds, count, heaps, base))
        datasets[name] = (tuple(int(s) for s in shape), ds.dtype)

    def visit(group: h5py.Group, prefix: str, depth: int) -> None:
        if depth > MAX_DEPTH:
            raise fail(f"group {prefix or '/'}", f"is nested deeper than {MAX_DEPTH} levels")
        for key in group:
            name = f"{prefix}{key}"
            kind = group.id.links.get_info(key.encode("utf-8")).type
            if kind != h5py.h5l.TYPE_HARD:
                link = group.get(key, getlink=True)
                if isinstance(link, h5py.ExternalLink):
                    raise fail(f"'{name}'", f"is an external link to {link.filename!r}",
                               "store the data in the file itself")
                if isinstance(link, h5py.SoftLink):
                    raise fail(f"'{name}'", f"is a soft link to {link.path!r}",
                               "store each object once, under its own name")
                raise fail(f"'{name}'", "is a user-defined link",
                           "store each object once, under its own name")
            obj = group[key]
            info = h5py.h5o.get_info(obj.id)
            ident = (info.fileno, info.addr)
            if ident in seen:
                raise fail(f"'{name}'", "names an object already reached under another name "
                           "(a hard-link alias or a cycle)",
                           "store each object once, under its own name")
            seen.add(ident)
            totals["objects"] += 1
            if totals["objects"] > MAX_OBJECTS:
                raise fail("the file", f"holds more than {MAX_OBJECTS} objects")
            check_attrs(obj, name)
            if isinstance(obj, h5py.Group):
                visit(obj, name + "/", depth + 1)
            elif isinstance(obj, h5py.Dataset):
                check_dataset(obj, name)
            else:
                raise fail(f"'{name}'", "is a named datatype", "store arrays and groups only")

    check_attrs(f, "the root group")
    visit(f, "", 1)
    if totals["stored"] > size:
        raise InputError(f"{path}: the datasets declare {_describe_bytes(totals['stored'])} in "
                         f"a file of {_describe_bytes(size)} (overlapping or forged storage); "
                         "regenerate the file")
    return H5Contents(datasets, size)


def _short(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {' '.join(str(exc).split())[:120]}"


@contextmanager
def open_checked(path: str | os.PathLike, what: str, fix: str
                 ) -> Iterator[tuple[h5py.File, H5Contents]]:
    """Open an HDF5 input for reading after checking it; yields ``(file, contents)``.

    The path must be a readable regular file (:func:`schedule.paths.input_file`)
    starting with the HDF5 signature; the structure is then checked by
    :func:`inspect_h5` before the caller reads anything. Any h5py failure, now
    or while the caller reads, becomes a one-line InputError naming the file
    and ``fix``.
    """
    from .paths import input_file

    path = input_file(path, what, fix)
    size = os.stat(path).st_size
    if size == 0 or not _signature_at(path, size):
        raise InputError(f"{path} is not an HDF5 file{' (it is empty)' if size == 0 else ''}; "
                         f"give a {what}")
    try:
        heaps = global_heaps(path)
    except InputError as exc:
        raise InputError(f"{exc}; {fix}") from None
    try:
        f = h5py.File(path, "r")
    except Exception as exc:  # h5py raises OSError, KeyError, RuntimeError... on damage
        raise InputError(f"{path} is corrupt or truncated ({_short(exc)}); {fix}") from None
    with f:
        try:
            contents = inspect_h5(f, path, what, heaps)
        except ScheduleError:
            raise
        except Exception as exc:
            raise InputError(f"{path} is corrupt or truncated ({_short(exc)}); {fix}") from None
        try:
            yield f, contents
        except ScheduleError:
            raise
        except (OSError, KeyError, RuntimeError, ValueError, TypeError, IndexError,
                UnicodeDecodeError) as exc:
            raise InputError(f"{path} is corrupt or truncated ({_short(exc)}); {fix}") from None


def _describe(value) -> str:
    if value is None:
        return "missing"
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    if isinstance(value, str):
        return f"the string {value[:40]!r}"
    if isinstance(value, (bool, np.bool_)):
        return f"the boolean {bool(value)}"
    if isinstance(value, np.ndarray) and value.ndim > 0:
        return f"an array of shape {value.shape}"
    if isinstance(value, (int, np.integer)):
        return f"the integer {int(value)}"
    if isinstance(value, (float, np.floating)):
        return f"the number {float(value):g}"
    return f"a value of type {type(value).__name__}"


def check_format(f: h5py.File, path: str | os.PathLike, name: str, version: int, what: str,
                 fix: str) -> None:
    """The root attributes ``format`` (the string ``name``) and ``format_version`` (``version``).

    Raises
    ------
    InputError
        Naming what the attribute holds instead: a string version ``"1"`` is
        reported as a string, not as "version 1".
    """
    fmt = f.attrs.get("format")
    text = fmt.decode("utf-8", "replace") if isinstance(fmt, bytes) else fmt
    if not isinstance(text, str) or text != name:
        raise InputError(f"{path} is not a {what} (attribute 'format' is {_describe(fmt)}, "
                         f"expected the string '{name}'); {fix}")
    v = f.attrs.get("format_version")
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer)):
        raise InputError(f"{path}: attribute 'format_version' is {_describe(v)}, expected the "
                         f"integer {version}; {fix}")
    if int(v) != version:
        raise InputError(f"{path} has {what} format version {int(v)}; this tool reads version "
                         f"{version}; {fix}")


def expect(contents: H5Contents, path: str | os.PathLike, name: str, kind: str,
           shape: Sequence[int | None], label: str, required: bool = True
           ) -> tuple[int, ...] | None:
    """Check one dataset's dtype kind and shape from the metadata; return its shape.

    Parameters
    ----------
    kind : "number" (real numbers) or "string".
    shape : expected shape; ``None`` entries are free (their value is returned).
    label : the expected shape in words for the message, e.g. "(N, n, n)".
    required : when False a missing dataset returns None.
    """
    if name not in contents.datasets:
        if not required:
            return None
        raise InputError(f"{path}: dataset {name} is missing; the file is incomplete")
    actual, dtype = contents.datasets[name]
    is_string = h5py.check_string_dtype(dtype) is not None
    if kind == "string" and not is_string:
        raise InputError(f"{path}: dataset {name} holds {dtype} values, expected text")
    if kind == "number" and is_string:
        raise InputError(f"{path}: dataset {name} holds text, expected numbers")
    if len(actual) != len(shape) or any(e is not None and a != e
                                         for a, e in zip(actual, shape, strict=True)):
        raise InputError(f"{path}: dataset {name} has shape {actual}, expected {label}")
    return actual
