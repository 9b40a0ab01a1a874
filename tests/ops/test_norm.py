"""Normalisations against torch float64 autograd, the published definitions and finite differences."""
import numpy as np
import pytest
import torch
import torch.nn.functional as F

import refops.ops as ops
from refops.numerics.finite_diff import vjp_fd_agreement
from refops.ops._space import RandomDraw, plain_arrays

# Known torch 2.13 deviation (SOURCES.md): group_norm backward fails when only one of weight/bias
# is given. Such cases are checked against float64 finite differences instead of torch.
TORCH_GROUP_NORM_NEEDS_BOTH_AFFINE = "torch group_norm backward fails with only one of weight/bias"


def torch_call(name, x, w, b, params):
    if name == "batch_norm":
        rm, rv = (None if params.get(k) is None else torch.tensor(params[k]) for k in ("running_mean", "running_var"))
        return F.batch_norm(x, rm, rv, w, b, training=params["training"], momentum=params["momentum"],
                            eps=params["eps"])
    if name == "layer_norm":
        return F.layer_norm(x, params["normalized_shape"], w, b, eps=params["eps"])
    return F.group_norm(x, params["num_groups"], w, b, eps=params["eps"])


@pytest.mark.parametrize("name", ["batch_norm", "layer_norm", "group_norm"])
@pytest.mark.parametrize("seed", range(25))
def test_forward_and_vjp_match_torch(name, seed):
    # Reference: torch.nn.functional.batch_norm / layer_norm / group_norm, float64 autograd.
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(seed)))
    arrays, params = plain_arrays(op, config, np.random.default_rng(seed))
    x, w, b = (None if a is None else 3 * a + 1 for a in arrays)
    ts = [None if a is None else torch.tensor(a, requires_grad=True) for a in (x, w, b)]
    yt = torch_call(name, *ts, params)
    g = np.random.default_rng(seed + 1).standard_normal(yt.shape)
    yt.backward(torch.tensor(g))
    np.testing.assert_allclose(op(x, w, b, **params), yt.detach().numpy(), rtol=1e-12, atol=1e-12)
    grads = op.vjp(g, x, w, b, **params)
    for key, t in zip(("input", "weight", "bias"), ts):
        if t is not None:
            np.testing.assert_allclose(grads[key], t.grad.numpy(), rtol=1e-10, atol=1e-11, err_msg=key)


@pytest.mark.parametrize("present", ["weight", "bias"])
def test_group_norm_with_one_affine_array_matches_finite_differences(present):
    # Reference: float64 central finite differences (torch fails here: TORCH_GROUP_NORM_NEEDS_BOTH_AFFINE).
    rng = np.random.default_rng(4)
    x = rng.standard_normal((2, 4, 3))
    affine = rng.standard_normal(4)
    w, b = (affine, None) if present == "weight" else (None, affine)
    arrays = {"input": x, present: affine}

    def forward(input, **rest):
        return ops.group_norm(input, rest.get("weight"), rest.get("bias"), num_groups=2)

    def backward(g, input, **rest):
        return ops.group_norm.vjp(g, input, rest.get("weight"), rest.get("bias"), num_groups=2)

    results = vjp_fd_agreement(forward, backward, arrays, rng=rng)
    assert all(r.passed for r in results), results
    assert set(ops.group_norm.vjp(np.ones_like(x), x, w, b, num_groups=2)) == {"input", present}


def test_definition_worked_example():
    # Ioffe & Szegedy (2015): xhat = (x - mean) / sqrt(var + eps), biased variance. Batch [1, 3]:
    # mean 2, var 1, so xhat = [-1, 1] / sqrt(1 + eps); with w = 2, b = 5: y = 5 -+ 2 / sqrt(1 + eps).
    x = np.array([[1.0], [3.0]])
    y = ops.batch_norm(x, np.array([2.0]), np.array([5.0]), eps=1e-5)
    np.testing.assert_allclose(y, [[5 - 2 / np.sqrt(1 + 1e-5)], [5 + 2 / np.sqrt(1 + 1e-5)]], rtol=1e-15)
    # Ba, Kiros & Hinton (2016): the same statistics over the features of one sample.
    np.testing.assert_allclose(ops.layer_norm(np.array([1.0, 3.0]), normalized_shape=2, eps=1e-5),
                               np.array([-1, 1]) / np.sqrt(1 + 1e-5), rtol=1e-15)
    # Wu & He (2018): one group over all channels of a sample equals layer norm over (C, *).
    z = np.random.default_rng(0).standard_normal((2, 4, 3))
    np.testing.assert_allclose(ops.group_norm(z, num_groups=1), ops.layer_norm(z, normalized_shape=(4, 3)),
                               rtol=1e-14, atol=1e-15)


def test_running_stats_match_torch_buffers():
    # Reference: torch.nn.functional.batch_norm updating running buffers in training mode.
    rng = np.random.default_rng(2)
    x = rng.standard_normal((3, 4, 5)) * 2 + 1
    mean0, var0 = rng.standard_normal(4), rng.uniform(0.5, 2.0, 4)
    rm, rv = torch.tensor(mean0.copy()), torch.tensor(var0.copy())
    F.batch_norm(torch.tensor(x), rm, rv, training=True, momentum=0.3)
    mean, var = ops.batch_norm_running_stats(x, mean0, var0, momentum=0.3)
    np.testing.assert_allclose(mean, rm.numpy(), rtol=1e-14)
    np.testing.assert_allclose(var, rv.numpy(), rtol=1e-14)


X = np.ones((2, 4, 3))
@pytest.mark.parametrize("call, kind, message", [
    pytest.param(lambda: ops.batch_norm(X, training=False), ValueError, r"running_mean=None: training=False",
                 id="eval-no-stats"),
    pytest.param(lambda: ops.batch_norm(X, running_mean=np.zeros(3), running_var=np.ones(4)), ValueError,
                 r"running_mean=.*\(4,\)", id="stats-length"),
    pytest.param(lambda: ops.batch_norm(X, eps=0.0), ValueError, r"eps=0.0: must be > 0", id="eps"),
    pytest.param(lambda: ops.batch_norm(np.ones((1, 3))), ValueError, r"more than one value per channel",
                 id="one-value"),
    pytest.param(lambda: ops.batch_norm(X, np.ones(3)), ValueError, r"weight=.*\(4,\)", id="weight-length"),
    pytest.param(lambda: ops.group_norm(X, num_groups=3), ValueError, r"num_groups=3: must divide", id="groups"),
    pytest.param(lambda: ops.group_norm(X, num_groups=0), ValueError, r"num_groups=0: must be >= 1",
                 id="groups-zero"),
    pytest.param(lambda: ops.layer_norm(X, normalized_shape=(4,)), ValueError,
                 r"normalized_shape=\(4,\): must equal the trailing dims", id="normalized-shape"),
    pytest.param(lambda: ops.layer_norm(X, normalized_shape=3, eps=-1.0), ValueError, r"eps=-1.0", id="ln-eps"),
    pytest.param(lambda: ops.layer_norm(X, np.ones(4), normalized_shape=3), ValueError, r"weight=.*\(3,\)",
                 id="ln-weight"),
    pytest.param(lambda: ops.batch_norm(np.ones(3)), ValueError, r"input=.*\(N, C, \*\)", id="rank"),
])
def test_bad_calls_name_the_argument(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
