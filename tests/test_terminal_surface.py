"""The terminal report's surface when piped: ``COLUMNS`` sets the width (CI logs are pipes),
``--color`` overrides detection, and ``NO_COLOR`` disables colour only when non-empty (the
NO_COLOR convention, https://no-color.org: "when present and not an empty string").

Each case runs the real command in a subprocess, so stdout is a pipe as in CI."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo"
BAD = DEMO / "pumpwear-nightly-bad.safetensors"
ESC = "\x1b["


def _run(*args: str, **env: str) -> str:
    base = {k: v for k, v in os.environ.items() if k not in ("COLUMNS", "NO_COLOR", "FORCE_COLOR")}
    done = subprocess.run(
        [sys.executable, "-m", "steelyard", *args],
        capture_output=True,
        text=True,
        env={**base, **env},
        timeout=120,
    )
    assert done.returncode in (0, 1), done.stderr
    return done.stdout


@pytest.mark.parametrize("columns", [80, 120, 200])
def test_columns_sets_the_width_of_a_piped_report(columns: int) -> None:
    lines = _run("audit", str(BAD), COLUMNS=str(columns)).splitlines()
    widest = max(len(line) for line in lines)
    assert widest <= columns
    if columns == 80:
        # The findings table fills what it is given: wider when allowed.
        wide = max(len(line) for line in _run("audit", str(BAD), COLUMNS="200").splitlines())
        assert wide > widest


def test_a_pipe_gets_no_colour_unless_asked() -> None:
    assert ESC not in _run("audit", str(BAD))
    assert ESC in _run("--color", "always", "audit", str(BAD))
    assert ESC not in _run("--color", "never", "audit", str(BAD))


def test_no_color_disables_colour_only_when_non_empty() -> None:
    # On a pipe auto is already off, so the convention is checked where it matters: --color
    # auto on a terminal, through a pseudo-terminal.
    pty = pytest.importorskip("pty")

    def on_terminal(no_color: str | None) -> str:
        env = {k: v for k, v in os.environ.items() if k not in ("NO_COLOR", "FORCE_COLOR")}
        if no_color is not None:
            env["NO_COLOR"] = no_color
        env["COLUMNS"] = "120"
        leader, follower = pty.openpty()
        chunks = []
        try:
            # Read while the child writes: a full pseudo-terminal buffer would block it.
            child = subprocess.Popen(
                [sys.executable, "-m", "steelyard", "audit", str(BAD)],
                stdout=follower,
                stderr=subprocess.DEVNULL,
                env=env,
            )
            os.close(follower)
            while True:
                try:
                    chunk = os.read(leader, 65536)
                except OSError:  # EIO: the child closed its side
                    break
                if not chunk:
                    break
                chunks.append(chunk)
            child.wait(timeout=120)
        finally:
            os.close(leader)
        return b"".join(chunks).decode("utf-8", "replace")

    assert ESC in on_terminal(None)
    assert ESC in on_terminal("")
    assert ESC not in on_terminal("1")


@pytest.mark.parametrize("command", ["audit", "compare", "layers", "rules", "policy"])
def test_help_text_is_plain_text(command: str) -> None:
    # Brackets in help are literal ("[tool.steelyard]", "[budget]"), flags show no "<bool>".
    text = _run(command, "--help", COLUMNS="100")
    assert "<bool>" not in text
    if command == "audit":
        assert "[tool.steelyard]" in text and "[budget]" in text
