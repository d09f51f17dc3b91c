"""Command line: `gradcheck-kit check TARGET` (also `python -m gradcheck_kit check ...`).

Exit status: 0 when every check agrees, 1 when one finds a mismatch, 2 for a
usage error or bad input (one message, no traceback).  A case that declares a
planted bug (expect_mismatch=True) counts as agreeing when its mismatch is found.
"""
from __future__ import annotations

import argparse
import importlib
import importlib.util
import json
import os
import sys
import traceback
from pathlib import Path

import numpy as np

from .cases import CASE_ATTRIBUTE, Case, check_case, declared_cases
from .errors import CheckInputError, CheckInterrupted
from .plan import METHOD_CHOICES
from .report import write_atomically

EXIT_OK, EXIT_MISMATCH, EXIT_USAGE = 0, 1, 2
LOADED_PREFIX = "gradcheck_target_"   # module names given to files loaded by path

DESCRIPTION = """\
Check the gradients of a Python module.

TARGET is a .py file or a dotted module name: every case declared in it with
@gradcheck_kit.case(...) is checked.  Or TARGET is FILE_OR_MODULE:COST, one cost
function, with --params FILE.npz (or .npy) and --gradient FILE_OR_MODULE:NAME
(left out: autograd differentiates the cost).

Exit status: 0 all checks as expected, 1 a mismatch, 2 a usage error or bad
input.  A case declared with expect_mismatch=True (a planted bug) is as expected
when its mismatch is found.

Checking a module imports it, which runs its code: only check code you trust.
"""


