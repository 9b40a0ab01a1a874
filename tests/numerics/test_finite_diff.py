"""Finite differences: published accuracy facts, kinks, and every oracle's vjp against FD."""
import mpmath
import numpy as np
import pytest
import torch

import refops.ops as ops
from refops.numerics import (central_step, complex_step, dense_jacobian, directional_check,
                             vjp_fd_agreement)
from refops.ops._space import RandomDraw, plain_arrays

U64 = 2.0 ** -53


# ---------------------------------------------------------------------------------------------
# every registered oracle: vjp against dense and directional finite differences (float64)

def oracle_case(name, seed):
    op = ops.get(name)
    rng = np.random.default_rng(seed)
    config = op.space(RandomDraw(rng))
    arrays, params = plain_arrays(op, config, rng)
    given = dict(zip(op.arrays, arrays))

    def forward(**a):
        return op(*(a[n] for n in op.arrays), **params)

    def vjp(g, **a):
        return op.vjp(g, *(a[n] for n in op.arrays), **params)

    return forward, vjp, given, op.kink_distance(*arrays, **params), rng


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("name", ops.names())
def test_oracle_vjp_agrees_with_finite_differences(name, seed):
    # Reference: central differences with Richardson extrapolation of the oracle's own forward,
    # with the finite differences' error estimate as the tolerance.
    forward, vjp, arrays, distances, rng = oracle_case(name, seed)
    dense = vjp_fd_agreement(forward, vjp, arrays, rng=rng, kink_distance=distances,
                             dense_limit=48)
    directional = vjp_fd_agreement(forward, vjp, arrays, rng=rng, kink_distance=distances,
                                   dense_limit=0, probes=2)
    assert dense and directional
    for result in dense + directional:
        assert result.passed, result
    assert {r.array for r in dense} == set(vjp(np.ones(np.shape(forward(**arrays))), **arrays))


@pytest.mark.parametrize("name", ops.names())
def test_oracle_vjp_error_is_caught(name):
    # A vjp off by 1e-5 of its largest entry in one element must be caught by dense or
    # directional finite differences (a check that cannot fail would pass here).
    forward, vjp, arrays, distances, rng = oracle_case(name, 7)

    def wrong_vjp(g, **a):
        grads = vjp(g, **a)
        first = next(iter(grads))
        bad = grads[first].copy()
        flat = bad.reshape(-1)
        flat[int(np.argmax(np.abs(flat)))] += 1e-5 * max(np.abs(flat).max(), 1.0)
        return {**grads, first: bad}

    results = vjp_fd_agreement(forward, wrong_vjp, arrays, rng=rng, kink_distance=distances,
                               dense_limit=10 ** 6 if _size(arrays) <= 400 else 48, probes=3)
    assert not results[0].passed, results[0]


def _size(arrays):
    return max(np.size(a) for a in arrays.values() if a is not None)


# ---------------------------------------------------------------------------------------------
# published facts

def test_central_step_balances_truncation_and_rounding():
    # Reference: Nocedal & Wright (2006), sec. 8.1: the central difference with h ~ u^(1/3) has
    # error of order u^(2/3); f = exp at x = 1, f' = e.
    x = np.array(1.0)
    h = central_step("float64", x)
    assert np.isclose(h, U64 ** (1 / 3))
    error_at = {}
    for step in [1e-2, 1e-3, 1e-4, float(h), 1e-6, 1e-7, 1.5e-8]:
        d = dense_jacobian(np.exp, x, step=step, richardson=False)
        error_at[step] = abs(float(d.value) - np.e)
        assert error_at[step] <= d.error                      # the estimate bounds the error
    assert error_at[float(h)] < 10 * U64 ** (2 / 3) * np.e
    assert error_at[float(h)] <= 3 * min(error_at.values())   # near the optimum of the V
    assert error_at[1.5e-8] > 5 * error_at[float(h)]          # the forward-difference step
    assert np.isclose(central_step("float32", np.array(-1000.0)), 1000 * 2.0 ** -8)


