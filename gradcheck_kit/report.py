"""Stage 6, report: the GradientReport data and its renderers (text, JSON, figures).

A report holds one row per checked coordinate (`Row`; a check keeps them as
columns, `RowColumns`, and builds the Row objects only when `.rows` is read), the
hints and notes the earlier stages wrote, the problems that fail it besides its rows, and the
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
                     cost); `problems` says why.  A mismatch search that probed has run
                     even when it isolated no coordinate
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
                     a sampled check {"remainder_order": ..., "remainder_passed": ...},
                     the group probes of a mismatch search {"probes": ...}

Non-finite numbers are written as null, since JSON has no NaN.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from .files import write_atomically  # file writing lives in files.py
from .tree import entry_names, leaves_and_indices
from .verdicts import FAILING, VERDICTS, count, relative_error

SCHEMA = "gradcheck_kit/gradient-report"
SCHEMA_VERSION = 2
TABLE_ROWS = 10  # rows shown in the text table; the rest are counted
_ROWS_AT_ONCE = 4096  # rows built at a time where a renderer walks all of them


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


_NUMBERS = ("analytic", "numeric", "absolute_error", "relative_error", "error_estimate")


@dataclass(eq=False)
class RowColumns:
    """The rows of a report as columns: one array per number, verdict codes, and the
    names either built on demand from the layout or given as lists.

    A full check of n coordinates keeps about six vectors of n numbers here, where n
    `Row` objects (names, index tuples, boxed floats) would take some sixty; the rows
    are built from the columns only when asked for (`rows`).

    Attributes
    ----------
    flat_index : ndarray of int64
        Each row's position in the flat vector of all coordinates.
    analytic, numeric, absolute_error, relative_error, error_estimate : ndarray of float64
        The numbers of `Row`, one entry per row.
    verdict : ndarray of uint8
        Each row's verdict, as its position in `verdicts`.
    verdicts : tuple of str
        The verdict names the codes refer to.
    details : dict
        Row position -> detail, for the rows whose detail is not empty.
    layout : tree.Layout or None
        Names, parameters and indices come from it (``tree.entry_names``) ...
    names, parameters, indices : list or None
        ... or from these lists, where the rows were given ready-made.

    Examples
    --------
    >>> import numpy as np
    >>> from gradcheck_kit.tree import flatten
    >>> _, layout = flatten({"W": np.zeros((2, 2))})
    >>> columns = RowColumns.from_arrays(layout, [3], [1.0], [1.5], ["disagree"], [""])
    >>> columns.rows()[0].name, len(columns)
    ('W[1, 1]', 1)
    """

    flat_index: np.ndarray
    analytic: np.ndarray
    numeric: np.ndarray
    absolute_error: np.ndarray
    relative_error: np.ndarray
    error_estimate: np.ndarray
    verdict: np.ndarray
    verdicts: tuple = VERDICTS
    details: dict = field(default_factory=dict)
    layout: object = None
    names: list = None
    parameters: list = None
    indices: list = None

    @classmethod
    def from_arrays(cls, layout, flat_index, analytic, numeric, verdict, details,
                    error_estimate=None) -> "RowColumns":
        """Columns of the coordinates `flat_index` of `layout` from their numbers.

        Parameters
        ----------
        layout : tree.Layout
        flat_index : array_like of int
        analytic, numeric : array_like of float
        verdict : array_like of str
            One of `VERDICTS` per row.
        details : sequence of str, or dict
            One per row ("" where none), or {row position: detail} of the rows that
            have one.
        error_estimate : array_like of float, optional
            The numeric values' error estimates (0 when not given).

        Returns
        -------
        RowColumns
        """
        a = np.asarray(analytic, dtype=np.float64).reshape(-1)
        n = np.asarray(numeric, dtype=np.float64).reshape(-1)
        with np.errstate(all="ignore"):
            absolute, relative = np.abs(a - n), relative_error(a, n)
        estimate = np.zeros(a.size) if error_estimate is None else \
            np.asarray(error_estimate, dtype=np.float64).reshape(-1)
        return cls(np.asarray(flat_index, dtype=np.int64).reshape(-1), a, n, absolute,
                   np.asarray(relative, dtype=np.float64).reshape(-1), estimate,
                   _codes(verdict, VERDICTS), VERDICTS,
                   _details(details), layout)

    @classmethod
    def from_rows(cls, rows) -> "RowColumns":
        """Columns holding the numbers of ready-made `Row` objects (and their names).

        Parameters
        ----------
        rows : sequence of Row

        Returns
        -------
        RowColumns
        """
        names = list(VERDICTS)
        names += sorted({r.verdict for r in rows} - set(names))
        numbers = [np.array([getattr(r, f) for r in rows], dtype=np.float64).reshape(-1)
                   for f in _NUMBERS]
        return cls(np.array([r.flat_index for r in rows], dtype=np.int64).reshape(-1), *numbers,
                   _codes([r.verdict for r in rows], tuple(names)), tuple(names),
                   {j: r.detail for j, r in enumerate(rows) if r.detail != ""}, None,
                   [r.name for r in rows], [r.parameter for r in rows],
                   [r.index for r in rows])

    def __len__(self) -> int:
        return int(self.flat_index.size)

    def coded(self, verdicts) -> np.ndarray:
        """Which rows have one of these verdicts (a boolean array)."""
        table = np.array([v in verdicts for v in self.verdicts] + [False])
        return table[self.verdict]

    @property
    def failing(self) -> np.ndarray:
        """Which rows fail a report (disagree, non-finite, error)."""
        return self.coded(FAILING)

    def labels(self, positions) -> tuple:
        """(names, parameter names, index tuples) of the rows at these positions."""
        positions = np.asarray(positions, dtype=np.intp).reshape(-1)
        if self.layout is not None:
            return entry_names(self.layout, self.flat_index[positions])
        at = positions.tolist()
        return ([self.names[j] for j in at], [self.parameters[j] for j in at],
                [self.indices[j] for j in at])

    def rows(self, positions=None) -> list:
        """`Row` objects of the rows at these positions (all rows when None), in order.

        Parameters
        ----------
        positions : array_like of int, optional

        Returns
        -------
        list of Row
        """
        positions = np.arange(len(self)) if positions is None else \
            np.asarray(positions, dtype=np.intp).reshape(-1)
        names, leaf_names, indices = self.labels(positions)
        numbers = [getattr(self, f)[positions].tolist() for f in _NUMBERS]
        verdict = [self.verdicts[c] for c in self.verdict[positions].tolist()]
        details = [self.details.get(j, "") for j in positions.tolist()]
        return [Row(*row) for row in zip(names, leaf_names, indices,
                                         self.flat_index[positions].tolist(), *numbers,
                                         verdict, details)]

    def counts(self, positions=None) -> dict:
        """Rows per verdict, in the order the verdicts first appear."""
        codes = self.verdict if positions is None else self.verdict[positions]
        if codes.size == 0:
            return {}
        found, first, number = np.unique(codes, return_index=True, return_counts=True)
        return {self.verdicts[found[k]]: int(number[k]) for k in np.argsort(first).tolist()}

    def worst(self, positions=None) -> tuple:
        """(worst relative error, 'failing' | 'agreeing') over the failing rows, else the
        agreeing ones; (None, None) when there are neither.  NaN counts as the largest."""
        if positions is None:
            positions = np.arange(len(self))
        for over, pick in (("failing", self.failing), ("agreeing", self.coded(("agree",)))):
            chosen = self.relative_error[positions[pick[positions]]]
            if chosen.size:
                return float(chosen[int(np.argmax(_sortable_array(chosen)))]), over
        return None, None

    def worst_first(self) -> np.ndarray:
        """Row positions, failing rows first, larger relative errors first, then by
        flat index (a stable order: rows that tie keep theirs)."""
        return np.lexsort((self.flat_index, -_sortable_array(self.relative_error),
                           ~self.failing))

    def parameter_groups(self) -> list:
        """(parameter name, row positions) per parameter, in the order they first appear."""
        if len(self) == 0:
            return []
        if self.layout is not None:
            numbers, _ = leaves_and_indices(self.layout, self.flat_index)
            leaf_names = [leaf.name for leaf in self.layout.leaves]
        else:
            leaf_names = list(dict.fromkeys(self.parameters))
            number_of = {name: k for k, name in enumerate(leaf_names)}
            numbers = np.array([number_of[p] for p in self.parameters], dtype=np.int64)
        group_of = {}     # leaves of one name (never two, but as the rows say) share a group
        group = np.array([group_of.setdefault(name, len(group_of)) for name in leaf_names],
                         dtype=np.int64)[numbers]
        order = np.argsort(group, kind="stable")
        cuts = np.flatnonzero(np.diff(group[order])) + 1
        parts = np.split(order, cuts)
        parts.sort(key=lambda part: part[0])
        names = list(group_of)
        return [(names[int(group[part[0]])], part) for part in parts]


def _details(details) -> dict:
    """{row position: detail} of the non-empty details, from a list or such a dict."""
    pairs = details.items() if isinstance(details, dict) else enumerate(details)
    return {int(j): d for j, d in pairs if d != ""}


def _codes(verdicts, names: tuple) -> np.ndarray:
    """Each verdict's position in `names` (a verdict not among them is an error)."""
    verdicts = np.asarray(verdicts).reshape(-1)
    codes = np.full(verdicts.size, len(names), dtype=np.uint8)
    for k, name in enumerate(names):
        codes[verdicts == name] = k
    if verdicts.size and codes.max() == len(names):
        raise ValueError(f"unknown verdict {str(verdicts[codes == len(names)][0])!r}; "
                         f"expected one of {', '.join(names)}")
    return codes


