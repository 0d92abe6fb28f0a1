"""Shared helpers: compose configs and run the command line as a user would."""

import os
import subprocess
import sys
from pathlib import Path

from hydra import compose, initialize_config_dir
from hydra.errors import HydraException
from omegaconf import OmegaConf

import scaledrill.config.store  # noqa: F401  (the schemas, before any composition)
from scaledrill.config.keys import composition_error, refuse_unknown

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = str(ROOT / "src" / "scaledrill" / "conf")
SCALEDRILL = [sys.executable, "-m", "scaledrill.cli"]

# The ranks the tests spawn themselves pair on the loopback device, as the launcher's do
# (gloo otherwise picks the device the host name resolves to).
os.environ.setdefault("GLOO_SOCKET_IFNAME", "lo")


def make_config(*overrides: str, name: str = "run"):
    """The composed config of a verb, as Hydra would build it from the command line; a
    composition error (unknown key, wrong type) becomes the ConfigError the command line reports."""
    with initialize_config_dir(CONFIGS, version_base=None):
        try:
            cfg = compose(name, overrides=list(overrides))
        except HydraException as err:
            raise composition_error(err) from err
    refuse_unknown(cfg)  # an addition (+train.epochs=90) no schema declares, as the command line refuses it
    return cfg


def composed(group: str, option: str):
    """A group option as the verbs compose it (its schema's defaults, then the YAML file), as a plain mutable config."""
    verb = "forecast" if group == "forecast" else "run"
    return OmegaConf.create(OmegaConf.to_container(make_config(f"{group}={option}", name=verb)[group]))


def spawn_ranks(child, out_dir: Path, nprocs: int = 2) -> list:
    """Run `child(rank, port, out_dir)` in `nprocs` real processes (torch.multiprocessing) that meet
    at a free local port; each saves its result to OUT_DIR/rank{r}.pt. Returns them in rank order."""
    import torch
    import torch.multiprocessing as mp

    from scaledrill.dist.launch import free_port

    mp.spawn(_ending_at_once, args=(child, free_port(), str(out_dir)), nprocs=nprocs)
    return [torch.load(Path(out_dir) / f"rank{r}.pt", weights_only=False) for r in range(nprocs)]


def _ending_at_once(rank: int, child, port: int, out_dir: str) -> None:
    """Run a spawned rank, then leave without the interpreter's teardown, as our rank entry point
    does (dist/rank.py): gloo's threads destroyed during finalisation abort now and then on a
    loaded machine ("terminate called without an active exception") after every output is written."""
    child(rank, port, out_dir)
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)


def run_cli(*args: str, timeout: float = 300, env: dict | None = None, check: bool = False) -> subprocess.CompletedProcess:
    full_env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1", **(env or {}))
    done = subprocess.run([*SCALEDRILL, *args], capture_output=True, text=True, timeout=timeout, env=full_env, cwd=ROOT)
    if check and done.returncode != 0:
        raise AssertionError(f"scaledrill {' '.join(args)} exited {done.returncode}\n{done.stdout}\n{done.stderr}")
    return done

