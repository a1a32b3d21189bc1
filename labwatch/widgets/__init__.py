"""Jupyter widgets (ipywidgets + bqplot) that show live or replayed snapshots.

:class:`LiveMonitor` is one Bell value over time; :class:`Dashboard` is the full bench view.
Both read immutable snapshots only, through a :class:`MonitorFeed`.
"""

from __future__ import annotations

from labwatch.widgets.dashboard import Dashboard
from labwatch.widgets.feed import MonitorFeed
from labwatch.widgets.live import LiveMonitor

__all__ = ["Dashboard", "LiveMonitor", "MonitorFeed"]
