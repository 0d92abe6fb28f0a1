"""Demo models and ghost batch normalization; every model runs under torch.func.vmap."""

from scaledrill.nn.ghost_bn import GhostBatchNorm, convert_batchnorm, set_group_size

__all__ = ["GhostBatchNorm", "convert_batchnorm", "set_group_size"]
