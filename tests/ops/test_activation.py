"""Activation oracles against mpmath (ulp), scipy.special, published constants, torch float64
autograd (known deviations declared once, below) and float64 finite differences."""
import functools
import math

import numpy as np
import pytest
import scipy.special as sp
import torch
import torch.nn.functional as F

import refops.ops as ops
from refops.ops import activation

from . import mp_reference

U = 2.0 ** -53                      # float64 unit roundoff (IEEE 754-2019)
TINY = np.finfo(np.float64).tiny
ULPS = 4

# (op, params); the ids name the case.
CASES = [
    ("relu", {}), ("relu6", {}), ("leaky_relu", {}), ("leaky_relu", {"negative_slope": 0.2}),
    ("elu", {}), ("elu", {"alpha": 0.7}), ("selu", {}), ("celu", {}), ("celu", {"alpha": 1.3}),
    ("gelu", {}), ("gelu", {"approximate": "tanh"}), ("silu", {}), ("mish", {}),
    ("softplus", {}), ("softplus", {"beta": 1.7, "threshold": 23.0}), ("sigmoid", {}),
    ("logsigmoid", {}), ("tanh", {}), ("atan", {}), ("hardtanh", {}),
    ("hardtanh", {"min_val": -0.7, "max_val": 1.9}), ("hardsigmoid", {}), ("hardswish", {}),
    ("softsign", {}),
]
IDS = [name + "".join(f"-{k}={v}" for k, v in p.items()) for name, p in CASES]

# Derivatives with a zero: within HALF_WIDTH of it the terms of f' (each of size about 1)
# cancel, and the error is measured in ulps of 1 instead of ulps of f'.
DERIVATIVE_ZEROS = {"gelu": -0.75, "silu": -1.28, "mish": -1.19, "hardswish": -1.5}
HALF_WIDTH = 0.5

# Torch 2.13 (CPU, float64) deviations from the exact values, each with its reason
# (shared/SOURCES.md; each confirmed below against mpmath). Nothing else is tolerated.
KNOWN_DEVIATIONS = {
    ("celu", "backward"): "alpha != 1: the input scale 1/alpha enters in reduced precision "
                          "(about 1e-8 relative, more in the tail)",
    ("hardsigmoid", "backward"): "uses the float32 constant 1/6 (3e-8 relative)",
    ("sigmoid", "backward"): "s * (1 - s) from the saved output cancels in the tails",
    ("tanh", "backward"): "1 - t**2 from the saved output cancels in the tails",
    ("gelu", "forward"): "0.5 x (1 + erf(x / sqrt 2)) cancels for x << 0",
}


def grid():
    """+-1e-8 .. +-1e4 on a log scale, the tails 20..40, and the middle -6..6 (~300 points)."""
    half = np.concatenate([np.logspace(-8, 4, 100), np.linspace(20, 40, 11),
                           np.linspace(0.05, 6, 40)])
    return np.unique(np.concatenate([-half, half]))


@functools.cache
def reference(name, frozen_params):
    """Reference: mpmath at 50 digits (tests/ops/mp_reference.py), cached for the session."""
    return mp_reference.values(name, grid(), dict(frozen_params))


def ulps(value, exact):
    return np.abs(value - exact) / np.spacing(np.abs(exact))


def oracle_values(name, params, x):
    op = ops.get(name)
    return op(x, **params), op.vjp(np.ones_like(x), x, **params)["input"]


