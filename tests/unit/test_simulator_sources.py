"""Simulated sources: inverse-CDF sampling, Born-rule quantum sources, seeded drift."""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest

from labwatch.bell import cglmp, chsh
from labwatch.models import DetectorModel, cglmp_bases, maximally_entangled
from labwatch.scenario import Scenario
from simulators.base import ProbabilitySource
from simulators.drift import (
    Constant,
    DriftingSource,
    ExponentialRelaxation,
    RandomWalk,
    Sum,
    drifting_polarization_source,
)
from simulators.quantum import QuantumSource, polarization_source, qudit_source


class FixedSource(ProbabilitySource):
    """A source with a fixed probability tensor (test helper)."""

    def __init__(self, p):
        self.p = np.asarray(p, dtype=float)
        self.scenario = Scenario.from_shape(self.p.shape)

    def trial_rate(self, t):
        return 1.0

    def probabilities(self, t):
        return self.p


class ConstantUniform:
    """Stands in for a Generator whose ``random`` always returns the same number."""

    def __init__(self, u):
        self.u = u

    def random(self, n):
        return np.full(n, self.u)


def tally(shape, x, y, a, b):
    counts = np.zeros(shape, dtype=np.int64)
    np.add.at(counts, (x, y, a, b), 1)
    return counts


def test_sample_frequencies_match_probabilities():
    # Per cell the frequency is binomial around p with sigma = sqrt(p (1 - p) / N_xy);
    # tolerance: every cell within 5 sigma (family-wise false-alarm rate ~1e-5 for 72 cells).
    rng = np.random.default_rng(123)
    shape = (3, 4, 2, 3)
    p = rng.dirichlet(np.ones(6), size=shape[:2]).reshape(shape)
    p[1, 2] = 0.0
    p[1, 2, 1, 1] = 1.0  # a deterministic setting pair
    src = FixedSource(p)
    n = 300_000
    x, y = rng.integers(0, 3, n), rng.integers(0, 4, n)
    a, b = src.sample(rng, 0.0, x, y)
    counts = tally(shape, x, y, a, b)
    trials = counts.sum(axis=(2, 3), keepdims=True)
    freq = counts / trials
    sigma = np.sqrt(np.maximum(p * (1 - p), 1e-300) / trials)
    assert np.all(np.abs(freq - p) <= 5 * sigma + 1e-15)
    assert counts[1, 2, 1, 1] == trials[1, 2, 0, 0]


def test_sample_never_returns_zero_probability_outcomes_at_the_extremes():
    # u just below 1 in a high setting-pair row: u + row rounds up to row + 1 in floating
    # point, which a flat search over cdf + row would map to the (impossible) last outcome.
    p = np.zeros((3, 3, 2, 2))
    p[..., 0, 0] = 0.3
    p[..., 1, 0] = 0.7  # outcomes (0, 1) and (1, 1) have probability 0
    src = FixedSource(p)
    x, y = np.array([2, 2, 1, 0]), np.array([2, 1, 0, 0])
    for u in (0.0, 0.3, 1.0 - 2.0**-53):
        a, b = src.sample(ConstantUniform(u), 0.0, x, y)
        assert np.all(p[x, y, a, b] > 0), u


def test_sample_rejects_bad_settings():
    src = FixedSource(np.full((2, 2, 2, 2), 0.25))
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="out of range"):
        src.sample(rng, 0.0, np.array([0, 2]), np.array([0, 0]))
    with pytest.raises(ValueError, match="equal length"):
        src.sample(rng, 0.0, np.array([0, 1]), np.array([0]))


