"""The report of a stochastic-gradient check: its data and renderers (text, JSON, figure).

JSON schema (schema_version 1), the output of `to_dict`:

    schema          "gradcheck_kit/stochastic-gradient-report"
    schema_version  1
    passed          bool
    level           the family-wise false-alarm level asked for
    resolution      the relative bias below which a coordinate may agree
    draws           draws used (that did not raise); failed_draws: draws that raised
    rounds          the draws after each round, e.g. [64, 128, 256]
    seed            the seed's entropy: pass it as seed= to replay the check draw for draw
    reference       "cost" (numeric, with error estimates) or "gradient" (given values)
    evaluations     cost evaluations spent on the reference (0 with gradient=)
    counts          {verdict: number of rows}
    largest_detectable  the largest, over tested rows, smallest relative bias that would
                    have been found with 95% power (null if none tested)
    problems, hints, notes   lists of sentences
    rows            [{name, parameter, index, flat_index, reference, reference_error, mean,
                      bias, standard_error, low, high, relative_bias, detectable, scale,
                      draws_needed, verdict, detail}]

Non-finite numbers are written as null.
"""
from __future__ import annotations

import json
import math
from collections import Counter
from dataclasses import dataclass, field

from .report import write_atomically

FAILING = ("disagree", "non-finite", "error")   # verdicts that fail a report, as elsewhere

SCHEMA = "gradcheck_kit/stochastic-gradient-report"
SCHEMA_VERSION = 1
TABLE_ROWS = 10
ORDER = ("disagree", "non-finite", "error", "noisy", "agree")


@dataclass
class StochasticRow:
    """One coordinate of a stochastic-gradient check.

    `bias` is mean - reference; [low, high] its simultaneous confidence interval (the
    reference's error included); `relative_bias` and `detectable` are relative to the
    coordinate's scale, max(|reference|, rms of the reference); `draws_needed` is set for
    noisy rows (0 elsewhere, -1 where no number of draws would do).

    Attributes
    ----------
    name, parameter, index, flat_index
        The coordinate, as in `Row`.
    reference, reference_error : float
        The full gradient's value and its own error bound (numeric references).
    mean, bias, standard_error : float
        Of the draws; bias = mean - reference.
    low, high : float
        The bias's simultaneous confidence interval.
    relative_bias, detectable, scale : float
        Bias over scale; the smallest relative bias the draws would find with 95% power.
    draws_needed : int
        For noisy rows, about how many draws would decide them.
    verdict : str
        "agree", "disagree", "noisy", "non-finite" or "error".
    detail : str
        Why, where the verdict needs a word.
    """
    name: str
    parameter: str
    index: tuple
    flat_index: int
    reference: float
    reference_error: float
    mean: float
    bias: float
    standard_error: float
    low: float
    high: float
    relative_bias: float
    detectable: float
    scale: float
    draws_needed: int
    verdict: str
    detail: str = ""

    @property
    def interval(self) -> tuple:
        return (self.low, self.high)

    @property
    def failing(self) -> bool:
        return self.verdict in FAILING


@dataclass
class StochasticReport:
    """Result of `compare_stochastic_gradient`: `.passed`, `.rows`, `.hints`, `.notes`,
    `str(report)`, `.to_dict()`, `.to_json(path=None)`, `.plot(path)`.

    Attributes
    ----------
    rows : list of StochasticRow
        One per coordinate.
    level, resolution : float
        The family-wise false-alarm level, and the relative bias below which a
        coordinate agrees.
    draws : int
        Draws taken, over `rounds` (the draws of each round).
    seed : int
        Replays the check draw for draw.
    reference : str
        Where the reference gradient came from ("cost" or "gradient").
    evaluations, failed_draws, total : int
        Cost evaluations of the reference, draws that raised, coordinates in params.
    hints, notes, problems : list of str
        Patterns of a bias; what the reader should know; what fails the check.
    interrupted : bool
        Ctrl-C came before the check was decided.
    passed : bool
        No problem, no interrupt and no failing row.
    """
    rows: list
    level: float
    resolution: float
    draws: int
    rounds: list
    seed: int
    reference: str
    evaluations: int = 0
    failed_draws: int = 0
    total: int = 0
    hints: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    interrupted: bool = False
    title: str = "stochastic gradient check"

    @property
    def passed(self) -> bool:
        return not self.interrupted and not self.problems and not self.mismatches

    @property
    def mismatches(self) -> list:
        """Failing rows, most biased first."""
        return [r for r in _ordered(self.rows) if r.failing]

    @property
    def counts(self) -> dict:
        return dict(Counter(r.verdict for r in self.rows))

    @property
    def largest_detectable(self):
        """Over the tested rows, the largest smallest-detectable relative bias (or None)."""
        values = [r.detectable for r in self.rows if math.isfinite(r.detectable)]
        return max(values) if values else None

    def to_text(self, max_rows: int = TABLE_ROWS) -> str:
        return render_text(self, max_rows)

    def __str__(self) -> str:
        return self.to_text()

    def to_dict(self) -> dict:
        return {
            "schema": SCHEMA, "schema_version": SCHEMA_VERSION, "title": self.title,
            "passed": self.passed, "level": self.level, "resolution": self.resolution,
            "draws": self.draws, "failed_draws": self.failed_draws, "rounds": list(self.rounds),
            "seed": self.seed, "reference": self.reference, "evaluations": self.evaluations,
            "interrupted": self.interrupted, "checked": len(self.rows), "total": self.total,
            "counts": self.counts, "largest_detectable": _number(self.largest_detectable),
            "problems": list(self.problems), "hints": list(self.hints),
            "notes": list(self.notes), "rows": [_row_dict(r) for r in self.rows],
        }

    def to_json(self, path=None, indent: int = 2) -> str:
        """The JSON text; with a path it is also written there atomically."""
        text = json.dumps(self.to_dict(), indent=indent, allow_nan=False)
        if path is not None:
            write_atomically(path, text + "\n")
        return text

    def plot(self, path, max_rows: int = 40):
        """Write a figure of the bias intervals, relative to each coordinate's scale, to
        `path` (needs matplotlib: the `plot` extra).  Returns the path."""
        try:
            import matplotlib
            matplotlib.use("Agg")
            import matplotlib.pyplot as plt
        except ImportError as exc:
            raise ImportError("report.plot needs matplotlib: pip install "
                              "'gradcheck_kit[plot]'") from exc
        rows = [r for r in _ordered(self.rows) if math.isfinite(r.low)][:max_rows]
        fig, ax = plt.subplots(figsize=(7, 0.3 * len(rows) + 1.5))
        colours = {"agree": "tab:green", "disagree": "tab:red", "noisy": "tab:orange"}
        for y, r in enumerate(rows):
            scale = r.scale
            ax.plot([r.low / scale, r.high / scale], [y, y], color=colours.get(r.verdict, "k"))
            ax.plot([r.relative_bias], [y], "o", color=colours.get(r.verdict, "k"))
        ax.axvspan(-self.resolution, self.resolution, color="0.9", zorder=0)
        ax.axvline(0.0, color="0.5", lw=0.8)
        ax.set_yticks(range(len(rows)), [r.name for r in rows])
        ax.set_xlabel("bias / scale, with its interval (grey: the resolution)")
        ax.set_title(summary_line(self), fontsize=8)
        fig.tight_layout()
        fig.savefig(path)
        plt.close(fig)
        return path


