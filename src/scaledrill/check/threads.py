"""A user's own training step, checked like the engine: W workers as threads in one process.

The protocol a step function follows (name it in `check.step._target_`; other keys
of `check.step` are passed to it as keyword arguments):

    def step(model, loss, micro_batches: list[dict], reduce) -> None

- `model`: this worker's copy, in train mode, every `.grad` None on entry;
- `loss`: the task's loss: `loss(output, batch)` is the SUM over units (samples or
  valid tokens) and `loss.count(batch)` their number;
- `micro_batches`: the worker's k micro-batches of b samples, in order; each dict
  also carries "index", the global sample indices (to key random draws on);
- `reduce(tensor) -> tensor`: the average of `tensor` over all W workers. It is a
  collective: every worker calls it the same number of times, in the same order.
  `reduce.workers` is W and `reduce.worker` this worker's global id.

On return every `p.grad` must hold the gradient of the true batch: ∇ of the sum of
unit losses over all W·k micro-batches divided by their global count. The harness
then clips (`optim.clip_norm`) and runs the recipe's optimizer, as the engine does.

Why threads: each worker really holds its own model and gradients, and `reduce`
really waits for all of them (a barrier), so a step that syncs on the wrong
micro-step leaves gradients that differ between workers, as on a cluster. The
same step also runs in P real processes (check/processes.py): each hosts V = W/P
of the workers as threads, and `reduce` sums the V slots in id order, all-reduces
that sum over the processes (gloo or MPI) and divides by W. The
harness also watches where things happen: how many forward passes each worker had
run when it called `reduce` or a torch clipping function (for the diagnosis).
"""

import copy
import threading
from dataclasses import dataclass, field
from functools import partial

import torch
from hydra.utils import get_method

from scaledrill.check.reference import build_model, cast
from scaledrill.check.trajectory import Trajectory
from scaledrill.errors import ConfigError, WorkerFailed
from scaledrill.layout import Layout
from scaledrill.nn.ghost_bn import set_group_size
from scaledrill.optim import build_optimizer, clip_by_global_norm, resolve_recipe, set_lr
from scaledrill.tasks.sampler import Sampler

DTYPES = {"float32": torch.float32, "float64": torch.float64}


def load_step(node):
    """The step function `check.step` names, with its other keys bound."""
    target = node.get("_target_") if node is not None else None
    if not isinstance(target, str):
        raise ConfigError("check.step._target_", "must name a function module.name", target)
    try:
        fn = get_method(target)
    except Exception as err:
        raise ConfigError("check.step._target_", f"could not import {target!r}: {err}") from None
    kwargs = {k: v for k, v in node.items() if k != "_target_"}
    return partial(fn, **kwargs) if kwargs else fn


@dataclass
class Probe:
    """Where worker 0 called reduce / clipping during the first step, in forward passes done so far."""

    micro_steps: int
    reduce_at: list[int] = field(default_factory=list)
    clip_at: list[int] = field(default_factory=list)


class ThreadGroup:
    """In-process all-reduce for W threads: deposit, wait, sum the slots in id order, wait."""

    def __init__(self, workers: int, timeout_s: float):
        self.slots: list = [None] * workers
        self.barrier = threading.Barrier(workers, timeout=timeout_s)

    def average(self, worker: int, tensor: torch.Tensor) -> torch.Tensor:
        self.slots[worker] = tensor.detach().clone()
        self.barrier.wait()
        total = self.slots[0].clone()
        for other in self.slots[1:]:
            total += other
        self.barrier.wait()  # nobody overwrites a slot before everyone has read it
        return total / len(self.slots)


class ProcessThreadGroup(ThreadGroup):
    """V threads of one of P processes: the local sum (slot order), then one all-reduce over the processes."""

    def __init__(self, local: int, workers: int, collective, timeout_s: float):
        super().__init__(local, timeout_s)
        self.workers, self.collective, self.total = workers, collective, None

    def average(self, worker: int, tensor: torch.Tensor) -> torch.Tensor:
        self.slots[worker] = tensor.detach().clone()
        if self.barrier.wait() == 0:  # one thread per process talks to the other processes
            total = self.slots[0].clone()
            for other in self.slots[1:]:
                total += other
            self.collective.all_reduce(total)
            self.total = total
        self.barrier.wait()
        out = self.total / self.workers
        self.barrier.wait()  # nobody starts the next reduce before everyone has read this one
        return out


class Reducer:
    def __init__(self, group: ThreadGroup, slot: int, worker: int, workers: int, counter: list, probe: Probe | None):
        self.group, self.slot, self.worker, self.workers = group, slot, worker, workers
        self.counter, self.probe = counter, probe

    def __call__(self, tensor: torch.Tensor) -> torch.Tensor:
        if self.probe is not None:
            self.probe.reduce_at.append(self.counter[0])
        return self.group.average(self.slot, tensor)


