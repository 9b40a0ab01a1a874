"""Known deviations of frameworks from the oracles, declared once with their reasons.

A deviation never loosens a tolerance silently: it changes the model of *how* a tensor is
computed (for instance which format a reduction accumulates in) and every report lists the ones
it applied, separately from the verdicts.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Callable


@dataclass(frozen=True)
class Deviation:
    """``accumulate`` is the accumulation the bound models for ``tensors`` ("io" or "wide"), or
    ``"unsafe"``: the framework must not run such cases in the caller's process. ``seen``, when
    given, probes this machine's framework for a dtype: the deviation applies only where it is seen
    (kernels, and so their accumulation, differ between CPUs)."""

    op: str
    dtypes: tuple[str, ...]
    tensors: tuple[str, ...]
    accumulate: str
    reason: str
    seen: Callable[[str], bool] | None = None

    def applies(self, op: str, dtype: str, tensor: str) -> bool:
        return (op == self.op and dtype in self.dtypes and tensor in self.tensors
                and (self.seen is None or self.seen(dtype)))

    def describe(self) -> str:
        return f"{self.op} {'/'.join(self.dtypes)} {'/'.join(self.tensors)}: {self.reason}"


def _sums_in(dtype: str, gradient: Callable) -> bool:
    """Whether ``gradient(torch_format, terms, small)`` — a framework's sum of 1 and ``terms - 1``
    values ``small``, a quarter ulp of 1 — stays below 1.5, the float32 sum: then the framework
    carries that sum in ``dtype`` (a half format) itself. ``terms = 2**(p+1) + 1`` for p fraction
    bits, so any sum carried in the format loses some of the small terms."""
    try:
        import torch
    except ImportError:
        return False
    from ..numerics.formats import get_format
    fraction_bits = get_format(dtype).fraction_bits
    if fraction_bits > 10:
        raise ValueError(f"dtype={dtype!r}: the probe is for half formats (float16, bfloat16)")
    return gradient(getattr(torch, dtype), 2 ** (fraction_bits + 1) + 1, 2.0 ** -(fraction_bits + 2)) != 1.5


def _conv2d_weight_gradient(format_, terms: int, small: float) -> float:
    """1x1 convolution of ones over a batch of ``terms`` samples."""
    import torch
    conv = torch.nn.Conv2d(1, 1, 1, bias=False, dtype=format_)
    cotangent = torch.full((terms, 1, 1, 1), small, dtype=format_)
    cotangent[0] = 1.0
    conv(torch.ones(terms, 1, 1, 1, dtype=format_)).backward(cotangent)
    return conv.weight.grad.item()


def _layer_norm_bias_gradient(format_, terms: int, small: float) -> float:
    """Layer norm over 2 features of ``terms`` rows [-1, 1]."""
    import torch
    norm = torch.nn.LayerNorm(2, dtype=format_)
    cotangent = torch.full((terms, 2), small, dtype=format_)
    cotangent[0] = 1.0
    norm(torch.tensor([[-1.0, 1.0]] * terms, dtype=format_)).backward(cotangent)
    return norm.bias.grad[0].item()


@functools.cache
def torch_conv2d_sums_weight_gradient_in(dtype: str) -> bool:
    """Whether this machine's torch CPU conv2d sums the weight gradient over the batch in ``dtype``."""
    return _sums_in(dtype, _conv2d_weight_gradient)


@functools.cache
def torch_layer_norm_sums_affine_gradient_in(dtype: str) -> bool:
    """Whether this machine's torch CPU layer norm sums the bias gradient over rows in ``dtype``."""
    return _sums_in(dtype, _layer_norm_bias_gradient)


DEVIATIONS = (
    Deviation("conv2d", ("float16", "bfloat16"), ("weight", "bias"), "io",
              "torch 2.13's CPU conv2d accumulates the weight and bias gradients in the half format "
              "on this machine (a probe saw it; on some CPUs bfloat16 uses float32); the bound for "
              "those tensors models sums in that format", seen=torch_conv2d_sums_weight_gradient_in),
    Deviation("layer_norm", ("float16", "bfloat16"), ("weight", "bias"), "io",
              "torch 2.13's CPU layer norm sums the weight and bias gradients over rows in per-thread "
              "half-format buffers on this machine (a probe saw it); the bound for those tensors "
              "models sums in that format", seen=torch_layer_norm_sums_affine_gradient_in),
    Deviation("max_pool2d", ("float64", "float32", "float16", "bfloat16"), ("input",), "unsafe",
              "torch's CPU max-pool backward writes out of bounds when a window covers only padding "
              "(ceil_mode / dilation): such cases run only in a worker process (a TARGET string), "
              "and are skipped for a subject called in this process"),
)


def applicable(op: str, dtype: str, tensor: str, enabled: bool = True) -> Deviation | None:
    """The declared deviation for this tensor, if any (``enabled=False`` ignores them all)."""
    if not enabled:
        return None
    return next((d for d in DEVIATIONS if d.applies(op, dtype, tensor) and d.accumulate != "unsafe"), None)


def unsafe(op: str) -> Deviation | None:
    """The declared deviation that keeps ``op``'s padding-only-window cases out of this process."""
    return next((d for d in DEVIATIONS if d.op == op and d.accumulate == "unsafe"), None)
