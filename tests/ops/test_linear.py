"""linear against outside references."""
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from hypothesis import given, settings, strategies as st

import refops.ops as ops
from refops.ops._space import RandomDraw, plain_arrays
from refops.strategies import HypothesisDraw

RTOL = 1e-12  # relative to the magnitude M of each element's sum


def torch_linear_run(x, w, b, g):
    """Reference: torch.nn.functional.linear, float64 forward and autograd backward."""
    xt, wt = torch.tensor(x, requires_grad=True), torch.tensor(w, requires_grad=True)
    bt = None if b is None else torch.tensor(b, requires_grad=True)
    y = F.linear(xt, wt, bt)
    y.backward(torch.from_numpy(np.asarray(g)))
    grads = {"input": xt.grad.numpy(), "weight": wt.grad.numpy()}
    if bt is not None:
        grads["bias"] = bt.grad.numpy()
    return y.detach().numpy(), grads


def check_against_torch(config, seed):
    rng = np.random.default_rng(seed)
    (x, w, b), params = plain_arrays(ops.linear, config, rng)
    out = ops.linear(x, w, b)
    g = rng.standard_normal(out.shape)
    grads = ops.linear.vjp(g, x, w, b)
    ref_out, ref_grads = torch_linear_run(x, w, b, g)
    abs_out, abs_grads = torch_linear_run(abs(x), abs(w), None if b is None else abs(b), abs(g))
    assert out.shape == ref_out.shape
    np.testing.assert_array_less(abs(out - ref_out), RTOL * abs_out + 1e-300)
    assert set(grads) == set(ref_grads)
    for key in ref_grads:
        np.testing.assert_array_less(abs(grads[key] - ref_grads[key]),
                                     RTOL * abs_grads[key] + 1e-300, err_msg=key)


@settings(max_examples=40, deadline=None)
@given(data=st.data())
def test_forward_and_vjp_match_torch_over_the_space(data):
    # Reference: torch.nn.functional.linear, float64 autograd.
    config = ops.linear.space(HypothesisDraw(data.draw))
    check_against_torch(config, data.draw(st.integers(0, 2 ** 16), label="seed"))


@pytest.mark.parametrize("seed", range(10))
def test_forward_and_vjp_match_torch_on_edge_biased_draws(seed):
    # Reference: torch.nn.functional.linear, float64 autograd.
    check_against_torch(ops.linear.space(RandomDraw(np.random.default_rng(seed), edge=0.5)), seed)


def test_layer_config_builds_the_torch_module_of_the_same_shapes():
    # Reference: torch.nn.Linear's constructor (CONTRACT section 2 names its arguments).
    for seed in range(6):
        config = ops.linear.space(RandomDraw(np.random.default_rng(seed)))
        module = torch.nn.Linear(**config.layer)
        assert tuple(module.weight.shape) == config.shapes["weight"]
        assert (module.bias is None) == (config.shapes["bias"] is None)


def test_error_terms_are_the_op_on_absolute_values_and_on_ones():
    # Reference: torch linear on |x|, |w|, |b|, |g| gives M; on ones it counts the terms k
    # (a ones bias adds the +1 of the bias term). Every reduction is a GEMM: "wide".
    rng = np.random.default_rng(0)
    x, w, b, g = (rng.standard_normal(s) for s in ((2, 3, 5), (4, 5), (4,), (2, 3, 4)))
    terms = ops.linear.error_terms(g, x, w, b)
    abs_out, abs_grads = torch_linear_run(abs(x), abs(w), abs(b), abs(g))
    ones_out, ones_grads = torch_linear_run(*map(np.ones_like, (x, w, b, g)))
    np.testing.assert_allclose(terms["output"].magnitude, abs_out, rtol=1e-13)
    np.testing.assert_array_equal(terms["output"].length, ones_out)
    np.testing.assert_array_equal(terms["output"].length, 6)  # in_features + 1, by hand
    for key in ("input", "weight", "bias"):
        np.testing.assert_allclose(terms[key].magnitude, abs_grads[key], rtol=1e-13, err_msg=key)
        np.testing.assert_array_equal(terms[key].length, ones_grads[key], err_msg=key)
    assert {t.accumulate for t in terms.values()} == {"wide"}


