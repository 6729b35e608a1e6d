"""Datasets: reading a file named by the config into a :class:`~runner.data.panel.Panel`."""

from runner.data.attributes import attach_attributes
from runner.data.frequency import season_for_frequency
from runner.data.load import load_panel
from runner.data.panel import Panel

__all__ = ["Panel", "attach_attributes", "load_panel", "season_for_frequency"]
