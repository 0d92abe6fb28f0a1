"""Ghost batch normalization, sample-keyed dropout, and the conversion of stock torch modules (stock.py)."""

from scaledrill.nn.ghost_bn import GhostBatchNorm, convert_batchnorm, set_group_size

__all__ = ["GhostBatchNorm", "convert_batchnorm", "set_group_size"]
