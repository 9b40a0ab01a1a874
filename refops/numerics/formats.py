"""Binary floating-point formats: their constants, rounding to them, and ulp arithmetic.

Six formats are known: ``float64``, ``float32``, ``float16`` (IEEE 754-2019 binary64, binary32,
binary16), ``bfloat16`` (8 exponent bits, 7 fraction bits) and the two 8-bit formats of the OCP
8-bit floating point specification, ``float8_e4m3`` (the "fn" variant: no infinities, one NaN
pattern per sign, largest finite 448) and ``float8_e5m2`` (IEEE-like, with infinities).

Everything here works on float64 numpy arrays: :func:`round_to` returns float64 values that are
exactly representable in the target format, so a "bfloat16 array" is a float64 array whose values
happen to be bfloat16 numbers. No framework is imported.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..ops import _checks

__all__ = ["Format", "FORMATS", "get_format", "round_to", "ulp", "ulp_distance", "accumulator_for"]


@dataclass(frozen=True)
class Format:
    """A binary floating-point format with gradual underflow.

    Attributes
    ----------
    name : str
    exponent_bits, fraction_bits : int
        Field widths; the significand has ``fraction_bits + 1`` bits (precision p).
    unit_roundoff : float
        ``u = 2**-p``: the largest relative error of rounding to nearest.
    eps : float
        ``2**(1 - p)``: the distance from 1 to the next larger number.
    max : float
        Largest finite value.
    tiny : float
        Smallest positive normal value, ``2**min_exponent``.
    smallest_subnormal : float
        ``2**(min_exponent - fraction_bits)``.
    saturates : bool
        Overflow (and infinity) rounds to ``±max`` instead of ``±inf``. True for ``float8_e4m3``,
        which has no infinities (see :func:`round_to`).
    """

    name: str
    exponent_bits: int
    fraction_bits: int
    unit_roundoff: float
    eps: float
    max: float
    tiny: float
    smallest_subnormal: float
    saturates: bool

    @property
    def min_exponent(self) -> int:
        """Exponent of the smallest normal binade (``tiny = 2**min_exponent``)."""
        return int(np.frexp(self.tiny)[1]) - 1

    @property
    def max_exponent(self) -> int:
        """Exponent of the largest finite binade."""
        return int(np.frexp(self.max)[1]) - 1

    def __str__(self) -> str:
        return self.name


def _binary_format(name: str, exponent_bits: int, fraction_bits: int, *,
                   max_significand: float | None = None, saturates: bool = False) -> Format:
    """An IEEE-style format; ``max_significand`` overrides ``2 - 2**-t`` for formats (E4M3) that
    spend the top exponent field on finite numbers."""
    bias = 2 ** (exponent_bits - 1) - 1
    if max_significand is None:
        emax, max_significand = bias, 2.0 - 2.0 ** -fraction_bits
    else:
        emax = bias + 1
    return Format(name=name, exponent_bits=exponent_bits, fraction_bits=fraction_bits,
                  unit_roundoff=2.0 ** -(fraction_bits + 1), eps=2.0 ** -fraction_bits,
                  max=float(np.ldexp(max_significand, emax)), tiny=float(np.ldexp(1.0, 1 - bias)),
                  smallest_subnormal=float(np.ldexp(1.0, 1 - bias - fraction_bits)),
                  saturates=saturates)


FORMATS: dict[str, Format] = {
    f.name: f for f in (
        _binary_format("float64", 11, 52),
        _binary_format("float32", 8, 23),
        _binary_format("float16", 5, 10),
        _binary_format("bfloat16", 8, 7),
        # E4M3 "fn": exponent field 1111 holds finite numbers up to 1.75 * 2**8 = 448, only
        # S.1111.111 is NaN; there is no infinity, so overflow saturates.
        _binary_format("float8_e4m3", 4, 3, max_significand=1.75, saturates=True),
        _binary_format("float8_e5m2", 5, 2),
    )
}


def get_format(name_or_format: Any) -> Format:
    """The :class:`Format` called ``name_or_format`` (a :class:`Format` is returned as is)."""
    if isinstance(name_or_format, Format):
        return name_or_format
    if not isinstance(name_or_format, str):
        _checks.fail("fmt", name_or_format, "expected a format name (str) or a Format", TypeError)
    if name_or_format not in FORMATS:
        _checks.fail("fmt", name_or_format, f"unknown format; expected one of {', '.join(FORMATS)}")
    return FORMATS[name_or_format]


def accumulator_for(fmt: Any) -> Format:
    """The format that sums are carried in: float32 for formats narrower than float32.

    Half-precision and 8-bit layers on current hardware accumulate in float32 and round once
    (common practice); float32 and float64 accumulate in their own format.
    """
    fmt = get_format(fmt)
    return FORMATS["float32"] if fmt.fraction_bits < FORMATS["float32"].fraction_bits else fmt


def _as_float64(name: str, x: Any) -> np.ndarray:
    """A float64 array from a real floating-point array or scalar (non-finite values allowed)."""
    if isinstance(x, (int, float, np.floating)) and not isinstance(x, bool):
        x = np.asarray(x, dtype=np.float64)
    if not isinstance(x, np.ndarray):
        _checks.fail(name, x, f"expected a numpy array, got {type(x).__name__}", TypeError)
    if x.dtype.kind != "f":
        _checks.fail(name, x, "expected a real floating-point dtype", TypeError)
    return x.astype(np.float64, copy=False)


_FRACTION_MASK = np.uint64((1 << 52) - 1)
_IMPLICIT_BIT = np.uint64(1 << 52)


def round_to(x: np.ndarray, fmt: Any) -> np.ndarray:
    """Round to the nearest value of ``fmt`` (ties to even), returned as float64.

    Parameters
    ----------
    x : float64 or float32 array (or scalar)
    fmt : format name or :class:`Format`

    Returns
    -------
    float64 array of ``x.shape`` whose values are representable in ``fmt``.

    Notes
    -----
    Rounding is done once, directly from float64, on the integer significand: the 53-bit
    significand of each value is shifted right by the number of bits the target cannot hold
    (more in the target's subnormal range), rounding half to even, then scaled back. There is no
    double rounding through float32 (which a float64 -> float32 -> bfloat16 chain would do).

    Overflow follows the format: IEEE-like formats round values at or beyond
    ``max + ulp(max) / 2`` to ``±inf`` (the tie goes to the even neighbour, which is infinity).
    ``float8_e4m3`` has no infinity; it saturates: every value (and ``±inf``) that rounds beyond
    448 becomes ``±448``, the saturating conversion of the OCP 8-bit specification, which is
    also what a framework's cast to its E4M3 "fn" type does. NaN stays NaN; signed zeros keep
    their sign.
    """
    fmt = get_format(fmt)
    x = _as_float64("x", x)
    if fmt.name == "float64":
        return x.copy()
    if fmt.name in _NATIVE:  # numpy's cast from float64 rounds once, to nearest even, overflow to inf
        with np.errstate(over="ignore"):
            return x.astype(_NATIVE[fmt.name]).astype(np.float64)
    return _round_significand(x, fmt)


_NATIVE = {"float32": np.float32, "float16": np.float16}


def _round_significand(x: np.ndarray, fmt: Format) -> np.ndarray:
    """:func:`round_to` on the integer significand (every format, and the reference of the cast)."""
    bits = np.ascontiguousarray(x).view(np.uint64)
    biased = ((bits >> np.uint64(52)) & np.uint64(0x7FF)).astype(np.int64)
    significand = (bits & _FRACTION_MASK) | _IMPLICIT_BIT
    exponent = biased - 1023                       # x = significand * 2**(exponent - 52)
    # Bits to drop: 52 - t in the normal range, more below tiny; float64 subnormals (biased 0)
    # are far below every target's subnormals and drop everything.
    drop = 52 - fmt.fraction_bits + np.maximum(0, fmt.min_exponent - exponent)
    drop = np.where(biased == 0, 54, np.minimum(drop, 54)).astype(np.uint64)
    kept = significand >> drop
    remainder = significand - (kept << drop)
    half = np.uint64(1) << (drop - np.uint64(1))
    round_up = (remainder > half) | ((remainder == half) & ((kept & np.uint64(1)) == 1))
    kept = kept + round_up.astype(np.uint64)
    with np.errstate(over="ignore"):                 # infinities carry into 2**1024
        magnitude = np.ldexp(kept.astype(np.float64), exponent - 52 + drop.astype(np.int64))
    magnitude = np.where(biased == 0, 0.0, magnitude)
    overflow_value = fmt.max if fmt.saturates else np.inf
    magnitude = np.where(magnitude > fmt.max, overflow_value, magnitude)
    result = np.copysign(magnitude, x)
    return np.where(np.isnan(x), x, result).reshape(x.shape)


def _binade_exponent(x: np.ndarray, fmt: Format) -> np.ndarray:
    """``floor(log2 |x|)`` clipped to the format's exponent range (0 counts as subnormal)."""
    exponent = np.frexp(np.where(np.isfinite(x), x, fmt.max))[1] - 1
    exponent = np.where(x == 0, fmt.min_exponent, exponent)
    return np.clip(exponent, fmt.min_exponent, fmt.max_exponent)


def ulp(x: Any, fmt: Any) -> np.ndarray:
    """The spacing of ``fmt`` at ``|x|``: ``2**(e - t)`` for ``2**e <= |x| < 2**(e+1)``.

    In the subnormal range (and at 0) this is ``smallest_subnormal``; at and beyond the largest
    binade (also for ``±inf``) it is the spacing of the largest binade. A power of two gets the
    spacing above it, as ``numpy.spacing`` does. NaN gives NaN.
    """
    fmt = get_format(fmt)
    x = _as_float64("x", x)
    spacing = np.ldexp(1.0, _binade_exponent(x, fmt) - fmt.fraction_bits)
    return np.where(np.isnan(x), np.nan, spacing)


def ulp_distance(a: Any, b: Any, fmt: Any) -> np.ndarray:
    """``|a - b|`` in ulps of ``fmt`` at the reference ``b``.

    Equal values (including infinities of the same sign, and NaN against NaN) are 0 ulps apart;
    any other pair with a non-finite member is ``inf`` ulps apart.
    """
    fmt = get_format(fmt)
    a, b = np.broadcast_arrays(_as_float64("a", a), _as_float64("b", b))
    finite = np.isfinite(a) & np.isfinite(b)
    with np.errstate(invalid="ignore", over="ignore"):
        distance = np.abs(np.where(finite, a, 0.0) - np.where(finite, b, 0.0)) / ulp(b, fmt)
    same = (a == b) | (np.isnan(a) & np.isnan(b))
    return np.where(same, 0.0, np.where(finite, distance, np.inf))
