"""The forecast as a JSON document (`forecast.json`) and as a printed table.

Why: a projection is only useful next to the assumptions it rests on, so both
forms carry the cluster, the inputs and where they came from, the rules of the
model, and the caution that it is an estimate.
"""

from rich.table import Table

from scaledrill.forecast.cluster import Cluster
from scaledrill.forecast.project import BACKWARD_SHARE

CAUTION = (
    "Estimates from a simple model (alpha-beta all-reduce, a fixed share of peak FLOP/s, "
    "a simple overlap rule), not promises. Real runs add input pipelines, stragglers, "
    "kernel and memory effects the model leaves out. A trial on the target hardware decides."
)

RULES = {
    "compute": "ceil(B / devices) * flops_per_sample / (peak_tflops * 1e12 * utilization)",
    "devices": "a rung uses min(devices, B) devices, rounded down to whole nodes once it fills one",
    "comm": "one all-reduce of grad_bytes / compression_ratio bytes over the rung's devices; "
    "flat algorithms run at the slowest link they cross",
    "overlap": f"hidden = min(overlap * comm, {BACKWARD_SHARE:.3g} * compute); step = compute + comm - hidden",
    "units": "1 GB = 1e9 bytes; latency in microseconds; the reduction arithmetic is not charged; "
    "flops_per_sample counts one forward plus one backward (matmuls and convolutions, 2 FLOPs per multiply-add)",
    "baseline": "job.baseline's batch on its own devices of the same kind; speed_up = baseline time / row time, "
    "cost_ratio = row cost / baseline cost",
}


def forecast_json(
    cluster: Cluster,
    rows: list[dict],
    flops_per_sample: float,
    grad_bytes: float,
    compression_ratio: float | None,
    sources: dict[str, str] | None = None,
    baseline: dict | None = None,
    model: dict | None = None,
) -> dict:
    """The whole forecast. `sources` says where each input came from, e.g.
    {"flops_per_sample": "measured", "steps_to_target": "ladder.json"}."""
    ratio = 1.0 if compression_ratio is None else float(compression_ratio)
    return {
        "caution": CAUTION,
        "assumptions": {
            "cluster": cluster.describe(),
            "flops_per_sample": float(flops_per_sample),
            "grad_bytes": float(grad_bytes),
            "compression_ratio": ratio,
            "wire_bytes": float(grad_bytes) / ratio,
            "sources": dict(sources or {}),
            "rules": dict(RULES),
        },
        "rungs": [dict(row) for row in rows],
        "baseline": None if baseline is None else dict(baseline),
        "model": None if model is None else dict(model),
    }


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60), ("s", 1), ("ms", 1e-3), ("µs", 1e-6)):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds * 1e9:.3g} ns"


def _si(value: float, unit: str) -> str:
    for prefix, size in (("P", 1e15), ("T", 1e12), ("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if value >= size:
            return f"{value / size:.3g} {prefix}{unit}"
    return f"{value:.3g} {unit}"


COLUMNS = (
    "batch (samples)", "devices", "steps", "compute per step (fwd+bwd)", "all-reduce per step (exposed)",
    "step time", "time to target", "device-h", "cost (price units)", "speed-up vs base", "cost vs base", "",
)  # fmt: skip


def _cells(r: dict) -> list[str]:
    flags = ", ".join(flag for flag in ("baseline", "cheapest", "fastest") if r.get(flag))
    ratio = lambda key, fmt: "-" if r.get(key) is None else fmt.format(r[key])  # noqa: E731
    return [
        str(r["global_batch"]),
        str(r["devices"]),
        "-" if r["steps_to_target"] is None else f"{r['steps_to_target']:g}",
        _duration(r["compute_s"]),
        f"{_duration(r['comm_s'])} ({_duration(r['exposed_comm_s'])})",
        _duration(r["step_s"]),
        _duration(r["time_to_target_s"]),
        "-" if r["device_hours"] is None else f"{r['device_hours']:.3g}",
        "-" if r["cost"] is None else f"{r['cost']:,.2f}",
        ratio("speed_up", "{:.3g}×"),
        ratio("cost_ratio", "{:.3g}×"),
        flags,
    ]


def render_forecast(doc: dict) -> Table:
    """A rich table of `forecast_json`'s document, the caution as its caption; the baseline row first."""
    a = doc["assumptions"]
    c = a["cluster"]
    title = (
        f"{c['nodes']} nodes × {c['devices_per_node']} devices, {c['peak_tflops']:g} TFLOP/s ({c.get('precision', 'fp32')}) at "
        f"{c['utilization']:.0%}, {c['algorithm']} all-reduce, overlap {c['overlap']:.0%}\n"
        f"training FLOPs per sample (forward+backward): {_si(a['flops_per_sample'], 'FLOP')}; "
        f"gradient {_si(a['grad_bytes'], 'B')} ({a['sources'].get('flops_per_sample', 'given')})"
    )
    table = Table(title=title, caption=doc["caution"])
    baseline = doc.get("baseline")
    columns = COLUMNS if baseline else COLUMNS[:-3] + COLUMNS[-1:]
    for name in columns:
        table.add_column(name, justify="left" if name == "" else "right")
    for r in ([baseline] if baseline else []) + doc["rungs"]:
        cells = _cells(r)
        table.add_row(*(cells if baseline else cells[:-3] + cells[-1:]))
    return table
