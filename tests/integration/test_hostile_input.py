"""Over-size messages on a real socket must never leave the monitor deaf.

libzmq drops a peer whose frame exceeds ``MAXMSGSIZE`` and (4.3.5) never reconnects that
endpoint by itself.  labwatch sets ``MAXMSGSIZE`` to four times its in-code caps, so an
over-cap message is normally rejected in code with a reason; a frame beyond even that drops
the link, and the subscriber's monitor re-connects it.
"""

from __future__ import annotations

import time

import numpy as np
import zmq

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.protocol import Limits, encode_histogram
from labwatch.recording import read_records
from labwatch.recording_writer import RecordWriter
from labwatch.scenario import Scenario
from labwatch.session import LiveSession
from labwatch.transport import SocketOptions, Subscriber
from tests.conftest import free_port

SC = Scenario(2, 2, 2, 2)
LIMITS = Limits(max_payload_bytes=4096)  # MAXMSGSIZE = 4 * (4096 + 16384 + 256) = 82 944 B


def _msg(seq: int, payload: bytes | None = None) -> list[bytes]:
    frames = encode_histogram(
        source="rig", run="r", seq=seq, t_start=seq * 0.1, t_stop=seq * 0.1 + 0.1,
        counts=np.array([[40, 2], [3, 41]]), scenario=SC, pair=(0, 0),
    )  # fmt: skip
    return frames if payload is None else [frames[0], frames[1], payload]


def _pump(pub, sub, engine, seqs, until, timeout=5.0):
    """Send each seq (at 100 Hz) while receiving, until ``until(engine)`` or timeout."""
    deadline = time.monotonic() + timeout
    it = iter(seqs)
    while time.monotonic() < deadline and not until(engine):
        seq = next(it, None)
        if seq is not None:
            pub.send_multipart(_msg(seq))
        for frames in sub.recv_batch(0.01):
            engine.ingest(frames, time.time())
    return until(engine)


def test_oversize_messages_are_rejected_and_the_stream_survives():
    ep = f"tcp://127.0.0.1:{free_port()}"
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.bind(ep)
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False), limits=LIMITS))
    opts = SocketOptions(limits=LIMITS)
    assert opts.max_frame_bytes() == 4 * (4096 + 16 * 1024 + 256)
    try:
        with Subscriber(ep, options=opts) as sub:
            # slow joiner: repeat seq 0.. until the subscription is through
            assert _pump(pub, sub, engine, range(0, 200), lambda e: e.accepted >= 3)
            first = engine.run.messages
            seq0 = 200
            # 1) above the in-code cap, below MAXMSGSIZE: rejected with a reason
            pub.send_multipart(_msg(seq0, b"\x00" * 10_000))
            assert _pump(pub, sub, engine, range(seq0 + 1, seq0 + 50), lambda e: e.rejected >= 1)
            assert dict(engine.health().rejections_by_reason) == {"oversize": 1}
            assert "payload of 10000 bytes" in engine.recent[-1].detail
            assert sub.link.disconnects == 0
            # 2) above MAXMSGSIZE: libzmq drops the link; the subscriber re-connects it
            before = engine.run.messages
            pub.send_multipart(_msg(seq0 + 100, b"\x00" * 200_000))
            alive = _pump(
                pub, sub, engine, range(seq0 + 101, seq0 + 600),
                lambda e: e.run.messages >= before + 20, timeout=8,
            )  # fmt: skip
            assert alive, sub.link
            # the monitor's handshake event may trail the first data: give it a moment
            deadline = time.monotonic() + 3
            while not sub.link.connected and time.monotonic() < deadline:
                for frames in sub.recv_batch(0.05):
                    engine.ingest(frames, time.time())
            assert sub.link.disconnects >= 1 and sub.link.reconnects >= 1 and sub.link.connected
    finally:
        pub.close(0)
        ctx.term()
    h = engine.health()
    assert engine.run.messages >= first + 20
    assert h.gaps >= 1  # what was sent while the link was down is counted as missing
    assert h.rejected == 1


def test_recorder_refusing_a_message_does_not_stop_monitoring(tmp_path):
    """A message larger than the recorder's record cap is replaced by an annotation; the
    monitor and the recording go on."""
    path = tmp_path / "capped.lwrec"
    writer = RecordWriter(path, max_record_bytes=2048, flush_interval_s=0)
    engine = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))
    session = LiveSession("tcp://127.0.0.1:1", engine, recorder=writer)
    session.handle(_msg(0))
    session.handle([b"hist/rig", b"{}", b"\x00" * 5000])  # rejected, and too big to record
    session.handle(_msg(1))
    writer.close()
    assert session.recording_error is None and session.not_recorded == 1
    kinds = [r.kind for r in read_records(path).records]
    assert kinds == ["accepted", "annotation", "accepted"]
    assert engine.health().accepted == 2 and engine.health().rejected == 1
