"""Benchmark: redraw cost of the widgets inside a real kernel, next to the engine's own work.

A ``python3`` kernel is started with jupyter_client (as a notebook would); inside it a
:class:`~labwatch.widgets.Dashboard` and a :class:`~labwatch.widgets.LiveMonitor` sharing its
feed are filled with ``N`` analysis epochs of a CHSH event stream (10 messages of 300 events
per epoch), then redrawn 20 times, one new epoch before each redraw (ingest not timed).  In a kernel every widget has a real
comm, so a redraw includes trait serialisation and the iopub send; the client counts the
widget-update messages and their bytes per redraw (the Jupyter server drops iopub traffic
above ~1000 messages/s, so this number times the redraw rate is what matters).

Baseline: the engine ingesting one epoch of the same stream (the work a redraw competes with
on the kernel's loop), with the LP visibility off in both.

Run:  .venv/bin/python benchmarks/bench_widgets.py  [--quick]
"""

from __future__ import annotations

import argparse
import json
import queue
import textwrap

from jupyter_client.manager import start_new_kernel

KERNEL_CODE = textwrap.dedent(
    """
    import json, time
    import numpy as np
    from labwatch.analysis import AnalysisConfig
    from labwatch.protocol import encode_events
    from labwatch.scenario import Scenario
    from labwatch.widgets import Dashboard, LiveMonitor

    SC = Scenario(2, 2, 2, 2)
    rng = np.random.default_rng(0)

    def frames(seq):
        k = 300
        x, y, a = rng.integers(0, 2, k), rng.integers(0, 2, k), rng.integers(0, 2, k)
        flip = rng.random(k) < np.where((x == 1) & (y == 1), 0.85, 0.15)
        return encode_events(source="b", run="r", seq=seq, t_start=seq * 0.1,
                             t_stop=seq * 0.1 + 0.1, scenario=SC,
                             events=np.stack([x, y, a, a ^ flip], 1),
                             setting_probabilities=np.full((2, 2), 0.25))

    dash = Dashboard(window_s=10.0, analysis=AnalysisConfig(visibility=False),
                     history_capacity=2000)
    mon = LiveMonitor(feed=dash.feed)
    msgs = [frames(s) for s in range(10 * {epochs})]
    t = time.perf_counter()
    for f in msgs:
        dash.feed.engine.ingest(f, 0.0)
    ingest_epoch_ms = 1000 * (time.perf_counter() - t) / {epochs}
    print("READY", json.dumps({{"points": dash.feed.history.points,
                               "ingest_epoch_ms": ingest_epoch_ms}}), flush=True)
    """
)

REDRAW_CODE = textwrap.dedent(
    """
    spent = 0.0
    for _ in range(20):
        for _ in range(10):  # one new epoch (not timed), so every redraw has new data
            dash.feed.engine.ingest(frames(len(msgs)), 0.0)
            msgs.append(None)
        t = time.perf_counter()
        {target}.redraw()
        spent += time.perf_counter() - t
    print("TIMED", json.dumps({{"redraw_ms": 1000 * spent / 20}}), flush=True)
    """
)


def run_code(kc, code: str, timeout: float = 120.0) -> tuple[dict, int, int]:
    """Execute ``code``; return the JSON of its tagged line and the widget messages/bytes."""
    msg_id = kc.execute(code)
    result: dict = {}
    n_msgs = n_bytes = 0
    while True:
        try:
            msg = kc.get_iopub_msg(timeout=timeout)
        except queue.Empty:
            raise RuntimeError("kernel did not answer in time") from None
        if msg["parent_header"].get("msg_id") != msg_id:
            continue
        kind = msg["msg_type"]
        if kind == "stream":
            for line in msg["content"]["text"].splitlines():
                tag, _, payload = line.partition(" ")
                if tag in ("READY", "TIMED"):
                    result = json.loads(payload)
        elif kind == "comm_msg":
            n_msgs += 1
            n_bytes += len(json.dumps(msg["content"])) + sum(len(b) for b in msg["buffers"])
        elif kind == "error":
            raise RuntimeError("\n".join(msg["content"]["traceback"]))
        elif kind == "status" and msg["content"]["execution_state"] == "idle":
            return result, n_msgs, n_bytes


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="only the smallest history")
    args = ap.parse_args()
    sizes = [100] if args.quick else [100, 500, 1500]
    print(
        f"{'points':>7} {'widget':>10} {'redraw ms':>10} {'msgs/redraw':>12} "
        f"{'kB/redraw':>10} {'ingest ms/epoch':>16} {'ratio':>7}"
    )
    for epochs in sizes:
        km, kc = start_new_kernel(kernel_name="python3")
        try:
            ready, _, _ = run_code(kc, KERNEL_CODE.format(epochs=epochs))
            for target in ("dash", "mon"):
                timed, n, b = run_code(kc, REDRAW_CODE.format(target=target))
                ratio = timed["redraw_ms"] / ready["ingest_epoch_ms"]
                print(
                    f"{ready['points']:>7} {target:>10} {timed['redraw_ms']:>10.2f} "
                    f"{n / 20:>12.1f} {b / 20 / 1024:>10.1f} "
                    f"{ready['ingest_epoch_ms']:>16.2f} {ratio:>7.2f}"
                )
        finally:
            kc.stop_channels()
            km.shutdown_kernel(now=True)
    print("ratio = redraw time / time the engine needs for one epoch of messages")


if __name__ == "__main__":
    main()
