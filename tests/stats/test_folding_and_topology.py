"""Batch-norm folding and consumer column layouts. References: the inference-time batch-norm
formula y = γ(x − μ)/sqrt(var + ε) + β (Ioffe & Szegedy 2015, §3.1) evaluated in float64 with
numpy; ``numpy.linalg.norm`` and plain reshapes for the column layouts of a concatenation and
of a channels-last flattening (Keras ``Flatten`` order, common practice, no source)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from steelyard.graph import Activation, LayerKind
from steelyard.stats import LayerStats, fold_scale
from tests.stats._graph import Reads, batch_norm, checkpoint, dense, stored


def test_folded_row_norms_from_the_scale_match_the_folded_rows(rng: np.random.Generator) -> None:
    # |a_j|·‖w_j‖ without a folded copy, against numpy's norm of the folded rows in float64;
    # a row whose folded weights leave float32 (γ = 1e30 on weights of 1e10) is measured on
    # the folded rows themselves, where it is infinite, as the folded layer computes it.
    arrays = {
        "fc.weight": rng.normal(size=(64, 48)).astype(np.float32),
        "bn.weight": rng.uniform(-2, 2, size=64).astype(np.float32),  # negative γ too
        "bn.bias": rng.normal(size=64).astype(np.float32),
        "bn.running_mean": rng.normal(size=64).astype(np.float32),
        "bn.running_var": rng.uniform(1e-3, 3, size=64).astype(np.float32),
    }

    def folded_norms(values: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        tensors = {name: stored(name, value, Reads()) for name, value in values.items()}
        layer = dense("fc", tensors["fc.weight"], norm=batch_norm("bn", values))
        stats = LayerStats(checkpoint(list(tensors.values()), [layer]))
        with np.errstate(over="ignore"):
            reference = np.linalg.norm(stats.folded(layer).matrix.astype(np.float64), axis=1)
        return stats.folded_row_norms(layer), reference

    got, reference = folded_norms(arrays)
    np.testing.assert_allclose(got, reference, rtol=1e-6)
    arrays["fc.weight"][5] *= np.float32(1e10)
    arrays["bn.weight"][5] = np.float32(1e30)
    got, reference = folded_norms(arrays)
    assert np.isinf(got[5]) and np.isinf(reference[5])
    np.testing.assert_allclose(np.delete(got, 5), np.delete(reference, 5), rtol=1e-6)


def test_folded_layer_computes_what_the_layer_and_its_batch_norm_compute(
    rng: np.random.Generator,
) -> None:
    reads = Reads()
    arrays = {
        "fc.weight": rng.normal(size=(6, 4)).astype(np.float32),
        "fc.bias": rng.normal(size=6).astype(np.float32),
        "bn.weight": rng.uniform(0.5, 2, size=6).astype(np.float32),
        "bn.bias": rng.normal(size=6).astype(np.float32),
        "bn.running_mean": rng.normal(size=6).astype(np.float32),
        "bn.running_var": rng.uniform(0.1, 3, size=6).astype(np.float32),
    }
    tensors = {name: stored(name, value, reads) for name, value in arrays.items()}
    norm = batch_norm("bn", arrays)
    layer = dense("fc", tensors["fc.weight"], bias=tensors["fc.bias"], norm=norm)
    stats = LayerStats(checkpoint(list(tensors.values()), [layer]))
    folded = stats.folded(layer)
    x = rng.normal(size=(10, 4))
    a = {k: v.astype(np.float64) for k, v in arrays.items()}
    pre = x @ a["fc.weight"].T + a["fc.bias"]
    expected = a["bn.weight"] * (pre - a["bn.running_mean"]) / np.sqrt(
        a["bn.running_var"] + norm.eps
    ) + a["bn.bias"]
    assert folded.folded
    assert np.allclose(x @ folded.matrix.T.astype(np.float64) + folded.bias, expected, rtol=1e-5)
    assert np.allclose(
        stats.folded_row_norms(layer), np.linalg.norm(folded.matrix.astype(np.float64), axis=1)
    )
    # The public scale is the same one, in the precision asked for.
    wide = fold_scale(layer, stats.tensor, np.float64)
    assert wide is not None and wide.dtype == np.float64
    assert np.allclose(wide, a["bn.weight"] / np.sqrt(a["bn.running_var"] + norm.eps))
    assert np.array_equal(stats.fold_scale(layer), fold_scale(layer, stats.tensor))


def test_an_unusable_running_variance_folds_nothing(rng: np.random.Generator) -> None:
    reads = Reads()
    arrays = {
        "fc.weight": rng.normal(size=(6, 4)).astype(np.float32),
        "bn.bias": np.zeros(6, np.float32),
        "bn.running_mean": np.zeros(6, np.float32),
        "bn.running_var": np.ones(5, np.float32),  # not one value per unit
    }
    tensors = {name: stored(name, value, reads) for name, value in arrays.items()}
    layer = dense("fc", tensors["fc.weight"], norm=batch_norm("bn", arrays))
    stats = LayerStats(checkpoint(list(tensors.values()), [layer]))
    assert stats.fold_scale(layer) is None
    assert not stats.folded(layer).folded
    assert np.array_equal(stats.folded(layer).matrix, arrays["fc.weight"])


def test_column_norms_of_a_concatenation_and_a_channels_last_flattening(
    rng: np.random.Generator,
) -> None:
    reads = Reads()
    a = stored("a.weight", rng.normal(size=(3, 2)).astype(np.float32), reads)
    b = stored("b.weight", rng.normal(size=(4, 2)).astype(np.float32), reads)
    concat = stored("c.weight", rng.normal(size=(5, 7)).astype(np.float32), reads)
    flat = stored("f.weight", rng.normal(size=(2, 3 * 4)).astype(np.float32), reads)
    layers = [
        dense("a", a),
        dense("b", b),
        dense("c", concat, inputs_from=["a", "b"]),
        dense("f", flat, inputs_from=["a"], channels_last_inputs=True),
    ]
    stats = LayerStats(checkpoint([a, b, concat, flat], layers))
    la, lb, lc, lf = layers
    c = concat.read().astype(np.float64)
    # concatenation [a | b]: a's units are columns 0..2, b's 3..6
    assert np.allclose(stats.column_norms(lb, lc), np.linalg.norm(c[:, 3:], axis=0))
    assert np.array_equal(stats.consumer_block(la, lc), concat.read()[:, :3].T)
    assert np.array_equal(stats.consumer_block(lb, lc), concat.read()[:, 3:].T)
    # channels-last flattening of 4 positions × 3 channels: input s·3 + u belongs to unit u
    f = flat.read().astype(np.float64).reshape(2, 4, 3)
    assert np.allclose(stats.column_norms(la, lf), np.sqrt((f**2).sum(axis=(0, 1))))
    assert stats.consumer_block_width(la, lf) == 2 * 4
    assert stats.producers(lc) == [la, lb] and stats.consumers(la) == [lc, lf]
    assert la.activation is Activation.RELU and stats.inputs_non_negative(lc)  # ReLU ≥ 0


def test_a_convolution_consumer_block_is_every_kernel_weight_reading_the_unit(
    rng: np.random.Generator,
) -> None:
    # A 3 × 3 convolution over the concatenation [a | b] (3 + 4 channels): unit u of b is read
    # by w[:, 3 + u, :, :] (reference: numpy slicing of the stored [out, in, kh, kw] kernel).
    reads = Reads()
    a = stored("a.weight", rng.normal(size=(3, 2)).astype(np.float32), reads)
    b = stored("b.weight", rng.normal(size=(4, 2)).astype(np.float32), reads)
    kernel = rng.normal(size=(5, 7, 3, 3)).astype(np.float32)
    conv = stored("c.weight", kernel, reads)
    layers = [dense("a", a), dense("b", b), dense("c", conv, inputs_from=["a", "b"])]
    layers[2] = replace(layers[2], kind=LayerKind.CONV, in_per_group=7, kernel=(3, 3))
    stats = LayerStats(checkpoint([a, b, conv], layers))
    la, lb, lc = layers
    for producer, channels in ((la, slice(0, 3)), (lb, slice(3, 7))):
        expected = kernel[:, channels].transpose(1, 0, 2, 3).reshape(producer.units, -1)
        assert np.array_equal(stats.consumer_block(producer, lc), expected)
    assert stats.consumer_block_width(lb, lc) == 5 * 9
