"""Record and replay: regression-test a port against a trusted run.

Two kinds of bundle (:mod:`refops.golden`):

- a **model** bundle (:func:`record_model`): a whole model (a factory called with no arguments)
  run on the trusted backend in the subject's format and in float64 on the same rounded inputs and
  parameters; it stores inputs, parameters, the cotangent, the float64 outputs and gradients, and
  the error the trusted run showed in its format;
- a **layer** bundle (:func:`record_layer`): cases drawn from an op's configuration space (as
  ``refops check`` draws them), the trusted layer run on each, the float64 oracle's output and
  gradients as references, and per case the error the trusted run showed against them.

``replay_model`` / ``replay_layer`` run the new backend on the bundle's values and compare with
the references under :class:`~refops.numerics.tolerance.Calibrated`: ``factor`` times the error
the trusted run showed, per tensor (for a layer bundle: times the largest share of the rounding
bound it used over the recorded cases, times each case's bound). :func:`replay` picks the kind.
"""
from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np

from .. import golden
from ..numerics.compare import compare
from ..numerics.formats import get_format, round_to
from ..numerics.tolerance import Calibrated, RoundingBound
from .. import ops
from ..ops._registry import CaseConfig
from ..ops._space import pinned_value
from .runner import (DTYPES, Case, WorkerPool, _job, allowed_errors, compare_all, draw_case, new_verdict,
                     oracle_results, record_fault, target_name)
from .subject import load_factory, model_job, model_parameters, named_shapes, run_subject
from .verdict import CaseResult, Report


def _run(factory, arrays, inputs, cotangent, dtype) -> dict:
    result = run_subject(factory, model_job(arrays, inputs, cotangent, dtype))
    if result.get("error"):
        raise RuntimeError(f"the model failed on the trusted backend: {result['error']}")
    return {"output": result["output"], **{f"grad.{k}": v for k, v in result["grads"].items() if v is not None}}


def record_model(target: str, input_shapes, directory, *, dtype: str = "float32", seed: int = 0) -> Path:
    """Record the trusted run of ``target`` on inputs of ``input_shapes`` (shapes, or
    ``{name: shape}``: the bundle's array names); returns the bundle folder."""
    if dtype not in DTYPES:
        raise ValueError(f"dtype={dtype!r}: expected one of {', '.join(DTYPES)}")
    factory = load_factory(target)
    rng = np.random.default_rng(seed)
    shapes = named_shapes(input_shapes)
    inputs = list(shapes)
    arrays = {name: round_to(rng.standard_normal(shape), dtype) for name, shape in shapes.items()}
    arrays.update({name: round_to(value, dtype) for name, value in model_parameters(factory, seed, inputs).items()})
    probe = _run(factory, arrays, inputs, np.zeros(0), "float64")  # output shape for the cotangent
    cotangent = round_to(rng.standard_normal(probe["output"].shape), dtype)
    reference = _run(factory, arrays, inputs, cotangent, "float64")
    trusted = _run(factory, arrays, inputs, cotangent, dtype)
    errors = {k: float(np.max(np.abs(trusted[k] - v), initial=0.0)) for k, v in reference.items()}
    stored = {**arrays, "cotangent": cotangent, **{f"reference.{k}": v for k, v in reference.items()}}
    manifest = {"config": {"target": target, "inputs": inputs, "input_shapes": [list(s) for s in shapes.values()]},
                "formats": {"subject": dtype, "reference": "float64"}, "device": "cpu", "seed": seed,
                "errors": errors}
    return golden.write_bundle(directory, arrays=stored, manifest=manifest)


def _bundle(directory) -> golden.Bundle:
    """The bundle in ``directory`` (read and verified), or ``directory`` itself if already read."""
    return directory if isinstance(directory, golden.Bundle) else golden.read_bundle(directory)


def replay_model(target: str, directory, *, dtype: str | None = None, factor: float = 4.0) -> Report:
    """Run ``target`` on a recorded bundle and judge it against the trusted run's float64 results."""
    bundle = _bundle(directory)
    directory = bundle.directory
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


def _trusted_shares(result: dict, references: dict, allowed: dict) -> dict[str, float]:
    """Per tensor, the largest share of the rounding bound the trusted run used."""
    subject = {"output": result["output"], **result["grads"]}
    shares = {}
    for tensor, reference in references.items():
        value = subject.get(tensor)
        if value is None or value.shape != reference.shape:
            raise RuntimeError(f"the trusted run gave no usable {tensor}")
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.where(value == reference, 0.0, np.abs(value - reference) / allowed[tensor])
        if not np.all(np.isfinite(share)):
            raise RuntimeError(f"the trusted run's {tensor} is not finite where the oracle is")
        shares[tensor] = float(np.max(share, initial=0.0))
    return shares


def _json_safe(values: dict) -> dict:
    return {k: list(v) if isinstance(v, tuple) else v for k, v in values.items()}


def _tuples(values: dict) -> dict:
    """JSON lists back to the tuples a layer configuration carries."""
    return {k: tuple(v) if isinstance(v, list) else v for k, v in values.items()}


