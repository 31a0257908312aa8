"""Checked reading of the attributes and datasets of a Keras HDF5 file, with the HDF5 library
kept at arm's length (links are walked by :class:`~steelyard.loaders.keras.h5_file.H5File`).

Every dataset is checked (dtype, storage, size caps) before it is touched. The HDF5 C library
can also loop forever on damaged structures (a zero-sized global-heap object is enough), which
no Python timeout interrupts: so every HDF5 call runs in a child process with a time limit
(:func:`steelyard.loaders.sandbox.isolated`, :func:`load_timeout`). Tensors Keras stores
contiguously are then read without HDF5 at all, as bounded byte ranges at the offsets the
library reported.

Budgets (:mod:`steelyard.budget`): a dataset's claimed bytes (shape × itemsize) are compared
with the bytes the file stores for it (``get_storage_size``) before anything is read, so a
fill value or compressed chunks cannot expand beyond the per-object budget, and the
expansion of every dataset is charged to the checkpoint's :class:`~steelyard.budget.Ledger`.
A chunked dataset is decompressed once per run, in row bands aligned to its chunks, into the
spill folder (:mod:`steelyard.loaders.spill`), and memory-mapped from there. Every walk of
groups keeps a visited set of object addresses: a second hard link to an object (a cycle or
an alias, which Keras never writes) is refused, so no walk can explode.
"""

from __future__ import annotations

import contextlib
import math
import mmap
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from steelyard import budget
from steelyard.dtypes import FLOAT_DTYPES, name_of
from steelyard.errors import LoadError
from steelyard.graph import Tensor, TensorRole
from steelyard.loaders.base import MAX_METADATA_BYTES
from steelyard.loaders.keras.config_values import MAX_DEPTH, natural_key
from steelyard.loaders.keras.h5_file import H5_ERRORS, MAX_NODES, H5File, Location, reason
from steelyard.loaders.sandbox import isolated
from steelyard.loaders.spill import spilled

#: Largest tensor we agree to decode (bounded memory on hostile shapes).
MAX_TENSOR_BYTES = 1 << 34
#: A filtered (compressed) dataset may expand this much over its stored bytes…
MAX_EXPANSION = 1000
#: …and any dataset up to this size is allowed regardless.
SMALL_DATASET = 1 << 20


MAX_ATTR_ELEMENTS = 1_000_000


#: Share of the structure time budget (``budget.load_seconds``, 60 s by default) the HDF5
#: sandbox may take to read a file's structure: 5 s by default, which is 1000 times what a
#: real file needs (a few ms) and keeps a stuck library refused within the 20 s promise
#: (interpreter start, imports and the fork take 1-3 s more on an idle machine; the hostile
#: cases measured 10-13 s in all on a 2-core runner at load 6).
LOAD_SHARE = 1 / 12
#: Tests set a fixed number of seconds here; None means derived from the budget.
LOAD_TIMEOUT: float | None = None
#: A read of one chunked dataset may take the structure timeout plus one second per 20 MB.
READ_RATE = 20e6
#: Bytes the sandbox decompresses per step when reading a chunked dataset.
BLOCK_BYTES = 16 << 20


def load_timeout() -> float:
    """Seconds the HDF5 sandbox may spend on a file's structure (see :data:`LOAD_SHARE`)."""
    if LOAD_TIMEOUT is not None:
        return LOAD_TIMEOUT
    return max(1.0, budget.current().load_seconds * LOAD_SHARE)


@contextlib.contextmanager
def _bounded(path: Path, what: str) -> Iterator[None]:
    """Running out of memory or stack while reading becomes one LoadError line."""
    try:
        yield
    except (MemoryError, RecursionError) as exc:
        raise LoadError(path, f"{what} is too large to read ({type(exc).__name__})") from None


def _dtype(tag: str) -> np.dtype[Any]:
    return FLOAT_DTYPES["bf16"] if tag == "bf16" else np.dtype(tag)


@dataclass(frozen=True)
class _Dataset:
    """What every dataset reader knows: the shape and the stored dtype tag (``bf16`` or a
    numpy dtype string); readers return arrays in native byte order."""

    shape: tuple[int, ...]
    dtype: str

    @property
    def nbytes(self) -> int:
        """Bytes of the whole dataset."""
        return math.prod(self.shape) * _dtype(self.dtype).itemsize

    def decode(self, data: bytes) -> np.ndarray:
        """The dataset's stored bytes as an array, in native byte order."""
        dtype = _dtype(self.dtype)
        array = np.frombuffer(data, dtype=dtype).reshape(self.shape)
        return array.astype(dtype.newbyteorder("="), copy=False)


