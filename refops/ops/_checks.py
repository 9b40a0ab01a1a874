"""Argument checkers shared by every oracle.

Each checker names the argument, echoes the value it received and says what was expected, so
that a bad call reads like ``stride=(0, 1): every entry must be >= 1``. They raise ``ValueError``
for a wrong value and ``TypeError`` for a wrong kind of value; nothing else escapes an oracle.
"""
from __future__ import annotations

import numbers
from typing import Any, Sequence

import numpy as np


def describe(value: Any) -> str:
    """A short rendering of a value for an error message (arrays by shape and dtype)."""
    if isinstance(value, np.ndarray):
        return f"array(shape={value.shape}, dtype={value.dtype})"
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def fail(name: str, value: Any, expected: str, kind: type[Exception] = ValueError) -> None:
    """Raise ``kind`` with the standard message ``name=value: expected``."""
    raise kind(f"{name}={describe(value)}: {expected}")


def as_float_array(name: str, value: Any) -> np.ndarray:
    """A float64 copy of a real floating-point, finite array argument."""
    if isinstance(value, (list, tuple, numbers.Real)) and not isinstance(value, bool):
        value = np.asarray(value)
    if not isinstance(value, np.ndarray):
        fail(name, value, f"expected a numpy array, got {type(value).__name__} "
             "(convert with numpy.asarray)", TypeError)
    if value.dtype.kind != "f":
        fail(name, value, "expected a real floating-point dtype "
             "(float16/float32/float64; cast with .astype(numpy.float64))", TypeError)
    # One cheap pass: a sum is finite only if every element is (an overflow falls back to the full check).
    if not np.isfinite(np.sum(value, dtype=np.float64)) and not np.all(np.isfinite(value)):
        bad = np.argwhere(~np.isfinite(value))[0]
        fail(name, value, f"contains a non-finite value at index {tuple(int(i) for i in bad)}")
    return read_only_float64(value)


def read_only_float64(value: np.ndarray) -> np.ndarray:
    """A float64 array the oracle cannot write to: a read-only view of float64 input (no copy),
    a converted copy of any other float dtype. Oracles never modify their arguments."""
    if value.dtype == np.float64:
        view = value.view()
    else:
        view = value.astype(np.float64)
    view.flags.writeable = False
    return view


def as_integer_array(name: str, value: Any) -> np.ndarray:
    """An int64 copy of an integer array argument (class indices)."""
    if isinstance(value, (list, tuple, numbers.Integral)) and not isinstance(value, bool):
        value = np.asarray(value)
    if not isinstance(value, np.ndarray):
        fail(name, value, f"expected a numpy integer array, got {type(value).__name__}", TypeError)
    if value.dtype.kind not in "iu":
        fail(name, value, "expected an integer dtype (class indices)", TypeError)
    return np.array(value, dtype=np.int64, copy=True)


def check_rank(name: str, array: np.ndarray, ranks: Sequence[int], meaning: str) -> None:
    """Require ``array.ndim`` to be one of ``ranks``; ``meaning`` spells out the layout."""
    if array.ndim not in ranks:
        allowed = " or ".join(str(r) for r in ranks)
        fail(name, array, f"expected {allowed} dimensions {meaning}, got {array.ndim}")


def as_int(name: str, value: Any, *, min_value: int | None = None) -> int:
    """An int parameter (bools refused), optionally bounded below."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        fail(name, value, "expected an int", TypeError)
    value = int(value)
    if min_value is not None and value < min_value:
        fail(name, value, f"must be >= {min_value}")
    return value


def as_real(name: str, value: Any, *, positive: bool = False) -> float:
    """A finite real parameter, optionally required to be > 0."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        fail(name, value, "expected a real number", TypeError)
    value = float(value)
    if not np.isfinite(value):
        fail(name, value, "must be finite")
    if positive and value <= 0:
        fail(name, value, "must be > 0")
    return value


def as_bool(name: str, value: Any) -> bool:
    """A bool parameter (0/1 and numpy bools accepted, nothing else)."""
    if isinstance(value, (bool, np.bool_)) or (isinstance(value, numbers.Integral) and value in (0, 1)):
        return bool(value)
    fail(name, value, "expected True or False", TypeError)


def as_choice(name: str, value: Any, choices: Sequence[str]) -> str:
    """One of a fixed set of strings."""
    if value not in choices:
        options = ", ".join(repr(c) for c in choices)
        fail(name, value, f"expected one of {options}")
    return value


def as_int_tuple(name: str, value: Any, n: int, *, min_value: int) -> tuple[int, ...]:
    """Expand an int or a length-``n`` sequence of ints to an ``n``-tuple, each >= ``min_value``.

    This is the one place where the per-dimension forms of stride, dilation, kernel size and
    padding are expanded.
    """
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        items = (int(value),) * n
    elif isinstance(value, (tuple, list)) and all(
            isinstance(v, numbers.Integral) and not isinstance(v, bool) for v in value):
        if len(value) != n:
            fail(name, value, f"expected an int or a sequence of {n} ints, got {len(value)} entries")
        items = tuple(int(v) for v in value)
    else:
        fail(name, value, f"expected an int or a sequence of {n} ints", TypeError)
    if any(v < min_value for v in items):
        fail(name, value, f"every entry must be >= {min_value}")
    return items


def check_shape(name: str, array: np.ndarray, shape: tuple[int, ...], why: str) -> None:
    """Require an exact shape; ``why`` says where the expected shape comes from."""
    if tuple(array.shape) != tuple(shape):
        fail(name, array, f"expected shape {tuple(shape)} ({why}), got {tuple(array.shape)}")
