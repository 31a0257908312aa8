"""GGUF loader against the ``gguf`` package (0.19.0): its reader (``GGUFReader``) for shapes,
types and raw bytes, its ``quants.dequantize`` for values, its writer for the fixtures
(``fixtures/gen_gguf.py``; layout facts in docs FORMATS.md "GGUF")."""

from __future__ import annotations

import json
import struct
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.cli import app
from steelyard.errors import LoadError
from steelyard.graph import Format, LayerKind, Link, RowSlice, TensorRole
from steelyard.loaders import load
from steelyard.stats import LayerStats

gguf = pytest.importorskip("gguf")
from gguf import GGMLQuantizationType as T  # noqa: E402
from gguf.constants import GGML_QUANT_SIZES  # noqa: E402

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "gguf"
runner = CliRunner()


def _reference(path: Path) -> dict[str, tuple[T, tuple[int, ...], np.ndarray]]:
    """name -> (type, numpy shape, whole tensor dequantized by the package)."""
    out = {}
    for tensor in gguf.GGUFReader(path).tensors:
        kind = T(tensor.tensor_type)
        raw = np.asarray(tensor.data)
        if kind in (T.F64, T.I8, T.I16, T.I32, T.I64):
            values = raw  # plain elements: the reader's array is the reference
        else:
            values = gguf.quants.dequantize(raw, kind)
        # GGUFReader reports dims innermost first (FORMATS.md "GGUF"); numpy order reverses them.
        shape = tuple(int(d) for d in reversed(tensor.shape.tolist()))
        out[tensor.name] = (kind, shape, np.asarray(values).reshape(shape))
    return out


def _dequantizable() -> set[T]:
    found = set()
    for kind in T:
        try:
            gguf.quants.dequantize(np.zeros((1, GGML_QUANT_SIZES[kind][1]), np.uint8), kind)
        except NotImplementedError:
            continue
        found.add(kind)
    return found


def test_fixture_holds_every_type_the_package_dequantizes() -> None:
    # reference: gguf.quants.dequantize of the installed package (asked per type)
    kinds = {kind for kind, _, _ in _reference(FIXTURES / "types.gguf").values()}
    missing = _dequantizable() - kinds
    assert not missing, f"regenerate fixtures/gguf with gen_gguf.py: {sorted(k.name for k in missing)}"
    assert {T.Q4_K, T.Q6_K, T.IQ2_XXS, T.IQ4_XS, T.Q8_0, T.BF16, T.F16, T.F32} <= kinds


def test_every_type_dequantizes_exactly_like_the_package() -> None:
    # reference: gguf.quants.dequantize of the whole tensor; our reads go block run by block
    # run, so equality must be exact (same function on the same blocks), NaN included.
    checkpoint = load(FIXTURES / "types.gguf")
    for name, (kind, shape, expected) in _reference(FIXTURES / "types.gguf").items():
        tensor = checkpoint.tensors[name]
        assert tensor.shape == shape, name
        got = tensor.read_float32()
        assert np.array_equal(got, expected.astype(np.float32), equal_nan=True), kind.name
        assert tensor.read_span is not None
        flat = expected.reshape(-1).astype(np.float32)
        for start, stop in ((0, 1), (37, 700), (255, 257), (1000, 1024), (0, flat.size)):
            span = np.asarray(tensor.read_span(start, stop), dtype=np.float32)
            assert np.array_equal(span, flat[start:stop], equal_nan=True), (kind.name, start)
            # the streamed pass's path: widened straight into a float32 block (fill_span
            # for dequantized types), the block 2-D as a pass hands it over
            into = np.full((1, stop - start), -7.0, dtype=np.float32)
            tensor.widen_part(start, stop, into)
            assert np.array_equal(into[0], flat[start:stop], equal_nan=True), (kind.name, start)
        assert tensor.role is TensorRole.PARAMETER


