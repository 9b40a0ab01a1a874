"""Cases and verdicts: draw a case, run the subject, run the oracle, compare under the bound.

A case is a configuration drawn from the op's space (with pins), inputs from one value family,
parameters and a cotangent, all rounded to the subject's format so that the oracle (float64)
sees exactly what the subject saw. Its id ``SEED-INDEX`` replays it.
"""
from __future__ import annotations

import concurrent.futures
import dataclasses
import queue
import time
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np

from .. import ops
from ..numerics.compare import compare
from ..numerics.formats import get_format, round_to
from ..numerics.tolerance import RoundingBound
from ..ops._space import PinError, RandomDraw, pinned_value
from . import deviations as _deviations
from .values import ELEMENTWISE, FAMILIES, families_for
from .verdict import CaseResult, Report

DTYPES = ("float64", "float32", "float16", "bfloat16")
CASES_PER_MESSAGE = 16
HELD_AT_DEFAULT = ("divisor_override",)


@dataclass
class Case:
    case_id: str
    config: Any
    family: str
    arrays: dict
    params: dict
    cotangent: np.ndarray


def _fan_in_scale(name: str, shape: tuple) -> float:
    """Weights scaled like a trained layer's (1/sqrt(fan in)) so outputs stay O(1)."""
    if name == "weight" and len(shape) >= 2:
        return 1.0 / np.sqrt(int(np.prod(shape[1:])))
    return 1.0


def _params_as_the_subject_sees_them(config, dtype: str):
    """Real-valued parameters (alpha, min_val, beta, ...) rounded to float32 for a reduced-precision
    subject: frameworks compute such kernels with float32 scalars (common practice), so the oracle
    must use the same value to see the same kinks."""
    if dtype == "float64":
        return config

    def rounded(values: dict) -> dict:
        return {k: float(np.float32(v)) if isinstance(v, float) else v for k, v in values.items()}

    return dataclasses.replace(config, layer=rounded(config.layer), params=rounded(config.params))


def draw_case(op, seed: int, index: int, dtype: str, pins: Mapping[str, Any] | None = None) -> Case:
    """The case ``seed-index``: deterministic, independent of how many cases run around it."""
    rng = np.random.default_rng([seed, index])
    # Oracle parameters that the contract's layer configuration does not carry are held at
    # their defaults, so that the factory builds the layer the oracle models.
    held = {k: op.defaults[k] for k in HELD_AT_DEFAULT if k in op.defaults}
    draw = RandomDraw(rng, {**held, **(pins or {})})
    config = _params_as_the_subject_sees_them(op.space(draw), dtype)
    unused = draw.unused_pins()
    if unused:
        raise PinError(f"--set {unused[0]}: {op.name}'s configuration has no parameter {unused[0]!r}; "
                       f"it draws: {', '.join(sorted(draw.drawn))}")
    families = families_for(op)
    family = families[index % len(families)]
    arrays = {}
    for name, shape in config.shapes.items():
        if shape is None:
            arrays[name] = None
        elif name in op.integer_arrays:
            low, high = config.bounds[name]
            arrays[name] = rng.integers(low, high, size=shape)
        elif name in config.bounds:
            low, high = config.bounds[name]
            arrays[name] = round_to(rng.uniform(low, high, size=shape), dtype)
        elif name == op.arrays[0]:
            arrays[name] = round_to(FAMILIES[family](rng, shape, dtype, op, config.params), dtype)
        else:
            arrays[name] = round_to(rng.standard_normal(shape) * _fan_in_scale(name, shape), dtype)
    params = {**config.params, **{k: v for k, v in arrays.items() if k in op.defaults}}
    positional = tuple(arrays.get(name) for name in op.arrays)
    try:
        shape = op.output_shape(*positional, **params)
    except (ValueError, TypeError) as error:
        raise PinError(f"the pinned values make an invalid {op.name} configuration: {error}") from None
    cotangent = round_to(rng.standard_normal(shape), dtype)
    return Case(f"{seed}-{index}", config, family, arrays, params, cotangent)


