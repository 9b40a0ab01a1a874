"""Oracles of the loss family: ``mse_loss``, ``cross_entropy``, ``binary_cross_entropy_with_logits``.

Every loss computes a per-element (per-position for cross entropy) loss and then reduces it:
``"mean"`` and ``"sum"`` return a 0-d float64 array, ``"none"`` the per-element array. The
reduction, its vjp (broadcast the cotangent, divide by the count for ``"mean"``) and its share of
the error terms live in one place, :class:`_Reduction`.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from . import _checks
from ._registry import CaseConfig, ErrorTerms, register
from .softmax import log_softmax, shifted_logits

__all__ = ["mse_loss", "cross_entropy", "binary_cross_entropy_with_logits"]

REDUCTIONS = ("mean", "sum", "none")


@dataclass(frozen=True)
class _Reduction:
    """How a per-element loss of ``shape`` is reduced, and the adjoint of that reduction."""

    kind: str
    shape: tuple[int, ...]

    @property
    def count(self) -> int:
        return int(np.prod(self.shape))

    @property
    def output_shape(self) -> tuple[int, ...]:
        return self.shape if self.kind == "none" else ()

    def apply(self, per_element: np.ndarray) -> np.ndarray:
        if self.kind == "none":
            return per_element
        total = np.sum(per_element)
        return np.asarray(total / self.count if self.kind == "mean" else total, dtype=np.float64)

    def spread(self, g: np.ndarray) -> np.ndarray:
        """The cotangent of each element: ``g`` broadcast, divided by the count for a mean."""
        scale = 1.0 / self.count if self.kind == "mean" else 1.0
        return np.broadcast_to(g * scale, self.shape)

    def output_terms(self, magnitude: np.ndarray, length: float, rounded=0.0, value=0.0,
                     reduced=0.0) -> ErrorTerms:
        """Per-element terms of length ``length``, plus the reduction's own sum of ``count`` terms.

        ``rounded`` is each element's sensitivity to intermediates rounded to the I/O format; a
        reduction also sums the per-element losses after rounding them to that format
        (``value`` = their sizes), as frameworks that reduce a loss tensor of the I/O dtype do.
        ``reduced`` is the sensitivity to values rounded while or after reducing (output-shaped).
        """
        if self.kind == "none":
            return ErrorTerms(magnitude, length, rounded=rounded + reduced)
        per_element = np.broadcast_to(rounded + value, self.shape)
        return ErrorTerms(self.apply(magnitude), length + self.count,
                          rounded=self.apply(per_element) + reduced)


def _reduction_output_shape(arrays: dict, params: dict) -> tuple[int, ...]:
    """Per-element losses have the target's shape (cross entropy drops the class axis)."""
    return _Reduction(params["reduction"], arrays["target"].shape).output_shape


def _validate_pair(arrays: dict, params: dict) -> dict:
    x, t = arrays["input"], arrays["target"]
    _checks.check_shape("target", t, x.shape, "the same shape as input")
    return {"reduction": _checks.as_choice("reduction", params["reduction"], REDUCTIONS)}


def _pair_space(draw, *, bounds: dict) -> CaseConfig:
    rank = draw.integer("rank", 1, 3)
    shape = tuple(draw.integer(f"size{i}", 1, 5) for i in range(rank))
    reduction = draw.choice("reduction", list(REDUCTIONS))
    return CaseConfig(layer={"reduction": reduction}, params={"reduction": reduction},
                      shapes={"input": shape, "target": shape}, bounds=bounds,
                      drawn={"rank": rank, "shape": shape, "reduction": reduction})


# ---------------------------------------------------------------------------------------------
# mse_loss

def _mse_vjp(g, input, target, *, reduction):
    grad = 2.0 * (input - target) * _Reduction(reduction, input.shape).spread(g)
    return {"input": grad, "target": -grad}


def _mse_error_terms(g, input, target, *, reduction):
    r = _Reduction(reduction, input.shape)
    d = np.abs(input - target)
    grad = 2.0 * d * np.abs(r.spread(g))
    # The difference is rounded (relative u), so its square carries 2u: M = 2 d^2 per element.
    # Frameworks round it to the I/O format (2 d^2 in u_out), and the squares before reducing
    # (d^2); the backward (torch: (scale * d) * g in the I/O format) rounds the difference
    # (|grad|) and, for a mean, the scale 2 / count and its product with d (2 |grad| more).
    rounded = grad * (3.0 if reduction == "mean" else 1.0)
    return {"output": r.output_terms(2.0 * d * d, 2, rounded=2.0 * d * d, value=d * d),
            "input": ErrorTerms(grad, 2, rounded=rounded), "target": ErrorTerms(grad, 2, rounded=rounded)}


