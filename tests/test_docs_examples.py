"""Every `steelyard` command shown in a shell block of the README and docs/ is a command that
works: run on the committed fixtures, with the placeholder file names the docs use mapped to
demo files of the same kind (the invented pump-wear demo and the invented training run), it
exits 0 or 1 (a verdict), never 2 (bad usage) or 3, and with the stated code where a line
says "# exit N". A placeholder the table below does not know fails the test, so a new example
must be made runnable here. Usage synopses (with [...] or UPPERCASE names) and examples that
need downloaded models are not commands and are left out."""

from __future__ import annotations

import glob
import re
import shlex
from pathlib import Path

import pytest
from click.testing import CliRunner

from steelyard.cli import app

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "fixtures" / "demo"
RUN = ROOT / "fixtures" / "timeline_run"

#: Placeholder in the docs → committed file of the same kind.
PLACEHOLDERS = {
    "model.safetensors": DEMO / "pumpwear-nightly-bad.safetensors",
    "model.onnx": DEMO / "pumpwear-nightly-bad.onnx",
    "model.keras": DEMO / "pumpwear-nightly-bad.keras",
    "model.pt": DEMO / "pumpwear-nightly-bad.pt",
    "grads.safetensors": DEMO / "pumpwear-nightly-bad.grads.safetensors",
    "models/": DEMO,
    "base.safetensors": DEMO / "pumpwear-healthy.safetensors",
    "finetuned.safetensors": DEMO / "pumpwear-nightly-bad.safetensors",
    "a.safetensors": RUN / "checkpoint-100" / "model.safetensors",
    "b.safetensors": RUN / "checkpoint-200" / "model.safetensors",
    "runs/my-run/": RUN,
    "runs/glasshouse/": RUN,
}
#: Files the examples write or read back, created in the test's working folder.
OUTPUT_ENDINGS = (".json", ".sarif", ".md", ".xml", ".html", ".txt", ".toml")
DOCS = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md")), ROOT / "fixtures" / "README.md"]


def _examples() -> list[tuple[str, str, int | None]]:
    found = []
    for page in DOCS:
        text = page.read_text(encoding="utf-8")
        for block in re.findall(r"```(?:sh|shell|bash|console)\n(.*?)```", text, flags=re.S):
            for line in block.splitlines():
                command, _, comment = line.partition("#")
                command = command.split("&&")[-1].strip().removeprefix("$ ")
                if not command.startswith("steelyard ") or "[" in command or ".cache/" in command:
                    continue
                if re.search(r"\b[A-Z]{2,}\b", command):  # OLD NEW, PATH: a synopsis
                    continue
                exit_code = re.match(r"\s*exit (\d)", comment)
                found.append((page.relative_to(ROOT).as_posix(), command, int(exit_code.group(1)) if exit_code else None))
    return found


EXAMPLES = _examples()


def test_the_docs_show_enough_commands() -> None:
    assert len(EXAMPLES) >= 20


def _argv(command: str, where: Path) -> list[str]:
    argv: list[str] = []
    for token in shlex.split(command)[1:]:
        if token in PLACEHOLDERS:
            argv.append(str(PLACEHOLDERS[token]))
        elif "*" in token:
            pattern = token
            for name, target in PLACEHOLDERS.items():
                pattern = pattern.replace(name, f"{target}/")
            matches = sorted(glob.glob(pattern))
            assert matches, f"{token}: matches nothing"
            argv.extend(matches)
        elif token.startswith("fixtures/"):
            argv.append(str(ROOT / token))
        elif token.endswith((".safetensors", ".onnx", ".keras", ".pt", ".gguf", ".npz", ".h5")) or token.endswith("/"):
            pytest.fail(f"{token!r}: a placeholder this test cannot map; add it to PLACEHOLDERS")
        else:
            argv.append(str(where / token) if token.endswith(OUTPUT_ENDINGS) and not token.startswith("-") else token)
    return argv


@pytest.mark.parametrize(("page", "command", "expected"), EXAMPLES, ids=[f"{p}: {c}" for p, c, _ in EXAMPLES])
def test_example_runs(page: str, command: str, expected: int | None, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("NO_COLOR", "1")
    argv = _argv(command, tmp_path)
    if "--baseline" in argv:  # the baseline an example reads is written first, as the docs do
        target = argv[argv.index("--baseline") + 1]
        first = [a for a in argv if not a.startswith("-")][1]
        CliRunner().invoke(app, ["audit", first, "--write-baseline", target, "--fail-on", "never"])
    result = CliRunner().invoke(app, argv)
    if expected is not None:
        assert result.exit_code == expected, f"{page}: {command}\n{result.stderr}"
    else:
        assert result.exit_code in (0, 1), f"{page}: {command}\n{result.stderr}"
