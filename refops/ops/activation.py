"""Oracles of the activation family: elementwise functions and their derivatives, and prelu.

Every function here is evaluated to a few ulp of its exact value in float64, tails included:
exponentials only of non-positive arguments, ``expm1``/``log1p`` where a result is near 0 or 1,
derivatives written so that they do not cancel (``sigmoid' = e / (1 + e)**2`` with
``e = exp(-|x|)`` instead of ``s * (1 - s)``), the complementary error function through the
scaled ``erfcx`` with an exactly split ``exp(-z**2)``, and arguments that are products or
quotients of a parameter and the input (``beta * x``, ``x / alpha``, ``-x / sqrt(2)``) carried as
an unevaluated pair ``hi + lo`` (Dekker's error-free product), because the rounding of such an
argument is amplified by ``|argument|`` in an exponential tail.

Each op is the framework's *defined* function: softplus is linear where ``beta * x > threshold``,
hardsigmoid is ``relu6(x + 3) / 6``. At a kink the vjp uses the one-sided derivative that the
frameworks use; each op's docstring and its :class:`Kink` entries state which.

An elementwise op is registered by :func:`_elementwise` from its forward ``f`` (the decorated
function), its derivative ``f'`` and its second derivative ``f''`` (the latter only sizes the
rounding bound), so the rules of each op sit side by side in a few lines.
"""
from __future__ import annotations

import itertools
from decimal import Decimal, localcontext
from typing import Callable

import numpy as np
from scipy import special

from . import _checks
from ._registry import CaseConfig, ErrorTerms, Kink, register

__all__ = ["relu", "relu6", "leaky_relu", "elu", "selu", "celu", "gelu", "silu", "mish",
           "softplus", "sigmoid", "logsigmoid", "tanh", "atan", "hardtanh", "hardsigmoid",
           "hardswish", "softsign", "prelu"]


# ---------------------------------------------------------------------------------------------
# Constants as float64 pairs hi + lo (lo is the rounding error of hi), computed at import
# ---------------------------------------------------------------------------------------------

def _pair(value: Decimal) -> tuple[float, float]:
    hi = float(value)
    return hi, float(value - Decimal(hi))


with localcontext() as _context:
    _context.prec = 60
    _PI = Decimal("3.14159265358979323846264338327950288419716939937510582097494")
    _INV_SQRT2 = _pair(1 / Decimal(2).sqrt())
    _TWO_SQRT_2_OVER_PI = _pair(2 * (2 / _PI).sqrt())     # 2 sqrt(2/pi), tanh-gelu's slope * 2
    _KAPPA = _pair(Decimal("0.044715"))                    # tanh-gelu's cubic coefficient
    _TWO_OVER_SQRT_PI = float(2 / _PI.sqrt())
    _INV_SQRT_2PI = float(1 / (2 * _PI).sqrt())
    # Klambauer et al. (2017), the digits the frameworks use.
    _SELU_ALPHA_EXACT = Decimal("1.6732632423543772848170429916717")
    _SELU_SCALE_EXACT = Decimal("1.0507009873554804934193349852946")
    SELU_ALPHA = float(_SELU_ALPHA_EXACT)
    SELU_SCALE = float(_SELU_SCALE_EXACT)
    _SELU_SCALE_ALPHA = float(_SELU_SCALE_EXACT * _SELU_ALPHA_EXACT)
    del _context


# ---------------------------------------------------------------------------------------------
# Error-free transformations (Dekker 1971; Knuth TAOCP vol. 2, two-sum)
# ---------------------------------------------------------------------------------------------

_SPLITTER = 134217729.0  # 2**27 + 1


def _split(a):
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


def _two_product(a, b):
    """``p, e`` with ``p = fl(a * b)`` and ``p + e == a * b`` exactly (|a|, |b| below ~1e150)."""
    p = a * b
    a_hi, a_lo = _split(a)
    b_hi, b_lo = _split(b)
    return p, ((a_hi * b_hi - p) + a_hi * b_lo + a_lo * b_hi) + a_lo * b_lo


def _two_sum(a, b):
    """``s, e`` with ``s = fl(a + b)`` and ``s + e == a + b`` exactly."""
    s = a + b
    b_virtual = s - a
    return s, (a - (s - b_virtual)) + (b - b_virtual)


def _product_pair(x, c):
    """``c * x`` as ``hi + lo`` to about 2**-104 relative, ``c = (c_hi, c_lo)`` a constant pair."""
    hi, lo = _two_product(x, c[0])
    return hi, lo + x * c[1]


def _quotient_pair(x, d):
    """``x / d`` as ``hi + lo``; the remainder ``x - hi * d`` of a rounded quotient is exact."""
    q = x / d
    p, e = _two_product(q, d)
    return q, ((x - p) - e) / d


# ---------------------------------------------------------------------------------------------
# Shared numerics: logistic function, normal distribution, exponential branch
# ---------------------------------------------------------------------------------------------

def _logistic(z):
    """``(sigmoid(z), sigmoid(-z))``, each to ~1 ulp, from one ``exp(-|z|)``.

    ``sigmoid(z) = r * max(e, [z >= 0])`` with ``r = 1 / (1 + e)``: the maximum picks 1 or ``e``
    exactly, without a branch.
    """
    e = np.exp(-np.abs(z))
    r = 1.0 / (1.0 + e)
    positive = (z >= 0).astype(np.float64)
    return r * np.maximum(e, positive), r * np.maximum(e, 1.0 - positive)


