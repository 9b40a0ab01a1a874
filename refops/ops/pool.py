"""Oracles of the pool family: max and average pooling over fixed and adaptive windows.

Every pool is written once, for 1 to 3 spatial dims, against a *window family*:

- :class:`_FixedWindows` (kernel_size, stride, padding, dilation, ceil_mode) gathers its windows
  with the shared primitive (:func:`._window.pad` + :func:`._window.windows`) and scatters back
  with its adjoint (:func:`._window.fold` + :func:`._window.unpad`);
- :class:`_AdaptiveWindows` (output_size) has windows of varying size; it gathers them into a
  padded block (missing taps filled) and scatters back by index.

A family's ``gather(x, fill)`` returns ``(..., *out, taps)``: the windows with their kernel taps
flattened in row-major order (so ``argmax`` over the last axis is the *first* maximum in
row-major order), ``fill`` where a tap lies on padding. Max pooling gathers with ``-inf``, average
pooling with zeros; their backward passes route or spread the cotangent over the taps and scatter.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from . import _checks, _window
from ._registry import CaseConfig, ErrorTerms, Kink, register

__all__ = ["max_pool2d", "avg_pool2d", "adaptive_avg_pool2d", "adaptive_max_pool2d"]


# ---------------------------------------------------------------------------------------------
# Window families
# ---------------------------------------------------------------------------------------------

class _Windows:
    """What both window families share: the spatial size, the output grid, tap bookkeeping."""

    spatial: tuple[int, ...]
    out: tuple[int, ...]
    taps: int  # taps per window (the last axis of ``gather``)

    def gather(self, x: np.ndarray, fill: float) -> np.ndarray:  # pragma: no cover - interface
        raise NotImplementedError

    def scatter(self, cols: np.ndarray) -> np.ndarray:  # pragma: no cover - interface
        raise NotImplementedError

    def source(self) -> np.ndarray:
        """``(*out, taps)``: the flat spatial index each tap reads, ``-1`` on padding."""
        index = np.arange(math.prod(self.spatial), dtype=float).reshape(self.spatial)
        return self.gather(index, -1.0).astype(np.int64)  # small ints: exact in float64

    def taps_inside(self) -> np.ndarray:
        """``(*out)``: how many taps of each window lie on the input (not on padding)."""
        return self.gather(np.ones(self.spatial), 0.0).sum(axis=-1)

    def scatter_at(self, cols: np.ndarray, ufunc: np.ufunc, initial: float) -> np.ndarray:
        """Combine ``cols`` ``(..., *out, taps)`` onto ``(..., *spatial)`` with ``ufunc.at``."""
        n = len(self.spatial)
        lead = cols.shape[:cols.ndim - n - 1]
        size = math.prod(self.spatial)
        source = np.broadcast_to(self.source(), cols.shape)
        flat = np.arange(math.prod(lead)).reshape(lead + (1,) * (n + 1)) * size + source
        inside = source >= 0
        result = np.full(math.prod(lead) * size, initial)
        ufunc.at(result, flat[inside], cols[inside])
        return result.reshape(lead + self.spatial)


class _FixedWindows(_Windows):
    """Windows of one size at a fixed stride over a padded input (the pooling convention).

    With ``ceil_mode`` the last window may run past the padded input; the high side is padded
    further (``pairs``) so that it fits, and those extra taps count as padding.
    """

    def __init__(self, spatial: Sequence[int], kernel: Sequence[int], stride: Sequence[int],
                 padding: Sequence[int], dilation: Sequence[int], ceil_mode: bool):
        self.spatial = tuple(spatial)
        self.kernel, self.stride, self.dilation = tuple(kernel), tuple(stride), tuple(dilation)
        self.padding = tuple(padding)
        self.out = tuple(_window.output_size(size, k, s, d, p, p, ceil_mode)
                         for size, k, s, d, p in zip(spatial, kernel, stride, dilation, padding))
        extent = [(o - 1) * s + d * (k - 1) + 1
                  for o, k, s, d in zip(self.out, kernel, stride, dilation)]
        self.pairs = tuple((p, max(p, e - size - p)) for p, e, size in zip(padding, extent, spatial))
        self.taps = math.prod(self.kernel)

    @classmethod
    def over(cls, x: np.ndarray, kernel_size, stride, padding, dilation, ceil_mode) -> "_FixedWindows":
        n = len(kernel_size)
        return cls(x.shape[x.ndim - n:], kernel_size, stride, padding, dilation, ceil_mode)

    def gather(self, x: np.ndarray, fill: float) -> np.ndarray:
        padded = _window.pad(x, self.pairs, value=fill)
        view = _window.windows(padded, self.kernel, self.stride, self.dilation)
        return view.reshape(view.shape[:view.ndim - len(self.kernel)] + (self.taps,))

    def scatter(self, cols: np.ndarray) -> np.ndarray:
        blocks = cols.reshape(cols.shape[:-1] + self.kernel)
        padded = tuple(size + lo + hi for size, (lo, hi) in zip(self.spatial, self.pairs))
        return _window.unpad(_window.fold(blocks, padded, self.stride, self.dilation), self.pairs)

    def taps_on_padded_input(self) -> np.ndarray:
        """``(*out)``: taps of each window on the input or its padding (not past the padding)."""
        symmetric = [(p, p) for p in self.padding]
        overhang = [(0, hi - p) for (_, hi), p in zip(self.pairs, self.padding)]
        ones = _window.pad(np.ones(self.spatial), symmetric, value=1.0)
        view = _window.windows(_window.pad(ones, overhang), self.kernel, self.stride, self.dilation)
        return view.sum(axis=tuple(range(-len(self.kernel), 0)))


def _adaptive_bounds(size: int, out: int) -> tuple[np.ndarray, np.ndarray]:
    """Window ``i`` covers ``[floor(i * size / out), ceil((i + 1) * size / out))``."""
    i = np.arange(out)
    return (i * size) // out, -((-(i + 1) * size) // out)


class _AdaptiveWindows(_Windows):
    """Windows that tile the input into ``out`` near-equal, possibly overlapping, pieces per dim."""

    def __init__(self, spatial: Sequence[int], out: Sequence[int]):
        self.spatial, self.out = tuple(spatial), tuple(out)
        n = len(self.out)
        self.index, self.valid = [], np.ones((1,) * 2 * n, dtype=bool)
        for dim, (size, count) in enumerate(zip(self.spatial, self.out)):
            start, stop = _adaptive_bounds(size, count)
            taps = start[:, None] + np.arange(int((stop - start).max()))[None, :]
            shape = [1] * 2 * n
            shape[dim], shape[n + dim] = taps.shape
            self.index.append(np.minimum(taps, size - 1).reshape(shape))
            self.valid = self.valid & (taps < stop[:, None]).reshape(shape)
        self.taps = math.prod(i.shape[n + dim] for dim, i in enumerate(self.index))

    @classmethod
    def over(cls, x: np.ndarray, output_size) -> "_AdaptiveWindows":
        return cls(x.shape[x.ndim - len(output_size):], output_size)

    def gather(self, x: np.ndarray, fill: float) -> np.ndarray:
        block = np.where(self.valid, x[(Ellipsis, *self.index)], fill)
        return block.reshape(block.shape[:block.ndim - len(self.out)] + (-1,))

    def scatter(self, cols: np.ndarray) -> np.ndarray:
        return self.scatter_at(cols, np.add, 0.0)


# ---------------------------------------------------------------------------------------------
# Pooling cores (any window family, 1-3 spatial dims)
# ---------------------------------------------------------------------------------------------

def _max_pool(x: np.ndarray, windows: _Windows) -> np.ndarray:
    return windows.gather(x, -np.inf).max(axis=-1)


def _max_pool_vjp(g: np.ndarray, x: np.ndarray, windows: _Windows) -> np.ndarray:
    """Each window's cotangent goes to its first maximal tap; padding taps are dropped."""
    taps = windows.gather(x, -np.inf)
    cols = np.zeros(taps.shape)
    np.put_along_axis(cols, taps.argmax(axis=-1)[..., None], g[..., None], axis=-1)
    return windows.scatter(cols)


