"""The one entry point of every process of a multi-process job: `python -m scaledrill.dist.rank DIR JOB`.

DIR holds the config.yaml the launcher wrote; JOB names the function that does
this rank's work, as `module:function` taking `(cfg, DIR, collective)` (a training
run: `scaledrill.train.run:train_as_rank`; the check's processes path:
`scaledrill.check.processes:follow_as_rank`). The job is looked up by name so that
this low layer never imports the layers above it.

The rank joins the process group, runs the job and exits 0. A failure is written
to DIR/.rankR.error so the launcher can say which rank failed and why, and the
exit status is the error's own (2 bad input, 3 data, 4 checkpoint, …).
"""

import importlib
import os
import sys
import traceback
from pathlib import Path

import torch
from omegaconf import OmegaConf

from scaledrill.dist import open_collective
from scaledrill.dist.launch import error_file
from scaledrill.errors import ScaledrillError

TRAIN_JOB = "scaledrill.train.run:train_as_rank"


def rank_from_env() -> int:
    for key in ("RANK", "PMI_RANK", "OMPI_COMM_WORLD_RANK"):
        if key in os.environ:
            return int(os.environ[key])
    return 0


def resolve_job(name: str):
    module, function = name.split(":")
    return getattr(importlib.import_module(module), function)


def main(argv: list[str]) -> int:
    run_dir, job = Path(argv[0]), argv[1] if len(argv) > 1 else TRAIN_JOB
    cfg = OmegaConf.load(run_dir / "config.yaml")
    torch.set_num_threads(int(os.environ.get("SCALEDRILL_THREADS", "1")))
    rank = rank_from_env()
    try:
        resolve_job(job)(cfg, run_dir, open_collective(cfg.layout.backend, cfg.train.timeout_s))
        return 0
    except ScaledrillError as err:
        error_file(run_dir, rank).write_text(str(err))
        return err.exit_code
    except Exception as err:  # report, not hide: the launcher prints it with the rank
        error_file(run_dir, rank).write_text(f"{type(err).__name__}: {err}")
        if cfg.get("debug"):
            traceback.print_exc()
        return 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
