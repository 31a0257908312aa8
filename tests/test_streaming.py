"""Streaming reads, chunked float32 conversion, the one-pass layer statistics and ``--jobs``.

References: ``ml_dtypes`` casts (bf16/fp8 widening), the ``safetensors`` package's numpy
reader (tensor bytes), ``numpy.linalg.norm`` (row and column norms), ``numpy.isnan`` /
``numpy.isposinf`` / ``numpy.isneginf`` (non-finite counts).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
import safetensors.numpy

from steelyard import api, streaming
from steelyard.checkpoint_audit import run_rules
from steelyard.errors import LoadError
from steelyard.policy import Policy
from steelyard.stats import LayerStats, sums_of_squares
from tests.conftest import mlp_tensors, write_safetensors


def test_bf16_widening_matches_ml_dtypes_on_every_bit_pattern() -> None:
    patterns = np.arange(2**16, dtype=np.uint16).view(ml_dtypes.bfloat16)
    out = np.empty(patterns.size, np.float32)
    streaming.convert_into(patterns, out)
    # reference: ml_dtypes.bfloat16 -> float32 cast (NaN payloads and signed zeros included)
    assert np.array_equal(out.view(np.uint32), patterns.astype(np.float32).view(np.uint32))
    # Past _SHIFT_IN_PLACE values the widening takes its one-call path: the same bits.
    many = np.tile(patterns, 3)
    assert many.size >= streaming._SHIFT_IN_PLACE
    wide = np.empty(many.size, np.float32)
    streaming.convert_into(many, wide)
    assert np.array_equal(wide.view(np.uint32), many.astype(np.float32).view(np.uint32))


def test_float16_widening_matches_numpy_on_every_bit_pattern(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Every IEEE binary16 pattern (NaN payloads, ±Inf, subnormals, signed zeros), converted
    whole, in odd parts, and read back from a file the safetensors package wrote, in small
    chunks: the same float32 bits as numpy's cast (the reference)."""
    patterns = np.arange(2**16, dtype=np.uint16).view(np.float16)
    reference = patterns.astype(np.float32).view(np.uint32)
    out = np.empty(patterns.size, np.float32)
    streaming.convert_into(patterns, out)
    assert np.array_equal(out.view(np.uint32), reference)
    for start, stop in ((0, 1), (31743, 31745), (64511, 65536), (1000, 1000)):
        part = np.empty(stop - start, np.float32)
        streaming.convert_into(patterns[start:stop], part)
        assert np.array_equal(part.view(np.uint32), reference[start:stop])
    _small_chunks(monkeypatch)
    path = write_safetensors(tmp_path / "every.safetensors", {"a.weight": patterns.reshape(256, 256)})
    tensor = api.load(path).tensors["a.weight"]
    assert np.array_equal(tensor.read_float32().view(np.uint32).reshape(-1), reference)
    # a big-endian float16 array takes numpy's cast, the same values
    swapped = patterns.astype(">f2")
    streaming.convert_into(swapped, out)
    assert np.array_equal(out.view(np.uint32), reference)


@pytest.mark.parametrize("dtype", [ml_dtypes.float8_e4m3fn, ml_dtypes.float8_e5m2])
def test_float8_widening_matches_ml_dtypes_on_every_bit_pattern(dtype: type) -> None:
    # Reference: ml_dtypes' cast to float32 (the reference implementation of these encodings),
    # every one of the 256 patterns (NaNs, e5m2's ±Inf, subnormals, signed zeros), whole, in
    # odd parts, and past one block of the widening loop.
    patterns = np.arange(256, dtype=np.uint8).view(dtype)
    reference = patterns.astype(np.float32).view(np.uint32)
    out = np.empty(256, np.float32)
    streaming.convert_into(patterns, out)
    assert np.array_equal(out.view(np.uint32), reference)
    for start, stop in ((0, 1), (120, 130), (250, 256)):
        part = np.empty(stop - start, np.float32)
        streaming.convert_into(patterns[start:stop], part)
        assert np.array_equal(part.view(np.uint32), reference[start:stop])
    many = np.tile(patterns, 1200)  # 307,200 values: more than one block of 2^18
    wide = np.empty(many.size, np.float32)
    streaming.convert_into(many, wide)
    assert np.array_equal(wide.view(np.uint32), np.tile(reference, 1200))


