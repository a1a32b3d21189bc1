"""Security on real sockets: loopback defaults, CurveZMQ with pinned source keys and
authorised monitors, a control channel only authorised monitors can use, no pickle anywhere.
"""

from __future__ import annotations

import json
import re
import threading
import time
from pathlib import Path

import pytest

from labwatch.cli import build_parser
from labwatch.control import StopOnTarget, send_command
from labwatch.security import ClientKeys, ServerKeys
from labwatch.transport import DEFAULT_ENDPOINT, Subscriber
from simulators.publisher import Publisher, PublisherConfig
from simulators.quantum import polarization_source
from tests.conftest import ROOT, free_port


def _listening_addresses(port: int) -> set[str]:
    """Local IPv4 addresses (hex, as in /proc/net/tcp) listening on ``port``."""
    out = set()
    for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
        fields = line.split()
        addr, hexport = fields[1].split(":")
        if int(hexport, 16) == port and fields[3] == "0A":  # 0A: LISTEN
            out.add(addr)
    return out


def test_defaults_are_loopback_only():
    assert DEFAULT_ENDPOINT.startswith("tcp://127.0.0.1:")
    assert PublisherConfig().endpoint == DEFAULT_ENDPOINT
    parser = build_parser()
    for argv in (["simulate"], ["watch"]):
        assert parser.parse_args(argv).endpoint == DEFAULT_ENDPOINT
    if not Path("/proc/net/tcp").exists():
        pytest.skip("no /proc/net/tcp to read the listening address from")
    port = int(DEFAULT_ENDPOINT.rsplit(":", 1)[1])
    if _listening_addresses(port):
        pytest.skip(f"port {port} is in use by another program; cannot start the default source")
    # a source with every setting left at its default listens on 127.0.0.1 only
    pub = Publisher(polarization_source(visibility=0.9), PublisherConfig(duration_s=0.3, speed=2))
    t = threading.Thread(target=pub.run, daemon=True)
    t.start()
    deadline = time.monotonic() + 5
    seen: set[str] = set()
    while not seen and time.monotonic() < deadline:
        seen = _listening_addresses(port)
        time.sleep(0.02)
    t.join(10)
    assert seen == {"0100007F"}  # 127.0.0.1, little-endian hex; never 00000000 (all hosts)


@pytest.fixture(scope="module")
def keys(tmp_path_factory) -> dict[str, Path]:
    """Key pairs made with ``labwatch keys``: the source, an authorised and a stranger."""
    from labwatch.cli import main

    base = tmp_path_factory.mktemp("keys")
    for where, name in (("source", "source"), ("monitors", "desk-1"), ("strangers", "laptop")):
        assert main(["keys", str(base / where), name]) == 0
    allowed = base / "allowed"
    allowed.mkdir()
    (allowed / "desk-1.key").write_bytes((base / "monitors" / "desk-1.key").read_bytes())
    assert main(["keys", str(base / "source"), "source"]) == 2  # never overwrites a key
    return {
        "source_secret": base / "source" / "source.key_secret",
        "source_public": base / "source" / "source.key",
        "allowed": allowed,
        "monitor_secret": base / "monitors" / "desk-1.key_secret",
        "stranger_secret": base / "strangers" / "laptop.key_secret",
        "stranger_public": base / "strangers" / "laptop.key",
    }


def _watch(run_cli, ep, *extra):
    return run_cli("watch", ep, "--json", "--duration", "2.5", "--no-lp", *extra)


def test_curve_stream_admits_only_authorised_monitors(run_cli, keys):
    """One encrypted source; four monitors at once: only the authorised one with the pinned
    source key receives anything."""
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli(
        "simulate", ep, "--duration", "20",
        "--server-key", str(keys["source_secret"]), "--allowed-keys", str(keys["allowed"]),
    )  # fmt: skip
    src, mon = str(keys["source_public"]), str(keys["monitor_secret"])
    watches = {
        "authorised": _watch(run_cli, ep, "--server-public-key", src, "--client-key", mon),
        "unknown key": _watch(
            run_cli, ep, "--server-public-key", src, "--client-key", str(keys["stranger_secret"])
        ),
        "plaintext": _watch(run_cli, ep),
        # the monitor pins a different key than the source's: an impostor source
        "wrong source key": _watch(
            run_cli, ep, "--server-public-key", str(keys["stranger_public"]), "--client-key", mon
        ),
    }
    results = {}
    for name, w in watches.items():
        out, err = w.communicate(timeout=60)
        assert w.returncode == 0, (name, err)
        results[name] = json.loads(out)
    sim.kill()
    ok = results["authorised"]
    assert ok["messages"] > 10 and ok["rejected"] == 0 and ok["coincidences"] > 0
    assert ok["link"]["connected"] and ok["link"]["handshake_failures"] == 0
    for name in ("unknown key", "plaintext", "wrong source key"):
        res = results[name]
        assert res["messages"] == 0 and res["coincidences"] == 0, name
        assert not res["link"]["connected"], name
    # the ZAP refusal is reported to the refused monitor
    assert results["unknown key"]["link"]["handshake_failures"] >= 1
    assert "not authorised" in results["unknown key"]["link"]["last_problem"]


