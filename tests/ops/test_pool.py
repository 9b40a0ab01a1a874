"""Pooling oracles against torch float64 autograd, worked examples, finite differences and the tie rule."""
import json
import subprocess
import sys

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import refops.ops as ops
from refops.ops import pool
from refops.ops._space import RandomDraw, plain_arrays
from refops.strategies import HypothesisDraw

TORCH = {"max_pool2d": F.max_pool2d, "avg_pool2d": F.avg_pool2d,
         "adaptive_avg_pool2d": F.adaptive_avg_pool2d, "adaptive_max_pool2d": F.adaptive_max_pool2d}
NAMES = sorted(TORCH)


def drawn(name, seed, values="normal"):
    op = ops.get(name)
    config = op.space(RandomDraw(np.random.default_rng(seed)))
    (x,), params = plain_arrays(op, config, np.random.default_rng(seed))
    if values == "ties":
        x = np.round(2 * x)  # integer values: many ties inside windows
    return op, config, x, params


def torch_forward_and_grad(name, x, params, g):
    """torch float64 forward and input gradient (only for configs without padding-only windows)."""
    xt = torch.tensor(x, requires_grad=True)
    yt = TORCH[name](xt, **params)
    yt.backward(torch.tensor(g))
    return yt.detach().numpy(), xt.grad.numpy()


