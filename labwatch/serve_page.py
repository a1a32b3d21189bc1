"""The dashboard of a ``labwatch serve`` page (runs in the page's notebook kernel).

A read-only page refuses, in the kernel, every change that would act on the source or on the
server's disk: widget state can be sent from any browser that opened the page, so hiding or
disabling buttons in the page alone would not be enough.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping

import ipywidgets as w
from traitlets import validate

from labwatch.analysis import AnalysisConfig
from labwatch.cli_serve import SERVE_CONFIG_ENV
from labwatch.engine import EngineConfig
from labwatch.widgets import Dashboard, MonitorFeed

__all__ = ["ReadOnlyDashboard", "dashboard_from_env"]


class ReadOnlyDashboard(Dashboard):
    """A Dashboard that can neither stop the source nor record: no control endpoint, no
    auto-stop, no recording, whatever a browser sends; those controls are not shown."""

    def __init__(self, **kwargs) -> None:
        kwargs.pop("control_endpoint", None)
        super().__init__(control_endpoint=None, **kwargs)
        c = self.controls
        for widget in (c.stop_source, c.auto_stop, c.record, c.record_path):
            widget.disabled = True
            widget.layout.display = "none"
        note = w.HTML(
            '<div style="font-size:14px;color:#555">Read-only page: it cannot stop the source '
            "or record; changes to the functional, window or target affect this page only.</div>"
        )
        self.children = (note, *self.children)

    @validate("control_endpoint")
    def _validate_control_endpoint(self, proposal):
        return ""

    @validate("auto_stop", "recording")
    def _validate_read_only_flags(self, proposal):
        return False


def dashboard_from_env(environ: Mapping[str, str] | None = None) -> Dashboard:
    """The dashboard described by ``LABWATCH_SERVE_CONFIG`` (set by ``labwatch serve``)."""
    raw = (environ if environ is not None else os.environ).get(SERVE_CONFIG_ENV)
    if raw is None:
        raise ValueError(
            f"{SERVE_CONFIG_ENV} is not set: start this page with `labwatch serve ENDPOINT`"
        )
    config = json.loads(raw)
    curve = None
    if config.get("keys"):
        from labwatch.security import ClientKeys

        curve = ClientKeys.from_files(*config["keys"])
    feed = MonitorFeed(
        config["endpoint"],
        EngineConfig(
            window_s=config["window_s"], epoch_s=config["epoch_s"], analysis=AnalysisConfig()
        ),
        curve=curve,
    )
    if config.get("allow_control"):
        return Dashboard(control_endpoint=config.get("control"), feed=feed)
    return ReadOnlyDashboard(feed=feed)
