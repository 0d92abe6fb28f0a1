"""Tolerances derived from floating-point rounding, and the comparison against the reference.

Rule (gradients, per layer l):   tol_l = C · u · √B · max|g_ref,l| · s
Rule (parameters after step t):  tol_t = C · u · √B · t · max|θ_ref,t| · s

u is the unit roundoff of the dtype the path computes in (2⁻²⁴ for float32, 2⁻⁵³
for float64; under train.precision=bf16 or fp16 the forward and backward run in
16 bits, so u is 2⁻⁸ or 2⁻¹¹, the unit roundoff of an 8- or 11-bit significand;
the reference stays float64), B the global batch, s = check.tolerance_scale and C = 32. Why: each
gradient entry is a sum over B per-sample terms; with rounding errors of size
u·|term| that do not all line up, the sum's error grows like √B·u times the
entries' scale (the rule of thumb for recursive summation in Higham, "Accuracy and
Stability of Numerical Algorithms", 2nd ed., §2.8, made rigorous by Higham & Mary
2019, SIAM J. Sci. Comput.; section numbers from memory). C covers the rounding inside
each sample's forward and backward; on the demo tasks the largest error seen is
below 2·u·√B·max|g|, so C = 32 leaves a margin of 16 while a real mistake (a
wrong normalisation, a clip per micro-batch, a BatchNorm over other samples) is
off by 10⁻³ to 1 relative. max|g_ref,l| is taken over all parameters of the
module that owns l (its weight and bias share one backward signal): the bias of a
layer followed by BatchNorm has a gradient of exactly 0 in exact arithmetic, a
cancellation of terms as large as the weight's, so its rounding is the weight's.
Parameters move by a learning rate times gradients whose
errors add up step after step, so their tolerance grows linearly with t.

Rounding floor. The rule assumes the loss is smooth. A kink (ReLU, max-pooling, a
dropout mask times a ReLU) turns a rounding-sized change of a pre-activation near 0
into a changed derivative, so a stock model can move by 10⁻³ relative between
float32 and float64 with nothing wrong in the plumbing. So where the paths compute
in float32 and the reference in float64, the check also computes the true batch in
float32 (same code, same samples, no engine) and takes F = 4 times how far that moves
from float64, per module and per step, as the least tolerance (`floor_from`). F is our
own margin: a path rounds in another order and may cross other kinks, of the same size.
Only for a model whose float32 true batch repeats to the bit when the global random
state moves (`same_trajectory`): unkeyed random draws would pass for rounding, so such a
model gets no floor and the diagnosis names its draws.
"""

import math
from dataclasses import dataclass, field, replace

import torch

from scaledrill.layout import Layout

C = 32.0
UNIT_ROUNDOFF = {"float32": 2.0**-24, "float64": 2.0**-53, "bf16": 2.0**-8, "fp16": 2.0**-11}
RULE = "gradient: tol = C·u·√B·max|g_ref| per layer (max over the module's parameters); parameters after step t: tol = C·u·√B·t·max|θ_ref,t|; C = 32, u = unit roundoff of the path's dtype (2^-24 float32, 2^-53 float64, 2^-8 bf16, 2^-11 fp16 under train.precision), times check.tolerance_scale"


def unit_roundoff(train) -> float:
    """u of what the paths compute in: train.precision when it is 16-bit, else train.dtype."""
    return UNIT_ROUNDOFF[train.precision] if train.precision in ("bf16", "fp16") else UNIT_ROUNDOFF[train.dtype]


@dataclass
class LayerResult:
    layer: str
    max_abs: float
    max_rel: float
    tolerance: float
    ok: bool


@dataclass
class TrajectoryResult:
    steps: int
    max_abs: float
    tolerance: float
    ok: bool
    first_bad_step: int | None = None


@dataclass
class PathResult:
    name: str
    layers: list[LayerResult] = field(default_factory=list)
    trajectory: TrajectoryResult | None = None
    note: str = ""  # e.g. why a path did not run

    @property
    def ok(self) -> bool:
        return all(x.ok for x in self.layers) and (self.trajectory is None or self.trajectory.ok)

    def to_json(self) -> dict:
        return {
            "name": self.name,
            "ok": self.ok,
            "layers": [vars(x) for x in self.layers],
            "trajectory": None if self.trajectory is None else {k: v for k, v in vars(self.trajectory).items() if k != "first_bad_step"},
        }


FLOOR = 4.0  # F: the least tolerance is F times the float32 true batch's own distance from float64


