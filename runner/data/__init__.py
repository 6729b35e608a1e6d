"""Datasets: reading a file named by the config into a :class:`~runner.data.panel.Panel`."""

from runner.data.attributes import attach_attributes
from runner.data.panel import Panel, load_panel, season_for_frequency

__all__ = ["Panel", "attach_attributes", "load_panel", "season_for_frequency"]
