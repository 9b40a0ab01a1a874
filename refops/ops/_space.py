"""Configuration spaces: one generative description per op, two interpreters.

An op's space is a plain function ``space(draw) -> CaseConfig`` written against the small
:class:`Draw` interface below. The same function is interpreted by :class:`RandomDraw`
(seeded numpy draws, biased toward edge values, for ``refops check`` sweeps) and by the
hypothesis interpreter in :mod:`refops.strategies` (so shrinking leads to small configurations).
Every draw has a name; a name in ``pins`` is not drawn but takes the pinned value, which is how
``--set NAME=VALUE`` works. Dependent values are drawn after what they depend on, so a space only
produces valid configurations by construction.
"""
from __future__ import annotations

from typing import Any, Mapping, Protocol, Sequence

import numpy as np


class Draw(Protocol):
    """What a configuration space may ask for. Bounds are inclusive."""

    def integer(self, name: str, low: int, high: int) -> int: ...

    def choice(self, name: str, options: Sequence[Any]) -> Any: ...

    def real(self, name: str, low: float, high: float) -> float: ...


class PinError(ValueError):
    """A pinned value is unknown to the space or inconsistent with the op."""


def pinned_value(value: Any) -> Any:
    """Pins arrive from JSON: lists become tuples (``[1, 2]`` -> ``(1, 2)``)."""
    return tuple(pinned_value(v) for v in value) if isinstance(value, list) else value


class PinnedDraw:
    """What every interpreter of a space shares: pins are returned as given (lists become tuples),
    an empty range or option list is a :class:`PinError`, and every value is recorded in
    ``drawn``. A subclass draws the free values: ``_integer``, ``_choice``, ``_real``."""

    def __init__(self, pins: Mapping[str, Any] | None = None):
        self.pins = {k: pinned_value(v) for k, v in (pins or {}).items()}
        self.drawn: dict[str, Any] = {}

    def _record(self, name: str, value: Any) -> Any:
        self.drawn[name] = value
        return value

    def integer(self, name: str, low: int, high: int) -> int:
        if name in self.pins:
            return self._record(name, self.pins[name])
        if high < low:
            raise PinError(f"{name}: no valid value (needs {low} <= {name} <= {high}); "
                           "a pinned value leaves no room")
        return self._record(name, self._integer(name, low, high))

    def choice(self, name: str, options: Sequence[Any]) -> Any:
        if name in self.pins:
            return self._record(name, self.pins[name])
        if not options:
            raise PinError(f"{name}: no valid option; a pinned value leaves no room")
        return self._record(name, self._choice(name, options))

    def real(self, name: str, low: float, high: float) -> float:
        if name in self.pins:
            return self._record(name, self.pins[name])
        return self._record(name, self._real(name, low, high))

    def unused_pins(self) -> list[str]:
        """Pinned names that the space never asked for (a typo, or a parameter of another op)."""
        return sorted(set(self.pins) - set(self.drawn))


class RandomDraw(PinnedDraw):
    """Seeded numpy interpreter of a space.

    With probability ``edge`` an integer draw takes one of its bounds and a choice its first
    option (spaces list the edge option first), so small kernels, stride 1 and batch 1 show up
    often. Every drawn value is recorded in ``drawn``; pins are returned as given.
    """

    def __init__(self, rng: np.random.Generator, pins: Mapping[str, Any] | None = None,
                 edge: float = 0.25):
        super().__init__(pins)
        self.rng = rng
        self.edge = edge

    def _integer(self, name: str, low: int, high: int) -> int:
        if self.rng.random() < self.edge:
            return int(self.rng.choice([low, high]))
        return int(self.rng.integers(low, high + 1))

    def _choice(self, name: str, options: Sequence[Any]) -> Any:
        if self.rng.random() < self.edge:
            return options[0]
        return options[int(self.rng.integers(len(options)))]

    def _real(self, name: str, low: float, high: float) -> float:
        return float(self.rng.uniform(low, high))


def plain_arrays(op: Any, config: Any, rng: np.random.Generator) -> tuple[tuple, dict]:
    """Standard-normal arrays for a drawn config: ``(positional arrays, keyword params)``.

    Arrays named in ``config.shapes`` that are keyword parameters of the op (batch_norm's running
    statistics) go into the params; ``config.bounds`` restricts values (integer arrays draw
    ``low <= v < high``, float arrays uniformly in ``[low, high]``).
    """
    values = {}
    for name, shape in config.shapes.items():
        if shape is None:
            values[name] = None
        elif name in config.bounds:
            low, high = config.bounds[name]
            if name in op.integer_arrays:
                values[name] = rng.integers(low, high, size=shape)
            else:
                values[name] = rng.uniform(low, high, size=shape)
        else:
            values[name] = rng.standard_normal(shape)
    arrays = tuple(values.get(name) for name in op.arrays)
    params = {**config.params, **{k: v for k, v in values.items() if k in op.defaults}}
    return arrays, params
