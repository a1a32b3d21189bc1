"""replay_into: the live engine path fed from a file (no sockets)."""

from __future__ import annotations

import math
import time

import pytest

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.protocol import Limits
from labwatch.recording import RecordWriter, read_records
from labwatch.replay import (
    NEW_RUN_ANNOTATION,
    NOT_RECORDED_PREFIX,
    ReplayInputError,
    check_speed,
    demo_recording_path,
    replay_into,
)
from labwatch.summary import summary_dict

DEMO = demo_recording_path()


def _engine(**kw) -> MonitorEngine:
    return MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False), **kw))


def _copy(records, path, insert: dict[int, str] | None = None) -> None:
    """Write ``records`` to a new file, with annotations inserted before given indices."""
    insert = insert or {}
    with RecordWriter(path, flush_interval_s=0) as w:
        for r in records:
            if r.index in insert:
                w.annotate(
                    insert[r.index], received_wall=r.received_wall, received_mono=r.received_mono
                )
            if r.kind == "annotation":
                w.annotate(
                    r.annotation, received_wall=r.received_wall, received_mono=r.received_mono
                )
            else:
                w.write(
                    r.frames,
                    received_wall=r.received_wall,
                    received_mono=r.received_mono,
                    rejected_reason=r.rejected_reason,
                )


def test_check_speed_accepts_numbers_and_fast_and_quotes_bad_values():
    assert check_speed(2) == 2.0
    assert check_speed("fast") == math.inf
    assert check_speed(math.inf) == math.inf
    for bad in (0, -1.5, math.nan, "quick", None, True):
        with pytest.raises(ReplayInputError, match="speed") as info:
            check_speed(bad)
        assert repr(bad) in str(info.value) or str(bad) in str(info.value)


def test_replay_equals_feeding_the_engine_by_hand():
    direct = _engine()
    for r in read_records(DEMO).records:
        assert r.kind != "annotation"
        direct.ingest(r.frames, r.received_wall)
    direct.flush()
    result = replay_into(_engine(), DEMO)
    assert summary_dict(result.final, result.health) == summary_dict(direct.latest, direct.health())
    # the demo has one malformed message, one duplicate and one dropped message (a gap)
    assert (result.rejected_records, result.health.rejected) == (2, 2)
    assert result.health.gaps == 1 and result.health.missing == 1
    assert result.verdict_changes == 0
    assert result.tail.status == "clean" and result.completed and result.damaged == ()
    assert result.records == result.messages == len(read_records(DEMO).records)
    assert result.recorded_span_s == pytest.approx(24.0, abs=0.01)  # generator: 24 s of source time


def test_new_run_annotation_restarts_the_cumulative_counts(tmp_path):
    records = read_records(DEMO).records
    cut = len(records) // 2
    path = tmp_path / "with-new-run.lwrec"
    _copy(records, path, insert={cut: NEW_RUN_ANNOTATION})
    by_hand = _engine()
    for r in records:
        if r.index == cut:
            by_hand.new_run()
        by_hand.ingest(r.frames, r.received_wall)
    by_hand.flush()
    result = replay_into(_engine(), path)
    assert result.new_runs == 1 and result.annotations == 1
    assert result.final.run_index == 1
    assert 0 < result.final.trials < replay_into(_engine(), DEMO).final.trials
    assert summary_dict(result.final, result.health) == summary_dict(
        by_hand.latest, by_hand.health()
    )


def test_other_annotations_are_counted_not_obeyed(tmp_path):
    records = read_records(DEMO).records
    path = tmp_path / "notes.lwrec"
    _copy(
        records,
        path,
        insert={5: "operator: blocked the pump beam", 9: f"{NOT_RECORDED_PREFIX}: too big"},
    )
    result = replay_into(_engine(), path)
    plain = replay_into(_engine(), DEMO)
    assert (result.annotations, result.new_runs, result.not_recorded) == (2, 0, 1)
    assert summary_dict(result.final, result.health) == summary_dict(plain.final, plain.health)


def test_verdicts_that_differ_from_the_recorded_ones_are_counted():
    # Tiny payload cap: every data message now fails as oversize, heartbeats (empty payload) pass.
    strict = _engine(limits=Limits(max_payload_bytes=8))
    result = replay_into(strict, DEMO)
    data_accepted = sum(
        1 for r in read_records(DEMO).records if r.kind == "accepted" and r.frames[2]
    )
    assert data_accepted > 100
    assert result.verdict_changes == data_accepted
    assert (
        result.health.rejections_by_reason
        and dict(result.health.rejections_by_reason)["oversize"] >= data_accepted
    )


def test_paced_replay_takes_the_recorded_time_and_gives_the_same_figures():
    speed = 40.0
    ticks = []
    t0 = time.monotonic()
    paced = replay_into(
        _engine(), DEMO, speed=speed, on_tick=lambda s, h: ticks.append(h.messages), tick_s=0.1
    )
    elapsed = time.monotonic() - t0
    fast = replay_into(_engine(), DEMO)
    # A lower bound only (pacing sleeps at least this long); 2 % for the clock granularity.
    assert elapsed >= 0.98 * fast.recorded_span_s / speed
    assert len(ticks) >= 3 and ticks == sorted(ticks)
    assert summary_dict(paced.final, paced.health) == summary_dict(fast.final, fast.health)


def test_a_tick_can_stop_the_replay():
    result = replay_into(_engine(), DEMO, speed=20.0, on_tick=lambda s, h: True, tick_s=0.05)
    assert not result.completed and result.tail is None
    assert 0 < result.records < len(read_records(DEMO).records)
    assert result.final is not None  # flushed at the stop


def test_progress_reports_bytes_up_to_the_file_size():
    calls = []
    replay_into(_engine(), DEMO, progress=lambda done, total: calls.append((done, total)))
    size = calls[-1][1]
    assert calls[-1] == (size, size)
    assert [d for d, _ in calls] == sorted(d for d, _ in calls)
    assert len(calls) >= 2


def test_bad_tick_and_non_recording_are_clear_errors(tmp_path):
    with pytest.raises(ReplayInputError, match="tick_s"):
        replay_into(_engine(), DEMO, tick_s=0)
    junk = tmp_path / "junk.lwrec"
    junk.write_bytes(b"not a recording at all")
    with pytest.raises(ValueError, match="not a labwatch recording"):
        replay_into(_engine(), junk)
