"""One self-contained HTML file per report: tables and pictures, no external assets.

Sections, in reading order: the verdict and the caution; a summary of the run; every failing case
(configuration, fault, replay command, and per disagreeing tensor its statistics, heatmaps of
error / allowed over the spatial dims of the worst planes, a histogram of error against the bound
and the worst elements); the share of the bound that passing cases used; a table of all cases.
Pictures are PNG embedded as base64; all text that comes from the user or the subject (target,
configuration, messages, findings, deviations) is HTML-escaped.
"""
from __future__ import annotations

import base64
import html
from pathlib import Path

from ..ops import _checks
from . import figures
from .wording import CAUTION, config_text, failing_comparisons

PICTURED = 10  # failing cases drawn with pictures; later ones get their tables only

STYLE = """
body { font-family: sans-serif; margin: 2em; color: #222; max-width: 1250px; line-height: 1.4; }
table { border-collapse: collapse; margin: 0.5em 0 1em; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.6em; text-align: left; font-size: 0.9em; }
th { background: #eee; }
td.number { text-align: right; font-variant-numeric: tabular-nums; }
.passed { color: #0072B2; font-weight: bold; }
.failed { color: #D55E00; font-weight: bold; }
.skipped { color: #666; }
.caution { border-left: 4px solid #E69F00; background: #fff7e6; padding: 0.6em 1em; }
pre { background: #f3f3f3; padding: 0.5em; overflow-x: auto; white-space: pre-wrap; }
code { background: #f3f3f3; padding: 0.1em 0.3em; }
section.case { border-top: 2px solid #ccc; margin-top: 1.5em; }
img { max-width: 100%; margin: 0.3em 0.6em 0.3em 0; vertical-align: top; }
"""


def _e(value) -> str:
    return html.escape(str(value))


def _verdict(status: str) -> str:
    """The status word with a symbol, so that it does not rest on colour alone."""
    if status.lower() == "passed":
        return f'<span class="passed">&#10004; {_e(status)}</span>'
    if status == "skipped":
        return f'<span class="skipped">&ndash; {_e(status)}</span>'
    return f'<span class="failed">&#10008; {_e(status)}</span>'


def _image(png: bytes | None, alt: str) -> str:
    if png is None:
        return ""
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">'


def _cell(value) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return f'<td class="number">{_e(value)}</td>'
    return f"<td>{_e(value)}</td>"


def _table(header: list[str] | None, rows: list[list], *, raw: int | None = None) -> str:
    """A table of escaped cells; column ``raw`` holds ready-made markup (a status)."""
    head = "" if header is None else "<tr>" + "".join(f"<th>{_e(h)}</th>" for h in header) + "</tr>"
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" if i == raw else _cell(c) for i, c in enumerate(row))
                   + "</tr>" for row in rows)
    return f"<table>{head}{body}</table>"


def _g(value: float) -> str:
    return f"{value:.3g}"


def _summary(report) -> str:
    counts = report.summary()
    rows = [["op", report.reference], ["subject", report.target],
            ["format", report.dtype], ["seed", report.seed], ["tolerance model", report.model],
            ["cases", len(report.cases)], *[[f"cases {status}", n] for status, n in sorted(counts.items())]]
    deviations = "".join(f"<li>{_e(d)}</li>" for d in report.deviations) or "<li>none</li>"
    status = "passed" if report.passed else "failed"
    return (f"<h1>refops report: {_e(report.target)} against {_e(report.reference)} "
            f"{_verdict(status.upper())}</h1>"
            f'<p class="caution"><strong>Caution.</strong> {_e(CAUTION)}</p>'
            f"<h2>Summary</h2>{_table(None, rows)}"
            f"<h3>Declared deviations applied</h3><ul>{deviations}</ul>")


