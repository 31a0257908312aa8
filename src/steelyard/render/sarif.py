"""SARIF 2.1.0 (OASIS standard), the format code-scanning services accept.

One ``result`` per finding, the checkpoint file as the artifact location and the layer and
tensor as logical locations; the ``rules`` table comes from the rule registry and docs.
"""

from __future__ import annotations

import json
import os
from typing import Any

from steelyard.digest import Digest, digest_in
from steelyard.findings import Finding, Severity
from steelyard.render.json_report import _clean
from steelyard.report import Report, Suppressed
from steelyard.rules import Command, sarif_rules
from steelyard.text_safety import shown

SARIF_SCHEMA_URI = (
    "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
)
INFORMATION_URI = "https://steelyard.readthedocs.io/"


def level(severity: Severity) -> str:
    """SARIF ``level`` of a severity (SARIF 2.1.0 §3.27.10)."""
    return {Severity.ERROR: "error", Severity.WARNING: "warning", Severity.INFO: "note"}[severity]


def _uri(path: str) -> str:
    try:
        relative = os.path.relpath(path)
    except ValueError:
        relative = path
    if relative.startswith(".."):
        relative = os.path.abspath(path)
    return relative.replace(os.sep, "/")


def _result(
    finding: Finding,
    artifact: int,
    rule_index: dict[str, int],
    baselined: bool,
    suppressed: Suppressed | None = None,
) -> dict[str, Any]:
    logical = []
    if finding.layer:
        logical.append({"name": finding.layer, "kind": "module"})
    if finding.tensor:
        logical.append(
            {
                "name": finding.tensor,
                "fullyQualifiedName": f"{finding.layer or ''}/{finding.tensor}",
                "kind": "variable",
            }
        )
    result: dict[str, Any] = {
        "ruleId": finding.rule,
        "level": level(finding.severity),
        "message": {"text": shown(f"{finding.message}. {finding.hint}.")},
        "locations": [
            {
                "physicalLocation": {
                    "artifactLocation": {"uri": _uri(finding.checkpoint), "index": artifact}
                },
                "logicalLocations": logical,
            }
        ],
        "partialFingerprints": {"steelyardFindingId/v1": finding.id},
        "rank": min(100.0, finding.score),
        "properties": {
            "units": list(finding.units),
            "score": finding.score,
            "evidence": dict(finding.evidence),
        },
    }
    if finding.rule in rule_index:
        result["ruleIndex"] = rule_index[finding.rule]
    if baselined:
        result["baselineState"] = "unchanged"
    if suppressed is not None:
        # SARIF 2.1.0 §3.34: a result silenced outside the artifact, with the reviewer's reason.
        result["suppressions"] = [
            {
                "kind": "external",
                "status": "accepted",
                "justification": suppressed.reason,
                "properties": {"ignore_layers": suppressed.layers},
            }
        ]
    return result


def _notification(text: str, level: str, uri: str | None = None) -> dict[str, Any]:
    """A SARIF notification (§3.58): what the tool could not do or wants said."""
    note: dict[str, Any] = {"level": level, "message": {"text": shown(text)}}
    if uri is not None:
        note["locations"] = [{"physicalLocation": {"artifactLocation": {"uri": _uri(uri)}}}]
    return note


def render_sarif(report: Report) -> str:
    """The SARIF log as text."""
    return dump(sarif_log(report))


def dump(log: dict[str, Any]) -> str:
    """A SARIF log as the text every renderer of this format writes."""
    return json.dumps(log, indent=2, ensure_ascii=False) + "\n"


def sarif_log(report: Report, command: Command = Command.AUDIT) -> dict[str, Any]:
    """The SARIF log of an audit report, as a document other renderers build on (compare adds
    its own results and properties); its rules table is ``command``'s (see
    :func:`steelyard.rules.sarif_rules`)."""
    rules, rule_index = sarif_rules(command)
    artifacts: list[dict[str, Any]] = []
    results: list[dict[str, Any]] = []
    execution: list[dict[str, Any]] = []
    for position, audit in enumerate(report.audits):
        block = audit.checkpoint
        properties: dict[str, Any] = {"format": block["format"], "parameters": block["parameters"]}
        if audit.coverage is not None:
            properties["coverage"] = {
                "covered": audit.coverage.covered,
                "share": audit.coverage.share,
                "uncovered_tensors": [u.name for u in audit.coverage.uncovered],
            }
        artifact: dict[str, Any] = {"location": {"uri": _uri(str(block["path"]))}}
        found = digest_in(block)
        if found is not None and found[0] == Digest.SHA256.value:
            # The keys of "hashes" are hash function names as IANA's registry of hash
            # function textual names spells them (SARIF 2.1.0), "sha-256" for SHA-256;
            # BLAKE3 has no name there, so it goes in the free-form property bag.
            artifact["hashes"] = {"sha-256": found[1]}
        elif found is not None:
            properties[found[0]] = found[1]
        artifacts.append(artifact | {"properties": properties})
        results += [_result(f, position, rule_index, False) for f in audit.findings]
        results += [_result(f, position, rule_index, True) for f in audit.baselined]
        results += [_result(s.finding, position, rule_index, False, s) for s in audit.suppressed]
        execution += [_notification(n, "note", str(block["path"])) for n in audit.notes]
    # bandit-style: what could not be read is a tool notification, not a result.
    execution += [_notification(e.reason, "error", e.path) for e in report.errors]
    execution += [_notification(f"skipped: {s.reason}", "note", s.path) for s in report.skipped]
    execution += [_notification(n, "note") for n in report.notes]
    configuration = [_notification(n, "warning") for n in report.policy_notes]
    log = {
        "$schema": SARIF_SCHEMA_URI,
        "version": "2.1.0",
        "runs": [
            {
                "tool": {
                    "driver": {
                        "name": "steelyard",
                        "version": report.tool_version,
                        "semanticVersion": report.tool_version,
                        "informationUri": INFORMATION_URI,
                        "rules": rules,
                    }
                },
                "invocations": [
                    {
                        "executionSuccessful": not report.errors,
                        "startTimeUtc": report.created,
                        "toolExecutionNotifications": execution,
                        "toolConfigurationNotifications": configuration,
                    }
                ],
                "artifacts": artifacts,
                "results": results,
                "properties": {"gate": {"fail_on": report.fail_on, "passed": report.passed}},
            }
        ],
    }
    cleaned: dict[str, Any] = _clean(log)
    return cleaned