def test_sample_is_reproducible():
    src = polarization_source()
    x = np.arange(1000) % 2
    y = (np.arange(1000) // 2) % 2
    first = src.sample(np.random.default_rng(5), 0.0, x, y)
    second = src.sample(np.random.default_rng(5), 0.0, x, y)
    assert all(np.array_equal(u, v) for u, v in zip(first, second))


@pytest.mark.parametrize(("visibility", "misalignment"), [(1.0, 0.0), (0.9, 0.0), (0.95, 3.0)])
def test_polarization_source_chsh(visibility, misalignment):
    # Ideal detectors and no window (hence no accidentals): S = 2 sqrt(2) V cos(4 delta) for a
    # HWP error delta on Bob (his analyzer turns by 2 delta; direct algebra from
    # E = V cos 2(theta_A - theta_B) for Phi+).
    src = polarization_source(
        visibility=visibility,
        misalignment_deg=misalignment,
        efficiency=1.0,
        dark_rate_hz=0.0,
        window_s=0.0,
    )
    s = chsh().evaluate(src.probabilities(0.0)).value
    expected = 2 * math.sqrt(2) * visibility * math.cos(math.radians(4 * misalignment))
    assert s == pytest.approx(expected, abs=1e-12)


def test_polarization_source_rates_and_no_click_mode():
    src = polarization_source(pair_rate_hz=1e5, efficiency=0.2, dark_rate_hz=0.0, window_s=1e-9)
    assert src.scenario == Scenario(2, 2, 2, 2)
    # true coincidences R eta^2 plus accidentals between photons of different pairs,
    # sum over the 4 detector pairs of (R eta / 2)^2 tau
    assert src.trial_rate(0.0) == pytest.approx(1e5 * 0.2**2 + 4 * (1e5 * 0.2 / 2) ** 2 * 1e-9)
    sa, sb = src.singles_rates(0.0)
    assert sa.shape == sb.shape == (2, 2)
    assert np.allclose(sa, 1e5 * 0.5 * 0.2)
    lossy = polarization_source(efficiency=0.8, dark_rate_hz=0.0, keep_no_click=True)
    assert lossy.scenario == Scenario(2, 2, 3, 3)
    assert lossy.trial_rate(0.0) == lossy.detector.pair_rate_hz
    assert np.allclose(lossy.probabilities(0.0)[:, :, 2, 2], 0.2**2)


def test_quantum_source_counts_reproduce_cglmp():
    # Sampling 200k trials: the estimate lies within 5 delta-method standard errors.
    d = 3
    src = QuantumSource(maximally_entangled(d), *cglmp_bases(d), pair_rate_hz=1e4)
    rng = np.random.default_rng(77)
    n = 200_000
    x, y = rng.integers(0, 2, n), rng.integers(0, 2, n)
    a, b = src.sample(rng, 0.0, x, y)
    est = cglmp(d).evaluate_counts(tally(src.scenario.shape, x, y, a, b))
    assert abs(est.value - 2.8729) < 5 * est.stderr  # Collins et al., PRL 88, 040404 (2002)
    assert est.value > 2.0


def test_quantum_source_pair_rate_overrides_detector():
    det = DetectorModel(0.5, 0.5, pair_rate_hz=10.0)
    src = QuantumSource(maximally_entangled(2), np.eye(2), np.eye(2), 1e3, det)
    assert src.detector.pair_rate_hz == 1e3
    assert src.detector.efficiency_a == 0.5


def test_qudit_source_shared_frames_correlate():
    src = qudit_source(4, n_bases=3, frames="shared", window_s=0.0)
    p = src.probabilities(0.0)
    assert src.scenario == Scenario(3, 3, 4, 4)
    for k in range(3):
        assert np.allclose(p[k, k], np.eye(4) / 4)  # equal settings: perfectly correlated
    assert np.allclose(p[0, 1], 1 / 16)  # unbiased settings: uniform


def test_qudit_source_random_frames_are_seeded():
    a = qudit_source(5, frames="random", seed=3).probabilities(0.0)
    b = qudit_source(5, frames="random", seed=3).probabilities(0.0)
    c = qudit_source(5, frames="random", seed=4).probabilities(0.0)
    assert np.array_equal(a, b)
    assert not np.allclose(a, c)
    assert not np.allclose(a[0, 0], np.eye(5) / 5)  # unknown frames spoil the correlation


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"d": 6}, "prime-power"),
        ({"d": 3, "frames": "aligned"}, "'aligned'"),
        ({"d": 3, "n_bases": 5}, "n_bases"),
    ],
)
def test_qudit_source_bad_options(kwargs, message):
    with pytest.raises(ValueError, match=message):
        qudit_source(**kwargs)


def test_random_walk_is_order_independent_and_seeded():
    times = [3.5, 9000.0, 0.0, 17.25, 4100.0]
    w1, w2 = RandomWalk(0.1, seed=9), RandomWalk(0.1, seed=9)
    forward = [w1(t) for t in times]
    backward = [w2(t) for t in reversed(times)][::-1]
    assert forward == backward
    assert forward[2] == 0.0
    assert RandomWalk(0.1, seed=10)(50.0) != w1(50.0)
    # linear interpolation between grid nodes
    assert w1(17.25) == pytest.approx(0.75 * w1(17.0) + 0.25 * w1(18.0))


def test_random_walk_diffusion():
    # Var W(t) = sigma^2 t for a Wiener process.  Tolerance: 5 standard errors of a variance
    # estimate from n samples, 5 sqrt(2/n) relative.
    sigma, t, n = 0.3, 50.0, 2000
    values = np.array([RandomWalk(sigma, seed=s)(t) for s in range(n)])
    assert values.var() == pytest.approx(sigma**2 * t, rel=5 * math.sqrt(2 / n))


def test_exponential_relaxation_and_sum():
    e = ExponentialRelaxation(5.0, 1.0, 10.0)
    assert e(0.0) == 5.0
    assert e(10.0) == pytest.approx(1.0 + 4.0 / math.e)
    assert Sum((e, Constant(2.0)))(10.0) == pytest.approx(3.0 + 4.0 / math.e)
    with pytest.raises(ValueError, match="time_constant_s"):
        ExponentialRelaxation(1.0, 0.0, 0.0)


def test_drifting_source_recovers_and_replays():
    kw = {"efficiency": 1.0, "dark_rate_hz": 0.0, "window_s": 0.0}
    src = drifting_polarization_source(seed=1, alignment_time_s=60.0, **kw)
    again = drifting_polarization_source(seed=1, alignment_time_s=60.0, **kw)
    s0 = chsh().evaluate(src.probabilities(0.0)).value
    s_late = chsh().evaluate(src.probabilities(600.0)).value
    assert s_late > s0
    assert np.array_equal(src.probabilities(250.0), again.probabilities(250.0))
    params = src.parameters(0.0)
    assert params == {"misalignment_deg": 6.0, "visibility": 0.90}
    # at t = 0 the source is exactly the stationary one with those parameters
    ref = polarization_source(visibility=0.9, misalignment_deg=6.0, **kw)
    assert np.allclose(src.probabilities(0.0), ref.probabilities(0.0))
    assert src.trial_rate(0.0) == pytest.approx(ref.trial_rate(0.0))


def test_drifting_source_refuses_scenario_change():
    src = DriftingSource(
        lambda n: qudit_source(3, n_bases=int(n)),
        {"n": lambda t: 2 if t < 1 else 3},
    )
    with pytest.raises(ValueError, match="scenario"):
        src.probabilities(2.0)


def test_pure_layer_does_not_import_transport_or_widgets():
    code = (
        "import sys, labwatch.models, simulators.quantum, simulators.drift; "
        "bad = [m for m in ('zmq', 'ipywidgets', 'bqplot') if m in sys.modules]; "
        "assert not bad, bad"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
