"""One process of the check's real-processes path: `python -m scaledrill.check.worker DIR`.

Reads DIR/config.yaml, joins the process group, runs `check.steps` steps through
the engine's Trainer and, on rank 0, saves the Trajectory to DIR/trajectory.pt.
Failures go to DIR/.rankR.error, as for a training run, so the launcher names the rank.
"""

import os
import sys
from pathlib import Path

import torch
from omegaconf import OmegaConf

from ..backends import open_collective
from ..backends.launch import error_file
from ..grads import flatten_params
from ..worker import rank_from_env
from .paths import follow
from .processes import RESULT


def run(work: Path) -> None:
    from ..engine import Trainer

    cfg = OmegaConf.load(work / "config.yaml")
    collective = open_collective(cfg.layout.backend, cfg.train.timeout_s)
    try:
        trainer = Trainer(cfg, collective)
        out = follow(trainer, int(cfg.check.steps))
        final = flatten_params(trainer.params).double()
        every = collective.all_gather(final)  # [P, n]: do all ranks hold the same parameters?
        out.worker_spread = float((every - final).abs().max())
        if collective.rank == 0:
            tmp = work / (RESULT + ".tmp")
            torch.save(out.to_dict(), tmp)
            os.replace(tmp, work / RESULT)
        collective.barrier()
    finally:
        collective.close()


def main(argv: list[str]) -> int:
    work = Path(argv[0])
    torch.set_num_threads(int(os.environ.get("SCALEDRILL_THREADS", "1")))
    try:
        run(work)
        return 0
    except Exception as err:  # the launcher prints it with the rank
        error_file(work, rank_from_env()).write_text(f"{type(err).__name__}: {err}")
        return getattr(err, "exit_code", 1)


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
