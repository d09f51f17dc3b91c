"""Declared gradient cases: `@gk.case(...)` on a cost, checked by the plugin and the CLI.

A case is declared next to the cost and the decorator returns the cost itself,
still callable as before.  Every declaration is its own case: it is kept in a
registry held by the module whose code applied the decorator (the module global
``__gradient_cases__``), so two declarations on one function
(``right = gk.case(g, ...)(cost)`` and ``canary = gk.case(g_bug, ...)(cost)``)
stay two cases, and a module that imports a case from another does not declare
it again.  A case is labelled by its ``name=``, else by the module variable the
declaration was assigned to, else by the cost's ``__name__``.

`params` may be a structure, a callable taking a numpy Generator and returning
one, or a hypothesis strategy; with a strategy the case is checked at several
drawn points and hypothesis shrinks each distinct failure to the simplest point
that shows it.  hypothesis is imported only when a strategy is used.

Two siblings declare the other checks in the same registry, so that the plugin and
the command line collect, label, report and mark them like gradient cases:
`stochastic_case` on a sampled gradient ``sample_gradient(params, rng)`` (is it right
on average? `compare_stochastic_gradient`), and `product_case` on a function or cost
whose J v, u^T J or H v product is checked (`compare_jvp`, `compare_vjp`,
`compare_hvp`).
"""
from __future__ import annotations

import difflib
import inspect
import numbers
import sys
import traceback
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from . import plan
from .errors import CheckInputError, CheckTypeError
from .pipeline import compare_gradient

CASE_ATTRIBUTE = "gradient_case"     # on the cost: its first declaration (the registry has all)
REGISTRY = "__gradient_cases__"      # module global: the declarations made by that module's code
DEFAULT_EXAMPLES = 25                # drawn points for a strategy


@dataclass
class Case:
    """One declared gradient check on a cost.

    Parameters
    ----------
    cost : callable
        The cost, ``cost(params) -> float``.
    gradient : callable, values like params, or None
        The analytic gradient (None: autodiff derives it).
    params : structure, callable or hypothesis strategy
        Where to check: a parameter structure, a function of a numpy Generator
        returning one, or a strategy drawing them.
    options : dict
        Keyword options of `compare_gradient`.
    name : str
        A label for messages (the ``name=`` given, else the cost's ``__name__``).
    examples : int
        Points drawn from a strategy.
    expect_mismatch : bool
        A planted bug: the case is as expected when the check fails.
    """

    cost: object
    gradient: object
    params: object
    options: dict
    name: str
    examples: int = DEFAULT_EXAMPLES
    expect_mismatch: bool = False

    kind = "gradient"

    @property
    def target(self):
        """The decorated function (the cost)."""
        return self.cost


@dataclass
class StochasticCase:
    """One declared stochastic-gradient check (see `stochastic_case`).

    Parameters
    ----------
    sample_gradient : callable
        The decorated estimator, ``sample_gradient(params, rng)`` -> one draw.
    params : structure or callable
        Where to check: a parameter structure, or a function of a numpy Generator.
    options : dict
        Keyword options of `compare_stochastic_gradient`: the reference (``cost`` or
        ``gradient``), ``level``, ``max_draws``, ``seed``, ``resolution``, ``progress``.
    name : str
        A label for messages.
    expect_mismatch : bool
        A planted bug: the case is as expected when the check fails.
    """

    sample_gradient: object
    params: object
    options: dict
    name: str
    expect_mismatch: bool = False

    kind = "stochastic"

    @property
    def target(self):
        """The decorated function (the estimator)."""
        return self.sample_gradient


@dataclass
class ProductCase:
    """One declared product check (see `product_case`).

    Parameters
    ----------
    product_kind : str
        "jvp", "vjp" or "hvp".
    function : callable
        The decorated function (jvp, vjp) or cost (hvp).
    product : callable or None
        The product checked; None lets autograd supply it.
    params : structure or callable
        Where to check: a parameter structure, or a function of a numpy Generator.
    options : dict
        Keyword options of the product check (probes, seed, rtol, atol; gradient for hvp).
    name : str
        A label for messages.
    expect_mismatch : bool
        A planted bug: the case is as expected when the check fails.
    """

    product_kind: str
    function: object
    product: object
    params: object
    options: dict
    name: str
    expect_mismatch: bool = False

    @property
    def kind(self) -> str:
        return self.product_kind

    @property
    def target(self):
        """The decorated function."""
        return self.function


