"""Constant look-through: the stored tensor behind an op input, and how to view it.

Exporters rarely wire an initializer straight into the op that uses it: a weight may pass
through Identity, Cast, Transpose, Reshape, (Un)Squeeze, Flatten, Slice and Concat, or a
DequantizeLinear, first. :class:`Folder` follows such chains back to stored tensors and
returns a :class:`View` whose reader applies the same ops lazily, so a layer sees exactly the
array the runtime would compute, while reports still name the stored tensor.

Folding is budgeted before anything is computed (see :mod:`steelyard.budget`). Each view
knows its element count, the distinct stored elements it is made of, and the elements one read
of it materialises (a constant read twice by a Concat is computed twice). A view is refused
when its size exceeds what it stores by more than the per-object expansion budget (a chain of
``Concat(c, c)`` doubles a small initializer into gigabytes), or when one read would compute
far more than its size (shared constants recomputed along a diamond chain); what each fold
adds beyond its inputs is charged to the checkpoint's :class:`~steelyard.budget.Ledger`. A
chain longer than :data:`MAX_CHAIN` ops is not followed (the value is treated as computed at
run time), which keeps every view's op list and reader nesting short.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from steelyard import budget
from steelyard.errors import LoadError
from steelyard.loaders.onnx.stored import DType, Node, Stored, dtype_of

#: Longest chain of look-through ops followed back from one input.
MAX_CHAIN = 64
#: One read of a folded constant may compute this many times its size (a Cast of a
#: dequantized weight computes it twice) before the per-object expansion budget applies.
WORK_COPIES = 4
#: Stored-tensor references all Concat folds of one model may gather (each Concat lists the
#: distinct tensors of its parts; nested Concats of many parts would otherwise be quadratic).
MAX_SOURCE_REFS = 4_000_000
#: Most elements a shape/axes/starts constant may have before we stop reading it at load time.
SMALL = 64


@dataclass(frozen=True)
class View:
    """A constant as an op sees it, built from stored tensors."""

    source: str
    """The stored tensor it comes from (the first one, for a Concat)."""
    shape: tuple[int, ...]
    dtype: DType
    read: Callable[[], np.ndarray] = field(repr=False)
    """The array in the op's orientation (stored dtype unless a Cast or dequantization)."""
    sources: tuple[str, ...] = ()
    """Every stored tensor whose values become the view's values."""
    aux: tuple[str, ...] = ()
    """Stored tensors read only to decode them (quantization scales and zero points)."""
    via: tuple[str, ...] = ()
    """Ops looked through, nearest the stored tensor first."""
    quantized: bool = False
    """True when a DequantizeLinear was looked through."""
    stored_elements: int = -1
    """Distinct stored elements the view is made of (-1: the view's own size)."""
    work: int = 0
    """Elements one read materialises beyond the stored bytes, counting repeated reads."""
    depth: int = 0
    """Ops on the longest path back to a stored tensor."""

    @property
    def elements(self) -> int:
        """Elements of the view."""
        return math.prod(self.shape)

    @property
    def stored(self) -> int:
        """Distinct stored elements behind the view."""
        return self.elements if self.stored_elements < 0 else self.stored_elements

    @property
    def expansion(self) -> int:
        """Bytes of the view beyond the stored elements it is made of (repeats, broadcasts)."""
        return max(0, self.elements - self.stored) * self.dtype.np.itemsize


Dequantize = Callable[["Folder", Node], "View | None"]


