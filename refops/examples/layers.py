"""A hand-written conv2d (unfold + matmul in a custom autograd Function) and buggy twins.

:func:`conv2d` takes conv2d's layer configuration (the keyword arguments ``refops check --op
conv2d`` passes) and returns a module whose forward and backward are written out by hand:
forward ``W_g @ unfold(x)`` per group, backward ``g @ cols^T`` (weight), ``sum g`` (bias) and
``fold(W_g^T @ g)`` cropped by the padding (input). Padding modes other than ``"zeros"`` pad with
``F.pad`` (differentiated by autograd) before the hand-written core.

Each name in :data:`DEFECTS` is a factory of the same layer with one mistake kernel writers make::

    refops check refops.examples.layers:conv2d --op conv2d
    refops check refops.examples.layers:conv2d_kernel_flipped --op conv2d
"""
from __future__ import annotations

import functools

import torch
import torch.nn.functional as F
from torch import nn

DEFECTS = {
    "padding_on_the_high_side": "all the padding goes below/right of the input",
    "kernel_flipped": "true convolution (flipped kernel) instead of cross-correlation",
    "dilation_ignored_when_strided": "a strided path that forgets the dilation",
    "bias_gradient_not_summed_over_space": "bias gradient from the first output pixel only",
    "weight_gradient_scaled": "weight gradient off by a factor 1 + 2^-10",
    "weight_gradient_from_first_sample": "weight gradient of sample 0 times the batch size",
    "weight_gradient_accumulated_in_half": "weight-gradient sum over pixels kept in float16",
    "operands_rounded_to_10_bits": "GEMM operands rounded to 10 fraction bits (a half-precision unit)",
    "one_output_pixel_off": "the last output pixel of sample 0, channel 0 off by 1e-3",
    "input_changed_in_place": "the input is centred in place after the forward",
}


def _pair(value) -> tuple[int, int]:
    return tuple(value) if isinstance(value, (tuple, list)) else (value, value)