@dataclass(frozen=True)
class RawReader(_Dataset):
    """A contiguous dataset read as a plain byte range (no HDF5 involved)."""

    location: Location
    offset: int
    name: str

    def __call__(self) -> np.ndarray:
        what = f"dataset {self.name!r}"
        with _bounded(self.location.path, what):
            return self.decode(self.location.read(self.offset, self.nbytes, what))


@dataclass(frozen=True)
class InlineReader(_Dataset):
    """A small dataset kept in its object header (compact layout), copied at load time."""

    data: bytes

    def __call__(self) -> np.ndarray:
        return self.decode(self.data)


def _band_rows(obj: Any, shape: tuple[int, ...], itemsize: int) -> int:
    """Rows per read: about :data:`BLOCK_BYTES`, a whole number of chunk rows, so that each
    chunk is decompressed once (a band that cut through chunks would decompress them again
    for every band)."""
    row_bytes = max(1, math.prod(shape[1:]) * itemsize)
    chunks = obj.chunks
    chunk_rows = max(1, int(chunks[0])) if chunks else 1
    bands = max(1, BLOCK_BYTES // (row_bytes * chunk_rows))
    return bands * chunk_rows


def _read_dataset_into(
    location: Location, path: str, shape: tuple[int, ...], source: Path, target: Path
) -> int:
    """Decode the dataset at ``path`` into the file ``target`` in native byte order, one row
    band at a time (runs inside :func:`isolated`); returns the bytes written."""
    store = H5Store(source, location)
    written = 0
    with store.open() as f, open(target, "wb") as out:
        obj = store.resolve(f, path)
        now, _, dtype = store.check_dataset(obj, path)
        if now != shape:
            raise store.fail(f"dataset {path!r} changed shape since it was listed")
        step = _band_rows(obj, shape, dtype.itemsize) if shape else 1
        for start in range(0, shape[0] if shape else 1, step):
            want = (min(step, shape[0] - start), *shape[1:]) if shape else ()
            try:
                raw = np.asarray(obj[start : start + step] if shape else obj[()])
            except H5_ERRORS as exc:
                raise store.fail(f"dataset {path!r} cannot be read ({reason(exc)})") from None
            if raw.dtype.kind == "V":
                raw = raw.view(FLOAT_DTYPES["bf16"])
            if raw.shape != want:
                raise store.fail(f"dataset {path!r} read as shape {raw.shape}, not {want}")
            block = np.ascontiguousarray(raw.astype(dtype, copy=False))
            out.write(block.tobytes())  # one band: bounded
            written += block.nbytes
    return written


@dataclass(frozen=True)
class IsolatedReader(_Dataset):
    """A chunked (possibly compressed) dataset: decoded once per run by h5py in a child
    process, in row bands, into the spill folder; every read maps that file."""

    location: Location
    path: str
    source: Path

    def __call__(self) -> np.ndarray:
        with _bounded(self.source, f"dataset {self.path!r}"):
            dtype = _dtype(self.dtype).newbyteorder("=")
            size = self.nbytes
            timeout = load_timeout() + size / READ_RATE

            def fill(target: Path) -> None:
                args = (self.location, self.path, self.shape, self.source, target)
                written = isolated(self.source, _read_dataset_into, args, timeout)
                if written != size or target.stat().st_size != size:
                    raise LoadError(self.source, f"dataset {self.path!r} did not read whole")

            key = ("h5", str(self.location.data_path), self.location.start, self.path)
            target = spilled(key, fill)
            with open(target, "rb") as handle:
                mapped = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
            return np.frombuffer(mapped, dtype=dtype, count=math.prod(self.shape)).reshape(
                self.shape
            )


# --------------------------------------------------------------------------------------------
# Checked attributes and datasets (inside the child)


class H5Store(H5File):
    """Checked access to one HDF5 weights file at ``location``: its links (:class:`H5File`),
    attributes and datasets.

    ``source`` is the file named in errors (the ``.h5`` or the ``.keras`` archive). No
    dataset's storage may exceed the HDF5 file's size.
    """

    def __init__(self, source: Path, location: Location, spent: int = 0) -> None:
        super().__init__(source, location)
        self.limit = location.length
        #: Expansion of this checkpoint; ``spent`` is what the caller already inflated for it
        #: (a ``.keras`` archive's compressed weights member).
        self.ledger = budget.Ledger(source)
        self.ledger.spent = spent
        #: Object addresses of the datasets already made into tensors.
        self._tensors: dict[int, str] = {}

    # -- attributes -----------------------------------------------------------------------

    def _attr(self, obj: Any, key: str) -> Any:
        if key not in obj.attrs:
            return None
        attr = h5py.h5a.open(obj.id, key.encode("utf-8"))
        shape = attr.shape or ()
        try:
            stored = int(attr.get_storage_size())
        except H5_ERRORS:
            stored = 0  # h5py reports an empty attribute's zero size as an error
        if math.prod(shape) > MAX_ATTR_ELEMENTS or stored > MAX_METADATA_BYTES:
            raise self.fail(f"HDF5 attribute {key!r} is larger than the cap")
        return obj.attrs[key]

    def attr_text(self, obj: Any, key: str) -> str | None:
        """A string attribute (bytes decoded), None when absent."""
        value = self._attr(obj, key)
        if value is None:
            return None
        if isinstance(value, np.ndarray) and value.shape == ():
            value = value[()]
        if isinstance(value, bytes):
            try:
                return value.decode("utf-8")
            except UnicodeDecodeError:
                raise self.fail(f"HDF5 attribute {key!r} is not UTF-8 text") from None
        if isinstance(value, str):
            return value
        raise self.fail(f"HDF5 attribute {key!r} is not text")

    def attr_strings(self, obj: Any, key: str) -> list[str] | None:
        """A list-of-strings attribute (``layer_names``, ``weight_names``), None when absent."""
        value = self._attr(obj, key)
        if value is None:
            return None
        items = value.reshape(-1).tolist() if isinstance(value, np.ndarray) else [value]
        out: list[str] = []
        for item in items:
            if isinstance(item, bytes):
                try:
                    item = item.decode("utf-8")
                except UnicodeDecodeError:
                    raise self.fail(f"HDF5 attribute {key!r} holds non-UTF-8 names") from None
            if not isinstance(item, str):
                if isinstance(value, np.ndarray) and value.size == 0:
                    break
                raise self.fail(f"HDF5 attribute {key!r} holds a non-string {item!r}")
            out.append(item)
        return out

    # -- datasets -------------------------------------------------------------------------

    def check_dataset(self, obj: Any, path: str) -> tuple[tuple[int, ...], str, np.dtype[Any]]:
        """Shape, short dtype name and numpy dtype of a dataset we agree to read."""
        if not isinstance(obj, h5py.Dataset):
            raise self.fail(f"HDF5 object {path!r} is not a dataset")
        if obj.is_virtual:
            raise self.fail(f"dataset {path!r} is a virtual dataset (refused)")
        if obj.external:
            raise self.fail(f"dataset {path!r} keeps its data in external files (refused)")
        shape = obj.shape
        if shape is None:
            raise self.fail(f"dataset {path!r} has no dataspace")
        shape = tuple(int(d) for d in shape)
        stored = obj.dtype
        numeric = (stored.kind == "f" and stored.itemsize in (2, 4, 8)) or (
            stored.kind in "iub" and stored.itemsize in (1, 2, 4, 8)
        )
        if numeric and stored.fields is None:
            dtype = stored
        elif stored.kind == "V" and stored.itemsize == 2 and stored.fields is None:
            # Keras 3 stores bfloat16 as 2-byte opaque data tagged with a dtype attribute.
            if self.attr_text(obj, "dtype") != "bfloat16":
                raise self.fail(f"dataset {path!r} holds opaque data, not numbers")
            dtype = FLOAT_DTYPES["bf16"]
        else:
            raise self.fail(f"dataset {path!r} has unsupported dtype {stored}")
        budget.check_elements(self.source, shape, f"dataset {path!r}")
        declared = math.prod(shape) * dtype.itemsize
        storage = int(obj.id.get_storage_size())
        filtered = obj.id.get_create_plist().get_nfilters() > 0
        if declared > MAX_TENSOR_BYTES:
            raise self.fail(f"dataset {path!r} declares {declared} bytes, over the cap")
        if storage > self.limit:
            raise self.fail(
                f"dataset {path!r} claims {storage} stored bytes, more than the file holds"
            )
        allowed = storage * (MAX_EXPANSION if filtered else 1)
        if declared > max(allowed, 0) and declared > (SMALL_DATASET if filtered else 0):
            raise self.fail(
                f"dataset {path!r} declares {declared} bytes but stores {storage} (refused)"
            )
        # Absolute, beyond the ratio above: a fill value or well-compressed chunks may not add
        # more than the expansion budget to what the file stores.
        budget.check_expansion(self.source, declared, storage, f"dataset {path!r}")
        return shape, name_of(dtype), dtype.newbyteorder("=")

    def tensor(self, f: Any, path: str, name: str, role: TensorRole | None = None) -> Tensor:
        """A lazily read tensor for the dataset at ``path``, checked now."""
        obj = self.resolve(f, path)
        shape, short, dtype = self.check_dataset(obj, path)
        address = self.address(obj)
        first = self._tensors.setdefault(address, path)
        if first != path:
            raise self.fail(
                f"HDF5 dataset {path!r} is another hard link to {first!r} (refused: Keras "
                "never stores a variable twice)"
            )
        expansion = math.prod(shape) * dtype.itemsize - int(obj.id.get_storage_size())
        self.ledger.charge(max(0, expansion), f"dataset {path!r}")
        is_float = dtype.kind == "f" or short == "bf16"
        if role is None:
            role = TensorRole.PARAMETER if is_float else TensorRole.BOOKKEEPING
        return Tensor(
            name=name, shape=shape, dtype=short, role=role, reader=self._reader(obj, path, shape)
        )

    def _reader(self, obj: Any, path: str, shape: tuple[int, ...]) -> Callable[[], np.ndarray]:
        stored = obj.dtype
        tag = "bf16" if stored.kind == "V" else stored.str
        size = math.prod(shape) * stored.itemsize
        layout = obj.id.get_create_plist().get_layout()
        if size == 0:
            return InlineReader(shape, tag, b"")
        if layout == h5py.h5d.CONTIGUOUS:
            offset = obj.id.get_offset()
            if offset is None:
                raise self.fail(f"dataset {path!r} has no stored data")
            offset = int(offset)
            if offset + size > self.limit:
                raise self.fail(f"dataset {path!r} claims data past the end of the file")
            return RawReader(shape, tag, self.location, offset, path)
        if layout == h5py.h5d.COMPACT:
            try:
                data = np.ascontiguousarray(obj[()]).tobytes()
            except H5_ERRORS as exc:
                raise self.fail(f"dataset {path!r} cannot be read ({reason(exc)})") from None
            if len(data) != size:
                raise self.fail(f"dataset {path!r} holds {len(data)} bytes, not {size}")
            return InlineReader(shape, tag, data)
        return IsolatedReader(shape, tag, self.location, path, self.source)

    def datasets(self, f: Any, top: str) -> list[str]:
        """Every dataset path under group ``top``, natural order (``vars/10`` after ``vars/9``).

        Soft links are refused here: Keras never writes them, and listing through them could
        alias or loop."""
        out: list[str] = []
        left = [MAX_NODES]
        seen: dict[int, str] = {}

        def walk(group: Any, prefix: str, depth: int) -> None:
            if depth > MAX_DEPTH:
                raise self.fail(f"HDF5 groups under {prefix!r} nest too deeply")
            names = list(group.keys())
            left[0] -= len(names)
            if left[0] < 0:
                raise self.fail(f"has more than {MAX_NODES} HDF5 objects")
            self.count(len(names), prefix)
            for name in sorted(names, key=natural_key):
                where = f"{prefix}/{name}" if prefix else name
                self._parts(where)
                link = self.link(group, name, where)
                if isinstance(link, h5py.SoftLink):
                    raise self.fail(f"HDF5 object {where!r} is a soft link (refused)")
                child = group[name]
                first = seen.setdefault(self.address(child), where)
                if first != where:
                    raise self.fail(
                        f"HDF5 object {where!r} is another hard link to {first!r} (refused: "
                        "links that loop or alias are never written by Keras)"
                    )
                if isinstance(child, h5py.Group):
                    walk(child, where, depth + 1)
                elif isinstance(child, h5py.Dataset):
                    out.append(where)
                else:
                    raise self.fail(f"HDF5 object {where!r} is neither group nor dataset")

        node = self.resolve(f, top)
        if isinstance(node, h5py.Dataset):
            return [top]
        seen[self.address(node)] = top
        walk(node, top, 0)
        return out
