"""A large numeric readout, legible from across the lab (an HTML widget with typed traits)."""

from __future__ import annotations

import ipywidgets as w
from traitlets import Enum, Unicode, observe

from labwatch.widgets._format import DASH, esc

__all__ = ["TONES", "SIZES", "Readout"]

#: Display tones; a cue for the eye only, the figures themselves carry the meaning.
TONES = ("idle", "ok", "warn", "alarm", "info")
#: Readout sizes (font size of the main text).
SIZES = ("huge", "large", "medium")

_TONE_STYLE = {
    "idle": ("#6b6b6b", "#f4f4f4"),
    "ok": ("#00704a", "#e6f5ee"),
    "warn": ("#a86500", "#fff4dd"),
    "alarm": ("#b3261e", "#fde7e5"),
    "info": ("#005a9c", "#e8f1fa"),
}
_SIZE_PX = {"huge": 60, "large": 40, "medium": 26}


class Readout(w.HTML):
    """Caption, big text, a detail line and the assumption labels, in one box.

    Examples
    --------
    >>> r = Readout(caption="CHSH (run)")
    >>> r.text = "2.714"
    >>> "2.714" in r.value
    True
    """

    caption = Unicode("", help="Small heading above the number").tag(sync=True)
    text = Unicode(DASH, help="The big text (the number); '—' when absent").tag(sync=True)
    detail = Unicode("", help="A line under the number (uncertainty, bound, ...)").tag(sync=True)
    assumptions = Unicode("", help="Assumption labels shown with the number").tag(sync=True)
    tone = Enum(TONES, default_value="idle", help="Colour cue: " + ", ".join(TONES)).tag(sync=True)
    size = Enum(SIZES, default_value="large", help="Text size: " + ", ".join(SIZES)).tag(sync=True)

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.layout.min_width = "12em"
        self._render()

    @observe("caption", "text", "detail", "assumptions", "tone", "size")
    def _changed(self, change) -> None:
        self._render()

    def _render(self) -> None:
        fg, bg = _TONE_STYLE[self.tone]
        px = _SIZE_PX[self.size]
        parts = [
            f'<div style="border-left:8px solid {fg};background:{bg};padding:6px 12px;'
            'border-radius:4px;line-height:1.15">',
            f'<div style="font-size:15px;color:#333;font-weight:600">{esc(self.caption)}</div>',
            f'<div style="font-size:{px}px;font-weight:700;color:{fg};'
            'font-family:DejaVu Sans Mono,Menlo,Consolas,monospace;white-space:nowrap">'
            f"{esc(self.text)}</div>",
        ]
        if self.detail:
            parts.append(f'<div style="font-size:16px;color:#222">{esc(self.detail)}</div>')
        if self.assumptions:
            parts.append(
                f'<div style="font-size:13px;color:#555;font-style:italic">'
                f"assumes: {esc(self.assumptions)}</div>"
            )
        parts.append("</div>")
        self.value = "".join(parts)
