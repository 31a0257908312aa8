"""LoRA and DoRA fine-tuning adapters: ``adapter_model.safetensors`` (or a PyTorch
``adapter_model.bin``) with its ``adapter_config.json``.

An adapter is a checkpoint of its own. Each adapted module becomes a layer whose weight is
the update ΔW = scale·B·A in canonical orientation (``scale`` = lora_alpha/r, or
lora_alpha/√r with ``use_rslora``; per-module ``rank_pattern``/``alpha_pattern``), exposed as
a lazy tensor whose row-block reads compute B[rows]·A, so ΔW is never formed whole. The
factors' own tensors count as the checkpoint's parameters; the ΔW tensor does not (it is
derived).

With a base checkpoint (:func:`load_adapter` ``base=``, ``--base``) the result is the base
model with every adapted layer's weight replaced by the merged weight W + ΔW (for DoRA,
m ⊙ (W + ΔW) / ‖W + ΔW‖ per unit, as peft merges it), again lazily and by row blocks when the
base layer streams; the base's and the adapter's tensors all count as parameters.

peft's saved names are ``base_model.model.<module>.lora_A.weight``, ``….lora_B.weight``,
``….lora_embedding_A``/``_B`` for embeddings, ``….lora_magnitude_vector`` for DoRA; the layer
is named ``<module>``. A Conv1D base (GPT-2, ``fan_in_fan_out``) stores its weight ``[in,
out]``, but A is ``[r, in]`` and B ``[out, r]`` all the same, so ΔW = B·A is already
canonical.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from steelyard.dtypes import FLOAT_DTYPES, to_float32
from steelyard.errors import LoadError
from steelyard.graph import (
    Activation,
    Checkpoint,
    Format,
    Layer,
    LayerKind,
    RowSlice,
    Tensor,
    TensorRole,
)
from steelyard.loaders.adapter.config import (
    MAX_CONFIG_BYTES,
    MAX_RANK,
    AdapterConfig,
    parse_config,
)
from steelyard.loaders.adapter.factors import Factors, rows
from steelyard.loaders.adapter.model import (
    AdaptedModule,
    AdapterCheckpoint,
    AdapterInfo,
    FactorCache,
    adapter_of,
)
from steelyard.loaders.base import float32_tensor, parse_json
from steelyard.loaders.layer_parts import canonical_geometry, make_layer, weight_source
from steelyard.loaders.signatures import (
    ADAPTER_FILES,
    ADAPTER_MARKERS,
    adapter_candidate,
    safetensors_head,
)
from steelyard.safepath import read_beside

CONFIG_NAME = "adapter_config.json"
_PREFIX = "base_model.model."
_PARTS = ("lora_A", "lora_B", "lora_embedding_A", "lora_embedding_B", "lora_magnitude_vector")
_FACTOR = re.compile(r"^(?P<module>.+?)\.(?P<part>" + "|".join(_PARTS) + r")(?:\.(?P<rest>.+))?$")


def adapter_file_in(folder: Path) -> Path | None:
    """The adapter file of an adapter folder (config + weights), or None when ``folder`` is
    not one. Discovery uses it so an adapter folder is one checkpoint."""
    if not (folder / CONFIG_NAME).is_file():
        return None
    for name in ADAPTER_FILES:
        if (folder / name).is_file():
            return folder / name
    return None


def is_adapter_file(path: Path, head: bytes) -> bool:
    """Whether ``path`` (first bytes ``head``) is a LoRA adapter: peft's file name beside an
    ``adapter_config.json``, or a safetensors header naming LoRA factors."""
    if not adapter_candidate(path, head):
        return False
    if path.name in ADAPTER_FILES and (path.parent / CONFIG_NAME).is_file():
        return True
    return safetensors_head(head) and any(marker in head for marker in ADAPTER_MARKERS)


class AdapterLoader:
    """LoRA/DoRA adapter files (registered before plain safetensors and PyTorch)."""

    format = Format.SAFETENSORS

    def sniff(self, path: Path, head: bytes) -> bool:
        """See :func:`is_adapter_file`."""
        return is_adapter_file(path, head)

    def load(self, path: Path) -> Checkpoint:
        """The adapter on its own: one ΔW layer per adapted module."""
        return load_adapter(path)


def _stored_tensors(path: Path) -> tuple[Checkpoint, Mapping[str, Tensor]]:
    """The adapter file read by the loader of its container (safetensors or PyTorch)."""
    with open(path, "rb") as handle:
        head = handle.read(4)
    if head == b"PK\x03\x04":
        from steelyard.loaders.pytorch.loader import PytorchLoader

        stored = PytorchLoader().load(path)
    else:
        from steelyard.loaders.safetensors import SafetensorsLoader

        stored = SafetensorsLoader().load(path)
    return stored, stored.tensors


def _config(path: Path) -> AdapterConfig:
    raw = read_beside(path, CONFIG_NAME, "adapter config", MAX_CONFIG_BYTES)
    if raw is None:
        return AdapterConfig(present=False)
    return parse_config(parse_json(raw, path, CONFIG_NAME), path)


def _group(
    path: Path, tensors: Mapping[str, Tensor]
) -> tuple[dict[str, dict[str, Tensor]], list[str]]:
    """Module → part → tensor, and the stored names that are not LoRA factors."""
    modules: dict[str, dict[str, Tensor]] = {}
    extra: list[str] = []
    adapters: set[str] = set()
    for name, tensor in tensors.items():
        match = _FACTOR.match(name)
        rest = [] if match is None or match["rest"] is None else match["rest"].split(".")
        if match is None or "bias" in rest:
            extra.append(name)  # modules_to_save copies, LoRA biases: stored, not merged
            continue
        named = [p for p in rest if p != "weight"]
        if len(named) > 1:
            raise LoadError(path, f"tensor {name!r} is not a LoRA factor name steelyard knows")
        adapters.update(named)
        module = match["module"]
        module = module[len(_PREFIX) :] if module.startswith(_PREFIX) else module
        parts = modules.setdefault(module, {})
        if match["part"] in parts:
            raise LoadError(path, f"module {module!r} has two {match['part']} tensors")
        parts[match["part"]] = tensor
    if len(adapters) > 1:
        raise LoadError(
            path, f"holds {len(adapters)} adapters ({', '.join(sorted(adapters)[:4])}); save one"
        )
    return modules, extra


def _float(path: Path, tensor: Tensor) -> None:
    if tensor.dtype not in FLOAT_DTYPES:
        raise LoadError(path, f"tensor {tensor.name!r} is {tensor.dtype}, not a float factor")


def _module(
    path: Path,
    config: AdapterConfig,
    module: str,
    parts: dict[str, Tensor],
    cache: FactorCache,
    eager: bool,
) -> AdaptedModule:
    """One adapted module, its shapes checked against each other and the config."""
    embedding = "lora_embedding_A" in parts or "lora_embedding_B" in parts
    a_key, b_key = ("lora_embedding_A", "lora_embedding_B") if embedding else ("lora_A", "lora_B")
    a, b = parts.get(a_key), parts.get(b_key)
    if a is None or b is None:
        have, lack = (a_key, b_key) if b is None else (b_key, a_key)
        raise LoadError(path, f"module {module!r} has {have} but no {lack}")
    for tensor in (a, b):
        _float(path, tensor)
    if embedding:
        if len(a.shape) != 2 or len(b.shape) != 2:
            raise LoadError(path, f"module {module!r}: embedding factors must be 2-D")
        rank, rank_b = a.shape[0], b.shape[1]
        canonical: tuple[int, ...] = (a.shape[1], b.shape[0])
        kind = LayerKind.EMBEDDING
    else:
        if len(a.shape) < 2 or len(b.shape) != len(a.shape) or any(d != 1 for d in b.shape[2:]):
            raise LoadError(
                path,
                f"module {module!r}: lora_A {list(a.shape)} and lora_B {list(b.shape)} are not "
                "[r, in, *kernel] and [out, r, 1…]",
            )
        rank, rank_b = a.shape[0], b.shape[1]
        canonical = (b.shape[0], *a.shape[1:])
        kind = LayerKind.DENSE if len(a.shape) == 2 else LayerKind.CONV
    if rank != rank_b:
        raise LoadError(
            path, f"module {module!r}: {a_key} has rank {rank} but {b_key} has rank {rank_b}"
        )
    if not 1 <= rank <= MAX_RANK or min(canonical) < 1:
        raise LoadError(
            path,
            f"module {module!r}: rank {rank} or update shape {list(canonical)} is empty "
            f"or above the {MAX_RANK:,} ranks steelyard reads",
        )
    configured = config.rank_for(module, path) if config.present else None
    if configured is not None and configured != rank:
        raise LoadError(
            path,
            f"module {module!r}: the factors have rank {rank} but {CONFIG_NAME} says r={configured}",
        )
    magnitude = parts.get("lora_magnitude_vector")
    if magnitude is not None:
        _float(path, magnitude)
        if magnitude.shape != (canonical[0],):
            raise LoadError(
                path,
                f"module {module!r}: lora_magnitude_vector {list(magnitude.shape)} does not "
                f"match the {canonical[0]} units of the update",
            )
    scale = config.scale_for(module, rank, path)

    def compute() -> Factors:
        a_values = np.asarray(a.read_float32(), dtype=np.float64).reshape(rank, -1)
        b_values = np.asarray(b.read_float32(), dtype=np.float64).reshape(-1, rank)
        if embedding:
            left, right = a_values.T, b_values.T * scale
        else:
            left, right = b_values * scale, a_values
        return Factors(np.ascontiguousarray(left), np.ascontiguousarray(right))

    if eager:
        # Factors whose reader is not thread-safe are read now, once, so the audit's worker
        # threads never touch that file (adapters are small: their bytes bound this).
        ready = compute()
        factors: Callable[[], Factors] = lambda: ready  # noqa: E731
    else:
        factors = lambda: cache.get(module, compute)  # noqa: E731
    return AdaptedModule(
        name=module,
        kind=kind,
        canonical=canonical,
        rank=rank,
        scale=scale,
        a=a.name,
        b=b.name,
        magnitude=None if magnitude is None else magnitude.name,
        factors=factors,
    )


def _span_from_rows(
    block: Callable[[int, int], np.ndarray], fan_in: int
) -> Callable[[int, int], np.ndarray]:
    """A flat-element span reader over a reader of whole canonical rows."""

    def read_span(start: int, stop: int) -> np.ndarray:
        if stop <= start:
            return np.empty(0, dtype=np.float32)
        first, last = start // fan_in, -(-stop // fan_in)
        flat = block(first, last).reshape(-1)
        return flat[start - first * fan_in : stop - first * fan_in]

    return read_span


def _derived_tensor(
    name: str,
    canonical: tuple[int, ...],
    whole: Callable[[], np.ndarray],
    block: Callable[[int, int], np.ndarray] | None,
    factors: Callable[[], tuple[np.ndarray, np.ndarray]] | None = None,
) -> Tensor:
    """A float32 tensor computed from the factors (ΔW, or the merged W + ΔW), not counted as
    parameters; streamed in spans of whole rows when ``block`` reads rows thread-safely;
    ``factors`` for ΔW itself, a low-rank product."""
    span = None if block is None else _span_from_rows(block, int(np.prod(canonical[1:])))
    return float32_tensor(name, canonical, TensorRole.BOOKKEEPING, whole, span, factors=factors)


def _delta_layer(module: AdaptedModule, aux: tuple[str, ...]) -> tuple[Layer, Tensor]:
    """The ΔW layer of an adapter read alone, and its derived (uncounted) tensor."""
    units = module.units

    def block(first: int, last: int) -> np.ndarray:
        return rows(module.factors(), first, last)

    def whole() -> np.ndarray:
        return block(0, units).reshape(module.canonical)

    def factors() -> tuple[np.ndarray, np.ndarray]:
        found = module.factors()
        return found.left, found.right

    tensor = _derived_tensor(
        f"{module.name}.delta_weight", module.canonical, whole, block, factors
    )
    source = weight_source(tensor.name, whole, RowSlice())
    geometry = canonical_geometry(module.canonical)
    layer = make_layer(module.name, module.kind, Activation.UNKNOWN, geometry, source, aux=aux)
    return layer, tensor


def _base_layer(base: Checkpoint, module: AdaptedModule, path: Path) -> Layer:
    """The base layer ``module`` adapts: its weight named ``<module>.weight`` (or, when the
    two were saved with different wrappers, the one layer whose weight name ends with, or
    is the end of, that name)."""
    wanted = f"{module.name}.weight"
    by_weight: dict[str, list[Layer]] = {}
    for layer in base.layers:
        by_weight.setdefault(layer.weight, []).append(layer)
    found = by_weight.get(wanted)
    if found is None:
        found = [
            layer
            for weight, group in by_weight.items()
            if weight.endswith("." + wanted) or wanted.endswith("." + weight)
            for layer in group
        ]
    if not found:
        raise LoadError(
            path, f"adapted module {module.name!r} has no layer in the base model {base.path}"
        )
    if len(found) > 1:
        raise LoadError(
            path,
            f"adapted module {module.name!r} matches {len(found)} base layers "
            f"({', '.join(layer.name for layer in found[:3])}); pairing is ambiguous",
        )
    layer = found[0]
    canonical = (layer.units, layer.in_per_group, *layer.kernel)
    if canonical != module.canonical or layer.groups != 1:
        raise LoadError(
            path,
            f"adapted module {module.name!r}: the update is {list(module.canonical)} but the "
            f"base layer {layer.name!r} is {list(canonical)} (groups {layer.groups})",
        )
    return layer


def _base_rows(base: Checkpoint, layer: Layer) -> Callable[[int, int], np.ndarray] | None:
    """Rows of the base layer's canonical matrix read straight from its stored tensor, when
    the layer is a run of the tensor's rows read thread-safely (else None)."""
    tensor = base.tensors.get(layer.weight)
    orient = layer.orient
    if tensor is None or tensor.read_span is None or not isinstance(orient, RowSlice):
        return None
    if tensor.dtype not in FLOAT_DTYPES or not tensor.shape:
        return None
    fan_in = layer.fan_in
    if int(np.prod(tensor.shape[1:])) != fan_in or orient.start + layer.units > tensor.shape[0]:
        return None
    span = tensor.read_span
    first_row = orient.start

    def read(first: int, last: int) -> np.ndarray:
        stored = span((first_row + first) * fan_in, (first_row + last) * fan_in)
        return to_float32(np.asarray(stored)).reshape(last - first, fan_in)

    return read


