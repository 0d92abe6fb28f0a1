"""The layout of a run: W simulated workers hosted by P processes.

A simulated worker is a unit of data, not a process. Process `rank` hosts the
V = W / P consecutive global worker ids [rank·V, (rank+1)·V). Everything a worker
computes depends on its global id, never on P or V, which is what makes 1×64,
4×16 and 64×1 compute the same thing.

A Layout holds what it is given; config/validate.py (`validated_layout`) checks a
`layout` group against config/rules.py before it becomes one.
"""

from dataclasses import dataclass

BACKENDS = ("local", "gloo", "mpi")  # layout.backend; the rules on the fields live in config/rules.py


@dataclass(frozen=True)
class Layout:
    workers: int  # W
    procs: int  # P
    micro_batch: int  # b
    accum: int  # k
    backend: str

    @property
    def global_batch(self) -> int:
        """B = W · b · k, derived and never set directly."""
        return self.workers * self.micro_batch * self.accum

    @property
    def per_proc(self) -> int:
        """V, the virtual workers each process hosts."""
        return self.workers // self.procs

    def worker_ids(self, rank: int) -> range:
        """Global ids of the workers that process `rank` hosts."""
        if not 0 <= rank < self.procs:
            raise ValueError(f"rank {rank} outside 0..{self.procs - 1}")
        v = self.per_proc
        return range(rank * v, (rank + 1) * v)

    def describe(self) -> str:
        return (
            f"W={self.workers} workers on P={self.procs} {self.backend} process(es) "
            f"(V={self.per_proc} each), b={self.micro_batch}, k={self.accum} "
            f"-> global batch B={self.global_batch}"
        )

    @classmethod
    def from_config(cls, node) -> "Layout":
        return cls(
            workers=node.workers,
            procs=node.procs,
            micro_batch=node.micro_batch,
            accum=node.accum,
            backend=node.backend,
        )
