"""LARS: momentum SGD with a per-layer trust ratio (You, Gitman, Ginsburg 2017, arXiv 1708.03888).

Why: at a large batch the scaled global rate is too big for some layers and too
small for others, because ‖g‖/‖w‖ differs by orders of magnitude between layers.
LARS gives each layer l a local rate proportional to ‖w_l‖/‖g_l‖, so every layer
moves by about the same fraction of its weights per step.

Per parameter tensor w with gradient g, each step:
1. u = g + β·w                                  weight decay β (coupled, as in the paper)
2. ρ = η·‖w‖ / (‖g‖ + β·‖w‖)                    `denominator: grad`, the paper's form
   ρ = η·‖w‖ / ‖g + β·w‖                        `denominator: update`, as optax.lars
   ρ = 1 when ‖w‖ or the denominator is 0; ρ = min(ρ, trust_cap) when set;
   ρ = 1 for excluded parameters (biases, norm scales: see groups.py)
3. u = lr · ρ · u                               the global rate of the schedule
4. v = μ·v + u                                  momentum μ
5. w = w − v

Tuning: η (`trust_coefficient`) 0.001 in the paper; then the global lr is much
larger than for plain SGD (it multiplies η·‖w‖/‖g‖), and still needs warmup.
`trust_cap` caps ρ for layers whose gradients vanish. `trust_ratios` holds ρ of
the last step for each adapted parameter, by name, for the telemetry.
"""

import torch


def norm(t: torch.Tensor) -> float:
    return float(torch.linalg.vector_norm(t))


def safe_ratio(numerator: float, denominator: float, clip: float | None) -> float:
    """numerator / denominator, 1 when either is 0 (no information), capped at `clip`."""
    if numerator == 0.0 or denominator == 0.0:
        return 1.0
    ratio = numerator / denominator
    return ratio if clip is None else min(ratio, clip)


def momentum_trace(state: dict, update: torch.Tensor, momentum: float) -> torch.Tensor:
    """v = μ·v + u, kept in `state["momentum"]`."""
    if "momentum" not in state:
        state["momentum"] = torch.zeros_like(update)
    return state["momentum"].mul_(momentum).add_(update)


class LARS(torch.optim.Optimizer):
    """LARS over parameter groups from `groups.param_groups` (each with `param_names` and `adapt`)."""

    def __init__(self, groups, lr: float, momentum: float = 0.9, weight_decay: float = 0.0,
                 trust_coefficient: float = 0.001, trust_cap: float | None = None, denominator: str = "grad"):
        if denominator not in ("grad", "update"):
            raise ValueError(f"denominator must be grad or update, got {denominator!r}")
        defaults = dict(lr=lr, momentum=momentum, weight_decay=weight_decay, adapt=True,
                        trust_coefficient=trust_coefficient, trust_cap=trust_cap, denominator=denominator)
        super().__init__(groups, defaults)
        self.trust_ratios: dict[str, float] = {}

    def ratio(self, group: dict, w: torch.Tensor, g: torch.Tensor, u: torch.Tensor) -> float:
        """Step 2: the layer's trust ratio."""
        if not group["adapt"]:
            return 1.0
        w_norm, beta = norm(w), group["weight_decay"]
        denominator = norm(g) + beta * w_norm if group["denominator"] == "grad" else norm(u)
        return safe_ratio(group["trust_coefficient"] * w_norm, denominator, group["trust_cap"])

    @torch.no_grad()
    def step(self, closure=None):
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        for group in self.param_groups:
            for name, w in zip(group["param_names"], group["params"]):
                if w.grad is None:
                    continue
                g = w.grad
                u = g.add(w, alpha=group["weight_decay"])  # 1
                rho = self.ratio(group, w, g, u)  # 2
                if group["adapt"]:
                    self.trust_ratios[name] = rho
                u.mul_(group["lr"] * rho)  # 3
                v = momentum_trace(self.state[w], u, group["momentum"])  # 4
                w.sub_(v)  # 5
        return loss
