"""Stage 6, report: the GradientReport data and its renderers (text, JSON, figures).

A report holds one row per checked coordinate (`Row`), the hints and notes the
earlier stages wrote, the problems that fail it besides its rows, and the
tolerances its agreeing rows pass.  It renders itself as text (`to_text`, also
`str(report)`), as JSON (`to_dict`, `to_json`) and as figures (`plot`, needs
matplotlib).  Its figures call the cost again through `reevaluation`, a small
`reevaluate.Reevaluation` (the cost, the layout, copies of the point and the
analytic gradient, steps and method), never the whole check.

JSON schema of a gradient report (``schema_version`` 2), the output of `to_dict`;
every key is always present:

    schema           "gradcheck_kit/gradient-report"
    schema_version   2
    title            what was checked: "gradient check", "jacobian check", ...
    passed           bool
    ran              bool: false when the check stopped before any coordinate (a random
                     cost); `problems` says why
    method           the method used ("complex-step", "richardson", ...; the method asked
                     for when the check did not run)
    evaluations      cost evaluations spent (points; a batch of k counts k)
    interrupted      bool: stopped by Ctrl-C, rows cover the finished coordinates
    checked, total   coordinates examined, coordinates in params
    counts           {verdict: number of rows}
    worst_relative_error     largest relative error over the failing rows, or over the
                     agreeing rows when none fails (null if neither)
    worst_relative_error_over  "failing", "agreeing" or null: which rows that is
    suggested_rtol, suggested_atol   tolerances every agreeing row passes with a 10x margin,
                     for `method` (see verdicts.suggest_tolerances; null if none agree)
    suggested_central_rtol, suggested_central_atol   the same for central differences, from
                     their error model, where `method` is not central (else null)
    problems         reasons the report fails besides its rows (e.g. a random cost)
    hints, notes     lists of sentences
    parameters       [{name, checked, counts, worst_relative_error, worst_relative_error_over}]
    rows             [{name, parameter, index, flat_index, analytic, numeric,
                       absolute_error, relative_error, error_estimate, verdict, detail}]
    extra            data of the check that made the report, beyond the rows: the
                     Jacobian's {"outputs": m, "inputs": n}, the remainder-order probe of
                     a sampled check {"remainder_order": ..., "remainder_passed": ...}

Non-finite numbers are written as null, since JSON has no NaN.
"""
from __future__ import annotations

import json
import math
from collections import Counter
from dataclasses import dataclass, field

from .files import write_atomically  # file writing lives in files.py
from .verdicts import FAILING, VERDICTS, count

SCHEMA = "gradcheck_kit/gradient-report"
SCHEMA_VERSION = 2
TABLE_ROWS = 10  # rows shown in the text table; the rest are counted


@dataclass(slots=True)   # no __dict__ per row: a full check of n coordinates holds n rows
class Row:
    """One checked coordinate: its name, the two values, their difference and verdict.

    Attributes
    ----------
    name : str
        The coordinate, e.g. ``'W[2, 1]'``, ``'layers.0.b[3]'``, ``'bias'``.
    parameter : str
        The parameter (leaf) it belongs to, e.g. ``'W'``.
    index : tuple of int
        Its index within that parameter; ``()`` for a scalar.
    flat_index : int
        Its position in the flat vector of all coordinates.
    analytic, numeric : float
        The analytic and the numeric derivative.
    absolute_error : float
        ``|analytic - numeric|``.
    relative_error : float
        ``|analytic - numeric| / max(|analytic|, |numeric|)`` (0 when both are 0, inf
        when either is not finite).
    error_estimate : float
        The numeric derivative's estimated error (truncation plus rounding).
    verdict : str
        ``'agree'``, ``'disagree'``, ``'kink'``, ``'noisy'``, ``'non-finite'`` or
        ``'error'``.
    detail : str
        Why, when the verdict needs a word (the error raised, a kink's slopes).

    Examples
    --------
    >>> r = Row("x[0]", "x", (0,), 0, 2.0, 1.0, 1.0, 0.5, 1e-15, "disagree")
    >>> r.failing
    True
    """

    name: str
    parameter: str
    index: tuple
    flat_index: int
    analytic: float
    numeric: float
    absolute_error: float
    relative_error: float
    error_estimate: float
    verdict: str
    detail: str = ""

    @property
    def failing(self) -> bool:
        """The verdict fails a report (disagree, non-finite, error)."""
        return self.verdict in FAILING


