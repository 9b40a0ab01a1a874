"""The harness: run a torch layer or operator against the oracles and judge every case.

``check_layer(target, op, ...)`` returns a :class:`Report`; ``report.raise_if_failed()`` turns a
failure into an AssertionError carrying the text report (for use inside tests).
"""
from .runner import DTYPES, check_layer, draw_case
from .verdict import CaseResult, Report

__all__ = ["check_layer", "draw_case", "Report", "CaseResult", "DTYPES"]
