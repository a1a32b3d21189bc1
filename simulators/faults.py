"""Fault injection for the simulated publisher: malformed frames, dropped, repeated and
reordered messages, jumps of the source clock.

Used by tests and demos to show that the monitor rejects bad input with a reason, detects gaps
from sequence numbers and never double counts.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np

__all__ = ["FAULT_KINDS", "FaultConfig", "malformed_variant", "parse_faults"]

#: The malformed-message variants :func:`malformed_variant` can produce.
FAULT_KINDS = (
    "random_bytes",
    "frame_count",
    "bad_json",
    "wrong_schema",
    "wrong_shape",
    "negative",
    "bad_dtype",
)


@dataclass(frozen=True)
class FaultConfig:
    """Probabilities (per data message) of each fault.

    Attributes
    ----------
    malformed : float
        Send a malformed message (one of :data:`FAULT_KINDS`) in addition to the real one.
    drop : float
        Skip a message: its sequence number is used but nothing is sent (a gap).
    duplicate : float
        Send a message twice (the monitor must reject the copy).
    reorder : float
        Hold a message back and send it after the next one.
    garbage_only : bool
        Send only malformed messages (no valid data at all).
    clock_jumps : tuple of (int, float)
        ``(seq, delta_s)`` pairs: from data message ``seq`` on, every source timestamp is
        shifted by a further ``delta_s`` seconds (negative: the clock jumps backwards).
    """

    malformed: float = 0.0
    drop: float = 0.0
    duplicate: float = 0.0
    reorder: float = 0.0
    garbage_only: bool = False
    clock_jumps: tuple[tuple[int, float], ...] = ()

    def __post_init__(self) -> None:
        for name in ("malformed", "drop", "duplicate", "reorder"):
            v = getattr(self, name)
            if not 0.0 <= v <= 1.0:
                raise ValueError(f"fault probability {name}={v!r} must be in [0, 1]")
        for jump in self.clock_jumps:
            if len(jump) != 2 or int(jump[0]) != jump[0] or jump[0] < 0 or not np.isfinite(jump[1]):
                raise ValueError(f"clock jump {jump!r} must be (seq >= 0, finite seconds)")

    @property
    def any(self) -> bool:
        return (
            self.garbage_only
            or bool(self.clock_jumps)
            or any((self.malformed, self.drop, self.duplicate, self.reorder))
        )

    def clock_offset(self, seq: int) -> float:
        """Total source-clock shift (s) of data message ``seq``."""
        return float(sum(delta for at, delta in self.clock_jumps if seq >= at))


def parse_faults(text: str | None) -> FaultConfig:
    """Parse ``"malformed=0.1,drop=0.02,duplicate=0.01,reorder=0.01"`` or ``"garbage"``.

    ``jump=SEQ:DELTA`` (repeatable) shifts the source clock by ``DELTA`` seconds from data
    message ``SEQ`` on, e.g. ``"jump=40:-20,jump=80:500"``.
    """
    if not text:
        return FaultConfig()
    if text.strip() == "garbage":
        return FaultConfig(garbage_only=True)
    values: dict[str, float] = {}
    jumps: list[tuple[int, float]] = []
    allowed = ("malformed", "drop", "duplicate", "reorder")
    for part in text.split(","):
        key, sep, val = part.partition("=")
        key = key.strip()
        if key == "jump" and sep:
            at, colon, delta = val.partition(":")
            try:
                jumps.append((int(at), float(delta)))
            except ValueError:
                colon = ""
            if not colon:
                raise ValueError(f"fault {part!r}: expected jump=SEQ:SECONDS, e.g. jump=40:-20")
            continue
        if key not in allowed or not sep:
            raise ValueError(
                f"fault {part!r}: expected NAME=PROB with NAME in {allowed}, "
                "jump=SEQ:SECONDS, or 'garbage'"
            )
        try:
            values[key] = float(val)
        except ValueError:
            raise ValueError(f"fault {part!r}: {val!r} is not a probability") from None
    return FaultConfig(**values, clock_jumps=tuple(jumps))


def malformed_variant(
    rng: np.random.Generator, good: list[bytes], kind: str | None = None
) -> list[bytes]:
    """A malformed message derived from a good one (``kind`` random unless given)."""
    kind = kind or FAULT_KINDS[int(rng.integers(len(FAULT_KINDS)))]
    topic, header, payload = good
    if kind == "random_bytes":
        n = int(rng.integers(1, 4))
        return [rng.bytes(int(rng.integers(0, 64))) for _ in range(n)]
    if kind == "frame_count":
        return [topic, header] if rng.random() < 0.5 else [topic, header, payload, b"extra"]
    if kind == "bad_json":
        return [topic, header[: max(1, len(header) // 2)], payload]
    h = json.loads(header)
    if kind == "wrong_schema":
        h["schema"] = "some.other.schema"
    elif kind == "wrong_shape":
        payload = payload + b"\x00" * 4
    elif kind == "negative":
        h["dtype"] = "<i4" if h.get("kind") == "hist" else h["dtype"]
        if h.get("kind") == "hist":
            payload = np.full(len(payload) // 4, -5, dtype="<i4").tobytes()
        else:
            h["n_events"] = int(h.get("n_events", 0)) + 1
    elif kind == "bad_dtype":
        h["dtype"] = ">f8"
    return [topic, json.dumps(h).encode(), payload]
