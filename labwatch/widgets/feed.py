"""The data path behind every widget: engine, live session task, replay, history.

A :class:`MonitorFeed` owns one :class:`~labwatch.engine.MonitorEngine` and one
:class:`~labwatch.history.History`.  Frames reach the engine either from a
:class:`~labwatch.session.LiveSession` running as an asyncio task on the kernel's loop
(:meth:`MonitorFeed.start`) or from a recording / a list of frames (:meth:`MonitorFeed.replay`);
both go through ``engine.ingest``, so a replay gives the same snapshots as the live run.

Widgets register a listener ``fn(feed, force)``; it is called about every ``tick_s`` while
live (also when nothing arrives, so "no data for N s" can be shown), after each replayed
message, and with ``force=True`` when a stream or a replay ends.  Listeners throttle their
own redraws.
"""

from __future__ import annotations

import asyncio
import logging
import math
import os
import time
from collections.abc import Callable, Iterable
from dataclasses import replace
from typing import Any

from labwatch.analysis import AnalysisConfig, Analyzer
from labwatch.engine import EngineConfig, IngestResult, MonitorEngine
from labwatch.history import History
from labwatch.session import LiveSession
from labwatch.snapshot import Snapshot, StreamHealth
from labwatch.transport import SocketOptions, check_endpoint

__all__ = ["MODES", "FeedListener", "MonitorFeed"]

log = logging.getLogger(__name__)

#: ``idle``: nothing running; ``live``: a session task runs; ``replay``: a replay is feeding.
MODES = ("idle", "live", "replay")

#: ``fn(feed, force)``: called when there may be something new to show.
FeedListener = Callable[["MonitorFeed", bool], None]