CASE_TYPES = (Case, StochasticCase, ProductCase)


class _Declaration(NamedTuple):
    """A registry entry: the case, the names bound to its cost in the declaring module
    just before it was declared (the name it is then assigned to is new), and whether
    name= was given."""
    case: Case
    taken: tuple
    named: bool


@dataclass
class PointFailure:
    """One distinct failure of a case whose params are drawn from a strategy.

    Parameters
    ----------
    point : object
        The params (shrunk by hypothesis) at which it shows.
    report : GradientReport or None
        The failing check at that point, when the check ran.
    error : CheckInputError or None
        Why the check could not run there (e.g. the cost raised at that point).
    """

    point: object
    report: object = None
    error: object = None


@dataclass
class CaseResult:
    """The outcome of one declared case.

    Parameters
    ----------
    case : Case
        The declaration checked.
    report : GradientReport
        The check: for drawn params, that of the first distinct failure, or of the
        last point when every drawn point passed.
    point : object, optional
        The params of `report`.
    drawn : bool
        True when params came from a hypothesis strategy.
    checked : int
        Points checked.
    failures : tuple of PointFailure
        For drawn params: one entry per distinct failure, each at its shrunk point.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> from gradcheck_kit.cases import Case, check_case
    >>> c = Case(lambda x: np.sum(x ** 2), lambda x: 2 * x, np.ones(2), {}, "square")
    >>> result = check_case(c)
    >>> result.passed, result.as_expected
    (True, True)
    """

    case: Case
    report: object
    point: object = None
    drawn: bool = False
    checked: int = 1
    failures: tuple = ()

    @property
    def passed(self) -> bool:
        """True when every checked point agrees."""
        return self.report.passed and not self.failures

    @property
    def errors(self) -> list:
        """The drawn points at which the check could not run."""
        return [f for f in self.failures if f.error is not None]

    @property
    def as_expected(self) -> bool:
        """Passed; or, for a declared planted bug, the bug was found and no point raised."""
        if self.case.expect_mismatch:
            return not self.passed and not self.errors
        return self.passed

    def to_text(self) -> str:
        """The report text with what the case adds: planted-bug verdict, drawn points."""
        if len(self.failures) > 1:
            parts = [f"{len(self.failures)} distinct failures at points drawn from the "
                     f"strategy, each shrunk by hypothesis:"]
            parts += [f"failure {i} of {len(self.failures)}:\n{_failure_text(f)}"
                      for i, f in enumerate(self.failures, 1)]
        elif self.failures:
            parts = [_failure_text(self.failures[0])]
        else:
            parts = [self.report.to_text()]
            if self.drawn:
                parts[0] += f"\n  checked at {self.checked} points drawn from the strategy"
        if self.case.expect_mismatch:
            parts[-1] += ("\n  (this case declares a planted bug: the mismatch above was "
                          "expected)" if self.as_expected else
                          f"\n  this case declares a planted bug, but {passing_words(self.case)}: "
                          "the check missed it" if self.passed else
                          "\n  this case declares a planted bug, but the check could not run "
                          "at some drawn points")
        return "\n".join(parts)


def passing_words(c) -> str:
    """What a passing check of this kind of case found, in words.

    Examples
    --------
    >>> passing_words(Case(None, None, 1.0, {}, "c"))
    'every coordinate agrees'
    """
    if c.kind == "stochastic":
        return "no coordinate is biased"
    return "every coordinate agrees" if c.kind == "gradient" else "every probe agrees"


def _failure_text(f: PointFailure) -> str:
    body = f.report.to_text() if f.report is not None else \
        f"the check could not run at a drawn point: {f.error}{_raised_where(f.error)}"
    return f"{body}\n  failing point (shrunk by hypothesis): {describe_point(f.point)}"


def _raised_where(error) -> str:
    """' (raised at FILE:LINE in NAME)' for the user's exception behind an error, or ''."""
    cause = error.__cause__ if error is not None else None
    if cause is None or cause.__traceback__ is None:
        return ""
    frame = traceback.extract_tb(cause.__traceback__)[-1]
    return f" (raised at {frame.filename}:{frame.lineno} in {frame.name})"


