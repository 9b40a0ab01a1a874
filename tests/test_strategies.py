"""Hypothesis strategies: valid configurations, edge-case frequencies, shrinking, value families."""
import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, find, given, settings
from hypothesis import strategies as st

import refops.ops as ops
from refops.numerics.formats import round_to
from refops import strategies
from refops.ops import CaseConfig, Kink, Op
from refops.ops._space import PinError, RandomDraw
from refops.strategies import FAMILIES, HypothesisDraw, cases, configs, kink_points, value_arrays

TORCH_DTYPES = {"float64": torch.float64, "float32": torch.float32, "float16": torch.float16,
                "bfloat16": torch.bfloat16, "float8_e4m3": torch.float8_e4m3fn,
                "float8_e5m2": torch.float8_e5m2}
FIXED = settings(database=None, deadline=None, derandomize=True,
                 suppress_health_check=[HealthCheck.too_slow])


def examples(strategy, count):
    """``count`` examples of ``strategy`` (fewer if hypothesis exhausts it), deterministically."""
    found = []

    @settings(FIXED, max_examples=count)
    @given(strategy)
    def collect(value):
        found.append(value)
    collect()
    return found


def representable(x, fmt):
    # Reference: torch's casts to each dtype; a representable value survives the round trip.
    x = np.ascontiguousarray(x, dtype=np.float64)
    back = torch.from_numpy(x).to(TORCH_DTYPES[fmt]).double()
    return np.array_equal(back.numpy(), x)


def largest(value):
    return max(value) if isinstance(value, tuple) else value


def drawn_names(name):
    found = set()
    for seed in range(32):
        draw = RandomDraw(np.random.default_rng(seed))
        ops.get(name).space(draw)
        found |= set(draw.drawn)
    return found


# ---------------------------------------------------------------------------------------------
# every generated case is one the oracle accepts

@pytest.mark.parametrize("name", ops.names())
def test_every_generated_case_is_accepted_by_the_oracle(name):
    op = ops.get(name)

    @settings(FIXED, max_examples=120)
    @given(cases(name))
    def accepted(case):
        out = op(*case.arrays, **case.params)
        assert out.shape == case.cotangent.shape
        grads = op.vjp(case.cotangent, *case.arrays, **case.params)
        assert set(grads) == {n for n, a in zip(op.arrays, case.arrays)
                              if a is not None and n in op.differentiable}
        for array_name, shape in case.config.shapes.items():
            value = dict(zip(op.arrays, case.arrays)).get(array_name, case.params.get(array_name))
            assert (value is None) == (shape is None)
            if value is not None:
                assert value.shape == tuple(shape)
            if array_name in case.config.bounds and value is not None:
                low, high = case.config.bounds[array_name]
                assert np.all(value >= low)
                inside = value < high if array_name in op.integer_arrays else value <= high
                assert np.all(inside)
    accepted()


@pytest.mark.parametrize("fmt", ["float16", "bfloat16", "float8_e4m3"])
def test_case_arrays_and_cotangent_are_representable_in_the_format(fmt):
    for name in ("linear", "conv2d", "max_pool2d"):
        for case in examples(cases(name, format=fmt), 40):
            for array in (*case.arrays, case.cotangent):
                if array is not None:
                    assert representable(array, fmt), (name, case.family)


# ---------------------------------------------------------------------------------------------
# edge cases are frequent: each appears in at least 5% of 200 generated configurations