class MonitorFeed:
    """Engine + history + (optionally) a live session task on the running asyncio loop.

    Parameters
    ----------
    endpoint : str, optional
        Publisher endpoint for :meth:`start`.
    config : EngineConfig, optional
    history_capacity : int
        Rows kept per run segment (see :class:`~labwatch.history.History`).
    tick_s : float
        Listener interval while live (s); 0.1 gives at most 10 calls a second.
    options : SocketOptions, optional
    curve : object, optional
        CurveZMQ client keys for the session.

    Attributes
    ----------
    engine : MonitorEngine
    history : History
    latest : Snapshot or None
        The newest snapshot.
    task : asyncio.Task or None
        The live session task (a strong reference is kept here).
    error : str or None
        Why the last live session ended abnormally (or a listener failed).
    """

    def __init__(
        self,
        endpoint: str | None = None,
        config: EngineConfig | None = None,
        history_capacity: int = 1000,
        tick_s: float = 0.1,
        options: SocketOptions | None = None,
        curve: object | None = None,
    ) -> None:
        if not (isinstance(tick_s, (int, float)) and 0.02 <= tick_s <= 5.0):
            raise ValueError(f"tick_s must be between 0.02 and 5 s, got {tick_s!r}")
        self.endpoint = None if endpoint is None else check_endpoint(endpoint)
        self.engine = MonitorEngine(config or EngineConfig())
        self.engine.subscribe(self._on_snapshot)
        self.history = History(history_capacity)
        self.tick_s = float(tick_s)
        self.options = options
        self.curve = curve
        self.latest: Snapshot | None = None
        self.snapshots = 0
        self.session: LiveSession | None = None
        self.task: asyncio.Task | None = None
        self.error: str | None = None
        self.mode = "idle"
        self.replayed = 0
        self.replay_result: Any | None = None
        self._recorder: Any | None = None
        self._listeners: list[FeedListener] = []

    # ------------------------------------------------------------------ listeners
    def add_listener(self, fn: FeedListener) -> None:
        """Call ``fn(feed, force)`` whenever there may be something new to show."""
        self._listeners.append(fn)

    def notify(self, force: bool = False) -> None:
        """Call the listeners now (a failing listener is logged, never stops the stream)."""
        for fn in self._listeners:
            try:
                fn(self, force)
            except Exception as exc:  # a view bug must not stop acquisition monitoring
                self.error = f"display update failed: {type(exc).__name__}: {exc}"
                log.exception("labwatch listener failed")

    def _on_snapshot(self, snap: Snapshot) -> None:
        self.latest = snap
        self.snapshots += 1
        self.history.append(snap)

    def add_snapshot(self, snapshot: Snapshot) -> None:
        """Show a snapshot made elsewhere (another engine, a report) as if it were new."""
        self._on_snapshot(snapshot)
        self.notify(False)

    # ------------------------------------------------------------------ live
    @property
    def running(self) -> bool:
        """True while the live session task runs."""
        return self.task is not None and not self.task.done()

    def start(self, endpoint: str | None = None) -> asyncio.Task:
        """Start receiving on the running asyncio loop (call from a cell or a coroutine).

        Returns the task (also kept in :attr:`task`).  Starting twice returns the running
        task.  Raises RuntimeError when no asyncio loop is running.
        """
        if self.running:
            assert self.task is not None
            return self.task
        if self.mode == "replay":
            raise RuntimeError("a replay is feeding this monitor; wait until it has finished")
        if endpoint is not None:
            self.endpoint = check_endpoint(endpoint)
        if self.endpoint is None:
            raise ValueError("no endpoint: pass one, e.g. 'tcp://127.0.0.1:5780'")
        try:
            loop = asyncio.get_running_loop()
        except RuntimeError:
            raise RuntimeError(
                "start() needs a running asyncio loop: call it from a notebook cell "
                "(the kernel's loop) or from inside a coroutine"
            ) from None
        self.error = None
        self.session = LiveSession(
            self.endpoint,
            self.engine,
            recorder=self._recorder,
            options=self.options,
            curve=self.curve,
        )
        self.task = loop.create_task(self._run(self.session), name=f"labwatch {self.endpoint}")
        self.task.add_done_callback(self._task_done)
        self.mode = "live"
        return self.task

    async def _run(self, session: LiveSession) -> Snapshot | None:
        return await session.run_async(on_tick=self._tick, tick_s=self.tick_s)

    def _tick(self, snapshot: Snapshot | None, health: StreamHealth) -> bool:
        self.notify(False)
        return False

    def _task_done(self, task: asyncio.Task) -> None:
        if self.session is not None:
            self._recorder = self.session.recorder
        if task.cancelled():
            self.error = self.error or "live session cancelled"
        elif task.exception() is not None:
            exc = task.exception()
            self.error = f"live session stopped: {type(exc).__name__}: {exc}"
        if self.mode == "live":
            self.mode = "idle"
        self.notify(True)

    def stop(self) -> None:
        """Ask the live session to finish after its current batch (within ``tick_s``)."""
        if self.session is not None:
            self.session.stop()

    async def wait(self, timeout_s: float | None = None) -> None:
        """Wait until the live session task has ended (after :meth:`stop`)."""
        if self.task is not None and not self.task.done():
            await asyncio.wait_for(asyncio.shield(self.task), timeout_s)

    # ------------------------------------------------------------------ recording
    @property
    def recorder(self) -> Any | None:
        """The recorder messages are teed to (None when not recording)."""
        if self.session is not None and self.running:
            return self.session.recorder
        return self._recorder

    @property
    def recording_error(self) -> str | None:
        """Why recording stopped by itself (disk full, ...), or None."""
        return None if self.session is None else self.session.recording_error

    def set_recorder(self, recorder: Any | None) -> None:
        """Tee received messages to ``recorder`` (``write``/``annotate``), or stop teeing.

        The caller owns the recorder and closes it.
        """
        self._recorder = recorder
        if self.session is not None:
            self.session.recorder = recorder
            self.session.recording_error = None

    # ------------------------------------------------------------------ runs and settings
    def new_run(self) -> None:
        """Start a new run segment: cumulative counts restart, the stream goes on."""
        if self.session is not None and self.running:
            self.session.new_run()
        else:
            self.engine.new_run()
        self.notify(True)

    def check_analysis(self, analysis: AnalysisConfig) -> None:
        """Raise ValueError when ``analysis`` cannot be used for the current scenario."""
        run = self.engine.run
        if run is not None:
            Analyzer(run.scenario, analysis)

    def reconfigure(
        self, *, window_s: float | None = None, analysis: AnalysisConfig | None = None
    ) -> None:
        """Change the rolling window and/or the analysis; a new run segment starts.

        Figures of one segment therefore always come from one configuration (a functional
        or a target chosen after seeing the data must not be tested on that same data).
        Raises ValueError (and changes nothing) for a bad value.
        """
        cfg = self.engine.config
        new = replace(
            cfg,
            window_s=cfg.window_s if window_s is None else window_s,
            analysis=cfg.analysis if analysis is None else analysis,
        )
        self.check_analysis(new.analysis)
        self.engine.config = new
        self._note(
            f"settings changed: window_s={new.window_s:g}, "
            f"functional={getattr(new.analysis.functional, 'name', new.analysis.functional)}, "
            f"target={new.analysis.target}"
        )
        self.new_run()

    def _note(self, text: str) -> None:
        """Annotate the recording (if any) for whoever reads it later; failures are ignored
        here (the session reports recording failures on the next write)."""
        rec = self.recorder
        if rec is None:
            return
        try:
            rec.annotate(text, received_wall=time.time(), received_mono=time.monotonic())
        except OSError:
            pass

    # ------------------------------------------------------------------ direct ingest / replay
    def health(self) -> StreamHealth:
        """Stream health now."""
        return self.engine.health()

    def ingest(self, frames: list[bytes], received_wall: float | None = None) -> IngestResult:
        """Feed one message's frames through the engine (``received_wall`` default: now)."""
        wall = time.time() if received_wall is None else received_wall
        return self.engine.ingest(frames, wall)

    def replay(
        self, source: str | os.PathLike | Iterable[Any], speed: float | str = "fast"
    ) -> Snapshot | None:
        """Feed a recording file or an iterable of messages through the engine, then flush.

        ``source`` is a recording path, replayed by :func:`labwatch.replay.replay_into`
        (``"new_run"`` annotations start new run segments as they did live; the result is
        kept in :attr:`replay_result`), or an iterable whose items are a message's frames,
        ``(frames, received_wall)`` pairs, or recording ``Record`` objects.  ``speed``
        (recordings only): recorded seconds per wall second, or ``"fast"``.  Listeners are
        called as messages go in (they throttle themselves) and once at the end with
        ``force=True``.  Returns the final snapshot.
        """
        if self.running:
            raise RuntimeError("stop the live session before replaying into the same monitor")
        self.mode = "replay"
        try:
            if isinstance(source, (str, os.PathLike)):
                from labwatch.replay import replay_into

                def tick(_snap, _health) -> bool:
                    self.notify(False)
                    return False

                self.replay_result = replay_into(
                    self.engine, source, speed=speed, on_tick=tick, tick_s=self.tick_s
                )
                self.replayed += self.replay_result.messages
            else:
                for item in source:
                    self._replay_item(item)
                self.engine.flush()
        finally:
            self.mode = "idle"
        self.notify(True)
        return self.latest

    def _replay_item(self, item: Any) -> None:
        if hasattr(item, "kind") and hasattr(item, "frames"):
            if item.kind == "annotation":
                if item.annotation == "new_run":
                    self.engine.new_run()
                return
            self.engine.ingest(list(item.frames), item.received_wall)
        elif (
            isinstance(item, tuple)
            and len(item) == 2
            and isinstance(item[1], (int, float))
            and not isinstance(item[0], (bytes, bytearray, memoryview))
        ):
            self.engine.ingest(list(item[0]), float(item[1]))
        else:
            self.engine.ingest(list(item), math.nan)
        self.replayed += 1
        self.notify(False)
