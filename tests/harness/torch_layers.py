"""Factories that build torch's own layers from refops layer configurations (the subjects of the
no-false-alarm tests), and realistic buggy layers (the subjects of the teeth tests)."""
import torch
import torch.nn.functional as F
from torch import nn

ACTIVATIONS = {"relu": nn.ReLU, "relu6": nn.ReLU6, "leaky_relu": nn.LeakyReLU, "elu": nn.ELU, "selu": nn.SELU,
               "celu": nn.CELU, "gelu": nn.GELU, "silu": nn.SiLU, "mish": nn.Mish, "softplus": nn.Softplus,
               "sigmoid": nn.Sigmoid, "logsigmoid": nn.LogSigmoid, "tanh": nn.Tanh, "hardtanh": nn.Hardtanh,
               "hardsigmoid": nn.Hardsigmoid, "hardswish": nn.Hardswish, "softsign": nn.Softsign,
               "prelu": nn.PReLU}


class Atan(nn.Module):
    def forward(self, x):
        return torch.atan(x)


FACTORIES = {
    "conv2d": nn.Conv2d, "linear": nn.Linear, "max_pool2d": nn.MaxPool2d, "avg_pool2d": nn.AvgPool2d,
    "adaptive_avg_pool2d": nn.AdaptiveAvgPool2d, "adaptive_max_pool2d": nn.AdaptiveMaxPool2d,
    "softmax": nn.Softmax, "log_softmax": nn.LogSoftmax, "atan": Atan,
    "layer_norm": nn.LayerNorm, "group_norm": nn.GroupNorm, "mse_loss": nn.MSELoss,
    "cross_entropy": nn.CrossEntropyLoss, "binary_cross_entropy_with_logits": nn.BCEWithLogitsLoss,
    **ACTIVATIONS,
}


def max_pool(**layer):
    """Run in a worker process: torch's max-pool backward is unsafe on padding-only windows."""
    return nn.MaxPool2d(**layer)


class _AnyRankBatchNorm(nn.BatchNorm1d):
    """torch's batch norm without the rank check of the 1-d/2-d classes (the maths is the same)."""

    def _check_input_dim(self, x):
        pass


def batch_norm(num_features, eps, momentum, affine, track_running_stats):
    return _AnyRankBatchNorm(num_features, eps=eps, momentum=momentum, affine=affine,
                             track_running_stats=track_running_stats)


FACTORIES["batch_norm"] = batch_norm


# ----------------------------------------------------------------------------------------------
# Buggy layers, each a mistake kernel writers make. They take conv2d's (or the op's) layer config.

class _WithBackwardDefect(torch.autograd.Function):
    """torch's own forward and backward, then one defect applied to the gradients."""

    @staticmethod
    def forward(ctx, x, w, b, conv, defect):
        ctx.save_for_backward(x, w)
        ctx.conv, ctx.defect, ctx.has_bias = conv, defect, b is not None
        return conv._conv_forward(x, w, b)

    @staticmethod
    def backward(ctx, g):
        x, w = ctx.saved_tensors
        with torch.enable_grad():
            xd, wd = x.detach().requires_grad_(), w.detach().requires_grad_()
            gx, gw = torch.autograd.grad(ctx.conv._conv_forward(xd, wd, None), (xd, wd), g)
        gb = g.sum((0, 2, 3)) if ctx.has_bias else None
        if ctx.defect == "weight_gradient_scaled":
            gw = gw * (1 + 2 ** -10)
        elif ctx.defect == "bias_gradient_from_one_pixel" and gb is not None:
            gb = g[:, :, 0, 0].sum(0) * g.shape[2] * g.shape[3]
        elif ctx.defect == "one_input_pixel_off":
            gx = gx.clone()
            gx[0, 0, -1, -1] += 1e-3
        elif ctx.defect == "weight_gradient_rounded_to_bfloat16":
            gw = gw.to(torch.bfloat16).to(gw.dtype)
        return gx, gw, gb, None, None


class BackwardDefect(nn.Conv2d):
    def __init__(self, defect, **layer):
        super().__init__(**layer)
        self.defect = defect

    def forward(self, x):
        return _WithBackwardDefect.apply(x, self.weight, self.bias, self, self.defect)


