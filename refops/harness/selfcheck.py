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

from typing import Callable

import numpy as np

from .runner import WorkerPool, parse_case_id, record_fault, target_name
from .subject import InputNameError, load_factory, model_job, model_parameters, named_shapes
from .verdict import CaseResult, Report

MODEL = ("central finite differences of the subject's own float64 forward, error estimated from "
         "the stencil (a second step size)")
AGAINST = "finite differences of its own forward"


def _one_case(factory: Callable, run: Callable, shapes, seed: int, index: int) -> CaseResult:
    rng = np.random.default_rng([seed, index])
    verdict = CaseResult(case_id=f"{seed}-{index}", config={"input_shapes": {n: list(s) for n, s in shapes.items()}},
                         values="normal", status="passed")
    inputs = list(shapes)
    arrays = {name: rng.standard_normal(shape) for name, shape in shapes.items()}
    try:
        arrays.update(model_parameters(factory, int(rng.integers(2 ** 62)), inputs))
    except InputNameError:
        raise  # the caller's input names, not a fault of the subject
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


def check_self(target: str | Callable, input_shapes, *, cases: int = 5,
               seed: int = 0, timeout: float = 60.0, case_ids: list[str] | None = None,
               progress: Callable[[int, int], None] | None = None) -> Report:
    """Check ``target``'s backward against finite differences of its own float64 forward.

    ``target`` is a TARGET string (run in a worker process) or a factory callable (run here);
    the factory takes no arguments and returns a torch module or a callable on tensors, called
    with one tensor per entry of ``input_shapes`` (shapes, or ``{name: shape}``, in order).
    ``case_ids`` replays given cases.
    """
    shapes = named_shapes(input_shapes)
    factory = load_factory(target) if isinstance(target, str) else target
    name = target_name(target)
    report = Report(op=None, target=name, dtype="float64", seed=seed, model=MODEL, against=AGAINST)
    plan = [parse_case_id(c) for c in case_ids] if case_ids else [(seed, i) for i in range(cases)]
    shape_args = "".join(f" --input-shape {'' if n == f'input{i}' else n + '='}{','.join(map(str, s))}"
                         for i, (n, s) in enumerate(shapes.items()))
    with WorkerPool(target if isinstance(target, str) else factory, timeout, 1) as pool:
        for case_seed, index in plan:
            verdict = _one_case(factory, pool.run_one, shapes, case_seed, index)
            verdict.replay = f"refops check {name}{shape_args} --case {verdict.case_id}"
            report.cases.append(verdict)
            if progress:
                progress(len(report.cases), len(plan))
    return report