def test_control_channel_obeys_only_authorised_monitors(keys):
    """With CurveZMQ on, stop and status commands from strangers or plaintext peers get no
    answer and change nothing; the authorised monitor's stop (StopOnTarget, what
    ``watch --stop-source`` uses) stops the run."""
    port = free_port()
    ep, ctl = f"tcp://127.0.0.1:{port}", f"tcp://127.0.0.1:{free_port()}"
    server = ServerKeys(str(keys["source_secret"]), str(keys["allowed"]))
    pub = Publisher(
        polarization_source(visibility=0.9),
        PublisherConfig(endpoint=ep, control_endpoint=ctl, server_keys=server, startup_delay_s=0.1),
    )
    t = threading.Thread(target=pub.run, daemon=True)
    t.start()
    try:
        src = str(keys["source_public"])
        stranger = ClientKeys.from_files(src, str(keys["stranger_secret"]))
        monitor = ClientKeys.from_files(src, str(keys["monitor_secret"]))
        for curve in (None, stranger):
            reply = send_command(ctl, "stop", timeout_s=0.7, curve=curve)
            assert reply["ok"] is False and "no reply" in reply["error"]
        assert t.is_alive() and not pub.stopped_by_command
        status = send_command(ctl, "status", timeout_s=3, curve=monitor)
        assert status["ok"] is True and status["run"] == pub.run_id
        stop = StopOnTarget(ctl, timeout_s=3, curve=monitor).send_stop()
        assert stop["ok"] is True and stop["state"] == "stopping"
        t.join(10)
        assert not t.is_alive() and pub.stopped_by_command  # and run() returned: no hang
    finally:
        if t.is_alive():
            send_command(ctl, "stop", timeout_s=1, curve=monitor)
            t.join(5)


def test_subscriber_with_keys_receives_encrypted_stream(keys):
    """The library path (not the CLI): a pinned, authorised Subscriber gets valid messages."""
    ep = f"tcp://127.0.0.1:{free_port()}"
    server = ServerKeys(str(keys["source_secret"]), str(keys["allowed"]))
    pub = Publisher(
        polarization_source(visibility=0.9),
        PublisherConfig(endpoint=ep, server_keys=server, duration_s=1.0, speed=2),
    )
    t = threading.Thread(target=pub.run, daemon=True)
    t.start()
    curve = ClientKeys.from_files(str(keys["source_public"]), str(keys["monitor_secret"]))
    got = []
    with Subscriber(ep, curve=curve) as sub:
        deadline = time.monotonic() + 10
        while (len(got) < 5 or not sub.link.connected) and time.monotonic() < deadline:
            got += sub.recv_batch(0.2)  # the handshake event may trail the first data
        assert sub.link.connected
    t.join(10)
    assert len(got) >= 5 and all(len(f) == 3 for f in got)


def test_incomplete_key_options_are_refused(run_cli, keys):
    ep = f"tcp://127.0.0.1:{free_port()}"
    w = run_cli("watch", ep, "--duration", "1", "--client-key", str(keys["monitor_secret"]))
    _, err = w.communicate(timeout=30)
    assert w.returncode == 2 and "--server-public-key" in err
    s = run_cli("simulate", ep, "--duration", "1", "--allowed-keys", str(keys["allowed"]))
    _, err = s.communicate(timeout=30)
    assert s.returncode == 2 and "--server-key" in err


# Untrusted bytes must never reach a deserializer that can run code.
_FORBIDDEN = [
    (re.compile(r"\bimport\s+(c?pickle|dill|marshal|shelve|joblib)\b"), "pickle-like import"),
    (re.compile(r"\bfrom\s+(c?pickle|dill|marshal|shelve|joblib)\b"), "pickle-like import"),
    (re.compile(r"\bpickle\."), "pickle call"),
    (re.compile(r"recv_pyobj|send_pyobj|recv_serialized|recv_json"), "pyzmq object receive"),
    (re.compile(r"allow_pickle\s*=\s*True"), "numpy pickle"),
    (re.compile(r"\b(eval|exec)\s*\("), "eval/exec"),
    (re.compile(r"yaml\.load\s*\((?![^)]*SafeLoader)"), "unsafe yaml"),
]


def test_no_pickle_or_code_executing_deserialisation_in_the_package():
    files = sorted((ROOT / "labwatch").rglob("*.py")) + sorted((ROOT / "simulators").rglob("*.py"))
    assert len(files) > 20
    hits = []
    for path in files:
        for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            code = line.split("#", 1)[0]
            for pattern, what in _FORBIDDEN:
                if pattern.search(code):
                    hits.append(f"{path.relative_to(ROOT)}:{n}: {what}: {line.strip()}")
    assert hits == []
    # np.load of user files must refuse pickles explicitly
    for path in files:
        for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if "np.load(" in line:
                assert "allow_pickle=False" in line, f"{path}:{n}: {line.strip()}"


def test_watch_stop_source_with_keys_end_to_end(run_cli, keys):
    """`watch --target ... --stop-source` with CurveZMQ keys: the encrypted stream meets the
    target and the stop command passes the authenticated control channel."""
    port = free_port()
    ep, ctl = f"tcp://127.0.0.1:{port}", f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli(
        "simulate", ep, "--control", ctl, "--speed", "5", "--duration", "300",
        "--server-key", str(keys["source_secret"]), "--allowed-keys", str(keys["allowed"]),
    )  # fmt: skip
    w = run_cli(
        "watch", ep, "--json", "--duration", "40", "--no-lp", "--control", ctl,
        "--target", "lcb>local@0.01", "--stop-source",
        "--server-public-key", str(keys["source_public"]),
        "--client-key", str(keys["monitor_secret"]),
    )  # fmt: skip
    out, err = w.communicate(timeout=60)
    assert w.returncode == 0, err
    res = json.loads(out)
    assert res["target_met"] is True
    assert res["stop_command"]["ok"] is True and res["stop_command"]["state"] == "stopping"
    _, sim_err = sim.communicate(timeout=20)
    assert sim.returncode == 0 and "stopped by command" in sim_err
