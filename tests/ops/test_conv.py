"""conv1d, conv2d, conv3d and conv_transpose2d against outside references."""
import math
import tracemalloc

import numpy as np
import pytest
import scipy.signal
import torch
from hypothesis import given, settings, strategies as st

import refops.ops as ops
from refops.ops import conv as conv_module
from refops.ops._space import RandomDraw, plain_arrays
from refops.strategies import HypothesisDraw

MODULES = {"conv1d": torch.nn.Conv1d, "conv2d": torch.nn.Conv2d, "conv3d": torch.nn.Conv3d,
           "conv_transpose2d": torch.nn.ConvTranspose2d}
RTOL = 1e-12  # relative to the magnitude M of each element's sum


def torch_layer_run(name, layer, input, weight, bias, g):
    """Reference: torch.nn.ConvNd / ConvTranspose2d built from the space's layer config, float64
    forward and autograd backward. Returns output and gradients keyed like the oracle's vjp."""
    module = MODULES[name](**layer).double()
    with torch.no_grad():
        module.weight.copy_(torch.from_numpy(weight))
        if bias is not None:
            module.bias.copy_(torch.from_numpy(bias))
    x = torch.tensor(input, requires_grad=True)
    y = module(x)
    y.backward(torch.from_numpy(g))
    grads = {"input": x.grad.numpy(), "weight": module.weight.grad.numpy()}
    if bias is not None:
        grads["bias"] = module.bias.grad.numpy()
    return y.detach().numpy(), grads


def check_against_torch(name, config, seed):
    op = ops.get(name)
    rng = np.random.default_rng(seed)
    (x, w, b), params = plain_arrays(op, config, rng)
    out = op(x, w, b, **params)
    g = rng.standard_normal(out.shape)
    grads = op.vjp(g, x, w, b, **params)
    ref_out, ref_grads = torch_layer_run(name, config.layer, x, w, b, g)
    # Magnitudes from the same torch layer on absolute values (M = op on |x|, |w|, |b|, |g|).
    abs_out, abs_grads = torch_layer_run(name, config.layer, abs(x), abs(w),
                                         None if b is None else abs(b), abs(g))
    assert out.shape == ref_out.shape
    np.testing.assert_array_less(abs(out - ref_out), RTOL * abs_out + 1e-300)
    assert set(grads) == set(ref_grads)
    for key in ref_grads:
        np.testing.assert_array_less(abs(grads[key] - ref_grads[key]),
                                     RTOL * abs_grads[key] + 1e-300, err_msg=key)


@pytest.mark.parametrize("name", sorted(MODULES))
@settings(max_examples=25, deadline=None)
@given(data=st.data())
def test_forward_and_vjp_match_torch_over_the_space(name, data):
    # Reference: torch.nn.ConvNd / ConvTranspose2d, float64 forward and autograd.
    config = ops.get(name).space(HypothesisDraw(data.draw))
    check_against_torch(name, config, data.draw(st.integers(0, 2 ** 16), label="seed"))


@pytest.mark.parametrize("name", sorted(MODULES))
@pytest.mark.parametrize("seed", range(12))
def test_forward_and_vjp_match_torch_on_edge_biased_draws(name, seed):
    # Reference: torch.nn.ConvNd / ConvTranspose2d, float64 forward and autograd.
    config = ops.get(name).space(RandomDraw(np.random.default_rng(seed), edge=0.5))
    check_against_torch(name, config, seed)


