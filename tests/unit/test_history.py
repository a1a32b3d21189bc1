"""History: bounded memory, even decimation, tail, run segments, extraction of figures."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from labwatch.analysis import AnalysisConfig
from labwatch.engine import EngineConfig, MonitorEngine
from labwatch.history import SERIES, History, neg_log10_p, series_values
from labwatch.protocol import encode_histogram
from labwatch.scenario import Scenario
from labwatch.snapshot import Figure

SC = Scenario(2, 2, 2, 2)


def _snapshots(n_messages: int = 40, run: str = "r1") -> list:
    """Snapshots of a CHSH-shaped block stream (pairs held 0.1 s in turn), one per second."""
    eng = MonitorEngine(
        EngineConfig(window_s=5.0, epoch_s=1.0, analysis=AnalysisConfig(visibility=False))
    )
    out: list = []
    eng.subscribe(out.append)
    # correlated outcomes for E00, E01, E10, anticorrelated for E11: S = 4 * 0.8 = 3.2 here
    same, diff = 90, 10
    for seq in range(n_messages):
        pair = divmod(seq % 4, 2)
        c = [[same, diff], [diff, same]] if pair != (1, 1) else [[diff, same], [same, diff]]
        eng.ingest(
            encode_histogram(
                source="bench",
                run=run,
                seq=seq,
                t_start=seq * 0.1,
                t_stop=(seq + 1) * 0.1,
                scenario=SC,
                pair=pair,
                counts=np.array(c),
            ),
            received_wall=1000.0 + seq * 0.1,
        )
    eng.flush()
    return out


def test_series_values_from_engine_snapshot():
    snap = _snapshots()[-1]
    v = series_values(snap)
    assert set(v) == set(SERIES)
    # every pair has E = (90 - 10)/100 = 0.8; S = 0.8 + 0.8 + 0.8 + 0.8 = 3.2 (hand computation)
    assert v["bell"] == pytest.approx(3.2, abs=1e-12)
    assert v["bell_err"] == pytest.approx(snap.bell.stderr)
    assert v["trials"] == snap.trials == 40 * 200
    assert v["coincidence_hz"] == pytest.approx(snap.rates.coincidence_hz)
    for absent in ("visibility", "neg_log10_p", "no_signalling_p", "singles_a_hz"):
        assert math.isnan(v[absent]), absent
    # the confidence-sequence bound (always computed for a fixed functional) lies below S
    assert v["bell_lcb"] == pytest.approx(snap.figure("bell_lcb").value) and v["bell_lcb"] < 3.2


def test_series_values_reads_figures_and_extras():
    snap = replace(
        _snapshots()[-1],
        figures=(
            Figure("visibility", 0.8, stderr=0.02),
            Figure("p_value", 1e-8, assumptions=("stopping-safe",)),
            Figure("bell_lcb", 2.3),
            Figure("no_signalling_p", 0.4),
        ),
        extras={"best_pair": {"settings_a": [0, 1], "settings_b": [0, 1], "visibility": 0.75}},
    )
    v = series_values(snap)
    assert v["visibility"] == 0.8
    assert (v["visibility_low"], v["visibility_high"]) == pytest.approx((0.78, 0.82))
    assert v["neg_log10_p"] == pytest.approx(8.0)
    assert v["bell_lcb"] == 2.3 and v["no_signalling_p"] == 0.4
    assert v["best_pair_visibility"] == 0.75
    # a reported interval wins over value ± stderr
    snap2 = replace(snap, figures=(Figure("visibility", 0.8, 0.02, low=0.7, high=0.85),))
    w = series_values(snap2)
    assert (w["visibility_low"], w["visibility_high"]) == (0.7, 0.85)


def test_neg_log10_p_clips_and_handles_missing():
    assert neg_log10_p(1e-6) == pytest.approx(6.0)
    assert neg_log10_p(1.0) == 0.0
    assert neg_log10_p(3.0) == 0.0  # p > 1 (a bound, not a probability) shows as no evidence
    assert neg_log10_p(0.0) == pytest.approx(300.0)
    assert math.isnan(neg_log10_p(None)) and math.isnan(neg_log10_p(math.nan))


@pytest.mark.parametrize("capacity", [4, 10, 64])
def test_memory_is_bounded_and_points_stay_evenly_spaced(capacity):
    h = History(capacity)
    for k in range(1000):
        h.append_values(float(k), {"bell": float(k)})
        assert len(h) <= capacity
        t = h.time()
        stored = t[: len(h)]
        assert np.all(np.diff(stored) == h.stride)  # even spacing at the current stride
        assert stored[0] == 0.0 and t[-1] == float(k)  # run start kept, plot ends "now"
    assert h.halvings >= 1 and h.points in (len(h), len(h) + 1)
    np.testing.assert_array_equal(h.series("bell"), h.time())


def test_halving_keeps_every_other_point():
    h = History(4)
    for k in range(5):
        h.append_values(float(k), {"bell": 10.0 + k})
    # 4 rows were full: rows 0, 2 kept, then 4 stored at stride 2
    assert h.time().tolist() == [0.0, 2.0, 4.0]
    assert h.series("bell").tolist() == [10.0, 12.0, 14.0]
    assert h.append_values(5.0, {"bell": 15.0}) is False  # odd index: only the tail
    assert h.time().tolist() == [0.0, 2.0, 4.0, 5.0] and h.latest("bell") == 15.0
    assert h.append_values(6.0, {"bell": 16.0}) is True  # replaces the tail
    assert h.time().tolist() == [0.0, 2.0, 4.0, 6.0]


def test_new_run_segment_clears_history():
    h = History(16)
    for s in _snapshots(30, run="first"):
        h.append(s)
    assert h.points == 3 and h.run_key == ("bench", "first", 0)
    second = _snapshots(20, run="second")
    h.append(second[0])
    assert h.points == 1 and h.run_key[1] == "second"
    # time axis is source seconds since the run began
    assert h.time()[0] == pytest.approx(second[0].t_stop - second[0].t_start)


def test_missing_figures_are_nan_and_unknown_names_rejected():
    h = History(8)
    assert math.isnan(h.latest("bell")) and h.points == 0
    h.append_values(0.0, {"bell": 2.5})
    assert math.isnan(h.latest("visibility"))
    with pytest.raises(ValueError, match="'nonsense'"):
        h.append_values(1.0, {"nonsense": 1.0})
    with pytest.raises(ValueError, match="'nope'"):
        h.series("nope")
    for bad in (3, 5, 2, True, "8"):
        with pytest.raises(ValueError, match="capacity"):
            History(bad)
