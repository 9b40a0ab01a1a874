"""Tolerance models: how far a subject may be from the oracle, per element.

Every model answers ``allowed(reference, terms, fmt, *, tensor=None) -> array`` (an allowed
absolute error per element of ``reference``) and ``describe() -> str`` (one line for reports).

- :class:`RoundingBound` (the default) derives the bound from rounding-error analysis, using the
  :class:`~refops.ops.ErrorTerms` that each oracle reports for its output and gradients.
- :class:`Fixed` is the familiar ``atol + rtol * |reference|``.
- :class:`Calibrated` scales errors observed on a trusted implementation.
"""
from __future__ import annotations

from typing import Any, Mapping, Protocol

import numpy as np

from ..ops import _checks
from ..ops._registry import ErrorTerms
from .formats import Format, accumulator_for, get_format

__all__ = ["ToleranceModel", "RoundingBound", "Fixed", "Calibrated", "DEFAULT_CONFIDENCE_LAMBDA",
           "default_floor"]

# lambda in c(k) = lambda * sqrt(k). The k rounding errors delta_i of a recursive sum are bounded
# by u and have mean zero under the probabilistic model, so by the Azuma-Hoeffding inequality
# |sum delta_i s_i| <= lambda * u * sqrt(sum s_i^2) <= lambda * sqrt(k) * u * M fails with
# probability at most 2 exp(-lambda^2 / 2) per element (the argument of Higham & Mary 2019).
# lambda = 5 puts that at 7.5e-6, a worst case over every error distribution; real rounding
# errors (variance about u^2 / 3, partial sums mostly below M) sit far inside it, and the sweep in
# tests/numerics/test_tolerance.py over hundreds of torch cases uses at most a small share of it.
DEFAULT_CONFIDENCE_LAMBDA = 5.0



def default_floor(fmt: Format) -> float:
    """``eps * tiny``, one subnormal spacing: twice the error ``u * tiny`` of rounding a result
    that lands in the subnormal range (gradual underflow; sums of subnormals are exact).
    Implementations that flush subnormals to zero need ``floor=fmt.tiny`` instead."""
    return fmt.eps * fmt.tiny


class ToleranceModel(Protocol):
    """The interface shared by every tolerance model."""

    def allowed(self, reference: np.ndarray, terms: ErrorTerms, fmt: Format, *,
                tensor: str | None = None) -> np.ndarray: ...

    def describe(self) -> str: ...


def _term(name: str, value: Any, shape: tuple[int, ...]) -> np.ndarray:
    """An error-term entry as a float64 array broadcast to ``shape``, checked to be >= 0."""
    array = np.asarray(value, dtype=np.float64)
    try:
        array = np.broadcast_to(array, shape)
    except ValueError:
        _checks.fail(name, array, f"does not broadcast to the reference shape {shape}")
    if np.any(array < 0) or np.any(np.isnan(array)):
        _checks.fail(name, array, "must be >= 0 everywhere (a magnitude or a term count)")
    return array


def _reference(reference: Any) -> np.ndarray:
    if not isinstance(reference, np.ndarray) or reference.dtype.kind != "f":
        _checks.fail("reference", reference, "expected a real floating-point numpy array", TypeError)
    return reference.astype(np.float64, copy=False)


class RoundingBound:
    """``u_out * (|ref| + S) + c(k) * u_acc * M + floor``, per element.

    Parameters
    ----------
    growth : {"probabilistic", "worst"}
        ``c(k) = lambda * sqrt(k)`` (Higham & Mary 2019), or ``gamma_k = k u / (1 - k u)`` with
        ``u = u_acc`` (Higham 2002, ch. 3); where ``k u_acc >= 1`` the worst-case bound is
        infinite (no guarantee).
    confidence_lambda : float
        The ``lambda`` of the probabilistic growth (default 5, see ``DEFAULT_CONFIDENCE_LAMBDA``).
    accumulator : format name, Format or None
        The format sums are carried in when ``terms.accumulate == "wide"``; None means
        :func:`~refops.numerics.formats.accumulator_for` the subject's format (float32 for the
        half and 8-bit formats). With ``accumulate == "io"`` sums are carried in the I/O format:
        ``u_acc = max(u_accumulator, u_out)``.
    floor : float or None
        Absolute floor; None means :func:`default_floor` ``= eps * tiny`` of the format (one
        subnormal spacing; pass ``fmt.tiny`` for a device that flushes subnormals to zero).

    Notes
    -----
    ``u_out * |ref|`` is the final rounding to the output format; ``u_out * S`` covers
    intermediates rounded to the I/O format (``S`` = ``terms.rounded``); the middle term is the
    accumulated error of a sum of ``k`` terms whose absolute values add up to ``M``.
    """

    def __init__(self, *, growth: str = "probabilistic",
                 confidence_lambda: float = DEFAULT_CONFIDENCE_LAMBDA,
                 accumulator: Any = None, floor: float | None = None):
        self.growth = _checks.as_choice("growth", growth, ("probabilistic", "worst"))
        self.confidence_lambda = _checks.as_real("confidence_lambda", confidence_lambda,
                                                 positive=True)
        self.accumulator = None if accumulator is None else get_format(accumulator)
        self.floor = None if floor is None else _nonnegative("floor", floor)

    def growth_factor(self, length: np.ndarray, u_acc: float) -> np.ndarray:
        """``c(k)``, so that ``c(k) * u_acc * M`` bounds the accumulated error."""
        if self.growth == "probabilistic":
            return self.confidence_lambda * np.sqrt(length)
        ku = length * u_acc
        with np.errstate(divide="ignore"):
            return np.where(ku < 1, length / np.where(ku < 1, 1 - ku, 1.0), np.inf)

    def accumulator_roundoff(self, terms: ErrorTerms, fmt: Format) -> float:
        """``u_acc`` for these terms: the accumulator's, or the I/O format's for ``"io"`` sums."""
        accumulator = self.accumulator or accumulator_for(fmt)
        accumulate = _checks.as_choice("terms.accumulate", terms.accumulate, ("wide", "io"))
        if accumulate == "io":
            return max(accumulator.unit_roundoff, fmt.unit_roundoff)
        return accumulator.unit_roundoff

    def floor_for(self, fmt: Format) -> float:
        return default_floor(fmt) if self.floor is None else self.floor

    def allowed(self, reference: np.ndarray, terms: ErrorTerms, fmt: Any, *,
                tensor: str | None = None) -> np.ndarray:
        fmt = get_format(fmt)
        reference = _reference(reference)
        shape = reference.shape
        magnitude = _term("terms.magnitude", terms.magnitude, shape)
        length = _term("terms.length", terms.length, shape)
        rounded = _term("terms.rounded", terms.rounded, shape)
        u_acc = self.accumulator_roundoff(terms, fmt)
        with np.errstate(invalid="ignore"):
            accumulated = np.where(magnitude > 0, self.growth_factor(length, u_acc) * u_acc
                                   * magnitude, 0.0)
        scale = np.where(np.isfinite(reference), np.abs(reference), 0.0)
        return fmt.unit_roundoff * (scale + rounded) + accumulated + self.floor_for(fmt)

    def describe(self) -> str:
        c = (f"{self.confidence_lambda:g}*sqrt(k)" if self.growth == "probabilistic"
             else "gamma_k=k*u/(1-k*u)")
        acc = self.accumulator.name if self.accumulator else "float32 for narrower formats"
        floor = "eps*tiny" if self.floor is None else f"{self.floor:g}"
        return (f"rounding bound ({self.growth}): u_out*(|ref|+S) + {c}*u_acc*M + {floor}; "
                f"u_acc from accumulator {acc} ('wide' sums) or the I/O format ('io' sums)")


