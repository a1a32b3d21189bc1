"""ZeroMQ transport: SUB sockets that hand raw frames to the engine (I/O layer).

Frames are passed on untouched (validation is :mod:`labwatch.protocol`'s job); nothing is
unpickled.  Sockets use ``linger=0``, a large receive high-water mark for bursts, a generous
``MAXMSGSIZE`` (size caps are also enforced in code) and ZMTP heartbeats so that a vanished
publisher is noticed by the connection layer too.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import zmq
import zmq.asyncio

from labwatch.protocol import DEFAULT_LIMITS, Limits

__all__ = [
    "DEFAULT_ENDPOINT",
    "EndpointError",
    "SocketOptions",
    "Subscriber",
    "AsyncSubscriber",
    "check_endpoint",
]

#: Where the simulator publishes and the monitor listens unless told otherwise.
DEFAULT_ENDPOINT = "tcp://127.0.0.1:5780"

_ENDPOINT = re.compile(
    r"^(tcp://(\*|[A-Za-z0-9.\-]+|\[[0-9A-Fa-f:]+\]):(\d{1,5})|ipc://.+|inproc://.+)$"
)


class EndpointError(ValueError):
    """An endpoint string is malformed or cannot be bound/connected."""


def check_endpoint(endpoint: str) -> str:
    """Return ``endpoint`` if it looks like a ZeroMQ endpoint, else raise EndpointError."""
    if not isinstance(endpoint, str) or not _ENDPOINT.match(endpoint):
        raise EndpointError(
            f"bad endpoint {endpoint!r}: expected tcp://HOST:PORT (e.g. {DEFAULT_ENDPOINT}), "
            "ipc://PATH or inproc://NAME"
        )
    m = _ENDPOINT.match(endpoint)
    if m and m.group(3) is not None and not 1 <= int(m.group(3)) <= 65535:
        raise EndpointError(f"bad endpoint {endpoint!r}: port must be 1-65535")
    return endpoint


@dataclass(frozen=True)
class SocketOptions:
    """Socket settings of a subscriber.

    Attributes
    ----------
    rcvhwm : int
        Receive high-water mark (messages queued before the publisher starts dropping).
    heartbeat_ms : int
        ZMTP heartbeat interval; the connection is dropped after ``3 x`` without reply.
    limits : Limits
        Frame caps; ``MAXMSGSIZE`` is set to well above their sum so an over-size message
        is rejected in code (libzmq would otherwise drop the connection for good).
    """

    rcvhwm: int = 200_000
    heartbeat_ms: int = 1000
    limits: Limits = DEFAULT_LIMITS


def _configure(
    sock: zmq.Socket,
    endpoint: str,
    topics: Sequence[bytes],
    opts: SocketOptions,
    curve: object | None,
) -> None:
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVHWM, opts.rcvhwm)
    sock.setsockopt(zmq.HEARTBEAT_IVL, opts.heartbeat_ms)
    sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, 3 * opts.heartbeat_ms)
    sock.setsockopt(zmq.RECONNECT_IVL, 200)
    sock.setsockopt(zmq.RECONNECT_IVL_MAX, 2000)
    lim = opts.limits
    sock.setsockopt(
        zmq.MAXMSGSIZE, 4 * (lim.max_payload_bytes + lim.max_header_bytes + lim.max_topic_bytes)
    )
    if curve is not None:
        curve.apply_client(sock)  # type: ignore[attr-defined]
    for t in topics:
        sock.setsockopt(zmq.SUBSCRIBE, t)
    try:
        sock.connect(check_endpoint(endpoint))
    except zmq.ZMQError as exc:
        sock.close(0)
        raise EndpointError(f"cannot connect to {endpoint!r}: {exc}") from None


class Subscriber:
    """Blocking SUB socket for the command line and threads.

    Parameters
    ----------
    endpoint : str
        Publisher endpoint to connect to.
    topics : sequence of bytes
        Topic prefixes to subscribe to (``b""``: everything).
    options : SocketOptions
    curve : object, optional
        A :class:`labwatch.security.ClientKeys`-like object with ``apply_client(socket)``.
    context : zmq.Context, optional
    """

    def __init__(
        self,
        endpoint: str,
        topics: Sequence[bytes] = (b"",),
        options: SocketOptions | None = None,
        curve: object | None = None,
        context: zmq.Context | None = None,
    ) -> None:
        self.endpoint = endpoint
        self._own_context = context is None
        self.context = context or zmq.Context()
        self.socket = self.context.socket(zmq.SUB)
        try:
            _configure(self.socket, endpoint, topics, options or SocketOptions(), curve)
        except Exception:
            if self._own_context:
                self.context.term()
            raise

    def recv_batch(self, timeout_s: float, max_messages: int = 2000) -> list[list[bytes]]:
        """Wait up to ``timeout_s`` for a message, then drain what is queued (up to a cap)."""
        out: list[list[bytes]] = []
        if not self.socket.poll(int(max(timeout_s, 0) * 1000)):
            return out
        while len(out) < max_messages:
            try:
                out.append(self.socket.recv_multipart(zmq.NOBLOCK))
            except zmq.Again:
                break
        return out

    def close(self) -> None:
        """Close the socket (and the context when we own it)."""
        self.socket.close(0)
        if self._own_context:
            self.context.term()

    def __enter__(self) -> Subscriber:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class AsyncSubscriber:
    """SUB socket for an asyncio loop (the Jupyter kernel's), on its own asyncio context.

    Use :meth:`recv_batch` from a task created on the running loop; it waits for one message
    and then drains what is already queued, so a burst costs one wake-up.
    """

    def __init__(
        self,
        endpoint: str,
        topics: Sequence[bytes] = (b"",),
        options: SocketOptions | None = None,
        curve: object | None = None,
    ) -> None:
        self.endpoint = endpoint
        self.context = zmq.asyncio.Context()
        self.socket = self.context.socket(zmq.SUB)
        try:
            _configure(self.socket, endpoint, topics, options or SocketOptions(), curve)
        except Exception:
            self.context.term()
            raise

    async def recv_batch(self, timeout_s: float, max_messages: int = 2000) -> list[list[bytes]]:
        """Wait up to ``timeout_s`` for a message, then drain the queue (up to a cap)."""
        out: list[list[bytes]] = []
        if not await self.socket.poll(int(max(timeout_s, 0) * 1000)):
            return out
        while len(out) < max_messages and (self.socket.getsockopt(zmq.EVENTS) & zmq.POLLIN):
            out.append(await self.socket.recv_multipart())
        return out

    def close(self) -> None:
        """Close the socket and its context."""
        self.socket.close(0)
        self.context.term()
