"""Runs of small histogram messages decoded together: the fast lane of the live monitor.

A counter that holds its settings publishes a steady stream of near-identical ``hist``
messages: the same source, run, scenario, dtype and field set, with only the sequence
number, the times, the setting pair, the singles and any extra fields changing.  Decoding
such a stream message by message costs more than receiving it, so the monitor decodes runs
of them into columns (:class:`HistBlock`) and folds each run into the counts with a few
numpy calls.

Contract: a message goes into a block only if :func:`labwatch.protocol.parse_message` would
accept it with exactly the values the block holds; anything unusual ends the block and the
message takes the full path, which gives the result or the rejection with its reason.
(tests/unit/test_hist_block.py checks this on mutated messages, and that the engine's
snapshots are the same whether a stream is ingested in blocks or one message at a time.)

How the shortcut stays exact
----------------------------
* A lane opens on a message the full path accepted; its header, decoded by the standard
  library with the duplicate-key check, becomes a typed schema (:class:`HistSignature`):
  every one of its fields is required and no other is allowed, the fixed fields (schema,
  version, kind, source, run, layout, dtype, scenario) are literals, and numbers carry the
  full path's types and ranges.  msgspec decodes and checks each following header against
  that schema in one C call (booleans are not integers there, nor floats integers).
* A repeated key would be taken silently by msgspec (the last one wins), so the header's
  colons are counted: every key is followed by one, and with all fields present and no
  more colons than fields no key can occur twice.  Colons inside strings need the slower
  count of ``":`` and ``" :`` (tabs, newlines and double spaces, which could hide a key's
  colon from it, end the block).
* Extra fields keep any value both parsers accept.  A header with more than 64 ``[`` takes
  the full path; with objects bounded by the colon count, nesting then stays far below
  either parser's recursion limit, so stack depth cannot make them disagree.
* ``no_click`` and the coincidence window must equal the first message's.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Annotated, Any, Literal

import msgspec
import numpy as np
from numpy.typing import NDArray

from labwatch.protocol import (
    _DTYPES,
    DEFAULT_LIMITS,
    MAX_CELL_COUNT,
    CountBatch,
    Limits,
    _decode_header,
)
from labwatch.scenario import Scenario

__all__ = ["HistBlock", "HistSignature", "decode_hist_block", "hist_signature"]

_FIXED_FIELDS = ("schema", "version", "kind", "source", "run", "layout", "dtype")
_MAX_SEQ = 1 << 62
# |t| beyond this takes the full path (window-bin indices must fit in int64)
_MAX_TIME_S = 1e12
_MAX_BRACKETS = 64
# Headers with more fields take the full path (a lane's schema costs time per field to build)
_MAX_FIELDS = 64
_Time = Annotated[float, msgspec.Meta(gt=-_MAX_TIME_S, lt=_MAX_TIME_S)]
_Count = Annotated[int, msgspec.Meta(ge=0, le=MAX_CELL_COUNT)]


@dataclass(frozen=True, eq=False)
class HistSignature:
    """What every message of a lane shares with its first (fully validated) one.

    Attributes
    ----------
    topic : bytes
        The topic frame, byte for byte.
    source, run : str
    scenario : Scenario
    n_keys : int
        Field names in the header, the scenario object's included.
    decoder : msgspec.json.Decoder
        Decodes a header of this lane into a typed record, or raises.
    getter : callable
        Record -> ``(seq, t_start, t_stop, pair, singles or None, no_click, window)``.
    tail : tuple
        ``(no_click, coincidence window or None)`` of the first message.
    singles_lengths : (int, int) or None
        Detectors per party in ``singles``; None when the field is absent or null.
    dtype : numpy dtype
        Count dtype of the payload.
    payload_bytes : int
        Payload length of one message (``d_A * d_B`` counts).
    limits : Limits
        The size caps the first message was checked against (a lane serves only them).
    """

    topic: bytes
    source: str
    run: str
    scenario: Scenario
    n_keys: int
    decoder: msgspec.json.Decoder = field(repr=False)
    getter: Callable[[Any], tuple[Any, ...]] = field(repr=False)
    tail: tuple[bool, float | None]
    singles_lengths: tuple[int, int] | None
    dtype: np.dtype
    payload_bytes: int
    limits: Limits

    @property
    def no_click(self) -> bool:
        """The lane's ``no_click`` flag."""
        return self.tail[0]

    @property
    def coincidence_window_s(self) -> float | None:
        """The lane's coincidence window (s), or None."""
        return self.tail[1]


