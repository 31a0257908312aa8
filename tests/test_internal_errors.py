"""A bug is never a verdict: a rule that raises gives the internal-error exit code 3 (one
line inviting --debug), never 1 ("gate failed") or 2 ("bad input"); a tensor whose bytes turn
out broken when read lazily is the input's error (exit 2, one line naming the file).

The exit codes are steelyard's own contract (docs/ci.md); the rule below exists only here."""

from __future__ import annotations

import errno
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import steelyard
from steelyard.cli import app
from steelyard.errors import LoadError
from steelyard.findings import Finding, Severity
from steelyard.graph import Layer
from steelyard.rules.base import AuditContext, RuleSettings, RuleSpec
from tests.conftest import mlp_tensors, write_safetensors
from tests.rules._registration import registered_for_the_test

runner = CliRunner()
RAISED: list[type[Exception]] = [ValueError]


@dataclass(frozen=True)
class _NoSettings:
    """``broken-rule`` has no thresholds."""


def _check(ctx: AuditContext, settings: RuleSettings[_NoSettings], layer: Layer) -> Iterator[Finding]:
    raise RAISED[0]("a bug inside a rule")
    yield  # pragma: no cover - makes this a generator like every per-layer check


RULE = RuleSpec(
    name="broken-rule",
    severity=Severity.WARNING,
    settings=_NoSettings,
    summary="a test-only rule that always raises",
    doc="``broken-rule``: test only.\n\n**Why it matters.** It does not.\n\n**What to do.** Nothing.\n",
    per_layer=_check,
)


@pytest.fixture
def broken_rule(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    yield from registered_for_the_test(monkeypatch, "steelyard_test_broken_rule", RULE)


def _model(tmp_path: Path) -> Path:
    return write_safetensors(tmp_path / "m.safetensors", mlp_tensors(np.random.default_rng(5)))


@pytest.mark.parametrize("kind", [ValueError, KeyError, RuntimeError, OSError, TypeError])
def test_a_rule_that_raises_is_an_internal_error_not_a_broken_file(
    broken_rule: None, tmp_path: Path, kind: type[Exception]
) -> None:
    # ValueError and OSError are the cases the old engine misread as "could not be read".
    RAISED[0] = kind
    result = runner.invoke(app, ["audit", str(_model(tmp_path))])
    assert result.exit_code == 3, result.output
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "internal error" in lines[0] and "--debug" in lines[0]
    assert "could not be read" not in result.output
    # The API lets the bug surface as itself, never as an input error.
    with pytest.raises(kind) as raised:
        steelyard.audit(_model(tmp_path))
    assert not isinstance(raised.value, LoadError)


def test_a_tensor_that_fails_to_read_after_loading_is_the_inputs_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A disk error while a rule reads a tensor (the file loaded fine): exit 2, one line that
    # names the file and the tensor; EIO is what Linux returns for a failing medium.
    path = _model(tmp_path)
    from steelyard.loaders import safetensors as reader

    def failing(self: object, buffer: np.ndarray, offset: int) -> np.ndarray:
        raise OSError(errno.EIO, "Input/output error")

    monkeypatch.setattr(reader._Shard, "_read_into", failing)
    result = runner.invoke(app, ["audit", str(path)])
    assert result.exit_code == 2, result.output
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and str(path) in lines[0] and "could not be read" in lines[0]
    assert "fc1.weight" in lines[0] or "fc2.weight" in lines[0]


def test_a_file_truncated_after_loading_is_the_inputs_error(tmp_path: Path) -> None:
    # Loaded, then cut short before the rules read it (a copy still being written).
    from steelyard.checkpoint_audit import audit_checkpoint
    from steelyard.loaders import load
    from steelyard.policy import Policy

    path = _model(tmp_path)
    checkpoint = load(path)
    path.write_bytes(path.read_bytes()[:200])
    with pytest.raises(LoadError) as raised:
        audit_checkpoint(checkpoint, Policy(), None)
    assert str(path) in str(raised.value) and "truncated" in str(raised.value)