def oracle_results(op, case: Case) -> dict[str, np.ndarray]:
    """The oracle's output and gradients for the case, keyed ``output`` and by array name."""
    positional = tuple(case.arrays.get(name) for name in op.arrays)
    return {"output": op(*positional, **case.params), **op.vjp(case.cotangent, *positional, **case.params)}


def allowed_errors(op, case: Case, references: dict, dtype: str, model, use_deviations: bool = True):
    """The allowed error of each reference tensor under ``model``, declared deviations applied;
    returns ``(allowed, descriptions of the deviations applied)``."""
    positional = tuple(case.arrays.get(name) for name in op.arrays)
    terms = op.error_terms(case.cotangent, *positional, **case.params)
    fmt = get_format(dtype)
    allowed, applied = {}, []
    for tensor, reference in references.items():
        term = terms[tensor]
        deviation = _deviations.applicable(op.name, dtype, tensor, use_deviations)
        if deviation is not None:
            term = dataclasses.replace(term, accumulate=deviation.accumulate)
            applied.append(deviation.describe())
        allowed[tensor] = model.allowed(reference, term, fmt, tensor=tensor)
    return allowed, applied


# Ops whose dim 0 is a batch of independent samples (the output's dim 0 follows the input's).
SAMPLEWISE = frozenset({"linear", "conv1d", "conv2d", "conv3d", "conv_transpose2d", "max_pool2d", "avg_pool2d",
                        "adaptive_avg_pool2d", "adaptive_max_pool2d", "layer_norm", "group_norm"}) | ELEMENTWISE


def _samplewise(op, case: Case) -> bool:
    first = case.arrays.get(op.arrays[0])
    if first is None or first.ndim < 2 or first.shape[0] < 2:
        return False
    if op.name in ("softmax", "log_softmax"):
        return case.params["dim"] % first.ndim != 0
    if op.name == "layer_norm":
        return len(np.atleast_1d(case.params["normalized_shape"])) < first.ndim
    return op.name in SAMPLEWISE and (op.name != "prelu" or first.ndim >= 2)


def _job(op, case: Case, dtype: str, layout: str, device: str) -> dict:
    job = {"arrays": case.arrays, "array_order": list(op.arrays), "layer": case.config.layer,
           "params": case.params, "dtype": dtype, "layout": layout, "device": device,
           "cotangent": case.cotangent, "batch_alone": _samplewise(op, case),
           "self_fd": dtype == "float64" and case.family != "tiny",
           "isolate": _unsafe_in_process(op, case)}  # why it must run alone ("" when it need not)
    if job["self_fd"]:
        positional = tuple(case.arrays.get(name) for name in op.arrays)
        job["kink_distance"] = op.kink_distance(*positional, **case.params)
    return job


def _unsafe_in_process(op, case: Case) -> str:
    """Why torch must not run this case in the caller's process ("" when it may)."""
    if case.config.drawn.get("padding_only_windows"):
        deviation = _deviations.unsafe(op.name)
        if deviation is not None:
            return deviation.describe()
    return ""


def new_verdict(case: Case) -> CaseResult:
    return CaseResult(case_id=case.case_id, config={**case.config.drawn, **case.config.layer},
                      values=case.family, status="passed")


def record_fault(verdict: CaseResult, result: dict) -> bool:
    """Give the verdict the status of a case that did not run to the end (skipped, crashed, hung,
    raised); True when it did not."""
    if result.get("skip"):
        verdict.status, verdict.message = "skipped", f"not run in this process: {result['skip']}"
    elif result.get("fault"):
        verdict.status, verdict.message = result["fault"], result["error"]
    elif result.get("error"):
        verdict.status, verdict.message = "subject-error", result["error"]
    return verdict.status != "passed"


