"""Engine: sequence bookkeeping, run restarts, epochs, rolling window, no double counting."""

from __future__ import annotations

import numpy as np

from labwatch.accumulate import RollingCounts
from labwatch.analysis import AnalysisConfig
from labwatch.bell import chsh
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.protocol import encode_histogram, encode_status
from labwatch.scenario import Scenario
from labwatch.sequence import SequenceTracker

SC = Scenario(2, 2, 2, 2)


def msg(seq, run="r1", t=None, pair=(0, 0), counts=((5, 1), (1, 5)), source="bench"):
    t = seq * 0.1 if t is None else t
    return encode_histogram(
        source=source,
        run=run,
        seq=seq,
        t_start=t,
        t_stop=t + 0.1,
        counts=np.array(counts),
        scenario=SC,
        pair=pair,
    )


def engine(**kw) -> MonitorEngine:
    return MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False), **kw))


def test_tracker_classifies_gap_late_duplicate_restart():
    t = SequenceTracker()
    assert t.check("s", "a", 0) == "first"
    assert t.check("s", "a", 1) == "in_order"
    assert t.check("s", "a", 4) == "gap"
    assert t.counters.gaps == 1 and t.counters.missing == 2
    assert t.check("s", "a", 2) == "late"
    assert t.counters.missing == 1 and t.counters.late == 1
    assert t.check("s", "a", 2) == "duplicate"
    assert t.check("s", "a", 4) == "duplicate"
    assert t.counters.duplicates == 2
    assert t.check("s", "b", 0) == "first"
    assert t.counters.restarts == 1 and t.counters.missing == 0  # old holes written off
    assert t.check("s", "a", 5) == "stale_run"


def test_late_join_is_counted_not_a_gap():
    t = SequenceTracker()
    assert t.check("s", "a", 7) == "first"
    assert t.counters.missed_at_start == 7 and t.counters.gaps == 0


def test_duplicates_are_rejected_and_not_counted_twice():
    e = engine()
    for s in (0, 1, 1, 2):
        e.ingest(msg(s))
    e.flush()
    assert e.latest.trials == 36
    h = e.health()
    assert h.rejected == 1 and dict(h.rejections_by_reason) == {"duplicate": 1}
    assert h.duplicates == 1


def test_reordered_message_is_accepted_once():
    e = engine()
    for s in (0, 2, 1, 3):
        r = e.ingest(msg(s))
        assert r.accepted
    e.flush()
    h = e.health()
    assert e.latest.trials == 48 and h.gaps == 1 and h.late == 1 and h.missing == 0


def test_restart_starts_a_new_run_and_keeps_old_snapshot():
    e = engine()
    seen = []
    e.subscribe(seen.append)
    for s in range(5):
        e.ingest(msg(s, run="first"))
    res = e.ingest(msg(0, run="second", t=100.0))
    assert res.snapshots and res.snapshots[-1].run == "first"
    e.flush()
    assert e.latest.run == "second" and e.latest.trials == 12 and e.latest.run_index == 1
    assert e.health().restarts == 1
    assert seen[-1] is e.latest


def test_epochs_follow_the_source_clock():
    e = engine(epoch_s=1.0)
    snaps = []
    e.subscribe(snaps.append)
    for s in range(35):  # 3.5 s of source time, messages of 0.1 s
        e.ingest(msg(s, pair=((s // 10) % 2, 0)))
    assert len(snaps) == 3
    assert [s.epoch for s in snaps] == [0, 1, 2]


def test_status_messages_update_health():
    e = engine()
    e.ingest(encode_status(source="bench", run="r1", t=0.0, state="running", last_seq=-1), 123.0)
    h = e.health()
    assert h.heartbeats == 1 and h.source_state == "running" and h.last_heartbeat_wall == 123.0


def test_other_sources_are_ignored_not_mixed():
    e = engine()
    e.ingest(msg(0, source="a"))
    r = e.ingest(msg(0, source="b"))
    assert not r.accepted and r.kind == "ignored"
    e.flush()
    assert e.latest.source == "a" and e.latest.trials == 12


def test_chsh_from_engine_matches_functional():
    rng = np.random.default_rng(3)
    e = engine()
    total = np.zeros((2, 2, 2, 2), dtype=np.int64)
    for s in range(40):
        pair = divmod(s % 4, 2)
        c = rng.integers(0, 50, size=(2, 2))
        total[pair] += c
        e.ingest(msg(s, pair=pair, counts=c))
    e.flush()
    ref = chsh().evaluate_counts(total)
    assert e.latest.bell.value == ref.value and e.latest.bell.stderr == ref.stderr


def test_rolling_window_drops_old_bins():
    r = RollingCounts((1, 1, 2, 2), window_s=10.0, bins=10)
    one = np.ones((1, 1, 2, 2), dtype=np.int64)
    for t in np.arange(0.5, 30, 1.0):
        r.add(one, t, live_s=1.0)
    assert r.total.sum() == 4 * 10  # exactly the last 10 one-second bins
    assert r.live_time_s == 10.0


def test_backward_clock_jump_resets_window_not_run():
    e = engine(window_s=5.0)
    for s in range(20):
        e.ingest(msg(s, t=100 + s * 0.1))
    e.ingest(msg(20, t=3.0))
    e.flush()
    assert e.latest.trials == 21 * 12
    assert e.latest.window_trials == 12
    assert e.health().clock_jumps == 1