def _nonnegative(name: str, value: Any) -> float:
    value = _checks.as_real(name, value)
    if value < 0:
        _checks.fail(name, value, "must be >= 0")
    return value


class Fixed:
    """``atol + rtol * |reference|``, the same for every format."""

    def __init__(self, *, atol: float, rtol: float):
        self.atol = _nonnegative("atol", atol)
        self.rtol = _nonnegative("rtol", rtol)

    def allowed(self, reference: np.ndarray, terms: ErrorTerms | None = None, fmt: Any = None, *,
                tensor: str | None = None) -> np.ndarray:
        reference = _reference(reference)
        scale = np.where(np.isfinite(reference), np.abs(reference), 0.0)
        return self.atol + self.rtol * scale

    def describe(self) -> str:
        return f"fixed: atol={self.atol:g} + rtol={self.rtol:g}*|ref|"


class Calibrated:
    """``factor * observed[tensor] + floor``: errors seen on a trusted implementation, scaled.

    Parameters
    ----------
    observed : mapping of tensor name (``"output"``, ``"input"``, ...) to an error
        A scalar (the largest error seen) or an array broadcastable to the tensor's shape.
    factor : float
        Headroom over what was observed (default 4).
    floor : float or None
        Absolute floor; None means :func:`default_floor` of the format.
    bound : tolerance model or None
        When given, ``observed`` is in units of this model's bound (the share of it the trusted
        run used, pooled over cases) and the allowed error is ``factor * observed * bound + floor``:
        it follows each case's magnitudes and reduction lengths instead of one case's error.
    """

    def __init__(self, observed: Mapping[str, Any], *, factor: float = 4.0,
                 floor: float | None = None, bound: ToleranceModel | None = None):
        if not isinstance(observed, Mapping) or not observed:
            _checks.fail("observed", observed, "expected a non-empty mapping of tensor name to "
                         "observed error", TypeError)
        self.observed = {str(k): np.asarray(v, dtype=np.float64) for k, v in observed.items()}
        for name, value in self.observed.items():
            if np.any(~np.isfinite(value)) or np.any(value < 0):
                _checks.fail(f"observed[{name!r}]", value, "must be finite and >= 0")
        self.factor = _checks.as_real("factor", factor, positive=True)
        self.floor = None if floor is None else _nonnegative("floor", floor)
        if bound is not None and not callable(getattr(bound, "allowed", None)):
            _checks.fail("bound", bound, "expected a tolerance model (with an allowed method)", TypeError)
        self.bound = bound

    def allowed(self, reference: np.ndarray, terms: ErrorTerms | None = None, fmt: Any = None, *,
                tensor: str | None = None) -> np.ndarray:
        reference = _reference(reference)
        if tensor not in self.observed:
            _checks.fail("tensor", tensor, f"no observed error for it; known: "
                         f"{', '.join(self.observed)}")
        observed = _term(f"observed[{tensor!r}]", self.observed[tensor], reference.shape)
        if self.bound is not None:
            observed = observed * self.bound.allowed(reference, terms, fmt, tensor=tensor)
        floor = default_floor(get_format(fmt or "float64")) if self.floor is None else self.floor
        return self.factor * observed + floor

    def describe(self) -> str:
        floor = "eps*tiny" if self.floor is None else f"{self.floor:g}"
        if self.bound is None:
            return (f"calibrated: {self.factor:g}*observed + {floor}, observed for "
                    f"{', '.join(self.observed)}")
        shares = ", ".join(f"{k} {float(np.max(v)):.3g}" for k, v in self.observed.items())
        return (f"calibrated: {self.factor:g}*observed*bound + {floor}, observed = the share of the "
                f"bound the trusted run used ({shares}); bound: {self.bound.describe()}")
