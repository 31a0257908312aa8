"""``compare`` reads each layer's weights once per file: the audits and the comparison's
measures share one set of statistics per checkpoint. The files are written with the reference
``safetensors`` package; the graph is the loader's own (``conventions.inferred_checkpoint``)
built over tensors whose readers count the elements they return."""

from __future__ import annotations

import collections
import dataclasses
from pathlib import Path

import numpy as np

from steelyard.comparison import compare_checkpoints
from steelyard.graph import Checkpoint, Tensor
from steelyard.loaders import load
from steelyard.loaders.conventions import inferred_checkpoint
from steelyard.policy import Policy
from tests.conftest import mlp_tensors, write_safetensors


def _counted(path: Path, reads: collections.Counter[str]) -> Checkpoint:
    plain = load(path)

    def wrap(tensor: Tensor) -> Tensor:
        read, span, fill = tensor.reader, tensor.read_span, tensor.fill_span

        def reader() -> np.ndarray:
            array = read()
            reads[tensor.name] += array.size
            return array

        def read_span(start: int, stop: int) -> np.ndarray:
            assert span is not None
            array = span(start, stop)
            reads[tensor.name] += array.size
            return array

        def fill_span(start: int, stop: int, out: np.ndarray) -> None:
            assert fill is not None
            fill(start, stop, out)  # float32 parts read straight into the caller's array
            reads[tensor.name] += out.size

        return dataclasses.replace(
            tensor,
            reader=reader,
            read_span=read_span if span is not None else None,
            fill_span=fill_span if fill is not None else None,
        )

    tensors = {name: wrap(t) for name, t in plain.tensors.items()}
    files = tuple(Path(f) for f in plain.files)
    return inferred_checkpoint(Path(plain.path), plain.format, tensors, files, plain.file_size)


def test_compare_reads_each_layer_weight_once_per_file(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    tensors = mlp_tensors(rng, (6, 16, 4))
    changed = {name: value * np.float32(1.1) for name, value in tensors.items()}
    reads = {"old": collections.Counter[str](), "new": collections.Counter[str]()}
    old = _counted(write_safetensors(tmp_path / "old.safetensors", tensors), reads["old"])
    new = _counted(write_safetensors(tmp_path / "new.safetensors", changed), reads["new"])
    result = compare_checkpoints(old, new, Policy())
    # reference: scaling by 1.1 changes every weight by 10% (relative Frobenius norm)
    assert {d.name: round(d.relative_change or 0, 5) for d in result.layers} == {"fc1": 0.1, "fc2": 0.1}
    for side, checkpoint in (("old", old), ("new", new)):
        for layer in checkpoint.layers:
            size = checkpoint.tensors[layer.weight].size
            assert reads[side][layer.weight] == size, (side, layer.weight)
