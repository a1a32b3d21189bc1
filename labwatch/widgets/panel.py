"""Base class of the dashboard panels: a titled box that draws a :class:`ViewState`."""

from __future__ import annotations

import ipywidgets as w

from labwatch.widgets._format import esc
from labwatch.widgets.state import ViewState

__all__ = ["Panel", "note_html"]


def note_html(text: str, tone: str = "plain") -> str:
    """A short paragraph; ``tone`` ``"warn"`` or ``"alarm"`` gives a coloured box."""
    style = {
        "plain": "color:#333",
        "warn": "color:#5c3a00;background:#fff4dd;border-left:6px solid #a86500;padding:4px 8px",
        "alarm": "color:#6b0f0a;background:#fde7e5;border-left:6px solid #b3261e;padding:4px 8px;"
        "font-weight:600",
    }[tone]
    return f'<div style="font-size:14px;{style}">{esc(text)}</div>'


class Panel(w.VBox):
    """A titled, bordered box; every panel subclass defines ``show(state: ViewState)``."""

    title = "panel"

    def __init__(self, **kwargs) -> None:
        self.heading = w.HTML(
            f'<div style="font-size:20px;font-weight:700;color:#222">{esc(self.title)}</div>'
        )
        self._body: list[w.Widget] = []
        super().__init__(**kwargs)
        self.layout.border = "1px solid #c8c8c8"
        self.layout.border_radius = "6px"
        self.layout.padding = "6px 10px"
        self.layout.margin = "4px"
        self.layout.flex = "1 1 0"
        self.layout.min_width = "420px"
        self._drawn_version = -1

    def set_body(self, *children: w.Widget) -> None:
        """The widgets under the heading."""
        self.children = (self.heading, *children)

    def history_changed(self, state: ViewState) -> bool:
        """True once per new history version (plots are redrawn only then)."""
        if state.history.version == self._drawn_version:
            return False
        self._drawn_version = state.history.version
        return True
