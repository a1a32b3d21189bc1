"""Replay a recording into a monitor engine, or republish it on a ZeroMQ PUB socket (I/O layer).

:func:`replay_into` feeds every recorded message, accepted and rejected alike, through
:meth:`MonitorEngine.ingest <labwatch.engine.MonitorEngine.ingest>` -- the code path of a live
session -- with the wall-clock time it was received live, and applies the recorded
``"new_run"`` annotations.  Analysis epochs are cut on the source clock, so the snapshots, the
figures and the rejection counts of a replay are those of the live run, at any replay speed.

:func:`republish` sends the recorded frames again from a PUB socket, at the recorded pace
(from the monotonic receive times) scaled by ``speed``, or as fast as possible, so that any
monitor (another ``labwatch watch``, a notebook) can subscribe to a recorded run as if it
were live.

Examples
--------
>>> import os, tempfile
>>> from labwatch.engine import MonitorEngine
>>> from labwatch.recording import RecordWriter
>>> path = os.path.join(tempfile.mkdtemp(), "tiny.lwrec")
>>> with RecordWriter(path, flush_interval_s=0) as w:
...     _ = w.write([b"junk"], received_wall=1.0e9, received_mono=3.0,
...                 rejected_reason="frame_count: expected 3 frames")
>>> result = replay_into(MonitorEngine(), path)
>>> result.messages, result.health.rejected, result.tail.status
(1, 1, 'clean')
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from importlib import resources

import zmq

from labwatch.engine import IngestResult, MonitorEngine
from labwatch.recording import (
    DEFAULT_MAX_RECORD_BYTES,
    DamagedRegion,
    Record,
    RecordingHeader,
    RecordReader,
    TailReport,
)
from labwatch.snapshot import Snapshot, StreamHealth
from labwatch.transport import EndpointError, check_endpoint

__all__ = [
    "NEW_RUN_ANNOTATION",
    "NOT_RECORDED_PREFIX",
    "SPEED_WORDS",
    "ProgressCallback",
    "ReplayInputError",
    "ReplayResult",
    "RepublishResult",
    "check_speed",
    "demo_recording_path",
    "replay_into",
    "republish",
]

#: Annotation text that :class:`labwatch.session.LiveSession` writes when a run is restarted
#: by hand; a replay calls :meth:`MonitorEngine.new_run` at that point.
NEW_RUN_ANNOTATION = "new_run"
#: Start of the annotation a live session writes in place of a message its recorder refused
#: (e.g. larger than ``max_record_bytes``); such a message cannot be replayed.
NOT_RECORDED_PREFIX = "message not recorded"
#: Words accepted for ``speed`` besides positive numbers (``"fast"``: no pacing at all).
SPEED_WORDS = ("fast",)

#: ``progress(bytes_done, bytes_total)``: how far a replay has read into the file.
ProgressCallback = Callable[[int, int], None]

_PROGRESS_EVERY = 64  # records between progress calls (a call per record costs more than ingest)


class ReplayInputError(ValueError):
    """Bad argument to :func:`replay_into` or :func:`republish` (speed, tick, endpoint)."""


def check_speed(speed: float | str) -> float:
    """``speed`` as a positive float; ``"fast"`` and ``math.inf`` mean no pacing.

    Raises
    ------
    ReplayInputError
        Not a positive number nor one of :data:`SPEED_WORDS`; the message quotes the value.
    """
    if isinstance(speed, str):
        if speed in SPEED_WORDS:
            return math.inf
        raise ReplayInputError(
            f"speed {speed!r} is neither a positive number nor one of {SPEED_WORDS}"
        )
    if isinstance(speed, bool):
        raise ReplayInputError(f"speed must be a positive number or 'fast', got {speed!r}")
    try:
        value = float(speed)
    except (TypeError, ValueError):
        raise ReplayInputError(
            f"speed must be a positive number or one of {SPEED_WORDS}, got {speed!r}"
        ) from None
    if not value > 0:  # also rejects nan
        raise ReplayInputError(f"speed must be > 0 (recorded seconds per second), got {speed!r}")
    return value


def demo_recording_path() -> str:
    """Path of the demo recording shipped with labwatch (``labwatch/data/demo_run.lwrec``).

    An invented bench: 24 s of a polarization-entangled source with random settings and a
    few injected faults, made by ``simulators/make_demo_recording.py``.
    """
    return str(resources.files("labwatch").joinpath("data", "demo_run.lwrec"))


def _check_tick(tick_s: float) -> float:
    if not (isinstance(tick_s, (int, float)) and math.isfinite(tick_s) and tick_s > 0):
        raise ReplayInputError(f"tick_s must be a positive number of seconds, got {tick_s!r}")
    return float(tick_s)


@dataclass(frozen=True)
class ReplayResult:
    """What :func:`replay_into` did.

    Attributes
    ----------
    path : str
        The recording.
    header : RecordingHeader
        Its file header (creation time, metadata).
    records : int
        Intact records read (messages and annotations).
    messages : int
        Messages fed to the engine: ``accepted_records + rejected_records``.
    accepted_records, rejected_records : int
        Messages the live monitor had accepted / rejected (as recorded).
    annotations : int
        Annotation records; ``new_runs`` of them were ``"new_run"`` and restarted the run.
    new_runs : int
    not_recorded : int
        Annotations starting with :data:`NOT_RECORDED_PREFIX`: messages the live monitor
        ingested but could not record, so the replay cannot reproduce them.
    verdict_changes : int
        Messages the replay engine judged differently from the live monitor (accepted vs
        rejected).  0 when the replay engine is configured like the live one; other values
        mean different limits or source filter, or a recording made by another version.
    damaged : tuple of DamagedRegion
        Damaged records in the middle of the file (skipped).
    tail : TailReport or None
        How the file ends; None when the replay was stopped before the end.
    completed : bool
        The whole file was replayed (False when a tick callback stopped it).
    snapshots : int
        Snapshots the engine emitted during the replay (final flush included).
    final : Snapshot or None
        The engine's latest snapshot after the final flush.
    health : StreamHealth
        The engine's stream health after the replay.
    recorded_span_s : float
        Monotonic time between the first and the last record, seconds of the recording
        process's clock (0 for fewer than two records).
    elapsed_s : float
        Wall time the replay took, seconds.
    """

    path: str
    header: RecordingHeader
    records: int
    messages: int
    accepted_records: int
    rejected_records: int
    annotations: int
    new_runs: int
    not_recorded: int
    verdict_changes: int
    damaged: tuple[DamagedRegion, ...]
    tail: TailReport | None
    completed: bool
    snapshots: int
    final: Snapshot | None
    health: StreamHealth
    recorded_span_s: float
    elapsed_s: float

    @property
    def speedup(self) -> float:
        """Recorded time per wall second of replay (``inf`` for an instant replay)."""
        if self.elapsed_s <= 0:
            return math.inf
        return self.recorded_span_s / self.elapsed_s


@dataclass(frozen=True)
class RepublishResult:
    """What :func:`republish` did.

    Attributes
    ----------
    path, endpoint : str
        The recording and the endpoint the PUB socket was bound to.
    records : int
        Intact records read.
    sent : int
        Messages sent.
    skipped_rejected : int
        Rejected messages not sent (``include_rejected=False``).
    annotations : int
        Annotation records (never sent: they are not messages).
    damaged : tuple of DamagedRegion
    tail : TailReport or None
        How the file ends; None when stopped before the end.
    completed : bool
    recorded_span_s : float
        Monotonic span of the records, seconds.
    elapsed_s : float
        Wall time from the first to the last message sent, seconds.
    """

    path: str
    endpoint: str
    records: int
    sent: int
    skipped_rejected: int
    annotations: int
    damaged: tuple[DamagedRegion, ...]
    tail: TailReport | None
    completed: bool
    recorded_span_s: float
    elapsed_s: float


class _Pacer:
    """Waits until a record's turn at ``speed`` and fires a tick every ``tick_s`` wall seconds."""

    def __init__(self, speed: float, tick_s: float, tick: Callable[[], bool | None] | None) -> None:
        self.speed = speed
        self.tick_s = tick_s
        self.tick = tick
        self.origin_mono: float | None = None
        self.start = time.monotonic()
        self.next_tick = self.start + tick_s
        self.stopped = False

    def _maybe_tick(self, now: float) -> None:
        if now >= self.next_tick:
            self.next_tick = now + self.tick_s
            if self.tick is not None and self.tick():
                self.stopped = True

    def wait(self, mono: float) -> bool:
        """Sleep until the record stamped ``mono`` is due; False once a tick asked to stop."""
        if self.origin_mono is None:
            self.origin_mono = mono
        if not math.isfinite(self.speed):
            self._maybe_tick(time.monotonic())
            return not self.stopped
        due = self.start + max(mono - self.origin_mono, 0.0) / self.speed
        while True:
            now = time.monotonic()
            self._maybe_tick(now)
            if self.stopped or now >= due:
                break
            time.sleep(max(min(due, self.next_tick) - now, 0.0))
        return not self.stopped


