"""The demo scenario: porting a small residual denoiser for greyscale microscope tiles.

A (fictional) imaging team moves its tile denoiser to a new accelerator whose library has no
convolution backward, so the port hand-writes two kernels, each with its own backward pass:

- :func:`tile_conv` — the core of the fused conv + bias + leaky-relu layer: forward by unfold +
  one matmul per group, backward by matmul (weight), a sum (bias) and matmul + fold (input);
- :func:`depthwise_conv` — a direct depthwise kernel (``groups == in_channels``): one
  multiply-add over strided views per kernel tap, forward and backward.

Each has a twin with the slip the team first shipped, of the kind a few hand-picked tests miss:

- :func:`tile_conv_slipped` crops the folded input gradient at the *high* side's padding on both
  sides. Symmetric padding hides it; only an odd total padding (``padding="same"`` with an odd
  ``dilation * (kernel_size - 1)``, i.e. an even kernel and odd dilation) shifts the gradient by
  one row or column;
- :func:`depthwise_conv_slipped` ends the crop where the high padding would end if the last window
  reached it. When the stride does not fit the padded input evenly and the high padding is > 0,
  the gradient of the last input row(s) or column(s) that a window does reach is dropped (zero).
  Stride 1, zero padding or an even fit hide it.

Both slips are in the input gradient only; forward values and weight/bias gradients are right.
``padding_mode`` other than ``"zeros"`` pads with the framework's ``F.pad`` (differentiated by
autograd) before the hand-written core, so the slips need zero padding to show.

:class:`TileDenoiser` stacks the layers as a residual network ``y = x + F(x)``;
:func:`synthetic_tiles` makes invented greyscale tiles (smooth blobs plus sensor noise).
Every factory takes the conv2d layer configuration that ``refops check --op conv2d`` passes::

    refops check refops.examples.denoiser:tile_conv --op conv2d
    refops check refops.examples.denoiser:depthwise_conv --op conv2d --set in_channels=4 --set groups=4
"""
from __future__ import annotations

import dataclasses
import itertools
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from refops.ops import _checks

__all__ = ["tile_conv", "tile_conv_slipped", "depthwise_conv", "depthwise_conv_slipped", "TileConv",
           "DepthwiseConv", "TileDenoiser", "synthetic_tiles", "denoiser", "denoiser_slipped"]

PADDING_MODES = ("zeros", "reflect", "replicate", "circular")


# ---------------------------------------------------------------------------------------------
# geometry: padding, windows and the crop that undoes the padding in the backward pass

@dataclasses.dataclass(frozen=True)
class _Geometry:
    """Kernel, stride, dilation and ``(low, high)`` zero padding of the two spatial dims."""

    kernel: tuple[int, int]
    stride: tuple[int, int]
    dilation: tuple[int, int]
    pairs: tuple[tuple[int, int], tuple[int, int]]

    def pad(self, x: torch.Tensor) -> torch.Tensor:
        (top, bottom), (left, right) = self.pairs
        return F.pad(x, (left, right, top, bottom))

    def output_size(self, size) -> tuple[int, int]:
        return tuple((n + lo + hi - d * (k - 1) - 1) // s + 1 for n, (lo, hi), k, s, d
                     in zip(size, self.pairs, self.kernel, self.stride, self.dilation))

    def covered(self, out) -> tuple[int, int]:
        """Rows and columns of the padded input that some window reaches."""
        return tuple((o - 1) * s + d * (k - 1) + 1
                     for o, k, s, d in zip(out, self.kernel, self.stride, self.dilation))

    def taps(self, out):
        """``((i, j), (rows, cols))`` per kernel tap: the padded-input slices the tap reads."""
        for i, j in itertools.product(range(self.kernel[0]), range(self.kernel[1])):
            yield (i, j), tuple(slice(t * d, t * d + (o - 1) * s + 1, s) for t, o, s, d
                                in zip((i, j), out, self.stride, self.dilation))

    def crop(self, grad_covered: torch.Tensor, size) -> torch.Tensor:
        """The input gradient from the gradient on the covered part of the padded input."""
        starts = tuple(lo for lo, _ in self.pairs)
        return _cut(grad_covered, starts, tuple(a + n for a, n in zip(starts, size)), size)

    def without_padding(self) -> "_Geometry":
        return dataclasses.replace(self, pairs=((0, 0), (0, 0)))


class _HighSideCrop(_Geometry):
    """The shipped conv slip: the crop starts at the high side's padding on both sides."""

    def crop(self, grad_covered, size):
        starts = tuple(hi for _, hi in self.pairs)
        return _cut(grad_covered, starts, tuple(a + n for a, n in zip(starts, size)), size)