def case(gradient=None, params=None, *, examples=DEFAULT_EXAMPLES, name=None,
         expect_mismatch=False, **options):
    """Declare a gradient check on the decorated cost; return a decorator.

    Every option is checked here, when the decorator is applied, so a misspelt or
    ill-typed declaration fails at once with one line, not later as a check that
    quietly means something else.

    Parameters
    ----------
    gradient : callable, values like params, or None
        The analytic gradient: ``gradient(params)`` with the structure of params,
        or its values; None lets the cost's autodiff derive it.
    params : structure, callable or hypothesis strategy
        Required.  Where to check: an array, float, or dict / list / tuple nest of
        those; a function of a numpy ``Generator`` returning one (called with the
        seed's generator); or a hypothesis strategy (see
        `gradcheck_kit.strategies`), checked at `examples` drawn points.
    examples : int, default 25
        Points drawn from a strategy.
    name : str, optional
        The case's label (default: the variable the declaration is assigned to,
        else the cost's ``__name__``).
    expect_mismatch : bool, default False
        Declares a planted bug (a demonstration, or a canary that the check still
        catches it): the case then succeeds when the check fails.
    **options
        Keyword options of `compare_gradient` (method, rtol, atol, seed, ...).

    Returns
    -------
    callable
        The decorator; it registers the case in the calling module and returns the
        cost itself, unchanged.

    Raises
    ------
    CheckTypeError
        (a CheckInputError and a TypeError) An ill-typed option, arguments that
        look swapped, a bare ``@gk.case`` without parentheses, or a decorated
        object that is not callable.
    CheckInputError
        An unknown option, a value out of range, or a missing params.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> @gk.case(gradient=lambda x: 2 * x, params=np.ones(3), method="central")
    ... def square(x):
    ...     return np.sum(x ** 2)
    >>> float(square(np.ones(3)))
    3.0
    """
    __tracebackhide__ = True   # pytest: the user's declaration line is what matters
    _check_arguments(gradient, params, examples, name, expect_mismatch, options)
    _check_declaration(examples, name, expect_mismatch, options)

    def declare(cost):
        __tracebackhide__ = True
        if not callable(cost):
            raise CheckTypeError(f"case: decorates a cost function, got {type(cost).__name__}")
        declared = Case(cost, gradient, params, dict(options),
                        name or getattr(cost, "__name__", "cost"), int(examples),
                        bool(expect_mismatch))
        _register(sys._getframe(1).f_globals, declared, named=name is not None)
        return cost
    return declare


def _register(namespace: dict, declared: Case, named: bool) -> None:
    """Add a declaration to the registry of the module whose code applied the decorator."""
    cost = declared.target
    namespace.setdefault(REGISTRY, []).append(
        _Declaration(declared, _names_bound(namespace, cost), named))
    try:
        if not isinstance(getattr(cost, CASE_ATTRIBUTE, None), CASE_TYPES):
            setattr(cost, CASE_ATTRIBUTE, declared)
    except (AttributeError, TypeError):  # a callable that takes no attributes (a builtin)
        pass


def _names_bound(namespace: dict, obj) -> tuple:
    return tuple(k for k, v in list(namespace.items()) if v is obj and k != REGISTRY)


def _check_arguments(gradient, params, examples, name, expect_mismatch, options) -> None:
    """gradient and params: present, of a usable kind, and not given in swapped order."""
    __tracebackhide__ = True
    if params is None:
        if callable(gradient) and not options and name is None and expect_mismatch is False \
                and examples == DEFAULT_EXAMPLES and not is_strategy(gradient):
            raise CheckTypeError(
                f"case: params= is required: write @gk.case(params=...) with parentheses (and "
                f"gradient=... unless autograd derives it); a bare @gk.case passes the cost "
                f"itself ({getattr(gradient, '__name__', type(gradient).__name__)!r} here) in "
                f"place of the options")
        if gradient is not None and not callable(gradient):
            raise CheckInputError(
                f"case: params= is required; the first positional argument is the gradient "
                f"(got {_kind(gradient)}): write gk.case(params=...) or "
                f"gk.case(gradient=..., params=...)")
        raise CheckInputError("case: params= is required (a structure, a function of a numpy "
                              "Generator, or a hypothesis strategy)")
    if is_strategy(gradient) or (gradient is not None and not callable(gradient)
                                 and is_params_function(params)):
        raise CheckTypeError(
            f"case: gradient= got {_kind(gradient)} and params= {_kind(params)}: the arguments "
            f"look swapped (the first positional argument is the gradient, the second the "
            f"params); write gk.case(gradient=..., params=...)")
    for label, value in (("gradient", gradient), ("params", params)):
        if isinstance(value, (str, bytes)):
            raise CheckTypeError(
                f"case: {label}: expected "
                + ("a function, values like params, or None" if label == "gradient" else
                   "a structure of arrays or floats, a function of a numpy Generator, or a "
                   "hypothesis strategy") + f", got {_kind(value)}")


