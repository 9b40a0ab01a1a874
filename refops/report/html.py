"""One self-contained HTML file per report: tables, heatmaps and histograms embedded as PNG."""
from __future__ import annotations

import base64
import html
from pathlib import Path

from . import figures
from .wording import CAUTION, config_text, failing_comparisons

STYLE = """
body { font-family: sans-serif; margin: 2em; color: #222; max-width: 1200px; }
table { border-collapse: collapse; margin: 0.5em 0 1em; }
th, td { border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: left; font-size: 0.9em; }
th { background: #eee; }
.passed { color: #0072B2; font-weight: bold; }
.failed { color: #D55E00; font-weight: bold; }
.caution { border-left: 4px solid #E69F00; background: #fff7e6; padding: 0.6em 1em; }
code { background: #f3f3f3; padding: 0.1em 0.3em; }
section.case { border-top: 2px solid #ccc; margin-top: 1.5em; }
"""


def _e(value) -> str:
    return html.escape(str(value))


def _image(png: bytes | None, alt: str) -> str:
    if png is None:
        return ""
    data = base64.b64encode(png).decode("ascii")
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{data}">'


def _table(header: list[str] | None, rows: list[list]) -> str:
    head = "" if header is None else "<tr>" + "".join(f"<th>{_e(h)}</th>" for h in header) + "</tr>"
    body = "".join("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table>{head}{body}</table>"


def _summary(report) -> str:
    status = "passed" if report.passed else "failed"
    counts = report.summary()
    rows = [["op", report.op or "(own finite differences)"], ["subject", report.target],
            ["format", report.dtype], ["seed", report.seed], ["tolerance model", report.model],
            ["cases", len(report.cases)], *[[f"cases {k}", v] for k, v in sorted(counts.items())]]
    deviations = "".join(f"<li>{_e(d)}</li>" for d in report.deviations) or "<li>none</li>"
    return (f'<h1>refops report: <span class="{status}">{status.upper()}</span></h1>'
            f'<p class="caution">{_e(CAUTION)}</p>'
            f"<h2>Summary</h2>{_table(None, rows)}"
            f"<h2>Declared deviations applied</h2><ul>{deviations}</ul>")


def _comparison(comparison) -> str:
    stats = _table(["tensor", "shape", "max abs", "max rel", "max ulps", "share max", "share p99",
                    "violations", "non-finite mismatches"],
                   [[comparison.tensor, comparison.shape, f"{comparison.max_abs:.3g}",
                     f"{comparison.max_rel:.3g}", f"{comparison.max_ulps:.3g}",
                     f"{comparison.share_max:.3g}", f"{comparison.share_p99:.3g}",
                     comparison.violations, comparison.nonfinite_mismatches]])
    worst = _table(["index", "subject", "oracle", "error", "allowed", "ulps"],
                   [[w.index, f"{w.subject:.9g}", f"{w.reference:.9g}", f"{w.error:.3g}",
                     f"{w.allowed:.3g}", f"{w.ulps:.3g}"] for w in comparison.worst])
    pictures = ""
    if comparison.share is not None:
        pictures = (_image(figures.share_heatmaps(comparison.share, comparison.tensor),
                           f"error over the bound, {comparison.tensor}")
                    + _image(figures.share_histogram(comparison.share, comparison.tensor),
                             f"histogram of error over the bound, {comparison.tensor}"))
    return f"<h4>{_e(comparison.tensor)} disagrees</h4>{stats}<div>{pictures}</div><h5>Worst elements</h5>{worst}"


def _failing_case(case) -> str:
    parts = [f'<section class="case"><h3>Case <code>{_e(case.case_id)}</code>: '
             f'<span class="failed">{_e(case.status)}</span></h3>',
             f"<p>Configuration: <code>{_e(config_text(case.config))}</code>; values: {_e(case.values)}</p>",
             f"<p>Replay: <code>{_e(case.replay)}</code></p>"]
    if case.message:
        parts.append(f"<p>Fault: <code>{_e(case.message)}</code></p>")
    if case.findings:
        parts.append("<ul>" + "".join(f"<li>{_e(f)}</li>" for f in case.findings) + "</ul>")
    parts.extend(_comparison(c) for c in failing_comparisons(case))
    parts.append("</section>")
    return "".join(parts)


def _bound_usage(report) -> str:
    usage: dict[str, list[float]] = {}
    for case in report.cases:
        if case.passed:
            for c in case.comparisons:
                usage.setdefault(c.tensor, []).append(c.share_max)
    chart = figures.bound_usage_chart(usage)
    if chart is None:
        return ""
    return ("<h2>Share of the bound used by passing cases</h2>"
            "<p>Tight bounds sit well inside (0.05 to 0.5 is typical); a share near 0 everywhere "
            "would mean the bound is vacuous.</p>" + _image(chart, "share of the bound used"))


def render_html(report) -> str:
    """The report as one HTML document (no external assets)."""
    failures = report.failures
    body = [_summary(report), _bound_usage(report),
            f"<h2>Failing cases ({len(failures)})</h2>", *(_failing_case(c) for c in failures)]
    return (f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>refops report</title>"
            f"<style>{STYLE}</style></head><body>{''.join(body)}</body></html>")


def write_html(report, path) -> Path:
    """Write :func:`render_html` to ``path``; returns the path."""
    path = Path(path)
    path.write_text(render_html(report), encoding="utf-8")
    return path
