"""Stage 2, plan: which coordinates, which stencil, which steps, and the checks of every option.

Everything here is decided before the numeric derivatives are evaluated: the
options are checked, the coordinates to examine are chosen (all, a sample per
parameter, or lists), the steps are set and turned into evaluation requests for
the evaluate stage.

The method table (names, offsets, step exponents) lives here because choosing
steps and requests needs it; the stencils stage, to the right, reads it from here
and adds the error models.

Validation, one layer for every public entry point (and for the plugin and the
command line): a wrong type raises `CheckTypeError` (a TypeError and a
CheckInputError), a wrong value `CheckInputError` (a ValueError).  Each message
names the option, says what was expected and what was got.  `check_options`
checks a whole set of keyword options at once.
"""
from __future__ import annotations

import difflib
import numbers
from concurrent.futures import Executor

import numpy as np

from .errors import CheckInputError, CheckTypeError
from .tree import Layout, coordinate_name, flatten_like

METHODS = ("forward", "backward", "central", "five-point", "richardson", "complex-step")
METHOD_CHOICES = METHODS + ("auto",)

# Offsets, in units of the step h, at which each method evaluates the cost.
OFFSETS = {
    "forward": (1.0,),
    "backward": (-1.0,),
    "central": (1.0, -1.0),
    "five-point": (1.0, -1.0, 2.0, -2.0),
    "richardson": (1.0, -1.0, 0.5, -0.5),   # central differences at h and h/2, extrapolated
    "complex-step": (1j,),
}

# Exponent of eps in the step: 1/(p+1) for truncation order p (Nocedal & Wright,
# Numerical Optimization, 2nd ed., section 8.1).
STEP_POWER = {"forward": 1 / 2, "backward": 1 / 2, "central": 1 / 3,
              "five-point": 1 / 5, "richardson": 1 / 5}

# The complex step has no subtractive cancellation, so h can be tiny; 1e-20 makes the
# O(h^2) truncation vanish (Squire & Trapp, SIAM Review 40(1), 1998).
COMPLEX_STEP = 1e-20

# A step given by the caller is refused when a stencil point, as the parameters store it,
# moves the coordinate by more than this fraction more or less than asked: the difference
# would be divided by a step that was not taken (step=1e-300 at x = 1 moves nothing at all
# and gave a gradient of zeros).
STEP_ROUNDING_LIMIT = 0.01


def scale_of(x: np.ndarray) -> np.ndarray:
    """The size that a coordinate's step is relative to: max(|x_i|, 1).

    A non-finite entry (a NaN the cost may never read) gets 1, so that it cannot
    spread into the steps and estimates of every other coordinate.

    Examples
    --------
    >>> scale_of(np.array([0.5, -3.0, np.nan]))
    array([1., 3., 1.])
    """
    with np.errstate(invalid="ignore"):
        return np.where(np.isfinite(x), np.maximum(np.abs(x), 1.0), 1.0)


_ZERO = np.zeros(1)
_ZERO.setflags(write=False)


def zeros(n: int) -> np.ndarray:
    """n read-only zeros that take no memory (one zero, seen n times): the estimates a
    stencil does not make, at any n (np.broadcast_to does the same, 4x slower).

    Examples
    --------
    >>> zeros(3).tolist(), zeros(3).flags.writeable
    ([0.0, 0.0, 0.0], False)
    """
    return np.ndarray(n, buffer=_ZERO, strides=(0,))


def power_of_two(h):
    """Largest power of two not above h (positive h).

    Examples
    --------
    >>> float(power_of_two(0.3))
    0.25
    """
    return np.exp2(np.floor(np.log2(h)))