@dataclass
class GradientReport:
    """The result of a gradient (or Jacobian) check.

    Parameters
    ----------
    rows : list of Row
        One per checked coordinate, in the order checked.
    method : str
        The method used (the one asked for when the check did not run).
    evaluations : int
        Cost evaluations spent.
    total : int
        Coordinates in params (rows may cover only a sample).
    hints : list of str
        Patterns of the mismatches, each starting with a key word and a colon.
    notes : list of str
        What the reader should know that does not fail the check.
    problems : list of str
        Reasons the report fails besides its rows (a random cost, ...).
    suggested_rtol, suggested_atol : float or None
        Tolerances every agreeing row passes with a 10x margin, for `method`.
    suggested_central_rtol, suggested_central_atol : float or None
        The same for central differences, where `method` is another one.
    interrupted : bool
        Stopped by Ctrl-C: the rows cover the finished coordinates.
    title : str
        What was checked: ``'gradient check'``, ``'jacobian check'``, ...
    extra : dict
        Data of the check beyond the rows, written to the JSON as is: the
        Jacobian's ``{"outputs": m, "inputs": n}`` (its figure reads them), the
        remainder-order probe of a sampled check.
    reevaluation : reevaluate.Reevaluation or None
        What the figures need to call the cost again (not part of the JSON, nor
        of comparisons); None where the report cannot (a Jacobian, a report
        read back).

    Examples
    --------
    >>> import numpy as np, gradcheck_kit as gk
    >>> report = gk.compare_gradient(lambda x: np.sum(x ** 2), np.array([1.0, 2.0]),
    ...                              lambda x: 2 * x)
    >>> report.passed, report.counts, report.rows[1].name
    (True, {'agree': 2}, 'x[1]')
    """

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
    suggested_central_rtol: float | None = None
    suggested_central_atol: float | None = None
    reevaluation: object = field(default=None, repr=False, compare=False)

    @property
    def passed(self) -> bool:
        """No failing row, no problem, not interrupted."""
        return not self.interrupted and not self.problems and not self.mismatches

    @property
    def ran(self) -> bool:
        """False when the check stopped before its first coordinate (see `problems`)."""
        return bool(self.rows) or self.interrupted

    @property
    def mismatches(self) -> list:
        """Failing rows, worst first."""
        return [r for r in _worst_first(self.rows) if r.failing]

    @property
    def counts(self) -> dict:
        """Number of rows per verdict."""
        return dict(Counter(r.verdict for r in self.rows))

    @property
    def worst_relative_error(self):
        """Largest relative error over the failing rows, or over the agreeing rows when
        none fails (kinks and undecided rows carry no meaningful error); None if neither."""
        return _worst(self.rows)[0]

    @property
    def worst_relative_error_over(self):
        """'failing', 'agreeing' or None: the rows `worst_relative_error` is taken over."""
        return _worst(self.rows)[1]

    @property
    def parameters(self) -> list:
        """One summary per parameter: name, rows checked, verdict counts, worst relative
        error (taken as for the whole report) and the rows it is taken over."""
        by = {}
        for r in self.rows:
            by.setdefault(r.parameter, []).append(r)
        out = []
        for name, rs in by.items():
            worst, over = _worst(rs)
            out.append({"name": name, "checked": len(rs),
                        "counts": dict(Counter(r.verdict for r in rs)),
                        "worst_relative_error": worst, "worst_relative_error_over": over})
        return out

    # --- renderers -----------------------------------------------------------------------
    def to_text(self, max_rows: int = TABLE_ROWS) -> str:
        """The report as text: summary line, worst rows first, parameters, hints, notes.

        Parameters
        ----------
        max_rows : int
            Rows shown in the table; the rest are counted.

        Returns
        -------
        str
        """
        return render_text(self, max_rows)

    def __str__(self) -> str:
        return self.to_text()

    def to_dict(self) -> dict:
        """The report as plain data, in the schema of the module text.

        Returns
        -------
        dict
        """
        return {
            "schema": SCHEMA, "schema_version": SCHEMA_VERSION,
            "title": self.title, "passed": self.passed, "ran": self.ran, "method": self.method,
            "evaluations": self.evaluations, "interrupted": self.interrupted,
            "checked": len(self.rows), "total": self.total, "counts": self.counts,
            "worst_relative_error": _json_number(self.worst_relative_error),
            "worst_relative_error_over": self.worst_relative_error_over,
            "suggested_rtol": _json_number(self.suggested_rtol),
            "suggested_atol": _json_number(self.suggested_atol),
            "suggested_central_rtol": _json_number(self.suggested_central_rtol),
            "suggested_central_atol": _json_number(self.suggested_central_atol),
            "problems": list(self.problems), "hints": list(self.hints), "notes": list(self.notes),
            "parameters": [{**p, "worst_relative_error": _json_number(p["worst_relative_error"])}
                           for p in self.parameters],
            "rows": [_row_dict(r) for r in self.rows],
            "extra": _jsonable(self.extra),
        }

    def to_json(self, path=None, indent: int = 2) -> str:
        """The JSON text; with a path it is also written there atomically.

        Parameters
        ----------
        path : str or os.PathLike, optional
        indent : int

        Returns
        -------
        str
        """
        text = json.dumps(self.to_dict(), indent=indent, allow_nan=False)
        if path is not None:
            write_atomically(path, text + "\n")
        return text

    def plot(self, path, **options):
        """Write figures of this report to `path` (needs matplotlib: the `plot` extra).

        Parameters
        ----------
        path : str or os.PathLike
            The image file (its suffix picks the format).
        **options
            ``sweep=False`` or ``remainder=False`` leave out the panels that call the
            cost again.

        Returns
        -------
        matplotlib.figure.Figure
            The figure (drawn without pyplot: the caller's backend is untouched).

        Raises
        ------
        CheckInputError
            matplotlib is not installed.
        """
        from .figures import plot_report  # lazy: matplotlib is optional
        return plot_report(self, path, **options)




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