def _iter_with_progress(
    reader: RecordReader, progress: ProgressCallback | None
) -> Iterator[Record]:
    total = os.path.getsize(reader.path)
    for i, rec in enumerate(reader):
        if progress is not None and i % _PROGRESS_EVERY == 0:
            progress(min(rec.offset + rec.length, total), total)
        yield rec
    if progress is not None:
        progress(total, total)


def _live_accepted(result: IngestResult) -> bool:
    # LiveSession records "ignored" (other source) messages as accepted; mirror that here.
    return result.accepted or result.kind == "ignored"


def replay_into(
    engine: MonitorEngine,
    path: str | os.PathLike[str],
    progress: ProgressCallback | None = None,
    *,
    speed: float | str = "fast",
    on_tick: Callable[[Snapshot | None, StreamHealth], bool | None] | None = None,
    tick_s: float = 1.0,
    max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES,
) -> ReplayResult:
    """Feed a recording through ``engine`` exactly as a live session fed it, then flush.

    Parameters
    ----------
    engine : MonitorEngine
        The engine to feed (usually fresh, configured like the live one; its subscribers
        receive every snapshot as during a live run).
    path : str or os.PathLike
        Recording file (``.lwrec``).  A damaged or truncated file is replayed up to its
        last intact record; the damage is reported in the result.
    progress : callable, optional
        ``progress(bytes_done, bytes_total)``, called every few dozen records and at the end.
    speed : float or "fast"
        Recorded seconds per wall second (1: the recorded pace, from the monotonic receive
        times); ``"fast"`` (default) or ``math.inf``: as fast as possible.
    on_tick : callable, optional
        ``on_tick(latest_snapshot, health)`` about every ``tick_s`` wall seconds (the
        signature of :data:`labwatch.session.TickCallback`); return True to stop.
    tick_s : float
        Tick interval, wall seconds.
    max_record_bytes : int
        Records with a larger body are skipped as damaged.

    Returns
    -------
    ReplayResult

    Raises
    ------
    ReplayInputError
        Bad ``speed`` or ``tick_s``.
    labwatch.recording.RecordingFormatError
        The file is not a recording or its header is damaged.
    OSError
        The file cannot be read.

    Notes
    -----
    Accepted and rejected records alike go through :meth:`MonitorEngine.ingest` with the
    recorded ``received_wall``, so rejection counts, reasons and the wall-clock stamps of
    the health figures are those of the live run.  Annotations other than
    :data:`NEW_RUN_ANNOTATION` carry no instruction and are only counted.
    """
    pace = check_speed(speed)
    tick = _check_tick(tick_s)
    started = time.perf_counter()
    counts = dict.fromkeys(
        ("records", "accepted", "rejected", "annotations", "new_runs", "not_recorded"), 0
    )
    changes = 0
    snapshots = 0
    first_mono = last_mono = math.nan

    def ticker() -> bool | None:
        return on_tick(engine.latest, engine.health()) if on_tick is not None else None

    pacer = _Pacer(pace, tick, ticker if on_tick is not None else None)
    with RecordReader(path, max_record_bytes=max_record_bytes) as reader:
        header = reader.header
        for rec in _iter_with_progress(reader, progress):
            if not pacer.wait(rec.received_mono):
                break
            counts["records"] += 1
            if math.isnan(first_mono):
                first_mono = rec.received_mono
            last_mono = rec.received_mono
            if rec.kind == "annotation":
                counts["annotations"] += 1
                if rec.annotation == NEW_RUN_ANNOTATION:
                    counts["new_runs"] += 1
                    snapshots += len(engine.new_run())
                elif rec.annotation and rec.annotation.startswith(NOT_RECORDED_PREFIX):
                    counts["not_recorded"] += 1
                continue
            result = engine.ingest(rec.frames, rec.received_wall)
            snapshots += len(result.snapshots)
            live_ok = rec.kind == "accepted"
            counts["accepted" if live_ok else "rejected"] += 1
            if _live_accepted(result) != live_ok:
                changes += 1
        completed = not pacer.stopped
        tail = reader.tail if completed else None
        damaged = reader.damaged
    snapshots += len(engine.flush())
    span = last_mono - first_mono if counts["records"] > 1 else 0.0
    return ReplayResult(
        path=os.fspath(path),
        header=header,
        records=counts["records"],
        messages=counts["accepted"] + counts["rejected"],
        accepted_records=counts["accepted"],
        rejected_records=counts["rejected"],
        annotations=counts["annotations"],
        new_runs=counts["new_runs"],
        not_recorded=counts["not_recorded"],
        verdict_changes=changes,
        damaged=damaged,
        tail=tail,
        completed=completed,
        snapshots=snapshots,
        final=engine.latest,
        health=engine.health(),
        recorded_span_s=span,
        elapsed_s=time.perf_counter() - started,
    )


