"""Cluster time and cost projection: collectives, FLOPs, the cluster, the step, the document."""

from scaledrill.forecast.cluster import Cluster, validate
from scaledrill.forecast.collectives import ALGORITHMS, allreduce_seconds
from scaledrill.forecast.document import CAUTION, forecast_json, render_forecast
from scaledrill.forecast.flops import flops_per_sample, param_bytes
from scaledrill.forecast.project import StepForecast, devices_for, project_rungs, project_step

__all__ = [
    "ALGORITHMS", "CAUTION", "Cluster", "StepForecast", "allreduce_seconds", "devices_for",
    "flops_per_sample", "forecast_json", "param_bytes", "project_rungs", "project_step",
    "render_forecast", "validate",
]  # fmt: skip
