"""Losses against torch float64 autograd, worked examples and confident logits."""
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F

import refops.ops as ops
from refops.ops._space import RandomDraw, plain_arrays


def torch_loss(name, x, t, params):
    if name == "cross_entropy":
        return F.cross_entropy(x, torch.tensor(t), **params)
    return getattr(F, name)(x, t, **params)


@pytest.mark.parametrize("name", ["mse_loss", "cross_entropy", "binary_cross_entropy_with_logits"])
@pytest.mark.parametrize("seed", range(30))
def test_forward_and_vjp_match_torch(name, seed):
    # Reference: torch.nn.functional losses in float64 with autograd.
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(seed)))
    (x, t), params = plain_arrays(op, config, np.random.default_rng(seed))
    xt = torch.tensor(x, requires_grad=True)
    tt = t if name == "cross_entropy" else torch.tensor(t, requires_grad=True)
    yt = torch_loss(name, xt, tt, params)
    g = np.random.default_rng(seed + 1).standard_normal(yt.shape)
    yt.backward(torch.tensor(g))
    out = op(x, t, **params)
    assert out.shape == tuple(yt.shape)
    np.testing.assert_allclose(out, yt.detach().numpy(), rtol=1e-13, atol=1e-15)
    grads = op.vjp(g, x, t, **params)
    np.testing.assert_allclose(grads["input"], xt.grad.numpy(), rtol=1e-12, atol=1e-15)
    if name != "cross_entropy":
        np.testing.assert_allclose(grads["target"], tt.grad.numpy(), rtol=1e-12, atol=1e-15)


def test_label_smoothing_worked_example():
    # Szegedy et al. (2016): target distribution (1 - eps) onehot + eps / C; here C = 2, eps = 0.5,
    # logits [0, 0] give p = [1/2, 1/2] and loss = -(0.75 log 1/2 + 0.25 log 1/2) = log 2.
    x = np.array([[0.0, 0.0]])
    assert math.isclose(float(ops.cross_entropy(x, np.array([1]), label_smoothing=0.5)), math.log(2),
                        rel_tol=1e-15)
    grad = ops.cross_entropy.vjp(np.array(1.0), x, np.array([1]), label_smoothing=0.5)["input"]
    np.testing.assert_allclose(grad, [[0.5 - 0.25, 0.5 - 0.75]], rtol=1e-15)


def test_confident_logits_stay_finite_and_exact():
    # Worked by hand: logits [1e4, 0] with target 1 lose 1e4 + log1p(exp(-1e4)) = 1e4 exactly in
    # float64; BCE at x = -800, t = 1 is log1p(exp(800)) = 800 (stable softplus form).
    assert float(ops.cross_entropy(np.array([[1e4, 0.0]]), np.array([1]))) == 1e4
    assert float(ops.cross_entropy(np.array([[1e4, 0.0]]), np.array([0]))) == 0.0
    assert float(ops.binary_cross_entropy_with_logits(np.array([-800.0]), np.array([1.0]))) == 800.0
    grad = ops.binary_cross_entropy_with_logits.vjp(np.array(1.0), np.array([-800.0]), np.array([1.0]))
    np.testing.assert_array_equal(grad["input"], [-1.0])


def test_mean_reduction_is_compensated_sum_over_count():
    # Reference: math.fsum (exactly rounded sum) of the per-element squares.
    rng = np.random.default_rng(5)
    x, t = rng.standard_normal(1000) * 1e3, rng.standard_normal(1000)
    exact = math.fsum(((x - t) ** 2).tolist()) / 1000
    assert math.isclose(float(ops.mse_loss(x, t)), exact, rel_tol=1e-13)


@pytest.mark.parametrize("call, kind, message", [
    pytest.param(lambda: ops.mse_loss(np.ones(3), np.ones(4)), ValueError, r"target=.*shape \(3,\)", id="mse-shape"),
    pytest.param(lambda: ops.mse_loss(np.ones(3), np.ones(3), reduction="avg"), ValueError,
                 r"reduction='avg': expected one of", id="reduction"),
    pytest.param(lambda: ops.cross_entropy(np.ones((2, 3)), np.array([0, 3])), ValueError,
                 r"target=.*class index 3 is out of range \[0, 2\]", id="class-high"),
    pytest.param(lambda: ops.cross_entropy(np.ones((2, 3)), np.array([-1, 0])), ValueError,
                 r"class index -1", id="class-negative"),
    pytest.param(lambda: ops.cross_entropy(np.ones((2, 3)), np.array([0.0, 1.0])), TypeError,
                 r"target=.*integer dtype", id="float-target"),
    pytest.param(lambda: ops.cross_entropy(np.ones((2, 3)), np.array([0, 1]), label_smoothing=1.5), ValueError,
                 r"label_smoothing=1.5: must lie in \[0, 1\]", id="smoothing"),
    pytest.param(lambda: ops.cross_entropy(np.ones((2, 3)), np.array([0])), ValueError,
                 r"target=.*expected shape \(2,\)", id="ce-shape"),
    pytest.param(lambda: ops.binary_cross_entropy_with_logits(np.ones(2), np.ones((2, 1))), ValueError,
                 r"target=", id="bce-shape"),
    pytest.param(lambda: ops.mse_loss.vjp(np.ones(3), np.ones(3), np.ones(3)), ValueError,
                 r"grad_output=.*expected shape \(\)", id="cotangent-shape"),
])
def test_bad_calls_name_the_argument(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
