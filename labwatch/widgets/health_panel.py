"""Stream health: messages, rejections with their latest reasons, gaps, heartbeats, data age."""

from __future__ import annotations

import math

import ipywidgets as w
from traitlets import Bool, Float, Int, Unicode

from labwatch.widgets._format import esc, fmt_age, fmt_count
from labwatch.widgets.panel import Panel
from labwatch.widgets.readout import Readout
from labwatch.widgets.state import ViewState

__all__ = ["HealthPanel", "stream_verdict"]


def stream_verdict(state: ViewState) -> tuple[str, str]:
    """A one-line state of the stream and its tone (``ok``, ``warn``, ``alarm``, ``idle``).

    A live stream without data messages for more than ``state.stale_after_s`` gives
    ``"NO DATA FOR N s"`` (heartbeats alone do not count as data).
    """
    h = state.health
    if state.mode == "replay":
        return f"replay · {fmt_count(h.messages)} messages", "info"
    if state.mode != "live":
        return ("not connected" if h.messages == 0 else "not receiving (figures frozen)"), "idle"
    age = state.message_age_s
    data_age = state.data_age_s if math.isfinite(state.data_age_s) else age
    if h.messages == 0:
        return "connected, no message yet", "warn"
    if h.source_state in ("stopping", "stopped"):
        return f"source reports {h.source_state} · last message {fmt_age(age)} ago", "warn"
    if math.isfinite(data_age) and data_age > state.stale_after_s:
        beat = state.heartbeat_age_s
        if math.isfinite(beat) and beat <= state.stale_after_s:
            return f"NO DATA FOR {fmt_age(data_age)} (heartbeats still arriving)", "alarm"
        return f"NO DATA FOR {fmt_age(data_age)}", "alarm"
    return f"receiving · last data {fmt_age(data_age)} ago", "ok"


class HealthPanel(Panel):
    """Counters since the monitor started, the newest rejection reasons and the data age."""

    title = "Stream health"

    verdict = Unicode("", help="One-line state of the stream").tag(sync=True)
    stale = Bool(False, help="True while a live stream is silent too long").tag(sync=True)
    message_age_s = Float(None, allow_none=True, help="Seconds since the last message").tag(
        sync=True
    )
    data_age_s = Float(None, allow_none=True, help="Seconds since the last data message").tag(
        sync=True
    )
    rejected = Int(0, help="Messages rejected so far").tag(sync=True)
    recent_reasons = Int(5, help="How many recent rejections are listed").tag(sync=True)

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.status = Readout(caption="stream", size="large")
        self.counters = w.HTML()
        self.rejections = w.HTML()
        self.recording = w.HTML()
        self.set_body(self.status, self.counters, self.rejections, self.recording)

    def show(self, state: ViewState, recording: str = "") -> None:
        h = state.health
        text, tone = stream_verdict(state)
        age = state.message_age_s
        with self.hold_sync():
            self.verdict = text
            self.stale = tone == "alarm"
            live = state.mode == "live"
            self.message_age_s = age if math.isfinite(age) and live else None
            d_age = state.data_age_s
            self.data_age_s = d_age if math.isfinite(d_age) and live else None
            self.rejected = h.rejected
        with self.status.hold_sync():
            self.status.text = text
            self.status.tone = tone
            beat = state.heartbeat_age_s
            self.status.detail = (
                f"heartbeats {fmt_count(h.heartbeats)}"
                + (f", last {fmt_age(beat)} ago" if math.isfinite(beat) else "")
                + f" · source state {h.source_state or '—'}"
            )
        cells = [
            ("messages", h.messages),
            ("accepted", h.accepted),
            ("rejected", h.rejected),
            ("gaps", h.gaps),
            ("missing", h.missing),
            ("missed at start", h.missed_at_start),
            ("late", h.late),
            ("duplicates", h.duplicates),
            ("restarts", h.restarts),
            ("clock jumps", h.clock_jumps),
        ]
        bad = {"rejected", "gaps", "missing", "duplicates", "restarts", "clock jumps"}
        items = "".join(
            '<div style="display:inline-block;min-width:8.5em;margin:2px 8px">'
            f'<div style="font-size:13px;color:#555">{esc(k)}</div>'
            f'<div style="font-size:24px;font-weight:700;font-family:monospace;'
            f'color:{"#b3261e" if (k in bad and v) else "#222"}">{fmt_count(v)}</div></div>'
            for k, v in cells
        )
        self.counters.value = f"<div>{items}</div>"
        self.rejections.value = self._rejections_html(state)
        self.recording.value = (
            f'<div style="font-size:14px;color:#333">{esc(recording)}</div>' if recording else ""
        )

    def _rejections_html(self, state: ViewState) -> str:
        h = state.health
        if not h.rejected:
            return '<div style="font-size:14px;color:#333">no rejected messages</div>'
        by = ", ".join(f"{esc(r)} × {fmt_count(n)}" for r, n in h.rejections_by_reason)
        rows = []
        for note in reversed(h.recent_rejections[-self.recent_reasons :]):
            ago = state.now_wall - note.received_wall
            when = f"{fmt_age(ago)} ago" if math.isfinite(ago) and state.mode == "live" else ""
            rows.append(
                f"<li><b>{esc(note.reason)}</b> {esc(note.detail[:160])} "
                f'<span style="color:#777">{esc(when)}</span></li>'
            )
        return (
            f'<div style="font-size:14px"><b>rejections by reason:</b> {by}'
            f'<ul style="margin:2px 0 0 0">{"".join(rows)}</ul></div>'
        )
