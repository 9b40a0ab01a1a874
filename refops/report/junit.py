"""JUnit XML for CI systems: one testcase per case, failures carrying the text of the case."""
from __future__ import annotations

import dataclasses
import xml.etree.ElementTree as ET
from pathlib import Path

from .text import render_text


def write_junit(report, path) -> Path:
    """Failed cases are failures, skipped ones skipped, the other faults (the subject raised,
    aborted, timed out) errors."""
    name = f"refops.{report.op or 'no-oracle'}"
    statuses = [c.status for c in report.cases]
    suite = ET.Element("testsuite", name=f"{name}.{report.dtype}", tests=str(len(report.cases)),
                       failures=str(statuses.count("failed")), skipped=str(statuses.count("skipped")),
                       errors=str(sum(s not in ("passed", "failed", "skipped") for s in statuses)),
                       time=f"{sum(c.seconds for c in report.cases):.3f}")
    for case in report.cases:
        element = ET.SubElement(suite, "testcase", classname=name, name=case.case_id, time=f"{case.seconds:.4f}")
        if case.status == "skipped":
            ET.SubElement(element, "skipped", message=case.message)
        elif not case.passed:
            kind = "failure" if case.status == "failed" else "error"
            detail = ET.SubElement(element, kind, message=case.message or case.status, type=case.status)
            detail.text = render_text(dataclasses.replace(report, cases=[case]))
    path = Path(path)
    ET.ElementTree(suite).write(path, encoding="utf-8", xml_declaration=True)
    return path
