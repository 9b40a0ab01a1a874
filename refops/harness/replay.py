"""Record and replay: regression-test a port against a trusted run when no oracle covers it.

``record_model`` runs a whole model (a factory called with no arguments that returns a torch
module) on the trusted backend twice, in the subject's format and in float64, on the same rounded
inputs and parameters, and stores inputs, parameters, the cotangent, the float64 outputs and
gradients, and the error the trusted run showed in its format, as a bundle (:mod:`refops.golden`).
``replay_model`` runs the new backend on the bundle's values and compares its output and gradients
with the float64 results under :class:`~refops.numerics.tolerance.Calibrated`: ``factor`` times
the error the trusted run showed, per tensor.
"""
from __future__ import annotations

from pathlib import Path
from typing import Sequence

import numpy as np

from .. import golden
from ..numerics.compare import compare
from ..numerics.formats import get_format, round_to
from ..numerics.tolerance import Calibrated
from .runner import DTYPES
from .subject import load_factory, model_job, model_parameters, run_subject
from .verdict import CaseResult, Report


def _run(factory, arrays, inputs, cotangent, dtype) -> dict:
    result = run_subject(factory, model_job(arrays, inputs, cotangent, dtype))
    if result.get("error"):
        raise RuntimeError(f"the model failed on the trusted backend: {result['error']}")
    return {"output": result["output"], **{f"grad.{k}": v for k, v in result["grads"].items() if v is not None}}


def record_model(target: str, input_shapes: Sequence[tuple[int, ...]], directory, *, dtype: str = "float32",
                 seed: int = 0) -> Path:
    """Record the trusted run of ``target`` on inputs of ``input_shapes``; returns the bundle folder."""
    if dtype not in DTYPES:
        raise ValueError(f"dtype={dtype!r}: expected one of {', '.join(DTYPES)}")
    factory = load_factory(target)
    rng = np.random.default_rng(seed)
    inputs = [f"input{i}" for i in range(len(input_shapes))]
    arrays = {name: round_to(rng.standard_normal(shape), dtype) for name, shape in zip(inputs, input_shapes)}
    arrays.update({name: round_to(value, dtype) for name, value in model_parameters(factory, seed).items()})
    probe = _run(factory, arrays, inputs, np.zeros(0), "float64")  # output shape for the cotangent
    cotangent = round_to(rng.standard_normal(probe["output"].shape), dtype)
    reference = _run(factory, arrays, inputs, cotangent, "float64")
    trusted = _run(factory, arrays, inputs, cotangent, dtype)
    errors = {k: float(np.max(np.abs(trusted[k] - v), initial=0.0)) for k, v in reference.items()}
    stored = {**arrays, "cotangent": cotangent, **{f"reference.{k}": v for k, v in reference.items()}}
    manifest = {"config": {"target": target, "inputs": inputs, "input_shapes": [list(s) for s in input_shapes]},
                "formats": {"subject": dtype, "reference": "float64"}, "device": "cpu", "seed": seed,
                "errors": errors}
    return golden.write_bundle(directory, arrays=stored, manifest=manifest)


def replay_model(target: str, directory, *, dtype: str | None = None, factor: float = 4.0) -> Report:
    """Run ``target`` on a recorded bundle and judge it against the trusted run's float64 results."""
    bundle = golden.read_bundle(directory)
    manifest = bundle.manifest
    dtype = dtype or manifest["formats"]["subject"]
    inputs = manifest["config"]["inputs"]
    fmt = get_format(dtype)
    model = Calibrated(manifest["errors"], factor=factor, floor=fmt.tiny)
    arrays = {k: np.array(v) for k, v in bundle.arrays.items()
              if not k.startswith("reference.") and k != "cotangent"}
    factory = load_factory(target)
    result = run_subject(factory, model_job(arrays, inputs, np.array(bundle.arrays["cotangent"]), dtype))
    report = Report(op=None, target=target, dtype=dtype, seed=manifest["seed"], model=model.describe(),
                    against="the recorded trusted run")
    case = CaseResult(case_id="replay", config=manifest["config"], values="recorded", status="passed",
                      replay=f"refops replay {target} {directory} --dtype {dtype}")
    if result.get("error"):
        case.status, case.message = "subject-error", result["error"]
    else:
        got = {"output": result["output"], **{f"grad.{k}": v for k, v in result["grads"].items()}}
        for name, reference in ((k[len("reference."):], v) for k, v in bundle.arrays.items()
                                if k.startswith("reference.")):
            value = got.get(name)
            if value is None or value.shape != reference.shape:
                case.findings.append(f"{name}: missing or of the wrong shape")
                continue
            allowed = model.allowed(np.asarray(reference), None, fmt, tensor=name)
            case.comparisons.append(compare(name, value, np.asarray(reference), allowed, dtype,
                                            model=model.describe()))
        if case.findings or not all(c.passed for c in case.comparisons):
            case.status = "failed"
    report.cases.append(case)
    return report
