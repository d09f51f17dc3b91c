"""pytest front end, loaded through the `pytest11` entry point.

- Every case declared with `@gk.case(...)`, `@gk.stochastic_case(...)` or
  `@gk.product_case(...)` by the code of a collected test module becomes one test
  item, ``gradient[<label>]`` (see `gradcheck_kit.cases`: the ``name=`` given, else
  the variable the declaration is assigned to).  Each declaration is its own item,
  also two on one function; a case that a module only imports is collected in the
  module that declared it.  ``--gradient-seed`` seeds a stochastic case only where
  it declares no seed of its own.
- Fixture `gradient_audit`: `.compare(cost, params, gradient=None, **options)` and
  `.assert_matches(...)`, with the session's options as defaults.
- Marker `@pytest.mark.gradient_options(**options)`: options for one test.
- Options `--gradient-method`, `--gradient-seed`, `--gradient-report PATH` (ini keys
  gradient_method, gradient_seed, gradient_report), checked when the session
  starts: a bad value, or a report path that cannot be written, is a usage error
  (exit status 4, one line).
- A failure shows the report, or one plain message with the user's own frames
  (a params function or cost that raised), never this plugin's or pytest's frames.
- A case declared with expect_mismatch=True (a planted bug) is an expected
  failure: xfail when the check fails, a failure when it passes.
- A terminal section "gradient checks that failed" lists the failed checks of
  cases, of the fixture in a test that failed (a passing test may confirm that
  a bug is caught), and of `gk.assert_gradient_matches` calls that failed a
  test, with their worst coordinates and hints.  Under pytest-xdist the workers
  send their checks to the controller, which prints the section and writes the
  session report.  Only the printed lines (and, when a session report is asked
  for, each check's JSON) are kept, not the reports with their costs.
- The plugin is loaded in every pytest session of an environment where gradcheck_kit
  is installed, so this module imports only pytest, the standard library and
  gradcheck_kit.errors; numpy and the engine are imported on the first declared
  case, fixture use or option that needs them (tests/test_plugin_lazy.py).

Session report (``--gradient-report PATH``), written atomically at the end::

    schema          "gradcheck_kit/session-report"
    schema_version  2
    title           "gradient checks of a pytest session"
    checks          one entry per check, in the order they finished:
      id              the pytest node id of the test or case item
      kind            "case" (a declared case), "fixture" (gradient_audit), or
                      "assertion" (gk.assert_gradient_matches that failed a test)
      passed          bool: every checked coordinate (and drawn point) agrees
      expect_mismatch bool: the case declares a planted bug
      as_expected     bool: passed, or a planted bug that was found
      report          the check's report (its own schema: gradcheck_kit.report, or
                      stochastic_report for a stochastic case),
                      for a drawn case the first distinct failure's or the last
                      point's; null when the check could not run
      error           why the check could not run (one message), or null
      drawn           null, or for params drawn from a strategy
                      {points_checked, failures: [{point, report, error}]}, one
                      failure per distinct one, each at its shrunk point (text)
      text            the text shown for the check
"""
from __future__ import annotations

import json
import os
import sys
import traceback
from pathlib import Path

import pluggy
import pytest
import _pytest

from .errors import CheckInputError, GradientMismatchError   # stdlib only: cheap to import

# Copies of two constants, so that a session without gradient checks imports no numpy
# (tests/test_plugin_lazy.py holds them equal to cases.REGISTRY and plan.METHOD_CHOICES).
REGISTRY = "__gradient_cases__"
METHOD_CHOICES = ("forward", "backward", "central", "five-point", "richardson",
                  "complex-step", "auto")

SESSION_SCHEMA = "gradcheck_kit/session-report"
SESSION_SCHEMA_VERSION = 2
SESSION_TITLE = "gradient checks of a pytest session"
WORKER_KEY = "gradcheck_kit_checks"   # in xdist's workeroutput
USER_FRAMES = 8                       # frames of the user's code shown under a message
SUMMARY_ROWS = 3                      # worst coordinates named per check in the summary


