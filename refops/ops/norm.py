"""Oracles of the normalisation family: ``batch_norm``, ``layer_norm``, ``group_norm``.

All three standardise over a set of axes, ``xhat = (x - mean) / sqrt(var + eps)`` with the biased
(population) variance computed in two passes, then apply a per-channel (or per-feature) affine
map. :class:`_Standardised` holds the shared forward, its vjp and its error terms; each op only
says which axes it reduces over and how its weight broadcasts. The error terms' ``rounded`` parts
model statistics saved in the I/O format, as torch's half-format CPU kernels save them.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from . import _checks
from ._registry import CaseConfig, ErrorTerms, register

__all__ = ["batch_norm", "layer_norm", "group_norm", "batch_norm_running_stats"]

# The I/O formats whose kernels round the statistics (float16, bfloat16) have a unit roundoff of
# at most 2**-8. It bounds the one effect of those roundings that is not small: the rounded mean
# shifts xhat by up to u |mean| / std, which grows with |mean| / std.
_STATISTICS_ROUNDOFF = 2.0 ** -8


@dataclass
class _Standardised:
    """``xhat`` of ``x`` over ``axes`` (kept dims), with the pieces its vjp and error terms need."""

    x: np.ndarray
    axes: tuple[int, ...]
    eps: float
    rounded_variance: bool = False

    def __post_init__(self):
        self.count = int(np.prod([self.x.shape[a] for a in self.axes]))
        self.mean = np.mean(self.x, axis=self.axes, keepdims=True)
        centred = self.x - self.mean
        self.inv_std = 1.0 / np.sqrt(np.mean(centred * centred, axis=self.axes, keepdims=True) + self.eps)
        self.xhat = centred * self.inv_std
        # Size of the statistics' rounding errors relative to xhat: |xhat| + mean|x| / std.
        self.xhat_error = np.abs(self.xhat) + np.mean(np.abs(self.x), axis=self.axes, keepdims=True) * self.inv_std
        self._rounded_statistics()

    def _rounded_statistics(self):
        """Frameworks save the mean and 1/std rounded to the I/O format, and the backward (batch
        norm's forward too) reads them (torch's half kernels). The mean's rounding shifts xhat by
        up to ``shift * u``; 1/std carries ``k u``: one rounding, or (``rounded_variance``, torch's
        bfloat16 batch norm) a variance taken about the rounded mean (larger by the squared
        shift), its sum and itself rounded too. ``stats_rounded``: xhat's sensitivity to them
        (first order in u, but for the shift)."""
        self.shift = np.abs(self.mean) * self.inv_std
        self.max_shift = _STATISTICS_ROUNDOFF * self.shift
        self.rstd_roundings = 2.0 + self.max_shift * self.shift / 2.0 if self.rounded_variance else 1.0
        self.stats_rounded = self.shift + self.rstd_roundings * (np.abs(self.xhat) + self.max_shift)

    def _mean(self, v: np.ndarray) -> np.ndarray:
        return np.mean(v, axis=self.axes, keepdims=True)

    def vjp(self, g_hat: np.ndarray) -> np.ndarray:
        """Gradient w.r.t. ``x`` from the gradient w.r.t. ``xhat``: ``(g - mean g - xhat mean(g xhat)) / std``."""
        return self.inv_std * (g_hat - self._mean(g_hat) - self.xhat * self._mean(g_hat * self.xhat))

    def vjp_magnitude(self, g_hat: np.ndarray) -> np.ndarray:
        """M of the input gradient: each rounded statistic's error propagated to the result."""
        a = np.abs(g_hat)
        h = np.abs(self._mean(g_hat * self.xhat))
        return np.abs(self.vjp(g_hat)) + self.inv_std * (
            a + self._mean(a) + h * self.xhat_error + np.abs(self.xhat) * self._mean(a * self.xhat_error))

    def vjp_rounded(self, g_hat: np.ndarray) -> np.ndarray:
        """The input gradient's sensitivity to the rounded saved statistics. With ``c = mean g``,
        ``h = mean(g xhat)``, the vjp ``(g - c - xhat h) / std`` at a mean shifted by ``d`` changes
        by ``d / std**2 (h + xhat' c)``, ``xhat' = xhat - d / std``; at 1/std scaled by
        ``1 + e`` by ``e / std (g - c - 3 xhat' h')``, ``h' = h - c d / std``."""
        c, h = self._mean(g_hat), self._mean(g_hat * self.xhat)
        abs_c, abs_h, s = np.abs(c), np.abs(h), self.max_shift
        mean_part = self.shift * self.inv_std * (np.abs(h + self.xhat * c) + s * abs_c)
        rstd_part = self.rstd_roundings * self.inv_std * (
            np.abs(g_hat - c - 3.0 * self.xhat * h) + 3.0 * s * (abs_h + (np.abs(self.xhat) + s) * abs_c))
        return mean_part + rstd_part


