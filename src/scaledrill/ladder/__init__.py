"""Batch-size ladder: steps to target across growing batches, and the fit that reads them."""
