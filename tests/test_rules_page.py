"""``steelyard rules NAME`` renders the rule page's Markdown: styled on a terminal (or with
``--color always``), plain readable text when piped, for every registered rule.

The page's text is checked against markdown-it-py, the CommonMark parser rich itself uses
(a reference implementation of the CommonMark spec, https://spec.commonmark.org): every piece
of inline text and code the parser finds must appear in the output, whole, and none of the
Markdown syntax around it (``**``, double backticks, ``#`` headings) may remain.
"""

from __future__ import annotations

import inspect
import re
from dataclasses import replace

import pytest
from click.testing import CliRunner
from markdown_it import MarkdownIt
from rich.cells import cell_len

from steelyard.cli import app
from steelyard.render.rules_text import render_rule
from steelyard.rules import registry

RULES = sorted(registry(None))
ESC = "\x1b["


def _page(name: str, *args: str, columns: int = 80) -> str:
    result = CliRunner().invoke(app, [*args, "rules", name], env={"COLUMNS": str(columns)})
    assert result.exit_code == 0, result.output
    return result.stdout


def _flat(text: str) -> str:
    return " ".join(text.split())


def _inline_text(markdown: str) -> list[str]:
    """The words CommonMark says the page shows: inline text and code spans."""
    pieces: list[str] = []
    for token in MarkdownIt("commonmark").parse(markdown):
        if token.type == "inline":
            pieces += [c.content for c in token.children or () if c.type in ("text", "code_inline")]
        elif token.type in ("code_block", "fence"):
            pieces += token.content.splitlines()
    return [_flat(p) for p in pieces if p.strip()]


@pytest.mark.parametrize("name", RULES)
def test_piped_page_is_plain_readable_text(name: str) -> None:
    page = _page(name)
    assert ESC not in page
    assert "**" not in page and "``" not in page
    assert not re.search(r"^\s*#{1,6} ", page, re.M)
    assert all(cell_len(line) <= 80 for line in page.splitlines())
    assert all(line == line.rstrip() for line in page.splitlines())
    flat = _flat(page)
    doc = re.sub(r":[a-z]+:`([^`]*)`", r"`\1`", inspect.cleandoc(registry(None)[name].doc))
    for piece in _inline_text(doc):
        assert piece in flat, piece
    assert f"help: {registry(None)[name].help_uri}" in page
    assert not re.search(r":(mod|func|class|meth):", page)  # Sphinx roles become plain code


@pytest.mark.parametrize("name", ["twin-units", "nonfinite"])
def test_colour_styles_emphasis_and_code(name: str) -> None:
    page = _page(name, "--color", "always")
    doc = inspect.cleandoc(registry(None)[name].doc)
    strong = re.search(r"\*\*(.+?)\*\*", doc)
    assert strong is not None
    # Bold (SGR 1) opens right before the emphasised words, and the markers are gone.
    assert re.search(r"\x1b\[(?:\d+;)*1(?:;\d+)*m" + re.escape(strong.group(1)), page)
    assert "**" not in page
    plain = _page(name)
    assert strong.group(1) in plain


def test_headings_lists_and_code_blocks_become_text() -> None:
    # No rule page uses a heading today; a page that does must not show '#' either.
    spec = replace(
        registry(None)["nonfinite"],
        doc="# Heading one\n\nSome *emphasis* and ``code``.\n\n## Part two\n\n* item\n\n"
        "    indented code\n",
    )
    plain = render_rule(spec, width=60)
    assert "Heading one" in plain and "Part two" in plain
    assert not re.search(r"^\s*#", plain, re.M) and "*" not in plain.replace("•", "")
    assert "indented code" in plain and "``" not in plain
    coloured = render_rule(spec, color=True, width=60)
    assert ESC in coloured and "Heading one" in coloured


@pytest.mark.parametrize("columns", [80, 120, 200])
def test_rule_list_fits_and_keeps_every_word(columns: int) -> None:
    result = CliRunner().invoke(app, ["rules"], env={"COLUMNS": str(columns)})
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert all(cell_len(line) <= columns for line in lines)
    tokens = set(result.stdout.split())
    for spec in registry().values():
        assert spec.name in tokens
        # Words are whole: every word of the summary and thresholds is a token of the output.
        for word in (spec.summary + " " + " ".join(f"{k}={v}" for k, v in spec.thresholds.items())).split():
            if "=" not in word:
                assert word in tokens, word
        for key, value in spec.thresholds.items():
            pair = f"{key}={'unset' if value is None else value}"
            assert pair in tokens or f"{pair}," in tokens, pair
