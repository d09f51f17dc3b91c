"""Stage 6, report: the GradientReport data and its renderers (text, JSON, figures).

JSON schema (schema_version 2), the output of `to_dict`:

    schema          "gradcheck_kit/gradient-report"
    schema_version  2
    passed          bool
    method          the method used ("complex-step", "richardson", ...)
    evaluations     cost evaluations spent (points; a batch of k counts k)
    interrupted     bool: stopped by Ctrl-C, rows cover the finished coordinates
    checked         coordinates examined;  total: coordinates in params
    counts          {verdict: number of rows}
    worst_relative_error largest relative error among the rows (null if none)
    suggested_rtol, suggested_atol   see verdicts.suggest_tolerances (null if none agree)
    problems        reasons the report fails besides its rows (e.g. a random cost)
    hints, notes    lists of sentences
    parameters      [{name, checked, counts, worst_relative_error}]
    rows            [{name, parameter, index, flat_index, analytic, numeric,
                      absolute_error, relative_error, error_estimate, verdict, detail}]
    extra           method-specific data (e.g. the remainder-order check, noise level)

Non-finite numbers are written as null, since JSON has no NaN.
"""
from __future__ import annotations

import json
import math
import os
import tempfile
from collections import Counter
from dataclasses import dataclass, field

from .verdicts import FAILING, VERDICTS

SCHEMA = "gradcheck_kit/gradient-report"
SCHEMA_VERSION = 2
TABLE_ROWS = 10  # rows shown in the text table; the rest are counted


@dataclass
class Row:
    name: str            # 'W[2, 1]'
    parameter: str       # 'W'
    index: tuple         # (2, 1); () for a scalar
    flat_index: int      # position in the flat vector
    analytic: float
    numeric: float
    absolute_error: float
    relative_error: float
    error_estimate: float
    verdict: str
    detail: str = ""     # why, when the verdict needs a word (the error raised, a kink's slopes)

    @property
    def failing(self) -> bool:
        return self.verdict in FAILING


@dataclass
class GradientReport:
    rows: list
    method: str
    evaluations: int
    total: int
    hints: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    suggested_rtol: float | None = None
    suggested_atol: float | None = None
    interrupted: bool = False
    title: str = "gradient check"
    extra: dict = field(default_factory=dict)
    # The cost behind the report (pipeline.Source), for figures that need more
    # evaluations; not part of the JSON.
    source: object = field(default=None, repr=False, compare=False)

    @property
    def passed(self) -> bool:
        return not self.interrupted and not self.problems and not self.mismatches

    @property
    def mismatches(self) -> list:
        """Failing rows, worst first."""
        return [r for r in _worst_first(self.rows) if r.failing]

    @property
    def counts(self) -> dict:
        return dict(Counter(r.verdict for r in self.rows))

    @property
    def worst_relative_error(self):
        errors = [r.relative_error for r in self.rows]
        return max(errors) if errors else None

    @property
    def parameters(self) -> list:
        """One summary per parameter: name, rows checked, verdict counts, worst relative error."""
        by = {}
        for r in self.rows:
            by.setdefault(r.parameter, []).append(r)
        return [{"name": name, "checked": len(rs), "counts": dict(Counter(r.verdict for r in rs)),
                 "worst_relative_error": max(r.relative_error for r in rs)} for name, rs in by.items()]

    # --- renderers -----------------------------------------------------------------------
    def to_text(self, max_rows: int = TABLE_ROWS) -> str:
        return render_text(self, max_rows)

    def __str__(self) -> str:
        return self.to_text()

    def to_dict(self) -> dict:
        return {
            "schema": SCHEMA, "schema_version": SCHEMA_VERSION,
            "title": self.title, "passed": self.passed, "method": self.method,
            "evaluations": self.evaluations, "interrupted": self.interrupted,
            "checked": len(self.rows), "total": self.total, "counts": self.counts,
            "worst_relative_error": _json_number(self.worst_relative_error),
            "suggested_rtol": _json_number(self.suggested_rtol),
            "suggested_atol": _json_number(self.suggested_atol),
            "problems": list(self.problems), "hints": list(self.hints), "notes": list(self.notes),
            "parameters": [{**p, "worst_relative_error": _json_number(p["worst_relative_error"])}
                           for p in self.parameters],
            "rows": [_row_dict(r) for r in self.rows],
            "extra": _jsonable(self.extra),
        }

    def to_json(self, path=None, indent: int = 2) -> str:
        """The JSON text; with a path it is also written there atomically."""
        text = json.dumps(self.to_dict(), indent=indent, allow_nan=False)
        if path is not None:
            write_atomically(path, text + "\n")
        return text

    def plot(self, path, **options):
        """Write figures of this report to `path` (needs matplotlib: the `plot` extra)."""
        from .figures import plot_report  # lazy: matplotlib is optional
        return plot_report(self, path, **options)


