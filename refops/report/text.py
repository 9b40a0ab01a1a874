"""The terminal report: each failing case with where, by how much and how to replay it."""
from __future__ import annotations

from .wording import CAUTION, config_text, failing_comparisons


def _comparison_lines(c) -> list[str]:
    label = "output" if c.tensor == "output" else f"grad of {c.tensor.removeprefix('grad.')}"
    lines = [f"    {label}: {c.violations} of {max(1, _size(c.shape))} elements over the bound "
             f"(share used: max {c.share_max:.3g}, p99 {c.share_p99:.3g}; max abs {c.max_abs:.3g}, "
             f"max rel {c.max_rel:.3g}, max {c.max_ulps:.3g} ulp)"]
    for w in c.worst[:3]:
        lines.append(f"      at {w.index}: subject {w.subject:.9g}, oracle {w.reference:.9g}, error {w.error:.3g}"
                     f" > allowed {w.allowed:.3g} ({w.error / w.allowed if w.allowed else float('inf'):.3g}x), "
                     f"{w.ulps:.3g} ulp")
    return lines


def _size(shape) -> int:
    size = 1
    for n in shape:
        size *= n
    return size


def render_text(report, *, max_cases: int = 10) -> str:
    lines = []
    for case in report.failures[:max_cases]:
        lines.append(f"FAILED case {case.case_id} [{case.status}] values={case.values}")
        lines.append(f"  config: {config_text(case.config)}")
        if case.message:
            lines.append(f"  {case.message}")
        lines.extend(f"  {finding}" for finding in case.findings)
        for c in failing_comparisons(case):
            lines.extend(_comparison_lines(c))
        lines.append(f"  replay: {case.replay}")
        if case.smallest:
            lines.append(f"  smallest configuration failing alike: {config_text(case.smallest['config'])}")
            lines.append(f"  replay it: {case.smallest['replay']}")
        lines.append("")
    if len(report.failures) > max_cases:
        lines.append(f"... {len(report.failures) - max_cases} more failing cases (see --json)")
    counts = ", ".join(f"{v} {k}" for k, v in sorted(report.summary().items()))
    shares = [c.share_max for case in report.cases if case.passed for c in case.comparisons]
    lines.append(f"refops: {report.target} against {report.reference} in {report.dtype}, seed {report.seed}: "
                 f"{len(report.cases)} cases ({counts or 'none run'})")
    if shares:
        lines.append(f"  passing cases used at most {max(shares):.3g} of the bound (median "
                     f"{sorted(shares)[len(shares) // 2]:.3g})")
    lines.append(f"  tolerance: {report.model}")
    for deviation in report.deviations:
        lines.append(f"  declared deviation applied: {deviation}")
    lines.append("  PASSED" if report.passed else "  FAILED")
    lines.append(f"  {CAUTION}")
    return "\n".join(lines)
