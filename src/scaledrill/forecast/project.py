"""Step time, time to target, device-hours and cost of a run on a described cluster.

Why: the rehearsal measures how many steps a batch size needs; the cluster
decides how long each step takes. Their product is the bill. The model is kept
simple on purpose so every term can be read off the forecast:

    compute_s  = ⌈B / devices⌉ · F / (peak · utilization)
                 F: training FLOPs per sample. The busiest device sets the pace;
                 when devices divide B this is B·F / (devices · peak · utilization).
    devices    = a rung uses at most one device per sample: min(devices, B),
                 rounded down to whole nodes once it fills one (devices_for).
                 So small batches run on fewer devices: cheaper, slower.
    comm_s     = all-reduce of grad_bytes / compression_ratio bytes over all
                 devices (collectives.py); two_level uses both links, flat
                 algorithms the slowest link they cross.
    hidden_s   = min(overlap · comm_s, backward_s),  backward_s = ⅔ · compute_s
                 Gradients become ready during the backward, so at most the
                 `overlap` share of the all-reduce can run behind it, and never for
                 longer than the backward lasts. ⅔ is the backward's share of
                 training FLOPs when backward = 2 × forward (flops.py).
    step_s     = compute_s + comm_s − hidden_s
    time_to_target_s = steps_to_target · step_s
    device_hours     = devices · time_to_target_s / 3600;  cost = device_hours · price

The baseline (the batch and devices the recipe is moved from, `job.baseline`) is
projected the same way on its own devices, with the cluster's device type and
links; every other row then states speed_up = baseline time / its time and
cost_ratio = its cost / baseline cost.
"""

import math
from dataclasses import asdict, dataclass, replace

from scaledrill.forecast.cluster import Cluster
from scaledrill.errors import ConfigError
from scaledrill.forecast.collectives import allreduce_seconds

BACKWARD_SHARE = 2 / 3


@dataclass(frozen=True)
class StepForecast:
    compute_s: float
    comm_s: float  # the whole all-reduce
    hidden_s: float  # the part that runs behind the backward
    step_s: float
    wire_bytes: float  # bytes one all-reduce carries after compression

    @property
    def exposed_comm_s(self) -> float:
        return self.comm_s - self.hidden_s


def comm_seconds(cluster: Cluster, wire_bytes: float) -> float:
    """One all-reduce of `wire_bytes` over every device of the cluster."""
    if cluster.algorithm == "two_level":
        return allreduce_seconds(
            wire_bytes, cluster.devices, algorithm="two_level",
            ranks_per_node=cluster.devices_per_node, intra=cluster.intra, inter=cluster.inter,
        )  # fmt: skip
    alpha, beta = cluster.flat_link
    return allreduce_seconds(wire_bytes, cluster.devices, alpha, beta, algorithm=cluster.algorithm)


def devices_for(cluster: Cluster, global_batch: int) -> Cluster:
    """The part of the cluster a batch of B samples can keep busy (module doc)."""
    used = min(cluster.devices, global_batch)
    per_node = min(cluster.devices_per_node, used)
    used -= used % per_node
    return replace(cluster, devices=used, devices_per_node=per_node)


def project_step(
    cluster: Cluster, global_batch: int, flops_per_sample: float, grad_bytes: float, compression_ratio: float | None = None
) -> StepForecast:
    """One optimizer step at global batch B on `cluster` as given (rules in the
    module doc); project_rungs first shrinks the cluster with devices_for."""
    if global_batch < 1:
        raise ValueError(f"global_batch must be >= 1, got {global_batch!r}")
    ratio = 1.0 if compression_ratio is None else float(compression_ratio)
    if ratio <= 0 or flops_per_sample <= 0 or grad_bytes < 0:
        raise ValueError("flops_per_sample and compression_ratio must be > 0, grad_bytes >= 0")
    per_device = math.ceil(global_batch / cluster.devices)
    compute = per_device * flops_per_sample / (cluster.peak_tflops * 1e12 * cluster.utilization)
    wire = grad_bytes / ratio
    comm = comm_seconds(cluster, wire)
    hidden = min(cluster.overlap * comm, BACKWARD_SHARE * compute)
    return StepForecast(compute_s=compute, comm_s=comm, hidden_s=hidden, step_s=compute + comm - hidden, wire_bytes=wire)


def _row(used: Cluster, batch: int, steps, flops_per_sample, grad_bytes, compression_ratio) -> dict:
    step = project_step(used, batch, flops_per_sample, grad_bytes, compression_ratio)
    row = {"global_batch": batch, "devices": used.devices, "steps_to_target": steps}
    row |= asdict(step) | {"exposed_comm_s": step.exposed_comm_s}
    if steps is None:
        return row | {"time_to_target_s": None, "device_hours": None, "cost": None}
    seconds = float(steps) * step.step_s
    hours = used.devices * seconds / 3600
    return row | {"time_to_target_s": seconds, "device_hours": hours, "cost": hours * used.price_per_device_hour}


def project_baseline(
    cluster: Cluster, batch: int, devices: int, steps, flops_per_sample: float, grad_bytes: float,
    compression_ratio: float | None = None,
) -> dict:  # fmt: skip
    """The baseline row: `batch` on `devices` devices of the cluster's kind, in whole nodes once it fills one."""
    per_node = min(cluster.devices_per_node, devices)
    if devices % per_node:
        raise ConfigError(
            "job.baseline.devices", f"must fit whole nodes: at most forecast.devices_per_node={cluster.devices_per_node} "
            "or a multiple of it", devices,
        )  # fmt: skip
    used = devices_for(replace(cluster, devices=devices, devices_per_node=per_node), batch)
    row = _row(used, batch, steps, flops_per_sample, grad_bytes, compression_ratio)
    return row | {"baseline": True, "cheapest": False, "fastest": False}


def compare_to_baseline(rows: list[dict], baseline: dict) -> None:
    """Add speed_up (baseline time / row time) and cost_ratio (row cost / baseline cost) to each row."""
    base_time, base_cost = baseline["time_to_target_s"], baseline["cost"]
    for row in rows:
        time, cost = row["time_to_target_s"], row["cost"]
        row["speed_up"] = base_time / time if base_time is not None and time else None
        row["cost_ratio"] = cost / base_cost if cost is not None and base_cost else None


def project_rungs(
    cluster: Cluster,
    rungs: list[dict],
    flops_per_sample: float,
    grad_bytes: float,
    compression_ratio: float | None = None,
) -> list[dict]:
    """One row per rung ({"global_batch", "steps_to_target"}), flagged `cheapest` and `fastest`.

    A rung whose `steps_to_target` is None (it never reached the target) keeps its
    step time but gets no time, hours or cost, and is never flagged.
    """
    rows = []
    for rung in rungs:
        batch, steps = int(rung["global_batch"]), rung.get("steps_to_target")
        row = _row(devices_for(cluster, batch), batch, steps, flops_per_sample, grad_bytes, compression_ratio)
        rows.append(row | {"cheapest": False, "fastest": False})
    reached = [row for row in rows if row["time_to_target_s"] is not None]
    if reached:
        min(reached, key=lambda r: r["cost"])["cheapest"] = True
        min(reached, key=lambda r: r["time_to_target_s"])["fastest"] = True
    return rows
