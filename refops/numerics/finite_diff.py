"""Finite differences that carry their own error estimates, and a vjp check built on them.

Three estimators of derivatives of ``f: array -> array``:

- :func:`dense_jacobian`: central differences of every input element, combined by Richardson
  extrapolation over the steps ``h`` and ``2h``; for small inputs. With ``batched=True`` all
  perturbed inputs go to ``f`` in one call as a leading batch axis.
- :func:`complex_step`: ``Im f(x + i h d) / h`` (Squire & Trapp 1998) for functions that accept
  complex input: no subtractive cancellation, so ``h`` can be tiny and the result is exact to
  rounding.
- :func:`directional_check`: for large inputs, compares ``v . (J s)`` from central differences in
  one direction ``s`` with ``(v^T J) . s`` from a vjp.

Error estimates. A central difference with step ``h`` has truncation error ``c h^2`` and rounding
error about ``eps_f / h``, where ``eps_f`` is the noise of one evaluation; ``h = u^(1/3) max(|x|, 1)``
balances the two (Nocedal & Wright 2006, sec. 8.1). With ``D(h)`` and ``D(2h)``, the Richardson
value ``(4 D(h) - D(2h)) / 3`` removes the ``h^2`` term; its error is bounded by the estimate
``|D(h) - D(2h)| / 3`` (the truncation error of ``D(h)``) plus ``1.5 eps_f / h`` (the rounding
noise that the combination amplifies), with ``eps_f = NOISE_FACTOR * u * |f|``.

Kinks. Given each element's distance to the nearest non-differentiable point (as
``Op.kink_distance`` returns it), a stencil whose reach ``2h`` exceeds half that distance is
shrunk to fit; an element where that would take the step below ``h / MAX_SHRINK`` is "not
differentiable here": left out of the check and counted as skipped, never as a failure.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np

from ..ops import _checks
from .formats import get_format

__all__ = ["NOISE_FACTOR", "MAX_SHRINK", "central_step", "Derivative", "dense_jacobian",
           "complex_step", "Probe", "directional_check", "ArrayAgreement", "vjp_fd_agreement"]

# Noise of one evaluation of f, in units of u * |f|: a float64 oracle's sums of a few hundred
# terms are accurate to a few u of their magnitude; 16 covers moderate cancellation.
NOISE_FACTOR = 16.0
# A stencil is shrunk by at most this factor to keep clear of a kink; beyond, the point is skipped.
MAX_SHRINK = 64.0
_LEVELS = (1.0, -1.0, 2.0, -2.0)


def central_step(fmt: Any, x: Any) -> np.ndarray:
    """The central-difference step for each element: ``u^(1/3) * max(|x|, 1)``.

    ``u`` is the unit roundoff of ``fmt``, the format ``f`` is evaluated in (Nocedal & Wright
    2006, sec. 8.1: the step that balances truncation ``h^2`` against rounding ``u / h``).
    """
    fmt = get_format(fmt)
    x = np.asarray(x, dtype=np.float64)
    return fmt.unit_roundoff ** (1.0 / 3.0) * np.maximum(np.abs(x), 1.0)


@dataclass(frozen=True)
class Derivative:
    """A derivative estimate with its own error estimate.

    ``value`` and ``error`` have shape ``out.shape + x.shape`` for a Jacobian, ``out.shape`` for a
    directional derivative. ``skipped`` marks input elements where ``f`` is not differentiable
    within reach of the stencil (their columns of ``value`` are NaN).
    """

    value: np.ndarray
    error: np.ndarray
    skipped: np.ndarray
    method: str


def _as_input(name: str, x: Any) -> np.ndarray:
    if isinstance(x, (float, int)) and not isinstance(x, bool):
        x = np.asarray(x, dtype=np.float64)
    if not isinstance(x, np.ndarray) or x.dtype.kind != "f":
        _checks.fail(name, x, "expected a real floating-point numpy array", TypeError)
    if not np.all(np.isfinite(x)):
        _checks.fail(name, x, "must be finite")
    return x.astype(np.float64)


def _kink_room(name: str, kink_distance: Any, shape: tuple[int, ...]) -> np.ndarray:
    """Per element, the distance to the nearest kink (``inf`` when none is declared)."""
    if kink_distance is None:
        return np.full(shape, np.inf)
    distance = np.asarray(kink_distance, dtype=np.float64)
    if distance.shape != shape or np.any(distance < 0) or np.any(np.isnan(distance)):
        _checks.fail(name, distance, f"expected distances >= 0 of shape {shape}")
    return distance


def _fit_steps(step: np.ndarray, distance: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shrink each step so that the reach ``2|step|`` stays within half the kink distance.

    Returns the fitted steps and the mask of elements that would need more than ``MAX_SHRINK``
    (not differentiable here; their step is set to 0).
    """
    reach = 2.0 * np.abs(step)
    with np.errstate(divide="ignore", invalid="ignore"):
        room = np.where(reach > 0, 0.5 * distance / reach, np.inf)
    skipped = (room < 1.0 / MAX_SHRINK) & (reach > 0)
    return np.where(skipped, 0.0, step * np.minimum(room, 1.0)), skipped


