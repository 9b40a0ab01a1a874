"""refops: float64 reference oracles and a rounding-aware harness for neural-network operators.

A passing check is evidence, not proof: where a wrong result can hurt someone, your own
validation and your field's standards govern.
"""
from . import ops

__version__ = "0.1.0"
__all__ = ["ops", "__version__"]
