"""Layers of graph-less files (safetensors, npz, PyTorch state dicts): weight normalisation,
depthwise groups, and layers declared in a user layout file.

Real files come from ``fixtures/gen_conventions_real.py`` (torch 2.13, CPU): beside each,
``*.expected.npz`` holds what torch itself computed (effective weights, ``groups``), so these
tests need no torch. Flax-style files are written here with the ``safetensors`` package.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from safetensors import numpy as st_numpy

from steelyard.cli import app
from steelyard.errors import LoadError, SteelyardError
from steelyard.graph import Activation, Checkpoint, LayerKind, Link, RowSlice, TensorRole
from steelyard.loaders import load

FIX = Path(__file__).resolve().parents[2] / "fixtures" / "real" / "conventions"
WEIGHT_NORMED = (
    "old_fc",
    "old_conv",
    "old_fc_whole",
    "new_fc",
    "new_conv",
    "new_deconv",
    "new_fc_nobias",
)


def _covered(checkpoint: Checkpoint) -> set[str]:
    return {name for layer in checkpoint.layers for name in layer.tensor_names}


# --------------------------------------------------------------------------------------------
# Weight normalisation: w = g·v/‖v‖, the norm over every dim but ``dim``
# (https://pytorch.org/docs/stable/generated/torch.nn.utils.weight_norm.html and
# torch.nn.utils.parametrizations.weight_norm); expected values are torch's own.


@pytest.mark.parametrize("suffix", ["safetensors", "npz", "pt"])
def test_weight_normalised_layers_expose_the_effective_weight(suffix: str) -> None:
    checkpoint = load(FIX / f"weightnorm.{suffix}")
    expected = np.load(FIX / "weightnorm.expected.npz")
    layers = {layer.name: layer for layer in checkpoint.layers}
    assert set(layers) == set(WEIGHT_NORMED)
    for name in WEIGHT_NORMED:
        layer = layers[name]
        want = expected[name]
        if layer.kind is LayerKind.CONV_TRANSPOSE:
            want = np.swapaxes(want, 0, 1)  # torch ConvTranspose [in, out, k] → canonical
        np.testing.assert_allclose(layer.weight_view(), want, rtol=2e-6, atol=1e-7)
        # The stored direction v is the layer's weight tensor, the gain g its aux tensor.
        g_name = (
            f"{name}.weight_g" if name.startswith("old") else f"{name}.parametrizations.weight.original0"
        )
        assert layer.aux == (g_name,)
        assert layer.weight.endswith(("weight_v", "original1"))
        # Not a RowSlice: the audit must read the effective weight, not stream v.
        assert not isinstance(layer.orient, RowSlice)
    assert layers["new_fc_nobias"].bias is None and layers["old_fc"].bias == "old_fc.bias"
    params = {n for n, t in checkpoint.tensors.items() if t.role is TensorRole.PARAMETER}
    assert params <= _covered(checkpoint)


def test_weight_norm_differs_from_the_direction_tensor() -> None:
    """The fixture's gains are not ‖v‖, so reading v as the weight would be wrong."""
    checkpoint = load(FIX / "weightnorm.safetensors")
    layer = checkpoint.layer("old_fc")
    assert layer is not None
    v = checkpoint.tensors[layer.weight].read()
    assert not np.allclose(layer.weight_view(), v)


def test_squeezed_gain_and_mismatched_pair(tmp_path: Path, rng: np.random.Generator) -> None:
    v = rng.normal(size=(4, 3)).astype(np.float32)
    g = rng.uniform(0.5, 2.0, size=4).astype(np.float32)
    path = tmp_path / "wn.safetensors"
    st_numpy.save_file(
        {"a.weight_v": v, "a.weight_g": g, "b.weight_v": v, "b.weight_g": np.ones((2, 2), np.float32)},
        path,
    )
    checkpoint = load(path)
    layer = checkpoint.layer("a")
    assert layer is not None
    norms = np.linalg.norm(v, axis=1, keepdims=True)  # dim 0: one norm per output row
    np.testing.assert_allclose(layer.weight_view(), g[:, None] * v / norms, rtol=1e-6)
    assert checkpoint.layer("b") is None  # a g that fits no dim is not guessed


