"""The registry: one entry per oracle.

An entry is made by decorating the op's forward function with :func:`register`. The forward
function's signature *is* the op's interface: positional arguments are its arrays (``None``
default = optional), keyword-only arguments are its parameters with the frameworks' defaults.
Its numpy-style docstring carries the formula, the output shape and the non-differentiable
points (sections ``Formula``, ``Output shape``, ``Non-differentiable points``).

Besides forward, an entry holds:

- ``vjp``: the backward rule, ``rule(grad_output, *arrays, **params) -> dict`` keyed by array name;
- ``validate``: ``validate(arrays, params) -> params``, normalising and checking parameters
  against the (already float64, finite) arrays; returns the normalised parameters;
- ``output_shape``: ``output_shape(arrays, params) -> tuple`` (default: the first array's shape);
- ``space``: the configuration space, ``space(draw) -> CaseConfig`` (see :mod:`._space`);
- ``kinks``: the declared non-differentiable points (:class:`Kink`);
- ``error_terms``: the ingredients of the rounding bound for the output and each gradient
  (:class:`ErrorTerms`), used by :mod:`refops.numerics.tolerance`.
"""
from __future__ import annotations

import inspect
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np

from . import _checks

_REGISTRY: dict[str, "Op"] = {}

ArrayDict = Mapping[str, "np.ndarray | None"]


@dataclass(frozen=True)
class Kink:
    """A family of points where an op is not differentiable.

    ``distance(arrays, params)`` returns, per array it concerns, each element's distance to the
    nearest such point (an array of the same shape; ``inf`` where there is none). A finite-
    difference stencil narrower than that distance does not cross the kink.
    ``points(params)``, for elementwise ops, lists the input values where the kinks sit (used to
    generate inputs exactly on them). ``derivative`` states the value the oracle's vjp uses there.
    """

    description: str
    derivative: str
    distance: Callable[[ArrayDict, Mapping[str, Any]], dict[str, np.ndarray]]
    points: Callable[[Mapping[str, Any]], tuple[float, ...]] | None = None


@dataclass(frozen=True)
class ErrorTerms:
    """What the rounding bound of one tensor (the output, or one gradient) is built from.

    The tolerance model allows, per element,
    ``u_out * (|reference| + rounded) + c(length) * u_acc * magnitude + floor``:

    - ``magnitude`` (M): the size of what is summed, e.g. conv(|x|, |w|) for a conv output;
    - ``length`` (k): how many terms each element sums (array or scalar);
    - ``accumulate``: ``"wide"`` when implementations accumulate in a wider format (float32 for
      half formats) and round once, ``"io"`` when they accumulate in the input/output format
      (scatter-adds of input gradients);
    - ``rounded``: sensitivity to intermediates rounded to the I/O format (a saved output that the
      backward reuses, a log-sum-exp rounded before the subtraction), multiplied by ``u_out``.
    """

    magnitude: np.ndarray | float
    length: np.ndarray | float
    accumulate: str = "wide"
    rounded: np.ndarray | float = 0.0


@dataclass(frozen=True)
class CaseConfig:
    """One drawn configuration of an op.

    - ``layer``: keyword arguments for a user's layer factory (``refops check``'s contract);
    - ``params``: the oracle's keyword parameters;
    - ``shapes``: the shape of each array argument (``None`` = pass ``None``);
    - ``bounds``: value ranges for arrays whose values are restricted, as ``(low, high)``;
      integer arrays (class indices) draw from ``low <= v < high``;
    - ``drawn``: every value drawn, by name (what ``--set NAME=VALUE`` can pin).
    """

    layer: dict
    params: dict
    shapes: dict
    bounds: dict
    drawn: dict