def republish(
    path: str | os.PathLike[str],
    endpoint: str,
    speed: float | str = 1.0,
    *,
    include_rejected: bool = False,
    startup_delay_s: float = 0.5,
    drain_s: float = 2.0,
    sndhwm: int = 1_000_000,
    progress: ProgressCallback | None = None,
    on_tick: Callable[[int, int], bool | None] | None = None,
    tick_s: float = 1.0,
    server_keys: object | None = None,
    max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES,
) -> RepublishResult:
    """Send the recorded messages again from a PUB socket bound to ``endpoint``.

    Parameters
    ----------
    path : str or os.PathLike
        Recording file.
    endpoint : str
        Where to bind, e.g. ``"tcp://127.0.0.1:5790"``.
    speed : float or "fast"
        Recorded seconds per wall second (1: the recorded pace); ``"fast"`` or ``math.inf``
        sends as fast as the socket takes them.
    include_rejected : bool
        Also send the messages the live monitor rejected (to test another monitor's
        validation); by default only accepted messages are sent.
    startup_delay_s : float
        Wait after binding before the first message, seconds, so that subscribers that
        connect at once do not miss the start (PUB/SUB drops messages sent before a
        subscription arrives: late joiners lose them).
    drain_s : float
        At the end, how long the socket may take to hand queued messages to subscribers
        before it is closed, seconds.
    sndhwm : int
        Send high-water mark, messages.  A PUB socket silently drops messages for a
        subscriber that is this far behind, which ``"fast"`` can cause with a slow monitor.
    progress : callable, optional
        ``progress(bytes_done, bytes_total)``.
    on_tick : callable, optional
        ``on_tick(sent, records_read)`` about every ``tick_s`` wall seconds; True stops.
    tick_s : float
    server_keys : object, optional
        CurveZMQ server keys (``apply_server(socket)`` and ``stop(context)``, e.g.
        :class:`labwatch.security.ServerKeys`).
    max_record_bytes : int

    Returns
    -------
    RepublishResult

    Raises
    ------
    EndpointError
        The endpoint is malformed or cannot be bound.
    ReplayInputError
        Bad ``speed``, ``tick_s``, ``startup_delay_s`` or ``drain_s``.
    """
    pace = check_speed(speed)
    tick = _check_tick(tick_s)
    for name, value in (("startup_delay_s", startup_delay_s), ("drain_s", drain_s)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
            raise ReplayInputError(f"{name} must be a number of seconds >= 0, got {value!r}")
    check_endpoint(endpoint)
    sent = skipped = annotations = records = 0
    first_mono = last_mono = math.nan
    first_send = last_send = 0.0
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    try:
        pub.setsockopt(zmq.LINGER, 0)
        pub.setsockopt(zmq.SNDHWM, sndhwm)
        if server_keys is not None:
            server_keys.apply_server(pub)  # type: ignore[attr-defined]
        try:
            pub.bind(endpoint)
        except zmq.ZMQError as exc:
            raise EndpointError(f"cannot bind {endpoint!r}: {exc}") from None
        with RecordReader(path, max_record_bytes=max_record_bytes) as reader:
            time.sleep(startup_delay_s)

            def ticker() -> bool | None:
                return on_tick(sent, records) if on_tick is not None else None

            pacer = _Pacer(pace, tick, ticker if on_tick is not None else None)
            for rec in _iter_with_progress(reader, progress):
                if not pacer.wait(rec.received_mono):
                    break
                records += 1
                if math.isnan(first_mono):
                    first_mono = rec.received_mono
                last_mono = rec.received_mono
                if rec.kind == "annotation":
                    annotations += 1
                    continue
                if rec.kind == "rejected" and not include_rejected:
                    skipped += 1
                    continue
                pub.send_multipart(list(rec.frames), copy=False)
                last_send = time.monotonic()
                if sent == 0:
                    first_send = last_send
                sent += 1
            completed = not pacer.stopped
            tail = reader.tail if completed else None
            damaged = reader.damaged
        # Closing with linger > 0 lets queued messages reach the subscribers.
        pub.setsockopt(zmq.LINGER, int(drain_s * 1000))
    finally:
        pub.close()
        if server_keys is not None and hasattr(server_keys, "stop"):
            server_keys.stop(ctx)  # its authenticator socket would keep term() waiting
        ctx.term()
    return RepublishResult(
        path=os.fspath(path),
        endpoint=endpoint,
        records=records,
        sent=sent,
        skipped_rejected=skipped,
        annotations=annotations,
        damaged=damaged,
        tail=tail,
        completed=completed,
        recorded_span_s=last_mono - first_mono if records > 1 else 0.0,
        elapsed_s=last_send - first_send,
    )
