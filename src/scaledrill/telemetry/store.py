"""The run store: one SQLite file per run directory, written by rank 0 only.

Why SQLite: one file, readable while the run is still writing (WAL mode lets
readers and one writer work at once), queryable by the report without a server,
and crash-safe: a transaction is either in the file or not.

How:
1. `start` inserts a `runs` row (status "running") and commits at once. A row
   still "running" from before is marked "killed": the run directory's lock
   (train/rundir.py) lets one run at a time write here, so that run ended
   without closing (kill -9, power loss).
2. `log_scalars` / `log_layers` only buffer rows. Every `flush_every` calls the
   buffer goes in with `executemany`, inside one transaction, so a crash (even
   SIGKILL) loses at most the rows of the batch not yet committed.
3. `log_event` commits at once, with whatever is buffered, because an event
   (a detector firing, a checkpoint) is what one looks for after a crash.
4. `close(status)` commits the rest and records how the run ended.

`synchronous=NORMAL` in WAL mode survives a crash of the process but not of the
machine; that is the failure worth paying for here. SQLite stores a NaN as NULL;
the readers turn NULL back into NaN, so a diverged loss reads as NaN.
"""

import json
import sqlite3
from contextlib import closing
from datetime import datetime, timezone
from itertools import groupby
from pathlib import Path

import numpy as np

SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY, kind TEXT NOT NULL, started TEXT NOT NULL,
    config_yaml TEXT NOT NULL, status TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS scalars (
    run_id INTEGER NOT NULL, step INTEGER NOT NULL, name TEXT NOT NULL, value REAL);
CREATE TABLE IF NOT EXISTS layers (
    run_id INTEGER NOT NULL, step INTEGER NOT NULL, layer TEXT NOT NULL, name TEXT NOT NULL, value REAL);
