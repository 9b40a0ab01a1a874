"""Value families for case inputs, chosen by the case generator (numpy only).

Each family is a function ``(rng, shape, fmt, op, params) -> float64 array``; the caller rounds
to the subject's format. Families stay within what the op and the format can represent, so a
finite oracle result is a fair demand on the subject.
"""
from __future__ import annotations

import numpy as np

from ..numerics.formats import get_format

ELEMENTWISE = frozenset({"relu", "relu6", "leaky_relu", "elu", "selu", "celu", "gelu", "silu", "mish",
                         "softplus", "sigmoid", "logsigmoid", "tanh", "atan", "hardtanh", "hardsigmoid",
                         "hardswish", "softsign", "prelu"})
SATURATING = ELEMENTWISE | {"softmax", "log_softmax", "cross_entropy", "binary_cross_entropy_with_logits"}
POOLS = frozenset({"max_pool2d", "avg_pool2d", "adaptive_avg_pool2d", "adaptive_max_pool2d"})


def _normal(rng, shape, fmt, op, params):
    return rng.standard_normal(shape)


def _wide(rng, shape, fmt, op, params):
    """Magnitudes over four decades (two for half formats), random signs."""
    decades = 2.0 if get_format(fmt).fraction_bits < 16 else 4.0
    return rng.choice([-1.0, 1.0], shape) * 10.0 ** rng.uniform(-decades / 2, decades / 2, shape)


def _ties(rng, shape, fmt, op, params):
    """Small integers: many equal values inside one window."""
    return rng.integers(-3, 4, shape).astype(np.float64)


def _negative(rng, shape, fmt, op, params):
    return -np.abs(rng.standard_normal(shape)) - 0.5


def _kinks(rng, shape, fmt, op, params):
    """Three elements in four exactly on a declared kink point, the rest normal."""
    points = [p for kink in op.kinks if kink.points is not None for p in kink.points(params)]
    values = rng.standard_normal(shape)
    if points:
        values = np.where(rng.random(shape) < 0.75, rng.choice(points, shape), values)
    return values


def _large(rng, shape, fmt, op, params):
    """Logit-sized magnitudes (up to 1e3, capped below the format's overflow)."""
    top = min(1e3, get_format(fmt).max / 8)
    return rng.choice([-1.0, 1.0], shape) * rng.uniform(top / 20, top, shape)


def _tiny(rng, shape, fmt, op, params):
    """One element in four a subnormal number of the subject's format (or its smallest normal),
    the rest normal: subnormals must not turn into NaN, infinity or garbage. (A subject that
    treats them as zero changes sums by less than the bound, as accelerators commonly do.)"""
    f = get_format(fmt)
    steps = rng.integers(1, 2 ** min(f.fraction_bits, 20), shape, endpoint=True)
    subnormal = rng.choice([-1.0, 1.0], shape) * np.minimum(steps * f.smallest_subnormal, f.tiny)
    return np.where(rng.random(shape) < 0.25, subnormal, rng.standard_normal(shape))


def _cancellation(rng, shape, fmt, op, params):
    """Nearly equal positive values (1 plus noise at 1/256): sums with mixed-sign weights cancel."""
    return 1.0 + rng.standard_normal(shape) / 256.0


FAMILIES = {"normal": _normal, "wide": _wide, "ties": _ties, "negative": _negative,
            "kinks": _kinks, "large": _large, "tiny": _tiny, "cancellation": _cancellation}
MULTILINEAR = frozenset({"linear", "conv1d", "conv2d", "conv3d", "conv_transpose2d", "avg_pool2d",
                         "adaptive_avg_pool2d"})


def families_for(op) -> tuple[str, ...]:
    """The families that make sense for an op, in the order cases cycle through them."""
    names = ["normal", "wide", "ties"]
    if op.name in POOLS or op.name in ELEMENTWISE:
        names.append("negative")
    if any(k.points is not None for k in op.kinks):
        names.append("kinks")
    if op.name in SATURATING:
        names.append("large")
    names.append("tiny")
    if op.name in MULTILINEAR:
        names.append("cancellation")
    return tuple(names)
