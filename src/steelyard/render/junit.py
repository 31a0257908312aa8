"""JUnit XML: one test case per rule and layer, a failure per finding at or above the gate."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections import defaultdict
from collections.abc import Iterable, Sequence

from steelyard.coverage import describe
from steelyard.findings import Finding, Severity
from steelyard.report import CheckpointAudit, Report
from steelyard.rules import registry
from steelyard.text_safety import shown_deep

#: The test case of findings that belong to no layer.
_CHECKPOINT = "(checkpoint)"


def add_rule_cases(
    suite: ET.Element,
    rules: Iterable[str],
    layers: Sequence[str],
    findings: Iterable[Finding],
    gate: Severity | None,
    path: str,
    classname_prefix: str = "",
) -> tuple[int, int]:
    """Append one test case per rule and layer to ``suite``; return (tests, failures).

    Audit and compare reports share it so that a finding fails a CI suite, or is only
    printed, by the same gate and in the same words whichever command found it.
    """
    by_case: dict[tuple[str, str], list[Finding]] = defaultdict(list)
    for finding in findings:
        by_case[(finding.rule, finding.layer or _CHECKPOINT)].append(finding)
    tests = failures = 0
    for rule in rules:
        extra = [_CHECKPOINT] if (rule, _CHECKPOINT) in by_case else []
        for layer in [*layers, *extra]:
            tests += 1
            case = ET.SubElement(
                suite, "testcase", classname=f"{classname_prefix}{rule}", name=layer, file=path
            )
            found = by_case.get((rule, layer), [])
            failing = [f for f in found if gate is not None and f.severity.at_least(gate)]
            for finding in failing:
                failures += 1
                node = ET.SubElement(
                    case, "failure", message=finding.message, type=finding.severity.value
                )
                node.text = f"{finding.message}\nhint: {finding.hint}\nunits: {list(finding.units)}\nid: {finding.id}"
            below = [f for f in found if f not in failing]
            if below:
                out = ET.SubElement(case, "system-out")
                out.text = "\n".join(f"[{f.severity.value}] {f.message}" for f in below)
    return tests, failures


def _suite(report: Report, audit: CheckpointAudit) -> ET.Element:
    path = str(audit.checkpoint["path"])
    suite = ET.Element("testsuite", name=f"steelyard: {path}", timestamp=report.created)
    layer_names = [str(h.layer["name"]) for h in audit.layers]
    tests, failures = add_rule_cases(
        suite, registry(), layer_names, audit.findings, report.gate, path
    )
    suite.set("tests", str(tests))
    suite.set("failures", str(failures))
    suite.set("errors", "0")
    suite.set("skipped", "0")
    lines = []
    if audit.coverage is not None:
        lines.append(f"coverage: {describe(audit.coverage)}")
    lines += [f"note: {note}" for note in audit.notes]
    lines += [
        f"ignored by policy ({s.reason}): {s.finding.rule} {s.finding.layer or ''} {s.finding.message}"
        for s in audit.suppressed
    ]
    if lines:
        ET.SubElement(suite, "system-out").text = "\n".join(lines)
    return suite


def _inputs_suite(report: Report) -> ET.Element | None:
    """Unreadable checkpoints as error cases, skipped files as skipped cases."""
    if not report.errors and not report.skipped:
        return None
    suite = ET.Element("testsuite", name="steelyard: inputs", timestamp=report.created)
    for error in report.errors:
        case = ET.SubElement(suite, "testcase", classname="input", name=error.path, file=error.path)
        ET.SubElement(case, "error", message=error.reason, type="unreadable").text = error.line
    for skipped in report.skipped:
        case = ET.SubElement(
            suite, "testcase", classname="input", name=skipped.path, file=skipped.path
        )
        ET.SubElement(case, "skipped", message=skipped.reason)
    suite.set("tests", str(len(report.errors) + len(report.skipped)))
    suite.set("failures", "0")
    suite.set("errors", str(len(report.errors)))
    suite.set("skipped", str(len(report.skipped)))
    if report.notes or report.policy_notes:
        ET.SubElement(suite, "system-out").text = "\n".join([*report.notes, *report.policy_notes])
    return suite


def render_junit(report: Report) -> str:
    """The JUnit XML document as text."""
    return dump(junit_tree(report))


def dump(root: ET.Element) -> str:
    """A JUnit tree as the text every renderer of this format writes."""
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"


def junit_tree(report: Report) -> ET.Element:
    """The JUnit ``testsuites`` element of an audit report, for renderers that build on it."""
    # Names from files, escaped: no control character (most are illegal in XML 1.0) and no
    # bidi override reaches the document.
    report = shown_deep(report)
    root = ET.Element("testsuites", name="steelyard")
    suites = [_suite(report, audit) for audit in report.audits]
    inputs = _inputs_suite(report)
    if inputs is not None:
        suites.append(inputs)
    root.extend(suites)
    for key in ("tests", "failures", "errors", "skipped"):
        root.set(key, str(sum(int(s.get(key, "0")) for s in suites)))
    return root
