"""``labwatch simulate``: run a simulated source on a PUB socket."""

from __future__ import annotations

import argparse
import sys

__all__ = ["run_simulate", "publisher_config_from_args"]


def publisher_config_from_args(args: argparse.Namespace):
    """A PublisherConfig from the simulate options."""
    from simulators.faults import parse_faults
    from simulators.publisher import PublisherConfig

    server_keys = None
    if getattr(args, "server_key", None):
        from labwatch.security import ServerKeys

        server_keys = ServerKeys(args.server_key, args.allowed_keys)
    elif getattr(args, "allowed_keys", None):
        raise ValueError("--allowed-keys needs --server-key (this source's .key_secret file)")
    return PublisherConfig(
        endpoint=args.endpoint,
        source_id=args.source_id,
        run_id=args.run_id,
        settings=args.settings,
        message_interval_s=args.interval,
        block_s=args.block,
        duration_s=args.duration,
        speed=args.speed,
        seed=args.seed,
        faults=parse_faults(args.faults),
        control_endpoint=args.control,
        server_keys=server_keys,
        sndhwm=getattr(args, "sndhwm", 100_000),
    )


def run_simulate(args: argparse.Namespace) -> int:
    """Build the source from the options and publish until the duration ends or a stop."""
    from simulators.catalog import source_from_args
    from simulators.publisher import Publisher

    config = publisher_config_from_args(args)
    source = source_from_args(args)
    pub = Publisher(source, config, log=lambda s: print(s, file=sys.stderr, flush=True))
    if config.server_keys is not None:
        from pathlib import Path

        allowed = sorted(Path(config.server_keys.allowed_keys_dir).glob("*.key"))
        print(
            f"simulate: CurveZMQ on, {len(allowed)} authorised monitor key(s) in "
            f"{config.server_keys.allowed_keys_dir}",
            file=sys.stderr,
            flush=True,
        )
    sent = pub.run()
    how = "stopped by command" if pub.stopped_by_command else "done"
    print(f"simulate: {how}, {sent} data messages sent", file=sys.stderr)
    return 0