def _merged_layer(
    base: Checkpoint,
    module: AdaptedModule,
    layer: Layer,
    magnitude: Tensor | None,
) -> tuple[Layer, Tensor]:
    """The base layer with its weight replaced by the merged W + ΔW (DoRA-scaled)."""
    units = layer.units
    streamed = _base_rows(base, layer)
    cached_whole: list[np.ndarray] = []

    def base_block(first: int, last: int) -> np.ndarray:
        if streamed is not None:
            return streamed(first, last)
        if not cached_whole:
            cached_whole.append(np.asarray(layer.matrix(), dtype=np.float32))
        return cached_whole[0][first:last]

    def block(first: int, last: int) -> np.ndarray:
        merged = base_block(first, last) + rows(module.factors(), first, last)
        if magnitude is not None:
            gain = to_float32(np.asarray(magnitude.read_float32())).reshape(-1)[first:last]
            with np.errstate(divide="ignore", invalid="ignore"):
                norms = np.sqrt(np.einsum("ij,ij->i", merged, merged, dtype=np.float64))
                merged *= (gain / norms).astype(np.float32)[:, None]
        return merged

    def whole() -> np.ndarray:
        try:
            return block(0, units).reshape(module.canonical)
        finally:
            cached_whole.clear()  # the base matrix is the audit's to cache, not ours

    suffix = "dora" if magnitude is not None else "lora"
    tensor = _derived_tensor(
        f"{layer.weight}+{suffix}", module.canonical, whole, None if streamed is None else block
    )
    extra = (module.a, module.b) + (() if magnitude is None else (magnitude.name,))
    merged = replace(
        layer,
        weight=tensor.name,
        weight_view=whole,
        orient=RowSlice(),
        aux=(*layer.aux, layer.weight, *extra),
    )
    return merged, tensor