def test_stored_types_and_dtypes() -> None:
    checkpoint = load(FIXTURES / "types.gguf")
    reference = _reference(FIXTURES / "types.gguf")
    plain = {T.F16: "f16", T.BF16: "bf16", T.F32: "f32", T.F64: "f64"}
    for name, (kind, _, _) in reference.items():
        # block-quantized tensors are exposed as what read_span returns: float32
        assert checkpoint.tensors[name].dtype == plain.get(kind, "f32"), kind.name
        # ...and keep the ggml type name (gguf.GGMLQuantizationType) as what was stored
        assert checkpoint.tensors[name].stored_type == (None if kind in plain else kind.name)
    assert checkpoint.format is Format.GGUF
    assert any("Q4_K ×1" in note and "IQ1_M ×1" in note for note in checkpoint.notes)


def test_parameters_layers_and_links_of_a_llama_model() -> None:
    path = FIXTURES / "tiny-llama.gguf"
    checkpoint = load(path)
    reference = _reference(path)
    # Parameter count: every tensor's logical elements (GGUFReader n_elements).
    assert checkpoint.parameters == sum(int(t.n_elements) for t in gguf.GGUFReader(path).tensors)
    assert checkpoint.parameters == 86_336
    layers = {layer.name: layer for layer in checkpoint.layers}
    assert list(layers) == [
        "token_embd",
        *(f"blk.{b}.{leaf}" for b in range(2) for leaf in (
            "attn_q", "attn_k", "attn_v", "attn_output", "ffn_gate", "ffn_up", "ffn_down")),
        "output",
    ]  # fmt: skip
    assert layers["token_embd"].kind is LayerKind.EMBEDDING
    assert (layers["blk.0.attn_k"].units, layers["blk.0.attn_k"].fan_in) == (32, 64)  # 2 kv heads of 16
    assert (layers["blk.0.ffn_down"].units, layers["blk.0.ffn_down"].fan_in) == (64, 128)
    assert layers["blk.1.ffn_down"].inputs_from == ("blk.1.ffn_gate", "blk.1.ffn_up")
    assert layers["blk.1.ffn_down"].linked_by is Link.CONFIG
    # Grouped-query attention: 32 value units do not map one-to-one onto 64 output inputs.
    assert layers["blk.0.attn_output"].inputs_from == ()
    assert [n for n, layer in layers.items() if layer.is_output] == ["output"]
    for name, layer in layers.items():
        assert isinstance(layer.orient, RowSlice), name  # streamed by the audit
        tensor_name = "output.weight" if name == "output" else f"{name}.weight"
        expected = reference[tensor_name][2].astype(np.float32)
        assert np.array_equal(layer.matrix(), expected), name
    assert any("heads 4, key/value heads 2, vocabulary 96" in n for n in checkpoint.notes)
    assert any("MOSTLY_Q8_0" in n for n in checkpoint.notes)


def test_experts_become_one_layer_each() -> None:
    path = FIXTURES / "tiny-moe.gguf"
    checkpoint = load(path)
    reference = _reference(path)
    layers = {layer.name: layer for layer in checkpoint.layers}
    stack = reference["blk.0.ffn_down_exps.weight"][2]
    assert stack.shape == (4, 64, 32)  # [experts, out, in] in numpy order
    for e in range(4):
        down = layers[f"blk.0.ffn_down_exps.{e}"]
        assert (down.units, down.fan_in) == (64, 32)
        assert np.array_equal(down.matrix(), stack[e].astype(np.float32))
        assert down.inputs_from == (f"blk.0.ffn_gate_exps.{e}", f"blk.0.ffn_up_exps.{e}")
        assert down.orient is not None
        assert np.array_equal(down.orient(stack), stack[e])
    assert layers["blk.0.ffn_gate_inp"].units == 4
    # Same number of value units as output inputs: the link is fixed by the architecture.
    assert layers["blk.0.attn_output"].inputs_from == ("blk.0.attn_v",)
    assert "output" not in layers
    assert any("tied to token_embd.weight" in n for n in checkpoint.notes)
    assert any("experts 4, experts used 2" in n for n in checkpoint.notes)
    assert checkpoint.parameters == sum(int(t.n_elements) for t in gguf.GGUFReader(path).tensors)


