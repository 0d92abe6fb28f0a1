"""What a ladder shows while it climbs and when it is done: progress bars and the rung table."""

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn
from rich.table import Table

from scaledrill.ladder.rungs import Plan, Rung


class LadderDisplay:
    """A bar over the rungs and one over the current rung's steps (stderr)."""

    def __init__(self, plan: Plan, enabled: bool):
        self.plan, self.enabled, self.bar = plan, enabled, None

    def __enter__(self):
        if self.enabled:
            self.bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), console=Console(stderr=True))
            self.bar.__enter__()
            self.rungs = self.bar.add_task("[bold]ladder", total=len(self.plan.rungs))
            self.steps = self.bar.add_task("rung", total=1, visible=False)
        return self

    def start(self, rung: Rung):
        if self.bar is None:
            return lambda step: None
        self.bar.reset(self.steps, total=rung.steps, description=f"B={rung.global_batch} steps", visible=True)
        return lambda step: self.bar.update(self.steps, completed=step)

    def done(self, result: dict) -> None:
        if self.bar is not None:
            self.bar.advance(self.rungs)

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.__exit__(*exc)
        return False


def _g(value, fmt: str = ".4g") -> str:
    return "-" if value is None else format(value, fmt)


def render_ladder(payload: dict) -> Table:
    g = payload["goal"]
    goal = "no target" if g["value"] is None else f"{g['metric']} {g['reached_when']} {g['value']:g}"
    table = Table(title=f"ladder (grow={payload['grow']}, {goal})")
    for col in ("B", "W·b·k", "lr", "steps", "samples", "final", "diverged", "noise scale", "regime", "wall s", "bound"):
        table.add_column(col, justify="right")
    for r in payload["rungs"]:
        steps = r.get("error") or _g(r["steps_to_target"], "d")
        table.add_row(
            str(r["global_batch"]), f"{r['workers']}·{r['micro_batch']}·{r['accum']}", _g(r["lr"]), steps,
            _g(r["samples_to_target"], ","), _g(r["final_metric"]), "yes" if r["diverged"] else "no",
            _g(r["noise_scale"], ".3g"), r["regime"] or "-", _g(r["wall_seconds"], ".1f"), _bound(r.get("step_limit")),
        )
    table.caption = "\n".join(caption_lines(payload))
    return table


def caption_lines(payload: dict) -> list[str]:
    """Where the goal came from, the fit, and whether B_crit and the measured noise scale agree."""
    source = payload.get("goal_source") or "ladder.goal"
    lines = [] if source == "ladder.goal" else [source]
    fit, noise, agree = payload["fit"], payload["noise_scale_measured"], payload.get("agreement")
    first = payload.get("first_check") or []
    if first:
        lines.append(f"B={', '.join(str(b) for b in first)} reached the goal at the first check (step "
                     f"{payload['check_every']}): steps-to-target is only known to be at most that, so the fit leaves "
                     "them out; lower ladder.check_every or set a harder goal to measure them")
    if not fit:
        if payload["goal"]["value"] is not None:
            lines.append("no fit: fewer than two rungs reached the goal after their first check" if first
                         else "no fit: fewer than two rungs reached the goal")
        return lines
    lines.append(f"S_min={_g(fit['s_min'])}  E_min={_g(fit['e_min'])}  B_crit={_g(fit['b_crit'])}  "
                 f"measured noise scale (median)={_g(noise)}")  # fmt: skip
    if agree and agree["flagged"]:
        lines.append(
            f"B_crit and the measured noise scale disagree by {agree['ratio']:.1f}× (more than 2×): McCandlish et al. "
            "2018 expect them to agree roughly. The noise scale grows during training and was measured along the rungs' "
            "runs, while B_crit is fitted to steps-to-target over few rungs; add rungs around both values, check the "
            "lr at the large rungs, and trust neither number alone."
        )
    elif agree:
        lines.append(f"B_crit and the measured noise scale agree within {agree['ratio']:.3g}× (McCandlish et al. 2018)")
    return lines


def _bound(limit: str | None) -> str:
    """The setting that bound a rung's steps, short: max_samples, max_steps or train.steps (ladder.json has the sentence)."""
    if not limit:
        return "-"
    return "max_samples" if limit.startswith("sample budget") else limit.split("=")[0].replace("ladder.", "")