def _summary(config: AdapterConfig, modules: Mapping[str, AdaptedModule]) -> str:
    ranks = sorted({m.rank for m in modules.values()})
    dora = sum(1 for m in modules.values() if m.magnitude is not None)
    kind = "DoRA" if dora == len(modules) and dora else "LoRA"
    rule = "alpha/√r (rank-stabilised)" if config.rslora else "alpha/r"
    scales = sorted({round(m.scale, 6) for m in modules.values()})
    text = (
        f"{kind} adapter: {len(modules):,} adapted modules, rank "
        f"{'/'.join(str(r) for r in ranks[:6])}, scale {rule} = "
        f"{'/'.join(f'{s:g}' for s in scales[:6])}"
    )
    if dora and dora != len(modules):
        text += f" ({dora} with DoRA magnitudes)"
    return text


def load_adapter(path: str | Path, base: str | Path | Checkpoint | None = None) -> Checkpoint:
    """Read a LoRA/DoRA adapter (its file, or its folder) as a checkpoint.

    Without ``base`` each adapted module is a layer whose weight is ΔW. With ``base`` (a path
    to any checkpoint steelyard reads, or an already loaded one) the result is the base model
    whose adapted layers hold the merged weight. Every failure is a
    :class:`~steelyard.errors.LoadError` (exit 2)."""
    target = Path(path)
    if target.is_dir():
        found = adapter_file_in(target)
        if found is None:
            raise LoadError(target, f"is not an adapter folder ({CONFIG_NAME} + adapter_model.*)")
        target = found
    stored, tensors = _stored_tensors(target)
    config = _config(target)
    grouped, extra = _group(target, tensors)
    if not grouped:
        raise LoadError(target, "holds no LoRA factors (lora_A/lora_B tensors)")
    eager = any(t.read_span is None for t in tensors.values())
    cache = FactorCache()
    modules = {
        name: _module(target, config, name, parts, cache, eager)
        for name, parts in sorted(grouped.items())
    }
    notes = [_summary(config, modules)]
    if not config.present:
        notes.append(f"no {CONFIG_NAME} beside the file: updates are B·A with scale 1")
    if extra:
        notes.append(
            f"{len(extra):,} stored tensors are not LoRA factors (modules_to_save copies or "
            "LoRA biases); they are listed, not merged"
        )
    counted = {
        name: replace(t, role=TensorRole.PARAMETER) if t.dtype in FLOAT_DTYPES else t
        for name, t in tensors.items()
    }
    read = _AdapterRead(target, stored, config, modules, counted, extra, notes)
    return _alone(read) if base is None else _merged(read, base)


