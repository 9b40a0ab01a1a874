"""Checking an operator that no oracle covers: its backward against finite differences of its forward.

``check_self(target, input_shapes)`` builds the layer (the factory is called with no arguments;
its parameters come from torch's generator seeded per case), draws normal inputs of the given
shapes and a cotangent, and runs it in float64 — in a worker process for a TARGET string, so a
crash is a verdict. Every input and parameter gradient is compared with central finite
differences of the subject's own forward, and the behaviour checks of every case apply (inputs
changed in place, two runs that differ). It shows a backward that does not belong to its
forward; it cannot show that the forward itself is right.
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from .runner import WorkerPool, parse_case_id, record_fault
from .subject import load_factory, model_job, model_parameters, run_subject
from .verdict import CaseResult, Report

MODEL = ("central finite differences of the subject's own float64 forward, error estimated from "
         "the stencil (a second step size)")
AGAINST = "finite differences of its own forward"


def _shapes(input_shapes) -> list[tuple[int, ...]]:
    try:
        shapes = [tuple(s) for s in input_shapes]
    except TypeError:
        shapes = []
    if not shapes or not all(s and all(isinstance(n, int) and n > 0 for n in s) for s in shapes):
        raise ValueError(f"input_shapes={input_shapes!r}: expected one or more shapes of positive sizes, "
                         f"e.g. [(2, 3, 8, 8)]")
    return shapes


def _one_case(factory: Callable, run: Callable, shapes, seed: int, index: int) -> CaseResult:
    rng = np.random.default_rng([seed, index])
    verdict = CaseResult(case_id=f"{seed}-{index}", config={"input_shapes": [list(s) for s in shapes]},
                         values="normal", status="passed")
    inputs = [f"input{i}" for i in range(len(shapes))]
    arrays = {name: rng.standard_normal(shape) for name, shape in zip(inputs, shapes)}
    try:
        arrays.update(model_parameters(factory, int(rng.integers(2 ** 62))))
    except Exception as error:  # the factory itself fails: a fault of the subject
        verdict.status, verdict.message = "subject-error", f"{type(error).__name__}: {error}"
        return verdict
    probe = run(model_job(arrays, inputs, np.zeros(0), "float64"))  # the output shape
    if record_fault(verdict, probe):
        return verdict
    cotangent = rng.standard_normal(probe["output"].shape)
    result = run(model_job(arrays, inputs, cotangent, "float64", self_fd=True))
    if record_fault(verdict, result):
        return verdict
    verdict.seconds = probe.get("seconds", 0.0) + result.get("seconds", 0.0)
    verdict.findings.extend(result["findings"])
    if verdict.findings:
        verdict.status = "failed"
    return verdict


def check_self(target: str | Callable, input_shapes: Sequence[Sequence[int]], *, cases: int = 5,
               seed: int = 0, timeout: float = 60.0, case_ids: list[str] | None = None,
               progress: Callable[[int, int], None] | None = None) -> Report:
    """Check ``target``'s backward against finite differences of its own float64 forward.

    ``target`` is a TARGET string (run in a worker process) or a factory callable (run here);
    the factory takes no arguments and returns a torch module or a callable on tensors, called
    with one tensor per entry of ``input_shapes``. ``case_ids`` replays given cases.
    """
    shapes = _shapes(input_shapes)
    factory = load_factory(target) if isinstance(target, str) else target
    name = target if isinstance(target, str) else getattr(target, "__qualname__", repr(target))
    report = Report(op=None, target=name, dtype="float64", seed=seed, model=MODEL, against=AGAINST)
    plan = [parse_case_id(c) for c in case_ids] if case_ids else [(seed, i) for i in range(cases)]
    shape_args = "".join(f" --input-shape {','.join(map(str, s))}" for s in shapes)
    with WorkerPool(target if isinstance(target, str) else None, timeout, 1) as pool:
        run = pool.run_one if isinstance(target, str) else (lambda job: run_subject(factory, job))
        for case_seed, index in plan:
            verdict = _one_case(factory, run, shapes, case_seed, index)
            verdict.replay = f"refops check {name}{shape_args} --case {verdict.case_id}"
            report.cases.append(verdict)
            if progress:
                progress(len(report.cases), len(plan))
    return report
