"""Jupyter widgets of stratagem (anywidget): traits hold a Spec, views show its Analysis."""

from __future__ import annotations

from .explorer import Explorer

__all__ = ["Explorer"]