def judge(op, case: Case, result: dict, dtype: str, model, use_deviations: bool = True
          ) -> tuple[CaseResult, list[str]]:
    """Turn the subject's result for a case into a verdict."""
    verdict = new_verdict(case)
    if record_fault(verdict, result):
        return verdict, [result["skip"]] if result.get("skip") else []
    references = oracle_results(op, case)
    allowed, applied = allowed_errors(op, case, references, dtype, model, use_deviations)
    compare_all(verdict, result, references, allowed, dtype, model.describe())
    return verdict, applied


def compare_all(verdict: CaseResult, result: dict, references: dict, allowed: dict, dtype: str,
                model: str) -> None:
    """Compare the subject's output and gradients with the references, add the behaviour
    findings, and set the verdict's status."""
    verdict.findings.extend(result["findings"])
    if result["output_dtype"] != dtype:
        verdict.findings.append(f"the output has dtype {result['output_dtype']}, expected {dtype}")
    subject = {"output": result["output"], **result["grads"]}
    for tensor, reference in references.items():
        value = subject.get(tensor)
        if value is None:
            verdict.findings.append(f"no gradient for {tensor}" if tensor != "output" else "no output")
            continue
        if value.shape != reference.shape:
            verdict.findings.append(f"{'the output' if tensor == 'output' else 'the gradient of ' + tensor} "
                                    f"has shape {value.shape}, expected {reference.shape}")
            continue
        verdict.comparisons.append(compare(tensor, value, reference, allowed[tensor], dtype, model=model))
    if result.get("alone") is not None:
        verdict.findings.extend(_batch_independence(result["alone"], references["output"],
                                                    allowed["output"]))
    if verdict.findings or not all(c.passed for c in verdict.comparisons):
        verdict.status = "failed"


def _batch_independence(alone: np.ndarray, reference: np.ndarray, allowed: np.ndarray) -> list[str]:
    """Sample 0 run alone must agree with the oracle's sample 0 within the same bound."""
    if alone.shape != reference[:1].shape:
        return [f"batch independence: sample 0 alone gives shape {alone.shape}, expected {reference[:1].shape}"]
    error = np.abs(alone - reference[:1])
    over = ~(error <= allowed[:1]) & ~(np.isinf(alone) & (alone == reference[:1]))
    if not over.any():
        return []
    index = np.unravel_index(int(np.argmax(np.where(over, error, -1))), alone.shape)
    return [f"batch independence: sample 0 run alone differs from the oracle at {tuple(int(i) for i in index)} "
            f"by {error[index]:.3g} (allowed {allowed[:1][index]:.3g}): the output depends on other samples"]


SIZES = ("batch", "in_channels", "out_channels", "channels", "features", "in_features", "out_features",
         "height", "width", "length", "depth", "kernel_size")


def _defect(verdict: CaseResult) -> set[str]:
    """What failed, coarsely: the failing tensors and the kinds of finding."""
    return {c.tensor for c in verdict.comparisons if not c.passed} | \
        {f.split(":")[0].split(" ")[0] for f in verdict.findings}


