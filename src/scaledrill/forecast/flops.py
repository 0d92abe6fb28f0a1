"""Measured FLOPs per sample and gradient bytes of a model.

Why: the compute half of a step forecast needs FLOPs per sample, and the
communication half needs the bytes of the gradient. Counting beats guessing:
`torch.utils.flop_counter.FlopCounterMode` counts every matmul and convolution
the model really runs, forward and backward, at 2·m·n·k per (m×k)@(k×n) matmul;
elementwise work (activations, norms, softmax) is not counted.

What to expect: a linear layer costs 2·in·out per sample forward and twice that
backward (one matmul for the input gradient, one for the weight gradient). The
first layer of a network has no input gradient to compute, since the data needs
none, so its backward costs the same as its forward. For a transformer the total
is close to 6·N per token (Kaplan et al. 2020, "Scaling Laws for Neural Language
Models"), plus attention's score and mixing matmuls.
"""

import torch
from torch.utils.flop_counter import FlopCounterMode


def _as_args(example_batch_input) -> tuple:
    return tuple(example_batch_input) if isinstance(example_batch_input, (tuple, list)) else (example_batch_input,)


def flops_per_sample(model: torch.nn.Module, example_batch_input) -> dict[str, float]:
    """FLOPs per sample of one forward, one backward, and their sum (`train`).

    Steps: 1. count the forward on the example batch; 2. count the backward of the
    sum of the output (a scalar, so the backward runs the same matmuls a loss
    would); 3. divide by the batch size, the first dimension of the first input.
    The model's existing `.grad` fields are put back afterwards. The loss itself
    is not counted (it is elementwise, or small next to the model).
    """
    args = _as_args(example_batch_input)
    batch = args[0].shape[0]
    if batch < 1:
        raise ValueError("example_batch_input must hold at least one sample")
    saved = {p: p.grad for p in model.parameters()}
    for p in saved:
        p.grad = None
    try:
        with FlopCounterMode(display=False) as forward:
            out = model(*args)
        if not isinstance(out, torch.Tensor):
            raise TypeError(f"the model must return one tensor to count its backward, got {type(out).__name__}")
        with FlopCounterMode(display=False) as backward:
            out.sum().backward()
    finally:
        for p, grad in saved.items():
            p.grad = grad
    fwd, bwd = forward.get_total_flops() / batch, backward.get_total_flops() / batch
    return {"forward": fwd, "backward": bwd, "train": fwd + bwd}


def param_bytes(model: torch.nn.Module) -> int:
    """Bytes of the trainable parameters: what one uncompressed all-reduce carries."""
    return sum(p.numel() * p.element_size() for p in model.parameters() if p.requires_grad)