def _padding_pairs(padding, kernel, dilation) -> tuple[tuple[int, int], tuple[int, int]]:
    """``((top, bottom), (left, right))``; ``"same"`` puts an odd extra row/column at the end."""
    if padding == "valid":
        return (0, 0), (0, 0)
    if padding == "same":
        totals = [d * (k - 1) for k, d in zip(kernel, dilation)]
        return tuple((t // 2, t - t // 2) for t in totals)
    return tuple((p, p) for p in _pair(padding))


class _Geometry:
    def __init__(self, kernel, stride, dilation, pairs, groups, defect):
        if defect == "dilation_ignored_when_strided" and max(stride) > 1:
            dilation = (1, 1)
        if defect == "padding_on_the_high_side":
            pairs = tuple((0, lo + hi) for lo, hi in pairs)
        self.kernel, self.stride, self.dilation, self.pairs = kernel, stride, dilation, pairs
        self.groups, self.defect = groups, defect

    def pad(self, x):
        (top, bottom), (left, right) = self.pairs
        return F.pad(x, (left, right, top, bottom))

    def crop(self, padded, size):
        (top, _), (left, _) = self.pairs
        return padded[:, :, top:top + size[0], left:left + size[1]]

    def unfold(self, padded):
        """``(N, G, C_g * kh * kw, L)`` columns of the padded input."""
        cols = F.unfold(padded, self.kernel, self.dilation, 0, self.stride)
        return cols.reshape(cols.shape[0], self.groups, -1, cols.shape[-1])


def _wide(t):
    """Half operands widen exactly to float32: GEMMs and the bias add accumulate there and the
    result rounds once to the I/O format, as a careful kernel does."""
    return t.float() if t.dtype in (torch.float16, torch.bfloat16) else t


def _matmul(a, b):
    return torch.matmul(_wide(a), _wide(b)).to(a.dtype)


def _rounded_to_10_bits(t):
    return t.to(torch.float16).to(t.dtype)


class _Conv2dFunction(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x, weight, bias, geometry):
        padded = geometry.pad(x)
        cols = geometry.unfold(padded)
        w = weight.flip(-1, -2) if geometry.defect == "kernel_flipped" else weight
        wg = w.reshape(geometry.groups, w.shape[0] // geometry.groups, -1)
        if geometry.defect == "operands_rounded_to_10_bits":
            wg, cols = _rounded_to_10_bits(wg), _rounded_to_10_bits(cols)
        out = torch.matmul(_wide(wg), _wide(cols))  # (N, G, O_g, L)
        oh = (padded.shape[2] - geometry.dilation[0] * (geometry.kernel[0] - 1) - 1) // geometry.stride[0] + 1
        out = out.reshape(x.shape[0], w.shape[0], oh, -1)
        if bias is not None:
            out = out + _wide(bias).reshape(1, -1, 1, 1)
        out = out.to(x.dtype)
        if geometry.defect == "one_output_pixel_off":
            out[0, 0, -1, -1] += 1e-3
        ctx.save_for_backward(cols, wg)
        ctx.geometry, ctx.x_shape, ctx.padded_shape = geometry, x.shape, padded.shape
        ctx.w_shape, ctx.has_bias = weight.shape, bias is not None
        if geometry.defect == "input_changed_in_place":
            x.sub_(x.mean())
        return out

    @staticmethod
    def backward(ctx, grad):
        cols, wg = ctx.saved_tensors
        geometry, defect = ctx.geometry, ctx.geometry.defect
        g = grad.reshape(grad.shape[0], geometry.groups, -1, grad.shape[2] * grad.shape[3])
        gw = _weight_gradient(g, cols, defect).reshape(ctx.w_shape)
        if defect == "kernel_flipped":
            gw = gw.flip(-1, -2)
        gcols = _matmul(wg.transpose(1, 2), g).reshape(grad.shape[0], -1, g.shape[-1])
        gpadded = F.fold(gcols, ctx.padded_shape[2:], geometry.kernel, geometry.dilation, 0, geometry.stride)
        gx = geometry.crop(gpadded, ctx.x_shape[2:])
        gb = None
        if ctx.has_bias:
            gb = grad[:, :, 0, 0].sum(0) if defect == "bias_gradient_not_summed_over_space" \
                else grad.sum((0, 2, 3), dtype=torch.float64 if grad.dtype == torch.float64 else torch.float32
                              ).to(grad.dtype)
        return gx, gw, gb, None


def _weight_gradient(g, cols, defect):
    """``sum over samples and pixels of g cols^T`` -> ``(G, O_g, K)``."""
    if defect == "weight_gradient_from_first_sample":
        return g.shape[0] * _matmul(g[0], cols[0].transpose(1, 2))
    if defect == "weight_gradient_accumulated_in_half":
        products = g.unsqueeze(3) * cols.unsqueeze(2)  # (N, G, O_g, K, L)
        total = torch.zeros(products.shape[1:4], dtype=torch.float16)
        for pixel in products.movedim(-1, 0).reshape(-1, *products.shape[1:4]):
            total = (total + pixel.to(torch.float16)).to(torch.float16)
        return total.to(g.dtype)
    gw = _matmul(g.permute(1, 2, 0, 3).flatten(2), cols.permute(1, 0, 3, 2).flatten(1, 2))
    # (G, O_g, N*L) @ (G, N*L, K): one sum over samples and pixels
    return gw * (1 + 2 ** -10) if defect == "weight_gradient_scaled" else gw


class HandConv2d(nn.Module):
    """conv2d with a hand-written forward and backward (``defect`` names a slip from DEFECTS)."""

    def __init__(self, in_channels, out_channels, kernel_size, stride=1, padding=0, dilation=1, groups=1,
                 bias=True, padding_mode="zeros", *, defect=None):
        super().__init__()
        if defect is not None and defect not in DEFECTS:
            raise ValueError(f"defect={defect!r}: expected None or one of {', '.join(DEFECTS)}")
        kernel, dilation = _pair(kernel_size), _pair(dilation)
        self.padding_mode = padding_mode
        self.geometry = _Geometry(kernel, _pair(stride), dilation, _padding_pairs(padding, kernel, dilation),
                                  groups, defect)
        self.weight = nn.Parameter(torch.empty(out_channels, in_channels // groups, *kernel))
        self.bias = nn.Parameter(torch.empty(out_channels)) if bias else None

    def forward(self, x):
        geometry = self.geometry
        if self.padding_mode != "zeros":
            (top, bottom), (left, right) = geometry.pairs
            x = F.pad(x, (left, right, top, bottom), mode=self.padding_mode)
            geometry = _Geometry(geometry.kernel, geometry.stride, geometry.dilation, ((0, 0), (0, 0)),
                                 geometry.groups, geometry.defect)
        return _Conv2dFunction.apply(x, self.weight, self.bias, geometry)


def conv2d(**layer) -> HandConv2d:
    """The correct hand-written conv2d."""
    return HandConv2d(**layer)


for _defect in DEFECTS:
    globals()[f"conv2d_{_defect}"] = functools.partial(HandConv2d, defect=_defect)