def _mse_space(draw) -> CaseConfig:
    return _pair_space(draw, bounds={})


@register(vjp=_mse_vjp, validate=_validate_pair, space=_mse_space,
          error_terms=_mse_error_terms, output_shape=_reduction_output_shape)
def mse_loss(input, target, *, reduction="mean"):
    """Mean squared error: ``reduce((input - target)^2)``.

    Formula
    -------
    ``l_i = (x_i - t_i)^2``, reduced by ``reduction``: ``"mean"`` = sum / count, ``"sum"``,
    ``"none"``. vjp: ``grad_input = 2 (x - t) g / count`` (no ``/ count`` unless ``"mean"``),
    ``grad_target = -grad_input``.

    Output shape
    ------------
    ``()`` for ``"mean"`` and ``"sum"``, ``input.shape`` for ``"none"``.

    Non-differentiable points
    -------------------------
    none.
    """
    return _Reduction(reduction, input.shape).apply((input - target) ** 2)


# ---------------------------------------------------------------------------------------------
# binary_cross_entropy_with_logits

def _bce_vjp(g, input, target, *, reduction):
    spread = _Reduction(reduction, input.shape).spread(g)
    return {"input": (special.expit(input) - target) * spread, "target": -input * spread}


def _bce_error_terms(g, input, target, *, reduction):
    r = _Reduction(reduction, input.shape)
    spread = np.abs(r.spread(g))
    s, s_neg = special.expit(input), special.expit(-input)
    per_element = np.maximum(input, 0) + np.abs(input * target) + np.log1p(np.exp(-np.abs(input)))
    # torch's half kernels compute ((1 - t) * x) - logsigmoid(x), each operation rounded to the
    # I/O format: 1 - t and the product carry |(1 - t) x| each, logsigmoid its size; the losses
    # are rounded before reducing. The backward (sigmoid(x) - t) * g, then / count for a mean,
    # rounds sigmoid (s) and the difference, and for a mean the product too; the target's
    # -x * g rounds the product before a mean's division.
    weighted = np.abs((1.0 - target) * input)
    loss = np.abs(np.maximum(input, 0) - input * target + np.log1p(np.exp(-np.abs(input))))
    steps = 2.0 if reduction == "mean" else 1.0
    rounded = 2.0 * weighted + np.abs(special.log_expit(input))
    return {"output": r.output_terms(per_element, 3, rounded=rounded, value=loss),
            # expit carries exp's relative error |x| u: |x| s (1 - s).
            "input": ErrorTerms(spread * (s + np.abs(target) + np.abs(input) * s * s_neg), 3,
                                rounded=spread * (s + steps * np.abs(s - target))),
            "target": ErrorTerms(spread * np.abs(input), 1,
                                 rounded=(steps - 1.0) * spread * np.abs(input))}


def _bce_space(draw) -> CaseConfig:
    return _pair_space(draw, bounds={"target": (0.0, 1.0)})


@register(vjp=_bce_vjp, validate=_validate_pair, space=_bce_space,
          error_terms=_bce_error_terms, output_shape=_reduction_output_shape)
def binary_cross_entropy_with_logits(input, target, *, reduction="mean"):
    """Binary cross entropy on logits, in the stable form.

    Formula
    -------
    ``l_i = max(x_i, 0) - x_i t_i + log1p(exp(-|x_i|))`` (= ``-t log s(x) - (1 - t) log s(-x)``
    with ``s`` the logistic sigmoid), reduced by ``reduction``. vjp:
    ``grad_input = (s(x) - t) g / count``, ``grad_target = -x g / count`` (``/ count`` only for
    ``"mean"``).

    Output shape
    ------------
    ``()`` for ``"mean"`` and ``"sum"``, ``input.shape`` for ``"none"``.

    Non-differentiable points
    -------------------------
    none (``max(x, 0) + log1p(exp(-|x|))`` is the smooth softplus).

    Notes
    -----
    Targets may be any real numbers (soft labels); the usual range is ``[0, 1]``.
    """
    per_element = np.maximum(input, 0) - input * target + np.log1p(np.exp(-np.abs(input)))
    return _Reduction(reduction, input.shape).apply(per_element)


