"""Command line: `gradcheck-kit check TARGET` and `gradcheck-kit locate TARGET`
(also `python -m gradcheck_kit ...`).

Exit status:

    0    every check as expected (a declared planted bug counts when it is found)
    1    a check found a mismatch, or missed a declared planted bug
    2    a usage error or bad input: one line on stderr, no traceback; also a case
         that could not run (its params or gradient refused, its cost raising at the
         base point) when no other case found a mismatch
    130  interrupted (Ctrl-C): the partial report is printed and, with --json, written
    141  the output closed (`| head -1`) before every case ran, and none of those
         that ran failed (the status a shell gives a program ended by SIGPIPE)

When several apply, the first of 130, 1, 2, 141 wins: a case that could not run does
not stop the others, and a mismatch found in one of them still exits 1.

JSON written by --json, one shape whatever the number of cases:

    schema          "gradcheck_kit/check-run"
    schema_version  2
    command         "check" or "locate"
    target          TARGET as given;  version: gradcheck_kit's version
    complete        every case ran to its end
    stopped         null, "interrupted" or "output closed"
    passed          complete, and every check as expected
    checks          [{case, passed, as_expected, expect_mismatch, planted_bug, interrupted,
                      could_not_run, report}]: planted_bug is null for an ordinary case, else
                      "found" or "not found"; could_not_run is null, or for a case that could
                      not run the message saying why (its report is then null); report is a
                      gradient report (schema in report.py)
    not_run         names of the cases that never ran (after an interrupt or a closed output)
"""
from __future__ import annotations

import argparse
import contextlib
import dataclasses
import importlib
import importlib.util
import json
import os
import re
import sys
import traceback
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__
from .cases import (Case, CaseResult, check_case, declared_cases, is_params_function,
                    is_strategy)
from .errors import CheckInputError, CheckInterrupted, LongCheckWarning
from .frameworks import load_torch_params
from .files import (ParamsFileError, UnwritablePathError, check_writable, load_params,
                    resolve_target, write_atomically)
from .plan import METHOD_CHOICES, choose_coordinates
from .tree import flatten
from .verdicts import name_list

EXIT_OK, EXIT_MISMATCH, EXIT_USAGE, EXIT_INTERRUPTED, EXIT_OUTPUT_CLOSED = 0, 1, 2, 130, 141
LOADED_PREFIX = "gradcheck_target_"   # module names given to files loaded by path
RUN_SCHEMA, RUN_SCHEMA_VERSION = "gradcheck_kit/check-run", 2

DESCRIPTION = """\
Check the gradients of a Python module.

TARGET is a .py file or a dotted module name: every case declared in it with
@gradcheck_kit.case(...), stochastic_case(...) or product_case(...) is
checked.  Or TARGET is FILE_OR_MODULE:COST, one cost function, with --params
FILE.npz (or .npy) and --gradient FILE_OR_MODULE:NAME (left out: autograd
differentiates the cost).  --params may be left out when COST is declared
as a case with its params; every declaration on COST is then its own case,
checked as declared when neither --gradient nor --params is given.  A
stochastic case keeps a seed it declares over --seed.

Exit status: 0 all checks as expected, 1 a mismatch, 2 a usage error or bad
input (also a case that could not run, when no case found a mismatch; the
other cases still run), 130 interrupted, 141 the output closed before every
case ran.  A case declared with expect_mismatch=True (a planted bug) is as
expected when its mismatch is found.

Checking a module imports it, which runs its code: only check code you trust.
"""

LOCATE_DESCRIPTION = """\
Find the few wrong coordinates among many by group testing: random-direction
probes on halving groups of coordinates, each coordinate isolated then checked
on its own.  TARGET as for `check`.  Exit status as for `check`: 1 when a wrong
coordinate is found.
"""


class UsageError(Exception):
    """A problem with the command line or its files: exit 2 with the message."""


class _OneLineParser(argparse.ArgumentParser):
    """argparse, with a usage error said in one line (the usage is one --help away)."""

    def error(self, message):
        self.exit(EXIT_USAGE, f"gradcheck-kit: error: {message} (see {self.prog} --help)\n")


# --- option values -------------------------------------------------------------------------

def _integer(minimum: int, meaning: str):
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            value = None
        if value is None or value < minimum:
            raise argparse.ArgumentTypeError(f"expected {meaning} (an integer >= {minimum}), "
                                             f"got {text!r}")
        return value
    return parse


