"""Jupyter widgets of stratagem (anywidget): traits hold a Spec, views show its Analysis."""

from __future__ import annotations

from .explorer import Explorer
from .simulation_lab import SimulationLab

__all__ = ["Explorer", "SimulationLab"]
