"""Cluster time and cost projection: collectives, FLOPs, the cluster, the step, the document."""

from .cluster import Cluster, validate
from .collectives import ALGORITHMS, allreduce_seconds
from .document import CAUTION, forecast_json, render_forecast
from .flops import flops_per_sample, param_bytes
from .project import StepForecast, devices_for, project_rungs, project_step

__all__ = [
    "ALGORITHMS", "CAUTION", "Cluster", "StepForecast", "allreduce_seconds", "devices_for",
    "flops_per_sample", "forecast_json", "param_bytes", "project_rungs", "project_step",
    "render_forecast", "validate",
]  # fmt: skip
