"""50-digit mpmath evaluations of the activation functions and their derivatives.

Reference: mpmath (arbitrary precision); the formulas are the published definitions (sources
beside each), written directly, with no rewriting for accuracy: at 50 digits none is needed.
Derivatives come from ``mpmath.diff`` (numerical differentiation at the working precision), so
they do not share a formula with the oracle. Float parameters enter exactly (an mpf of a float64
is its exact binary value).
"""
from __future__ import annotations

import numpy as np
import mpmath

DIGITS = 50
# Reference: Klambauer et al. (2017), the SELU constants to 31 digits.
SELU_ALPHA = "1.6732632423543772848170429916717"
SELU_SCALE = "1.0507009873554804934193349852946"


def _gelu(x, approximate):
    if approximate == "tanh":
        # Reference: Hendrycks & Gimpel (2016), the tanh approximation.
        # 1 + tanh(u) = 2 / (1 + exp(-2u)), exactly; the left side cancels even at 50 digits.
        inner = mpmath.sqrt(2 / mpmath.pi) * (x + mpmath.mpf("0.044715") * x ** 3)
        return x / (1 + mpmath.exp(-2 * inner))
    # Reference: Hendrycks & Gimpel (2016), x * Phi(x).
    return x * mpmath.ncdf(x)


def _softplus(x, beta, threshold):
    # Reference: torch.nn.functional.softplus documentation (linear above the threshold).
    beta = mpmath.mpf(beta)
    if beta * x > threshold:
        return x
    return mpmath.log1p(mpmath.exp(beta * x)) / beta


def _clip(x, low, high):
    return min(max(x, mpmath.mpf(low)), mpmath.mpf(high))


FUNCTIONS = {
    "relu": lambda x: max(x, 0),
    "relu6": lambda x: _clip(x, 0, 6),
    "leaky_relu": lambda x, negative_slope=0.01: x if x > 0 else mpmath.mpf(negative_slope) * x,
    # Reference: Clevert, Unterthiner & Hochreiter (2016).
    "elu": lambda x, alpha=1.0: x if x > 0 else mpmath.mpf(alpha) * mpmath.expm1(x),
    "selu": lambda x: mpmath.mpf(SELU_SCALE) * (
        x if x > 0 else mpmath.mpf(SELU_ALPHA) * mpmath.expm1(x)),
    "celu": lambda x, alpha=1.0: x if x > 0 else mpmath.mpf(alpha) * mpmath.expm1(x / alpha),
    "gelu": lambda x, approximate="none": _gelu(x, approximate),
    # Reference: Elfwing et al. (2018).
    "silu": lambda x: x / (1 + mpmath.exp(-x)),
    # Reference: Misra (2019).
    "mish": lambda x: x * mpmath.tanh(mpmath.log1p(mpmath.exp(x))),
    "softplus": lambda x, beta=1.0, threshold=20.0: _softplus(x, beta, threshold),
    "sigmoid": lambda x: 1 / (1 + mpmath.exp(-x)),
    "logsigmoid": lambda x: -mpmath.log1p(mpmath.exp(-x)),
    "tanh": mpmath.tanh,
    "atan": mpmath.atan,
    "hardtanh": lambda x, min_val=-1.0, max_val=1.0: _clip(x, min_val, max_val),
    "hardsigmoid": lambda x: _clip(x + 3, 0, 6) / 6,
    "hardswish": lambda x: x * _clip(x + 3, 0, 6) / 6,
    "softsign": lambda x: x / (1 + abs(x)),
}


def values(name: str, x: np.ndarray, params: dict) -> tuple[np.ndarray, np.ndarray]:
    """``(f(x), f'(x))`` rounded to float64 from 50-digit evaluations at each exact float ``x``."""
    function = FUNCTIONS[name]
    forward, slope = [], []
    for point in x.tolist():
        with mpmath.workdps(DIGITS):
            value = function(mpmath.mpf(point), **params)
        forward.append(float(value))
        slope.append(_slope(function, point, params, value))
    return np.array(forward), np.array(slope)


def _slope(function, point, params, value) -> float:
    """``f'(point)`` by ``mpmath.diff``, with as many extra digits as ``f`` carries above ``f'``.

    A derivative far below the function value (``tanh'`` at -60 is 1e-52 next to ``|tanh| = 1``)
    needs those digits to survive the differencing: a first estimate sizes the precision, the
    second pass gives 50 significant digits of the derivative.
    """
    with mpmath.workdps(DIGITS):
        estimate = mpmath.diff(lambda t: function(t, **params), mpmath.mpf(point))
    scale = max(abs(value), abs(mpmath.mpf(point)), 1)
    lost = 350 if estimate == 0 else max(0, int(mpmath.log10(scale / abs(estimate))) + 5)
    if lost < 10:
        return float(estimate)
    with mpmath.workdps(DIGITS + min(lost, 350)):
        return float(mpmath.diff(lambda t: function(t, **params), mpmath.mpf(point)))


def root(name: str, guess: float, params: dict) -> float:
    """A zero of ``f'`` near ``guess`` (where ``f'`` has one), to float64."""
    function = FUNCTIONS[name]
    with mpmath.workdps(DIGITS):
        return float(mpmath.findroot(lambda t: mpmath.diff(lambda u: function(u, **params), t),
                                     mpmath.mpf(guess)))