@dataclass(frozen=True)
class Tolerance:
    unit: float  # u
    batch: int  # B
    scale: float = 1.0  # check.tolerance_scale
    grad_floor: dict = field(default_factory=dict)  # module -> least gradient tolerance (rounding floor)
    param_floor: tuple = ()  # step t-1 -> least parameter tolerance

    def grad_bound(self, module: str, magnitude: float) -> float:
        return max(self(magnitude), self.grad_floor.get(module, 0.0) * self.scale)

    def param_bound(self, step: int, magnitude: float) -> float:
        floor = self.param_floor[step - 1] if step <= len(self.param_floor) else 0.0
        return max(self(magnitude, steps=step), floor * self.scale)

    def without_floor(self, **changes) -> "Tolerance":
        return replace(self, grad_floor={}, param_floor=(), **changes)

    @classmethod
    def for_run(cls, cfg, scale: float) -> "Tolerance":
        return cls(unit_roundoff(cfg.train), Layout.from_config(cfg.layout).global_batch, scale)

    def __call__(self, magnitude: float, steps: int = 1) -> float:
        return C * self.unit * math.sqrt(self.batch) * steps * magnitude * self.scale


def _module_scale(names, ref) -> dict[str, float]:
    """max|g_ref| over the parameters of each module (the name up to its last dot)."""
    scale: dict[str, float] = {}
    for name, r in zip(names, ref):
        owner = name.rpartition(".")[0]
        scale[owner] = max(scale.get(owner, 0.0), float(r.abs().max()))
    return scale


def compare_grads(names, grads, ref, tol: Tolerance) -> list[LayerResult]:
    out = []
    scale = _module_scale(names, ref)
    for name, g, r in zip(names, grads, ref):
        diff = float((g - r).abs().max())
        size = float(r.abs().max())
        owner = name.rpartition(".")[0]
        bound = tol.grad_bound(owner, scale[owner])
        rel = diff / size if size > 0 else (0.0 if diff == 0 else math.inf)
        out.append(LayerResult(name, diff, rel, bound, diff <= bound))
    return out


def compare_params(params, ref, tol: Tolerance) -> TrajectoryResult:
    """Largest parameter error over all steps; each step t is held to its own tol_t."""
    worst, worst_bound, first_bad = 0.0, 0.0, None
    for t, (mine, theirs) in enumerate(zip(params, ref), start=1):
        diff = max(float((a - b).abs().max()) for a, b in zip(mine, theirs))
        bound = tol.param_bound(t, max(float(b.abs().max()) for b in theirs))
        if diff > bound and first_bad is None:
            first_bad = t
        worst, worst_bound = max(worst, diff), bound
    return TrajectoryResult(len(params), worst, worst_bound, first_bad is None, first_bad)


def compare(name: str, run, ref, tol: Tolerance) -> PathResult:
    """PathResult of Trajectory `run` against the reference Trajectory `ref`."""
    return PathResult(name, compare_grads(run.names, run.grads, ref.grads, tol), compare_params(run.params, ref.params, tol))


def floor_from(tol: Tolerance, low, ref) -> Tolerance:
    """`tol` with the rounding floor measured by `low`, the true batch in the paths' dtype, against `ref`."""
    grad = {}
    for name, a, b in zip(ref.names, low.grads, ref.grads):
        owner = name.rpartition(".")[0]
        grad[owner] = max(grad.get(owner, 0.0), FLOOR * float((a - b).abs().max()))
    steps = tuple(FLOOR * max(float((a - b).abs().max()) for a, b in zip(mine, theirs)) for mine, theirs in zip(low.params, ref.params))
    return replace(tol, grad_floor=grad, param_floor=steps)


def floor_note(tol: Tolerance, ref) -> str:
    """One line on the modules whose rounding floor exceeds the rule (empty when none does)."""
    scale = _module_scale(ref.names, ref.grads)
    raised = [m for m, f in tol.grad_floor.items() if f * tol.scale > tol(scale.get(m, 0.0))]
    if not raised:
        return ""
    shown = ", ".join(raised[:6]) + (f" and {len(raised) - 6} more" if len(raised) > 6 else "")
    return (f"rounding floor: the true batch computed in float32 moves {shown} further from float64 than the rule allows "
            f"(a kink such as ReLU meets rounding); there the tolerance is {FLOOR:g}x that distance")


def same_trajectory(a, b) -> bool:
    """Whether two trajectories hold the very same gradients and parameters."""
    return all(torch.equal(x, y) for x, y in zip(a.grads, b.grads)) and all(
        torch.equal(x, y) for p, q in zip(a.params, b.params) for x, y in zip(p, q))