def test_fused_qkv_is_split_by_head_counts_in_a_version_2_file() -> None:
    path = FIXTURES / "tiny-phi2-v2.gguf"
    assert struct.unpack_from("<I", path.read_bytes(), 4)[0] == 2
    checkpoint = load(path)
    reference = _reference(path)
    qkv = reference["blk.0.attn_qkv.weight"][2].astype(np.float32)
    bias = reference["blk.0.attn_qkv.bias"][2].astype(np.float32)
    layers = {layer.name: layer for layer in checkpoint.layers}
    for index, part in enumerate("qkv"):
        layer = layers[f"blk.0.attn_qkv.{part}"]
        rows = slice(64 * index, 64 * (index + 1))
        assert np.array_equal(layer.matrix(), qkv[rows])
        bias_vector = layer.bias_vector()
        assert bias_vector is not None
        assert np.array_equal(bias_vector, bias[rows])
        assert layer.orient == RowSlice(rows.start, rows.stop)
    assert layers["blk.0.attn_output"].inputs_from == ("blk.0.attn_qkv.v",)
    assert layers["blk.0.ffn_down"].inputs_from == ("blk.0.ffn_up",)
    assert layers["output"].bias == "output.bias"
    assert any(n.startswith("GGUF v2, architecture phi2") for n in checkpoint.notes)


def test_layer_stats_stream_dequantized_rows() -> None:
    # The audit must never read a quantized weight whole: forbid whole reads and check the
    # row norms still come out (numpy norms of the package's dequantized matrix).
    checkpoint = load(FIXTURES / "tiny-llama.gguf")
    reference = _reference(FIXTURES / "tiny-llama.gguf")
    stats = LayerStats(checkpoint)
    layer = checkpoint.layer("blk.1.ffn_gate")
    assert layer is not None
    tensor = checkpoint.tensors[layer.weight]

    def refuse() -> np.ndarray:
        raise AssertionError("whole read instead of row blocks")

    # Neither the whole tensor nor the layer's whole view may be read: only read_span.
    object.__setattr__(tensor, "reader", refuse)
    object.__setattr__(layer, "weight_view", refuse)
    norms = stats.row_norms(layer)
    expected = np.linalg.norm(reference["blk.1.ffn_gate.weight"][2].astype(np.float64), axis=1)
    np.testing.assert_allclose(norms, expected, rtol=1e-5)


def test_cli_layers_and_audit_read_every_fixture() -> None:
    for path in sorted(FIXTURES.glob("*.gguf")):
        result = runner.invoke(app, ["layers", str(path), "--format", "json"])
        assert result.exit_code == 0, result.output
        document = json.loads(result.stdout)
        assert document["checkpoint"]["format"] == "gguf"
        checkpoint = load(path)
        assert [entry["name"] for entry in document["layers"]] == [
            layer.name for layer in checkpoint.layers
        ]
        audited = runner.invoke(app, ["audit", str(path), "--format", "json"])
        assert audited.exit_code in (0, 1), audited.output
        report = json.loads(audited.stdout)
        assert report["coverage"]["parameters"] == checkpoint.parameters


def _write_model(path: Path, nan_scale: bool) -> None:
    """A one-block model; with ``nan_scale`` the first Q8_0 block of ffn_gate has a NaN scale."""
    rng = np.random.default_rng(3)
    writer = gguf.GGUFWriter(path, "llama")
    writer.add_block_count(1)
    writer.add_head_count(2)
    writer.add_embedding_length(64)

    def q8(rows: int, cols: int) -> np.ndarray:
        return gguf.quants.quantize((rng.standard_normal((rows, cols)) * 0.05).astype(np.float32), T.Q8_0)

    gate = q8(128, 64)
    if nan_scale:
        gate[5, 0:2] = np.frombuffer(np.float16(np.nan).tobytes(), np.uint8)  # d of row 5's block
    for name, raw in (("attn_q", q8(64, 64)), ("attn_k", q8(64, 64)), ("attn_v", q8(64, 64)),
                      ("attn_output", q8(64, 64)), ("ffn_gate", gate), ("ffn_up", q8(128, 64)),
                      ("ffn_down", q8(64, 128))):  # fmt: skip
        writer.add_tensor(f"blk.0.{name}.weight", raw, raw_dtype=T.Q8_0)
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()


