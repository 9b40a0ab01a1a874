"""Running a subject (a torch layer, or a callable on tensors) forward and backward.

This is the only module that drives a framework. :func:`run_subject` takes float64 numpy arrays
that are already exactly representable in the subject's format, casts them (exactly), runs the
subject twice and returns float64 numpy results plus findings about its behaviour (in-place
changes, missing gradients, non-determinism). It never raises for a fault of the subject: the
fault comes back as ``error``.
"""
from __future__ import annotations

import importlib
import importlib.util
import os
import re
import sys
import time
import traceback
from pathlib import Path
from typing import Callable, Mapping

import numpy as np

LAYOUTS = ("contiguous", "channels_last", "strided")


class TargetError(ValueError):
    """A TARGET that cannot be loaded (exit status 2 on the command line)."""


class InputNameError(ValueError):
    """An input name that a model's parameter already has (the caller's mistake, not the model's)."""


def load_factory(target: str) -> Callable:
    """The callable named by ``package.module:attr`` or ``path/to/file.py:attr``."""
    if not isinstance(target, str) or ":" not in target:
        raise TargetError(f"target={target!r}: expected package.module:attr or path/to/file.py:attr")
    location, attr = target.rsplit(":", 1)
    try:
        if location.endswith(".py") or os.sep in location:
            path = Path(location)
            if not path.is_file():
                raise TargetError(f"target={target!r}: no file {location}")
            spec = importlib.util.spec_from_file_location(path.stem, path)
            module = importlib.util.module_from_spec(spec)
            sys.modules.setdefault(path.stem, module)
            spec.loader.exec_module(module)
        else:
            if os.getcwd() not in sys.path:
                sys.path.insert(0, os.getcwd())
            module = importlib.import_module(location)
    except TargetError:
        raise
    except Exception as error:  # the user's module failed to import
        raise TargetError(f"target={target!r}: importing {location} failed: "
                          f"{type(error).__name__}: {error}") from None
    factory = getattr(module, attr, None)
    if not callable(factory):
        raise TargetError(f"target={target!r}: {location} has no callable {attr!r}")
    return factory


def _torch():
    import torch
    return torch


def torch_dtype(name: str):
    torch = _torch()
    return {"float64": torch.float64, "float32": torch.float32, "float16": torch.float16,
            "bfloat16": torch.bfloat16}[name]


def _to_numpy(tensor) -> np.ndarray:
    return tensor.detach().to(_torch().float64).cpu().numpy()


def _as_tensor(value: np.ndarray, dtype, device: str, layout: str, grad: bool):
    torch = _torch()
    if value.dtype.kind in "iu":
        return torch.tensor(value, dtype=torch.int64, device=device)
    tensor = torch.tensor(value, dtype=torch.float64).to(dtype=dtype, device=device)
    if layout == "channels_last" and tensor.ndim == 4:
        tensor = tensor.contiguous(memory_format=torch.channels_last)
    elif layout == "strided" and tensor.ndim >= 1 and tensor.shape[-1] > 0:
        wide = torch.zeros(tensor.shape[:-1] + (2 * tensor.shape[-1],), dtype=dtype, device=device)
        wide[..., ::2] = tensor
        tensor = wide[..., ::2]  # same values, non-contiguous
    return tensor.requires_grad_(grad)


def _forward_backward(subject, inputs: dict, params: dict, cotangent, as_module: bool):
    """One forward + backward; returns (output, {name: grad or None})."""
    for tensor in list(inputs.values()) + list(params.values()):
        if tensor is not None and tensor.grad is not None:
            tensor.grad = None
    output = _call(subject, inputs, params, as_module)
    torch = _torch()
    if not isinstance(output, torch.Tensor):
        raise TypeError(f"the subject returned {type(output).__name__}, not a tensor")
    if tuple(output.shape) != tuple(cotangent.shape):
        return output, {}  # the caller reports the wrong shape; no backward is possible
    if output.is_floating_point() and output.requires_grad:
        output.backward(cotangent.to(output.dtype))
    grads = {name: t.grad for name, t in {**inputs, **params}.items() if t is not None and t.is_floating_point()}
    return output, grads


_INPUT_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,63}")