class UsageError(Exception):
    """A problem with the command line or its files: exit 2 with the message."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="gradcheck-kit", description=DESCRIPTION,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    check = sub.add_parser("check", help="check the gradients of a module (runs its code)",
                           description=DESCRIPTION,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    check.add_argument("target", metavar="TARGET", help="FILE.py, module, or FILE_OR_MODULE:COST")
    check.add_argument("--gradient", metavar="FILE_OR_MODULE:NAME",
                       help="the gradient function (default: autograd)")
    check.add_argument("--params", metavar="FILE", help="parameters: .npz (named arrays) or .npy")
    check.add_argument("--method", choices=METHOD_CHOICES, help="numeric method (default: auto)")
    check.add_argument("--seed", type=int, help="seed for sampled coordinates and drawn points")
    check.add_argument("--rtol", type=float, help="relative tolerance (numpy's rule)")
    check.add_argument("--atol", type=float, help="absolute tolerance (numpy's rule)")
    check.add_argument("--coordinates", type=int, metavar="K",
                       help="check K coordinates per parameter (largest gradients included)")
    check.add_argument("--workers", type=int, metavar="N", help="evaluate on N processes")
    check.add_argument("--scheduler", metavar="ADDRESS",
                       help="evaluate on a Dask cluster (needs the dask extra)")
    check.add_argument("--json", metavar="PATH", help="write the report as JSON (atomically)")
    check.add_argument("--plot", metavar="PATH", help="write a figure (needs the plot extra)")
    check.add_argument("--quiet", action="store_true", help="print one line per check")
    check.add_argument("--no-progress", action="store_true", help="never show a progress bar")
    return parser


def _error_line(exc: BaseException) -> str:
    frames = traceback.extract_tb(exc.__traceback__)
    where = f" ({Path(frames[-1].filename).name}, line {frames[-1].lineno})" if frames else ""
    return f"{type(exc).__name__}: {exc}{where}"


def load_module(spec: str):
    """Import a .py file or a dotted module; a failure becomes one UsageError line."""
    looks_like_file = spec.endswith(".py") or os.sep in spec or "/" in spec
    if looks_like_file:
        path = Path(spec)
        if not path.is_file():
            raise UsageError(f"no such file: {spec}")
        name = f"{LOADED_PREFIX}{path.stem}"
        module_spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(module_spec)
        sys.modules[name] = module        # so process pools can pickle its functions
        sys.path.insert(0, str(path.resolve().parent))
        try:
            module_spec.loader.exec_module(module)
        except Exception as exc:  # noqa: BLE001 - the user's module failed: say how
            raise UsageError(f"importing {spec} failed: {_error_line(exc)}") from exc
        return module
    try:
        return importlib.import_module(spec)
    except ModuleNotFoundError as exc:
        if exc.name and spec.startswith(exc.name):
            raise UsageError(f"no module named {spec!r} (and no such file)") from exc
        raise UsageError(f"importing {spec} failed: {_error_line(exc)}") from exc
    except Exception as exc:  # noqa: BLE001
        raise UsageError(f"importing {spec} failed: {_error_line(exc)}") from exc


def split_target(target: str):
    """'mod:name' -> ('mod', 'name'); 'mod' -> ('mod', None).  A drive letter is no name."""
    head, sep, tail = target.rpartition(":")
    if sep and head and tail and not (len(head) == 1 and tail.startswith(("\\", "/"))):
        return head, tail
    return target, None


def load_name(spec: str, what: str):
    module_spec, name = split_target(spec)
    if name is None:
        raise UsageError(f"{what}: expected FILE_OR_MODULE:NAME, got {spec!r}")
    module = load_module(module_spec)
    if not hasattr(module, name):
        raise UsageError(f"{what}: {module_spec} has no name {name!r}")
    return getattr(module, name)


def load_params(path: str):
    """Arrays from .npz (a dict by name) or .npy; pickled objects are refused."""
    p = Path(path)
    if not p.is_file():
        raise UsageError(f"--params: no such file: {path}")
    if p.suffix not in (".npz", ".npy"):
        raise UsageError(f"--params: expected a .npz or .npy file, got {p.name}")
    try:
        loaded = np.load(p, allow_pickle=False)
        if p.suffix == ".npy":
            return np.asarray(loaded)
        with loaded:
            return {key: loaded[key] for key in loaded.files}
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise UsageError(f"--params: {path} holds pickled Python objects, which are "
                             "refused (unpickling runs code); save plain arrays with "
                             "numpy.savez") from exc
        raise UsageError(f"--params: cannot read {path}: {exc}") from exc
    except Exception as exc:  # noqa: BLE001 - a corrupt or foreign file
        raise UsageError(f"--params: cannot read {path}: {exc}") from exc


def make_executor(args):
    """(executor or None, the object to close afterwards)."""
    if args.workers is not None and args.scheduler is not None:
        raise UsageError("--workers and --scheduler: give one or the other")
    if args.workers is not None:
        if args.workers < 1:
            raise UsageError(f"--workers: expected a number >= 1, got {args.workers}")
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


def collect_cases(args) -> list:
    """(label, Case) pairs to check, from the target and its options."""
    module_spec, name = split_target(args.target)
    if name is None:
        if args.gradient or args.params:
            raise UsageError("--gradient and --params need a TARGET of the form "
                             "FILE_OR_MODULE:COST")
        module = load_module(module_spec)
        cases = declared_cases(vars(module))
        if not cases:
            raise UsageError(f"{args.target} declares no gradient cases: decorate a cost with "
                             "@gradcheck_kit.case(...) or name one as TARGET:COST")
        return cases
    cost = load_name(args.target, "TARGET")
    if not callable(cost):
        raise UsageError(f"TARGET: {name} is not a function")
    declared = getattr(cost, CASE_ATTRIBUTE, None)
    gradient = load_name(args.gradient, "--gradient") if args.gradient else None
    if args.params:
        params = load_params(args.params)
    elif isinstance(declared, Case):
        params = declared.params
    else:
        raise UsageError(f"--params is needed: {name} declares no case with params")
    if isinstance(declared, Case) and not args.gradient:
        gradient = declared.gradient
    options = dict(declared.options) if isinstance(declared, Case) else {}
    # An explicit check carries no planted-bug expectation: its exit status says
    # whether this gradient agrees.
    return [(name, Case(cost, gradient, params, options, name))]


def ship_loaded_modules_by_value():
    """Modules loaded from a file path are not importable on Dask workers: have
    cloudpickle send their functions by value instead of by name."""
    try:
        import cloudpickle
    except ImportError:  # pragma: no cover - installed with the dask extra
        return
    for name, module in list(sys.modules.items()):
        if name.startswith(LOADED_PREFIX):
            cloudpickle.register_pickle_by_value(module)


def run_check(args) -> int:
    cases = collect_cases(args)
    executor, owner = make_executor(args)
    if args.scheduler is not None:
        ship_loaded_modules_by_value()
    overrides = {"method": args.method, "seed": args.seed, "rtol": args.rtol, "atol": args.atol,
                 "coordinates": args.coordinates, "executor": executor,
                 "progress": False if args.no_progress else None}
    results = []
    try:
        for label, c in cases:
            result = check_case(c, **overrides)
            results.append((label, result))
            print(result.report.to_text().splitlines()[0] + f"  [{label}]" if args.quiet
                  else f"== {label}\n{result.to_text()}\n")
    finally:
        if hasattr(owner, "close"):      # a Dask client
            owner.close()
        elif owner is not None:          # a process pool
            owner.shutdown()
    if args.json:
        document = results[0][1].report.to_dict() if len(results) == 1 else {
            "schema": "gradcheck_kit/check-run", "schema_version": 1,
            "checks": [{"case": label, "passed": r.passed, "report": r.report.to_dict()}
                       for label, r in results]}
        write_atomically(args.json, json.dumps(document, indent=2) + "\n")
    if args.plot:
        for label, r in results:
            path = args.plot if len(results) == 1 else \
                str(Path(args.plot).with_name(f"{Path(args.plot).stem}-{label}{Path(args.plot).suffix}"))
            r.report.plot(path)
    return EXIT_OK if all(r.as_expected for _, r in results) else EXIT_MISMATCH


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)   # argparse itself exits 2 on a usage error
    try:
        if args.command == "check":
            return run_check(args)
    except (UsageError, CheckInputError) as exc:
        print(f"gradcheck-kit: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except CheckInterrupted:
        print("gradcheck-kit: interrupted; the partial report is above", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader went away (| head): stop quietly, as command-line tools do
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    return EXIT_USAGE


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