def write_atomically(path, text: str) -> None:
    """Write to a temporary file beside `path`, then rename over it."""
    folder = os.path.dirname(os.path.abspath(os.fspath(path)))
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".tmp-", suffix=".json")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _json_number(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if hasattr(obj, "tolist"):
        return _jsonable(obj.tolist())
    if isinstance(obj, float):
        return _json_number(obj)
    return obj


def _row_dict(r: Row) -> dict:
    return {"name": r.name, "parameter": r.parameter, "index": list(r.index),
            "flat_index": r.flat_index, "analytic": _json_number(r.analytic),
            "numeric": _json_number(r.numeric), "absolute_error": _json_number(r.absolute_error),
            "relative_error": _json_number(r.relative_error),
            "error_estimate": _json_number(r.error_estimate), "verdict": r.verdict,
            "detail": r.detail}


def _worst_first(rows):
    return sorted(rows, key=lambda r: (not r.failing, -_sortable(r.relative_error), r.flat_index))


def _sortable(x):
    return x if not math.isnan(x) else math.inf


def _fmt(x, digits=6):
    if x is None:
        return "-"
    return f"{x:.{digits}e}" if math.isfinite(x) else str(x)


def summary_line(report: GradientReport) -> str:
    counts = report.counts
    checked = len(report.rows)
    head = "PASS" if report.passed else "FAIL"
    if report.interrupted:
        head = "INTERRUPTED"
    bad = sum(counts.get(v, 0) for v in FAILING)
    parts = [f"{bad} of {checked} coordinates fail" if bad else
             f"all {checked} coordinates agree" if counts.get("agree", 0) == checked else
             f"{checked} coordinates, none fail"]
    others = [f"{counts[v]} {v}" for v in VERDICTS if v != "agree" and counts.get(v)]
    if others:
        parts[0] += " (" + ", ".join(others) + ")"
    if checked < report.total:
        parts.append(f"of {report.total} in params")
    worst = report.worst_relative_error
    parts.append(f"worst relative error {_fmt(worst, 1)}")
    parts.append(f"method {report.method}")
    parts.append(f"{report.evaluations} evaluations")
    return f"{head} {report.title}: " + "; ".join(parts)


def render_text(report: GradientReport, max_rows: int = TABLE_ROWS) -> str:
    lines = [summary_line(report)]
    for p in report.problems:
        lines.append(f"  problem: {p}")
    ordered = _worst_first(report.rows)
    shown = ordered[:max_rows]
    if shown:
        width = max(10, max(len(r.name) for r in shown))
        lines.append(f"  {'coordinate':<{width}}  {'verdict':<10}  {'analytic':>14}  "
                     f"{'numeric':>14}  {'rel error':>9}  {'est error':>9}")
        for r in shown:
            lines.append(f"  {r.name:<{width}}  {r.verdict:<10}  {_fmt(r.analytic):>14}  "
                         f"{_fmt(r.numeric):>14}  {_fmt(r.relative_error, 1):>9}  "
                         f"{_fmt(r.error_estimate, 1):>9}" + (f"  {r.detail}" if r.detail else ""))
        rest = ordered[max_rows:]
        if rest:
            rest_counts = Counter(r.verdict for r in rest)
            lines.append(f"  ... {len(rest)} more rows: " +
                         ", ".join(f"{n} {v}" for v, n in sorted(rest_counts.items())))
    params = report.parameters
    if len(params) > 1 or (params and params[0]["checked"] > 1):
        lines.append("  by parameter:")
        width = max(len(p["name"]) for p in params)
        for p in params:
            counts = ", ".join(f"{n} {v}" for v, n in sorted(p["counts"].items()))
            lines.append(f"    {p['name']:<{width}}  largest relative error "
                         f"{_fmt(p['worst_relative_error'], 1)}  ({counts})")
    for title, items in (("hints", report.hints), ("notes", report.notes)):
        if items:
            lines.append(f"  {title}:")
            lines += [f"    - {item}" for item in items]
    if report.suggested_rtol is not None:
        lines.append(f"  tolerances that the agreeing coordinates pass with a 10x margin: "
                     f"rtol={report.suggested_rtol:g}, atol={report.suggested_atol:g}")
    return "\n".join(lines)
