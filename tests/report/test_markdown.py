"""The Markdown summary: structure, escaping, fences that hold, the cap on listed cases."""
import re

import pytest

from refops.report.markdown import render_markdown, write_markdown
from refops.report.wording import CAUTION

from .sample_reports import HOT_ROW, case, report


def cells(line):
    """Cells of a GFM table row (split on pipes that are not escaped)."""
    return [c.strip() for c in re.split(r"(?<!\\)\|", line.strip())[1:-1]]


def fenced_blocks(md):
    return re.findall(r"^(`{3,})(\w*)\n(.*?)\n\1$", md, flags=re.S | re.M)


def test_summary_table_then_failing_case_with_worst_elements_and_replay(failing_report):
    md = render_markdown(failing_report)
    lines = md.splitlines()
    assert lines[0] == "## refops: FAILED"
    summary = dict(cells(line) for line in lines[2:10] if line.startswith("| ") and "---" not in line)
    assert summary["op"] == "conv2d" and summary["subject"] == "lab.kernels:&lt;fused&gt;"
    assert summary["cases"] == "4 (1 failed, 3 passed)" and summary["format"] == "bfloat16"
    assert "- a declared deviation" in lines
    assert "### Case `0-3`: failed" in lines
    assert "- input changed in place" in lines
    start = lines.index("| index | subject | oracle | error | allowed | error / allowed | ulps |")
    worst = [cells(line) for line in lines[start + 2:start + 7]]
    assert sorted(row[0] for row in worst) == [str((*HOT_ROW, j)) for j in range(5)]
    assert all(99 < float(row[5]) < 101 for row in worst) and not lines[start + 7].startswith("|")
    assert ("```", "sh", "refops check lab.kernels:fused --op conv2d --case 0-3") in fenced_blocks(md)
    assert "**input**: 5 elements over the bound" in md and "**output**" not in md
    assert lines[-1] == f"> **Caution.** {CAUTION}"


def test_user_text_cannot_break_tables_fences_or_inject_markup():
    hostile = case("0-`1`", bump=0.1, message="failed: ```\nrm -rf / <b>", findings=["a | b *c*"])
    doc = report([hostile], target="lab.<b>kernels</b>|x:f", op="conv|2d")
    md = render_markdown(doc)
    lines = md.splitlines()
    subject = next(line for line in lines if line.startswith("| subject"))
    assert cells(subject) == ["subject", r"lab.&lt;b&gt;kernels&lt;/b&gt;\|x:f"]
    assert cells(next(line for line in lines if line.startswith("| op")))[1] == r"conv\|2d"
    assert r"- a \| b \*c\*" in lines
    assert "### Case `` 0-`1` ``: failed" in lines  # a code span no inner backtick can close
    # the message keeps its text verbatim in a fence longer than its own backtick run
    assert ("````", "", "failed: ```\nrm -rf / <b>") in fenced_blocks(md)
    outside_fences = re.sub(r"^(`{3,})\w*\n.*?\n\1$", "", md, flags=re.S | re.M)
    assert "<b>" not in outside_fences


def test_only_the_first_failing_cases_are_listed():
    md = render_markdown(report([case(f"0-{i}", bump=0.1, seed=i) for i in range(3)]), listed=1)
    assert md.count("### Case") == 1 and "3 failing cases." in md
    assert "2 more failing cases are not listed here" in md


def test_passing_report_has_no_case_sections(passing_report):
    md = render_markdown(passing_report)
    assert md.startswith("## refops: PASSED") and "### Case" not in md
    assert "Declared deviations" not in md and CAUTION in md


def test_write_markdown_writes_the_rendered_text(tmp_path, failing_report):
    path = write_markdown(failing_report, tmp_path / "summary.md")
    assert path.read_text(encoding="utf-8") == render_markdown(failing_report)


def test_bad_listed_count_names_the_argument(failing_report):
    with pytest.raises(ValueError, match=r"listed=-2: must be >= 0"):
        render_markdown(failing_report, listed=-2)
