"""Wire protocol v1: encoding and strict validation of coincidence-stream messages.

A message is three ZeroMQ frames: ``[topic, header, payload]``.

* ``topic``   -- UTF-8 ``"<kind>/<source>"``; ``kind`` is ``hist``, ``events`` or ``status``.
* ``header``  -- UTF-8 JSON object (fields in docs/protocol.md).
* ``payload`` -- little-endian binary array whose layout and dtype the header declares;
  empty for ``status`` messages.

:func:`parse_message` turns frames into a :class:`CountBatch` or :class:`SourceStatus`, or
raises :class:`MessageRejected` carrying a short machine-readable ``reason`` and a human
``detail``.  Nothing here touches a socket; nothing is ever unpickled.
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from labwatch.scenario import Scenario, ScenarioError

__all__ = [
    "SCHEMA",
    "VERSION",
    "KINDS",
    "LAYOUTS",
    "COUNT_DTYPES",
    "EVENT_DTYPES",
    "REJECTION_REASONS",
    "Limits",
    "CountBatch",
    "SourceStatus",
    "MessageRejected",
    "parse_message",
    "encode_histogram",
    "encode_events",
    "encode_status",
]

SCHEMA = "labwatch.coincidences"
VERSION = 1
KINDS = ("hist", "events", "status")
LAYOUTS = ("pair", "all", "xyab")
COUNT_DTYPES = ("<u2", "<u4", "<u8", "<i4", "<i8")
EVENT_DTYPES = ("|u1", "<u2")
SOURCE_STATES = ("running", "paused", "stopping", "stopped")

#: Every reason a message can be rejected for; counters are keyed by these.
REJECTION_REASONS = (
    "frame_count",
    "oversize",
    "topic",
    "header_encoding",
    "header_json",
    "header_field",
    "schema",
    "version",
    "scenario",
    "layout",
    "dtype",
    "payload_length",
    "negative_counts",
    "overflow",
    "event_range",
    "time_window",
    "duplicate",
    "stale_run",
    "scenario_change",
)

#: Largest count accepted in one cell of one message (2**40 ~ 1.1e12, far above any counter).
MAX_CELL_COUNT = 1 << 40


class MessageRejected(ValueError):
    """A message failed validation.  ``reason`` is one of :data:`REJECTION_REASONS`."""

    def __init__(self, reason: str, detail: str) -> None:
        assert reason in REJECTION_REASONS, reason
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


@dataclass(frozen=True)
class Limits:
    """Size caps enforced in code on every message (independent of socket options).

    Attributes
    ----------
    max_topic_bytes, max_header_bytes, max_payload_bytes : int
        Frame size caps in bytes.
    max_events : int
        Largest number of per-trial events in one message.
    max_cells : int
        Largest ``m_A * m_B * d_A * d_B`` of a declared scenario.
    """

    max_topic_bytes: int = 256
    max_header_bytes: int = 16 * 1024
    max_payload_bytes: int = 32 * 1024 * 1024
    max_events: int = 1 << 22
    max_cells: int = 1 << 16


DEFAULT_LIMITS = Limits()


@dataclass(frozen=True, eq=False)
class CountBatch:
    """One accepted data message, as a counts increment.

    Attributes
    ----------
    kind : str
        ``"hist"`` (settings held during the window) or ``"events"`` (per-trial settings).
    source, run : str
        Source id and run id; a new run id means the source restarted.
    seq : int
        Per-run sequence number of data messages (0, 1, 2, ...).
    t_start, t_stop : float
        Source-clock start and stop of the accumulation window, seconds.
    scenario : Scenario
    counts : ndarray, shape (m_A, m_B, d_A, d_B), int64, read-only
        The coincidence counts increment (events are binned into it).
    trials : int
        ``counts.sum()``.
    singles : tuple of tuple of int, or None
        Singles counts per detector of Alice and of Bob during the window.
    coincidence_window_s : float or None
        The counter's coincidence window in seconds.
    setting_probabilities : ndarray (m_A, m_B) or None
        Declared q(x, y) for random-setting (events) streams.
    events : ndarray (n, 4) uint8/uint16 or None
        The raw per-trial columns (x, y, a, b) in arrival order, for ``events`` messages.
    no_click : bool
        The last outcome of each party is the no-click event (the data need no fair-sampling
        assumption).
    """

    kind: str
    source: str
    run: str
    seq: int
    t_start: float
    t_stop: float
    scenario: Scenario
    counts: NDArray[np.int64]
    trials: int
    singles: tuple[tuple[int, ...], tuple[int, ...]] | None = None
    coincidence_window_s: float | None = None
    setting_probabilities: NDArray[np.float64] | None = None
    events: NDArray[np.integer] | None = field(default=None, repr=False)
    no_click: bool = False

    @property
    def random_settings(self) -> bool:
        """True for per-trial events with random setting choice."""
        return self.kind == "events"


@dataclass(frozen=True)
class SourceStatus:
    """A heartbeat/status message from the source.

    ``last_seq`` is the sequence number of the last data message the source sent in ``run``
    (``-1`` before the first), so a monitor can notice lost trailing messages.
    """

    source: str
    run: str
    t: float
    state: str
    last_seq: int
    message: str = ""


# --------------------------------------------------------------------------- parsing helpers


def _reject(reason: str, detail: str) -> MessageRejected:
    return MessageRejected(reason, detail[:300])  # details quote hostile input: keep them short


def _no_constants(name: str) -> Any:
    raise ValueError(f"non-finite number {name} is not valid JSON")


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in pairs:
        if k in out:
            raise ValueError(f"duplicate key {k!r}")
        out[k] = v
    return out


def _field(
    header: dict[str, Any], name: str, types: type | tuple[type, ...], required: bool = True
) -> Any:
    if name not in header:
        if required:
            raise _reject("header_field", f"missing field {name!r}")
        return None
    value = header[name]
    if isinstance(value, bool) and bool not in (types if isinstance(types, tuple) else (types,)):
        raise _reject("header_field", f"field {name!r} must be {types}, got a boolean")
    if not isinstance(value, types):
        raise _reject("header_field", f"field {name!r} has type {type(value).__name__}")
    return value


def _ident(header: dict[str, Any], name: str) -> str:
    value = _field(header, name, str)
    if not 1 <= len(value) <= 128 or not value.isprintable():
        raise _reject("header_field", f"field {name!r} must be 1-128 printable characters")
    return value


def _time(header: dict[str, Any], name: str) -> float:
    value = _field(header, name, (int, float))
    try:
        out = float(value)
    except OverflowError:  # an integer beyond the float range
        raise _reject("time_window", f"{name} is out of range") from None
    if not math.isfinite(out):
        raise _reject("time_window", f"{name} is not finite")
    return out


def _int_pair(value: Any, name: str) -> tuple[int, int]:
    if (
        not isinstance(value, list)
        or len(value) != 2
        or not all(isinstance(v, int) and not isinstance(v, bool) for v in value)
    ):
        raise _reject("scenario", f"{name} must be a list of two integers, got {value!r}"[:200])
    return int(value[0]), int(value[1])


def _scenario(header: dict[str, Any], limits: Limits) -> Scenario:
    sc = _field(header, "scenario", dict)
    settings = _int_pair(sc.get("settings"), "scenario.settings")
    outcomes = _int_pair(sc.get("outcomes"), "scenario.outcomes")
    try:
        scenario = Scenario(settings[0], settings[1], outcomes[0], outcomes[1])
    except ScenarioError as exc:
        raise _reject("scenario", str(exc)) from None
    if scenario.size > limits.max_cells:
        raise _reject("scenario", f"{scenario.size} cells exceed the cap {limits.max_cells}")
    return scenario


def _counts_array(payload: bytes, dtype: str, n_cells: int) -> NDArray[np.int64]:
    if dtype not in COUNT_DTYPES:
        raise _reject("dtype", f"count dtype {dtype!r} not in {COUNT_DTYPES}")
    dt = np.dtype(dtype)
    if len(payload) != n_cells * dt.itemsize:
        raise _reject(
            "payload_length",
            f"payload has {len(payload)} bytes, layout needs {n_cells} x {dt.itemsize}",
        )
    raw = np.frombuffer(payload, dtype=dt)
    if dt.kind == "i" and raw.size and raw.min() < 0:
        raise _reject("negative_counts", f"negative count {int(raw.min())}")
    if raw.size and raw.max() > MAX_CELL_COUNT:
        raise _reject("overflow", f"count {int(raw.max())} exceeds {MAX_CELL_COUNT}")
    return raw.astype(np.int64)


def _singles(
    header: dict[str, Any], scenario: Scenario
) -> tuple[tuple[int, ...], tuple[int, ...]] | None:
    value = header.get("singles")
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != 2:
        raise _reject("header_field", "singles must be [[Alice detectors...], [Bob detectors...]]")
    out = []
    for side in value:
        if not isinstance(side, list) or not 1 <= len(side) <= 64:
            raise _reject("header_field", "singles lists must hold 1-64 counts per party")
        for v in side:
            if not isinstance(v, int) or isinstance(v, bool):
                raise _reject("header_field", "singles counts must be integers")
            if v < 0:
                raise _reject("negative_counts", f"negative singles count {v}")
            if v > MAX_CELL_COUNT:
                raise _reject("overflow", f"singles count {v} exceeds {MAX_CELL_COUNT}")
        out.append(tuple(side))
    return out[0], out[1]


def _setting_probabilities(
    header: dict[str, Any], scenario: Scenario
) -> NDArray[np.float64] | None:
    value = header.get("setting_probabilities")
    if value is None:
        return None
    m_a, m_b = scenario.settings_a, scenario.settings_b
    if (
        not isinstance(value, list)
        or len(value) != m_a
        or not all(isinstance(row, list) and len(row) == m_b for row in value)
        or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for row in value for v in row
        )
    ):
        raise _reject(
            "header_field",
            f"setting_probabilities must be a {m_a} x {m_b} list of lists of numbers",
        )
    try:
        q = np.array(value, dtype=np.float64)
    except (TypeError, ValueError, OverflowError):
        raise _reject("header_field", "setting_probabilities must be a numeric matrix") from None
    if q.shape != (scenario.settings_a, scenario.settings_b):
        raise _reject(
            "header_field",
            f"setting_probabilities has shape {q.shape}, scenario needs "
            f"{(scenario.settings_a, scenario.settings_b)}",
        )
    if not np.all(np.isfinite(q)) or np.any(q <= 0) or abs(q.sum() - 1.0) > 1e-6:
        raise _reject("header_field", "setting_probabilities must be positive and sum to 1")
    q.setflags(write=False)
    return q


def _decode_header(raw: bytes, limits: Limits) -> dict[str, Any]:
    if len(raw) > limits.max_header_bytes:
        raise _reject("oversize", f"header of {len(raw)} bytes exceeds {limits.max_header_bytes}")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _reject(
            "header_encoding", f"header is not UTF-8 ({exc.reason} at byte {exc.start})"
        ) from None
    try:
        header = json.loads(text, parse_constant=_no_constants, object_pairs_hook=_unique_keys)
    except RecursionError:
        raise _reject("header_json", "header nesting too deep") from None
    except ValueError as exc:
        raise _reject("header_json", f"header is not valid JSON: {str(exc)[:160]}") from None
    if not isinstance(header, dict):
        raise _reject("header_json", f"header must be a JSON object, got {type(header).__name__}")
    return header


# --------------------------------------------------------------------------- public API


def parse_message(
    frames: Sequence[bytes], limits: Limits = DEFAULT_LIMITS
) -> CountBatch | SourceStatus:
    """Validate one multipart message and decode it.

    Parameters
    ----------
    frames : sequence of bytes
        The raw ZeroMQ frames as received.
    limits : Limits
        Size caps.

    Returns
    -------
    CountBatch or SourceStatus

    Raises
    ------
    MessageRejected
        With ``reason`` in :data:`REJECTION_REASONS` and a readable ``detail``.
    """
    if len(frames) != 3:
        raise _reject(
            "frame_count", f"expected 3 frames (topic, header, payload), got {len(frames)}"
        )
    topic_raw, header_raw, payload = (bytes(f) if not isinstance(f, bytes) else f for f in frames)
    if len(topic_raw) > limits.max_topic_bytes:
        raise _reject(
            "oversize", f"topic of {len(topic_raw)} bytes exceeds {limits.max_topic_bytes}"
        )
    if len(payload) > limits.max_payload_bytes:
        raise _reject(
            "oversize", f"payload of {len(payload)} bytes exceeds {limits.max_payload_bytes}"
        )
    try:
        topic = topic_raw.decode("utf-8")
    except UnicodeDecodeError:
        raise _reject("topic", "topic is not UTF-8") from None
    kind, _, topic_source = topic.partition("/")
    if kind not in KINDS:
        raise _reject("topic", f"topic kind {kind!r} not in {KINDS}")

    header = _decode_header(header_raw, limits)
    schema = header.get("schema")
    if schema != SCHEMA:
        raise _reject("schema", f"schema {str(schema)[:60]!r} is not {SCHEMA!r}")
    version = header.get("version")
    if type(version) is not int or version != VERSION:
        raise _reject(
            "version", f"version {str(version)[:20]!r} not supported (this is v{VERSION})"
        )
    if _field(header, "kind", str) != kind:
        raise _reject(
            "header_field", f"header kind {header['kind']!r} does not match topic {kind!r}"
        )
    source = _ident(header, "source")
    if topic_source and topic_source != source:
        raise _reject("topic", f"topic source {topic_source!r} does not match header {source!r}")
    run = _ident(header, "run")

    if kind == "status":
        state = _field(header, "state", str)
        if state not in SOURCE_STATES:
            raise _reject("header_field", f"state {state!r} not in {SOURCE_STATES}")
        last_seq = _field(header, "last_seq", int)
        if not -1 <= last_seq <= (1 << 62):
            raise _reject("header_field", f"last_seq {last_seq} out of range -1..2**62"[:120])
        text = header.get("message", "")
        if not isinstance(text, str):
            raise _reject("header_field", "message must be a string")
        if payload:
            raise _reject("payload_length", "status messages carry an empty payload")
        return SourceStatus(source, run, _time(header, "t"), state, last_seq, text[:500])

    seq = _field(header, "seq", int)
    if seq < 0 or seq > (1 << 62):
        raise _reject("header_field", f"seq {seq} out of range 0..2**62"[:120])
    t_start, t_stop = _time(header, "t_start"), _time(header, "t_stop")
    if t_stop < t_start:
        raise _reject("time_window", f"t_stop {t_stop} before t_start {t_start}")
    scenario = _scenario(header, limits)
    layout = _field(header, "layout", str)
    dtype = _field(header, "dtype", str)
    no_click = header.get("no_click", False)
    if not isinstance(no_click, bool):
        raise _reject("header_field", "no_click must be true or false")
    window = header.get("coincidence_window_s")
    if window is not None and (
        isinstance(window, bool) or not isinstance(window, (int, float)) or not 0 < window < 1
    ):
        raise _reject("header_field", "coincidence_window_s must be a number in (0, 1) s")
    singles = _singles(header, scenario)
    m_a, m_b, d_a, d_b = scenario.shape
    events = None

    if kind == "hist":
        if layout == "all":
            counts = _counts_array(payload, dtype, scenario.size).reshape(scenario.shape)
        elif layout == "pair":
            x, y = _int_pair(header.get("pair"), "pair")
            if not (0 <= x < m_a and 0 <= y < m_b):
                raise _reject("scenario", f"pair {(x, y)} outside settings {(m_a, m_b)}")
            block = _counts_array(payload, dtype, d_a * d_b).reshape(d_a, d_b)
            counts = np.zeros(scenario.shape, dtype=np.int64)
            counts[x, y] = block
        else:
            raise _reject("layout", f"histogram layout {layout!r} not in ('pair', 'all')")
        q = None
    else:
        if layout != "xyab":
            raise _reject("layout", f"events layout {layout!r} is not 'xyab'")
        if dtype not in EVENT_DTYPES:
            raise _reject("dtype", f"event dtype {dtype!r} not in {EVENT_DTYPES}")
        n_events = _field(header, "n_events", int)
        if not 0 <= n_events <= limits.max_events:
            raise _reject("oversize", f"n_events {n_events} outside 0..{limits.max_events}")
        dt = np.dtype(dtype)
        if len(payload) != n_events * 4 * dt.itemsize:
            raise _reject(
                "payload_length",
                f"payload has {len(payload)} bytes, {n_events} events x 4 columns x "
                f"{dt.itemsize} bytes need {n_events * 4 * dt.itemsize}",
            )
        events = np.frombuffer(payload, dtype=dt).reshape(n_events, 4)
        if n_events:
            maxima = events.max(axis=0)
            caps = (m_a, m_b, d_a, d_b)
            for col, name in enumerate("xyab"):
                if int(maxima[col]) >= caps[col]:
                    raise _reject(
                        "event_range", f"column {name} has value {int(maxima[col])} >= {caps[col]}"
                    )
        flat = (
            (events[:, 0].astype(np.int64) * m_b + events[:, 1]) * d_a + events[:, 2]
        ) * d_b + events[:, 3]
        counts = np.bincount(flat, minlength=scenario.size).reshape(scenario.shape).astype(np.int64)
        q = _setting_probabilities(header, scenario)

    counts.setflags(write=False)
    return CountBatch(
        kind=kind,
        source=source,
        run=run,
        seq=seq,
        t_start=t_start,
        t_stop=t_stop,
        scenario=scenario,
        counts=counts,
        trials=int(counts.sum()),
        singles=singles,
        coincidence_window_s=None if window is None else float(window),
        setting_probabilities=q,
        events=events,
        no_click=no_click,
    )


# --------------------------------------------------------------------------- encoding


def _header_bytes(fields: dict[str, Any]) -> bytes:
    return json.dumps(fields, separators=(",", ":"), allow_nan=False).encode("utf-8")


def _common(
    kind: str, source: str, run: str, seq: int, t_start: float, t_stop: float, scenario: Scenario
) -> dict[str, Any]:
    return {
        "schema": SCHEMA,
        "version": VERSION,
        "kind": kind,
        "source": source,
        "run": run,
        "seq": int(seq),
        "t_start": float(t_start),
        "t_stop": float(t_stop),
        "scenario": {
            "settings": [scenario.settings_a, scenario.settings_b],
            "outcomes": [scenario.outcomes_a, scenario.outcomes_b],
        },
    }


def encode_histogram(
    *,
    source: str,
    run: str,
    seq: int,
    t_start: float,
    t_stop: float,
    counts: NDArray[np.integer],
    scenario: Scenario,
    pair: tuple[int, int] | None = None,
    singles: tuple[Sequence[int], Sequence[int]] | None = None,
    coincidence_window_s: float | None = None,
    no_click: bool = False,
    dtype: str = "<u4",
) -> list[bytes]:
    """Frames of a histogram-increment message.

    ``counts`` has shape ``(d_A, d_B)`` when ``pair=(x, y)`` is given (one setting pair held
    during the window), else the full ``(m_A, m_B, d_A, d_B)``.
    """
    fields = _common("hist", source, run, seq, t_start, t_stop, scenario)
    fields["layout"] = "all" if pair is None else "pair"
    if pair is not None:
        fields["pair"] = [int(pair[0]), int(pair[1])]
    fields["dtype"] = dtype
    if singles is not None:
        fields["singles"] = [[int(v) for v in singles[0]], [int(v) for v in singles[1]]]
    if no_click:
        fields["no_click"] = True
    if coincidence_window_s is not None:
        fields["coincidence_window_s"] = float(coincidence_window_s)
    payload = np.ascontiguousarray(counts, dtype=np.dtype(dtype)).tobytes()
    return [f"hist/{source}".encode(), _header_bytes(fields), payload]


def encode_events(
    *,
    source: str,
    run: str,
    seq: int,
    t_start: float,
    t_stop: float,
    events: NDArray[np.integer],
    scenario: Scenario,
    setting_probabilities: NDArray[np.float64] | None = None,
    singles: tuple[Sequence[int], Sequence[int]] | None = None,
    coincidence_window_s: float | None = None,
    no_click: bool = False,
) -> list[bytes]:
    """Frames of a per-trial events message; ``events`` has shape ``(n, 4)``: x, y, a, b."""
    ev = np.asarray(events)
    dtype = "|u1" if max(scenario.shape) <= 255 else "<u2"
    fields = _common("events", source, run, seq, t_start, t_stop, scenario)
    fields.update(layout="xyab", dtype=dtype, n_events=int(ev.shape[0]))
    if setting_probabilities is not None:
        fields["setting_probabilities"] = np.asarray(setting_probabilities, dtype=float).tolist()
    if singles is not None:
        fields["singles"] = [[int(v) for v in singles[0]], [int(v) for v in singles[1]]]
    if no_click:
        fields["no_click"] = True
    if coincidence_window_s is not None:
        fields["coincidence_window_s"] = float(coincidence_window_s)
    payload = np.ascontiguousarray(ev, dtype=np.dtype(dtype)).tobytes()
    return [f"events/{source}".encode(), _header_bytes(fields), payload]


def encode_status(
    *, source: str, run: str, t: float, state: str, last_seq: int, message: str = ""
) -> list[bytes]:
    """Frames of a heartbeat/status message (empty payload)."""
    if state not in SOURCE_STATES:
        raise ValueError(f"state {state!r} not in {SOURCE_STATES}")
    fields = {
        "schema": SCHEMA,
        "version": VERSION,
        "kind": "status",
        "source": source,
        "run": run,
        "t": float(t),
        "state": state,
        "last_seq": int(last_seq),
        "message": message,
    }
    return [f"status/{source}".encode(), _header_bytes(fields), b""]
