"""Packed weights of a safetensors checkpoint turned into logical float weights.

Called by the safetensors loader after the headers are checked. For every packed linear
weight found (:func:`~steelyard.loaders.packed.modules.find_packed`), the layout's decoder is
built from :class:`~steelyard.loaders.packed.stored.StoredPart` views of its parts (shapes,
bit widths and group sizes checked against each other and the declared config now, so a lie
is a :class:`LoadError` at load time; only small parts such as ``g_idx`` or scales are read)
and one ``f32`` tensor ``<module>.weight`` of shape ``[out, in]`` takes the parts' place. It
counts ``out * in`` parameters, carries ``stored_type`` (``gptq-int4``...), and is decoded row
block by row block when read. The parts stay in the checkpoint as bookkeeping tensors (not
counted) so coverage and tools still see them; none of them becomes a layer.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Protocol

import numpy as np

from steelyard import budget
from steelyard.dtypes import ALL_DTYPES
from steelyard.errors import LoadError
from steelyard.graph import Tensor, TensorRole
from steelyard.loaders.base import float32_tensor
from steelyard.loaders.packed.config import QuantConfig, read_quant_config
from steelyard.loaders.packed.detect import Layout, detect_layout
from steelyard.loaders.packed.modules import PackedModule, find_packed
from steelyard.loaders.packed.stored import Part, StoredPart
from steelyard.streaming import row_blocks


class Decoder(Protocol):
    """What every layout's weight offers: its canonical shape, name and float rows."""

    @property
    def shape(self) -> tuple[int, int]: ...

    @property
    def stored_type(self) -> str: ...

    def rows(self, start: int, stop: int) -> np.ndarray: ...


#: Float32 bytes decoded per step. Decoders hold several block-sized temporaries (unpacked
#: codes, gathered scales and zeros, products), so the step is a quarter of the audit's row
#: block: the working set stays near one row block however large the read.
DECODE_BYTES = 4 * 2**20

#: Builds a layout's decoder from its parts; registered per layout in ``builders``.
Builder = Callable[[Path, PackedModule, Mapping[str, Part], QuantConfig], Decoder]


def _stored(tensor: Tensor, path: Path) -> StoredPart:
    if tensor.read_span is None:  # every safetensors tensor has one; a guard for other callers
        raise LoadError(path, f"tensor {tensor.name!r} cannot be read in spans")
    return StoredPart(path, tensor.name, tensor.shape, np.dtype(ALL_DTYPES[tensor.dtype]),
                      tensor.read_span)