# --------------------------------------------------------------------------------------------
# Accuracy against mpmath
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_forward_within_4_ulp_of_mpmath(name, params):
    x = grid()
    exact, _ = reference(name, tuple(sorted(params.items())))
    value, _ = oracle_values(name, params, x)
    normal = np.abs(exact) >= TINY
    # Reference: mpmath, 50 digits.
    err = np.where(normal, ulps(value, exact), 0.0)
    assert err.max() <= ULPS, f"{name}: {err.max():.1f} ulp at x={x[err.argmax()]!r}"
    assert np.all(np.abs(value - exact)[~normal] <= TINY)   # below the normal range: absolute


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_derivative_within_4_ulp_of_mpmath(name, params):
    x = grid()
    _, exact = reference(name, tuple(sorted(params.items())))
    _, slope = oracle_values(name, params, x)
    away = ops.get(name).kink_distance(x, **params)["input"] > 1e-6
    measured = away & (np.abs(exact) >= TINY)
    scale = np.abs(exact)
    if name in DERIVATIVE_ZEROS:
        zero = mp_reference.root(name, DERIVATIVE_ZEROS[name], params)
        scale = np.where(np.abs(x - zero) < HALF_WIDTH, np.maximum(scale, 1.0), scale)
    # Reference: mpmath, 50 digits, mpmath.diff.
    err = np.where(measured, np.abs(slope - exact) / np.spacing(scale), 0.0)
    assert err.max() <= ULPS, f"{name}': {err.max():.1f} ulp at x={x[err.argmax()]!r}"


def test_derivative_zeros_are_where_declared():
    # Reference: mpmath.findroot on mpmath.diff; the bands above must contain the zeros.
    for name, guess in DERIVATIVE_ZEROS.items():
        assert abs(mp_reference.root(name, guess, {}) - guess) < 0.05


# --------------------------------------------------------------------------------------------
# scipy.special and published definitions
# --------------------------------------------------------------------------------------------

MIDDLE = np.linspace(-8.0, 8.0, 161)


@pytest.mark.parametrize("name, function", [
    ("sigmoid", sp.expit), ("logsigmoid", sp.log_expit),
    ("gelu", lambda x: 0.5 * x * sp.erfc(-x / np.sqrt(2.0))),
    ("softplus", lambda x: np.logaddexp(0.0, x)),
    ("tanh", lambda x: 2.0 * sp.expit(2.0 * x) - 1.0),
])
def test_forward_matches_scipy_special(name, function):
    # Reference: scipy.special (expit, log_expit, erfc) and numpy.logaddexp, |x| <= 8.
    np.testing.assert_allclose(ops.get(name)(MIDDLE), function(MIDDLE), rtol=1e-14, atol=1e-300)


def test_gelu_follows_the_published_erf_and_tanh_forms():
    # Reference: Hendrycks & Gimpel (2016): x * 0.5 (1 + erf(x / sqrt 2)) and
    # 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x**3))); math.erf / math.tanh.
    x = np.array([-3.0, -1.0, -0.25, 0.5, 1.0, 2.5])
    exact = [0.5 * v * (1 + math.erf(v / math.sqrt(2))) for v in x]
    approx = [0.5 * v * (1 + math.tanh(math.sqrt(2 / math.pi) * (v + 0.044715 * v ** 3))) for v in x]
    np.testing.assert_allclose(ops.gelu(x), exact, rtol=1e-14)
    np.testing.assert_allclose(ops.gelu(x, approximate="tanh"), approx, rtol=1e-14)


def test_selu_uses_the_published_constants():
    # Reference: Klambauer et al. (2017), alpha ~ 1.6732632423543772, scale ~ 1.0507009873554805.
    assert activation.SELU_ALPHA == 1.6732632423543772
    assert activation.SELU_SCALE == 1.0507009873554805
    assert ops.selu(np.array([1.0]))[0] == 1.0507009873554805
    np.testing.assert_allclose(ops.selu(np.array([-800.0])), -1.6732632423543772 * 1.0507009873554805,
                               rtol=3e-16)


def test_hardsigmoid_derivative_is_one_sixth_in_float64():
    # Reference: hardsigmoid = relu6(x + 3) / 6 (common practice); 1/6 in float64.
    assert ops.hardsigmoid.vjp(np.ones(1), np.array([0.5]))["input"][0] == 1.0 / 6.0


# --------------------------------------------------------------------------------------------
# torch float64 autograd
# --------------------------------------------------------------------------------------------

TORCH = {
    "relu": F.relu, "relu6": F.relu6, "leaky_relu": F.leaky_relu, "elu": F.elu, "selu": F.selu,
    "celu": F.celu, "gelu": F.gelu, "silu": F.silu, "mish": F.mish, "softplus": F.softplus,
    "sigmoid": torch.sigmoid, "logsigmoid": F.logsigmoid, "tanh": torch.tanh, "atan": torch.atan,
    "hardtanh": F.hardtanh, "hardsigmoid": F.hardsigmoid, "hardswish": F.hardswish,
    "softsign": F.softsign,
}