EDGE_CASES = {
    "1x1-kernel": dict(kernel_size=1, stride=1, padding=0, dilation=1),
    "kernel-equals-padded-input": dict(kernel_size=3, padding=1, stride=1, dilation=1, height=1, width=1),
    "stride-larger-than-kernel": dict(kernel_size=2, stride=3, padding=0, dilation=1, height=10, width=9),
    "dilation-and-stride": dict(kernel_size=3, stride=2, dilation=2, padding=1, height=9, width=10),
    "depthwise": dict(in_channels=4, groups=4, out_channels=8, kernel_size=3, padding=1),
    "depthwise-one-channel-per-group": dict(in_channels=5, groups=5, out_channels=5, kernel_size=(3, 2),
                                            padding=(1, 2), stride=1, dilation=(1, 2), batch=2,
                                            height=4, width=7),
    "depthwise-one-channel-per-group-strided": dict(in_channels=3, groups=3, out_channels=3, kernel_size=3,
                                                    padding=1, stride=(2, 1), padding_mode="reflect"),
    "reflect-padding-size-minus-one": dict(padding_mode="reflect", padding=2, kernel_size=1, height=3, width=4),
    "circular-padding-equals-size": dict(padding_mode="circular", padding=3, kernel_size=2, height=3, width=3),
    "replicate-asymmetric": dict(padding_mode="replicate", padding=(2, 0), kernel_size=(1, 3), stride=(2, 1)),
    "same-even-kernel": dict(padding="same", kernel_size=(4, 2), stride=1, dilation=(1, 3)),
    "same-reflect": dict(padding="same", padding_mode="reflect", kernel_size=3, stride=1, dilation=2, height=5, width=5),
    "valid-batch-1-odd": dict(padding="valid", batch=1, height=7, width=5, kernel_size=3),
}


@pytest.mark.parametrize("case", sorted(EDGE_CASES))
def test_conv2d_edge_cases_match_torch(case):
    # Reference: torch.nn.Conv2d, float64 forward and autograd.
    config = ops.conv2d.space(RandomDraw(np.random.default_rng(3), pins=EDGE_CASES[case]))
    check_against_torch("conv2d", config, 4)


TRANSPOSE_EDGES = {
    "output-padding-below-stride": dict(stride=3, output_padding=2, dilation=1, kernel_size=2),
    "output-padding-below-dilation": dict(stride=1, output_padding=(1, 2), dilation=(2, 3), kernel_size=3),
    "crop-most": dict(padding=2, kernel_size=3, stride=1, dilation=2, output_padding=0, height=1, width=2),
    "depthwise": dict(in_channels=3, groups=3, out_channels=6, stride=2, output_padding=1),
    "depthwise-one-channel-per-group": dict(in_channels=4, groups=4, out_channels=4, stride=1, kernel_size=3,
                                            padding=2, dilation=1, output_padding=0),
}


@pytest.mark.parametrize("case", sorted(TRANSPOSE_EDGES))
def test_conv_transpose2d_edge_cases_match_torch(case):
    # Reference: torch.nn.ConvTranspose2d, float64 forward and autograd.
    config = ops.conv_transpose2d.space(RandomDraw(np.random.default_rng(5), pins=TRANSPOSE_EDGES[case]))
    check_against_torch("conv_transpose2d", config, 6)


@pytest.mark.parametrize("name", sorted(MODULES))
@pytest.mark.parametrize("seed", range(4))
def test_error_terms_are_the_op_on_absolute_values_and_on_ones(name, seed):
    # Reference: torch layers on |x|, |w|, |b|, |g| give M; on ones they count the terms k
    # (a ones bias adds the +1 of the bias term).
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(seed), pins=dict(bias=True)))
    rng = np.random.default_rng(seed)
    (x, w, b), params = plain_arrays(op, config, rng)
    g = rng.standard_normal(op.output_shape(x, w, b, **params))
    terms = op.error_terms(g, x, w, b, **params)
    abs_out, abs_grads = torch_layer_run(name, config.layer, abs(x), abs(w), abs(b), abs(g))
    ones_out, ones_grads = torch_layer_run(name, config.layer, *map(np.ones_like, (x, w, b, g)))
    np.testing.assert_allclose(terms["output"].magnitude, abs_out, rtol=1e-12)
    np.testing.assert_array_equal(terms["output"].length, ones_out)
    for key in ("input", "weight", "bias"):
        np.testing.assert_allclose(terms[key].magnitude, abs_grads[key], rtol=1e-12, err_msg=key)
        np.testing.assert_array_equal(terms[key].length, ones_grads[key], err_msg=key)
    # Contract (INTERFACES): the scatter-add of each op accumulates in the I/O format, its GEMMs wide.
    scatter = "output" if name.startswith("conv_transpose") else "input"
    assert {k: t.accumulate for k, t in terms.items()} == {
        k: "io" if k == scatter else "wide" for k in ("output", "input", "weight", "bias")}