# --------------------------------------------------------------------------------------------
# Depthwise and grouped convolutions: groups as torch built them


def test_depthwise_and_grouped_convolutions_get_their_groups() -> None:
    checkpoint = load(FIX / "depthwise.safetensors")
    expected = np.load(FIX / "depthwise.expected.npz")
    layers = {layer.name: layer for layer in checkpoint.layers}
    for name in expected.files:
        if name == "blocks.0.0":
            continue  # no producer in the file: see the next test
        assert layers[name].groups == int(expected[name]), name
    assert layers["seq.3"].inputs_from == ("seq.0",)
    assert layers["net.conv2"].inputs_from == ("net.conv1",)
    assert layers["net.conv4"].inputs_from == ("net.conv3",)


def test_depthwise_without_a_known_producer_is_noted() -> None:
    checkpoint = load(FIX / "depthwise.safetensors")
    layer = checkpoint.layer("blocks.0.0")
    assert layer is not None and layer.groups == 1 and layer.in_per_group == 1
    assert any("blocks.0.0" in note and "no known producer" in note for note in checkpoint.notes)


def test_depthwise_found_in_natural_order_not_sorted_order(tmp_path: Path) -> None:
    """safetensors sorts keys, so ``f.10`` is stored before ``f.9``; the producer of the
    depthwise ``f.10`` (16 channels) is still ``f.9``, not ``f.1``."""
    zeros = np.zeros
    path = tmp_path / "m.safetensors"
    st_numpy.save_file(
        {
            "f.1.weight": zeros((8, 3, 3, 3), np.float32),
            "f.9.weight": zeros((16, 8, 1, 1), np.float32),
            "f.10.weight": zeros((16, 1, 3, 3), np.float32),
        },
        path,
    )
    layer = load(path).layer("f.10")
    assert layer is not None and layer.groups == 16


# --------------------------------------------------------------------------------------------
# Layout files that declare layers (Flax-style names, [in, out] kernels)


def _flax(tmp_path: Path, rng: np.random.Generator) -> tuple[Path, dict[str, np.ndarray]]:
    arrays = {
        "params/Embed_0/embedding": rng.normal(size=(20, 6)).astype(np.float32),
        "params/Conv_0/kernel": rng.normal(size=(3, 3, 6, 8)).astype(np.float32),
        "params/Conv_0/bias": rng.normal(size=8).astype(np.float32),
        "params/Dense_0/kernel": rng.normal(size=(8, 16)).astype(np.float32),
        "params/Dense_0/bias": rng.normal(size=16).astype(np.float32),
        "params/Dense_1/kernel": rng.normal(size=(16, 4)).astype(np.float32),
        "params/Dense_1/bias": rng.normal(size=4).astype(np.float32),
        "batch_stats/step": np.array(3, dtype=np.int64),
    }
    path = tmp_path / "flax.safetensors"
    st_numpy.save_file(arrays, path)  # reference writer: safetensors
    return path, arrays


FLAX_LAYOUT = """
orientation = "in-out"

[[layer]]
name = "Embed_0"
weight = "params/Embed_0/embedding"
kind = "embedding"
orientation = "out-in"

[[layer]]
name = "Conv_0"
weight = "params/Conv_0/kernel"
bias = "params/Conv_0/bias"
kind = "conv"
activation = "relu"

[[layer]]
name = "Dense_0"
weight = "params/Dense_0/kernel"
bias = "params/Dense_0/bias"
activation = "gelu"
inputs-from = ["Conv_0"]

[[layer]]
name = "Dense_1"
weight = "params/Dense_1/kernel"
bias = "params/Dense_1/bias"
activation = "softmax"
inputs-from = ["Dense_0"]
"""


