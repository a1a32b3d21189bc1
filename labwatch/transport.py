"""ZeroMQ transport: SUB sockets that hand raw frames to the engine (I/O layer).

Frames are passed on untouched (validation is :mod:`labwatch.protocol`'s job); nothing is
unpickled.  Sockets use ``linger=0``, a large receive high-water mark for bursts, a generous
``MAXMSGSIZE`` (size caps are also enforced in code) and ZMTP heartbeats so that a vanished
publisher is noticed by the connection layer too.
"""

from __future__ import annotations

import re
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import zmq
import zmq.asyncio
from zmq.utils.monitor import parse_monitor_message

from labwatch.protocol import DEFAULT_LIMITS, Limits

__all__ = [
    "DEFAULT_ENDPOINT",
    "EndpointError",
    "LinkState",
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

    def max_frame_bytes(self) -> int:
        """The ``MAXMSGSIZE`` set on the socket: four times the largest valid message."""
        lim = self.limits
        return 4 * (lim.max_payload_bytes + lim.max_header_bytes + lim.max_topic_bytes)


@dataclass(frozen=True)
class LinkState:
    """What the connection layer saw (from the socket monitor), for health displays.

    Attributes
    ----------
    connected : bool
        A ZMTP session with the publisher is up (handshake done).
    disconnects : int
        Times the connection dropped (publisher gone, ZMTP heartbeat timeout, over-size
        frame, ...).
    reconnects : int
        Times labwatch re-connected the endpoint itself because libzmq would not (it does
        not after dropping a peer for an over-size frame).
    handshake_failures : int
        Refused handshakes (wrong CurveZMQ keys, plaintext vs encrypted peer).
    last_problem : str or None
        The latest of these events in words.
    """

    connected: bool = False
    disconnects: int = 0
    reconnects: int = 0
    handshake_failures: int = 0
    last_problem: str | None = None


_MONITORED = (
    zmq.EVENT_HANDSHAKE_SUCCEEDED
    | zmq.EVENT_DISCONNECTED
    | zmq.EVENT_CONNECT_RETRIED
    | zmq.EVENT_CONNECT_DELAYED
    | zmq.EVENT_HANDSHAKE_FAILED_AUTH
    | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
    | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
)
_HANDSHAKE_FAILED = {
    zmq.EVENT_HANDSHAKE_FAILED_AUTH: "handshake refused: this monitor's key is not authorised",
    zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL: "handshake failed: security mismatch (CurveZMQ on "
    "one side only, or a wrong source key)",
    zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL: "handshake failed (wrong source key or plaintext peer?)",
}
#: After a disconnect with no sign of libzmq reconnecting by itself, re-connect after this.
_RECONNECT_GRACE_S = 0.5


class _LinkWatch:
    """Follows a SUB socket's monitor events and re-connects when libzmq gives up.

    libzmq 4.3.5 drops a peer that sent a frame above ``MAXMSGSIZE`` and never reconnects
    that endpoint; every other disconnect is followed by its own reconnect attempts
    (``CONNECT_RETRIED``/``CONNECT_DELAYED``).  So a disconnect that is not followed by one of
    those within :data:`_RECONNECT_GRACE_S` gets a manual ``disconnect`` + ``connect``.
    """

    def __init__(self, sock: zmq.Socket, endpoint: str) -> None:
        self.sock = sock
        self.endpoint = endpoint
        self.state = LinkState()
        self._reconnect_at: float | None = None

    def event(self, frames: list[bytes]) -> None:
        ev = parse_monitor_message(frames)["event"]
        st = self.state
        if ev == zmq.EVENT_HANDSHAKE_SUCCEEDED:
            self.state = LinkState(
                True, st.disconnects, st.reconnects, st.handshake_failures, st.last_problem
            )
            self._reconnect_at = None
        elif ev == zmq.EVENT_DISCONNECTED:
            refused = not st.connected and st.last_problem in _HANDSHAKE_FAILED.values()
            self.state = LinkState(
                False,
                st.disconnects + 1,
                st.reconnects,
                st.handshake_failures,
                st.last_problem if refused else "connection to the source dropped",
            )
            self._reconnect_at = time.monotonic() + _RECONNECT_GRACE_S
        elif ev in (zmq.EVENT_CONNECT_RETRIED, zmq.EVENT_CONNECT_DELAYED):
            self._reconnect_at = None  # libzmq is on it
        elif ev in _HANDSHAKE_FAILED:
            self.state = LinkState(
                False,
                st.disconnects,
                st.reconnects,
                st.handshake_failures + 1,
                _HANDSHAKE_FAILED[ev],
            )

    def next_due(self) -> float | None:
        return self._reconnect_at

    def maybe_reconnect(self) -> None:
        if self._reconnect_at is None or time.monotonic() < self._reconnect_at:
            return
        self._reconnect_at = None
        try:
            self.sock.disconnect(self.endpoint)
        except zmq.ZMQError:
            pass  # the endpoint's session is already gone (the case this is for)
        self.sock.connect(self.endpoint)
        st = self.state
        self.state = LinkState(
            st.connected, st.disconnects, st.reconnects + 1, st.handshake_failures, st.last_problem
        )


def _configure(
    sock: zmq.Socket,
    endpoint: str,
    topics: Sequence[bytes],
    opts: SocketOptions,
    curve: object | None,
) -> zmq.Socket:
    """Set the options, attach a monitor, connect; returns the monitor socket."""
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVHWM, opts.rcvhwm)
    sock.setsockopt(zmq.HEARTBEAT_IVL, opts.heartbeat_ms)
    sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, 3 * opts.heartbeat_ms)
    sock.setsockopt(zmq.RECONNECT_IVL, 200)
    sock.setsockopt(zmq.RECONNECT_IVL_MAX, 2000)
    sock.setsockopt(zmq.MAXMSGSIZE, opts.max_frame_bytes())
    if curve is not None:
        curve.apply_client(sock)  # type: ignore[attr-defined]
    for t in topics:
        sock.setsockopt(zmq.SUBSCRIBE, t)
    check_endpoint(endpoint)
    monitor = sock.get_monitor_socket(_MONITORED)
    try:
        sock.connect(endpoint)
    except zmq.ZMQError as exc:
        sock.disable_monitor()
        monitor.close(0)
        sock.close(0)
        raise EndpointError(f"cannot connect to {endpoint!r}: {exc}") from None
    return monitor


