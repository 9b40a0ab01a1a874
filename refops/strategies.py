"""Hypothesis strategies for refops cases: configurations, adversarial values, whole cases.

Three layers, each usable on its own:

- :func:`configs` interprets an op's configuration space (``op.space``) with hypothesis draws
  (:class:`HypothesisDraw`), so every :class:`~refops.ops.CaseConfig` it generates is valid by
  construction, and a failing one shrinks to a small configuration: spaces list their simplest
  option first and draw sizes from their lower bound up, which is where hypothesis shrinks to.
- :func:`value_arrays` generates float64 arrays whose values are representable in a number format
  and follow one value family (table below).
- :func:`cases` puts both together: a configuration, its input arrays, keyword arrays (running
  statistics) and a cotangent of the op's output shape, all representable in the format.

Value families
--------------
==============  ===============================================================================
``normal``      standard normal; uniform on ``[min_value, max_value]`` when both are given,
                a half-normal away from the bound when only one is
``wide``        ``±2**e`` times a significand in [1, 2), ``e`` uniform over the middle half of
                the format's exponent range (``|e| <= max_exponent / 4``), so that products of
                two such values stay finite
``ties``        integers in [-3, 3]: many exact ties (max-pool windows, relu at 0)
``kinks``       three elements in four exactly on the op's declared kink points
                (:func:`kink_points`), the rest standard normal
``large``       magnitudes log-uniform on ``[ln(max) / 2, min(1000, max)]``: across the point
                where ``exp`` overflows in the format (``ln(max)``) up to logits of 1e3
``tiny``        subnormal numbers of the format (multiples of its smallest subnormal below its
                smallest normal)
``cancellation`` a common offset ``c`` (``2**[0, 7)``) plus a few ulps: ``c + j * ulp(c)``,
                ``|j| <= 4`` (variances and differences that cancel); in :func:`cases`, every
                other array of the input's shape (a loss target) is the input plus a few ulps
``negative``    strictly negative values of standard-normal size (no zeros)
==============  ===============================================================================

Values are drawn by a numpy generator seeded from hypothesis, not element by element: arrays of
thousands of elements cost one draw, and shrinking simplifies the configuration and the seed (a
failing example replays exactly). Values outside ``[min_value, max_value]`` are clipped to the
nearest representable value inside, so bounds are edge values that do occur.
"""
from __future__ import annotations

import numbers
from dataclasses import dataclass
from functools import lru_cache
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from hypothesis import strategies as st

from . import ops
from .numerics.formats import Format, get_format, round_to, ulp
from .ops import _checks
from .ops._registry import CaseConfig, Op
from .ops._space import PinError, PinnedDraw, RandomDraw

__all__ = ["FAMILIES", "SPATIAL_NAMES", "Case", "HypothesisDraw", "cases", "configs",
           "kink_points", "value_arrays"]

FAMILIES = ("normal", "wide", "ties", "kinks", "large", "tiny", "cancellation", "negative")
"""The value families, simplest first (the order in which :func:`cases` shrinks them)."""

SPATIAL_NAMES = ("height", "width", "length", "depth")
"""Names of the space draws that ``max_spatial`` caps."""

_SEED = st.integers(0, 2 ** 32 - 1)
_TIE_RANGE = (-3, 3)
_LOGIT_SCALE = 1000.0
_CANCELLATION_ULPS = 4
_KINK_SHARE = 0.75
_PIN_PROBES = 64       # random draws of a space used to learn which names it draws


# ---------------------------------------------------------------------------------------------
# Interpreting a configuration space