# ---------------------------------------------------------------------------------------------
# cross_entropy

def _validate_cross_entropy(arrays: dict, params: dict) -> dict:
    x, t = arrays["input"], arrays["target"]
    if x.ndim == 0:
        _checks.fail("input", x, "expected (C,) or (N, C, *) logits, got a 0-d array")
    expected = () if x.ndim == 1 else (x.shape[0],) + x.shape[2:]
    _checks.check_shape("target", t, expected, "input.shape without the class dim")
    classes = x.shape[_class_axis(x)]
    if t.size and (t.min() < 0 or t.max() >= classes):
        bad = t.min() if t.min() < 0 else t.max()
        _checks.fail("target", t, f"class index {int(bad)} is out of range [0, {classes - 1}]")
    smoothing = _checks.as_real("label_smoothing", params["label_smoothing"])
    if not 0.0 <= smoothing <= 1.0:
        _checks.fail("label_smoothing", params["label_smoothing"], "must lie in [0, 1]")
    return {"reduction": _checks.as_choice("reduction", params["reduction"], REDUCTIONS),
            "label_smoothing": smoothing}


def _class_axis(x: np.ndarray) -> int:
    return 0 if x.ndim == 1 else 1


def _smoothed_targets(x: np.ndarray, target: np.ndarray, smoothing: float) -> np.ndarray:
    """Target distribution ``(1 - eps) onehot(t) + eps / C`` along the class axis."""
    axis = _class_axis(x)
    classes = x.shape[axis]
    hot = np.expand_dims(target, axis) == np.arange(classes).reshape((-1,) + (1,) * (x.ndim - axis - 1))
    return (1.0 - smoothing) * hot + smoothing / classes


def _cross_entropy_vjp(g, input, target, *, reduction, label_smoothing):
    axis = _class_axis(input)
    z, log_sum = shifted_logits(input, axis)
    spread = np.expand_dims(_Reduction(reduction, target.shape).spread(g), axis)
    return {"input": (np.exp(z - log_sum) - _smoothed_targets(input, target, label_smoothing)) * spread}


def _cross_entropy_error_terms(g, input, target, *, reduction, label_smoothing):
    r = _Reduction(reduction, target.shape)
    axis = _class_axis(input)
    classes = input.shape[axis]
    z, log_sum = shifted_logits(input, axis)
    p = np.exp(z - log_sum)
    spread = np.sum(p * np.abs(z), axis=axis, keepdims=True)
    y = _smoothed_targets(input, target, label_smoothing)
    hot = _smoothed_targets(input, target, 0.0)
    # log-sum-exp: the shift |m|, log of a sum carrying 1 + sum p|z|; the target term sum y|x|.
    per_position = (np.abs(np.max(input, axis=axis, keepdims=True)) + np.abs(log_sum) + 1 + spread
                    + np.sum(y * np.abs(input), axis=axis, keepdims=True))
    cot = np.abs(np.expand_dims(r.spread(g), axis))
    # torch composes its log_softmax (whose own rounded steps its error terms give) with
    # operations in the I/O format, each rounded: the `rounded` terms below.
    log_p = log_softmax.error_terms(-y * cot, input, dim=axis)
    position_steps, reduced_steps = _cross_entropy_forward_steps(
        r, z - log_sum, y, hot, log_p["output"].rounded, label_smoothing, axis)
    backward_steps = _cross_entropy_backward_steps(r, p, y, hot, cot, label_smoothing, axis)
    return {"output": r.output_terms(np.squeeze(per_position, axis), classes,
                                     rounded=position_steps, reduced=reduced_steps),
            "input": ErrorTerms(cot * (p * (1 + np.abs(z) + spread) + y), classes,
                                rounded=backward_steps + log_p["input"].rounded)}


