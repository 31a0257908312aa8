"""Baselines: accept today's findings, gate only on new ones.

A baseline is a ``steelyard.baseline/1`` file written by ``--write-baseline``, or any earlier
``steelyard.audit/1`` / ``steelyard.audit-set/1`` JSON report. A finding matches an entry when
both are about the same checkpoint and have the same stable ``id`` (rule, tensor, part, units),
which leaves out every measured value, so a finding that persists with different numbers
still matches.

A checkpoint is identified by its path as the run names it, relative to the working folder,
with the format's file ending removed (:func:`checkpoint_key`): ``models/cls.safetensors``,
``models/cls.onnx`` and ``models/cls.weights.h5`` are one checkpoint, so re-exports of the same
weights beside each other still match where the tensor names survive; ``models/other.onnx``
is another, and nothing accepted for one ever silences the other.
"""

from __future__ import annotations

import json
import os
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


#: File endings removed from a checkpoint's path to identify it (longest first).
_ENDINGS = (
    ".safetensors.index.json",
    ".weights.h5",
    ".safetensors",
    ".onnx",
    ".keras",
    ".hdf5",
    ".h5",
    ".npz",
    ".pth",
    ".pt",
    ".bin",
    ".ckpt",
    ".jit",
)


def checkpoint_key(path: str) -> str:
    """How a baseline identifies a checkpoint: its path relative to the working folder
    (absolute when outside it), with ``/`` separators and the format's ending removed."""
    try:
        relative = os.path.relpath(path)
    except ValueError:  # pragma: no cover - another drive on Windows
        relative = path
    if relative.startswith(".."):
        relative = os.path.abspath(path)
    text = relative.replace(os.sep, "/")
    for ending in _ENDINGS:
        if text.endswith(ending) and len(text) > len(ending):
            return text[: -len(ending)]
    return text


@dataclass(frozen=True)
class Baseline:
    """Accepted findings per checkpoint, with what each was when accepted."""

    path: str
    entries: dict[tuple[str, str], dict[str, Any]]
    """(checkpoint key, finding id) → ``{"checkpoint", "rule", "layer", "tensor", "units"}``."""


def _findings_with_checkpoint(document: dict[str, Any], path: str) -> list[tuple[Any, Any]]:
    """(finding, checkpoint path) pairs of a baseline or report document."""
    schema = document.get("schema")
    if schema == BASELINE_SCHEMA:
        findings = document.get("findings")
        if not isinstance(findings, list):
            raise BaselineError(f"{path}: baseline has no 'findings' list")
        return [(f, f.get("checkpoint") if isinstance(f, dict) else None) for f in findings]
    if schema == "steelyard.audit/1":
        audits: Any = [document]
    elif schema == "steelyard.audit-set/1":
        audits = document.get("audits")
        if not isinstance(audits, list):
            raise BaselineError(f"{path}: baseline has no 'audits' list")
    else:
        named = schema[:80] if isinstance(schema, str) else type(schema).__name__
        raise BaselineError(f"{path}: not a steelyard baseline or JSON report (schema {named!r})")
    pairs: list[tuple[Any, Any]] = []
    for audit in audits:
        block = audit.get("checkpoint") if isinstance(audit, dict) else None
        where = block.get("path") if isinstance(block, dict) else None
        findings = audit.get("findings") if isinstance(audit, dict) else None
        if not isinstance(findings, list):
            raise BaselineError(f"{path}: baseline has no 'findings' list")
        pairs += [(f, where) for f in findings]
    return pairs


def _entries_of(document: Any, path: str) -> dict[tuple[str, str], dict[str, Any]]:
    if not isinstance(document, dict):
        raise BaselineError(f"{path}: baseline is not a JSON object")
    entries: dict[tuple[str, str], dict[str, Any]] = {}
    for index, (item, where) in enumerate(_findings_with_checkpoint(document, path)):
        if (
            not isinstance(item, dict)
            or not isinstance(item.get("id"), str)
            or not isinstance(item.get("rule"), str)
        ):
            raise BaselineError(f"{path}: finding {index} has no string 'id' and 'rule'")
        if not isinstance(where, str) or not where:
            # Fail closed: an entry that names no checkpoint could silence any of them.
            raise BaselineError(
                f"{path}: finding {index} names no checkpoint; write the baseline again "
                "with --write-baseline"
            )
        entries[(checkpoint_key(where), item["id"])] = {"checkpoint": where} | _fields(
            item, index, path
        )
    return entries


#: Most units one baseline entry may list (a layer's units are bounded by the unit budget;
#: a baseline is a list of findings, not a dump of them).
_MAX_UNITS = 2**20


def _fields(item: dict[str, Any], index: int, path: str) -> dict[str, Any]:
    """The kept fields of a finding, with their types checked: they are shown again in
    reports (the ``fixed`` list), so a wrong type or a deeply nested value must be refused
    here, with one line, rather than break a renderer later."""
    kept: dict[str, Any] = {"rule": item["rule"]}
    for key in ("layer", "tensor"):
        value = item.get(key)
        if value is not None and not isinstance(value, str):
            raise BaselineError(
                f"{path}: finding {index} has a {key!r} that is not a string or null"
            )
        kept[key] = value
    units = item.get("units", [])
    if units is None:
        units = []
    if (
        not isinstance(units, list)
        or len(units) > _MAX_UNITS
        or not all(isinstance(u, int) and not isinstance(u, bool) and u >= 0 for u in units)
    ):
        raise BaselineError(
            f"{path}: finding {index} has 'units' that are not a list of unit numbers"
        )
    kept["units"] = units
    return kept


def read_baseline(path: Path) -> Baseline:
    """Read and validate a baseline file (a side file: only a regular file of at most 64 MB
    is read, opened so that a FIFO cannot block and a device is refused)."""
    from steelyard.safepath import read_side_file

    raw = read_side_file(path, "baseline", _MAX_BYTES, error=BaselineError)
    try:
        document = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise BaselineError(f"{path}: baseline is not valid JSON ({exc})") from None
    except (RecursionError, MemoryError):
        raise BaselineError(f"{path}: baseline is nested too deeply to be a baseline") from None
    return Baseline(path=str(path), entries=_entries_of(document, str(path)))


def apply_baseline(report: Report, baseline: Baseline) -> Report:
    """Split each audit's findings into new and baselined (an entry only ever matches
    findings of its own checkpoint); list the entries of audited checkpoints now fixed, and
    the checkpoints the baseline names that this run did not audit."""
    seen: set[tuple[str, str]] = set()
    audited: set[str] = set()
    audits: list[CheckpointAudit] = []
    for audit in report.audits:
        key = checkpoint_key(str(audit.checkpoint.get("path", "")))
        audited.add(key)
        new: list[Finding] = []
        old: list[Finding] = []
        for finding in audit.findings:
            (old if (key, finding.id) in baseline.entries else new).append(finding)
            seen.add((key, finding.id))
        audits.append(replace(audit, findings=tuple(new), baselined=tuple(old)))
    fixed = [
        {"id": ident, **value}
        for (key, ident), value in baseline.entries.items()
        if key in audited and (key, ident) not in seen
    ]
    elsewhere = sorted(
        {str(v["checkpoint"]) for (key, _), v in baseline.entries.items() if key not in audited}
    )
    matched = sum(len(a.baselined) for a in audits)
    return replace(
        report,
        audits=tuple(audits),
        baseline={
            "path": baseline.path,
            "matched": matched,
            "fixed": fixed,
            "not_audited": elsewhere,
        },
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
