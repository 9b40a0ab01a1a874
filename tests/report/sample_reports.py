"""Small reports built from the harness's real verdict classes and the real comparison."""
import numpy as np

from refops.harness.verdict import CaseResult, Report
from refops.numerics.compare import compare

HOT_ROW = (1, 2, 5)  # (sample, channel, row) of the planted stripe of errors


def comparison(tensor, *, bump=0.0, seed=0):
    """Errors within half the bound everywhere, plus ``bump`` along row 5 of sample 1, channel 2."""
    rng = np.random.default_rng(seed)
    reference = rng.standard_normal((2, 3, 6, 5))
    allowed = np.full(reference.shape, 1e-3)
    subject = reference + rng.uniform(-5e-4, 5e-4, reference.shape)
    subject[HOT_ROW] += bump
    return compare(tensor, subject, reference, allowed, "float32", model="rounding bound")


def case(case_id, *, bump=0.0, status=None, seed=0, **fields):
    comparisons = [comparison("output", seed=seed), comparison("input", bump=bump, seed=seed)]
    failed = any(not c.passed for c in comparisons)
    return CaseResult(case_id=case_id, config={"kernel_size": 3, "padding": "same"}, values="normal",
                      status=status or ("failed" if failed else "passed"), comparisons=comparisons,
                      replay=f"refops check lab.kernels:fused --op conv2d --case {case_id}", seconds=0.01,
                      **fields)


def report(cases, **fields):
    settings = dict(op="conv2d", target="lab.kernels:fused", dtype="bfloat16", seed=0,
                    model="rounding bound (probabilistic)", deviations=["a declared deviation"])
    return Report(cases=cases, **{**settings, **fields})


def failing_report():
    """Three passing cases and one whose input gradient is far off along one row."""
    passing = [case(f"0-{i}", seed=i) for i in range(3)]
    bad = case("0-3", bump=0.1, findings=["input changed in place"])
    return report(passing + [bad], target="lab.kernels:<fused>")


def passing_report():
    return report([case(f"0-{i}", seed=i) for i in range(4)], deviations=[])
