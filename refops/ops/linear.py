"""Oracles of the linear family: ``linear``, and the bilinear-layer pattern that conv shares.

A layer ``y = B(x, w) + b`` that is linear in ``x`` and in ``w`` separately is described by three
maps (:class:`BilinearLayer`): the forward ``B``, its input gradient ``g -> B(., w)^T g`` and its
weight gradient ``g -> B(x, .)^T g``. The vjp and the rounding-bound ingredients of every such op
come from those maps alone: the magnitude M is the same map applied to absolute values and the
term count k the same map applied to ones, so no op carries a second implementation for them.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from . import _checks
from ._registry import CaseConfig, ErrorTerms, register

__all__ = ["linear"]

Map = Callable[[np.ndarray, np.ndarray], np.ndarray]


@dataclass(frozen=True)
class BilinearLayer:
    """``y = forward(x, w) + b``, with ``b`` broadcast along ``channel_axis`` of ``y``.

    ``input_gradient(g, w)`` and ``weight_gradient(x, g)`` are the adjoints of ``forward`` in its
    first and second argument. ``forward_accumulate`` and ``input_accumulate`` say how
    implementations accumulate the output and the input gradient: ``"io"`` for a scatter-add of
    overlapping contributions, ``"wide"`` for a GEMM. Weight and bias gradients are reductions,
    always ``"wide"``.
    """

    forward: Map
    input_gradient: Map
    weight_gradient: Map
    channel_axis: int
    forward_accumulate: str = "wide"
    input_accumulate: str = "wide"

    def _with_bias(self, y: np.ndarray, bias: np.ndarray | None) -> np.ndarray:
        """Add the bias in place: ``y`` is the forward map's fresh result (no second output)."""
        if bias is not None:
            shape = [1] * y.ndim
            shape[self.channel_axis] = bias.size
            y += bias.reshape(shape)
        return y

    def bias_gradient(self, g: np.ndarray) -> np.ndarray:
        """Sum of the cotangent over every axis but the channel axis."""
        axis = self.channel_axis % g.ndim
        return g.sum(axis=tuple(a for a in range(g.ndim) if a != axis))

    def output(self, x: np.ndarray, w: np.ndarray, bias: np.ndarray | None) -> np.ndarray:
        return self._with_bias(self.forward(x, w), bias)

    def vjp(self, g: np.ndarray, x: np.ndarray, w: np.ndarray,
            bias: np.ndarray | None) -> dict[str, np.ndarray]:
        grads = {"input": self.input_gradient(g, w), "weight": self.weight_gradient(x, g)}
        if bias is not None:
            grads["bias"] = self.bias_gradient(g)
        return grads

    def error_terms(self, g: np.ndarray, x: np.ndarray, w: np.ndarray,
                    bias: np.ndarray | None) -> dict[str, ErrorTerms]:
        """M from the maps on absolute values, k from the maps on ones (+1 for the bias term)."""
        ag, ax, aw = np.abs(g), np.abs(x), np.abs(w)
        og, ox, ow = np.ones_like(g), np.ones_like(x), np.ones_like(w)
        terms = {
            "output": ErrorTerms(self.output(ax, aw, None if bias is None else np.abs(bias)),
                                 self.forward(ox, ow) + (bias is not None), self.forward_accumulate),
            "input": ErrorTerms(self.input_gradient(ag, aw), self.input_gradient(og, ow),
                                self.input_accumulate),
            "weight": ErrorTerms(self.weight_gradient(ax, ag), self.weight_gradient(ox, og), "wide"),
        }
        if bias is not None:
            terms["bias"] = ErrorTerms(self.bias_gradient(ag), self.bias_gradient(og), "wide")
        return terms


# ---------------------------------------------------------------------------------------------
# linear

def _linear_forward(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    return np.matmul(x, w.T)


def _linear_input_gradient(g: np.ndarray, w: np.ndarray) -> np.ndarray:
    return np.matmul(g, w)


def _linear_weight_gradient(x: np.ndarray, g: np.ndarray) -> np.ndarray:
    return np.matmul(g.reshape(-1, g.shape[-1]).T, x.reshape(-1, x.shape[-1]))


# The input gradient of linear is a GEMM, accumulated wide like the forward.
_LINEAR = BilinearLayer(_linear_forward, _linear_input_gradient, _linear_weight_gradient,
                        channel_axis=-1)


def _validate_linear(arrays: dict, params: dict) -> dict:
    x, w, bias = arrays["input"], arrays["weight"], arrays["bias"]
    if x.ndim == 0:
        _checks.fail("input", x, "expected at least 1 dimension (*, in_features), got 0")
    _checks.check_rank("weight", w, (2,), "(out_features, in_features)")
    if x.shape[-1] != w.shape[1]:
        _checks.fail("input", x, f"input.shape[-1]={x.shape[-1]} must equal "
                     f"weight.shape[1] = in_features = {w.shape[1]}")
    if bias is not None:
        _checks.check_shape("bias", bias, (w.shape[0],), "(out_features,) = (weight.shape[0],)")
    return params


def _linear_output_shape(arrays: dict, params: dict) -> tuple[int, ...]:
    return arrays["input"].shape[:-1] + (arrays["weight"].shape[0],)


def _linear_space(draw) -> CaseConfig:
    in_features = draw.integer("in_features", 1, 8)
    out_features = draw.integer("out_features", 1, 8)
    bias = draw.choice("bias", [True, False])
    batch = draw.choice("batch", [(1,), (), (4,), (3,), (2, 3), (1, 2, 2)])
    batch = (batch,) if isinstance(batch, int) else tuple(batch)
    layer = dict(in_features=in_features, out_features=out_features, bias=bias)
    shapes = dict(input=batch + (in_features,), weight=(out_features, in_features),
                  bias=(out_features,) if bias else None)
    return CaseConfig(layer=layer, params={}, shapes=shapes, bounds={},
                      drawn={**layer, "batch": batch})


def _linear_vjp(g, input, weight, bias=None):
    return _LINEAR.vjp(g, input, weight, bias)


def _linear_error_terms(g, input, weight, bias=None):
    return _LINEAR.error_terms(g, input, weight, bias)


@register(vjp=_linear_vjp, validate=_validate_linear, space=_linear_space,
          error_terms=_linear_error_terms, output_shape=_linear_output_shape)
def linear(input, weight, bias=None):
    """Affine map of the last axis: ``y = x W^T + b``.

    Parameters
    ----------
    input : array (*, in_features)
        Any number of leading dims (none for a single vector).
    weight : array (out_features, in_features)
    bias : array (out_features,) or None

    Formula
    -------
    ``y[..., o] = sum_i input[..., i] * weight[o, i] + bias[o]``.
    vjp: ``grad_input = g W``, ``grad_weight = sum over leading dims of g^T x``,
    ``grad_bias = sum over leading dims of g``.

    Output shape
    ------------
    ``input.shape[:-1] + (out_features,)``.

    Non-differentiable points
    -------------------------
    none (the map is bilinear in input and weight).

    Notes
    -----
    Error terms: M is the same map on ``|x|, |W|, |b|`` (``|g|`` for gradients); k is
    ``in_features`` (+1 with a bias) for the output, ``out_features`` for the input gradient and
    the number of leading positions for the weight and bias gradients. Every reduction is a GEMM
    and is accumulated ``"wide"``.
    """
    return _LINEAR.output(input, weight, bias)
