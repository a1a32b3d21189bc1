"""The feed-driving methods shared by the widgets that own a :class:`MonitorFeed`."""

from __future__ import annotations

import os
from collections.abc import Iterable
from typing import Any

from labwatch.engine import IngestResult
from labwatch.snapshot import Snapshot

__all__ = ["FeedView"]


class FeedView:
    """Mixin for a widget with a ``feed`` (MonitorFeed), ``_on_feed(feed, force)`` and
    ``redraw()``: hand-fed messages, replays and the end of a stream go through the feed."""

    feed: Any

    async def wait(self, timeout_s: float | None = None) -> None:
        """Wait until the live task has ended (after ``stop()``)."""
        await self.feed.wait(timeout_s)

    def ingest(self, frames: list[bytes], received_wall: float | None = None) -> IngestResult:
        """Feed one message's frames (as received) through the engine."""
        res = self.feed.ingest(frames, received_wall)
        self._on_feed(self.feed, False)  # type: ignore[attr-defined]
        return res

    def replay(self, source: str | os.PathLike | Iterable[Any]) -> Snapshot | None:
        """Feed a recording (path) or a list of messages through the engine; see MonitorFeed."""
        return self.feed.replay(source)

    def flush(self) -> None:
        """Close the current analysis epoch and redraw (end of a hand-fed stream)."""
        self.feed.engine.flush()
        self.redraw()  # type: ignore[attr-defined]