def default_steps(method: str, x: np.ndarray, eps: np.ndarray) -> np.ndarray:
    """Automatic steps: eps^(1/(p+1)) * max(|x_i|, 1), rounded down to a power of two.

    Parameters
    ----------
    method : str
        One of METHODS.
    x : ndarray of float, shape (n,)
        The base point.
    eps : ndarray of float, shape (n,) or a float
        The relative precision each coordinate's step is sized for.

    Returns
    -------
    ndarray of float, shape (n,)

    Examples
    --------
    >>> default_steps("central", np.array([0.0, 8.0]), np.full(2, 2.0 ** -52))
    array([3.81469727e-06, 3.05175781e-05])
    """
    if method == "complex-step":
        return COMPLEX_STEP * scale_of(x)
    return power_of_two(eps ** STEP_POWER[method] * scale_of(x))


# --- option checks ------------------------------------------------------------------

def _got(value) -> str:
    """How a wrong value is shown in a message: its repr and, where it helps, its type."""
    shown = repr(value)
    if len(shown) > 60:
        shown = shown[:57] + "..."
    if isinstance(value, (str, bool, type(None))):
        return shown
    return f"{shown} ({type(value).__name__})"


def is_int(value) -> bool:
    """An int or numpy integer, and not a bool (True is not a count)."""
    return isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))


def is_real(value) -> bool:
    """An int, float or numpy real scalar, and not a bool."""
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


def check_callable(value, name: str):
    """`value` must be callable (a cost, a gradient function, ...).

    Parameters
    ----------
    value : object
    name : str
        The argument's name, for the message.

    Returns
    -------
    The value, unchanged.

    Raises
    ------
    CheckTypeError
        When it is not callable.

    Examples
    --------
    >>> check_callable(len, "cost") is len
    True
    """
    if not callable(value):
        raise CheckTypeError(f"{name}: expected a callable taking params, got {_got(value)}")
    return value


def check_gradient(gradient, name: str = "gradient"):
    """The form of an analytic gradient argument: None (autograd), a function of params, a
    number, an ndarray, or a dict / list / tuple nest like params.

    Its structure and shapes are checked against params later (tree.flatten_like).

    Raises
    ------
    CheckTypeError
        For a str, a set, a masked array and other things that cannot be a gradient.

    Examples
    --------
    >>> check_gradient(None) is None
    True
    """
    if gradient is None or callable(gradient) or is_real(gradient):
        return gradient
    if isinstance(gradient, np.ma.MaskedArray):
        raise CheckTypeError(f"{name}: a masked array; masks are not supported (pass "
                             ".filled(value))")
    if isinstance(gradient, (np.ndarray, np.generic, dict, list, tuple)) and \
            not isinstance(gradient, (np.str_, np.bytes_)):
        return gradient
    raise CheckTypeError(f"{name}: expected None (autograd), a function of params, or values "
                         f"in the structure of params, got {_got(gradient)}")


def check_method(method) -> str:
    """A method name: one of METHOD_CHOICES.

    Parameters
    ----------
    method : str

    Returns
    -------
    str
        The method.

    Raises
    ------
    CheckTypeError
        For a method that is not a str.
    CheckInputError
        For an unknown name (with the nearest known name, when one is close).

    Examples
    --------
    >>> check_method("central")
    'central'
    """
    choices = ", ".join(map(repr, METHOD_CHOICES))
    if not isinstance(method, str):
        raise CheckTypeError(f"method: expected a str, one of {choices}, got {_got(method)}")
    if method not in METHOD_CHOICES:
        near = difflib.get_close_matches(method, METHOD_CHOICES, n=1)
        hint = f"; did you mean {near[0]!r}?" if near else ""
        raise CheckInputError(f"method: expected one of {choices}, got {method!r}{hint}")
    return method


def check_tolerance(value, name: str):
    """rtol / atol: None or a finite number >= 0.

    Parameters
    ----------
    value : float or None
    name : str
        "rtol" or "atol", for the message.

    Returns
    -------
    float or None

    Raises
    ------
    CheckTypeError
        For a value that is not a number (a str, a bool).
    CheckInputError
        For a negative or non-finite number.

    Examples
    --------
    >>> check_tolerance(1e-6, "rtol"), check_tolerance(None, "atol")
    (1e-06, None)
    """
    if value is None:
        return None
    if not is_real(value):
        raise CheckTypeError(f"{name}: expected a finite number >= 0 or None, got {_got(value)}")
    if not np.isfinite(value) or value < 0:
        raise CheckInputError(f"{name}: expected a finite number >= 0 or None, got {value!r}")
    return float(value)


