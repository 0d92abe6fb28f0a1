"""Entry point of one process of a multi-process run: `python -m scaledrill.worker RUN_DIR`.

Reads RUN_DIR/config.yaml (written by the launcher), joins the process group and
trains. Rank 0 writes the outputs. A failure is written to RUN_DIR/.rankR.error
so the launcher can say which rank failed and why.
"""

import os
import sys
import traceback
from pathlib import Path

import torch
from omegaconf import OmegaConf

from .backends import open_collective
from .backends.launch import error_file
from .errors import ScaledrillError


def rank_from_env() -> int:
    for key in ("RANK", "PMI_RANK", "OMPI_COMM_WORLD_RANK"):
        if key in os.environ:
            return int(os.environ[key])
    return 0


def main(argv: list[str]) -> int:
    run_dir = Path(argv[0])
    cfg = OmegaConf.load(run_dir / "config.yaml")
    torch.set_num_threads(int(os.environ.get("SCALEDRILL_THREADS", "1")))
    rank = rank_from_env()
    try:
        from .runs import run_as_rank

        run_as_rank(cfg, run_dir, open_collective(cfg.layout.backend, cfg.train.timeout_s))
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