def _evaluate(fn: Callable, points: np.ndarray, batched: bool) -> np.ndarray:
    """``fn`` at each of ``points`` (leading axis): one batched call or one call per point."""
    if batched:
        values = np.asarray(fn(points))
        if values.shape[:1] != points.shape[:1]:
            _checks.fail("fn", values, f"with batched=True, expected a leading batch of "
                         f"{points.shape[0]} outputs, got shape {values.shape}")
    else:
        values = np.stack([np.asarray(fn(p)) for p in points])
    return values.astype(np.result_type(values.dtype, np.float64))


def _steady_nonfinite_as_zero(values: np.ndarray) -> np.ndarray:
    """Output elements that are the same infinity at every evaluated point (a max-pool window
    over padding only) have derivative 0; replace them by 0 so they do not poison sums."""
    steady = np.all(values == values[:1], axis=0) & ~np.isfinite(values[0])
    return np.where(steady, 0.0, values)


def dense_jacobian(fn: Callable[[np.ndarray], np.ndarray], x: Any, *, fmt: Any = "float64",
                   step: Any = None, richardson: bool = True, kink_distance: Any = None,
                   batched: bool = False) -> Derivative:
    """The Jacobian of ``fn`` at ``x`` by central differences, one input element at a time.

    Parameters
    ----------
    fn : callable
        ``fn(x) -> array``; with ``batched=True``, ``fn(X)`` takes ``X`` of shape ``(B, *x.shape)``
        and returns ``(B, *out.shape)``.
    x : float array
    fmt : the format ``fn`` computes in (sets the step and the noise level).
    step : float or array broadcastable to ``x``, optional
        Base step ``h``; default :func:`central_step`.
    richardson : bool
        Combine ``D(h)`` and ``D(2h)`` (default); False returns the plain ``D(h)`` with the
        estimate ``|D(h) - D(2h)| / 3 + eps_f / h``.
    kink_distance : array of ``x.shape``, optional
        Distance of each element to the nearest non-differentiable point.

    Returns
    -------
    :class:`Derivative` with ``value`` and ``error`` of shape ``out.shape + x.shape``. Costs
    ``4 * x.size`` evaluations (one call when batched).
    """
    fmt = get_format(fmt)
    x = _as_input("x", x)
    h = central_step(fmt, x) if step is None else np.broadcast_to(
        np.asarray(step, dtype=np.float64), x.shape)
    h, skipped = _fit_steps(h, _kink_room("kink_distance", kink_distance, x.shape))
    n = x.size
    flat, hflat = x.ravel(), h.ravel()
    points = np.repeat(flat[None, :], 4 * n, axis=0)
    columns = np.tile(np.arange(n), 4)
    levels = np.repeat(np.array(_LEVELS), n)
    points[np.arange(4 * n), columns] = flat[columns] + levels * hflat[columns]
    displaced = points[np.arange(4 * n), columns] - flat[columns]
    values = _evaluate(fn, points.reshape((4 * n,) + x.shape), batched)
    out_shape = values.shape[1:]
    values = _steady_nonfinite_as_zero(values).reshape(4, n, -1)   # (level, element, output)
    width = (displaced.reshape(4, n)[0::2] - displaced.reshape(4, n)[1::2])   # (2, element)
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = (values[0] - values[1]) / width[0][:, None]
        d2 = (values[2] - values[3]) / width[1][:, None]
        noise = NOISE_FACTOR * fmt.unit_roundoff * np.abs(values).max(axis=0) / hflat[:, None]
    truncation = np.abs(d1 - d2) / 3.0
    value = (4.0 * d1 - d2) / 3.0 if richardson else d1
    error = truncation + (1.5 if richardson else 1.0) * noise
    bad = skipped.ravel()[:, None]
    value, error = np.where(bad, np.nan, value), np.where(bad, np.nan, error)
    return Derivative(value=_to_jacobian(value, out_shape, x.shape),
                      error=_to_jacobian(error, out_shape, x.shape), skipped=skipped,
                      method="central+richardson" if richardson else "central")