class _Session:
    """What the plugin holds for one session: checked options and small records."""

    def __init__(self, options: dict, report_path):
        self.options = options            # method / seed from the command line or ini
        self.report_path = report_path    # absolute path, or None
        self.records = []                 # [{"summary": [lines], "entry": dict | None}]

    def add(self, summary: list, entry) -> dict:
        """Keep the summary lines, and the JSON entry (`entry()`) when a report is asked for;
        returns the record (the fixture fills in its summary once its test has failed)."""
        record = {"summary": summary,
                  "entry": entry() if self.report_path is not None else None}
        self.records.append(record)
        return record


_SESSION = pytest.StashKey[_Session]()


def pytest_addoption(parser):
    group = parser.getgroup("gradcheck_kit", "gradient checks")
    group.addoption("--gradient-method", default=None, metavar="METHOD",
                    help=f"numeric method for gradient checks: one of "
                         f"{', '.join(METHOD_CHOICES)} (default: auto)")
    group.addoption("--gradient-seed", default=None, metavar="INT",
                    help="seed (an int >= 0) for sampled coordinates and drawn points")
    group.addoption("--gradient-report", default=None, metavar="PATH",
                    help="write a JSON report of every gradient check of the session to PATH")
    parser.addini("gradient_method", "numeric method for gradient checks", default="")
    parser.addini("gradient_seed", "seed for gradient checks", default="")
    parser.addini("gradient_report", "path of the session's JSON gradient report", default="")


def pytest_configure(config):
    config.addinivalue_line("markers", "gradient_options(**options): options for the gradient "
                                       "checks of one test (method, rtol, atol, seed, ...)")
    if config.getoption("help", False):   # help is shown even with a bad ini file
        return
    config.stash[_SESSION] = _Session(*session_settings(config))


def session_settings(config) -> tuple:
    """(options, report path) from the command line and ini, checked once, at the start.

    Raises pytest.UsageError (exit status 4, one line) for a value that cannot be used.
    """
    method, source = _setting(config, "--gradient-method", "gradient_method")
    if method is not None:
        from . import plan
        try:
            plan.check_method(method)
        except CheckInputError as exc:
            raise pytest.UsageError(f"{source}: {_unlabelled(exc, 'method')}") from None
    seed, source = _setting(config, "--gradient-seed", "gradient_seed")
    if seed is not None:
        seed = _parse_seed(seed, source)
    path, source = _setting(config, "--gradient-report", "gradient_report")
    if path is not None:
        from .files import UnwritablePathError, check_writable
        path = Path(config.invocation_params.dir, path)   # tests may change the folder
        try:
            if not hasattr(config, "workerinput"):   # an xdist worker never writes it
                check_writable(path, source)
        except (UnwritablePathError, OSError) as exc:
            raise pytest.UsageError(str(exc)) from None
    options = {k: v for k, v in (("method", method), ("seed", seed)) if v is not None}
    return options, path


def _setting(config, option: str, ini: str) -> tuple:
    """(value or None, where it came from) with the command line winning over the ini."""
    value = config.getoption(option)
    if value not in (None, ""):
        return value, option
    value = config.getini(ini)
    return (value, f"ini {ini}") if value else (None, None)


def _parse_seed(text, source: str) -> int:
    try:
        seed = int(str(text).strip())
    except ValueError:
        raise pytest.UsageError(f"{source}: expected an int >= 0, got {text!r}") from None
    # numpy refuses negative seeds; say so here, not in every test
    if seed < 0:
        raise pytest.UsageError(f"{source}: expected an int >= 0, got {seed}")
    from . import plan
    try:
        plan.check_flags(seed=seed)
    except CheckInputError as exc:
        raise pytest.UsageError(f"{source}: {_unlabelled(exc, 'seed')}") from None
    return seed


