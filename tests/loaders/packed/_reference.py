"""Independent writers and dequantizers for packed safetensors tests.

Each packer is a plain Python loop over single codes, and each expected weight is computed
from the layout's published formula element by element, so none of it shares code with the
vectorised readers under test. Sources are named beside each function; "recalled" marks a
packing order written from memory of the library's published source.
"""

from __future__ import annotations

import json
from pathlib import Path

import ml_dtypes
import numpy as np
from safetensors.numpy import save_file

Parts = dict[str, np.ndarray]


def save(path: Path, tensors: Parts, config: dict | None = None) -> Path:
    """Write ``tensors`` with the safetensors package (the format's reference writer) and an
    optional ``config.json`` beside it."""
    path.parent.mkdir(parents=True, exist_ok=True)
    save_file({k: np.ascontiguousarray(v) for k, v in tensors.items()}, str(path))
    if config is not None:
        (path.parent / "config.json").write_text(json.dumps(config))
    return path


def pack_words(codes: np.ndarray, bits: int, axis: int) -> np.ndarray:
    """Pack unsigned ``codes`` ``32 // bits`` per int32 along ``axis``, lowest bits first,
    padding the axis with zero codes (AutoGPTQ's ``pack`` for qweight (axis 0) and qzeros
    (axis 1), MLX's ``quantize``, compressed-tensors' ``pack_to_int32``: one code at a time)."""
    moved = np.moveaxis(codes, axis, 0)
    if bits == 3:
        return np.moveaxis(_pack_3bit(moved), 0, axis)
    per = 32 // bits
    n_words = -(-moved.shape[0] // per)
    words = np.zeros((n_words, *moved.shape[1:]), dtype=np.uint64)
    for index in np.ndindex(moved.shape):
        word = (index[0] // per, *index[1:])
        words[word] |= int(moved[index]) << (bits * (index[0] % per))
    return np.moveaxis(words.astype(np.uint32).view(np.int32), 0, axis)


def _pack_3bit(moved: np.ndarray) -> np.ndarray:
    """AutoGPTQ's 3-bit packing, bit by bit: code k of each run of 32 occupies bits 3k..3k+2
    of the run's three words read as one little-endian stream (its pack() splits codes 10 and
    21 across words this way; recalled, and checked against the library's own fixtures)."""
    runs = -(-moved.shape[0] // 32)
    words = np.zeros((3 * runs, *moved.shape[1:]), dtype=np.uint64)
    for index in np.ndindex(moved.shape):
        run, k = divmod(index[0], 32)
        for b in range(3):
            position = 3 * k + b
            bit = (int(moved[index]) >> b) & 1
            words[(3 * run + position // 32, *index[1:])] |= bit << (position % 32)
    return words.astype(np.uint32).view(np.int32)


# --- GPTQ (Frantar et al. 2022, "GPTQ", arXiv 2210.17323: W = s * (q - z) per group;
#     storage as AutoGPTQ's QuantLinear.pack writes it, recalled: zeros stored minus one) ----

def gptq(rng: np.random.Generator, bits: int, n_out: int, n_in: int, group: int,
         act: bool, v2: bool = False) -> tuple[Parts, np.ndarray]:
    """Parts of a GPTQ layer and its expected float weight ``[out, in]`` (``v2``: zero points
    stored as they are, GPTQModel's "gptq_v2" checkpoint format, recalled)."""
    groups = -(-n_in // group)
    q = rng.integers(0, 2**bits, size=(n_in, n_out))
    z = rng.integers(1, 2**bits, size=(groups, n_out))
    s = rng.uniform(0.01, 0.1, size=(groups, n_out)).astype(np.float16)
    g_idx = np.arange(n_in) // group
    if act:
        g_idx = rng.permutation(g_idx)
    parts = {"qweight": pack_words(q, bits, 0), "qzeros": pack_words(z if v2 else z - 1, bits, 1),
             "scales": s, "g_idx": g_idx.astype(np.int32)}
    expected = np.empty((n_out, n_in), np.float32)
    for o in range(n_out):
        for i in range(n_in):
            g = g_idx[i]
            expected[o, i] = np.float32(s[g, o]) * np.float32(q[i, o] - z[g, o])
    return parts, expected


# --- AWQ (Lin et al. 2023, "AWQ", arXiv 2306.00978: W = s * (q - z) per input group;
#     GEMM packing as AutoAWQ writes it, recalled: along the output axis, slot k of a word
#     holds column (0, 2, 4, 6, 1, 3, 5, 7)[k] of its eight, zeros not offset) ---------------

AWQ_ORDER = (0, 2, 4, 6, 1, 3, 5, 7)


def _awq_pack(codes: np.ndarray) -> np.ndarray:
    rows, cols = codes.shape
    words = np.zeros((rows, cols // 8), dtype=np.uint64)
    for r in range(rows):
        for w in range(cols // 8):
            for slot, column in enumerate(AWQ_ORDER):
                words[r, w] |= int(codes[r, 8 * w + column]) << (4 * slot)
    return words.astype(np.uint32).view(np.int32)


def awq(rng: np.random.Generator, n_out: int, n_in: int, group: int) -> tuple[Parts, np.ndarray]:
    """Parts of an AWQ GEMM layer and its expected float weight."""
    groups = n_in // group
    q = rng.integers(0, 16, size=(n_in, n_out))
    z = rng.integers(0, 16, size=(groups, n_out))
    s = rng.uniform(0.01, 0.1, size=(groups, n_out)).astype(np.float16)
    parts = {"qweight": _awq_pack(q), "qzeros": _awq_pack(z), "scales": s}
    expected = np.empty((n_out, n_in), np.float32)
    for o in range(n_out):
        for i in range(n_in):
            expected[o, i] = np.float32(s[i // group, o]) * np.float32(q[i, o] - z[i // group, o])
    return parts, expected


# --- FP8 (OCP 8-bit floating point specification, e4m3fn/e5m2 decoded by ml_dtypes;
#     W = float(w) * scale of the element's tensor/row/block) -------------------------------

def fp8(rng: np.random.Generator, n_out: int, n_in: int, kind: str,
        block: tuple[int, int] = (128, 128)) -> tuple[Parts, np.ndarray]:
    """Parts of an FP8 layer (``kind`` tensor, channel or block) and its expected weight."""
    w = rng.normal(size=(n_out, n_in)).astype(ml_dtypes.float8_e4m3fn)
    bo, bi = block
    shape = {"tensor": (1,), "channel": (n_out, 1),
             "block": (-(-n_out // bo), -(-n_in // bi))}[kind]
    scale = rng.uniform(0.5, 2.0, size=shape).astype(np.float32)
    expected = np.empty((n_out, n_in), np.float32)
    for o in range(n_out):
        for i in range(n_in):
            if kind == "tensor":
                s = scale[0]
            elif kind == "channel":
                s = scale[o, 0]
            else:
                s = scale[o // bo, i // bi]
            expected[o, i] = np.float32(w[o, i]) * s
    key = "weight_scale_inv" if kind == "block" else "weight_scale"
    return {"weight": w, key: scale}, expected


# --- MLX grouped affine (MLX's published mx.quantize description: w = scale * q + bias per
#     group of consecutive inputs; uint32 words along the input axis, lowest bits first) ----

def mlx(rng: np.random.Generator, bits: int, n_out: int, n_in: int,
        group: int) -> tuple[Parts, np.ndarray]:
    """Parts of an MLX quantized layer and its expected weight."""
    q = rng.integers(0, 2**bits, size=(n_out, n_in))
    scales = rng.uniform(0.01, 0.1, size=(n_out, n_in // group)).astype(np.float16)
    biases = rng.uniform(-0.5, 0.5, size=(n_out, n_in // group)).astype(np.float16)
    expected = np.empty((n_out, n_in), np.float32)
    for o in range(n_out):
        for i in range(n_in):
            g = i // group
            expected[o, i] = np.float32(scales[o, g]) * q[o, i] + np.float32(biases[o, g])
    packed = (pack_words(q, bits, 1) if 32 % bits == 0 else pack_stream(q, bits)).view(np.uint32)
    return {"weight": packed, "scales": scales, "biases": biases}, expected


def pack_stream(codes: np.ndarray, bits: int) -> np.ndarray:
    """Each row's codes as one little-endian bit stream in int32 words, bit by bit (MLX's
    packing for 3, 5 and 6 bits, as its own quantize writes it: see fixtures/gen_mlx.py)."""
    rows, n = codes.shape
    words = np.zeros((rows, -(-n * bits // 32)), dtype=np.uint64)
    for r in range(rows):
        for k in range(n):
            for b in range(bits):
                position = k * bits + b
                words[r, position // 32] |= ((int(codes[r, k]) >> b) & 1) << (position % 32)
    return words.astype(np.uint32).view(np.int32)


# --- bitsandbytes 4-bit (QLoRA, Dettmers et al. 2023, arXiv 2305.14314: NF4 code values in
#     its Appendix E; blockwise absmax and double quantization as bitsandbytes' QuantState and
#     dequantize_blockwise define them, read from its published source: high nibble first,
#     absmax = nested_code[c] * nested_absmax[b // nested_block] + offset) -----------------

NF4_PAPER = [-1.0, -0.6961928009986877, -0.5250730514526367, -0.39491748809814453,
             -0.28444138169288635, -0.18477343022823334, -0.09105003625154495, 0.0,
             0.07958029955625534, 0.16093020141124725, 0.24611230194568634,
             0.33791524171829224, 0.44070982933044434, 0.5626170039176941,
             0.7229568362236023, 1.0]
#: bitsandbytes' FP4 code order (its CPU backend's published _FP4_QUANT_TABLE, whose second
#: entry 0.0052 is 1/192 rounded; the CUDA decoder's exact values, recalled).
FP4_BNB = [0.0, 1 / 192, 2 / 3, 1.0, 1 / 3, 0.5, 1 / 6, 0.25,
           -0.0, -1 / 192, -2 / 3, -1.0, -1 / 3, -0.5, -1 / 6, -0.25]


def bnb4(rng: np.random.Generator, n_out: int, n_in: int, blocksize: int, quant_type: str,
         nested: bool, nested_block: int = 4) -> tuple[Parts, np.ndarray]:
    """Parts of a bitsandbytes 4-bit layer (names relative to the module) and its weight."""
    table = NF4_PAPER if quant_type == "nf4" else FP4_BNB
    n = n_out * n_in
    codes = rng.integers(0, 16, size=n)
    blocks = -(-n // blocksize)
    state: dict[str, object] = {"quant_type": quant_type, "blocksize": blocksize,
                                "dtype": "bfloat16", "shape": [n_out, n_in]}
    parts: Parts = {"weight.quant_map": np.array(table, np.float32)}
    if nested:
        outer_blocks = -(-blocks // nested_block)
        absmax_codes = rng.integers(0, 256, size=blocks).astype(np.uint8)
        nested_map = np.sort(rng.uniform(-1, 1, size=256)).astype(np.float32)
        nested_absmax = rng.uniform(0.05, 0.2, size=outer_blocks).astype(np.float32)
        offset = 0.3
        absmax = [float(nested_map[absmax_codes[b]]) * float(nested_absmax[b // nested_block])
                  + offset for b in range(blocks)]
        parts.update({"weight.absmax": absmax_codes, "weight.nested_absmax": nested_absmax,
                      "weight.nested_quant_map": nested_map})
        state.update({"nested_blocksize": nested_block, "nested_dtype": "float32",
                      "nested_offset": offset})
    else:
        absmax_arr = rng.uniform(0.05, 0.5, size=blocks).astype(np.float32)
        absmax = [float(a) for a in absmax_arr]
        parts["weight.absmax"] = absmax_arr
    packed = np.zeros(-(-n // 2), dtype=np.uint8)
    for k in range(n):
        packed[k // 2] |= int(codes[k]) << (4 if k % 2 == 0 else 0)
    parts["weight"] = packed.reshape(-1, 1)
    parts[f"weight.quant_state.bitsandbytes__{quant_type}"] = np.frombuffer(
        json.dumps(state).encode(), dtype=np.uint8).copy()
    flat = np.array([np.float32(table[codes[k]]) * np.float32(absmax[k // blocksize])
                     for k in range(n)], dtype=np.float32)
    return parts, flat.reshape(n_out, n_in)


# --- LLM.int8 (Dettmers et al. 2022, arXiv 2208.07339: vector-wise int8, row scale = absmax
#     / 127; bitsandbytes stores the row absmax as SCB) -------------------------------------

def bnb8(rng: np.random.Generator, n_out: int, n_in: int) -> tuple[Parts, np.ndarray]:
    """Parts of an LLM.int8 layer and its expected weight."""
    q = rng.integers(-127, 128, size=(n_out, n_in)).astype(np.int8)
    scb = rng.uniform(0.1, 3.0, size=n_out).astype(np.float32)
    expected = np.empty((n_out, n_in), np.float32)
    for o in range(n_out):
        for i in range(n_in):
            expected[o, i] = np.float32(q[o, i]) * (scb[o] / np.float32(127))
    return {"weight": q, "SCB": scb}, expected


# --- compressed-tensors pack-quantized (its published pack_to_int32: q + 2^(b-1) packed
#     along the input axis; zero points packed along the output axis; W = (q - z) * s) ------

def pack_quantized(rng: np.random.Generator, bits: int, n_out: int, n_in: int, group: int,
                   symmetric: bool) -> tuple[Parts, np.ndarray]:
    """Parts of a pack-quantized layer and its expected weight."""
    half = 2 ** (bits - 1)
    groups = -(-n_in // group)
    q = rng.integers(-half, half, size=(n_out, n_in))
    s = rng.uniform(0.01, 0.1, size=(n_out, groups)).astype(np.float16)
    z = np.zeros((n_out, groups), dtype=np.int64) if symmetric else rng.integers(
        -half, half, size=(n_out, groups))
    parts: Parts = {"weight_packed": pack_words(q + half, bits, 1), "weight_scale": s,
                    "weight_shape": np.array([n_out, n_in], np.int64)}
    if not symmetric:
        parts["weight_zero_point"] = pack_words(z + half, bits, 0)
    expected = np.empty((n_out, n_in), np.float32)
    for o in range(n_out):
        for i in range(n_in):
            g = i // group
            expected[o, i] = np.float32(q[o, i] - z[o, g]) * np.float32(s[o, g])
    return parts, expected


def prefixed(module: str, parts: Parts) -> Parts:
    """``parts`` under the module's name."""
    return {f"{module}.{key}": value for key, value in parts.items()}