def test_stacked_linear_layers_compose_to_one_affine_map():
    # Common practice: A1 (A0 x + b0) + b1 = (A1 A0) x + (A1 b0 + b1).
    rng = np.random.default_rng(1)
    x = rng.standard_normal((3, 2, 5))
    a0, b0, a1, b1 = (rng.standard_normal(s) for s in ((4, 5), (4,), (6, 4), (6,)))
    stacked = ops.linear(ops.linear(x, a0, b0), a1, b1)
    np.testing.assert_allclose(stacked, ops.linear(x, a1 @ a0, a1 @ b0 + b1), rtol=1e-12, atol=1e-12)
    # Its vjp composes the same way: the input gradient is g A1 A0.
    g = rng.standard_normal(stacked.shape)
    inner = ops.linear.vjp(g, ops.linear(x, a0, b0), a1, b1)["input"]
    np.testing.assert_allclose(ops.linear.vjp(inner, x, a0, b0)["input"], g @ a1 @ a0, rtol=1e-12, atol=1e-12)


def test_hand_worked_example():
    # Worked by hand: values 10*i + j encode their position.
    x = np.array([[1.0, 2.0]])
    w = np.array([[10.0, 11.0], [20.0, 21.0], [30.0, 31.0]])
    np.testing.assert_array_equal(ops.linear(x, w, np.array([0.5, 0.0, -1.0])), [[32.5, 62.0, 91.0]])
    np.testing.assert_array_equal(ops.linear(np.array([1.0, 0.0]), w), [10.0, 20.0, 30.0])


@pytest.mark.parametrize("seed", range(4))
def test_vjp_matches_central_finite_differences(seed):
    # Float64 central differences, common practice: <g, (f(a + hv) - f(a - hv)) / 2h> = <vjp_a, v>.
    rng = np.random.default_rng(seed)
    config = ops.linear.space(RandomDraw(rng, pins=dict(bias=True)))
    (x, w, b), _ = plain_arrays(ops.linear, config, rng)
    arrays = dict(input=x, weight=w, bias=b)
    g = rng.standard_normal(ops.linear.output_shape(x, w, b))
    grads = ops.linear.vjp(g, x, w, b)
    h = 1e-3
    for key in arrays:
        v = rng.standard_normal(arrays[key].shape)
        moved = lambda t: [a + t * v if name == key else a for name, a in arrays.items()]
        value = lambda t: np.vdot(g, ops.linear(*moved(t)))
        fd = (value(h) - value(-h)) / (2 * h)
        assert math.isclose(fd, np.vdot(grads[key], v), rel_tol=1e-8, abs_tol=1e-9), key


BAD_CALLS = {
    "in-features-mismatch": ((np.ones((2, 5)), np.ones((3, 4))), ValueError,
                             r"input.shape\[-1\]=5 must equal weight.shape\[1\] = in_features = 4"),
    "scalar-input": ((np.float64(1.0), np.ones((3, 1))), ValueError,
                     r"input=.*expected at least 1 dimension \(\*, in_features\), got 0"),
    "weight-rank": ((np.ones((2, 4)), np.ones(4)), ValueError,
                    r"weight=array\(shape=\(4,\).*expected 2 dimensions \(out_features, in_features\), got 1"),
    "bias-length": ((np.ones((2, 4)), np.ones((3, 4)), np.ones(4)), ValueError,
                    r"bias=array\(shape=\(4,\).*expected shape \(3,\)"),
    "integer-input": ((np.ones((2, 4), dtype=np.int32), np.ones((3, 4))), TypeError,
                      r"input=array\(shape=\(2, 4\), dtype=int32\): expected a real floating-point dtype"),
    "complex-weight": ((np.ones((2, 4)), np.ones((3, 4), dtype=np.complex64)), TypeError,
                       r"weight=array\(shape=\(3, 4\), dtype=complex64\): expected a real floating-point"),
    "nan-bias": ((np.ones((2, 4)), np.ones((3, 4)), np.array([0.0, np.nan, 0.0])), ValueError,
                 r"bias=.*contains a non-finite value at index \(1,\)"),
    "inf-input": ((np.array([[1.0, -np.inf, 0.0, 0.0]]), np.ones((3, 4))), ValueError,
                  r"input=.*contains a non-finite value at index \(0, 1\)"),
}


@pytest.mark.parametrize("case", sorted(BAD_CALLS))
def test_bad_arguments_are_named_with_their_value(case):
    arrays, kind, message = BAD_CALLS[case]
    with pytest.raises(kind, match=message):
        ops.linear(*arrays)


def test_grad_output_of_the_wrong_shape_is_named():
    with pytest.raises(ValueError, match=r"grad_output=array\(shape=\(2, 4\).*expected shape \(2, 3\)"):
        ops.linear.vjp(np.ones((2, 4)), np.ones((2, 5)), np.ones((3, 5)))
