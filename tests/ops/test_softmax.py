"""softmax and log_softmax against torch, scipy and extreme logits."""
import numpy as np
import pytest
import scipy.special
import torch

import refops.ops as ops
from refops.ops._space import RandomDraw, plain_arrays

TORCH = {"softmax": torch.softmax, "log_softmax": torch.log_softmax}


@pytest.mark.parametrize("name", sorted(TORCH))
@pytest.mark.parametrize("seed", range(25))
def test_forward_and_vjp_match_torch(name, seed):
    # Reference: torch.softmax / torch.log_softmax in float64 with autograd.
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(seed)))
    (x,), params = plain_arrays(op, config, np.random.default_rng(seed))
    x = 5 * x
    xt = torch.tensor(x, requires_grad=True)
    yt = TORCH[name](xt, dim=params["dim"])
    g = np.random.default_rng(seed + 1).standard_normal(yt.shape)
    yt.backward(torch.tensor(g))
    np.testing.assert_allclose(op(x, **params), yt.detach().numpy(), rtol=1e-13, atol=1e-15)
    np.testing.assert_allclose(op.vjp(g, x, **params)["input"], xt.grad.numpy(), rtol=1e-11, atol=1e-14)


@pytest.mark.parametrize("dim", [0, 1, -1])
def test_scipy_agrees(dim):
    # Reference: scipy.special.softmax / log_softmax.
    x = np.random.default_rng(3).standard_normal((4, 5)) * 10
    np.testing.assert_allclose(ops.softmax(x, dim=dim), scipy.special.softmax(x, axis=dim), rtol=1e-14)
    np.testing.assert_allclose(ops.log_softmax(x, dim=dim), scipy.special.log_softmax(x, axis=dim),
                               rtol=1e-14, atol=1e-14)


def test_logits_of_1e4_stay_finite_and_exact():
    # Worked example: softmax([1e4, -1e4, 1e4]) = [1/2, 0 (exp(-2e4) underflows), 1/2];
    # log_softmax = [-log 2, -2e4 - log 2, -log 2] (common practice: shift by the maximum).
    x = np.array([1e4, -1e4, 1e4])
    np.testing.assert_array_equal(ops.softmax(x, dim=0), [0.5, 0.0, 0.5])
    np.testing.assert_allclose(ops.log_softmax(x, dim=0), [-np.log(2), -2e4 - np.log(2), -np.log(2)],
                               rtol=1e-15)
    grad = ops.log_softmax.vjp(np.array([1.0, 0.0, 0.0]), x, dim=0)["input"]
    np.testing.assert_allclose(grad, [0.5, 0.0, -0.5], atol=1e-16)


@pytest.mark.parametrize("call, kind, message", [
    pytest.param(lambda: ops.softmax(np.ones((2, 3)), dim=2), ValueError, r"dim=2: out of range", id="dim-high"),
    pytest.param(lambda: ops.log_softmax(np.ones((2, 3)), dim=-3), ValueError, r"dim=-3: out of range",
                 id="dim-low"),
    pytest.param(lambda: ops.softmax(np.ones(3), dim=1.0), TypeError, r"dim=1.0: expected an int", id="dim-float"),
    pytest.param(lambda: ops.softmax(np.array(1.0), dim=0), ValueError, r"input=.*0-d", id="scalar"),
    pytest.param(lambda: ops.softmax(np.ones(3, dtype=int), dim=0), TypeError, r"input=.*floating", id="int"),
    pytest.param(lambda: ops.softmax.vjp(np.ones(2), np.ones(3), dim=0), ValueError, r"grad_output=.*\(3,\)",
                 id="cotangent-shape"),
])
def test_bad_calls_name_the_argument(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
