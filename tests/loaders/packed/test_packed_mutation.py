"""Mutated packed checkpoints (hypothesis): shapes, dtypes, values and declared settings drawn
at random around valid layouts. Loading either succeeds, and then every decoded weight reads
as an array of its declared shape, or fails with the project's input errors; nothing else
(no IndexError, ValueError or MemoryError escaping, which the CLI would report as exit 3)."""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.api import load
from steelyard.errors import SteelyardError, UnreadableTensor

from . import _reference as ref

M = "model.layers.0.mlp.up_proj"
SETTINGS = settings(max_examples=60, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])


def _exercise(tensors: dict[str, np.ndarray], config: dict | None) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = ref.save(Path(folder) / "model.safetensors", tensors, config)
        try:
            checkpoint = load(path)
        except SteelyardError:
            return
        for tensor in checkpoint.tensors.values():
            if tensor.stored_type is None:
                continue
            try:
                values = tensor.read()
            except (SteelyardError, UnreadableTensor):
                continue
            assert values.shape == tensor.shape and values.dtype == np.float32


_sizes = st.integers(0, 5)
_settings_values = st.one_of(st.none(), st.integers(-2, 9), st.sampled_from([16, 10**9]),
                             st.text(max_size=3), st.booleans())


def _or(valid: object, other: st.SearchStrategy) -> st.SearchStrategy:
    """The valid value half of the time, so draws also reach the checks behind the first."""
    return st.one_of(st.just(valid), other)


@SETTINGS
@given(seed=st.integers(0, 2**16), qz=_or((2, 1), st.tuples(_sizes, _sizes)),
       sc=_or((2, 8), st.tuples(_sizes, _sizes)), g_len=_or(32, st.integers(0, 40)),
       g_max=_or(2, st.integers(-3, 9)), bits=_or(4, _settings_values),
       group=_or(16, _settings_values), method=st.sampled_from([None, "gptq", "awq", "fp8"]))
def test_mutated_gptq_parts(seed, qz, sc, g_len, g_max, bits, group, method):
    rng = np.random.default_rng(seed)
    parts, _ = ref.gptq(rng, 4, 8, 32, 16, act=False)
    parts["qzeros"] = rng.integers(-2**31, 2**31, size=qz, dtype=np.int64).astype(np.int32)
    parts["scales"] = rng.uniform(-1, 1, size=sc).astype(np.float16)
    parts["g_idx"] = rng.integers(min(g_max, 0), max(g_max, 1), size=g_len).astype(np.int32)
    settings_ = {k: v for k, v in (("quant_method", method), ("bits", bits),
                                   ("group_size", group)) if v is not None}
    _exercise(ref.prefixed(M, parts), {"quantization_config": settings_} if settings_ else None)


@SETTINGS
@given(seed=st.integers(0, 2**16),
       shape=_or([4, 8], st.lists(st.integers(-2, 2**33), max_size=3)),
       blocksize=_or(16, _settings_values),
       quant_type=_or("nf4", st.sampled_from(["fp4", "int4", 7])),
       absmax_len=_or(2, st.integers(0, 6)), nested=st.booleans(),
       offset=_or(0.1, st.sampled_from(["x", None, float("nan")])),
       key=st.sampled_from(["nf4", "fp4"]), garbage=_or(False, st.just(True)))
def test_mutated_bnb4_states(seed, shape, blocksize, quant_type, absmax_len, nested, offset,
                             key, garbage):
    rng = np.random.default_rng(seed)
    parts, _ = ref.bnb4(rng, 4, 8, 16, "nf4", nested=nested)
    state = {"quant_type": quant_type, "blocksize": blocksize, "shape": shape,
             "nested_blocksize": 4, "nested_offset": offset}
    raw = rng.bytes(20) if garbage else json.dumps(state).encode()
    del parts["weight.quant_state.bitsandbytes__nf4"]
    parts[f"weight.quant_state.bitsandbytes__{key}"] = np.frombuffer(raw, np.uint8).copy()
    dtype = np.uint8 if nested else np.float32
    parts["weight.absmax"] = rng.integers(0, 255, size=absmax_len).astype(dtype)
    _exercise(ref.prefixed(M, parts), None)


@SETTINGS
@given(seed=st.integers(0, 2**16),
       weight_shape=_or([4, 40], st.lists(st.integers(-1, 2**41), max_size=3)),
       packed_cols=_or(5, st.integers(0, 6)), scale_shape=_or((4, 5), st.tuples(_sizes, _sizes)),
       zero=st.one_of(st.none(), st.just((1, 5)), st.tuples(_sizes, _sizes)),
       bits=_or(4, _settings_values))
def test_mutated_pack_quantized(seed, weight_shape, packed_cols, scale_shape, zero, bits):
    rng = np.random.default_rng(seed)
    parts: dict[str, np.ndarray] = {
        "weight_packed": rng.integers(-2**31, 2**31, size=(4, packed_cols),
                                      dtype=np.int64).astype(np.int32),
        "weight_shape": np.array(weight_shape, np.int64),
        "weight_scale": rng.uniform(0, 1, size=scale_shape).astype(np.float16),
    }
    if zero is not None:
        parts["weight_zero_point"] = rng.integers(0, 2**31, size=zero,
                                                  dtype=np.int64).astype(np.int32)
    config = {"quantization_config": {"quant_method": "compressed-tensors", "config_groups": {
        "g": {"weights": {"num_bits": bits}}}}}
    _exercise(ref.prefixed(M, parts), config)


@SETTINGS
@given(seed=st.integers(0, 2**16), rows=st.integers(0, 6), words=_or(4, st.integers(0, 7)),
       groups=_or(2, st.integers(0, 4)), bits=_or(4, _settings_values),
       group=_or(16, _settings_values))
def test_mutated_mlx(seed, rows, words, groups, bits, group):
    rng = np.random.default_rng(seed)
    parts = {"weight": rng.integers(0, 2**32, size=(rows, words), dtype=np.uint64
                                    ).astype(np.uint32),
             "scales": rng.uniform(0, 1, size=(rows, groups)).astype(np.float16),
             "biases": rng.uniform(0, 1, size=(rows, groups)).astype(np.float16)}
    quant = {k: v for k, v in (("bits", bits), ("group_size", group)) if v is not None}
    _exercise(ref.prefixed(M, parts), {"quantization": quant} if quant else None)


@SETTINGS
@given(seed=st.integers(0, 2**16), rows=st.integers(0, 5), cols=_or(8, st.integers(0, 9)),
       scale=st.tuples(st.integers(0, 5), st.integers(0, 5)),
       scale_dtype=st.sampled_from(["u8", "f8", "f32"]),
       glob=st.one_of(st.none(), st.integers(0, 3)))
def test_mutated_fp4(seed, rows, cols, scale, scale_dtype, glob):
    import ml_dtypes

    rng = np.random.default_rng(seed)
    dtype = {"u8": np.uint8, "f8": ml_dtypes.float8_e4m3fn, "f32": np.float32}[scale_dtype]
    parts = {"weight_packed": rng.integers(0, 256, size=(rows, cols)).astype(np.uint8),
             "weight_scale": rng.uniform(0, 4, size=scale).astype(dtype)}
    if glob is not None:
        parts["weight_global_scale"] = rng.uniform(0, 2, size=glob).astype(np.float32)
    _exercise(ref.prefixed(M, parts), None)