EDGE_CASES = [
    ("conv2d", "1x1 kernel", lambda c: c.layer["kernel_size"] in (1, (1, 1))),
    ("conv2d", "stride > 1", lambda c: largest(c.layer["stride"]) > 1),
    ("conv2d", "dilation > 1", lambda c: largest(c.layer["dilation"]) > 1),
    ("conv2d", "groups > 1", lambda c: c.layer["groups"] > 1),
    ("conv2d", "depthwise", lambda c: 1 < c.layer["groups"] == c.layer["in_channels"]),
    ("conv2d", "batch 1", lambda c: c.shapes["input"][0] == 1),
    ("conv2d", "no bias", lambda c: c.shapes["bias"] is None),
    ("conv2d", "circular padding", lambda c: c.layer["padding_mode"] == "circular"),
    ("conv_transpose2d", "output_padding > 0", lambda c: largest(c.layer["output_padding"]) > 0),
    ("max_pool2d", "ceil_mode", lambda c: c.layer["ceil_mode"] is True),
    ("max_pool2d", "stride > 1", lambda c: largest(c.layer["stride"]) > 1),
    ("max_pool2d", "dilation > 1", lambda c: c.layer["dilation"] > 1),
    ("max_pool2d", "unbatched input", lambda c: len(c.shapes["input"]) == 3),
    ("avg_pool2d", "count_include_pad=False", lambda c: c.layer["count_include_pad"] is False),
    ("avg_pool2d", "divisor_override", lambda c: c.params["divisor_override"] is not None),
    ("adaptive_avg_pool2d", "global pooling", lambda c: c.params["output_size"] == 1),
    ("linear", "unbatched input", lambda c: len(c.shapes["input"]) == 1),
]
EDGE_SAMPLE, EDGE_MIN_SHARE = 200, 0.05


@pytest.mark.parametrize("name, predicate", [(row[0], row[2]) for row in EDGE_CASES],
                         ids=[f"{row[0]}: {row[1]}" for row in EDGE_CASES])
def test_edge_cases_appear_often(name, predicate):
    found = examples(configs(name), EDGE_SAMPLE)
    assert len(found) == EDGE_SAMPLE
    share = sum(map(predicate, found)) / len(found)
    assert share >= EDGE_MIN_SHARE


# ---------------------------------------------------------------------------------------------
# shrinking leads to small, readable configurations

STRIDED_AND_DILATED = [n for n in ops.names() if {"stride", "dilation"} <= drawn_names(n)]


def dilated_strided_kernel(config):
    """An injected failure: only when dilation > 1, stride > 1 and a kernel larger than 1."""
    layer = config.layer
    return (largest(layer["dilation"]) > 1 and largest(layer["stride"]) > 1
            and largest(layer["kernel_size"]) > 1)


@pytest.mark.parametrize("name", STRIDED_AND_DILATED)
def test_shrinking_an_injected_failure_gives_a_minimal_config(name):
    assert {"conv2d", "max_pool2d"} <= set(STRIDED_AND_DILATED)
    found = find(configs(name), dilated_strided_kernel, settings=settings(FIXED, max_examples=2000))
    layer, input_shape = found.layer, found.shapes["input"]
    # Stated bound: the smallest stride and dilation that trigger it, the first kernel larger
    # than 1 in the space's order (2 or 3), one sample and one channel, and every spatial size at
    # most 5 = dilation * (kernel - 1) + 1, the smallest input such a kernel fits without padding.
    assert largest(layer["dilation"]) == 2 and largest(layer["stride"]) == 2
    assert largest(layer["kernel_size"]) <= 3
    assert input_shape[0] == 1 or len(input_shape) == 3        # batch 1 (or unbatched)
    spatial = input_shape[-2:] if name.endswith("2d") else input_shape[2:]
    assert found.drawn.get("groups", 1) == 1 and input_shape[-len(spatial) - 1] == 1
    assert max(spatial) <= 5, found.shapes


def test_shrinking_a_failure_that_needs_no_configuration_gives_the_simplest():
    found = find(configs("conv2d"), lambda c: True, settings=FIXED)
    assert found.layer["kernel_size"] == (1, 1) and found.layer["stride"] == (1, 1)
    assert found.shapes["input"] == (1, 1, 1, 1)


def test_shrinking_a_value_family_failure_keeps_the_configuration_small():
    found = find(cases("max_pool2d"), lambda c: c.family == "tiny", settings=FIXED)
    assert found.family == "tiny" and found.arrays[0].size == 1
    assert np.all(np.abs(found.arrays[0]) < torch.finfo(torch.float32).tiny)


def test_case_repr_names_the_configuration_not_the_values():
    case = find(cases("linear"), lambda c: c.family == "ties", settings=FIXED)
    text = repr(case)
    assert text.startswith("Case(linear, family='ties', format='float32', drawn={")
    assert "input=(1, 1)" in text and "array(" not in text


# ---------------------------------------------------------------------------------------------
# pins and size caps