class Op:
    """A registered oracle: call it for the forward, ``.vjp`` for the backward."""

    def __init__(self, forward: Callable, *, vjp: Callable, validate: Callable,
                 space: Callable, error_terms: Callable, kinks: tuple[Kink, ...] = (),
                 output_shape: Callable | None = None, integer_arrays: tuple[str, ...] = ()):
        signature = inspect.signature(forward)
        positional = [p for p in signature.parameters.values()
                      if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
        keyword = [p for p in signature.parameters.values() if p.kind is p.KEYWORD_ONLY]
        self.name: str = forward.__name__
        self.arrays: tuple[str, ...] = tuple(p.name for p in positional)
        self.optional: frozenset[str] = frozenset(p.name for p in positional if p.default is None)
        self.required_arrays: int = sum(p.default is inspect.Parameter.empty for p in positional)
        self.defaults: dict[str, Any] = {p.name: p.default for p in keyword}
        self.integer_arrays: tuple[str, ...] = integer_arrays
        self.differentiable: tuple[str, ...] = tuple(a for a in self.arrays if a not in integer_arrays)
        self.kinks = kinks
        self.space = space
        self.__doc__ = forward.__doc__
        self._forward = forward
        self._vjp = vjp
        self._validate = validate
        self._output_shape = output_shape
        self._error_terms = error_terms

    def __repr__(self) -> str:
        return f"<refops op {self.name}({', '.join(self.arrays)})>"

    def doc_section(self, title: str) -> str:
        """The text of one numpy-style docstring section (``"Formula"``, ``"Output shape"``, ...)."""
        lines = inspect.cleandoc(self.__doc__ or "").splitlines()
        for i, line in enumerate(lines[:-1]):
            if line.strip() == title and set(lines[i + 1].strip()) == {"-"}:
                body = []
                for j in range(i + 2, len(lines)):
                    if j + 1 < len(lines) and lines[j + 1].strip() and set(lines[j + 1].strip()) == {"-"}:
                        break
                    body.append(lines[j])
                return "\n".join(body).strip()
        return ""

    def __call__(self, *arrays: Any, **params: Any) -> np.ndarray:
        checked, normal = self.prepare(arrays, params)
        return np.asarray(self._forward(*checked.values(), **normal), dtype=np.float64)

    def vjp(self, grad_output: Any, *arrays: Any, **params: Any) -> dict[str, np.ndarray]:
        """The vector-Jacobian product: one gradient per differentiable array that was given."""
        checked, normal = self.prepare(arrays, params)
        g = self._check_cotangent(grad_output, checked, normal)
        grads = self._vjp(g, *checked.values(), **normal)
        return {name: grads[name] for name in self.differentiable if checked[name] is not None}

    def error_terms(self, grad_output: Any, *arrays: Any, **params: Any) -> dict[str, ErrorTerms]:
        """Rounding-bound ingredients for ``"output"`` and each gradient the vjp returns."""
        checked, normal = self.prepare(arrays, params)
        g = self._check_cotangent(grad_output, checked, normal)
        return self._error_terms(g, *checked.values(), **normal)

    def output_shape(self, *arrays: Any, **params: Any) -> tuple[int, ...]:
        checked, normal = self.prepare(arrays, params)
        return self._shape(checked, normal)

    def kink_distance(self, *arrays: Any, **params: Any) -> dict[str, np.ndarray]:
        """Per array, each element's distance to the nearest declared kink (``inf`` if none)."""
        checked, normal = self.prepare(arrays, params)
        distance = {name: np.full(a.shape, np.inf) for name, a in checked.items()
                    if a is not None and name in self.differentiable}
        for kink in self.kinks:
            for name, d in kink.distance(checked, normal).items():
                distance[name] = np.minimum(distance[name], d)
        return distance

    def prepare(self, arrays: tuple, params: Mapping[str, Any]) -> tuple[dict, dict]:
        """Check and convert the arrays (float64 copies), then normalise and validate params."""
        if not self.required_arrays <= len(arrays) <= len(self.arrays):
            raise TypeError(f"{self.name}() takes {self.required_arrays} to {len(self.arrays)} arrays "
                            f"({', '.join(self.arrays)}), got {len(arrays)}")
        unknown = sorted(set(params) - set(self.defaults))
        if unknown:
            raise TypeError(f"{self.name}() got unknown parameter {unknown[0]}={params[unknown[0]]!r}; "
                            f"its parameters are: {', '.join(self.defaults) or 'none'}")
        missing = [k for k, v in self.defaults.items() if v is inspect.Parameter.empty and k not in params]
        if missing:
            raise TypeError(f"{self.name}() needs the parameter {missing[0]}=...")
        given = dict(zip(self.arrays, arrays))
        checked = {}
        for name in self.arrays:
            value = given.get(name)
            if value is None:
                if name not in self.optional:
                    _checks.fail(name, value, "this array is required", TypeError)
                checked[name] = None
            elif name in self.integer_arrays:
                checked[name] = _checks.as_integer_array(name, value)
            else:
                checked[name] = _checks.as_float_array(name, value)
        normal = self._validate(checked, {**self.defaults, **params})
        return checked, normal

    def _shape(self, checked: dict, normal: dict) -> tuple[int, ...]:
        if self._output_shape is None:
            return checked[self.arrays[0]].shape
        return tuple(self._output_shape(checked, normal))

    def _check_cotangent(self, grad_output: Any, checked: dict, normal: dict) -> np.ndarray:
        g = _checks.as_float_array("grad_output", grad_output)
        _checks.check_shape("grad_output", g, self._shape(checked, normal),
                            f"the output shape of {self.name}")
        return g


def register(*, vjp: Callable, validate: Callable, space: Callable, error_terms: Callable,
             kinks: tuple[Kink, ...] = (), output_shape: Callable | None = None,
             integer_arrays: tuple[str, ...] = ()) -> Callable[[Callable], Op]:
    """Decorator: turn a forward function into a registered :class:`Op` of the same name."""

    def wrap(forward: Callable) -> Op:
        op = Op(forward, vjp=vjp, validate=validate, space=space, error_terms=error_terms,
                kinks=kinks, output_shape=output_shape, integer_arrays=integer_arrays)
        if op.name in _REGISTRY:
            raise RuntimeError(f"op {op.name!r} is registered twice")
        _REGISTRY[op.name] = op
        return op

    return wrap


class UnknownOpError(KeyError, ValueError):
    """No op of that name (a ``KeyError`` for lookups, a ``ValueError`` for argument checks)."""

    def __str__(self) -> str:
        return str(self.args[0])


def names() -> list[str]:
    """Every registered op name, sorted."""
    return sorted(_REGISTRY)


def get(name: str) -> Op:
    """The op called ``name``; :class:`UnknownOpError` suggests close names when there is none."""
    if not isinstance(name, str):
        _checks.fail("name", name, "expected an op name (str)", TypeError)
    try:
        return _REGISTRY[name]
    except KeyError:
        import difflib
        close = difflib.get_close_matches(name, _REGISTRY, n=3)
        hint = f"; did you mean {', '.join(close)}?" if close else "; refops.ops.names() lists them"
        raise UnknownOpError(f"name={name!r}: no op of that name{hint}") from None
