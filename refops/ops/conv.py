"""Oracles of the conv family: conv1d, conv2d, conv3d and conv_transpose2d, one N-d core for all.

The core is three maps of a :class:`_Geometry` (how a convolution lays windows over its padded
input):

- :func:`_correlate`: pad, take windows, copy them into contiguous im2col blocks
  ``(batch, groups, C_in/groups * prod(kernel), prod(out))`` and multiply by the weight, one GEMM
  per sample and group, written straight into the NCHW output;
- :func:`_correlate_adjoint`: its adjoint in the input, a GEMM with the transposed weight followed
  by a fold (scatter-add) and an unpad;
- :func:`_weight_gradient`: its adjoint in the weight, a GEMM of the cotangent with the im2col
  blocks.

Convolution is ``_correlate``; its input gradient is ``_correlate_adjoint``. Transposed convolution
is ``_correlate_adjoint`` of the convolution it transposes; its input gradient is ``_correlate``.
Every map works through the batch in chunks so that its scratch memory stays below
:func:`set_memory_limit` (256 MiB by default), whatever the batch size.
"""
from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import partial
from typing import Callable, Iterator

import numpy as np

from . import _checks, _window
from ._registry import CaseConfig, register
from .linear import BilinearLayer

__all__ = ["conv1d", "conv2d", "conv3d", "conv_transpose2d", "get_memory_limit", "set_memory_limit"]

_memory_limit = 256 * 2 ** 20


def set_memory_limit(nbytes: int) -> int:
    """Bound the scratch memory (bytes) of one convolution map; returns the previous bound.

    The maps process as many samples at a time as fit in the bound (at least one: a single sample
    whose im2col block is larger than the bound is processed alone). The default is 256 MiB.
    """
    global _memory_limit
    previous = _memory_limit
    _memory_limit = _checks.as_int("nbytes", nbytes, min_value=1)
    return previous


def get_memory_limit() -> int:
    """The current scratch-memory bound (bytes) of one convolution map."""
    return _memory_limit


# ---------------------------------------------------------------------------------------------
# geometry

