"""Publish a simulated source as a protocol-v1 ZeroMQ stream, paced in real time.

The source clock advances by exactly ``message_interval_s`` per data message, so the content of
the stream depends only on the seed; the wall-clock pacing only decides when it is sent.

Late joiners: PUB/SUB drops everything sent before a subscriber's subscription arrives.  The
publisher waits ``startup_delay_s`` after binding before the first message, and numbers
messages so that a monitor can tell what it missed.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import zmq

from labwatch.protocol import encode_events, encode_histogram, encode_status
from labwatch.transport import check_endpoint
from simulators.base import PairSource
from simulators.faults import FaultConfig, malformed_variant

__all__ = ["SETTING_MODES", "PublisherConfig", "Publisher", "generate_message"]

SETTING_MODES = ("blocks", "random")


@dataclass(frozen=True)
class PublisherConfig:
    """How the simulated stream is cut into messages.

    Attributes
    ----------
    endpoint : str
        Where the PUB socket binds (loopback by default).
    source_id, run_id : str
        Identifiers in every header; ``run_id=None`` makes one from the seed and the wall clock.
    settings : str
        ``"blocks"``: setting pairs held in turn for ``block_s`` seconds, histogram messages;
        ``"random"``: settings drawn per trial from ``setting_probabilities``, event messages.
    message_interval_s : float
        Source time covered by one data message.
    duration_s : float or None
        Stop after this much source time (None: until stopped).
    speed : float
        Source seconds per wall second (1: real time; ``math.inf``: as fast as possible).
    control_endpoint : str or None
        ROUTER socket for stop commands (docs/protocol.md, "Control channel").
    server_keys : labwatch.security.ServerKeys or None
        CurveZMQ: encrypt both sockets and admit only the authorised monitor keys.
    sndhwm : int
        Send high-water mark of the PUB socket (messages queued per subscriber before PUB
        drops them silently; the sequence numbers make the drops visible).
    """

    endpoint: str = "tcp://127.0.0.1:5780"
    source_id: str = "sim"
    run_id: str | None = None
    settings: str = "blocks"
    setting_probabilities: tuple[tuple[float, ...], ...] | None = None
    message_interval_s: float = 0.1
    block_s: float = 1.0
    heartbeat_s: float = 1.0
    duration_s: float | None = None
    speed: float = 1.0
    seed: int = 0
    startup_delay_s: float = 0.5
    coincidence_window_s: float = 2e-9
    faults: FaultConfig = field(default_factory=FaultConfig)
    control_endpoint: str | None = None
    server_keys: object | None = None
    control_authorizer: object | None = None
    sndhwm: int = 100_000

    def __post_init__(self) -> None:
        if self.settings not in SETTING_MODES:
            raise ValueError(f"settings {self.settings!r} not in {SETTING_MODES}")
        if not self.message_interval_s > 0:
            raise ValueError("message_interval_s must be > 0")
        if not self.speed > 0:
            raise ValueError("speed must be > 0")


def _setting_probs(source: PairSource, cfg: PublisherConfig) -> np.ndarray:
    m_a, m_b = source.scenario.settings_a, source.scenario.settings_b
    if cfg.setting_probabilities is None:
        return np.full((m_a, m_b), 1.0 / (m_a * m_b))
    q = np.asarray(cfg.setting_probabilities, dtype=float)
    if q.shape != (m_a, m_b) or np.any(q <= 0) or abs(q.sum() - 1) > 1e-9:
        raise ValueError(
            f"setting_probabilities must be a positive {(m_a, m_b)} matrix summing to 1"
        )
    return q


def generate_message(
    source: PairSource,
    cfg: PublisherConfig,
    rng: np.random.Generator,
    run: str,
    seq: int,
    t0: float,
    q: np.ndarray,
) -> list[bytes]:
    """Frames of the data message covering source time ``[t0, t0 + interval)``."""
    sc = source.scenario
    dt = cfg.message_interval_s
    t_mid = t0 + dt / 2
    n = int(rng.poisson(source.trial_rate(t_mid) * dt))
    rates = source.singles_rates(t_mid)
    if cfg.settings == "blocks":
        pair_index = int(math.floor(t_mid / cfg.block_s)) % sc.setting_pairs
        x0, y0 = divmod(pair_index, sc.settings_b)
        weights_a = np.eye(sc.settings_a)[x0]
        weights_b = np.eye(sc.settings_b)[y0]
    else:
        weights_a, weights_b = q.sum(axis=1), q.sum(axis=0)
    singles = None
    if rates is not None:
        # singles rates are per setting and detector: (m, d); weight by the settings in use
        ra = weights_a @ np.asarray(rates[0], dtype=float).reshape(sc.settings_a, -1)
        rb = weights_b @ np.asarray(rates[1], dtype=float).reshape(sc.settings_b, -1)
        singles = (
            [int(v) for v in rng.poisson(ra * dt)],
            [int(v) for v in rng.poisson(rb * dt)],
        )
    common = dict(
        source=cfg.source_id,
        run=run,
        seq=seq,
        t_start=t0,
        t_stop=t0 + dt,
        scenario=sc,
        singles=singles,
        coincidence_window_s=cfg.coincidence_window_s,
        no_click=bool(getattr(source, "keep_no_click", False)),
    )
    if cfg.settings == "blocks":
        a, b = source.sample(
            rng, t_mid, np.full(n, x0, dtype=np.int64), np.full(n, y0, dtype=np.int64)
        )
        hist = np.bincount(a * sc.outcomes_b + b, minlength=sc.outcomes_a * sc.outcomes_b)
        return encode_histogram(
            counts=hist.reshape(sc.outcomes_a, sc.outcomes_b), pair=(x0, y0), **common
        )
    flat = rng.choice(q.size, size=n, p=q.ravel())
    x, y = np.divmod(flat, sc.settings_b)
    a, b = source.sample(rng, t_mid, x, y)
    events = np.stack([x, y, a, b], axis=1)
    return encode_events(events=events, setting_probabilities=q, **common)


class Publisher:
    """Runs a simulated source on a PUB socket until the duration ends or a stop arrives.

    Attributes after :meth:`run`: ``sent`` (data messages sent), ``stopped_by_command``.
    """

    def __init__(
        self, source: PairSource, config: PublisherConfig, log: Callable[[str], None] | None = None
    ) -> None:
        self.source = source
        self.config = config
        self.log = log or (lambda s: None)
        self.sent = 0
        self.last_seq = -1
        self.stopped_by_command = False
        self.run_id = (
            config.run_id or f"{config.source_id}-s{config.seed}-{int(time.time() * 1000) % 10**10}"
        )

    def _control_poll(self, ctl: zmq.Socket | None) -> bool:
        if ctl is None:
            return False
        stop = False
        while ctl.poll(0):
            frames = ctl.recv_multipart()
            reply = {"ok": False, "error": 'expected one JSON frame {"command": "stop"|"status"}'}
            try:
                cmd = json.loads(frames[-1].decode("utf-8")) if len(frames[-1]) < 4096 else None
            except (UnicodeDecodeError, ValueError):
                cmd = None
            authorizer = self.config.control_authorizer
            if isinstance(cmd, dict) and authorizer is not None and not authorizer(frames):  # type: ignore[operator]
                reply = {"ok": False, "error": "not authorised"}
            elif isinstance(cmd, dict) and cmd.get("command") == "stop":
                stop = True
                reply = {
                    "ok": True,
                    "state": "stopping",
                    "run": self.run_id,
                    "last_seq": self.last_seq,
                }
            elif isinstance(cmd, dict) and cmd.get("command") == "status":
                reply = {
                    "ok": True,
                    "state": "running",
                    "run": self.run_id,
                    "last_seq": self.last_seq,
                }
            ctl.send_multipart(frames[:-1] + [json.dumps(reply).encode()])
        return stop

    def run(self) -> int:
        """Publish until done; returns the number of data messages sent."""
        cfg = self.config
        ctx = zmq.Context()
        pub = ctx.socket(zmq.PUB)
        pub.setsockopt(zmq.LINGER, 0)
        pub.setsockopt(zmq.SNDHWM, cfg.sndhwm)
        if cfg.server_keys is not None:
            cfg.server_keys.apply_server(pub)  # type: ignore[attr-defined]
        ctl = None
        try:
            pub.bind(check_endpoint(cfg.endpoint))
            if cfg.control_endpoint:
                ctl = ctx.socket(zmq.ROUTER)
                ctl.setsockopt(zmq.LINGER, 0)
                if cfg.server_keys is not None:
                    cfg.server_keys.apply_server(ctl)  # type: ignore[attr-defined]
                ctl.bind(check_endpoint(cfg.control_endpoint))
            self.log(f"publishing run {self.run_id} on {cfg.endpoint} ({cfg.settings} settings)")
            time.sleep(cfg.startup_delay_s)
            self._loop(pub, ctl)
        finally:
            pub.close(0)
            if ctl is not None:
                ctl.close(0)
            if cfg.server_keys is not None:
                # the authenticator's ZAP socket lives on ctx: term() would wait for it forever
                cfg.server_keys.stop(ctx)  # type: ignore[attr-defined]
            ctx.term()
        return self.sent

    def _loop(self, pub: zmq.Socket, ctl: zmq.Socket | None) -> None:
        cfg = self.config
        rng = np.random.default_rng(cfg.seed)
        fault_rng = np.random.default_rng([cfg.seed, 7])
        q = _setting_probs(self.source, cfg)
        wall0 = time.monotonic()
        seq = 0
        t = 0.0
        next_beat = 0.0
        held: list[bytes] | None = None
        faults = cfg.faults
        state = "running"
        while cfg.duration_s is None or t < cfg.duration_s - 1e-12:
            if self._control_poll(ctl):
                self.stopped_by_command = True
                break
            if math.isfinite(cfg.speed):
                delay = wall0 + t / cfg.speed - time.monotonic()
                if delay > 0:
                    time.sleep(min(delay, 0.05))
                    continue
            shift = faults.clock_offset(seq) if faults.clock_jumps else 0.0
            if t >= next_beat and not faults.garbage_only:
                pub.send_multipart(
                    encode_status(
                        source=cfg.source_id,
                        run=self.run_id,
                        t=t + shift,
                        state=state,
                        last_seq=seq - 1,
                    )
                )
                next_beat += cfg.heartbeat_s
            frames = generate_message(self.source, cfg, rng, self.run_id, seq, t + shift, q)
            self.last_seq = seq
            seq += 1
            t += cfg.message_interval_s
            if faults.garbage_only:
                pub.send_multipart(malformed_variant(fault_rng, frames))
                continue
            if faults.malformed and fault_rng.random() < faults.malformed:
                pub.send_multipart(malformed_variant(fault_rng, frames))
            if faults.drop and fault_rng.random() < faults.drop:
                continue
            if faults.reorder and held is None and fault_rng.random() < faults.reorder:
                held = frames
                continue
            pub.send_multipart(frames)
            self.sent += 1
            if held is not None:
                pub.send_multipart(held)
                self.sent += 1
                held = None
            if faults.duplicate and fault_rng.random() < faults.duplicate:
                pub.send_multipart(frames)
        if held is not None:
            pub.send_multipart(held)
            self.sent += 1
        if not faults.garbage_only:
            shift = faults.clock_offset(seq) if faults.clock_jumps else 0.0
            pub.send_multipart(
                encode_status(
                    source=cfg.source_id,
                    run=self.run_id,
                    t=t + shift,
                    state="stopped",
                    last_seq=seq - 1,
                )
            )
        time.sleep(0.2)  # let the last frames leave before the socket closes