class HypothesisDraw(PinnedDraw):
    """The :class:`refops.ops._space.Draw` protocol over hypothesis draws.

    ``draw`` is what ``st.data()`` or ``@st.composite`` provides (a function from a strategy to a
    value). Integers come from ``st.integers``, choices from ``st.sampled_from``, reals from
    ``st.floats``, one hypothesis draw per space draw, so that shrinking walks integers down to
    their lower bound and choices to their first option (spaces put the simplest first). There is
    no extra edge bias: small ranges are drawn about uniformly, and the edge-case frequencies are
    measured in the tests. As in :class:`~refops.ops._space.RandomDraw`, pins are returned as
    given (lists become tuples) and every value is recorded in ``drawn``. ``max_spatial`` caps the
    sizes named in :data:`SPATIAL_NAMES`, never below what the space needs.

    Examples
    --------
    Inside a test, ``@given(st.data())`` and then
    ``config = refops.ops.conv2d.space(HypothesisDraw(data.draw, {"stride": 2}))``.
    """

    def __init__(self, draw: Callable[[st.SearchStrategy], Any],
                 pins: Mapping[str, Any] | None = None, *, max_spatial: int | None = None):
        super().__init__(pins)
        self._draw = draw
        self.max_spatial = max_spatial

    def _integer(self, name: str, low: int, high: int) -> int:
        if self.max_spatial is not None and name in SPATIAL_NAMES:
            high = max(low, min(high, self.max_spatial))
        return self._draw(st.integers(low, high))

    def _choice(self, name: str, options: Sequence[Any]) -> Any:
        return self._draw(st.sampled_from(list(options)))

    def _real(self, name: str, low: float, high: float) -> float:
        return self._draw(st.floats(low, high, allow_nan=False, allow_infinity=False))


def configs(op: str | Op, *, pins: Mapping[str, Any] | None = None,
            max_spatial: int | None = None) -> st.SearchStrategy[CaseConfig]:
    """Configurations of ``op``, valid by construction.

    Parameters
    ----------
    op : op name or :class:`~refops.ops.Op`
    pins : mapping, optional
        ``{name: value}`` fixed instead of drawn (what ``--set NAME=VALUE`` does); every name must
        be one the space draws. Default: nothing pinned.
    max_spatial : int >= 1, optional
        Cap on the input sizes ``height``, ``width``, ``length``, ``depth`` (never below what a
        kernel needs). Default: the space's own limits.

    Examples
    --------
    ``configs("conv2d", pins={"kernel_size": 3})``; ``configs("max_pool2d", max_spatial=5)``.
    """
    op = _check_op(op)
    pins = _check_pins(pins, op)
    max_spatial = _check_cap("max_spatial", max_spatial)
    return _configs(op, pins, max_spatial)


@st.composite
def _configs(draw, op: Op, pins: dict, max_spatial: int | None) -> CaseConfig:
    return op.space(HypothesisDraw(draw, pins, max_spatial=max_spatial))


# ---------------------------------------------------------------------------------------------
# Value families

def value_arrays(shape: int | Sequence[int], *, family: str = "normal", format: Any = "float32",
                 min_value: float | None = None, max_value: float | None = None,
                 points: Sequence[float] | None = None) -> st.SearchStrategy[np.ndarray]:
    """Float64 arrays of ``shape`` whose values are representable in ``format``.

    Parameters
    ----------
    shape : int or sequence of ints >= 0
    family : str
        One of :data:`FAMILIES` (see the module docstring). Default ``"normal"``.
    format : format name or :class:`~refops.numerics.formats.Format`
        Default ``"float32"``.
    min_value, max_value : float, optional
        Inclusive bounds; values beyond them are clipped to the nearest representable value
        inside. Default: the format's largest finite magnitude, ``-max`` and ``max``.
    points : sequence of floats
        The kink points; required by (and only by) ``family="kinks"``.

    Returns
    -------
    A strategy of float64 arrays of exactly ``shape``.
    """
    make = _array_maker(shape, family=family, format=format, min_value=min_value,
                        max_value=max_value, points=points)
    return _SEED.map(lambda seed: make(np.random.default_rng(seed)))


def _array_maker(shape: Any, *, family: Any, format: Any, min_value: Any, max_value: Any,
                 points: Any) -> Callable[[np.random.Generator], np.ndarray]:
    """Validate the arguments of :func:`value_arrays`; return ``make(rng) -> array``."""
    shape = _check_shape(shape)
    family = _check_family(family)
    fmt = _check_format(format)
    low, high = _check_bounds(min_value, max_value, fmt)
    points = _check_points(points, family, low, high)
    _check_family_fits(family, low, high, fmt)
    generate = _GENERATORS[family]
    return lambda rng: _finish(generate(rng, shape, fmt, low, high, points), fmt, low, high)