def _number(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _row_dict(r: StochasticRow) -> dict:
    out = {"name": r.name, "parameter": r.parameter, "index": list(r.index),
           "flat_index": r.flat_index}
    for key in ("reference", "reference_error", "mean", "bias", "standard_error", "low",
                "high", "relative_bias", "detectable", "scale"):
        out[key] = _number(getattr(r, key))
    out.update(draws_needed=r.draws_needed, verdict=r.verdict, detail=r.detail)
    return out


def _ordered(rows):
    def key(r):
        size = abs(r.relative_bias) if math.isfinite(r.relative_bias) else math.inf
        return (ORDER.index(r.verdict) if r.verdict in ORDER else 0, -size, r.flat_index)
    return sorted(rows, key=key)


def _fmt(x, digits=4):
    return f"{x:.{digits}e}" if math.isfinite(x) else str(x)


def summary_line(report: StochasticReport) -> str:
    head = "INTERRUPTED" if report.interrupted else ("PASS" if report.passed else "FAIL")
    counts = report.counts
    n = len(report.rows)
    bad = sum(counts.get(v, 0) for v in FAILING)
    if bad:
        first = f"{bad} of {n} coordinates fail"
    elif counts.get("agree", 0) == n:
        first = f"all {n} coordinates unbiased within {report.resolution:g}"
    else:
        first = f"{n} coordinates, none biased"
    others = [f"{counts[v]} {v}" for v in ORDER if v != "agree" and counts.get(v)]
    if others:
        first += " (" + ", ".join(others) + ")"
    rounds = len(report.rounds)
    parts = [first, f"{report.draws} draws in {rounds} round{'' if rounds == 1 else 's'}",
             f"family-wise level {report.level:g}",
             f"reference {report.reference}" + (f" ({report.evaluations} evaluations)"
                                                if report.evaluations else "")]
    return f"{head} {report.title}: " + "; ".join(parts)


def render_text(report: StochasticReport, max_rows: int = TABLE_ROWS) -> str:
    lines = [summary_line(report)]
    lines += [f"  problem: {p}" for p in report.problems]
    ordered = _ordered(report.rows)
    shown = ordered[:max_rows]
    if shown:
        width = max(10, max(len(r.name) for r in shown))
        lines.append(f"  {'coordinate':<{width}}  {'verdict':<10}  {'reference':>11}  "
                     f"{'mean':>11}  {'bias':>11}  {'std error':>9}  {'interval of the bias':>25}"
                     f"  {'rel bias':>8}  {'detectable':>10}")
        for r in shown:
            interval = f"[{_fmt(r.low, 2)}, {_fmt(r.high, 2)}]"
            lines.append(f"  {r.name:<{width}}  {r.verdict:<10}  {_fmt(r.reference):>11}  "
                         f"{_fmt(r.mean):>11}  {_fmt(r.bias):>11}  {_fmt(r.standard_error, 1):>9}"
                         f"  {interval:>25}  {_fmt(r.relative_bias, 1):>8}  "
                         f"{_fmt(r.detectable, 1):>10}" + (f"  {r.detail}" if r.detail else ""))
        rest = ordered[max_rows:]
        if rest:
            c = Counter(r.verdict for r in rest)
            lines.append(f"  ... {len(rest)} more rows: " +
                         ", ".join(f"{k} {v}" for v, k in sorted(c.items())))
    largest = report.largest_detectable
    if largest is not None:
        lines.append(f"  a relative bias of {largest:.2g} or more in any tested coordinate "
                     "would have been found with 95% power (column 'detectable': per coordinate)")
    for title, items in (("hints", report.hints), ("notes", report.notes)):
        if items:
            lines.append(f"  {title}:")
            lines += [f"    - {item}" for item in items]
    return "\n".join(lines)
