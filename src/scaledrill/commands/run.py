"""`scaledrill run`: train the recipe on its layout, then say how it ended and where to look."""

from pathlib import Path

from scaledrill.dist.rank import rank_from_env
from scaledrill.train.run import run_verb


def outcome(summary: dict, run_dir: Path) -> str:
    """The lines a user reads when a run ends: how it went, and where to look next."""
    steps, seconds = summary["steps"], summary["wall_seconds"]
    if summary["diverged"]:
        head = f"diverged after {steps} steps ({summary['stop_reason']})"
    elif summary["stopped_early"]:
        head = f"stopped early after {steps} steps ({seconds:.1f} s): the goal was met"
    else:
        head = f"finished {steps} steps in {seconds:.1f} s"
    facts = []
    if summary.get("final_loss") is not None:
        facts.append(f"last train loss {summary['final_loss']:.4g}")
    facts += [f"test {k} {v:.4g}" for k, v in summary.get("eval", {}).items()]
    if summary.get("noise_scale") is not None:
        facts.append(f"gradient noise scale ~{summary['noise_scale']:.0f} samples (B={summary['global_batch']})")
    lines = [head + (": " + ", ".join(facts) if facts else "")]
    lines += [f"incident report: {path}" for path in summary.get("incidents", [])]
    lines.append(f"outputs: {run_dir} (summary.json, run.sqlite{', checkpoints/' if summary.get('last_checkpoint') else ''})")
    lines.append(f"look: scaledrill report {run_dir}")
    if summary["diverged"]:
        lines.append(_replay_hint(run_dir, steps))
    return "\n".join(lines)


def _replay_hint(run_dir: Path, steps: int) -> str:
    """Fixes need a checkpoint from before the blow-up; replay finds the newest one in the run directory."""
    if len(list((run_dir / "checkpoints").glob("step-*.pt"))) < 2:
        return (f"to try fixes, rerun with train.checkpoint_every={max(1, steps // 10)} and replay from a "
                "checkpoint before the blow-up (README, replay)")
    return (f"try fixes side by side: scaledrill replay replay.from={run_dir} "
            "'+replay.variants.sqrt=\"scaling.rule=sqrt\"' (README, replay)")


def run_command(cfg, run_dir: Path) -> dict | None:
    """`scaledrill run` itself: the run, then its outcome (from rank 0 only under a launcher)."""
    summary = run_verb(cfg, run_dir)
    if summary is not None and rank_from_env() == 0:
        print(outcome(summary, run_dir))
    return summary