def torch_values(name, params, x, g):
    t = torch.tensor(x, dtype=torch.float64, requires_grad=True)
    y = TORCH[name](t, **params)
    y.backward(torch.tensor(g, dtype=torch.float64))
    return y.detach().numpy(), t.grad.numpy()


def deviates(name, params, part):
    """A declared deviation applies (celu's only for alpha != 1)."""
    if name == "celu" and params.get("alpha", 1.0) == 1.0:
        return False
    return (name, part) in KNOWN_DEVIATIONS


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_forward_and_vjp_match_torch_away_from_the_tails(name, params):
    rng = np.random.default_rng(len(name))
    x = rng.uniform(-6.0, 6.0, size=(4, 50))
    g = rng.standard_normal(x.shape)
    y, grad = torch_values(name, params, x, g)
    op = ops.get(name)
    # Reference: torch.nn.functional, float64 autograd; relative to the size of the terms.
    for part, ours, theirs, scale in [
            ("forward", op(x, **params), y, 1.0 + np.abs(x)),
            ("backward", op.vjp(g, x, **params)["input"], grad, np.abs(g))]:
        rtol = 1e-6 if deviates(name, params, part) else 1e-14
        assert np.all(np.abs(ours - theirs) <= rtol * scale), (name, part)


TAILS = np.array([-40.0, -30.0, -22.0, 22.0, 30.0, 40.0])


@pytest.mark.parametrize("name, part", [k for k in KNOWN_DEVIATIONS if k[0] not in ("celu", "hardsigmoid")],
                         ids="-".join)
def test_declared_tail_deviations_are_real_and_the_oracle_is_right_there(name, part):
    x = TAILS[(TAILS < 0)] if name == "gelu" else TAILS
    exact_value, exact_slope = mp_reference.values(name, x, {})
    exact = exact_value if part == "forward" else exact_slope
    theirs = torch_values(name, {}, x, np.ones_like(x))[0 if part == "forward" else 1]
    ours = oracle_values(name, {}, x)[0 if part == "forward" else 1]
    normal = np.abs(exact) >= TINY
    # Reference: mpmath, 50 digits; torch.nn.functional float64 autograd.
    assert np.all(ulps(ours, exact)[normal] <= ULPS)
    assert np.max(np.abs(theirs - exact)[normal] / np.abs(exact[normal])) > 1e-3


@pytest.mark.parametrize("name, params, expected", [
    ("celu", {"alpha": 1.3}, 1e-9), ("hardsigmoid", {}, 1e-8)], ids=["celu", "hardsigmoid"])
def test_declared_small_backward_deviations_are_real(name, params, expected):
    x = np.linspace(-2.9, -0.1, 30)
    exact = mp_reference.values(name, x, params)[1]
    theirs = torch_values(name, params, x, np.ones_like(x))[1]
    # Reference: mpmath, 50 digits; torch float64 autograd.
    assert np.max(np.abs(theirs - exact) / np.abs(exact)) > expected
    assert np.all(ulps(oracle_values(name, params, x)[1], exact) <= ULPS)


KINK_POINTS = [
    ("relu", {}), ("relu6", {}), ("leaky_relu", {"negative_slope": 0.2}), ("elu", {"alpha": 0.5}),
    ("selu", {}), ("celu", {"alpha": 0.5}), ("hardtanh", {"min_val": -0.7, "max_val": 1.9}),
    ("hardsigmoid", {}), ("hardswish", {}), ("softplus", {"beta": 2.0, "threshold": 10.0}),
]


@pytest.mark.parametrize("name, params", KINK_POINTS, ids=[k for k, _ in KINK_POINTS])
def test_derivative_at_the_kinks_follows_torch(name, params):
    op = ops.get(name)
    points = np.array([p for kink in op.kinks for p in kink.points(params)])
    assert np.all(op.kink_distance(points, **params)["input"] == 0)
    theirs = torch_values(name, params, points, np.ones_like(points))[1]
    # Reference: torch.nn.functional, float64 autograd at the exact kink points; 1 ulp for
    # selu's scale * alpha, which torch forms from the two rounded constants.
    rtol = 1e-7 if deviates(name, params, "backward") else 2.5e-16
    np.testing.assert_allclose(op.vjp(np.ones_like(points), points, **params)["input"], theirs,
                               rtol=rtol)