def _unlabelled(exc, label: str) -> str:
    text = str(exc)
    return text[len(label) + 2:] if text.startswith(label + ": ") else text


def _session(config) -> _Session:
    return config.stash[_SESSION]


def _marker_options(node) -> dict:
    from .cases import check_options
    found = {}
    for mark in reversed(list(node.iter_markers("gradient_options"))):
        found.update(mark.kwargs)
    check_options(found, "gradient_options marker")
    return found


# --- records: what the summary prints and the session report holds -------------------------

def _worst(report) -> str:
    return ", ".join(_row_words(r) for r in report.mismatches[:SUMMARY_ROWS]) or \
        "; ".join(report.problems)


def _row_words(row) -> str:
    """'W[1] (disagree, rel. error 0.1)'; a stochastic row gives its relative bias."""
    if hasattr(row, "relative_error"):
        return f"{row.name} ({row.verdict}, rel. error {row.relative_error:.2g})"
    return f"{row.name} ({row.verdict}, rel. bias {row.relative_bias:.2g})"


def _report_lines(node: str, report, tag: str = "") -> list:
    return [f"{node}{tag}: {_worst(report)}"] + [f"    hint: {h}" for h in report.hints]


def _first_line(exc) -> str:
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__


def _entry(node, kind, *, passed, report=None, text="", error=None, expect_mismatch=False,
           as_expected=None, drawn=None) -> dict:
    return {"id": node, "kind": kind, "passed": bool(passed),
            "expect_mismatch": bool(expect_mismatch),
            "as_expected": bool(passed if as_expected is None else as_expected),
            "report": report.to_dict() if report is not None else None,
            "error": error, "drawn": drawn, "text": text}


def _record_report(config, node: str, kind: str, report) -> None:
    summary = [] if report.passed else _report_lines(node, report)
    _session(config).add(summary, lambda: _entry(node, kind, passed=report.passed,
                                                 report=report, text=report.to_text()))


def _record_case(config, node: str, result) -> None:
    summary = []
    if not result.as_expected:
        if result.passed:
            from .cases import passing_words
            summary = [f"{node}: the planted bug was not found: {passing_words(result.case)}"]
        for i, f in enumerate(result.failures or [None], 1):
            tag = f" (failure {i} of {len(result.failures)})" if len(result.failures) > 1 else ""
            if f is None and not result.passed:
                summary += _report_lines(node, result.report)
            elif f is not None and f.report is not None:
                summary += _report_lines(node, f.report, tag)
            elif f is not None:
                summary.append(f"{node}{tag}: could not run: {_first_line(f.error)}")
    _session(config).add(summary, lambda: _entry(
        node, "case", passed=result.passed, report=result.report, text=result.to_text(),
        expect_mismatch=result.case.expect_mismatch, as_expected=result.as_expected,
        drawn=_drawn_entry(result)))


def _drawn_entry(result):
    if not result.drawn:
        return None
    from .cases import describe_point
    return {"points_checked": result.checked, "failures": [
        {"point": describe_point(f.point),
         "report": f.report.to_dict() if f.report is not None else None,
         "error": str(f.error) if f.error is not None else None} for f in result.failures]}


def _record_error(config, node: str, case, exc) -> None:
    message = str(exc) if isinstance(exc, CheckInputError) else f"{type(exc).__name__}: {exc}"
    _session(config).add([f"{node}: could not run: {message.splitlines()[0]}"], lambda: _entry(
        node, "case", passed=False, error=message, text=message,
        expect_mismatch=case.expect_mismatch, as_expected=False))


# --- failure text without internal frames --------------------------------------------------

def _hidden_folders(ours: bool) -> tuple:
    """Folders whose frames a user never needs: pytest's, pluggy's, hypothesis's, and
    (when `ours`) gradcheck_kit's."""
    folders = [os.path.dirname(m.__file__) for m in (pytest, _pytest, pluggy)]
    hyp = sys.modules.get("hypothesis")
    if hyp is not None:
        folders.append(os.path.dirname(hyp.__file__))
    if ours:
        folders.append(os.path.dirname(os.path.abspath(__file__)))
    return tuple(os.path.join(os.path.abspath(f), "") for f in folders)


