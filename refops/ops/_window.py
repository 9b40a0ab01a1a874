"""The windowing primitive shared by convolution and pooling in 1, 2 and 3 spatial dims.

- :func:`padding_pairs` normalises every padding form (int, tuple, ``"same"``, ``"valid"``);
- :func:`output_size` is the one output-size rule;
- :func:`pad` / :func:`unpad` pad the trailing spatial dims (zeros or any constant, reflect,
  replicate, circular) and apply the adjoint of that padding;
- :func:`windows` turns ``(..., *spatial)`` into a read-only strided view ``(..., *out, *kernel)``;
- :func:`fold` is its adjoint, a scatter-add of ``(..., *out, *kernel)`` back onto ``(..., *spatial)``.

Convolution is pad + windows + GEMM; max pooling is pad with ``-inf`` + windows + max; average
pooling is pad + windows + sum / divisor. Their backward passes are fold + unpad.
"""
from __future__ import annotations

import itertools
from typing import Any, Sequence

import numpy as np
from numpy.lib.stride_tricks import as_strided

from . import _checks

PADDING_MODES = ("zeros", "reflect", "replicate", "circular")


def padding_pairs(padding: Any, n: int, *, kernel: Sequence[int], dilation: Sequence[int],
                  stride: Sequence[int]) -> tuple[tuple[int, int], ...]:
    """``(low, high)`` padding per spatial dim from an int, an ``n``-tuple, ``"same"`` or ``"valid"``.

    ``"same"`` pads ``dilation * (kernel - 1)`` in total, the odd extra element on the high
    (right/bottom) side; it requires stride 1.
    """
    if isinstance(padding, str):
        if padding == "valid":
            return ((0, 0),) * n
        if padding == "same":
            if any(s != 1 for s in stride):
                _checks.fail("padding", padding,
                             f"'same' needs stride=1 in every dimension, got stride={tuple(stride)}")
            totals = [d * (k - 1) for k, d in zip(kernel, dilation)]
            return tuple((t // 2, t - t // 2) for t in totals)
        _checks.fail("padding", padding, "expected an int, a tuple of ints, 'same' or 'valid'")
    return tuple((p, p) for p in _checks.as_int_tuple("padding", padding, n, min_value=0))


def output_size(size: int, kernel: int, stride: int, dilation: int, pad_low: int, pad_high: int,
                ceil_mode: bool = False) -> int:
    """Number of windows along one dim (Dumoulin & Visin 2016, relation 15, with dilation).

    ``floor((size + pad_low + pad_high - dilation * (kernel - 1) - 1) / stride) + 1``, rounded up
    instead with ``ceil_mode``, where a last window that would start in the high padding is
    dropped (the pooling convention). Returns a value < 1 when the kernel does not fit.
    """
    room = size + pad_low + pad_high - dilation * (kernel - 1) - 1
    if room < 0:
        return 0
    count = (-(-room // stride) if ceil_mode else room // stride) + 1
    if ceil_mode and (count - 1) * stride >= size + pad_low:
        count -= 1
    return count


def _source_index(size: int, low: int, high: int, mode: str) -> np.ndarray:
    """For each position of the padded axis, the input position it copies (non-zero modes)."""
    j = np.arange(-low, size + high)
    if mode == "replicate":
        return np.clip(j, 0, size - 1)
    if mode == "circular":
        return j % size
    period = 2 * (size - 1)  # reflect about the first and last element, without repeating them
    j = np.abs(j) % period if period else np.zeros_like(j)
    return np.where(j < size, j, period - j)


def pad(x: np.ndarray, pairs: Sequence[tuple[int, int]], mode: str = "zeros",
        value: float = 0.0, *, out: np.ndarray | None = None) -> np.ndarray:
    """Pad the trailing ``len(pairs)`` dims of ``x``; ``"zeros"`` pads with ``value``.

    Without ``out`` an unpadded ``x`` comes back as it is (no copy). With ``out`` (the padded
    shape) the result is written there: for ``"zeros"`` one copy of ``x`` into the interior and
    ``value`` into the border, no temporary, so a scratch buffer can be reused chunk after chunk.
    """
    lead = x.ndim - len(pairs)
    if out is None and all(lo == 0 and hi == 0 for lo, hi in pairs):
        return x
    if mode != "zeros":
        for axis, (lo, hi) in enumerate(pairs, start=lead):
            x = x.take(_source_index(x.shape[axis], lo, hi, mode), axis=axis)
        return x if out is None else _copied(out, x)
    if out is None:
        out = np.empty(x.shape[:lead] + tuple(n + lo + hi for n, (lo, hi) in zip(x.shape[lead:], pairs)))
    interior = tuple(slice(lo, lo + n) for n, (lo, _) in zip(x.shape[lead:], pairs))
    out[(Ellipsis, *interior)] = x
    for axis, (lo, hi) in enumerate(pairs):
        before = (slice(None),) * lead + interior[:axis]  # border slabs, each element written once
        out[(*before, slice(0, lo))] = value
        out[(*before, slice(lo + x.shape[lead + axis], None))] = value
    return out


def _copied(out: np.ndarray, x: np.ndarray) -> np.ndarray:
    np.copyto(out, x)
    return out


def unpad(g: np.ndarray, pairs: Sequence[tuple[int, int]], mode: str = "zeros", *,
          out: np.ndarray | None = None) -> np.ndarray:
    """The adjoint of :func:`pad`: the gradient with respect to the unpadded array.

    ``"zeros"`` crops every axis with one slice and one copy (into ``out`` when given); the other
    modes add each padded position back onto the input position it copied, axis by axis.
    """
    lead = g.ndim - len(pairs)
    if mode == "zeros":
        inner = g[(Ellipsis, *(slice(lo, n - hi) for n, (lo, hi) in zip(g.shape[lead:], pairs)))]
        return inner.copy() if out is None else _copied(out, inner)
    for axis, (lo, hi) in enumerate(pairs, start=lead):
        if lo == 0 and hi == 0:
            continue
        size = g.shape[axis] - lo - hi
        moved = np.moveaxis(g, axis, 0)
        inner = moved[lo:lo + size].copy()
        source = _source_index(size, lo, hi, mode)
        for j in itertools.chain(range(lo), range(lo + size, lo + size + hi)):
            inner[source[j]] += moved[j]
        g = np.moveaxis(inner, 0, axis)
    return g if out is None else _copied(out, g)


def windows(x: np.ndarray, kernel: Sequence[int], stride: Sequence[int],
            dilation: Sequence[int]) -> np.ndarray:
    """Read-only view ``(..., *out, *kernel)`` of the windows over the trailing dims of ``x``.

    ``view[..., o_1, .., o_n, j_1, .., j_n] = x[..., o_1 * s_1 + j_1 * d_1, ..]`` with
    ``out_i = floor((x.shape[-n + i] - d_i * (k_i - 1) - 1) / s_i) + 1``; pad first for padding.
    No data is copied; a GEMM over the view makes the im2col copy it needs.
    """
    n = len(kernel)
    spatial = x.shape[x.ndim - n:]
    out = tuple(output_size(size, k, s, d, 0, 0) for size, k, s, d in zip(spatial, kernel, stride, dilation))
    strides = x.strides[x.ndim - n:]
    return as_strided(x, shape=x.shape[:x.ndim - n] + out + tuple(kernel),
                      strides=x.strides[:x.ndim - n] + tuple(s * b for s, b in zip(stride, strides))
                      + tuple(d * b for d, b in zip(dilation, strides)),
                      writeable=False)


def fold(cols: np.ndarray, spatial: Sequence[int], stride: Sequence[int],
         dilation: Sequence[int], *, out: np.ndarray | None = None) -> np.ndarray:
    """Adjoint of :func:`windows`: scatter-add ``(..., *out, *kernel)`` onto ``(..., *spatial)``.

    One strided add per kernel offset, each vectorised over everything else; positions that no
    window covers stay zero. ``out`` (shape ``(..., *spatial)``) receives the result when given.
    """
    n = len(spatial)
    lead = cols.shape[:cols.ndim - 2 * n]
    windows_out = cols.shape[cols.ndim - 2 * n:cols.ndim - n]
    kernel = cols.shape[cols.ndim - n:]
    if out is None:
        out = np.zeros(lead + tuple(spatial), dtype=cols.dtype)
    else:
        out[...] = 0.0
    if 0 in windows_out:
        return out
    for offset in np.ndindex(*kernel):
        target = tuple(slice(j * d, j * d + (m - 1) * s + 1, s)
                       for j, d, m, s in zip(offset, dilation, windows_out, stride))
        out[(Ellipsis, *target)] += cols[(Ellipsis, *(slice(None),) * n, *offset)]
    return out
