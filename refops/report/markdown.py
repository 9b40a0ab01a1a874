"""A Markdown summary of a report, for CI job pages (GitHub-flavoured tables and fences).

The verdict, a summary table, the declared deviations, each failing case (configuration, fault,
findings, the worst elements of every disagreeing tensor, the replay command) and the caution.
Text from the user or the subject is escaped: HTML entities for ``<``, ``>`` and ``&``, a
backslash before Markdown's inline markup characters; commands go into fences longer than any run of
backticks they contain, so nothing they hold can end the fence.
"""
from __future__ import annotations

import html
import re
from pathlib import Path

from ..ops import _checks
from .wording import CAUTION, config_text, failing_comparisons

LISTED = 20  # failing cases written out; a CI page has a size limit

# Inline markup characters; text never starts a line, so list and heading markers need no escape.
_PUNCTUATION = re.compile(r"([\\`*_\[\]|~])")


def _text(value) -> str:
    """Escaped running text on one line."""
    flat = " ".join(str(value).split())
    return _PUNCTUATION.sub(r"\\\1", html.escape(flat, quote=False))


def _code(value) -> str:
    """An inline code span that no backtick inside can close (GFM tables still need ``\\|``)."""
    flat = " ".join(str(value).split())
    ticks = "`" * (max((len(run) for run in re.findall(r"`+", flat)), default=0) + 1)
    pad = " " if flat.startswith("`") or flat.endswith("`") else ""
    return f"{ticks}{pad}{flat}{pad}{ticks}"


def _fenced(value, language: str = "") -> list[str]:
    text = str(value)
    fence = "`" * max(3, max((len(run) for run in re.findall(r"`+", text)), default=0) + 1)
    return [f"{fence}{language}", *text.splitlines(), fence]


def _row(cells) -> str:
    return "| " + " | ".join(cells) + " |"


def _summary(report) -> list[str]:
    counts = ", ".join(f"{n} {_text(status)}" for status, n in sorted(report.summary().items()))
    rows = [("op", _text(report.reference)), ("subject", _text(report.target)),
            ("format", _text(report.dtype)), ("seed", _text(report.seed)),
            ("tolerance model", _text(report.model)), ("cases", f"{len(report.cases)} ({counts or 'none run'})")]
    lines = [_row(["setting", "value"]), _row(["---", "---"]), *(_row(r) for r in rows), ""]
    if report.deviations:
        lines += ["Declared deviations applied:", "", *[f"- {_text(d)}" for d in report.deviations], ""]
    return lines


def _worst_table(comparison) -> list[str]:
    lines = [_row(["index", "subject", "oracle", "error", "allowed", "error / allowed", "ulps"]),
             _row(["---:"] * 7)]
    for w in comparison.worst:
        share = f"{w.error / w.allowed:.3g}" if w.allowed else "inf"
        lines.append(_row([_text(w.index), f"{w.subject:.9g}", f"{w.reference:.9g}", f"{w.error:.3g}",
                           f"{w.allowed:.3g}", share, f"{w.ulps:.3g}"]))
    return lines


def _failing_case(case) -> list[str]:
    lines = [f"### Case {_code(case.case_id)}: {_text(case.status)}", "",
             f"Configuration: {_code(config_text(case.config))}; values: {_text(case.values)}", ""]
    if case.message:
        lines += ["Fault:", "", *_fenced(case.message), ""]
    if case.findings:
        lines += [*[f"- {_text(f)}" for f in case.findings], ""]
    for c in failing_comparisons(case):
        lines += [f"**{_text(c.tensor)}**: {c.violations} elements over the bound, share max "
                  f"{c.share_max:.3g}, max {c.max_ulps:.3g} ulps", "", *_worst_table(c), ""]
    lines += ["Replay:", "", *_fenced(case.replay, "sh"), ""]
    return lines


def render_markdown(report, *, listed: int = LISTED) -> str:
    """The report as Markdown; ``listed`` caps how many failing cases are written out."""
    listed = _checks.as_int("listed", listed, min_value=0)
    failures = report.failures
    lines = [f"## refops: {'PASSED' if report.passed else 'FAILED'}", "", *_summary(report)]
    if failures:
        lines += [f"{len(failures)} failing cases.", ""]
    for case in failures[:listed]:
        lines += _failing_case(case)
    if len(failures) > listed:
        lines += [f"{len(failures) - listed} more failing cases are not listed here (see the JSON or "
                  "HTML report).", ""]
    lines += [f"> **Caution.** {_text(CAUTION)}", ""]
    return "\n".join(lines)


def write_markdown(report, path, *, listed: int = LISTED) -> Path:
    """Write :func:`render_markdown` to ``path`` (UTF-8); returns the path."""
    path = Path(path)
    path.write_text(render_markdown(report, listed=listed), encoding="utf-8")
    return path
