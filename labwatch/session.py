"""A live monitoring session: subscriber -> engine (-> recorder), blocking or on asyncio.

This is the only place where sockets, the engine and a recorder meet.  The same
:class:`~labwatch.engine.MonitorEngine` also serves replays (:mod:`labwatch.replay`).
"""

from __future__ import annotations

import asyncio
import math
import time
from collections.abc import Callable
from typing import Any

from labwatch.engine import IngestResult, MonitorEngine
from labwatch.snapshot import Snapshot, StreamHealth
from labwatch.transport import AsyncSubscriber, LinkState, SocketOptions, Subscriber

__all__ = ["LiveSession", "TickCallback"]

#: Called about once per ``tick_s`` with the latest snapshot (or None) and current health;
#: return True to stop the session.
TickCallback = Callable[[Snapshot | None, StreamHealth], bool | None]


class LiveSession:
    """Feed a ZeroMQ stream into a :class:`MonitorEngine`, optionally teeing to a recorder.

    Parameters
    ----------
    endpoint : str
        Publisher endpoint.
    engine : MonitorEngine
    recorder : object, optional
        Anything with ``write(frames, *, received_wall, received_mono, rejected_reason)`` and
        ``annotate(text, ...)`` (e.g. :class:`labwatch.recording.RecordWriter`).  A failing
        recorder (disk full, ...) is detached with its error kept in ``recording_error``;
        monitoring goes on.  A message the recorder refuses as too large is replaced by an
        annotation saying so (counted in ``not_recorded``).
    options : SocketOptions, optional
    curve : object, optional
        CurveZMQ client keys (``apply_client(socket)``).
    """

    def __init__(
        self,
        endpoint: str,
        engine: MonitorEngine,
        recorder: Any | None = None,
        options: SocketOptions | None = None,
        curve: object | None = None,
    ) -> None:
        self.endpoint = endpoint
        self.engine = engine
        self.recorder = recorder
        self.recording_error: str | None = None
        self.options = options
        self.curve = curve
        self.stopped = False
        self.recorded = 0
        self.not_recorded = 0
        self.link = LinkState()

    # ------------------------------------------------------------------ shared
    def handle(self, frames: list[bytes], wall: float | None = None) -> None:
        """Ingest one received message and record it (accepted or with its rejection).

        ``wall`` is the receive time (``time.time()``, taken now when None).
        """
        if wall is None:
            wall = time.time()
        result = self.engine.ingest(frames, wall)
        if self.recorder is not None:
            self._record(frames, result, wall)

    def handle_many(
        self, batch: list[list[bytes]], wall: float | None = None
    ) -> list[IngestResult]:
        """Ingest messages received together (:meth:`MonitorEngine.ingest_many`), recording
        each as :meth:`handle` does; returns one result per message."""
        if wall is None:
            wall = time.time()
        results = self.engine.ingest_many(batch, wall)
        if self.recorder is not None:
            for frames, result in zip(batch, results):
                if self.recorder is None:  # detached after a failure
                    break
                self._record(frames, result, wall)
        return results

    def _record(self, frames: list[bytes], result: IngestResult, wall: float) -> None:
        reason = (
            None
            if result.accepted or result.kind == "ignored"
            else f"{result.reason}: {result.detail}"
        )
        try:
            self.recorder.write(
                frames,
                received_wall=wall,
                received_mono=time.monotonic(),
                rejected_reason=reason,
            )
            self.recorded += 1
        except OSError as exc:
            self._recorder_failed(exc)
        except ValueError as exc:  # the recorder refuses this message (e.g. too large)
            self.not_recorded += 1
            try:
                self.recorder.annotate(
                    f"message not recorded: {exc}"[:500],
                    received_wall=wall,
                    received_mono=time.monotonic(),
                )
            except OSError as err:
                self._recorder_failed(err)

    def _recorder_failed(self, exc: OSError) -> None:
        self.recording_error = f"recording stopped: {exc}"
        self.recorder = None

    def new_run(self) -> None:
        """Restart the cumulative counts by hand (the recording keeps a marker)."""
        if self.recorder is not None:
            try:
                self.recorder.annotate(
                    "new_run", received_wall=time.time(), received_mono=time.monotonic()
                )
            except OSError as exc:
                self._recorder_failed(exc)
        self.engine.new_run()

    def stop(self) -> None:
        """Ask a running loop to finish after its current batch."""
        self.stopped = True

    # ------------------------------------------------------------------ blocking
    def run_blocking(
        self, duration_s: float = math.inf, on_tick: TickCallback | None = None, tick_s: float = 1.0
    ) -> Snapshot | None:
        """Receive until ``duration_s`` (wall seconds) passed, ``stop()`` or a tick returns True.

        Returns the final snapshot (the engine is flushed at the end).
        """
        sub = Subscriber(self.endpoint, options=self.options, curve=self.curve)
        start = time.monotonic()
        next_tick = start + tick_s
        try:
            while not self.stopped:
                now = time.monotonic()
                if now - start >= duration_s:
                    break
                wait = min(next_tick, start + duration_s) - now
                batch = sub.recv_batch(max(wait, 0.0))
                if batch:
                    self.handle_many(batch, time.time())
                self.link = sub.link
                if time.monotonic() >= next_tick:
                    next_tick += tick_s
                    if on_tick is not None and on_tick(self.engine.latest, self.engine.health()):
                        break
        finally:
            sub.close()
        self.engine.flush()
        return self.engine.latest

    # ------------------------------------------------------------------ asyncio
    async def run_async(
        self, on_tick: TickCallback | None = None, tick_s: float = 0.1, duration_s: float = math.inf
    ) -> Snapshot | None:
        """The same loop for an asyncio event loop (e.g. the Jupyter kernel's).

        Never blocks the loop for longer than one drained batch.
        """
        sub = AsyncSubscriber(self.endpoint, options=self.options, curve=self.curve)
        start = time.monotonic()
        next_tick = start + tick_s
        try:
            while not self.stopped:
                now = time.monotonic()
                if now - start >= duration_s:
                    break
                batch = await sub.recv_batch(max(min(next_tick, start + duration_s) - now, 0.0))
                if batch:
                    self.handle_many(batch, time.time())
                self.link = sub.link
                if time.monotonic() >= next_tick:
                    next_tick = time.monotonic() + tick_s
                    if on_tick is not None and on_tick(self.engine.latest, self.engine.health()):
                        break
                await asyncio.sleep(0)
        finally:
            sub.close()
        self.engine.flush()
        return self.engine.latest