def _kind(value) -> str:
    if is_strategy(value):
        return "a hypothesis strategy"
    if inspect.isfunction(value) or inspect.ismethod(value):
        return f"a function ({value.__name__})"
    if isinstance(value, (str, bytes)):
        return f"a {type(value).__name__} ({value!r:.40})"
    return f"a {type(value).__name__}"


def case_options() -> list:
    """The option names a case may carry: compare_gradient's keyword options.

    Returns
    -------
    list of str

    Examples
    --------
    >>> "method" in case_options()
    True
    """
    return [n for n, p in inspect.signature(compare_gradient).parameters.items()
            if p.kind == p.KEYWORD_ONLY]


def check_options(options: dict, where: str = "case") -> None:
    """Check keyword options of compare_gradient before any check runs.

    Parameters
    ----------
    options : dict
        Option name to value.
    where : str
        Where they come from, the start of every message.

    Raises
    ------
    CheckInputError
        One line: the first unknown name or ill-typed value.

    Examples
    --------
    >>> check_options({"method": "central", "rtol": 1e-6})
    >>> check_options({"methd": "central"})
    Traceback (most recent call last):
    ...
    gradcheck_kit.errors.CheckInputError: case: unknown option 'methd'; ...
    """
    __tracebackhide__ = True
    known = case_options()
    unknown = [k for k in options if k not in known]
    if unknown:
        extra = ["examples", "name", "expect_mismatch"] if where == "case" else []
        near = difflib.get_close_matches(unknown[0], known + extra, n=1)
        hint = (f"did you mean {near[0]!r}? Expected " if near else "expected ")
        raise CheckInputError(f"{where}: unknown option {unknown[0]!r}; {hint}"
                              f"{', '.join(extra) + ' or ' if extra else ''}one of "
                              f"{', '.join(known)}")
    try:
        plan.check_method(options.get("method", "auto"))
        plan.check_flags(seed=options.get("seed"), progress=options.get("progress"),
                         vectorized=options.get("vectorized", False))
        for key in ("rtol", "atol"):
            plan.check_tolerance(options.get(key), key)
    except CheckInputError as exc:   # the same kind (type or value), with where it came from
        kind = CheckTypeError if isinstance(exc, TypeError) else CheckInputError
        raise kind(f"{where}: {exc}") from None


def _check_declaration(examples, name, expect_mismatch, options: dict) -> None:
    """One-line CheckInputError for the first ill-formed option of a declaration."""
    __tracebackhide__ = True
    if not isinstance(expect_mismatch, (bool, np.bool_)):
        raise CheckTypeError(f"case: expect_mismatch: expected True or False, got "
                              f"{expect_mismatch!r} ({type(expect_mismatch).__name__})")
    if isinstance(examples, (bool, np.bool_)) or not isinstance(examples, numbers.Integral) \
            or examples < 1:
        raise CheckInputError(f"case: examples: expected a positive int (the number of points "
                              f"drawn from a strategy), got {examples!r}")
    if name is not None and (not isinstance(name, str) or not name):
        raise CheckTypeError(f"case: name: expected a non-empty str or None, got {name!r}")
    check_options(options, "case")


STOCHASTIC_DEFAULTS = {"level": 1e-3, "max_draws": 4096, "seed": None, "resolution": 0.1,
                       "progress": None}
PRODUCT_KINDS = ("jvp", "vjp", "hvp")