def _to_jacobian(columns: np.ndarray, out_shape: tuple, in_shape: tuple) -> np.ndarray:
    """(element, output) -> out_shape + in_shape."""
    return columns.T.reshape(out_shape + in_shape)


def complex_step(fn: Callable[[np.ndarray], np.ndarray], x: Any, *, direction: Any = None,
                 step: float | None = None, batched: bool = False) -> Derivative:
    """Derivatives from ``Im fn(x + i h d) / h`` (Squire & Trapp 1998).

    ``fn`` must accept complex arrays and be analytic (built from operations that extend to
    complex numbers: no ``abs``, comparisons or ``max``). With ``direction=None`` every element is
    perturbed in turn and ``value`` is the Jacobian (``out.shape + x.shape``); with a direction
    ``d`` (an array of ``x.shape``) it is ``J d`` (``out.shape``).

    The default step is ``1e-20 * max(|x|, 1)``: the truncation error ``h^2 f''' / 6`` is far
    below rounding. The error estimate is the change under halving the step plus
    ``NOISE_FACTOR * u * |value|`` (float64).
    """
    x = _as_input("x", x)
    h = 1e-20 * max(float(np.max(np.abs(x), initial=0.0)), 1.0) if step is None else \
        _checks.as_real("step", step, positive=True)
    if direction is None:
        n = x.size
        basis = np.eye(n).reshape((n,) + x.shape)
    else:
        basis = _as_input("direction", direction)
        _checks.check_shape("direction", basis, x.shape, "x.shape")
        basis = basis[None]
    steps = np.array([h, h / 2])
    points = x[None, None] + 1j * steps[:, None, None] * basis[None]     # (2, B, *x.shape)
    flat = points.reshape((-1,) + x.shape)
    values = _evaluate(fn, flat, batched)
    values = values.reshape((2, basis.shape[0]) + values.shape[1:])
    slopes = values.imag / steps.reshape((2,) + (1,) * (values.ndim - 1))
    value = slopes[0]
    error = np.abs(slopes[0] - slopes[1]) + NOISE_FACTOR * get_format("float64").unit_roundoff \
        * np.abs(value)
    if direction is None:
        value = _to_jacobian(value.reshape(basis.shape[0], -1), value.shape[1:], x.shape)
        error = _to_jacobian(error.reshape(basis.shape[0], -1), error.shape[1:], x.shape)
    else:
        value, error = value[0], error[0]
    return Derivative(value=value, error=error, skipped=np.zeros(x.shape, dtype=bool),
                      method="complex step")


@dataclass(frozen=True)
class Probe:
    """One directional comparison: ``v . (J s)`` by central differences against ``g . s``.

    ``finite_difference`` is the Richardson value of ``v . (J s)``, ``predicted`` is
    ``g . s`` with ``g = v^T J`` from the vjp, ``error`` their extrapolated difference and
    ``estimate`` the finite difference's own error estimate (the tolerance). ``skipped`` counts
    elements left out of the direction because they sit at a kink.
    """

    finite_difference: float
    predicted: float
    error: float
    estimate: float
    skipped: int

    @property
    def passed(self) -> bool:
        return bool(self.error <= self.estimate)