class Folder:
    """Resolves value keys to constant :class:`View` objects (memoised)."""

    def __init__(
        self,
        stored: Mapping[str, Stored],
        producer: Mapping[str, tuple[Node, int]],
        path: Path,
        dequantize: Dequantize | None = None,
        invariant: Mapping[str, str] | None = None,
        ledger: budget.Ledger | None = None,
    ) -> None:
        self.stored = stored
        self.producer = producer
        self.path = path
        self._dequantize = dequantize
        self.invariant: Mapping[str, str] = invariant or {}
        """Loop/Scan body input → the outer value it holds in every iteration."""
        self._memo: dict[str, View | None] = {}
        self._active: set[str] = set()
        self.ledger = ledger if ledger is not None else budget.Ledger(path)
        self.source_refs = 0
        """Stored-tensor references gathered by Concat folds so far (see MAX_SOURCE_REFS)."""

    def fold(self, key: str) -> View | None:
        """The constant behind value ``key``, or None when it is computed at run time."""
        if not key:
            return None
        if key in self._memo:
            return self._memo[key]
        if key in self._active or len(self._active) >= MAX_CHAIN:
            return None  # a cycle (hostile file) or an absurdly long chain
        self._active.add(key)
        try:
            view = self._fold(key)
            if view is not None and view.depth > MAX_CHAIN:
                view = None  # too long a chain to follow: treated as computed at run time
            if view is not None and view.via:
                self._admit(key, view)
        finally:
            self._active.discard(key)
        self._memo[key] = view
        return view

    def _admit(self, key: str, view: View) -> None:
        """Refuse a folded view that claims too much, before any of it is computed, and
        charge what it adds beyond its inputs to the checkpoint's ledger."""
        what = f"constant {key!r} folded through {view.via[-1]}"
        itemsize = view.dtype.np.itemsize
        budget.check_expansion(self.path, view.elements * itemsize, view.stored * itemsize, what)
        budget.check_expansion(
            self.path,
            view.work * itemsize,
            WORK_COPIES * max(view.elements, view.stored) * itemsize,
            f"reading {what}",
        )
        own = view.expansion - sum(
            v.expansion for v in {id(v): v for v in self._inputs(key)}.values()
        )
        if own > 0:
            self.ledger.charge(own, what)

    def _inputs(self, key: str) -> list[View]:
        """The already folded views the producer of ``key`` read (memoised, so free)."""
        found = self.producer.get(key)
        if found is None:
            return []
        views = (self._memo.get(k) for k in found[0].inputs if k)
        return [v for v in views if v is not None]

    def is_const(self, key: str) -> bool:
        """True when ``key`` is a constant."""
        return self.fold(key) is not None

    def ints(self, key: str, limit: int = SMALL) -> list[int] | None:
        """A small integer constant (shape, axes…) as a list, read now; None otherwise."""
        view = self.fold(key)
        if view is None or view.dtype.is_float or len(view.shape) > 1:
            return None
        if math.prod(view.shape) > limit or view.dtype.code in (14, 15):
            return None
        return [int(v) for v in np.asarray(view.read()).reshape(-1).tolist()]

    def scalar(self, key: str) -> float | None:
        """A one-element numeric constant as a float, read now; None otherwise."""
        view = self.fold(key)
        if view is None or math.prod(view.shape) != 1 or view.dtype.code in (14, 15):
            return None
        return float(np.asarray(view.read(), dtype=np.float64).reshape(-1)[0])

    def _fold(self, key: str) -> View | None:
        stored = self.stored.get(key)
        if stored is not None:
            return View(stored.key, stored.shape, stored.dtype, stored.reader, (stored.key,))
        found = self.producer.get(key)
        if found is None:
            outer = self.invariant.get(key)
            # A loop-invariant state is its initial value: a constant when that is one.
            return self.fold(outer) if outer else None
        node, _ = found
        if node.op == "DequantizeLinear" and node.domain in ("", "ai.onnx", "com.microsoft"):
            return self._dequantize(self, node) if self._dequantize else None
        if not node.standard or len(node.outputs) != 1:
            return None
        handler = _OPS.get(node.op)
        if handler is None:
            return None
        if node.op == "Concat":
            return _concat(self, node)
        base = self.fold(node.input(0))
        if base is None:
            return None
        return handler(self, node, base)


