"""The fast lane for runs of histogram messages (labwatch.hist_block, MonitorEngine.ingest_many).

Two promises are checked here:

1. a message goes into a block only if the full parser accepts it with the same values
   (Hypothesis mutates valid lane messages byte by byte and field by field);
2. ``ingest_many`` gives the same results, snapshots, health and accumulator state as
   ``ingest`` one message at a time, bit for bit, whatever the chunking and whatever the
   stream does (gaps, duplicates, reordering, clock jumps, restarts, bad messages, other
   sources, a header form that changes mid-run).
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.hist_block import decode_hist_block, hist_signature
from labwatch.protocol import (
    CountBatch,
    MessageRejected,
    encode_histogram,
    encode_status,
    parse_message,
)
from labwatch.scenario import Scenario

SC = Scenario(2, 2, 2, 2)
SC3 = Scenario(3, 2, 3, 2)
FUZZ = settings(
    max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow], database=None
)


def _hist(seq: int, *, run: str = "r1", source: str = "bench-7", t: float | None = None,
          pair=(1, 0), sc: Scenario = SC, dtype: str = "<u4", singles=True, **extra) -> list[bytes]:  # fmt: skip
    rng = np.random.default_rng(seq)
    t0 = 0.01 * seq if t is None else t
    frames = encode_histogram(
        source=source, run=run, seq=seq, t_start=t0, t_stop=t0 + 0.01,
        counts=rng.integers(0, 400, (sc.outcomes_a, sc.outcomes_b)), scenario=sc, pair=pair,
        singles=([900 + seq, 880], [910, 905 + seq]) if singles else None,
        coincidence_window_s=1.5e-9, dtype=dtype,
    )  # fmt: skip
    if extra:
        header = {**json.loads(frames[1]), **extra}
        frames[1] = json.dumps(header, separators=(",", ":")).encode()
    return frames


def _lane(frames):
    sig = hist_signature(frames, parse_message(frames))
    assert sig is not None
    return sig


def _block_values(block, k: int) -> dict:
    sc = block.signature.scenario
    counts = np.zeros(sc.shape, dtype=np.int64)
    x, y = divmod(int(block.pair_index[k]), sc.settings_b)
    counts[x, y] = block.counts[k].reshape(sc.outcomes_a, sc.outcomes_b)
    return {
        "seq": block.first_seq + k,
        "t_start": block.t_start[k],
        "t_stop": block.t_stop[k],
        "counts": counts.tolist(),
        "trials": int(block.trials[k]),
        "singles": None if block.singles is None else tuple(int(v) for v in block.singles[k]),
        "window": block.signature.coincidence_window_s,
        "no_click": block.signature.no_click,
        "source": block.signature.source,
        "run": block.signature.run,
        "scenario": block.signature.scenario,
    }


def _batch_values(batch: CountBatch) -> dict:
    return {
        "seq": batch.seq,
        "t_start": batch.t_start,
        "t_stop": batch.t_stop,
        "counts": batch.counts.tolist(),
        "trials": batch.trials,
        "singles": None
        if batch.singles is None
        else (sum(batch.singles[0]), sum(batch.singles[1])),
        "window": batch.coincidence_window_s,
        "no_click": batch.no_click,
        "source": batch.source,
        "run": batch.run,
        "scenario": batch.scenario,
    }


def _agrees(lane, frames, seq: int) -> bool:
    """Check promise 1 for one message; returns whether it went into a block."""
    block = decode_hist_block([frames], 0, lane, seq)
    if block is None:
        return False
    assert block.size == 1
    try:
        full = parse_message(frames)
    except MessageRejected as exc:  # pragma: no cover - this is the failure being tested for
        pytest.fail(f"block took a message the full parser rejects ({exc.reason}): {frames[1]!r}")
    assert isinstance(full, CountBatch)
    assert type(full.t_start) is float and type(block.t_start[0]) is float
    assert _block_values(block, 0) == _batch_values(full)
    return True


# --------------------------------------------------------------------------- decoding


def test_a_run_of_lane_messages_decodes_as_one_block_with_the_full_parsers_values():
    stream = [_hist(s, pair=(s % 2, (s // 2) % 2)) for s in range(10, 40)]
    lane = _lane(stream[0])
    block = decode_hist_block(stream, 1, lane, 11)
    assert block is not None and block.size == 29
    for k in range(block.size):
        assert _block_values(block, k) == _batch_values(parse_message(stream[1 + k]))


def test_a_block_ends_at_a_gap_a_new_run_or_a_changed_form():
    stream = [_hist(s) for s in range(5)]
    lane = _lane(stream[0])
    gap = stream[:3] + [_hist(7)]
    assert decode_hist_block(gap, 0, lane, 0).size == 3
    assert decode_hist_block(stream[:2] + [_hist(2, run="r2")], 0, lane, 0).size == 2
    assert decode_hist_block(stream[:2] + [_hist(2, x_note="new")], 0, lane, 0).size == 2
    assert decode_hist_block(stream[:2] + [_hist(2, singles=False)], 0, lane, 0).size == 2
    assert decode_hist_block(stream, 0, lane, 1) is None  # not the expected number


def _edit(frames, old: bytes, new: bytes) -> list[bytes]:
    assert old in frames[1], (old, frames[1])
    return [frames[0], frames[1].replace(old, new, 1), frames[2]]


BASE = _hist(3, x_note="lab:7 bench")  # a colon inside a string: the slower key count


@pytest.mark.parametrize(
    "edit, in_block",
    [
        ((b"", b""), True),
        ((b'"seq":3', b'"seq" : 3'), True),  # a space before a key's colon
        ((b'"seq":3', b'"seq":3,"seq":3'), False),  # repeated key: the full path refuses
        ((b'"seq":3', b'"seq":3,"seq" :3'), False),
        ((b'"seq":3', b'"seq"\t:3,"seq":3'), False),
        ((b'"seq":3', b'"seq"  :3,"seq":3'), False),
        ((b'"version":1', b'"version":true'), False),
        ((b'"seq":3', b'"seq":3.0'), False),
        ((b'"settings":[2,2]', b'"settings":[2.0,2]'), False),
        ((b'"pair":[1,0]', b'"pair":[1,2]'), False),
        ((b'"pair":[1,0]', b'"pair":[true,0]'), False),
        ((b"[903,880]", b"[903,-880]"), False),
        ((b"[903,880]", b"[903,1099511627777]"), False),  # above 2**40
        ((b'"x_note":"lab:7 bench"', b'"x_note":"\\ud800"'), False),  # stdlib accepts it
        ((b'"x_note":"lab:7 bench"', b'"x_note":1e400'), False),  # stdlib: inf, msgspec: no
        ((b'"x_note":"lab:7 bench"', b'"x_note":[[[1]]]'), True),
        ((b'"x_note":"lab:7 bench"', b'"x_note":{"a":1}'), False),  # a colon more
        ((b'"coincidence_window_s":1.5e-09', b'"coincidence_window_s":2e-09'), False),
        ((b'"t_start":0.03', b'"t_start":0'), True),  # an integer time is a time
        ((b'"t_start":0.03', b'"t_start":0.05'), False),  # after t_stop
        ((b'"scenario":{', b'"scenario":{"x":1,'), False),
    ],
)
def test_lane_and_full_parser_agree_on_edge_cases(edit, in_block):
    lane = _lane(BASE)
    frames = _edit(BASE, *edit) if edit[0] else BASE
    assert _agrees(lane, frames, 3) is in_block


def test_deep_nesting_in_a_long_header_takes_the_full_path():
    depth = 995  # accepted by msgspec, refused by the standard library near 1000 levels
    frames = _edit(BASE, b'"lab:7 bench"', b"[" * depth + b"]" * depth)
    with pytest.raises(MessageRejected):
        parse_message(frames)
    assert not _agrees(_lane(BASE), frames, 3)


@st.composite
def lane_mutations(draw) -> list[bytes]:
    frames = list(BASE)
    how = draw(st.sampled_from(["bitflip", "insert", "delete", "value", "payload"]))
    raw = bytearray(frames[1])
    if how == "bitflip":
        for _ in range(draw(st.integers(1, 3))):
            pos = draw(st.integers(0, len(raw) - 1))
            raw[pos] ^= 1 << draw(st.integers(0, 7))
    elif how == "insert":
        pos = draw(st.integers(0, len(raw)))
        piece = draw(
            st.sampled_from([b" ", b"  ", b"\t", b"\n", b",", b":", b'"', b"\\", b"0", b"-",
                             b".5", b"e3", b'"seq":3,', b'"pair":[0,0],', b"\xff", b"\xef\xbb\xbf"])
        )  # fmt: skip
        raw[pos:pos] = piece
    elif how == "delete":
        a = draw(st.integers(0, len(raw) - 1))
        del raw[a : a + draw(st.integers(1, 4))]
    elif how == "value":
        header = json.loads(bytes(raw))
        key = draw(st.sampled_from(sorted(header) + ["x_more"]))
        header[key] = draw(
            st.none() | st.booleans() | st.integers(-(2**70), 2**70)
            | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=6)
            | st.lists(st.integers(-3, 3), max_size=3)
            | st.sampled_from([[1, 0], [[903, 880], [910, 908]], {"settings": [2, 2], "outcomes": [2, 2]}])
        )  # fmt: skip
        raw = bytearray(json.dumps(header, separators=(",", ":")).encode())
    else:
        payload = bytearray(frames[2])
        pos = draw(st.integers(0, len(payload) - 1))
        payload[pos] ^= 1 << draw(st.integers(0, 7))
        frames[2] = bytes(payload)
    frames[1] = bytes(raw)
    return frames


@FUZZ
@given(lane_mutations())
def test_mutated_lane_messages_enter_a_block_only_when_the_full_parser_agrees(frames):
    _agrees(_lane(BASE), frames, 3)


# --------------------------------------------------------------------------- the engine


def _normal(snap) -> str:
    # solver wall time is the one figure that legitimately differs between two runs
    return re.sub(r"'solve_time_s': [0-9.e+-]+", "", repr(snap))


def _run(stream, chunks: list[int] | None, analysis: AnalysisConfig):
    engine = MonitorEngine(EngineConfig(window_s=0.5, epoch_s=0.05, analysis=analysis))
    snaps = []
    engine.subscribe(snaps.append)
    results = []
    if chunks is None:
        results = [engine.ingest(f, 7.0) for f in stream]
    else:
        i = 0
        for size in chunks:
            results += engine.ingest_many(stream[i : i + size], 7.0)
            i += size
        results += engine.ingest_many(stream[i:], 7.0)
    engine.flush()
    return engine, snaps, results


def _state(engine: MonitorEngine) -> tuple:
    run = engine.run
    h = engine.health()
    run_state = None
    if run is not None:
        w = run.window
        run_state = (
            run.run, run.counts.tolist(), run.messages, run.trials, run.live_time_s.hex(),
            run.singles, run.t_first, run.t_last, run.clock_jumps, w.total.tolist(),
            w.live_time_s.hex(), w.singles_total, run.coincidence_window_s, run.no_click,
        )  # fmt: skip
    return run_state, repr(h), engine.epoch, engine.runs_seen


@st.composite
def streams(draw) -> list[list[bytes]]:
    """A lane stream with the troubles of a real link mixed in."""
    out: list[list[bytes]] = []
    seq, t, run = 0, 0.0, "r1"
    pair = (0, 0)
    extra: dict = {}
    for _ in range(draw(st.integers(20, 160))):
        op = draw(
            st.sampled_from(["msg"] * 12 + ["gap", "dup", "swap", "back", "forward", "bad",
                                            "other", "restart", "status", "pair", "form",
                                            "all", "long"])
        )  # fmt: skip
        if op == "gap":
            seq += draw(st.integers(1, 3))
        elif op == "back":
            t -= draw(st.sampled_from([0.003, 0.2, 2.0]))
        elif op == "forward":
            t += draw(st.sampled_from([0.6, 5.0]))
        elif op == "long":
            t += 0.02
        elif op == "restart":
            run, seq = f"r{draw(st.integers(2, 4))}", draw(st.integers(0, 2))
        elif op == "pair":
            pair = (draw(st.integers(0, 1)), draw(st.integers(0, 1)))
        elif op == "form":
            extra = draw(st.sampled_from([{}, {"x_temp_c": 21.5}, {"x_note": "a:b"}]))
        elif op == "bad":
            out.append([b"hist/bench-7", b'{"seq":', b""])
            continue
        elif op == "other":
            out.append(_hist(seq, source="other-3", t=t))
            continue
        elif op == "status":
            out.append(encode_status(source="bench-7", run=run, t=t, state="running", last_seq=seq))
            continue
        elif op == "all":
            counts = np.full(SC.shape, 3)
            out.append(
                encode_histogram(source="bench-7", run=run, seq=seq, t_start=t,
                                 t_stop=t + 0.004, counts=counts, scenario=SC)
            )  # fmt: skip
            seq, t = seq + 1, t + 0.004
            continue
        out.append(_hist(seq, run=run, t=t, pair=pair, **extra))
        if op == "dup":
            out.append(out[-1])
        if op == "swap" and len(out) >= 2:
            out[-1], out[-2] = out[-2], out[-1]
        seq, t = seq + 1, t + 0.004
    return out


@settings(
    max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow], database=None
)
@given(streams(), st.lists(st.integers(1, 40), max_size=30))
def test_ingest_many_equals_one_at_a_time_bit_for_bit(stream, chunks):
    analysis = AnalysisConfig(visibility=False)
    serial, s_snaps, s_results = _run(stream, None, analysis)
    many, m_snaps, m_results = _run(stream, chunks, analysis)
    assert [_normal(s) for s in m_snaps] == [_normal(s) for s in s_snaps]
    assert [(r.accepted, r.kind, r.reason, r.detail, len(r.snapshots)) for r in m_results] == [
        (r.accepted, r.kind, r.reason, r.detail, len(r.snapshots)) for r in s_results
    ]
    assert _state(many) == _state(serial)


def test_ingest_many_uses_blocks_and_matches_with_the_visibility_lp():
    # a long steady stream (the lane's real job), with the LP figures compared as well
    stream = [_hist(s, pair=((s // 25) % 2, (s // 50) % 2)) for s in range(600)]
    analysis = AnalysisConfig()
    serial, s_snaps, _ = _run(stream, None, analysis)
    many, m_snaps, _ = _run(stream, [500], analysis)
    assert len(s_snaps) > 20
    assert [_normal(s) for s in m_snaps] == [_normal(s) for s in s_snaps]
    assert _state(many) == _state(serial)
    assert many._lane is not None and many._lane_misses == 0  # the blocks did the work


# --------------------------------------------------------------------------- review findings


def _same_as_serial(stream, *, config=None, setup=None, chunk=None):
    engines = []
    for many in (False, True):
        engine = MonitorEngine(config or EngineConfig(window_s=0.5, epoch_s=0.05))
        snaps = []
        engine.subscribe(snaps.append)
        if setup is not None:
            setup(engine)
        if many:
            size = chunk or len(stream)
            results = [r for k in range(0, len(stream), size)
                       for r in engine.ingest_many(stream[k : k + size], 7.0)]  # fmt: skip
        else:
            results = [engine.ingest(f, 7.0) for f in stream]
        engines.append((engine, [_normal(s) for s in snaps],
                        [(r.accepted, r.reason, len(r.snapshots)) for r in results]))  # fmt: skip
    (serial, s_snaps, s_res), (many, m_snaps, m_res) = engines
    assert m_res == s_res
    assert m_snaps == s_snaps
    assert _state(many) == _state(serial)
    return serial, many


@pytest.mark.parametrize("key", ["x_lab\\dir", 'x_"q"', "x_\n", "\x00", "x_\ud800", ""])
def test_extra_keys_msgspec_cannot_name_leave_the_lane_closed_not_the_monitor_down(key):
    # json.dumps escapes them; the full path accepts the message and ignores the field
    stream = [_hist(s, **{key: 1}) for s in range(40)]
    assert parse_message(stream[0]).seq == 0
    _same_as_serial(stream)


def test_a_snapshot_callback_that_starts_a_new_run_segment_mid_block():
    def setup(engine):
        engine.subscribe(lambda snap: engine.new_run() if snap.epoch == 2 else None)

    serial, many = _same_as_serial([_hist(s) for s in range(200)], setup=setup)
    assert serial.runs_seen == 2


def test_changed_size_caps_close_the_lane():
    from dataclasses import replace

    from labwatch.protocol import Limits

    stream = [_hist(s) for s in range(60)]

    def feed(engine, many):
        take = engine.ingest_many if many else (lambda fs, w: [engine.ingest(f, w) for f in fs])
        out = take(stream[:30], 7.0)
        engine.config = replace(engine.config, limits=Limits(max_payload_bytes=8))
        return [(r.accepted, r.reason) for r in out + take(stream[30:], 7.0)]

    one, two = MonitorEngine(), MonitorEngine()
    assert feed(two, True) == feed(one, False)
    assert one.run.messages == two.run.messages == 30  # the last 30 are over the new cap


def test_counts_past_int64_sum_like_the_one_at_a_time_path():
    # 2**52 trials a message (64 x 64 cells at 2**40): 2100 messages pass 2**63 in total
    sc = Scenario(2, 2, 64, 64)
    block = np.full((64, 64), 1 << 40)
    stream = [
        encode_histogram(source="bench-7", run="r1", seq=s, t_start=s * 1e-3,
                         t_stop=(s + 1) * 1e-3, counts=block, scenario=sc, pair=(0, 1),
                         dtype="<u8")
        for s in range(2100)
    ]  # fmt: skip
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    engine.ingest_many(stream, 7.0)
    assert engine.run.trials == 2100 * 64 * 64 * (1 << 40) > 2**63


@pytest.mark.parametrize("kind", [bytearray, memoryview, lambda b: np.frombuffer(b, np.uint8)])
def test_topic_frames_that_are_not_bytes_take_the_full_path(kind):
    stream = [_hist(s) for s in range(20)]
    for frames in stream[1:]:
        frames[0] = kind(frames[0])
    _same_as_serial(stream)


def test_a_publisher_mixing_topics_cannot_make_the_lane_rebuild_on_every_message(monkeypatch):
    import labwatch.engine as engine_module

    builds = []
    real = engine_module.hist_signature
    monkeypatch.setattr(
        engine_module, "hist_signature", lambda *a, **k: builds.append(1) or real(*a, **k)
    )
    stream = [_hist(s) for s in range(4000)]
    for frames in stream[1::2]:
        frames[0] = b"hist/"  # same source and run, topic without the source part
    _same_as_serial(
        stream, chunk=500, config=EngineConfig(analysis=AnalysisConfig(visibility=False))
    )
    assert len(builds) <= 12  # 1 + retries after 64, 128, 256, ... serial messages


class _CountingList(list):
    """A list that counts item reads: how many times the engine looked at a message."""

    reads = 0

    def __getitem__(self, index):
        self.reads += 1
        return super().__getitem__(index)


@pytest.mark.parametrize("trouble", ["negative count", "clock jump"])
def test_messages_a_block_cannot_take_are_not_decoded_over_and_over(trouble):
    # every 12th message is rejected (negative count) or jumps the clock forwards: the lane
    # must not re-decode the rest of the batch at each one (that was quadratic in the batch)
    stream, t = [], 0.0
    for s in range(2000):
        counts = np.zeros((2, 2), dtype=np.int64)
        if s % 12 == 11:
            if trouble == "negative count":
                counts[0, 0] = -1
            else:
                t += 40.0  # more than the 30 s window
        stream.append(
            encode_histogram(source="bench-7", run="r1", seq=s, t_start=t, t_stop=t + 1e-3,
                             counts=counts, scenario=SC, pair=(0, 0), dtype="<i4")
        )  # fmt: skip
        t += 1e-3
    _same_as_serial(stream, config=EngineConfig(analysis=AnalysisConfig(visibility=False)))
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    batch = _CountingList(stream)
    engine.ingest_many(batch, 7.0)
    assert engine.accepted == 2000 - (2000 // 12 if trouble == "negative count" else 0)
    assert batch.reads <= 4 * len(stream)


@pytest.mark.parametrize("action", ["feed a message", "follow another source", "new tracker"])
def test_a_snapshot_callback_that_changes_the_engine_stops_the_block(action):
    from labwatch.sequence import SequenceTracker

    stream = [_hist(s) for s in range(300)]

    def setup(engine):
        def callback(snap):
            if snap.epoch != 2:
                return
            if action == "feed a message":  # the next number: a duplicate for what follows
                engine.ingest(_hist(engine.tracker.next_in_order("bench-7", "r1")), 7.0)
            elif action == "follow another source":
                engine.source = "other-3"
            else:
                engine.tracker = SequenceTracker()

        engine.subscribe(callback)

    _same_as_serial(stream, setup=setup)


def test_a_publisher_changing_run_ids_cannot_make_the_lane_rebuild_on_every_message(
    monkeypatch,
):
    import labwatch.engine as engine_module

    builds = []
    real = engine_module.hist_signature
    monkeypatch.setattr(
        engine_module, "hist_signature", lambda *a, **k: builds.append(1) or real(*a, **k)
    )
    # a new run id every 3 messages: a run earns a lane only after 8 accepted messages
    stream = [_hist(s % 3, run=f"r{s // 3}", t=s * 0.004) for s in range(900)]
    _same_as_serial(stream, config=EngineConfig(analysis=AnalysisConfig(visibility=False)))
    assert builds == []