def test_pins_are_honoured_and_lists_become_tuples():
    for config in examples(configs("max_pool2d", pins={"kernel_size": [2, 3], "stride": 1}), 50):
        assert config.layer["kernel_size"] == (2, 3) and config.layer["stride"] == 1
        assert config.drawn["kernel_size"] == (2, 3)


def test_max_spatial_caps_the_input_sizes():
    capped = examples(configs("avg_pool2d", pins={"kernel_size": 1}, max_spatial=3), 60)
    assert max(c.shapes["input"][-1] for c in capped) == 3
    assert max(c.shapes["input"][-2] for c in capped) == 3


def test_max_spatial_never_goes_below_what_the_kernel_needs():
    for config in examples(configs("max_pool2d", pins={"kernel_size": 4, "padding": 0,
                                                       "dilation": 1}, max_spatial=2), 30):
        assert config.shapes["input"][-2:] == (4, 4)


def test_a_draw_with_no_room_left_is_a_pin_error():
    @st.composite
    def impossible(draw):
        return HypothesisDraw(draw).integer("stride", 3, 2)
    with pytest.raises(PinError, match=r"stride: no valid value \(needs 3 <= stride <= 2\)"):
        find(impossible(), lambda v: True, settings=FIXED)


# ---------------------------------------------------------------------------------------------
# value families

FORMATS = list(TORCH_DTYPES)


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("family", FAMILIES)
def test_every_family_is_representable_finite_and_shaped(family, fmt):
    points = {"points": [0.0, -1.0, 6.0]} if family == "kinks" else {}
    for x in examples(value_arrays((3, 17), family=family, format=fmt, **points), 15):
        assert x.shape == (3, 17) and x.dtype == np.float64
        assert np.all(np.isfinite(x)) and representable(x, fmt)


def pooled(family, fmt="float32", count=40, **kwargs):
    return np.concatenate([x.ravel() for x in examples(
        value_arrays((64,), family=family, format=fmt, **kwargs), count)])


def test_normal_family_has_unit_scale():
    x = pooled("normal", count=80)
    assert abs(x.mean()) < 0.1 and 0.9 < x.std() < 1.1


def test_normal_family_between_two_bounds_covers_them():
    x = pooled("normal", min_value=0.25, max_value=0.75)
    assert x.min() >= 0.25 and x.max() <= 0.75 and x.max() - x.min() > 0.45


def test_normal_family_with_one_bound_stays_on_its_side():
    x = pooled("normal", min_value=2.0)
    assert x.min() >= 2.0 and np.median(x) < 3.5


def test_bounds_that_are_not_representable_are_rounded_inward():
    x = pooled("normal", "bfloat16", min_value=0.2995, max_value=0.3995)
    # Reference: torch casts 0.2995 to 0.298828125 and 0.3995 to 0.3984375 in bfloat16, whose
    # spacing is 2**-9 on [0.25, 0.5): the nearest values inside are 0.30078125 and 0.3984375.
    assert float(torch.tensor(0.2995).bfloat16()) == 0.298828125
    assert x.min() == 0.30078125 and x.max() == 0.3984375 and representable(x, "bfloat16")


@pytest.mark.parametrize("fmt", FORMATS)
def test_wide_family_spans_many_binades_and_products_stay_finite(fmt):
    x = np.abs(pooled("wide", fmt))
    binades = np.log2(x.max()) - np.log2(x.min())
    finfo = torch.finfo(TORCH_DTYPES[fmt])
    # Reference: torch.finfo; the middle half of the exponent range, here >= 4 binades.
    assert binades >= 4
    assert x.max() ** 2 <= finfo.max


def test_ties_family_is_small_integers_with_many_repeats():
    x = pooled("ties")
    assert np.array_equal(x, np.round(x)) and set(np.unique(x)) == set(range(-3, 4))


def test_kinks_family_puts_most_elements_exactly_on_the_points():
    x = pooled("kinks", points=[0.0, 6.0])
    on_points = np.isin(x, [0.0, 6.0]).mean()
    assert 0.65 < on_points < 0.85       # three in four
    assert np.any(x == 6.0) and np.any(x == 0.0)


