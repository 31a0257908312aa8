"""Keras attention layers split into heads: ``MultiHeadAttention`` and ``GroupQueryAttention`` in
``.keras``, ``.weights.h5`` (with and without its config) and legacy ``.h5`` files.

Sources beside each check:

* what keras says: ``fixtures/keras_heads/keras_heads.json``, written by keras 3.15 itself
  (``fixtures/gen_keras_heads.py``): each layer's ``get_config()`` counts, its sub-layers'
  kernel shapes and the head map measured on the layer object (perturbing the kernel slice
  ``[:, h, :]`` moves only head ``h``'s attention scores);
* the stored bytes: read with ``h5py`` (the reference HDF5 library), never through steelyard;
* the kernel layouts ``[d, heads, head_dim]`` and ``[heads, value_dim, d]``: the keras docs of
  ``keras.layers.MultiHeadAttention`` / ``GroupQueryAttention`` and their ``EinsumDense``
  equations (``bqm,muh->bquh``, ``bquh,uhm->bqm``);
* the output-value circuit ``W_O,h·W_V,h``: Elhage et al. 2021, formed here with numpy.

The files of several shapes at the end are written here with ``h5py`` in Keras 3's layout
(random weights), so the recognition is not tuned to the committed fixtures.
"""

from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest

import steelyard
from steelyard.api import audit
from steelyard.errors import LoadError
from steelyard.render.html.charts import parts_chart
from steelyard.transformer.model import AttentionBlock

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "keras_heads"
KERAS = json.loads((FIXTURES / "keras_heads.json").read_text())
PLANTED = json.loads((FIXTURES / "planted.json").read_text())
FILES = ("clean.keras", "clean.weights.h5", "planted.keras", "planted.weights.h5", "planted.h5")
PARTS = {"q": "query", "k": "key", "v": "value", "o": "attention_output"}


def _blocks(name: str) -> dict[str, AttentionBlock]:
    structure = steelyard.load(FIXTURES / name).transformer
    assert structure is not None
    return {block.name: block for block in structure.attention}


def _stored(name: str) -> dict[tuple[str, str, str], np.ndarray]:
    """(block, sub-layer, kernel|bias) → the array h5py reads from the file."""
    out: dict[tuple[str, str, str], np.ndarray] = {}
    path = FIXTURES / name
    if name.endswith(".keras"):
        with zipfile.ZipFile(path) as archive:
            data = io.BytesIO(archive.read("model.weights.h5"))
        handle = h5py.File(data, "r")
    else:
        handle = h5py.File(path, "r")
    with handle as f:
        if "model_weights" in f:  # legacy: model_weights/<layer>/<layer>/<sub-layer>/<variable>
            for block in KERAS:
                for part in PARTS.values():
                    for var in ("kernel", "bias"):
                        out[(block, part, var)] = f[f"model_weights/{block}/{block}/{part}/{var}"][()]
            return out
        for key in f["layers"]:  # Keras 3: layers/<key>/<attribute>/vars/<i>, named by attrs
            group = f["layers"][key]
            block = group["vars"].attrs.get("name")
            if block not in KERAS:
                continue
            for sub in group.values():
                if isinstance(sub, h5py.Group) and "vars" in sub and sub["vars"].attrs.get("name") in PARTS.values():
                    part = sub["vars"].attrs["name"]
                    out[(block, part, "kernel")] = sub["vars/0"][()]
                    out[(block, part, "bias")] = sub["vars/1"][()]
    return out


@pytest.mark.parametrize("name", FILES)
def test_structure_matches_the_keras_config(name: str) -> None:
    blocks = _blocks(name)
    assert sorted(blocks) == sorted(KERAS)
    for block_name, facts in KERAS.items():
        block, config, kernels = blocks[block_name], facts["config"], facts["kernels"]
        heads = config.get("num_heads", config.get("num_query_heads"))
        kv = config.get("num_key_value_heads", heads)
        head_dim = config.get("key_dim", config.get("head_dim"))
        value_dim = config.get("value_dim", head_dim)
        assert (len(block.heads), block.kv_heads, block.head_dim, block.value_dim) == (heads, kv, head_dim, value_dim)
        assert block.width == kernels["query"][0]
        assert kernels["key"][1] == kv and kernels["output"][:2] == [heads, value_dim]


