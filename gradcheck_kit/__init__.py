"""gradcheck_kit: check analytic gradients against careful numerical derivatives.

The pipeline, one module per stage (see DEVELOPERS.md):
tree -> plan -> evaluate -> stencils -> verdicts -> report -> front ends.
"""
from .assertions import assert_gradient_matches
from .cases import case
from .errors import (CheckInputError, CheckInterrupted, CheckTypeError, ExecutorError,
                     GradientMismatchError)
from .jacobian import compare_jacobian
from .locate import locate_mismatches
from .monitor import GradientMonitor, MonitorReport
from .pipeline import NoiseEstimate, compare_gradient, estimate_noise, numeric_gradient
from .products import ProductReport, compare_hvp, compare_jvp, compare_vjp
from .remainder import RemainderResult, remainder_order
from .report import GradientReport, Row
from .stochastic import compare_stochastic_gradient
from .stochastic_report import StochasticReport, StochasticRow

from importlib.metadata import PackageNotFoundError as _NotInstalled, version as _version

try:   # one place for the version, pyproject.toml: read back from the installed metadata
    __version__ = _version("gradcheck_kit")
except _NotInstalled:  # pragma: no cover - a source tree used without installing it
    __version__ = "0+unknown"
del _NotInstalled, _version

__all__ = [
    "numeric_gradient", "compare_gradient", "assert_gradient_matches", "compare_jacobian",
    "remainder_order", "estimate_noise", "locate_mismatches", "RemainderResult", "NoiseEstimate", "case",
    "GradientReport", "Row", "GradientMismatchError", "CheckInputError", "CheckTypeError",
    "CheckInterrupted", "ExecutorError",
    "compare_stochastic_gradient", "StochasticReport", "StochasticRow",
    "GradientMonitor", "MonitorReport", "compare_jvp", "compare_vjp", "compare_hvp", "ProductReport",
]