def record_layer(target: str | Callable, op: str, directory, *, cases: int = 20, seed: int = 0, dtype: str = "float32",
                 pins=None, timeout: float = 60.0) -> Path:
    """Record the trusted layer ``target`` on ``cases`` cases of ``op`` (pinned by ``pins``).

    The references are the float64 oracle's results; per case and tensor the manifest keeps the
    share of the rounding bound the trusted run used. ``target`` is a TARGET string (run in a
    worker process) or a layer factory (run here). Returns the bundle folder."""
    oracle = ops.get(op)
    if dtype not in DTYPES:
        raise ValueError(f"dtype={dtype!r}: expected one of {', '.join(DTYPES)}")
    pins = {k: pinned_value(v) for k, v in (pins or {}).items()}
    drawn = [draw_case(oracle, seed, index, dtype, pins) for index in range(cases)]
    bound = RoundingBound(floor=get_format(dtype).tiny)
    stored, recorded = {}, []
    with WorkerPool(target, timeout, 1) as pool:
        for case in drawn:
            result = pool.run_one(_job(oracle, case, dtype, "contiguous", "cpu"))
            verdict = new_verdict(case)
            if record_fault(verdict, result):
                raise RuntimeError(f"the layer failed on the trusted backend in case {case.case_id}: "
                                   f"{verdict.message}")
            references = oracle_results(oracle, case)
            allowed, _ = allowed_errors(oracle, case, references, dtype, bound)
            prefix = f"case.{case.case_id}."
            stored.update({prefix + k: v for k, v in case.arrays.items() if v is not None})
            stored[prefix + "cotangent"] = case.cotangent
            stored.update({prefix + "reference." + t: v for t, v in references.items()})
            recorded.append({"case_id": case.case_id, "values": case.family,
                             "layer": _json_safe(case.config.layer), "drawn": _json_safe(case.config.drawn),
                             "params": _json_safe({k: v for k, v in case.params.items() if k not in case.arrays}),
                             "absent": [k for k, v in case.arrays.items() if v is None],
                             "shares": _trusted_shares(result, references, allowed)})
    manifest = {"config": {"target": target_name(target), "op": op, "pins": _json_safe(pins), "cases": recorded},
                "formats": {"subject": dtype, "reference": "float64 oracle"}, "device": "cpu", "seed": seed}
    return golden.write_bundle(directory, arrays=stored, manifest=manifest)


def _recorded_case(oracle, entry: dict, arrays: dict) -> Case:
    prefix = f"case.{entry['case_id']}."
    values = {k[len(prefix):]: np.array(v) for k, v in arrays.items()
              if k.startswith(prefix) and not k[len(prefix):].startswith("reference.")}
    cotangent = values.pop("cotangent")
    values.update({name: None for name in entry["absent"]})
    params = {**_tuples(entry["params"]), **{k: v for k, v in values.items() if k in oracle.defaults}}
    config = CaseConfig(layer=_tuples(entry["layer"]), params=params, shapes={}, bounds={},
                        drawn=_tuples(entry["drawn"]))
    return Case(entry["case_id"], config, entry["values"], values, params, cotangent)


def replay_layer(target: str | Callable, directory, *, dtype: str | None = None, factor: float = 4.0,
                 timeout: float = 60.0) -> Report:
    """Run the layer ``target`` on every case of a layer bundle and judge it against the
    references: ``factor`` times the largest share of the rounding bound the trusted run used
    (over all recorded cases, per tensor), times each case's bound."""
    bundle = _bundle(directory)
    directory = bundle.directory
    config = bundle.manifest["config"]
    oracle = ops.get(config["op"])
    dtype = dtype or bundle.manifest["formats"]["subject"]
    tiny = get_format(dtype).tiny
    tensors = {t for entry in config["cases"] for t in entry["shares"]}
    shares = {t: max(entry["shares"].get(t, 0.0) for entry in config["cases"]) for t in sorted(tensors)}
    model = Calibrated(shares, factor=factor, floor=tiny, bound=RoundingBound(floor=tiny))
    report = Report(op=None, target=target_name(target), dtype=dtype, seed=bundle.manifest["seed"],
                    model=model.describe(),
                    against=f"the recorded trusted run of {config['target']} ({config['op']})")
    with WorkerPool(target, timeout, 1) as pool:
        for entry in config["cases"]:
            case = _recorded_case(oracle, entry, bundle.arrays)
            prefix = f"case.{case.case_id}.reference."
            references = {k[len(prefix):]: np.asarray(v) for k, v in bundle.arrays.items() if k.startswith(prefix)}
            verdict = new_verdict(case)
            verdict.replay = f"refops replay {target_name(target)} {directory} --dtype {dtype}"
            result = pool.run_one(_job(oracle, case, dtype, "contiguous", "cpu"))
            if not record_fault(verdict, result):
                allowed, applied = allowed_errors(oracle, case, references, dtype, model)
                compare_all(verdict, result, references, allowed, dtype, model.describe())
                report.deviations = sorted(set(report.deviations) | set(applied))
            report.cases.append(verdict)
    return report


def replay(target: str | Callable, directory, *, dtype: str | None = None, factor: float = 4.0) -> Report:
    """Replay a model or a layer bundle, whichever ``directory`` holds (a layer bundle also takes
    a factory callable, run in this process)."""
    bundle = golden.read_bundle(directory)  # once: reading verifies every array's hash
    replay_kind = replay_layer if "op" in bundle.manifest["config"] else replay_model
    return replay_kind(target, bundle, dtype=dtype, factor=factor)