def directional_check(fn: Callable[[np.ndarray], np.ndarray], x: Any, cotangent: Any,
                      gradient: Any, *, rng: np.random.Generator | None = None,
                      direction: Any = None, fmt: Any = "float64",
                      kink_distance: Any = None) -> Probe:
    """Compare the vjp ``gradient = v^T J`` with central differences of ``v . f`` along ``s``.

    The direction ``s`` is ``direction`` (default: standard normal from ``rng``) scaled per
    element by :func:`central_step`, with entries at kinks set to zero and the rest shrunk to
    keep the stencil clear of kinks. Costs four evaluations of ``fn``.

    The displacements actually applied, ``((x + l s) - (x - l s)) / 2`` in floating point, are
    what the vjp's prediction uses, so rounding of the perturbed points is not counted as error.
    """
    fmt = get_format(fmt)
    x = _as_input("x", x)
    v = _as_input("cotangent", cotangent)
    g = _as_input("gradient", gradient)
    _checks.check_shape("gradient", g, x.shape, "the shape of x")
    if direction is None:
        if rng is None:
            _checks.fail("rng", rng, "a numpy Generator is needed to draw a direction", TypeError)
        direction = rng.standard_normal(x.shape)
    direction = _as_input("direction", direction)
    _checks.check_shape("direction", direction, x.shape, "the shape of x")
    s, skipped = _fit_steps(direction * central_step(fmt, x),
                            _kink_room("kink_distance", kink_distance, x.shape))
    points = np.stack([x + level * s for level in _LEVELS])
    values = _steady_nonfinite_as_zero(np.stack([np.asarray(fn(p), dtype=np.float64)
                                                 for p in points]))
    _checks.check_shape("cotangent", v, values.shape[1:], "the output shape of fn")
    phi = np.tensordot(values, v, axes=v.ndim)              # v . f at each point
    halves = (points[0::2] - points[1::2]) / 2.0             # applied displacements, levels 1, 2
    predicted = np.tensordot(halves, g, axes=g.ndim)
    residual = ((phi[0::2] - phi[1::2]) / 2.0 - predicted) / np.array([1.0, 2.0])
    u = fmt.unit_roundoff
    noise = NOISE_FACTOR * u * np.max(np.tensordot(np.abs(values), np.abs(v), axes=v.ndim))
    vjp_rounding = NOISE_FACTOR * u * float(np.sum(np.abs(g) * np.abs(s)))
    estimate = abs(residual[0] - residual[1]) / 3.0 + 1.5 * noise + vjp_rounding
    fd = (4.0 * (phi[0] - phi[1]) / 2.0 - (phi[2] - phi[3]) / 4.0) / 3.0
    return Probe(finite_difference=float(fd), predicted=float(np.sum(g * s)),
                 error=float(abs(4.0 * residual[0] - residual[1]) / 3.0),
                 estimate=float(estimate), skipped=int(np.count_nonzero(skipped)))


@dataclass(frozen=True)
class ArrayAgreement:
    """How one array's vjp agreed with finite differences.

    ``method`` is ``"dense"`` (every entry of the gradient checked against a dense FD Jacobian)
    or ``"directional"`` (``probes`` random directions). ``max_error`` is the largest
    ``|FD - vjp|``, ``estimate`` the FD error estimate where ``share = error / estimate`` is
    largest, ``checked`` the entries or probes compared, ``skipped`` the elements not
    differentiable here (left out, not failures).
    """

    array: str
    method: str
    max_error: float
    estimate: float
    share: float
    checked: int
    skipped: int

    @property
    def passed(self) -> bool:
        return bool(self.share <= 1.0)


def _dense_agreement(name: str, fn: Callable, x: np.ndarray, v: np.ndarray, g: np.ndarray,
                     fmt: Any, distance: Any, batched: bool) -> ArrayAgreement:
    jac = dense_jacobian(fn, x, fmt=fmt, kink_distance=distance, batched=batched)
    axes = (tuple(range(v.ndim)), tuple(range(v.ndim)))
    fd = np.tensordot(v, np.nan_to_num(jac.value), axes=axes)
    estimate = np.tensordot(np.abs(v), np.nan_to_num(jac.error), axes=axes)
    estimate = estimate + NOISE_FACTOR * get_format(fmt).unit_roundoff * np.tensordot(
        np.abs(v), np.abs(np.nan_to_num(jac.value)), axes=axes)
    error = np.where(jac.skipped, 0.0, np.abs(fd - g))
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(error > 0, error / estimate, 0.0)
    worst = np.unravel_index(int(np.argmax(share)), share.shape) if share.size else ()
    return ArrayAgreement(array=name, method="dense", max_error=float(error.max(initial=0.0)),
                          estimate=float(estimate[worst]) if share.size else 0.0,
                          share=float(share.max(initial=0.0)),
                          checked=int(np.count_nonzero(~jac.skipped)),
                          skipped=int(np.count_nonzero(jac.skipped)))


