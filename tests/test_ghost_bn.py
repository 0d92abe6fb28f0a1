"""Ghost batch normalization against torch's own BatchNorm, one module per worker.

Tolerance: float32 everywhere; a normalised value is O(1) and its mean/variance are
reductions over at most a few hundred terms, so 1e-5 absolute covers the rounding
(float32 eps 1.2e-7 times the reduction length) with margin.
"""

import copy

import pytest
import torch
from torch import nn
from torch.func import functional_call, grad, vmap

from scaledrill.nn import GhostBatchNorm, convert_batchnorm, set_group_size

ATOL = 1e-5


def _torch_bn(channels, momentum=0.1, seed=0):
    """A torch BatchNorm2d with non-trivial affine parameters and running statistics."""
    gen = torch.Generator().manual_seed(seed)
    bn = nn.BatchNorm2d(channels, momentum=momentum)
    with torch.no_grad():
        bn.weight.copy_(1 + 0.5 * torch.randn(channels, generator=gen))
        bn.bias.copy_(torch.randn(channels, generator=gen))
        bn.running_mean.copy_(torch.randn(channels, generator=gen))
        bn.running_var.copy_(torch.rand(channels, generator=gen) + 0.5)
    return bn


def _inputs(workers, b, channels, seed=1):
    gen = torch.Generator().manual_seed(seed)
    return 3 * torch.randn(workers, b, channels, 5, 5, generator=gen) + 2


def test_groups_equal_separate_torch_batchnorm():
    V, b, C = 4, 6, 3
    x = _inputs(V, b, C)
    reference = _torch_bn(C)
    ghost = convert_batchnorm(copy.deepcopy(reference), group_size=b)
    assert isinstance(ghost, GhostBatchNorm)
    separate = [copy.deepcopy(reference) for _ in range(V)]
    expected = torch.cat([bn(x[v]) for v, bn in enumerate(separate)])  # outside reference: torch's BatchNorm2d
    got = ghost(x.reshape(V * b, C, 5, 5))
    torch.testing.assert_close(got, expected, atol=ATOL, rtol=0)
    # running statistics: the mean of the V torch modules' running statistics
    for name in ("running_mean", "running_var"):
        mean_of_workers = torch.stack([getattr(bn, name) for bn in separate]).mean(0)
        torch.testing.assert_close(getattr(ghost, name), mean_of_workers, atol=ATOL, rtol=0)
    assert int(ghost.num_batches_tracked) == int(separate[0].num_batches_tracked) == 1
    # the groups really differ: normalising the whole batch at once gives other outputs
    whole = copy.deepcopy(reference)(x.reshape(V * b, C, 5, 5))
    assert (whole - expected).abs().max() > 0.05


def test_eval_uses_running_statistics_like_torch():
    reference = _torch_bn(3)
    ghost = convert_batchnorm(copy.deepcopy(reference), group_size=2).eval()
    x = _inputs(1, 5, 3)[0]
    torch.testing.assert_close(ghost(x), reference.eval()(x), atol=ATOL, rtol=0)  # torch's BatchNorm2d


def test_batchnorm1d_and_cumulative_momentum_match_torch():
    gen = torch.Generator().manual_seed(2)
    reference = nn.BatchNorm1d(4, momentum=None)  # cumulative average of batch statistics
    ghost = convert_batchnorm(copy.deepcopy(reference), group_size=8)
    separate = [copy.deepcopy(reference) for _ in range(2)]
    for _ in range(3):
        x = torch.randn(16, 4, generator=gen) * 2 + 1
        expected = torch.cat([separate[0](x[:8]), separate[1](x[8:])])
        torch.testing.assert_close(ghost(x), expected, atol=ATOL, rtol=0)  # torch's BatchNorm1d
    mean_var = (separate[0].running_var + separate[1].running_var) / 2
    torch.testing.assert_close(ghost.running_var, mean_var, atol=ATOL, rtol=0)


def test_vmap_with_batched_buffers_equals_separate_torch_batchnorm():
    V, b, C = 3, 4, 2
    x = _inputs(V, b, C, seed=3)
    upstream = torch.randn(V, b, C, 5, 5, generator=torch.Generator().manual_seed(4))
    reference = _torch_bn(C, seed=5)
    ghost = convert_batchnorm(copy.deepcopy(reference))  # group_size None: each worker's whole batch
    params = {k: v.detach() for k, v in ghost.named_parameters()}
    buffers = {k: v.expand(V, *v.shape).clone() for k, v in ghost.named_buffers()}

    def f(p, buf, xv, up):
        out = functional_call(ghost, (p, buf), (xv,))
        return (out * up).sum(), out

    grads, outs = vmap(grad(f, has_aux=True), in_dims=(None, 0, 0, 0))(params, buffers, x, upstream)
    for v in range(V):  # outside reference: V separate torch BatchNorm2d modules with autograd
        bn = copy.deepcopy(reference)
        out = bn(x[v])
        (out * upstream[v]).sum().backward()
        torch.testing.assert_close(outs[v], out.detach(), atol=ATOL, rtol=0)
        torch.testing.assert_close(grads["weight"][v], bn.weight.grad, atol=1e-4, rtol=1e-5)
        torch.testing.assert_close(grads["bias"][v], bn.bias.grad, atol=1e-4, rtol=1e-5)
        torch.testing.assert_close(buffers["running_mean"][v], bn.running_mean, atol=ATOL, rtol=0)
        torch.testing.assert_close(buffers["running_var"][v], bn.running_var, atol=ATOL, rtol=0)
    assert not torch.allclose(buffers["running_mean"][0], buffers["running_mean"][1])  # per worker


def test_convert_and_set_group_size_walk_the_module_tree():
    net = nn.Sequential(nn.Conv2d(1, 3, 3), nn.BatchNorm2d(3), nn.Sequential(nn.Linear(3, 3), nn.BatchNorm1d(3)))
    net = convert_batchnorm(net, group_size=4)
    ghosts = [m for m in net.modules() if isinstance(m, GhostBatchNorm)]
    assert len(ghosts) == 2 and all(m.group_size == 4 for m in ghosts)
    assert set_group_size(net, 8) == 2 and all(m.group_size == 8 for m in ghosts)


def test_batch_that_does_not_split_into_groups_is_refused():
    with pytest.raises(ValueError, match="group_size=4"):
        GhostBatchNorm(3, group_size=4)(torch.randn(6, 3))