def named_shapes(input_shapes) -> dict[str, tuple[int, ...]]:
    """Input shapes by name, from ``{name: shape}`` or a sequence of shapes (named ``input0``,
    ``input1``, ...). The inputs are passed to the subject in this order."""
    if isinstance(input_shapes, Mapping):
        items = list(input_shapes.items())
    else:
        try:
            items = [(f"input{i}", shape) for i, shape in enumerate(input_shapes)]
        except TypeError:
            items = []
    shapes = {}
    for name, shape in items:
        try:
            shape = tuple(shape)
        except TypeError:
            shape = ()
        if not (isinstance(name, str) and _INPUT_NAME.fullmatch(name)) or not shape or \
                not all(isinstance(n, int) and not isinstance(n, bool) and n > 0 for n in shape):
            items = []
            break
        shapes[name] = shape
    if not items:
        raise ValueError(f"input_shapes={input_shapes!r}: expected one or more shapes of positive sizes, "
                         f"e.g. [(2, 3, 8, 8)] or {{'image': (2, 3, 8, 8)}} (names are identifiers)")
    return shapes


def model_job(arrays: dict, inputs: list[str], cotangent: np.ndarray, dtype: str, **checks) -> dict:
    """The job for a layer built by a factory called with no arguments (no op: a whole model, or an
    operator without an oracle); ``arrays`` holds the inputs and the parameters by name."""
    return {"arrays": arrays, "array_order": inputs, "layer": {}, "params": {}, "dtype": dtype,
            "layout": "contiguous", "device": "cpu", "cotangent": cotangent, **checks}


def model_parameters(factory: Callable, seed: int, inputs=()) -> dict[str, np.ndarray]:
    """The parameters of ``factory()``, built with torch's generator seeded by ``seed``, as
    float64 arrays by name (none for a subject that is not a module); no input may share a name."""
    torch = _torch()
    torch.manual_seed(seed)
    subject = factory()
    if not isinstance(subject, torch.nn.Module):
        return {}
    params = {name: p.detach().to(torch.float64).numpy().copy() for name, p in subject.named_parameters()}
    clash = sorted(set(inputs) & (set(params) | {"cotangent"}))
    if clash:
        raise InputNameError(f"input_shapes: the input name {clash[0]!r} is taken by the model's parameters "
                         f"(or the cotangent); name the input otherwise")
    return params


def run_subject(factory: Callable, job: dict) -> dict:
    """Run one case; ``job`` holds op arrays, layer config, dtype, layout, device and cotangent.

    Optional keys: ``batch_alone`` (also run sample 0 of the first array alone and return its
    output as ``alone``) and ``self_fd`` (float64 only: compare the subject's backward with finite
    differences of its own forward, findings for disagreements).
    """
    torch = _torch()
    began = time.perf_counter()
    try:
        result = _run(factory, job, torch)
    except Exception as error:  # a fault of the subject, reported as a verdict
        frames = traceback.extract_tb(error.__traceback__)
        where = f" (at {Path(frames[-1].filename).name}:{frames[-1].lineno})" if frames else ""
        result = {"error": f"{type(error).__name__}: {error}{where}"}
    result["seconds"] = time.perf_counter() - began
    return result


def _numpy_function(subject, inputs: dict, params: dict, as_module: bool):
    """``fn(**arrays) -> float64 output`` evaluating the subject forward on replaced values."""
    torch = _torch()
    tensors = {**inputs, **params}

    def fn(**arrays):
        saved = {n: t.detach().clone() for n, t in tensors.items() if t is not None and n in arrays}
        with torch.no_grad():
            for name in saved:
                tensors[name].copy_(torch.from_numpy(np.asarray(arrays[name], dtype=np.float64)))
            try:
                return _to_numpy(_call(subject, inputs, params, as_module))
            finally:
                for name, before in saved.items():
                    tensors[name].copy_(before)
    return fn


def _self_fd_findings(subject, inputs, params, as_module, first: dict, job: dict) -> list[str]:
    """The float64 subject's own backward against finite differences of its own forward."""
    from ..numerics.finite_diff import vjp_fd_agreement
    fn = _numpy_function(subject, inputs, params, as_module)
    arrays = {n: _to_numpy(t) for n, t in {**inputs, **params}.items() if t is not None and t.is_floating_point()}
    # No gradient (torch's None) means zero: finite differences then show whether it should be.
    gradients = {n: np.zeros_like(a) if first.get(n) is None else first[n] for n, a in arrays.items()}
    agreements = vjp_fd_agreement(fn, lambda g, **a: gradients, arrays, rng=np.random.default_rng(0),
                                  kink_distance=job.get("kink_distance"), cotangent=job["cotangent"])
    return [f"the subject's own backward disagrees with finite differences of its forward for "
            f"{a.array}: error {a.max_error:.3g} vs FD estimate {a.estimate:.3g} ({a.method})"
            for a in agreements if not a.passed]


