"""Interleaved timing and the statistics of a ratio.

Why interleaved: the machine is shared, so its speed drifts over seconds. Timing
A for a while and then B for a while would fold that drift into the ratio.
Alternating short blocks (A, B, A, B, ...) exposes both sides to the same
conditions, and the median of the per-round ratios ignores the rounds that a
neighbour's burst spoiled.

Steps of `interleave`:
1. warm up every case (first calls compile, fill caches, grow the allocator);
2. for each round, run each case for one block of `block` calls, in turn;
3. keep the seconds per call of every block.
"""

import statistics
import time
from dataclasses import dataclass, field
from typing import Callable

# The clock of one-process comparisons. With one pinned torch thread all the work of
# a step runs on the calling thread, so its CPU time (time.thread_time) is the
# step's cost without the time a busy machine keeps it waiting for a core; wall
# time (time.perf_counter) is the honest choice when waiting is part of the cost
# (collectives). `use_clock` switches it; multi-process comparisons always pass wall.
CLOCKS = {"cpu": time.thread_time, "wall": time.perf_counter}
CLOCK = [time.thread_time]


def use_clock(name: str) -> None:
    CLOCK[0] = CLOCKS[name]


def interleave(cases: dict[str, Callable[[], object]], rounds: int, block: int = 1, warmup: int = 2,
               sync: Callable[[], None] | None = None, clock: Callable[[], float] | None = None) -> dict[str, list[float]]:
    """Seconds per call of each case, one entry per round (blocks alternate between cases).

    `sync` runs before every block (a barrier in multi-process runs) so that all
    processes time the same case at the same moment. `clock` defaults to CLOCK.
    """
    clock = clock or CLOCK[0]
    for fn in cases.values():  # 1.
        for _ in range(warmup):
            fn()
    times: dict[str, list[float]] = {name: [] for name in cases}
    for _ in range(rounds):  # 2.
        for name, fn in cases.items():
            if sync is not None:
                sync()
            start = clock()
            for _ in range(block):
                fn()
            times[name].append((clock() - start) / block)  # 3.
    return times


def spread(values: list[float]) -> dict[str, float]:
    """Median, min, max and quartiles: the ratio and how far one can trust it."""
    ordered = sorted(values)
    if len(ordered) >= 2:
        q1, _, q3 = statistics.quantiles(ordered, n=4, method="inclusive")
    else:
        q1 = q3 = ordered[0]
    return {"median": statistics.median(ordered), "min": ordered[0], "max": ordered[-1], "q1": q1, "q3": q3, "n": len(ordered)}


def ratios(times: dict[str, list[float]], top: str, bottom: str) -> dict[str, float]:
    """Per-round ratio top/bottom (both timed in the same round), summarised by `spread`."""
    return spread([a / b for a, b in zip(times[top], times[bottom])])


@dataclass
class Row:
    """One line of the results table.

    `value` is the median ratio; `goal` reads like "<= 1.10" or ">= 3"; a row
    without a goal is reported only. `detail` holds the raw numbers for bench.json.
    """

    name: str
    value: float
    stats: dict | None = None
    goal: str | None = None
    unit: str = "x"
    note: str = ""
    detail: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool | None:
        if self.goal is None:
            return None
        op, limit = self.goal.split()
        return self.value <= float(limit) if op == "<=" else self.value >= float(limit)

    def to_json(self) -> dict:
        return {"name": self.name, "value": self.value, "unit": self.unit, "stats": self.stats, "goal": self.goal,
                "passed": self.passed, "note": self.note, "detail": self.detail}


def ms(values: list[float]) -> float:
    """Median milliseconds of a list of seconds."""
    return statistics.median(values) * 1e3
