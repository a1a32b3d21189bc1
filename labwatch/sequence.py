"""Sequence bookkeeping: gaps, duplicates, reordering and source restarts.

Each source numbers its data messages 0, 1, 2, ... within a run; a new run id means the
source restarted (numbers start again).  The tracker classifies every message so that loss is
always visible and nothing is counted twice.  Pure logic, no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["SEQUENCE_VERDICTS", "SequenceCounters", "SequenceTracker"]

#: ``first``: first message of a run seen; ``in_order``: the expected number; ``gap``: numbers
#: were skipped (they are now missing); ``late``: a missing number arrived out of order (it is
#: accepted); ``duplicate``: seen before (reject it); ``stale_run``: from a run the source
#: already left (reject it).
SEQUENCE_VERDICTS = ("first", "in_order", "gap", "late", "duplicate", "stale_run")


@dataclass
class SequenceCounters:
    """Running totals over all sources (mutable; copied into snapshots).

    Attributes
    ----------
    gaps : int
        Times a jump forward in sequence numbers was seen.
    missing : int
        Messages currently missing (skipped and not arrived later).
    missed_at_start : int
        Messages a run had sent before we saw its first one (late join / slow joiner).
    late : int
        Messages that arrived out of order and filled a gap.
    duplicates : int
        Messages seen twice (rejected).
    restarts : int
        Times a known source came back with a new run id.
    """

    gaps: int = 0
    missing: int = 0
    missed_at_start: int = 0
    late: int = 0
    duplicates: int = 0
    restarts: int = 0


@dataclass
class _RunState:
    run: str
    expected: int
    start: int = 0  # first sequence number seen of the run
    missing: set[int] = field(default_factory=set)
    seen_before_start: set[int] = field(default_factory=set)


class SequenceTracker:
    """Classify ``(source, run, seq)`` triples.

    Parameters
    ----------
    reorder_window : int
        How many missing numbers per run are remembered so that a late arrival can be told from
        a duplicate; older holes are written off as lost.
    """

    def __init__(self, reorder_window: int = 4096) -> None:
        self.reorder_window = int(reorder_window)
        self.counters = SequenceCounters()
        self._runs: dict[str, _RunState] = {}
        self._old_runs: dict[str, dict[str, None]] = {}

    def current_run(self, source: str) -> str | None:
        """The run id currently tracked for ``source``."""
        state = self._runs.get(source)
        return None if state is None else state.run

    def next_in_order(self, source: str, run: str) -> int | None:
        """The sequence number that would be ``in_order`` for ``(source, run)`` now, or None
        when ``run`` is not the run tracked for ``source``."""
        state = self._runs.get(source)
        if state is None or state.run != run:
            return None
        return state.expected

    def advance(self, source: str, run: str, n: int) -> None:
        """Take ``n`` messages numbered from :meth:`next_in_order` on: the same as ``n``
        :meth:`check` calls that each return ``in_order``."""
        state = self._runs[source]
        assert state.run == run and n >= 0
        state.expected += n

    def check(self, source: str, run: str, seq: int) -> str:
        """Classify one data message and update the counters; returns a verdict string."""
        c = self.counters
        state = self._runs.get(source)
        if state is None or state.run != run:
            if state is not None:
                old = self._old_runs.setdefault(source, {})
                if run in old:
                    return "stale_run"
                old[state.run] = None  # insertion-ordered: forget the oldest (replay = live)
                if len(old) > 64:
                    del old[next(iter(old))]
                c.restarts += 1
                c.missing -= len(state.missing)  # holes of the old run: now written off
            self._runs[source] = _RunState(run=run, expected=seq + 1, start=seq)
            c.missed_at_start += seq
            return "first"
        if seq == state.expected:
            state.expected += 1
            return "in_order"
        if seq > state.expected:
            skipped = range(state.expected, seq)
            c.gaps += 1
            c.missing += len(skipped)
            state.missing.update(skipped[-self.reorder_window :])
            if len(state.missing) > self.reorder_window:
                for s in sorted(state.missing)[: len(state.missing) - self.reorder_window]:
                    state.missing.discard(s)
            state.expected = seq + 1
            return "gap"
        if seq in state.missing:
            state.missing.discard(seq)
            c.missing -= 1
            c.late += 1
            return "late"
        if (
            seq < state.start
            and state.start - seq <= self.reorder_window
            and seq not in state.seen_before_start
        ):
            # sent before the first message we saw but delivered after it (reordered at the
            # start): it was counted as missed at start, not a duplicate
            state.seen_before_start.add(seq)
            c.missed_at_start -= 1
            c.late += 1
            return "late"
        c.duplicates += 1
        return "duplicate"

    def unseen_after_last(self, source: str, run: str, last_seq: int) -> int:
        """From a heartbeat: messages up to ``last_seq`` sent after the newest one we saw.

        Gaps already counted are not included: these are losses no later message revealed
        yet (e.g. dropped trailing messages before a final ``stopped`` status).
        """
        state = self._runs.get(source)
        if state is None or state.run != run:
            return 0
        return max(0, last_seq + 1 - state.expected)

    def note_last_sent(self, source: str, run: str, last_seq: int) -> int:
        """From a heartbeat: how many messages up to ``last_seq`` we have not seen yet."""
        state = self._runs.get(source)
        if state is None or state.run != run:
            return 0
        return max(0, last_seq + 1 - state.expected) + len(state.missing)