class _ShortCrop(_Geometry):
    """The shipped depthwise slip: the crop assumes the last window ends with the high padding."""

    def crop(self, grad_covered, size):
        starts = tuple(lo for lo, _ in self.pairs)
        stops = tuple(c - hi for c, (_, hi) in zip(grad_covered.shape[-2:], self.pairs))
        return _cut(grad_covered, starts, stops, size)


def _cut(grad: torch.Tensor, starts, stops, size) -> torch.Tensor:
    """``grad[..., start:stop]`` per spatial dim, zero-extended at the high end to ``size``
    (input rows that no window reaches get a zero gradient)."""
    rows, cols = (slice(a, b) for a, b in zip(starts, stops))
    part = grad[..., rows, cols]
    return F.pad(part, (0, size[1] - part.shape[-1], 0, size[0] - part.shape[-2]))


# ---------------------------------------------------------------------------------------------
# the hand-written kernels

# Both kernels compute in float32 (or wider) and round once at the end, as the accelerator's
# kernels do: summing taps in a half format would add a rounding error per tap.

def _formats(*tensors) -> tuple:
    return tuple(None if t is None else t.dtype for t in tensors)


def _widened(*tensors) -> tuple:
    return tuple(None if t is None else t.to(torch.promote_types(t.dtype, torch.float32)) for t in tensors)


def _narrowed(tensors, formats) -> tuple:
    return tuple(None if t is None else t.to(f) for t, f in zip(tensors, formats))


