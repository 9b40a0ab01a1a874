"""The hand-written conv2d (refops.examples.layers) passes; each of its buggy twins is caught with
default settings; a numpy subject with a user-supplied backward is judged like a torch one."""
import re

import numpy as np
import pytest

import refops.examples.layers as layers
from refops import ops
from refops.harness import check_layer
from refops.harness.numpy_subject import numpy_subject

# Pins that make the defect's configuration occur (otherwise it hides, e.g. no dilation to ignore).
PINS = {"padding_on_the_high_side": {"padding": 1, "padding_mode": "zeros"},
        "dilation_ignored_when_strided": {"dilation": 2, "stride": 2}}


@pytest.mark.parametrize("dtype", ["float64", "float32", "float16", "bfloat16"])
def test_hand_written_conv_passes(dtype):
    # Reference: refops's conv2d oracle, itself tested against torch.nn.functional.conv2d in
    # float64 autograd (tests/ops/test_conv.py); a correct kernel must pass under the default bound.
    report = check_layer(layers.conv2d, "conv2d", cases=40, seed=3, dtype=dtype)
    assert len(report.cases) == 40
    report.raise_if_failed()


@pytest.mark.parametrize("defect", sorted(layers.DEFECTS))
def test_each_slip_is_caught_with_default_settings(defect):
    report = check_layer(getattr(layers, f"conv2d_{defect}"), "conv2d", cases=20, seed=4, pins=PINS.get(defect))
    assert not report.passed, f"{defect} was not caught"
    assert all("--case" in case.replay for case in report.failures)


def test_in_place_change_is_named():
    report = check_layer(layers.conv2d_input_changed_in_place, "conv2d", cases=10, seed=4)
    assert any("changed its input in place" in f for case in report.failures for f in case.findings)


def _linear_forward(x, w, b):
    return ops.linear(x, w, b)


def _linear_backward(g, x, w, b):
    grads = ops.linear.vjp(g, x, w, b)
    return grads["input"], grads["weight"], grads.get("bias")


def _linear_backward_transposed_weight_gradient(g, x, w, b):
    input_grad, weight_grad, bias_grad = _linear_backward(g, x, w, b)
    # the weight gradient computed for the transposed layout, transposed back wrongly when square
    return input_grad, weight_grad[::-1], bias_grad


@pytest.mark.parametrize("dtype", ["float32", "float16"])
def test_numpy_subject_with_its_own_backward(dtype):
    good = check_layer(lambda **layer: numpy_subject(_linear_forward, _linear_backward), "linear",
                       cases=15, seed=5, dtype=dtype)
    good.raise_if_failed()
    bad = check_layer(lambda **layer: numpy_subject(_linear_forward, _linear_backward_transposed_weight_gradient),
                      "linear", cases=15, seed=5, dtype=dtype)
    failing = {c.tensor for case in bad.failures for c in case.comparisons if not c.passed}
    assert failing == {"weight"}


def test_numpy_subject_needs_callables():
    with pytest.raises(TypeError, match="expected two callables"):
        numpy_subject(np.zeros(3), _linear_backward)


def test_a_failure_is_shrunk_to_a_smaller_configuration_that_replays():
    report = check_layer(layers.conv2d_weight_gradient_scaled, "conv2d", cases=2, seed=0)
    case = report.failures[0]
    sizes = ("batch", "in_channels", "out_channels")
    assert case.smallest is not None
    assert sum(case.smallest["config"][s] for s in sizes) < sum(case.config[s] for s in sizes)
    pins = {k: int(v) for k, v in re.findall(r"--set (\w+)=(\d+)", case.smallest["replay"])}
    assert pins
    again = check_layer(layers.conv2d_weight_gradient_scaled, "conv2d", pins=pins, case_ids=[case.case_id])
    assert again.cases[0].config == case.smallest["config"] and again.cases[0].status == "failed"