def _logistic_pair(hi, lo):
    """``(sigmoid(hi + lo), sigmoid(-(hi + lo)))`` to first order in ``lo``."""
    s, s_neg = _logistic(hi)
    return s * (1.0 + s_neg * lo), s_neg * (1.0 - s * lo)


def _log1p_exp_neg_abs(z):
    """``log(1 + exp(-|z|))``."""
    return np.log1p(np.exp(-np.abs(z)))


def _normal(x):
    """``(Phi(x), phi(x))``: standard normal distribution and density, tails included.

    With ``z = -x / sqrt(2)`` carried as ``hi + lo``, ``Phi = erfc(z) / 2`` to first order in
    ``lo``: ``erfc(z) = exp(-hi**2) * (erfcx(hi) - 2 lo / sqrt(pi))`` for ``z > 1/2`` (with
    ``exp(-hi**2)`` from the exact square of ``hi``) and
    ``1 - erf(hi) - 2 exp(-hi**2) lo / sqrt(pi)`` for ``z <= 1/2``; ``phi = exp(-hi**2) (1 - 2 hi lo) / sqrt(2 pi)``.
    """
    x = np.clip(x, -40.0, 40.0)            # Phi is 0 or 1 and phi underflows beyond
    z_hi, z_lo = _product_pair(x, (-_INV_SQRT2[0], -_INV_SQRT2[1]))
    sq_hi, sq_lo = _two_product(z_hi, z_hi)
    gauss_hi = np.exp(-sq_hi) * (1.0 - sq_lo)                    # exp(-hi**2)
    upper = z_hi > 0.5
    erfc = np.empty_like(x)              # each special function only where it is accurate
    erfc[upper] = special.erfcx(z_hi[upper])
    erfc[~upper] = 1.0 - special.erf(z_hi[~upper])   # erf(hi) + 1 is exact enough: no cancel
    correction = _TWO_OVER_SQRT_PI * z_lo                        # erfc'(hi) lo / exp(-hi**2)
    cdf = 0.5 * np.where(upper, gauss_hi * (erfc - correction), erfc - gauss_hi * correction)
    return cdf, gauss_hi * (1.0 - 2.0 * z_hi * z_lo) * _INV_SQRT_2PI


def _exp_branch(x, alpha, divide):
    """``(expm1(x'), exp(x'))`` on ``x' = min(x, 0)`` (``/ alpha`` first when ``divide``)."""
    x = np.minimum(x, 0.0)
    if not divide:
        return np.expm1(x), np.exp(x)
    hi, lo = _quotient_pair(np.maximum(x, -800.0 * alpha), alpha)
    grow = np.exp(hi)
    return np.expm1(hi) + grow * lo, grow * (1.0 + lo)


# ---------------------------------------------------------------------------------------------
# Registration helpers
# ---------------------------------------------------------------------------------------------

def _sizes(ranks=range(1, 5), sizes=(1, 2, 3, 5)) -> tuple[tuple[int, ...], ...]:
    shapes = [s for r in ranks for s in itertools.product(sizes, repeat=r)]
    return tuple(sorted(shapes, key=lambda s: (np.prod(s), len(s))))


_SHAPES = _sizes()


def _no_params(params: dict) -> dict:
    return {}


def _no_draws(draw) -> dict:
    return {}


def _unary_space(draw_params: Callable = _no_draws) -> Callable:
    """A space drawing the op's own parameters (also the layer's arguments) and an input shape."""

    def space(draw) -> CaseConfig:
        params = draw_params(draw)
        shape = draw.choice("shape", _SHAPES)
        return CaseConfig(layer=dict(params), params=dict(params), shapes={"input": shape},
                          bounds={}, drawn={**params, "shape": shape})

    return space


def _kink(points: Callable[[dict], tuple[float, ...]], description: str, derivative: str) -> Kink:
    """A kink of an elementwise op at the input values ``points(params)``."""

    def distance(arrays, params):
        x = arrays["input"]
        nearest = np.full(x.shape, np.inf)
        for point in points(params):
            np.minimum(nearest, np.abs(x - point), out=nearest)
        return {"input": nearest}

    return Kink(description=description, derivative=derivative, distance=distance, points=points)


def _no_intermediates(x, **params):
    return 0.0, 0.0


