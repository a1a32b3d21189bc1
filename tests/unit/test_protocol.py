"""Wire protocol v1: round trips and every rejection reason."""

from __future__ import annotations

import json

import numpy as np
import pytest

from labwatch.protocol import (
    REJECTION_REASONS,
    CountBatch,
    Limits,
    MessageRejected,
    SourceStatus,
    encode_events,
    encode_histogram,
    encode_status,
    parse_message,
)
from labwatch.scenario import Scenario

SC = Scenario(2, 2, 2, 2)


def hist(**kw) -> list[bytes]:
    args = dict(
        source="bench",
        run="r1",
        seq=3,
        t_start=1.0,
        t_stop=1.1,
        counts=np.arange(4).reshape(2, 2),
        scenario=SC,
        pair=(1, 0),
    )
    args.update(kw)
    return encode_histogram(**args)


def with_header(frames: list[bytes], **changes) -> list[bytes]:
    h = json.loads(frames[1])
    for k, v in changes.items():
        if v is None:
            h.pop(k, None)
        else:
            h[k] = v
    return [frames[0], json.dumps(h).encode(), frames[2]]


def reason(frames, limits: Limits | None = None) -> str:
    limits = limits or Limits()
    with pytest.raises(MessageRejected) as info:
        parse_message(frames, limits)
    assert info.value.reason in REJECTION_REASONS
    assert info.value.detail  # every rejection explains itself
    return info.value.reason


def test_histogram_pair_round_trip():
    b = parse_message(hist())
    assert isinstance(b, CountBatch)
    assert b.counts.shape == (2, 2, 2, 2)
    assert b.counts[1, 0].tolist() == [[0, 1], [2, 3]]
    assert b.counts.sum() == b.trials == 6
    assert (b.source, b.run, b.seq, b.t_start, b.t_stop) == ("bench", "r1", 3, 1.0, 1.1)
    assert not b.counts.flags.writeable


def test_histogram_all_and_singles_round_trip():
    counts = np.arange(16).reshape(2, 2, 2, 2)
    f = encode_histogram(
        source="s",
        run="r",
        seq=0,
        t_start=0,
        t_stop=1,
        counts=counts,
        scenario=SC,
        singles=([10, 11], [12, 13]),
        coincidence_window_s=2e-9,
        dtype="<u8",
    )
    b = parse_message(f)
    assert np.array_equal(b.counts, counts)
    assert b.singles == ((10, 11), (12, 13))
    assert b.coincidence_window_s == 2e-9


def test_events_are_binned():
    ev = np.array([[0, 1, 1, 0], [0, 1, 1, 0], [1, 1, 0, 1]])
    q = np.full((2, 2), 0.25)
    b = parse_message(
        encode_events(
            source="s",
            run="r",
            seq=0,
            t_start=0,
            t_stop=1,
            events=ev,
            scenario=SC,
            setting_probabilities=q,
        )
    )
    assert b.random_settings and b.trials == 3
    assert b.counts[0, 1, 1, 0] == 2 and b.counts[1, 1, 0, 1] == 1
    assert np.array_equal(b.events, ev)
    assert np.allclose(b.setting_probabilities, q)


def test_status_round_trip():
    s = parse_message(encode_status(source="s", run="r", t=5.0, state="running", last_seq=9))
    assert isinstance(s, SourceStatus) and s.last_seq == 9 and s.state == "running"


@pytest.mark.parametrize(
    "frames,expected",
    [
        ([b"x"], "frame_count"),
        ([b"hist/bench", b"{}", b"", b""], "frame_count"),
        ([b"bogus/bench", b"{}", b""], "topic"),
        ([b"\xff\xfe", b"{}", b""], "topic"),
        ([b"hist/bench", b"\xff\xfe{", b""], "header_encoding"),
        ([b"hist/bench", b"{not json", b""], "header_json"),
        ([b"hist/bench", b"[1, 2]", b""], "header_json"),
        ([b"hist/bench", b'{"a": 1, "a": 2}', b""], "header_json"),
        ([b"hist/bench", b'{"x": NaN}', b""], "header_json"),
        ([b"hist/bench", b"[" * 100000, b""], "oversize"),
    ],
)
def test_structural_rejections(frames, expected):
    assert reason(frames) == expected


def test_deep_nesting_is_bounded():
    deep = b"[" * 10000 + b"]" * 10000
    assert reason([b"hist/bench", deep, b""], Limits(max_header_bytes=30000)) == "header_json"


def test_field_rejections():
    good = hist()
    assert reason(with_header(good, schema="other")) == "schema"
    assert reason(with_header(good, version=2)) == "version"
    assert reason(with_header(good, version=True)) == "version"
    assert reason(with_header(good, seq=None)) == "header_field"
    assert reason(with_header(good, seq="3")) == "header_field"
    assert reason(with_header(good, seq=-1)) == "header_field"
    assert reason(with_header(good, source="")) == "header_field"
    assert reason(with_header(good, kind="events")) == "header_field"
    assert reason(with_header(good, t_stop=0.5)) == "time_window"
    assert reason(with_header(good, scenario={"settings": [2], "outcomes": [2, 2]})) == "scenario"
    assert (
        reason(with_header(good, scenario={"settings": [2, 2], "outcomes": [1, 2]})) == "scenario"
    )
    assert (
        reason(with_header(good, scenario={"settings": [32, 32], "outcomes": [64, 64]}))
        == "scenario"
    )
    assert reason(with_header(good, pair=[2, 0])) == "scenario"
    assert reason(with_header(good, layout="diagonal")) == "layout"
    assert reason(with_header(good, dtype=">f8")) == "dtype"
    assert reason(with_header(good, singles=[[1], [-1]])) == "negative_counts"
    assert reason(with_header(good, coincidence_window_s=5)) == "header_field"
    assert reason([b"hist/other", good[1], good[2]]) == "topic"


def test_payload_rejections():
    good = hist()
    assert reason([good[0], good[1], good[2] + b"\x00"]) == "payload_length"
    neg = hist(dtype="<i4", counts=np.array([[1, -2], [3, 4]]))
    assert reason(neg) == "negative_counts"
    big = hist(dtype="<u8", counts=np.array([[1, 2**50], [3, 4]], dtype=np.uint64))
    assert reason(big) == "overflow"
    assert reason(good, Limits(max_payload_bytes=8)) == "oversize"


def test_event_rejections():
    ev = np.array([[0, 0, 0, 2]])
    f = encode_events(source="s", run="r", seq=0, t_start=0, t_stop=1, events=ev, scenario=SC)
    assert reason(f) == "event_range"
    ok = encode_events(
        source="s", run="r", seq=0, t_start=0, t_stop=1, events=np.zeros((3, 4)), scenario=SC
    )
    assert reason(with_header(ok, n_events=4)) == "payload_length"
    assert reason(with_header(ok, n_events=10**9)) == "oversize"
    assert reason(with_header(ok, layout="pair")) == "layout"
    assert reason(with_header(ok, dtype="<u8")) == "dtype"
    assert reason(with_header(ok, setting_probabilities=[[0.5, 0.5], [0.0, 0.0]])) == "header_field"


def test_status_rejections():
    good = encode_status(source="s", run="r", t=1.0, state="running", last_seq=0)
    assert reason(with_header(good, state="exploded")) == "header_field"
    assert reason([good[0], good[1], b"x"]) == "payload_length"
