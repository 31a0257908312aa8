"""JUnit XML: one test case per rule and layer, a failure per finding at or above the gate."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections import defaultdict

from steelyard.findings import Finding
from steelyard.report import CheckpointAudit, Report
from steelyard.rules import registry


def _suite(report: Report, audit: CheckpointAudit) -> ET.Element:
    path = str(audit.checkpoint["path"])
    suite = ET.Element("testsuite", name=f"steelyard: {path}", timestamp=report.created)
    layer_names = [str(h.layer["name"]) for h in audit.layers]
    by_case: dict[tuple[str, str], list[Finding]] = defaultdict(list)
    for finding in audit.findings:
        by_case[(finding.rule, finding.layer or "(checkpoint)")].append(finding)
    gate = report.gate
    tests = failures = 0
    for rule in registry():
        places = [*layer_names] + (
            ["(checkpoint)"] if any(k == (rule, "(checkpoint)") for k in by_case) else []
        )
        for layer in places:
            tests += 1
            case = ET.SubElement(suite, "testcase", classname=f"{rule}", name=layer, file=path)
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
    suite.set("tests", str(tests))
    suite.set("failures", str(failures))
    suite.set("errors", "0")
    suite.set("skipped", "0")
    return suite


def render_junit(report: Report) -> str:
    """The JUnit XML document as text."""
    root = ET.Element("testsuites", name="steelyard")
    suites = [_suite(report, audit) for audit in report.audits]
    root.extend(suites)
    root.set("tests", str(sum(int(s.get("tests", "0")) for s in suites)))
    root.set("failures", str(sum(int(s.get("failures", "0")) for s in suites)))
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
