"""The terminal audit report at 80, 120 and 200 columns, on checkpoints written here with the
``safetensors`` reference library (transformer-style names that differ only in the middle, such
as ``model.layers.7.self_attn.q_proj`` and ``model.layers.17.self_attn.q_proj``, and longer
ones that must be shortened at 80 columns) and on the demo fixtures.

Each case runs ``steelyard audit`` through click's CliRunner with ``COLUMNS`` set, writing the
table and the JSON report from the same run, and checks the table against the JSON: no line
wider than the terminal, every finding message present with no word split across lines, every
distinct layer name shown distinguishably, the header's counts equal to the rows, and the run
summary naming every failing checkpoint. The layouts are parsed from the underline under each
table's header (runs of ``─`` separated by two spaces), which is how the grid marks columns.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from rich.cells import cell_len
from safetensors.numpy import save_file

from steelyard.cli import app

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "fixtures" / "demo"
WIDTHS = (80, 120, 200)
ELLIPSIS = "…"


def _trained(rng: np.random.Generator, rows: int, cols: int) -> np.ndarray:
    """Weights that look trained (low-rank structure and per-row scales), so that the only
    findings are the defects planted below."""
    low_rank = rng.normal(size=(rows, 4)) @ rng.normal(size=(4, cols))
    weights = 0.3 * low_rank + 0.05 * rng.normal(size=(rows, cols))
    return (weights * rng.uniform(0.5, 1.5, size=(rows, 1))).astype(np.float32)


def _write_transformer(folder: Path, prefix: str, *, dead_everywhere: bool = False) -> Path:
    """A small decoder in Hugging Face naming (``{prefix}.{i}.self_attn.q_proj.weight`` ...),
    with defects planted in layers 7 and 17 (same names but for the middle) and layer 1."""
    rng = np.random.default_rng(20261204)
    hidden, inner, vocab, depth = 32, 64, 128, 18
    tensors: dict[str, np.ndarray] = {
        "model.embed_tokens.weight": _trained(rng, vocab, hidden),
        "model.norm.weight": np.ones(hidden, np.float32),
        "lm_head.weight": _trained(rng, vocab, hidden),
    }
    shapes = {
        "self_attn.q_proj": (hidden, hidden),
        "self_attn.k_proj": (hidden, hidden),
        "self_attn.v_proj": (hidden, hidden),
        "self_attn.o_proj": (hidden, hidden),
        "mlp.gate_proj": (inner, hidden),
        "mlp.up_proj": (inner, hidden),
        "mlp.down_proj": (hidden, inner),
    }
    for index in range(depth):
        block = f"{prefix}.{index}"
        for name, shape in shapes.items():
            weights = _trained(rng, *shape)
            if dead_everywhere:
                weights[5] = 0.0  # one constant-zero unit in every projection
            tensors[f"{block}.{name}.weight"] = weights
        tensors[f"{block}.input_layernorm.weight"] = np.ones(hidden, np.float32)
        tensors[f"{block}.post_attention_layernorm.weight"] = np.ones(hidden, np.float32)
    tensors[f"{prefix}.17.self_attn.q_proj.weight"][3, 5] = np.nan
    tensors[f"{prefix}.7.self_attn.q_proj.weight"][3, 5] = np.inf
    tensors[f"{prefix}.7.self_attn.q_proj.weight"][10:14] = 0.0
    tensors[f"{prefix}.17.self_attn.q_proj.weight"][10:14] = 0.0
    tensors[f"{prefix}.1.mlp.down_proj.weight"][7] *= 40.0
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "model.safetensors"
    save_file(tensors, str(path))
    return path


@dataclass(frozen=True)
class Run:
    """One audit: the table at one width and the JSON of the same run."""

    width: int
    text: str
    document: dict[str, object]

    @property
    def lines(self) -> list[str]:
        return self.text.splitlines()


def _audit(paths: list[Path], width: int, out: Path, codes: tuple[int, ...] = (0, 1)) -> Run:
    table, document = out / f"report-{width}.txt", out / f"report-{width}.json"
    result = CliRunner().invoke(
        app,
        ["audit", *map(str, paths), "-o", str(table), "-o", str(document), "-q"],
        env={"COLUMNS": str(width), "NO_COLOR": "1"},
    )
    assert result.exit_code in codes, result.output
    return Run(width, table.read_text(encoding="utf-8"), json.loads(document.read_text()))


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("terminal-layout")
    return {
        "llama": _write_transformer(root / "llama", "model.layers"),
        "long": _write_transformer(root / "long", "model.language_model.decoder.transformer_layers"),
        "many": _write_transformer(root / "many", "model.layers", dead_everywhere=True),
    }


@pytest.fixture(scope="module")
def runs(models: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], Run]:
    out = tmp_path_factory.mktemp("reports")
    cases: dict[str, list[Path]] = {
        **{name: [path] for name, path in models.items()},
        "demo": [DEMO / "pumpwear-nightly-bad.safetensors"],
    }
    return {(name, w): _audit(paths, w, out) for name, paths in cases.items() for w in WIDTHS}


def _audits(run: Run) -> list[dict[str, object]]:
    audits = run.document.get("audits")
    return list(audits) if isinstance(audits, list) else [run.document]  # type: ignore[list-item]


# --- parsing the grid: column spans from the underline under a header ----------------------


def _spans(underline: str) -> list[tuple[int, int]]:
    return [(m.start(), m.end()) for m in re.finditer("─+", underline)]


def _cells(line: str, spans: list[tuple[int, int]]) -> list[str]:
    cells = []
    for index, (start, end) in enumerate(spans):
        stop = spans[index + 1][0] if index + 1 < len(spans) else len(line)
        cells.append(line[start:max(end, stop)].strip())
    return cells


def _table_after(lines: list[str], title_pattern: str) -> tuple[int, list[tuple[int, int]]]:
    """Index of the first line under the header underline of the table titled as given."""
    start = next(i for i, line in enumerate(lines) if re.match(title_pattern, line))
    rule = next(i for i in range(start, len(lines)) if lines[i].lstrip().startswith("─"))
    return rule + 1, _spans(lines[rule])


@dataclass
class FindingRow:
    number: int
    cells: list[str]
    text: list[str]
    """Lines of the message column (wide) or of the lines under the row (compact)."""


def _finding_rows(lines: list[str], compact: bool) -> list[FindingRow]:
    first, spans = _table_after(lines, r"findings \d")
    rows: list[FindingRow] = []
    for line in lines[first:]:
        if not line.strip():
            break
        cells = _cells(line, spans)
        if compact and line.startswith(" " * 5) and line[5] != " ":
            rows[-1].text.append(line.strip())
        elif cells[0].isdigit():
            rows.append(FindingRow(int(cells[0]), cells, [] if compact else [cells[-1]]))
        elif line.startswith(" " * 5) or cells[0] == "":
            # A wrapped layer, units or (wide) finding cell.
            for index, cell in enumerate(cells[1:], 1):
                if cell and (compact or index < len(cells) - 1):
                    joiner = " " if index == 4 else ""  # units wrap at spaces too
                    rows[-1].cells[index] += joiner + cell if rows[-1].cells[index] else cell
            if not compact and cells[-1]:
                rows[-1].text.append(cells[-1])
        else:
            break
    return rows


def _health_rows(lines: list[str]) -> list[list[str]]:
    first, spans = _table_after(lines, r"layer health$")
    rows: list[list[str]] = []
    for line in lines[first:]:
        if line.startswith("min, median, max"):
            break
        cells = _cells(line, spans)
        if cells[1]:
            rows.append(cells)
        else:  # a name wrapped after a separator continues the cell above
            rows[-1][0] += cells[0]
    return rows


def _shown_matches(shown: str, name: str) -> bool:
    return shown == name or (shown.startswith(ELLIPSIS) and name.endswith(shown[1:]))


def _assert_distinguishable(shown: list[str], names: list[str]) -> None:
    """Each shown cell is its name or an ellipsis and a tail of it; different names are shown
    differently; and no shortened cell could be read as the tail of another layer's name."""
    assert len(shown) == len(names)
    for cell, name in zip(shown, names, strict=True):
        assert _shown_matches(cell, name), (cell, name)
    pairs = dict(zip(names, shown, strict=True))
    assert len(set(pairs.values())) == len(pairs), "two layers read the same"
    every = set(names)
    for name, cell in pairs.items():
        if cell.startswith(ELLIPSIS):
            readers = [other for other in every if other.endswith(cell[1:])]
            assert readers == [name], (cell, readers)