def kink_points(op: str | Op, params: Mapping[str, Any] | None = None) -> tuple[float, ...]:
    """The input values where ``op`` has declared kinks, for parameters ``params``, sorted.

    Unpinned parameters take the op's defaults; ops whose kinks are not at fixed input values
    (max-pool ties) contribute none.
    """
    op = _check_op(op)
    params = {**op.defaults, **_check_mapping("params", params)}
    found = {float(p) for kink in op.kinks if kink.points is not None for p in kink.points(params)}
    return tuple(sorted(found))


def _finish(values: np.ndarray, fmt: Format, low: float, high: float) -> np.ndarray:
    return np.clip(round_to(values, fmt), low, high)


def _signs(rng: np.random.Generator, shape: tuple, low: float, high: float) -> np.ndarray:
    """Random signs, restricted to the signs that ``[low, high]`` allows."""
    if low >= 0:
        return np.ones(shape)
    if high <= 0:
        return -np.ones(shape)
    return rng.choice((-1.0, 1.0), size=shape)


def _normal(rng, shape, fmt, low, high, points):
    """Standard normal; uniform between two bounds; a half-normal away from a single bound."""
    has_low, has_high = low > -fmt.max, high < fmt.max
    if has_low and has_high:
        return rng.uniform(low, high, size=shape)
    z = rng.standard_normal(shape)
    return low + np.abs(z) if has_low else high - np.abs(z) if has_high else z


def _wide(rng, shape, fmt, low, high, points):
    reach = fmt.max_exponent // 4
    exponent = rng.integers(-reach, reach + 1, size=shape)
    return _signs(rng, shape, low, high) * np.ldexp(rng.uniform(1.0, 2.0, size=shape), exponent)


def _ties(rng, shape, fmt, low, high, points):
    return rng.integers(*_tie_range(low, high), endpoint=True, size=shape).astype(np.float64)


def _kinks(rng, shape, fmt, low, high, points):
    on_kink = rng.random(shape) < _KINK_SHARE
    return np.where(on_kink, rng.choice(np.asarray(points), size=shape), rng.standard_normal(shape))


def _large(rng, shape, fmt, low, high, points):
    low_mag, high_mag = _large_range(fmt)
    magnitude = np.exp(rng.uniform(np.log(low_mag), np.log(high_mag), size=shape))
    return _signs(rng, shape, low, high) * magnitude


def _tiny(rng, shape, fmt, low, high, points):
    steps = int(round(fmt.tiny / fmt.smallest_subnormal))
    count = rng.integers(1, steps, size=shape)
    return _signs(rng, shape, low, high) * count * fmt.smallest_subnormal


def _cancellation(rng, shape, fmt, low, high, points):
    offset = _signs(rng, (), low, high) * 2.0 ** rng.uniform(0, 7)
    offset = round_to(np.clip(offset, low, high), fmt)
    return offset + _few_ulps(rng, np.broadcast_to(offset, shape), fmt)


def _negative(rng, shape, fmt, low, high, points):
    return -np.maximum(np.abs(rng.standard_normal(shape)), fmt.tiny)


_GENERATORS = {"normal": _normal, "wide": _wide, "ties": _ties, "kinks": _kinks,
               "large": _large, "tiny": _tiny, "cancellation": _cancellation,
               "negative": _negative}


def _few_ulps(rng: np.random.Generator, base: np.ndarray, fmt: Format) -> np.ndarray:
    """``j * ulp(base)`` with ``|j| <= 4`` per element: a nearby value, a few roundings away."""
    steps = rng.integers(-_CANCELLATION_ULPS, _CANCELLATION_ULPS, endpoint=True, size=base.shape)
    return steps * ulp(base, fmt)


def _tie_range(low: float, high: float) -> tuple[int, int]:
    return max(_TIE_RANGE[0], int(np.ceil(low))), min(_TIE_RANGE[1], int(np.floor(high)))


def _large_range(fmt: Format) -> tuple[float, float]:
    return np.log(fmt.max) / 2, min(_LOGIT_SCALE, fmt.max)