@dataclass(frozen=True)
class _AdapterRead:
    """What was read from the adapter file, before its layers are made (alone or merged)."""

    target: Path
    stored: Checkpoint
    config: AdapterConfig
    modules: dict[str, AdaptedModule]
    counted: dict[str, Tensor]
    extra: list[str]
    notes: list[str]

    def checkpoint(
        self,
        tensors: dict[str, Tensor],
        layers: tuple[Layer, ...],
        modules: Mapping[str, AdaptedModule],
        base: Checkpoint | None,
    ) -> AdapterCheckpoint:
        """The adapter's checkpoint; merged onto ``base``, it also carries the base's files,
        size, optimizer state and notes."""
        return AdapterCheckpoint(
            path=str(self.target),
            format=self.stored.format,
            tensors=tensors,
            layers=layers,
            file_size=self.stored.file_size + (base.file_size if base else 0),
            files=(*self.stored.files, *(base.files if base else ())),
            optimizer=base.optimizer if base else None,
            notes=(*(base.notes if base else ()), *self.notes),
            adapter=AdapterInfo(
                config=self.config,
                modules=modules,
                base=base.path if base else None,
                extra=tuple(self.extra),
            ),
        )


def _alone(read: _AdapterRead) -> Checkpoint:
    layers: list[Layer] = []
    all_tensors = dict(read.counted)
    for module in read.modules.values():
        aux = (module.a, module.b) + (() if module.magnitude is None else (module.magnitude,))
        layer, tensor = _delta_layer(module, aux)
        layers.append(layer)
        all_tensors[tensor.name] = tensor
    if any(m.magnitude is not None for m in read.modules.values()):
        read.notes.append(
            "DoRA magnitudes are stored but the merged weight needs the base model "
            "(--base); the layers show the update ΔW"
        )
    return read.checkpoint(all_tensors, tuple(layers), read.modules, None)


