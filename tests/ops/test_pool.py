"""Pooling oracles against torch float64 autograd, worked examples and the tie convention."""
import numpy as np
import pytest
import torch
import torch.nn.functional as F

import refops.ops as ops
from refops.ops._space import RandomDraw, plain_arrays

TORCH = {"max_pool2d": F.max_pool2d, "avg_pool2d": F.avg_pool2d,
         "adaptive_avg_pool2d": F.adaptive_avg_pool2d, "adaptive_max_pool2d": F.adaptive_max_pool2d}


def drawn(name, seed, values="normal"):
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(seed)))
    (x,), params = plain_arrays(op, config, np.random.default_rng(seed))
    if values == "ties":
        x = np.round(2 * x)  # integer values: many ties inside windows
    return op, config, x, params


@pytest.mark.parametrize("values", ["normal", "ties"])
@pytest.mark.parametrize("name", sorted(TORCH))
@pytest.mark.parametrize("seed", range(40))
def test_forward_and_vjp_match_torch(name, seed, values):
    # Reference: torch.nn.functional pooling in float64 with autograd (incl. its first-maximum tie rule).
    op, config, x, params = drawn(name, seed, values)
    if config.drawn.get("padding_only_windows"):
        # SOURCES.md: torch's max_pool2d backward can corrupt memory on such windows: compare the
        # forward only (the backward convention is checked by test_padding_only_window).
        expected = TORCH[name](torch.tensor(x), **params).numpy()
        np.testing.assert_array_equal(op(x, **params), expected)
        return
    xt = torch.tensor(x, requires_grad=True)
    yt = TORCH[name](xt, **params)
    g = np.random.default_rng(seed + 7).standard_normal(yt.shape)
    yt.backward(torch.tensor(g))
    np.testing.assert_allclose(op(x, **params), yt.detach().numpy(), rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(op.vjp(g, x, **params)["input"], xt.grad.numpy(), rtol=1e-13, atol=1e-14)


def test_most_drawn_max_pool_configs_run_in_torch():
    # The skip above must stay rare, or the torch comparison would be hollow.
    flags = [drawn("max_pool2d", seed)[1].drawn["padding_only_windows"] for seed in range(40)]
    assert sum(flags) <= 8


def test_worked_example_with_position_encoded_values():
    # Values 10*i + j: the max of each 2x2 window is its bottom-right element (worked by hand).
    x = (10 * np.arange(4)[:, None] + np.arange(4)[None, :]).astype(float)[None, None]
    np.testing.assert_array_equal(ops.max_pool2d(x, kernel_size=2)[0, 0], [[11, 13], [31, 33]])
    np.testing.assert_array_equal(ops.avg_pool2d(x, kernel_size=2)[0, 0], [[5.5, 7.5], [25.5, 27.5]])
    grad = ops.max_pool2d.vjp(np.ones((1, 1, 2, 2)), x, kernel_size=2)["input"][0, 0]
    assert grad.sum() == 4 and grad[1, 1] == grad[1, 3] == grad[3, 1] == grad[3, 3] == 1


def test_ties_send_the_gradient_to_the_first_maximum_in_row_major_order():
    # Contract section 1: first maximal element in row-major order; overlapping windows add up.
    x = np.zeros((1, 1, 3, 3))
    grad = ops.max_pool2d.vjp(np.ones((1, 1, 2, 2)), x, kernel_size=2, stride=1)["input"][0, 0]
    np.testing.assert_array_equal(grad, [[1, 1, 0], [1, 1, 0], [0, 0, 0]])


def test_padding_only_window():
    # Contract section 1: a window covering only padding has the value -inf and gets no gradient.
    # Worked by hand: a 1x1 input, kernel 2, dilation 2, padding 1 -> the one window's taps sit at
    # padded positions 0 and 2, both padding.
    x = np.array([[[[3.0]]]])
    out = ops.max_pool2d(x, kernel_size=2, dilation=2, padding=1)
    np.testing.assert_array_equal(out, [[[[-np.inf]]]])
    grad = ops.max_pool2d.vjp(np.ones_like(out), x, kernel_size=2, dilation=2, padding=1)["input"]
    np.testing.assert_array_equal(grad, [[[[0.0]]]])


def test_avg_pool_divisor_clips_at_the_padded_edge():
    # Reference: torch avg_pool2d with ceil_mode: the last window runs past the padded input and its
    # divisor counts only taps on the padded input (count_include_pad=True), worked by hand: input 1x5,
    # kernel (1, 2), stride 2, ceil_mode -> windows [0,1], [2,3], [4] -> divisors 2, 2, 1.
    x = np.arange(1.0, 6.0).reshape(1, 1, 1, 5)
    out = ops.avg_pool2d(x, kernel_size=(1, 2), stride=2, ceil_mode=True)
    np.testing.assert_allclose(out[0, 0, 0], [1.5, 3.5, 5.0])
    torch_out = F.avg_pool2d(torch.tensor(x), (1, 2), 2, ceil_mode=True)
    np.testing.assert_allclose(out, torch_out.numpy())


X = np.ones((1, 2, 5, 5))
@pytest.mark.parametrize("call, kind, message", [
    pytest.param(lambda: ops.max_pool2d(np.ones((5, 5)), kernel_size=2), ValueError, r"input=", id="rank"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=0), ValueError, r"kernel_size=0", id="kernel-zero"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, stride=0), ValueError, r"stride=0", id="stride-zero"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, dilation=0), ValueError, r"dilation=0", id="dilation"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, padding=-1), ValueError, r"padding=-1", id="pad-negative"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, padding=2), ValueError, r"padding=2", id="pad-too-large"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=7), ValueError, r"kernel_size=7", id="kernel-too-large"),
    pytest.param(lambda: ops.adaptive_avg_pool2d(X, output_size=0), ValueError, r"output_size=0", id="output-zero"),
    pytest.param(lambda: ops.adaptive_max_pool2d(X, output_size=(2, -1)), ValueError, r"output_size=\(2, -1\)",
                 id="output-negative"),
    pytest.param(lambda: ops.avg_pool2d(X.astype(int), kernel_size=2), TypeError, r"input=.*floating", id="int"),
    pytest.param(lambda: ops.avg_pool2d(np.full((1, 1, 2, 2), np.nan), kernel_size=2), ValueError,
                 r"input=.*non-finite", id="nan"),
    pytest.param(lambda: ops.max_pool2d.vjp(np.ones((1, 2, 3, 3)), X, kernel_size=2), ValueError,
                 r"grad_output=.*\(1, 2, 2, 2\)", id="cotangent-shape"),
])
def test_bad_calls_name_the_argument(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
