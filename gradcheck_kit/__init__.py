"""gradcheck_kit: check analytic gradients against careful numerical derivatives.

The pipeline, one module per stage (see DEVELOPERS.md):
tree -> plan -> evaluate -> stencils -> verdicts -> report -> front ends.
"""
from .assertions import assert_gradient_matches
from .cases import case
from .errors import CheckInputError, CheckInterrupted, GradientMismatchError
from .jacobian import compare_jacobian
from .locate import locate_mismatches
from .pipeline import NoiseEstimate, compare_gradient, estimate_noise, numeric_gradient
from .remainder import RemainderResult, remainder_order
from .report import GradientReport, Row

__version__ = "0.1.0"

__all__ = [
    "numeric_gradient", "compare_gradient", "assert_gradient_matches", "compare_jacobian",
    "remainder_order", "estimate_noise", "locate_mismatches", "RemainderResult", "NoiseEstimate", "case",
    "GradientReport", "Row", "GradientMismatchError", "CheckInputError", "CheckInterrupted",
]