def _worst(rows) -> tuple:
    """(worst relative error, 'failing' | 'agreeing') over the failing rows, else the
    agreeing ones; (None, None) when there are neither."""
    for over, pick in (("failing", lambda r: r.failing),
                       ("agreeing", lambda r: r.verdict == "agree")):
        chosen = [r.relative_error for r in rows if pick(r)]
        if chosen:
            return max(chosen, key=_sortable), over
    return None, None


def _fmt(x, digits=6):
    if x is None:
        return "-"
    x = float(x)
    return f"{x:.{digits}e}" if math.isfinite(x) else str(x)


def _first_clause(text: str) -> str:
    """The problem's first clause ('the cost is not deterministic'), for the summary."""
    return text.split(": ", 1)[0].split(". ", 1)[0]


def _tolerance(x) -> str:
    return f"{float(x):g}"


def summary_line(report: GradientReport) -> str:
    """The first line of the text: PASS / FAIL / INTERRUPTED, counts, worst error, method.

    Parameters
    ----------
    report : GradientReport

    Returns
    -------
    str
    """
    head = "PASS" if report.passed else "FAIL"
    if report.interrupted:
        head = "INTERRUPTED"
    title = f"{head} {report.title}: "
    if not report.ran:
        why = _first_clause(report.problems[0]) if report.problems else "no coordinate"
        return title + f"not run: {why}; {count(report.evaluations, 'evaluation')}"
    counts = report.counts
    checked = len(report.rows)
    bad = sum(counts.get(v, 0) for v in FAILING)
    if not report.rows:
        parts = ["stopped before any coordinate finished"]
    elif bad:
        parts = [f"{bad} of {count(checked, 'coordinate')} fail"]
    elif counts.get("agree", 0) == checked:
        parts = ["1 coordinate agrees" if checked == 1 else f"all {checked} coordinates agree"]
    else:
        parts = [f"{count(checked, 'coordinate')}, none fail{'s' if checked == 1 else ''}"]
    others = [f"{counts[v]} {v}" for v in VERDICTS if v != "agree" and counts.get(v)]
    if others:
        parts[0] += " (" + ", ".join(others) + ")"
    if checked < report.total:
        parts.append(f"of {report.total} in params")
    worst, over = _worst(report.rows)
    if worst is not None:
        parts.append(f"worst relative error of the {over} rows {_fmt(worst, 1)}")
    parts.append(f"method {report.method}")
    parts.append(count(report.evaluations, "evaluation"))
    return title + "; ".join(parts)


