"""Properties of the terminal layout's text fitting (render/fitting.py), on generated names and
prose: a shortened name can never be read as another name's tail, wrapping never loses or
splits a word that fits a line, and names wrap only after separators.

Hypothesis generates the inputs; the checks are the definitions themselves (a tail "ends"
another name when that name ends with it, common practice, no source).
"""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st
from rich.cells import cell_len

from steelyard.render.fitting import (
    ELLIPSIS,
    NAME_BREAKS,
    distinct_tails,
    fit_name,
    name_pieces,
    shortened,
    wrap_name,
    wrap_words,
)

_PART = st.sampled_from(["model", "layers", "self_attn", "q_proj", "k_proj", "mlp", "up_proj", "0", "1", "7", "17", "170", "encoder", "h", "注意力"])
_NAME = st.lists(_PART, min_size=1, max_size=7).map(".".join)


@settings(max_examples=300, deadline=None)
@given(st.lists(_NAME, min_size=1, max_size=40, unique=True))
def test_distinct_tails_end_only_their_own_name(names: list[str]) -> None:
    tails = distinct_tails(names)
    for name in names:
        tail = tails[name]
        assert name.endswith(tail)
        readers = [other for other in names if other.endswith(tail)]
        # Either the tail is unambiguous, or the name is itself the tail of another (kept whole).
        assert readers == [name] or tail == name


@settings(max_examples=300, deadline=None)
@given(st.lists(_NAME, min_size=2, max_size=40, unique=True), st.integers(8, 60))
def test_shortened_names_differ_and_keep_their_tail(names: list[str], width: int) -> None:
    tails = distinct_tails(names)
    shown = {name: "".join(fit_name(name, width, tails, one_line=True)) for name in names}
    assert len(set(shown.values())) == len(names)
    for name, text in shown.items():
        assert text == name or (text.startswith(ELLIPSIS) and name.endswith(text[1:]))
        if text != name:
            assert text[1:].endswith(tails[name])
            assert len(text) >= len(tails[name]) + 1
    for name in names:
        short = shortened(name, width, tails[name])
        if cell_len(name) <= width:
            assert short == name


_WORD = st.text(alphabet=st.sampled_from("abcxyz.,_/-:é注"), min_size=1, max_size=30)


@settings(max_examples=300, deadline=None)
@given(st.lists(_WORD, min_size=1, max_size=40), st.integers(10, 80))
def test_prose_wraps_at_spaces_and_only_splits_words_wider_than_a_line(words: list[str], width: int) -> None:
    text = " ".join(words)
    lines = wrap_words(text, width)
    assert all(cell_len(line) <= width for line in lines)
    assert "".join("".join(lines).split()) == "".join(text.split())
    # A word that fits a line is never split: it is whole on some line.
    tokens = {token for line in lines for token in line.split()}
    for word in words:
        if cell_len(word) <= width:
            assert word in tokens


@settings(max_examples=300, deadline=None)
@given(_NAME, st.integers(4, 40))
def test_names_wrap_after_separators(name: str, width: int) -> None:
    lines = wrap_name(name, width)
    assert "".join(lines) == name
    for line in lines[:-1]:
        pieces_fit = all(cell_len(p) <= width for p in name_pieces(name))
        if pieces_fit:
            assert line[-1] in NAME_BREAKS, (name, lines)