def stochastic_case(params=None, *, cost=None, gradient=None, level=1e-3, max_draws=4096,
                    seed=None, resolution=0.1, progress=None, name=None,
                    expect_mismatch=False):
    """Declare a stochastic-gradient check on the decorated estimator; return a decorator.

    The decorated function is ``sample_gradient(params, rng)``, which returns one
    draw of a sampled gradient (a mini-batch, dropout or Monte Carlo estimate)
    shaped like params.  The case asks `compare_stochastic_gradient` whether its
    mean is the gradient of the full cost.  It sits in the same registry as
    `case` declarations: the pytest plugin collects it as ``gradient[<label>]``,
    ``gradcheck-kit check`` checks it, and their reports, JSON and planted-bug
    marks are the same.  Every option is checked when the decorator is applied.

    Parameters
    ----------
    params : structure or callable
        Required.  Where to check: an array, float, or dict / list / tuple nest
        of those, or a function of a numpy ``Generator`` returning one.
        (Hypothesis strategies are for `case` only: each drawn point would be a
        separate statistical test.)
    cost : callable, optional
        The deterministic full cost; its numeric gradient is the reference.
    gradient : callable or values, optional
        The full gradient (a function of params, or values).  Exactly one of
        `cost` and `gradient` is given.
    level, max_draws, resolution, progress
        As in `compare_stochastic_gradient`.
    seed : int, optional
        The seed of the draws.  The declaration's seed is kept over a session's
        (``--gradient-seed``, ``--seed``), which seeds only cases that give none:
        a stochastic verdict at another seed is another random test, which may
        raise a false alarm (at most `level` of the time).
    name : str, optional
        The case's label (default: the variable the declaration is assigned to,
        else the function's ``__name__``).
    expect_mismatch : bool, default False
        Declares a planted bias: the case succeeds when the check fails.

    Returns
    -------
    callable
        The decorator; it registers the case in the calling module and returns the
        estimator itself, unchanged.

    Raises
    ------
    CheckTypeError
        An ill-typed name or expect_mismatch, a bare ``@gk.stochastic_case``, or a
        decorated object that is not callable.
    CheckInputError
        A missing params, a strategy as params, not exactly one reference, or an
        option out of range.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> data = np.linspace(-1.0, 1.0, 40)
    >>> @gk.stochastic_case(params=np.array([0.5]), gradient=np.array([0.5]), seed=3)
    ... def batch_gradient(w, rng):   # d/dw of mean((w - data)^2 / 2), 4 at a time
    ...     return np.array([np.mean(w[0] - rng.choice(data, size=4, replace=False))])
    >>> batch_gradient(np.array([0.5]), np.random.default_rng(0)).shape
    (1,)
    """
    __tracebackhide__ = True
    where = "stochastic_case"
    _check_common(where, params, name, expect_mismatch, bare=callable(params) and cost is None
                  and gradient is None)
    if (cost is None) == (gradient is None):
        raise CheckInputError(
            f"{where}: give exactly one reference, cost= (the deterministic full cost, "
            f"differentiated numerically) or gradient= (the full gradient: a function of "
            f"params, or its values); got {'both' if cost is not None else 'neither'}")
    for label, value in (("cost", cost), ("gradient", gradient)):
        if isinstance(value, (str, bytes)):
            raise CheckTypeError(f"{where}: {label}: expected a function"
                                 + (" or values like params" if label == "gradient" else "")
                                 + f", got {_kind(value)}")
    from .stochastic import _check_options as check_stochastic   # the engine's own rules
    try:
        check_stochastic(level, max_draws, seed, resolution, progress, cost, gradient)
    except CheckInputError as exc:
        raise CheckInputError(f"{where}: {exc}") from None
    options = {"cost": cost, "gradient": gradient, "level": level, "max_draws": max_draws,
               "seed": seed, "resolution": resolution, "progress": progress}

    def declare(sample_gradient):
        __tracebackhide__ = True
        if not callable(sample_gradient):
            raise CheckTypeError(f"{where}: decorates a function sample_gradient(params, rng), "
                                 f"got {type(sample_gradient).__name__}")
        declared = StochasticCase(sample_gradient, params, options,
                                  name or getattr(sample_gradient, "__name__", "sample_gradient"),
                                  bool(expect_mismatch))
        _register(sys._getframe(1).f_globals, declared, named=name is not None)
        return sample_gradient
    return declare


