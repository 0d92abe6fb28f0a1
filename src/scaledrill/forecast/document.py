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
    "units": "1 GB = 1e9 bytes; latency in microseconds; the reduction arithmetic is not charged",
}


def forecast_json(
    cluster: Cluster,
    rows: list[dict],
    flops_per_sample: float,
    grad_bytes: float,
    compression_ratio: float | None,
    sources: dict[str, str] | None = None,
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
    }


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60), ("s", 1), ("ms", 1e-3), ("µs", 1e-6)):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds * 1e9:.3g} ns"


def render_forecast(doc: dict) -> Table:
    """A rich table of `forecast_json`'s document, the caution as its caption."""
    c = doc["assumptions"]["cluster"]
    title = (
        f"{c['nodes']} nodes × {c['devices_per_node']} devices, {c['peak_tflops']:g} TFLOP/s ({c.get('precision', 'fp32')}) at "
        f"{c['utilization']:.0%}, {c['algorithm']} all-reduce, overlap {c['overlap']:.0%}"
    )
    table = Table(title=title, caption=doc["caution"])
    for name in ("batch", "devices", "steps", "compute", "comm (exposed)", "step", "to target", "device-h", "cost", ""):
        table.add_column(name, justify="left" if name == "" else "right")
    for r in doc["rungs"]:
        flags = ", ".join(flag for flag in ("cheapest", "fastest") if r[flag])
        table.add_row(
            str(r["global_batch"]),
            str(r["devices"]),
            "-" if r["steps_to_target"] is None else f"{r['steps_to_target']:g}",
            _duration(r["compute_s"]),
            f"{_duration(r['comm_s'])} ({_duration(r['exposed_comm_s'])})",
            _duration(r["step_s"]),
            _duration(r["time_to_target_s"]),
            "-" if r["device_hours"] is None else f"{r['device_hours']:.3g}",
            "-" if r["cost"] is None else f"{r['cost']:,.2f}",
            flags,
        )
    return table
