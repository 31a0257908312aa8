"""The README's quick start does what it says: every `steelyard` command in its shell blocks
runs on the committed demo and exits with the code the README states (a trailing
"# exit N" comment; no comment means 0, as for the first command a newcomer pastes)."""

from __future__ import annotations

import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _quick_start_commands() -> list[tuple[list[str], int]]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = []
    for block in re.findall(r"```sh\n(.*?)```", section, flags=re.S):
        for line in block.splitlines():
            command, _, comment = line.partition("#")
            command = command.split("&&")[-1].strip()
            if not command.startswith("steelyard "):
                continue
            found = re.match(r"\s*exit (\d)", comment)
            commands.append((shlex.split(command)[1:], int(found.group(1)) if found else 0))
    return commands


COMMANDS = _quick_start_commands()


def test_the_quick_start_has_commands_and_starts_with_a_success() -> None:
    assert len(COMMANDS) >= 2
    assert COMMANDS[0][1] == 0


@pytest.mark.parametrize(("args", "expected"), COMMANDS, ids=[" ".join(a) for a, _ in COMMANDS])
def test_quick_start_command_exits_as_documented(args: list[str], expected: int) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "steelyard", *args], cwd=ROOT, capture_output=True, timeout=300
    )
    assert done.returncode == expected, done.stderr.decode(errors="replace")
