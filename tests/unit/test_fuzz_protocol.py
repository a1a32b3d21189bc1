"""Hostile and malformed input: the parser and the engine never crash, every rejection has a
known reason, and the size caps are enforced in code.

Hypothesis drives random frames and mutations of valid messages (bit flips, truncations,
field swaps, random JSON values, huge numbers, deep nesting).  The only allowed outcomes of
:func:`parse_message` are a valid parse or :class:`MessageRejected` with a reason in
:data:`REJECTION_REASONS`.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
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

FUZZ = settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow], database=None
)

SC = Scenario(2, 2, 2, 2)
SC3 = Scenario(3, 2, 3, 4)


def _valid_messages() -> list[list[bytes]]:
    rng = np.random.default_rng(1)
    q = np.full((2, 2), 0.25)
    return [
        encode_histogram(
            source="bench-2", run="r1", seq=4, t_start=1.0, t_stop=1.1,
            counts=rng.integers(0, 500, (2, 2)), scenario=SC, pair=(1, 0),
            singles=([900, 880], [910, 905]), coincidence_window_s=1.5e-9,
        ),
        encode_histogram(
            source="bench-2", run="r1", seq=5, t_start=1.1, t_stop=1.2,
            counts=rng.integers(0, 500, SC3.shape), scenario=SC3, dtype="<u8",
        ),
        encode_events(
            source="bench-2", run="r2", seq=0, t_start=0.0, t_stop=0.01,
            events=np.stack([rng.integers(0, 2, 50) for _ in range(4)], axis=1),
            scenario=SC, setting_probabilities=q,
        ),
        encode_status(source="bench-2", run="r2", t=3.0, state="running", last_seq=7),
    ]  # fmt: skip


VALID = _valid_messages()

# JSON values, including the nasty ones: huge integers, extreme floats, long strings, nesting.
json_scalars = (
    st.none()
    | st.booleans()
    | st.integers()
    | st.integers(min_value=-(10**400), max_value=10**400)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.sampled_from([1e308, -1e308, 5e-324, 2**63, 2**64 + 1, -1, 0, 1.0, 2**40 + 1])
    | st.text(max_size=40)
)
json_values = st.recursive(
    json_scalars,
    lambda kids: (
        st.lists(kids, max_size=5) | st.dictionaries(st.text(max_size=8), kids, max_size=5)
    ),
    max_leaves=30,
)


def _check_parse(frames) -> CountBatch | SourceStatus | None:
    """Parse; the only acceptable failure is a MessageRejected with a known reason."""
    try:
        msg = parse_message(frames)
    except MessageRejected as exc:
        assert exc.reason in REJECTION_REASONS, exc.reason
        assert exc.detail and len(exc.detail) <= 300
        return None
    assert isinstance(msg, (CountBatch, SourceStatus))
    if isinstance(msg, CountBatch):
        assert msg.counts.shape == msg.scenario.shape and msg.counts.dtype == np.int64
        assert (msg.counts >= 0).all() and msg.trials == int(msg.counts.sum())
        assert not msg.counts.flags.writeable
    return msg


def _header(frames) -> dict:
    return json.loads(frames[1])


def _with_header(frames, header) -> list[bytes]:
    return [frames[0], json.dumps(header).encode(), frames[2]]


@st.composite
def mutated(draw) -> list[bytes]:
    frames = [bytes(f) for f in draw(st.sampled_from(VALID))]
    how = draw(
        st.sampled_from(
            ["bitflip", "truncate", "swap", "value", "delete", "deep", "huge", "frames", "extend"]
        )
    )
    if how == "bitflip":
        for _ in range(draw(st.integers(1, 4))):
            i = draw(st.integers(0, 2))
            if frames[i]:
                pos = draw(st.integers(0, len(frames[i]) - 1))
                b = bytearray(frames[i])
                b[pos] ^= 1 << draw(st.integers(0, 7))
                frames[i] = bytes(b)
    elif how == "truncate":
        i = draw(st.integers(0, 2))
        frames[i] = frames[i][: draw(st.integers(0, max(0, len(frames[i]) - 1)))]
    elif how == "extend":
        i = draw(st.integers(0, 2))
        frames[i] = frames[i] + draw(st.binary(min_size=1, max_size=64))
    elif how == "frames":
        frames = draw(st.permutations(frames + draw(st.lists(st.binary(max_size=8), max_size=2))))
        frames = frames[: draw(st.integers(0, len(frames)))]
    else:
        h = _header(frames)
        keys = sorted(h)
        if how == "swap":
            a, b = draw(st.sampled_from(keys)), draw(st.sampled_from(keys))
            h[a], h[b] = h[b], h[a]
        elif how == "value":
            h[draw(st.sampled_from(keys + ["scenario", "pair", "singles", "x_lab"]))] = draw(
                json_values
            )
        elif how == "delete":
            del h[draw(st.sampled_from(keys))]
        elif how == "deep":
            depth = draw(st.integers(10, 6000))
            h[draw(st.sampled_from(keys))] = (
                json.loads("[" * depth + "]" * depth) if (depth < 900) else None
            )
            raw = json.dumps(h).encode()
            if depth >= 900:  # deeper than json.dumps would write: splice the text in
                raw = raw.replace(b"null", b"[" * depth + b"]" * depth, 1)
            return [frames[0], raw, frames[2]]
        elif how == "huge":
            h[draw(st.sampled_from(keys))] = draw(
                st.sampled_from([10**300, -(10**300), 1e308, 2**64, 2**62 + 1, [10**300] * 3])
            )
        frames = _with_header(frames, h)
    return frames


@FUZZ
@given(st.lists(st.binary(max_size=200), max_size=5))
def test_random_frames_never_crash(frames):
    _check_parse(frames)


@FUZZ
@given(mutated())
def test_mutated_valid_messages_never_crash(frames):
    _check_parse(frames)


@FUZZ
@given(
    st.dictionaries(
        st.sampled_from(
            ["schema", "version", "kind", "source", "run", "seq", "t_start", "t_stop",
             "scenario", "layout", "dtype", "pair", "n_events", "singles", "t", "state",
             "last_seq", "setting_probabilities", "coincidence_window_s", "message"]
        ),
        json_values,
    ),
    st.sampled_from([b"hist/bench-2", b"events/bench-2", b"status/bench-2", b"hist", b""]),
    st.binary(max_size=64),
)  # fmt: skip
def test_random_headers_never_crash(header, topic, payload):
    base = {"schema": "labwatch.coincidences", "version": 1}
    _check_parse([topic, json.dumps({**base, **header}).encode(), payload])


@settings(max_examples=60, deadline=None, database=None)
@given(st.lists(st.one_of(mutated(), st.sampled_from(VALID)), min_size=1, max_size=40))
def test_engine_never_raises_and_accounts_for_every_message(stream):
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    for frames in stream:
        engine.ingest(frames, 1.0)
    engine.flush()
    h = engine.health()
    assert h.messages == len(stream)
    assert h.accepted + h.rejected + engine.ignored_other_source == h.messages
    assert sum(n for _, n in h.rejections_by_reason) == h.rejected
    assert all(r in REJECTION_REASONS for r, _ in h.rejections_by_reason)
    # a parser bug would show up as "unexpected <ExceptionType>: ..." (engine.ingest's guard)
    assert not any(r.detail.startswith("unexpected ") for r in h.recent_rejections)
    if engine.run is not None:
        assert (engine.run.counts >= 0).all()


# --------------------------------------------------------------------------- caps in code


def _rejected(frames, limits: Limits) -> str:
    with pytest.raises(MessageRejected) as info:
        parse_message(frames, limits)
    return info.value.reason


def test_frame_size_caps_are_enforced():
    hist = VALID[0]
    assert parse_message(hist, Limits(max_topic_bytes=len(hist[0])))
    assert _rejected(hist, Limits(max_topic_bytes=len(hist[0]) - 1)) == "oversize"
    assert parse_message(hist, Limits(max_header_bytes=len(hist[1])))
    assert _rejected(hist, Limits(max_header_bytes=len(hist[1]) - 1)) == "oversize"
    assert parse_message(hist, Limits(max_payload_bytes=len(hist[2])))
    assert _rejected(hist, Limits(max_payload_bytes=len(hist[2]) - 1)) == "oversize"


def test_default_caps_match_the_protocol_document():
    lim = Limits()  # docs/protocol.md: header <= 16 KiB, <= 65 536 cells, <= 4 194 304 events
    assert lim.max_header_bytes == 16 * 1024
    assert lim.max_cells == 65_536 and lim.max_events == 4_194_304
    big_header = _with_header(VALID[0], {**_header(VALID[0]), "x_lab": "a" * 16 * 1024})
    assert _rejected(big_header, lim) == "oversize"


def test_scenario_size_cap_is_enforced():
    sc = SC3  # 3 * 2 * 3 * 4 = 72 cells
    frames = encode_histogram(
        source="s", run="r", seq=0, t_start=0, t_stop=1, counts=np.zeros(sc.shape), scenario=sc
    )
    assert parse_message(frames, Limits(max_cells=72))
    assert _rejected(frames, Limits(max_cells=71)) == "scenario"
    # 32 x 32 settings x 64 x 64 outcomes = 4 194 304 cells > 65 536: rejected before the
    # payload is even looked at
    h = {**_header(frames), "scenario": {"settings": [32, 32], "outcomes": [64, 64]}}
    assert _rejected(_with_header(frames, h), Limits()) == "scenario"


def test_event_count_cap_is_enforced():
    events = np.zeros((100, 4), dtype=np.uint8)
    frames = encode_events(
        source="s", run="r", seq=0, t_start=0, t_stop=1, events=events, scenario=SC
    )
    assert parse_message(frames, Limits(max_events=100)).trials == 100
    assert _rejected(frames, Limits(max_events=99)) == "oversize"
    # a header claiming more events than allowed is refused before the payload length check
    h = {**_header(frames), "n_events": Limits().max_events + 1}
    assert _rejected(_with_header(frames, h), Limits()) == "oversize"


def test_json_parsing_is_bounded():
    hist = VALID[0]
    # nesting: refused (Python's JSON decoder stops at its recursion limit, < 16 KiB of '[')
    deep = hist[1][:-1] + b',"x_lab":' + b"[" * 8000 + b"]" * 8000 + b"}"
    assert _rejected([hist[0], deep, hist[2]], Limits()) in ("header_json", "oversize")
    assert _rejected([hist[0], deep, hist[2]], Limits(max_header_bytes=64 * 1024)) == "header_json"
    # integers longer than Python's int-string limit (4300 digits) are refused, not parsed
    long_int = hist[1][:-1] + b',"x_lab":' + b"9" * 5000 + b"}"
    assert _rejected([hist[0], long_int, hist[2]], Limits()) == "header_json"
    # numbers outside the float range in fields that must be finite
    for field in ("t_start", "t_stop"):
        h = {**_header(hist), field: 10**400}
        assert _rejected(_with_header(hist, h), Limits()) == "time_window"
    # duplicate keys and NaN are not JSON the protocol accepts
    dup = hist[1][:-1] + b',"seq":5}'
    assert _rejected([hist[0], dup, hist[2]], Limits()) == "header_json"
    nan = hist[1].replace(b'"t_start":1.0', b'"t_start":NaN')
    assert _rejected([hist[0], nan, hist[2]], Limits()) == "header_json"


def test_strict_types_in_numeric_fields():
    ev = VALID[2]
    for bad in ([["0.25", "0.25"], ["0.25", "0.25"]], [[True, 0.25], [0.25, 0.25]],
                [[10**400, 1], [1, 1]], [[0.5, 0.5]]):  # fmt: skip
        h = {**_header(ev), "setting_probabilities": bad}
        assert _rejected(_with_header(ev, h), Limits()) == "header_field"
    h = {**_header(VALID[0]), "version": 1.0}
    assert _rejected(_with_header(VALID[0], h), Limits()) == "version"
    st_ = {**_header(VALID[3]), "last_seq": 10**30}
    assert _rejected(_with_header(VALID[3], st_), Limits()) == "header_field"


# --------------------------------------------------------------------------- fast path


def _outcome(frames):
    try:
        msg = parse_message(frames)
    except MessageRejected as exc:
        return ("rejected", exc.reason, exc.detail)
    fields = {k: v for k, v in vars(msg).items() if k not in ("counts", "events")}
    return ("ok", type(msg).__name__, fields, getattr(msg, "counts", None))


@FUZZ
@given(mutated())
def test_fast_path_agrees_with_the_full_checks(frames):
    """parse_message's shortcut for histogram messages of known sources must give exactly
    what the full validation gives (result or rejection reason) on any input."""
    from labwatch import protocol

    for valid in VALID:  # make the identifiers known, so the fast path is taken
        parse_message(valid)
    fast = _outcome(frames)
    original = protocol._fast_hist
    protocol._fast_hist = lambda *a: None
    try:
        full = _outcome(frames)
    finally:
        protocol._fast_hist = original
    assert fast[:2] == full[:2]
    if fast[0] == "rejected":
        assert fast[2] == full[2]
    else:
        assert fast[2].keys() == full[2].keys()
        for name, value in fast[2].items():
            if isinstance(value, np.ndarray):
                np.testing.assert_array_equal(value, full[2][name])
            else:
                assert value == full[2][name], name
    if fast[0] == "ok" and fast[3] is not None:
        np.testing.assert_array_equal(fast[3], full[3])
        assert fast[3].dtype == full[3].dtype and not fast[3].flags.writeable


def test_fast_path_is_taken_for_known_sources():
    from labwatch import protocol

    parse_message(VALID[0])
    calls = []
    original = protocol._fast_hist

    def spy(*args):
        out = original(*args)
        calls.append(out is not None)
        return out

    protocol._fast_hist = spy
    try:
        batch = parse_message(VALID[0])
    finally:
        protocol._fast_hist = original
    assert calls == [True] and batch.kind == "hist" and batch.trials == int(batch.counts.sum())
