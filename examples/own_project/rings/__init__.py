"""A user's own project: a model and a dataset written with plain torch, nothing from scaledrill."""