class ForwardDefect(nn.Conv2d):
    def __init__(self, defect, **layer):
        super().__init__(**layer)
        self.defect = defect

    def forward(self, x):
        w, defect = self.weight, self.defect
        if defect == "kernel_flipped":
            w = w.flip(-1, -2)
        elif defect == "padding_on_the_high_side" and self.padding_mode == "zeros" \
                and not isinstance(self.padding, str):
            ph, pw = self.padding
            return F.conv2d(F.pad(x, (0, 2 * pw, 0, 2 * ph)), w, self.bias, self.stride, 0,
                            self.dilation, self.groups)
        elif defect == "dilation_ignored_when_strided" and max(self.stride) > 1:
            return F.conv2d(x, w, self.bias, self.stride, self.padding, 1, self.groups) \
                if self.padding_mode == "zeros" else self._conv_forward(x, w, self.bias)
        elif defect == "operands_rounded_to_10_bits":
            w, x = w.to(torch.float16).to(w.dtype), x.to(torch.float16).to(x.dtype)
        elif defect == "input_changed_in_place":
            out = self._conv_forward(x, w, self.bias)
            with torch.no_grad():
                x.add_(0.5)
            return out
        elif defect == "cross_batch_leak":
            out = self._conv_forward(x, w, self.bias)
            return out + 1e-3 * out.mean(0, keepdim=True)
        return self._conv_forward(x, w, self.bias)


class TiedMaxPool(nn.MaxPool2d):
    """Max-pool whose backward sends the gradient to every tied maximum, not only the first."""

    def forward(self, x):
        out = super().forward(x)
        return _TiedGrad.apply(x, out, self)


class _TiedGrad(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x, out, pool):
        ctx.save_for_backward(x)
        ctx.pool = pool
        return out.detach().clone()

    @staticmethod
    def backward(ctx, g):
        (x,) = ctx.saved_tensors
        p = ctx.pool
        cols = F.unfold(x, p.kernel_size, p.dilation, p.padding, p.stride)
        c = x.shape[1]
        cols = cols.reshape(x.shape[0], c, -1, cols.shape[-1])
        hit = (cols == cols.max(2, keepdim=True).values).to(g.dtype)
        back = (hit * g.reshape(x.shape[0], c, 1, -1)).reshape(x.shape[0], -1, cols.shape[-1])
        return F.fold(back, x.shape[2:], p.kernel_size, p.dilation, p.padding, p.stride), None, None


class OverflowingSoftplus(nn.Module):
    """softplus computed as log(1 + exp(x)): overflows for large x."""

    def __init__(self, beta=1.0, threshold=20.0):
        super().__init__()
        self.beta = beta

    def forward(self, x):
        return torch.log(1 + torch.exp(self.beta * x)) / self.beta


# ----------------------------------------------------------------------------------------------
# Faulty subjects (relu layer configuration: none)

class Faulty(nn.Module):
    def __init__(self, fault):
        super().__init__()
        self.fault = fault

    def forward(self, x):
        if self.fault == "raises":
            raise RuntimeError("kernel not implemented for this shape")
        if self.fault == "wrong_shape":
            return torch.relu(x).reshape(-1)[:-1] if x.numel() > 1 else torch.relu(x).reshape(1, -1, 1)
        if self.fault == "wrong_dtype":
            return torch.relu(x).to(torch.float64)
        if self.fault == "nan":
            return torch.relu(x) * float("nan")
        if self.fault == "hang":
            import time
            time.sleep(60)
        if self.fault == "abort":
            import os
            os.abort()
        return torch.relu(x)


def raises(**layer):
    return Faulty("raises")


def wrong_shape(**layer):
    return Faulty("wrong_shape")


def wrong_dtype(**layer):
    return Faulty("wrong_dtype")


def nan(**layer):
    return Faulty("nan")


def hang(**layer):
    return Faulty("hang")


def abort(**layer):
    return Faulty("abort")


def relu(**layer):
    return nn.ReLU()


def conv2d(**layer):
    return nn.Conv2d(**layer)
