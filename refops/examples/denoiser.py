"""The demo scenario: porting a small residual denoiser for greyscale microscope tiles.

A (fictional) imaging team moves its tile denoiser to a new accelerator. The port hand-writes the
convolution with its own backward pass, because the accelerator's library has none. This module
holds what they wrote:

- :func:`tile_conv` — the hand-written convolution (forward by unfold + matmul, backward by matmul
  + fold), correct;
- :func:`tile_conv_slipped` — the same with the slip the team first shipped: the backward crops
  the folded input gradient with the *high* side's padding on both sides. Symmetric padding hides
  it; only an odd total padding (``padding="same"`` with an even dilated kernel) shows it;
- :class:`TileDenoiser` — the residual network ``y = x + F(x)`` built from it, and
  :func:`synthetic_tiles`, invented greyscale tiles (smooth blobs plus noise) to run it on.

Both factories take the conv2d layer configuration that ``refops check --op conv2d`` passes.
"""
from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

__all__ = ["tile_conv", "tile_conv_slipped", "TileConv", "TileDenoiser", "synthetic_tiles", "denoiser",
           "denoiser_slipped"]


def _pairs(padding, kernel, dilation) -> tuple[tuple[int, int], tuple[int, int]]:
    """(low, high) padding per spatial dim; ``"same"`` puts the odd element high."""
    if padding == "same":
        totals = [d * (k - 1) for k, d in zip(kernel, dilation)]
        return tuple((t // 2, t - t // 2) for t in totals)
    if padding == "valid":
        return ((0, 0), (0, 0))
    p = (padding, padding) if isinstance(padding, int) else tuple(padding)
    return ((p[0], p[0]), (p[1], p[1]))


class _TileConvFunction(torch.autograd.Function):
    """Grouped 2-d convolution with a hand-written backward (zero padding only)."""

    @staticmethod
    def forward(ctx, x, weight, bias, geometry, slipped):
        stride, pairs, dilation, groups = geometry
        (top, bottom), (left, right) = pairs
        padded = F.pad(x, (left, right, top, bottom))
        kernel = weight.shape[2:]
        cols = F.unfold(padded, kernel, dilation=dilation, stride=stride)  # (N, C*kh*kw, L)
        n, c_out = x.shape[0], weight.shape[0]
        cols_g = cols.reshape(n, groups, -1, cols.shape[-1])
        w_g = weight.reshape(groups, c_out // groups, -1)
        out = torch.einsum("gok,ngkl->ngol", w_g, cols_g).reshape(n, c_out, -1)
        rows = (padded.shape[2] - dilation[0] * (kernel[0] - 1) - 1) // stride[0] + 1
        out = out.reshape(n, c_out, rows, -1)
        if bias is not None:
            out = out + bias.reshape(1, -1, 1, 1)
        ctx.save_for_backward(x, weight, cols)
        ctx.geometry, ctx.slipped, ctx.has_bias = geometry, slipped, bias is not None
        ctx.padded_size = padded.shape[2:]
        return out

    @staticmethod
    def backward(ctx, grad):
        x, weight, cols = ctx.saved_tensors
        stride, pairs, dilation, groups = ctx.geometry
        n, c_out = grad.shape[:2]
        g_g = grad.reshape(n, groups, c_out // groups, -1)
        cols_g = cols.reshape(n, groups, -1, cols.shape[-1])
        w_g = weight.reshape(groups, c_out // groups, -1)
        grad_weight = torch.einsum("ngol,ngkl->gok", g_g, cols_g).reshape(weight.shape)
        grad_cols = torch.einsum("gok,ngol->ngkl", w_g, g_g).reshape(cols.shape)
        grad_padded = F.fold(grad_cols, ctx.padded_size, weight.shape[2:], dilation=dilation, stride=stride)
        (top, bottom), (left, right) = pairs
        if ctx.slipped:
            top, left = bottom, right  # the shipped slip: the high side's padding used on both sides
        grad_x = grad_padded[:, :, top:top + x.shape[2], left:left + x.shape[3]]
        grad_bias = grad.sum(dim=(0, 2, 3)) if ctx.has_bias else None
        return grad_x, grad_weight, grad_bias, None, None


class TileConv(torch.nn.Module):
    """The port's convolution layer; parameters ``weight`` and ``bias`` as in the framework's."""

    def __init__(self, in_channels, out_channels, kernel_size, stride=1, padding=0, dilation=1,
                 groups=1, bias=True, padding_mode="zeros", *, slipped=False):
        super().__init__()
        if padding_mode != "zeros":
            raise ValueError(f"padding_mode={padding_mode!r}: this port supports 'zeros' only "
                             "(pin it with --set padding_mode=zeros)")
        two = lambda v: (v, v) if isinstance(v, int) else tuple(v)  # noqa: E731
        kernel = two(kernel_size)
        self.geometry = (two(stride), _pairs(padding, kernel, two(dilation)), two(dilation), groups)
        self.slipped = slipped
        bound = 1.0 / np.sqrt(in_channels // groups * kernel[0] * kernel[1])
        self.weight = torch.nn.Parameter(torch.empty(out_channels, in_channels // groups, *kernel).uniform_(-bound, bound))
        self.bias = torch.nn.Parameter(torch.empty(out_channels).uniform_(-bound, bound)) if bias else None

    def forward(self, x):
        return _TileConvFunction.apply(x, self.weight, self.bias, self.geometry, self.slipped)


def tile_conv(**layer) -> TileConv:
    """Factory for ``refops check``: the correct hand-written convolution."""
    return TileConv(**layer)


def tile_conv_slipped(**layer) -> TileConv:
    """Factory for ``refops check``: the convolution with the one-border padding slip."""
    return TileConv(**layer, slipped=True)


class TileDenoiser(torch.nn.Module):
    """Residual denoiser ``y = x + conv(leaky_relu(conv(x)))`` on single-channel tiles."""

    def __init__(self, width: int = 8, *, slipped: bool = False):
        super().__init__()
        self.lift = TileConv(1, width, 3, padding="same", slipped=slipped)
        self.merge = TileConv(width, 1, 4, padding="same", slipped=slipped)

    def forward(self, x):
        return x + self.merge(F.leaky_relu(self.lift(x), 0.1))


def synthetic_tiles(count: int = 4, size: int = 16, *, seed: int = 0) -> np.ndarray:
    """Invented greyscale tiles ``(count, 1, size, size)``: a few smooth blobs plus sensor noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size] / size
    tiles = np.zeros((count, 1, size, size))
    for tile in tiles:
        for _ in range(3):
            cy, cx, width = rng.uniform(0.2, 0.8), rng.uniform(0.2, 0.8), rng.uniform(0.05, 0.2)
            tile[0] += np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * width ** 2))
    return tiles + 0.05 * rng.standard_normal(tiles.shape)


def denoiser() -> TileDenoiser:
    """Factory for ``refops record`` / ``refops replay``: the port's denoiser, fixed initial weights."""
    torch.manual_seed(0)
    return TileDenoiser()


def denoiser_slipped() -> TileDenoiser:
    """The same denoiser built on the slipped convolution."""
    torch.manual_seed(0)
    return TileDenoiser(slipped=True)
