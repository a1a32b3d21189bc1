"""The monitor engine: frames in, snapshots out.  One code path for live streams and replay.

:class:`MonitorEngine` is pure (no sockets, no threads, no clocks of its own): the transport or
the replay reader hands it each message's frames with the wall-clock time it was received.
Analysis epochs are cut on the *source* clock (every ``epoch_s`` seconds of ``t_stop``), so the
same recorded messages always give the same snapshots, however fast they are replayed.
"""

from __future__ import annotations

import math
from collections import Counter, deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from labwatch.accumulate import RunAccumulator
from labwatch.analysis import AnalysisConfig, Analyzer
from labwatch.hist_block import HistBlock, HistSignature, decode_hist_block, hist_signature
from labwatch.protocol import (
    DEFAULT_LIMITS,
    CountBatch,
    Limits,
    MessageRejected,
    SourceStatus,
    parse_message,
)
from labwatch.sequence import SequenceTracker
from labwatch.snapshot import RejectionNote, Snapshot, StreamHealth

__all__ = ["EngineConfig", "IngestResult", "MonitorEngine"]


@dataclass(frozen=True)
class EngineConfig:
    """Settings of a :class:`MonitorEngine`.

    Attributes
    ----------
    window_s : float
        Rolling-window length, seconds of source clock.
    epoch_s : float
        Analysis interval, seconds of source clock (figures are recomputed once per epoch).
    analysis : AnalysisConfig
    source : str or None
        Follow only this source id; None follows the first source seen.
    recent_rejections : int
        How many recent rejections are kept with their reasons.
    limits : Limits
        Message size caps.
    """

    window_s: float = 30.0
    epoch_s: float = 1.0
    analysis: AnalysisConfig = field(default_factory=AnalysisConfig)
    source: str | None = None
    recent_rejections: int = 20
    limits: Limits = DEFAULT_LIMITS

    def __post_init__(self) -> None:
        for name in ("window_s", "epoch_s"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a positive number of seconds, got {v!r}")


@dataclass(frozen=True)
class IngestResult:
    """Outcome of one :meth:`MonitorEngine.ingest` call.

    ``accepted`` is True for data and status messages that were used; ``reason``/``detail``
    explain a rejection; ``snapshots`` are the snapshots this message completed (usually
    none, one when an epoch closed, two when a run ended and the next began).
    """

    accepted: bool
    kind: str
    reason: str = ""
    detail: str = ""
    snapshots: tuple[Snapshot, ...] = ()


# Serial hist messages of one (source, run) in a row before the lane is rebuilt (then doubling)
_LANE_RETRY = 64
_LANE_RETRY_MAX = 1 << 16
# Longest pause (messages) between lane attempts that keep failing
_LANE_PAUSE_MAX = 256
# Shorter blocks go one message at a time (slow senders, streams broken up by other traffic)
_MIN_BLOCK = 8
# Messages decoded per lane attempt: from _SPAN_MIN, doubling while blocks take them all
_SPAN_MIN = 16
_SPAN_MAX = 4096

# Shared results of the common case (accepted, no snapshot): IngestResult is frozen.
_ACCEPTED = {kind: IngestResult(True, kind) for kind in ("hist", "events")}


class MonitorEngine:
    """Validate, sequence-check, accumulate and analyse a coincidence stream.

    Parameters
    ----------
    config : EngineConfig
    on_snapshot : callable, optional
        Called with every new :class:`Snapshot` (from inside :meth:`ingest`).
    """

    def __init__(
        self,
        config: EngineConfig | None = None,
        on_snapshot: Callable[[Snapshot], None] | None = None,
    ) -> None:
        self.config = config or EngineConfig()
        self._callbacks: list[Callable[[Snapshot], None]] = []
        self._target_callbacks: list[Callable[[Snapshot], None]] = []
        self.callback_errors = 0
        self.last_callback_error: str | None = None
        if on_snapshot is not None:
            self._callbacks.append(on_snapshot)
        self.tracker = SequenceTracker()
        self.messages = 0
        self.accepted = 0
        self.rejected = 0
        self.ignored_other_source = 0
        self.heartbeats = 0
        self.reasons: Counter[str] = Counter()
        self.recent: deque[RejectionNote] = deque(maxlen=self.config.recent_rejections)
        self.source_state: str | None = None
        self.last_message_wall: float | None = None
        self.last_data_wall: float | None = None
        self.last_heartbeat_wall: float | None = None
        self.last_status: SourceStatus | None = None
        #: From the latest status of the followed run: data messages the source says it sent
        #: after the newest one received (losses that no later message has revealed yet).
        self.unseen_at_last_status = 0
        self.source: str | None = self.config.source
        self.run: RunAccumulator | None = None
        self.analyzer: Analyzer | None = None
        self.latest: Snapshot | None = None
        self.epoch = 0
        self.runs_seen = 0
        self.closed_clock_jumps = 0
        # run counts at the last epoch close: an epoch's counts are run.counts minus this
        self._epoch_base: np.ndarray | None = None
        self._untested: np.ndarray | None = None
        self.analysis_errors = 0
        self.last_analysis_error: str | None = None
        self._next_epoch_t = math.inf
        # the fast lane for runs of near-identical hist messages (see ingest_many)
        self._lane: HistSignature | None = None
        self._lane_key: tuple[str, str] | None = None  # (source, run) of the last build
        self._lane_misses = 0
        self._lane_retry = _LANE_RETRY
        self._lane_span = _SPAN_MIN  # messages decoded at most per lane attempt
        self._lane_skip = 0  # messages to take one at a time before the next lane attempt
        self._lane_pause = 0
        self._last_batch: CountBatch | None = None

    # ------------------------------------------------------------------ subscriptions
    def subscribe(self, callback: Callable[[Snapshot], None]) -> None:
        """Call ``callback(snapshot)`` for every new snapshot."""
        self._callbacks.append(callback)

    def on_target(self, callback: Callable[[Snapshot], None]) -> None:
        """Call ``callback(snapshot)`` once, with the snapshot at which the target is first met.

        The target is :attr:`AnalysisConfig.target`; its decision is in
        ``snapshot.extras["target"]``.
        """
        self._target_callbacks.append(callback)

    # ------------------------------------------------------------------ ingest
    def ingest(self, frames: Sequence[bytes], received_wall: float = math.nan) -> IngestResult:
        """Process one message as received; never raises for bad input."""
        self.messages += 1
        self.last_message_wall = received_wall
        try:
            msg = parse_message(frames, self.config.limits)
        except MessageRejected as exc:
            return self._reject(exc.reason, exc.detail, received_wall)
        except Exception as exc:  # a parser bug must not stop the monitor; count it visibly
            return self._reject(
                "header_field", f"unexpected {type(exc).__name__}: {exc}"[:200], received_wall
            )
        if self.source is None:
            self.source = msg.source
        if msg.source != self.source:
            self.ignored_other_source += 1
            return IngestResult(
                False, "ignored", "other_source", f"source {msg.source!r} is not followed"
            )
        if isinstance(msg, SourceStatus):
            self.heartbeats += 1
            self.accepted += 1
            self.source_state = msg.state
            self.last_heartbeat_wall = received_wall
            self.last_status = msg
            self.unseen_at_last_status = self.tracker.unseen_after_last(
                msg.source, msg.run, msg.last_seq
            )
            return IngestResult(True, "status")
        return self._ingest_batch(msg, received_wall)

    def ingest_many(
        self, messages: Sequence[Sequence[bytes]], received_wall: float = math.nan
    ) -> list[IngestResult]:
        """Process messages received together; the same as :meth:`ingest` on each in turn.

        Returns one :class:`IngestResult` per message.  Runs of near-identical histogram
        messages of the followed run (consecutive sequence numbers, no clock jump) are decoded
        and folded in as blocks (:mod:`labwatch.hist_block`), which is several times cheaper
        per message; the counts, figures, snapshots and health are those of one-at-a-time
        ingest, bit for bit.
        """
        results: list[IngestResult] = []
        n = len(messages)
        i = 0
        while i < n:
            lane = self._lane
            if lane is not None:
                if self._lane_skip:
                    self._lane_skip -= 1
                else:
                    used = self._ingest_lane(lane, messages, i, received_wall, results)
                    if used >= _MIN_BLOCK:
                        self._lane_pause = 0
                    else:  # attempts that keep (nearly) failing back off
                        self._lane_skip = self._lane_pause
                        self._lane_pause = min(max(1, 2 * self._lane_pause), _LANE_PAUSE_MAX)
                    if used:
                        i += used
                        continue
            frames = messages[i]
            self._last_batch = None
            result = self.ingest(frames, received_wall)
            results.append(result)
            i += 1
            batch = self._last_batch
            if batch is not None and batch.kind == "hist":
                self._open_lane(frames, batch)
        return results

    def _open_lane(self, frames: Sequence[bytes], batch: CountBatch) -> None:
        """After an accepted hist message the lane did not take: (re)build the lane from it.

        A build costs ~0.2 ms (more for long headers), a message on the full path ~20 us,
        so builds are rationed per (source, run): a new run earns its lane with
        ``_MIN_BLOCK`` accepted messages; after that, a lane that no longer fits (or none
        could be built) is tried again after ``_lane_retry`` such messages in a row,
        doubling each time.  A publisher changing run ids or header forms all the time thus
        keeps to the full path instead of paying for builds.
        """
        key = (batch.source, batch.run)
        if key != self._lane_key:
            self._lane_key = key
            self._lane = None  # the old run's lane
            self._lane_misses = 0
            self._lane_retry = _MIN_BLOCK
        self._lane_misses += 1
        if self._lane_misses < self._lane_retry:
            return
        self._lane_misses = 0
        self._lane_retry = min(max(_LANE_RETRY, 2 * self._lane_retry), _LANE_RETRY_MAX)
        self._lane_skip = self._lane_pause = 0
        try:
            self._lane = hist_signature(frames, batch, self.config.limits)
        except Exception:  # noqa: BLE001 - the lane is only a shortcut: stay on the full path
            self._lane = None

    def _ingest_lane(
        self,
        lane: HistSignature,
        messages: Sequence[Sequence[bytes]],
        start: int,
        wall: float,
        results: list[IngestResult],
    ) -> int:
        """Ingest the block of ``lane`` messages at ``messages[start:]``; how many it took."""
        run = self.run
        if (
            run is None
            or lane.source != self.source
            or run.run != lane.run
            or (run.scenario is not lane.scenario and run.scenario != lane.scenario)
        ):
            return 0
        expected = self.tracker.next_in_order(lane.source, lane.run)
        if expected is None:
            return 0
        if lane.limits is not self.config.limits and lane.limits != self.config.limits:
            # the caps were changed: the lane (which checks its own) must be rebuilt
            self._lane = None
            return 0
        # a few messages cost less one at a time than a block's numpy calls; at most
        # _lane_span are decoded, so what a block does not take (a clock jump, a bad count
        # found by the vector checks) costs little: the span doubles while blocks use it all
        span = self._lane_span
        block = decode_hist_block(messages, start, lane, expected, _MIN_BLOCK, span)
        if block is None:
            self._lane_span = _SPAN_MIN
            return 0
        used = self._ingest_block(block, run.steady_prefix(block), wall, results)
        if used < block.size:
            self._lane_span = _SPAN_MIN
        elif block.size == span:
            self._lane_span = min(2 * span, _SPAN_MAX)
        if used:
            self._lane_misses = 0
            self._lane_retry = _LANE_RETRY
        return used

    def _ingest_block(
        self, block: HistBlock, n: int, wall: float, results: list[IngestResult]
    ) -> int:
        """Take the first ``n`` messages of ``block`` as :meth:`_ingest_batch` would, one
        epoch at a time; returns how many were taken.

        Snapshot callbacks run inside an epoch close and may change the engine (a new run
        segment, another configuration or source, messages of their own): the block then
        stops and the rest takes the ordinary way.
        """
        run = self.run
        assert run is not None
        t_stop = block.t_stop
        accepted = _ACCEPTED["hist"]
        a = 0
        while a < n:
            # the epoch closes after the first message reaching the next epoch time
            b = a
            next_t = self._next_epoch_t
            while b < n and t_stop[b] < next_t:
                b += 1
            closes = b < n
            if closes:
                b += 1
            run.add_block(block, a, b)
            self.tracker.advance(block.signature.source, block.signature.run, b - a)
            self.messages += b - a
            self.accepted += b - a
            self.last_message_wall = wall
            self.last_data_wall = wall
            if not closes:
                results.extend([accepted] * (b - a))
                return b
            results.extend([accepted] * (b - a - 1))
            before = self._lane_state()
            snaps = self._close_epoch()
            epoch_s = self.config.epoch_s
            k = math.floor((t_stop[b - 1] - self._epoch_origin) / epoch_s) + 1
            self._next_epoch_t = self._epoch_origin + k * epoch_s
            results.append(IngestResult(True, "hist", snapshots=snaps) if snaps else accepted)
            a = b
            if self._lane_state() != before:
                break  # a callback changed the engine (or fed it messages itself)
        return a

    def _lane_state(self) -> tuple:
        """What a snapshot callback could change that the rest of a block relies on."""
        # the objects themselves (compared by identity, or by value for the config)
        return (
            self.messages, self.run, self.tracker, self.source, self.config, self._lane,
            self.runs_seen,
        )  # fmt: skip

    def _reject(self, reason: str, detail: str, wall: float) -> IngestResult:
        self.rejected += 1
        self.reasons[reason] += 1
        self.recent.append(RejectionNote(wall, reason, detail))
        return IngestResult(False, "rejected", reason, detail)

    def _ingest_batch(self, batch: CountBatch, wall: float) -> IngestResult:
        snaps: list[Snapshot] = []
        known_run = self.tracker.current_run(batch.source)
        if (
            self.run is not None
            and known_run == batch.run
            and batch.scenario is not self.run.scenario
            and batch.scenario != self.run.scenario
        ):
            return self._reject(
                "scenario_change",
                f"run {batch.run!r} declared {self.run.scenario.shape}, message has {batch.scenario.shape}",
                wall,
            )
        if (
            batch.random_settings
            and self.run is not None
            and known_run == batch.run
            and self.run.random_settings
        ):
            q_run, q_new = self.run.setting_probabilities, batch.setting_probabilities
            if (q_run is None) != (q_new is None) or (
                q_run is not None and q_new is not None and not np.array_equal(q_run, q_new)
            ):
                # the stopping-safe test relies on one known q per run: a change needs a new run
                return self._reject(
                    "settings_change",
                    f"run {batch.run!r} changed its declared setting probabilities",
                    wall,
                )
        verdict = self.tracker.check(batch.source, batch.run, batch.seq)
        if verdict == "duplicate":
            return self._reject(
                "duplicate", f"seq {batch.seq} of run {batch.run!r} seen before", wall
            )
        if verdict == "stale_run":
            return self._reject("stale_run", f"run {batch.run!r} already ended", wall)
        if verdict == "first":
            if self.run is not None:
                snaps.extend(self._close_epoch())
            self._start_run(batch.source, batch.run, batch.scenario, batch.t_start)
        assert self.run is not None and self._epoch_base is not None
        jumps = self.run.clock_jumps
        late = verdict == "late"
        self.run.add(batch, late=late)
        if late and self._untested is not None:
            # trials that arrive after later ones were already tested are left out of the
            # stopping-safe test (its bets must depend on earlier trials only)
            self._untested += batch.counts
        self.accepted += 1
        self.last_data_wall = wall
        self._last_batch = batch
        if self.run.clock_jumps != jumps:
            # the source clock jumped: close the epoch so far and cut epochs from the new time
            # (a backward jump would otherwise hold back every snapshot until it caught up)
            snaps.extend(self._close_epoch())
            self._epoch_origin = batch.t_start
            self._next_epoch_t = batch.t_start + self.config.epoch_s
        if batch.t_stop >= self._next_epoch_t:
            snaps.extend(self._close_epoch())
            k = math.floor((batch.t_stop - self._epoch_origin) / self.config.epoch_s) + 1
            self._next_epoch_t = self._epoch_origin + k * self.config.epoch_s
        if not snaps:
            return _ACCEPTED.get(batch.kind) or IngestResult(True, batch.kind)
        return IngestResult(True, batch.kind, snapshots=tuple(snaps))

    def _start_run(self, source: str, run: str, scenario, t0: float) -> None:
        if self.run is not None:
            self.closed_clock_jumps += self.run.clock_jumps
        self.run = RunAccumulator(
            source, run, scenario, self.config.window_s, t0, index=self.runs_seen
        )
        self.runs_seen += 1
        self.analyzer = Analyzer(scenario, self.config.analysis)
        self._epoch_base = np.zeros(scenario.shape, dtype=np.int64)
        self._untested = np.zeros(scenario.shape, dtype=np.int64)
        self._epoch_origin = t0
        self._next_epoch_t = t0 + self.config.epoch_s

    def new_run(self) -> tuple[Snapshot, ...]:
        """Start a new run segment by hand: cumulative counts restart, the stream goes on."""
        if self.run is None:
            return ()
        snaps = self._close_epoch()
        old = self.run
        t0 = old.t_last if old.t_last is not None else old.started_at
        self._start_run(old.source, old.run, old.scenario, t0)
        return snaps

    def flush(self) -> tuple[Snapshot, ...]:
        """Close the current epoch now (end of stream or of a replay)."""
        return self._close_epoch()

    # ------------------------------------------------------------------ watchdog
    def silence_s(self, now: float) -> float | None:
        """Seconds since the last message of any kind, on the caller's wall clock ``now``.

        None before the first message.  The engine keeps no clock: ``now`` must be on the same
        clock as the ``received_wall`` values given to :meth:`ingest` (``time.time()`` live).
        """
        last = self.last_message_wall
        if last is None or not math.isfinite(last):
            return None
        return max(0.0, now - last)

    def data_silence_s(self, now: float) -> float | None:
        """Seconds since the last accepted data message (heartbeats do not count), or None."""
        last = self.last_data_wall
        if last is None or not math.isfinite(last):
            return None
        return max(0.0, now - last)

    # ------------------------------------------------------------------ snapshots
    def health(self) -> StreamHealth:
        """Current stream health (cheap; callable at any time)."""
        c = self.tracker.counters
        jumps = self.closed_clock_jumps + (self.run.clock_jumps if self.run is not None else 0)
        return StreamHealth(
            messages=self.messages,
            accepted=self.accepted,
            rejected=self.rejected,
            rejections_by_reason=tuple(sorted(self.reasons.items())),
            recent_rejections=tuple(self.recent),
            gaps=c.gaps,
            missing=c.missing,
            missed_at_start=c.missed_at_start,
            late=c.late,
            duplicates=c.duplicates,
            restarts=c.restarts,
            clock_jumps=jumps,
            heartbeats=self.heartbeats,
            source_state=self.source_state,
            last_message_wall=self.last_message_wall,
            last_heartbeat_wall=self.last_heartbeat_wall,
        )

    def _close_epoch(self) -> tuple[Snapshot, ...]:
        run, analyzer = self.run, self.analyzer
        if run is None or analyzer is None or self._epoch_base is None or run.messages == 0:
            return ()
        counts = run.counts.copy()
        epoch_counts = counts - self._epoch_base
        if (
            not epoch_counts.any()
            and self.latest is not None
            and self.latest.run == run.run
            and self.latest.run_index == run.index
        ):
            return ()
        untested = self._untested
        try:
            figs = analyzer.analyze(run, epoch_counts, untested=untested)
        except Exception as exc:  # noqa: BLE001 - an analysis bug must not stop the monitor
            self.analysis_errors += 1
            self.last_analysis_error = f"{type(exc).__name__}: {exc}"[:300]
            self._epoch_base = counts
            return ()
        if untested is not None:
            untested[:] = 0
        evidence = figs.extras.get("evidence")
        if isinstance(evidence, dict):
            c = self.tracker.counters
            evidence["messages_lost"] = c.missing
            if c.missing:
                evidence["lost_note"] = (
                    f"{c.missing} messages lost: the p-value covers the trials received and "
                    "stays valid only if losses do not depend on the outcomes"
                )
        counts.setflags(write=False)
        window = run.window.total.copy()
        window.setflags(write=False)
        snap = Snapshot(
            epoch=self.epoch,
            source=run.source,
            run=run.run,
            run_index=run.index,
            scenario=run.scenario,
            t_start=run.t_first if run.t_first is not None else math.nan,
            t_stop=run.t_last if run.t_last is not None else math.nan,
            window_s=self.config.window_s,
            counts=counts,
            window_counts=window,
            trials=run.trials,
            window_trials=int(window.sum()),
            live_time_s=run.live_time_s,
            random_settings=run.random_settings and not run.block_settings,
            functional=figs.functional,
            bell=figs.bell,
            bell_window=figs.bell_window,
            correlators=figs.correlators,
            correlator_errors=figs.correlator_errors,
            contrast=figs.contrast,
            rates=figs.rates,
            figures=figs.figures,
            health=self.health(),
            extras=figs.extras,
        )
        self.epoch += 1
        self._epoch_base = counts
        self.latest = snap
        for cb in self._callbacks:
            self._call(cb, snap)
        target = snap.extras.get("target")
        if isinstance(target, dict) and target.get("fired_now"):
            for cb in self._target_callbacks:
                self._call(cb, snap)
        return (snap,)

    def _call(self, cb: Callable[[Snapshot], None], snap: Snapshot) -> None:
        # a failing view or user callback must not stop the monitor; it is counted and kept
        try:
            cb(snap)
        except Exception as exc:  # noqa: BLE001
            self.callback_errors += 1
            self.last_callback_error = f"{type(exc).__name__}: {exc}"[:300]