def logical_tensor(
    name: str, decoder: Decoder, path: Path, stored_bytes: int, experts: int = 0
) -> Tensor:
    """The ``f32`` ``[out, in]`` tensor that decodes ``decoder`` one row block per read
    (``[experts, out / experts, in]`` for a stack of experts decoded as one matrix)."""
    n_out, n_in = decoder.shape
    total = n_out * n_in

    def read_span(start: int, stop: int) -> np.ndarray:
        start, stop = max(0, start), min(total, stop)
        out = np.empty(max(0, stop - start), dtype=np.float32)
        fill_span(start, stop, out)
        return out

    def fill_span(start: int, stop: int, out: np.ndarray) -> None:
        # Decoded blocks go straight into the caller's array (the streamed pass's block):
        # no span-sized array between them (an invented FP8 300m model: 4.4 -> 3.3 s with the
        # float8 widening, further with this).
        if stop <= start:
            return
        flat = out.reshape(-1)
        first, last = start // n_in, -(-stop // n_in)
        # Layouts that keep output units as columns of the packed words read those columns
        # once for the whole request, then decode it step by step from memory.
        window = getattr(decoder, "window", None)
        source: Decoder = window(first, last) if window is not None else decoder
        for a, b in row_blocks(last - first, n_in, DECODE_BYTES):
            a, b = a + first, b + first
            # A NaN or Inf scale is data the audit reports, not a warning to print.
            with np.errstate(all="ignore"):
                block = np.asarray(source.rows(a, b), dtype=np.float32).reshape(-1)
            lo, hi = max(start, a * n_in), min(stop, b * n_in)
            flat[lo - start : hi - start] = block[lo - a * n_in : hi - a * n_in]

    def read() -> np.ndarray:
        # The whole float32 copy is bytes the file does not store: an expansion.
        budget.check_expansion(path, 4 * total, stored_bytes, f"tensor {name!r} dequantized")
        return read_span(0, total).reshape(shape)

    shape = (experts, n_out // experts, n_in) if experts else (n_out, n_in)
    return float32_tensor(
        name, shape, TensorRole.PARAMETER, read, read_span, decoder.stored_type, fill_span
    )


def _unstack(
    module: PackedModule, parts: dict[str, StoredPart]
) -> tuple[dict[str, Part], int]:
    """Mixture-of-experts stacks (``[experts, out, ...]``) seen as one ``[experts * out, ...]``
    matrix: row-wise layouts decode each expert's rows the same, and C order makes the
    flattening free. MLX ``switch_mlp`` weight/scales/biases; FP8 weights whose scales are per
    expert (``[experts]``, repeated over its rows), per row (``[experts, out(, 1)]``) or per
    block of rows that do not straddle experts. Anything else is left to the decoder's checks."""
    weight = parts.get("weight")
    if weight is None or weight.ndim != 3 or not weight.shape[0]:
        return dict(parts), 0
    experts, out = weight.shape[0], weight.shape[1]

    def rows(part: StoredPart) -> StoredPart:
        return replace(part, shape=(part.shape[0] * part.shape[1], *part.shape[2:]))

    if module.layout is Layout.MLX:
        if all(p.ndim == 3 and p.shape[0] == experts for p in parts.values()):
            return {key: rows(p) for key, p in parts.items()}, experts
        return dict(parts), 0
    if module.layout is Layout.FP8:
        key = "weight_scale_inv" if "weight_scale_inv" in parts else "weight_scale"
        scale = parts.get(key)
        if scale is None or not scale.shape or scale.shape[0] != experts:
            return dict(parts), 0
        flat: dict[str, Part] = {k: p for k, p in parts.items() if k != key}
        flat["weight"] = rows(weight)
        if scale.size == experts:  # one scale per expert: each of its rows gets it
            values = np.asarray(scale, dtype=np.float32).reshape(experts, 1)
            flat[key] = np.repeat(values, out, axis=0)
        elif scale.ndim in (2, 3) and scale.size == experts * out:
            flat[key] = replace(scale, shape=(experts * out, 1))
        elif scale.ndim == 3 and out % max(1, -(-out // scale.shape[1])) == 0:
            flat[key] = rows(scale)  # whole row blocks per expert
        else:
            return dict(parts), 0
        return flat, experts
    return dict(parts), 0


def unpack_checkpoint(
    checkpoint: Path, tensors: Mapping[str, Tensor], origin: Mapping[str, Path]
) -> tuple[dict[str, Tensor], list[str]]:
    """``tensors`` with each packed weight's parts replaced by its logical float weight,
    and notes for the report naming the layouts found. ``origin`` names each tensor's file."""
    if not find_packed(tensors, Layout.GPTQ):  # side files are read only for packed files
        return dict(tensors), []
    # The layouts' decoders only for a packed file (a float one skips their imports).
    from steelyard.loaders.packed.builders import BUILDERS

    config = read_quant_config(checkpoint)
    modules = find_packed(tensors, detect_layout(tensors, config.settings))
    owner: dict[str, PackedModule] = {}
    logical: dict[str, Tensor] = {}
    for module in modules:
        path = origin[module.parts[next(iter(module.parts))]]
        stored_parts = {key: _stored(tensors[name], origin[name])
                        for key, name in module.parts.items()}
        parts, experts = _unstack(module, stored_parts)
        name = module.weight_name
        if name in tensors and name not in module.parts.values():
            raise LoadError(path, f"{name!r} is stored both as a float tensor and packed")
        decoder = BUILDERS[module.layout](path, module, parts, config)
        stored = sum(part.nbytes for part in stored_parts.values())
        logical[name] = logical_tensor(name, decoder, path, stored, experts)
        for part in module.parts.values():
            owner[part] = module
    out: dict[str, Tensor] = {}
    for name, tensor in tensors.items():
        owned = owner.get(name)
        if owned is None:
            out[name] = tensor
            continue
        if owned.weight_name not in out:
            out[owned.weight_name] = logical[owned.weight_name]
        if name != owned.weight_name:
            out[name] = replace(tensor, role=TensorRole.BOOKKEEPING)
    counts: dict[str, int] = {}
    for module in modules:
        kind = logical[module.weight_name].stored_type or module.layout.value
        counts[kind] = counts.get(kind, 0) + 1
    found = ", ".join(f"{kind} ×{count}" for kind, count in sorted(counts.items()))
    notes = [f"packed weights decoded to float32 views ({found}); parameters count the "
             "logical weight elements, the stored codes, scales and zero points are "
             "bookkeeping" + (f"; settings from {Path(config.source).name}"
                              if config.source else "; no quantization config found, settings "
                              "inferred from tensor shapes")]
    return out, notes