def _column_width(lines: list[str], title: str, index: int) -> int:
    start, end = _table_after(lines, title)[1][index]
    return end - start


def _assert_wrapped_whole(message: str, lines: list[str], room: int) -> None:
    """``lines`` hold ``message`` from their start, broken only at its spaces, or (inside a
    word wider than the whole line, such as a long quoted tensor name) after a separator."""
    position = 0
    for number, line in enumerate(lines):
        if position >= len(message):
            return  # the message is done; a why or hint follows
        assert message.startswith(line, position), (message, lines)
        position += len(line)
        if position >= len(message) or number == len(lines) - 1:
            continue
        if message[position] == " ":
            position += 1
            continue
        # A break inside a word: only after a separator, and only in a word the line
        # could not hold.
        assert line[-1] in "./,_-:", (line, lines[number + 1])
        word_start = message.rfind(" ", 0, position) + 1
        word_end = message.find(" ", position)
        word = message[word_start : word_end if word_end >= 0 else len(message)]
        assert cell_len(word) > room, (word, room)
    assert position >= len(message), (message, lines)


# --- the checks ----------------------------------------------------------------------------


@pytest.mark.parametrize("case", ["llama", "long", "many", "demo"])
@pytest.mark.parametrize("width", WIDTHS)
def test_no_line_is_wider_than_the_terminal(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    too_wide = [line for line in run.lines if cell_len(line) > width]
    assert not too_wide, too_wide[:3]


@pytest.mark.parametrize("case", ["llama", "long", "demo"])
@pytest.mark.parametrize("width", WIDTHS)
def test_every_message_is_whole(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    findings = _audits(run)[0]["findings"]
    assert isinstance(findings, list) and findings
    rows = _finding_rows(run.lines, compact=width < 110)
    assert len(rows) == len(findings)
    room = width - 5 if width < 110 else _column_width(run.lines, r"findings \d", -1)
    for row, finding in zip(rows, findings, strict=True):
        _assert_wrapped_whole(str(finding["message"]), row.text, room)
        assert row.cells[1] == finding["severity"] and row.cells[2] == finding["rule"]


@pytest.mark.parametrize("case", ["llama", "long", "many"])
@pytest.mark.parametrize("width", WIDTHS)
def test_layer_names_stay_distinguishable(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    audit = _audits(run)[0]
    layers = audit["layers"]
    assert isinstance(layers, list)
    names = [str(entry["name"]) for entry in layers]
    shown = [row[0] for row in _health_rows(run.lines)]
    _assert_distinguishable(shown, names)
    assert {"model.layers.7.self_attn.q_proj", "model.layers.17.self_attn.q_proj"} <= set(names) or case == "long"
    rows = _finding_rows(run.lines, compact=width < 110)
    findings = audit["findings"]
    assert isinstance(findings, list)
    for row, finding in zip(rows, findings, strict=False):  # capped at 40 rows
        if finding.get("layer"):
            assert _shown_matches(row.cells[3], str(finding["layer"])), (row.cells[3], finding["layer"])


def test_long_names_are_shortened_from_the_left_only_when_narrow(runs: dict[tuple[str, int], Run]) -> None:
    narrow = [row[0] for row in _health_rows(runs["long", 80].lines)]
    wide = [row[0] for row in _health_rows(runs["long", 200].lines)]
    assert any(cell.startswith(ELLIPSIS) for cell in narrow)
    assert not any(cell.startswith(ELLIPSIS) for cell in wide)
    # The tails keep the block number that tells layer 7 from layer 17.
    assert any(re.search(r"\b7\.self_attn\.q_proj$", c) for c in narrow)
    assert any(re.search(r"17\.self_attn\.q_proj$", c) for c in narrow)


@pytest.mark.parametrize("case", ["llama", "many", "demo"])
@pytest.mark.parametrize("width", WIDTHS)
def test_header_counts_equal_the_rows(runs: dict[tuple[str, int], Run], case: str, width: int) -> None:
    run = runs[case, width]
    audit = _audits(run)[0]
    findings = audit["findings"]
    assert isinstance(findings, list)
    header = next(line for line in run.lines if re.match(r"findings \d", line))
    total = int(re.match(r"findings ([\d,]+)", header).group(1).replace(",", ""))  # type: ignore[union-attr]
    assert total == len(findings)
    rows = _finding_rows(run.lines, compact=width < 110)
    folded = sum(int(m.group(1)) - 1 for r in rows if (m := re.fullmatch(r"(\d+) layers", r.cells[3])))
    more = re.search(r"… and ([\d,]+) more findings?", run.text)
    hidden = int(more.group(1).replace(",", "")) if more else 0
    assert len(rows) + folded + hidden == total
    assert [r.number for r in rows] == list(range(1, len(rows) + 1))
    severities = {s: sum(f["severity"] == s for f in findings) for s in ("error", "warning")}
    verdict = next(line for line in run.lines if line.startswith("verdict"))
    for severity, n in severities.items():
        assert f"{n:,} {severity}{'' if n == 1 else 's'}" in verdict
    if case == "many":
        assert more is not None and len(rows) == 40


def test_a_folded_row_says_how_many_findings_it_stands_for(models: dict[str, Path]) -> None:
    # Info findings saying the same about several layers share a row. Real audit, findings
    # replaced by such a group (no rule here emits one on these weights).
    import steelyard
    from steelyard.findings import Finding, Severity

    report = steelyard.audit(models["llama"])
    audit = report.audits[0]
    names = [str(row.layer["name"]) for row in audit.layers][:5]
    same = [
        Finding("fan-in-norm", Severity.INFO, name, f"{name}.weight", (), 1.0, "one message", "one hint")
        for name in names
    ]
    folded = replace(report, audits=(replace(audit, findings=(*audit.findings, *same)),))
    for width in WIDTHS:
        lines = folded.render("table", width=width).splitlines()
        rows = _finding_rows(lines, compact=width < 110)
        assert rows[-1].cells[3] == f"{len(names)} layers"
        text = " ".join(rows[-1].text)
        assert f"{len(names)} findings, one per layer: {', '.join(names)}" in text
        header = next(line for line in lines if line.startswith("findings "))
        assert header.startswith(f"findings {len(audit.findings) + len(names)} in {len(rows)} rows")


@pytest.mark.parametrize("width", WIDTHS)
def test_the_summary_names_every_failure(models: dict[str, Path], tmp_path: Path, width: int) -> None:
    healthy = DEMO / "pumpwear-healthy.safetensors"
    unreadable = DEMO / "scenario.json"
    paths = [models["llama"], models["long"], DEMO / "pumpwear-nightly-bad.safetensors", healthy, unreadable]
    run = _audit(paths, width, tmp_path, codes=(2,))  # an unreadable input exits 2
    verdicts = {str(a["checkpoint"]["path"]): a["gate"]["passed"] for a in _audits(run)}  # type: ignore[index]
    assert verdicts[str(healthy)] is True and list(verdicts.values()).count(False) == 3
    first, spans = _table_after(run.lines, r"summary$")
    block = run.lines[first:]
    end = next(i for i, line in enumerate(block) if line.startswith(("FAIL ", "UNREADABLE ", "overall")))
    rows = [_cells(line, spans) for line in block[:end]]
    assert len(rows) == len(paths)
    everything = [*verdicts, str(unreadable)]
    for cell, *_ in rows:
        assert sum(_shown_matches(cell, p) for p in everything) == 1, cell
    failures = "".join("".join(block[end:]).split())
    for path, passed in verdicts.items():
        if not passed:
            assert f"FAIL{path}:" in failures
            row = next(r for r in rows if _shown_matches(r[0], path))
            assert row[1] == "FAIL"
    assert f"UNREADABLE{unreadable}:" in failures
    assert str(healthy) not in failures


def test_the_hash_has_its_own_label_and_the_histogram_a_legend(runs: dict[tuple[str, int], Run]) -> None:
    for width in WIDTHS:
        run = runs["demo", width]
        digest = _audits(run)[0]["checkpoint"]["blake3"]  # type: ignore[index]
        assert f"blake3      {digest}" in run.lines
        legend = " ".join(run.lines[run.lines.index(next(x for x in run.lines if x.startswith("min, median"))) :])
        assert "histogram:" in legend and "log-spaced from min (left) to max (right)" in legend


@pytest.mark.parametrize("case", ["llama", "long"])
@pytest.mark.parametrize("width", WIDTHS)
def test_layers_table_fits_and_keeps_names_apart(
    models: dict[str, Path], case: str, width: int, tmp_path: Path
) -> None:
    table, document = tmp_path / "layers.txt", tmp_path / "layers.json"
    runner = CliRunner()
    env = {"COLUMNS": str(width), "NO_COLOR": "1"}
    assert runner.invoke(app, ["layers", str(models[case]), "-o", str(table)], env=env).exit_code == 0
    assert runner.invoke(app, ["layers", str(models[case]), "-f", "json", "-o", str(document)]).exit_code == 0
    lines = table.read_text(encoding="utf-8").splitlines()
    assert all(cell_len(line) <= width for line in lines)
    names = [str(entry["name"]) for entry in json.loads(document.read_text())["layers"]]
    _assert_distinguishable(_layers_rows(lines), names)


def _layers_rows(lines: list[str]) -> list[str]:
    """The layer cells of ``steelyard layers``' table, wrapped names joined."""
    first, spans = _table_after(lines, r"layer\s+kind|\s+out ×")
    shown: list[str] = []
    for line in lines[first:]:
        if not line.strip():
            break
        if line.startswith("    fed by "):  # the compact layout's line under a row
            continue
        cells = _cells(line, spans)
        if cells[1]:
            shown.append(cells[0])
        else:
            shown[-1] += cells[0]
    return shown


GOLDEN = REPO / "tests" / "golden"
BAD = "fixtures/demo/pumpwear-nightly-bad.safetensors"
GOLDEN_CASES = {
    # audit-bad.txt (120 columns) is tests/test_golden.py's; these are the other two widths.
    "audit-bad-80.txt": (80, ["audit", BAD, "--grads", "fixtures/demo/pumpwear-nightly-bad.grads.safetensors"]),
    "audit-bad-200.txt": (200, ["audit", BAD, "--grads", "fixtures/demo/pumpwear-nightly-bad.grads.safetensors"]),
    "audit-two-80.txt": (80, ["audit", "fixtures/demo/pumpwear-healthy.safetensors", BAD]),
    "layers-onnx-80.txt": (80, ["layers", "fixtures/demo/pumpwear-nightly-bad.onnx"]),
}


@pytest.mark.parametrize("name", sorted(GOLDEN_CASES))
def test_golden_widths(name: str, update_golden: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # Refresh with: python -m pytest tests/test_terminal_layout.py --update-golden
    monkeypatch.chdir(REPO)
    width, args = GOLDEN_CASES[name]
    result = CliRunner().invoke(app, args, env={"COLUMNS": str(width), "NO_COLOR": "1"})
    assert result.exit_code in (0, 1), result.output
    target = GOLDEN / name
    if update_golden or not target.exists():
        target.write_text(result.stdout, encoding="utf-8")
    assert result.stdout == target.read_text(encoding="utf-8")


def test_colour_marks_the_verdict_not_the_whole_line() -> None:
    result = CliRunner().invoke(
        app, ["--color", "always", "audit", str(DEMO / "pumpwear-nightly-bad.safetensors")],
        env={"COLUMNS": "80"},
    )
    verdict = next(line for line in result.stdout.splitlines() if "verdict" in line)
    # SGR 1;31 (bold red) on the word FAIL only, then plain text (ECMA-48 select graphic rendition).
    assert re.search(r"\x1b\[1;31mFAIL\x1b\[0m \d+ errors?, ", verdict), verdict
    plain = re.sub(r"\x1b\[[0-9;]*m", "", result.stdout)
    assert all(cell_len(line) <= 80 for line in plain.splitlines())