def _derive(
    base: View,
    op: str,
    shape: tuple[int, ...],
    transform: Callable[[np.ndarray], np.ndarray],
    dtype: DType | None = None,
) -> View:
    reader = base.read

    def read() -> np.ndarray:
        return transform(reader())

    elements = math.prod(shape)
    # Identity-like reorderings are numpy views; anything else may copy: count it.
    copies = op in ("Cast", "Transpose")
    return View(
        base.source,
        shape,
        dtype or base.dtype,
        read,
        base.sources,
        base.aux,
        (*base.via, op),
        base.quantized,
        base.stored,
        base.work + (elements if copies else 0),
        base.depth + 1,
    )


def _identity(folder: Folder, node: Node, base: View) -> View | None:
    return base


def _cast(folder: Folder, node: Node, base: View) -> View | None:
    target = dtype_of(node.get_int("to", 0))
    if target is None or base.dtype.code in (14, 15):
        return None
    return _derive(base, "Cast", base.shape, lambda a: np.asarray(a).astype(target.np), target)


def _transpose(folder: Folder, node: Node, base: View) -> View | None:
    rank = len(base.shape)
    perm = node.get_ints("perm")
    perm = list(range(rank))[::-1] if perm is None else perm
    if sorted(perm) != list(range(rank)):
        return None
    shape = tuple(base.shape[p] for p in perm)
    order = tuple(perm)
    return _derive(base, "Transpose", shape, lambda a: np.transpose(a, order))


def _reshape(folder: Folder, node: Node, base: View) -> View | None:
    target = folder.ints(node.input(1)) if node.input(1) else node.get_ints("shape")
    if target is None:
        return None
    allow_zero = node.get_int("allowzero", 0) == 1
    dims: list[int] = []
    for position, size in enumerate(target):
        if size == 0 and not allow_zero:
            if position >= len(base.shape):
                return None
            dims.append(base.shape[position])
        else:
            dims.append(size)
    if dims.count(-1) > 1 or any(d < -1 for d in dims):
        return None
    total = math.prod(base.shape)
    if -1 in dims:
        known = math.prod(d for d in dims if d != -1)
        if known == 0 or total % known:
            return None
        dims[dims.index(-1)] = total // known
    if math.prod(dims) != total:
        return None
    shape = tuple(dims)
    return _derive(base, "Reshape", shape, lambda a: np.reshape(a, shape))


def _flatten(folder: Folder, node: Node, base: View) -> View | None:
    rank = len(base.shape)
    axis = node.get_int("axis", 1)
    axis = axis + rank if axis < 0 else axis
    if not 0 <= axis <= rank:
        return None
    shape = (math.prod(base.shape[:axis]), math.prod(base.shape[axis:]))
    return _derive(base, "Flatten", shape, lambda a: np.reshape(a, shape))


def _axes(folder: Folder, node: Node) -> tuple[bool, list[int] | None]:
    """(known, axes) from input 1 (opset 13+) or the attribute (None: attribute absent)."""
    if node.input(1):
        axes = folder.ints(node.input(1))
        return axes is not None, axes
    return True, node.get_ints("axes")


def _squeeze(folder: Folder, node: Node, base: View) -> View | None:
    rank = len(base.shape)
    known, axes = _axes(folder, node)
    if not known:
        return None
    if axes is None:
        drop = {i for i, d in enumerate(base.shape) if d == 1}
    else:
        drop = {a + rank if a < 0 else a for a in axes}
        if any(not 0 <= a < rank or base.shape[a] != 1 for a in drop):
            return None
    shape = tuple(d for i, d in enumerate(base.shape) if i not in drop)
    return _derive(base, "Squeeze", shape, lambda a: np.reshape(a, shape))


def _unsqueeze(folder: Folder, node: Node, base: View) -> View | None:
    known, axes = _axes(folder, node)
    if not known or axes is None:
        return None
    rank = len(base.shape) + len(axes)
    wanted = {a + rank if a < 0 else a for a in axes}
    if len(wanted) != len(axes) or any(not 0 <= a < rank for a in wanted):
        return None
    dims = iter(base.shape)
    shape = tuple(1 if i in wanted else next(dims) for i in range(rank))
    return _derive(base, "Unsqueeze", shape, lambda a: np.reshape(a, shape))


