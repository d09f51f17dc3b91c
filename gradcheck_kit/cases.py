"""Declared gradient cases: `@gk.case(...)` on a cost, checked by the plugin and the CLI.

A case is declared once, next to the cost, and returns the cost itself, still
callable as before, carrying the declaration in `cost.gradient_case`.  `params`
may be a structure, a callable taking a numpy Generator and returning one, or a
hypothesis strategy; with a strategy the case is checked at several drawn
points and hypothesis shrinks a failure to the simplest failing point.
hypothesis is imported only when a strategy is used.
"""
from __future__ import annotations

import inspect
import numbers
import sys
from dataclasses import dataclass, field

import numpy as np

from . import plan
from .errors import CheckInputError, GradientMismatchError
from .pipeline import compare_gradient

CASE_ATTRIBUTE = "gradient_case"
DEFAULT_EXAMPLES = 25     # drawn points for a strategy


@dataclass
class Case:
    cost: object
    gradient: object
    params: object
    options: dict
    name: str
    examples: int = DEFAULT_EXAMPLES
    expect_mismatch: bool = False   # a planted bug, kept as a demonstration or a canary


@dataclass
class CaseResult:
    case: Case
    report: object                 # the GradientReport of the last (or failing, shrunk) point
    point: object = None           # the params of that report
    drawn: bool = False            # params came from a hypothesis strategy
    checked: int = 1               # points checked
    notes: list = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return self.report.passed

    @property
    def as_expected(self) -> bool:
        """Passed, or failed where the case declares a planted bug."""
        return self.report.passed != self.case.expect_mismatch

    def to_text(self) -> str:
        text = self.report.to_text()
        if self.case.expect_mismatch:
            text += ("\n  (this case declares a planted bug: the mismatch above was expected)"
                     if not self.passed else "\n  this case declares a planted bug, but every "
                     "coordinate agrees: the check missed it")
        if self.drawn and not self.passed:
            text += f"\n  failing point (shrunk by hypothesis): {describe_point(self.point)}"
        elif self.drawn:
            text += f"\n  checked at {self.checked} points drawn from the strategy"
        return text


def case(gradient=None, params=None, *, examples=DEFAULT_EXAMPLES, name=None,
         expect_mismatch=False, **options):
    """Declare a gradient check on the decorated cost; returns the cost unchanged.

    expect_mismatch=True declares a planted bug (a demonstration, or a canary that
    the check still catches it): the case then succeeds when the check fails.
    Options are compare_gradient's; all are checked here, when the decorator is
    applied, so a misspelt or ill-typed declaration fails at once, not later as a
    check that quietly means something else.
    """
    if params is None:
        if callable(gradient) and not options and name is None and expect_mismatch is False \
                and examples == DEFAULT_EXAMPLES:
            raise CheckInputError(
                f"case: params= is required: write @gk.case(params=...) with parentheses (and "
                f"gradient=... unless autograd derives it); a bare @gk.case passes the cost "
                f"itself ({getattr(gradient, '__name__', type(gradient).__name__)!r} here) in "
                f"place of the options")
        raise CheckInputError("case: params= is required (a structure, a function of a numpy "
                              "Generator, or a hypothesis strategy)")
    _check_declaration(examples, name, expect_mismatch, options)

    def declare(cost):
        if not callable(cost):
            raise CheckInputError(f"case: decorates a cost function, got {type(cost).__name__}")
        label = name or getattr(cost, "__name__", "cost")
        setattr(cost, CASE_ATTRIBUTE, Case(cost, gradient, params, dict(options), label,
                                           int(examples), bool(expect_mismatch)))
        return cost
    return declare


def case_options() -> list:
    """The option names a case may carry: compare_gradient's keyword options."""
    return [n for n, p in inspect.signature(compare_gradient).parameters.items()
            if p.kind == p.KEYWORD_ONLY]


def _check_declaration(examples, name, expect_mismatch, options: dict) -> None:
    """One-line CheckInputError for the first ill-formed option of a declaration."""
    if not isinstance(expect_mismatch, (bool, np.bool_)):
        raise CheckInputError(f"case: expect_mismatch: expected True or False, got "
                              f"{expect_mismatch!r} ({type(expect_mismatch).__name__})")
    if isinstance(examples, (bool, np.bool_)) or not isinstance(examples, numbers.Integral) \
            or examples < 1:
        raise CheckInputError(f"case: examples: expected a positive int (the number of points "
                              f"drawn from a strategy), got {examples!r}")
    if name is not None and (not isinstance(name, str) or not name):
        raise CheckInputError(f"case: name: expected a non-empty str or None, got {name!r}")
    known = case_options()
    unknown = [k for k in options if k not in known]
    if unknown:
        raise CheckInputError(f"case: unknown option {unknown[0]!r}; expected examples, name, "
                              f"expect_mismatch or one of {', '.join(known)}")
    try:
        plan.check_method(options.get("method", "auto"))
        plan.check_flags(seed=options.get("seed"), progress=options.get("progress"),
                         vectorized=options.get("vectorized", False))
        for key in ("rtol", "atol"):
            plan.check_tolerance(options.get(key), key)
    except CheckInputError as exc:
        raise CheckInputError(f"case: {exc}") from None


def declared_cases(namespace: dict) -> list:
    """The cases declared on the module-level objects of a namespace, in definition order."""
    return [(name, getattr(obj, CASE_ATTRIBUTE)) for name, obj in namespace.items()
            if isinstance(getattr(obj, CASE_ATTRIBUTE, None), Case)]


def is_strategy(obj) -> bool:
    hyp = sys.modules.get("hypothesis.strategies")
    return hyp is not None and isinstance(obj, hyp.SearchStrategy)


def describe_point(point) -> str:
    with np.printoptions(precision=6, threshold=20):
        if isinstance(point, dict):
            return "{" + ", ".join(f"{k!r}: {describe_point(v)}" for k, v in point.items()) + "}"
        if isinstance(point, (list, tuple)):
            return "[" + ", ".join(describe_point(v) for v in point) + "]"
        return repr(point)


def check_case(c: Case, **overrides) -> CaseResult:
    """Run one declared case; `overrides` (method, seed, ...) win over the declaration."""
    options = {**c.options, **{k: v for k, v in overrides.items() if v is not None}}
    seed = options.get("seed")
    if is_strategy(c.params):
        return _check_drawn(c, options, seed)
    params = c.params(np.random.default_rng(seed)) if callable(c.params) else c.params
    report = compare_gradient(c.cost, params, c.gradient, **options)
    return CaseResult(c, report, params)


def _check_drawn(c: Case, options: dict, seed) -> CaseResult:
    from hypothesis import HealthCheck, given, seed as fix_seed, settings

    seen = {"count": 0}

    @settings(max_examples=c.examples, deadline=None, database=None,
              suppress_health_check=list(HealthCheck), derandomize=seed is None)
    @given(c.params)
    def run(point):
        seen["count"] += 1
        report = compare_gradient(c.cost, point, c.gradient, **options)
        seen["report"], seen["point"] = report, point
        if not report.passed:
            raise GradientMismatchError(report)

    if seed is not None:
        run = fix_seed(seed)(run)
    try:
        run()
    except GradientMismatchError as exc:
        # hypothesis replays the shrunk failing example last, so this is its report
        return CaseResult(c, exc.report, seen.get("point"), drawn=True, checked=seen["count"])
    return CaseResult(c, seen["report"], seen["point"], drawn=True, checked=seen["count"])