class _ClipWatch:
    """Wraps torch's clipping functions while worker 0's first step runs, to record where it clips."""

    NAMES = ("clip_grad_norm_", "clip_grad_value_")

    def __init__(self, probe: Probe, counter: list, thread: list):
        self.probe, self.counter, self.thread = probe, counter, thread

    def __enter__(self):
        self.saved = {n: getattr(torch.nn.utils, n) for n in self.NAMES}
        for name, fn in self.saved.items():
            setattr(torch.nn.utils, name, self._wrap(fn))
        return self

    def _wrap(self, fn):
        def watched(*args, **kwargs):
            if threading.current_thread() is self.thread[0]:
                self.probe.clip_at.append(self.counter[0])
            return fn(*args, **kwargs)

        return watched

    def __exit__(self, *exc):
        for name, fn in self.saved.items():
            setattr(torch.nn.utils, name, fn)
        return False


def worker_micro_batches(data, sampler, layout, step: int, dtype, workers: range | None = None) -> list[list[dict]]:
    workers = range(layout.workers) if workers is None else workers
    index = sampler.worker_batches(step, workers)  # [k, V, b]
    return [
        [dict(cast(data.train.take(index[m, w]), dtype), index=index[m, w]) for m in range(layout.accum)]
        for w in range(len(workers))
    ]


def run_step_function(
    cfg, step_fn, steps: int, model_hook=None, timeout_s: float = 60.0, collective=None
) -> tuple[Trajectory, Probe]:
    """Run the user's step on W thread-workers for `steps` optimizer steps; with a `collective`,
    this process's V = W/P of them, reducing over all processes."""
    layout = Layout.from_config(cfg.layout)
    W, dtype = layout.workers, DTYPES[cfg.train.dtype]
    if collective is None:
        mine = range(W)
        new_group = lambda: ThreadGroup(W, timeout_s)  # noqa: E731
    else:
        V = W // collective.size
        mine = range(collective.rank * V, (collective.rank + 1) * V)
        new_group = lambda: ProcessThreadGroup(V, W, collective, timeout_s)  # noqa: E731
    task = build_model(cfg, dtype)
    if model_hook is not None:
        model_hook(task.model)
    set_group_size(task.model, layout.micro_batch)
    models = [copy.deepcopy(task.model) for _ in mine]
    counters = [[0] for _ in mine]
    for model, counter in zip(models, counters):
        model.register_forward_hook(lambda *_, c=counter: c.__setitem__(0, c[0] + 1))
    optimizers = [build_optimizer(list(m.named_parameters()), cfg.optim) for m in models]
    sampler = Sampler(task.data.train.size, layout, cfg.train.seed, cfg.train.tail)
    recipe = resolve_recipe(cfg, layout, task.data.train.size, cfg.train.tail)
    probe = Probe(layout.accum)
    out = Trajectory([n for n, _ in models[0].named_parameters()])
    first_grads = None
    for step in range(steps):
        micro = worker_micro_batches(task.data, sampler, layout, step, dtype, mine)
        group = new_group()
        errors: dict[int, BaseException] = {}

        def work(w):
            for p in models[w].parameters():
                p.grad = None
            counters[w][0] = 0
            try:
                reducer = Reducer(group, w, mine[w], W, counters[w], probe if step == 0 and w == 0 else None)
                step_fn(models[w], task.loss, micro[w], reducer)
            except BaseException as err:  # noqa: BLE001 - reported below with the worker id
                errors[w] = err
                group.barrier.abort()

        threads = [threading.Thread(target=work, args=(w,), daemon=True) for w in range(len(mine))]
        with _ClipWatch(probe, counters[0], threads if step == 0 else [None]):
            for t in threads:
                t.start()
            for t in threads:
                t.join()
        if errors:
            w, err = min(errors.items(), key=lambda kv: isinstance(kv[1], threading.BrokenBarrierError))
            raise WorkerFailed(f"check.step: worker {mine[w]}'s step raised {type(err).__name__}: {err}")
        for model, opt in zip(models, optimizers):
            params = list(model.parameters())
            if any(p.grad is None for p in params):
                raise WorkerFailed("check.step: the step left a parameter without .grad")
            if step == 0:  # do all workers hold the same averaged gradient?
                grads = [p.grad.detach().double() for p in params]
                first_grads = first_grads or grads
                spread = max(float((g - f).abs().max()) for g, f in zip(grads, first_grads))
                out.worker_spread = max(out.worker_spread, spread)
            clip_by_global_norm(params, cfg.optim.clip_norm)
            set_lr(opt, recipe.lr_at(step))
            opt.step()
        out.record(list(models[0].parameters()))
    return out, probe
