"""JUnit XML for CI systems: one testcase per case, failures carrying the text of the case."""
from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path

from .text import render_text


def write_junit(report, path) -> Path:
    suite = ET.Element("testsuite", name=f"refops.{report.op}.{report.dtype}", tests=str(len(report.cases)),
                       failures=str(sum(c.status == "failed" for c in report.cases)),
                       errors=str(sum(c.status not in ("passed", "failed") for c in report.cases)),
                       time=f"{sum(c.seconds for c in report.cases):.3f}")
    for case in report.cases:
        element = ET.SubElement(suite, "testcase", classname=f"refops.{report.op}", name=case.case_id,
                                time=f"{case.seconds:.4f}")
        if not case.passed:
            kind = "failure" if case.status == "failed" else "error"
            single = type(report)(report.op, report.target, report.dtype, report.seed, report.model, [case])
            detail = ET.SubElement(element, kind, message=case.message or case.status, type=case.status)
            detail.text = render_text(single)
    path = Path(path)
    ET.ElementTree(suite).write(path, encoding="utf-8", xml_declaration=True)
    return path