def test_softplus_switches_to_linear_on_the_rounded_product_like_torch():
    x = np.array([9.999999999, 10.0, 10.000000001, 10.5]) / 2.0
    # Reference: torch.nn.functional.softplus, float64, beta=2, threshold=10.
    theirs = torch_values("softplus", {"beta": 2.0, "threshold": 10.0}, x, np.ones_like(x))
    np.testing.assert_allclose(ops.softplus(x, beta=2.0, threshold=10.0), theirs[0], rtol=1e-15)
    np.testing.assert_allclose(ops.softplus.vjp(np.ones_like(x), x, beta=2.0, threshold=10.0)["input"],
                               theirs[1], rtol=1e-15)


@pytest.mark.parametrize("input_shape, weight_shape", [
    ((), (1,)), ((5,), (1,)), ((2, 3), (3,)), ((2, 3, 4), (3,)), ((2, 3, 4, 2), (1,)),
    ((1, 4, 2, 3), (4,))])
def test_prelu_matches_torch(input_shape, weight_shape):
    rng = np.random.default_rng(3)
    x, w = rng.standard_normal(input_shape), rng.standard_normal(weight_shape)
    g = rng.standard_normal(input_shape)
    tx, tw = (torch.tensor(a, requires_grad=True) for a in (x, w))
    y = F.prelu(tx, tw)
    y.backward(torch.tensor(g))
    grads = ops.prelu.vjp(g, x, w)
    # Reference: torch.nn.functional.prelu, float64 autograd.
    np.testing.assert_allclose(ops.prelu(x, w), y.detach().numpy(), rtol=1e-15)
    np.testing.assert_allclose(grads["input"], tx.grad.numpy(), rtol=1e-15)
    np.testing.assert_allclose(grads["weight"], tw.grad.numpy(), rtol=1e-13)
    assert grads["weight"].shape == weight_shape


# --------------------------------------------------------------------------------------------
# Finite differences
# --------------------------------------------------------------------------------------------

def central_difference(f, x, h):
    """Richardson-extrapolated central difference (common practice: error O(h**4))."""
    d1 = (f(x + h) - f(x - h)) / (2 * h)
    d2 = (f(x + h / 2) - f(x - h / 2)) / h
    return (4 * d2 - d1) / 3


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_vjp_matches_finite_differences_away_from_kinks(name, params):
    op = ops.get(name)
    x = np.random.default_rng(11).uniform(-8.0, 8.0, 200)
    h = 1e-3 * np.maximum(1.0, np.abs(x))
    x = x[op.kink_distance(x, **params)["input"] > 4 * h]
    h = 1e-3 * np.maximum(1.0, np.abs(x))
    g = np.random.default_rng(12).standard_normal(x.shape)
    fd = central_difference(lambda t: op(t, **params), x, h)
    # Reference: float64 central differences with Richardson extrapolation.
    np.testing.assert_allclose(op.vjp(g, x, **params)["input"], g * fd, rtol=1e-8, atol=1e-10)


def test_prelu_weight_gradient_matches_finite_differences():
    rng = np.random.default_rng(5)
    x, w, g = rng.standard_normal((3, 4, 5)), rng.standard_normal(4), rng.standard_normal((3, 4, 5))
    h = 1e-6
    fd = [np.sum(g * (ops.prelu(x, w + h * e) - ops.prelu(x, w - h * e))) / (2 * h) for e in np.eye(4)]
    # Reference: float64 central differences (prelu is linear in the weight: exact up to rounding).
    np.testing.assert_allclose(ops.prelu.vjp(g, x, w)["weight"], fd, rtol=1e-8)


# --------------------------------------------------------------------------------------------
# Error terms (INTERFACES.md conventions), hand-derived values
# --------------------------------------------------------------------------------------------

