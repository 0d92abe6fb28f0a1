"""`scaledrill adopt`: a checkpoint made by a plain PyTorch job becomes a run directory
that `run resume=`, `replay` and `report` accept (the work is in scaledrill.replay.adopt)."""

from pathlib import Path

from scaledrill.replay.adopt import adopt


def adopt_verb(cfg, run_dir: Path):
    record = adopt(cfg, run_dir)
    print(f"adopted {record['adopted_from']} at step {record['step']}: {record['checkpoint']}")
    print(f"optimizer state: {record['optimizer_state']}")
    if record["cluster_log"]:
        print(f"cluster log: {record['cluster_log_rows']} rows before step {record['step']} in {run_dir / 'run.sqlite'}")
    print(f"continue: scaledrill run resume={record['checkpoint']} (plus the same overrides)")
    print(f"try fixes: scaledrill replay replay.from={run_dir} replay.cluster_log=... '+replay.variants.NAME=[...]'")
    return None