# ---------------------------------------------------------------------------------------------
# Whole cases

@dataclass(frozen=True)
class Case:
    """One generated case: what a subject and the oracle are both run on.

    ``arrays`` are the op's positional arrays in order (``None`` for an omitted optional one);
    ``params`` its keyword parameters, keyword arrays (running statistics) included; every float
    array, and ``cotangent`` (of the op's output shape), is representable in ``format``.
    """

    op: str
    config: CaseConfig
    family: str
    format: str
    arrays: tuple
    params: dict
    cotangent: np.ndarray

    def __repr__(self) -> str:
        shapes = ", ".join(f"{name}={'None' if shape is None else tuple(shape)}"
                           for name, shape in self.config.shapes.items())
        return (f"Case({self.op}, family={self.family!r}, format={self.format!r}, "
                f"drawn={self.config.drawn!r}, {shapes})")


def cases(op: str | Op, *, pins: Mapping[str, Any] | None = None,
          families: Sequence[str] | None = None, format: Any = "float32",
          max_spatial: int | None = None) -> st.SearchStrategy[Case]:
    """Whole cases of ``op``: a configuration, its arrays and a cotangent.

    Parameters
    ----------
    op : op name or :class:`~refops.ops.Op`
    pins, max_spatial
        As in :func:`configs`.
    families : sequence of str, optional
        Value families for the op's first array (its input); shrinking prefers the first.
        Default: every family of :data:`FAMILIES`, without ``"kinks"`` for an op that declares no
        kink points.
    format : format name or :class:`~refops.numerics.formats.Format`
        Every float array and the cotangent are representable in it. Default ``"float32"``.

    Notes
    -----
    The input follows the drawn family; other float arrays (weights, biases, targets) are
    ``normal``, except that with ``cancellation`` an array of the input's shape is the input plus a
    few ulps; a configuration whose kinks sit at no fixed input value gets ``normal`` values
    instead of ``kinks``. Arrays with ``bounds`` in the configuration stay inside them: integer
    arrays (class indices) are uniform on ``low <= v < high``, float arrays ``normal`` within
    ``[low, high]``.
    """
    op = _check_op(op)
    pins = _check_pins(pins, op)
    max_spatial = _check_cap("max_spatial", max_spatial)
    fmt = _check_format(format)
    families = _check_families(families, op)
    return _cases(op, pins, max_spatial, fmt, families)


@st.composite
def _cases(draw, op: Op, pins: dict, max_spatial: int | None, fmt: Format,
           families: tuple[str, ...]) -> Case:
    config = draw(_configs(op, pins, max_spatial))
    family = draw(st.sampled_from(families))
    if family == "kinks" and not kink_points(op, config.params):
        family = "normal"          # this configuration puts no kink at a fixed input value
    seed = draw(_SEED)
    values = _case_arrays(seed, op, config, family, fmt)
    arrays = tuple(values.get(name) for name in op.arrays)
    params = {**config.params, **{k: v for k, v in values.items() if k in op.defaults}}
    out_shape = op.output_shape(*arrays, **params)
    cotangent = _array_maker(out_shape, family="normal", format=fmt, min_value=None,
                             max_value=None, points=None)(_stream(seed, len(values)))
    return Case(op=op.name, config=config, family=family, format=fmt.name, arrays=arrays,
                params=params, cotangent=cotangent)


def _stream(seed: int, index: int) -> np.random.Generator:
    """An independent generator per array of a case (one seed, so one shrinkable draw)."""
    return np.random.default_rng([seed, index])


