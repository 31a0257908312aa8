"""Which search finds a layer's nearly parallel rows, and the screened Gram search.

:func:`similar_pairs` is the entry point of ``twin-units``: up to ``exact_limit`` rows a Gram
search of all pairs, beyond it the hashed candidate search of
:mod:`steelyard.rules._similarity` (which falls back to the Gram search when confirming its
buckets would cost more). The Gram search is exact, or *screened* for wide rows
(:func:`gram_search`): every row is projected onto ``SCREEN_DIMENSIONS`` (128) seeded N(0, 1)
directions, the short rows' Gram matrix marks the pairs whose projected cosine passes
:func:`screen_limit`, and only those are confirmed from the rows themselves, as the exact
search confirms its own (float32 cosines, float64 near the threshold, the same partner cap).
The limit is set so that a pair at the threshold is dropped with chance at most
``SCREEN_MISS`` (1e-9), whatever the rows are: a bound from chi-square tails, not a fit to
data. Cost n·128·(d + n) multiply-adds instead of n²·d; when so many pairs pass that
confirming them one by one would cost more (a layer of near copies), the exact search runs
after all.
"""

from __future__ import annotations

import functools

import numpy as np

from steelyard.rules._rows import EMPTY, Rows, Tally
from steelyard.rules._screen import SCREEN_DIMENSIONS as SCREEN_DIMENSIONS
from steelyard.rules._screen import projected_units, screen_limit
from steelyard.rules._similarity import (
    candidate_pairs,
    capped_settle,
    exact_among,
    exact_dots,
    pair_hits,
)

#: The screen runs on rows of at least ``SCREEN_WIDTH`` entries when its multiply-adds, times
#: ``SCREEN_COST``, are fewer than the full Gram's (whose search also copies every row
#: normalised). Measured on one thread, 128-512 rows of 256-4608 i.i.d. entries: the screen
#: took 0.41-0.89 of the exact search's time where this picks it (0.41 at 512 x 4608; at most
#: 1.11, 192 x 576), and 0.91-1.32 where it does not (docs/performance.md, "Twelfth session").
SCREEN_COST = 0.8
#: A pair confirmed from its two gathered rows costs about this many dot products of the exact
#: search's large Gram blocks (one thread: 0.48 µs a pair at fan-in 1024 against 0.013-0.02 µs
#: a dot; a layer whose rows are all parallel, weights zero beside a bias, sent 4.2M pairs of
#: a 4096 × 1024 layer through pair confirmation with 3 here: 5.2 s against the exact 0.2 s).
PAIR_EXACT_DOT_COST = 24.0
SCREEN_WIDTH = 512


def screen_pays(count: int, width: int) -> bool:
    """Whether the screened search of ``count`` rows of ``width`` costs less than the Gram."""
    screened = count * SCREEN_DIMENSIONS * (width + count)
    return width >= SCREEN_WIDTH and SCREEN_COST * screened < exact_dots(count) * width


def gram_search(
    rows: Rows, members: np.ndarray, threshold: float, negative: bool, tally: Tally, seed: int = 0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every pair of ``members`` past the threshold: the exact search, or the screened one
    when that costs less (wide rows: the Gram's n²·d against n·k·(d + n))."""
    width = rows.matrix.shape[1] + (0 if rows.extra is None else 1)
    if not screen_pays(members.size, width):
        return exact_among(rows, members, threshold, negative, tally)
    limit = screen_limit(threshold)
    short = projected_units(rows, members, seed)
    gram = short @ short.T
    tally.dots += int(short.size) + int(gram.size)
    mask = gram >= limit
    if negative:
        mask |= gram <= -limit
    upper = np.triu(mask, 1)
    if PAIR_EXACT_DOT_COST * np.count_nonzero(upper) > exact_dots(members.size):
        # So many rows pass the screen (a layer of near copies) that pairs would cost more.
        return exact_among(rows, members, threshold, negative, tally)
    hits = np.flatnonzero(upper)
    tally.method = "screened"
    first, second = np.divmod(hits, members.size)
    n = rows.count
    codes = members[first] * n + members[second]  # row-major, as the exact search lists them
    candidates = pair_hits(rows, codes, threshold, negative, tally)
    return capped_settle(rows, *candidates, threshold, negative)


def similar_pairs(
    rows: Rows,
    threshold: float,
    negative: bool,
    exact_limit: int,
    seed: int = 0,
    usable: np.ndarray | None = None,
    tally: Tally | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Pairs among the ``usable`` rows: the Gram search up to ``exact_limit`` of them, hashed
    candidates beyond (or the Gram search when cheaper); names the method (``exact``,
    ``screened`` or ``hashed``)."""
    tally = tally or Tally()
    members = np.arange(rows.count) if usable is None else np.flatnonzero(usable)
    if members.size < 2:
        return EMPTY, EMPTY, np.zeros(0), "exact"
    search = functools.partial(gram_search, seed=seed)
    if members.size <= exact_limit:
        return (*search(rows, members, threshold, negative, tally), tally.method)
    found = candidate_pairs(rows, threshold, negative, seed, usable, tally, instead=search)
    return (*found, tally.method)
