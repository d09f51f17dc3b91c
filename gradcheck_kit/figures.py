"""Figures of a report (matplotlib, the optional `plot` extra).

The figure's title is the report's summary line, once; below it one panel per
thing worth seeing, and no empty panel:

- Error map, for a parameter with two or more axes whose entries were mostly
  checked: each cell is a coordinate, shaded by log10 of its relative error
  (light: agree, dark: wrong, white: not checked), with a letter for every verdict
  but agree (D disagree, K kink, N noisy, E error or non-finite) so the pattern
  reads in grey print.  A wrong row, column or a transposition shows at a glance.
- Entry plot, for a 1-d parameter or one of which only a few entries were checked
  (40 of 200,000): log10 relative error against the entry's index, one marker per
  checked entry, the same letters.  No strip of blank cells, ticks that read.
- Step sweep: the error of the check's own method against its step on log-log
  axes for the worst coordinates, measured against the analytic value, with the
  step the check used marked: for a right gradient the V of truncation (right)
  against rounding (left) with the step near its bottom; for a wrong one a floor
  that no step gets under.
- Remainder order: |f(x + h v) - f(x) - h g.v| against h, slopes 1 and 2 drawn
  for reference, and a word where the direction crossed a kink.

The sweep and the remainder panel call the cost again (about 45 evaluations per
swept coordinate and 35 for the remainder), through the report's `reevaluation`.
Figures are drawn on a `matplotlib.figure.Figure` without pyplot, so the caller's
backend is never switched and no window opens.
"""
from __future__ import annotations

import math
import textwrap

import numpy as np

from .errors import CheckInputError

LETTERS = {"disagree": "D", "kink": "K", "noisy": "N", "error": "E", "non-finite": "E"}
SWEEP_COORDINATES = 3
MAPS = 4                # parameter panels at most
DENSE = 0.5             # a map needs at least this share of a parameter's entries checked
MAP_CELLS = 40_000      # ... and at most this many cells
FLOOR = 1e-16           # relative errors below this are drawn at it (exact agreement)


def _matplotlib():
    try:
        import matplotlib  # noqa: F401 - lazy: matplotlib is optional
        from matplotlib.figure import Figure
    except ImportError as exc:
        raise CheckInputError("figures need matplotlib: pip install 'gradcheck_kit[plot]'") \
            from exc
    return Figure


def _log_error(rel) -> float:
    rel = rel if np.isfinite(rel) else 1.0
    return math.log10(max(rel, FLOOR))


def _grid(rows, shape):
    """(log10 relative error grid, verdict grid) of one parameter, 2-d."""
    if len(shape) == 0:
        shape2 = (1, 1)
    elif len(shape) == 1:
        shape2 = (1, shape[0])
    else:
        shape2 = (shape[0], int(np.prod(shape[1:])))
    values = np.full(shape2, np.nan)
    verdict = np.full(shape2, "", dtype=object)
    for r in rows:
        i, j = np.unravel_index(np.ravel_multi_index(r.index, shape) if shape else 0, shape2)
        values[i, j] = _log_error(r.relative_error)
        verdict[i, j] = r.verdict
    return values, verdict


def _grey():
    from matplotlib.colors import LinearSegmentedColormap

    # light grey (agrees to rounding) to black (wrong); white is left for unchecked entries
    return LinearSegmentedColormap.from_list("gradcheck_grey", ["0.88", "0.0"]).with_extremes(
        bad="white")


def draw_error_map(ax, name, values, verdict):
    """One parameter as an image of log10 relative errors, letters on the verdicts."""
    from matplotlib.ticker import MaxNLocator

    image = ax.imshow(np.ma.masked_invalid(values), cmap=_grey(), vmin=-16, vmax=0,
                      aspect="auto", interpolation="nearest")
    for (i, j), v in np.ndenumerate(verdict):
        if v in LETTERS:
            ax.text(j, i, LETTERS[v], ha="center", va="center", fontsize=9, fontweight="bold",
                    color="white" if values[i, j] > -8 else "black")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_title(name)
    ax.set_xlabel("column (trailing axes flattened)")
    ax.set_ylabel("row")
    return image


