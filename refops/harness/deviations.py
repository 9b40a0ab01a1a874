"""Known deviations of frameworks from the oracles, declared once with their reasons.

A deviation never loosens a tolerance silently: it changes the model of *how* a tensor is
computed (for instance which format a reduction accumulates in) and every report lists the ones
it applied, separately from the verdicts.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Deviation:
    """``accumulate`` is the accumulation the bound models for ``tensors`` ("io" or "wide"), or
    ``"unsafe"``: the framework must not run such cases in the caller's process."""

    op: str
    dtypes: tuple[str, ...]
    tensors: tuple[str, ...]
    accumulate: str
    reason: str

    def applies(self, op: str, dtype: str, tensor: str) -> bool:
        return op == self.op and dtype in self.dtypes and tensor in self.tensors

    def describe(self) -> str:
        return f"{self.op} {'/'.join(self.dtypes)} {'/'.join(self.tensors)}: {self.reason}"


DEVIATIONS = (
    Deviation("conv2d", ("float16",), ("weight", "bias"), "io",
              "torch 2.13 CPU float16 conv2d accumulates the weight and bias gradients in float16 "
              "(bfloat16 uses float32); the bound for those tensors models float16 sums"),
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