@dataclass(frozen=True, eq=False)
class HistBlock:
    """Consecutive ``hist``/``pair`` messages of one lane, as columns (message order).

    Attributes
    ----------
    signature : HistSignature
    first_seq : int
        Sequence number of the first message; the others follow without a gap.
    t_start, t_stop : list of float
        Source-clock window of each message, seconds (finite, ``t_stop >= t_start``).
    pair_index : ndarray (n,) intp
        ``x * m_B + y`` of each message's setting pair.
    counts : ndarray (n, d_A * d_B) int64
        Each message's counts block, row-major over ``(a, b)``.
    trials : ndarray (n,) int64
        Row sums of ``counts``.
    singles : ndarray (n, 2) int64 or None
        Each message's singles summed over each party's detectors.
    """

    signature: HistSignature
    first_seq: int
    t_start: list[float]
    t_stop: list[float]
    pair_index: NDArray[np.intp]
    counts: NDArray[np.int64]
    trials: NDArray[np.int64]
    singles: NDArray[np.int64] | None

    @property
    def size(self) -> int:
        """Number of messages in the block."""
        return len(self.t_stop)


def _field_type(name: str, value: Any, scenario: Scenario) -> Any:
    """The msgspec type a lane message's field ``name`` must match (first value ``value``)."""
    if name in _FIXED_FIELDS:
        return Literal[value]  # str or (version) int
    if name == "seq":
        return Annotated[int, msgspec.Meta(ge=0, le=_MAX_SEQ)]
    if name in ("t_start", "t_stop"):
        return _Time
    if name == "scenario":
        return msgspec.defstruct(
            "LaneScenario",
            [
                ("settings", tuple[Literal[scenario.settings_a], Literal[scenario.settings_b]]),
                ("outcomes", tuple[Literal[scenario.outcomes_a], Literal[scenario.outcomes_b]]),
            ],
            forbid_unknown_fields=True,
            gc=False,
        )
    if name == "pair":
        return tuple[
            Annotated[int, msgspec.Meta(ge=0, lt=scenario.settings_a)],
            Annotated[int, msgspec.Meta(ge=0, lt=scenario.settings_b)],
        ]
    if name == "singles":
        if value is None:
            return None
        side_a = tuple.__class_getitem__((_Count,) * len(value[0]))
        side_b = tuple.__class_getitem__((_Count,) * len(value[1]))
        return tuple[side_a, side_b]
    if name == "no_click":
        return bool
    if name == "coincidence_window_s":
        return float if value is not None else None
    return Any  # a field the protocol ignores


def hist_signature(
    frames: Sequence[bytes], batch: CountBatch, limits: Limits = DEFAULT_LIMITS
) -> HistSignature | None:
    """The lane signature of an accepted message, or None if it cannot open a lane.

    ``batch`` must be what :func:`~labwatch.protocol.parse_message` returned for ``frames``.
    Only ``hist`` messages with the ``pair`` layout, a plain scenario object,
    floating-point times and at most 64 fields open a lane.
    """
    if batch.kind != "hist" or len(frames) != 3:
        return None
    topic, raw, payload = frames
    if type(topic) is not bytes or type(raw) is not bytes or type(payload) is not bytes:
        return None
    header = _decode_header(raw, limits)  # the full decoder: duplicate keys were ruled out
    if header.get("layout") != "pair" or set(header["scenario"]) != {"settings", "outcomes"}:
        return None
    if type(header["t_start"]) is not float or type(header["t_stop"]) is not float:
        return None
    if raw.count(b"[") > _MAX_BRACKETS or len(header) > _MAX_FIELDS:
        return None
    scenario = batch.scenario
    names = list(header)
    # positional field names: header keys need not be Python identifiers
    spec: list[tuple[Any, ...]] = [
        (f"f{i}", _field_type(k, header[k], scenario)) for i, k in enumerate(names)
    ]
    rename = {f"f{i}": k for i, k in enumerate(names)}
    # optional fields the lane's first message lacks: absent in every message too (a
    # message that has one holds a colon more than n_keys and takes the full path)
    for k, default in (("singles", None), ("no_click", False), ("coincidence_window_s", None)):
        if k not in header:
            spec.append((f"f{len(rename)}", None if default is None else bool, default))
            rename[f"f{len(rename)}"] = k
    try:
        record = msgspec.defstruct(
            "LaneHeader", spec, rename=rename, forbid_unknown_fields=True, gc=False
        )
    except (ValueError, TypeError, UnicodeError):
        return None  # a key msgspec cannot name (quote, backslash, control character, ...)
    slot = {k: f for f, k in rename.items()}
    getter = operator.attrgetter(
        *(slot[k] for k in ("seq", "t_start", "t_stop", "pair", "singles", "no_click",
                            "coincidence_window_s"))
    )  # fmt: skip
    singles = header.get("singles")
    dt = _DTYPES[header["dtype"]]
    return HistSignature(
        topic=topic,
        source=batch.source,
        run=batch.run,
        scenario=scenario,
        n_keys=len(header) + 2,
        decoder=msgspec.json.Decoder(record),
        getter=getter,
        tail=(batch.no_click, batch.coincidence_window_s),
        singles_lengths=None if singles is None else (len(singles[0]), len(singles[1])),
        dtype=dt,
        payload_bytes=scenario.outcomes_a * scenario.outcomes_b * dt.itemsize,
        limits=limits,
    )