@pytest.mark.parametrize("name", FILES)
def test_head_spans_select_the_slices_keras_stores_for_that_head(name: str) -> None:
    checkpoint = steelyard.load(FIXTURES / name)
    assert checkpoint.transformer is not None
    stored = _stored(name)
    checked = 0
    for block in checkpoint.transformer.attention:
        facts = KERAS[block.name]
        for head in block.heads:
            # keras measured: perturbing query slice [:, h, :] moves head h's scores only,
            # and key slice [:, g, :] moves exactly the query heads that read key/value head g.
            assert facts["query_head_moves"][head.index] == [head.index]
            assert head.index in facts["key_head_moves"][head.kv_index]
            for short, part in PARTS.items():
                span = getattr(head, short)
                layer = checkpoint.layer(span.layer)
                assert layer is not None and span.layer == f"{block.name}/{part}"
                matrix, bias = layer.matrix(), layer.bias_vector()
                kernel = stored[(block.name, part, "kernel")]
                owner = head.index if short in ("q", "o") else head.kv_index
                if short == "o":
                    assert span.axis == "columns"
                    np.testing.assert_array_equal(matrix[:, span.start : span.stop], kernel[owner].T)
                else:
                    np.testing.assert_array_equal(matrix[span.start : span.stop], kernel[:, owner, :].T)
                    np.testing.assert_array_equal(bias[span.start : span.stop], stored[(block.name, part, "bias")][owner])
                checked += 1
    assert checked == 2 * 4 * 4  # two blocks, four heads, four projections


def _found(path: Path) -> list[Any]:
    return [f for f in audit(path).audits[0].findings if f.rule == "head-circuits"]


@pytest.mark.parametrize("name", ["planted.keras", "planted.weights.h5", "planted.h5"])
def test_planted_idle_and_twin_heads_are_found_and_named(name: str) -> None:
    found = _found(FIXTURES / name)
    kinds = set()
    for f in found:
        heads = tuple(f.evidence["heads"]) if "heads" in f.evidence else (f.evidence["head"],)
        kinds.add(("twin" if "twins" in f.message else "idle", f.evidence["block"], heads))
        assert f"of {f.evidence['block']}" in f.message and f.part.startswith("head")
        assert f.layer == f"{f.evidence['block']}/attention_output"
    planted = {("idle", p["block"], (p["head"],)) for p in PLANTED["idle_heads"]}
    planted |= {("twin", p["block"], tuple(p["heads"])) for p in PLANTED["twin_heads"]}
    assert kinds == planted


@pytest.mark.parametrize("name", ["clean.keras", "clean.weights.h5"])
def test_clean_copies_have_no_head_findings(name: str) -> None:
    assert _found(FIXTURES / name) == []


def test_heads_map_data_is_measured_for_the_keras_file() -> None:
    result = audit(FIXTURES / "planted.keras").audits[0]
    stored = _stored("planted.keras")
    for health in result.layers:
        if health.layer["name"] != "mha/attention_output":
            continue
        measured = health.measured["head-circuits.heads"]
        assert measured["block"] == "mha" and len(measured["ov_norm"]) == 4
        out, value = stored[("mha", "attention_output", "kernel")], stored[("mha", "value", "kernel")]
        for h, norm in enumerate(measured["ov_norm"]):
            # OV_h = W_O,h · W_V,h formed from the h5py-read kernels (Elhage et al. 2021).
            expected = np.linalg.norm(out[h].T @ value[:, h, :].T)
            assert norm == pytest.approx(expected, rel=1e-4, abs=1e-6)
        break
    else:
        pytest.fail("no layer health for mha/attention_output")
    chart = parts_chart(result)
    assert chart is not None
    rows = [r for r in chart["data"]["values"] if r["kind"] == "head"]
    assert {(r["block"], r["index"]) for r in rows} == {(b, h) for b in ("mha", "gqa") for h in range(4)}
    # The idle head is outlined (the chart outlines findings naming one ``head``; twins name
    # ``heads`` and are not outlined by today's chart).
    assert ("mha", 2) in {(r["block"], r["index"]) for r in rows if r["flagged"]}
    assert next(r for r in rows if (r["block"], r["index"]) == ("mha", 2))["value"] == 0.0


# ---- files of several shapes, written here in Keras 3's layout ------------------------------


def _tensor(node: str) -> dict[str, Any]:
    return {"class_name": "__keras_tensor__", "config": {"keras_history": [node, 0, 0]}}


