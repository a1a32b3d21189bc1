"""Stopping targets (strict parsing, evaluation, fire-once) and the time-to-target forecast."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pytest

from labwatch.bell import chsh
from labwatch.stats import (
    TARGET_FORMS,
    LocalRealismTest,
    TargetParseError,
    TargetWatch,
    forecast_time_to_target,
    parse_target,
)
from labwatch.stats.confseq import BellValueSequence
from simulators.ensemble import random_setting_counts


def test_every_documented_form_parses() -> None:
    for text in TARGET_FORMS:
        parse_target(text)
    t = parse_target(" S_lcb > 2 @ 0.01 ")
    assert (t.kind, t.threshold, t.strict, t.alpha, t.label) == ("bell_lcb", 2.0, True, 0.01, "S")
    t = parse_target("lcb>=local@0.05")
    assert t.threshold is None and not t.strict
    t = parse_target("p<=1e-9")
    assert (t.kind, t.threshold, t.alpha) == ("p_value", 1e-9, None)
    t = parse_target("v_ucb<1@0.01")
    assert (t.kind, t.threshold) == ("visibility_ucb", 1.0)
    assert parse_target("lcb>-0.1@0.01").threshold == -0.1


@pytest.mark.parametrize(
    "bad",
    [
        "",
        "p>1e-6",
        "p<=2",
        "p<=0",
        "S_lcb>2",
        "lcb>2@1.5",
        "lcb<2@0.01",
        "v>1@0.01",
        "q<=0.1",
        "p<=1e-6@0.01",
        "lcb>loc@0.01",
        "1_lcb>2@0.01",
    ],
)
def test_strict_parse_errors_list_the_allowed_forms(bad: str) -> None:
    with pytest.raises(TargetParseError) as err:
        parse_target(bad)
    assert repr(bad) in str(err.value) or "a target is a string" in str(err.value)
    assert "S_lcb>2@0.01" in str(err.value)  # lists the forms
    with pytest.raises(TargetParseError):
        parse_target(None)  # type: ignore[arg-type]


def test_p_value_target_fires_once_with_time_and_trials() -> None:
    fired = []
    watch = TargetWatch("p<=1e-3", on_fire=fired.append)
    d = watch.check({"p_value": 0.2, "time": 1.0, "trials": 100})
    assert not d.met and "0.2" in d.reason
    d = watch.check({"p_value": 4e-4, "time": 2.0, "trials": 200})
    assert d.met and d.fired_now and (d.time, d.trials) == (2.0, 200)
    d = watch.check({"p_value": 1e-6, "time": 3.0, "trials": 300})
    assert d.met and not d.fired_now and d.time == 2.0  # latched at the first success
    assert len(fired) == 1 and watch.fired


def test_p_value_target_refuses_block_streams() -> None:
    d = parse_target("p<=1e-6").evaluate({"p_value": 1e-9, "random_settings": False})
    assert not d.met and "random-setting" in d.reason
    assert not parse_target("p<=1e-6").evaluate({}).met


@dataclass(frozen=True)
class Figures:
    bell_lcb: object
    local_bound: float
    time: float
    trials: int
    visibility_ucb: object = None


def test_lcb_and_visibility_targets_on_a_dataclass() -> None:
    seq = BellValueSequence(chsh())
    q = np.full((2, 2), 0.25)
    signs = np.array([[1.0, 1.0], [1.0, -1.0]])
    parity = np.array([[1.0, -1.0], [-1.0, 1.0]])
    p = (1 + parity[None, None] * (signs / math.sqrt(2))[:, :, None, None]) / 4
    target = parse_target("S_lcb>local@0.01")
    rng = np.random.default_rng(0)
    met_at = None
    for k, counts in enumerate(random_setting_counts(rng, p, q, [200] * 20, 1)):
        seq.update(counts[0])
        fig = Figures(seq.lower_bound, chsh().local_bound, float(k), 200 * (k + 1))
        d = target.evaluate(fig)
        assert d.value == pytest.approx(seq.lower_bound(0.01))
        if d.met:
            met_at = d.trials
            break
    assert met_at is not None and met_at <= 4000
    assert "not a test of local realism" in d.reason
    v = parse_target("v<1@0.01")
    assert v.evaluate(Figures(None, 2.0, 0.0, 0, {0.01: 0.97})).met
    assert not v.evaluate(Figures(None, 2.0, 0.0, 0, {0.05: 0.97})).met  # wrong level: no figure
    assert not v.evaluate(Figures(None, 2.0, 0.0, 0, lambda a: 1.02)).met


def test_forecast_is_close_for_a_stationary_stream() -> None:
    # Tsirelson-point CHSH stream: the forecast made after 400 trials for p <= 1e-9 should be
    # within its stated range of the trials actually needed in most cases; here one seeded run,
    # checked loosely (factor 2) because a single first-passage time is itself random.
    rng = np.random.default_rng(8)
    q = np.full((2, 2), 0.25)
    signs = np.array([[1.0, 1.0], [1.0, -1.0]])
    parity = np.array([[1.0, -1.0], [-1.0, 1.0]])
    p = (1 + parity[None, None] * (signs / math.sqrt(2))[:, :, None, None]) / 4
    test = LocalRealismTest(chsh(), q)
    gen = random_setting_counts(rng, p, q, [20] * 400, 1)
    for _ in range(20):
        test.update(next(gen)[0])
    fc = test.forecast(1e-9, trial_rate=1000.0)
    assert not fc.reached and fc.trials_low <= fc.trials <= fc.trials_high
    assert fc.seconds == pytest.approx(fc.trials / 1000.0)
    start = test.trials
    for counts in gen:
        test.update(counts[0])
        if test.p_value <= 1e-9:
            break
    needed = test.trials - start
    assert 0.5 * fc.trials < needed < 2.0 * fc.trials
    assert test.forecast(1e-9).reached


def test_forecast_edge_cases() -> None:
    fc = forecast_time_to_target([(100, -0.5), (100, -0.2)], 1e-6, -0.7, 0.0, 50.0)
    assert math.isinf(fc.trials) and "not growing" in str(fc)
    fc = forecast_time_to_target([], 1e-6, 0.0, 0.0)
    assert math.isinf(fc.trials) and math.isnan(fc.seconds)
    fc = forecast_time_to_target([(10, 1.0)], 1e-6, 1.0, 1.0, growth_per_trial=0.05)
    assert fc.trials == pytest.approx((math.log(1e6) - 1.0) / 0.05)
    windowed = forecast_time_to_target(
        [(100, -1.0)] * 5 + [(100, 2.0)] * 5, 1e-6, 5.0, 5.0, window_trials=300
    )
    assert windowed.growth_per_trial == pytest.approx(0.02) and windowed.batches == 3
    with pytest.raises(ValueError, match="p_target"):
        forecast_time_to_target([], 0.0, 0.0, 0.0)