def _sortable_array(x: np.ndarray) -> np.ndarray:
    return np.where(np.isnan(x), np.inf, x)


class _LazyRows:
    """The `rows` field of a report: a list given, or columns whose `Row` objects are
    built on first access and kept (see RowColumns)."""

    def __get__(self, report, owner=None):
        if report is None:
            raise AttributeError("rows")     # a required field: no class-level default
        state = report.__dict__
        if state.get("_rows") is None and state.get("_columns") is not None:
            state["_rows"] = state["_columns"].rows()
        return state.get("_rows")

    def __set__(self, report, value) -> None:
        if isinstance(value, RowColumns):
            report.__dict__.update(_columns=value, _rows=None)
        else:
            report.__dict__.update(_columns=None, _rows=value)


@dataclass
class GradientReport:
    """The result of a gradient (or Jacobian) check.

    Parameters
    ----------
    rows : list of Row, or RowColumns
        One per checked coordinate, in the order checked.  Given as columns (see
        `from_columns`), the `Row` objects are built on first reading of ``.rows``
        and kept; every summary, the text and the JSON are made from the columns.
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

    rows: list = _LazyRows()   # a list of Row, or RowColumns whose rows are built when read
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

    @classmethod
    def from_columns(cls, columns: RowColumns, **fields) -> "GradientReport":
        """A report whose rows are held as columns (see RowColumns): a check of many
        coordinates keeps a few arrays instead of one object per row.

        Parameters
        ----------
        columns : RowColumns
        **fields
            The other fields, as for the constructor (method, evaluations, total, ...).

        Returns
        -------
        GradientReport

        Examples
        --------
        >>> import numpy as np
        >>> from gradcheck_kit.tree import flatten
        >>> _, layout = flatten(np.zeros(2))
        >>> columns = RowColumns.from_arrays(layout, [0, 1], [1.0, 2.0], [1.0, 2.5],
        ...                                  ["agree", "disagree"], ["", ""])
        >>> report = GradientReport.from_columns(columns, method="central", evaluations=4,
        ...                                      total=2)
        >>> report.counts, report.mismatches[0].name
        ({'agree': 1, 'disagree': 1}, 'x[1]')
        """
        return cls(rows=columns, **fields)

    def columns(self) -> RowColumns:
        """The rows as columns: those the report holds, or made from its list of rows."""
        held = self.__dict__.get("_columns")
        return held if held is not None else RowColumns.from_rows(self.rows)

    @property
    def checked(self) -> int:
        """Number of rows (coordinates checked)."""
        held = self.__dict__.get("_columns")
        return len(held) if held is not None else len(self.rows)

    @property
    def passed(self) -> bool:
        """No failing row, no problem, not interrupted."""
        return not self.interrupted and not self.problems and not self.columns().failing.any()

    @property
    def ran(self) -> bool:
        """False when the check stopped before its first coordinate (see `problems`).  A
        mismatch search that probed has run even when it isolated no coordinate."""
        return self.checked > 0 or self.interrupted or self.extra.get("probes", 0) > 0

    @property
    def mismatches(self) -> list:
        """Failing rows, worst first."""
        columns = self.columns()
        order = columns.worst_first()
        return self._rows_at(columns, order[columns.failing[order]])

    @property
    def counts(self) -> dict:
        """Number of rows per verdict."""
        return self.columns().counts()

    @property
    def worst_relative_error(self):
        """Largest relative error over the failing rows, or over the agreeing rows when
        none fails (kinks and undecided rows carry no meaningful error); None if neither."""
        return self.columns().worst()[0]

    @property
    def worst_relative_error_over(self):
        """'failing', 'agreeing' or None: the rows `worst_relative_error` is taken over."""
        return self.columns().worst()[1]

    @property
    def parameters(self) -> list:
        """One summary per parameter: name, rows checked, verdict counts, worst relative
        error (taken as for the whole report) and the rows it is taken over."""
        return _parameters(self.columns())

    def _rows_at(self, columns: RowColumns, positions) -> list:
        """The Row objects at these positions: from the list where there is one (the
        same objects), else built from the columns (and not kept)."""
        rows = self.__dict__.get("_rows")
        if rows is not None:
            return [rows[j] for j in np.asarray(positions).tolist()]
        return columns.rows(positions)

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
        columns = self.columns()
        counts, (worst, over) = columns.counts(), columns.worst()
        rows = self.__dict__.get("_rows")
        if rows is None:      # one Row at a time, none kept: the dicts are what is asked for
            rows = (row for start in range(0, len(columns), _ROWS_AT_ONCE)
                    for row in columns.rows(np.arange(start, min(start + _ROWS_AT_ONCE,
                                                                  len(columns)))))
        return {
            "schema": SCHEMA, "schema_version": SCHEMA_VERSION,
            "title": self.title, "passed": self.passed, "ran": self.ran, "method": self.method,
            "evaluations": self.evaluations, "interrupted": self.interrupted,
            "checked": self.checked, "total": self.total, "counts": counts,
            "worst_relative_error": _json_number(worst),
            "worst_relative_error_over": over,
            "suggested_rtol": _json_number(self.suggested_rtol),
            "suggested_atol": _json_number(self.suggested_atol),
            "suggested_central_rtol": _json_number(self.suggested_central_rtol),
            "suggested_central_atol": _json_number(self.suggested_central_atol),
            "problems": list(self.problems), "hints": list(self.hints), "notes": list(self.notes),
            "parameters": [{**p, "worst_relative_error": _json_number(p["worst_relative_error"])}
                           for p in _parameters(columns)],
            "rows": [_row_dict(r) for r in rows],
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


def _parameters(columns: RowColumns) -> list:
    """The per-parameter summaries of `GradientReport.parameters`."""
    out = []
    for name, positions in columns.parameter_groups():
        worst, over = columns.worst(positions)
        out.append({"name": name, "checked": int(positions.size),
                    "counts": columns.counts(positions),
                    "worst_relative_error": worst, "worst_relative_error_over": over})
    return out


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


def _empty_search(report: GradientReport) -> str:
    """The summary of a mismatch search (locate.py) that confirmed no coordinate: it ran,
    so it says what its probes found rather than 'not run'."""
    if report.problems:     # the budget ran out, or the executor stopped
        return f"no coordinate confirmed: {_first_clause(report.problems[0])}"
    cleared = ("the one coordinate" if report.total == 1
               else f"all {report.total} coordinates")
    return f"no mismatch found: {count(report.extra['probes'], 'probe')} cleared {cleared}"


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
    columns = report.columns()
    counts = columns.counts()
    checked = len(columns)
    bad = sum(counts.get(v, 0) for v in FAILING)
    empty_search = not checked and "probes" in report.extra and not report.interrupted
    if empty_search:
        parts = [_empty_search(report)]
    elif not checked:
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
    if checked < report.total and not empty_search:
        parts.append(f"of {report.total} in params")
    worst, over = columns.worst()
    if worst is not None:
        parts.append(f"worst relative error of the {over} rows {_fmt(worst, 1)}")
    parts.append(f"method {report.method}")
    parts.append(count(report.evaluations, "evaluation"))
    return title + "; ".join(parts)


# A suggested rtol at or above this would pass a gradient that much off: the line says so
# rather than offer it as something to pin.
TOO_LOOSE_RTOL = 0.1


def _too_loose(rtol) -> str:
    return ("; too loose to be worth pinning: it would pass a gradient that far off"
            if rtol >= TOO_LOOSE_RTOL else "")


def tolerance_line(report: GradientReport) -> str | None:
    """The suggested tolerances, saying which method they hold for; None if none agree."""
    if report.suggested_rtol is None:
        return None
    line = (f"  tolerances that the agreeing coordinates pass with a 10x margin: "
            f"rtol={_tolerance(report.suggested_rtol)}, "
            f"atol={_tolerance(report.suggested_atol)} for method {report.method} (used here"
            f"{_too_loose(report.suggested_rtol)})")
    if report.suggested_central_rtol is not None:
        rtol = report.suggested_central_rtol
        line += (f"; rtol={_tolerance(rtol)}, "
                 f"atol={_tolerance(report.suggested_central_atol)} for method=\"central\" "
                 + ("(what tests often pin)" if rtol < TOO_LOOSE_RTOL else
                    "(central differences cannot check these coordinates: a test pinning this "
                    "would pass a gradient that far off)"))
    return line


def render_text(report: GradientReport, max_rows: int = TABLE_ROWS) -> str:
    """The whole text of a report (see `GradientReport.to_text`)."""
    lines = [summary_line(report)]
    for p in report.problems:
        lines.append(f"  problem: {p}")
    columns = report.columns()
    ordered = columns.worst_first()
    shown = report._rows_at(columns, ordered[:max_rows])
    if shown:
        width = max(10, max(len(r.name) for r in shown))
        lines.append(f"  {'coordinate':<{width}}  {'verdict':<10}  {'analytic':>14}  "
                     f"{'numeric':>14}  {'rel error':>9}  {'est error':>9}")
        for r in shown:
            lines.append(f"  {r.name:<{width}}  {r.verdict:<10}  {_fmt(r.analytic):>14}  "
                         f"{_fmt(r.numeric):>14}  {_fmt(r.relative_error, 1):>9}  "
                         f"{_fmt(r.error_estimate, 1):>9}" + (f"  {r.detail}" if r.detail else ""))
        rest = ordered[max_rows:]
        if rest.size:
            rest_counts = columns.counts(rest)
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
