"""Benchmark: publisher -> labwatch monitor under load, side by side with a bare pyzmq loop.

Every case runs a sender process and a receiver process on tcp://127.0.0.1 (2-core
machines: one core each).  The sender publishes protocol-v1 messages from a precomputed
template with an extra header field ``x_pub_wall`` (publish time, ``time.time()``) so the
receiver can measure latency on the same clock.

Cases
-----
1. **small messages, flat out** (hist, one setting pair, 2 x 2 counts, ~450 B): the
   receiver's message rate, labwatch (``Subscriber`` drain -> ``LiveSession.handle_many``
   -> ``MonitorEngine.ingest_many`` with accumulator and analysis) vs a bare pyzmq loop
   (``recv_multipart`` only) on the same traffic.  Target: >= 50 % of the bare rate.
   Live, the bare loop keeps up with the sender (its rate is the sender's); so the case is
   repeated with the stream queued first, which measures each receiver's own cost.
2. **rate ladder** (paced sender, SNDHWM = RCVHWM = 10 000 so a backlog turns into drops
   within a fraction of a second): per rate the messages lost (from the sequence numbers),
   the publish -> ingest latency (median, p99) and publish -> snapshot latency (median,
   p99, one snapshot per 0.1 s of source time).  "Sustainable" is the highest rate with no
   loss and p99 latency under 0.1 s; "drops begin" is the lowest rate with loss.
3. **event batches, flat out** (65 536 trials per message, ``|u1`` x y a b columns):
   events per second through parse + accumulator (+ analysis), vs the bare loop's
   events per second on the same traffic.  Target: >= 1e7 events/s.
4. **soak**: event batches paced at 300 messages/s (~2e7 events/s, below the flat-out
   capacity, so no backlog builds up in the socket queues) until >= 2e8 events have gone
   through (1 s rolling window: full after the first 300 messages); resident memory (VmRSS)
   is sampled every 0.5 s and must stay flat once the window is full.

Run:  .venv/bin/python benchmarks/bench_load.py  [--quick] [--only small|ladder|events|soak]
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import socket
import statistics
import time

import numpy as np

SOURCE = "bench"
HIST_TEMPLATE = (
    '{{"schema":"labwatch.coincidences","version":1,"kind":"hist","source":"bench",'
    '"run":"{run}","seq":{seq},"t_start":{t0:.6f},"t_stop":{t1:.6f},'
    '"scenario":{{"settings":[2,2],"outcomes":[2,2]}},"layout":"pair","pair":[{x},{y}],'
    '"dtype":"<u4","singles":[[2911,2874],[3002,2950]],"coincidence_window_s":1.5e-09,'
    '"x_pub_wall":{wall:.6f}}}'
)
EVENTS_TEMPLATE = (
    '{{"schema":"labwatch.coincidences","version":1,"kind":"events","source":"bench",'
    '"run":"{run}","seq":{seq},"t_start":{t0:.6f},"t_stop":{t1:.6f},'
    '"scenario":{{"settings":[2,2],"outcomes":[2,2]}},"layout":"xyab","dtype":"|u1",'
    '"n_events":{n},"setting_probabilities":[[0.25,0.25],[0.25,0.25]],'
    '"x_pub_wall":{wall:.6f}}}'
)
EVENTS_PER_MESSAGE = 65_536


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def rss_mib() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


# ----------------------------------------------------------------------------- sender


def sender(ep: str, kind: str, n: int, rate: float, dt_source: float, hwm: int, run: str) -> None:
    """Publish ``n`` data messages (at ``rate`` msg/s, or flat out when rate is inf), then a
    final 'stopped' status.  Waits for the first subscription (XPUB) before sending."""
    import zmq

    from labwatch.protocol import encode_status

    ctx = zmq.Context()
    pub = ctx.socket(zmq.XPUB)  # a PUB that also tells us when the subscriber has arrived
    pub.setsockopt(zmq.LINGER, 5000)
    pub.setsockopt(zmq.SNDHWM, hwm)
    pub.bind(ep)
    pub.recv()  # the subscription message
    time.sleep(0.05)
    rng = np.random.default_rng(1)
    if kind == "hist":
        payloads = [rng.integers(0, 300, 4).astype("<u4").tobytes() for _ in range(64)]
        topic = f"hist/{SOURCE}".encode()
    else:
        ev = rng.integers(0, 2, (EVENTS_PER_MESSAGE, 4)).astype("|u1")
        payloads = [ev.tobytes()]
        topic = f"events/{SOURCE}".encode()
    # Headers are formatted before the clock starts; only the publish time is appended at
    # send time, so the sender is not the bottleneck of the flat-out cases.
    prefixes = []
    for seq in range(n):
        t0 = seq * dt_source
        if kind == "hist":
            pair = (seq // 1000) % 4
            header = HIST_TEMPLATE.format(
                run=run, seq=seq, t0=t0, t1=t0 + dt_source, x=pair // 2, y=pair % 2, wall=0.0
            )
        else:
            header = EVENTS_TEMPLATE.format(
                run=run, seq=seq, t0=t0, t1=t0 + dt_source, n=EVENTS_PER_MESSAGE, wall=0.0
            )
        prefixes.append(header.encode()[: -len(b"0.000000}")])
    paced = rate != float("inf")
    clock = time.time
    start = clock()
    for seq in range(n):
        if paced and seq % 16 == 0:
            ahead = start + seq / rate - clock()
            if ahead > 0:
                time.sleep(ahead)
        header = prefixes[seq] + (b"%.6f}" % clock())
        pub.send_multipart([topic, header, payloads[seq % len(payloads)]])
    final = encode_status(source=SOURCE, run=run, t=n * dt_source, state="stopped", last_seq=n - 1)
    for _ in range(3):  # a lossy (small-HWM) case may drop one; repeats are harmless
        pub.send_multipart(final)
        time.sleep(0.05)
    pub.close()  # linger: let the queue drain to the subscriber
    ctx.term()


# ----------------------------------------------------------------------------- receivers


def bare_receiver(ep: str, hwm: int, delay_s: float, out: mp.Queue) -> None:
    """Plain pyzmq: recv_multipart until the final status; counts messages and payload bytes.

    ``delay_s``: after the first message, let the stream queue up for this long before
    reading on (the sender has finished by then: a measure of the receive cost alone)."""
    import zmq

    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.RCVHWM, hwm)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.connect(ep)
    n = 0
    payload = 0
    first = last = None
    while True:
        if n and not sub.poll(3000):
            break  # the final status was lost
        frames = sub.recv_multipart()
        if frames[0].startswith(b"status/"):
            break
        if first is None:
            if delay_s:
                time.sleep(delay_s)
            first = time.perf_counter()
        n += 1
        payload += len(frames[2])
        last = time.perf_counter()
    sub.close(0)
    ctx.term()
    out.put({"messages": n, "payload_bytes": payload, "seconds": (last - first) if n > 1 else 0})


def labwatch_receiver(
    ep: str, hwm: int, window_s: float, epoch_s: float, timed: bool, delay_s: float, out: mp.Queue
) -> None:
    """The labwatch path: Subscriber drain -> LiveSession.handle_many -> MonitorEngine.ingest_many.

    ``timed``: measure latencies and memory per message (costs ~2 us a message); otherwise
    only the time from the first message to the final status is taken.
    """
    from labwatch.analysis import AnalysisConfig
    from labwatch.engine import EngineConfig, MonitorEngine
    from labwatch.session import LiveSession
    from labwatch.transport import SocketOptions

    engine = MonitorEngine(
        EngineConfig(window_s=window_s, epoch_s=epoch_s, analysis=AnalysisConfig())
    )
    session = LiveSession(ep, engine, options=SocketOptions(rcvhwm=hwm))
    ingest_lat: list[float] = []
    snap_lat: list[float] = []
    rss: list[tuple[float, float, int]] = []  # (wall, MiB, trials so far)
    state = {"first": None, "last": None, "n": 0, "next_rss": 0.0}
    handle_many = session.handle_many

    def timed_many(batch, wall=None):
        now = time.time()
        results = handle_many(batch, now)
        done = time.time()
        data = False
        for frames, result in zip(batch, results):
            if frames[0][:1] == b"s":  # status
                continue
            data = True
            if state["first"] is None:
                state["first"] = time.perf_counter()
            state["n"] += 1
            if state["n"] % 97 == 0 or result.snapshots:
                pub_wall = json.loads(frames[1])["x_pub_wall"]
                ingest_lat.append(done - pub_wall)
                if result.snapshots:
                    snap_lat.append(done - pub_wall)
        if data:
            state["last"] = time.perf_counter()
        if now >= state["next_rss"]:
            state["next_rss"] = now + 0.5
            rss.append((now, rss_mib(), engine.run.trials if engine.run else 0))
        return results

    def first_many(batch, wall=None):
        if delay_s:
            time.sleep(delay_s)
            wall = time.time()
        state["first"] = time.perf_counter()
        session.handle_many = plain_many  # type: ignore[method-assign]
        return plain_many(batch, wall)

    def plain_many(batch, wall=None):
        # after a delay the batch's receive time is stale: take the time per batch then
        results = handle_many(batch, None if delay_s else wall)
        if any(frames[0][0] == 115 for frames in batch):  # b"s": the final status
            state["last"] = time.perf_counter()
        return results

    session.handle_many = timed_many if timed else first_many  # type: ignore[method-assign]

    def tick(snapshot, health) -> bool:
        if engine.last_status is not None and engine.last_status.state == "stopped":
            return True
        silence = engine.silence_s(time.time())
        return silence is not None and silence > 3.0  # everything after was lost

    session.run_blocking(on_tick=tick, tick_s=0.05)
    h = engine.health()
    n = state["n"] if timed else h.accepted - h.heartbeats
    if state["last"] is None:  # the final status was lost: the last batch is the end
        state["last"] = time.perf_counter() - 3.0
    seconds = (state["last"] - state["first"]) if n > 1 else 0.0
    out.put(
        {
            "messages": n,
            "accepted": engine.run.messages if engine.run else 0,
            "trials": engine.run.trials if engine.run else 0,
            "missing": h.missing + h.missed_at_start + engine.unseen_at_last_status,
            "rejected": h.rejected,
            "seconds": seconds,
            "ingest_latency": ingest_lat,
            "snapshot_latency": snap_lat,
            "snapshots": engine.epoch,
            "rss": rss,
        }
    )


# ----------------------------------------------------------------------------- driver


def run_case(receiver: str, kind: str, n: int, rate: float, dt_source: float, hwm: int,
             window_s: float = 30.0, epoch_s: float = 0.1, run: str = "r",
             timed: bool = False, delay_s: float = 0.0) -> dict:  # fmt: skip
    ctx = mp.get_context("spawn")
    ep = f"tcp://127.0.0.1:{free_port()}"
    q: mp.Queue = ctx.Queue()
    if receiver == "bare":
        rx = ctx.Process(target=bare_receiver, args=(ep, hwm, delay_s, q))
    else:
        rx = ctx.Process(
            target=labwatch_receiver, args=(ep, hwm, window_s, epoch_s, timed, delay_s, q)
        )
    tx = ctx.Process(target=sender, args=(ep, kind, n, rate, dt_source, hwm, run))
    tx.start()
    time.sleep(0.3)
    rx.start()
    try:
        res = q.get(timeout=600)
    finally:
        tx.join(30)
        rx.join(30)
        for p in (tx, rx):
            if p.is_alive():
                p.kill()
    res["sent"] = n
    return res


def pct(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    return float(np.percentile(values, q))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="smaller runs")
    ap.add_argument(
        "--only", choices=("small", "ladder", "events", "soak"), help="run one case only"
    )
    args = ap.parse_args()
    scale = 0.3 if args.quick else 1.0
    big = 1_000_000

    if args.only in (None, "small"):
        small_messages(scale, big)
    if args.only in (None, "ladder"):
        rate_ladder(scale)
    if args.only in (None, "events"):
        event_batches(scale, big)
    if args.only in (None, "soak"):
        soak_run(scale, args.quick, big)


def small_messages(scale: float, big: int) -> None:
    print("== 1. small messages (hist, 2x2 u4, ~450 B), flat out ==")
    n_small = int(300_000 * scale)
    # 20 us of source time per message: at 50k msg/s the source clock runs in real time and
    # the engine analyses 10 epochs (snapshots) per wall second, as it would live
    bare = run_case("bare", "hist", n_small, float("inf"), 2e-5, big)
    lw = run_case("labwatch", "hist", n_small, float("inf"), 2e-5, big)
    bare_rate = bare["messages"] / bare["seconds"]
    lw_rate = lw["messages"] / lw["seconds"]
    print(f"bare pyzmq recv loop   : {bare_rate:10,.0f} msg/s  ({bare['messages']} messages)")
    print(f"labwatch monitor       : {lw_rate:10,.0f} msg/s  ({lw['messages']} messages, "
          f"{lw['rejected']} rejected, {lw['snapshots']} snapshots)")  # fmt: skip
    print(f"ratio labwatch / bare  : {lw_rate / bare_rate:.2f}   (target >= 0.50)")
    print("-- the same, receive cost alone (stream queued while the receiver waits 4 s) --")
    bare_q = run_case("bare", "hist", n_small, float("inf"), 2e-5, big, delay_s=4.0)
    lw_q = run_case("labwatch", "hist", n_small, float("inf"), 2e-5, big, delay_s=4.0)
    bq, lq = bare_q["messages"] / bare_q["seconds"], lw_q["messages"] / lw_q["seconds"]
    print(f"bare pyzmq recv loop   : {bq:10,.0f} msg/s  ({1e6 / bq:.1f} us/message)")
    print(f"labwatch monitor       : {lq:10,.0f} msg/s  ({1e6 / lq:.1f} us/message)")
    print(f"ratio labwatch / bare  : {lq / bq:.2f}")


def rate_ladder(scale: float) -> None:
    print("\n== 2. rate ladder (paced, SNDHWM = RCVHWM = 10 000) ==")
    print(f"{'rate/s':>8} {'sent':>8} {'lost':>7} {'ingest ms p50/p99':>19} "
          f"{'snapshot ms p50/p99':>21}")  # fmt: skip
    sustainable = 0.0
    drops_at = None
    ladder = [5_000, 10_000, 20_000, 30_000, 40_000, 50_000, 60_000, 80_000, 100_000, 120_000]
    for rate in ladder:
        n = int(rate * 2.5 * scale)
        r = run_case(
            "labwatch", "hist", n, float(rate), 1.0 / rate, 10_000, run=f"r{rate}", timed=True
        )
        il, sl = r["ingest_latency"], r["snapshot_latency"]
        lost = r["missing"]
        print(f"{rate:>8,} {n:>8,} {lost:>7,} {pct(il, 50) * 1e3:>9.2f}/{pct(il, 99) * 1e3:<9.2f}"
              f" {pct(sl, 50) * 1e3:>10.2f}/{pct(sl, 99) * 1e3:<10.2f}")  # fmt: skip
        if lost == 0 and pct(il, 99) < 0.1:
            sustainable = rate
        if lost > 0 and drops_at is None:
            drops_at = rate
    print(f"sustainable rate: {sustainable:,.0f} msg/s; drops begin at: "
          f"{'none up to ' + format(ladder[-1], ',') if drops_at is None else format(drops_at, ',')}"
          " msg/s")  # fmt: skip


def event_batches(scale: float, big: int) -> None:
    print(f"\n== 3. event batches ({EVENTS_PER_MESSAGE} trials/message, |u1), flat out ==")
    n_ev = int(600 * scale)
    bare_e = run_case("bare", "events", n_ev, float("inf"), 0.01, big)
    lw_e = run_case("labwatch", "events", n_ev, float("inf"), 0.01, big)
    bare_ev = bare_e["messages"] * EVENTS_PER_MESSAGE / bare_e["seconds"]
    lw_ev = lw_e["trials"] / lw_e["seconds"]
    print(f"bare pyzmq recv loop   : {bare_ev:14,.0f} events/s ({bare_e['messages']} messages)")
    print(f"labwatch monitor       : {lw_ev:14,.0f} events/s ({lw_e['accepted']} messages)")
    print(f"ratio labwatch / bare  : {lw_ev / bare_ev:.2f};  target >= 1e7 events/s: "
          f"{'met' if lw_ev >= 1e7 else 'MISSED'}")  # fmt: skip


def soak_run(scale: float, quick: bool, big: int) -> None:
    print("\n== 4. soak: >= 2e8 events at 2e7 events/s (paced below capacity), 1 s window ==")
    n_soak = int(3100 * (scale if quick else 1.0))
    soak = run_case("labwatch", "events", n_soak, 300.0, 1.0 / 300, big, window_s=1.0, timed=True)
    rss = soak["rss"]
    full = [r for r in rss if r[2] >= 600 * EVENTS_PER_MESSAGE]  # the window (300) is full
    if full:
        base, peak, end = full[0][1], max(r[1] for r in full), full[-1][1]
        print(f"events through         : {soak['trials']:,} in {soak['seconds']:.1f} s")
        print(f"RSS once window full   : {base:.1f} MiB; peak {peak:.1f} MiB; end {end:.1f} MiB "
              f"({len(full)} samples); growth {end - base:+.1f} MiB")  # fmt: skip
        print("RSS samples (MiB)      : " + " ".join(f"{r[1]:.0f}" for r in rss))
    print(f"\nmedian soak ingest latency {statistics.median(soak['ingest_latency']) * 1e3:.1f} ms")


if __name__ == "__main__":
    main()
