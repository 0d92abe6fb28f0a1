"""`scaledrill replay`: continue a run from a checkpoint under several overrides, side by side.

The steps are in scaledrill.replay.variants; this verb validates `replay.*`, runs the
variants, shows them beside the original (and a cluster log) and writes replay.json.
"""

from pathlib import Path

from omegaconf import OmegaConf

from scaledrill.config import rules
from scaledrill.errors import CheckpointError, ConfigError, is_whole
from scaledrill.io import write_json
from scaledrill.replay.cluster_log import departure_step, read_cluster_log
from scaledrill.replay.variants import check_layout, compose_variants, find_source, start_checkpoint, variant_overrides
from scaledrill.telemetry.store import read_scalars
from scaledrill.train import checkpoint
from scaledrill.train.run import run_verb


def replay_verb(cfg, run_dir: Path):
    from scaledrill.replay.show import plot_replay, print_table

    node = cfg.replay
    rules.check_replay(node)
    ckpt, source = find_source(node["from"])
    where = source / "config.yaml"
    if not where.is_file():
        raise CheckpointError(f"replay.from: {ckpt} belongs to {source}, which has no config.yaml to replay")
    saved = OmegaConf.to_container(OmegaConf.load(where), resolve=True)
    state = checkpoint.load(ckpt)
    from_step = int(state["step"])
    steps = node.steps or saved["train"]["steps"]
    if not is_whole(steps) or steps <= from_step:
        raise ConfigError("replay.steps", f"must be a whole number past the checkpoint's step {from_step}", steps)
    rtol = node.departure_rtol
    log = read_cluster_log(node.cluster_log) if node.cluster_log else None

    variants = variant_overrides(node.variants)
    configs = compose_variants(saved, str(where), ckpt, steps, variants)
    for name, vcfg in configs.items():
        check_layout(name, vcfg, state)
    run_dir.mkdir(parents=True, exist_ok=True)
    rows = []
    for name, vcfg in configs.items():
        vdir = run_dir / f"variant-{name}"
        start = start_checkpoint(vcfg, configs["original"], state, vdir)
        if start is not None:
            vcfg.resume = str(start)
        summary = run_verb(vcfg, vdir)
        curves = read_scalars(vdir / "run.sqlite")
        rows.append({"name": name, "overrides": variants.get(name, []),
                     "run_dir": vdir.name, "summary": summary, "curves": curves})

    before = _before(source, from_step)
    departure = None
    if log is not None:
        steps_o, loss_o = rows[0]["curves"]["loss"]
        departure = departure_step(log, [*before[0], *steps_o], [*before[1], *loss_o], float(rtol))
    print_table(rows, log is not None, departure)
    plot_replay(run_dir / "replay.png", rows, before, from_step, log, departure)
    payload = {
        "checkpoint": str(ckpt),
        "from_step": from_step,
        "variants": [
            {"name": r["name"], "overrides": r["overrides"], "run_dir": r["run_dir"],
             "final_loss": r["summary"]["final_loss"], "diverged": r["summary"]["diverged"]}
            for r in rows
        ],
        "cluster_log": str(node.cluster_log) if log is not None else None,
        "departure_step": departure,
    }
    write_json(run_dir / "replay.json", payload)
    print(f"replay of {ckpt} (step {from_step}) written to {run_dir}")
    return None


def _before(source: Path, from_step: int):
    """The original run's loss curve up to the checkpoint, from its run store (empty without one)."""
    store = source / "run.sqlite"
    if not store.is_file():
        return [], []
    steps, loss = read_scalars(store).get("loss", ([], []))
    keep = [i for i, s in enumerate(steps) if s < from_step]
    return [int(steps[i]) for i in keep], [float(loss[i]) for i in keep]