def tolerance_line(report: GradientReport) -> str | None:
    """The suggested tolerances, saying which method they hold for; None if none agree."""
    if report.suggested_rtol is None:
        return None
    line = (f"  tolerances that the agreeing coordinates pass with a 10x margin: "
            f"rtol={_tolerance(report.suggested_rtol)}, "
            f"atol={_tolerance(report.suggested_atol)} for method {report.method} (used here)")
    if report.suggested_central_rtol is not None:
        line += (f"; rtol={_tolerance(report.suggested_central_rtol)}, "
                 f"atol={_tolerance(report.suggested_central_atol)} for method=\"central\" "
                 "(what tests often pin)")
    return line


def render_text(report: GradientReport, max_rows: int = TABLE_ROWS) -> str:
    """The whole text of a report (see `GradientReport.to_text`)."""
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
            worst = (f"worst relative error {_fmt(p['worst_relative_error'], 1)} "
                     f"({p['worst_relative_error_over']})"
                     if p["worst_relative_error"] is not None else "no agreeing or failing row")
            lines.append(f"    {p['name']:<{width}}  {worst}; {counts}")
    for title, items in (("hints", report.hints), ("notes", report.notes)):
        if items:
            lines.append(f"  {title}:")
            lines += [f"    - {item}" for item in items]
    tolerances = tolerance_line(report)
    if tolerances:
        lines.append(tolerances)
    return "\n".join(lines)


def outside_note(probe, checked: int, total: int, any_failing: bool, notes: list,
                 problems: list) -> None:
    """What the remainder-order probe through all coordinates says about a sampled check.

    A wrong gradient outside the sample fails the report (a problem); with failing rows
    already, or a pass, or nothing decided, it is a note.

    Parameters
    ----------
    probe : reevaluate.RemainderResult
    checked, total : int
        Coordinates sampled, coordinates in params.
    any_failing : bool
        Some sampled row fails already.
    notes, problems : list of str
        Appended to.
    """
    where = (f"the remainder-order probe along a random direction through all {total} "
             f"coordinates")
    if probe.wrong:
        said = (f"{where} has order {probe.order:.2f} (2 for a right gradient, 1 for a wrong "
                "one)")
        if any_failing:
            notes.append(f"{said}: it shows the gradient wrong too")
        else:
            problems.append(f"{said}: the gradient is wrong outside the "
                            f"{count(checked, 'sampled coordinate')}; check all coordinates "
                            "(coordinates=None) or find the wrong ones with locate_mismatches")
    elif probe.passed:
        notes.append(f"{where} has order {probe.order:.2f}: no sign of a wrong gradient outside "
                     f"the {count(checked, 'sampled coordinate')} (one direction, as cheap as "
                     "it is partial)")
    else:
        notes.append(f"{where} decided nothing: {probe.message}")
