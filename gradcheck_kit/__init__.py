"""gradcheck_kit: check analytic gradients against careful numerical derivatives.

The pipeline, one module per stage (see DEVELOPERS.md):
tree -> plan -> evaluate -> stencils -> probes -> numeric -> verdicts -> hints -> report
-> front ends.
"""
import importlib as _importlib
import importlib.util as _importlib_util

# Where each public name lives.  Names are imported on first use (a module __getattr__,
# PEP 562): the pytest plugin's entry point imports this package in every pytest session
# of an environment where it is installed, and a session without gradient checks must
# not pay for numpy and the engine (tests/test_plugin_lazy.py).
_PUBLIC = {
    "assertions": ("assert_gradient_matches",),
    "cases": ("case", "stochastic_case", "product_case"),
    "errors": ("CheckInputError", "CheckInterrupted", "CheckTypeError", "ExecutorError",
               "GradientMismatchError", "LongCheckWarning"),
    "jacobian": ("compare_jacobian",),
    "locate": ("locate_mismatches",),
    "monitor": ("GradientMonitor", "MonitorReport"),
    "pipeline": ("NoiseEstimate", "compare_gradient", "estimate_noise", "numeric_gradient"),
    "products": ("ProductReport", "compare_hvp", "compare_jvp", "compare_vjp"),
    "remainder": ("RemainderResult", "remainder_order"),
    "report": ("GradientReport", "Row"),
    "stochastic": ("compare_stochastic_gradient",),
    "stochastic_report": ("StochasticReport", "StochasticRow"),
}
_HOME = {name: module for module, names in _PUBLIC.items() for name in names}


def _installed_version() -> str:
    from importlib.metadata import PackageNotFoundError, version
    try:   # one place for the version, pyproject.toml: read back from the installed metadata
        return version("gradcheck_kit")
    except PackageNotFoundError:  # pragma: no cover - a source tree used without installing
        return "0+unknown"


def __getattr__(name):
    if name == "__version__":
        value = _installed_version()
    elif name in _HOME:
        value = getattr(_importlib.import_module(f".{_HOME[name]}", __name__), name)
    elif not name.startswith("_") and _importlib_util.find_spec(f"{__name__}.{name}"):
        return _importlib.import_module(f".{name}", __name__)   # a stage: gk.report, ...
    else:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    globals()[name] = value     # looked up once
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))

__all__ = [
    "numeric_gradient", "compare_gradient", "assert_gradient_matches", "compare_jacobian",
    "remainder_order", "estimate_noise", "locate_mismatches", "RemainderResult",
    "NoiseEstimate", "case", "stochastic_case", "product_case", "GradientReport", "Row",
    "GradientMismatchError", "CheckInputError", "CheckTypeError", "CheckInterrupted",
    "ExecutorError", "LongCheckWarning",
    "compare_stochastic_gradient", "StochasticReport", "StochasticRow",
    "GradientMonitor", "MonitorReport", "compare_jvp", "compare_vjp", "compare_hvp",
    "ProductReport",
]