def _directional_agreement(name: str, fn: Callable, x: np.ndarray, v: np.ndarray, g: np.ndarray,
                           fmt: Any, distance: Any, rng: np.random.Generator,
                           probes: int) -> ArrayAgreement:
    results = [directional_check(fn, x, v, g, rng=rng, fmt=fmt, kink_distance=distance)
               for _ in range(probes)]
    shares = [r.error / r.estimate if r.error > 0 else 0.0 for r in results]
    worst = results[int(np.argmax(shares))]
    return ArrayAgreement(array=name, method="directional",
                          max_error=max(r.error for r in results), estimate=worst.estimate,
                          share=float(max(shares)), checked=probes,
                          skipped=max(r.skipped for r in results))


def vjp_fd_agreement(fn: Callable[..., np.ndarray], vjp_fn: Callable[..., Mapping[str, Any]],
                     arrays: Mapping[str, Any], *, rng: np.random.Generator,
                     kink_distance: Mapping[str, Any] | None = None, cotangent: Any = None,
                     dense_limit: int = 32, probes: int = 2, batched: bool = False,
                     fmt: Any = "float64") -> list[ArrayAgreement]:
    """Check a vjp against finite differences, one array at a time.

    Parameters
    ----------
    fn : callable
        ``fn(**arrays) -> output``.
    vjp_fn : callable
        ``vjp_fn(cotangent, **arrays) -> {name: gradient}``; every name it returns is checked.
    arrays : mapping of name to array (or any other argument, passed through unchanged)
    rng : numpy Generator, for the cotangent (if not given) and the directions
    kink_distance : mapping of name to per-element kink distances, optional
    cotangent : array of the output's shape, optional (default standard normal)
    dense_limit : int
        Arrays with at most this many elements get a dense FD Jacobian (every gradient entry
        checked); larger ones get ``probes`` directional checks.
    batched : bool
        ``fn`` accepts, for the array being checked, a leading batch of perturbed values and
        returns a leading batch of outputs (dense mode only).
    fmt : the format ``fn`` computes in.

    Returns
    -------
    list of :class:`ArrayAgreement`, in the order ``vjp_fn`` returns the gradients.
    """
    if not isinstance(rng, np.random.Generator):
        _checks.fail("rng", rng, "expected a numpy.random.Generator", TypeError)
    dense_limit = _checks.as_int("dense_limit", dense_limit, min_value=0)
    probes = _checks.as_int("probes", probes, min_value=1)
    arrays = dict(arrays)
    output = np.asarray(fn(**arrays), dtype=np.float64)
    v = rng.standard_normal(output.shape) if cotangent is None else _as_input("cotangent", cotangent)
    _checks.check_shape("cotangent", v, output.shape, "the output shape of fn")
    gradients = vjp_fn(v, **arrays)
    distances = dict(kink_distance or {})
    results = []
    for name, gradient in gradients.items():
        x = _as_input(f"arrays[{name!r}]", arrays[name])
        g = _as_input(f"gradient[{name!r}]", np.asarray(gradient))
        _checks.check_shape(f"gradient[{name!r}]", g, x.shape, f"the shape of arrays[{name!r}]")

        def partial(value, name=name):
            return fn(**{**arrays, name: value})

        if x.size <= dense_limit:
            results.append(_dense_agreement(name, partial, x, v, g, fmt, distances.get(name),
                                            batched))
        else:
            results.append(_directional_agreement(name, partial, x, v, g, fmt,
                                                  distances.get(name), rng, probes))
    return results