def check_seed(seed):
    """A seed for numpy's random generator: None or an int >= 0.

    Returns
    -------
    int or None

    Raises
    ------
    CheckTypeError
        For a float, a bool, a str, ...
    CheckInputError
        For a negative int.

    Examples
    --------
    >>> check_seed(7), check_seed(None)
    (7, None)
    """
    if seed is None:
        return None
    if not is_int(seed):
        raise CheckTypeError(f"seed: expected an int >= 0 or None, got {_got(seed)}")
    if seed < 0:
        raise CheckInputError(f"seed: expected an int >= 0 or None, got {int(seed)}")
    return int(seed)


def check_bool(value, name: str) -> bool:
    """True or False (numpy's bool too); 1, "yes" and None are refused.

    Examples
    --------
    >>> check_bool(True, "vectorized")
    True
    """
    if not isinstance(value, (bool, np.bool_)):
        raise CheckTypeError(f"{name}: expected True or False, got {_got(value)}")
    return bool(value)


def check_optional_bool(value, name: str):
    """None, True or False (`progress`, `complex_safe`: None means decide automatically).

    Examples
    --------
    >>> check_optional_bool(None, "progress") is None
    True
    """
    if value is None:
        return None
    if not isinstance(value, (bool, np.bool_)):
        raise CheckTypeError(f"{name}: expected True, False or None, got {_got(value)}")
    return bool(value)


def check_budget(budget):
    """An evaluation budget: None (no limit) or an int >= 1; True is not a count.

    Examples
    --------
    >>> check_budget(500)
    500
    """
    if budget is None:
        return None
    if not is_int(budget):
        raise CheckTypeError(f"budget: expected an int >= 1 (cost evaluations) or None, "
                             f"got {_got(budget)}")
    if budget < 1:
        raise CheckInputError(f"budget: expected an int >= 1 (cost evaluations) or None, "
                              f"got {int(budget)}")
    return int(budget)


def check_executor(executor):
    """None or a concurrent.futures.Executor (anything with a `submit` method will do).

    Examples
    --------
    >>> check_executor(None) is None
    True
    """
    if executor is None or isinstance(executor, Executor) or \
            callable(getattr(executor, "submit", None)):
        return executor
    raise CheckTypeError(f"executor: expected a concurrent.futures.Executor (or None), "
                         f"got {_got(executor)}")


def check_step(step):
    """The form of `step`: None, one finite number > 0, or a structure like params.

    The structure, and whether each step survives rounding at its coordinate, are
    checked once params are known (see `steps`).

    Examples
    --------
    >>> check_step(1e-4), check_step(None)
    (0.0001, None)
    """
    if step is None:
        return None
    if is_real(step):
        if not np.isfinite(step) or step <= 0:
            raise CheckInputError(f"step: expected a finite number > 0, got {step!r}")
        return float(step)
    if isinstance(step, (dict, list, tuple, np.ndarray)) and \
            not isinstance(step, np.ma.MaskedArray):
        return step
    raise CheckTypeError(f"step: expected None (automatic steps), a number > 0 or a structure "
                         f"like params, got {_got(step)}")


def check_coordinates(coordinates):
    """The form of `coordinates`: None, an int k >= 1, or {parameter name: [indices]}.

    Whether the names and indices exist in params is checked by `choose_coordinates`.

    Examples
    --------
    >>> check_coordinates({"W": [0, (1, 2)]})
    {'W': [0, (1, 2)]}
    """
    if coordinates is None:
        return None
    if is_int(coordinates):
        if coordinates < 1:
            raise CheckInputError(f"coordinates: expected an int >= 1, got {int(coordinates)}")
        return int(coordinates)
    if isinstance(coordinates, dict):
        for name, spec in coordinates.items():
            if not isinstance(name, str):
                raise CheckTypeError(f"coordinates: keys are parameter names (str), got "
                                     f"{_got(name)}")
            if not isinstance(spec, (list, tuple, range, np.ndarray)):
                raise CheckTypeError(f"coordinates for '{name}': expected a list of flat "
                                     f"indices or index tuples, got {_got(spec)}")
        return coordinates
    raise CheckTypeError(
        "coordinates: expected None (all), an int k (k per parameter) or a dict "
        f"{{parameter name: [indices]}}, got {_got(coordinates)}")


