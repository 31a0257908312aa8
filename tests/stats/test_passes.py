"""The one streamed pass per layer, the façade's caching and lifecycle, and reuse by the
comparison. References: ``numpy.linalg.norm`` (row and column norms), ``numpy.isnan`` /
``numpy.isposinf`` / ``numpy.isneginf`` (counts); read counts are this package's own
promise (each weight read once while its matrix fits the cache)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from steelyard.stats import LayerStats
from tests.stats._graph import Reads, checkpoint, dense, stored


def _two_layers(rng: np.random.Generator, spans: bool = True) -> tuple[Reads, LayerStats]:
    reads = Reads()
    w1 = stored("fc1.weight", rng.normal(size=(8, 5)).astype(np.float32), reads, spans)
    w2 = stored("fc2.weight", rng.normal(size=(3, 8)).astype(np.float32), reads, spans)
    layers = [dense("fc1", w1), dense("fc2", w2, inputs_from=["fc1"])]
    return reads, LayerStats(checkpoint([w1, w2], layers))


def test_every_statistic_of_a_layer_comes_from_one_read(rng: np.random.Generator) -> None:
    for spans in (True, False):
        reads, stats = _two_layers(rng, spans)
        fc1, fc2 = stats.checkpoint.layers
        w2 = stats.checkpoint.tensors["fc2.weight"].read().astype(np.float64)
        reads.elements.clear()
        # reference: numpy.linalg.norm along each axis
        assert np.allclose(stats.column_norms(fc1, fc2), np.linalg.norm(w2, axis=0), rtol=1e-6)
        assert np.allclose(stats.row_norms(fc2), np.linalg.norm(w2, axis=1), rtol=1e-6)
        assert np.array_equal(stats.matrix(fc2), w2.astype(np.float32))
        assert stats.nonfinite(stats.checkpoint.tensors["fc2.weight"]) == (0, 0, 0)
        assert reads.passes(stats.checkpoint.tensors["fc2.weight"]) == 1
        assert reads.passes(stats.checkpoint.tensors["fc1.weight"]) == 0


def test_release_drops_the_matrix_unless_the_statistics_retain_it(
    rng: np.random.Generator,
) -> None:
    reads, stats = _two_layers(rng)
    layer = stats.checkpoint.layers[0]
    weight = stats.checkpoint.tensors[layer.weight]
    stats.matrix(layer)
    stats.release(layer)
    stats.matrix(layer)
    assert reads.passes(weight) == 2  # released: read again when asked
    kept = LayerStats(stats.checkpoint, retain=True)
    reads.elements.clear()
    kept.matrix(layer)
    kept.release(layer)
    kept.matrix(layer)
    assert reads.passes(weight) == 1


def test_counts_of_a_streamed_weight_come_from_its_pass(rng: np.random.Generator) -> None:
    reads = Reads()
    array = rng.normal(size=(6, 4)).astype(np.float32)
    array[1, 2], array[4, 0], array[4, 3] = np.nan, np.inf, -np.inf
    weight = stored("w", array, reads)
    stats = LayerStats(checkpoint([weight], [dense("fc", weight)]))
    assert np.isinf(stats.row_norms(stats.checkpoint.layers[0])[4])
    # reference: numpy.isnan / isposinf / isneginf
    expected = tuple(int(f(array).sum()) for f in (np.isnan, np.isposinf, np.isneginf))
    assert stats.nonfinite(weight) == expected == (1, 1, 1)
    assert reads.passes(weight) == 1
    scan = stats.nonfinite_scan(weight)
    assert scan is not None
    assert np.array_equal(np.argwhere(scan.bad), np.argwhere(~np.isfinite(array)))


def test_samples_and_stored_weights_follow_the_loader_orientation(
    rng: np.random.Generator,
) -> None:
    reads = Reads()
    q = rng.integers(-127, 128, size=(5, 7)).astype(np.int8)
    transposed = stored("q", np.ascontiguousarray(q.T), reads, dtype="i8")
    layer = replace(dense("fc", transposed, orient=np.transpose), units=5, in_per_group=7)
    stats = LayerStats(checkpoint([transposed], [layer]))
    assert np.array_equal(stats.stored_weight(layer), q)
    # Without an orient, a stored shape other than the canonical one is never guessed at.
    guessed = replace(layer, orient=None)
    assert stats.stored_weight(guessed) is None
