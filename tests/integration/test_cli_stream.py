"""End to end on real sockets: `labwatch simulate` -> `labwatch watch --json`."""

from __future__ import annotations

import json
import math

import pytest

from labwatch.bell import chsh
from simulators.quantum import polarization_source
from tests.conftest import free_port


def watch_json(run_cli, endpoint: str, *extra: str, timeout: float = 60) -> dict:
    w = run_cli("watch", endpoint, "--json", *extra)
    out, err = w.communicate(timeout=timeout)
    assert w.returncode == 0, err
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1, out  # exactly one JSON object on stdout
    return json.loads(lines[0])


def test_simulated_chsh_matches_born_rule(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli("simulate", ep, "--visibility", "0.95", "--duration", "10", "--seed", "11")
    res = watch_json(run_cli, ep, "--duration", "6", "--no-lp")
    sim.wait(30)
    # Expected S from the simulator's own Born-rule + detector probabilities (not hard-coded).
    src = polarization_source(
        visibility=0.95, pair_rate_hz=50000.0, efficiency=0.25, dark_rate_hz=0.0
    )
    expected = chsh().evaluate(src.probabilities(0.0)).value
    # Tsirelson bound 2*sqrt(2) times V for Werner states: Cirel'son, Lett. Math. Phys. 4, 93 (1980)
    assert abs(expected - 2 * math.sqrt(2) * 0.95) < 1e-3
    value, err = res["chsh"]["value"], res["chsh"]["stderr"]
    assert 0.005 < err < 0.1
    assert abs(value - expected) < 4 * err  # 4 sigma: a false alarm once in ~16000 runs
    assert res["gaps"] == 0 and res["rejected"] == 0
    assert res["coincidences"] > 5000 and res["messages"] > 30
    assert res["chsh"]["assumptions"] == ["fixed n", "Gaussian", "i.i.d."]


def test_garbage_only_publisher_is_all_rejected(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli("simulate", ep, "--faults", "garbage", "--duration", "8", "--interval", "0.05")
    res = watch_json(run_cli, ep, "--duration", "3")
    sim.kill()
    assert res["messages"] > 20
    assert res["rejected"] == res["messages"]
    assert res["coincidences"] == 0 and res["chsh"]["value"] is None
    assert sum(res["rejections_by_reason"].values()) == res["rejected"]
    assert all(r["reason"] and r["detail"] for r in res["recent_rejections"])


def test_dropped_and_duplicated_messages_are_reported(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli(
        "simulate",
        ep,
        "--faults",
        "drop=0.1,duplicate=0.1,malformed=0.1",
        "--duration",
        "8",
        "--seed",
        "3",
    )
    res = watch_json(run_cli, ep, "--duration", "3", "--no-lp")
    sim.kill()
    assert res["gaps"] > 0 and res["missing"] > 0
    assert res["duplicates"] > 0
    assert res["rejections_by_reason"]["duplicate"] == res["duplicates"]
    assert res["rejected"] > res["duplicates"]  # malformed ones too


@pytest.mark.parametrize("bad", ["tcp://127.0.0.1:notaport", "udp://x", "tcp://127.0.0.1:99999"])
def test_bad_endpoint_fails_clearly(run_cli, bad):
    w = run_cli("watch", bad, "--duration", "1")
    out, err = w.communicate(timeout=30)
    assert w.returncode != 0
    assert "endpoint" in err and bad in err


def test_qudit_stream_with_random_frames_is_accepted(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli(
        "simulate",
        ep,
        "--source",
        "qudit",
        "--dim",
        "3",
        "--bases",
        "3",
        "--frames",
        "random",
        "--settings",
        "random",
        "--rate",
        "20000",
        "--duration",
        "8",
        "--seed",
        "5",
    )
    res = watch_json(run_cli, ep, "--duration", "4")
    sim.kill()
    assert res["scenario"] == {"settings": [3, 3], "outcomes": [3, 3]}
    assert res["rejected"] == 0 and res["gaps"] == 0 and res["coincidences"] > 10000
    assert res["settings_mode"] == "random"
    vis = res["figures"]["visibility"]
    assert vis["value"] > 0 and vis["stderr"] > 0
    assert "no_signalling_p" in res["figures"]
    best = res["best_pair"]  # more than two settings per party: the best 2x2 choice is reported
    assert len(best["settings_a"]) == 2 and len(best["settings_b"]) == 2 and best["subsets"] == 9
    assert best["visibility"] >= best["full_visibility"] - 1e-6  # a subset cannot beat all settings


def test_local_source_stays_at_the_bound(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli(
        "simulate",
        ep,
        "--source",
        "local",
        "--rate",
        "5000",
        "--settings",
        "random",
        "--duration",
        "8",
        "--seed",
        "2",
    )
    res = watch_json(run_cli, ep, "--duration", "4")
    sim.kill()
    value, err = res["chsh"]["value"], res["chsh"]["stderr"]
    assert (
        abs(value - 2.0) < 4 * err
    )  # a mixture of deterministic strategies at the bound: E[S] = 2
    assert res["figures"]["p_value"]["value"] > 0.01  # no evidence against local realism
    assert "stopping-safe" in res["figures"]["p_value"]["assumptions"]


def test_block_settings_say_they_cannot_test_local_realism(run_cli):
    ep = f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli("simulate", ep, "--settings", "blocks", "--duration", "8")
    res = watch_json(run_cli, ep, "--duration", "3")
    sim.kill()
    assert "cannot test local realism" in res["local_realism"]
    assert "p_value" not in res["figures"]


def test_random_setting_run_stops_itself_at_the_target(run_cli):
    port = free_port()
    ep, ctl = f"tcp://127.0.0.1:{port}", f"tcp://127.0.0.1:{free_port()}"
    sim = run_cli(
        "simulate",
        ep,
        "--control",
        ctl,
        "--settings",
        "random",
        "--visibility",
        "0.9",
        "--duration",
        "120",
        "--seed",
        "4",
    )
    res = watch_json(
        run_cli, ep, "--duration", "60", "--target", "p<=1e-6", "--stop-source", "--control", ctl
    )
    sim_out, sim_err = sim.communicate(timeout=30)  # the source stops by command, long before 120 s
    assert sim.returncode == 0 and "stopped by command" in sim_err
    assert res["target_met"] is True
    t = res["target"]
    assert t["met"] and t["value"] <= 1e-6 and t["trials"] > 0 and t["met_at_source_time"] > 0
    assert t["assumptions"] == ["random settings", "stopping-safe"]
    assert res["stop_command"]["ok"] is True
    assert res["wall_time_s"] < 30
    assert res["figures"]["p_value"]["value"] <= 1e-6