def test_richardson_raises_the_order_from_two_to_four():
    # Reference: Richardson extrapolation (Burden & Faires): central differences have error
    # O(h^2); combining h and 2h gives O(h^4). f = sin at x = 0.7, f' = cos(0.7).
    x = np.array(0.7)
    exact = np.cos(0.7)
    plain = [abs(float(dense_jacobian(np.sin, x, step=h, richardson=False).value) - exact)
             for h in (0.1, 0.05)]
    extrapolated = [abs(float(dense_jacobian(np.sin, x, step=h).value) - exact)
                    for h in (0.1, 0.05)]
    assert 3.8 < plain[0] / plain[1] < 4.2
    assert 15 < extrapolated[0] / extrapolated[1] < 17
    assert extrapolated[1] < plain[1] / 1000


def squire_trapp(x):
    return np.exp(x) / np.sqrt(np.sin(x) ** 3 + np.cos(x) ** 3)


def test_complex_step_is_exact_to_rounding():
    # Reference: Squire & Trapp (1998), test function e^x / sqrt(sin^3 x + cos^3 x) at x = 1.5;
    # exact derivative by mpmath at 50 digits.
    mpmath.mp.dps = 50
    exact = float(mpmath.diff(lambda t: mpmath.exp(t) / mpmath.sqrt(mpmath.sin(t) ** 3
                                                                     + mpmath.cos(t) ** 3),
                              mpmath.mpf("1.5")))
    for step in (1e-20, 1e-100, 1e-300):
        d = complex_step(squire_trapp, np.array(1.5), step=step)
        assert abs(float(d.value) - exact) <= 4 * U64 * abs(exact)
        assert abs(float(d.value) - exact) <= d.error
    # Central differences lose ~ u^(2/3) on the same function.
    central = dense_jacobian(squire_trapp, np.array(1.5), richardson=False)
    assert abs(float(central.value) - exact) > 100 * U64 * abs(exact)


def test_complex_step_jacobian_and_direction():
    # Reference: torch.autograd.functional.jacobian, float64.
    rng = np.random.default_rng(0)
    a = rng.standard_normal((3, 4))
    x = rng.standard_normal(4)

    def f(v):
        return np.exp(np.tensordot(v, a.T, axes=1)) * np.sin(v[..., :3])

    expected = torch.autograd.functional.jacobian(
        lambda v: torch.exp(v @ torch.from_numpy(a).T) * torch.sin(v[:3]),
        torch.from_numpy(x)).numpy()
    jac = complex_step(f, x)
    assert np.allclose(jac.value, expected, rtol=1e-14, atol=1e-14)
    batched = complex_step(f, x, batched=True)       # one call; BLAS may sum in another order
    assert np.all(np.abs(batched.value - jac.value) <= jac.error)
    d = rng.standard_normal(4)
    assert np.allclose(complex_step(f, x, direction=d).value, expected @ d, rtol=1e-14, atol=1e-14)


def test_dense_jacobian_error_estimate_bounds_the_error():
    # Reference: torch.autograd.functional.jacobian, float64.
    rng = np.random.default_rng(1)
    w = rng.standard_normal((5, 6))
    x = rng.standard_normal(6)

    def f(v):
        return np.tanh(np.tensordot(v, w.T, axes=1)) ** 2

    expected = torch.autograd.functional.jacobian(
        lambda v: torch.tanh(v @ torch.from_numpy(w).T) ** 2, torch.from_numpy(x)).numpy()
    jac = dense_jacobian(f, x)
    assert jac.value.shape == (5, 6)
    assert np.all(np.abs(jac.value - expected) <= jac.error)
    assert np.max(jac.error) < 1e-7                                 # and it is not vacuous
    batched = dense_jacobian(f, x, batched=True)     # one call; BLAS may sum in another order
    assert np.all(np.abs(batched.value - expected) <= batched.error)


