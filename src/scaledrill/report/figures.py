"""Figures of the report, each returned as a PNG `data:` URI.

Why data URIs: the report is one file that opens anywhere, offline, and can be
mailed or archived without a folder of images beside it. Figures are drawn on a
bare `matplotlib.figure.Figure` with the Agg canvas, never through pyplot, so no
global state or display backend is touched and figures are freed when dropped.

The palette is the project's own: ink and paper neutrals, with teal for the main
series and amber, brick, plum, moss and sky for the others.
"""

import base64
import io
import math

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap, LogNorm, Normalize
from matplotlib.figure import Figure
from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator, NullFormatter, NullLocator

from scaledrill.report.numbers import number

INK, PAPER, GRID = "#23303b", "#fbf8f2", "#e4ddd0"
SERIES = ("#1f7a78", "#d08c2a", "#b5473a", "#6d4c8f", "#6b8e3e", "#4a7fb5", "#8a6d52")
TEAL, AMBER, BRICK, PLUM, MOSS, SKY, UMBER = SERIES
HEAT = LinearSegmentedColormap.from_list("drill", ["#f6f1e7", "#9cc9b9", "#1f7a78", "#23303b"])


def _figure(width: float = 6.4, height: float = 3.2, panels: int = 1):
    fig = Figure(figsize=(width, height), dpi=100, facecolor=PAPER, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, panels, squeeze=False)[0]
    for ax in axes:
        ax.set_facecolor("white")
        ax.grid(True, color=GRID, linewidth=0.7)
        ax.tick_params(colors=INK, labelsize=8)
        for spine in ax.spines.values():
            spine.set_color(GRID)
    return fig, axes


def to_uri(fig: Figure) -> str:
    """Encode a finished figure as a base64 PNG data URI."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", facecolor=fig.get_facecolor())
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _title(ax, title: str, xlabel: str, ylabel: str) -> None:
    ax.set_title(title, color=INK, fontsize=10, loc="left")
    ax.set_xlabel(xlabel, color=INK, fontsize=9)
    ax.set_ylabel(ylabel, color=INK, fontsize=9)


def flat(values) -> bool:
    """True when a series carries no shape: at most one finite value, or all of them equal."""
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    return finite.size <= 1 or bool(np.ptp(finite) <= 1e-9 * max(np.abs(finite).max(), 1e-300))


def measurements(x, y) -> tuple[np.ndarray, np.ndarray]:
    """The points where a held value changes: a quantity estimated now and then and
    logged every step (the noise scale) is a few measurements, not a curve."""
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    keep = np.isfinite(y)
    x, y = x[keep], y[keep]
    if y.size == 0:
        return x, y
    new = np.concatenate(([True], y[1:] != y[:-1]))
    return x[new], y[new]


def _nice_log_ticks(low: float, high: float) -> list[float]:
    """Ticks at 1, 2, 5 × 10^k inside [low, high]; when fewer than three fall there (a span
    under a factor of about five), round evenly spaced values, as on a linear axis."""
    ticks = [m * 10.0**k for k in range(math.floor(math.log10(low)) - 1, math.ceil(math.log10(high)) + 1)
             for m in (1, 2, 5) if low <= m * 10.0**k <= high]  # fmt: skip
    if len(ticks) > 7:
        ticks = [t for t in ticks if f"{t:e}".startswith("1")] or ticks
    if len(ticks) >= 3:
        return ticks
    return [float(t) for t in MaxNLocator(nbins=4).tick_values(low, high) if low <= t <= high and t > 0]


def readable_log(ax, which: str = "both") -> None:
    """Plain-number labels on log axes, none on minor ticks, so no labels overlap
    (matplotlib's default labels minor ticks as 3×10¹ when a span is short)."""
    for name in ("x", "y") if which == "both" else (which,):
        axis = ax.xaxis if name == "x" else ax.yaxis
        if axis.get_scale() != "log":
            continue
        low, high = sorted(ax.get_xlim() if name == "x" else ax.get_ylim())
        axis.set_major_locator(FixedLocator(_nice_log_ticks(low, high)))
        axis.set_major_formatter(FuncFormatter(lambda v, _pos: number(v, 2)))
        axis.set_minor_locator(NullLocator())
        axis.set_minor_formatter(NullFormatter())


def _positive(values) -> bool:
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    return finite.size > 0 and bool(np.all(finite > 0))


DASHES = ("-", "--", "-.", ":")
MARKERS = ("o", "s", "^", "D", "v", "P", "X")


def lines(title: str, series, xlabel: str = "step", ylabel: str = "", logy: bool = False, marks=(),
          distinct: bool = False, ylim=None) -> str:
    """Line plot of `series` = [(label, x, y)] with vertical `marks` = [(x, label)].

    A log y axis is used only if asked for and every value is positive, so a
    diverged (NaN) or zero curve still draws instead of failing. `distinct` gives
    each series its own dash and marker, drawn thinner the later it comes, so
    curves that coincide (a variant that changes nothing yet) all stay visible.
    """
    fig, (ax,) = _figure()
    for i, (label, x, y) in enumerate(series):
        colour = SERIES[i % len(SERIES)]
        if distinct:  # curves that may lie on top of each other: dashes and markers tell them apart
            ax.plot(x, y, linestyle=DASHES[i % len(DASHES)], marker=MARKERS[i % len(MARKERS)], color=colour,
                    label=label, linewidth=max(2.4 - 0.5 * i, 0.9), markersize=max(6 - i, 3), markevery=max(len(x) // 12, 1),
                    fillstyle="none")
        elif len(x) <= 12:  # a few measured points: draw the points, the joining line only as a faint guide
            ax.plot(x, y, "-", color=colour, linewidth=0.8, alpha=0.35)
            ax.plot(x, y, "o", color=colour, label=label, markersize=5)
        else:
            ax.plot(x, y, "-", color=colour, label=label, linewidth=1.4)
    for j, (x, label) in enumerate(marks):
        ax.axvline(x, color=INK, linestyle=("--", ":")[j % 2], linewidth=1.1, label=label)
    if ylim is not None:  # a diverged series would flatten the others: it runs off the top instead
        ax.set_ylim(*ylim)
    if logy and all(_positive(y) for _, _, y in series):
        ax.set_yscale("log")
        readable_log(ax, "y")
    else:
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: number(v, 3)))
    _title(ax, title, xlabel, ylabel)
    if len(series) + len(marks) > 1:
        ax.legend(fontsize=8, frameon=False)
    return to_uri(fig)