CREATE TABLE IF NOT EXISTS events (
    run_id INTEGER NOT NULL, step INTEGER NOT NULL, kind TEXT NOT NULL, detail TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS scalars_by_name ON scalars (run_id, name, step);
CREATE INDEX IF NOT EXISTS layers_by_name ON layers (run_id, name, step);
"""


class RunStore:
    """The writer. Not thread-safe; one per run, in the process of rank 0."""

    def __init__(self, path: str | Path, flush_every: int = 50):
        if flush_every < 1:
            raise ValueError(f"flush_every must be at least 1, got {flush_every}")
        self.path = Path(path)
        self.flush_every = flush_every
        self.run_id: int | None = None
        self.commits = 0  # batches committed, for the reporter
        self._scalars: list[tuple] = []
        self._layers: list[tuple] = []
        self._pending = 0  # log calls since the last commit
        self._conn = sqlite3.connect(self.path)
        self._conn.execute("PRAGMA journal_mode=WAL")
        self._conn.execute("PRAGMA synchronous=NORMAL")
        with self._conn:
            self._conn.executescript(SCHEMA)

    def start(self, kind: str, config_yaml: str) -> int:
        """Step 1: a new run row; returns its id."""
        started = datetime.now(timezone.utc).isoformat(timespec="seconds")
        with self._conn:
            self._conn.execute("UPDATE runs SET status = 'killed' WHERE status = 'running'")
            cur = self._conn.execute(
                "INSERT INTO runs (kind, started, config_yaml, status) VALUES (?, ?, ?, 'running')",
                (kind, started, config_yaml),
            )
        self.run_id = cur.lastrowid
        return self.run_id

    def log_scalars(self, step: int, scalars: dict[str, float]) -> None:
        """Step 2: buffer one step's scalars."""
        rid = self._run()
        self._scalars.extend((rid, step, name, float(v)) for name, v in scalars.items())
        self._tick()

    def log_layers(self, step: int, layers: dict[str, dict[str, float]]) -> None:
        """Step 2: buffer one step's per-layer statistics (see layers.layer_stats)."""
        rid = self._run()
        self._layers.extend(
            (rid, step, layer, name, float(v)) for layer, stats in layers.items() for name, v in stats.items()
        )
        self._tick()

    def log_event(self, step: int, kind: str, detail: dict | None = None) -> None:
        """Step 3: record an event and commit everything now."""
        rid = self._run()
        with self._conn:
            self._write()
            self._conn.execute(
                "INSERT INTO events (run_id, step, kind, detail) VALUES (?, ?, ?, ?)",
                (rid, step, kind, json.dumps(detail or {})),
            )
        self.commits += 1

    def flush(self) -> None:
        """Commit the buffered rows as one transaction (nothing to do if the buffer is empty)."""
        if self._scalars or self._layers:
            with self._conn:
                self._write()
            self.commits += 1
        self._pending = 0

    def close(self, status: str = "finished") -> None:
        """Step 4: commit the rest, record the final status and close the file."""
        self.flush()
        if self.run_id is not None:
            with self._conn:
                self._conn.execute("UPDATE runs SET status = ? WHERE id = ?", (status, self.run_id))
        self._conn.close()

    def _run(self) -> int:
        if self.run_id is None:
            raise RuntimeError("call start() before logging")
        return self.run_id

    def _tick(self) -> None:
        self._pending += 1
        if self._pending >= self.flush_every:
            self.flush()

    def _write(self) -> None:
        self._conn.executemany("INSERT INTO scalars VALUES (?, ?, ?, ?)", self._scalars)
        self._conn.executemany("INSERT INTO layers VALUES (?, ?, ?, ?, ?)", self._layers)
        self._scalars, self._layers, self._pending = [], [], 0


# --- reader: read-only, safe to use while a run is writing -------------------------


def open_store(path: str | Path) -> sqlite3.Connection:
    """A read-only connection; never creates or changes the file."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"no run store at {path}")
    return sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)


def _latest(conn: sqlite3.Connection, run_id: int | None) -> int | None:
    if run_id is not None:
        return run_id
    return conn.execute("SELECT MAX(id) FROM runs").fetchone()[0]


def _float(rows, column: int) -> np.ndarray:
    return np.array([np.nan if r[column] is None else r[column] for r in rows], dtype=np.float64)


def read_runs(path: str | Path) -> list[dict]:
    with closing(open_store(path)) as conn:
        rows = conn.execute("SELECT id, kind, started, config_yaml, status FROM runs ORDER BY id").fetchall()
    keys = ("id", "kind", "started", "config_yaml", "status")
    return [dict(zip(keys, r)) for r in rows]


def read_scalars(path: str | Path, run_id: int | None = None) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """name -> (steps, values) of one run (the latest when run_id is None), by step."""
    with closing(open_store(path)) as conn:
        rows = conn.execute(
            "SELECT name, step, value FROM scalars WHERE run_id = ? ORDER BY name, step, rowid",
            (_latest(conn, run_id),),
        ).fetchall()
    out = {}
    for name, group in groupby(rows, key=lambda r: r[0]):
        mine = list(group)
        out[name] = (np.array([r[1] for r in mine], dtype=np.int64), _float(mine, 2))
    return out


def read_layers(path: str | Path, name: str, run_id: int | None = None) -> tuple[np.ndarray, list[str], np.ndarray]:
    """One statistic of every layer: (steps, layer names in model order, matrix [steps, layers]).

    A layer missing at a step reads as NaN.
    """
    with closing(open_store(path)) as conn:
        rows = conn.execute(
            "SELECT step, layer, value FROM layers WHERE run_id = ? AND name = ? ORDER BY rowid",
            (_latest(conn, run_id), name),
        ).fetchall()
    steps = sorted({r[0] for r in rows})
    names = list(dict.fromkeys(r[1] for r in rows))
    matrix = np.full((len(steps), len(names)), np.nan)
    row_of, col_of = {s: i for i, s in enumerate(steps)}, {n: j for j, n in enumerate(names)}
    for step, layer, value in rows:
        matrix[row_of[step], col_of[layer]] = np.nan if value is None else value
    return np.array(steps, dtype=np.int64), names, matrix


def read_events(path: str | Path, run_id: int | None = None) -> list[dict]:
    with closing(open_store(path)) as conn:
        rows = conn.execute(
            "SELECT step, kind, detail FROM events WHERE run_id = ? ORDER BY rowid", (_latest(conn, run_id),)
        ).fetchall()
    return [{"step": s, "kind": k, "detail": json.loads(d)} for s, k, d in rows]
