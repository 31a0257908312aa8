"""The progress display appears on a terminal and nowhere else: run through a
pseudo-terminal, stderr shows the checkpoint, bytes read with a rate and layers done; piped,
or with --quiet, stderr carries no progress at all."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tests.conftest import mlp_tensors, write_safetensors

pty = pytest.importorskip("pty")


def _model(tmp_path: Path) -> Path:
    # Enough layers that the display refreshes while the audit works (about a second).
    rng = np.random.default_rng(3)
    return write_safetensors(tmp_path / "deep.safetensors", mlp_tensors(rng, (384,) * 41))


def _on_terminal(args: list[str]) -> str:
    env = {k: v for k, v in os.environ.items() if k not in ("NO_COLOR", "FORCE_COLOR")}
    env["COLUMNS"] = "160"
    leader, follower = pty.openpty()
    chunks: list[bytes] = []
    try:
        child = subprocess.Popen(
            [sys.executable, "-m", "steelyard", *args],
            stdout=subprocess.DEVNULL, stderr=follower, env=env,
        )
        os.close(follower)
        while True:
            try:
                chunk = os.read(leader, 65536)
            except OSError:  # the child closed the terminal
                break
            if not chunk:
                break
            chunks.append(chunk)
        child.wait(timeout=300)
    finally:
        os.close(leader)
    return b"".join(chunks).decode("utf-8", "replace")


def test_progress_moves_on_a_terminal(tmp_path: Path) -> None:
    shown = _on_terminal(["audit", str(_model(tmp_path)), "--fail-on", "never"])
    assert "auditing" in shown and "deep.safetensors" in shown
    assert " layers" in shown and " read, " in shown and "/s" in shown


def test_no_progress_in_a_pipe_or_when_quiet(tmp_path: Path) -> None:
    model = _model(tmp_path)
    piped = subprocess.run(
        [sys.executable, "-m", "steelyard", "audit", str(model), "--fail-on", "never"],
        capture_output=True, text=True, timeout=300,
    )
    assert piped.returncode == 0 and "auditing" not in piped.stderr and " layers" not in piped.stderr
    quiet = _on_terminal(["audit", str(model), "--fail-on", "never", "--quiet"])
    assert "auditing" not in quiet and " layers" not in quiet
