"""ONNX weights read by spans: tensors whose bytes lie at a known place of the model file or
of its external data carry ``read_span`` (and ``fill_span`` for float32), and layers whose
canonical matrix is the stored initializer itself, or its transpose, carry a ``RowSlice`` or
``ColumnSlice`` orient, so the statistics stream or transpose them slab by slab.

References: ``onnx.numpy_helper.to_array`` of the same initializers (values, then transposed
by numpy where the op reads ``x @ W``), ``numpy.linalg.norm`` and ``numpy.isnan`` counts. The
models are invented here with ``onnx.helper``."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from steelyard import tiled_copy
from steelyard.api import audit, load
from steelyard.graph import ColumnSlice, RowSlice
from steelyard.stats import LayerStats

_D, _F, _V = 24, 40, 50


def _model(rng: np.random.Generator, nan_at: tuple[int, int] | None = None) -> onnx.ModelProto:
    def draw(*shape: int) -> np.ndarray:
        return (rng.standard_normal(shape) * 0.2).astype(np.float32)

    w_in_out = draw(_D, _F)  # MatMul x @ W: [in, out]
    if nan_at is not None:
        w_in_out[nan_at] = np.nan
    inits = {
        "table": draw(_V, _D),
        "w_in_out": w_in_out,
        "w_gemm_t": draw(_D, _F),  # Gemm transB=1: [out, in]
        "w_gemm_alpha": draw(_D, _D),  # Gemm transB=0, alpha 0.5: not a plain rearrangement
        "w_behind_transpose": draw(_D, _D),  # MatMul of Transpose(W): an op in between
        "w_conv": draw(8, 1, 3, 3),
    }
    nodes = [
        helper.make_node("Gather", ["table", "ids"], ["e"]),
        helper.make_node("MatMul", ["e", "w_in_out"], ["h1"]),
        helper.make_node("Relu", ["h1"], ["a1"]),
        helper.make_node("Gemm", ["a1", "w_gemm_t"], ["h2"], transB=1),
        helper.make_node("Gemm", ["h2", "w_gemm_alpha"], ["h3"], alpha=0.5),
        helper.make_node("Transpose", ["w_behind_transpose"], ["wt"], perm=[1, 0]),
        helper.make_node("MatMul", ["h3", "wt"], ["h4"]),
        helper.make_node("Conv", ["img", "w_conv"], ["c"], pads=[1, 1, 1, 1]),
    ]
    graph = helper.make_graph(
        nodes,
        "invented",
        [
            helper.make_tensor_value_info("ids", TensorProto.INT64, [2]),
            helper.make_tensor_value_info("img", TensorProto.FLOAT, [1, 1, 6, 6]),
        ],
        [
            helper.make_tensor_value_info("h4", TensorProto.FLOAT, [2, _D]),
            helper.make_tensor_value_info("c", TensorProto.FLOAT, [1, 8, 6, 6]),
        ],
        [numpy_helper.from_array(v, k) for k, v in inits.items()],
    )
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def _save(model: onnx.ModelProto, folder: Path, external: bool) -> Path:
    path = folder / "model.onnx"
    if external:
        onnx.save_model(
            model, str(path), save_as_external_data=True, location="model.onnx.data", size_threshold=0
        )
    else:
        onnx.save_model(model, str(path))
    return path


def _reference(model: onnx.ModelProto) -> dict[str, np.ndarray]:
    return {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}


#: (stored tensor, orient class or None, canonical matrix from the stored array)
_EXPECTED = {
    "table": (RowSlice, lambda a: a),
    "w_in_out": (ColumnSlice, lambda a: a.T),
    "w_gemm_t": (RowSlice, lambda a: a),
    "w_gemm_alpha": (None, lambda a: 0.5 * a.T),
    "w_behind_transpose": (None, lambda a: a),  # (W^T) read as [in, out], transposed back
    "w_conv": (RowSlice, lambda a: a.reshape(a.shape[0], -1)),
}


@pytest.mark.parametrize("external", [False, True])
def test_layers_read_by_spans_equal_the_onnx_arrays(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rng: np.random.Generator, external: bool
) -> None:
    monkeypatch.setattr(tiled_copy, "SLAB_BYTES", 256)  # several slabs per transposed matrix
    model = _model(rng)
    path = _save(model, tmp_path, external)
    reference = _reference(onnx.load(str(path)))
    checkpoint = load(path)
    stats = LayerStats(checkpoint)
    seen = set()
    for layer in checkpoint.layers:
        orient_class, canonical = _EXPECTED[layer.weight]
        seen.add(layer.weight)
        if orient_class is None:
            assert layer.orient is None, layer.name
        else:
            assert isinstance(layer.orient, orient_class), layer.name
        expected = canonical(reference[layer.weight]).astype(np.float32)
        got = stats.matrix(layer)
        np.testing.assert_array_equal(got, expected, err_msg=layer.name)
        norms = np.linalg.norm(expected.astype(np.float64), axis=1)
        np.testing.assert_allclose(stats.row_norms(layer), norms, rtol=1e-6, err_msg=layer.name)
    assert seen == set(_EXPECTED)


@pytest.mark.parametrize("external", [False, True])
def test_spans_of_stored_tensors(tmp_path: Path, rng: np.random.Generator, external: bool) -> None:
    model = _model(rng)
    path = _save(model, tmp_path, external)
    reference = _reference(onnx.load(str(path)))
    checkpoint = load(path)
    for name, expected in reference.items():
        tensor = checkpoint.tensors[name]
        assert tensor.read_span is not None and tensor.fill_span is not None, name
        flat = expected.reshape(-1)
        for start, stop in ((0, 1), (3, 17), (flat.size - 5, flat.size), (0, flat.size)):
            np.testing.assert_array_equal(tensor.read_span(start, stop), flat[start:stop])
            into = np.full((1, stop - start), -3.0, dtype=np.float32)
            tensor.widen_part(start, stop, into)
            np.testing.assert_array_equal(into[0], flat[start:stop])


def test_a_nan_in_a_transposed_weight_is_counted_and_reported(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    """The pass over a column-run layer counts its tensor's NaN (reference: numpy.isnan), and
    the audit's finding gives its stored position and makes that unit's norm NaN."""
    model = _model(rng, nan_at=(5, 13))
    path = _save(model, tmp_path, external=True)
    checkpoint = load(path)
    stats = LayerStats(checkpoint)
    (layer,) = [x for x in checkpoint.layers if x.weight == "w_in_out"]
    norms = stats.row_norms(layer)
    stored = _reference(onnx.load(str(path)))["w_in_out"]
    assert stats.nonfinite(checkpoint.tensors["w_in_out"])[0] == int(np.isnan(stored).sum()) == 1
    assert [int(i) for i in np.flatnonzero(np.isnan(norms))] == [13]  # stored column 13
    found = [f for f in audit(path).audits[0].findings if f.rule == "nonfinite"]
    assert [(f.layer, f.evidence["nan"], f.evidence["first_positions"]) for f in found] == [
        ("w_in_out", 1, [[5, 13]])
    ]


def test_external_data_that_shrinks_after_loading_fails_with_the_reason(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    """The data file loses its tail after the model was listed: a span read, the whole-tensor
    read and the transposed read of a column-run layer all stop with the loader's reason
    instead of returning short or stale values."""
    from steelyard.errors import LoadError

    path = _save(_model(rng), tmp_path, external=True)
    checkpoint = load(path)
    stats = LayerStats(checkpoint)
    (layer,) = [x for x in checkpoint.layers if x.weight == "w_in_out"]
    data = tmp_path / "model.onnx.data"
    data.write_bytes(data.read_bytes()[:16])
    tensor = checkpoint.tensors["w_in_out"]
    with pytest.raises(LoadError, match="became shorter"):
        tensor.read()
    with pytest.raises(LoadError, match="became shorter"):
        tensor.widen_part(0, tensor.size, np.zeros(tensor.size, np.float32))
    with pytest.raises(LoadError, match="became shorter"):
        stats.matrix(layer)