@pytest.mark.parametrize(
    "dtype", [np.float16, ml_dtypes.float8_e4m3fn, ml_dtypes.float8_e5m2, np.float64]
)
def test_other_dtypes_convert_as_numpy_casts(dtype: type, rng: np.random.Generator) -> None:
    values = (rng.standard_normal(1000) * 3).astype(dtype)
    out = np.empty(values.size, np.float32)
    streaming.convert_into(values, out)
    # reference: numpy / ml_dtypes astype(float32)
    np.testing.assert_array_equal(out, values.astype(np.float32))


def test_bf16_tensors_widen_from_their_bits_as_ml_dtypes_decodes_them(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Every bf16 bit pattern (NaN payloads, ±Inf, subnormals, signed zeros) stored by the
    # safetensors package, read back through the loader's bit reader (no ml_dtypes) in odd
    # spans and chunks: the same float32 bits as ml_dtypes' cast (the reference library).
    _small_chunks(monkeypatch)
    patterns = np.arange(2**16, dtype=np.uint16).view(ml_dtypes.bfloat16).reshape(256, 256)
    path = write_safetensors(tmp_path / "every.safetensors", {"a.weight": patterns})
    tensor = api.load(path).tensors["a.weight"]
    assert tensor.read_bits is not None and tensor.dtype == "bf16"
    reference = patterns.astype(np.float32).view(np.uint32).reshape(-1)
    assert np.array_equal(tensor.read_float32().view(np.uint32).reshape(-1), reference)
    part = np.empty(1001, np.float32)
    tensor.widen_part(777, 1778, part)
    assert np.array_equal(part.view(np.uint32), reference[777:1778])


def _small_chunks(monkeypatch: pytest.MonkeyPatch) -> None:
    """Blocks of a few hundred bytes so that tiny tensors take many chunks and row blocks."""
    monkeypatch.setattr(streaming, "CHUNK_BYTES", 256)


def test_spans_and_chunked_float32_equal_the_reference_reader(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    _small_chunks(monkeypatch)
    stored = {
        "a.weight": rng.standard_normal((37, 11)).astype(ml_dtypes.bfloat16),
        "b.weight": rng.standard_normal((5, 3, 2, 2)).astype(np.float16),
        "c.bias": rng.standard_normal(7).astype(np.float32),
    }
    path = write_safetensors(tmp_path / "m.safetensors", stored)
    reference = safetensors.numpy.load_file(str(path))  # reference: safetensors package
    checkpoint = api.load(path)
    for name, tensor in checkpoint.tensors.items():
        assert tensor.read_span is not None
        np.testing.assert_array_equal(tensor.read(), reference[name])
        flat = reference[name].reshape(-1)
        np.testing.assert_array_equal(tensor.read_span(3, 9), flat[3:9])
        widened = tensor.read_float32()
        assert widened.dtype == np.float32
        np.testing.assert_array_equal(widened, reference[name].astype(np.float32))


def test_truncated_file_is_a_load_error_when_read(tmp_path: Path, rng: np.random.Generator) -> None:
    path = write_safetensors(tmp_path / "m.safetensors", mlp_tensors(rng))
    checkpoint = api.load(path)
    size = path.stat().st_size
    with open(path, "r+b") as handle:  # the file shrinks after its header was checked
        handle.truncate(size - 16)
    with pytest.raises(LoadError, match="ended before"):
        for tensor in checkpoint.tensors.values():
            tensor.read()


def _mlp_with_defects(tmp_path: Path, rng: np.random.Generator) -> Path:
    tensors = mlp_tensors(rng, (24, 40, 30, 5))
    tensors["fc1.weight"][3] = 0.0
    tensors["fc1.weight"][5] *= 40.0
    tensors["fc2.weight"][:, 9] = 0.0
    tensors["fc2.weight"][2, 4] = np.inf
    tensors["fc3.weight"][1, 1] = np.nan
    stored = {k: v.astype(ml_dtypes.bfloat16) for k, v in tensors.items()}
    return write_safetensors(tmp_path / "mlp.safetensors", stored)


def test_one_pass_statistics_match_numpy(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    _small_chunks(monkeypatch)
    path = _mlp_with_defects(tmp_path, rng)
    checkpoint = api.load(path)
    reference = {k: v.astype(np.float32) for k, v in safetensors.numpy.load_file(str(path)).items()}
    # stream_bytes=0: every matrix is streamed in row blocks and never kept.
    stats = LayerStats(checkpoint, stream_bytes=0)
    linked = 0
    for layer in checkpoint.layers:
        weights = reference[layer.weight]
        with np.errstate(invalid="ignore", over="ignore"):
            # reference: numpy.linalg.norm over each unit's row, in float64 (the pass sums in
            # float32, hence the tolerance)
            np.testing.assert_allclose(
                stats.row_norms(layer),
                np.linalg.norm(weights.astype(np.float64), axis=1),
                rtol=1e-6,
            )
        np.testing.assert_array_equal(stats.matrix(layer), weights)
        for consumer in stats.consumers(layer):
            block = stats.consumer_block(layer, consumer)
            assert block is not None
            assert stats.consumer_block_width(layer, consumer) == block.shape[1]
            norms = stats.column_norms(layer, consumer)
            assert norms is not None
            with np.errstate(invalid="ignore", over="ignore"):
                # reference: numpy.linalg.norm of the consumer's columns for each unit
                expected = np.linalg.norm(weights_of(reference, consumer.weight), axis=0)
            np.testing.assert_allclose(norms, expected, rtol=1e-6)
            linked += 1
    assert linked == 2
    for name, tensor in checkpoint.tensors.items():
        values = reference[name]
        # reference: numpy.isnan / isposinf / isneginf
        expected = (
            int(np.isnan(values).sum()),
            int(np.isposinf(values).sum()),
            int(np.isneginf(values).sum()),
        )
        assert stats.nonfinite(tensor) == expected
    assert sum(sum(stats.nonfinite(t)) for t in checkpoint.tensors.values()) == 2


@pytest.mark.parametrize("stream_bytes", [0, 2**30])
def test_weight_samples_are_the_same_values_however_the_layer_is_read(
    tmp_path: Path,
    rng: np.random.Generator,
    monkeypatch: pytest.MonkeyPatch,
    stream_bytes: int,
) -> None:
    _small_chunks(monkeypatch)
    stored = {"wide.weight": rng.standard_normal((300, 40)).astype(ml_dtypes.bfloat16)}
    path = write_safetensors(tmp_path / "m.safetensors", stored)
    # reference: safetensors package reader, positions by numpy's Generator.integers (drawn
    # with replacement: i.i.d. draws from the layer's weights)
    weights = safetensors.numpy.load_file(str(path))["wide.weight"].astype(np.float32)
    positions = np.random.default_rng(7).integers(0, weights.size, 500)
    expected = np.sort(weights.reshape(-1)[positions].astype(np.float64))
    checkpoint = api.load(path)
    (layer,) = checkpoint.layers
    stats = LayerStats(checkpoint, stream_bytes=stream_bytes)
    np.testing.assert_array_equal(stats.sample(layer, 500, 7), expected)
    everything = stats.sample(layer, weights.size + 1, 7)  # asks for more than there are
    np.testing.assert_array_equal(everything, np.sort(weights.reshape(-1).astype(np.float64)))


def test_sums_of_squares_are_exact_for_huge_tiny_and_nonfinite_rows() -> None:
    rng = np.random.default_rng(3)
    block = rng.standard_normal((6, 4096)).astype(np.float32)
    block[1] *= np.float32(1e25)  # squares overflow float32
    block[2] *= np.float32(1e-25)  # squares underflow float32
    block[3] = 0.0
    block[4, 7] = np.nan
    block[5, 9] = np.inf
    # reference: numpy.linalg.norm in float64
    expected = np.linalg.norm(block.astype(np.float64), axis=1) ** 2
    got = sums_of_squares(block, axis=1)
    np.testing.assert_allclose(got[:4], expected[:4], rtol=1e-6)
    assert got[1] > 1e50 and 0 < got[2] < 1e-40 and got[3] == 0.0
    assert np.isnan(got[4]) and got[5] == np.inf
    columns = sums_of_squares(block[:4].T.copy(), axis=0)
    np.testing.assert_allclose(columns, expected[:4], rtol=1e-6)


def weights_of(reference: dict[str, np.ndarray], name: str) -> np.ndarray:
    return reference[name].astype(np.float64)


def test_findings_do_not_depend_on_jobs_or_block_size(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _mlp_with_defects(tmp_path, rng)
    policy = Policy(input_range=(0.0, 1.0))
    plain = run_rules(api.load(path), policy, None, jobs=1)[0]
    threaded = run_rules(api.load(path), policy, None, jobs=3)[0]
    _small_chunks(monkeypatch)
    streamed = run_rules(api.load(path), policy, None, jobs=2)[0]
    assert {f.rule for f in plain} >= {"nonfinite", "dead-unit", "fan-in-norm"}
    assert plain == threaded == streamed


def test_layers_too_large_to_cache_give_the_same_report_for_any_jobs(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Token matrices over the cache limit run alone. With two BLAS threads there, OpenBLAS
    # summed float32 products differently when the main thread (jobs 1) or a worker (jobs 2)
    # called it, and untrained-token's residuals moved in the 8th digit (seen at 1.3B
    # parameters in bench/families.py, reproduced here with a small cache limit).
    import steelyard.checkpoint_audit as engine

    monkeypatch.setattr(engine, "STREAM_BYTES", 2**20)
    vocab, width = 4096, 256
    embed = rng.standard_normal((vocab, width)).astype(np.float32) * 0.02
    embed[-8:] = embed[:-8].mean(axis=0)  # added tokens left at the mean
    tensors = {
        "model.embed_tokens.weight": embed,
        "model.layers.0.mlp.up_proj.weight": rng.standard_normal((512, width)).astype(np.float32) * 0.05,
        "model.layers.0.mlp.down_proj.weight": rng.standard_normal((width, 512)).astype(np.float32) * 0.05,
        "lm_head.weight": rng.standard_normal((vocab, width)).astype(np.float32) * 0.02,
    }
    path = write_safetensors(tmp_path / "model.safetensors", tensors)

    def report(jobs: int) -> dict[str, object]:
        document = json.loads(api.audit(path, jobs=jobs).render("json"))
        document.pop("created")
        return document

    one = report(1)
    assert any(f["rule"] == "untrained-token" for f in one["findings"])  # type: ignore[union-attr, index]
    assert report(2) == one


def _layers_seen_together(path: Path, jobs: int) -> list[frozenset[str]]:
    """The sets of layers whose ``dead-unit`` hook ran at the same moment, each hook held
    for 20 ms (long enough for another worker to start something)."""
    import threading
    import time
    from dataclasses import replace

    from steelyard.rules import registry

    running: set[str] = set()
    seen_together: list[frozenset[str]] = []
    lock = threading.Lock()
    spec = registry()["dead-unit"]
    hook = spec.per_layer
    assert hook is not None

    def watched(ctx, settings, layer):  # type: ignore[no-untyped-def]
        with lock:
            running.add(layer.name)
            seen_together.append(frozenset(running))
        time.sleep(0.02)
        try:
            return iter(list(hook(ctx, settings, layer)))
        finally:
            with lock:
                running.discard(layer.name)

    run_rules(api.load(path), Policy(), None, {spec.name: replace(spec, per_layer=watched)}, jobs=jobs)
    return seen_together


def test_layers_too_large_to_cache_run_one_at_a_time_beside_the_small_ones(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Two layers over the cache limit must never hold their working sets at once, yet must
    # not stop the other workers: a rule hook records which layers run at the same moment.
    # (Common practice, no source: a memory bound for the largest working sets.)
    import steelyard.checkpoint_audit as engine

    monkeypatch.setattr(engine, "STREAM_BYTES", 2**20)
    vocab, width = 2048, 256  # 2 MiB of float32 each: over the limit
    tensors = {
        "model.embed_tokens.weight": rng.standard_normal((vocab, width)).astype(np.float32) * 0.02,
        "lm_head.weight": rng.standard_normal((vocab, width)).astype(np.float32) * 0.02,
    }
    for block in range(6):
        tensors[f"model.layers.{block}.mlp.up_proj.weight"] = (
            rng.standard_normal((128, width)).astype(np.float32) * 0.05
        )
    path = write_safetensors(tmp_path / "model.safetensors", tensors)
    large = {"model.embed_tokens", "lm_head"}
    assert {layer.name for layer in api.load(path).layers} >= large
    seen_together = _layers_seen_together(path, jobs=2)
    assert all(len(together & large) <= 1 for together in seen_together)
    # while a large layer ran, the other worker ran small ones
    assert any(together & large and together - large for together in seen_together)


def test_small_layers_run_on_one_worker_beside_the_others(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Small layers cost interpreter time, which one thread holds at a time: one worker takes
    # them first while the other takes the larger layers, so two small ones do not run at
    # once while larger ones wait. (Common practice, no source: the interpreter lock
    # serialises Python code.)
    import steelyard.checkpoint_audit as engine

    monkeypatch.setattr(engine, "SMALL_LAYER", 64 * 128)
    tensors = {}
    for block in range(3):
        tensors[f"model.layers.{block}.self_attn.o_proj.weight"] = (
            rng.standard_normal((64, 128)).astype(np.float32) * 0.05
        )
    for block in range(6):
        tensors[f"model.layers.{block}.mlp.up_proj.weight"] = (
            rng.standard_normal((256, 128)).astype(np.float32) * 0.05
        )
    path = write_safetensors(tmp_path / "model.safetensors", tensors)
    checkpoint = api.load(path)
    small = {layer.name for layer in checkpoint.layers if layer.units * layer.fan_in <= 64 * 128}
    assert len(small) == 3
    seen_together = _layers_seen_together(path, jobs=2)
    assert all(len(together & small) <= 1 for together in seen_together)
    assert any(together & small and together - small for together in seen_together)
    plain = run_rules(checkpoint, Policy(), None, jobs=1)[0]
    threaded = run_rules(api.load(path), Policy(), None, jobs=2)[0]
    assert [(f.fingerprint, f.message) for f in plain] == [(f.fingerprint, f.message) for f in threaded]


def test_work_lanes_keep_the_order_run_small_tasks_on_one_worker_and_raise() -> None:
    # Common practice, no source: a work queue's results in the tasks' order and the first
    # error raised to the caller. Ours: every small task on one worker, never two at once
    # (measured reason in steelyard.work_lanes), large ones on any worker.
    import threading
    import time
    from concurrent.futures import ThreadPoolExecutor

    from steelyard.work_lanes import run_in_lanes

    ran: dict[int, int] = {}
    running: set[int] = set()
    overlapped: list[tuple[int, int]] = []
    lock = threading.Lock()

    def work(task: int) -> int:
        with lock:
            ran[task] = threading.get_ident()
            if task < 8:
                overlapped.extend((task, other) for other in running if other < 8)
            running.add(task)
        time.sleep(0.005)
        with lock:
            running.discard(task)
        return task * task

    tasks = list(range(12))
    small = lambda t: t < 8  # noqa: E731
    with ThreadPoolExecutor(max_workers=2) as pool:
        got = run_in_lanes(pool, 2, work, tasks, cost=lambda t: t, small=small)
    assert got == [t * t for t in tasks]
    assert len({ran[t] for t in tasks if small(t)}) == 1 and not overlapped
    assert len({ran[t] for t in tasks}) == 2  # the large ones ran beside them
    # all small: one worker runs them all, the other finds nothing to take
    ran.clear()
    with ThreadPoolExecutor(max_workers=2) as pool:
        assert run_in_lanes(pool, 2, work, tasks[:8], cost=lambda t: t, small=small) == got[:8]
    assert len(set(ran.values())) == 1
    # all large: both workers take them
    ran.clear()
    with ThreadPoolExecutor(max_workers=2) as pool:
        run_in_lanes(pool, 2, work, tasks, cost=lambda t: t, small=lambda t: False)
    assert len(set(ran.values())) == 2
    assert run_in_lanes(None, 1, work, tasks, cost=lambda t: t, small=small) == got

    def broken(task: int) -> int:
        if task == 3:
            raise ValueError("task 3")
        return task

    with ThreadPoolExecutor(max_workers=2) as pool, pytest.raises(ValueError, match="task 3"):
        run_in_lanes(pool, 2, broken, tasks, cost=lambda t: 1, small=lambda t: t % 2 == 0)


def test_reports_from_the_cli_are_identical_for_any_jobs(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    from click.testing import CliRunner

    from steelyard.cli import app

    path = _mlp_with_defects(tmp_path, rng)
    outputs = []
    for jobs in ("1", "2"):
        result = CliRunner().invoke(
            app,
            ["audit", str(path), "--format", "json", "--jobs", jobs, "--quiet"],
            env={**os.environ, "SOURCE_DATE_EPOCH": "1700000000"},
        )
        assert result.exit_code == 1, result.output
        outputs.append(json.loads(result.stdout))
    assert outputs[0] == outputs[1]
    assert "nonfinite" in json.dumps(outputs[0])


def test_jobs_must_be_positive(tmp_path: Path, rng: np.random.Generator) -> None:
    path = write_safetensors(tmp_path / "m.safetensors", mlp_tensors(rng))
    from steelyard.errors import SteelyardError

    with pytest.raises(SteelyardError):
        api.audit(path, jobs=0)


@pytest.mark.parametrize("path", ["sorted_wide", "_sorted_by_bf16_keys"])
@pytest.mark.parametrize("kind", ["bf16", "float32", "bf16-with-nan", "bf16-edges"])
def test_sorted_wide_is_numpys_sort(kind: str, path: str, rng: np.random.Generator) -> None:
    # Both paths (numpy 2's float32 sort, numpy 1's bf16 keys) must give numpy's sorted
    # float64 array bit for bit. Reference: numpy.sort; bf16 rounding by ml_dtypes (the
    # reference bf16 implementation on PyPI).
    import ml_dtypes

    from steelyard.stats import numerics

    sorted_wide = getattr(numerics, path)

    values = (rng.standard_normal(20_000) * 0.02).astype(np.float32)
    if kind != "float32":
        values = values.astype(ml_dtypes.bfloat16).astype(np.float32)
    if kind == "bf16-with-nan":
        values[[5, 17]] = [np.nan, -np.nan]
    if kind == "bf16-edges":
        edges = np.array([0.0, -0.0, np.inf, -np.inf, 1e-40, -1e-40, 3.0e38, -3.0e38], np.float32)
        values[: edges.size] = edges.astype(ml_dtypes.bfloat16).astype(np.float32)
    expected = np.sort(values).astype(np.float64)
    got = sorted_wide(values)
    assert got.dtype == np.float64
    assert np.array_equal(got, expected, equal_nan=True)
    # the same bit patterns, as a multiset (±0 compare equal, so they may trade places)
    assert np.array_equal(np.sort(got.view(np.uint64)), np.sort(expected.view(np.uint64)))