def draw_entries(ax, name, rows, shape):
    """Checked entries of one parameter: log10 relative error against the flat index."""
    from matplotlib.ticker import MaxNLocator

    size = int(np.prod(shape)) if shape else 1
    index = np.array([np.ravel_multi_index(r.index, shape) if shape else 0 for r in rows])
    error = np.array([_log_error(r.relative_error) for r in rows])
    shade = [str(0.0 if r.verdict in LETTERS else 0.55) for r in rows]
    ax.scatter(index, error, c=shade, s=14, zorder=2)
    for x, y, r in zip(index, error, rows):
        if r.verdict in LETTERS:
            ax.annotate(LETTERS[r.verdict], (x, y), textcoords="offset points", xytext=(0, 5),
                        ha="center", fontsize=9, fontweight="bold")
    ax.set_xlim(-0.5, size - 0.5)
    ax.set_ylim(-16.5, 0.5)
    ax.xaxis.set_major_locator(MaxNLocator(nbins=6, integer=True))
    checked = f"{len(rows)} of {size} entries checked" if len(rows) < size else "all entries"
    ax.set_title(f"{name} ({checked})")
    ax.set_xlabel("index" if len(shape) <= 1 else "flat index (row-major)")
    ax.set_ylabel("log10 relative error")


def draw_step_sweep(ax, sweeps, names):
    """Error of the check's method against its step, the step used marked per coordinate."""
    markers = ["o", "s", "^", "D"]
    method = sweeps[0]["method"]
    for k, (sweep, name) in enumerate(zip(sweeps, names)):
        grey = str(0.15 + 0.25 * k)
        err = np.abs(sweep["derivatives"] - sweep["analytic"])
        err = np.where(np.isfinite(err) & (err > 0), err, np.nan)
        ax.loglog(sweep["steps"], err, marker=markers[k % 4], markersize=3, linewidth=1,
                  color=grey, label=name)
        ax.axvline(sweep["chosen_step"], color=grey, linestyle="--", linewidth=1,
                   label="step used (dashed)" if k == 0 else None)
    ax.set_title(f"{method}: error against step")
    ax.set_xlabel("step h")
    ax.set_ylabel("|numeric(h) - analytic|")
    ax.legend(fontsize=7)


def draw_remainder(ax, result):
    """The remainder against the step, slopes 1 and 2 for reference, a kink marked."""
    h, r = result.steps, result.remainders
    ok = np.isfinite(r) & (r > 0)
    ax.loglog(h[ok], r[ok], "o-", color="black", markersize=3, linewidth=1, label="remainder")
    if result.fitted.any():
        ax.loglog(h[result.fitted], r[result.fitted], "o", color="black", markersize=6,
                  fillstyle="none", label=f"fitted: order {result.order:.2f}")
    anchor_h, anchor_r = (h[ok][-1], r[ok][-1]) if ok.any() else (1.0, 1.0)
    for order, style in ((1, ":"), (2, "--")):
        ax.loglog(h, anchor_r * (h / anchor_h) ** order, style, color="0.5", linewidth=1,
                  label=f"slope {order}")
    title = "remainder |f(x+hv) - f(x) - h g.v|"
    if result.kink_step is not None:
        ax.axvspan(result.kink_step / 2, result.kink_step, color="0.85",
                   label="the direction crosses a kink here")
        title += ": crosses a kink, order not decided"
    elif not np.isfinite(result.order):
        title += ": no order fitted"
    ax.set_title(title)
    ax.set_xlabel("step h along v")
    ax.set_ylabel("remainder")
    ax.legend(fontsize=7)


def _save(fig, path):
    fig.savefig(path, dpi=100)
    return fig


def plot_jacobian(report, path):
    """One error map of a Jacobian check: rows are outputs, columns inputs."""
    Figure = _matplotlib()
    m, n = report.extra["outputs"], report.extra["inputs"]
    values = np.full((m, n), np.nan)
    verdict = np.full((m, n), "", dtype=object)
    for r in report.rows:
        i, j = divmod(r.flat_index, n)
        values[i, j] = _log_error(r.relative_error)
        verdict[i, j] = r.verdict
    fig = Figure(figsize=(max(5, 0.4 * n + 3), max(4, 0.35 * m + 2)), layout="constrained")
    ax = fig.add_subplot(1, 1, 1)
    image = draw_error_map(ax, "Jacobian: relative error per entry (white: not checked)",
                           values, verdict)
    ax.set_xlabel("input coordinate (flat index)")
    ax.set_ylabel("output (flat index)")
    fig.colorbar(image, ax=ax, label="log10 relative error")
    fig.suptitle(report.to_text().splitlines()[0], fontsize=9)
    return _save(fig, path)