def _shown(frame, hidden: tuple) -> bool:
    path = os.path.abspath(frame.filename)
    return path != os.path.abspath(__file__) and not path.startswith(hidden)


def _user_cause(exc):
    """The first exception in the cause chain that is not one of ours (the user's)."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if not isinstance(exc, CheckInputError) and exc.__traceback__ is not None:
            return exc
        exc = exc.__cause__
    return None


def _frames_text(exc, keep_ours: bool) -> list:
    """The traceback of `exc` without pytest's, pluggy's and hypothesis's frames (and
    without gradcheck_kit's unless keep_ours), last USER_FRAMES frames."""
    hidden = _hidden_folders(ours=not keep_ours)
    frames = [f for f in traceback.extract_tb(exc.__traceback__) if _shown(f, hidden)]
    lines = traceback.format_list(frames[-USER_FRAMES:])
    lines += traceback.format_exception_only(type(exc), exc)
    return "".join(lines).rstrip("\n").splitlines()


def plain_message(exc) -> str:
    """The failure text of a case that could not run: the message, then the frames of
    the user's code that raised, if any."""
    lines = [f"the check could not run: {exc}"]
    cause = _user_cause(exc.__cause__)
    if cause is not None:
        frames = _frames_text(cause, keep_ours=False)
        if len(frames) > 1:
            lines += ["the error was raised here:"] + frames
    return "\n".join(lines)


def unexpected_message(exc) -> str:
    """The failure text of an exception gradcheck_kit did not expect: without the frames
    of pytest and pluggy."""
    lines = [f"the check stopped with {type(exc).__name__}: {exc}",
             "(an object gradcheck_kit cannot handle, or a bug in gradcheck_kit):"]
    return "\n".join(lines + _frames_text(exc, keep_ours=True))


class CaseFailed(Exception):
    """Raised by a case item; its text is the report."""


class GradientCaseItem(pytest.Item):
    """A test item that runs one declared case."""

    def __init__(self, *, case, **kwargs):
        super().__init__(**kwargs)
        self.case = case

    def runtest(self):
        __tracebackhide__ = True
        try:
            from .cases import check_case
            options = {**_session(self.config).options, **_marker_options(self)}
            result = check_case(self.case, **options)
        except Exception as exc:  # noqa: BLE001 - recorded, then shown by repr_failure
            _record_error(self.config, self.nodeid, self.case, exc)
            raise
        _record_case(self.config, self.nodeid, result)
        if self.case.expect_mismatch and result.as_expected:
            pytest.xfail("planted bug found, as declared")
        if not result.as_expected:
            raise CaseFailed(result.to_text())

    def repr_failure(self, excinfo):
        exc = excinfo.value
        if isinstance(exc, CaseFailed):
            return str(exc)
        if isinstance(exc, CheckInputError):
            return plain_message(exc)
        if isinstance(exc, pytest.fail.Exception):
            return super().repr_failure(excinfo)
        return unexpected_message(exc)

    def reportinfo(self):
        # the failure header: the item's own name, also for two cases on one cost
        return self.path, None, self.name


@pytest.hookimpl(tryfirst=True)
def pytest_pycollect_makeitem(collector, name, obj):
    # The registry of the module's own declarations; imported cases are not in it.
    # Called for every name of every test module: the cheap test comes first.
    if name != REGISTRY or not isinstance(collector, pytest.Module):
        return None
    from .cases import declared_cases
    return [GradientCaseItem.from_parent(collector, name=f"gradient[{label}]", case=c)
            for label, c in declared_cases(vars(collector.obj))]


