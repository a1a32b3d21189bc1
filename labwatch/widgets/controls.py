"""The control strip: connect, new run, functional, window, target, auto-stop, stop, record.

The widgets here hold no logic; :class:`~labwatch.widgets.dashboard.Dashboard` links their
values to its traits and acts on changes.
"""

from __future__ import annotations

import ipywidgets as w

from labwatch.widgets._format import esc
from labwatch.widgets.state import SAFETY_CAUTION

__all__ = ["FUNCTIONAL_LABELS", "ControlBar"]

#: Dropdown entries for the named functionals (value -> label).
FUNCTIONAL_LABELS = {
    "auto": "automatic (CHSH / CGLMP by shape, else LP certificate)",
    "chsh": "CHSH",
    "cglmp": "CGLMP",
    "certificate": "LP certificate (from the visibility LP)",
}


class ControlBar(w.VBox):
    """Buttons and fields of the dashboard (see the module docstring)."""

    def __init__(self) -> None:
        big = {"height": "42px", "width": "auto"}
        self.connect = w.ToggleButton(
            value=False,
            description="Connect",
            icon="plug",
            tooltip="receive the stream",
            layout=big,
        )
        self.new_run = w.Button(
            description="New run",
            icon="refresh",
            tooltip="restart the cumulative counts",
            layout=big,
        )
        self.functional = w.Dropdown(
            options=[(label, key) for key, label in FUNCTIONAL_LABELS.items()],
            value="auto",
            description="Functional",
            layout={"width": "27em"},
        )
        self.window = w.BoundedFloatText(
            value=30.0,
            min=0.5,
            max=86400.0,
            step=1.0,
            description="Window (s)",
            layout={"width": "12em"},
        )
        self.target = w.Text(
            value="",
            placeholder="e.g. p<=1e-6",
            description="Target",
            continuous_update=False,
            layout={"width": "17em"},
        )
        self.auto_stop = w.Checkbox(
            value=False,
            description="stop source when target met",
            indent=False,
            layout={"width": "auto"},
        )
        self.stop_source = w.Button(
            description="Stop acquisition",
            icon="stop",
            button_style="danger",
            tooltip="ask the source to stop publishing (two clicks)",
            layout=big,
        )
        self.record = w.ToggleButton(
            value=False,
            description="Record",
            icon="circle",
            tooltip="tee every message to a file",
            layout=big,
        )
        self.record_path = w.Text(
            value="",
            placeholder="recording file (.lwrec)",
            description="File",
            layout={"width": "22em"},
        )
        self.message = w.HTML()
        self.caution = w.HTML(
            f'<div style="font-size:13px;color:#6b0f0a">{esc(SAFETY_CAUTION)}</div>'
        )
        row1 = w.HBox(
            [self.connect, self.new_run, self.stop_source, self.record, self.record_path],
            layout={"flex_flow": "row wrap", "align_items": "center"},
        )
        row2 = w.HBox(
            [self.functional, self.window, self.target, self.auto_stop],
            layout={"flex_flow": "row wrap", "align_items": "center"},
        )
        super().__init__([row1, row2, self.message, self.caution])
        self.layout.padding = "4px"

    def say(self, text: str, tone: str = "plain") -> None:
        """Show a short message under the controls."""
        color = {"plain": "#333", "ok": "#00704a", "warn": "#a86500", "alarm": "#b3261e"}[tone]
        self.message.value = f'<div style="font-size:15px;color:{color}">{esc(text)}</div>'