def _max_tie_distance(x: np.ndarray, windows: _Windows) -> np.ndarray:
    """Per input element, how far it can move before some window's first maximum changes.

    For the window's maximum: the gap to the runner-up; for any other tap: the gap to the
    maximum; the minimum over all windows containing the element (``inf`` if none).
    """
    taps = windows.gather(x, -np.inf)
    first = taps.argmax(axis=-1)[..., None]
    top = np.take_along_axis(taps, first, axis=-1)
    others = taps.copy()
    np.put_along_axis(others, first, -np.inf, axis=-1)
    runner_up = others.max(axis=-1, keepdims=True)
    is_first = np.arange(taps.shape[-1]) == first
    with np.errstate(invalid="ignore"):  # windows of padding only: -inf - -inf, never scattered
        gap = np.where(is_first, top - runner_up, top - taps)
    return windows.scatter_at(gap, np.minimum, np.inf)


def _max_error_terms(g: np.ndarray, x: np.ndarray, windows: _Windows) -> dict[str, ErrorTerms]:
    """Forward: a selection (exact). Backward: sums of routed cotangents (scatter-add, I/O format)."""
    return {"output": ErrorTerms(magnitude=0.0, length=0.0),
            "input": ErrorTerms(magnitude=_max_pool_vjp(np.abs(g), x, windows),
                                length=_max_pool_vjp(np.ones_like(g), x, windows), accumulate="io")}