def product_case(kind, product=None, params=None, *, gradient=None, probes=3, seed=None,
                 rtol=None, atol=None, name=None, expect_mismatch=False):
    """Declare a check of a Jacobian-vector, vector-Jacobian or Hessian-vector product.

    Decorates the function (``kind="jvp"`` or ``"vjp"``) or the scalar cost
    (``kind="hvp"``) whose product is checked, along random probes, by
    `compare_jvp`, `compare_vjp` or `compare_hvp`.  It sits in the same registry
    as `case` declarations, so the pytest plugin and ``gradcheck-kit check``
    collect, report and mark it like them.  Options are checked when the
    decorator is applied.

    Parameters
    ----------
    kind : {"jvp", "vjp", "hvp"}
        The product: ``jvp(params, v)`` = J v, ``vjp(params, u)`` = u^T J,
        ``hvp(params, v)`` = H v (the Hessian of the cost times v).
    product : callable or None
        The product checked; None lets autograd supply it.
    params : structure or callable
        Required.  A parameter structure, or a function of a numpy Generator.
    gradient : callable, optional
        For ``kind="hvp"`` only: the gradient whose differences stand for H v
        (None: autograd's).
    probes, seed, rtol, atol
        As in the product checks; a session's seed, rtol and atol win over them,
        as for `case`.
    name : str, optional
        The case's label (default: the variable the declaration is assigned to,
        else the function's ``__name__``).
    expect_mismatch : bool, default False
        Declares a planted bug: the case succeeds when the check fails.

    Returns
    -------
    callable
        The decorator; it registers the case and returns the function unchanged.

    Raises
    ------
    CheckTypeError
        An ill-typed option, or a decorated object that is not callable.
    CheckInputError
        An unknown kind, a missing params, a strategy as params, gradient= with a
        kind other than "hvp", or a value out of range.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> A = np.array([[2.0, 1.0], [1.0, 3.0]])
    >>> @gk.product_case("hvp", lambda x, v: A @ v, params=np.array([0.2, -0.1]),
    ...                  gradient=lambda x: A @ x)
    ... def bowl(x):
    ...     return 0.5 * x @ A @ x
    >>> float(bowl(np.zeros(2)))
    0.0
    """
    __tracebackhide__ = True
    where = "product_case"
    if kind not in PRODUCT_KINDS:
        choices = ", ".join(map(repr, PRODUCT_KINDS))
        raise CheckInputError(f"{where}: kind: expected one of {choices}, got {kind!r}")
    _check_common(where, params, name, expect_mismatch, bare=False)
    for label, value in (("product", product), ("gradient", gradient)):
        if value is not None and not callable(value):
            raise CheckTypeError(f"{where}: {label}: expected a function or None, got "
                                 f"{_kind(value)}")
    if gradient is not None and kind != "hvp":
        raise CheckInputError(f"{where}: gradient= is for kind 'hvp' (the gradient whose "
                              f"differences stand for H v); kind {kind!r} takes none")
    if isinstance(probes, (bool, np.bool_)) or not isinstance(probes, numbers.Integral) \
            or probes < 1:
        raise CheckInputError(f"{where}: probes: expected an int >= 1, got {probes!r}")
    from .products import check_seed, check_tolerance
    try:
        check_seed(seed)
        check_tolerance(rtol, "rtol")
        check_tolerance(atol, "atol")
    except CheckInputError as exc:
        raise CheckInputError(f"{where}: {exc}") from None
    options = {"probes": int(probes), "seed": seed, "rtol": rtol, "atol": atol}
    if kind == "hvp":
        options["gradient"] = gradient

    def declare(function):
        __tracebackhide__ = True
        if not callable(function):
            raise CheckTypeError(f"{where}: decorates a function, got {type(function).__name__}")
        declared = ProductCase(kind, function, product, params, options,
                               name or getattr(function, "__name__", "function"),
                               bool(expect_mismatch))
        _register(sys._getframe(1).f_globals, declared, named=name is not None)
        return function
    return declare


def _check_common(where, params, name, expect_mismatch, bare) -> None:
    """params, name and expect_mismatch of a stochastic or product declaration."""
    __tracebackhide__ = True
    if bare:
        raise CheckTypeError(f"{where}: got {_kind(params)} as params and no reference: write "
                             f"@gk.{where}(params=..., cost=... or gradient=...) with "
                             f"parentheses (a bare @gk.{where} passes the decorated function "
                             f"in place of the options)")
    if params is None:
        raise CheckInputError(f"{where}: params= is required (a structure, or a function of a "
                              "numpy Generator)")
    if is_strategy(params):
        raise CheckInputError(f"{where}: params: a hypothesis strategy draws many points, each "
                              "its own check; give a structure or a function of a numpy "
                              "Generator (strategies are for gk.case)")
    if isinstance(params, (str, bytes)):
        raise CheckTypeError(f"{where}: params: expected a structure of arrays or floats, or a "
                             f"function of a numpy Generator, got {_kind(params)}")
    if not isinstance(expect_mismatch, (bool, np.bool_)):
        raise CheckTypeError(f"{where}: expect_mismatch: expected True or False, got "
                             f"{expect_mismatch!r} ({type(expect_mismatch).__name__})")
    if name is not None and (not isinstance(name, str) or not name):
        raise CheckTypeError(f"{where}: name: expected a non-empty str or None, got {name!r}")


