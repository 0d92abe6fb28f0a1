"""A cluster run's training log, read from CSV, and where a rehearsal departs from it.

Why: the question after a cluster run went wrong is "does the rehearsal reproduce
it, and from which step on does it not?". The cluster side is whatever the job
logged; a CSV with a header is the lowest common form.

Format: a header line naming the columns, then one row per logged step.
- `step` (whole number >= 0, strictly increasing) and `loss` are required;
- `grad_norm` and `lr` are read when present (an empty cell is a missing value);
- any other column (wall time, throughput, ...) is ignored, so a log can be used
  as the job wrote it.
`nan` and `inf` are numbers here: a diverged job logs them. Every problem raises
DataError naming the file and the line.

Departure: aligned by step, the rehearsal departs at the first common step where
|rehearsal - log| > rtol * |log|, or where exactly one of the two is finite.
"""

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from scaledrill.errors import DataError

REQUIRED = ("step", "loss")
OPTIONAL = ("grad_norm", "lr")


@dataclass(frozen=True)
class ClusterLog:
    path: str
    steps: np.ndarray  # int64, strictly increasing
    loss: np.ndarray
    grad_norm: np.ndarray | None = None  # NaN where a row left it empty
    lr: np.ndarray | None = None


def read_cluster_log(path: str | Path) -> ClusterLog:
    """Parse and check the CSV at `path`; raise DataError naming the file and line of the first problem."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise DataError(f"{path}: cluster log not found") from None
    except (OSError, UnicodeDecodeError) as err:
        raise DataError(f"{path}: cannot read the cluster log as UTF-8 text ({err})") from None
    return parse_cluster_log(text, str(path))


def parse_cluster_log(text: str, name: str = "<cluster log>") -> ClusterLog:
    """The parser behind read_cluster_log, on text already in memory."""
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header, rows = _header(reader, name), []
        columns = _columns(header, name, reader.line_num)
        for row in reader:
            if not row or all(not cell.strip() for cell in row):
                continue  # blank lines carry nothing
            rows.append((reader.line_num, _row(row, header, columns, name, reader.line_num)))
    except csv.Error as err:
        raise DataError(f"{name}, line {reader.line_num}: not valid CSV ({err})") from None
    if not rows:
        raise DataError(f"{name}: a header but no data rows")
    previous = None
    for line, values in rows:
        step = values["step"]
        if previous is not None and step <= previous:
            rule = "repeats" if step == previous else "is smaller than"
            raise DataError(f"{name}, line {line}: step {step} {rule} the step {previous} of the row before; steps must increase")
        previous = step
    out = {key: np.array([v[key] for _, v in rows], dtype=np.float64) for key in columns}
    return ClusterLog(
        path=name,
        steps=np.array([v["step"] for _, v in rows], dtype=np.int64),
        loss=out["loss"],
        grad_norm=out.get("grad_norm"),
        lr=out.get("lr"),
    )


def _header(reader, name: str) -> list[str]:
    for row in reader:
        if row and any(cell.strip() for cell in row):
            return [cell.strip().lower() for cell in row]
    raise DataError(f"{name}: empty file; expected a header line naming the columns {', '.join(REQUIRED)}")


def _columns(header: list[str], name: str, line: int) -> dict[str, int]:
    for key in REQUIRED:
        if key not in header:
            raise DataError(f"{name}, line {line}: the header has no {key!r} column (found: {', '.join(header)})")
    columns = {}
    for key in (*REQUIRED, *OPTIONAL):
        if header.count(key) > 1:
            raise DataError(f"{name}, line {line}: the header names the column {key!r} twice")
        if key in header:
            columns[key] = header.index(key)
    return columns


def _row(row: list[str], header: list[str], columns: dict[str, int], name: str, line: int) -> dict:
    if len(row) != len(header):
        raise DataError(f"{name}, line {line}: {len(row)} fields, but the header has {len(header)}")
    values = {}
    for key, index in columns.items():
        cell = row[index].strip()
        if not cell:
            if key in REQUIRED:
                raise DataError(f"{name}, line {line}: the {key!r} cell is empty")
            values[key] = math.nan
            continue
        try:
            values[key] = float(cell)
        except ValueError:
            raise DataError(f"{name}, line {line}: {key} {cell!r} is not a number") from None
    step = values["step"]
    if not math.isfinite(step) or not step.is_integer():
        raise DataError(f"{name}, line {line}: step {row[columns['step']].strip()!r} is not a whole number")
    if step < 0:
        raise DataError(f"{name}, line {line}: step {int(step)} is negative")
    values["step"] = int(step)
    return values


def departure_step(log: ClusterLog, steps, loss, rtol: float) -> int | None:
    """First step both curves hold where the rehearsal's loss leaves the log's by more than rtol (relative)."""
    steps, loss = np.asarray(steps, dtype=np.int64), np.asarray(loss, dtype=np.float64)
    common, mine, theirs = np.intersect1d(steps, log.steps, assume_unique=True, return_indices=True)
    a, b = loss[mine], log.loss[theirs]
    finite_a, finite_b = np.isfinite(a), np.isfinite(b)
    with np.errstate(invalid="ignore"):
        apart = np.abs(a - b) > rtol * np.abs(b)
    departed = np.where(finite_a & finite_b, apart, finite_a != finite_b)
    hits = np.flatnonzero(departed)
    return int(common[hits[0]]) if hits.size else None
