"""ONNX nodes as layer drafts in canonical orientation (rows are always output units):

* Gemm: ``alpha·B`` as ``[out, in]`` (``B`` when ``transB=1``, ``Bᵀ`` otherwise); bias ``beta·C``
  when C holds one value per unit.
* MatMul with constant ``B [in, out]``: ``Bᵀ``; a constant left operand ``A [out, in]`` as is.
  The bias is a following Add of a per-unit constant.
* Conv: ``W [M, C/g, k...]`` as stored.
* ConvTranspose ``W [C, M/g, k...]``: group ``j`` owns input channels ``j·C/g ... (j+1)·C/g``
  and output channels ``j·M/g ... (j+1)·M/g``; canonical row ``j·M/g + m`` holds
  ``W[j·C/g : (j+1)·C/g, m]``, i.e. ``[M, C/g, k...]``. Kernels are not flipped.
* LSTM/GRU/RNN: see :mod:`~steelyard.loaders.onnx.recurrent`.
* Gather on a constant 2-D table (axis 0): an embedding ``[rows, dim]`` as stored. Its rows are
  not the units its consumers read, so consumers never list an embedding (as for files
  without a graph).
* QLinearConv, QLinearMatMul, ConvInteger, MatMulInteger: the float view of the quantized
  weight (:mod:`~steelyard.loaders.onnx.quantized`).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable

import numpy as np

from steelyard.dtypes import to_float32
from steelyard.graph import Activation, ColumnSlice, LayerKind, RowSlice
from steelyard.loaders.onnx.layer_draft import Array, Draft, f32, stored_as_is
from steelyard.loaders.onnx.lookthrough import Folder, View
from steelyard.loaders.onnx.node_graph import Graphs
from steelyard.loaders.onnx.output_walk import per_unit
from steelyard.loaders.onnx.quantized import (
    QuantWeight,
    conv_integer,
    integer_scale,
    matmul_integer,
    qlinear_conv,
    qlinear_matmul,
)
from steelyard.loaders.onnx.recurrent import recurrent_drafts
from steelyard.loaders.onnx.stored import Node


class LayerBuilder:
    """Turns nodes into layer drafts."""

    def __init__(self, graphs: Graphs, folder: Folder) -> None:
        self.graphs = graphs
        self.folder = folder
        self.notes: list[str] = []
        self.scale_uses: set[tuple[int, int]] = set()
        """(node index, input position) where a ConvInteger/MatMulInteger weight scale is read."""
        counts = Counter(n.name for n in graphs.nodes if n.name)
        self._unique = {name for name, count in counts.items() if count == 1}

    def base_name(self, node: Node, weight: str) -> str:
        return node.name if node.name in self._unique else weight

    def drafts(self) -> list[Draft]:
        out: list[Draft] = []
        for node in self.graphs.nodes:
            if not node.standard and node.domain != "com.microsoft":
                continue
            handler = HANDLERS.get(node.op)
            if handler is not None:
                out.extend(handler(self, node))
        return out

    def _simple(
        self,
        node: Node,
        kind: LayerKind,
        weight: View | QuantWeight,
        shape: tuple[int, ...],
        view: Array,
        data: str,
        groups: int = 1,
        trailing: int = 0,
    ) -> Draft:
        return Draft(
            node=node,
            name=self.base_name(node, weight.source if isinstance(weight, View) else weight.weight),
            kind=kind,
            weight=weight,
            units=shape[0],
            in_per_group=shape[1],
            kernel=tuple(shape[2:]),
            groups=groups,
            view=f32(view, shape=shape),
            data=data,
            out=node.outputs[0] if node.outputs else "",
            trailing=trailing,
        )

    def gemm(self, node: Node) -> list[Draft]:
        b = self.folder.fold(node.input(1))
        if b is None or len(b.shape) != 2 or self.folder.is_const(node.input(0)):
            return []
        trans_b = node.get_int("transB", 0) == 1
        alpha, beta = node.get_float("alpha", 1.0), node.get_float("beta", 1.0)
        units, fan = (b.shape[0], b.shape[1]) if trans_b else (b.shape[1], b.shape[0])
        read = b.read

        def weight() -> np.ndarray:
            array = to_float32(np.asarray(read()))
            array = array if trans_b else array.T
            if alpha == 1.0:
                return array
            with np.errstate(over="ignore"):  # beyond float32: ±Inf, as nonfinite counts it
                return array * np.float32(alpha)

        draft = self._simple(node, LayerKind.DENSE, b, (units, fan), weight, node.input(0))
        if alpha == 1.0 and stored_as_is(b):
            draft.orient = RowSlice() if trans_b else ColumnSlice()
        c = self.folder.fold(node.input(2)) if node.input(2) else None
        if node.input(2):
            draft.want_bias = False
        if c is not None and (math.prod(c.shape) == 1 or per_unit(c.shape, units, 0)):
            read_c = c.read

            def bias() -> np.ndarray:
                with np.errstate(over="ignore"):  # beyond float32: ±Inf, as nonfinite counts it
                    values = to_float32(np.asarray(read_c())).reshape(-1) * np.float32(beta)
                return np.ascontiguousarray(np.broadcast_to(values, (units,)))

            draft.bias, draft.bias_view = c.source, bias
        elif node.input(2):
            self.notes.append(f"Gemm {node.label!r}: C is not one value per unit, no bias taken")
        return [draft]

    def matmul(self, node: Node) -> list[Draft]:
        a, b = self.folder.fold(node.input(0)), self.folder.fold(node.input(1))
        if b is not None and a is None and len(b.shape) == 2:
            shape = (b.shape[1], b.shape[0])
            draft = self._simple(
                node, LayerKind.DENSE, b, shape, f32(b.read, ColumnSlice()), node.input(0)
            )
            draft.orient = ColumnSlice() if stored_as_is(b) else None
            return [draft]
        if a is not None and b is None and len(a.shape) == 2:
            draft = self._simple(node, LayerKind.DENSE, a, a.shape, a.read, node.input(1), trailing=1)
            draft.orient = RowSlice() if stored_as_is(a) else None
            return [draft]
        return []

    def conv(self, node: Node) -> list[Draft]:
        w = self.folder.fold(node.input(1))
        groups = node.get_int("group", 1)
        if w is None or len(w.shape) < 3 or groups < 1 or w.shape[0] % groups:
            return []
        draft = self._simple(
            node, LayerKind.CONV, w, w.shape, w.read, node.input(0), groups, len(w.shape) - 2
        )
        draft.orient = RowSlice() if stored_as_is(w) else None
        self._node_bias(draft, node.input(2))
        return [draft]

    def conv_transpose(self, node: Node) -> list[Draft]:
        w = self.folder.fold(node.input(1))
        groups = node.get_int("group", 1)
        if w is None or len(w.shape) < 3 or groups < 1 or w.shape[0] % groups:
            return []
        cin, per_group, kernel = w.shape[0], w.shape[1], w.shape[2:]
        units, fan = groups * per_group, cin // groups

        def canonical(array: np.ndarray) -> np.ndarray:
            grouped = array.reshape(groups, fan, per_group, *kernel)
            return np.swapaxes(grouped, 1, 2).reshape(units, fan, *kernel)

        shape = (units, fan, *kernel)
        draft = self._simple(
            node,
            LayerKind.CONV_TRANSPOSE,
            w,
            shape,
            f32(w.read, canonical),
            node.input(0),
            groups,
            len(kernel),
        )
        self._node_bias(draft, node.input(2))
        return [draft]

    def _node_bias(self, draft: Draft, key: str) -> None:
        if not key:
            return
        draft.want_bias = False
        bias = self.folder.fold(key)
        if bias is not None and per_unit(bias.shape, draft.units, 0):
            draft.bias, draft.bias_view = bias.source, f32(bias.read, shape=(draft.units,))

    def gather(self, node: Node) -> list[Draft]:
        table = self.folder.fold(node.input(0))
        if (
            table is None
            or len(table.shape) != 2
            or node.get_int("axis", 0) not in (0, -2)
            or self.folder.is_const(node.input(1))
            or not (table.dtype.is_float or table.quantized)
        ):
            return []
        draft = self._simple(
            node, LayerKind.EMBEDDING, table, table.shape, table.read, node.input(1)
        )
        draft.orient = RowSlice() if stored_as_is(table) else None
        draft.want_bias, draft.activation = False, Activation.IDENTITY
        return [draft]

    def recurrent(self, node: Node) -> list[Draft]:
        return recurrent_drafts(self.folder, node, self.base_name, self.notes)

    def _quantized(
        self,
        node: Node,
        found: QuantWeight | None,
        kind: LayerKind,
        groups: int,
        follow_from: str | None = None,
    ) -> list[Draft]:
        if found is None:
            return []
        shape = found.shape
        draft = self._simple(node, kind, found, shape, found.read, node.input(0), groups, len(shape) - 2)
        # The dequantized read is float32 in canonical shape already (no second conversion),
        # and a bias is found with the quantized weight, not after the node.
        draft.view, draft.bias, draft.bias_view = found.read, found.bias, found.bias_read
        draft.out = follow_from or draft.out
        if node.op == "QLinearConv":
            draft.want_bias = False
            draft.opaque_next = True  # a fused ReLU hides in the output quantisation range
        if node.op == "QLinearMatMul":
            draft.opaque_next = True
        if not found.scale_found:
            self.notes.append(
                f"{node.op} {node.label!r}: no weight scale found downstream, "
                "its float view uses scale 1"
            )
        return [draft]

    def quantized(self, node: Node) -> list[Draft]:
        groups = node.get_int("group", 1)
        if node.op == "QLinearConv":
            return self._quantized(node, qlinear_conv(self.folder, node), LayerKind.CONV, groups)
        if node.op == "QLinearMatMul":
            return self._quantized(node, qlinear_matmul(self.folder, node), LayerKind.DENSE, 1)
        rescale = integer_scale(self.graphs.consumers, self.graphs.producer, self.folder, node)
        scale, after = rescale.key, rescale.out
        if rescale.use is not None:
            self.scale_uses.add(rescale.use)
        if node.op == "ConvInteger":
            found = conv_integer(self.folder, node, scale)
            return self._quantized(node, found, LayerKind.CONV, groups, after)
        return self._quantized(
            node, matmul_integer(self.folder, node, scale), LayerKind.DENSE, 1, after
        )


HANDLERS: dict[str, Callable[[LayerBuilder, Node], list[Draft]]] = {
    "Gemm": LayerBuilder.gemm,
    "MatMul": LayerBuilder.matmul,
    "Conv": LayerBuilder.conv,
    "ConvTranspose": LayerBuilder.conv_transpose,
    "Gather": LayerBuilder.gather,
    "LSTM": LayerBuilder.recurrent,
    "GRU": LayerBuilder.recurrent,
    "RNN": LayerBuilder.recurrent,
    "QLinearConv": LayerBuilder.quantized,
    "QLinearMatMul": LayerBuilder.quantized,
    "ConvInteger": LayerBuilder.quantized,
    "MatMulInteger": LayerBuilder.quantized,
}


def unique_names(drafts: list[Draft]) -> None:
    """Suffix repeated layer names ``#2``, ``#3``… in draft order, in linear time.

    Each base name resumes its numbering where it stopped (counting from 2 for every repeat
    is quadratic: fifty thousand unnamed nodes sharing one weight); a suffix already taken by
    another name is skipped once.
    """
    seen: set[str] = set()
    following: dict[str, int] = {}
    renamed: dict[tuple[int, str], str] = {}
    for draft in drafts:
        name = draft.name
        if name in seen:
            number = following.get(draft.name, 2)
            while f"{draft.name}#{number}" in seen:
                number += 1
            name = f"{draft.name}#{number}"
            following[draft.name] = number + 1
        seen.add(name)
        renamed[(draft.node.index, draft.name)] = name
        draft.name = name
    for draft in drafts:  # R layers refer to their W gate by its first name
        if draft.own_inputs:
            draft.own_inputs = tuple(
                renamed.get((draft.node.index, n), n) for n in draft.own_inputs
            )
