"""Verdicts: one :class:`CaseResult` per case, gathered in a :class:`Report`."""
from __future__ import annotations

from dataclasses import dataclass, field

STATUSES = ("passed", "failed", "subject-error", "aborted", "timeout", "skipped")


@dataclass
class CaseResult:
    """What one case showed.

    ``status`` is ``"passed"``, ``"failed"`` (a tensor disagrees or a check found a fault),
    ``"subject-error"`` (the subject raised or returned something unusable), ``"aborted"`` (it took
    the worker process down), ``"timeout"`` or ``"skipped"`` (a declared deviation kept it from
    running; neither a pass nor a failure).
    """

    case_id: str
    config: dict
    values: str
    status: str
    comparisons: list = field(default_factory=list)
    findings: list = field(default_factory=list)
    message: str = ""
    replay: str = ""
    seconds: float = 0.0
    smallest: dict | None = None  # {"config", "replay"}: the smallest configuration failing alike

    @property
    def passed(self) -> bool:
        return self.status == "passed"

    def to_json(self) -> dict:
        return {"case_id": self.case_id, "config": self.config, "values": self.values,
                "status": self.status, "tensors": [c.to_json() for c in self.comparisons],
                "findings": list(self.findings), "message": self.message, "replay": self.replay,
                "seconds": round(self.seconds, 4), "smallest": self.smallest}


@dataclass
class Report:
    """All cases of one check, with the settings that produced them."""

    op: str | None
    target: str
    dtype: str
    seed: int
    model: str
    cases: list = field(default_factory=list)
    deviations: list = field(default_factory=list)
    against: str = ""  # what the subject was checked against when no op is: a recorded run, ...

    @property
    def reference(self) -> str:
        """The op, or what stood in for an oracle."""
        return self.op or self.against or "a recorded trusted run"

    @property
    def passed(self) -> bool:
        return any(c.passed for c in self.cases) and not self.failures

    @property
    def failures(self) -> list:
        return [c for c in self.cases if c.status not in ("passed", "skipped")]

    def summary(self) -> dict:
        counts: dict[str, int] = {}
        for case in self.cases:
            counts[case.status] = counts.get(case.status, 0) + 1
        return counts

    def to_json(self) -> dict:
        return {"passed": self.passed, "cases": len(self.cases), "op": self.op, "against": self.reference,
                "target": self.target,
                "dtype": self.dtype, "seed": self.seed, "model": self.model, "summary": self.summary(),
                "deviations": list(self.deviations), "failures": [c.to_json() for c in self.failures]}

    def raise_if_failed(self) -> None:
        """Raise an AssertionError carrying the text report when any case failed."""
        if not self.passed:
            from ..report.text import render_text
            raise AssertionError(render_text(self))
