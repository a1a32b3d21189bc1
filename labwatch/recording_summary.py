"""Plain-data descriptions of a recording and of its replay, for JSON output and reports (view).

Everything here is a pure function of a :class:`~labwatch.replay.ReplayResult` (and the
file's digest), so the ``analyze`` JSON of a file is the same every time it is computed;
wall-clock facts of the replay itself (how long it took) are left out on purpose.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Mapping
from typing import Any

from labwatch.recording import DamagedRegion, TailReport
from labwatch.replay import ReplayResult
from labwatch.snapshot import to_jsonable

__all__ = [
    "LIVE_ONLY_FIELDS",
    "TIMING_FIELDS",
    "file_sha256",
    "recording_dict",
    "replay_comparable",
    "tail_dict",
]

#: Top-level fields of ``watch --json`` that a recording cannot reproduce: the live wall
#: clock at the end of watch (``wall_time_s``, ``silence_s``, ``source_silent``), the ZeroMQ
#: connection (``link``), the source's reply to a stop command (``stop_command``) and the
#: live recorder's own counters (``recorded``, ``not_recorded``, ``recording_error``).
LIVE_ONLY_FIELDS = (
    "wall_time_s",
    "silence_s",
    "source_silent",
    "link",
    "stop_command",
    "recorded",
    "not_recorded",
    "recording_error",
)
#: Nested fields ``(key, subkey)`` that time the analysis itself (wall seconds of the LP
#: solve), measured anew by every run.
TIMING_FIELDS = (("visibility", "solve_time_s"),)

_HASH_CHUNK = 1 << 20


def replay_comparable(summary: Mapping[str, Any]) -> dict[str, Any]:
    """The part of a ``watch --json`` / ``analyze --json`` object that a replay reproduces.

    Drops :data:`LIVE_ONLY_FIELDS`, :data:`TIMING_FIELDS` and ``"recording"`` (what analyze
    adds); everything left is equal, bit for bit, between a live run and its replay with the
    same options.
    """
    out = {k: v for k, v in summary.items() if k not in LIVE_ONLY_FIELDS and k != "recording"}
    for head, leaf in TIMING_FIELDS:
        if isinstance(out.get(head), Mapping):
            out[head] = {k: v for k, v in out[head].items() if k != leaf}
    return out


def file_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 of the file's bytes, lowercase hex."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(_HASH_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def tail_dict(tail: TailReport | None) -> dict[str, Any] | None:
    """The tail report as a dict (None when the replay stopped before the end)."""
    if tail is None:
        return None
    return {
        "status": tail.status,
        "offset": tail.offset,
        "bytes_lost": tail.bytes_lost,
        "file_size": tail.file_size,
        "reason": tail.reason,
    }


def _damaged(d: DamagedRegion) -> dict[str, Any]:
    return {"offset": d.offset, "length": d.length, "reason": d.reason}


def recording_dict(result: ReplayResult, sha256: str | None = None) -> dict[str, Any]:
    """What the recording held and how it read back, as a JSON-able dict.

    Keys: ``path``, ``sha256`` (when given), ``created_wall`` (Unix s), ``metadata`` (the
    header's JSON object), ``records``, ``messages``, ``accepted_records``,
    ``rejected_records``, ``annotations``, ``new_runs``, ``not_recorded`` (messages the live
    recorder refused, e.g. over-size), ``verdict_changes``, ``recorded_span_s``, ``damaged``
    (list of ``{offset, length, reason}``), ``tail`` (see :func:`tail_dict`), ``complete``.
    """
    out: dict[str, Any] = {"path": result.path}
    if sha256 is not None:
        out["sha256"] = sha256
    out.update(
        created_wall=result.header.created_wall,
        metadata=result.header.metadata,
        records=result.records,
        messages=result.messages,
        accepted_records=result.accepted_records,
        rejected_records=result.rejected_records,
        annotations=result.annotations,
        new_runs=result.new_runs,
        not_recorded=result.not_recorded,
        verdict_changes=result.verdict_changes,
        recorded_span_s=result.recorded_span_s,
        damaged=[_damaged(d) for d in result.damaged],
        tail=tail_dict(result.tail),
        complete=result.completed
        and not result.damaged
        and bool(result.tail and result.tail.clean),
    )
    return to_jsonable(out)
