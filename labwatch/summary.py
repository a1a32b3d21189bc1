"""Plain-data summaries of snapshots for JSON output, console lines and reports (view layer)."""

from __future__ import annotations

import math
from typing import Any

from labwatch.snapshot import Snapshot, StreamHealth, to_jsonable

__all__ = ["DEFAULT_SILENCE_S", "health_dict", "silence_s", "summary_dict", "status_line"]

#: A stream quiet for this many wall seconds is shown as "NO DATA" (the simulator sends data
#: every 0.1 s and a heartbeat every second; protocol v1 asks for one every few seconds).
DEFAULT_SILENCE_S = 3.0


def silence_s(h: StreamHealth, now: float) -> float | None:
    """Wall seconds since the last message of any kind (``now`` on the receive clock), or None.

    None before the first message (or when the receive times are unknown).
    """
    last = h.last_message_wall
    if last is None or not math.isfinite(last):
        return None
    return max(0.0, now - last)


def health_dict(h: StreamHealth, now: float | None = None) -> dict[str, Any]:
    """Stream-health counters as a JSON-able dict.

    With ``now`` (wall clock, s) it also holds ``silence_s``: seconds since the last message.
    """
    out = {
        "messages": h.messages,
        "accepted": h.accepted,
        "rejected": h.rejected,
        "rejections_by_reason": dict(h.rejections_by_reason),
        "recent_rejections": [
            {"reason": r.reason, "detail": r.detail} for r in h.recent_rejections
        ],
        "gaps": h.gaps,
        "missing": h.missing,
        "missed_at_start": h.missed_at_start,
        "late": h.late,
        "duplicates": h.duplicates,
        "restarts": h.restarts,
        "clock_jumps": h.clock_jumps,
        "heartbeats": h.heartbeats,
        "source_state": h.source_state,
    }
    if now is not None:
        out["silence_s"] = to_jsonable(silence_s(h, now))
    return out


def _bell(v: Any) -> dict[str, Any] | None:
    if v is None:
        return None
    return to_jsonable(
        {
            "value": v.value,
            "stderr": v.stderr,
            "local_bound": v.local_bound,
            "margin_sigma": v.margin_sigma,
            "assumptions": list(v.assumptions),
        }
    )


def summary_dict(
    snapshot: Snapshot | None, health: StreamHealth, now: float | None = None
) -> dict[str, Any]:
    """The figures of the latest snapshot plus stream health, as one JSON-able dict.

    Top-level keys always present: ``messages``, ``rejected``, ``gaps``, ``coincidences``,
    ``chsh`` (``{"value", "stderr", ...}``; values null when the stream is not CHSH-shaped or
    had no data), ``bell`` (the selected functional), ``health`` and ``figures``; with ``now``
    also ``silence_s`` (see :func:`health_dict`).
    """
    out: dict[str, Any] = health_dict(health, now)
    out["coincidences"] = 0 if snapshot is None else snapshot.trials
    out["chsh"] = {"value": None, "stderr": None}
    out["bell"] = None
    out["figures"] = {}
    if snapshot is None:
        return out
    out.update(
        source=snapshot.source,
        run=snapshot.run,
        run_index=snapshot.run_index,
        scenario=to_jsonable(snapshot.scenario),
        settings_mode="random" if snapshot.random_settings else "blocks",
        source_time_s=[snapshot.t_start, snapshot.t_stop],
        live_time_s=snapshot.live_time_s,
        window_s=snapshot.window_s,
        window_coincidences=snapshot.window_trials,
        functional=snapshot.functional,
        rates=to_jsonable(snapshot.rates),
        counts=snapshot.counts.tolist(),
    )
    bell = _bell(snapshot.bell)
    out["bell"] = bell
    out["bell_window"] = _bell(snapshot.bell_window)
    if snapshot.functional.startswith("CHSH") and bell is not None:
        out["chsh"] = bell
    if snapshot.correlators is not None:
        out["correlators"] = to_jsonable(
            {"value": snapshot.correlators, "stderr": snapshot.correlator_errors}
        )
    out["contrast"] = to_jsonable(snapshot.contrast)
    out["figures"] = {f.name: to_jsonable(f) for f in snapshot.figures}
    extras = {k: to_jsonable(v) for k, v in snapshot.extras.items()}
    # the functional's bounds live beside its name, which stays a plain string
    if "functional" in extras:
        extras["functional_info"] = extras.pop("functional")
    out.update(extras)
    return out


def _num(v: float | None, fmt: str = ".4f") -> str:
    if v is None or not math.isfinite(v):
        return "—"
    return format(v, fmt)


def status_line(
    snapshot: Snapshot | None,
    health: StreamHealth,
    now: float | None = None,
    silence_after_s: float = DEFAULT_SILENCE_S,
) -> str:
    """One console line: rate, Bell value ± σ, margin, rejections, gaps.

    With ``now`` (wall clock of the receive times, s), a stream silent for at least
    ``silence_after_s`` seconds starts the line with ``NO DATA for N s`` (the figures after it
    are the last ones known).
    """
    parts = [f"msgs {health.messages}", f"rej {health.rejected}", f"gaps {health.gaps}"]
    if health.missing:
        parts.append(f"missing {health.missing}")
    quiet = None if now is None else silence_s(health, now)
    alarm = []
    if quiet is not None and quiet >= silence_after_s:
        state = f"; source last said {health.source_state!r}" if health.source_state else ""
        alarm = [f"NO DATA for {quiet:.0f} s{state}"]
    if snapshot is None:
        return " | ".join(alarm + ["waiting for data"] + parts)
    head = [f"run {snapshot.run}", f"{_num(snapshot.rates.coincidence_hz, '.0f')} c/s"]
    if snapshot.bell is not None:
        b = snapshot.bell
        head.append(
            f"{snapshot.functional} {_num(b.value)} ± {_num(b.stderr)}"
            f" ({_num(b.margin_sigma, '.1f')} σ over {b.local_bound:g}; fixed n, Gaussian, i.i.d.)"
        )
    for f in snapshot.figures:
        if f.name == "visibility":
            head.append(f"v* {_num(f.value)} ± {_num(f.stderr)}")
        elif f.name == "p_value":
            head.append(f"p ≤ {_num(f.value, '.2e')} vs local realism (stopping-safe)")
    target = snapshot.extras.get("target")
    if isinstance(target, dict) and target.get("met"):
        head.append("TARGET MET")
    return " | ".join(alarm + head + parts)
