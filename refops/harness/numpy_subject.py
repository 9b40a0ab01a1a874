"""A subject written in numpy: a forward and a user-supplied backward, callable on torch tensors.

``numpy_subject(forward, backward)`` returns a callable that the harness treats like any torch
subject: ``forward(*arrays) -> ndarray`` receives numpy arrays in the subject's format (bfloat16
arrives as float32 holding bfloat16 values), ``backward(grad, *arrays)`` returns one gradient per
array (``None`` for none). Results are rounded to the subject's format exactly once (torch's own
float64 -> float16/bfloat16 casts round twice, through float32).
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
import torch

from ..numerics.formats import round_to

_NUMPY = {torch.float64: np.float64, torch.float32: np.float32, torch.float16: np.float16,
          torch.bfloat16: np.float32}


def _to_numpy(t: torch.Tensor | None):
    if t is None:
        return None
    if not t.is_floating_point():
        return t.detach().cpu().numpy()
    return t.detach().to(torch.float64).cpu().numpy().astype(_NUMPY[t.dtype])


def _to_tensor(value, like: torch.Tensor) -> torch.Tensor:
    rounded = round_to(np.asarray(value, dtype=np.float64), str(like.dtype).replace("torch.", ""))
    return torch.from_numpy(rounded).to(dtype=like.dtype, device=like.device)


class _NumpyFunction(torch.autograd.Function):
    @staticmethod
    def forward(ctx, forward, backward, *tensors):
        arrays = [_to_numpy(t) for t in tensors]
        ctx.backward, ctx.arrays, ctx.tensors = backward, arrays, tensors
        return _to_tensor(forward(*arrays), next(t for t in tensors if t is not None))

    @staticmethod
    def backward(ctx, grad):
        grads: Sequence = ctx.backward(_to_numpy(grad), *ctx.arrays)
        if len(grads) != len(ctx.tensors):
            raise ValueError(f"the numpy backward returned {len(grads)} gradients for {len(ctx.tensors)} arrays")
        return (None, None, *[None if g is None or t is None else _to_tensor(g, t)
                              for g, t in zip(grads, ctx.tensors)])


def numpy_subject(forward: Callable[..., np.ndarray], backward: Callable[..., Sequence]) -> Callable:
    """A callable on torch tensors (the op's arrays, in order) running ``forward``/``backward``."""
    if not callable(forward) or not callable(backward):
        raise TypeError(f"forward={forward!r}, backward={backward!r}: expected two callables")

    def subject(*tensors):
        return _NumpyFunction.apply(forward, backward, *tensors)
    return subject