def declared_cases(namespace: dict) -> list:
    """The cases declared by a module's code, in declaration order, with their labels.

    Parameters
    ----------
    namespace : dict
        The module's globals (``vars(module)``).

    Returns
    -------
    list of (str, Case)
        Labels are unique: the ``name=`` given, else the module variable the
        declaration was assigned to, else the cost's ``__name__``; a repeated
        label gets ``-2``, ``-3``, ...  Cases the module only imported are not
        listed: they belong to the module that declared them.

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> ns = {"gk": gk, "np": np}
    >>> exec("def cost(x):\\n    return np.sum(x ** 2)\\n"
    ...      "right = gk.case(lambda x: 2 * x, params=np.ones(2))(cost)\\n"
    ...      "canary = gk.case(lambda x: 3 * x, params=np.ones(2), expect_mismatch=True)(cost)",
    ...      ns)
    >>> [label for label, _ in declared_cases(ns)]
    ['right', 'canary']
    """
    declarations = [d for d in namespace.get(REGISTRY, ()) if isinstance(d, _Declaration)]
    labels, seen = [], {}
    for k, d in enumerate(declarations):
        label = d.case.name if d.named else _assigned_name(declarations, k, namespace)
        seen[label] = seen.get(label, 0) + 1
        labels.append(label if seen[label] == 1 else f"{label}-{seen[label]}")
    return [(label, d.case) for label, d in zip(labels, declarations)]


def _assigned_name(declarations: list, k: int, namespace: dict) -> str:
    """The variable declaration k was assigned to: a name bound to its cost that was not
    bound when it was declared, but was by the next declaration of the same cost (or now)."""
    d = declarations[k]
    later = next((e.taken for e in declarations[k + 1:] if e.case.target is d.case.target), None)
    bound = later if later is not None else _names_bound(namespace, d.case.target)
    new = [n for n in bound if n not in d.taken]
    return new[0] if new else d.case.name


def is_params_function(obj) -> bool:
    """True for params given as a function of a Generator: a callable that is neither a
    strategy nor a parameter structure that happens to be callable (a torch module)."""
    if not callable(obj) or is_strategy(obj):
        return False
    torch = sys.modules.get("torch")   # imported only by users of torch
    return torch is None or not isinstance(obj, torch.nn.Module)


def is_strategy(obj) -> bool:
    """True for a hypothesis strategy (without importing hypothesis)."""
    hyp = sys.modules.get("hypothesis.strategies")
    return hyp is not None and isinstance(obj, hyp.SearchStrategy)


def describe_point(point) -> str:
    """A short, readable rendering of a parameter structure."""
    with np.printoptions(precision=6, threshold=20):
        if isinstance(point, dict):
            return "{" + ", ".join(f"{k!r}: {describe_point(v)}" for k, v in point.items()) + "}"
        if isinstance(point, (list, tuple)):
            return "[" + ", ".join(describe_point(v) for v in point) + "]"
        return repr(point)


def check_case(c, **overrides) -> CaseResult:
    """Run one declared case.

    Parameters
    ----------
    c : Case, StochasticCase or ProductCase
        The declaration.
    **overrides
        compare_gradient options (method, seed, ...) that win over the declaration;
        None values are ignored.  A product case takes only seed, rtol and atol of
        them; a stochastic case only executor, progress, and seed where it
        declares none (see `stochastic_case`).

    Returns
    -------
    CaseResult

    Raises
    ------
    CheckInputError
        The check cannot run: bad params or gradient, a params function that
        raises, a cost that raises at the base point; for drawn params, a cost
        that raises at every distinct failing point (one line per failure).

    Examples
    --------
    >>> import numpy as np
    >>> c = Case(lambda x: np.sum(x ** 3), lambda x: 2 * x ** 2, np.ones(2), {}, "cube")
    >>> check_case(c, method="central").passed
    False
    """
    given = {k: v for k, v in overrides.items() if v is not None}
    if isinstance(c, StochasticCase):
        return _check_stochastic(c, given)
    if isinstance(c, ProductCase):
        return _check_product(c, given)
    options = {**c.options, **given}
    seed = options.get("seed")
    if is_strategy(c.params):
        return _check_drawn(c, options, seed)
    params = _call_params(c, seed) if is_params_function(c.params) else c.params
    report = compare_gradient(c.cost, params, c.gradient, **options)
    return CaseResult(c, report, params)