def _merged(read: _AdapterRead, base: str | Path | Checkpoint) -> Checkpoint:
    if isinstance(base, Checkpoint):
        base_checkpoint = base
    else:
        from steelyard.loaders import load

        base_checkpoint = load(base)
    if adapter_of(base_checkpoint) is not None:
        raise LoadError(read.target, f"the base {base_checkpoint.path} is itself an adapter")
    clash = sorted(set(read.counted) & set(base_checkpoint.tensors))
    if clash:
        raise LoadError(read.target, f"tensor {clash[0]!r} is in both the adapter and the base")
    all_tensors: dict[str, Tensor] = {**base_checkpoint.tensors, **read.counted}
    replaced: dict[str, Layer] = {}
    paired: dict[str, AdaptedModule] = {}
    for module in read.modules.values():
        layer = _base_layer(base_checkpoint, module, read.target)
        if layer.name in replaced:
            raise LoadError(
                read.target, f"two adapted modules update the base layer {layer.name!r}"
            )
        magnitude = read.counted.get(module.magnitude) if module.magnitude else None
        merged, tensor = _merged_layer(base_checkpoint, module, layer, magnitude)
        replaced[layer.name] = merged
        all_tensors[tensor.name] = tensor
        paired[layer.name] = replace(
            module, name=layer.name, base_layer=replace(layer, name=f"{layer.name} (base)")
        )
    layers = tuple(replaced.get(layer.name, layer) for layer in base_checkpoint.layers)
    read.notes.append(
        f"merged onto the base {base_checkpoint.path}: adapted layers show W + ΔW"
        + (
            " (DoRA: rescaled per unit by the stored magnitudes)"
            if any(m.magnitude is not None for m in read.modules.values())
            else ""
        )
    )
    return read.checkpoint(all_tensors, layers, paired, base_checkpoint)


__all__ = [
    "ADAPTER_FILES",
    "CONFIG_NAME",
    "AdaptedModule",
    "AdapterCheckpoint",
    "AdapterInfo",
    "AdapterLoader",
    "adapter_file_in",
    "adapter_of",
    "is_adapter_file",
    "load_adapter",
]