def test_layout_declares_flax_layers(tmp_path: Path, rng: np.random.Generator) -> None:
    path, arrays = _flax(tmp_path, rng)
    before = load(path)
    assert not before.layers  # nothing in these names follows PyTorch conventions
    (tmp_path / "flax.layout.toml").write_text(FLAX_LAYOUT)
    checkpoint = load(path)
    layers = {layer.name: layer for layer in checkpoint.layers}
    assert list(layers) == ["Embed_0", "Conv_0", "Dense_0", "Dense_1"]
    dense0, dense1, conv = layers["Dense_0"], layers["Dense_1"], layers["Conv_0"]
    # Flax Dense kernels are [in, out]; Conv kernels [kh, kw, in, out] (flax.linen docs).
    np.testing.assert_array_equal(dense0.weight_view(), arrays["params/Dense_0/kernel"].T)
    np.testing.assert_array_equal(
        conv.weight_view(), np.transpose(arrays["params/Conv_0/kernel"], (3, 2, 0, 1))
    )
    np.testing.assert_array_equal(
        layers["Embed_0"].weight_view(), arrays["params/Embed_0/embedding"]
    )
    assert (conv.units, conv.in_per_group, conv.kernel) == (8, 6, (3, 3))
    np.testing.assert_array_equal(dense1.bias_vector(), arrays["params/Dense_1/bias"])  # type: ignore[arg-type]
    assert dense0.activation is Activation.GELU and dense1.activation is Activation.SOFTMAX
    assert dense1.inputs_from == ("Dense_0",) and dense1.linked_by is Link.CONFIG
    assert dense1.is_output and layers["Embed_0"].kind is LayerKind.EMBEDDING
    params = {n for n, t in checkpoint.tensors.items() if t.role is TensorRole.PARAMETER}
    assert params == _covered(checkpoint)
    assert any("layout file" in note for note in checkpoint.notes)


def test_declared_layer_replaces_the_inferred_one(tmp_path: Path, rng: np.random.Generator) -> None:
    """A tensor the names misread (a TF kernel under a PyTorch-like name) is declared anew."""
    kernel = rng.normal(size=(5, 9)).astype(np.float32)
    path = tmp_path / "m.safetensors"
    st_numpy.save_file({"proj.weight": kernel, "head.weight": rng.normal(size=(2, 9)).astype(np.float32)}, path)
    (tmp_path / "m.layout.toml").write_text(
        '[[layer]]\nname = "projection"\nweight = "proj.weight"\naxes = [1, 0]\n'
        '[[layer]]\nname = "head"\ninputs-from = ["projection"]\n'
    )
    checkpoint = load(path)
    # The declared layer takes the inferred one's place (safetensors stores "head" first).
    assert [layer.name for layer in checkpoint.layers] == ["head", "projection"]
    projection = checkpoint.layer("projection")
    assert projection is not None and projection.units == 9
    np.testing.assert_array_equal(projection.matrix(), kernel.T)
    head = checkpoint.layer("head")
    assert head is not None and head.inputs_from == ("projection",)