class _UnfoldConvFunction(torch.autograd.Function):
    """Grouped 2-d convolution, zero padding, with a hand-written backward."""

    @staticmethod
    def forward(ctx, x, weight, bias, geometry, groups):
        ctx.formats = _formats(x, weight, bias)
        x, weight, bias = _widened(x, weight, bias)
        out_size = geometry.output_size(x.shape[-2:])
        cols = F.unfold(geometry.pad(x), geometry.kernel, dilation=geometry.dilation,
                        stride=geometry.stride)                       # (N, C_in * kh * kw, L)
        n, c_out = x.shape[0], weight.shape[0]
        cols = cols.reshape(n, groups, -1, cols.shape[-1])            # (N, G, C_in/G * kh * kw, L)
        grouped = weight.reshape(groups, c_out // groups, -1)         # (G, C_out/G, C_in/G * kh * kw)
        out = torch.matmul(grouped, cols).reshape(n, c_out, *out_size)
        if bias is not None:
            out = out + bias.reshape(1, -1, 1, 1)
        ctx.save_for_backward(cols, grouped)
        ctx.geometry, ctx.input_size, ctx.weight_shape = geometry, x.shape[-2:], weight.shape
        return out.to(ctx.formats[0])

    @staticmethod
    def backward(ctx, grad):
        cols, grouped = ctx.saved_tensors
        geometry, grad = ctx.geometry, grad.to(cols.dtype)
        n, groups = cols.shape[:2]
        grad_grouped = grad.reshape(n, groups, -1, cols.shape[-1])   # (N, G, C_out/G, L)
        grad_x = grad_weight = grad_bias = None
        if ctx.needs_input_grad[0]:
            grad_cols = torch.matmul(grouped.transpose(1, 2), grad_grouped).reshape(n, -1, cols.shape[-1])
            covered = F.fold(grad_cols, geometry.covered(grad.shape[-2:]), geometry.kernel,
                             dilation=geometry.dilation, stride=geometry.stride)
            grad_x = geometry.crop(covered, ctx.input_size)
        if ctx.needs_input_grad[1]:
            grad_weight = torch.matmul(grad_grouped, cols.transpose(2, 3)).sum(0).reshape(ctx.weight_shape)
        if ctx.needs_input_grad[2]:
            grad_bias = grad.sum(dim=(0, 2, 3))
        return (*_narrowed((grad_x, grad_weight, grad_bias), ctx.formats), None, None)


class _DepthwiseFunction(torch.autograd.Function):
    """Depthwise 2-d convolution (channel multiplier m = C_out / C_in), zero padding, direct taps."""

    @staticmethod
    def forward(ctx, x, weight, bias, geometry):
        ctx.formats = _formats(x, weight, bias)
        x, weight, bias = _widened(x, weight, bias)
        out_size = geometry.output_size(x.shape[-2:])
        source = geometry.pad(x).repeat_interleave(weight.shape[0] // x.shape[1], dim=1)
        out = x.new_zeros((x.shape[0], weight.shape[0], *out_size))
        for (i, j), window in geometry.taps(out_size):
            out += source[(..., *window)] * weight[:, 0, i, j].reshape(1, -1, 1, 1)
        if bias is not None:
            out = out + bias.reshape(1, -1, 1, 1)
        ctx.save_for_backward(source, weight)
        ctx.geometry, ctx.input_size, ctx.in_channels = geometry, x.shape[-2:], x.shape[1]
        return out.to(ctx.formats[0])

    @staticmethod
    def backward(ctx, grad):
        source, weight = ctx.saved_tensors
        geometry, (n, c_out), grad = ctx.geometry, grad.shape[:2], grad.to(source.dtype)
        grad_source = grad.new_zeros((n, c_out, *geometry.covered(grad.shape[-2:])))
        grad_weight = torch.zeros_like(weight)
        for (i, j), window in geometry.taps(grad.shape[-2:]):
            grad_source[(..., *window)] += grad * weight[:, 0, i, j].reshape(1, -1, 1, 1)
            grad_weight[:, 0, i, j] = (grad * source[(..., *window)]).sum(dim=(0, 2, 3))
        grad_x = grad_bias = None
        if ctx.needs_input_grad[0]:
            c_in = ctx.in_channels
            per_input = grad_source.reshape(n, c_in, c_out // c_in, *grad_source.shape[-2:]).sum(2)
            grad_x = geometry.crop(per_input, ctx.input_size)
        if ctx.needs_input_grad[2]:
            grad_bias = grad.sum(dim=(0, 2, 3))
        grads = (grad_x, grad_weight if ctx.needs_input_grad[1] else None, grad_bias)
        return (*_narrowed(grads, ctx.formats), None)


# ---------------------------------------------------------------------------------------------
# layers: the conv2d layer configuration of ``refops check``, parameters ``weight`` and ``bias``

def _padding_pairs(padding: Any, kernel, dilation, stride) -> tuple[tuple[int, int], ...]:
    """``(low, high)`` per spatial dim; ``"same"`` puts the odd element on the high side."""
    if padding == "valid":
        return ((0, 0), (0, 0))
    if padding == "same":
        if stride != (1, 1):
            _checks.fail("padding", padding, f"'same' needs stride=1, got stride={stride}")
        totals = [d * (k - 1) for k, d in zip(kernel, dilation)]
        return tuple((t // 2, t - t // 2) for t in totals)
    if isinstance(padding, str):
        _checks.fail("padding", padding, "expected an int, a pair of ints, 'same' or 'valid'")
    return tuple((p, p) for p in _checks.as_int_tuple("padding", padding, 2, min_value=0))


class _HandConv(torch.nn.Module):
    """What the port's two layers share: configuration checks, parameters, non-zero padding modes."""

    _slip: type[_Geometry]  # the geometry with the shipped slip

    def __init__(self, in_channels, out_channels, kernel_size, stride=1, padding=0, dilation=1,
                 groups=1, bias=True, padding_mode="zeros", *, slipped=False,
                 generator: torch.Generator | None = None):
        super().__init__()
        in_channels = _checks.as_int("in_channels", in_channels, min_value=1)
        out_channels = _checks.as_int("out_channels", out_channels, min_value=1)
        groups = _checks.as_int("groups", groups, min_value=1)
        for name, channels in (("in_channels", in_channels), ("out_channels", out_channels)):
            if channels % groups:
                _checks.fail("groups", groups, f"must divide {name}={channels}")
        kernel = _checks.as_int_tuple("kernel_size", kernel_size, 2, min_value=1)
        stride = _checks.as_int_tuple("stride", stride, 2, min_value=1)
        dilation = _checks.as_int_tuple("dilation", dilation, 2, min_value=1)
        pairs = _padding_pairs(padding, kernel, dilation, stride)
        self.padding_mode = _checks.as_choice("padding_mode", padding_mode, PADDING_MODES)
        self.groups = groups
        self.geometry = (self._slip if slipped else _Geometry)(kernel, stride, dilation, pairs)
        bound = 1.0 / np.sqrt(in_channels // groups * kernel[0] * kernel[1])
        self.weight = torch.nn.Parameter(
            torch.empty(out_channels, in_channels // groups, *kernel).uniform_(-bound, bound, generator=generator))
        self.bias = (torch.nn.Parameter(torch.empty(out_channels).uniform_(-bound, bound, generator=generator))
                     if _checks.as_bool("bias", bias) else None)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        geometry = self.geometry
        if self.padding_mode != "zeros":
            (top, bottom), (left, right) = geometry.pairs
            x = F.pad(x, (left, right, top, bottom), mode=self.padding_mode)
            geometry = geometry.without_padding()
        return self._core(x, geometry)


class TileConv(_HandConv):
    """The port's convolution: :class:`_UnfoldConvFunction` (any ``groups``)."""

    _slip = _HighSideCrop

    def _core(self, x, geometry):
        return _UnfoldConvFunction.apply(x, self.weight, self.bias, geometry, self.groups)


class DepthwiseConv(_HandConv):
    """The port's depthwise convolution: :class:`_DepthwiseFunction`; needs ``groups == in_channels``."""

    _slip = _ShortCrop

    def __init__(self, in_channels, out_channels, kernel_size, stride=1, padding=0, dilation=1,
                 groups=None, bias=True, padding_mode="zeros", **options):
        groups = in_channels if groups is None else groups
        if groups != in_channels:
            _checks.fail("groups", groups, f"a depthwise layer needs groups == in_channels={in_channels!r} "
                         "(pin both, e.g. --set in_channels=4 --set groups=4)")
        super().__init__(in_channels, out_channels, kernel_size, stride, padding, dilation, groups, bias,
                         padding_mode, **options)

    def _core(self, x, geometry):
        return _DepthwiseFunction.apply(x, self.weight, self.bias, geometry)


def tile_conv(**layer) -> TileConv:
    """Factory for ``refops check``: the correct hand-written convolution."""
    return TileConv(**layer)


def tile_conv_slipped(**layer) -> TileConv:
    """Factory for ``refops check``: the convolution whose input-gradient crop uses the high padding."""
    return TileConv(**layer, slipped=True)


def depthwise_conv(**layer) -> DepthwiseConv:
    """Factory for ``refops check``: the correct hand-written depthwise convolution."""
    return DepthwiseConv(**layer)


def depthwise_conv_slipped(**layer) -> DepthwiseConv:
    """Factory for ``refops check``: the depthwise convolution whose input-gradient crop is short."""
    return DepthwiseConv(**layer, slipped=True)


# ---------------------------------------------------------------------------------------------
# the denoiser and its invented data

class TileDenoiser(torch.nn.Module):
    """Residual denoiser ``y = x + F(x)`` on single-channel tiles ``(N, 1, H, W)``.

    ``F = merge o leaky_relu o mix o leaky_relu o lift``: a 3x3 lift to ``width`` channels, a 3x3
    depthwise mix with dilation 2, a 4x4 merge back to one channel (all ``padding="same"`` or its
    equivalent, so ``H x W`` is kept). The merge's even kernel is where the conv slip shows.
    """

    def __init__(self, width: int = 8, *, slipped: bool = False, negative_slope: float = 0.1,
                 generator: torch.Generator | None = None):
        super().__init__()
        options = dict(slipped=slipped, generator=generator)
        self.negative_slope = _checks.as_real("negative_slope", negative_slope)
        self.lift = TileConv(1, width, 3, padding="same", **options)
        self.mix = DepthwiseConv(width, width, 3, padding=2, dilation=2, **options)
        self.merge = TileConv(width, 1, 4, padding="same", **options)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        hidden = F.leaky_relu(self.lift(x), self.negative_slope)
        hidden = F.leaky_relu(self.mix(hidden), self.negative_slope)
        return x + self.merge(hidden)


def denoiser() -> TileDenoiser:
    """Factory for ``refops record`` / ``refops replay``: the port's denoiser, fixed initial weights."""
    return TileDenoiser(generator=torch.Generator().manual_seed(0))


def denoiser_slipped() -> TileDenoiser:
    """The same denoiser (same weights) built on the slipped kernels."""
    return TileDenoiser(slipped=True, generator=torch.Generator().manual_seed(0))


def synthetic_tiles(count: int = 4, size: int = 16, *, blobs: int = 3, noise: float = 0.05,
                    seed: int = 0) -> np.ndarray:
    """Invented greyscale tiles, float64 ``(count, 1, size, size)``.

    Each tile is a sum of ``blobs`` Gaussian spots (centres in the middle 60 % of the tile, widths
    5-20 % of its side, peak 1) plus independent Gaussian noise of standard deviation ``noise``.
    """
    count = _checks.as_int("count", count, min_value=1)
    size = _checks.as_int("size", size, min_value=1)
    blobs = _checks.as_int("blobs", blobs, min_value=1)
    noise = _checks.as_real("noise", noise)
    if noise < 0:
        _checks.fail("noise", noise, "must be >= 0")
    rng = np.random.default_rng(seed)
    centre_y, centre_x = rng.uniform(0.2, 0.8, (2, count, blobs, 1, 1))
    width = rng.uniform(0.05, 0.2, (count, blobs, 1, 1))
    yy, xx = np.mgrid[0:size, 0:size] / size
    spots = np.exp(-((yy - centre_y) ** 2 + (xx - centre_x) ** 2) / (2 * width ** 2))
    clean = spots.sum(axis=1, keepdims=True)
    return clean + noise * rng.standard_normal(clean.shape)