def _elementwise(*, derivative: Callable, curvature: Callable, length: float,
                 check: Callable[[dict], dict] = _no_params, space: Callable | None = None,
                 kinks: tuple[Kink, ...] = (), rounded: Callable = _no_intermediates,
                 cancelling: Callable = _no_intermediates) -> Callable:
    """Register a unary elementwise op from its rules.

    ``derivative(x, **params)`` is ``f'``, ``curvature(x, **params)`` is ``f''`` (only its size
    matters: it enters the rounding bound of the gradient), ``length`` the documented number of
    rounding steps of an implementation, ``check(params) -> params`` normalises and validates the
    parameters. Two hooks describe how implementations compute the op, each returning a pair
    (for ``f``, for ``f'`` per unit ``|g|``): ``rounded(x, **params)``, the sensitivity to
    intermediates they round to the I/O format (a saved output the backward reuses, a composite
    of I/O-format operations), and ``cancelling(x, **params)``, the size of intermediate terms,
    carried in the working format, that cancel in the result (``1 + erf`` in gelu's left tail).
    """

    def vjp(g, input, **params):
        return {"input": g * derivative(input, **params)}

    def validate(arrays, params):
        return check(params)

    def wrap(forward: Callable):
        def error_terms(g, input, **params):
            output, slope = forward(input, **params), derivative(input, **params)
            io_value, io_slope = rounded(input, **params)
            parts_value, parts_slope = cancelling(input, **params)
            value = np.abs(input * slope) + np.abs(output) + parts_value
            gradient = np.abs(g) * (np.abs(slope) + np.abs(input * curvature(input, **params))
                                    + parts_slope)
            return {"output": ErrorTerms(value, length, rounded=io_value),
                    "input": ErrorTerms(gradient, length, rounded=np.abs(g) * io_slope)}

        return register(vjp=vjp, validate=validate, space=space or _unary_space(),
                        error_terms=error_terms, kinks=kinks)(forward)

    return wrap


def _zero(x, **params):
    return np.zeros_like(x)


def _real(name: str, params: dict, **options) -> float:
    return _checks.as_real(name, params[name], **options)


# ---------------------------------------------------------------------------------------------
# Piecewise linear
# ---------------------------------------------------------------------------------------------

def _relu_slope(x):
    return (x > 0).astype(np.float64)


@_elementwise(derivative=_relu_slope, curvature=_zero, length=1, kinks=(
    _kink(lambda p: (0.0,), "relu at 0", "0 at x = 0 (the frameworks' choice)"),))
def relu(input):
    """Rectified linear unit.

    Formula
    -------
    ``max(x, 0)``; derivative ``1`` for ``x > 0``, else ``0``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = 0``, where the vjp uses the derivative 0.
    """
    return np.maximum(input, 0.0)


def _clip_check(params):
    min_val, max_val = _real("min_val", params), _real("max_val", params)
    if min_val > max_val:
        _checks.fail("min_val", min_val, f"must be <= max_val={max_val!r}")
    return {"min_val": min_val, "max_val": max_val}


def _clip_slope(x, *, min_val, max_val):
    return ((x > min_val) & (x < max_val)).astype(np.float64)


def _clip_draws(draw):
    min_val = draw.real("min_val", -2.0, 0.5)
    return {"min_val": min_val, "max_val": draw.real("max_val", min_val + 0.1, min_val + 3.0)}


@_elementwise(derivative=_clip_slope, curvature=_zero, length=1, check=_clip_check,
              space=_unary_space(_clip_draws), kinks=(
    _kink(lambda p: (p["min_val"], p["max_val"]), "hardtanh at min_val and max_val",
          "0 at x = min_val and at x = max_val (1 strictly between them)"),))
def hardtanh(input, *, min_val=-1.0, max_val=1.0):
    """Hard hyperbolic tangent: a clip.

    Formula
    -------
    ``min(max(x, min_val), max_val)``; derivative 1 for ``min_val < x < max_val``, else 0.
    ``min_val > max_val`` is refused (``min_val == max_val`` gives a constant).

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = min_val`` and ``x = max_val``, where the vjp uses the derivative 0.
    """
    return np.clip(input, min_val, max_val)


def _relu6_slope(x):
    return _clip_slope(x, min_val=0.0, max_val=6.0)


@_elementwise(derivative=_relu6_slope, curvature=_zero, length=1, kinks=(
    _kink(lambda p: (0.0, 6.0), "relu6 at 0 and 6", "0 at x = 0 and at x = 6"),))
def relu6(input):
    """Rectified linear unit capped at 6 (``hardtanh`` with bounds 0 and 6).

    Formula
    -------
    ``min(max(x, 0), 6)``; derivative 1 for ``0 < x < 6``, else 0.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = 0`` and ``x = 6``, where the vjp uses the derivative 0.
    """
    return np.clip(input, 0.0, 6.0)


def _slope_check(params):
    return {"negative_slope": _real("negative_slope", params)}


def _leaky_slope(x, *, negative_slope):
    return np.where(x > 0, 1.0, negative_slope)


@_elementwise(derivative=_leaky_slope, curvature=_zero, length=1, check=_slope_check,
              space=_unary_space(lambda draw: {"negative_slope": draw.choice(
                  "negative_slope", (0.01, 0.2, 0.0, 0.1, 0.3))}),
              kinks=(_kink(lambda p: (0.0,), "leaky_relu at 0",
                           "negative_slope at x = 0 (the left derivative)"),))
def leaky_relu(input, *, negative_slope=0.01):
    """Leaky rectified linear unit (Maas et al. 2013).

    Formula
    -------
    ``x`` for ``x > 0``, else ``negative_slope * x``; derivative 1 for ``x > 0``, else
    ``negative_slope``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = 0``, where the vjp uses the derivative ``negative_slope``.
    """
    return np.where(input > 0, input, negative_slope * input)


def _hardsigmoid_slope(x):
    return np.where((x > -3.0) & (x < 3.0), 1.0 / 6.0, 0.0)


