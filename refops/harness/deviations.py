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


@functools.cache
def torch_conv2d_sums_weight_gradient_in(dtype: str) -> bool:
    """Whether this machine's torch CPU conv2d carries the weight gradient's sum over the batch in
    ``dtype`` (a half format) itself. Probe: 1x1 convolution of ones over a batch of 2**(p+1) + 1 samples (p the
    fraction bits), cotangent 1 for the first sample and a quarter ulp of 1 for the others; sums
    carried in float32 give exactly 1.5, sums carried in ``dtype`` stay at 1."""
    try:
        import torch
    except ImportError:
        return False
    from ..numerics.formats import get_format
    fraction_bits = get_format(dtype).fraction_bits
    if fraction_bits > 10:
        raise ValueError(f"dtype={dtype!r}: the probe is for half formats (float16, bfloat16)")
    format_ = getattr(torch, dtype)
    x = torch.ones(2 ** (fraction_bits + 1) + 1, 1, 1, 1, dtype=format_)
    conv = torch.nn.Conv2d(1, 1, 1, bias=False, dtype=format_)
    cotangent = torch.full((x.shape[0], 1, 1, 1), 2.0 ** -(fraction_bits + 2), dtype=format_)
    cotangent[0] = 1.0
    conv(x).backward(cotangent)
    return conv.weight.grad.item() != 1.5


DEVIATIONS = (
    Deviation("conv2d", ("float16", "bfloat16"), ("weight", "bias"), "io",
              "torch 2.13's CPU conv2d accumulates the weight and bias gradients in the half format "
              "on this machine (a probe saw it; on some CPUs bfloat16 uses float32); the bound for "
              "those tensors models sums in that format", seen=torch_conv2d_sums_weight_gradient_in),
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