def _write_keras(path: Path, spec: dict[str, Any], rng: np.random.Generator, declared: dict[str, Any] | None = None) -> dict[str, np.ndarray]:
    """A ``.keras`` archive with one attention layer reading ``inputs`` (one or two input
    layers); returns the kernels it stores, by sub-layer."""
    heads, kv, dh, dv, d = spec["heads"], spec["kv"], spec["dh"], spec["dv"], spec["d"]
    gqa = spec["cls"] == "GroupQueryAttention"
    config: dict[str, Any] = {"name": "attn"}
    if gqa:
        config |= {"head_dim": dh, "num_query_heads": heads, "num_key_value_heads": kv}
    else:
        config |= {"num_heads": heads, "key_dim": dh, "value_dim": dv}
    config |= declared or {}
    inputs = ["q_in", "kv_in"] if spec.get("cross") else ["q_in"]
    layers = [{"class_name": "InputLayer", "name": n, "config": {"name": n, "batch_shape": [None, 5, d]}, "inbound_nodes": []} for n in inputs]
    layers.append({"class_name": spec["cls"], "name": "attn", "config": config,
                   "inbound_nodes": [{"args": [_tensor(inputs[0]), _tensor(inputs[-1])], "kwargs": {}}]})
    model = {"class_name": "Functional", "config": {"name": "f", "layers": layers,
             "input_layers": [[n, 0, 0] for n in inputs], "output_layers": [["attn", 0, 0]]}}
    out = tuple(spec.get("out", (d,)))  # MultiHeadAttention's output_shape
    if "out" in spec:
        config["output_shape"] = list(out)
    shapes = {"query": (d, heads, dh), "key": (d, kv, dh), "value": (d, kv, dv), "output": (heads, dv, *out)}
    stored = {p: rng.standard_normal(s).astype(np.float32) for p, s in shapes.items()}
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        prefix = "_" if gqa else ""
        key = "grouped_query_attention" if gqa else "multi_head_attention"
        for n in inputs:
            f.create_group(f"layers/{n}/vars")
        f.create_group(f"layers/{key}/vars").attrs["name"] = "attn"
        for part, kernel in stored.items():
            group = f.create_group(f"layers/{key}/{prefix}{part}_dense/vars")
            group.create_dataset("0", data=kernel)
            group.create_dataset("1", data=np.zeros(kernel.shape[2:] if part == "output" else kernel.shape[1:], np.float32))
        f.create_group("vars")
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("config.json", json.dumps(model))
        archive.writestr("metadata.json", json.dumps({"keras_version": "3.15.1"}))
        archive.writestr("model.weights.h5", buffer.getvalue())
    return stored


SHAPES = [
    {"cls": "MultiHeadAttention", "heads": 2, "kv": 2, "dh": 3, "dv": 5, "d": 7},
    {"cls": "MultiHeadAttention", "heads": 3, "kv": 3, "dh": 2, "dv": 4, "d": 6, "out": (2, 5)},
    {"cls": "MultiHeadAttention", "heads": 6, "kv": 6, "dh": 4, "dv": 4, "d": 24, "cross": True},
    {"cls": "GroupQueryAttention", "heads": 8, "kv": 2, "dh": 4, "dv": 4, "d": 16},
    {"cls": "GroupQueryAttention", "heads": 3, "kv": 1, "dh": 5, "dv": 5, "d": 10},
]


@pytest.mark.parametrize("spec", SHAPES, ids=lambda s: f"{s['cls']}-{s['heads']}x{s['kv']}-d{s['d']}")
def test_generated_files_of_several_shapes(tmp_path: Path, spec: dict[str, Any]) -> None:
    path = tmp_path / "model.keras"
    stored = _write_keras(path, spec, np.random.default_rng(spec["heads"]))
    checkpoint = steelyard.load(path)
    assert checkpoint.transformer is not None
    (block,) = checkpoint.transformer.attention
    assert (len(block.heads), block.kv_heads, block.head_dim, block.value_dim) == (spec["heads"], spec["kv"], spec["dh"], spec["dv"])
    group = spec["heads"] // spec["kv"]
    for head in block.heads:
        assert head.kv_index == head.index // group  # ops.repeat of each key/value head (keras source)
        q = checkpoint.layer(head.q.layer)
        o = checkpoint.layer(head.o.layer)
        assert q is not None and o is not None
        np.testing.assert_array_equal(q.matrix()[head.q.start : head.q.stop], stored["query"][:, head.index, :].T)
        # Output input h·d_v + j is kernel[h, j, …]; its units are output_shape flattened.
        want = stored["output"][head.index].reshape(spec["dv"], -1).T
        np.testing.assert_array_equal(o.matrix()[:, head.o.start : head.o.stop], want)
    query = checkpoint.layer("attn/query")
    assert query is not None
    # Cross-attention reads two inputs: the query projection is not linked to either.
    assert query.from_input is not spec.get("cross", False)


def test_a_config_that_disagrees_with_the_stored_kernels_is_refused(tmp_path: Path) -> None:
    spec = {"cls": "MultiHeadAttention", "heads": 4, "kv": 4, "dh": 2, "dv": 2, "d": 8}
    path = tmp_path / "wrong.keras"
    _write_keras(path, spec, np.random.default_rng(0), declared={"num_heads": 2, "key_dim": 4})
    with pytest.raises(LoadError, match=r"wrong\.keras.*attn.*declares heads 2 \(stored 4\)"):
        steelyard.load(path)