@_elementwise(derivative=_hardsigmoid_slope, curvature=_zero, length=2, kinks=(
    _kink(lambda p: (-3.0, 3.0), "hardsigmoid at -3 and 3", "0 at x = -3 and at x = 3"),))
def hardsigmoid(input):
    """Hard sigmoid.

    Formula
    -------
    ``relu6(x + 3) / 6``; derivative ``1/6`` (in float64) for ``-3 < x < 3``, else 0.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = -3`` and ``x = 3``, where the vjp uses the derivative 0.
    """
    return np.clip(input + 3.0, 0.0, 6.0) / 6.0


def _hardswish_slope(x):
    return np.where(x <= -3.0, 0.0, np.where(x < 3.0, (2.0 * x + 3.0) / 6.0, 1.0))


def _hardswish_curvature(x):
    return np.where((x > -3.0) & (x < 3.0), 1.0 / 3.0, 0.0)


@_elementwise(derivative=_hardswish_slope, curvature=_hardswish_curvature, length=3, kinks=(
    _kink(lambda p: (-3.0, 3.0), "hardswish at -3 and 3",
          "0 at x = -3 and 1 at x = 3 (the outer one-sided derivatives)"),))
def hardswish(input):
    """Hard swish.

    Formula
    -------
    ``x * relu6(x + 3) / 6``; derivative 0 for ``x <= -3``, ``(2x + 3) / 6`` for ``-3 < x < 3``,
    1 for ``x >= 3``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = -3`` (derivative 0 used) and ``x = 3`` (derivative 1 used); the derivative jumps from
    -1/2 and to 3/2 there.
    """
    return input * np.clip(input + 3.0, 0.0, 6.0) / 6.0


# ---------------------------------------------------------------------------------------------
# Exponential family: elu, selu, celu
# ---------------------------------------------------------------------------------------------

def _alpha_check(params):
    return {"alpha": _real("alpha", params)}


def _alpha_draws(draw):
    return {"alpha": draw.real("alpha", 0.1, 2.0)}


def _elu_kink(name: str, left: str) -> Kink:
    return _kink(lambda p: (0.0,), f"{name} at 0: the derivative jumps from {left} to 1 unless "
                 "that is 1; the second derivative always jumps",
                 f"{left} at x = 0 (the left derivative)")


def _elu_slope(x, *, alpha):
    return np.where(x > 0, 1.0, alpha * _exp_branch(x, alpha, False)[1])


def _elu_curvature(x, *, alpha):
    return np.where(x > 0, 0.0, alpha * _exp_branch(x, alpha, False)[1])


@_elementwise(derivative=_elu_slope, curvature=_elu_curvature, length=2, check=_alpha_check,
              space=_unary_space(_alpha_draws), kinks=(_elu_kink("elu", "alpha"),))
def elu(input, *, alpha=1.0):
    """Exponential linear unit (Clevert, Unterthiner & Hochreiter 2016).

    Formula
    -------
    ``x`` for ``x > 0``, else ``alpha * expm1(x)``; derivative 1 for ``x > 0``, else
    ``alpha * exp(x)``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = 0`` for ``alpha != 1`` (for ``alpha = 1`` only the second derivative jumps); the vjp
    uses the left derivative ``alpha``.
    """
    return np.where(input > 0, input, alpha * _exp_branch(input, alpha, False)[0])


def _celu_slope(x, *, alpha):
    return np.where(x > 0, 1.0, _exp_branch(x, alpha, True)[1])


def _celu_curvature(x, *, alpha):
    return np.where(x > 0, 0.0, _exp_branch(x, alpha, True)[1] / alpha)


def _celu_check(params):
    return {"alpha": _real("alpha", params, positive=True)}


@_elementwise(derivative=_celu_slope, curvature=_celu_curvature, length=3, check=_celu_check,
              space=_unary_space(_alpha_draws), kinks=(_elu_kink("celu", "1"),))
def celu(input, *, alpha=1.0):
    """Continuously differentiable exponential linear unit.

    Formula
    -------
    ``x`` for ``x > 0``, else ``alpha * expm1(x / alpha)``; derivative 1 for ``x > 0``, else
    ``exp(x / alpha)``. ``x / alpha`` is carried exactly (quotient and remainder), so the tail
    keeps full relative accuracy for any ``alpha``; ``alpha <= 0`` is refused (0 divides by
    zero, a negative one grows exponentially for ``x < 0``).

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = 0``: the derivative is continuous (1 on both sides), the second derivative jumps from
    ``1/alpha`` to 0. The vjp uses 1 there.
    """
    return np.where(input > 0, input, alpha * _exp_branch(input, alpha, True)[0])


def _selu_slope(x):
    return np.where(x > 0, SELU_SCALE, _SELU_SCALE_ALPHA * _exp_branch(x, 1.0, False)[1])


def _selu_curvature(x):
    return np.where(x > 0, 0.0, _SELU_SCALE_ALPHA * _exp_branch(x, 1.0, False)[1])


@_elementwise(derivative=_selu_slope, curvature=_selu_curvature, length=2,
              kinks=(_elu_kink("selu", "scale * alpha"),))
