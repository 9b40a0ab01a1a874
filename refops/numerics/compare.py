"""Comparing a subject's tensor with the oracle's under an allowed error per element."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..ops import _checks
from .formats import get_format, ulp, ulp_distance

__all__ = ["Worst", "Comparison", "compare"]


@dataclass
class Worst:
    """One element among those that used the largest share of their allowed error."""

    index: tuple[int, ...]
    subject: float
    reference: float
    error: float
    allowed: float
    ulps: float

    def to_json(self) -> dict:
        return {"index": list(self.index), **{k: _json_float(getattr(self, k)) for k in
                                              ("subject", "reference", "error", "allowed", "ulps")}}


@dataclass
class Comparison:
    """The verdict on one tensor (``"output"`` or a gradient such as ``"input"``).

    ``share`` is ``error / allowed`` per element; an element where exactly one of subject and
    reference is non-finite (or they are different non-finite values) has share ``inf`` and counts
    in ``nonfinite_mismatches`` as well as in ``violations``. ``max_abs``, ``max_rel`` and
    ``max_ulps`` are taken over elements where both are finite; ``max_rel`` divides by
    ``max(|reference|, tiny)`` of the format.
    """

    tensor: str
    shape: tuple[int, ...]
    format: str
    model: str
    max_abs: float
    max_rel: float
    max_ulps: float
    share_max: float
    share_p99: float
    violations: int
    nonfinite_mismatches: int
    worst: list[Worst]
    share: np.ndarray | None = field(default=None, repr=False)

    @property
    def passed(self) -> bool:
        return self.violations == 0

    def to_json(self) -> dict:
        """Plain JSON types; non-finite floats are written as the strings "inf", "-inf", "nan"."""
        return {"tensor": self.tensor, "shape": list(self.shape), "format": self.format,
                "model": self.model, "passed": self.passed,
                **{k: _json_float(getattr(self, k)) for k in
                   ("max_abs", "max_rel", "max_ulps", "share_max", "share_p99")},
                "violations": self.violations, "nonfinite_mismatches": self.nonfinite_mismatches,
                "worst": [w.to_json() for w in self.worst]}


def _json_float(value: float) -> float | str:
    value = float(value)
    return value if np.isfinite(value) else str(value)


def _as_values(name: str, value: Any) -> np.ndarray:
    value = np.asarray(value) if isinstance(value, (list, tuple, float, int)) else value
    if not isinstance(value, np.ndarray) or value.dtype.kind != "f":
        _checks.fail(name, value, "expected a real floating-point numpy array", TypeError)
    return value.astype(np.float64, copy=False)


def _max(values: np.ndarray) -> float:
    return float(values.max()) if values.size else 0.0


def compare(tensor: str, subject: Any, reference: Any, allowed: Any, fmt: Any, *, model: str,
            worst: int = 5) -> Comparison:
    """Compare ``subject`` with ``reference`` element by element.

    Parameters
    ----------
    tensor : str
        Which tensor this is (``"output"``, ``"input"``, ``"weight"``, ...).
    subject, reference : float arrays of the same shape
    allowed : float array broadcastable to that shape (>= 0)
        The allowed absolute error, e.g. from a tolerance model.
    fmt : format name or Format
        The subject's format (for ulp distances and the relative-error floor).
    model : str
        The tolerance model's one-line description, recorded in the verdict.
    worst : int
        How many of the elements with the largest share to keep.

    Notes
    -----
    Infinities of the same sign are equal, as are NaN and NaN; a non-finite value on one side
    only is a violation either way.
    """
    fmt = get_format(fmt)
    if not isinstance(tensor, str):
        _checks.fail("tensor", tensor, "expected a tensor name (str)", TypeError)
    subject = _as_values("subject", subject)
    reference = _as_values("reference", reference)
    _checks.check_shape("subject", subject, reference.shape, "the reference's shape")
    allowed = _as_values("allowed", allowed)
    try:
        allowed = np.broadcast_to(allowed, reference.shape)
    except ValueError:
        _checks.fail("allowed", allowed, f"does not broadcast to the reference shape {reference.shape}")
    if np.any(~(allowed >= 0)):
        _checks.fail("allowed", allowed, "must be >= 0 everywhere (NaN is not allowed)")
    worst = _checks.as_int("worst", worst, min_value=0)

    finite = np.isfinite(subject) & np.isfinite(reference)
    if finite.all():  # the common case: no masks
        same_nonfinite = mismatch = np.zeros(reference.shape, dtype=bool)
        error = np.abs(subject - reference)
        ulps = error / ulp(reference, fmt)
        relative = error / np.maximum(np.abs(reference), fmt.tiny)
    else:
        same_nonfinite = ~finite & ((subject == reference) | (np.isnan(subject) & np.isnan(reference)))
        mismatch = ~finite & ~same_nonfinite
        error = np.abs(np.where(finite, subject, 0.0) - np.where(finite, reference, 0.0))
        ulps = ulp_distance(subject, reference, fmt)
        relative = error / np.maximum(np.abs(np.where(finite, reference, 0.0)), fmt.tiny)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(error > 0, error / allowed, 0.0)
    share = np.where(mismatch, np.inf, share)

    flat_share = share.ravel()
    count = min(worst, flat_share.size)
    candidates = np.argpartition(-flat_share, count - 1)[:count] if count else np.arange(0)
    order = candidates[np.argsort(-flat_share[candidates], kind="stable")]
    picked = [np.unravel_index(int(i), reference.shape) for i in order]
    worst_list = [Worst(index=tuple(int(j) for j in ix), subject=float(subject[ix]),
                        reference=float(reference[ix]),
                        error=float(error[ix]) if finite[ix] else
                        (0.0 if same_nonfinite[ix] else np.inf),
                        allowed=float(allowed[ix]), ulps=float(ulps[ix])) for ix in picked]
    rank = int(np.ceil(0.99 * (flat_share.size - 1)))  # the "higher" 99th percentile
    p99 = float(np.partition(flat_share, rank)[rank]) if flat_share.size else 0.0
    return Comparison(tensor=tensor, shape=tuple(reference.shape), format=fmt.name, model=model,
                      max_abs=_max(error[finite]), max_rel=_max(relative[finite]),
                      max_ulps=_max(ulps[finite]), share_max=_max(flat_share), share_p99=p99,
                      violations=int(np.count_nonzero(share > 1)),
                      nonfinite_mismatches=int(np.count_nonzero(mismatch)),
                      worst=worst_list, share=share)
