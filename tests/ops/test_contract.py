"""The public op table of the contract (shared/CONTRACT.md section 1): names, arrays, parameters, defaults."""
import inspect

import pytest

import refops.ops as ops

REQUIRED = inspect.Parameter.empty
CONV = dict(stride=1, padding=0, dilation=1, groups=1, padding_mode="zeros")
# Reference: the contract's table, transcribed; array names in order, "?" marks an optional array.
TABLE = {
    "linear": (("input", "weight", "bias?"), {}),
    "conv1d": (("input", "weight", "bias?"), CONV),
    "conv2d": (("input", "weight", "bias?"), CONV),
    "conv3d": (("input", "weight", "bias?"), CONV),
    "conv_transpose2d": (("input", "weight", "bias?"),
                         dict(stride=1, padding=0, output_padding=0, groups=1, dilation=1)),
    "max_pool2d": (("input",), dict(kernel_size=REQUIRED, stride=None, padding=0, dilation=1, ceil_mode=False)),
    "avg_pool2d": (("input",), dict(kernel_size=REQUIRED, stride=None, padding=0, ceil_mode=False,
                                    count_include_pad=True, divisor_override=None)),
    "adaptive_avg_pool2d": (("input",), dict(output_size=REQUIRED)),
    "adaptive_max_pool2d": (("input",), dict(output_size=REQUIRED)),
    **{name: (("input",), {}) for name in (
        "relu", "relu6", "sigmoid", "logsigmoid", "tanh", "atan", "silu", "mish", "selu", "softsign",
        "hardsigmoid", "hardswish")},
    "leaky_relu": (("input",), dict(negative_slope=0.01)),
    "elu": (("input",), dict(alpha=1.0)),
    "celu": (("input",), dict(alpha=1.0)),
    "gelu": (("input",), dict(approximate="none")),
    "softplus": (("input",), dict(beta=1.0, threshold=20.0)),
    "hardtanh": (("input",), dict(min_val=-1.0, max_val=1.0)),
    "prelu": (("input", "weight"), {}),
    "softmax": (("input",), dict(dim=REQUIRED)),
    "log_softmax": (("input",), dict(dim=REQUIRED)),
    "batch_norm": (("input", "weight?", "bias?"), dict(running_mean=None, running_var=None, training=True,
                                                       momentum=0.1, eps=1e-5)),
    "layer_norm": (("input", "weight?", "bias?"), dict(normalized_shape=REQUIRED, eps=1e-5)),
    "group_norm": (("input", "weight?", "bias?"), dict(num_groups=REQUIRED, eps=1e-5)),
    "mse_loss": (("input", "target"), dict(reduction="mean")),
    "cross_entropy": (("input", "target"), dict(reduction="mean", label_smoothing=0.0)),
    "binary_cross_entropy_with_logits": (("input", "target"), dict(reduction="mean")),
}


def test_every_contract_op_is_registered():
    missing = sorted(set(TABLE) - set(ops.names()))
    assert not missing, f"ops of the contract not registered: {missing}"


@pytest.mark.parametrize("name", sorted(TABLE))
def test_arrays_and_parameter_defaults_follow_the_contract(name):
    if name not in ops.names():
        pytest.fail(f"{name} is not registered")
    op = ops.get(name)
    arrays, params = TABLE[name]
    assert op.arrays == tuple(a.rstrip("?") for a in arrays)
    assert op.optional == {a.rstrip("?") for a in arrays if a.endswith("?")}
    assert op.defaults == params


@pytest.mark.parametrize("name, has_target_grad", [
    ("mse_loss", True), ("binary_cross_entropy_with_logits", True), ("cross_entropy", False)])
def test_loss_target_gradients_follow_the_contract(name, has_target_grad):
    if name not in ops.names():
        pytest.fail(f"{name} is not registered")
    assert ("target" in ops.get(name).differentiable) is has_target_grad
