"""A prominent banner shown when the confidence target is met."""

from __future__ import annotations

import ipywidgets as w
from traitlets import Bool, Unicode

from labwatch.widgets._format import esc, fmt, fmt_count
from labwatch.widgets.state import ViewState, extra

__all__ = ["TargetBanner"]


class TargetBanner(w.HTML):
    """Hidden until ``snapshot.extras["target"]["met"]``; then a wide green bar."""

    met = Bool(False, help="The target is met in the shown run").tag(sync=True)
    text = Unicode("", help="Banner text").tag(sync=True)

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.layout.display = "none"
        self.layout.width = "100%"
        self.stop_note = ""

    def show(self, state: ViewState) -> None:
        target = extra(state.snapshot, "target")
        met = bool(target.get("met"))
        if met:
            text = (
                f"TARGET MET: {target.get('description') or state.target_text or 'target'}"
                f" — {fmt_count(_int(target.get('trials')))} coincidences, "
                f"source time {fmt(target.get('met_at_source_time'), '.1f')} s"
            )
            if self.stop_note:
                text += f" · {self.stop_note}"
        else:
            text = ""
        if (met, text) == (self.met, self.text):
            return
        with self.hold_sync():
            self.met, self.text = met, text
            self.value = (
                '<div style="background:#00704a;color:white;font-size:34px;font-weight:800;'
                f'padding:14px 20px;border-radius:6px;text-align:center">{esc(text)}</div>'
                if met
                else ""
            )
        self.layout.display = "block" if met else "none"


def _int(v: object) -> int | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return int(v)