@dataclass(frozen=True)
class _Geometry:
    """A convolution from ``(N, groups * in_group, *spatial)`` to ``(N, C_out, *out)``."""

    spatial: tuple[int, ...]
    pairs: tuple[tuple[int, int], ...]
    kernel: tuple[int, ...]
    stride: tuple[int, ...]
    dilation: tuple[int, ...]
    groups: int
    mode: str
    out: tuple[int, ...]

    @property
    def padded(self) -> tuple[int, ...]:
        return tuple(n + lo + hi for n, (lo, hi) in zip(self.spatial, self.pairs))

    @property
    def extent(self) -> tuple[int, ...]:
        """The part of the padded input that the windows read (the rest gets no weight)."""
        return tuple((o - 1) * s + d * (k - 1) + 1
                     for o, s, d, k in zip(self.out, self.stride, self.dilation, self.kernel))

    def per_sample_bytes(self, channels: int, out_channels: int) -> int:
        """Scratch per sample: the im2col block, the padded copy (with a non-zero padding mode also
        the two gathers that make it), the per-sample weight products."""
        block = channels * math.prod(self.kernel) * math.prod(self.out)
        padded = channels * math.prod(self.padded) * (1 if self.mode == "zeros" else 3)
        return 8 * (block + padded + out_channels * channels // self.groups * math.prod(self.kernel))


def _conv_geometry(input_shape, weight_shape, *, stride, padding, dilation, groups,
                   padding_mode) -> _Geometry:
    spatial, kernel = tuple(input_shape[2:]), tuple(weight_shape[2:])
    out = tuple(_window.output_size(n, k, s, d, lo, hi)
                for n, k, s, d, (lo, hi) in zip(spatial, kernel, stride, dilation, padding))
    return _Geometry(spatial, padding, kernel, stride, dilation, groups, padding_mode, out)


def _transpose_geometry(input_shape, weight_shape, *, stride, padding, output_padding, groups,
                        dilation) -> _Geometry:
    """The convolution that ``conv_transpose`` transposes: from its output back to its input."""
    out, kernel = tuple(input_shape[2:]), tuple(weight_shape[2:])
    spatial = tuple((o - 1) * s - lo - hi + d * (k - 1) + a + 1
                    for o, s, (lo, hi), d, k, a in zip(out, stride, padding, dilation, kernel,
                                                        output_padding))
    return _Geometry(spatial, padding, kernel, stride, dilation, groups, "zeros", out)


def _chunks(total: int, size: int) -> Iterator[slice]:
    for start in range(0, total, size):
        yield slice(start, min(start + size, total))


def _chunk_size(per_sample: int, fixed: int) -> int:
    """Samples per chunk: ``fixed + samples * per_sample`` bytes within the memory bound and
    within :data:`_WORKING_SET`, at least one sample."""
    return max(1, (min(_memory_limit, _WORKING_SET) - fixed) // max(per_sample, 1))


# ---------------------------------------------------------------------------------------------
# memory-bound passes on all cores

_WORKING_SET = 16 * 2 ** 20  # chunks this small stay in the last-level cache between passes
_PARALLEL_BYTES = 2 ** 20  # below this a pass runs in the calling thread
_BOOKKEEPING = 16 * 2 ** 10  # Python objects of one map (tasks, futures, views)
_pool: ThreadPoolExecutor | None = None


def _workers() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def _in_parallel(task: Callable[[tuple], None], lead: tuple[int, int], nbytes: int, *,
                 axis: int | None = None) -> None:
    """Run ``task(index)`` on disjoint pieces of the leading ``(batch, channels)`` axes.

    numpy releases the GIL in copies and ufunc loops, so the pieces of a memory-bound pass run on
    all cores while BLAS is idle; a pass smaller than ``_PARALLEL_BYTES`` runs here. ``axis``
    forces the split along samples (0) or channels (1); by default the longer one.
    """
    global _pool
    workers = _workers()
    if axis is None:
        axis = 0 if lead[0] >= workers or lead[0] >= lead[1] else 1
    if workers == 1 or nbytes < _PARALLEL_BYTES or lead[axis] == 1:
        task((slice(None),))
        return
    bounds = np.linspace(0, lead[axis], min(workers, lead[axis]) + 1).astype(int)
    pieces = [(slice(None),) * axis + (slice(a, b),) for a, b in zip(bounds[:-1], bounds[1:])]
    if _pool is None:
        _pool = ThreadPoolExecutor(workers, thread_name_prefix="refops-conv")
    for done in [_pool.submit(task, piece) for piece in pieces]:
        done.result()


class _Blocks:
    """Scratch reused by every chunk of one map: the padded chunk and its im2col block.

    ``cols(b)`` is the block of the first ``b`` samples as ``(b, groups, C/groups * prod(kernel),
    prod(out))``; :meth:`im2col` fills it from an input chunk, :meth:`col2im` scatters it back.
    A depthwise map (one input and one output channel per group) has no block: :meth:`contract`
    sums the scaled windows instead, since a one-row GEMM per group would only stream the block.
    """

    def __init__(self, geo: _Geometry, channels: int, samples: int, *, direct: bool = False):
        self.geo = geo
        self.padded = (np.empty((samples, channels) + geo.padded)
                       if any(lo or hi for lo, hi in geo.pairs) else None)
        self.block = None if direct else np.empty((samples, channels) + geo.kernel + geo.out)

    def cols(self, b: int) -> np.ndarray:
        return self.block[:b].reshape(b, self.geo.groups, -1, math.prod(self.geo.out))

    def _by_window(self, b: int) -> np.ndarray:
        """The block as ``(b, C, *out, *kernel)``, the layout of :func:`_window.windows`."""
        n = len(self.geo.kernel)
        return self.block[:b].transpose(0, 1, *range(2 + n, 2 + 2 * n), *range(2, 2 + n))

    def _padded(self, b: int, index: tuple) -> np.ndarray | None:
        return None if self.padded is None else self.padded[:b][index]

    def _windows(self, x: np.ndarray, index: tuple) -> np.ndarray:
        """The ``(b, C, *out, *kernel)`` windows of ``x[index]``, padded into the scratch."""
        geo = self.geo
        padded = _window.pad(x[index], geo.pairs, geo.mode, out=self._padded(x.shape[0], index))
        read = padded[(Ellipsis, *(slice(0, e) for e in geo.extent))]
        return _window.windows(read, geo.kernel, geo.stride, geo.dilation)

    def im2col(self, x: np.ndarray) -> np.ndarray:
        """Pad ``x`` and copy its windows into the block; returns ``cols(len(x))``."""
        b = x.shape[0]
        cols = self._by_window(b)
        _in_parallel(lambda index: np.copyto(cols[index], self._windows(x, index)), x.shape[:2],
                     cols.nbytes)
        return self.cols(b)

    def contract(self, x: np.ndarray, w: np.ndarray, out: np.ndarray) -> None:
        """Depthwise ``out[n, c, p] = sum_j w[c, j] * windows(x)[n, c, p, j]``, one scaled window
        per kernel offset; ``w`` is ``(C, prod(kernel))``, ``out`` ``(b, C, *out)``."""
        n = len(self.geo.kernel)

        def accumulate(index: tuple) -> None:
            view, target = self._windows(x, index), out[index]
            taps = w[index[1] if len(index) > 1 else slice(None)].reshape((-1,) + self.geo.kernel)
            term = np.empty_like(target)
            for j, offset in enumerate(np.ndindex(*self.geo.kernel)):
                scale = taps[(Ellipsis, *offset)].reshape((-1,) + (1,) * n)
                np.multiply(view[(Ellipsis, *offset)], scale, out=target if j == 0 else term)
                if j:
                    target += term

        _in_parallel(accumulate, x.shape[:2], out.nbytes, axis=1)

    def contract_weight(self, x: np.ndarray, g: np.ndarray, total: np.ndarray) -> None:
        """Depthwise ``total[c, j] += sum_{n, p} g[n, c, p] * windows(x)[n, c, p, j]``, one
        contraction per kernel offset; ``total`` is ``(C, *kernel)``, ``g`` ``(b, C, *out)``."""
        space = "pqr"[:len(self.geo.kernel)]

        def accumulate(index: tuple) -> None:
            view, target = self._windows(x, index), total[index[1] if len(index) > 1 else slice(None)]
            for offset in np.ndindex(*self.geo.kernel):
                target[(Ellipsis, *offset)] += np.einsum(f"nc{space},nc{space}->c", g[index],
                                                         view[(Ellipsis, *offset)])

        _in_parallel(accumulate, x.shape[:2], g.nbytes, axis=1)

    def col2im(self, result: np.ndarray) -> None:
        """Scatter-add the block of ``len(result)`` samples onto the input: fold, then unpad."""
        b, geo = result.shape[0], self.geo
        cols = self._by_window(b)

        def scatter(index: tuple) -> None:
            padded = self._padded(b, index)
            if padded is None:
                _window.fold(cols[index], geo.spatial, geo.stride, geo.dilation, out=result[index])
            else:
                _window.fold(cols[index], geo.padded, geo.stride, geo.dilation, out=padded)
                _window.unpad(padded, geo.pairs, geo.mode, out=result[index])

        _in_parallel(scatter, result.shape[:2], cols.nbytes)


# ---------------------------------------------------------------------------------------------
# the three maps

def _grouped(w: np.ndarray, groups: int) -> np.ndarray:
    """The weight as ``(groups, C_out/groups, C_in/groups * prod(kernel))``."""
    return w.reshape(groups, w.shape[0] // groups, -1)


def _scratch(geo: _Geometry, batch: int, channels: int, out_channels: int, *,
             direct: bool = False) -> tuple[int, _Blocks]:
    """The chunk size of a map and its scratch.

    Besides the per-sample scratch a map holds two weight-sized arrays (a flipped weight, a
    chunk's summed weight products), the bookkeeping of the worker threads and, per worker, the
    buffers of a strided ufunc loop (up to three operands of ``numpy.getbufsize()`` elements).
    """
    weight = 8 * out_channels * channels // geo.groups * math.prod(geo.kernel)
    buffers = _workers() * 3 * 8 * np.getbufsize()
    size = _chunk_size(geo.per_sample_bytes(channels, out_channels),
                       2 * weight + buffers + _BOOKKEEPING)
    return size, _Blocks(geo, channels, min(size, batch), direct=direct)


def _depthwise(w: np.ndarray, groups: int) -> bool:
    """One input and one output channel per group."""
    return w.shape[0] == groups and w.shape[1] == 1


def _correlate(x: np.ndarray, w: np.ndarray, geo: _Geometry) -> np.ndarray:
    """``out[n, o, p] = sum_{c, j} w[o, c, j] * padded_x[n, group(o) c, p * stride + j * dilation]``."""
    batch, channels = x.shape[:2]
    out = np.empty((batch, w.shape[0]) + geo.out)
    wg = _grouped(w, geo.groups)
    direct = _depthwise(w, geo.groups)
    size, blocks = _scratch(geo, batch, channels, w.shape[0], direct=direct)
    for part in _chunks(batch, size):
        if direct:
            blocks.contract(x[part], wg.reshape(channels, -1), out[part])
        else:
            target = out[part].reshape(-1, geo.groups, wg.shape[1], math.prod(geo.out))
            np.matmul(wg, blocks.im2col(x[part]), out=target)
    return out


def _correlate_adjoint(g: np.ndarray, w: np.ndarray, geo: _Geometry) -> np.ndarray:
    """The adjoint of :func:`_correlate` in ``x``.

    With stride 1 and zero padding it is itself a correlation (:func:`_full_correlation`), used
    when its im2col block (``C_out`` channels over the input positions) is no larger than the
    fold's (``C_in`` channels over the output positions); otherwise a GEMM with the transposed
    weight, a fold and an unpad.
    """
    batch, channels = g.shape[0], geo.groups * w.shape[1]
    if (geo.mode == "zeros" and all(s == 1 for s in geo.stride)
            and w.shape[0] * math.prod(geo.spatial) <= channels * math.prod(geo.out)):
        return _full_correlation(g, w, geo)
    result = np.empty((batch, channels) + geo.spatial)
    wt = _grouped(w, geo.groups).transpose(0, 2, 1)
    size, blocks = _scratch(geo, batch, channels, w.shape[0])
    for part in _chunks(batch, size):
        gc = g[part].reshape(-1, geo.groups, wt.shape[2], math.prod(geo.out))
        np.matmul(wt, gc, out=blocks.cols(gc.shape[0]))
        blocks.col2im(result[part])
    return result


def _full_correlation(g: np.ndarray, w: np.ndarray, geo: _Geometry) -> np.ndarray:
    """Stride-1, zero-padded adjoint: correlate ``g``, padded by ``dilation * (k - 1) - pad_low``
    below and ``size + pad_low - out`` above (``dilation * (k - 1) - pad_high`` when the windows
    reach the end of the padded input; a negative amount crops), with the kernel flipped and its
    channel axes exchanged.

    ``grad_x[n, c, i] = sum_{o, j} w[o, c, j] g[n, o, i + pad_low - j * dilation]``; substituting
    ``j -> k - 1 - j`` makes it a correlation of that padded ``g`` with stride 1.
    """
    n = len(geo.kernel)
    reach = [d * (k - 1) for k, d in zip(geo.kernel, geo.dilation)]
    amounts = [(r - lo, size + lo - out) for r, (lo, _), size, out
               in zip(reach, geo.pairs, geo.spatial, geo.out)]
    g = g[(Ellipsis, *(slice(max(0, -lo), size - max(0, -hi))
                       for size, (lo, hi) in zip(geo.out, amounts)))]
    pairs = tuple((max(0, lo), max(0, hi)) for lo, hi in amounts)
    full = _conv_geometry(g.shape, w.shape, stride=(1,) * n, padding=pairs, dilation=geo.dilation,
                          groups=geo.groups, padding_mode="zeros")
    return _correlate(g, _flipped_transpose(w, geo.groups), full)


def _flipped_transpose(w: np.ndarray, groups: int) -> np.ndarray:
    """``(C_out, C_in/groups, *k)`` -> ``(C_in, C_out/groups, *k)``, each kernel reversed."""
    out_channels, in_group, kernel = w.shape[0], w.shape[1], w.shape[2:]
    swapped = w.reshape((groups, out_channels // groups, in_group) + kernel).swapaxes(1, 2)
    flipped = swapped[(Ellipsis, *(slice(None, None, -1),) * len(kernel))]
    return flipped.reshape((groups * in_group, out_channels // groups) + kernel)


def _weight_gradient(x: np.ndarray, g: np.ndarray, geo: _Geometry) -> np.ndarray:
    """The adjoint of :func:`_correlate` in ``w``: sum over samples of ``g_n cols_n^T``."""
    batch, channels = x.shape[:2]
    out_channels = g.shape[1]
    total = np.zeros((geo.groups, out_channels // geo.groups,
                      channels // geo.groups * math.prod(geo.kernel)))
    direct = out_channels == channels == geo.groups
    size, blocks = _scratch(geo, batch, channels, out_channels, direct=direct)
    for part in _chunks(batch, size):
        if direct:
            blocks.contract_weight(x[part], g[part], total.reshape((channels,) + geo.kernel))
            continue
        cols = blocks.im2col(x[part])
        gc = g[part].reshape(cols.shape[0], geo.groups, -1, cols.shape[-1])
        total += np.matmul(gc, cols.transpose(0, 1, 3, 2)).sum(axis=0)
    return total.reshape((out_channels, channels // geo.groups) + geo.kernel)


def _conv_layer(geo: _Geometry) -> BilinearLayer:
    return BilinearLayer(partial(_correlate, geo=geo),
                         lambda g, w: _correlate_adjoint(g, w, geo),
                         partial(_weight_gradient, geo=geo),
                         channel_axis=1, input_accumulate="io")


def _transpose_layer(geo: _Geometry) -> BilinearLayer:
    return BilinearLayer(lambda x, w: _correlate_adjoint(x, w, geo),
                         partial(_correlate, geo=geo),
                         lambda x, g: _weight_gradient(g, x, geo),
                         channel_axis=1, forward_accumulate="io", input_accumulate="wide")


# ---------------------------------------------------------------------------------------------
# validation

def _check_arrays(x, w, bias, rank: int, weight_layout: str) -> None:
    spatial = ("L",) if rank == 1 else ("D", "H", "W")[3 - rank:]
    _checks.check_rank("input", x, (rank + 2,), f"(N, C_in, {', '.join(spatial)})")
    _checks.check_rank("weight", w, (rank + 2,), f"({weight_layout}, {', '.join('k' + s.lower() for s in spatial)})")
    if min(w.shape) < 1:
        _checks.fail("weight", w, "every dimension (channels and kernel sizes) must be >= 1")
    if x.shape[1] < 1:
        _checks.fail("input", x, "input.shape[1] (channels) must be >= 1")


def _check_groups(groups: int, channels: dict[str, int]) -> None:
    for what, count in channels.items():
        if count % groups:
            _checks.fail("groups", groups, f"must divide {what} = {count}")


def _check_bias(bias, channels: int, source: str) -> None:
    if bias is not None:
        _checks.check_shape("bias", bias, (channels,), f"C_out = {source}")


def _check_padding_limits(pairs, spatial, mode: str) -> None:
    """torch's limits: reflect needs padding < size, circular padding <= size."""
    for pad, size in zip(pairs, spatial):
        if mode == "reflect" and max(pad) >= size:
            _checks.fail("padding", pairs, f"with padding_mode='reflect' every padding must be "
                         f"< the input size {tuple(spatial)} in its dimension")
        if mode == "circular" and max(pad) > size:
            _checks.fail("padding", pairs, f"with padding_mode='circular' every padding must be "
                         f"<= the input size {tuple(spatial)} in its dimension")


def _check_kernel_fits(w, geo: _Geometry) -> None:
    dilated = tuple(d * (k - 1) + 1 for k, d in zip(geo.kernel, geo.dilation))
    if any(e > p for e, p in zip(dilated, geo.padded)):
        _checks.fail("weight", w, f"the dilated kernel size {dilated} is larger than the padded "
                     f"input size {geo.padded}")


def _validate_conv(arrays: dict, params: dict, *, rank: int) -> dict:
    x, w, bias = arrays["input"], arrays["weight"], arrays["bias"]
    _check_arrays(x, w, bias, rank, "C_out, C_in/groups")
    stride = _checks.as_int_tuple("stride", params["stride"], rank, min_value=1)
    dilation = _checks.as_int_tuple("dilation", params["dilation"], rank, min_value=1)
    groups = _checks.as_int("groups", params["groups"], min_value=1)
    mode = _checks.as_choice("padding_mode", params["padding_mode"], _window.PADDING_MODES)
    kernel = w.shape[2:]
    pairs = _window.padding_pairs(params["padding"], rank, kernel=kernel, dilation=dilation,
                                  stride=stride)
    _check_groups(groups, {"input.shape[1] (C_in)": x.shape[1], "weight.shape[0] (C_out)": w.shape[0]})
    if w.shape[1] != x.shape[1] // groups:
        _checks.fail("weight", w, f"weight.shape[1]={w.shape[1]} must equal input.shape[1] // groups "
                     f"= {x.shape[1]} // {groups} = {x.shape[1] // groups}")
    _check_bias(bias, w.shape[0], "weight.shape[0]")
    _check_padding_limits(pairs, x.shape[2:], mode)
    normal = dict(stride=stride, padding=pairs, dilation=dilation, groups=groups, padding_mode=mode)
    _check_kernel_fits(w, _conv_geometry(x.shape, w.shape, **normal))
    return normal


def _validate_transpose(arrays: dict, params: dict, *, rank: int) -> dict:
    x, w, bias = arrays["input"], arrays["weight"], arrays["bias"]
    _check_arrays(x, w, bias, rank, "C_in, C_out/groups")
    stride = _checks.as_int_tuple("stride", params["stride"], rank, min_value=1)
    dilation = _checks.as_int_tuple("dilation", params["dilation"], rank, min_value=1)
    groups = _checks.as_int("groups", params["groups"], min_value=1)
    if isinstance(params["padding"], str):
        _checks.fail("padding", params["padding"], "expected an int or a tuple of ints "
                     "(transposed convolution has no 'same' or 'valid')", TypeError)
    pairs = _window.padding_pairs(params["padding"], rank, kernel=w.shape[2:], dilation=dilation,
                                  stride=stride)
    output_padding = _checks.as_int_tuple("output_padding", params["output_padding"], rank, min_value=0)
    if any(a >= max(s, d) for a, s, d in zip(output_padding, stride, dilation)):
        _checks.fail("output_padding", params["output_padding"],
                     f"every entry must be smaller than stride={stride} or dilation={dilation} "
                     "in its dimension")
    if w.shape[0] != x.shape[1]:
        _checks.fail("weight", w, f"weight.shape[0]={w.shape[0]} must equal input.shape[1] "
                     f"(C_in) = {x.shape[1]}")
    _check_groups(groups, {"input.shape[1] (C_in)": x.shape[1]})
    _check_bias(bias, w.shape[1] * groups, "groups * weight.shape[1]")
    normal = dict(stride=stride, padding=pairs, output_padding=output_padding, groups=groups,
                  dilation=dilation)
    geo = _transpose_geometry(x.shape, w.shape, **normal)
    if min(geo.spatial) < 1:
        _checks.fail("padding", params["padding"], f"leaves an output size {geo.spatial}; every "
                     "size must be >= 1")
    return normal


def _conv_output_shape(arrays: dict, params: dict) -> tuple[int, ...]:
    geo = _conv_geometry(arrays["input"].shape, arrays["weight"].shape, **params)
    return (arrays["input"].shape[0], arrays["weight"].shape[0]) + geo.out


def _transpose_output_shape(arrays: dict, params: dict) -> tuple[int, ...]:
    x, w = arrays["input"], arrays["weight"]
    geo = _transpose_geometry(x.shape, w.shape, **params)
    return (x.shape[0], w.shape[1] * params["groups"]) + geo.spatial


# ---------------------------------------------------------------------------------------------
# configuration spaces

_SIZE_NAMES = {1: ("length",), 2: ("height", "width"), 3: ("depth", "height", "width")}
_SIZE_CAP = {1: 12, 2: 10, 3: 6}


def _options(values: tuple[int, ...], rank: int) -> list:
    """Ints first (the first is the edge value), then a few per-dimension tuples."""
    options: list = list(values)
    if rank > 1:
        options += [tuple(values[(i + j) % len(values)] for j in range(rank))
                    for i in range(min(len(values), 3))]
    return options


def _draw_tuple(draw, name: str, values: tuple[int, ...], rank: int) -> tuple[int, ...]:
    return _checks.as_int_tuple(name, draw.choice(name, _options(values, rank)), rank, min_value=0)


def _draw_channels(draw) -> tuple[int, int, int]:
    """in_channels, groups (1 and depthwise listed first), out_channels: divisible by construction."""
    in_channels = draw.integer("in_channels", 1, 6)
    divisors = [g for g in range(2, in_channels) if in_channels % g == 0]
    groups = draw.choice("groups", list(dict.fromkeys([1, in_channels, *divisors])))
    limit = max(6 // groups, 1)
    out_channels = draw.choice("out_channels", [groups * m for m in range(1, limit + 1)])
    return in_channels, groups, out_channels


def _draw_sizes(draw, rank: int, low: list[int]) -> tuple[int, ...]:
    return tuple(draw.integer(name, lo, max(lo, _SIZE_CAP[rank]))
                 for name, lo in zip(_SIZE_NAMES[rank], low))


def _conv_space(draw, *, rank: int) -> CaseConfig:
    in_channels, groups, out_channels = _draw_channels(draw)
    kernel = _draw_tuple(draw, "kernel_size", (1, 3, 2, 4, 5), rank)
    stride = _draw_tuple(draw, "stride", (1, 2, 3), rank)
    dilation = _draw_tuple(draw, "dilation", (1, 2, 3), rank)
    padding_mode = draw.choice("padding_mode", list(_window.PADDING_MODES))
    # With stride 1, "same" is the edge value: an even kernel or odd dilation pads unevenly.
    same = ["same"] if set(stride) == {1} else []
    padding = draw.choice("padding", same + _options((0, 1, 2), rank) + ["valid"])
    pairs = _window.padding_pairs(padding, rank, kernel=kernel, dilation=dilation, stride=stride)
    low = [max(1, d * (k - 1) + 1 - lo - hi, max(lo, hi) + (padding_mode == "reflect"))
           for k, d, (lo, hi) in zip(kernel, dilation, pairs)]
    sizes = _draw_sizes(draw, rank, low)
    batch = draw.integer("batch", 1, 4)
    bias = draw.choice("bias", [True, False])
    layer = dict(in_channels=in_channels, out_channels=out_channels, kernel_size=kernel,
                 stride=stride, padding=padding, dilation=dilation, groups=groups, bias=bias,
                 padding_mode=padding_mode)
    shapes = dict(input=(batch, in_channels) + sizes,
                  weight=(out_channels, in_channels // groups) + kernel,
                  bias=(out_channels,) if bias else None)
    params = dict(stride=stride, padding=padding, dilation=dilation, groups=groups,
                  padding_mode=padding_mode)
    return CaseConfig(layer=layer, params=params, shapes=shapes, bounds={},
                      drawn={**layer, **dict(zip(_SIZE_NAMES[rank], sizes)), "batch": batch})


def _transpose_space(draw, *, rank: int) -> CaseConfig:
    in_channels, groups, out_channels = _draw_channels(draw)
    kernel = _draw_tuple(draw, "kernel_size", (1, 3, 2, 4), rank)
    stride = _draw_tuple(draw, "stride", (1, 2, 3), rank)
    dilation = _draw_tuple(draw, "dilation", (1, 2, 3), rank)
    padding = _draw_tuple(draw, "padding", (0, 1, 2), rank)
    room = min(max(s, d) for s, d in zip(stride, dilation))
    output_padding = _checks.as_int_tuple("output_padding", draw.choice(
        "output_padding", list(range(room)) + ([tuple(max(s, d) - 1 for s, d in zip(stride, dilation))]
                                               if rank > 1 else [])), rank, min_value=0)
    low = [max(1, 1 - (-(2 * p - d * (k - 1) - a) // s)) for p, d, k, a, s
           in zip(padding, dilation, kernel, output_padding, stride)]
    sizes = _draw_sizes(draw, rank, low)
    batch = draw.integer("batch", 1, 4)
    bias = draw.choice("bias", [True, False])
    layer = dict(in_channels=in_channels, out_channels=out_channels, kernel_size=kernel,
                 stride=stride, padding=padding, output_padding=output_padding, groups=groups,
                 bias=bias, dilation=dilation)
    shapes = dict(input=(batch, in_channels) + sizes,
                  weight=(in_channels, out_channels // groups) + kernel,
                  bias=(out_channels,) if bias else None)
    params = dict(stride=stride, padding=padding, output_padding=output_padding, groups=groups,
                  dilation=dilation)
    return CaseConfig(layer=layer, params=params, shapes=shapes, bounds={},
                      drawn={**layer, **dict(zip(_SIZE_NAMES[rank], sizes)), "batch": batch})


# ---------------------------------------------------------------------------------------------
# registered ops

def _conv_vjp(g, input, weight, bias=None, **params):
    return _conv_layer(_conv_geometry(input.shape, weight.shape, **params)).vjp(g, input, weight, bias)


def _conv_error_terms(g, input, weight, bias=None, **params):
    layer = _conv_layer(_conv_geometry(input.shape, weight.shape, **params))
    return layer.error_terms(g, input, weight, bias)


def _conv_forward(input, weight, bias, **params):
    return _conv_layer(_conv_geometry(input.shape, weight.shape, **params)).output(input, weight, bias)


_CONV_DOC = """{rank}-d cross-correlation (no kernel flip) of ``(N, C_in, {dims})`` inputs.

    Parameters
    ----------
    input : array (N, C_in, {dims})
    weight : array (C_out, C_in / groups, {kdims})
    bias : array (C_out,) or None
    stride, dilation : int or tuple of {rank} ints, each >= 1
    padding : int, tuple of {rank} ints (>= 0), ``"valid"`` (none) or ``"same"`` (stride 1 only;
        ``dilation * (k - 1)`` in total, the odd element on the high side)
    groups : int dividing C_in and C_out
    padding_mode : ``"zeros"``, ``"reflect"`` (padding < size), ``"replicate"`` or
        ``"circular"`` (padding <= size)

    Formula
    -------
    ``y[n, o, p] = bias[o] + sum_c sum_j weight[o, c, j] *
    xpad[n, (o // (C_out / groups)) * (C_in / groups) + c, p * stride + j * dilation]``
    with ``xpad`` the padded input and ``p``, ``j`` multi-indices over {dims} and {kdims}.
    vjp: ``grad_input`` is the transposed convolution of ``g`` (a GEMM with the transposed weight,
    a fold and the adjoint of the padding), ``grad_weight[o, c, j] = sum_{{n, p}} g[n, o, p] *
    xpad[n, .., p * stride + j * dilation]``, ``grad_bias = g`` summed over batch and space.

    Output shape
    ------------
    ``(N, C_out, *out)`` with ``out_i = floor((size_i + pad_low_i + pad_high_i
    - dilation_i * (k_i - 1) - 1) / stride_i) + 1`` (Dumoulin & Visin 2016).

    Non-differentiable points
    -------------------------
    none (the map is bilinear in input and weight).

    Notes
    -----
    Runs as one GEMM per sample and group over contiguous im2col blocks, the batch processed in
    chunks whose scratch memory stays below :func:`refops.ops.set_memory_limit`.
    Error terms: M is the same map on absolute values, k the same map on ones (+1 with a bias),
    so border elements count only their real terms; the forward and the weight and bias
    gradients accumulate ``"wide"``, the input gradient (a scatter-add) ``"io"``.
    """


def _conv_documented(rank: int, dims: str):
    def set_doc(forward):
        kdims = ", ".join("k" + d.lower() for d in dims.split(", "))
        forward.__doc__ = _CONV_DOC.format(rank=rank, dims=dims, kdims=kdims)
        return forward
    return set_doc


def _register_conv(rank: int):
    return register(vjp=_conv_vjp, validate=partial(_validate_conv, rank=rank),
                    space=partial(_conv_space, rank=rank), error_terms=_conv_error_terms,
                    output_shape=_conv_output_shape)


@_register_conv(1)
@_conv_documented(1, "L")
def conv1d(input, weight, bias=None, *, stride=1, padding=0, dilation=1, groups=1,
           padding_mode="zeros"):
    return _conv_forward(input, weight, bias, stride=stride, padding=padding, dilation=dilation,
                         groups=groups, padding_mode=padding_mode)


@_register_conv(2)
@_conv_documented(2, "H, W")
def conv2d(input, weight, bias=None, *, stride=1, padding=0, dilation=1, groups=1,
           padding_mode="zeros"):
    return _conv_forward(input, weight, bias, stride=stride, padding=padding, dilation=dilation,
                         groups=groups, padding_mode=padding_mode)


@_register_conv(3)
@_conv_documented(3, "D, H, W")
def conv3d(input, weight, bias=None, *, stride=1, padding=0, dilation=1, groups=1,
           padding_mode="zeros"):
    return _conv_forward(input, weight, bias, stride=stride, padding=padding, dilation=dilation,
                         groups=groups, padding_mode=padding_mode)


def _transpose_vjp(g, input, weight, bias=None, **params):
    layer = _transpose_layer(_transpose_geometry(input.shape, weight.shape, **params))
    return layer.vjp(g, input, weight, bias)


def _transpose_error_terms(g, input, weight, bias=None, **params):
    layer = _transpose_layer(_transpose_geometry(input.shape, weight.shape, **params))
    return layer.error_terms(g, input, weight, bias)


@register(vjp=_transpose_vjp, validate=partial(_validate_transpose, rank=2),
          space=partial(_transpose_space, rank=2), error_terms=_transpose_error_terms,
          output_shape=_transpose_output_shape)
def conv_transpose2d(input, weight, bias=None, *, stride=1, padding=0, output_padding=0, groups=1,
                     dilation=1):
    """2-d transposed convolution: the adjoint (input gradient) of conv2d, plus a bias.

    Parameters
    ----------
    input : array (N, C_in, H, W)
    weight : array (C_in, C_out / groups, kh, kw)
    bias : array (C_out,) or None
    stride, dilation : int or pair of ints, each >= 1
    padding : int or pair of ints >= 0, cropped from both sides of the full result
    output_padding : int or pair of ints, each smaller than stride or dilation in its dimension;
        extra size on the high side
    groups : int dividing C_in and C_out

    Formula
    -------
    ``y = conv2d_input_gradient(input)`` for the conv2d with weight ``weight`` (read as
    ``(C_out_conv = C_in, C_in_conv / groups = C_out / groups, kh, kw)``), the same stride,
    padding, dilation and groups and an input of the output size below; plus ``bias[o]``:
    ``y[n, c, q] = bias[c] + sum_{i, o, j : q + pad = o * stride + j * dilation} x[n, i, o] *
    weight[i, c', j]``. vjp: ``grad_input`` is that conv2d of ``g``, ``grad_weight`` the conv2d's
    weight gradient with the roles of input and cotangent exchanged, ``grad_bias`` = ``g`` summed
    over batch and space.

    Output shape
    ------------
    ``(N, C_out, H_out, W_out)``, ``H_out = (H - 1) * stride - 2 * padding + dilation * (kh - 1)
    + output_padding + 1`` (Dumoulin & Visin 2016, with dilation); must be >= 1.

    Non-differentiable points
    -------------------------
    none (the map is bilinear in input and weight).

    Notes
    -----
    Shares the conv core: its forward is the conv input-gradient map, its input gradient the conv
    forward map. Error terms: M on absolute values, k on ones (+1 with a bias). Here the forward
    is the scatter-add of overlapping contributions (``"io"``) and the input gradient the GEMM
    (``"wide"``), as are the weight and bias gradients.
    """
    layer = _transpose_layer(_transpose_geometry(input.shape, weight.shape, stride=stride,
                                                 padding=padding, output_padding=output_padding,
                                                 groups=groups, dilation=dilation))
    return layer.output(input, weight, bias)
