"""Output integrity: names from files never split a line, forge a line, repaint a terminal or
break a report; exit codes keep their meaning (1 only for a failed gate).

Tensor and file names are generated with every class of dangerous character: C0 controls
(newline, carriage return, escape sequences), DEL, C1 controls (U+0085 NEL, U+009B CSI),
bidirectional overrides and isolates (U+202E, U+2066; Unicode Standard Annex #9), rich markup
(``[/bold]``) and characters XML 1.0 forbids (W3C XML 1.0 §2.2 "Char"). Human-readable
formats must show them escaped; JSON must keep them exact (RFC 8259 escapes what it must).
"""

from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from steelyard import api
from steelyard.cli import EXIT_INTERNAL, app
from steelyard.text_safety import shown
from tests.conftest import write_safetensors
from tests.hostile.harness import assert_refused, run

runner = CliRunner()

#: (id, dangerous fragment); each becomes part of a layer name.
FRAGMENTS = [
    ("newline-forged-line", "\nsteelyard: error: forged"),
    ("carriage-return", "\rok"),
    ("escape-sequence", "\x1b[31mred\x1b[0m"),
    ("osc-title", "\x1b]0;pwned\x07"),
    ("del", "a\x7fb"),
    ("c1-nel", "a\x85b"),
    ("c1-csi", "a\x9b31mb"),
    ("bidi-override", "evil\u202etxt"),
    ("bidi-isolate", "a\u2066b\u2069"),
    ("xml-illegal", "a\x01\x0bb"),
    ("rich-markup", "x[/bold]y[red]"),
]
_RAW = ("\n", "\r", "\x1b", "\x07", "\x7f", "\x85", "\x9b", "\u202e", "\u2066", "\x01", "\x0b")


def _model(folder: Path, fragment: str) -> tuple[Path, str]:
    """A PyTorch-named MLP whose first layer is named with ``fragment`` and holds a NaN (so a
    finding names the layer in every format)."""
    rng = np.random.default_rng(5)
    layer = f"enc{fragment}.fc1"
    tensors = {
        f"{layer}.weight": rng.normal(size=(6, 4)).astype(np.float32),
        f"{layer}.bias": np.zeros(6, np.float32),
        "enc.fc2.weight": rng.normal(size=(3, 6)).astype(np.float32),
    }
    tensors[f"{layer}.weight"][2, 1] = np.nan
    return write_safetensors(folder / "model.safetensors", tensors), layer


def _no_raw_controls(text: str, layout_newlines: bool = True) -> None:
    for char in _RAW:
        if char == "\n" and layout_newlines:
            continue
        assert char not in text, (repr(char), text[:400])


@pytest.mark.parametrize(("fragment"), [pytest.param(f, id=i) for i, f in FRAGMENTS])
def test_names_are_escaped_in_every_human_readable_format_and_exact_in_json(
    tmp_path: Path, fragment: str
) -> None:
    path, layer = _model(tmp_path, fragment)
    outputs = {}
    for fmt in ("table", "markdown", "junit", "sarif", "json"):
        result = runner.invoke(app, ["audit", str(path), "-f", fmt])
        assert result.exit_code == 1, (fmt, result.stderr, result.exception)  # the NaN
        outputs[fmt] = result.stdout
    # Table and Markdown: the escaped name is there, no raw control reaches the terminal, and
    # no line of the report starts with a forged "steelyard:".
    for fmt in ("table", "markdown"):
        _no_raw_controls(outputs[fmt])
        assert shown(layer) in outputs[fmt] or shown(layer)[:20] in outputs[fmt], fmt
        assert not any(line.startswith("steelyard:") for line in outputs[fmt].splitlines())
    # JUnit: well-formed XML 1.0 (no illegal characters), names escaped.
    root = ET.fromstring(outputs["junit"].split("\n", 1)[1])
    names = [case.get("name", "") for case in root.iter("testcase")]
    assert shown(layer) in names
    _no_raw_controls(outputs["junit"])
    # SARIF: message texts escaped; JSON-level names (logical locations) exact.
    sarif = json.loads(outputs["sarif"])
    for result in sarif["runs"][0]["results"]:
        _no_raw_controls(result["message"]["text"], layout_newlines=False)
    # JSON: exact (json escapes what it must), the real name round-trips.
    document = json.loads(outputs["json"])
    assert any(f["layer"] == layer for f in document["findings"])