def heatmap(title: str, steps, layers: list[str], matrix, label: str) -> str:
    """Layers (rows) × steps (columns) of one per-layer statistic.

    Ratios span orders of magnitude, so colour is on a log scale whenever every
    finite value is positive and they span more than a factor of ten.
    """
    grid = np.asarray(matrix, dtype=float).T
    finite = grid[np.isfinite(grid)]
    wide = finite.size and finite.min() > 0 and finite.max() > 10 * finite.min()
    low, high = (finite.min(), finite.max()) if finite.size else (0.0, 1.0)
    norm = LogNorm(low, high) if wide else Normalize(low, high)
    fig, (ax,) = _figure(height=max(2.4, 0.9 + 0.22 * len(layers)))
    ax.grid(False)
    steps = np.asarray(steps, dtype=float)
    half = (steps[-1] - steps[0]) / (2 * (len(steps) - 1)) if len(steps) > 1 else 0.5  # layers are logged every N steps
    image = ax.imshow(grid, aspect="auto", cmap=HEAT, norm=norm, interpolation="nearest",
                      extent=(steps[0] - half, steps[-1] + half, len(layers) - 0.5, -0.5))  # fmt: skip
    every = max(1, math.ceil(len(layers) / 24))
    ax.set_yticks(range(0, len(layers), every), [n[-28:] for n in layers[::every]], fontsize=7)
    bar = fig.colorbar(image, ax=ax, label=label, shrink=0.9)
    if wide:
        readable_log(bar.ax, "y")
    _title(ax, title, "step (optimizer updates)", "")
    return to_uri(fig)