def _shrink(op, verdict: CaseResult, run: Callable, dtype, layout, device, model, use_deviations, pins, name,
            op_name) -> None:
    """Halve one size at a time (as pins) while the case still fails the same way."""
    seed, index = parse_case_id(verdict.case_id)
    target_defect, current, found = _defect(verdict), dict(pins), None
    for _ in range(12):
        smaller = None
        for size in SIZES:
            value = verdict.config.get(size) if found is None else found[0].config.get(size)
            if not isinstance(value, int) or isinstance(value, bool) or value < 2:
                continue
            trial = {**current, size: value // 2}
            try:
                case = draw_case(op, seed, index, dtype, trial)
            except (PinError, ValueError):
                continue
            result, _ = judge(op, case, run(_job(op, case, dtype, layout, device)), dtype, model, use_deviations)
            if result.status == "failed" and _defect(result) & target_defect:
                smaller = (result, trial)
                break
        if smaller is None:
            break
        found, current = smaller, smaller[1]
    if found is not None:
        verdict.smallest = {"config": found[0].config,
                            "replay": _replay(name, op_name, dtype, current, verdict.case_id, layout)}


def _replay(target: str, op: str, dtype: str, pins: Mapping[str, Any], case_id: str, layout: str) -> str:
    sets = "".join(f" --set {k}={_pin_text(v)}" for k, v in sorted(pins.items()))
    extra = "" if layout == "contiguous" else f" --layout {layout}"
    return f"refops check {target} --op {op} --dtype {dtype}{sets}{extra} --case {case_id}"


def _pin_text(value: Any) -> str:
    import json
    return value if isinstance(value, str) else json.dumps(list(value) if isinstance(value, tuple) else value)


def parse_case_id(case_id: str) -> tuple[int, int]:
    """``"SEED-INDEX"`` -> ``(seed, index)``."""
    try:
        seed, index = (int(part) for part in case_id.split("-"))
    except (ValueError, AttributeError):
        raise ValueError(f"case={case_id!r}: expected SEED-INDEX as printed in a report (e.g. 0-17)") from None
    return seed, index


def target_name(target: str | Callable) -> str:
    """How reports and bundles name a subject: its TARGET string, or the factory's name."""
    return target if isinstance(target, str) else getattr(target, "__qualname__", repr(target))


def check_layer(target: str | Callable, op: str, *, cases: int = 50, seed: int = 0, dtype: str = "float32",
                pins: Mapping[str, Any] | None = None, layout: str = "contiguous", device: str = "cpu",
                timeout: float = 60.0, budget: float | None = None, model=None,
                case_ids: list[str] | None = None, use_deviations: bool = True,
                shard: tuple[int, int] = (0, 1), shrink: int = 3, jobs: int = 1,
                progress: Callable[[int, int], None] | None = None) -> Report:
    """Check a subject against the oracle ``op`` over drawn cases; returns a :class:`Report`.

    ``target`` is ``"package.module:attr"`` / ``"path/file.py:attr"`` (run in worker processes, so
    a crash of the subject is a verdict; ``jobs`` of them run at once) or a factory callable (run in
    this process). The factory receives the op's layer configuration as keyword arguments and
    returns a torch module (or a callable on tensors). ``pins`` fixes configuration values;
    ``case_ids`` replays given cases; ``shard=(I, N)`` runs the cases whose index is I modulo N (a
    CI matrix over N machines). The first ``shrink`` failing cases are retried with halved sizes;
    the smallest configuration that still fails the same way is attached (``CaseResult.smallest``).
    The verdicts do not depend on ``jobs`` or ``shard``.
    """
    from .subject import LAYOUTS
    oracle = ops.get(op)
    if dtype not in DTYPES:
        raise ValueError(f"dtype={dtype!r}: expected one of {', '.join(DTYPES)}")
    if layout not in LAYOUTS:
        raise ValueError(f"layout={layout!r}: expected one of {', '.join(LAYOUTS)}")
    if not (isinstance(jobs, int) and jobs >= 1) or (jobs > 1 and not isinstance(target, str)):
        raise ValueError(f"jobs={jobs!r}: expected a whole number >= 1; more than one needs a TARGET string "
                         f"(package.module:attr), whose cases run in worker processes")
    pins = {k: pinned_value(v) for k, v in (pins or {}).items()}
    # Default floor: the smallest normal number, so a subject that flushes or loses subnormal
    # results (common on accelerators) is not failed for that alone; pass a model to be stricter.
    model = model or RoundingBound(floor=get_format(dtype).tiny)
    name = target_name(target)
    report = Report(op=op, target=name, dtype=dtype, seed=seed, model=model.describe())
    part, parts = shard
    if not (isinstance(parts, int) and isinstance(part, int) and 0 <= part < parts):
        raise ValueError(f"shard={shard!r}: expected (I, N) with 0 <= I < N")
    plan = [parse_case_id(c) for c in case_ids] if case_ids else \
        [(seed, i) for i in range(cases) if i % parts == part]
    drawn = [draw_case(oracle, s, i, dtype, pins) for s, i in plan]  # bad pins fail before any run
    chunks = [drawn[first:first + CASES_PER_MESSAGE] for first in range(0, len(drawn), CASES_PER_MESSAGE)]
    start = time.perf_counter()
    applied: set[str] = set()

    def run_chunk(chunk: list[Case], lane: tuple) -> list[tuple[CaseResult, list[str]]]:
        if budget is not None and time.perf_counter() - start > budget:
            return []
        worker, judge_worker = lane
        jobs_ = [_job(oracle, case, dtype, layout, device) for case in chunk]
        results = worker.run_many(jobs_) if worker else [pool.run_here(job) for job in jobs_]
        began = time.perf_counter()
        requests = [{"op": op, "case": case, "result": result, "dtype": dtype, "model": model,
                     "use_deviations": use_deviations} for case, result in zip(chunk, results)]
        replies = judge_worker.run_many(requests) if judge_worker else [{"fault": "here"}] * len(chunk)
        judged = []
        for case, result, reply in zip(chunk, results, replies):
            if isinstance(reply, dict):  # judged here: one process, or the judge process failed
                reply = judge(oracle, case, result, dtype, model, use_deviations)
            verdict, used = reply
            verdict.seconds = result.get("seconds", 0.0) + (time.perf_counter() - began) / len(chunk)
            verdict.replay = _replay(name, op, dtype, pins, case.case_id, layout)
            judged.append((verdict, used))
        return judged

    with WorkerPool(target, timeout, jobs) as pool:
        for judged in pool.map(run_chunk, chunks):
            for verdict, used in judged:
                report.cases.append(verdict)
                applied.update(used)
            if progress:
                progress(len(report.cases), len(drawn))
        for verdict in [c for c in report.cases if c.status == "failed"][:shrink]:
            _shrink(oracle, verdict, pool.run_one, dtype, layout, device, model, use_deviations, pins, name, op)
    report.deviations = sorted(applied)
    return report


class WorkerPool:
    """Where a target's cases run. A TARGET string gets ``size`` lanes of a subject worker
    process, each with a judge process when there is more than one lane (one lane judges in this
    process); a factory callable runs here, with no workers. ``map(fn, items)`` calls
    ``fn(item, (worker, judge))`` with a free lane, results in order; ``run_one(job)`` runs one
    job on a subject worker, or here."""

    def __init__(self, target: str | Callable, timeout: float, size: int):
        from .worker import JUDGE, Worker
        self.factory = None if isinstance(target, str) else target
        self.free: queue.Queue = queue.Queue()
        self.lanes = [(Worker(target, timeout), Worker(JUDGE, timeout) if size > 1 else None)
                      for _ in range(size)] if isinstance(target, str) else []
        for lane in self.lanes or [(None, None)]:
            self.free.put(lane)

    def run_here(self, job: dict) -> dict:
        """Run a job in this process, unless a declared deviation says it must run alone."""
        from .subject import run_subject
        if job.get("isolate"):
            return {"skip": job["isolate"]}
        return run_subject(self.factory, job)

    def __enter__(self) -> "WorkerPool":
        return self

    def __exit__(self, *exc) -> None:
        for lane in self.lanes:
            for worker in lane:
                if worker is not None:
                    worker.close()

    def _with_lane(self, fn: Callable, item):
        lane = self.free.get()
        try:
            return fn(item, lane)
        finally:
            self.free.put(lane)

    def map(self, fn: Callable, items: list):
        if len(self.lanes) <= 1:
            yield from (self._with_lane(fn, item) for item in items)
            return
        with concurrent.futures.ThreadPoolExecutor(len(self.lanes)) as threads:
            yield from threads.map(lambda item: self._with_lane(fn, item), items)

    def run_one(self, job: dict) -> dict:
        if not self.lanes:
            return self.run_here(job)
        return self._with_lane(lambda item, lane: lane[0].run(item), job)
