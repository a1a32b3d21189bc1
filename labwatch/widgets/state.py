"""What a panel is given to draw: the latest snapshot, the history and the health now."""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from labwatch.history import History
from labwatch.snapshot import Snapshot, StreamHealth

__all__ = ["SAFETY_CAUTION", "ViewState", "extra", "functional_info", "view_state"]

#: Shown wherever the UI sits next to lasers and detectors.
SAFETY_CAUTION = (
    "Caution: follow your lab's laser and detector safety rules. labwatch only reads counts; "
    "it never replaces an interlock."
)


@dataclass(frozen=True)
class ViewState:
    """Everything a panel may read for one redraw.

    Attributes
    ----------
    snapshot : Snapshot or None
        The newest snapshot (None before the first analysis epoch).
    history : History
        Series of the current run segment.
    health : StreamHealth
        Stream health now (fresher than ``snapshot.health``).
    now_wall : float
        Wall clock of this redraw (s, Unix time).
    mode : str
        ``"idle"``, ``"live"`` or ``"replay"``.
    data_age_s : float
        Seconds since the last accepted *data* message (heartbeats do not count); ``nan``
        when unknown.
    stale_after_s : float
        A live stream silent for longer than this is flagged.
    target_text : str
        The confidence target as typed (for drawing its guide line).
    """

    snapshot: Snapshot | None
    history: History
    health: StreamHealth
    now_wall: float
    mode: str
    stale_after_s: float = 3.0
    target_text: str = ""
    data_age_s: float = math.nan

    @property
    def message_age_s(self) -> float:
        """Seconds since the last message arrived (``nan`` if none or not live)."""
        last = self.health.last_message_wall
        if last is None or not math.isfinite(last):
            return math.nan
        return self.now_wall - last

    @property
    def heartbeat_age_s(self) -> float:
        """Seconds since the last heartbeat (``nan`` if none)."""
        last = self.health.last_heartbeat_wall
        if last is None or not math.isfinite(last):
            return math.nan
        return self.now_wall - last


def view_state(feed, stale_after_s: float = 3.0, target_text: str = "") -> ViewState:
    """The :class:`ViewState` of a :class:`~labwatch.widgets.feed.MonitorFeed` now."""
    now = time.time()
    data_age = feed.engine.data_silence_s(now)
    return ViewState(
        snapshot=feed.latest,
        history=feed.history,
        health=feed.health(),
        now_wall=now,
        mode=feed.mode,
        stale_after_s=stale_after_s,
        target_text=target_text,
        data_age_s=math.nan if data_age is None else data_age,
    )


def extra(snapshot: Snapshot | None, key: str) -> Mapping[str, Any]:
    """``snapshot.extras[key]`` when it is a mapping, else an empty dict."""
    if snapshot is None:
        return {}
    v = snapshot.extras.get(key)
    return v if isinstance(v, Mapping) else {}


def functional_info(snapshot: Snapshot | None) -> tuple[str, float | None, float | None]:
    """Name, local bound and quantum bound of the snapshot's functional (None when unknown)."""
    if snapshot is None:
        return "", None, None
    info = extra(snapshot, "functional")
    name = str(info.get("name") or snapshot.functional or "")
    local = info.get("local_bound")
    if local is None:
        for b in (snapshot.bell, snapshot.bell_window):
            if b is not None:
                local = b.local_bound
                break
    return name, _as_float(local), _as_float(info.get("quantum_bound"))


def _as_float(v: object) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        return None
    return float(v)