def scaling(batches, steps, missed, fit, perfect_from) -> str:
    """Steps-to-target against global batch on log-log axes.

    `perfect_from` = (B0, S0) anchors the perfect-scaling line S = S0·B0/B; `fit`
    (s_min, e_min) draws S = S_min + E_min/B, i.e. S_min(1 + B_noise/B); rungs
    that `missed` the target are ticked along the top edge.
    """
    fig, (ax,) = _figure()
    ax.plot(batches, steps, "o", color=TEAL, markersize=6, label="measured", zorder=3)
    everything = [*batches, *missed]
    span = np.geomspace(min(everything) / 1.5, max(everything) * 1.5, 100)
    if perfect_from:
        b0, s0 = perfect_from
        ax.plot(span, s0 * b0 / span, "--", color=INK, linewidth=1, label="perfect scaling (S ∝ 1/B)")
    if fit:
        s_min, e_min, b_crit = fit
        ax.plot(span, s_min + e_min / span, "-", color=AMBER, linewidth=1.6, label="fit S_min(1 + B_noise/B)")
        if math.isfinite(b_crit) and b_crit > 0:
            ax.axvline(b_crit, color=PLUM, linestyle=":", label=f"B_crit ≈ {b_crit:.3g}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    readable_log(ax)
    for b in missed:
        ax.axvline(b, color=BRICK, linewidth=0.8, alpha=0.5)
        ax.annotate("missed", (b, 1), xycoords=("data", "axes fraction"), color=BRICK, fontsize=7,
                    ha="center", va="bottom")  # fmt: skip
    _title(ax, "Steps to target vs global batch", "global batch B (samples per step)", "steps to target (steps)")
    ax.legend(fontsize=8, frameon=False)
    return to_uri(fig)


OUTCOME_COLOURS = {"reached": TEAL, "diverged": BRICK, "pruned": UMBER, "missed": SKY}


def lr_windows(rows) -> str:
    """Learning-rate trials and the working window per global batch.

    `rows` = [(batch, [(lr, outcome)], window (lo, hi) | None, best_lr | None)];
    the window is a bar, the best rate a diamond, each trial a dot by outcome.
    """
    fig, (ax,) = _figure()
    seen = set()
    for i, (batch, trials, window, best) in enumerate(rows):
        if window:
            ax.plot([i, i], window, color=TEAL, linewidth=9, alpha=0.25, solid_capstyle="butt")
        for lr, outcome in trials:
            first = outcome not in seen
            seen.add(outcome)
            ax.plot(i + 0.12, lr, "o", color=OUTCOME_COLOURS[outcome], markersize=4, label=outcome if first else None)
        if best:
            ax.plot(i, best, "D", color=INK, markersize=6, label=None if "best" in seen else "best lr")
            seen.add("best")
    ax.set_xticks(range(len(rows)), [str(r[0]) for r in rows])
    if all(lr > 0 for _, trials, _, _ in rows for lr, _ in trials):
        ax.set_yscale("log")
        readable_log(ax, "y")
    _title(ax, "Learning-rate window per rung", "global batch B (samples per step)", "learning rate (per step)")
    ax.legend(fontsize=8, frameon=False)
    return to_uri(fig)


def forecast_bars(labels: list[str], panels, cheapest: int | None, fastest: int | None) -> str:
    """One bar panel per quantity, `panels` = [(title, unit, values with None)].

    The cheapest rung's bar is moss and the fastest amber, each labelled, so the
    two choices stand out at a glance; a rung with no value shows "n/a".
    """
    fig, axes = _figure(width=9.6, height=3.2, panels=len(panels))
    for ax, (title, unit, values) in zip(axes, panels):
        heights = [0.0 if v is None else v for v in values]
        colours = [AMBER if i == fastest else MOSS if i == cheapest else SKY for i in range(len(values))]
        ax.bar(range(len(values)), heights, color=colours)
        top = max(heights) if any(heights) else 1.0
        for i, v in enumerate(values):
            tags = [t for t, j in (("cheapest", cheapest), ("fastest", fastest)) if j == i]
            text = "n/a" if v is None else "\n".join(tags)
            if text:
                ax.annotate(text, (i, heights[i]), xytext=(0, 2), textcoords="offset points",
                            ha="center", va="bottom", fontsize=7, color=INK)  # fmt: skip
        ax.set_ylim(0, top * 1.3)
        ax.set_xticks(range(len(labels)), labels, fontsize=7)
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: number(v, 3)))
        _title(ax, title, "global batch B (samples)", unit)
    return to_uri(fig)