def _cross_entropy_forward_steps(r: _Reduction, log_p, y, hot, log_p_rounded, smoothing, axis):
    """The forward's rounded values, per position and after reducing (torch): ``nll =
    reduce(-log_p[t])`` (a sum in the I/O format, then ``/ count``); for ``smoothing > 0`` also
    ``ret = reduce(-fl(sum_c log_p))`` and ``(1 - eps) nll + ret (eps / C)``, each operation
    rounded. Every rounded value counts its size but the last, the bound's ``u_out |ref|``."""
    mean, reduced, smoothed = r.kind == "mean", r.kind != "none", smoothing > 0
    picked = np.sum(-hot * log_p, axis=axis)
    summed = np.abs(np.sum(log_p, axis=axis))
    # Each log_p carries its own rounding; the sum over the classes is rounded.
    per_position = (np.sum(y * (np.abs(log_p) + log_p_rounded), axis=axis)
                    + smoothed * smoothing / log_p.shape[axis] * summed)
    # The nll sum of non-negative terms in the I/O format rounds each partial sum after the
    # first term (recursive summation, Higham 2002 eq. 4.4; the partial sums of torch's cascade
    # of blocks of 16 are no larger).
    partials = np.cumsum(picked.ravel())
    partials[:1] = 0.0
    nll = r.apply(picked)
    after = (1 - smoothing) * (reduced * r.apply(partials.reshape(picked.shape))
                               + nll * (mean + smoothed))
    after = after + smoothed * smoothing / log_p.shape[axis] * r.apply(summed) * (reduced + mean + 1)
    return per_position, after - (0.0 if smoothed else nll)


def _cross_entropy_backward_steps(r: _Reduction, p, y, hot, cot, smoothing, axis):
    """The backward's I/O-format steps (torch): the cotangent scaled by ``1 - eps`` and by
    ``eps / C``, each then divided by the count for a mean, the two added at the target class;
    errors ``d`` in that cotangent of log_softmax reach the gradient as ``d + p sum d``."""
    smoothed = smoothing > 0
    d = cot * y * (smoothed + (r.kind == "mean") + smoothed * hot)
    return d + p * np.sum(d, axis=axis, keepdims=True)


def _cross_entropy_space(draw) -> CaseConfig:
    classes = draw.integer("classes", 1, 6)
    layout = draw.choice("layout", ["batch", "single", "spatial"])
    batch = draw.integer("batch", 1, 4)
    if layout == "single":
        shape, target = (classes,), ()
    elif layout == "batch":
        shape, target = (batch, classes), (batch,)
    else:
        length = draw.integer("length", 1, 4)
        shape, target = (batch, classes, length), (batch, length)
    reduction = draw.choice("reduction", list(REDUCTIONS))
    smoothing = draw.choice("label_smoothing", [0.0, 0.1, 0.5, 1.0])
    layer = {"reduction": reduction, "label_smoothing": smoothing}
    return CaseConfig(layer=layer, params=dict(layer), shapes={"input": shape, "target": target},
                      bounds={"target": (0, classes)},
                      drawn={**layer, "classes": classes, "layout": layout, "batch": batch, "shape": shape})


@register(vjp=_cross_entropy_vjp, validate=_validate_cross_entropy, space=_cross_entropy_space,
          error_terms=_cross_entropy_error_terms, output_shape=_reduction_output_shape,
          integer_arrays=("target",))
def cross_entropy(input, target, *, reduction="mean", label_smoothing=0.0):
    """Cross entropy of logits against integer class indices, with label smoothing.

    Parameters
    ----------
    input : array (N, C, *) or (C,)
        Logits; the class axis is 1 (0 for a single unbatched vector).
    target : integer array (N, *) or ()
        Class indices in ``[0, C)``; no gradient.

    Formula
    -------
    With ``y = (1 - eps) onehot(t) + eps / C`` (Szegedy et al. 2016) and
    ``lse(x) = m + log(sum_c exp(x_c - m))``: ``l = lse(x) - sum_c y_c x_c`` per position, reduced by
    ``reduction`` (``"mean"`` divides by the number of positions). vjp:
    ``grad_input = (softmax(x) - y) g / count`` (``/ count`` only for ``"mean"``).

    Output shape
    ------------
    ``()`` for ``"mean"`` and ``"sum"``, ``target.shape`` for ``"none"``.

    Non-differentiable points
    -------------------------
    none in the logits (smooth); ``target`` is discrete.
    """
    axis = _class_axis(input)
    z, log_sum = shifted_logits(input, axis)
    per_position = -np.sum(_smoothed_targets(input, target, label_smoothing) * (z - log_sum), axis=axis)
    return _Reduction(reduction, target.shape).apply(per_position)
