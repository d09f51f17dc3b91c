"""Figures of a report (matplotlib, the optional `plot` extra).

- Error map: one panel per parameter with two or more entries; each cell is a
  coordinate, shaded by log10 of its relative error (light: agree, dark: wrong),
  with a letter for every verdict but agree (D disagree, K kink, N noisy,
  E error or non-finite) so the pattern reads in grey print.  A wrong row,
  column or a transposition shows at a glance.
- Step sweep: error of the central difference against the step on log-log axes
  for the worst coordinates, the chosen step marked: the V of truncation (right)
  against rounding (left).
- Taylor remainder: |f(x + h v) - f(x) - h g.v| against h, with slopes 1 and 2
  drawn for reference.

The sweep and the remainder panel evaluate the cost again (about 90 evaluations per
swept coordinate and 26 for the remainder-order check); they are drawn when the report
still knows its cost, which is the case for reports of compare_gradient.
"""
from __future__ import annotations

import numpy as np

from .errors import CheckInputError

LETTERS = {"disagree": "D", "kink": "K", "noisy": "N", "error": "E", "non-finite": "E"}
SWEEP_COORDINATES = 3


def _pyplot():
    try:
        import matplotlib
    except ImportError as exc:
        raise CheckInputError("figures need matplotlib: pip install 'gradcheck_kit[plot]'") \
            from exc
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    return plt


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
        rel = r.relative_error if np.isfinite(r.relative_error) else 1.0
        values[i, j] = np.log10(max(rel, 1e-16))
        verdict[i, j] = r.verdict
    return values, verdict


def draw_error_map(ax, name, values, verdict):
    _pyplot()
    from matplotlib.colors import LinearSegmentedColormap

    # light grey (agrees to rounding) to black (wrong); white is left for unchecked entries
    cmap = LinearSegmentedColormap.from_list("gradcheck_grey", ["0.88", "0.0"]).with_extremes(
        bad="white")
    image = ax.imshow(np.ma.masked_invalid(values), cmap=cmap, vmin=-16, vmax=0,
                      aspect="auto", interpolation="nearest")
    for (i, j), v in np.ndenumerate(verdict):
        if v in LETTERS:
            ax.text(j, i, LETTERS[v], ha="center", va="center", fontsize=9, fontweight="bold",
                    color="white" if values[i, j] > -8 else "black")
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_title(f"{name}: relative error per entry (white: not checked)")
    ax.set_xlabel("column (trailing axes flattened)")
    ax.set_ylabel("row")
    return image


def draw_step_sweep(ax, sweeps, names):
    markers = ["o", "s", "^", "D"]
    for k, (sweep, name) in enumerate(zip(sweeps, names)):
        ref = sweep["reference"]
        err = np.abs(sweep["derivatives"] - ref)
        err = np.where(err > 0, err, np.nan)
        ax.loglog(sweep["steps"], err, marker=markers[k % 4], markersize=3, linewidth=1,
                  color=str(0.15 + 0.25 * k), label=name)
        ax.axvline(sweep["chosen_step"], color=str(0.15 + 0.25 * k), linestyle="--", linewidth=1)
    ax.set_title("central difference error against step (dashed: automatic step)")
    ax.set_xlabel("step h")
    ax.set_ylabel("|numeric(h) - best estimate|")
    ax.legend(fontsize=8)


def draw_remainder(ax, result):
    h, r = result.steps, result.remainders
    ok = r > 0
    ax.loglog(h[ok], r[ok], "o-", color="black", markersize=3, linewidth=1, label="remainder")
    if result.fitted.any():
        ax.loglog(h[result.fitted], r[result.fitted], "o", color="black", markersize=6,
                  fillstyle="none", label=f"fitted: order {result.order:.2f}")
    anchor_h, anchor_r = (h[ok][-1], r[ok][-1]) if ok.any() else (1.0, 1.0)
    for order, style in ((1, ":"), (2, "--")):
        ax.loglog(h, anchor_r * (h / anchor_h) ** order, style, color="0.5", linewidth=1,
                  label=f"slope {order}")
    ax.set_title("Taylor remainder |f(x+hv) - f(x) - h g.v|")
    ax.set_xlabel("step h along v")
    ax.set_ylabel("remainder")
    ax.legend(fontsize=8)


def plot_jacobian(report, path):
    """One error map of a Jacobian check: rows are outputs, columns inputs."""
    plt = _pyplot()
    m, n = report.extra["outputs"], report.extra["inputs"]
    values = np.full((m, n), np.nan)
    verdict = np.full((m, n), "", dtype=object)
    for r in report.rows:
        i, j = divmod(r.flat_index, n)
        rel = r.relative_error if np.isfinite(r.relative_error) else 1.0
        values[i, j] = np.log10(max(rel, 1e-16))
        verdict[i, j] = r.verdict
    fig, ax = plt.subplots(figsize=(max(5, 0.4 * n + 3), max(4, 0.35 * m + 2)))
    image = draw_error_map(ax, "Jacobian", values, verdict)
    ax.set_xlabel("input coordinate (flat index)")
    ax.set_ylabel("output (flat index)")
    fig.colorbar(image, ax=ax, label="log10 relative error")
    fig.suptitle(report.to_text().splitlines()[0], fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return fig


def plot_report(report, path, *, sweep=True, remainder=True):
    """Write the report's figure to `path`; returns the matplotlib Figure."""
    if "outputs" in report.extra:
        return plot_jacobian(report, path)
    plt = _pyplot()
    params = [p for p in report.parameters if p["checked"] >= 2][:4]
    extra = report.source is not None and (sweep or remainder)
    ncols = max(len(params), 2 if extra else 1)
    nrows = (1 if params else 0) + (1 if extra else 0)
    if nrows == 0:
        nrows, params = 1, report.parameters[:1]
    fig, axes = plt.subplots(nrows, ncols, figsize=(5 * ncols, 4 * nrows), squeeze=False)
    row = 0
    if params:
        shapes = {leaf.name: leaf.shape for leaf in report.source.setup.layout.leaves} \
            if report.source is not None else {}
        for k, p in enumerate(params):
            rows = [r for r in report.rows if r.parameter == p["name"]]
            shape = shapes.get(p["name"]) or _shape_from_rows(rows)
            values, verdict = _grid(rows, shape)
            image = draw_error_map(axes[0, k], p["name"], values, verdict)
            fig.colorbar(image, ax=axes[0, k], label="log10 relative error")
        for k in range(len(params), ncols):
            axes[0, k].axis("off")
        row = 1
    if extra:
        worst = [r for r in sorted(report.rows, key=lambda r: -_finite(r.relative_error))][
            :SWEEP_COORDINATES]
        if sweep and worst:
            sweeps = []
            for r in worst:
                s = report.source.step_sweep(r.flat_index)
                s["reference"] = r.numeric
                sweeps.append(s)
            draw_step_sweep(axes[row, 0], sweeps, [r.name for r in worst])
        else:
            axes[row, 0].axis("off")
        if remainder:
            draw_remainder(axes[row, 1], report.source.remainder())
        else:
            axes[row, 1].axis("off")
        for k in range(2, ncols):
            axes[row, k].axis("off")
    fig.suptitle(report.to_text().splitlines()[0], fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return fig


def plot_remainder(result, path):
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5, 4))
    draw_remainder(ax, result)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return fig


def _finite(x):
    return x if np.isfinite(x) else 1e300


def _shape_from_rows(rows):
    if not rows or not rows[0].index:
        return ()
    return tuple(max(r.index[d] for r in rows) + 1 for d in range(len(rows[0].index)))