def _comparison(comparison, pictured: bool) -> str:
    c = comparison
    stats = _table(["shape", "max abs", "max rel", "max ulps", "share max", "share p99", "over the bound",
                    "non-finite mismatches"],
                   [[str(tuple(c.shape)), _g(c.max_abs), _g(c.max_rel), _g(c.max_ulps), _g(c.share_max),
                     _g(c.share_p99), c.violations, c.nonfinite_mismatches]])
    worst = _table(["index", "subject", "oracle", "error", "allowed", "error / allowed", "ulps"],
                   [[str(w.index), f"{w.subject:.9g}", f"{w.reference:.9g}", _g(w.error), _g(w.allowed),
                     _g(w.error / w.allowed) if w.allowed else "inf", _g(w.ulps)] for w in c.worst])
    pictures = ""
    if pictured and c.share is not None:
        pictures = (_image(figures.share_heatmaps(c.share, c.tensor),
                           f"heatmaps of error over allowed, worst planes of {c.tensor}")
                    + _image(figures.share_histogram(c.share, c.tensor),
                             f"histogram of error against the bound, {c.tensor}"))
    return (f"<h4>{_e(c.tensor)}: {c.violations} elements over the bound</h4>{stats}"
            f"<div>{pictures}</div><h5>Worst elements</h5>{worst}")


def _failing_case(case, pictured: bool) -> str:
    parts = [f'<section class="case"><h3>Case <code>{_e(case.case_id)}</code> '
             f"{_verdict(case.status)}</h3>",
             f"<p>Configuration: <code>{_e(config_text(case.config))}</code>; values: {_e(case.values)}</p>"]
    if case.message:
        parts.append(f"<p>Fault:</p><pre>{_e(case.message)}</pre>")
    if case.findings:
        parts.append("<ul>" + "".join(f"<li>{_e(f)}</li>" for f in case.findings) + "</ul>")
    parts.extend(_comparison(c, pictured) for c in failing_comparisons(case))
    parts.append(f"<p>Replay this case:</p><pre>{_e(case.replay)}</pre></section>")
    return "".join(parts)


def _failures(report, pictured: int) -> str:
    failures = report.failures
    if not failures:
        return "<h2>Failing cases</h2><p>None.</p>"
    note = (f"<p>Pictures are drawn for the first {pictured} failing cases; the other "
            f"{len(failures) - pictured} show their tables.</p>" if len(failures) > pictured else "")
    return (f"<h2>Failing cases ({len(failures)})</h2>{note}"
            + "".join(_failing_case(c, i < pictured) for i, c in enumerate(failures)))


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
            "<p>One dot per passing case and tensor, at its worst element. A bound that is never "
            "approached may be loose; a bound that is nearly reached leaves little room for a "
            "different but correct summation order.</p>" + _image(chart, "share of the bound used"))


def _case_row(case, tensors: list[str]) -> list:
    shares = {c.tensor: c.share_max for c in case.comparisons}
    return [case.case_id, _verdict(case.status), case.values,
            *[_g(shares[t]) if t in shares else "" for t in tensors], f"{case.seconds:.3f}"]


def _all_cases(report) -> str:
    tensors = list(dict.fromkeys(c.tensor for case in report.cases for c in case.comparisons))
    return ("<h2>All cases</h2><p>Share of the bound used at the worst element, per tensor.</p>"
            + _table(["case", "status", "values", *tensors, "seconds"],
                     [_case_row(case, tensors) for case in report.cases], raw=1))


def render_html(report, *, pictured: int = PICTURED) -> str:
    """The report as one HTML document with no external assets.

    ``pictured``: how many failing cases get heatmaps and histograms (each picture costs about
    0.1 s and 20-60 kB); the rest show their statistics and worst elements.
    """
    pictured = _checks.as_int("pictured", pictured, min_value=0)
    body = [_summary(report), _failures(report, pictured), _bound_usage(report), _all_cases(report)]
    title = f"refops: {report.target} against {report.reference}"
    return (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
            f"<style>{STYLE}</style></head><body>{''.join(body)}</body></html>")


def write_html(report, path, *, pictured: int = PICTURED) -> Path:
    """Write :func:`render_html` to ``path`` (UTF-8); returns the path."""
    path = Path(path)
    path.write_text(render_html(report, pictured=pictured), encoding="utf-8")
    return path
