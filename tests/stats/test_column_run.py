"""Layers whose canonical rows are a stored tensor's columns (GPT-2's Conv1D ``[in, out]``,
NumPy-style recurrent matrices ``[in, G·H]``) are read by spans and transposed a slab at a
time. Reference: the arrays the ``safetensors`` package reads from the same file
(``safetensors.numpy.load_file``), transposed by numpy, and ``numpy.linalg.norm``; bf16 and
fp16 values widened by numpy/``ml_dtypes`` casts. The slab budget is lowered so that every
matrix takes several slabs."""

from __future__ import annotations

import json
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
from safetensors.numpy import load_file, save_file

from steelyard import tiled_copy
from steelyard.api import load
from steelyard.graph import ColumnSlice
from steelyard.stats import LayerStats
from steelyard.stats.passes import column_run

_DTYPES = {"f32": np.float32, "f16": np.float16, "bf16": ml_dtypes.bfloat16}


def _gpt2(folder: Path, dtype: type, rng: np.random.Generator) -> Path:
    """A one-block GPT-2-shaped file (Conv1D weights stored ``[in, out]``), 48 wide."""
    d, ff = 48, 80

    def draw(*shape: int) -> np.ndarray:
        return (rng.standard_normal(shape) * 0.1).astype(np.float32).astype(dtype)

    tensors = {
        "wte.weight": draw(64, d),
        "h.0.attn.c_attn.weight": draw(d, 3 * d),
        "h.0.attn.c_attn.bias": draw(3 * d),
        "h.0.attn.c_proj.weight": draw(d, d),
        "h.0.mlp.c_fc.weight": draw(d, ff),
        "h.0.mlp.c_fc.bias": draw(ff),
        "h.0.mlp.c_proj.weight": draw(ff, d),
    }
    save_file(tensors, str(folder / "model.safetensors"))
    config = {"model_type": "gpt2", "n_embd": d, "n_layer": 1, "n_head": 4, "vocab_size": 64}
    (folder / "config.json").write_text(json.dumps(config))
    return folder / "model.safetensors"


@pytest.mark.parametrize("stored", sorted(_DTYPES))
def test_conv1d_layers_match_the_transposed_stored_tensor(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, stored: str, rng: np.random.Generator
) -> None:
    monkeypatch.setattr(tiled_copy, "SLAB_BYTES", 1024)  # 2-5 stored rows per slab
    path = _gpt2(tmp_path, _DTYPES[stored], rng)
    reference = load_file(str(path))
    checkpoint = load(path)
    stats = LayerStats(checkpoint)
    transposed = 0
    for layer in checkpoint.layers:
        if not isinstance(layer.orient, ColumnSlice):
            continue
        transposed += 1
        assert column_run(checkpoint, layer) is not None, layer.name
        expected = reference[layer.weight].astype(np.float32).T
        got = stats.matrix(layer)
        assert got.flags.c_contiguous and got.dtype == np.float32
        assert got.tobytes() == np.ascontiguousarray(expected).tobytes(), layer.name
        norms = np.linalg.norm(expected.astype(np.float64), axis=1)
        assert np.allclose(stats.row_norms(layer), norms, rtol=1e-6), layer.name
    assert transposed == 4  # c_attn, c_proj (attention), c_fc, c_proj (mlp)


def test_a_transposed_recurrent_gate_is_its_columns(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rng: np.random.Generator
) -> None:
    """``x @ W`` order: ``weight_ih [in, 4H]`` and ``weight_hh [H, 4H]``; each gate's layer is
    a run of four columns' worth of the stored matrix."""
    monkeypatch.setattr(tiled_copy, "SLAB_BYTES", 512)
    hidden, inputs = 16, 20
    tensors = {
        "lstm.weight_ih_l0": rng.standard_normal((inputs, 4 * hidden)).astype(np.float32),
        "lstm.weight_hh_l0": rng.standard_normal((hidden, 4 * hidden)).astype(np.float32),
    }
    path = tmp_path / "model.safetensors"
    save_file(tensors, str(path))
    reference = load_file(str(path))
    checkpoint = load(path)
    stats = LayerStats(checkpoint)
    gates = [layer for layer in checkpoint.layers if isinstance(layer.orient, ColumnSlice)]
    assert len(gates) == 8  # four gates of each of the two matrices
    for layer in gates:
        orient = layer.orient
        assert isinstance(orient, ColumnSlice)
        expected = reference[layer.weight][:, orient.start : orient.stop].T
        assert column_run(checkpoint, layer) is not None, layer.name
        assert np.array_equal(stats.matrix(layer), expected), layer.name


def test_other_orientations_are_not_column_runs(tmp_path: Path, rng: np.random.Generator) -> None:
    """A llama-style ``[out, in]`` weight is a row run, never a column run."""
    save_file(
        {"model.layers.0.mlp.up_proj.weight": rng.standard_normal((24, 16)).astype(np.float32)},
        str(tmp_path / "model.safetensors"),
    )
    checkpoint = load(tmp_path / "model.safetensors")
    assert checkpoint.layers
    assert all(column_run(checkpoint, layer) is None for layer in checkpoint.layers)
