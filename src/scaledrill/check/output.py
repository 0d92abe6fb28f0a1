"""What a check shows and keeps: a rich table per path, a verdict line, and check.json.

check.json (rendered by the report):
    {"verdict": "match" | "mismatch", "tolerance_rule": str,
     "reference": {"dtype": "float64" | "float32", "why": str (why not float64), "unit_roundoff"?: float},
     "paths": [{"name", "ok", "layers": [{"layer", "max_abs", "max_rel", "tolerance", "ok"}],
                "trajectory": {"steps", "max_abs", "tolerance", "ok"} | null}],
     "skipped": [{"name", "reason"}],
     "diagnosis": [{"cause", "evidence", "fix"}]}
"""

from pathlib import Path

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from scaledrill.check.tolerance import RULE
from scaledrill.io import write_json

OK, BAD = "[green]ok[/]", "[bold red]DIFFERS[/]"


def path_table(result) -> Table:
    table = Table(title=f"{escape(result.name)}: {'matches' if result.ok else 'does not match'} the true batch", title_justify="left")
    for column in ("layer", "max abs error", "max rel error", "tolerance", "verdict"):
        table.add_column(column, justify="left" if column == "layer" else "right")
    for x in result.layers:
        table.add_row(escape(x.layer), f"{x.max_abs:.3g}", f"{x.max_rel:.3g}", f"{x.tolerance:.3g}", OK if x.ok else BAD)
    t = result.trajectory
    if t is not None:
        where = "" if t.ok else f" (first off at step {t.first_bad_step})"
        table.add_row(f"[italic]parameters after {t.steps} steps{where}[/]", f"{t.max_abs:.3g}", "", f"{t.tolerance:.3g}", OK if t.ok else BAD)
    return table


def payload(results, skipped: dict, findings, reference: dict | None = None) -> dict:
    return {
        "verdict": "match" if all(r.ok for r in results) else "mismatch",
        "tolerance_rule": RULE,
        "reference": reference or {"dtype": "float64", "why": ""},
        "paths": [r.to_json() for r in results],
        "skipped": [{"name": k, "reason": v} for k, v in skipped.items()],
        "diagnosis": [vars(f) for f in findings],
    }


def show(results, skipped: dict, findings, console: Console | None = None) -> None:
    console = console or Console(emoji=False, highlight=False)
    for r in results:
        console.print(path_table(r))
    for name, reason in skipped.items():
        console.print(f"[dim]skipped {name}: {reason}[/]")
    for f in findings:
        console.print(f"[bold]cause:[/] {escape(f.cause)}\n  [bold]evidence:[/] {escape(f.evidence)}\n  [bold]fix:[/] {escape(f.fix)}")
    bad = [r.name for r in results if not r.ok]
    if bad:
        console.print(f"[bold red]check: MISMATCH[/] — {', '.join(bad)} differ from the true batch beyond rounding")
    else:
        console.print(f"[bold green]check: MATCH[/] — {len(results)} paths equal the true batch within rounding")
    console.print(f"[dim]tolerance: {RULE}[/]")


def save(run_dir: Path, results, skipped: dict, findings, reference: dict | None = None) -> dict:
    out = payload(results, skipped, findings, reference)
    write_json(Path(run_dir) / "check.json", out)
    return out