def test_empty_head_axes_are_refused_with_one_line(tmp_path: Path) -> None:
    # kv = 0 would divide by zero when heads are shared out: a bad file, exit 2, not a crash.
    spec = {"cls": "GroupQueryAttention", "heads": 2, "kv": 0, "dh": 2, "dv": 2, "d": 4}
    path = tmp_path / "empty.keras"
    _write_keras(path, spec, np.random.default_rng(0), declared={"num_key_value_heads": 1})
    with pytest.raises(LoadError, match=r"empty\.keras.*attn.*expected non-empty"):
        steelyard.load(path)


@pytest.mark.parametrize("kind", ["keras", "h5"])
def test_adam_moments_of_attention_variables_map_as_keras_looks_them_up(kind: str) -> None:
    # Reference: keras's own optimizer._get_variable_index at save time (adam_gated.expected.npz,
    # fixtures/gen_keras_heads.py); query, key, gate and value kernels share one shape, so only
    # Keras' variable order (query, key, gate, value, attention_output) puts each moment right.
    expected = np.load(FIXTURES / "adam_gated.expected.npz")
    checkpoint = steelyard.load(FIXTURES / f"adam_gated.{kind}")
    state = checkpoint.optimizer
    assert state is not None and state.kind == "adam", checkpoint.notes
    paths = [str(p) for p in expected["path"]]
    assert sum("/gate/" in p for p in paths) == 2  # the gated layer's gate kernel and bias
    for i, path in enumerate(paths):
        layer_name, _, variable = path.rpartition("/")
        layer = checkpoint.layer(layer_name)
        assert layer is not None, path
        name = layer.weight if variable == "kernel" else layer.bias
        assert name is not None
        np.testing.assert_array_equal(checkpoint.tensors[name].read(), expected[f"w/{i}"])
        slots = state.slots[name]
        assert slots.first_moment is not None and slots.second_moment is not None
        np.testing.assert_array_equal(slots.first_moment.read(), expected[f"m/{i}"])
        np.testing.assert_array_equal(slots.second_moment.read(), expected[f"v/{i}"])
    gated = checkpoint.transformer
    assert gated is not None
    assert [(b.name, len(b.heads), b.kv_heads) for b in gated.attention] == [("gated", 2, 2), ("gqa", 4, 2)]


def test_keras2_legacy_h5_with_multi_head_attention(tmp_path: Path) -> None:
    # The tf.keras 2 layout, written here with h5py; from memory of tf.keras 2.x files (no
    # tf.keras in the fixture venv): model_weights/<layer>/<layer>/<sub-layer>/kernel:0, the
    # weight_names attribute listing query, key, value, attention_output (kernel, bias).
    heads, dh, d = 3, 2, 6
    rng = np.random.default_rng(3)
    shapes = {"query": (d, heads, dh), "key": (d, heads, dh), "value": (d, heads, dh), "attention_output": (heads, dh, d)}
    kernels = {p: rng.standard_normal(s).astype(np.float32) for p, s in shapes.items()}
    model = {"class_name": "Functional", "config": {"name": "model", "layers": [
        {"class_name": "InputLayer", "name": "input_1", "config": {"name": "input_1", "batch_input_shape": [None, 4, d]}, "inbound_nodes": []},
        {"class_name": "MultiHeadAttention", "name": "multi_head_attention", "inbound_nodes": [[["input_1", 0, 0, {"value": ["input_1", 0, 0]}]]],
         "config": {"name": "multi_head_attention", "num_heads": heads, "key_dim": dh, "value_dim": dh, "output_shape": None, "use_bias": True}},
    ], "input_layers": [["input_1", 0, 0]], "output_layers": [["multi_head_attention", 0, 0]]}}
    path = tmp_path / "tf2.h5"
    with h5py.File(path, "w") as f:
        f.attrs["keras_version"] = b"2.15.0"
        f.attrs["model_config"] = json.dumps(model).encode()
        root = f.create_group("model_weights")
        root.attrs["layer_names"] = [b"input_1", b"multi_head_attention"]
        root.create_group("input_1").attrs["weight_names"] = []
        group = root.create_group("multi_head_attention")
        names = []
        for part, kernel in kernels.items():
            for variable, value in (("kernel", kernel), ("bias", np.zeros(kernel.shape[2:] if part == "attention_output" else kernel.shape[1:], np.float32))):
                name = f"multi_head_attention/{part}/{variable}:0"
                group.create_dataset(name, data=value)
                names.append(name.encode())
        group.attrs["weight_names"] = names
    checkpoint = steelyard.load(path)
    assert checkpoint.transformer is not None
    (block,) = checkpoint.transformer.attention
    assert (block.name, len(block.heads), block.head_dim) == ("multi_head_attention", heads, dh)
    for head in block.heads:
        q = checkpoint.layer(head.q.layer)
        assert q is not None
        np.testing.assert_array_equal(q.matrix()[head.q.start : head.q.stop], kernels["query"][:, head.index, :].T)