def test_audit_sees_a_nan_scale_in_a_quantized_block(tmp_path: Path) -> None:
    # reference: Q8_0 value = d · q (gguf quants.py Q8_0.dequantize_blocks): a NaN d makes
    # every value of its 32-element block NaN, which the nonfinite rule must report.
    good, bad = tmp_path / "good.gguf", tmp_path / "bad.gguf"
    _write_model(good, nan_scale=False)
    _write_model(bad, nan_scale=True)
    values = load(bad).tensors["blk.0.ffn_gate.weight"].read_float32()
    assert int(np.isnan(values).sum()) == 32 and np.isnan(values[5, :32]).all()
    assert runner.invoke(app, ["audit", str(good)]).exit_code == 0
    result = runner.invoke(app, ["audit", str(bad), "--format", "json"])
    assert result.exit_code == 1, result.output
    findings = json.loads(result.stdout)["findings"]
    assert any(f["rule"] == "nonfinite" and "ffn_gate" in json.dumps(f) for f in findings)


def test_missing_package_is_a_one_line_load_error(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "gguf", None)  # import gguf now raises ImportError
    with pytest.raises(LoadError, match=r"pip install 'steelyard\[gguf\]'"):
        load(FIXTURES / "tiny-llama.gguf")


@settings(max_examples=120, deadline=5000, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_mutated_files_read_or_fail_cleanly(tmp_path: Path, data: st.DataObject) -> None:
    name = data.draw(st.sampled_from(["tiny-llama.gguf", "tiny-phi2-v2.gguf", "tiny-moe.gguf"]))
    raw = bytearray((FIXTURES / name).read_bytes())
    action = data.draw(st.sampled_from(["truncate", "flip", "flip-header", "splice"]))
    if action == "truncate":
        raw = raw[: data.draw(st.integers(0, len(raw) - 1))]
    elif action in ("flip", "flip-header"):
        top = 2048 if action == "flip-header" else len(raw) - 1
        for _ in range(data.draw(st.integers(1, 8))):
            raw[data.draw(st.integers(0, top))] ^= 1 << data.draw(st.integers(0, 7))
    else:
        start = data.draw(st.integers(0, 2048))
        raw[start:start] = data.draw(st.binary(min_size=1, max_size=64))
    path = tmp_path / "fuzz.gguf"
    path.write_bytes(bytes(raw))
    try:
        checkpoint = load(path)
        for tensor in checkpoint.tensors.values():
            tensor.read_float32()
        for layer in checkpoint.layers:
            layer.matrix()
    except LoadError:
        pass


@pytest.mark.parametrize("seed", range(4))
def test_mutated_files_through_the_cli_exit_cleanly(tmp_path: Path, seed: int) -> None:
    rng = np.random.default_rng(seed)
    raw = bytearray((FIXTURES / "tiny-llama.gguf").read_bytes())
    for position in rng.integers(0, 1500, 6):
        raw[int(position)] ^= 1 << int(rng.integers(0, 8))
    path = tmp_path / "fuzz.gguf"
    path.write_bytes(bytes(raw))
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code in (0, 1, 2), result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)
    if result.exit_code == 2:
        assert "Traceback" not in result.output


def test_bf16_tensors_widen_from_their_bits_as_the_package_dequantizes_them() -> None:
    # The audit widens bf16 from its bit patterns (Tensor.read_bits) without ml_dtypes; the
    # reference is gguf.quants.dequantize of the same tensor (the gguf package).
    reference = _reference(FIXTURES / "types.gguf")
    checkpoint = load(FIXTURES / "types.gguf")
    names = [name for name, (kind, _, _) in reference.items() if kind is T.BF16]
    assert names
    for name in names:
        tensor = checkpoint.tensors[name]
        assert tensor.read_bits is not None
        expected = np.asarray(reference[name][2], dtype=np.float32)
        widened = tensor.read_float32()
        assert widened.shape == expected.shape
        assert np.array_equal(widened.view(np.uint32), expected.view(np.uint32))