def selu(input):
    """Scaled exponential linear unit (Klambauer et al. 2017).

    Formula
    -------
    ``scale * x`` for ``x > 0``, else ``scale * alpha * expm1(x)``, with
    ``alpha = 1.6732632423543772848...`` and ``scale = 1.0507009873554804934...``
    (``scale * alpha`` rounded once); derivative ``scale``, else ``scale * alpha * exp(x)``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = 0``; the vjp uses the left derivative ``scale * alpha``.
    """
    return np.where(input > 0, SELU_SCALE * input,
                    _SELU_SCALE_ALPHA * _exp_branch(input, 1.0, False)[0])


# ---------------------------------------------------------------------------------------------
# Logistic family: sigmoid, logsigmoid, silu, softplus, tanh, mish
# ---------------------------------------------------------------------------------------------

def _sigmoid_slope(x):
    e = np.exp(-np.abs(x))
    r = 1.0 / (1.0 + e)
    return e * r * r


def _sigmoid_curvature(x):
    s, s_neg = _logistic(x)
    return s * s_neg * (s_neg - s)


def _sigmoid_rounded(x):
    """The backward ``(g * (1 - y)) * y`` in the I/O format from the rounded saved output ``y``
    (torch's float16 kernel): ``|1 - 2y| y`` for ``y``, ``y (1 - y)`` for each of ``1 - y`` and
    ``g (1 - y)``."""
    s, s_neg = _logistic(x)
    return 0.0, s * (np.abs(s_neg - s) + 2.0 * s_neg)


@_elementwise(derivative=_sigmoid_slope, curvature=_sigmoid_curvature, length=3,
              rounded=_sigmoid_rounded)