def _slice(folder: Folder, node: Node, base: View) -> View | None:
    rank = len(base.shape)
    if node.input(1):
        starts, ends = folder.ints(node.input(1)), folder.ints(node.input(2))
        axes = folder.ints(node.input(3)) if node.input(3) else list(range(rank))
        steps = folder.ints(node.input(4)) if node.input(4) else None
    else:  # opset 1-9 kept them as attributes
        starts, ends = node.get_ints("starts"), node.get_ints("ends")
        axes = node.get_ints("axes") or list(range(rank))
        steps = None
    if starts is None or ends is None or axes is None:
        return None
    steps = steps if steps is not None else [1] * len(starts)
    if not len(starts) == len(ends) == len(steps) <= len(axes) or 0 in steps:
        return None
    index: list[slice] = [slice(None)] * rank
    shape = list(base.shape)
    for start, end, axis, step in zip(starts, ends, axes, steps, strict=False):
        axis = axis + rank if axis < 0 else axis
        if not 0 <= axis < rank:
            return None
        dim = base.shape[axis]
        start = start + dim if start < 0 else start
        end = end + dim if end < 0 else end
        if step > 0:
            start, end = min(max(start, 0), dim), min(max(end, 0), dim)
        else:
            start, end = min(max(start, 0), dim - 1), min(max(end, -1), dim - 1)
        index[axis] = slice(start, end if end >= 0 else None, step)
        shape[axis] = len(range(start, end, step))
    key = tuple(index)
    return _derive(base, "Slice", tuple(shape), lambda a: np.asarray(a)[key])


def _concat(folder: Folder, node: Node) -> View | None:
    parts = [folder.fold(k) for k in node.inputs if k]
    if not parts or any(p is None for p in parts):
        return None
    views = [p for p in parts if p is not None]
    rank = len(views[0].shape)
    axis = node.get_int("axis", 0)
    axis = axis + rank if axis < 0 else axis
    if not 0 <= axis < rank or any(len(v.shape) != rank for v in views):
        return None
    for view in views[1:]:
        if (
            any(
                a != b
                for i, (a, b) in enumerate(zip(view.shape, views[0].shape, strict=True))
                if i != axis
            )
            or view.dtype != views[0].dtype
        ):
            return None
    shape = list(views[0].shape)
    shape[axis] = sum(v.shape[axis] for v in views)
    readers = [v.read for v in views]

    def read() -> np.ndarray:
        return np.concatenate([r() for r in readers], axis=axis)

    folder.source_refs += sum(len(v.sources) + len(v.aux) for v in views)
    if folder.source_refs > MAX_SOURCE_REFS:
        raise LoadError(
            folder.path,
            f"Concat constants refer to stored tensors more than {MAX_SOURCE_REFS:,} times "
            "in all; too many to fold",
        )
    sources = tuple(dict.fromkeys(s for v in views for s in v.sources))
    aux = tuple(dict.fromkeys(s for v in views for s in v.aux))
    stored = sum(math.prod(folder.stored[s].shape) if s in folder.stored else 0 for s in sources)
    return View(
        views[0].source,
        tuple(shape),
        views[0].dtype,
        read,
        sources,
        aux,
        (*views[0].via, "Concat"),
        any(v.quantized for v in views),
        stored,
        sum(v.work for v in views) + math.prod(shape),
        max(v.depth for v in views) + 1,
    )


_OPS: dict[str, Callable[[Folder, Node, View], View | None]] = {
    "Identity": _identity,
    "Cast": _cast,
    "Transpose": _transpose,
    "Reshape": _reshape,
    "Flatten": _flatten,
    "Squeeze": _squeeze,
    "Unsqueeze": _unsqueeze,
    "Slice": _slice,
    "Concat": _identity,  # handled separately: it has several inputs
}