@pytest.mark.parametrize(("fragment"), [pytest.param(f, id=i) for i, f in FRAGMENTS[:4] + FRAGMENTS[7:8]])
def test_the_layers_table_escapes_names(tmp_path: Path, fragment: str) -> None:
    path, layer = _model(tmp_path, fragment)
    result = runner.invoke(app, ["layers", str(path)])
    assert result.exit_code == 0, (result.stderr, result.exception)
    _no_raw_controls(result.stdout)
    assert shown(layer)[:10] in result.stdout


def test_a_newline_in_a_file_name_never_splits_or_forges_the_error_line(tmp_path: Path) -> None:
    # Before: the name was printed raw, so stderr held two "steelyard: error:" lines, one of
    # them written by the file's author.
    name = "m\nsteelyard: error: all checks passed\x1b[2K.safetensors"
    (tmp_path / name).write_bytes(b"\x00" * 64)
    outcome = run(["audit", name], cwd=tmp_path)
    assert_refused(outcome, "\\nsteelyard: error: all checks passed\\x1b[2K")
    assert "\x1b" not in outcome.stderr


def test_a_file_name_that_is_not_utf8_is_reported_and_json_stays_exact(tmp_path: Path) -> None:
    # A name with an invalid UTF-8 byte (surrogate-escaped by Python): JSON is written back
    # with the original bytes, the table shows the byte escaped; before, writing crashed.
    folder = tmp_path / "m"
    folder.mkdir()
    rng = np.random.default_rng(0)
    write_safetensors(
        folder / os.fsdecode(b"bad\xff.safetensors"),
        {"fc1.weight": rng.normal(size=(4, 3)).astype(np.float32)},
    )
    as_json = run(["audit", "m", "-f", "json"], cwd=tmp_path)
    assert as_json.code == 0, as_json.stderr
    assert "bad\ufffd.safetensors" in json.loads(as_json.stdout)["checkpoint"]["path"]
    as_table = run(["audit", "m"], cwd=tmp_path)
    assert as_table.code == 0, as_table.stderr
    assert "bad\\udcff.safetensors" in as_table.stdout


# --- exit codes ---------------------------------------------------------------------------


def _healthy(tmp_path: Path) -> Path:
    rng = np.random.default_rng(4)
    return write_safetensors(
        tmp_path / "h.safetensors", {"fc1.weight": rng.normal(size=(5, 3)).astype(np.float32)}
    )


@pytest.mark.parametrize("error", [MemoryError(), RecursionError("maximum recursion depth")])
def test_memory_and_recursion_errors_in_an_audit_are_that_checkpoints_input_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, error: BaseException
) -> None:
    # Before: a traceback and exit 1 (the code of a failed gate).
    def exhausted(*args: object, **kwargs: object) -> object:
        raise error

    monkeypatch.setattr(api, "audit_checkpoint", exhausted)
    path = _healthy(tmp_path)
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code == 2, (result.stderr, result.exception)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("steelyard: error: ") and "h.safetensors" in lines[0]
    assert "Traceback" not in result.stderr


@pytest.mark.parametrize("error", [MemoryError(), RecursionError("deep")])
def test_memory_and_recursion_errors_in_compare_are_one_line_exit_2(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, error: BaseException
) -> None:
    import steelyard.comparison as compare_module

    def exhausted(*args: object, **kwargs: object) -> object:
        raise error

    monkeypatch.setattr(compare_module, "compare_checkpoints", exhausted)
    path = _healthy(tmp_path)
    result = runner.invoke(app, ["compare", str(path), str(path)])
    assert result.exit_code == 2, (result.stderr, result.exception)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "h.safetensors" in lines[0] and "Traceback" not in result.stderr


def test_memory_error_outside_any_reader_still_names_what_was_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def exhausted(*args: object, **kwargs: object) -> object:
        raise MemoryError

    monkeypatch.setattr(api, "audit_many", exhausted)
    path = _healthy(tmp_path)
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "h.safetensors" in lines[0] and "too large" in lines[0]


def test_an_internal_bug_exits_3_with_one_line_and_debug_shows_the_traceback(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def bug(*args: object, **kwargs: object) -> object:
        raise TypeError("unsupported operand")

    monkeypatch.setattr(api, "audit_many", bug)
    path = _healthy(tmp_path)
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code == EXIT_INTERNAL == 3
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("steelyard: internal error")
    assert "--debug" in lines[0] and "TypeError" in lines[0]
    debug = runner.invoke(app, ["--debug", "audit", str(path)])
    assert isinstance(debug.exception, TypeError)
