"""LAMB: Adam with a per-layer trust ratio (You et al. 2020, "Large Batch Optimization for
Deep Learning: Training BERT in 76 minutes", ICLR 2020, arXiv 1904.00962).

Why: Adam's rate does not scale with the batch the way SGD's does; normalising
each layer's Adam update to a length proportional to ‖w‖ keeps the step of every
layer in proportion to its weights, so the rate can be scaled (√B, warmup) to
batches of tens of thousands.

Per parameter tensor w with gradient g, at step t (from 1), each step:
1. g = g + λ·w                              only with `decay: coupled` (L2 in the moments)
2. m = β1·m + (1 − β1)·g;  v = β2·v + (1 − β2)·g²
3. m̂ = m / (1 − β1^t);  v̂ = v / (1 − β2^t)   only with `bias_correction: true`
4. r = m̂ / (√v̂ + ε)
5. u = r + λ·w                              only with `decay: decoupled` (the paper's form)
6. ρ = ‖w‖ / ‖u‖; ρ = 1 when a norm is 0; ρ = min(ρ, trust_cap) when set;
   ρ = 1 for excluded parameters (biases, norm scales: see groups.py)
7. w = w − lr·ρ·u

Tuning: ε 1e-6 (larger than Adam's 1e-8, as optax.lamb's default); weight decay
0.01 (common practice); warmup is still needed. Versions of the paper differ on bias
correction, hence the flag. The paper's φ clips ‖w‖; `trust_cap` instead caps
the ratio, which is what bounds the step. `trust_ratios` holds ρ of the last step
for each adapted parameter, by name.
"""

import torch

from scaledrill.optim.lars import norm, safe_ratio


def adam_moments(state: dict, g: torch.Tensor, betas: tuple[float, float]) -> tuple[torch.Tensor, torch.Tensor]:
    """Step 2: the first and second moment estimates, kept in `state`."""
    if "exp_avg" not in state:
        state["exp_avg"], state["exp_avg_sq"] = torch.zeros_like(g), torch.zeros_like(g)
    m = state["exp_avg"].lerp_(g, 1 - betas[0])
    v = state["exp_avg_sq"].mul_(betas[1]).addcmul_(g, g, value=1 - betas[1])
    return m, v


def adam_direction(m, v, betas, step: int, eps: float, bias_correction: bool) -> torch.Tensor:
    """Steps 3-4: r = m̂ / (√v̂ + ε)."""
    if bias_correction:
        m, v = m / (1 - betas[0] ** step), v / (1 - betas[1] ** step)
    return m / (v.sqrt() + eps)


class LAMB(torch.optim.Optimizer):
    """LAMB over parameter groups from `groups.param_groups` (each with `param_names` and `adapt`)."""

    def __init__(self, groups, lr: float, betas=(0.9, 0.999), eps: float = 1e-6, weight_decay: float = 0.0,
                 decay: str = "decoupled", bias_correction: bool = True, trust_cap: float | None = None):
        if decay not in ("coupled", "decoupled"):
            raise ValueError(f"decay must be coupled or decoupled, got {decay!r}")
        defaults = dict(lr=lr, betas=tuple(betas), eps=eps, weight_decay=weight_decay, adapt=True,
                        decay=decay, bias_correction=bias_correction, trust_cap=trust_cap)
        super().__init__(groups, defaults)
        self.trust_ratios: dict[str, float] = {}

    @torch.no_grad()
    def step(self, closure=None):
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        for group in self.param_groups:
            lam, coupled = group["weight_decay"], group["decay"] == "coupled"
            for name, w in zip(group["param_names"], group["params"]):
                if w.grad is None:
                    continue
                state = self.state[w]
                state["step"] = state.get("step", 0) + 1
                g = w.grad.add(w, alpha=lam) if coupled else w.grad  # 1
                m, v = adam_moments(state, g, group["betas"])  # 2
                u = adam_direction(m, v, group["betas"], state["step"], group["eps"], group["bias_correction"])  # 3-4
                if not coupled:
                    u.add_(w, alpha=lam)  # 5
                rho = safe_ratio(norm(w), norm(u), group["trust_cap"]) if group["adapt"] else 1.0  # 6
                if group["adapt"]:
                    self.trust_ratios[name] = rho
                w.add_(u, alpha=-group["lr"] * rho)  # 7
        return loss
