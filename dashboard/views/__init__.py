"""Views of the dashboard: each receives the session's ScreeningModel and renders it.

Widgets are created inside the views (never at module level); :mod:`dashboard.app` only
assembles them into the page.
"""
import holoviews.plotting.bokeh  # noqa: F401 — the Bokeh plotting extension every plot here uses

from .counts import ClassCounts
from .diagnostics import BiasFitPlot, DepartureHistogram, Diagnostics, SceneSummary, SplitWindowScatter
from .exports import ExportPanel
from .focus import Focus
from .inspector import PixelInspector
from .maps import MapGrid
from .notices import Notices
from .qa import QAPanel
from .tuning import TuningPanel

__all__ = ["BiasFitPlot", "ClassCounts", "DepartureHistogram", "Diagnostics", "ExportPanel", "Focus", "MapGrid",
           "Notices", "PixelInspector", "QAPanel", "SceneSummary", "SplitWindowScatter", "TuningPanel"]
