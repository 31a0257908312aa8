"""Once-only results under threads, the byte-bounded cache, and the one read lock (common
practice, no source: the properties are this package's own contract)."""

from __future__ import annotations

import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from steelyard.stats import reading
from steelyard.stats.memo import MatrixCache, Memo
from tests.stats._graph import Reads, stored


def test_a_result_is_computed_once_however_many_threads_ask() -> None:
    memo = Memo()
    calls: list[int] = []

    def compute() -> int:
        calls.append(1)
        time.sleep(0.01)
        return 42

    with ThreadPoolExecutor(max_workers=8) as pool:
        results = list(pool.map(lambda _: memo.once("k", compute), range(32)))
    assert results == [42] * 32 and len(calls) == 1


def test_the_cache_keeps_the_most_recently_used_arrays_within_its_budget() -> None:
    cache = MatrixCache(budget=3 * 800)
    arrays = {k: np.zeros(100, np.float64) for k in "abcd"}  # 800 bytes each
    for key in "abc":
        cache.put(key, arrays[key])
    assert cache.get("a") is arrays["a"]  # a is now the most recent
    cache.put("d", arrays["d"])
    assert cache.get("b") is None and cache.get("a") is not None
    cache.put("huge", np.zeros(1000, np.float64))  # larger than the whole budget
    assert cache.get("huge") is None
    cache.drop(lambda key: key in ("a", "c"))
    assert cache.get("a") is None and cache.get("d") is not None


def test_readers_without_spans_are_read_under_the_one_lock() -> None:
    reads = Reads()
    seen: list[bool] = []
    plain = stored("plain", np.ones(3, np.float32), reads, spans=False)
    spanned = stored("spanned", np.ones(3, np.float32), reads, spans=True)

    def probe() -> None:
        seen.append(reading.READ_LOCK.locked())

    reading.locked(plain, probe)
    reading.locked(spanned, probe)
    reading.locked(None, probe)  # a view over unknown tensors
    assert seen == [True, False, True]
    assert np.array_equal(reading.read_float32(plain), np.ones(3, np.float32))
    assert not reading.READ_LOCK.locked()