def _call(subject, inputs: dict, params: dict, as_module: bool):
    if as_module:
        return subject(*[t for t in inputs.values() if t is not None])
    return subject(*[t for t in list(inputs.values()) + list(params.values())])


def _run(factory: Callable, job: dict, torch) -> dict:
    dtype = torch_dtype(job["dtype"])
    device, layout = job["device"], job["layout"]
    findings = []
    subject = factory(**job["layer"])
    as_module = isinstance(subject, torch.nn.Module)
    arrays = job["arrays"]
    inputs, params = {}, {}
    if as_module:
        subject = subject.to(device=device, dtype=dtype)
        subject.train(bool(job["params"].get("training", True)))
        owned = dict(subject.named_parameters())
        buffers = dict(subject.named_buffers())
        for name, value in arrays.items():
            if name in owned:
                if value is None:
                    raise ValueError(f"the layer has a parameter {name!r} but the configuration has none")
                if tuple(owned[name].shape) != value.shape:
                    raise ValueError(f"parameter {name!r} has shape {tuple(owned[name].shape)}, "
                                     f"expected {value.shape}")
                with torch.no_grad():
                    owned[name].copy_(torch.tensor(value, dtype=torch.float64))
                params[name] = owned[name]
            elif name in buffers and value is not None:
                with torch.no_grad():
                    buffers[name].copy_(torch.tensor(value, dtype=torch.float64))
            elif name in job["array_order"]:
                inputs[name] = None if value is None else _as_tensor(value, dtype, device, layout, True)
        for name, value in arrays.items():
            if value is None and name in owned and owned[name] is not None:
                raise ValueError(f"the configuration has no {name} but the layer has one")
    else:
        for name in job["array_order"]:
            value = arrays.get(name)
            inputs[name] = None if value is None else _as_tensor(value, dtype, device, layout, True)
    saved = {n: t.detach().clone() for n, t in {**inputs, **params}.items() if t is not None}
    cotangent = torch.tensor(job["cotangent"], dtype=torch.float64).to(device=device)
    output, grads = _forward_backward(subject, inputs, params, cotangent, as_module)
    for name, before in saved.items():
        now = {**inputs, **params}[name].detach()
        if not torch.equal(torch.nan_to_num(before), torch.nan_to_num(now)):
            findings.append(f"the subject changed its {name} in place")
    first = {"output": _to_numpy(output), **{n: None if g is None else _to_numpy(g) for n, g in grads.items()}}
    for name, before in saved.items():  # restore, so the second run sees the same values
        with torch.no_grad():
            {**inputs, **params}[name].copy_(before)
    output2, grads2 = _forward_backward(subject, inputs, params, cotangent, as_module)
    second = {"output": _to_numpy(output2), **{n: None if g is None else _to_numpy(g) for n, g in grads2.items()}}
    for name in first:
        a, b = first[name], second.get(name)
        if a is not None and b is not None and not np.array_equal(a, b, equal_nan=True):
            findings.append(f"not deterministic: {name} differs between two identical runs")
    if job.get("self_fd") and not findings and first["output"].shape == job["cotangent"].shape:
        findings.extend(_self_fd_findings(subject, inputs, params, as_module, first, job))
    result = {"output": first["output"], "output_dtype": str(output.dtype).replace("torch.", ""),
              "grads": {n: g for n, g in first.items() if n != "output"}, "findings": findings, "error": ""}
    if job.get("batch_alone"):
        result["alone"] = _first_sample_alone(subject, inputs, params, as_module)
    return result


def _first_sample_alone(subject, inputs: dict, params: dict, as_module: bool) -> np.ndarray:
    """The output for sample 0 of the first input run as a batch of one."""
    torch = _torch()
    first = next(iter(inputs))
    alone = {**inputs, first: inputs[first].detach()[:1]}
    with torch.no_grad():
        return _to_numpy(_call(subject, alone, params, as_module))