def _keys_unique_slow(raw: bytes, n_keys: int) -> bool:
    """For a header holding all ``n_keys`` lane fields and more colons than that (colons
    inside strings): True if it still cannot repeat a key.

    Every key is followed by a colon, so with no more colons than fields no key occurs
    twice (the fast check, made inline by the caller).  With colons inside strings, count a
    closing quote followed by ``:`` or `` :`` instead; tabs, newlines and double spaces
    (which could put other whitespace before a key's colon and hide it from that count)
    are refused.
    """
    if b"\t" in raw or b"\n" in raw or b"\r" in raw or b'"  ' in raw:
        return False
    return raw.count(b'":') + raw.count(b'" :') == n_keys


def decode_hist_block(
    messages: Sequence[Sequence[bytes]],
    start: int,
    signature: HistSignature,
    first_seq: int,
    min_size: int = 1,
    max_size: int | None = None,
) -> HistBlock | None:
    """Decode ``messages[start:]`` as far as they form a block of ``signature``'s lane.

    The size caps are the signature's own (``signature.limits``).

    The block ends before the first message that differs from the signature, is not the
    next sequence number (``first_seq``, ``first_seq + 1``, ...), or fails a check the full
    parser makes, and after ``max_size`` messages.  Returns None when fewer than
    ``min_size`` messages qualify.
    """
    sig = signature
    if first_seq < 0 or first_seq + len(messages) > _MAX_SEQ:
        return None
    decode = sig.decoder.decode
    get = sig.getter
    error = msgspec.DecodeError  # ValidationError is a subclass
    topic0, nbytes, n_keys, tail = sig.topic, sig.payload_bytes, sig.n_keys, sig.tail
    max_header = sig.limits.max_header_bytes
    has_singles = sig.singles_lengths is not None
    seq = first_seq
    t0s: list[float] = []
    t1s: list[float] = []
    pairs: list[tuple[int, int]] = []
    singles: list[tuple[tuple[int, ...], tuple[int, ...]]] = []
    payloads: list[bytes] = []
    stop = len(messages) if max_size is None else min(len(messages), start + max_size)
    for i in range(start, stop):
        frames = messages[i]
        if len(frames) != 3:
            break
        topic, raw, payload = frames
        if (
            type(topic) is not bytes
            or topic != topic0
            or type(raw) is not bytes
            or type(payload) is not bytes
            or len(payload) != nbytes
            or len(raw) > max_header
            or raw.count(b"[") > _MAX_BRACKETS  # bounded nesting (module notes)
            or (raw.count(b":") != n_keys and not _keys_unique_slow(raw, n_keys))
        ):
            break
        try:
            values = get(decode(raw))
        except (error, RecursionError):
            break
        if values[0] != seq or values[5:] != tail:
            break
        t0s.append(values[1])
        t1s.append(values[2])
        pairs.append(values[3])
        if has_singles:
            singles.append(values[4])
        payloads.append(payload)
        seq += 1
    n = len(t1s)
    if n < max(min_size, 1):
        return None
    raw_counts = np.frombuffer(b"".join(payloads), dtype=sig.dtype).reshape(n, -1)
    bad = np.asarray(t1s) < np.asarray(t0s)
    if sig.dtype.kind == "i":
        bad |= (raw_counts < 0).any(axis=1)
    if sig.dtype.itemsize == 8:
        bad |= (raw_counts > MAX_CELL_COUNT).any(axis=1)
    if bad.any():  # the full path rejects that message: the block ends before it
        n = int(np.argmax(bad))
        if n < max(min_size, 1):
            return None
        del t0s[n:], t1s[n:], pairs[n:], singles[n:]
        raw_counts = raw_counts[:n]
    counts = raw_counts.astype(np.int64)
    xy = np.array(pairs, dtype=np.intp).reshape(n, 2)
    single_sums = None
    if has_singles:
        single_sums = np.array([(sum(a), sum(b)) for a, b in singles], dtype=np.int64)
    return HistBlock(
        signature=sig,
        first_seq=first_seq,
        t_start=t0s,
        t_stop=t1s,
        pair_index=xy[:, 0] * sig.scenario.settings_b + xy[:, 1],
        counts=counts,
        trials=counts.sum(axis=1),
        singles=single_sums,
    )