def _case_arrays(seed: int, op: Op, config: CaseConfig, family: str, fmt: Format) -> dict:
    """Every array of ``config.shapes`` by name (``None`` where the shape is ``None``)."""
    lead = _leading_array(op, config)
    points = kink_points(op, config.params) if family == "kinks" else None
    names = [*(n for n in op.arrays if n in config.shapes),
             *(n for n in config.shapes if n not in op.arrays)]
    values = {}
    for index, name in enumerate(names):
        shape, bounds, rng = config.shapes[name], config.bounds.get(name), _stream(seed, index)
        if shape is None:
            values[name] = None
        elif name in op.integer_arrays:
            values[name] = _class_indices(rng, op, name, shape, bounds)
        elif family == "cancellation" and lead in values and tuple(shape) == values[lead].shape \
                and bounds is None:
            values[name] = round_to(values[lead] + _few_ulps(rng, values[lead], fmt), fmt)
        else:
            low, high = (None, None) if bounds is None else bounds
            family_here, points_here = (family, points) if name == lead else ("normal", None)
            values[name] = _array_maker(shape, family=family_here, format=fmt, min_value=low,
                                        max_value=high, points=points_here)(rng)
    return values


def _leading_array(op: Op, config: CaseConfig) -> str | None:
    """The first unbounded float array of the op (its input), which carries the value family."""
    for name in op.arrays:
        if (name not in op.integer_arrays and name not in config.bounds
                and config.shapes.get(name) is not None):
            return name
    return None


def _class_indices(rng: np.random.Generator, op: Op, name: str, shape: tuple,
                   bounds: Any) -> np.ndarray:
    if bounds is None:
        raise ValueError(f"{op.name}: the configuration gives no bounds for the integer array "
                         f"{name!r} (class indices need (low, high))")
    return rng.integers(bounds[0], bounds[1], size=shape)


# ---------------------------------------------------------------------------------------------
# Argument checkers (name, value and type in every message)

def _check_op(value: Any) -> Op:
    if isinstance(value, Op):
        return value
    if not isinstance(value, str):
        _checks.fail("op", value, f"expected an op name (str) or a refops op, "
                     f"got {type(value).__name__}", TypeError)
    try:
        return ops.get(value)
    except ops.UnknownOpError as error:
        _checks.fail("op", value, str(error).partition(": ")[2])


def _check_mapping(name: str, value: Any) -> dict:
    if value is None:
        return {}
    if not isinstance(value, Mapping) or not all(isinstance(k, str) for k in value):
        _checks.fail(name, value, f"expected a mapping from names (str) to values, "
                     f"got {type(value).__name__}", TypeError)
    return dict(value)


def _check_pins(value: Any, op: Op) -> dict:
    pins = _check_mapping("pins", value)
    unknown = sorted(set(pins) - _drawn_names(op.space))
    if unknown:
        raise PinError(f"pins={_checks.describe(value)}: {unknown[0]!r} is not drawn by the "
                       f"{op.name} space; it draws: {', '.join(sorted(_drawn_names(op.space)))}")
    op.space(RandomDraw(np.random.default_rng(0), pins))   # a pin the space refuses fails here
    return pins


@lru_cache(maxsize=None)
def _drawn_names(space: Callable) -> frozenset[str]:
    """Every name a configuration space asks for, learnt from seeded random draws."""
    found: set[str] = set()
    for seed in range(_PIN_PROBES):
        draw = RandomDraw(np.random.default_rng(seed))
        space(draw)
        found |= set(draw.drawn)
    return frozenset(found)


def _check_cap(name: str, value: Any) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        _checks.fail(name, value, f"expected an int or None, got {type(value).__name__}", TypeError)
    return _checks.as_int(name, value, min_value=1)


def _check_format(value: Any) -> Format:
    if not isinstance(value, (str, Format)):
        _checks.fail("format", value, f"expected a format name (str) or a Format, "
                     f"got {type(value).__name__}", TypeError)
    try:
        return get_format(value)
    except ValueError as error:
        _checks.fail("format", value, str(error).partition(": ")[2])


def _check_family(value: Any) -> str:
    if not isinstance(value, str):
        _checks.fail("family", value, f"expected a family name (str), got {type(value).__name__}",
                     TypeError)
    return _checks.as_choice("family", value, FAMILIES)


def _check_families(value: Any, op: Op) -> tuple[str, ...]:
    has_points = bool(kink_points(op))
    if value is None:
        return tuple(f for f in FAMILIES if f != "kinks" or has_points)
    if isinstance(value, str) or not isinstance(value, Sequence):
        _checks.fail("families", value, f"expected a sequence of family names, "
                     f"got {type(value).__name__}", TypeError)
    if not value:
        _checks.fail("families", value, "expected at least one family")
    families = tuple(_check_family(f) for f in value)
    if "kinks" in families and not has_points:
        _checks.fail("families", value, f"{op.name} declares no kink points; drop 'kinks'")
    return families


