"""Control channel client: ask a source to stop (or report its status) over REQ/ROUTER.

Protocol (docs/protocol.md, "Control channel"): the monitor sends one UTF-8 JSON frame
``{"command": "stop"}`` or ``{"command": "status"}`` on a REQ socket; the source answers one
JSON frame ``{"ok": true, "state": ..., "run": ..., "last_seq": ...}`` or
``{"ok": false, "error": ...}``.
"""

from __future__ import annotations

import json
from typing import Any

import zmq

from labwatch.transport import check_endpoint

__all__ = ["COMMANDS", "send_command", "StopOnTarget"]

COMMANDS = ("stop", "status")


def send_command(
    endpoint: str, command: str, timeout_s: float = 2.0, curve: object | None = None
) -> dict[str, Any]:
    """Send one control command and return the decoded reply.

    Never blocks longer than ``timeout_s``; a missing or malformed reply gives
    ``{"ok": False, "error": ...}`` instead of an exception.
    """
    if command not in COMMANDS:
        raise ValueError(f"command {command!r} not in {COMMANDS}")
    ctx = zmq.Context()
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    if curve is not None:
        curve.apply_client(sock)  # type: ignore[attr-defined]
    try:
        sock.connect(check_endpoint(endpoint))
        sock.send(json.dumps({"command": command}).encode())
        if not sock.poll(int(timeout_s * 1000)):
            return {"ok": False, "error": f"no reply from {endpoint} within {timeout_s} s"}
        raw = sock.recv()
        try:
            reply = json.loads(raw[:65536].decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            return {"ok": False, "error": "malformed reply"}
        return reply if isinstance(reply, dict) else {"ok": False, "error": "malformed reply"}
    finally:
        sock.close(0)
        ctx.term()


class StopOnTarget:
    """Sends ``stop`` to the source once (the stop rule's action); keeps the reply in ``result``."""

    def __init__(self, endpoint: str, timeout_s: float = 2.0, curve: object | None = None) -> None:
        self.endpoint = check_endpoint(endpoint)
        self.timeout_s = timeout_s
        self.curve = curve
        self.result: dict[str, Any] | None = None

    def send_stop(self) -> dict[str, Any]:
        """Send the stop command (only the first call sends)."""
        if self.result is None:
            self.result = send_command(self.endpoint, "stop", self.timeout_s, self.curve)
        return self.result
