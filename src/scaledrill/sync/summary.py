"""The sync layer's contribution to summary.json: averages of its per-step stats."""


def sync_summary(name: str, stats: list[dict]) -> dict:
    """`sync`, `wire_bytes_per_worker_step`, `compression_ratio`, `mean_cosine_to_exact`."""
    stats = [s for s in stats if s]
    out = {"sync": name}
    if stats:
        for key, field in (("wire_bytes_per_worker", "wire_bytes_per_worker_step"), ("compression_ratio", "compression_ratio")):
            values = [s[key] for s in stats if key in s]
            out[field] = sum(values) / len(values) if values else None
        cos = [s["cosine_to_exact"] for s in stats if "cosine_to_exact" in s]
        out["mean_cosine_to_exact"] = sum(cos) / len(cos) if cos else None
    return out