def _input_terms(std, g_hat: np.ndarray) -> ErrorTerms:
    """Terms of the input gradient from the (signed) gradient w.r.t. xhat."""
    return ErrorTerms(std.vjp_magnitude(np.abs(g_hat)), std.count + 2, rounded=std.vjp_rounded(g_hat))


def _affine_shape(ndim: int, channel_axis: int | None, weight_shape: tuple[int, ...]) -> tuple[int, ...]:
    """Broadcast shape of the weight: along one channel axis, or over the trailing dims."""
    if channel_axis is None:
        return (1,) * (ndim - len(weight_shape)) + tuple(weight_shape)
    shape = [1] * ndim
    shape[channel_axis] = weight_shape[0]
    return tuple(shape)


def _sum_to(v: np.ndarray, shape: tuple[int, ...], target: tuple[int, ...]) -> np.ndarray:
    """Undo the broadcast of an array of ``target`` shape that was viewed as ``shape``."""
    axes = tuple(i for i, n in enumerate(shape) if n == 1 and v.shape[i] != 1)
    return np.sum(v, axis=axes, keepdims=True).reshape(target)


def _affine(xhat, weight, bias, channel_axis):
    if weight is None and bias is None:
        return xhat
    template = weight if weight is not None else bias
    shape = _affine_shape(xhat.ndim, channel_axis, template.shape)
    y = xhat * weight.reshape(shape) if weight is not None else xhat.copy()
    if bias is not None:
        y += bias.reshape(shape)
    return y


def _affine_vjp(g, xhat, weight, bias, channel_axis, xhat_grad) -> dict:
    """Gradients of ``y = w * xhat + b``: ``xhat_grad`` maps the gradient w.r.t. xhat to x's."""
    template = weight if weight is not None else bias
    shape = None if template is None else _affine_shape(g.ndim, channel_axis, template.shape)
    g_hat = g * weight.reshape(shape) if weight is not None else g
    grads = {"input": xhat_grad(g_hat)}
    if weight is not None:
        grads["weight"] = _sum_to(g * xhat, shape, weight.shape)
    if bias is not None:
        grads["bias"] = _sum_to(g, shape, bias.shape)
    return grads