@pytest.mark.parametrize("fmt", ["float32", "float16", "bfloat16"])
def test_large_family_straddles_exp_overflow(fmt):
    x = pooled("large", fmt)
    # Reference: torch.exp in the format overflows to inf beyond ln(max).
    overflows = torch.isinf(torch.exp(torch.from_numpy(x).to(TORCH_DTYPES[fmt]))).numpy()
    assert 0.1 < overflows.mean() < 0.9
    assert np.abs(x).max() <= 1000 and np.abs(x).max() > 500


@pytest.mark.parametrize("fmt", FORMATS)
def test_tiny_family_is_subnormal(fmt):
    x = pooled("tiny", fmt)
    # Reference: torch.finfo(dtype).tiny is the smallest normal number of the dtype.
    assert np.all(x != 0) and np.all(np.abs(x) < torch.finfo(TORCH_DTYPES[fmt]).tiny)


def test_cancellation_family_is_a_common_offset_plus_a_few_ulps():
    for x in examples(value_arrays((64,), family="cancellation"), 30):
        centre = np.median(x)
        # Reference: numpy.spacing of float32 (the ulp at the offset).
        spread = (x.max() - x.min()) / np.spacing(np.float32(abs(centre)))
        assert abs(centre) >= 1 and spread <= 8 + 1e-9 and x.max() > x.min()


def test_negative_family_has_no_zeros():
    x = pooled("negative", "float8_e4m3")
    assert np.all(x < 0)


def test_kink_points_of_an_op_without_pointwise_kinks_are_empty():
    assert kink_points("max_pool2d") == () and kink_points("linear") == ()


def test_families_without_kinks_are_drawn_for_ops_without_kink_points():
    seen = {case.family for case in examples(cases("linear"), 150)}
    assert seen == set(FAMILIES) - {"kinks"}


# ---------------------------------------------------------------------------------------------
# cases for ops with kinks, class indices, keyword arrays and paired arrays; two small ops built
# here (not registered) so that every path is exercised whichever ops are registered

def _no_terms(g, *arrays, **params):
    return {}


def _accept(arrays, params):
    return params


def _clamp_vjp(g, x, **params):
    return {"input": g * ((x > params["min_val"]) & (x < params["max_val"]))}


def _clamp_space(draw):
    min_val = draw.choice("min_val", (-1.0, -2.0))
    length = draw.integer("length", 1, 6)
    return CaseConfig(layer={"min_val": min_val}, params={"min_val": min_val},
                      shapes={"input": (length,)}, bounds={},
                      drawn={"min_val": min_val, "length": length})


def clamp_values(input, *, min_val=-1.0, max_val=1.0):
    """Clamp to [min_val, max_val]."""
    return np.clip(input, min_val, max_val)


CLAMP = Op(clamp_values, vjp=_clamp_vjp, validate=_accept, space=_clamp_space,
           error_terms=_no_terms,
           kinks=(Kink("the clamp bounds", "0", distance=lambda arrays, params: {},
                       points=lambda params: (params["min_val"], params["max_val"])),))


def _scored_space(draw):
    rows, classes = draw.integer("batch", 1, 4), draw.integer("classes", 2, 5)
    return CaseConfig(layer={}, params={}, shapes={"input": (rows, classes),
                                                   "target": (rows, classes), "labels": (rows,),
                                                   "running_var": (classes,)},
                      bounds={"labels": (0, classes), "running_var": (0.5, 2.0)},
                      drawn={"batch": rows, "classes": classes})


def scored(input, target, labels, *, running_var=None):
    """A loss-like op: paired float arrays, class indices and a keyword array."""
    return np.asarray(np.sum((input - target) ** 2 / running_var))


SCORED = Op(scored, vjp=_no_terms, validate=_accept,
            space=_scored_space, error_terms=_no_terms, output_shape=lambda arrays, params: (),
            integer_arrays=("labels",))
OPS_WITH_KINK_POINTS = [CLAMP] + [ops.get(n) for n in ops.names() if kink_points(n)]


