"""Print the rows as one table: median ratio, its spread, the goal and pass/miss."""

from rich.console import Console
from rich.table import Table

from .timing import Row


def _value(row: Row) -> str:
    if row.unit == "x":
        return f"{row.value:.3f}"
    if row.unit == "W":
        return f"{row.value:,.0f}"
    return f"{row.value:,.1f} {row.unit}"


def _spread(row: Row) -> str:
    s = row.stats
    if not s:
        return ""
    return f"{s['min']:.3f}–{s['max']:.3f} (IQR {s['q1']:.3f}–{s['q3']:.3f}, n={s['n']})"


def _verdict(row: Row) -> str:
    return {None: "reported", True: "[green]pass[/]", False: "[red]miss[/]"}[row.passed]


def show(rows: list[Row], header: str) -> None:
    table = Table(title=header, title_justify="left")
    for col, justify in (("comparison", "left"), ("median", "right"), ("min–max (IQR)", "left"), ("goal", "left"),
                         ("", "left"), ("notes", "left")):
        table.add_column(col, justify=justify, overflow="fold")
    for row in rows:
        table.add_row(row.name, _value(row), _spread(row), row.goal or "", _verdict(row), row.note)
    Console(width=200).print(table)