# One check per keyword option of the public checks.  The plugin and the command line
# check a declaration's or a command's options through check_options.
OPTION_CHECKS = {
    "method": check_method,
    "step": check_step,
    "rtol": lambda value: check_tolerance(value, "rtol"),
    "atol": lambda value: check_tolerance(value, "atol"),
    "coordinates": check_coordinates,
    "seed": check_seed,
    "executor": check_executor,
    "vectorized": lambda value: check_bool(value, "vectorized"),
    "progress": lambda value: check_optional_bool(value, "progress"),
    "complex_safe": lambda value: check_optional_bool(value, "complex_safe"),
    "allow_undecided": lambda value: check_bool(value, "allow_undecided"),
    "with_rng": lambda value: check_bool(value, "with_rng"),
    "budget": check_budget,
}


def check_options(where: str = "", known=None, **options) -> dict:
    """Check keyword options of a check by name; returns them normalised.

    Parameters
    ----------
    where : str
        Put before each message, e.g. "case: " or "compare_jacobian: ".
    known : iterable of str, optional
        The option names the caller accepts (default: every name in OPTION_CHECKS).
    **options
        The options, as given.

    Returns
    -------
    dict
        The same names, each value checked (numbers as float or int, flags as bool).

    Raises
    ------
    CheckTypeError
        For an unknown option name, or a value of the wrong type.
    CheckInputError
        For a value out of range.

    Examples
    --------
    >>> check_options(method="central", rtol=1e-6, seed=3)
    {'method': 'central', 'rtol': 1e-06, 'seed': 3}
    >>> try:
    ...     check_options("case: ", metod="central")
    ... except TypeError as exc:
    ...     print(str(exc)[:40])
    case: unknown option 'metod'; did you me
    """
    names = list(OPTION_CHECKS) if known is None else list(known)
    checked = {}
    for name, value in options.items():
        if name not in names or name not in OPTION_CHECKS:
            near = difflib.get_close_matches(name, names, n=1)
            hint = (f"; did you mean {near[0]!r}?" if near
                    else f"; expected one of {', '.join(names)}")
            raise CheckTypeError(f"{where}unknown option {name!r}{hint}")
        try:
            checked[name] = OPTION_CHECKS[name](value)
        except CheckInputError as exc:
            if not where:
                raise
            raise type(exc)(f"{where}{exc}") from None
    return checked


def check_flags(*, seed=None, progress=None, vectorized=False, complex_safe=None,
                allow_undecided=False) -> None:
    """seed: None or an int >= 0; progress, complex_safe: None or a bool; the rest bools.

    Kept for callers that check these five together; `check_options` checks any set.

    Examples
    --------
    >>> check_flags(seed=1, progress=False)
    """
    check_options(seed=seed, progress=progress, vectorized=vectorized,
                  complex_safe=complex_safe, allow_undecided=allow_undecided)


# --- coordinates and steps -------------------------------------------------------------

