"""A plain PyTorch DDP training script, as a user runs it on a cluster (no scaledrill here).

    python tests/plain_ddp_job.py OUTDIR

Two gloo ranks, torch's DistributedSampler and DataLoader (batch 8 per rank), SGD with
momentum 0.9 and weight decay 1e-3 on the weights only, the groups listed no-decay first;
rank 0 logs step, loss, grad_norm, lr to OUTDIR/job.csv every step and saves
{"model": ddp.state_dict(), "optimizer": ..., "scheduler": ...} after step 10 (before the
11th update) to OUTDIR/step10.pt. 20 steps in all.
"""

import os
import sys
from pathlib import Path

import torch
import torch.distributed as dist
import torch.multiprocessing as mp
import torch.nn.functional as F
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader, DistributedSampler, TensorDataset

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.fixtures_user import TinyNet, blobs  # noqa: E402

WORLD, BATCH, STEPS, SAVE_AT, LR = 2, 8, 20, 10, 0.05


def train(rank: int, out: Path) -> None:
    dist.init_process_group("gloo", init_method=f"file://{out / 'rendezvous'}", rank=rank, world_size=WORLD)
    torch.manual_seed(1234)
    model = TinyNet()
    ddp = DistributedDataParallel(model)
    x, y = blobs()
    data = TensorDataset(x, y)
    sampler = DistributedSampler(data, num_replicas=WORLD, rank=rank, shuffle=True, seed=0)
    loader = DataLoader(data, batch_size=BATCH, sampler=sampler)
    decay = [p for n, p in model.named_parameters() if p.ndim > 1]
    no_decay = [p for n, p in model.named_parameters() if p.ndim <= 1]
    opt = torch.optim.SGD([{"params": no_decay, "weight_decay": 0.0}, {"params": decay, "weight_decay": 1e-3}],
                          lr=LR, momentum=0.9)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda s: 1.0)
    log = open(out / "job.csv", "w") if rank == 0 else None
    if log:
        log.write("step,loss,grad_norm,lr,samples_per_s\n")
    step, epoch = 0, 0
    while step < STEPS:
        sampler.set_epoch(epoch)
        for xb, yb in loader:
            if step == SAVE_AT and rank == 0:
                torch.save({"model": ddp.state_dict(), "optimizer": opt.state_dict(), "scheduler": sched.state_dict()},
                           out / "step10.pt")
            opt.zero_grad()
            loss = F.cross_entropy(ddp(xb), yb)
            loss.backward()
            grad_norm = torch.linalg.vector_norm(torch.stack([torch.linalg.vector_norm(p.grad) for p in model.parameters()]))
            mean_loss = loss.detach().clone()
            dist.all_reduce(mean_loss)
            lr = opt.param_groups[0]["lr"]
            opt.step()
            sched.step()
            if log:
                log.write(f"{step},{float(mean_loss) / WORLD!r},{float(grad_norm)!r},{lr!r},1000\n")
            step += 1
            if step == STEPS:
                break
        epoch += 1
    if log:
        log.close()
    dist.barrier()
    dist.destroy_process_group()
    # Leave without the interpreter's teardown: gloo's threads destroyed during finalisation abort
    # now and then on a loaded machine ("terminate called without an active exception"), after
    # every output is written; the job is done here either way.
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)


if __name__ == "__main__":
    target = Path(sys.argv[1]).resolve()
    target.mkdir(parents=True, exist_ok=True)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    mp.spawn(train, args=(target,), nprocs=WORLD, join=True)
