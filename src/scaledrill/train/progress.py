"""A progress bar for training, with samples per second (rank 0 only)."""

import time

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from scaledrill.layout import Layout


class StepProgress:
    def __init__(self, cfg, enabled: bool):
        self.enabled = enabled
        self.total = cfg.train.steps
        self.batch = Layout.from_config(cfg.layout).global_batch
        self._bar = None

    def __enter__(self):
        if self.enabled:
            self._bar = Progress(
                TextColumn("[bold]train"),
                BarColumn(),
                MofNCompleteColumn(),
                TextColumn("loss {task.fields[loss]:.4g}  {task.fields[rate]:,.0f} samples/s"),
                TimeRemainingColumn(),
                console=Console(stderr=True),
            )
            self._bar.__enter__()
            self._task = self._bar.add_task("train", total=self.total, loss=float("nan"), rate=0.0)
            self._start = time.perf_counter()
            self._done = 0
        return self

    def update(self, trainer, record) -> None:
        if self._bar is None:
            return
        self._done += 1
        rate = self._done * self.batch / max(time.perf_counter() - self._start, 1e-9)
        self._bar.update(self._task, completed=trainer.step_index, loss=record.loss, rate=rate)

    def __exit__(self, *exc):
        if self._bar is not None:
            self._bar.__exit__(*exc)
        return False
