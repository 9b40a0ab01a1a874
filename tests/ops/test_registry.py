"""Every registered op is a complete entry: docs, space, vjp, error terms, kinks, purity."""
import inspect

import numpy as np
import pytest

import refops.ops as ops
from refops.ops._space import RandomDraw, plain_arrays

SECTIONS = ("Formula", "Output shape", "Non-differentiable points")


def drawn_cases(op, count=4):
    for seed in range(count):
        config = op.space(RandomDraw(np.random.default_rng(seed)))
        arrays, params = plain_arrays(op, config, np.random.default_rng(100 + seed))
        yield config, arrays, params


@pytest.mark.parametrize("name", ops.names())
def test_docstring_states_formula_output_shape_and_kinks(name):
    op = ops.get(name)
    for title in SECTIONS:
        assert op.doc_section(title), f"{name}: docstring lacks a {title!r} section"


@pytest.mark.parametrize("name", ops.names())
def test_entry_is_complete_and_consistent(name):
    op = ops.get(name)
    assert getattr(ops, name) is op
    assert isinstance(op.kinks, tuple) and all(isinstance(k, ops.Kink) for k in op.kinks)
    for kink in op.kinks:
        assert kink.description and kink.derivative
    for config, arrays, params in drawn_cases(op):
        assert set(config.layer) <= set(config.drawn) | set(config.layer)
        out = op(*arrays, **params)
        assert out.dtype == np.float64
        assert out.shape == op.output_shape(*arrays, **params)
        g = np.random.default_rng(7).standard_normal(out.shape)
        grads = op.vjp(g, *arrays, **params)
        given = {n for n, a in zip(op.arrays, arrays) if a is not None and n in op.differentiable}
        assert set(grads) == given
        for key, grad in grads.items():
            assert grad.shape == np.shape(arrays[op.arrays.index(key)]) and grad.dtype == np.float64
        terms = op.error_terms(g, *arrays, **params)
        assert set(terms) == {"output"} | set(grads)
        for key, term in terms.items():
            shape = out.shape if key == "output" else np.shape(arrays[op.arrays.index(key)])
            for part in (term.magnitude, term.length, term.rounded):
                assert np.all(np.broadcast_to(part, shape) >= 0), f"{name}: {key} term negative"
            assert term.accumulate in ("wide", "io")
        distance = op.kink_distance(*arrays, **params)
        assert set(distance) == given


@pytest.mark.parametrize("name", ops.names())
def test_oracles_never_modify_their_arguments(name):
    op = ops.get(name)
    for _, arrays, params in drawn_cases(op, count=2):
        arrays = tuple(None if a is None else a.astype(np.float32) if a.dtype.kind == "f" else a
                       for a in arrays)
        saved = [None if a is None else a.copy() for a in arrays]
        out = op(*arrays, **params)
        op.vjp(np.ones_like(out), *arrays, **params)
        for before, after in zip(saved, arrays):
            if before is not None:
                np.testing.assert_array_equal(before, after)
                assert before.dtype == after.dtype


@pytest.mark.parametrize("name", ops.names())
def test_unknown_and_missing_parameters_are_named(name):
    op = ops.get(name)
    config, arrays, params = next(drawn_cases(op, count=1))
    with pytest.raises(TypeError, match=r"unknown parameter not_a_param=3"):
        op(*arrays, **params, not_a_param=3)
    required = [k for k, v in op.defaults.items() if v is inspect.Parameter.empty]
    if required:
        with pytest.raises(TypeError, match=required[0]):
            op(*arrays, **{k: v for k, v in params.items() if k != required[0]})


def test_lookup_of_an_unknown_op_suggests_close_names():
    with pytest.raises(KeyError, match=r"name='conv2': no op of that name; did you mean conv2d"):
        ops.get("conv2")
