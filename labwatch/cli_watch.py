"""``labwatch watch``: subscribe, print a status line per second, optionally JSON at the end."""

from __future__ import annotations

import argparse
import json
import sys
import time

import numpy as np

from labwatch.analysis import AnalysisConfig
from labwatch.bell import BellFunctional
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.session import LiveSession
from labwatch.summary import status_line, summary_dict
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
    """Run the watch command; exit code 0 unless the endpoint or options are bad."""
    check_endpoint(args.endpoint)
    engine = engine_from_args(args)
    recorder = None
    if args.record:
        from labwatch.recording import RecordWriter

        recorder = RecordWriter(
            args.record, metadata={"endpoint": args.endpoint, "command": "watch"}
        )
    session = LiveSession(
        args.endpoint, engine, recorder=recorder, curve=client_keys_from_args(args)
    )
    started = time.time()
    stopper = None
    if args.stop_source:
        from labwatch.control import StopOnTarget

        stopper = StopOnTarget(
            args.control or _control_default(args.endpoint), curve=client_keys_from_args(args)
        )

    def tick(snapshot, health) -> bool:
        if not args.quiet:
            line = status_line(snapshot, health)
            if session.recording_error:
                line += f" | {session.recording_error}"
            print(line, file=sys.stderr if args.json else sys.stdout, flush=True)
        target = snapshot.extras.get("target") if snapshot is not None else None
        if isinstance(target, dict) and target.get("met"):
            msg = f"TARGET MET: {target.get('description')} after {target.get('trials')} trials"
            print(msg, file=sys.stderr if args.json else sys.stdout, flush=True)
            if stopper is not None:
                stopper.send_stop()
            return True
        return False

    try:
        final = session.run_blocking(args.duration, on_tick=tick)
    finally:
        if recorder is not None:
            recorder.close()
    out = summary_dict(final, engine.health())
    out["wall_time_s"] = time.time() - started
    target = out.get("target")
    out["target_met"] = bool(isinstance(target, dict) and target.get("met"))
    if stopper is not None:
        out["stop_command"] = stopper.result
    if session.recording_error:
        out["recording_error"] = session.recording_error
    if args.json:
        print(json.dumps(out, allow_nan=False))
    return 0


def _control_default(endpoint: str) -> str:
    head, _, port = endpoint.rpartition(":")
    return f"{head}:{int(port) + 1}"


def client_keys_from_args(args: argparse.Namespace):
    """CurveZMQ client keys from ``--server-public-key``/``--client-key``, or None."""
    if getattr(args, "server_public_key", None) is None:
        return None
    from labwatch.security import ClientKeys

    return ClientKeys.from_files(args.server_public_key, args.client_key)