def _check_shape(value: Any) -> tuple[int, ...]:
    items = (value,) if isinstance(value, numbers.Integral) else value
    if (isinstance(value, bool) or not isinstance(items, (tuple, list))
            or not all(isinstance(n, numbers.Integral) and not isinstance(n, bool) for n in items)):
        _checks.fail("shape", value, f"expected an int or a sequence of ints, "
                     f"got {type(value).__name__}", TypeError)
    if any(n < 0 for n in items):
        _checks.fail("shape", value, "every size must be >= 0")
    return tuple(int(n) for n in items)


def _check_bound(name: str, value: Any, fmt: Format) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        _checks.fail(name, value, f"expected a real number or None, got {type(value).__name__}",
                     TypeError)
    value = float(value)
    if not np.isfinite(value) or abs(value) > fmt.max:
        _checks.fail(name, value, f"must be finite and within ±{fmt.max:g} ({fmt.name} max)")
    return value


def _check_bounds(min_value: Any, max_value: Any, fmt: Format) -> tuple[float, float]:
    """The representable bounds inside ``[min_value, max_value]`` (defaults ``∓fmt.max``)."""
    low = _check_bound("min_value", min_value, fmt)
    high = _check_bound("max_value", max_value, fmt)
    if low is not None and high is not None and low > high:
        _checks.fail("min_value", low, f"must be <= max_value={high!r}")
    low, high = _inward(low, fmt, up=True), _inward(high, fmt, up=False)
    if low > high:
        _checks.fail("min_value", min_value, f"no {fmt.name} value lies in "
                     f"[min_value, max_value] = [{min_value!r}, {max_value!r}]")
    return low, high


def _inward(bound: float | None, fmt: Format, *, up: bool) -> float:
    """The representable value nearest ``bound`` on its inner side (``up``: at or above it)."""
    if bound is None:
        return -fmt.max if up else fmt.max
    nearest = float(round_to(np.float64(bound), fmt))
    if up and nearest < bound:
        nearest += float(ulp(np.float64(bound), fmt))
    if not up and nearest > bound:
        nearest -= float(ulp(np.float64(bound), fmt))
    return nearest


def _check_points(value: Any, family: str, low: float, high: float) -> np.ndarray | None:
    if family != "kinks":
        if value is not None:
            _checks.fail("points", value, f"only family='kinks' takes points, not {family!r}")
        return None
    if isinstance(value, str) or not isinstance(value, Sequence) or not all(
            isinstance(p, numbers.Real) and not isinstance(p, bool) for p in value):
        _checks.fail("points", value, f"family='kinks' needs a sequence of real kink points, "
                     f"got {type(value).__name__}", TypeError)
    inside = [float(p) for p in value if np.isfinite(p) and low <= p <= high]
    if not inside:
        _checks.fail("points", value, f"expected at least one finite point in [{low!r}, {high!r}]")
    return np.asarray(inside)


def _check_family_fits(family: str, low: float, high: float, fmt: Format) -> None:
    """Refuse bounds that leave a family no value of its own."""
    if family == "ties" and _tie_range(low, high)[0] > _tie_range(low, high)[1]:
        _checks.fail("family", family,
                     f"no integer in {list(_TIE_RANGE)} lies in [{low!r}, {high!r}]")
    if family == "negative" and low >= 0:
        _checks.fail("family", family, f"min_value={low!r} leaves no negative value")
    if family == "tiny" and (low >= fmt.tiny or high <= -fmt.tiny):
        _checks.fail("family", family, f"[{low!r}, {high!r}] holds no {fmt.name} subnormal")
    if family == "large" and max(-low, high) < _large_range(fmt)[0]:
        _checks.fail("family", family, f"[{low!r}, {high!r}] holds no value of magnitude "
                     f">= {_large_range(fmt)[0]:g}")