@pytest.mark.parametrize(
    ("entry", "message"),
    [
        ('name = "X"\nweight = "params/Nope/kernel"', "'params/Nope/kernel' is not in the checkpoint"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\nbias = "params/Dense_1/bias"', "has 16 units"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\nunits = 3', "unknown key(s) ['units']"),
        ('name = "X"\nbias = "params/Dense_0/bias"', "need a 'weight'"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\naxes = [0, 0]', "no ordering"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\nkind = "conv"', "cannot have"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\nkind = "recurrent"', "cannot be declared"),
        ('name = "X"\nweight = "batch_stats/step"', "not a floating weight"),
        ('name = "X"\nweight = "params/Dense_1/kernel"\ninputs-from = ["Y"]', "unknown layer"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\ngroups = 0', "positive integer"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\naxes = [1, 0]\norientation = "in-out"', "not both"),
        ('name = "X"\nweight = "params/Dense_0/kernel"\nactivation = "swish"', "unknown activation"),
    ],
)
def test_invalid_declarations_name_the_layout_file(
    tmp_path: Path, rng: np.random.Generator, entry: str, message: str
) -> None:
    path, _ = _flax(tmp_path, rng)
    layout = tmp_path / "flax.layout.toml"
    layout.write_text(f'orientation = "in-out"\n[[layer]]\n{entry}\n')
    with pytest.raises(LoadError) as caught:
        load(path)
    assert isinstance(caught.value, SteelyardError)
    assert str(layout) in str(caught.value) and message in str(caught.value)


def test_declared_link_must_match_the_producer_units(tmp_path: Path, rng: np.random.Generator) -> None:
    path, _ = _flax(tmp_path, rng)
    layout = tmp_path / "flax.layout.toml"
    layout.write_text(
        'orientation = "in-out"\n'
        '[[layer]]\nname = "A"\nweight = "params/Dense_0/kernel"\n'
        '[[layer]]\nname = "B"\nweight = "params/Conv_0/kernel"\nkind = "conv"\ninputs-from = ["A"]\n'
    )
    with pytest.raises(LoadError, match="reads 6 inputs but 'A' has 16 units"):
        load(path)
    layout.write_text(
        'orientation = "in-out"\n'
        '[[layer]]\nname = "A"\nweight = "params/Dense_0/kernel"\n'
        '[[layer]]\nname = "A"\nweight = "params/Dense_1/kernel"\n'
    )
    with pytest.raises(LoadError, match="listed twice"):
        load(path)


def test_cli_exits_2_on_a_bad_layout(tmp_path: Path, rng: np.random.Generator) -> None:
    path, _ = _flax(tmp_path, rng)
    (tmp_path / "flax.layout.toml").write_text('[[layer]]\nname = "X"\nweight = "missing"\n')
    result = CliRunner().invoke(app, ["layers", str(path)])
    assert result.exit_code == 2
    assert "flax.layout.toml" in result.output
    assert "weight tensor 'missing' is not in the checkpoint" in result.output
    assert "Traceback" not in result.output


def _previous_by_scan(name: str, names: set[str]) -> str | None:
    """The numbered-sibling rule written as the plain downward scan (small numbers only)."""
    import re

    parent, _, leaf = name.rpartition(".")
    prefix = f"{parent}." if parent else ""
    match = re.fullmatch(r"(?:(conv|fc|linear|dense|layer|lin|hidden)(_?))?([0-9]+)", leaf)
    if match is None:
        return None
    stem, sep = match.group(1) or "", match.group(2) or ""
    for index in range(int(match.group(3)) - 1, -1, -1):
        if f"{prefix}{stem}{sep}{index}" in names:
            return f"{prefix}{stem}{sep}{index}"
    return None


def test_numbered_sibling_index_agrees_with_a_downward_scan() -> None:
    from steelyard.loaders.conventions.module_names import split_name as _split
    from steelyard.loaders.conventions.numbering import Siblings as _Siblings

    rng = np.random.default_rng(7)
    stems = ["", "conv", "fc_", "layer", "dense"]
    parents = ["", "a", "a.b", "blocks.3"]
    names = {
        f"{p + '.' if p else ''}{s}{n}"
        for p, s, n in zip(
            rng.choice(parents, 300), rng.choice(stems, 300), rng.integers(0, 40, 300), strict=True
        )
    } | {"a.007", "a.conv03", "x.fc"}
    siblings = _Siblings(names)
    for name in sorted(names):
        parent, leaf = _split(name)
        assert siblings.previous(parent, leaf) == _previous_by_scan(name, names), name


def test_names_with_huge_or_non_ascii_numbers_neither_search_nor_crash(tmp_path: Path) -> None:
    # A name may carry more digits than int() converts (Python's 4300-digit limit) or digits
    # that str.isdigit accepts but int refuses (superscripts): neither is a layer index.
    tensors = {
        f"seq.{number}.weight": np.ones((4, 4, 3, 3), np.float32)
        for number in ("0", "9" * 30, "7" * 5000, "\u00b2", "1")
    }
    tensors["bn" + "1" * 5000 + "x.weight"] = np.ones((4, 4), np.float32)
    path = tmp_path / "numbers.safetensors"
    st_numpy.save_file(tensors, str(path))
    checkpoint = load(path)
    links = {layer.name: layer.inputs_from for layer in checkpoint.layers}
    assert links["seq.1"] == ("seq.0",)  # the ordinary search still works
    assert links["seq." + "9" * 30] == ()
    assert links["seq." + "7" * 5000] == ()