def _leaf_indices(leaf, spec, name):
    """Flat positions (within the leaf) named by a list of ints or index tuples."""
    out = []
    for item in spec:
        if isinstance(item, (tuple, list)):
            if len(item) != len(leaf.shape):
                raise CheckInputError(
                    f"coordinates for '{name}': index {tuple(item)} has {len(item)} entries, "
                    f"the parameter has shape {leaf.shape}")
            if not all(is_int(i) for i in item):
                raise CheckTypeError(f"coordinates for '{name}': index {tuple(item)} holds "
                                     "entries that are not ints")
            try:
                out.append(int(np.ravel_multi_index(tuple(int(i) for i in item), leaf.shape)))
            except ValueError as exc:
                raise CheckInputError(f"coordinates for '{name}': index {tuple(item)} is out of "
                                      f"range for shape {leaf.shape}") from exc
        elif is_int(item):
            if not -leaf.size <= item < leaf.size:
                raise CheckInputError(f"coordinates for '{name}': flat index {item} is out of "
                                      f"range for {leaf.size} entries")
            out.append(int(item) % leaf.size)
        else:
            raise CheckTypeError(f"coordinates for '{name}': expected ints or index tuples, "
                                 f"got {_got(item)}")
    return out


def choose_coordinates(layout: Layout, coordinates, seed, analytic: np.ndarray) -> np.ndarray:
    """Sorted flat indices to examine.

    None: all.  An int k: k per parameter, drawn under `seed`, with the entries of
    largest analytic magnitude always among them (half of the k, at least one),
    since a bug in a large entry matters most.  A dict {parameter name: [indices]}:
    those entries (flat ints or index tuples); unnamed parameters are skipped.

    Parameters
    ----------
    layout : tree.Layout
    coordinates : None, int or dict
    seed : int or None
    analytic : ndarray of float, shape (layout.size,)

    Returns
    -------
    ndarray of int

    Raises
    ------
    CheckTypeError, CheckInputError
        For a malformed `coordinates`, a name that is not a parameter, an index out of range.
    """
    coordinates = check_coordinates(coordinates)
    if coordinates is None:
        return np.arange(layout.size)
    if isinstance(coordinates, int):
        k = coordinates
        rng = np.random.default_rng(check_seed(seed))
        chosen = []
        for leaf in layout.leaves:
            span = np.arange(leaf.offset, leaf.offset + leaf.size)
            if leaf.size <= k:
                chosen.append(span)
                continue
            n_top = max(1, k // 2)
            order = np.argsort(-np.abs(analytic[span]), kind="stable")
            top = span[order[:n_top]]
            rest = rng.choice(np.setdiff1d(span, top), size=k - n_top, replace=False)
            chosen.append(np.concatenate([top, rest]))
        return np.unique(np.concatenate(chosen))
    names = {leaf.name: leaf for leaf in layout.leaves}
    chosen = []
    for name, spec in coordinates.items():
        if name not in names:
            raise CheckInputError(f"coordinates: no parameter named {name!r}; parameters are "
                                  f"{sorted(names)}")
        leaf = names[name]
        chosen += [leaf.offset + i for i in _leaf_indices(leaf, spec, name)]
    if not chosen:
        raise CheckInputError("coordinates: the lists name no entry")
    return np.unique(np.array(chosen, dtype=int))


def _stored_moves(base: np.ndarray, layout: Layout, moves: np.ndarray) -> np.ndarray:
    """How far base + moves really moves each coordinate once stored in its leaf's dtype."""
    out = np.empty_like(base)
    with np.errstate(over="ignore", invalid="ignore"):
        for leaf in layout.leaves:
            seg = slice(leaf.offset, leaf.offset + leaf.size)
            stored = (base[seg] + moves[seg]).astype(leaf.dtype).astype(np.float64)
            out[seg] = stored - base[seg]
    return out


def check_step_survives_rounding(method: str, base: np.ndarray, layout: Layout,
                                 h: np.ndarray) -> None:
    """Refuse steps that the parameters' precision cannot take.

    For every real offset of the method's stencil, the point base + offset * h is
    stored as the parameters store it (each leaf in its own dtype); where that
    moves a coordinate by more than STEP_ROUNDING_LIMIT more or less than asked,
    the difference would be divided by a step that was not taken.

    Parameters
    ----------
    method : str
        The method that will use the steps ("auto" is checked as Richardson, the
        real method it may use; the complex step is not checked: its step is imaginary).
    base : ndarray of float, shape (n,)
    layout : tree.Layout
    h : ndarray of float, shape (n,)

    Raises
    ------
    CheckInputError
        Naming the first coordinate, its value, the step and the smallest step that works.

    Examples
    --------
    >>> from gradcheck_kit.tree import flatten
    >>> base, layout = flatten(np.array([1.0, 2.0]))
    >>> check_step_survives_rounding("central", base, layout, np.full(2, 1e-6))
    >>> try:
    ...     check_step_survives_rounding("central", base, layout, np.full(2, 1e-300))
    ... except CheckInputError as exc:
    ...     print(str(exc)[:56])
    step: 1e-300 is lost to rounding at x[0] = 1.0 (float64)
    """
    if method == "complex-step":
        return
    offsets = OFFSETS["richardson" if method == "auto" else method]
    for offset in offsets:
        asked = offset * h
        moved = _stored_moves(base, layout, asked)
        with np.errstate(invalid="ignore"):
            bad = ~(np.abs(moved - asked) <= STEP_ROUNDING_LIMIT * np.abs(asked))
        bad &= np.isfinite(base)     # a NaN entry is the cost's business, noted elsewhere
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            leaf_dtype = next(leaf.dtype for leaf in layout.leaves
                              if leaf.offset <= i < leaf.offset + leaf.size)
            spacing = float(np.spacing(np.asarray(abs(base[i]), dtype=leaf_dtype)))
            smallest = spacing / STEP_ROUNDING_LIMIT / min(abs(o) for o in offsets)
            times = "" if abs(offset) == 1 else f"{abs(offset):g} * "
            raise CheckInputError(
                f"step: {h[i]:.3g} is lost to rounding at {coordinate_name(layout, i)} = "
                f"{float(base[i])!r} ({np.dtype(leaf_dtype).name}): "
                f"x {'+' if offset > 0 else '-'} {times}step is stored as "
                f"x {'+' if moved[i] >= 0 else '-'} {abs(moved[i]):.3g}, so the differences "
                "would be divided by a step that was not taken; use a step of at least "
                f"{smallest:.3g} there, or step=None for automatic steps")


def steps(method: str, base: np.ndarray, layout: Layout, step, eps: np.ndarray) -> np.ndarray:
    """The step of every coordinate: automatic, one number for all, or a tree like params.

    Parameters
    ----------
    method : str
    base : ndarray of float, shape (n,)
    layout : tree.Layout
    step : None, float or a structure like params
    eps : ndarray of float, shape (n,)
        Precision the automatic steps are sized for.

    Returns
    -------
    ndarray of float, shape (n,)

    Raises
    ------
    CheckTypeError, CheckInputError
        For a step of the wrong form, not > 0, or one lost to rounding.
    """
    step = check_step(step)
    if step is None:
        return default_steps(method, base, eps)
    if isinstance(step, float):
        h = np.full(base.size, step)
    else:
        h = flatten_like(step, layout, "step")
    if not np.all(np.isfinite(h) & (h > 0)):
        raise CheckInputError("step: every step must be a finite number > 0")
    check_step_survives_rounding(method, base, layout, h)
    return h


def requests(method: str, coords: np.ndarray, h: np.ndarray) -> tuple:
    """(where, amounts): for each coordinate, its stencil's offsets in order.

    Arrays rather than lists: 2n Python ints and floats of a central sweep would take
    about 16 vectors of n floats of memory, the arrays take 4.

    Parameters
    ----------
    method : str
    coords : ndarray of int
        Flat indices of the coordinates.
    h : ndarray of float, shape (n,)
        Steps of every coordinate (only those at `coords` are read).

    Returns
    -------
    (ndarray of int64, ndarray of float64 or complex128)

    Examples
    --------
    >>> where, amounts = requests("central", np.array([1]), np.array([0.0, 0.5]))
    >>> where.tolist(), amounts.tolist()
    ([1, 1], [0.5, -0.5])
    """
    offsets = np.array(OFFSETS[method])
    coords = np.asarray(coords, dtype=np.int64)
    where = np.repeat(coords, offsets.size)
    amounts = (h[coords][:, None] * offsets[None, :]).ravel()
    return where, amounts
