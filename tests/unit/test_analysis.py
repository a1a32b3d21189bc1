"""Analyzer wiring: which figures a snapshot carries, with which labels, for which streams."""

from __future__ import annotations

import math

import numpy as np
import pytest

from labwatch.analysis import AnalysisConfig, correlation_contrast, correlators
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.models import chsh_bases, maximally_entangled, probabilities, with_white_noise
from labwatch.polytope import white_noise_visibility
from labwatch.protocol import encode_events, encode_histogram
from labwatch.scenario import Scenario

SC = Scenario(2, 2, 2, 2)


def werner_p(v: float) -> np.ndarray:
    a, b = chsh_bases()
    return probabilities(with_white_noise(maximally_entangled(2), v), a, b)


def event_stream(p: np.ndarray, n_msgs: int, per_msg: int, seed: int, no_click: bool = False):
    rng = np.random.default_rng(seed)
    flat = p.reshape(4, 4)
    for k in range(n_msgs):
        xy = rng.integers(0, 4, per_msg)
        ab = np.empty(per_msg, dtype=np.int64)
        for i in range(4):  # vectorised per setting pair
            sel = xy == i
            ab[sel] = rng.choice(4, size=sel.sum(), p=flat[i])
        ev = np.stack([xy // 2, xy % 2, ab // 2, ab % 2], axis=1)
        yield encode_events(
            source="s",
            run="r",
            seq=k,
            t_start=0.1 * k,
            t_stop=0.1 * (k + 1),
            events=ev,
            scenario=SC,
            setting_probabilities=np.full((2, 2), 0.25),
            no_click=no_click,
        )


def run(frames, **cfg) -> MonitorEngine:
    e = MonitorEngine(EngineConfig(epoch_s=1.0, analysis=AnalysisConfig(**cfg)))
    for f in frames:
        assert e.ingest(f).accepted
    e.flush()
    return e


def test_random_setting_stream_carries_every_figure_with_labels():
    e = run(event_stream(werner_p(0.95), 40, 500, seed=1), target="p<=1e-9")
    s = e.latest
    names = {f.name for f in s.figures}
    assert {"visibility", "no_signalling_p", "p_value", "bell_lcb"} <= names
    vis = s.figure("visibility")
    # v* of a CHSH-optimal Werner state is 1/(V sqrt 2) at the exact point (CHSH is the only facet
    # violated): Kaszlikowski et al., PRL 85, 4418 (2000) for d = 2; finite data within 5 sigma.
    assert abs(vis.value - 1 / (0.95 * math.sqrt(2))) < 5 * vis.stderr
    assert "fair sampling" in vis.assumptions and "i.i.d." in vis.assumptions
    p = s.figure("p_value")
    assert p.value < 1e-9 and p.assumptions[:2] == ("random settings", "stopping-safe")
    lcb = s.figure("bell_lcb")
    assert 2.0 < lcb.value < s.bell.value < lcb.high
    assert not any("block settings" in a for a in lcb.assumptions)
    assert s.extras["target"]["met"] and s.extras["strength"]["kl_nats_per_trial"] > 0
    assert s.extras["forecast"]["reached"]
    assert s.extras["functional"]["quantum_bound"] == pytest.approx(2 * math.sqrt(2))


def test_no_click_streams_drop_the_fair_sampling_label():
    e = run(event_stream(werner_p(0.95), 20, 500, seed=2, no_click=True))
    assert "fair sampling" not in e.latest.figure("visibility").assumptions
    assert "fair sampling" not in e.latest.figure("p_value").assumptions


def test_block_stream_has_no_local_realism_test():
    rng = np.random.default_rng(3)
    p = werner_p(0.9)
    frames = []
    for k in range(80):
        x, y = divmod((k // 5) % 4, 2)
        frames.append(
            encode_histogram(
                source="s",
                run="r",
                seq=k,
                t_start=0.1 * k,
                t_stop=0.1 * (k + 1),
                counts=rng.multinomial(300, p[x, y].ravel()).reshape(2, 2),
                scenario=SC,
                pair=(x, y),
            )
        )
    e = run(frames, target="p<=1e-6")
    s = e.latest
    assert s.figure("p_value") is None
    assert "cannot test local realism" in s.extras["local_realism"]
    assert not s.extras["target"]["met"] and "random-setting" in s.extras["target"]["reason"]
    assert "cannot test local realism (block settings)" in s.figure("bell_lcb").assumptions


def test_visibility_matches_a_direct_lp_solve_of_the_projected_data():
    e = run(event_stream(werner_p(0.9), 30, 800, seed=4))
    direct = white_noise_visibility(werner_p(0.9))
    vis = e.latest.figure("visibility")
    assert abs(vis.value - direct.visibility) < 5 * vis.stderr


def test_certificate_functional_comes_from_an_earlier_epoch():
    e = run(event_stream(werner_p(0.95), 30, 500, seed=5), functional="certificate")
    s = e.latest
    assert s.extras["functional"]["chosen_from_data"] is True
    assert s.bell is not None and s.bell.local_bound == pytest.approx(1.0)
    assert s.bell.value > 1.0  # the data violate the inequality the LP found before


def test_bad_target_is_refused_with_the_allowed_forms():
    with pytest.raises(ValueError, match="p<=1e-6"):
        AnalysisConfig(target="p is small")


def test_correlators_and_contrast_by_hand():
    counts = np.zeros((2, 2, 2, 2), dtype=np.int64)
    counts[:, :] = [[40, 10], [10, 40]]  # E = (80 - 20)/100 = 0.6 everywhere
    e, err = correlators(counts)
    assert np.allclose(e, 0.6) and np.allclose(err, math.sqrt((1 - 0.36) / 100))
    assert np.allclose(correlation_contrast(counts), 0.6)  # (0.8 - 1/2)/(1/2)


def test_no_click_stream_uses_ch_and_counts_only_double_clicks():
    sc = Scenario(2, 2, 3, 3)  # outcomes +, -, no-click (last)
    rng = np.random.default_rng(6)
    p = rng.dirichlet(np.ones(9), size=(2, 2)).reshape(2, 2, 3, 3)
    frames = []
    for k in range(30):
        ev = []
        for x in range(2):
            for y in range(2):
                cells = rng.choice(9, size=50, p=p[x, y].ravel())
                ev += [[x, y, c // 3, c % 3] for c in cells]
        frames.append(
            encode_events(
                source="s",
                run="r",
                seq=k,
                t_start=0.1 * k,
                t_stop=0.1 * (k + 1),
                events=np.array(ev),
                scenario=sc,
                setting_probabilities=np.full((2, 2), 0.25),
                no_click=True,
            )
        )
    e = run(frames)
    s = e.latest
    assert s.functional == "CH" and s.bell.local_bound == pytest.approx(0.0)
    both_clicked = s.window_counts[:, :, :2, :2].sum()
    # the whole 3 s run lies inside the 30 s window: rate = double clicks / live time
    assert s.rates.coincidence_hz == pytest.approx(both_clicked / s.live_time_s)
    assert s.rates.coincidence_hz < s.window_trials / s.live_time_s


def test_a_change_of_setting_probabilities_within_a_run_is_rejected():
    ev = np.array([[0, 0, 0, 0], [1, 1, 1, 0]])
    q1, q2 = np.full((2, 2), 0.25), np.array([[0.4, 0.1], [0.1, 0.4]])
    e = MonitorEngine(EngineConfig(analysis=AnalysisConfig(visibility=False)))

    def mk(k, q):
        return encode_events(
            source="s",
            run="r",
            seq=k,
            t_start=k,
            t_stop=k + 1,
            events=ev,
            scenario=SC,
            setting_probabilities=q,
        )

    assert e.ingest(mk(0, q1)).accepted
    r = e.ingest(mk(1, q2))
    assert not r.accepted and r.reason == "settings_change"
    assert e.ingest(mk(2, q1)).accepted


def test_late_messages_are_kept_out_of_the_stopping_safe_test():
    frames = list(event_stream(werner_p(0.95), 30, 300, seed=7))
    frames[10], frames[11] = frames[11], frames[10]  # message 10 arrives late
    e = run(frames)
    ev = e.latest.extras["evidence"]
    assert ev["untested_late_trials"] == 300
    assert ev["trials"] == e.latest.trials - 300  # every other trial is tested once
    assert ev["factor_bound"] <= 1 + 1e-9  # sum_xy q F <= 1 over all deterministic strategies


def test_an_unviolable_custom_functional_does_not_stop_the_monitor():
    from labwatch.bell import BellFunctional

    ones = BellFunctional(np.ones((2, 2, 2, 2)), name="sum")  # equals 4 for every point
    e = run(event_stream(werner_p(0.9), 20, 200, seed=8), functional=ones)
    s = e.latest
    assert s.functional == "sum" and s.bell.value == pytest.approx(4.0)
    assert "no stopping-safe test" in s.extras["evidence_note"]


def test_p_value_target_does_not_fire_on_assumed_setting_probabilities():
    frames = []
    for f in event_stream(werner_p(0.95), 30, 500, seed=9):
        import json

        h = json.loads(f[1])
        h.pop("setting_probabilities")
        frames.append([f[0], json.dumps(h).encode(), f[2]])
    e = run(frames, target="p<=1e-6")
    s = e.latest
    assert s.figure("p_value").value < 1e-6
    assert "setting probabilities assumed uniform" in s.figure("p_value").assumptions
    assert not s.extras["target"]["met"] and "declare" in s.extras["target"]["reason"]