def _avg_pool(x: np.ndarray, windows: _Windows, divisor) -> np.ndarray:
    return windows.gather(x, 0.0).sum(axis=-1) / divisor


def _avg_pool_vjp(g: np.ndarray, windows: _Windows, divisor) -> np.ndarray:
    share = g / divisor
    return windows.scatter(np.broadcast_to(share[..., None], share.shape + (windows.taps,)))


def _avg_error_terms(g: np.ndarray, x: np.ndarray, windows: _Windows, divisor) -> dict[str, ErrorTerms]:
    """Linear: M = the pool of |x| (the vjp of |g|), k = terms summed per element."""
    scale = np.abs(divisor)
    covering = _avg_pool_vjp(np.ones_like(g), windows, 1.0)
    return {"output": ErrorTerms(magnitude=_avg_pool(np.abs(x), windows, scale),
                                 length=windows.taps_inside()),
            "input": ErrorTerms(magnitude=_avg_pool_vjp(np.abs(g), windows, scale),
                                length=covering, accumulate="io")}


# ---------------------------------------------------------------------------------------------
# Parameter checks
# ---------------------------------------------------------------------------------------------

_LAYOUT = {1: "(N, C, L) or unbatched (C, L)", 2: "(N, C, H, W) or unbatched (C, H, W)",
           3: "(N, C, D, H, W) or unbatched (C, D, H, W)"}


def _check_input(x: np.ndarray, n: int) -> None:
    _checks.check_rank("input", x, (n + 1, n + 2), _LAYOUT[n])
    if 0 in x.shape[x.ndim - n - 1:]:
        _checks.fail("input", x, f"every dimension except the batch must be >= 1, got shape {x.shape}")