@pytest.mark.parametrize("rank, mode, pad", [(1, "valid", 0), (1, "full", 4), (2, "valid", 0),
                                             (2, "full", (4, 2)), (3, "valid", 0), (3, "full", (4, 2, 3))])
def test_single_channel_stride_one_matches_scipy_correlate(rank, mode, pad):
    # Reference: scipy.signal.correlate (cross-correlation; "full" = padding kernel - 1).
    rng = np.random.default_rng(rank)
    x = rng.standard_normal((9, 8, 7)[:rank])
    w = rng.standard_normal((5, 3, 4)[:rank]) if mode == "full" else rng.standard_normal((3, 2, 3)[:rank])
    op = ops.get(f"conv{rank}d")
    out = op(x[None, None], w[None, None], padding=pad)[0, 0]
    np.testing.assert_allclose(out, scipy.signal.correlate(x, w, mode=mode, method="direct"),
                               rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("size, kernel, stride, pad, dilation", [
    (5, 3, 1, 0, 1), (5, 4, 1, 2, 1), (6, 3, 2, 1, 1), (7, 3, 2, 0, 2), (9, 3, 3, 1, 2), (1, 1, 1, 0, 1),
    (9, 2, 5, 1, 1), (12, 5, 2, 3, 3)])
def test_output_sizes_follow_the_published_relations(size, kernel, stride, pad, dilation):
    # Dumoulin & Visin (2016): conv o = floor((i + 2p - d(k - 1) - 1) / s) + 1 (relation 15 with
    # dilation); transposed o' = s(i' - 1) + a + d(k - 1) + 1 - 2p (relation 14 with dilation).
    x, w = np.zeros((1, 2, size, size + 1)), np.zeros((3, 2, kernel, kernel))
    o = (size + 2 * pad - dilation * (kernel - 1) - 1) // stride + 1
    o_w = (size + 1 + 2 * pad - dilation * (kernel - 1) - 1) // stride + 1
    assert ops.conv2d.output_shape(x, w, stride=stride, padding=pad, dilation=dilation) == (1, 3, o, o_w)
    assert ops.conv2d(x, w, stride=stride, padding=pad, dilation=dilation).shape == (1, 3, o, o_w)
    a = max(stride, dilation) - 1  # the largest output_padding allowed
    i = o
    expected = stride * (i - 1) + a + dilation * (kernel - 1) + 1 - 2 * pad
    wt = np.zeros((2, 3, kernel, kernel))
    out = ops.conv_transpose2d(np.zeros((1, 2, i, i)), wt, stride=stride, padding=pad,
                               output_padding=a, dilation=dilation)
    assert out.shape == (1, 3, expected, expected)


@pytest.mark.parametrize("stride, padding, dilation, groups, kernel, size", [
    (1, 0, 1, 1, (3, 3), (7, 6)), (2, 1, 1, 2, (3, 2), (8, 9)), ((3, 2), (2, 0), (1, 2), 3, (2, 3), (10, 9)),
    (2, 2, 3, 1, (2, 2), (6, 11))])
def test_conv_transpose_is_the_adjoint_of_conv(stride, padding, dilation, groups, kernel, size):
    # Dot-product test (Claerbout 1992): <conv(x), y> = <x, conv_transpose(y)> for the same weight.
    rng = np.random.default_rng(11)
    x = rng.standard_normal((2, 3 * groups // groups * groups, *size))
    w = rng.standard_normal((2 * groups, x.shape[1] // groups, *kernel))
    y_shape = ops.conv2d.output_shape(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups)
    y = rng.standard_normal(y_shape)
    s, p, d = (np.broadcast_to(v, 2) for v in (stride, padding, dilation))
    # output_padding that restores x's size: the remainder the forward's floor dropped.
    extra = tuple(int((n + 2 * pp - dd * (k - 1) - 1) % ss) for n, pp, dd, k, ss in zip(size, p, d, kernel, s))
    back = ops.conv_transpose2d(y, w, stride=stride, padding=padding, output_padding=extra,
                                dilation=dilation, groups=groups)
    assert back.shape == x.shape
    forward = ops.conv2d(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups)
    assert math.isclose(np.vdot(forward, y), np.vdot(x, back), rel_tol=1e-12)


def central_difference(f, arrays, key, direction, step=1e-3):
    """d/dt f(arrays with arrays[key] + t direction) at t=0, central difference."""
    plus = dict(arrays, **{key: arrays[key] + step * direction})
    minus = dict(arrays, **{key: arrays[key] - step * direction})
    return (f(plus) - f(minus)) / (2 * step)


@pytest.mark.parametrize("name", sorted(MODULES))
@pytest.mark.parametrize("seed", range(3))
def test_vjp_matches_central_finite_differences(name, seed):
    # Float64 central differences, common practice: <g, (f(a + hv) - f(a - hv)) / 2h> = <vjp_a, v>;
    # the op is linear in each array, so the difference quotient is exact up to rounding.
    op = ops.get(name)
    rng = np.random.default_rng(seed)
    config = op.space(RandomDraw(rng, pins=dict(bias=True)))
    (x, w, b), params = plain_arrays(op, config, rng)
    arrays = dict(input=x, weight=w, bias=b)
    g = rng.standard_normal(op.output_shape(x, w, b, **params))
    grads = op.vjp(g, x, w, b, **params)
    for key in ("input", "weight", "bias"):
        v = rng.standard_normal(arrays[key].shape)
        fd = central_difference(lambda a: np.vdot(g, op(a["input"], a["weight"], a["bias"], **params)),
                                arrays, key, v)
        assert math.isclose(fd, np.vdot(grads[key], v), rel_tol=1e-8, abs_tol=1e-9), key


@pytest.mark.parametrize("rank, shift", [(1, (3,)), (2, (2, -3)), (3, (1, 2, -1))])
@pytest.mark.parametrize("dilation", [1, 2])
def test_circular_stride_one_conv_commutes_with_translation(rank, shift, dilation):
    # Common practice: circular padding + stride 1 + "same" size is translation equivariant.
    rng = np.random.default_rng(rank)
    x = rng.standard_normal((2, 3) + (7, 6, 5)[:rank])
    w = rng.standard_normal((4, 3) + (3, 2, 3)[:rank])
    op = ops.get(f"conv{rank}d")
    axes = tuple(range(2, 2 + rank))
    conv = lambda a: op(a, w, padding="same", padding_mode="circular", dilation=dilation)
    np.testing.assert_allclose(conv(np.roll(x, shift, axes)), np.roll(conv(x), shift, axes), rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("name, limit", [("conv2d", 1), ("conv2d", 3000), ("conv_transpose2d", 1),
                                         ("conv3d", 50_000)])
def test_results_do_not_depend_on_the_chunk_size(name, limit):
    # Reference: torch.nn layers, float64 (with the whole batch in chunks of 1 or a few samples).
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(8), pins=dict(batch=4, bias=True)))
    previous = ops.set_memory_limit(limit)
    try:
        check_against_torch(name, config, 9)
    finally:
        ops.set_memory_limit(previous)


@pytest.mark.parametrize("name, pins", [
    ("conv2d", dict(batch=3, groups=1, stride=1, padding_mode="zeros")),
    ("conv2d", dict(batch=1, in_channels=5, groups=1, stride=2, padding_mode="reflect")),
    ("conv2d", dict(batch=2, in_channels=4, groups=4, out_channels=4, stride=1, padding_mode="zeros")),
    ("conv3d", dict(batch=1, in_channels=3, groups=3, out_channels=3, stride=(2, 1, 1))),
    ("conv_transpose2d", dict(batch=2, stride=1)), ("conv_transpose2d", dict(batch=1, stride=2))])
def test_results_do_not_depend_on_splitting_passes_across_threads(name, pins, monkeypatch):
    # Reference: torch.nn layers, float64, with every memory-bound pass split across the workers
    # (along samples, or along channels for a single sample and for depthwise maps).
    monkeypatch.setattr(conv_module, "_PARALLEL_BYTES", 0)
    config = ops.get(name).space(RandomDraw(np.random.default_rng(12), pins=dict(pins, bias=True)))
    check_against_torch(name, config, 13)


@pytest.mark.parametrize("limit", [2 ** 20, 4 * 2 ** 20])
def test_scratch_memory_stays_within_the_bound_at_large_batch(limit):
    # tracemalloc traces numpy allocations (common practice). Scratch = the peak minus what must
    # exist: the op's float64 copies of its arguments and its results.
    rng = np.random.default_rng(0)
    x, w = rng.standard_normal((256, 4, 16, 16)), rng.standard_normal((8, 4, 3, 3))
    b, g = rng.standard_normal(8), rng.standard_normal((256, 8, 16, 16))
    args = x.nbytes + w.nbytes + b.nbytes
    runs = {"forward": (lambda: ops.conv2d(x, w, b, padding=1), args + g.nbytes),
            "vjp": (lambda: ops.conv2d.vjp(g, x, w, b, padding=1), 2 * args + g.nbytes)}
    previous = ops.set_memory_limit(limit)
    try:
        for name, (run, needed) in runs.items():
            tracemalloc.start()
            run()
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            assert peak - needed <= limit, name
    finally:
        ops.set_memory_limit(previous)


def test_set_memory_limit_checks_its_argument():
    with pytest.raises(ValueError, match=r"nbytes=0: must be >= 1"):
        ops.set_memory_limit(0)
    assert conv_module._memory_limit >= 1


X4, W4 = np.ones((2, 4, 5, 5)), np.ones((6, 2, 3, 3))
BAD_CALLS = {
    "input-rank": (ops.conv2d, (np.ones((4, 5, 5)), W4), dict(groups=2),
                   ValueError, r"input=array\(shape=\(4, 5, 5\).*expected 4 dimensions \(N, C_in, H, W\), got 3"),
    "weight-rank": (ops.conv1d, (np.ones((2, 4, 5)), np.ones((6, 4))), {},
                    ValueError, r"weight=array\(shape=\(6, 4\).*expected 3 dimensions"),
    "channel-mismatch": (ops.conv2d, (X4, W4), {},
                         ValueError, r"weight.shape\[1\]=2 must equal input.shape\[1\] // groups = 4 // 1 = 4"),
    "groups-do-not-divide": (ops.conv2d, (X4, W4), dict(groups=3),
                             ValueError, r"groups=3: must divide input.shape\[1\] \(C_in\) = 4"),
    "groups-zero": (ops.conv2d, (X4, W4), dict(groups=0), ValueError, r"groups=0: must be >= 1"),
    "stride-zero": (ops.conv2d, (X4, W4), dict(stride=(1, 0), groups=2),
                    ValueError, r"stride=\(1, 0\): every entry must be >= 1"),
    "stride-length": (ops.conv2d, (X4, W4), dict(stride=(1, 1, 1), groups=2),
                      ValueError, r"stride=\(1, 1, 1\): expected an int or a sequence of 2 ints"),
    "dilation-negative": (ops.conv3d, (np.ones((1, 2, 4, 4, 4)), np.ones((1, 2, 2, 2, 2))), dict(dilation=-1),
                          ValueError, r"dilation=-1: every entry must be >= 1"),
    "kernel-zero": (ops.conv2d, (X4, np.ones((6, 2, 0, 3))), dict(groups=2),
                    ValueError, r"weight=array\(shape=\(6, 2, 0, 3\).*every dimension .* must be >= 1"),
    "padding-negative": (ops.conv2d, (X4, W4), dict(padding=-1, groups=2),
                         ValueError, r"padding=-1: every entry must be >= 0"),
    "padding-unknown-string": (ops.conv2d, (X4, W4), dict(padding="full", groups=2),
                               ValueError, r"padding='full': expected an int, a tuple of ints, 'same' or 'valid'"),
    "kernel-larger-than-padded-input": (ops.conv2d, (X4, np.ones((6, 2, 8, 3))), dict(padding=1, groups=2),
                                        ValueError, r"dilated kernel size \(8, 3\) is larger than the padded input size \(7, 7\)"),
    "dilated-kernel-too-large": (ops.conv2d, (X4, W4), dict(dilation=3, groups=2),
                                 ValueError, r"dilated kernel size \(7, 7\) is larger than the padded input size \(5, 5\)"),
    "same-with-stride": (ops.conv2d, (X4, W4), dict(padding="same", stride=2, groups=2),
                         ValueError, r"padding='same': 'same' needs stride=1 .*stride=\(2, 2\)"),
    "unknown-padding-mode": (ops.conv2d, (X4, W4), dict(padding_mode="mirror", groups=2),
                             ValueError, r"padding_mode='mirror': expected one of 'zeros', 'reflect'"),
    "reflect-padding-too-large": (ops.conv2d, (X4, W4), dict(padding=5, padding_mode="reflect", groups=2),
                                  ValueError, r"padding=\(\(5, 5\), \(5, 5\)\): with padding_mode='reflect' every padding must be < the input size \(5, 5\)"),
    "circular-padding-too-large": (ops.conv1d, (np.ones((1, 1, 3)), np.ones((1, 1, 1))), dict(padding=4, padding_mode="circular"),
                                   ValueError, r"padding=\(\(4, 4\),\): with padding_mode='circular' every padding must be <= the input size \(3,\)"),
    "integer-input": (ops.conv2d, (X4.astype(np.int64), W4), dict(groups=2),
                      TypeError, r"input=array\(shape=\(2, 4, 5, 5\), dtype=int64\): expected a real floating-point dtype"),
    "complex-weight": (ops.conv2d, (X4, W4.astype(complex)), dict(groups=2),
                       TypeError, r"weight=array\(shape=\(6, 2, 3, 3\), dtype=complex128\): expected a real floating-point dtype"),
    "nan-input": (ops.conv2d, (np.where(np.arange(50).reshape(2, 1, 5, 5) == 7, np.nan, X4), W4), dict(groups=2),
                  ValueError, r"input=.*contains a non-finite value at index \(0, 0, 1, 2\)"),
    "inf-weight": (ops.conv2d, (X4, np.full((6, 2, 3, 3), np.inf)), dict(groups=2),
                   ValueError, r"weight=.*contains a non-finite value at index \(0, 0, 0, 0\)"),
    "bias-length": (ops.conv2d, (X4, W4, np.ones(5)), dict(groups=2),
                    ValueError, r"bias=array\(shape=\(5,\).*expected shape \(6,\) \(C_out = weight.shape\[0\]\), got \(5,\)"),
    "transpose-output-padding": (ops.conv_transpose2d, (X4, np.ones((4, 3, 3, 3))), dict(stride=2, output_padding=(0, 2)),
                                 ValueError, r"output_padding=\(0, 2\): every entry must be smaller than stride=\(2, 2\) or dilation=\(1, 1\)"),
    "transpose-same": (ops.conv_transpose2d, (X4, np.ones((4, 3, 3, 3))), dict(padding="same"),
                       TypeError, r"padding='same': expected an int or a tuple of ints"),
    "transpose-channel-mismatch": (ops.conv_transpose2d, (X4, np.ones((3, 3, 3, 3))), {},
                                   ValueError, r"weight.shape\[0\]=3 must equal input.shape\[1\] \(C_in\) = 4"),
    "transpose-groups": (ops.conv_transpose2d, (X4, np.ones((4, 3, 3, 3))), dict(groups=3),
                         ValueError, r"groups=3: must divide input.shape\[1\] \(C_in\) = 4"),
    "transpose-bias-length": (ops.conv_transpose2d, (X4, np.ones((4, 3, 3, 3)), np.ones(4)), dict(groups=2),
                              ValueError, r"bias=array\(shape=\(4,\).*expected shape \(6,\) \(C_out = groups \* weight.shape\[1\]\)"),
    "transpose-output-empty": (ops.conv_transpose2d, (np.ones((1, 4, 1, 1)), np.ones((4, 3, 1, 1))), dict(padding=1),
                               ValueError, r"padding=1: leaves an output size \(-1, -1\)"),
}


@pytest.mark.parametrize("case", sorted(BAD_CALLS))
def test_bad_arguments_are_named_with_their_value(case):
    op, arrays, params, kind, message = BAD_CALLS[case]
    with pytest.raises(kind, match=message):
        op(*arrays, **params)


@pytest.mark.parametrize("name, arrays, params", [
    ("conv2d", (X4, W4), dict(groups=2)), ("conv_transpose2d", (X4, np.ones((4, 3, 3, 3))), {})])
def test_grad_output_of_the_wrong_shape_is_named(name, arrays, params):
    with pytest.raises(ValueError, match=r"grad_output=array\(shape=\(2, 6, 3, 4\).*expected shape"):
        ops.get(name).vjp(np.ones((2, 6, 3, 4)), *arrays, **params)
