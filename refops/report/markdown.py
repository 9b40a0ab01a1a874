"""A Markdown summary of a report, for CI job pages."""
from __future__ import annotations

from pathlib import Path

from .wording import CAUTION, config_text, failing_comparisons


def _cell(value) -> str:
    return str(value).replace("|", "\\|").replace("\n", " ")


def render_markdown(report, *, max_cases: int = 20) -> str:
    status = "PASSED" if report.passed else "FAILED"
    counts = ", ".join(f"{v} {k}" for k, v in sorted(report.summary().items()))
    lines = [f"## refops: {status}", "",
             "| op | subject | format | seed | cases | tolerance model |", "|---|---|---|---|---|---|",
             f"| {_cell(report.op or 'own finite differences')} | {_cell(report.target)} | {report.dtype} "
             f"| {report.seed} | {len(report.cases)} ({counts}) | {_cell(report.model)} |", ""]
    if report.deviations:
        lines += ["Declared deviations applied:", *[f"- {d}" for d in report.deviations], ""]
    for case in report.failures[:max_cases]:
        lines += [f"### Case `{case.case_id}`: {case.status}", "",
                  f"Configuration: `{config_text(case.config)}`", "", f"Replay: `{case.replay}`", ""]
        if case.message:
            lines += [f"Fault: `{_cell(case.message)}`", ""]
        lines += [f"- {f}" for f in case.findings]
        for c in failing_comparisons(case):
            lines += ["", f"**{c.tensor}**: {c.violations} elements over the bound, share max {c.share_max:.3g}", "",
                      "| index | subject | oracle | error | allowed | ulps |", "|---|---|---|---|---|---|"]
            lines += [f"| {w.index} | {w.subject:.9g} | {w.reference:.9g} | {w.error:.3g} | {w.allowed:.3g} "
                      f"| {w.ulps:.3g} |" for w in c.worst]
        lines.append("")
    if len(report.failures) > max_cases:
        lines += [f"... and {len(report.failures) - max_cases} more failing cases.", ""]
    lines += [f"> {CAUTION}", ""]
    return "\n".join(lines)


def write_markdown(report, path) -> Path:
    path = Path(path)
    path.write_text(render_markdown(report), encoding="utf-8")
    return path
