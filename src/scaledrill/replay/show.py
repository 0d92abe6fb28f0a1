"""Show a replay: a table of the variants and a plot of their loss curves.

Why two views: the table answers "which variant survived, and how well" in one
glance; the plot shows where each one left the original, and where the
rehearsal left the cluster log (the departure step).
"""

import math

from rich.console import Console
from rich.table import Table


def _num(value) -> str:
    return "-" if value is None else f"{value:.5g}"


def _min(values) -> float | None:
    finite = [float(v) for v in values if math.isfinite(v)]
    return min(finite) if finite else None


def _headline(reason: str | None) -> str:
    """Each detector's finding without its numbers (those stay in replay.json and the incident)."""
    return "; ".join(part.split(":")[0] for part in reason.split("; ")) if reason else "-"


def print_table(rows: list[dict], with_log: bool, departure: int | None) -> None:
    table = Table(title="replay")
    for column in ("variant", "overrides", "final loss", "min loss", "diverged", "steps", "stop reason", "lr at end"):
        table.add_column(column)
    if with_log:
        table.add_column("vs cluster log")
    for row in rows:
        s, curves = row["summary"], row["curves"]
        loss = curves.get("loss", ([], []))[1]
        lr = curves.get("lr", ([], []))[1]
        cells = [
            row["name"], " ".join(row["overrides"]) or "-", _num(s["final_loss"]), _num(_min(loss)),
            "yes" if s["diverged"] else "no", str(s["steps"]), _headline(s["stop_reason"]),
            _num(float(lr[-1]) if len(lr) else None),
        ]
        if with_log:
            cells.append(("departs at step " + str(departure) if departure is not None else "follows") if row["name"] == "original" else "")
        table.add_row(*cells)
    Console(width=160).print(table)


def plot_replay(path, rows: list[dict], before, from_step: int, log, departure: int | None) -> None:
    """Loss against step: the run up to the checkpoint, each variant after it, the cluster log."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    fig, ax = plt.subplots(figsize=(8, 4.5))
    if before[0]:
        ax.plot(before[0], _clean(before[1]), color="0.5", marker=".", label="run before the checkpoint")
    for row in rows:
        steps, loss = row["curves"].get("loss", (np.array([]), np.array([])))
        line, = ax.plot(steps, _clean(loss), label=row["name"], linewidth=2 if row["name"] == "original" else 1.2)
        if row["summary"]["diverged"] and len(steps):
            ax.plot([steps[-1]], [_last_finite(loss)], "x", color=line.get_color(), markersize=9)
    if log is not None:
        ax.plot(log.steps, _clean(log.loss), "k--", linewidth=1, label="cluster log")
    ax.axvline(from_step, color="0.3", linestyle=":", label=f"checkpoint (step {from_step})")
    if departure is not None:
        ax.axvline(departure, color="red", linestyle="-.", label=f"departs from the log (step {departure})")
    ax.set_yscale("log")
    ax.set_xlabel("step")
    ax.set_ylabel("training loss")
    ax.set_title("replay: x marks a variant the detectors stopped")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _clean(values):
    """Non-finite or non-positive losses cannot sit on a log axis; leave gaps instead."""
    import numpy as np

    v = np.asarray(values, dtype=np.float64)
    return np.where(np.isfinite(v) & (v > 0), v, np.nan)


def _last_finite(values) -> float:
    good = [float(v) for v in values if math.isfinite(v) and v > 0]
    return good[-1] if good else 1.0