@pytest.mark.parametrize("op", OPS_WITH_KINK_POINTS, ids=lambda op: op.name)
def test_kinks_family_puts_inputs_exactly_on_the_drawn_kink_points(op):
    on_points = []
    for case in examples(cases(op, families=["kinks"]), 60):
        # A kink that the format cannot represent is hit at its nearest representable value.
        points = round_to(np.asarray(kink_points(op, case.config.params)), case.format)
        on_points.append(np.isin(case.arrays[0], points).ravel())
    assert np.concatenate(on_points).mean() > 0.6          # three in four by construction


def test_kink_points_follow_the_drawn_parameters():
    # Reference: the clamp's kinks are its bounds (a fact of the op built above).
    assert kink_points(CLAMP) == (-1.0, 1.0)
    assert kink_points(CLAMP, {"min_val": -2.0}) == (-2.0, 1.0)
    assert {c.family for c in examples(cases(CLAMP), 100)} == set(FAMILIES)


def test_configurations_without_kink_points_get_normal_values():
    only_at_minus_one = Op(clamp_values, vjp=_clamp_vjp, validate=_accept, space=_clamp_space,
                           error_terms=_no_terms,
                           kinks=(Kink("lower bound only when it is -1", "0",
                                       distance=lambda arrays, params: {},
                                       points=lambda p: (-1.0,) if p["min_val"] == -1.0 else ()),))
    families = {}
    for case in examples(cases(only_at_minus_one, families=["kinks"]), 60):
        families.setdefault(case.config.params["min_val"], set()).add(case.family)
    assert families == {-1.0: {"kinks"}, -2.0: {"normal"}}


def test_class_indices_keyword_arrays_and_bounds():
    labels_seen = set()
    for case in examples(cases(SCORED), 80):
        input, target, labels = case.arrays
        rows, classes = case.config.drawn["batch"], case.config.drawn["classes"]
        assert labels.dtype.kind == "i" and labels.shape == (rows,)
        assert np.all((0 <= labels) & (labels < classes))
        labels_seen |= {(classes, int(v)) for v in labels}
        variance = case.params["running_var"]
        assert variance.shape == (classes,) and np.all((0.5 <= variance) & (variance <= 2.0))
        assert case.cotangent.shape == ()
    assert {(5, 0), (5, 4), (2, 0), (2, 1)} <= labels_seen   # both ends of every range occur


def test_cancellation_pairs_the_target_with_the_input():
    for case in examples(cases(SCORED, families=["cancellation"]), 30):
        input, target, _ = case.arrays
        # Reference: numpy.spacing of float32, the ulp at each input value.
        ulps = np.abs(target - input) / np.spacing(np.abs(input).astype(np.float32))
        assert np.all(ulps <= 4) and np.any(target != input)


def test_other_families_leave_the_target_independent():
    for case in examples(cases(SCORED, families=["normal"]), 20):
        input, target, _ = case.arrays
        assert not np.allclose(input, target)


# ---------------------------------------------------------------------------------------------
# bad arguments, one table