def _affine_error_terms(g, xhat_error, count, weight, bias, channel_axis, input_terms, *,
                        stats_rounded, forward_rounded=False) -> dict:
    """Terms of ``y = w * xhat + b``; ``xhat_error`` sizes xhat's error, ``count`` its statistics'
    sums, ``stats_rounded`` xhat's sensitivity to the statistics the backward reads rounded to the
    I/O format (the forward too where ``forward_rounded``)."""
    template = weight if weight is not None else bias
    shape = None if template is None else _affine_shape(g.ndim, channel_axis, template.shape)
    aw = 1.0 if weight is None else np.abs(weight.reshape(shape))
    ab = 0.0 if bias is None else np.abs(bias.reshape(shape))
    ag = np.abs(g)
    terms = {"output": ErrorTerms(aw * xhat_error + ab, count + 2,
                                  rounded=aw * stats_rounded if forward_rounded else 0.0),
             "input": input_terms(g * (1.0 if weight is None else weight.reshape(shape)))}
    if weight is not None:
        terms["weight"] = ErrorTerms(_sum_to(ag * xhat_error, shape, weight.shape),
                                     g.size // weight.size + count,
                                     rounded=_sum_to(ag * stats_rounded, shape, weight.shape))
    if bias is not None:
        terms["bias"] = ErrorTerms(_sum_to(ag, shape, bias.shape), g.size // bias.size)
    return terms


def _check_affine(arrays: dict, shape: tuple[int, ...], why: str) -> None:
    for name in ("weight", "bias"):
        if arrays[name] is not None:
            _checks.check_shape(name, arrays[name], shape, why)


def _eps(params: dict) -> float:
    return _checks.as_real("eps", params["eps"], positive=True)


# ---------------------------------------------------------------------------------------------
# batch_norm

def _validate_batch_norm(arrays: dict, params: dict) -> dict:
    x = arrays["input"]
    if x.ndim < 2:
        _checks.fail("input", x, f"expected (N, C, *) with at least 2 dimensions, got {x.ndim}")
    channels = x.shape[1]
    _check_affine(arrays, (channels,), "(C,) = (input.shape[1],)")
    training = _checks.as_bool("training", params["training"])
    stats = {}
    for name in ("running_mean", "running_var"):
        value = params[name]
        if value is not None:
            value = _checks.as_float_array(name, value)
            _checks.check_shape(name, value, (channels,), "(C,) = (input.shape[1],)")
        stats[name] = value
    if not training and (stats["running_mean"] is None or stats["running_var"] is None):
        _checks.fail("running_mean" if stats["running_mean"] is None else "running_var", None,
                     "training=False normalises with the running statistics: pass running_mean and running_var")
    if not training and np.any(stats["running_var"] < 0):
        _checks.fail("running_var", stats["running_var"], "variances must be >= 0")
    if training and x.size // channels <= 1:
        _checks.fail("input", x, "training=True needs more than one value per channel "
                     "(N * spatial size > 1) to estimate the batch statistics")
    return {**stats, "training": training, "momentum": _checks.as_real("momentum", params["momentum"]),
            "eps": _eps(params)}


def _bn_axes(x: np.ndarray) -> tuple[int, ...]:
    return (0,) + tuple(range(2, x.ndim))


@dataclass
class _Fixed:
    """Eval-mode batch norm: ``xhat = (x - running_mean) / sqrt(running_var + eps)``, no reductions."""

    x: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    eps: float

    def __post_init__(self):
        shape = _affine_shape(self.x.ndim, 1, self.mean.shape)
        self.count = 1
        self.inv_std = 1.0 / np.sqrt(self.var.reshape(shape) + self.eps)
        centred = self.x - self.mean.reshape(shape)
        self.xhat = centred * self.inv_std
        self.xhat_error = (np.abs(self.x) + np.abs(self.mean.reshape(shape))) * self.inv_std + np.abs(self.xhat)
        self.stats_rounded = 0.0  # the running statistics are inputs

    def vjp(self, g_hat: np.ndarray) -> np.ndarray:
        return g_hat * self.inv_std

    def vjp_magnitude(self, g_hat: np.ndarray) -> np.ndarray:
        return np.abs(g_hat) * self.inv_std

    def vjp_rounded(self, g_hat: np.ndarray) -> float:
        return 0.0


def _standardise_batch(input, running_mean, running_var, training, eps):
    if training:
        return _Standardised(input, _bn_axes(input), eps, rounded_variance=True)
    return _Fixed(input, running_mean, running_var, eps)


def _batch_norm_vjp(g, input, weight=None, bias=None, *, running_mean, running_var, training, momentum, eps):
    std = _standardise_batch(input, running_mean, running_var, training, eps)
    return _affine_vjp(g, std.xhat, weight, bias, 1, std.vjp)


def _batch_norm_error_terms(g, input, weight=None, bias=None, *, running_mean, running_var, training,
                            momentum, eps):
    std = _standardise_batch(input, running_mean, running_var, training, eps)
    # torch's half kernels normalise with the rounded statistics in the forward too.
    return _affine_error_terms(g, std.xhat_error, std.count, weight, bias, 1,
                               functools.partial(_input_terms, std),
                               stats_rounded=std.stats_rounded, forward_rounded=True)


def _batch_norm_space(draw) -> CaseConfig:
    channels = draw.integer("num_features", 1, 6)
    spatial = draw.choice("spatial", [(), (3,), (2, 3), (4, 4)])
    spatial = tuple(spatial)
    batch = draw.integer("batch", 2 if not spatial else 1, 4)
    training = draw.choice("training", [True, False])
    affine = draw.choice("affine", [True, False])
    eps = draw.choice("eps", [1e-5, 1e-3])
    momentum = draw.choice("momentum", [0.1, 0.5])
    stats = (channels,) if not training else None
    layer = dict(num_features=channels, eps=eps, momentum=momentum, affine=affine,
                 track_running_stats=not training)
    shapes = dict(input=(batch, channels) + spatial, weight=(channels,) if affine else None,
                  bias=(channels,) if affine else None, running_mean=stats, running_var=stats)
    return CaseConfig(layer=layer, params=dict(training=training, momentum=momentum, eps=eps),
                      shapes=shapes, bounds={"running_var": (0.1, 2.0)},
                      drawn={**layer, "training": training, "batch": batch, "spatial": spatial})


@register(vjp=_batch_norm_vjp, validate=_validate_batch_norm, space=_batch_norm_space,
          error_terms=_batch_norm_error_terms)
def batch_norm(input, weight=None, bias=None, *, running_mean=None, running_var=None, training=True,
               momentum=0.1, eps=1e-5):
    """Batch normalisation (Ioffe & Szegedy 2015) over ``(N, *spatial)`` per channel.

    Parameters
    ----------
    input : array (N, C, *)
    weight, bias : arrays (C,) or None
    running_mean, running_var : arrays (C,) or None
        Used (and required) when ``training=False``; never differentiated. The updated running
        statistics of a training step come from :func:`batch_norm_running_stats`.

    Formula
    -------
    ``y = w * (x - mu) / sqrt(var + eps) + b`` per channel. ``training=True``: ``mu`` and ``var``
    are the batch mean and biased variance over ``(N, *spatial)``; vjp
    ``grad_input = w / std * (g - mean(g) - xhat * mean(g * xhat))``. ``training=False``:
    ``mu, var`` = the running statistics; ``grad_input = g * w / std``. Always
    ``grad_weight = sum(g * xhat)``, ``grad_bias = sum(g)`` over ``(N, *spatial)``.

    Output shape
    ------------
    ``input.shape``.

    Non-differentiable points
    -------------------------
    none (``eps > 0`` keeps the square root away from 0).

    Notes
    -----
    ``momentum`` only affects :func:`batch_norm_running_stats`. Error terms: the statistics are sums
    of ``N * spatial`` terms; M = ``|w| (|xhat| + mean|x| / std) + |b|``; ``rounded``: the mean and
    1/std saved in the I/O format, read by the forward and the backward.
    """
    std = _standardise_batch(input, running_mean, running_var, training, eps)
    return _affine(std.xhat, weight, bias, 1)


def batch_norm_running_stats(input, running_mean, running_var, *, momentum=0.1):
    """Running statistics after one training step of batch norm, as the frameworks update them.

    ``new_mean = (1 - momentum) * running_mean + momentum * mean``,
    ``new_var = (1 - momentum) * running_var + momentum * var_unbiased``, where the batch variance
    is the *unbiased* one (divided by ``n - 1``, ``n = N * spatial size``), unlike the biased
    variance used to normalise. Returns ``(new_mean, new_var)`` as float64 arrays (C,).
    """
    x = _checks.as_float_array("input", input)
    if x.ndim < 2 or x.size // max(x.shape[1], 1) <= 1:
        _checks.fail("input", x, "expected (N, C, *) with more than one value per channel")
    channels = x.shape[1]
    mean0 = _checks.as_float_array("running_mean", running_mean)
    var0 = _checks.as_float_array("running_var", running_var)
    _checks.check_shape("running_mean", mean0, (channels,), "(C,) = (input.shape[1],)")
    _checks.check_shape("running_var", var0, (channels,), "(C,) = (input.shape[1],)")
    momentum = _checks.as_real("momentum", momentum)
    axes = _bn_axes(x)
    mean = np.mean(x, axis=axes)
    var = np.var(x, axis=axes, ddof=1)
    return (1 - momentum) * mean0 + momentum * mean, (1 - momentum) * var0 + momentum * var


# ---------------------------------------------------------------------------------------------
# layer_norm

def _validate_layer_norm(arrays: dict, params: dict) -> dict:
    x = arrays["input"]
    shape = params["normalized_shape"]
    shape = (shape,) if isinstance(shape, (int, np.integer)) else shape
    if not isinstance(shape, (tuple, list)) or not shape:
        _checks.fail("normalized_shape", params["normalized_shape"], "expected an int or a non-empty tuple of ints",
                     TypeError)
    shape = _checks.as_int_tuple("normalized_shape", tuple(shape), len(shape), min_value=1)
    if x.shape[x.ndim - len(shape):] != shape or x.ndim < len(shape):
        _checks.fail("normalized_shape", params["normalized_shape"],
                     f"must equal the trailing dims of input.shape={x.shape}")
    _check_affine(arrays, shape, "normalized_shape")
    return {"normalized_shape": shape, "eps": _eps(params)}


def _ln_axes(x, normalized_shape):
    return tuple(range(x.ndim - len(normalized_shape), x.ndim))


def _layer_norm_vjp(g, input, weight=None, bias=None, *, normalized_shape, eps):
    std = _Standardised(input, _ln_axes(input, normalized_shape), eps)
    return _affine_vjp(g, std.xhat, weight, bias, None, std.vjp)


def _layer_norm_error_terms(g, input, weight=None, bias=None, *, normalized_shape, eps):
    std = _Standardised(input, _ln_axes(input, normalized_shape), eps)
    return _affine_error_terms(g, std.xhat_error, std.count, weight, bias, None,
                               functools.partial(_input_terms, std), stats_rounded=std.stats_rounded)


def _layer_norm_space(draw) -> CaseConfig:
    rank = draw.integer("rank", 1, 4)
    shape = tuple(draw.integer(f"size{i}", 1, 5) for i in range(rank))
    trailing = draw.integer("normalized_dims", 1, rank)
    normalized = shape[rank - trailing:]
    affine = draw.choice("elementwise_affine", [True, False])
    eps = draw.choice("eps", [1e-5, 1e-3])
    layer = dict(normalized_shape=normalized, eps=eps, elementwise_affine=affine)
    return CaseConfig(layer=layer, params=dict(normalized_shape=normalized, eps=eps),
                      shapes=dict(input=shape, weight=normalized if affine else None,
                                  bias=normalized if affine else None),
                      bounds={}, drawn={**layer, "rank": rank, "shape": shape, "normalized_dims": trailing})


@register(vjp=_layer_norm_vjp, validate=_validate_layer_norm, space=_layer_norm_space,
          error_terms=_layer_norm_error_terms)
def layer_norm(input, weight=None, bias=None, *, normalized_shape, eps=1e-5):
    """Layer normalisation (Ba, Kiros & Hinton 2016) over the trailing ``normalized_shape`` dims.

    Formula
    -------
    ``y = w * (x - mean) / sqrt(var + eps) + b``, mean and biased variance over the trailing
    dims, ``w`` and ``b`` of shape ``normalized_shape`` (elementwise). vjp:
    ``grad_input = (gw - mean(gw) - xhat mean(gw xhat)) / std``, ``grad_weight = sum(g xhat)``,
    ``grad_bias = sum(g)`` over the leading dims.

    Output shape
    ------------
    ``input.shape``.

    Non-differentiable points
    -------------------------
    none (``eps > 0``).
    """
    std = _Standardised(input, _ln_axes(input, normalized_shape), eps)
    return _affine(std.xhat, weight, bias, None)


# ---------------------------------------------------------------------------------------------
# group_norm

def _validate_group_norm(arrays: dict, params: dict) -> dict:
    x = arrays["input"]
    if x.ndim < 2:
        _checks.fail("input", x, f"expected (N, C, *) with at least 2 dimensions, got {x.ndim}")
    groups = _checks.as_int("num_groups", params["num_groups"], min_value=1)
    if x.shape[1] % groups:
        _checks.fail("num_groups", groups, f"must divide the channel count input.shape[1]={x.shape[1]}")
    _check_affine(arrays, (x.shape[1],), "(C,) = (input.shape[1],)")
    return {"num_groups": groups, "eps": _eps(params)}


def _grouped(x: np.ndarray, groups: int) -> np.ndarray:
    return x.reshape(x.shape[0], groups, -1)


def _group_standardised(input, num_groups, eps) -> _Standardised:
    return _Standardised(_grouped(input, num_groups), (2,), eps)


def _group_norm_vjp(g, input, weight=None, bias=None, *, num_groups, eps):
    std = _group_standardised(input, num_groups, eps)
    return _affine_vjp(g, std.xhat.reshape(input.shape), weight, bias, 1,
                       lambda g_hat: std.vjp(_grouped(g_hat, num_groups)).reshape(input.shape))


def _group_norm_error_terms(g, input, weight=None, bias=None, *, num_groups, eps):
    std = _group_standardised(input, num_groups, eps)

    def input_terms(g_hat):
        terms = _input_terms(std, _grouped(g_hat, num_groups))
        return ErrorTerms(terms.magnitude.reshape(input.shape), terms.length,
                          rounded=terms.rounded.reshape(input.shape))

    return _affine_error_terms(g, std.xhat_error.reshape(input.shape), std.count, weight, bias, 1,
                               input_terms, stats_rounded=std.stats_rounded.reshape(input.shape))


def _group_norm_space(draw) -> CaseConfig:
    groups = draw.integer("num_groups", 1, 4)
    per_group = draw.integer("channels_per_group", 1, 3)
    channels = groups * per_group
    spatial = tuple(draw.choice("spatial", [(), (3,), (2, 3), (4, 4)]))
    batch = draw.integer("batch", 1, 3)
    affine = draw.choice("affine", [True, False])
    eps = draw.choice("eps", [1e-5, 1e-3])
    if per_group * int(np.prod(spatial)) == 1:
        spatial = (2,)  # a group of one value has no variance to estimate
    layer = dict(num_groups=groups, num_channels=channels, eps=eps, affine=affine)
    return CaseConfig(layer=layer, params=dict(num_groups=groups, eps=eps),
                      shapes=dict(input=(batch, channels) + spatial, weight=(channels,) if affine else None,
                                  bias=(channels,) if affine else None),
                      bounds={}, drawn={**layer, "channels_per_group": per_group, "batch": batch,
                                        "spatial": spatial})


@register(vjp=_group_norm_vjp, validate=_validate_group_norm, space=_group_norm_space,
          error_terms=_group_norm_error_terms)
def group_norm(input, weight=None, bias=None, *, num_groups, eps=1e-5):
    """Group normalisation (Wu & He 2018): statistics per sample over each group of channels.

    Formula
    -------
    Channels split into ``num_groups`` consecutive groups; per sample and group,
    ``xhat = (x - mean) / sqrt(var + eps)`` over the group's channels and spatial positions;
    ``y = w[c] xhat + b[c]`` per channel. vjp as layer norm on the grouped view, with
    ``grad_weight = sum(g xhat)``, ``grad_bias = sum(g)`` over ``(N, *spatial)``.

    Output shape
    ------------
    ``input.shape``.

    Non-differentiable points
    -------------------------
    none (``eps > 0``).
    """
    std = _group_standardised(input, num_groups, eps)
    return _affine(std.xhat.reshape(input.shape), weight, bias, 1)
