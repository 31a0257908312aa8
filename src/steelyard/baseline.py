"""Baselines: accept today's findings, gate only on new ones.

A baseline is a ``steelyard.baseline/1`` file written by ``--write-baseline``, or any earlier
``steelyard.audit/1`` / ``steelyard.audit-set/1`` JSON report. Findings match by their stable
``id`` (rule, tensor, part, units), which leaves out every measured value, so a finding that
persists with different numbers still matches, and so does the same weights re-exported to a
format that keeps the tensor names.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from steelyard.errors import SteelyardError
from steelyard.findings import Finding
from steelyard.render.json_report import finding_block
from steelyard.report import CheckpointAudit, Report

BASELINE_SCHEMA = "steelyard.baseline/1"
_MAX_BYTES = 64 * 2**20


class BaselineError(SteelyardError):
    """A baseline file is missing or malformed."""


@dataclass(frozen=True)
class Baseline:
    """Accepted finding ids, with what each was when accepted."""

    path: str
    entries: dict[str, dict[str, Any]]
    """id → ``{"rule", "layer", "tensor", "units"}``."""


def _entries_of(document: Any, path: str) -> dict[str, dict[str, Any]]:
    if not isinstance(document, dict):
        raise BaselineError(f"{path}: baseline is not a JSON object")
    schema = document.get("schema")
    if schema == BASELINE_SCHEMA or schema == "steelyard.audit/1":
        findings = document.get("findings")
    elif schema == "steelyard.audit-set/1":
        audits = document.get("audits")
        if not isinstance(audits, list):
            raise BaselineError(f"{path}: baseline has no 'audits' list")
        findings = [f for a in audits if isinstance(a, dict) for f in (a.get("findings") or [])]
    else:
        raise BaselineError(f"{path}: not a steelyard baseline or JSON report (schema {schema!r})")
    if not isinstance(findings, list):
        raise BaselineError(f"{path}: baseline has no 'findings' list")
    entries: dict[str, dict[str, Any]] = {}
    for index, item in enumerate(findings):
        if (
            not isinstance(item, dict)
            or not isinstance(item.get("id"), str)
            or not isinstance(item.get("rule"), str)
        ):
            raise BaselineError(f"{path}: finding {index} has no string 'id' and 'rule'")
        entries[item["id"]] = {k: item.get(k) for k in ("rule", "layer", "tensor", "units")}
    return entries


def read_baseline(path: Path) -> Baseline:
    """Read and validate a baseline file."""
    try:
        if path.stat().st_size > _MAX_BYTES:
            raise BaselineError(f"{path}: baseline is larger than 64 MB")
        document = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise BaselineError(f"{path}: baseline file does not exist") from None
    except (OSError, UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise BaselineError(f"{path}: baseline is not valid JSON ({exc})") from None
    return Baseline(path=str(path), entries=_entries_of(document, str(path)))


def apply_baseline(report: Report, baseline: Baseline) -> Report:
    """Split each audit's findings into new and baselined; list baseline entries now fixed."""
    seen: set[str] = set()
    audits: list[CheckpointAudit] = []
    for audit in report.audits:
        new: list[Finding] = []
        old: list[Finding] = []
        for finding in audit.findings:
            (old if finding.id in baseline.entries else new).append(finding)
            seen.add(finding.id)
        audits.append(replace(audit, findings=tuple(new), baselined=tuple(old)))
    fixed = [{"id": key, **value} for key, value in baseline.entries.items() if key not in seen]
    matched = sum(len(a.baselined) for a in audits)
    return replace(
        report,
        audits=tuple(audits),
        baseline={"path": baseline.path, "matched": matched, "fixed": fixed},
    )


def baseline_text(audits: Sequence[CheckpointAudit], tool_version: str) -> str:
    """The ``steelyard.baseline/1`` document recording every current finding."""
    findings = []
    for audit in audits:
        for finding in (*audit.findings, *audit.baselined):
            block = finding_block(finding)
            findings.append(
                {
                    k: block[k]
                    for k in ("id", "rule", "severity", "layer", "tensor", "units", "message")
                }
                | {"checkpoint": str(audit.checkpoint.get("path", ""))}
            )
    document = {
        "schema": BASELINE_SCHEMA,
        "tool": {"name": "steelyard", "version": tool_version},
        "findings": findings,
    }
    return json.dumps(document, indent=2, ensure_ascii=False) + "\n"