class GradientAudit:
    """The `gradient_audit` fixture: checks with the session's (and marker's) options.

    Parameters
    ----------
    request : pytest.FixtureRequest
        The requesting test's request.

    Examples
    --------
    ::

        def test_loss(gradient_audit):
            gradient_audit.assert_matches(loss, params, loss_gradient)
    """

    def __init__(self, request):
        self._request = request
        self.reports = []    # this test's reports (freed with the test)
        self.unlisted = []   # (record, summary lines) of failed checks, listed if the test fails

    def _options(self, options):
        node = self._request.node
        return {**_session(node.config).options, **_marker_options(node), **options}

    def compare(self, cost, params, gradient=None, **options):
        """compare_gradient with the session's options; the check is recorded."""
        __tracebackhide__ = True
        from .assertions import check_option_names
        from .pipeline import compare_gradient
        check_option_names(options, "gradient_audit")
        report = compare_gradient(cost, params, gradient, **self._options(options))
        self.reports.append(report)
        # A failed check is listed under "gradient checks that failed" only when its test
        # fails: a test may confirm that a planted bug is caught (assert not report.passed).
        node = self._request.node.nodeid
        record = _session(self._request.config).add(
            [], lambda: _entry(node, "fixture", passed=report.passed, report=report,
                               text=report.to_text()))
        if not report.passed:
            self.unlisted.append((record, _report_lines(node, report)))
        return report

    def assert_matches(self, cost, params, gradient=None, **options):
        """compare(...), raising GradientMismatchError when a coordinate does not agree."""
        __tracebackhide__ = True
        report = self.compare(cost, params, gradient, **options)
        if not report.passed:
            raise GradientMismatchError(report)
        return report


@pytest.fixture
def gradient_audit(request):
    """Gradient checks inside a test, with the session's options."""
    return GradientAudit(request)


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    outcome = yield
    if _SESSION not in item.config.stash or not outcome.get_result().failed:
        return                             # passed, or caught by xfail: nothing to list
    audit = (getattr(item, "funcargs", None) or {}).get("gradient_audit")
    if audit is not None:                  # the fixture's failed checks, now that it failed
        for record, lines in audit.unlisted:
            record["summary"] = lines
        audit.unlisted.clear()
    error = call.excinfo.value if call.excinfo is not None else None
    if not isinstance(error, GradientMismatchError):
        return
    if audit is not None and any(r is error.report for r in audit.reports):
        return                             # the fixture recorded it already
    _record_report(item.config, item.nodeid, "assertion", error.report)


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    if _SESSION not in config.stash:
        return
    lines = [line for record in _session(config).records for line in record["summary"]]
    if not lines:
        return
    terminalreporter.section("gradient checks that failed")
    for line in lines:
        terminalreporter.write_line(line)


@pytest.hookimpl(optionalhook=True)
def pytest_testnodedown(node, error):
    """pytest-xdist, on the controller: take in the checks a worker made."""
    config = node.config
    sent = getattr(node, "workeroutput", {}).get(WORKER_KEY, [])
    if _SESSION in config.stash:
        _session(config).records.extend(sent)


def pytest_sessionfinish(session, exitstatus):
    config = session.config
    if _SESSION not in config.stash:
        return
    state = _session(config)
    if hasattr(config, "workeroutput"):     # an xdist worker: the controller reports
        # through JSON, so that only plain data crosses to the controller
        config.workeroutput[WORKER_KEY] = json.loads(json.dumps(state.records))
        return
    if state.report_path is None:
        return
    document = {"schema": SESSION_SCHEMA, "schema_version": SESSION_SCHEMA_VERSION,
                "title": SESSION_TITLE,
                "checks": [r["entry"] for r in state.records if r["entry"] is not None]}
    from .report import write_atomically
    try:
        write_atomically(state.report_path, json.dumps(document, indent=2) + "\n")
    except OSError as exc:   # checked at the start; the folder may have gone since
        reporter = config.pluginmanager.get_plugin("terminalreporter")
        if reporter is not None:
            reporter.write_line(f"gradcheck_kit: could not write the session report "
                                f"{state.report_path}: {exc}", red=True)
