"""Operators that no oracle covers, each with a hand-written backward: right ones and slipped twins."""
import torch
from torch import nn


class _Gate(torch.autograd.Function):
    """y = x * sigmoid(a * x + b), a and b per channel (dim 1)."""

    @staticmethod
    def forward(ctx, x, a, b, slip):
        shape = (1, -1) + (1,) * (x.ndim - 2)
        s = torch.sigmoid(a.reshape(shape) * x + b.reshape(shape))
        ctx.save_for_backward(x, a, s)
        ctx.shape, ctx.slip = shape, slip
        return x * s

    @staticmethod
    def backward(ctx, g):
        x, a, s = ctx.saved_tensors
        ds = g * x * s * (1 - s)                      # d/d(a x + b), times g
        if ctx.slip == "sigmoid-derivative":
            ds = g * x * s                            # forgot the (1 - s) factor
        grad_x = g * s + ds * a.reshape(ctx.shape)
        if ctx.slip == "chain-rule":
            grad_x = g * s                            # dropped the path through the gate
        reduce = [d for d in range(x.ndim) if d != 1]
        grad_a = (ds * x).sum(reduce)
        grad_b = ds.sum(reduce)
        return grad_x, grad_a, grad_b, None


class GatedUnit(nn.Module):
    def __init__(self, channels=3, slip=None):
        super().__init__()
        self.a = nn.Parameter(torch.randn(channels))
        self.b = nn.Parameter(torch.randn(channels))
        self.slip = slip

    def forward(self, x):
        return _Gate.apply(x, self.a, self.b, self.slip)


class _SquaredDistance(torch.autograd.Function):
    """d[i] = sum_k (x[i, k] - y[i, k])^2."""

    @staticmethod
    def forward(ctx, x, y, slip):
        ctx.save_for_backward(x - y)
        ctx.slip = slip
        return ((x - y) ** 2).sum(-1)

    @staticmethod
    def backward(ctx, g):
        (diff,) = ctx.saved_tensors
        grad = 2 * diff * g.unsqueeze(-1)
        return grad, None if ctx.slip == "second-input" else -grad, None


def gated_unit():
    return GatedUnit()


def gated_unit_slipped():
    return GatedUnit(slip="sigmoid-derivative")


def gated_unit_chain_slip():
    return GatedUnit(slip="chain-rule")


def squared_distance():
    return lambda x, y: _SquaredDistance.apply(x, y, None)


def squared_distance_slipped():
    return lambda x, y: _SquaredDistance.apply(x, y, "second-input")


def in_place():
    def scale(x):
        with torch.no_grad():
            x.mul_(2.0)  # changes the caller's input behind autograd's back
        return x * 1.0
    return scale
