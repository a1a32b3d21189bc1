"""``labwatch watch``: subscribe, print a status line per second, optionally JSON at the end."""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time

import numpy as np

from labwatch.analysis import AnalysisConfig
from labwatch.bell import BellFunctional
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.session import LiveSession
from labwatch.summary import DEFAULT_SILENCE_S, status_line, summary_dict
from labwatch.transport import check_endpoint

__all__ = ["run_watch", "functional_option"]


def functional_option(text: str) -> str | BellFunctional:
    """A named functional or a ``.npy`` coefficient tensor file."""
    if text.endswith(".npy"):
        return BellFunctional(np.load(text, allow_pickle=False), name=text.rsplit("/", 1)[-1][:-4])
    return text


def engine_from_args(args: argparse.Namespace) -> MonitorEngine:
    """A MonitorEngine configured from watch/analyze options."""
    analysis = AnalysisConfig(
        functional=functional_option(args.functional),
        visibility=not args.no_lp,
        bootstrap=args.bootstrap,
        target=getattr(args, "target", None),
    )
    return MonitorEngine(EngineConfig(window_s=args.window, epoch_s=args.epoch, analysis=analysis))


def run_watch(args: argparse.Namespace) -> int:
    """Run the watch command.

    Exit code 0, or 3 when a requested recording failed during the run (the figures are still
    printed; ``recording_error`` says what happened).  Bad endpoints or options raise.
    """
    check_endpoint(args.endpoint)
    engine = engine_from_args(args)
    curve = client_keys_from_args(args)
    recorder = None
    if args.record:
        from labwatch.recording import RecordWriter

        recorder = RecordWriter(
            args.record, metadata={"endpoint": args.endpoint, "command": "watch"}
        )
    session = LiveSession(args.endpoint, engine, recorder=recorder, curve=curve)
    started = time.time()
    silence_after = getattr(args, "silence", DEFAULT_SILENCE_S)
    stopper = None
    if args.stop_source and args.target and "v" in args.target.split("<")[0]:
        print(
            "labwatch watch: warning: the visibility target uses a fixed-n (Gaussian) bound; "
            "checking it at every epoch and stopping on it is not stopping-safe",
            file=sys.stderr,
        )
    if not args.quiet:
        print(
            "labwatch watch: reads counts only; it never replaces an interlock. Follow your "
            "lab's laser and detector safety rules.",
            file=sys.stderr,
        )
    if args.stop_source:
        from labwatch.control import StopOnTarget

        stopper = StopOnTarget(args.control or _control_default(args.endpoint), curve=curve)

    met_wall: float | None = None

    def target_met(snapshot) -> None:
        # fires once, inside ingest, at the snapshot where the target is first met
        nonlocal met_wall
        met_wall = time.time()
        target = snapshot.extras["target"]
        msg = (
            f"TARGET MET: {target['description']} ({target['reason']}) after "
            f"{target['trials']} trials, {target['met_at_source_time']:.1f} s of source time"
        )
        print(msg, file=sys.stderr if args.json else sys.stdout, flush=True)
        if stopper is not None:
            reply = stopper.send_stop()
            print(f"stop command to the source: {reply}", file=sys.stderr, flush=True)
        session.stop()

    engine.on_target(target_met)

    def tick(snapshot, health) -> bool:
        if not args.quiet:
            line = status_line(snapshot, health, now=time.time(), silence_after_s=silence_after)
            link = session.link
            if link.handshake_failures and not link.connected:
                line += f" | {link.last_problem}"
            if session.recording_error:
                line += f" | {session.recording_error}"
            print(line, file=sys.stderr if args.json else sys.stdout, flush=True)
        return met_wall is not None

    try:
        final = session.run_blocking(args.duration, on_tick=tick)
    finally:
        if recorder is not None:
            try:
                recorder.close()
            except OSError as exc:  # the failure surfaced only at the final flush
                if session.recording_error is None:
                    session.recording_error = f"recording stopped: {exc}"
    now = time.time()
    out = summary_dict(final, engine.health(), now=now)
    out["wall_time_s"] = now - started
    out["source_silent"] = bool(out["silence_s"] is None or out["silence_s"] >= silence_after)
    out["unseen_at_last_status"] = engine.unseen_at_last_status
    out["link"] = dataclasses.asdict(session.link)
    target = out.get("target")
    out["target_met"] = bool(isinstance(target, dict) and target.get("met"))
    if met_wall is not None:
        out["target_met_after_wall_s"] = met_wall - started
    if stopper is not None:
        out["stop_command"] = stopper.result
    if recorder is not None:
        out["recorded"] = session.recorded
        out["not_recorded"] = session.not_recorded
    if session.recording_error:
        out["recording_error"] = session.recording_error
        print(f"labwatch watch: {session.recording_error}", file=sys.stderr, flush=True)
    if args.json:
        print(json.dumps(out, allow_nan=False))
    return 3 if session.recording_error else 0


def _control_default(endpoint: str) -> str:
    """The convention: the control socket is on the data port + 1 (tcp endpoints only)."""
    head, _, port = endpoint.rpartition(":")
    if not endpoint.startswith("tcp://") or not port.isdigit():
        raise ValueError(f"give --control explicitly for the non-tcp endpoint {endpoint!r}")
    return f"{head}:{int(port) + 1}"


def client_keys_from_args(args: argparse.Namespace):
    """CurveZMQ client keys from ``--server-public-key``/``--client-key``, or None."""
    if getattr(args, "server_public_key", None) is None:
        if getattr(args, "client_key", None) is not None:
            raise ValueError("--client-key needs --server-public-key (the source's .key file)")
        return None
    from labwatch.security import ClientKeys

    return ClientKeys.from_files(args.server_public_key, args.client_key)