BAD_CALLS = [
    ("configs-op-not-a-name", lambda: configs(3), TypeError, r"op=3: expected an op name \(str\)"),
    ("configs-unknown-op", lambda: configs("conv2x"), ValueError,
     r"op='conv2x': no op of that name; did you mean conv2d"),
    ("configs-pins-not-a-mapping", lambda: configs("conv2d", pins=[("stride", 1)]), TypeError,
     r"pins=\[\('stride', 1\)\]: expected a mapping .*got list"),
    ("configs-pin-not-drawn", lambda: configs("conv2d", pins={"strides": 2}), PinError,
     r"'strides' is not drawn by the conv2d space; it draws: .*stride"),
    ("configs-max-spatial-zero", lambda: configs("conv2d", max_spatial=0), ValueError,
     r"max_spatial=0: must be >= 1"),
    ("configs-max-spatial-float", lambda: configs("conv2d", max_spatial=2.5), TypeError,
     r"max_spatial=2.5: expected an int or None, got float"),
    ("arrays-shape-str", lambda: value_arrays("3"), TypeError,
     r"shape='3': expected an int or a sequence of ints, got str"),
    ("arrays-shape-negative", lambda: value_arrays((2, -1)), ValueError,
     r"shape=\(2, -1\): every size must be >= 0"),
    ("arrays-family-unknown", lambda: value_arrays(3, family="huge"), ValueError,
     r"family='huge': expected one of 'normal', 'wide'"),
    ("arrays-family-not-str", lambda: value_arrays(3, family=1), TypeError,
     r"family=1: expected a family name \(str\), got int"),
    ("arrays-format-unknown", lambda: value_arrays(3, format="float12"), ValueError,
     r"format='float12': unknown format; expected one of float64"),
    ("arrays-format-dtype", lambda: value_arrays(3, format=np.float32), TypeError,
     r"format=<class 'numpy.float32'>: expected a format name \(str\) or a Format, got type"),
    ("arrays-min-not-real", lambda: value_arrays(3, min_value="0"), TypeError,
     r"min_value='0': expected a real number or None, got str"),
    ("arrays-min-infinite", lambda: value_arrays(3, min_value=-np.inf), ValueError,
     r"min_value=-inf: must be finite and within"),
    ("arrays-max-beyond-format", lambda: value_arrays(3, format="float16", max_value=1e5),
     ValueError,
     r"max_value=100000.0: must be finite and within ±65504 \(float16 max\)"),
    ("arrays-min-above-max", lambda: value_arrays(3, min_value=2, max_value=1), ValueError,
     r"min_value=2.0: must be <= max_value=1.0"),
    ("arrays-no-value-between-bounds", lambda: value_arrays(
        3, format="bfloat16", min_value=1.001, max_value=1.002), ValueError,
     r"no bfloat16 value lies in \[min_value, max_value\] = \[1.001, 1.002\]"),
    ("arrays-kinks-without-points", lambda: value_arrays(3, family="kinks"), TypeError,
     r"points=None: family='kinks' needs a sequence of real kink points, got NoneType"),
    ("arrays-points-outside-bounds", lambda: value_arrays(3, family="kinks", points=[5.0],
                                                          max_value=1.0), ValueError,
     r"points=\[5.0\]: expected at least one finite point in"),
    ("arrays-points-without-kinks", lambda: value_arrays(3, points=[0.0]), ValueError,
     r"points=\[0.0\]: only family='kinks' takes points, not 'normal'"),
    ("arrays-ties-no-integer", lambda: value_arrays(3, family="ties", min_value=0.25,
                                                    max_value=0.75), ValueError,
     r"family='ties': no integer in \[-3, 3\] lies in"),
    ("arrays-negative-above-zero", lambda: value_arrays(3, family="negative", min_value=0),
     ValueError, r"family='negative': min_value=0.0 leaves no negative value"),
    ("arrays-tiny-above-subnormals", lambda: value_arrays(3, family="tiny", min_value=1.0),
     ValueError, r"family='tiny': \[1.0, .*\] holds no float32 subnormal"),
    ("arrays-large-small-bounds", lambda: value_arrays(3, family="large", min_value=-1,
                                                       max_value=1), ValueError,
     r"family='large': \[-1.0, 1.0\] holds no value of magnitude >= 44.36"),
    ("cases-families-str", lambda: cases("linear", families="ties"), TypeError,
     r"families='ties': expected a sequence of family names, got str"),
    ("cases-families-empty", lambda: cases("linear", families=[]), ValueError,
     r"families=\[\]: expected at least one family"),
    ("cases-families-unknown", lambda: cases("linear", families=["normal", "odd"]), ValueError,
     r"family='odd': expected one of"),
    ("cases-kinks-for-op-without-points", lambda: cases("linear", families=["kinks"]), ValueError,
     r"families=\['kinks'\]: linear declares no kink points; drop 'kinks'"),
    ("cases-format-unknown", lambda: cases("linear", format="half"), ValueError,
     r"format='half': unknown format"),
    ("cases-unknown-op", lambda: cases("lineer"), ValueError, r"op='lineer': no op of that name"),
    ("kink-points-params-not-mapping", lambda: kink_points("linear", params=[1]), TypeError,
     r"params=\[1\]: expected a mapping"),
]


@pytest.mark.parametrize("call, kind, message", [row[1:] for row in BAD_CALLS],
                         ids=[row[0] for row in BAD_CALLS])
def test_bad_arguments_are_named(call, kind, message):
    with pytest.raises(kind, match=message):
        call()


def test_public_names_are_documented():
    for name in strategies.__all__:
        assert getattr(strategies, name).__doc__, name