def _check_fixed(x: np.ndarray, params: dict, n: int) -> dict:
    """Normalise kernel_size, stride, padding, dilation (if the op has it) and ceil_mode."""
    _check_input(x, n)
    kernel = _checks.as_int_tuple("kernel_size", params["kernel_size"], n, min_value=1)
    stride = kernel if params["stride"] is None else _checks.as_int_tuple(
        "stride", params["stride"], n, min_value=1)
    padding = _checks.as_int_tuple("padding", params["padding"], n, min_value=0)
    dilation = _checks.as_int_tuple("dilation", params.get("dilation", 1), n, min_value=1)
    ceil_mode = _checks.as_bool("ceil_mode", params["ceil_mode"])
    half = tuple(k // 2 for k in kernel)
    if any(p > h for p, h in zip(padding, half)):
        _checks.fail("padding", params["padding"],
                     f"must be at most half the kernel size (kernel_size={kernel}: at most {half})")
    windows = _FixedWindows(x.shape[x.ndim - n:], kernel, stride, padding, dilation, ceil_mode)
    if min(windows.out) < 1:
        extent = tuple(d * (k - 1) + 1 for k, d in zip(kernel, dilation))
        padded = tuple(size + 2 * p for size, p in zip(windows.spatial, padding))
        _checks.fail("kernel_size", params["kernel_size"],
                     f"the window (dilation * (kernel_size - 1) + 1 = {extent}) is larger than the "
                     f"padded input (size + 2 * padding = {padded})")
    normal = {"kernel_size": kernel, "stride": stride, "padding": padding, "ceil_mode": ceil_mode}
    if "dilation" in params:
        normal["dilation"] = dilation
    return normal


def _validate_max_pool2d(arrays: dict, params: dict) -> dict:
    return _check_fixed(arrays["input"], params, 2)


def _validate_avg_pool2d(arrays: dict, params: dict) -> dict:
    normal = _check_fixed(arrays["input"], params, 2)
    normal["count_include_pad"] = _checks.as_bool("count_include_pad", params["count_include_pad"])
    override = params["divisor_override"]
    if override is not None and _checks.as_int("divisor_override", override) == 0:
        _checks.fail("divisor_override", override, "must be a non-zero int (or None)")
    normal["divisor_override"] = None if override is None else int(override)
    return normal


def _as_output_size(value: Any, spatial: tuple[int, ...]) -> tuple[int, ...]:
    """An int or one entry per spatial dim, each >= 1 or None (keep that input size)."""
    n = len(spatial)
    entries = value if isinstance(value, (tuple, list)) else (value,) * n
    if len(entries) != n:
        _checks.fail("output_size", value, f"expected an int or a sequence of {n} entries, "
                     f"got {len(entries)}")
    if any(e is not None and (isinstance(e, bool) or not isinstance(e, (int, np.integer)))
           for e in entries):
        _checks.fail("output_size", value, "expected ints (or None to keep the input size)", TypeError)
    if any(e is not None and e < 1 for e in entries):
        _checks.fail("output_size", value, "every entry must be >= 1 (or None to keep the input size)")
    return tuple(size if e is None else int(e) for e, size in zip(entries, spatial))


def _validate_adaptive2d(arrays: dict, params: dict) -> dict:
    x = arrays["input"]
    _check_input(x, 2)
    return {"output_size": _as_output_size(params["output_size"], x.shape[-2:])}


def _fixed_output_shape(arrays: dict, params: dict) -> tuple[int, ...]:
    x = arrays["input"]
    windows = _FixedWindows.over(x, params["kernel_size"], params["stride"], params["padding"],
                                 params.get("dilation", (1,) * len(params["kernel_size"])),
                                 params["ceil_mode"])
    return x.shape[:x.ndim - len(windows.out)] + windows.out


def _adaptive_output_shape(arrays: dict, params: dict) -> tuple[int, ...]:
    x, out = arrays["input"], params["output_size"]
    return x.shape[:x.ndim - len(out)] + out


# ---------------------------------------------------------------------------------------------
# Configuration spaces
# ---------------------------------------------------------------------------------------------

_KERNEL_SIZES = (1, 2, 3, (2, 3), (3, 1), 4, (1, 4), (4, 2))
_MAX_SIZE = 12
# None (no override) three times out of five: an override is an unusual configuration.
_DIVISOR_OVERRIDES = (None, None, None, 2, 5)


def _padding_options(kernel: tuple[int, int]) -> list:
    """Every valid padding up to half the kernel (torch's limit), none first (shrinks toward it)."""
    pairs = [(ph, pw) for ph in range(kernel[0] // 2 + 1) for pw in range(kernel[1] // 2 + 1)]
    return [ph if ph == pw else (ph, pw) for ph, pw in pairs]


def _input_config(draw, low: Sequence[int]) -> dict:
    """batch (None = unbatched), channels, height, width; each size at least ``low``."""
    batch = draw.choice("batch", (1, 2, 3, None))
    channels = draw.integer("channels", 1, 3)
    height = draw.integer("height", low[0], min(_MAX_SIZE, low[0] + 6))
    width = draw.integer("width", low[1], min(_MAX_SIZE, low[1] + 6))
    return {"batch": batch, "channels": channels, "height": height, "width": width}


def _input_shape(sizes: dict) -> tuple[int, ...]:
    lead = () if sizes["batch"] is None else (sizes["batch"],)
    return lead + (sizes["channels"], sizes["height"], sizes["width"])


def _fixed_config(draw, *, dilated: bool) -> tuple[dict, dict]:
    """Window geometry first, then an input just large enough or a little larger."""
    layer = {"kernel_size": draw.choice("kernel_size", _KERNEL_SIZES)}
    kernel = _checks.as_int_tuple("kernel_size", layer["kernel_size"], 2, min_value=1)
    if dilated:
        layer["dilation"] = draw.integer("dilation", 1, 3)
    dilation = _checks.as_int_tuple("dilation", layer.get("dilation", 1), 2, min_value=1)
    layer["stride"] = draw.integer("stride", 1, max(kernel) + 1)
    layer["padding"] = draw.choice("padding", _padding_options(kernel))
    padding = _checks.as_int_tuple("padding", layer["padding"], 2, min_value=0)
    layer["ceil_mode"] = draw.choice("ceil_mode", (False, True))
    low = [max(1, d * (k - 1) + 1 - 2 * p) for k, d, p in zip(kernel, dilation, padding)]
    return layer, _input_config(draw, low)


def _covers_only_padding(shape: tuple[int, ...], layer: dict) -> bool:
    """Whether some window has no tap on the input (max value -inf, no gradient)."""
    x = np.zeros(shape)
    windows = _FixedWindows.over(x, **_check_fixed(x, dict(layer), 2))
    return bool(np.any(windows.taps_inside() == 0))


def _max_pool2d_space(draw) -> CaseConfig:
    layer, sizes = _fixed_config(draw, dilated=True)
    shape = _input_shape(sizes)
    only_padding = _covers_only_padding(shape, layer)
    return CaseConfig(layer=layer, params=dict(layer), shapes={"input": shape}, bounds={},
                      drawn={**layer, **sizes, "padding_only_windows": only_padding})


def _avg_pool2d_space(draw) -> CaseConfig:
    layer, sizes = _fixed_config(draw, dilated=False)
    layer["count_include_pad"] = draw.choice("count_include_pad", (False, True))
    divisor_override = draw.choice("divisor_override", _DIVISOR_OVERRIDES)
    return CaseConfig(layer=layer, params={**layer, "divisor_override": divisor_override},
                      shapes={"input": _input_shape(sizes)}, bounds={},
                      drawn={**layer, **sizes, "divisor_override": divisor_override})


def _adaptive_space(draw) -> CaseConfig:
    """Output sizes from 1 (global pooling) to a little above the input size, None = keep."""
    sizes = _input_config(draw, (1, 1))
    rows = (*range(1, sizes["height"] + 3), None)
    cols = (*range(1, sizes["width"] + 3), None)
    output_size = draw.choice("output_size", [1] + [(a, b) for a in rows for b in cols])
    layer = {"output_size": output_size}
    return CaseConfig(layer=layer, params=dict(layer), shapes={"input": _input_shape(sizes)},
                      bounds={}, drawn={**layer, **sizes})


# ---------------------------------------------------------------------------------------------
# max_pool2d
# ---------------------------------------------------------------------------------------------

def _max_pool2d_vjp(g, input, **params):
    return {"input": _max_pool_vjp(g, input, _FixedWindows.over(input, **params))}


def _max_pool2d_error_terms(g, input, **params):
    return _max_error_terms(g, input, _FixedWindows.over(input, **params))


_MAX_TIES = Kink(
    description="ties: an element equal to the maximum of a window it belongs to (for the "
                "maximum itself: equal to the window's runner-up)",
    derivative="the window's cotangent goes to its first maximal element in row-major order",
    distance=lambda arrays, params: {"input": _max_tie_distance(
        arrays["input"], _FixedWindows.over(arrays["input"], **params))})


@register(vjp=_max_pool2d_vjp, validate=_validate_max_pool2d, space=_max_pool2d_space,
          error_terms=_max_pool2d_error_terms, kinks=(_MAX_TIES,), output_shape=_fixed_output_shape)
def max_pool2d(input, *, kernel_size, stride=None, padding=0, dilation=1, ceil_mode=False):
    """2-d max pooling over (N, C, H, W) or unbatched (C, H, W) input.

    Formula
    -------
    ``out[n, c, i, j] = max over a < kh, b < kw of xp[n, c, i*sh + a*dh, j*sw + b*dw]``, where
    ``xp`` is the input padded with ``-inf`` by ``padding`` on each side (and further on the
    bottom/right where a ``ceil_mode`` window runs past the padded input).

    Output shape
    ------------
    ``(N, C, H_out, W_out)`` with ``H_out = floor((H + 2 ph - dh (kh - 1) - 1) / sh) + 1``
    (``ceil`` with ``ceil_mode``, dropping a last window that would start in the bottom padding);
    likewise ``W_out``. ``stride=None`` means ``stride = kernel_size``; ``padding`` is at most
    ``kernel_size // 2`` per dim (torch's limit, on the undilated kernel).

    Non-differentiable points
    -------------------------
    Ties: where an element equals the maximum of a window containing it, the window's
    maximising element jumps. ``kink_distance`` gives each element's distance to such a tie.

    Notes
    -----
    The gradient of a window goes to its *first* maximal element in row-major order (lowest row,
    then lowest column). A window whose taps all fall on padding (possible with dilation) has
    the value ``-inf`` and sends no gradient anywhere.
    """
    return _max_pool(input, _FixedWindows.over(input, kernel_size, stride, padding, dilation, ceil_mode))


# ---------------------------------------------------------------------------------------------
# avg_pool2d
# ---------------------------------------------------------------------------------------------

def _avg_windows(x, kernel_size, stride, padding, ceil_mode, count_include_pad, divisor_override):
    """The windows of an average pool and the divisor of each window (``(*out)`` or a scalar)."""
    windows = _FixedWindows.over(x, kernel_size, stride, padding, (1,) * len(kernel_size), ceil_mode)
    if divisor_override is not None:
        return windows, float(divisor_override)
    return windows, windows.taps_on_padded_input() if count_include_pad else windows.taps_inside()


def _avg_pool2d_vjp(g, input, **params):
    return {"input": _avg_pool_vjp(g, *_avg_windows(input, **params))}


def _avg_pool2d_error_terms(g, input, **params):
    return _avg_error_terms(g, input, *_avg_windows(input, **params))


@register(vjp=_avg_pool2d_vjp, validate=_validate_avg_pool2d, space=_avg_pool2d_space,
          error_terms=_avg_pool2d_error_terms, output_shape=_fixed_output_shape)
def avg_pool2d(input, *, kernel_size, stride=None, padding=0, ceil_mode=False,
               count_include_pad=True, divisor_override=None):
    """2-d average pooling over (N, C, H, W) or unbatched (C, H, W) input.

    Formula
    -------
    ``out[n, c, i, j] = sum over a < kh, b < kw of xp[n, c, i*sh + a, j*sw + b] / D[i, j]``,
    ``xp`` the input zero-padded by ``padding``. The divisor ``D`` is ``divisor_override`` if
    given; else, with ``count_include_pad``, the number of taps on the input or its padding (a
    ``ceil_mode`` window that runs past the padded input is clipped at its edge); else the number
    of taps on the input itself.

    Output shape
    ------------
    ``(N, C, H_out, W_out)`` with ``H_out = floor((H + 2 ph - kh) / sh) + 1`` (``ceil`` with
    ``ceil_mode``, dropping a last window that would start in the bottom padding); likewise
    ``W_out``. ``stride=None`` means ``stride = kernel_size``; ``padding <= kernel_size // 2``.

    Non-differentiable points
    -------------------------
    None: the op is linear in its input.

    Notes
    -----
    Ties play no role; the backward spreads ``g / D`` evenly over each window's taps on the input.
    """
    windows, divisor = _avg_windows(input, kernel_size, stride, padding, ceil_mode,
                                    count_include_pad, divisor_override)
    return _avg_pool(input, windows, divisor)


# ---------------------------------------------------------------------------------------------
# adaptive_avg_pool2d, adaptive_max_pool2d
# ---------------------------------------------------------------------------------------------

def _adaptive_avg_pool2d_vjp(g, input, *, output_size):
    windows = _AdaptiveWindows.over(input, output_size)
    return {"input": _avg_pool_vjp(g, windows, windows.taps_inside())}


def _adaptive_avg_pool2d_error_terms(g, input, *, output_size):
    windows = _AdaptiveWindows.over(input, output_size)
    return _avg_error_terms(g, input, windows, windows.taps_inside())


@register(vjp=_adaptive_avg_pool2d_vjp, validate=_validate_adaptive2d, space=_adaptive_space,
          error_terms=_adaptive_avg_pool2d_error_terms, output_shape=_adaptive_output_shape)
def adaptive_avg_pool2d(input, *, output_size):
    """2-d average pooling onto a fixed output size, over (N, C, H, W) or (C, H, W) input.

    Formula
    -------
    ``out[n, c, i, j] = mean of x[n, c, r, s]`` over ``floor(i H / H_out) <= r < ceil((i + 1) H /
    H_out)`` and ``floor(j W / W_out) <= s < ceil((j + 1) W / W_out)``; the windows may overlap.

    Output shape
    ------------
    ``(N, C, H_out, W_out)`` from ``output_size`` (an int or a pair; a ``None`` entry keeps that
    input size). Output sizes larger than the input repeat elements.

    Non-differentiable points
    -------------------------
    None: the op is linear in its input.

    Notes
    -----
    Each window's cotangent is spread evenly over its elements.
    """
    windows = _AdaptiveWindows.over(input, output_size)
    return _avg_pool(input, windows, windows.taps_inside())


def _adaptive_max_pool2d_vjp(g, input, *, output_size):
    return {"input": _max_pool_vjp(g, input, _AdaptiveWindows.over(input, output_size))}


def _adaptive_max_pool2d_error_terms(g, input, *, output_size):
    return _max_error_terms(g, input, _AdaptiveWindows.over(input, output_size))


_ADAPTIVE_MAX_TIES = Kink(
    description=_MAX_TIES.description, derivative=_MAX_TIES.derivative,
    distance=lambda arrays, params: {"input": _max_tie_distance(
        arrays["input"], _AdaptiveWindows.over(arrays["input"], params["output_size"]))})


@register(vjp=_adaptive_max_pool2d_vjp, validate=_validate_adaptive2d, space=_adaptive_space,
          error_terms=_adaptive_max_pool2d_error_terms, kinks=(_ADAPTIVE_MAX_TIES,),
          output_shape=_adaptive_output_shape)
def adaptive_max_pool2d(input, *, output_size):
    """2-d max pooling onto a fixed output size, over (N, C, H, W) or (C, H, W) input.

    Formula
    -------
    ``out[n, c, i, j] = max of x[n, c, r, s]`` over ``floor(i H / H_out) <= r < ceil((i + 1) H /
    H_out)`` and ``floor(j W / W_out) <= s < ceil((j + 1) W / W_out)``; the windows may overlap.

    Output shape
    ------------
    ``(N, C, H_out, W_out)`` from ``output_size`` (an int or a pair; a ``None`` entry keeps that
    input size).

    Non-differentiable points
    -------------------------
    Ties: where an element equals the maximum of a window containing it. ``kink_distance`` gives
    each element's distance to such a tie.

    Notes
    -----
    The gradient of a window goes to its first maximal element in row-major order.
    """
    return _max_pool(input, _AdaptiveWindows.over(input, output_size))