def _tolerance(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = None
    if value is None or not np.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(f"expected a finite number >= 0, got {text!r}")
    return value


_COORDINATE = re.compile(r"^(?P<name>[^\[\]]+?)\s*(?:\[(?P<index>[^\[\]]*)\])?$")


def coordinates_option(values):
    """--coordinates values -> compare_gradient's `coordinates`: None, a count, or names.

    One integer K checks K coordinates per parameter.  Otherwise every value names a
    coordinate as the report prints it: ``W[0, 1]`` (an index), ``W[5]`` (the flat
    position within W), ``bias`` (a whole parameter: a scalar, or every entry of an
    array, see `case_coordinates`).

    Parameters
    ----------
    values : list of str or None
        The values of the repeated option, in order.

    Returns
    -------
    None, int or dict
        None (every coordinate), K, or ``{parameter name: [index tuple or flat int]}``.

    Raises
    ------
    UsageError
        A count below 1, a count mixed with names, or an index that is not integers.

    Examples
    --------
    >>> coordinates_option(["4"])
    4
    >>> coordinates_option(["W[0, 1]", "W[5]", "layer1.b[2]", "bias"])
    {'W': [(0, 1), 5], 'layer1.b': [2], 'bias': [()]}
    """
    if not values:
        return None
    if len(values) == 1 and re.fullmatch(r"\s*[+-]?\d+\s*", values[0]):
        k = int(values[0])
        if k < 1:
            raise UsageError(f"--coordinates: expected a count K >= 1 or coordinate names, "
                             f"got {values[0]!r}")
        return k
    chosen: dict = {}
    for text in values:
        match = _COORDINATE.match(text.strip())
        if match is None or re.fullmatch(r"\s*[+-]?\d+\s*", text):
            raise UsageError(f"--coordinates: expected one count K, or coordinate names such as "
                             f"'W[0, 1]' (repeat the option for each), got {text!r}")
        index = match.group("index")
        if index is None:
            item = ()
        else:
            try:
                parts = tuple(int(p) for p in index.split(","))
            except ValueError:
                raise UsageError(f"--coordinates: the index of {text!r} must be integers "
                                 "separated by commas, as in 'W[0, 1]'") from None
            item = parts[0] if len(parts) == 1 else parts
        chosen.setdefault(match.group("name"), []).append(item)
    return chosen


def case_coordinates(chosen, params):
    """The --coordinates names for one case's params: a bare name of an array parameter
    (``()``) stands for every entry of it; the names and indices are checked here.

    Parameters
    ----------
    chosen : dict
        From `coordinates_option`.
    params : structure
        The case's params.

    Returns
    -------
    dict or None
        compare_gradient's ``coordinates``; None when params cannot be flattened
        (the check itself then says why).

    Raises
    ------
    CheckInputError
        A name that is not a parameter of `params`, or an index out of range.

    Examples
    --------
    >>> case_coordinates({"b": [()], "W": [(0, 1)]},
    ...                  {"W": np.zeros((2, 2)), "b": np.zeros(3)})
    {'b': [0, 1, 2], 'W': [(0, 1)]}
    """
    try:
        _, layout = flatten(params)
    except CheckInputError:
        return None
    leaves = {leaf.name: leaf for leaf in layout.leaves}
    out = {}
    for name, items in chosen.items():
        leaf = leaves.get(name)
        if leaf is not None and leaf.shape != () and () in items:
            items = [i for i in items if i != ()] + list(range(leaf.size))
        out[name] = items
    choose_coordinates(layout, out, None, np.zeros(layout.size))   # raises for a bad name
    return out


def build_parser() -> argparse.ArgumentParser:
    """The parser of `gradcheck-kit`: the commands `check` and `locate` and their options.

    Returns
    -------
    argparse.ArgumentParser
        Its usage errors print one line and exit with status 2.

    Examples
    --------
    >>> args = build_parser().parse_args(["check", "losses.py", "--seed", "3"])
    >>> args.command, args.target, args.seed
    ('check', 'losses.py', 3)
    """
    parser = _OneLineParser(prog="gradcheck-kit", description=DESCRIPTION,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"gradcheck-kit {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    common = _OneLineParser(add_help=False)
    common.add_argument("target", metavar="TARGET", help="FILE.py, module, or FILE_OR_MODULE:COST")
    common.add_argument("--gradient", metavar="FILE_OR_MODULE:NAME",
                        help="the gradient function (default: autograd)")
    common.add_argument("--params", metavar="FILE",
                        help="parameters: .npz (named arrays; dotted names nest) or .npy")
    common.add_argument("--method", choices=METHOD_CHOICES, help="numeric method (default: auto)")
    common.add_argument("--seed", type=_integer(0, "a seed"),
                        help="seed for sampled coordinates, probes and drawn points")
    common.add_argument("--workers", type=_integer(1, "a number of processes"), metavar="N",
                        help="evaluate on N processes")
    common.add_argument("--scheduler", metavar="ADDRESS",
                        help="evaluate on a Dask cluster (needs the dask extra)")
    common.add_argument("--json", metavar="PATH", help="write the run as JSON (atomically)")
    common.add_argument("--quiet", action="store_true", help="print one line per case")
    common.add_argument("--no-progress", action="store_true", help="never show a progress bar")
    common.add_argument("--with-rng", action="store_true",
                        help="call the cost (and gradient) as f(params, rng) with one seeded "
                             "generator for every call: checks one draw of a random cost")

    check = sub.add_parser("check", parents=[common], help="check the gradients of a module "
                           "(runs its code)", description=DESCRIPTION,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    check.add_argument("--rtol", type=_tolerance, help="relative tolerance (numpy's rule)")
    check.add_argument("--atol", type=_tolerance, help="absolute tolerance (numpy's rule)")
    check.add_argument("--coordinates", action="append", metavar="K|NAME",
                       help="K: check K coordinates per parameter (largest gradients included); "
                            "NAME: check this coordinate, as the report names it ('W[0, 1]'); "
                            "repeat for several")
    check.add_argument("--plot", metavar="PATH", help="write a figure (needs the plot extra)")

    locate = sub.add_parser("locate", parents=[common], help="find the wrong coordinates by "
                            "group testing (runs the module's code)",
                            description=LOCATE_DESCRIPTION + "\n" + DESCRIPTION.split("\n\n")[-1],
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    locate.add_argument("--budget", type=_integer(1, "a number of evaluations"), metavar="N",
                        help="stop after N cost evaluations (the report says what is left)")
    return parser


# --- importing the user's code -------------------------------------------------------------

def _syntax_line(exc: SyntaxError) -> str:
    where = f" ({Path(exc.filename).name}, line {exc.lineno})" if exc.filename else ""
    return f"SyntaxError: {exc.msg}{where}"


def _error_line(exc: BaseException, path: Path | None = None) -> str:
    """One line: the error, and the line of the user's file that raised it (not
    importlib's frames)."""
    if isinstance(exc, SyntaxError):
        return _syntax_line(exc)
    frames = [f for f in traceback.extract_tb(exc.__traceback__)
              if not f.filename.startswith("<frozen")]
    if path is not None:
        own = [f for f in frames if os.path.abspath(f.filename) == str(path)]
        frames = own or frames
    where = f" ({Path(frames[-1].filename).name}, line {frames[-1].lineno})" if frames else ""
    return f"{type(exc).__name__}: {exc}{where}"


def _looks_like_file(spec: str) -> bool:
    """A path, not a dotted module name ('.', 'src/losses', 'losses.py')."""
    return spec.endswith(".py") or os.sep in spec or "/" in spec or \
        not all(part.isidentifier() for part in spec.split("."))


class _Importer:
    """Imports the modules a command names, each once, as `python -m` would.

    Within `active()`, the working folder is first on sys.path (as with
    `python -m`), and the folder of each file loaded is added too (as with
    `python FILE`); sys.path and the modules loaded by path are restored or
    dropped afterwards, so running the command in-process leaves no trace.  A
    file named twice (TARGET and --gradient) is one module: its code runs once
    and its functions pickle for a process pool.
    """

    def __init__(self):
        self.by_file = {}      # resolved path -> module
        self.loaded = []       # every module this command imported, for Dask

    @contextlib.contextmanager
    def active(self):
        saved_path = list(sys.path)
        sys.path.insert(0, os.getcwd())
        try:
            yield self
        finally:
            sys.path[:] = saved_path
            for module in self.by_file.values():
                if sys.modules.get(module.__name__) is module and \
                        module.__name__.startswith(LOADED_PREFIX):
                    del sys.modules[module.__name__]

    def module(self, spec: str):
        """The module of a .py file or a dotted name; a failure becomes one UsageError line."""
        return self._file(spec) if _looks_like_file(spec) else self._dotted(spec)

    def _file(self, spec: str):
        path = Path(spec)
        if path.is_dir():
            raise UsageError(f"{spec} is a folder; expected a .py file or a module name")
        if not path.is_file():
            raise UsageError(f"no such file: {spec}")
        key = path.resolve()
        if key in self.by_file:
            return self.by_file[key]
        name = f"{LOADED_PREFIX}{re.sub(r'[^0-9A-Za-z_]', '_', path.stem)}"
        taken = 1
        while name in sys.modules:     # another file of the same name: keep both picklable
            taken += 1
            name = f"{LOADED_PREFIX}{re.sub(r'[^0-9A-Za-z_]', '_', path.stem)}_{taken}"
        module_spec = importlib.util.spec_from_file_location(name, key)
        if module_spec is None:
            raise UsageError(f"cannot import {spec}: expected a .py file")
        module = importlib.util.module_from_spec(module_spec)
        sys.modules[name] = module        # so process pools can pickle its functions
        if str(key.parent) not in sys.path:
            sys.path.insert(1, str(key.parent))
        try:
            self._run(lambda: module_spec.loader.exec_module(module), spec, key)
        except BaseException:
            del sys.modules[name]
            raise
        self.by_file[key] = module
        self.loaded.append(module)
        return module

    def _dotted(self, spec: str):
        try:
            module = self._run(lambda: importlib.import_module(spec), spec, None)
        except UsageError as exc:
            cause = exc.__cause__
            if isinstance(cause, ModuleNotFoundError) and cause.name and \
                    (spec == cause.name or spec.startswith(cause.name + ".")):
                raise UsageError(f"no module named {spec!r} (and no such file)") from cause
            raise
        origin = getattr(module, "__file__", None)
        if origin:
            key = Path(origin).resolve()
            if key in self.by_file:    # the same file named once by path: one module
                return self.by_file[key]
            self.by_file[key] = module
        if module not in self.loaded:
            self.loaded.append(module)
        return module

    @staticmethod
    def _run(load, spec: str, path):
        try:
            return load()
        except SystemExit as exc:
            raise UsageError(f"importing {spec} failed: it called sys.exit({exc.code!r}) "
                             "while being imported") from exc
        except Exception as exc:  # noqa: BLE001 - the user's module failed: say how
            raise UsageError(f"importing {spec} failed: {_error_line(exc, path)}") from exc


def _split_target(target: str):
    """'mod:name' -> ('mod', 'name'); 'mod' -> ('mod', None).  A drive letter is no name."""
    head, sep, tail = target.rpartition(":")
    if sep and head and tail and not (len(head) == 1 and tail.startswith(("\\", "/"))):
        return head, tail
    return target, None


def _load_name(importer: _Importer, spec: str, what: str):
    module_spec, name = _split_target(spec)
    if name is None:
        raise UsageError(f"{what}: expected FILE_OR_MODULE:NAME, got {spec!r}")
    module = importer.module(module_spec)
    if not hasattr(module, name):
        raise UsageError(f"{what}: {module_spec} has no name {name!r}")
    return getattr(module, name)


def _not_a_function(what: str, spec: str, value) -> UsageError:
    kind = type(value).__name__
    article = "an" if kind[:1].lower() in "aeiou" else "a"
    return UsageError(f"{what}: {spec} is {article} {kind}, not a function")


def _collect_cases(args, importer: _Importer) -> list:
    """(label, Case) pairs to check, from the target and its options."""
    module_spec, name = _split_target(args.target)
    if name is None:
        if args.gradient or args.params:
            raise UsageError("--gradient and --params need a TARGET of the form "
                             "FILE_OR_MODULE:COST")
        module = importer.module(module_spec)
        cases = declared_cases(vars(module))
        if not cases:
            raise UsageError(f"{args.target} declares no gradient cases: decorate a cost with "
                             "@gradcheck_kit.case(...) or name one as TARGET:COST")
        return cases
    cost = _load_name(importer, args.target, "TARGET")
    if not callable(cost):
        raise _not_a_function("TARGET", args.target, cost)
    module = importer.module(module_spec)
    # Every declaration on COST, from the module's registry (the function's own
    # attribute holds only the first): two declarations are two cases.
    declared = [(label, c) for label, c in declared_cases(vars(module)) if c.target is cost]
    if not args.gradient and not args.params and declared:
        return declared                   # checked as declared, planted bugs included
    gradient = None
    if args.gradient:
        gradient = _load_name(importer, args.gradient, "--gradient")
        if not callable(gradient):
            raise _not_a_function("--gradient", args.gradient, gradient)
        declared = _gradient_declarations(declared, name)
    params = _params_file(args.params) if args.params else None
    if not declared:
        if params is None:
            raise UsageError(f"--params is needed: {name} declares no case with params")
        return [(name, Case(cost, gradient, params, {}, name))]
    if args.gradient and args.params:     # nothing left of the declarations but options
        declared = [(name, declared[0][1])]
    # What each declaration's own params hold, for a message when the file's do not suit.
    args.declared_params = {label: c.params for label, c in declared}
    # An explicit check carries no planted-bug expectation: its exit status says
    # whether this gradient (or these params) agree.
    return [(label, _explicit(c, gradient, params)) for label, c in declared]


def _params_file(path: str):
    if Path(path).suffix.lower() in (".pt", ".pth"):
        return load_torch_params(path)   # weights only: never a pickle's code
    return load_params(path)


def _gradient_declarations(declared: list, name: str) -> list:
    """The gradient cases among the declarations on COST, which --gradient replaces in."""
    kept = [(label, c) for label, c in declared if c.kind == "gradient"]
    if declared and not kept:
        raise UsageError(f"--gradient: {name} is declared as a {declared[0][1].kind} case, "
                         "which has no gradient to replace; leave --gradient out")
    return kept


def _explicit(c, gradient, params):
    """The declaration c with the command line's gradient and params, and no planted bug."""
    params = c.params if params is None else params
    if isinstance(c, Case):
        return Case(c.cost, c.gradient if gradient is None else gradient, params,
                    dict(c.options), c.name)
    return dataclasses.replace(c, params=params, expect_mismatch=False)


def _named_leaves(tree, prefix="") -> list:
    """(dotted name, leaf) pairs of a params structure, in the file's naming."""
    if isinstance(tree, dict):
        return [n for k, v in tree.items() for n in _named_leaves(v, f"{prefix}{k}.")]
    if isinstance(tree, (list, tuple)):
        return [n for i, v in enumerate(tree) for n in _named_leaves(v, f"{prefix}{i}.")]
    return [(prefix[:-1], tree)]


def _leaf_names(tree) -> list:
    return [name for name, _ in _named_leaves(tree)]


def _shapes(tree) -> str:
    """'w' of shape (3,), 'b' of shape (2,): the arrays of params, for messages."""
    if not isinstance(tree, (dict, list, tuple)):
        return f"one array of shape {tuple(getattr(tree, 'shape', ()))}"
    return name_list(f"{name!r} of shape {tuple(getattr(leaf, 'shape', ()))}"
                     for name, leaf in _named_leaves(tree))


def _params_file_unfit(path: str, params, declared, exc: Exception) -> str | None:
    """The message of a cost (or gradient) that raised at a params file's values, naming
    the file: what the file holds against what the cost looked up, or against the
    params declared with the case.  None where the failure is of another kind."""
    text = str(exc)
    if not text.startswith(("cost raised", "gradient function raised")) or \
            not isinstance(exc.__cause__, (LookupError, ValueError, TypeError)):
        return None
    held = _shapes(params)
    known = declared is not None and not callable(declared) and not is_strategy(declared)
    if known and _shapes(declared) != held:
        return (f"--params: {path}: {text}; expected {_shapes(declared)} like the declared "
                f"params, got {held}")
    cause = exc.__cause__
    names = {part for name in _leaf_names(params) for part in name.split(".")}
    if isinstance(cause, KeyError) and cause.args and str(cause.args[0]) not in names:
        who = "cost" if text.startswith("cost") else "gradient function"
        return (f"--params: {path} lacks {cause.args[0]!r}, which the {who} looks up; it "
                f"holds {held}")
    return f"--params: {path}: {text}; the file holds {held}"


def _blame_params_file(args, label: str, c, exc: Exception) -> str | None:
    """Why a case failed because of the --params file, when it did; None otherwise."""
    if not args.params:
        return None
    misfit = (_params_file_misfit(args.params, c.params, c.gradient)
              if c.kind == "gradient" else None)
    return misfit or _params_file_unfit(args.params, c.params,
                                        getattr(args, "declared_params", {}).get(label), exc)


def _params_file_misfit(path: str, params, gradient) -> str | None:
    """Why the gradient's structure differs from a params file's, when the file is to blame.

    Called only after the check refused the gradient's structure: the gradient is
    called once more, to name the arrays the file holds that the gradient does not
    return (or lacks).  None when the names agree or cannot be compared.
    """
    if not callable(gradient) or not isinstance(params, (dict, list)):
        return None
    try:
        value = gradient(params)
    except Exception:  # noqa: BLE001 - the check has already said what went wrong
        return None
    if not isinstance(value, (dict, list, tuple)):
        return None
    held, returned = _leaf_names(params), _leaf_names(value)
    extra = [n for n in held if n not in returned]
    missing = [n for n in returned if n not in held]
    if extra and not missing:
        return (f"--params: {path} holds {', '.join(map(repr, extra))}, which the gradient does "
                f"not return (it returns {', '.join(map(repr, returned))}); save only the "
                "parameters the cost takes")
    if missing and not extra:
        return (f"--params: {path} lacks {', '.join(map(repr, missing))}, which the gradient "
                "returns")
    return None


# --- executors -----------------------------------------------------------------------------

def _make_executor(args):
    """(executor or None, the object to close afterwards)."""
    if args.workers is not None and args.scheduler is not None:
        raise UsageError("--workers and --scheduler: give one or the other")
    if args.workers is not None:
        from concurrent.futures import ProcessPoolExecutor
        pool = ProcessPoolExecutor(args.workers)
        return pool, pool
    if args.scheduler is not None:
        try:
            from distributed import Client
        except ImportError as exc:
            raise UsageError("--scheduler needs Dask: pip install 'gradcheck_kit[dask]'") from exc
        try:
            client = Client(args.scheduler, timeout="10s")
        except Exception as exc:  # noqa: BLE001
            raise UsageError(f"--scheduler: cannot reach {args.scheduler}: {exc}") from exc
        return client.get_executor(), client
    return None, None


def _close_executor(owner, interrupted: bool) -> None:
    if hasattr(owner, "close"):          # a Dask client
        owner.close()
    elif owner is not None:              # a process pool: after Ctrl-C, do not wait for it
        owner.shutdown(wait=not interrupted, cancel_futures=interrupted)


def _ship_modules_by_value(modules):
    """The user's modules may not be importable on Dask workers: have cloudpickle
    send their functions by value instead of by name."""
    try:
        import cloudpickle
    except ImportError:  # pragma: no cover - installed with the dask extra
        return
    for module in modules:
        cloudpickle.register_pickle_by_value(module)


# --- outputs -------------------------------------------------------------------------------

def _figure_suffixes() -> set:
    """The extensions matplotlib can write (".png", ".pdf", ...)."""
    try:
        from matplotlib.backend_bases import FigureCanvasBase
    except ImportError as exc:
        raise UsageError("--plot needs matplotlib: pip install 'gradcheck_kit[plot]'") from exc
    return {"." + ext for ext in FigureCanvasBase.get_supported_filetypes()}


def _check_outputs(args) -> None:
    """Refuse, before any import or evaluation, outputs that could not be written."""
    for option, path in (("--json", args.json), ("--plot", getattr(args, "plot", None))):
        if path and path.endswith(("/", os.sep)) and not Path(path).is_dir():
            raise UsageError(f"{option}: {path} names a folder (it ends with a slash), and "
                             f"there is no such folder; give a file path, such as "
                             f"{path}report{'.json' if option == '--json' else '.png'}")
    if args.json is not None:     # --json '' (an unset variable) is refused, not skipped
        check_writable(args.json, "--json")
    if getattr(args, "plot", None):
        check_writable(args.plot, "--plot", _figure_suffixes())


def _figure_path(plot: str, label: str, many: bool) -> str:
    if not many:
        return plot
    p = Path(plot)
    return str(p.with_name(f"{p.stem}-{label}{p.suffix}"))


@contextlib.contextmanager
def _long_check_notes():
    """Print each LongCheckWarning on stderr as one line, the moment it is issued."""
    with warnings.catch_warnings():
        warnings.simplefilter("always", LongCheckWarning)
        shown = warnings.showwarning

        def show(message, category, filename, lineno, file=None, line=None):
            if issubclass(category, LongCheckWarning):
                print(f"gradcheck-kit: note: {' '.join(str(message).split())}",
                      file=sys.stderr, flush=True)
            else:
                shown(message, category, filename, lineno, file, line)
        warnings.showwarning = show
        yield


# --- running -------------------------------------------------------------------------------

class _OutputClosed(Exception):
    """The reader of stdout went away (`| head -1`)."""


class _ClosedReaderGuard:
    """stdout, except that a reader who went away (`| head -1`) ends the output quietly.

    Writes after that are dropped, for the command and for the user's code alike:
    a cost that prints must not fail at every point because nobody reads its output.
    The command notices `reader_gone` and stops after the case it is on.
    """

    def __init__(self, stream):
        self._stream = stream
        self.reader_gone = False

    def write(self, text):
        if not self.reader_gone:
            try:
                return self._stream.write(text)
            except BrokenPipeError:
                self._gone()
        return len(text)

    def flush(self):
        if not self.reader_gone:
            try:
                self._stream.flush()
            except BrokenPipeError:
                self._gone()

    def _gone(self):
        self.reader_gone = True
        try:   # later writes, and the flush at exit, go nowhere instead of failing
            fd = self._stream.fileno()
        except (AttributeError, OSError, ValueError):
            return
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, fd)
        os.close(devnull)

    def __getattr__(self, name):
        return getattr(self._stream, name)


@contextlib.contextmanager
def _guarded_stdout():
    guard = _ClosedReaderGuard(sys.stdout)
    sys.stdout = guard
    try:
        yield guard
    finally:
        if sys.stdout is guard:
            sys.stdout = guard._stream


@dataclass
class _Outcome:
    """One case as it ended: its report, the text printed for it, and the case's result
    (None for a check cut short by Ctrl-C, which has only its partial report).  A case
    that could not run has no report, and `error` says why."""
    label: str
    case: Case
    report: object
    text: str
    result: CaseResult | None = None
    error: str | None = None

    @classmethod
    def could_not_run(cls, label: str, case: Case, message: str) -> "_Outcome":
        return cls(label, case, None, f"COULD NOT RUN: {message}", error=message)

    @property
    def interrupted(self) -> bool:
        return self.report is not None and self.report.interrupted

    @property
    def passed(self) -> bool:
        if self.error is not None:
            return False
        return self.result.passed if self.result is not None else self.report.passed

    @property
    def found(self) -> bool:
        """A mismatch (or another failure) was seen, even if the check was cut short."""
        if self.error is not None:
            return False
        if self.report.interrupted:
            return bool(self.report.mismatches)
        return not self.passed

    @property
    def as_expected(self) -> bool:
        if self.error is not None or self.report.interrupted:
            return False
        if self.result is not None:
            return self.result.as_expected
        return self.found == self.case.expect_mismatch

    def planted_bug(self):
        if not self.case.expect_mismatch:
            return None
        return "found" if self.found else "not found"

    def quiet_line(self) -> str:
        if self.error is not None:
            return f"COULD NOT RUN: {self.error.splitlines()[0]}  [{self.label}]"
        line = self.report.to_text().splitlines()[0]
        planted = self.planted_bug()
        mark = "" if planted is None else (
            "; planted bug found, as expected" if planted == "found"
            else "; planted bug NOT found")
        return f"{line}  [{self.label}{mark}]"

    def to_dict(self) -> dict:
        return {"case": self.label, "passed": self.passed,
                "as_expected": self.as_expected, "expect_mismatch": self.case.expect_mismatch,
                "planted_bug": self.planted_bug(), "interrupted": self.interrupted,
                "could_not_run": self.error,
                "report": None if self.report is None else self.report.to_dict()}


@dataclass
class _Run:
    """What one command has done so far, and why it stopped early if it did."""
    command: str
    target: str
    quiet: bool = False
    labels: list = field(default_factory=list)       # every case it means to run
    outcomes: list = field(default_factory=list)
    stopped: str | None = None                       # "interrupted" or "output closed"
    doing: str = "starting"                          # for the interrupt message
    interrupted_while: str = ""
    printed_partial: bool = False

    @property
    def not_run(self) -> list:
        done = {o.label for o in self.outcomes}
        return [label for label in self.labels if label not in done]

    def show(self, outcome: _Outcome) -> None:
        """Print one case; a closed output stops the run (_OutputClosed)."""
        self.outcomes.append(outcome)
        text = outcome.quiet_line() if self.quiet else f"== {outcome.label}\n{outcome.text}\n"
        print(text, flush=True)
        self.stop_if_unread()

    def stop_if_unread(self) -> None:
        if getattr(sys.stdout, "reader_gone", False):
            self.stopped = "output closed"
            raise _OutputClosed

    def record_interrupt(self, exc: KeyboardInterrupt, current) -> None:
        """Record Ctrl-C; the case it cut short is kept with its partial report, if any."""
        self.stopped = "interrupted"
        spent = getattr(exc, "evaluations", None)
        self.interrupted_while = self.doing + (f" (after {spent} cost evaluations)"
                                               if isinstance(spent, int) else "")
        report = getattr(exc, "report", None) if isinstance(exc, CheckInterrupted) else None
        if report is not None and current is not None and \
                current[0] not in {o.label for o in self.outcomes}:
            label, c = current
            try:
                self.show(_Outcome(label, c, report, report.to_text()))
                self.printed_partial = True
            except _OutputClosed:
                pass

    def complete(self) -> bool:
        return self.stopped != "interrupted" and not self.not_run

    @property
    def could_not_run(self) -> list:
        return [o for o in self.outcomes if o.error is not None]

    def exit_code(self) -> int:
        """The worst outcome, in this order: interrupted, a mismatch (or a planted bug
        missed), a case that could not run, the output closed, all as expected."""
        if self.stopped == "interrupted":
            return EXIT_INTERRUPTED
        if any(not o.as_expected for o in self.outcomes if o.error is None):
            return EXIT_MISMATCH
        if self.could_not_run:
            return EXIT_USAGE
        if self.not_run:
            return EXIT_OUTPUT_CLOSED
        return EXIT_OK

    def to_dict(self) -> dict:
        complete = self.complete()
        return {"schema": RUN_SCHEMA, "schema_version": RUN_SCHEMA_VERSION,
                "command": self.command, "target": self.target, "version": __version__,
                "complete": complete,
                "stopped": self.stopped if not complete else None,
                "passed": complete and all(o.as_expected for o in self.outcomes),
                "checks": [o.to_dict() for o in self.outcomes], "not_run": self.not_run}


def _case_params(label: str, c: Case, seed):
    """The params of a case for group testing: a structure, or one drawn by its function."""
    if is_strategy(c.params):
        raise UsageError(f"locate: case {label} draws its params from a hypothesis strategy; "
                         "name its cost as TARGET:COST with --params")
    return c.params(np.random.default_rng(seed)) if callable(c.params) else c.params


def _locate_one(args, label: str, c: Case, executor) -> _Outcome:
    from .locate import locate_mismatches

    if c.kind != "gradient":
        raise UsageError(f"locate: case {label} is a {c.kind} case; group testing finds wrong "
                         "coordinates of a gradient; use `gradcheck-kit check`")
    if c.options.get("vectorized"):
        raise UsageError(f"locate: case {label} has a vectorized cost, which group testing "
                         "calls one point at a time; use `gradcheck-kit check`")
    seed = args.seed if args.seed is not None else c.options.get("seed")
    try:
        report = locate_mismatches(
            c.cost, _case_params(label, c, seed), c.gradient, seed=seed, budget=args.budget,
            executor=executor, method=args.method or c.options.get("method", "auto"),
            progress=False if args.no_progress else c.options.get("progress"))
    except CheckInputError as exc:
        blame = _blame_params_file(args, label, c, exc)
        if blame:
            raise UsageError(blame) from exc
        raise
    result = CaseResult(c, report)
    return _Outcome(label, c, report, result.to_text(), result)


def _known_params(args, c):
    """The params of a gradient case, when known without drawing from a strategy."""
    if c.kind != "gradient" or is_strategy(c.params):
        return None
    if is_params_function(c.params):
        seed = args.seed if args.seed is not None else c.options.get("seed")
        try:
            return c.params(np.random.default_rng(seed))
        except Exception:  # noqa: BLE001 - the check itself says what the function raised
            return None
    return c.params


def _coordinates_by_case(args, cases: list) -> dict:
    """label -> the --coordinates of that case, checked against every case before any
    runs: a name some case lacks stops the command with one line naming those cases."""
    chosen = args.chosen_coordinates
    if not isinstance(chosen, dict):
        return {label: chosen for label, _ in cases}
    by_case, lacking, named = {}, [], ", ".join(map(repr, chosen))
    for label, c in cases:
        params = _known_params(args, c)
        if params is None:
            by_case[label] = chosen
            continue
        try:
            by_case[label] = case_coordinates(chosen, params) or chosen
        except CheckInputError as exc:
            text = str(exc).removeprefix("coordinates: ").removeprefix("coordinates ")
            lacking.append((label, text))
    if lacking:
        where = "; ".join(f"case {label}: {text}" for label, text in lacking) \
            if len(cases) > 1 else lacking[0][1]
        hint = (" (name one case as TARGET:COST to check coordinates of its own)"
                if len(cases) > 1 else "")
        raise UsageError(f"--coordinates {named}: {where}{hint}; nothing was checked")
    return by_case


def _check_one(args, label: str, c: Case, executor) -> _Outcome:
    overrides = {"method": args.method, "seed": args.seed, "rtol": args.rtol, "atol": args.atol,
                 "coordinates": args.coordinates_by_case.get(label, args.chosen_coordinates),
                 "executor": executor,
                 "progress": False if args.no_progress else None,
                 "with_rng": True if getattr(args, "with_rng", False) else None}
    try:
        result = check_case(c, **overrides)
    except CheckInputError as exc:
        blame = _blame_params_file(args, label, c, exc)
        if blame:
            raise UsageError(blame) from exc
        raise
    return _Outcome(label, c, result.report, result.to_text(), result)


def _run_cases(args, run: _Run, importer: _Importer) -> None:
    """Import, then check (or locate) every case, printing each as it ends; Ctrl-C and a
    closed output end the run early, with what was done kept in `run`."""
    one = _locate_one if args.command == "locate" else _check_one
    owner, current = None, None
    try:
        run.doing = f"importing {_split_target(args.target)[0]}"
        cases = _collect_cases(args, importer)
        run.labels = [label for label, _ in cases]
        args.coordinates_by_case = _coordinates_by_case(args, cases) \
            if args.command == "check" else {}
        executor, owner = _make_executor(args)
        if args.scheduler is not None:
            _ship_modules_by_value(importer.loaded)
        for label, c in cases:
            run.stop_if_unread()          # the module's own prints may have found it gone
            current = (label, c)
            run.doing = f"checking {label}"
            try:
                outcome = one(args, label, c, executor)
            except (CheckInputError, UsageError) as exc:
                # this case cannot run: say so, and go on with the others
                _say(f"error: case {label}: {exc}" if len(cases) > 1 else f"error: {exc}")
                outcome = _Outcome.could_not_run(label, c, str(exc))
            current = None
            run.show(outcome)
    except KeyboardInterrupt as exc:
        run.record_interrupt(exc, current)
    except _OutputClosed:
        pass
    finally:
        _close_executor(owner, run.stopped == "interrupted")


def _write_outputs(args, run: _Run) -> None:
    """The --json document (also after an interrupt), then the figures (not after one)."""
    if args.json is not None:
        run.doing = "writing the JSON report"
        try:
            write_atomically(args.json,
                             json.dumps(run.to_dict(), indent=2, allow_nan=False) + "\n",
                             "--json")
        except UnwritablePathError:
            raise
        except OSError as exc:   # the folder was checked; a full disk, a lost mount remain
            raise UsageError(f"--json: cannot write {args.json}: {exc.strerror or exc}") \
                from exc
    if getattr(args, "plot", None) and run.stopped != "interrupted":
        many = len(run.labels) > 1
        for o in run.outcomes:
            if o.report is None:      # the case could not run: nothing to draw
                continue
            run.doing = f"drawing the figure of {o.label}"
            path = _figure_path(args.plot, o.label, many)
            resolve_target(path, "--plot")
            o.report.plot(path)


def _say(message: str) -> None:
    try:
        print(f"gradcheck-kit: {message}", file=sys.stderr, flush=True)
    except (BrokenPipeError, OSError):   # pragma: no cover - stderr itself is gone
        pass


def main(argv=None) -> int:
    """Run the command line; returns the exit status (see the module docstring).

    Parameters
    ----------
    argv : list of str, optional
        The arguments after the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        0, 1, 2, 130 or 141.

    Examples
    --------
    >>> main(["check", "no_such_file.py"])
    2
    """
    try:
        args = build_parser().parse_args(argv)
    except SystemExit as exc:    # --help, --version, or a usage error already said
        return exc.code if isinstance(exc.code, int) else EXIT_USAGE
    run = _Run(args.command, args.target, quiet=args.quiet)
    importer = _Importer()
    try:
        args.chosen_coordinates = coordinates_option(getattr(args, "coordinates", None))
        _check_outputs(args)
        with importer.active(), _long_check_notes(), _guarded_stdout():
            _run_cases(args, run, importer)
            _write_outputs(args, run)
    except (UsageError, CheckInputError, ParamsFileError, UnwritablePathError) as exc:
        _say(f"error: {exc}")
        return EXIT_USAGE
    except KeyboardInterrupt:    # while importing, writing, or a second Ctrl-C
        _say(f"interrupted while {run.doing}")
        return EXIT_INTERRUPTED
    if run.stopped == "interrupted":
        _say(f"interrupted while {run.interrupted_while}" +
             ("; the partial report is above" if run.printed_partial else ""))
    elif run.not_run:
        _say(f"the output closed: {len(run.not_run)} of {len(run.labels)} cases not run")
    return run.exit_code()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