def _check_stochastic(c: StochasticCase, given: dict) -> CaseResult:
    """The estimator's check.  Of the overrides only seed (when the case has none),
    executor and progress apply; method, tolerances and coordinates are the gradient
    checks' and do not."""
    from .stochastic import compare_stochastic_gradient

    options = dict(c.options)
    if options.get("seed") is None:
        options["seed"] = given.get("seed")
    for key in ("executor", "progress"):
        if key in given:
            options[key] = given[key]
    params = _call_params(c, options["seed"]) if is_params_function(c.params) else c.params
    report = compare_stochastic_gradient(c.sample_gradient, params, **options)
    return CaseResult(c, report, params)


PRODUCT_OVERRIDES = ("seed", "rtol", "atol")   # the options a session may set on a product


def _check_product(c: ProductCase, given: dict) -> CaseResult:
    """The product's check, with a session's seed and tolerances winning (as for `case`)."""
    from . import products

    options = {**c.options, **{k: v for k, v in given.items() if k in PRODUCT_OVERRIDES}}
    params = _call_params(c, options["seed"]) if is_params_function(c.params) else c.params
    check = {"jvp": products.compare_jvp, "vjp": products.compare_vjp,
             "hvp": products.compare_hvp}[c.product_kind]
    report = check(c.function, params, c.product, **options)
    return CaseResult(c, report, params)


def _call_params(c: Case, seed):
    """params from the case's params function, called with a Generator under `seed`."""
    try:
        return c.params(np.random.default_rng(seed))
    except CheckInputError:
        raise
    except Exception as exc:  # noqa: BLE001 - the user's function: say whose error it is
        label = getattr(c.params, "__name__", type(c.params).__name__)
        raise CheckInputError(f"params: the params function {label!r} (called with a numpy "
                              f"Generator) raised {type(exc).__name__}: {exc}") from exc


class _FailedAt(Exception):
    """Raised inside hypothesis's test function so that the point travels with the failure;
    hypothesis tells failures apart by where they were raised and by their cause."""

    def __init__(self, failure: PointFailure):
        super().__init__("gradient check failed at a drawn point")
        self.failure = failure


def _check_drawn(c: Case, options: dict, seed) -> CaseResult:
    from hypothesis import HealthCheck, Verbosity, given, settings
    from hypothesis import seed as fix_seed

    seen = {"count": 0}

    # quiet: the shrunk points are printed in our own text, not on captured stdout
    @settings(max_examples=c.examples, deadline=None, database=None, verbosity=Verbosity.quiet,
              suppress_health_check=list(HealthCheck), derandomize=seed is None)
    @given(c.params)
    def run(point):
        seen["count"] += 1
        try:
            report = compare_gradient(c.cost, point, c.gradient, **options)
        except CheckInputError as exc:
            raise _FailedAt(PointFailure(point, error=exc)) from exc
        seen["report"], seen["point"] = report, point
        if not report.passed:
            raise _FailedAt(PointFailure(point, report=report))

    if seed is not None:
        run = fix_seed(seed)(run)
    try:
        run()
    except Exception as exc:  # noqa: BLE001 - hypothesis raises one failure or a group
        failures = _failures_in(exc)
        if failures is None:
            raise
    else:
        return CaseResult(c, seen["report"], seen["point"], drawn=True, checked=seen["count"])
    with_report = [f for f in failures if f.report is not None]
    if not with_report:
        lines = [f"at {describe_point(f.point)}: {f.error}" for f in failures]
        raise CheckInputError(
            f"the check could not run at {len(failures)} distinct drawn "
            f"point{'s' if len(failures) > 1 else ''} (shrunk by hypothesis): "
            + ("\n  ".join([""] + lines) if len(lines) > 1 else lines[0])) \
            from failures[0].error
    first = with_report[0]
    ordered = with_report + [f for f in failures if f.report is None]   # reports first
    return CaseResult(c, first.report, first.point, drawn=True, checked=seen["count"],
                      failures=tuple(ordered))


def _failures_in(exc: BaseException):
    """The PointFailures in what hypothesis raised (one, or a group of distinct ones);
    None when something else went wrong."""
    if isinstance(exc, _FailedAt):
        return [exc.failure]
    inner = getattr(exc, "exceptions", None)   # an ExceptionGroup (or its backport)
    if isinstance(inner, (list, tuple)) and inner:
        found = [_failures_in(e) for e in inner]
        if all(f is not None for f in found):
            return [f for part in found for f in part]
    return None