def sigmoid(input):
    """Logistic sigmoid.

    Formula
    -------
    ``1 / (1 + exp(-x))``, evaluated as ``1 / (1 + e)`` or ``e / (1 + e)`` with
    ``e = exp(-|x|)``; derivative ``e / (1 + e)**2`` (no ``s * (1 - s)`` cancellation).

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    return _logistic(input)[0]


def _logsigmoid_slope(x):
    return _logistic(x)[1]


def _logsigmoid_curvature(x):
    return -_sigmoid_slope(x)


def _logsigmoid_rounded(x):
    """The backward from the forward's buffer ``e = exp(-|x|)`` rounded to the I/O format
    (torch's kernel): ``|d sigmoid(-x) / d e| e = sigmoid'(x)``."""
    return 0.0, _sigmoid_slope(x)


@_elementwise(derivative=_logsigmoid_slope, curvature=_logsigmoid_curvature, length=3,
              rounded=_logsigmoid_rounded)
def logsigmoid(input):
    """Logarithm of the logistic sigmoid.

    Formula
    -------
    ``min(x, 0) - log1p(exp(-|x|))``; derivative ``sigmoid(-x)``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    return np.minimum(input, 0.0) - _log1p_exp_neg_abs(input)


def _silu_slope(x):
    s, s_neg = _logistic(x)
    return s * (1.0 + x * s_neg)


def _silu_curvature(x):
    s, s_neg = _logistic(x)
    return s * s_neg * (2.0 + x * (s_neg - s))


@_elementwise(derivative=_silu_slope, curvature=_silu_curvature, length=3)
def silu(input):
    """Sigmoid-weighted linear unit, swish (Elfwing et al. 2018; Ramachandran et al. 2017).

    Formula
    -------
    ``x * sigmoid(x)``; derivative ``sigmoid(x) * (1 + x * sigmoid(-x))``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    return input * _logistic(input)[0]


def _softplus_check(params):
    beta, threshold = _real("beta", params), _real("threshold", params)
    if beta == 0:
        _checks.fail("beta", beta, "must be nonzero (softplus divides by beta)")
    return {"beta": beta, "threshold": threshold}


def _softplus_argument(x, beta, threshold):
    """``(soft, hi, lo)``: where the log branch applies, and ``beta * x = hi + lo`` there.

    The branch is chosen on the rounded product, as the frameworks do; above 700 the log branch
    equals ``x`` to far below an ulp, so the pair is only formed on ``[-1000, 700]``.
    """
    product = beta * x
    low, high = -1000.0, min(threshold, 700.0)
    inside = (product >= low) & (product <= high)
    hi, lo = _two_product(np.where(inside, x, np.clip(product, low, high) / beta), beta)
    return (product <= threshold) & (product <= 700.0), hi, lo


def _softplus_slope(x, *, beta, threshold):
    soft, hi, lo = _softplus_argument(x, beta, threshold)
    return np.where(soft, _logistic_pair(hi, lo)[0], 1.0)


def _softplus_curvature(x, *, beta, threshold):
    soft, hi, lo = _softplus_argument(x, beta, threshold)
    s, s_neg = _logistic(hi)
    return np.where(soft, beta * s * s_neg, 0.0)


def _softplus_draws(draw):
    return {"beta": draw.real("beta", 0.5, 3.0), "threshold": draw.real("threshold", 5.0, 25.0)}


@_elementwise(derivative=_softplus_slope, curvature=_softplus_curvature, length=4,
              check=_softplus_check, space=_unary_space(_softplus_draws), kinks=(
    _kink(lambda p: (p["threshold"] / p["beta"],),
          "softplus at beta * x = threshold, where the definition switches to x (a jump of "
          "log1p(exp(-threshold)) / beta in value and of sigmoid(-threshold) in slope)",
          "sigmoid(threshold) at beta * x = threshold (the log branch)"),))
def softplus(input, *, beta=1.0, threshold=20.0):
    """Softplus with the frameworks' linear switch.

    Formula
    -------
    ``x`` where ``beta * x > threshold`` (the product rounded, as the frameworks compute it),
    else ``log1p(exp(beta * x)) / beta`` evaluated as
    ``(max(z, 0) + log1p(exp(-|z|))) / beta`` with ``z = beta * x`` carried exactly; derivative
    1, else ``sigmoid(beta * x)``. Any nonzero ``beta`` is accepted (the frameworks accept a
    negative one); ``beta = 0`` is refused.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    ``x = threshold / beta``, where the function switches branch; the vjp uses the log
    branch's derivative ``sigmoid(threshold)`` at the switch itself.
    """
    soft, hi, lo = _softplus_argument(input, beta, threshold)
    s = _logistic(hi)[0]
    smooth = (np.maximum(hi, 0.0) + _log1p_exp_neg_abs(hi) + s * lo) / beta
    return np.where(soft, smooth, input)


def _tanh_slope(x):
    e = np.exp(-2.0 * np.abs(x))
    r = 1.0 / (1.0 + e)
    return 4.0 * e * r * r


def _tanh_curvature(x):
    return -2.0 * np.tanh(x) * _tanh_slope(x)


def _tanh_rounded(x):
    """The backward ``g (1 - y**2)`` from the rounded saved output ``y``: ``2 y**2``."""
    y = np.tanh(x)
    return 0.0, 2.0 * y * y


@_elementwise(derivative=_tanh_slope, curvature=_tanh_curvature, length=3, rounded=_tanh_rounded)
def tanh(input):
    """Hyperbolic tangent.

    Formula
    -------
    ``tanh(x)``; derivative ``4 e / (1 + e)**2`` with ``e = exp(-2|x|)`` (equal to
    ``1 - tanh(x)**2`` without its cancellation).

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    return np.tanh(input)


def _mish_parts(x):
    """``(t, T)``: ``t = tanh(softplus(x))`` and ``T = t' = sech(softplus(x))**2 * sigmoid(x)``.

    With ``q = exp(-|x|)``: for ``x <= 0``, ``t = n / (n + 2)`` with ``n = q (q + 2)`` and
    ``sech**2 = 4 (1 + q)**2 / (n + 2)**2``; for ``x > 0``, ``t = (1 + 2q) / (1 + 2q + 2q**2)``
    and ``sech**2 = 4 q**2 (1 + q)**2 / (1 + 2q + 2q**2)**2``. No term cancels.
    """
    q = np.exp(-np.abs(x))
    positive = x > 0
    n = q * (q + 2.0)
    numerator = np.where(positive, 1.0 + 2.0 * q, n)
    denominator = np.where(positive, 1.0 + 2.0 * q + 2.0 * q * q, n + 2.0)
    scale = np.where(positive, q, 1.0) * (1.0 + q) / denominator
    s = _logistic(x)[0]
    return numerator / denominator, 4.0 * scale * scale * s


def _mish_slope(x):
    """``t + x T``; for ``x <= 0`` one fraction in ``q = exp(x)``:
    ``q (4 (1 + x) + q (6 + 4x) + q**2 (4 + q)) / (q**2 + 2q + 2)**2`` (cancels only at the zero)."""
    t, t_slope = _mish_parts(x)
    q = np.exp(-np.abs(x))
    n2 = q * (q + 2.0) + 2.0
    negative = q * (4.0 * (1.0 + x) + q * (6.0 + 4.0 * x) + q * q * (4.0 + q)) / (n2 * n2)
    return np.where(x > 0, t + x * t_slope, negative)


def _mish_curvature(x):
    t, t_slope = _mish_parts(x)
    s, s_neg = _logistic(x)
    return t_slope * (2.0 + x * (s_neg - 2.0 * t * s))


@_elementwise(derivative=_mish_slope, curvature=_mish_curvature, length=4)
def mish(input):
    """Mish (Misra 2019).

    Formula
    -------
    ``x * tanh(softplus(x))``, with ``tanh(softplus(x))`` written as a ratio of polynomials in
    ``exp(-|x|)``; derivative ``tanh(softplus(x)) + x * sech(softplus(x))**2 * sigmoid(x)``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    return input * _mish_parts(input)[0]


# ---------------------------------------------------------------------------------------------
# gelu, atan, softsign
# ---------------------------------------------------------------------------------------------

def _gelu_check(params):
    return {"approximate": _checks.as_choice("approximate", params["approximate"],
                                             ("none", "tanh"))}


def _tanh_gelu_argument(x):
    """``(x, hi, lo)``: ``w = 2 sqrt(2/pi) (x + 0.044715 x**3) = hi + lo`` in pair arithmetic.

    ``x`` is clipped to [-25, 25], beyond which ``sigmoid(w)`` is 0 or 1 in float64.
    """
    x = np.clip(x, -25.0, 25.0)
    square, square_lo = _two_product(x, x)
    cubic, cubic_lo = _two_product(square, _KAPPA[0])
    cubic_lo += square * _KAPPA[1] + square_lo * _KAPPA[0]           # kappa x**2
    inner, inner_lo = _two_sum(1.0, cubic)
    inner_lo += cubic_lo                                             # 1 + kappa x**2
    outer, outer_lo = _two_product(x, inner)
    outer_lo += x * inner_lo                                         # x + kappa x**3
    hi, lo = _two_product(outer, _TWO_SQRT_2_OVER_PI[0])
    return x, hi, lo + outer * _TWO_SQRT_2_OVER_PI[1] + outer_lo * _TWO_SQRT_2_OVER_PI[0]


def _tanh_gelu_parts(x):
    """``(x', s, s_neg, w')`` with ``s = sigmoid(w)``, ``w' = dw/dx`` on the clipped ``x'``."""
    x, hi, lo = _tanh_gelu_argument(x)
    s, s_neg = _logistic_pair(hi, lo)
    return x, s, s_neg, _TWO_SQRT_2_OVER_PI[0] * (1.0 + 3.0 * _KAPPA[0] * x * x)


def _gelu_slope(x, *, approximate):
    if approximate == "tanh":
        x, s, s_neg, w_slope = _tanh_gelu_parts(x)
        return s * (1.0 + x * s_neg * w_slope)
    cdf, pdf = _normal(x)
    return cdf + x * pdf


def _gelu_curvature(x, *, approximate):
    if approximate == "tanh":
        x, s, s_neg, w_slope = _tanh_gelu_parts(x)
        w_curve = 6.0 * _TWO_SQRT_2_OVER_PI[0] * _KAPPA[0] * x
        ds = s * s_neg
        return 2.0 * ds * w_slope + x * (ds * (s_neg - s) * w_slope * w_slope + ds * w_curve)
    pdf = _normal(x)[1]
    return pdf * (2.0 - x * x)


def _gelu_cancelling(x, *, approximate):
    """Frameworks compute ``x (1 + t) / 2`` with ``t = erf(x / sqrt(2))`` or
    ``tanh(w / 2)``: ``|x t| / 2`` cancels in the left tail, and ``|t| / 2`` in the derivative's
    ``(1 + t) / 2``; the tanh form's derivative also has ``x (1 - t**2) w' / 4``, whose
    ``t**2`` cancels."""
    if approximate == "tanh":
        x, s, s_neg, w_slope = _tanh_gelu_parts(x)
        t = np.abs(s - s_neg)
        return 0.5 * np.abs(x) * t, 0.5 * t * (1.0 + np.abs(x) * t * w_slope)
    t = np.abs(special.erf(x * _INV_SQRT2[0]))
    return 0.5 * np.abs(x) * t, 0.5 * t


@_elementwise(derivative=_gelu_slope, curvature=_gelu_curvature, length=4, check=_gelu_check,
              cancelling=_gelu_cancelling,
              space=_unary_space(lambda draw: {"approximate": draw.choice(
                  "approximate", ("none", "tanh"))}))
def gelu(input, *, approximate="none"):
    """Gaussian error linear unit (Hendrycks & Gimpel 2016).

    Formula
    -------
    ``approximate="none"``: ``x * Phi(x) = 0.5 x erfc(-x / sqrt(2))``, derivative
    ``Phi(x) + x phi(x)``; the tail ``x < 0`` uses ``erfc(z) = exp(-z**2) erfcx(z)`` with
    ``z = -x / sqrt(2)`` and ``z**2`` carried exactly. ``approximate="tanh"``:
    ``0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x**3)))`` ``= x sigmoid(w)`` with
    ``w = 2 sqrt(2/pi) (x + 0.044715 x**3)`` in pair arithmetic (decimal constants exact to
    ~2**-104); derivative ``sigmoid(w) (1 + x sigmoid(-w) w')``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    if approximate == "tanh":
        return input * _tanh_gelu_parts(input)[1]
    return input * _normal(input)[0]


def _atan_slope(x):
    return 1.0 / (1.0 + x * x)


def _atan_curvature(x):
    slope = _atan_slope(x)
    return -2.0 * x * slope * slope


def _atan_rounded(x):
    """The backward ``g / (x**2 + 1)`` in the I/O format (torch's autograd formula): ``x**2``
    and ``x**2 + 1`` are rounded, relative errors ``x**2 / (1 + x**2)`` and 1 in the result."""
    slope = _atan_slope(x)
    return 0.0, slope * (1.0 + x * x * slope)


@_elementwise(derivative=_atan_slope, curvature=_atan_curvature, length=2, rounded=_atan_rounded)
def atan(input):
    """Arc tangent.

    Formula
    -------
    ``arctan(x)``; derivative ``1 / (1 + x**2)``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None.
    """
    return np.arctan(input)


def _softsign_slope(x):
    r = 1.0 / (1.0 + np.abs(x))
    return r * r


def _softsign_curvature(x):
    r = 1.0 / (1.0 + np.abs(x))
    return -2.0 * np.sign(x) * r * r * r


def _softsign_rounded(x):
    """Frameworks compose ``x / d`` with ``d = |x| + 1`` from I/O-format operations: ``d`` is
    rounded in the forward; the backward ``g / d - sign(x) g ((x / d) / d)`` rounds ``d`` and
    ``g / d`` (``2 / d``), and ``d`` twice, ``x / d``, ``/ d`` and ``* g`` in the second term
    (``5 |x| / d**2``), whose sum cancels to ``g / d**2`` for large ``|x|``."""
    r = 1.0 / (1.0 + np.abs(x))
    return np.abs(x) * r, r * (2.0 + 5.0 * np.abs(x) * r)


@_elementwise(derivative=_softsign_slope, curvature=_softsign_curvature, length=2,
              rounded=_softsign_rounded)
def softsign(input):
    """Softsign.

    Formula
    -------
    ``x / (1 + |x|)``; derivative ``1 / (1 + |x|)**2``.

    Output shape
    ------------
    The input's shape.

    Non-differentiable points
    -------------------------
    None (the second derivative jumps at 0).
    """
    return input / (1.0 + np.abs(input))


# ---------------------------------------------------------------------------------------------
# prelu: a learnt slope per channel
# ---------------------------------------------------------------------------------------------

def _prelu_slope_view(input, weight):
    """``weight`` shaped to broadcast against ``input`` (channels on axis 1 when ndim >= 2)."""
    if weight.shape[0] == 1 or input.ndim < 2:
        return weight.reshape((1,) * input.ndim) if input.ndim else weight.reshape(())
    return weight.reshape((1, -1) + (1,) * (input.ndim - 2))


def _prelu_channel_sum(values, input, weight):
    """Sum ``values`` (input-shaped) over every axis but the channel axis, to weight's shape."""
    if weight.shape[0] == 1 or input.ndim < 2:
        return np.atleast_1d(values.sum()).astype(np.float64)
    return values.sum(axis=(0,) + tuple(range(2, input.ndim)))


def _prelu_validate(arrays, params):
    input, weight = arrays["input"], arrays["weight"]
    _checks.check_rank("weight", weight, (1,), "(num_parameters,): 1 or the channel count")
    channels = input.shape[1] if input.ndim >= 2 else 1
    if weight.shape[0] not in (1, channels):
        _checks.fail("weight", weight, f"expected 1 or input.shape[1] = {channels} entries "
                     f"(the channel count; 1 for inputs of rank < 2), got {weight.shape[0]}")
    return {}


def _prelu_vjp(g, input, weight):
    negative = input <= 0
    slope = _prelu_slope_view(input, weight)
    return {"input": np.where(negative, g * slope, g),
            "weight": _prelu_channel_sum(np.where(negative, g * input, 0.0), input, weight)}


def _prelu_error_terms(g, input, weight):
    slope = np.abs(_prelu_slope_view(input, weight))
    negative = input <= 0
    output = 2.0 * np.where(negative, slope * np.abs(input), np.abs(input))
    per_channel = input.size // weight.shape[0] if input.size else 0
    # Frameworks round each product x g to the I/O format before the (wide) channel sum: each
    # term carries u_out, so `rounded` is the sum of their sizes.
    products = _prelu_channel_sum(np.where(negative, np.abs(g * input), 0.0), input, weight)
    return {"output": ErrorTerms(output, 1),
            "input": ErrorTerms(np.abs(g) * np.where(negative, slope, 1.0), 1),
            "weight": ErrorTerms(_prelu_channel_sum(np.abs(g * input), input, weight),
                                 max(per_channel, 1), accumulate="wide", rounded=products)}


def _prelu_space(draw) -> CaseConfig:
    num_parameters = draw.choice("num_parameters", (1, 2, 3, 5))
    shapes = tuple(s for s in _SHAPES if num_parameters == 1 or (len(s) >= 2 and s[1] == num_parameters))
    shape = draw.choice("shape", shapes)
    init = draw.real("init", 0.0, 0.5)
    return CaseConfig(layer={"num_parameters": num_parameters, "init": init}, params={},
                      shapes={"input": shape, "weight": (num_parameters,)}, bounds={},
                      drawn={"num_parameters": num_parameters, "shape": shape, "init": init})


def _prelu_kink_distance(arrays, params):
    return {"input": np.abs(arrays["input"]), "weight": np.full(arrays["weight"].shape, np.inf)}


@register(vjp=_prelu_vjp, validate=_prelu_validate, space=_prelu_space,
          error_terms=_prelu_error_terms, kinks=(
    Kink(description="prelu at input 0", derivative="weight at x = 0 for the input, and a "
         "weight-gradient contribution x * g = 0", distance=_prelu_kink_distance,
         points=lambda params: (0.0,)),))
def prelu(input, weight):
    """Parametric rectified linear unit (He et al. 2015).

    Formula
    -------
    ``x`` for ``x > 0``, else ``w_c * x`` with ``c`` the channel (axis 1) of the element, or a
    single shared ``w`` when ``weight`` has one entry. Input gradient ``g`` or ``w_c g``; weight
    gradient ``sum of x g over x <= 0`` per channel (over all elements for one entry).

    Output shape
    ------------
    The input's shape. ``weight`` has shape ``(1,)`` or ``(C,)`` with ``C = input.shape[1]``;
    an input of rank 0 or 1 has one channel.

    Non-differentiable points
    -------------------------
    ``x = 0`` (in the input), where the vjp uses the slope ``w``.
    """
    return np.where(input > 0, input, input * _prelu_slope_view(input, weight))