def test_kinks_are_skipped_or_avoided_never_failed():
    # Reference: relu's derivative, 1 for x > 0 and 0 for x < 0 (common practice).
    x = np.array([-1.0, 0.0, 1e-12, 2e-6, 0.5, 3.0])
    relu = lambda v: np.maximum(v, 0.0)          # noqa: E731
    jac = dense_jacobian(relu, x, kink_distance=np.abs(x))
    assert list(jac.skipped) == [False, True, True, False, False, False]
    diagonal = np.diagonal(jac.value)
    assert np.array_equal(diagonal[~jac.skipped], [0.0, 1.0, 1.0, 1.0])
    # Without the declared kink the stencil straddles 0 and gives 1/2: it would be a failure.
    assert np.diagonal(dense_jacobian(relu, x).value)[1] == 0.5

    def relu_vjp(g, *, input):
        return {"input": g * (input > 0)}

    rng = np.random.default_rng(0)
    for limit in (100, 0):
        good = vjp_fd_agreement(lambda *, input: relu(input), relu_vjp, {"input": x}, rng=rng,
                                kink_distance={"input": np.abs(x)}, dense_limit=limit)
        assert good[0].passed and good[0].skipped == 2
        blind = vjp_fd_agreement(lambda *, input: relu(input), relu_vjp, {"input": x}, rng=rng,
                                 dense_limit=limit)
        assert not blind[0].passed


def test_directional_check_against_torch_autograd():
    # Reference: torch autograd vjp (float64) of y = tanh(W x) for a batch of inputs.
    rng = np.random.default_rng(2)
    w = rng.standard_normal((7, 9))
    x = rng.standard_normal((20, 9))
    v = rng.standard_normal((20, 7))
    xt = torch.from_numpy(x).requires_grad_()
    torch.tanh(xt @ torch.from_numpy(w).T).backward(torch.from_numpy(v))
    gradient = xt.grad.numpy()

    def f(a):
        return np.tanh(a @ w.T)

    probe = directional_check(f, x, v, gradient, rng=rng)
    assert probe.passed and probe.estimate < 1e-8 * abs(probe.predicted)
    assert np.isclose(probe.finite_difference, probe.predicted, rtol=1e-8)
    wrong = gradient.copy()
    wrong[3, 4] *= 1.001
    assert not directional_check(f, x, v, wrong, rng=rng).passed


def test_outputs_that_stay_infinite_have_no_derivative():
    # A max-pool window over padding only is -inf at every point of the stencil (CONTRACT.md);
    # its derivative is 0 and it must not turn the estimates into inf or NaN.
    # Reference: d/dx x**2 = 2x (common practice).
    def f(*, input):
        return np.concatenate([input ** 2, [-np.inf]])

    def f_vjp(g, *, input):
        return {"input": 2 * input * g[:-1]}

    x = np.array([0.5, -1.5, 2.0])
    rng = np.random.default_rng(4)
    for limit in (10, 0):
        result = vjp_fd_agreement(f, f_vjp, {"input": x}, rng=rng, dense_limit=limit)[0]
        assert result.passed and np.isfinite(result.estimate) and result.estimate < 1e-6
        wrong = vjp_fd_agreement(f, lambda g, *, input: {"input": 2.01 * input * g[:-1]},
                                 {"input": x}, rng=rng, dense_limit=limit)[0]
        assert not wrong.passed


BAD_CALLS = [
    ("rng", lambda: vjp_fd_agreement(np.sin, None, {}, rng=0), TypeError, r"rng=0"),
    ("kink-shape", lambda: dense_jacobian(np.sin, np.ones(3), kink_distance=np.ones(2)),
     ValueError, r"kink_distance=.*shape \(3,\)"),
    ("x-int", lambda: dense_jacobian(np.sin, np.arange(3)), TypeError, r"x=array"),
    ("x-nan", lambda: dense_jacobian(np.sin, np.array([np.nan])), ValueError, r"x=.*finite"),
    ("batched-shape", lambda: dense_jacobian(lambda v: v.sum(), np.ones(3), batched=True),
     ValueError, r"fn=.*leading batch of 12"),
    ("direction-rng", lambda: directional_check(np.sin, np.ones(3), np.ones(3), np.ones(3)),
     TypeError, r"rng=None"),
    ("gradient-shape", lambda: directional_check(np.sin, np.ones(3), np.ones(3), np.ones(2),
                                                 rng=np.random.default_rng()),
     ValueError, r"gradient=.*shape \(3,\)"),
]


@pytest.mark.parametrize("call, kind, message", [c[1:] for c in BAD_CALLS],
                         ids=[c[0] for c in BAD_CALLS])
def test_bad_arguments(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