def test_error_terms_follow_the_elementwise_convention():
    x, g = np.array([-2.0, 0.5, 3.0]), np.array([1.0, -2.0, 0.5])
    terms = ops.relu.error_terms(g, x)
    # Hand-derived (common practice): M = |x f'| + |f| = 2|x| for x > 0; gradient |g| |f'|.
    np.testing.assert_array_equal(terms["output"].magnitude, [0.0, 1.0, 6.0])
    np.testing.assert_array_equal(terms["input"].magnitude, [0.0, 2.0, 0.5])
    t = np.tanh(0.5)
    # Hand-derived: tanh's backward reuses the rounded output: S = |g| |d f'/d f| |f| = 2 |g| t**2.
    np.testing.assert_allclose(ops.tanh.error_terms(np.array([3.0]), np.array([0.5]))["input"].rounded,
                               [6.0 * t * t], rtol=1e-15)
    w = np.array([0.25])
    prelu_terms = ops.prelu.error_terms(np.ones((2, 3)), np.arange(6.0).reshape(2, 3) - 3, w)
    # Hand-derived: the weight gradient sums |g x| over all 6 positions of its one channel.
    assert prelu_terms["weight"].magnitude[0] == 3 + 2 + 1 + 0 + 1 + 2
    assert prelu_terms["weight"].length == 6 and prelu_terms["weight"].accumulate == "wide"


# --------------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------------

X = np.linspace(-1.0, 1.0, 6).reshape(2, 3)
BAD = [
    ("hardtanh-min-above-max", "hardtanh", (X,), dict(min_val=2.0, max_val=1.0), ValueError,
     r"min_val=2\.0: must be <= max_val=1\.0"),
    ("gelu-unknown-approximate", "gelu", (X,), dict(approximate="erf"), ValueError,
     r"approximate='erf': expected one of 'none', 'tanh'"),
    ("softplus-zero-beta", "softplus", (X,), dict(beta=0.0), ValueError, r"beta=0\.0: must be nonzero"),
    ("softplus-string-beta", "softplus", (X,), dict(beta="1"), TypeError, r"beta='1': expected a real"),
    ("celu-zero-alpha", "celu", (X,), dict(alpha=0.0), ValueError, r"alpha=0\.0: must be > 0"),
    ("elu-infinite-alpha", "elu", (X,), dict(alpha=math.inf), ValueError, r"alpha=inf: must be finite"),
    ("leaky-bool-slope", "leaky_relu", (X,), dict(negative_slope=True), TypeError, r"negative_slope=True"),
    ("integer-input", "relu", (np.arange(3),), {}, TypeError, r"input=array\(shape=\(3,\), dtype=int64\)"),
    ("nan-input", "sigmoid", (np.array([0.0, np.nan]),), {}, ValueError, r"input=.*non-finite value at index \(1,\)"),
    ("inf-input", "tanh", (np.array([np.inf]),), {}, ValueError, r"input=.*non-finite"),
    ("unknown-keyword", "relu", (X,), dict(inplace=True), TypeError, r"unknown parameter inplace=True"),
    ("prelu-weight-length", "prelu", (X, np.ones(2)), {}, ValueError,
     r"weight=array\(shape=\(2,\).*expected 1 or input.shape\[1\] = 3"),
    ("prelu-weight-rank", "prelu", (X, np.ones((3, 1))), {}, ValueError, r"weight=.*expected 1 dimensions"),
    ("prelu-1d-input-many-weights", "prelu", (np.ones(4), np.ones(4)), {}, ValueError,
     r"weight=.*input.shape\[1\] = 1"),
    ("prelu-missing-weight", "prelu", (X,), {}, TypeError, r"prelu\(\) takes 2 to 2 arrays"),
]


@pytest.mark.parametrize("name, arrays, params, error, match", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_bad_arguments_are_named(name, arrays, params, error, match):
    with pytest.raises(error, match=match):
        ops.get(name)(*arrays, **params)


def test_grad_output_of_the_wrong_shape_is_named():
    with pytest.raises(ValueError, match=r"grad_output=array\(shape=\(3,\).*expected shape \(2, 3\)"):
        ops.softplus.vjp(np.ones(3), X)
