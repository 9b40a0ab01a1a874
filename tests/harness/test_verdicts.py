"""The harness on real subjects: torch's own layers pass (no false alarms), buggy layers fail (teeth)."""
import functools

import pytest
import torch

from refops.harness import check_layer
from refops.harness.deviations import torch_layer_norm_sums_affine_gradient_in
from torch_layers import FACTORIES, BackwardDefect, ForwardDefect, OverflowingSoftplus, TiedMaxPool

HERE = "tests/harness/torch_layers.py"
SAFE_IN_PROCESS = sorted(set(FACTORIES) - {"max_pool2d"})


PAIRS = [(op, dtype) for op in SAFE_IN_PROCESS for dtype in ("float32", "float16", "bfloat16")]


@pytest.mark.parametrize("op, dtype", PAIRS)
def test_torch_layers_pass(op, dtype):
    # Reference: torch's own layers are an independent implementation of each op; a correct
    # implementation must pass with the default tolerance (known deviations declared in
    # refops/harness/deviations.py).
    report = check_layer(FACTORIES[op], op, cases=12, seed=1, dtype=dtype)
    assert len(report.cases) == 12
    report.raise_if_failed()


@pytest.mark.parametrize("dtype", ["float16", "bfloat16"])
def test_the_layer_norm_deviation_is_real_where_the_probe_sees_it(dtype):
    # Without the declared deviation, torch's half-format layer norm fails on the weight and bias
    # gradients only (sums carried in the half format), exactly where the probe says it does that.
    strict = check_layer(FACTORIES["layer_norm"], "layer_norm", cases=12, seed=1, dtype=dtype,
                         use_deviations=False)
    failing = {c.tensor for case in strict.failures for c in case.comparisons if not c.passed}
    if torch_layer_norm_sums_affine_gradient_in(dtype):
        assert failing and failing <= {"weight", "bias"}
    else:
        assert strict.passed
    lenient = check_layer(FACTORIES["layer_norm"], "layer_norm", cases=12, seed=1, dtype=dtype)
    assert any("layer norm sums the weight and bias" in d for d in lenient.deviations) == \
        torch_layer_norm_sums_affine_gradient_in(dtype)


@pytest.mark.parametrize("dtype", ["float32", "bfloat16"])
def test_torch_max_pool_passes_in_a_worker_process(dtype):
    # SOURCES.md: torch's max-pool backward can corrupt memory when a window covers only padding.
    # In the worker process such a case is a verdict ("aborted"), and the sweep goes on.
    report = check_layer(f"{HERE}:max_pool", "max_pool2d", cases=30, seed=2, dtype=dtype, timeout=10)
    assert len(report.cases) == 30
    for case in report.failures:
        assert case.config["padding_only_windows"], (case.case_id, case.status, case.message)
        assert case.status in ("aborted", "failed", "timeout") and "--case" in case.replay
    assert sum(case.passed for case in report.cases) >= 25


def test_hand_written_conv_passes():
    report = check_layer("refops.examples.denoiser:tile_conv", "conv2d", cases=40, seed=3,
                         pins={"padding_mode": "zeros"})
    report.raise_if_failed()


BUGGY_CONVS = [("forward", d) for d in ("kernel_flipped", "padding_on_the_high_side", "dilation_ignored_when_strided",
                                        "operands_rounded_to_10_bits", "input_changed_in_place", "cross_batch_leak")] \
    + [("backward", d) for d in ("weight_gradient_scaled", "bias_gradient_from_one_pixel", "one_input_pixel_off",
                                 "weight_gradient_rounded_to_bfloat16")]
PINS = {"padding_on_the_high_side": {"padding": 1, "padding_mode": "zeros"},
        "dilation_ignored_when_strided": {"dilation": 2, "stride": 2, "padding_mode": "zeros"},
        "bias_gradient_from_one_pixel": {"bias": True}}


@pytest.mark.parametrize("where, defect", BUGGY_CONVS, ids=[d for _, d in BUGGY_CONVS])
def test_buggy_convolutions_are_caught(where, defect):
    cls = ForwardDefect if where == "forward" else BackwardDefect
    report = check_layer(functools.partial(cls, defect), "conv2d", cases=20, seed=4,
                         pins=PINS.get(defect))
    assert not report.passed, f"{defect} was not caught"
    assert len(report.failures) >= 5


def test_max_pool_duplicating_the_gradient_on_ties_is_caught():
    report = check_layer(TiedMaxPool, "max_pool2d", cases=24, seed=5,
                         pins={"padding": 0, "ceil_mode": False, "dilation": 1})
    failing = {c.tensor for case in report.failures for c in case.comparisons if not c.passed}
    assert failing == {"input"}
    assert {case.values for case in report.failures} >= {"ties"}


def test_overflowing_softplus_is_caught_on_large_inputs():
    report = check_layer(OverflowingSoftplus, "softplus", cases=12, seed=6)
    large = [case for case in report.cases if case.values == "large"]
    assert large and all(not case.passed for case in large)
    # log(1 + exp(x)) also loses the small tail (1 + tiny rounds to 1), hence other families fail too.
    assert any(c.nonfinite_mismatches for case in large for c in case.comparisons)


def test_declared_deviation_is_listed_when_applied():
    report = check_layer(torch.nn.Conv2d, "conv2d", cases=6, seed=7, dtype="float16")
    assert report.passed and any("float16" in d and "weight" in d for d in report.deviations)
    strict = check_layer(torch.nn.Conv2d, "conv2d", cases=30, seed=7, dtype="float16", use_deviations=False)
    assert not strict.passed  # the deviation is real: without it torch's float16 sums are flagged