def assert_matches_torch(name, x, params, seed=0):
    # Reference: torch.nn.functional pooling in float64 with autograd (incl. its first-maximum tie rule).
    op = ops.get(name)
    out = op(x, **params)
    g = np.random.default_rng(seed + 7).standard_normal(out.shape)
    expected, expected_grad = torch_forward_and_grad(name, x, params, g)
    assert out.shape == expected.shape
    np.testing.assert_allclose(out, expected, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(op.vjp(g, x, **params)["input"], expected_grad, rtol=1e-13, atol=1e-14)


# ---------------------------------------------------------------------------------------------
# Drawn configurations against torch

@pytest.mark.parametrize("values", ["normal", "ties"])
@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("seed", range(40))
def test_forward_and_vjp_match_torch(name, seed, values):
    op, config, x, params = drawn(name, seed, values)
    if config.drawn.get("padding_only_windows"):
        # SOURCES.md: torch's max_pool2d backward can corrupt memory on such windows; these configs
        # run in a separate process (test_padding_only_windows_match_torch_in_a_subprocess).
        return
    assert_matches_torch(name, x, params, seed)


@pytest.mark.parametrize("name", NAMES)
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_hypothesis_drawn_configs_match_torch(name, data):
    op = ops.get(name)
    config = op.space(HypothesisDraw(data.draw))
    assume(not config.drawn.get("padding_only_windows"))  # run in a subprocess below
    rng = np.random.default_rng(data.draw(st.integers(0, 2 ** 32 - 1)))
    (x,), params = plain_arrays(op, config, rng)
    if data.draw(st.booleans()):
        x = np.round(x)  # integer-valued: ties
    assert_matches_torch(name, x, params)


def test_most_drawn_max_pool_configs_run_in_torch_in_process():
    # The subprocess path must stay the exception, or most cases would pay for a torch start.
    flags = [drawn("max_pool2d", seed)[1].drawn["padding_only_windows"] for seed in range(40)]
    assert 1 <= sum(flags) <= 8


_SUBPROCESS = r"""
import json, sys
import numpy as np, torch, torch.nn.functional as F
cases = json.loads(sys.stdin.read())
results = []
for case in cases:
    x = torch.tensor(case["x"], dtype=torch.float64, requires_grad=True)
    params = {k: tuple(v) if isinstance(v, list) else v for k, v in case["params"].items()}
    y = F.max_pool2d(x, **params)
    g = torch.tensor(case["g"], dtype=torch.float64)
    g[~torch.isfinite(y)] = 0.0  # nothing to route from windows of padding only
    y.backward(g)
    results.append({"y": y.detach().numpy().tolist(), "grad": x.grad.numpy().tolist()})
print(json.dumps(results))
"""


def test_padding_only_windows_match_torch_in_a_subprocess():
    # Reference: torch.nn.functional.max_pool2d float64 forward (-inf on windows of padding only)
    # and autograd elsewhere, run in its own process (SOURCES.md: its backward may write out of
    # bounds on such windows).
    cases, ours = [], []
    for seed in range(200):
        op, config, x, params = drawn("max_pool2d", seed, "ties" if seed % 2 else "normal")
        if not config.drawn["padding_only_windows"]:
            continue
        out = op(x, **params)
        g = np.random.default_rng(seed).standard_normal(out.shape)
        cases.append({"x": x.tolist(), "params": params, "g": g.tolist()})
        ours.append((out, op.vjp(g, x, **params)["input"]))
    assert len(cases) >= 5
    run = subprocess.run([sys.executable, "-c", _SUBPROCESS], input=json.dumps(cases),
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    for (out, grad), theirs in zip(ours, json.loads(run.stdout)):
        assert np.isneginf(out).any()
        np.testing.assert_array_equal(out, np.array(theirs["y"]))
        np.testing.assert_allclose(grad, np.array(theirs["grad"]), rtol=1e-13, atol=1e-14)


def test_padding_only_window_worked_by_hand():
    # Contract section 1: a window covering only padding has the value -inf and gets no gradient.
    # Worked by hand: a 1x1 input, kernel 2, dilation 2, padding 1 -> the one window's taps sit at
    # padded positions 0 and 2, both padding.
    x = np.array([[[[3.0]]]])
    out = ops.max_pool2d(x, kernel_size=2, dilation=2, padding=1)
    np.testing.assert_array_equal(out, [[[[-np.inf]]]])
    grad = ops.max_pool2d.vjp(np.ones_like(out), x, kernel_size=2, dilation=2, padding=1)["input"]
    np.testing.assert_array_equal(grad, [[[[0.0]]]])


# ---------------------------------------------------------------------------------------------
# Explicit edge cases against torch

EDGE_CASES = [
    pytest.param((1, 1, 5, 5), dict(kernel_size=2, stride=2, ceil_mode=True), id="ceil-partial-last"),
    pytest.param((1, 2, 6, 7), dict(kernel_size=3, stride=2, padding=1, ceil_mode=True), id="ceil-past-padded"),
    # Worked by hand: size 5, kernel 2, stride 2, padding 1: ceil gives 4 windows, the 4th would
    # start at padded position 6 = size + padding (in the right padding) and is dropped -> 3.
    pytest.param((1, 1, 5, 5), dict(kernel_size=2, stride=2, padding=1, ceil_mode=True), id="ceil-drop"),
    pytest.param((1, 1, 7, 4), dict(kernel_size=(3, 2), stride=(3, 3), padding=(1, 1), ceil_mode=True),
                 id="ceil-stride-gt-kernel"),
    pytest.param((2, 3, 4, 5), dict(kernel_size=(4, 5)), id="kernel-is-input"),
    pytest.param((1, 1, 3, 3), dict(kernel_size=4, padding=2), id="kernel-is-padded-input"),
    pytest.param((2, 1, 8, 9), dict(kernel_size=2, stride=3), id="stride-gt-kernel"),
    pytest.param((1, 2, 9, 8), dict(kernel_size=3, stride=2, padding=1), id="overlapping"),
    pytest.param((3, 5, 6), dict(kernel_size=(3, 2), stride=(2, 1), padding=(1, 0)), id="unbatched-odd"),
    pytest.param((0, 2, 4, 4), dict(kernel_size=2), id="batch-zero"),
]
DILATED_CASES = [
    pytest.param((1, 1, 9, 9), dict(kernel_size=3, stride=2, padding=1, dilation=2), id="dilation-stride"),
    pytest.param((2, 1, 7, 8), dict(kernel_size=(2, 3), stride=(1, 2), padding=(1, 0), dilation=(3, 2),
                                    ceil_mode=True), id="dilation-ceil"),
]


@pytest.mark.parametrize("values", ["normal", "ties"])
@pytest.mark.parametrize("shape, params", EDGE_CASES + DILATED_CASES)
def test_max_pool_edge_cases_match_torch(shape, params, values):
    rng = np.random.default_rng(3)
    x = rng.integers(0, 3, shape).astype(float) if values == "ties" else rng.standard_normal(shape)
    assert_matches_torch("max_pool2d", x, params)


@pytest.mark.parametrize("count_include_pad", [True, False])
@pytest.mark.parametrize("divisor_override", [None, 3, -2])
@pytest.mark.parametrize("shape, params", EDGE_CASES)
def test_avg_pool_divisor_cases_match_torch(shape, params, count_include_pad, divisor_override):
    x = np.random.default_rng(4).standard_normal(shape)
    assert_matches_torch("avg_pool2d", x, dict(params, count_include_pad=count_include_pad,
                                               divisor_override=divisor_override))


@pytest.mark.parametrize("name", ["adaptive_avg_pool2d", "adaptive_max_pool2d"])
@pytest.mark.parametrize("shape, output_size", [
    ((1, 1, 5, 7), (3, 2)), ((2, 3, 7, 5), 2), ((1, 2, 3, 4), (5, 7)), ((2, 1, 6, 6), (4, None)),
    ((3, 6, 5), (None, 3)), ((1, 1, 1, 9), (1, 4)), ((1, 1, 8, 8), 1), ((2, 2, 4, 6), (4, 6))])
@pytest.mark.parametrize("values", ["normal", "ties"])
def test_adaptive_pools_match_torch(name, shape, output_size, values):
    rng = np.random.default_rng(5)
    x = rng.integers(0, 2, shape).astype(float) if values == "ties" else rng.standard_normal(shape)
    assert_matches_torch(name, x, {"output_size": output_size})


# ---------------------------------------------------------------------------------------------
# The N-d core (1 and 3 spatial dims) against torch

ND_CASES = [
    pytest.param((2, 3, 9), dict(kernel_size=(3,), stride=(2,), padding=(1,), dilation=(2,), ceil_mode=True),
                 id="1d"),
    pytest.param((1, 2, 5, 6, 7), dict(kernel_size=(2, 3, 2), stride=(2, 1, 3), padding=(1, 1, 0),
                                       dilation=(1, 2, 1), ceil_mode=True), id="3d"),
]
TORCH_ND = {1: (F.max_pool1d, F.avg_pool1d, F.adaptive_max_pool1d, F.adaptive_avg_pool1d),
            3: (F.max_pool3d, F.avg_pool3d, F.adaptive_max_pool3d, F.adaptive_avg_pool3d)}


def torch_with_grad(fn, x, g, **params):
    xt = torch.tensor(x, requires_grad=True)
    yt = fn(xt, **params)
    yt.backward(torch.tensor(g))
    return yt.detach().numpy(), xt.grad.numpy()


@pytest.mark.parametrize("shape, params", ND_CASES)
def test_nd_core_matches_torch(shape, params):
    # Reference: torch max/avg pooling in 1 and 3 dims (float64 autograd), ties from integer values.
    n = len(params["kernel_size"])
    max_fn, avg_fn, adaptive_max_fn, adaptive_avg_fn = TORCH_ND[n]
    rng = np.random.default_rng(6)
    x = rng.integers(0, 3, shape).astype(float)
    windows = pool._FixedWindows.over(x, **params)
    g = rng.standard_normal(x.shape[:2] + windows.out)
    expected, grad = torch_with_grad(max_fn, x, g, **params)
    np.testing.assert_array_equal(pool._max_pool(x, windows), expected)
    np.testing.assert_allclose(pool._max_pool_vjp(g, x, windows), grad, rtol=1e-13, atol=1e-15)

    avg = {k: v for k, v in params.items() if k != "dilation"}
    avg_windows, divisor = pool._avg_windows(x, **avg, count_include_pad=False, divisor_override=None)
    g = rng.standard_normal(x.shape[:2] + avg_windows.out)
    expected, grad = torch_with_grad(avg_fn, x, g, **avg, count_include_pad=False)
    np.testing.assert_allclose(pool._avg_pool(x, avg_windows, divisor), expected, rtol=1e-14)
    np.testing.assert_allclose(pool._avg_pool_vjp(g, avg_windows, divisor), grad, rtol=1e-13)

    out = tuple(s + 1 if i % 2 else max(1, s // 2) for i, s in enumerate(shape[2:]))
    adaptive = pool._AdaptiveWindows.over(x, out)
    g = rng.standard_normal(x.shape[:2] + out)
    expected, grad = torch_with_grad(adaptive_max_fn, x, g, output_size=out)
    np.testing.assert_array_equal(pool._max_pool(x, adaptive), expected)
    np.testing.assert_allclose(pool._max_pool_vjp(g, x, adaptive), grad, rtol=1e-13, atol=1e-15)
    expected, grad = torch_with_grad(adaptive_avg_fn, x, g, output_size=out)
    np.testing.assert_allclose(pool._avg_pool(x, adaptive, adaptive.taps_inside()), expected, rtol=1e-14)
    np.testing.assert_allclose(pool._avg_pool_vjp(g, adaptive, adaptive.taps_inside()), grad, rtol=1e-13)


# ---------------------------------------------------------------------------------------------
# Finite differences away from ties

def central_difference_vjp(forward, x, g, step):
    """<g, f(x + h e_j)> - <g, f(x - h e_j)>, over 2h, for every j at once (perturbations as a batch)."""
    basis = np.eye(x.size).reshape((x.size,) + x.shape)
    plus, minus = forward(x + step * basis), forward(x - step * basis)
    return (np.tensordot(plus - minus, g, axes=g.ndim) / (2 * step)).reshape(x.shape)


@pytest.mark.parametrize("name, params", [
    ("max_pool2d", dict(kernel_size=3, stride=2, padding=1, ceil_mode=True)),
    ("max_pool2d", dict(kernel_size=(2, 3), stride=1, dilation=(2, 1))),
    ("avg_pool2d", dict(kernel_size=3, stride=2, padding=1, ceil_mode=True, count_include_pad=False)),
    ("avg_pool2d", dict(kernel_size=(2, 3), stride=(1, 2), padding=(1, 0), divisor_override=4)),
    ("adaptive_max_pool2d", dict(output_size=(3, 4))),
    ("adaptive_avg_pool2d", dict(output_size=(4, None))),
])
def test_vjp_matches_central_differences_away_from_ties(name, params):
    # Reference: central differences (Nocedal & Wright 2006, section 8.1). The input is a shuffled
    # grid of distinct values 0.5 apart, so a step of 1e-3 never reaches a tie: the piecewise-
    # linear forward is linear on the whole stencil and the difference is exact up to rounding.
    op = ops.get(name)
    rng = np.random.default_rng(8)
    x = rng.permutation(2 * 7 * 6).reshape(2, 7, 6) * 0.5 - 10.0  # unbatched: perturbations batch
    g = rng.standard_normal(op(x, **params).shape)
    fd = central_difference_vjp(lambda batch: op(batch, **params), x, g, 1e-3)
    np.testing.assert_allclose(op.vjp(g, x, **params)["input"], fd, rtol=1e-9, atol=1e-9)


# ---------------------------------------------------------------------------------------------
# Worked examples (values 10*i + j encode their position)

def position_grid(rows, cols):
    return (10 * np.arange(rows)[:, None] + np.arange(cols)[None, :]).astype(float)[None, None]


def test_worked_example_with_position_encoded_values():
    # Worked by hand: the max of each 2x2 window is its bottom-right element.
    x = position_grid(4, 4)
    np.testing.assert_array_equal(ops.max_pool2d(x, kernel_size=2)[0, 0], [[11, 13], [31, 33]])
    np.testing.assert_array_equal(ops.avg_pool2d(x, kernel_size=2)[0, 0], [[5.5, 7.5], [25.5, 27.5]])
    grad = ops.max_pool2d.vjp(np.ones((1, 1, 2, 2)), x, kernel_size=2)["input"][0, 0]
    assert grad.sum() == 4 and grad[1, 1] == grad[1, 3] == grad[3, 1] == grad[3, 3] == 1


def test_worked_example_ceil_mode_keeps_the_partial_last_column():
    # Worked by hand: 4x5 input, kernel 2, ceil_mode: a third column of windows holds column 4 only.
    x = position_grid(4, 5)
    np.testing.assert_array_equal(ops.max_pool2d(x, kernel_size=2, ceil_mode=True)[0, 0],
                                  [[11, 13, 14], [31, 33, 34]])
    np.testing.assert_array_equal(ops.avg_pool2d(x, kernel_size=2, ceil_mode=True)[0, 0],
                                  [[5.5, 7.5, 9.0], [25.5, 27.5, 29.0]])


@pytest.mark.parametrize("count_include_pad, expected", [
    (True, [[22 / 9, 42 / 9], [123 / 9, 198 / 9]]), (False, [[22 / 4, 42 / 6], [123 / 6, 198 / 9]])])
def test_worked_example_padded_average(count_include_pad, expected):
    # Worked by hand: 4x4 input, kernel 3, stride 2, padding 1; window (0, 0) sums 0+1+10+11 = 22
    # over 4 input taps (9 with the padding), window (1, 1) sums rows 1-3, columns 1-3 = 198.
    out = ops.avg_pool2d(position_grid(4, 4), kernel_size=3, stride=2, padding=1,
                         count_include_pad=count_include_pad)
    np.testing.assert_allclose(out[0, 0], expected, rtol=1e-15)


def test_worked_example_adaptive_windows():
    # Worked by hand with start = floor(i*in/out), end = ceil((i+1)*in/out): 5 columns onto 3 ->
    # {0, 1}, {1, 2, 3}, {3, 4}; 3 rows onto 2 -> {0, 1}, {1, 2}; e.g. (0, 1) averages 1, 2, 3, 11,
    # 12, 13 -> 7.
    x = position_grid(3, 5)
    np.testing.assert_array_equal(ops.adaptive_max_pool2d(x, output_size=(2, 3))[0, 0],
                                  [[11, 13, 14], [21, 23, 24]])
    np.testing.assert_allclose(ops.adaptive_avg_pool2d(x, output_size=(2, 3))[0, 0],
                               [[5.5, 7.0, 8.5], [15.5, 17.0, 18.5]], rtol=1e-15)


def test_avg_pool_divisor_clips_at_the_padded_edge():
    # Worked by hand, and reference: torch avg_pool2d with ceil_mode. Input 1x5, kernel (1, 2),
    # stride 2, ceil_mode -> windows [0,1], [2,3], [4]; the last runs past the (unpadded) input
    # and its divisor counts only the one tap on it -> divisors 2, 2, 1.
    x = np.arange(1.0, 6.0).reshape(1, 1, 1, 5)
    out = ops.avg_pool2d(x, kernel_size=(1, 2), stride=2, ceil_mode=True)
    np.testing.assert_allclose(out[0, 0, 0], [1.5, 3.5, 5.0])
    np.testing.assert_allclose(out, F.avg_pool2d(torch.tensor(x), (1, 2), 2, ceil_mode=True).numpy())


def test_ties_send_the_gradient_to_the_first_maximum_in_row_major_order():
    # Contract section 1: first maximal element in row-major order; overlapping windows add up.
    x = np.zeros((1, 1, 3, 3))
    grad = ops.max_pool2d.vjp(np.ones((1, 1, 2, 2)), x, kernel_size=2, stride=1)["input"][0, 0]
    np.testing.assert_array_equal(grad, [[1, 1, 0], [1, 1, 0], [0, 0, 0]])
    # A tie between (0, 1) and (1, 0): row-major order picks (0, 1).
    x = np.array([[[[0.0, 2.0], [2.0, 1.0]]]])
    grad = ops.adaptive_max_pool2d.vjp(np.ones((1, 1, 1, 1)), x, output_size=1)["input"][0, 0]
    np.testing.assert_array_equal(grad, [[0, 1], [0, 0]])


# ---------------------------------------------------------------------------------------------
# Kinks: distance to the nearest tie

TIE_EXAMPLE = np.array([[[[1.0, 5, 2], [3, 5, 0], [4, 1, 7]]]])


def test_tie_distance_worked_by_hand():
    # Worked by hand, kernel 2, stride 1: e.g. (1, 2) is 5 below the max of window (0, 1) and 7
    # below that of window (1, 1) -> 5; (2, 2) is the max of window (1, 1), 2 above its runner-up 5;
    # the two tied 5s are at distance 0.
    distance = ops.max_pool2d.kink_distance(TIE_EXAMPLE, kernel_size=2, stride=1)["input"]
    np.testing.assert_array_equal(distance[0, 0], [[4, 0, 3], [2, 0, 5], [1, 4, 2]])


def brute_force_tie_distance(x, windows_of):
    """The definition, window by window: a loop written independently of the oracle."""
    distance = np.full(x.shape, np.inf)
    for members in windows_of:
        values = [x[m] for m in members]
        top = max(values)
        first = values.index(top)
        runner_up = max(values[:first] + values[first + 1:], default=-np.inf)
        for i, m in enumerate(members):
            distance[m] = min(distance[m], top - runner_up if i == first else top - values[i])
    return distance


def test_tie_distance_follows_its_definition():
    rng = np.random.default_rng(9)
    x = rng.integers(0, 6, (5, 7)).astype(float)
    windows = [[(r * 2 + a * 2 - 1, c + b) for a in range(2) for b in range(3)
                if 0 <= r * 2 + a * 2 - 1 < 5 and c + b < 7] for r in range(3) for c in range(5)]
    expected = brute_force_tie_distance(x, windows)
    distance = ops.max_pool2d.kink_distance(x[None], kernel_size=(2, 3), stride=(2, 1), padding=(1, 0),
                                            dilation=(2, 1))["input"][0]
    np.testing.assert_array_equal(distance, expected)
    # Adaptive 5x7 onto 2x3: rows {0,1,2}, {2,3,4}; columns {0,1,2}, {2,3,4}, {4,5,6}.
    rows, cols = [range(0, 3), range(2, 5)], [range(0, 3), range(2, 5), range(4, 7)]
    windows = [[(r, c) for r in rr for c in cc] for rr in rows for cc in cols]
    distance = ops.adaptive_max_pool2d.kink_distance(x[None], output_size=(2, 3))["input"][0]
    np.testing.assert_array_equal(distance, brute_force_tie_distance(x, windows))


@pytest.mark.parametrize("name, params", [
    ("max_pool2d", dict(kernel_size=3, stride=2, padding=1, ceil_mode=True)),
    ("adaptive_max_pool2d", dict(output_size=(3, 2)))])
def test_tie_distance_is_where_torch_changes_its_routing(name, params):
    # Reference: torch float64 autograd. Moving every element by less than half its distance keeps
    # torch's gradient; moving one element by a little more than its distance changes it.
    op = ops.get(name)
    rng = np.random.default_rng(10)
    x = rng.integers(0, 8, (1, 2, 6, 5)).astype(float) + rng.uniform(0, 0.5, (1, 2, 6, 5))
    g = np.ones(op(x, **params).shape)
    distance = op.kink_distance(x, **params)["input"]
    _, reference = torch_forward_and_grad(name, x, params, g)
    nudge = np.where(np.isfinite(distance), 0.49 * distance, 1.0) * rng.choice([-1, 1], x.shape)
    np.testing.assert_array_equal(torch_forward_and_grad(name, x + nudge, params, g)[1], reference)
    changed = 0
    for index in zip(*np.nonzero(np.isfinite(distance) & (distance > 0))):
        for sign in (-1, 1):
            moved = x.copy()
            moved[index] += sign * distance[index] * 1.01
            changed += not np.array_equal(torch_forward_and_grad(name, moved, params, g)[1], reference)
    assert changed >= np.sum(np.isfinite(distance) & (distance > 0))  # at least one direction each


def test_kink_declarations():
    for name in ("max_pool2d", "adaptive_max_pool2d"):
        (kink,) = ops.get(name).kinks
        assert kink.points is None and "first maximal element in row-major order" in kink.derivative
    for name in ("avg_pool2d", "adaptive_avg_pool2d"):
        assert ops.get(name).kinks == ()
        distance = ops.get(name).kink_distance(np.zeros((1, 3, 3)), **(
            {"kernel_size": 2} if name == "avg_pool2d" else {"output_size": 2}))["input"]
        assert np.isposinf(distance).all()


# ---------------------------------------------------------------------------------------------
# Error terms

def torch_grad(fn, x, g, **params):
    return torch_with_grad(fn, x, g, **params)[1]


@pytest.mark.parametrize("params", [
    dict(kernel_size=3, stride=2, padding=1, ceil_mode=True, count_include_pad=True),
    dict(kernel_size=(2, 3), stride=(1, 2), padding=(1, 0), count_include_pad=False, divisor_override=-3)])
def test_avg_pool_error_terms_match_torch_counts(params):
    # Reference: torch avg_pool2d float64 and autograd: the pool of |x| (M), the pool of ones with
    # divisor 1 (terms summed), and the gradient of that sum-pool for ones (windows per element).
    rng = np.random.default_rng(11)
    x = rng.standard_normal((2, 1, 7, 6))
    g = rng.standard_normal(ops.avg_pool2d(x, **params).shape)
    terms = ops.avg_pool2d.error_terms(g, x, **params)
    sum_pool = dict(params, divisor_override=1, count_include_pad=True)
    magnitude = np.abs(F.avg_pool2d(torch.tensor(np.abs(x)), **params).numpy())
    np.testing.assert_allclose(terms["output"].magnitude, magnitude, rtol=1e-14)
    np.testing.assert_array_equal(np.broadcast_to(terms["output"].length, g.shape),
                                  F.avg_pool2d(torch.ones(x.shape, dtype=torch.float64), **sum_pool).numpy())
    np.testing.assert_allclose(terms["input"].magnitude,
                               np.abs(torch_grad(F.avg_pool2d, x, np.abs(g), **params)), rtol=1e-14)
    np.testing.assert_array_equal(terms["input"].length, torch_grad(F.avg_pool2d, x, np.ones(g.shape), **sum_pool))
    assert (terms["output"].accumulate, terms["input"].accumulate) == ("wide", "io")


@pytest.mark.parametrize("name, params", [
    ("max_pool2d", dict(kernel_size=3, stride=1, padding=1)),
    ("adaptive_max_pool2d", dict(output_size=(4, 3)))])
def test_max_pool_error_terms_match_torch_routing(name, params):
    # Reference: torch autograd: routing |g| gives M, routing ones counts the windows per element.
    rng = np.random.default_rng(12)
    x = rng.integers(0, 3, (1, 2, 6, 5)).astype(float)
    g = rng.standard_normal(ops.get(name)(x, **params).shape)
    terms = ops.get(name).error_terms(g, x, **params)
    assert terms["output"].magnitude == 0 and terms["output"].length == 0  # a selection: exact
    np.testing.assert_allclose(terms["input"].magnitude, torch_grad(TORCH[name], x, np.abs(g), **params),
                               rtol=1e-14)
    np.testing.assert_array_equal(terms["input"].length, torch_grad(TORCH[name], x, np.ones(g.shape), **params))
    assert terms["input"].accumulate == "io"


def test_adaptive_avg_error_terms_count_the_window_sizes():
    # Worked by hand with torch's window rule: 5 columns onto 3 -> sizes 2, 3, 2; 3 rows onto 2 ->
    # sizes 2, 2; column 1 and 3 lie in two windows, row 1 in two.
    x = np.ones((1, 3, 5))
    terms = ops.adaptive_avg_pool2d.error_terms(np.ones((1, 2, 3)), x, output_size=(2, 3))
    np.testing.assert_array_equal(terms["output"].length, [[4, 6, 4], [4, 6, 4]])
    np.testing.assert_array_equal(terms["input"].length[0], [[1, 2, 1, 2, 1], [2, 4, 2, 4, 2], [1, 2, 1, 2, 1]])


# ---------------------------------------------------------------------------------------------
# Spaces, docs, argument handling

def test_spaces_reach_the_edge_cases():
    configs = [ops.max_pool2d.space(RandomDraw(np.random.default_rng(s))) for s in range(300)]
    seen = {"stride > kernel": 0, "kernel = padded input": 0, "ceil_mode partial window": 0,
            "dilation with stride": 0, "batch 1": 0, "unbatched": 0, "padding_only_windows": 0}
    for c in configs:
        k = np.broadcast_to(c.layer["kernel_size"], 2)
        p = np.broadcast_to(c.layer["padding"], 2)
        size = np.array(c.shapes["input"][-2:])
        extent = c.layer["dilation"] * (k - 1) + 1
        seen["stride > kernel"] += c.layer["stride"] > k.max()
        seen["kernel = padded input"] += bool(np.any(extent == size + 2 * p))
        seen["ceil_mode partial window"] += c.layer["ceil_mode"] and bool(
            np.any((size + 2 * p - extent) % c.layer["stride"]))
        seen["dilation with stride"] += c.layer["dilation"] > 1 and c.layer["stride"] > 1
        seen["batch 1"] += c.shapes["input"][0] == 1 and len(c.shapes["input"]) == 4
        seen["unbatched"] += len(c.shapes["input"]) == 3
        seen["padding_only_windows"] += c.drawn["padding_only_windows"]
        # The flag is exactly "some output is -inf" (a window with no tap on the input).
        x = np.ones(c.shapes["input"])
        assert c.drawn["padding_only_windows"] == bool(np.isneginf(ops.max_pool2d(x, **c.params)).any())
    assert min(seen.values()) >= 5, seen
    overrides = [ops.avg_pool2d.space(RandomDraw(np.random.default_rng(s))).params["divisor_override"]
                 for s in range(100)]
    assert 10 <= sum(d is not None for d in overrides) <= 70
    assert "divisor_override" not in ops.avg_pool2d.space(RandomDraw(np.random.default_rng(0))).layer


@pytest.mark.parametrize("name", NAMES)
def test_pins_are_honoured(name):
    op = ops.get(name)
    pins = {"output_size": [2, None]} if name.startswith("adaptive") else {"kernel_size": [2, 3], "stride": 2}
    config = op.space(RandomDraw(np.random.default_rng(1), pins=pins))
    for key, value in pins.items():
        assert config.layer[key] == (tuple(value) if isinstance(value, list) else value)
    (x,), params = plain_arrays(op, config, np.random.default_rng(1))
    assert op(x, **params).shape == op.output_shape(x, **params)


@pytest.mark.parametrize("name", NAMES)
def test_docstrings_state_formula_shape_and_kinks(name):
    op = ops.get(name)
    for section in ("Formula", "Output shape", "Non-differentiable points", "Notes"):
        assert op.doc_section(section), section
    if "max" in name:
        assert "first" in op.doc_section("Notes") and "row-major" in op.doc_section("Notes")


@pytest.mark.parametrize("name", NAMES)
def test_oracles_leave_their_arguments_alone_and_return_float64(name):
    op = ops.get(name)
    params = {"output_size": (2, 3)} if name.startswith("adaptive") else {"kernel_size": 2}
    x = np.random.default_rng(2).standard_normal((1, 2, 5, 5)).astype(np.float32)
    before = x.copy()
    out = op(x, **params)
    g = np.ones(out.shape, dtype=np.float32)
    grad = op.vjp(g, x, **params)["input"]
    assert out.dtype == grad.dtype == np.float64
    np.testing.assert_array_equal(x, before)
    np.testing.assert_array_equal(g, 1.0)


X = np.ones((1, 2, 5, 5))


@pytest.mark.parametrize("call, kind, message", [
    pytest.param(lambda: ops.max_pool2d(np.ones((5, 5)), kernel_size=2), ValueError,
                 r"input=array\(shape=\(5, 5\).*3 or 4 dimensions", id="rank-2"),
    pytest.param(lambda: ops.avg_pool2d(np.ones((1, 1, 1, 5, 5)), kernel_size=2), ValueError,
                 r"input=.*got 5", id="rank-5"),
    pytest.param(lambda: ops.max_pool2d(np.ones((1, 0, 4, 4)), kernel_size=2), ValueError,
                 r"input=.*except the batch", id="empty-channels"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=0), ValueError, r"kernel_size=0: every entry must be >= 1",
                 id="kernel-zero"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=(2, 2, 2)), ValueError, r"kernel_size=\(2, 2, 2\)",
                 id="kernel-length"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2.0), TypeError, r"kernel_size=2.0", id="kernel-float"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, stride=0), ValueError, r"stride=0", id="stride-zero"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=2, stride=(1, -1)), ValueError, r"stride=\(1, -1\)",
                 id="stride-negative"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, dilation=0), ValueError, r"dilation=0", id="dilation"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, padding=-1), ValueError, r"padding=-1",
                 id="pad-negative"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, padding=2), ValueError,
                 r"padding=2: must be at most half the kernel size", id="pad-too-large"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=(3, 4), padding=(1, 3)), ValueError,
                 r"padding=\(1, 3\).*at most \(1, 2\)", id="pad-too-large-one-dim"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=7), ValueError,
                 r"kernel_size=7: the window .* larger than the padded input", id="kernel-too-large"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, dilation=5), ValueError,
                 r"kernel_size=2: the window \(dilation \* \(kernel_size - 1\) \+ 1 = \(6, 6\)\)",
                 id="dilated-too-large"),
    pytest.param(lambda: ops.max_pool2d(X, kernel_size=2, ceil_mode="yes"), TypeError, r"ceil_mode='yes'",
                 id="ceil-mode"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=2, count_include_pad=None), TypeError,
                 r"count_include_pad=None", id="count-include-pad"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=2, divisor_override=0), ValueError,
                 r"divisor_override=0: must be a non-zero int", id="divisor-zero"),
    pytest.param(lambda: ops.avg_pool2d(X, kernel_size=2, divisor_override=1.5), TypeError,
                 r"divisor_override=1.5", id="divisor-float"),
    pytest.param(lambda: ops.max_pool2d(X), TypeError, r"kernel_size", id="kernel-missing"),
    pytest.param(lambda: ops.adaptive_avg_pool2d(X, output_size=0), ValueError, r"output_size=0: every entry",
                 id="output-zero"),
    pytest.param(lambda: ops.adaptive_max_pool2d(X, output_size=(2, -1)), ValueError, r"output_size=\(2, -1\)",
                 id="output-negative"),
    pytest.param(lambda: ops.adaptive_max_pool2d(X, output_size=(2, 2, 2)), ValueError,
                 r"output_size=\(2, 2, 2\): expected an int or a sequence of 2", id="output-length"),
    pytest.param(lambda: ops.adaptive_avg_pool2d(X, output_size=(2, "3")), TypeError, r"output_size=\(2, '3'\)",
                 id="output-type"),
    pytest.param(lambda: ops.avg_pool2d(X.astype(int), kernel_size=2), TypeError, r"input=.*floating", id="int"),
    pytest.param(lambda: ops.avg_pool2d(np.full((1, 1, 2, 2), np.nan), kernel_size=2), ValueError,
                 r"input=.*non-finite", id="nan"),
    pytest.param(lambda: ops.adaptive_max_pool2d(np.full((1, 1, 2, 2), np.inf), output_size=1), ValueError,
                 r"input=.*non-finite", id="inf"),
    pytest.param(lambda: ops.max_pool2d.vjp(np.ones((1, 2, 3, 3)), X, kernel_size=2), ValueError,
                 r"grad_output=.*\(1, 2, 2, 2\)", id="cotangent-shape"),
    pytest.param(lambda: ops.adaptive_avg_pool2d.vjp(np.ones((1, 2, 2)), X, output_size=2), ValueError,
                 r"grad_output=.*\(1, 2, 2, 2\)", id="cotangent-rank"),
])
def test_bad_calls_name_the_argument(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