class _MonitoredSub:
    """What both subscribers share: a SUB socket, its socket monitor and the link state."""

    def _open(
        self,
        endpoint: str,
        topics: Sequence[bytes],
        options: SocketOptions | None,
        curve: object | None,
        context: zmq.Context,
        own_context: bool,
        poller: Any,
    ) -> None:
        self.endpoint = endpoint
        self._own_context = own_context
        self.context = context
        self.socket = context.socket(zmq.SUB)
        try:
            self._monitor = _configure(
                self.socket, endpoint, topics, options or SocketOptions(), curve
            )
        except Exception:
            self.socket.close(0)
            if own_context:
                context.term()
            raise
        self._link = _LinkWatch(self.socket, endpoint)
        self._poller = poller
        self._poller.register(self.socket, zmq.POLLIN)
        self._poller.register(self._monitor, zmq.POLLIN)

    @property
    def link(self) -> LinkState:
        """Connection state seen by the socket monitor."""
        return self._link.state

    def close(self) -> None:
        """Close the socket (and the context when this subscriber made it)."""
        try:
            self.socket.disable_monitor()
        except zmq.ZMQError:
            pass
        self._monitor.close(0)
        self.socket.close(0)
        if self._own_context:
            self.context.term()


class Subscriber(_MonitoredSub):
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

    Notes
    -----
    A socket monitor follows the connection: :attr:`link` tells whether the source is
    connected, how often it dropped and whether a handshake was refused (CurveZMQ keys), and
    an endpoint that libzmq stopped reconnecting (after an over-size frame) is re-connected.
    """

    def __init__(
        self,
        endpoint: str,
        topics: Sequence[bytes] = (b"",),
        options: SocketOptions | None = None,
        curve: object | None = None,
        context: zmq.Context | None = None,
    ) -> None:
        self._open(
            endpoint,
            topics,
            options,
            curve,
            context or zmq.Context(),
            context is None,
            zmq.Poller(),
        )

    def _service_monitor(self) -> None:
        while self._monitor.poll(0):
            self._link.event(self._monitor.recv_multipart())
        self._link.maybe_reconnect()

    def recv_batch(self, timeout_s: float, max_messages: int = 2000) -> list[list[bytes]]:
        """Wait up to ``timeout_s`` for a message, then drain what is queued (up to a cap)."""
        out: list[list[bytes]] = []
        deadline = time.monotonic() + max(timeout_s, 0.0)
        while True:
            remaining = deadline - time.monotonic()
            due = self._link.next_due()
            if due is not None:
                remaining = min(remaining, due - time.monotonic())
            ready = dict(self._poller.poll(max(0, int(remaining * 1000))))
            self._service_monitor()
            if self.socket in ready:
                break
            if time.monotonic() >= deadline:
                return out
        while len(out) < max_messages:
            try:
                out.append(self.socket.recv_multipart(zmq.NOBLOCK))
            except zmq.Again:
                break
        return out

    def __enter__(self) -> Subscriber:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class AsyncSubscriber(_MonitoredSub):
    """SUB socket for an asyncio loop (the Jupyter kernel's), on its own asyncio context.

    Use :meth:`recv_batch` from a task created on the running loop; it waits for one message
    and then drains what is already queued, so a burst costs one wake-up.  The connection is
    followed by a socket monitor as in :class:`Subscriber` (:attr:`link`).
    """

    def __init__(
        self,
        endpoint: str,
        topics: Sequence[bytes] = (b"",),
        options: SocketOptions | None = None,
        curve: object | None = None,
    ) -> None:
        self._open(
            endpoint, topics, options, curve, zmq.asyncio.Context(), True, zmq.asyncio.Poller()
        )

    async def _service_monitor(self) -> None:
        while await self._monitor.poll(0):
            self._link.event(await self._monitor.recv_multipart())
        self._link.maybe_reconnect()

    async def recv_batch(self, timeout_s: float, max_messages: int = 2000) -> list[list[bytes]]:
        """Wait up to ``timeout_s`` for a message, then drain the queue (up to a cap)."""
        out: list[list[bytes]] = []
        deadline = time.monotonic() + max(timeout_s, 0.0)
        while True:
            remaining = deadline - time.monotonic()
            due = self._link.next_due()
            if due is not None:
                remaining = min(remaining, due - time.monotonic())
            ready = dict(await self._poller.poll(max(0, int(remaining * 1000))))
            await self._service_monitor()
            if self.socket in ready:
                break
            if time.monotonic() >= deadline:
                return out
        while len(out) < max_messages and (self.socket.getsockopt(zmq.EVENTS) & zmq.POLLIN):
            out.append(await self.socket.recv_multipart())
        return out
