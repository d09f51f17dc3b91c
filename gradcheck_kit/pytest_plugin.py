"""pytest front end, loaded through the `pytest11` entry point.

- Every case declared with `@gk.case(...)` at module level of a collected test
  module becomes one test item, named `gradient[<module attribute name>]`.
- Fixture `gradient_audit`: `.compare(cost, params, gradient=None, **options)` and
  `.assert_matches(...)`, with the session's options as defaults.
- Marker `@pytest.mark.gradient_options(**options)`: options for one test.
- Options `--gradient-method`, `--gradient-seed`, `--gradient-report PATH` (ini keys
  gradient_method, gradient_seed, gradient_report).  The report is the JSON of
  every check of the session, written atomically at the end.
- A terminal summary section lists the failed checks with their worst
  coordinates and hints.  A failure shows the report, not plugin internals.
- A case declared with expect_mismatch=True (a planted bug) is an expected
  failure: xfail when the check fails, a failure when it passes.
"""
from __future__ import annotations

import json

import pytest

from .cases import CASE_ATTRIBUTE, Case, check_case
from .errors import GradientMismatchError
from .pipeline import compare_gradient
from .report import write_atomically

SESSION_SCHEMA = "gradcheck_kit/session-report"


def pytest_addoption(parser):
    group = parser.getgroup("gradcheck_kit", "gradient checks")
    group.addoption("--gradient-method", default=None,
                    help="numeric method for gradient checks (default: auto)")
    group.addoption("--gradient-seed", default=None, type=int,
                    help="seed for sampled coordinates and drawn points")
    group.addoption("--gradient-report", default=None, metavar="PATH",
                    help="write a JSON report of every gradient check of the session to PATH")
    parser.addini("gradient_method", "numeric method for gradient checks", default="")
    parser.addini("gradient_seed", "seed for gradient checks", default="")
    parser.addini("gradient_report", "path of the session's JSON gradient report", default="")


def pytest_configure(config):
    config.addinivalue_line("markers", "gradient_options(**options): options for the gradient "
                                       "checks of one test (method, rtol, atol, seed, ...)")
    config._gradient_checks = []
    config._gradient_planted = set()   # node ids of cases that declare a planted bug


def _session_options(config) -> dict:
    method = config.getoption("--gradient-method") or config.getini("gradient_method") or None
    seed = config.getoption("--gradient-seed")
    if seed is None and config.getini("gradient_seed"):
        seed = int(config.getini("gradient_seed"))
    return {k: v for k, v in {"method": method, "seed": seed}.items() if v is not None}


def _marker_options(node) -> dict:
    found = {}
    for mark in reversed(list(node.iter_markers("gradient_options"))):
        found.update(mark.kwargs)
    return found


class CaseFailed(Exception):
    """Raised by a case item; its text is the report."""


class GradientCaseItem(pytest.Item):
    def __init__(self, *, case: Case, **kwargs):
        super().__init__(**kwargs)
        self.case = case

    def runtest(self):
        options = {**_session_options(self.config), **_marker_options(self)}
        result = check_case(self.case, **options)
        if self.case.expect_mismatch:
            self.config._gradient_planted.add(self.nodeid)
        self.config._gradient_checks.append((self.nodeid, result.report, result.to_text()))
        if self.case.expect_mismatch and not result.passed:
            pytest.xfail("planted bug found, as declared")
        if not result.as_expected:
            raise CaseFailed(result.to_text())

    def repr_failure(self, excinfo):
        if isinstance(excinfo.value, CaseFailed):
            return str(excinfo.value)
        return super().repr_failure(excinfo)

    def reportinfo(self):
        return self.path, None, f"gradient case {self.case.name}"


@pytest.hookimpl(tryfirst=True)
def pytest_pycollect_makeitem(collector, name, obj):
    try:  # the plugin sees every object of every test module: never let one break collection
        declared = getattr(obj, CASE_ATTRIBUTE, None)
    except Exception:  # noqa: BLE001 - e.g. a lazy module that fails on attribute access
        return None
    if isinstance(declared, Case) and isinstance(collector, pytest.Module):
        # named by the module attribute: stable, and readable even for a lambda
        return GradientCaseItem.from_parent(collector, name=f"gradient[{name}]", case=declared)
    return None


class GradientAudit:
    """The `gradient_audit` fixture: checks with the session's (and marker's) options."""

    def __init__(self, request):
        self._request = request
        self.reports = []

    def _options(self, options):
        node = self._request.node
        return {**_session_options(node.config), **_marker_options(node), **options}

    def compare(self, cost, params, gradient=None, **options):
        report = compare_gradient(cost, params, gradient, **self._options(options))
        self.reports.append(report)
        self._request.config._gradient_checks.append(
            (self._request.node.nodeid, report, report.to_text()))
        return report

    def assert_matches(self, cost, params, gradient=None, **options):
        report = self.compare(cost, params, gradient, **options)
        if not report.passed:
            raise GradientMismatchError(report)
        return report


@pytest.fixture
def gradient_audit(request):
    """Gradient checks inside a test, with the session's options."""
    return GradientAudit(request)


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    checks = getattr(config, "_gradient_checks", [])
    failed = [(node, report) for node, report, _ in checks
              if not report.passed and not _planted(config, node)]
    if not failed:
        return
    terminalreporter.section("gradient checks that failed")
    for node, report in failed:
        worst = ", ".join(f"{r.name} ({r.verdict}, rel. error {r.relative_error:.2g})"
                          for r in report.mismatches[:3]) or "; ".join(report.problems)
        terminalreporter.write_line(f"{node}: {worst}")
        for hint in report.hints:
            terminalreporter.write_line(f"    hint: {hint}")


def _planted(config, node) -> bool:
    return node in getattr(config, "_gradient_planted", set())


def pytest_sessionfinish(session, exitstatus):
    config = session.config
    path = config.getoption("--gradient-report") or config.getini("gradient_report") or None
    if not path:
        return
    checks = [{"id": node, "passed": report.passed, "report": report.to_dict(), "text": text}
              for node, report, text in getattr(config, "_gradient_checks", [])]
    write_atomically(path, json.dumps({"schema": SESSION_SCHEMA, "schema_version": 1,
                                       "checks": checks}, indent=2) + "\n")
