"""Oracles of the softmax family: ``softmax`` and ``log_softmax`` over any dim.

Both shift by the maximum before exponentiating, so logits of any size stay finite; the
log-sum-exp is ``m + log(sum(exp(x - m)))``, whose sum is at least 1.
"""
from __future__ import annotations

import numpy as np

from . import _checks
from ._registry import CaseConfig, ErrorTerms, register

__all__ = ["softmax", "log_softmax"]


def normalised_dim(name: str, value, ndim: int) -> int:
    """A dim in ``[-ndim, ndim)`` turned non-negative (the rule for every op with a ``dim``)."""
    dim = _checks.as_int(name, value)
    if not -ndim <= dim < ndim:
        _checks.fail(name, value, f"out of range for an input with {ndim} dimensions "
                     f"(expected {-ndim} <= {name} <= {ndim - 1})")
    return dim % ndim


def _validate(arrays: dict, params: dict) -> dict:
    x = arrays["input"]
    if x.ndim == 0:
        _checks.fail("input", x, "expected at least 1 dimension, got a 0-d array")
    return {"dim": normalised_dim("dim", params["dim"], x.ndim)}


def shifted_logits(x: np.ndarray, dim: int) -> tuple[np.ndarray, np.ndarray]:
    """``(z, log_sum)``: ``z = x - max(x)`` and ``log(sum(exp(z)))`` along ``dim`` (kept)."""
    z = x - np.max(x, axis=dim, keepdims=True)
    return z, np.log(np.sum(np.exp(z), axis=dim, keepdims=True))


def _space(draw) -> CaseConfig:
    rank = draw.integer("rank", 1, 4)
    shape = tuple(draw.integer(f"size{i}", 1, 6) for i in range(rank))
    dim = draw.integer("dim", -rank, rank - 1)
    return CaseConfig(layer={"dim": dim}, params={"dim": dim}, shapes={"input": shape},
                      bounds={}, drawn={"rank": rank, "shape": shape, "dim": dim})


def _softmax_vjp(g, input, *, dim):
    z, log_sum = shifted_logits(input, dim)
    s = np.exp(z - log_sum)
    return {"input": s * (g - np.sum(g * s, axis=dim, keepdims=True))}


def _softmax_error_terms(g, input, *, dim):
    z, log_sum = shifted_logits(input, dim)
    s = np.exp(z - log_sum)
    n = input.shape[dim]
    spread = np.sum(s * np.abs(z), axis=dim, keepdims=True)
    dot = np.sum(g * s, axis=dim, keepdims=True)
    abs_dot = np.sum(np.abs(g) * s, axis=dim, keepdims=True)
    # exp(z) carries a relative error |z| u; the normalising sum spreads sum s |z| u to all.
    output_error = s * (1 + np.abs(z) + spread)
    # Some kernels (torch's CPU half formats along a non-last dim) round exp(z) to the I/O
    # format before normalising: |d s_i / d e_j| e_j summed over j is 2 s_i (1 - s_i).
    exp_rounded = 2 * s * (1 - s)
    # The backward reuses the computed s: its error (output_error) propagates through
    # s (g - dot) and through dot = sum g s; the saved output, rounded to the I/O format after
    # its own rounded intermediates (s + exp_rounded in u_out), adds `rounded`.
    propagated = output_error * np.abs(g - dot) + s * np.sum(output_error * np.abs(g), axis=dim, keepdims=True)
    saved = s + exp_rounded
    return {
        "output": ErrorTerms(output_error, n, rounded=exp_rounded),
        "input": ErrorTerms(s * (np.abs(g) + abs_dot) + propagated, n,
                            rounded=saved * np.abs(g - dot) + s * np.sum(saved * np.abs(g), axis=dim, keepdims=True)),
    }


@register(vjp=_softmax_vjp, validate=_validate, space=_space, error_terms=_softmax_error_terms)
def softmax(input, *, dim):
    """Softmax along ``dim``: ``s_i = exp(x_i - m) / sum_j exp(x_j - m)``, ``m = max_j x_j``.

    Formula
    -------
    ``s = exp(x - m) / sum(exp(x - m))`` along ``dim``.
    vjp: ``grad_input = s * (g - sum(g * s))`` (sums along ``dim``).

    Output shape
    ------------
    ``input.shape``.

    Non-differentiable points
    -------------------------
    none (smooth everywhere).

    Notes
    -----
    Error terms: output M = ``s (1 + |z| + sum s|z|)`` with ``z = x - m`` (exp's conditioning plus
    the normalising sum), k = the length of ``dim``; gradient M = ``s (|g| + sum |g| s)``, k = the
    length of ``dim``; ``rounded`` terms for kernels that round ``exp(z)`` to the I/O format
    (``2 s (1 - s)``) and for backward passes that reuse the rounded saved output.
    """
    z, log_sum = shifted_logits(input, dim)
    return np.exp(z - log_sum)


def _log_softmax_vjp(g, input, *, dim):
    z, log_sum = shifted_logits(input, dim)
    return {"input": g - np.exp(z - log_sum) * np.sum(g, axis=dim, keepdims=True)}


def _log_softmax_error_terms(g, input, *, dim):
    z, log_sum = shifted_logits(input, dim)
    out = z - log_sum
    p = np.exp(out)
    n = input.shape[dim]
    spread = np.sum(p * np.abs(z), axis=dim, keepdims=True)
    total = np.sum(g, axis=dim, keepdims=True)
    abs_total = np.sum(np.abs(g), axis=dim, keepdims=True)
    # torch's CPU half formats (along the last dim) round the sum of exp(z) and its log to the
    # I/O format before subtracting: errors 1 (d log s / d s * s) and |log_sum|.
    lse_rounded = 1 + np.abs(log_sum)
    return {
        # z = x - m is rounded (|z|), and log_sum carries the sum's error (1 + sum p|z|).
        "output": ErrorTerms(np.abs(z) + np.abs(log_sum) + 1 + spread, n, rounded=lse_rounded),
        # exp(out) from the rounded saved output has relative error (|out| + lse_rounded) u_out.
        "input": ErrorTerms(np.abs(g) + p * abs_total, n,
                            rounded=p * np.abs(total) * (1 + np.abs(out) + lse_rounded)),
    }


@register(vjp=_log_softmax_vjp, validate=_validate, space=_space, error_terms=_log_softmax_error_terms)
def log_softmax(input, *, dim):
    """Log-softmax along ``dim``: ``x_i - m - log(sum_j exp(x_j - m))``, ``m = max_j x_j``.

    Formula
    -------
    ``log_softmax(x) = (x - m) - log(sum(exp(x - m)))`` along ``dim``.
    vjp: ``grad_input = g - exp(log_softmax(x)) * sum(g)`` (sums along ``dim``).

    Output shape
    ------------
    ``input.shape``.

    Non-differentiable points
    -------------------------
    none (smooth everywhere).

    Notes
    -----
    Logits of any magnitude (``±1e4`` and beyond) give finite results: the shifted sum is at
    least 1. Error terms: output M = ``|z| + |lse| + 1 + sum p|z|``, k = the length of ``dim``,
    ``rounded`` = ``1 + |lse|`` (the sum and its log rounded to the I/O format before
    subtracting); gradient M = ``|g| + p sum|g|``, ``rounded`` = ``p |sum g| (2 + |out| + |lse|)``
    (the rounded saved output).
    """
    z, log_sum = shifted_logits(input, dim)
    return z - log_sum
