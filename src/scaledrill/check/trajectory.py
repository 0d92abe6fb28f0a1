"""What every path of the check hands back: step-1 gradients and N steps of parameters.

All paths (the float64 reference, the engine's paths, real processes, a user's own
step) produce the same record, so one comparison serves them all. Tensors are kept
in float64 on the CPU whatever the path computed in, and saved with torch.save when
they come from another process.
"""

from dataclasses import dataclass, field

import torch


@dataclass
class Trajectory:
    names: list[str]  # parameter names, in model.parameters() order
    grads: list[torch.Tensor] = field(default_factory=list)  # the averaged gradient of the first step
    params: list[list[torch.Tensor]] = field(default_factory=list)  # params[t] after step t+1
    worker_spread: float = 0.0  # max |difference| between workers' copies (0 where there is one copy)
    skipped: list[int] = field(default_factory=list)  # steps (from 1) skipped for an overflowed fp16 gradient

    def record(self, params: list[torch.Tensor]) -> None:
        """Called after each optimizer step with the parameters, whose .grad holds the averaged gradient."""
        if not self.grads:
            self.grads = [p.grad.detach().double().clone() for p in params]
        self.params.append([p.detach().double().clone() for p in params])

    def to_dict(self) -> dict:
        return {"names": self.names, "grads": self.grads, "params": self.params, "worker_spread": self.worker_spread}

    @classmethod
    def from_dict(cls, d: dict) -> "Trajectory":
        return cls(d["names"], d["grads"], d["params"], float(d.get("worker_spread", 0.0)))
