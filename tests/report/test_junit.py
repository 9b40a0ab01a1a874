"""JUnit XML: each case a testcase; failed, skipped and faulted cases marked as CI systems read them."""
import xml.etree.ElementTree as ET

from refops.harness.verdict import CaseResult, Report
from refops.report.junit import write_junit


def test_statuses_map_to_failure_skipped_and_error(tmp_path):
    # Common practice: the JUnit XML layout (testsuite counts tests/failures/errors/skipped;
    # testcase children <failure>, <error>, <skipped>) that CI systems parse.
    statuses = ["passed", "failed", "skipped", "timeout", "aborted", "subject-error", "passed"]
    cases = [CaseResult(case_id=f"0-{i}", config={}, values="normal", status=s, message=f"m{i}")
             for i, s in enumerate(statuses)]
    report = Report(op="relu", target="t:f", dtype="float32", seed=0, model="m", cases=cases)
    suite = ET.parse(write_junit(report, tmp_path / "r.xml")).getroot()
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors"), suite.get("skipped")) == \
        ("7", "1", "3", "1")
    children = [[child.tag for child in case] for case in suite.findall("testcase")]
    assert children == [[], ["failure"], ["skipped"], ["error"], ["error"], ["error"], []]
    failure = suite.findall("testcase")[1].find("failure")
    assert "FAILED case 0-1" in failure.text and "0-2" not in failure.text
    assert suite.findall("testcase")[3].find("error").get("type") == "timeout"