def _shapes(report) -> dict:
    again = report.reevaluation
    if again is not None:
        return {leaf.name: leaf.shape for leaf in again.layout.leaves}
    return {}


def _panels(report, sweep: bool, remainder: bool) -> list:
    """(kind, data) for every panel with something to show, in reading order."""
    shapes = _shapes(report)
    panels = []
    for p in [p for p in report.parameters if p["checked"] >= 2][:MAPS]:
        rows = [r for r in report.rows if r.parameter == p["name"]]
        shape = shapes.get(p["name"]) or _shape_from_rows(rows)
        size = int(np.prod(shape)) if shape else 1
        dense = len(rows) >= DENSE * size and size <= MAP_CELLS
        kind = "map" if len(shape) >= 2 and dense else "entries"
        panels.append((kind, (p["name"], rows, shape)))
    again = report.reevaluation
    if again is not None and sweep:
        worst = sorted(report.rows, key=lambda r: -_finite(r.relative_error))[:SWEEP_COORDINATES]
        sweeps = [again.step_sweep(r.flat_index) for r in worst]
        shown = [(s, f"{r.name} ({r.verdict})") for s, r in zip(sweeps, worst)
                 if np.any(np.abs(s["derivatives"] - s["analytic"]) > 0)]
        # a cost whose differences are exact (x**2 by central differences) has no error
        # to draw: no panel rather than an empty one
        if shown:
            panels.append(("sweep", shown))
    if again is not None and remainder:
        result = again.remainder(seed=0)   # the same figure every time
        if np.any(np.isfinite(result.remainders) & (result.remainders > 0)):
            panels.append(("remainder", result))
    return panels


def plot_report(report, path, *, sweep=True, remainder=True):
    """Write the report's figure to `path`.

    Parameters
    ----------
    report : GradientReport
    path : str or os.PathLike
        The image file; its suffix picks the format.
    sweep, remainder : bool
        Draw the panels that call the cost again.

    Returns
    -------
    matplotlib.figure.Figure
    """
    if "outputs" in report.extra:
        return plot_jacobian(report, path)
    Figure = _matplotlib()
    panels = _panels(report, sweep, remainder)
    ncols = max(1, min(len(panels), 3))
    nrows = max(1, math.ceil(len(panels) / ncols))
    # A figure with no panels holds only text: a constrained layout has nothing to lay out
    # (and matplotlib warns that it could not apply it).
    fig = Figure(figsize=(5.5 * ncols, 4.2 * nrows + 0.4),
                 layout="constrained" if panels else None)
    for k, (kind, data) in enumerate(panels):
        ax = fig.add_subplot(nrows, ncols, k + 1)
        if kind == "map":
            name, rows, shape = data
            values, verdict = _grid(rows, shape)
            image = draw_error_map(ax, name, values, verdict)
            fig.colorbar(image, ax=ax, label="log10 relative error (white: not checked)")
        elif kind == "entries":
            draw_entries(ax, *data)
        elif kind == "sweep":
            draw_step_sweep(ax, [s for s, _ in data], [name for _, name in data])
        else:
            draw_remainder(ax, data)
    if not panels:
        # Only text: the table's lines left-aligned as printed, long ones wrapped.
        fig.set_size_inches(9, 4)
        ax = fig.add_subplot(1, 1, 1)
        ax.axis("off")
        lines = [part for line in report.to_text().splitlines()[1:8]
                 for part in (textwrap.wrap(line, 110, subsequent_indent="    ") or [""])]
        ax.text(0.0, 0.5, "\n".join(lines), ha="left", va="center", fontsize=7,
                family="monospace")
    # The summary line, wrapped to the figure's width (about 16 characters an inch at 9 pt).
    width = max(60, int(fig.get_figwidth() * 16))
    fig.suptitle("\n".join(textwrap.wrap(report.to_text().splitlines()[0], width)), fontsize=9)
    return _save(fig, path)


def plot_remainder(result, path):
    """The remainder-order figure alone (see `draw_remainder`)."""
    Figure = _matplotlib()
    fig = Figure(figsize=(5, 4), layout="constrained")
    draw_remainder(fig.add_subplot(1, 1, 1), result)
    return _save(fig, path)


def _finite(x):
    return x if np.isfinite(x) else 1e300


def _shape_from_rows(rows):
    if not rows or not rows[0].index:
        return ()
    return tuple(max(r.index[d] for r in rows) + 1 for d in range(len(rows[0].index)))
