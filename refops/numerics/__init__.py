"""Numerics: number formats and rounding, tolerance models, comparison, finite differences.

Nothing here imports a deep-learning framework; everything works on float64 numpy arrays.
"""
from .compare import Comparison, Worst, compare
from .finite_diff import (ArrayAgreement, Derivative, Probe, central_step, complex_step,
                          dense_jacobian, directional_check, vjp_fd_agreement)
from .formats import FORMATS, Format, accumulator_for, get_format, round_to, ulp, ulp_distance
from .tolerance import Calibrated, Fixed, RoundingBound, ToleranceModel, default_floor

__all__ = ["Format", "FORMATS", "get_format", "round_to", "ulp", "ulp_distance", "accumulator_for",
           "ToleranceModel", "RoundingBound", "Fixed", "Calibrated", "default_floor",
           "Worst", "Comparison", "compare",
           "central_step", "Derivative", "dense_jacobian", "complex_step", "Probe",
           "directional_check", "ArrayAgreement", "vjp_fd_agreement"]
