"""Local-hidden-variable sources: at the bound, with memory, and the Monte-Carlo helpers."""

from __future__ import annotations

import numpy as np
import pytest

from labwatch.bell import cglmp, chsh
from simulators.ensemble import block_counts, random_setting_counts
from simulators.local import (
    AdaptiveLocalSource,
    LocalMixtureSource,
    LocalSourceError,
    adaptive_local_counts,
    optimal_strategies,
)


@pytest.mark.parametrize("functional", [chsh(), chsh(minus=(0, 1), sign=-1), cglmp(3)])
def test_mixture_at_the_bound_sits_exactly_on_it(functional) -> None:
    src = LocalMixtureSource.at_bound(functional, rate=500.0)
    p = src.probabilities(0.0)
    assert functional.evaluate(p).value == pytest.approx(functional.local_bound, abs=1e-12)
    assert np.allclose(p.sum(axis=(2, 3)), 1.0)
    assert src.trial_rate(3.0) == 500.0
    sa, sb = optimal_strategies(functional)
    assert sa.shape[0] == src.weights.size
    if functional.name == "CHSH":
        assert sa.shape[0] == 8  # 8 of the 16 deterministic strategies reach S = 2


def test_mixture_sampling_is_seeded_and_matches_probabilities() -> None:
    src = LocalMixtureSource.at_bound(chsh())
    rng = np.random.default_rng(0)
    x = rng.integers(0, 2, 40000)
    y = rng.integers(0, 2, 40000)
    a1, b1 = src.sample(np.random.default_rng(7), 0.0, x, y)
    a2, b2 = src.sample(np.random.default_rng(7), 0.0, x, y)
    assert np.array_equal(a1, a2) and np.array_equal(b1, b2)
    counts = np.zeros((2, 2, 2, 2))
    np.add.at(counts, (x, y, a1, b1), 1)
    freq = counts / counts.sum(axis=(2, 3), keepdims=True)
    # ~10 000 trials per pair: binomial sd of a frequency <= 0.005; 5 sd tolerance
    assert np.allclose(freq, src.probabilities(0.0), atol=0.025)


def test_adaptive_source_fixes_strategy_before_settings() -> None:
    f = chsh()
    q = np.full((2, 2), 0.25)
    rng = np.random.default_rng(1)
    x = rng.integers(0, 2, 300)
    y = rng.integers(0, 2, 300)
    x_alt = x.copy()
    y_alt = y.copy()
    x_alt[-50:] = 1 - x_alt[-50:]  # change only the last 50 trials' settings
    one = AdaptiveLocalSource(f, q, chunk=10)
    two = AdaptiveLocalSource(f, q, chunk=10)
    one.sample(rng, 0.0, x, y)
    two.sample(rng, 0.0, x_alt, y_alt)
    sa1, sb1 = one.last_strategies
    sa2, sb2 = two.last_strategies
    # strategies of trials up to and including the first changed trial's chunk are identical
    assert np.array_equal(sa1[:260], sa2[:260]) and np.array_equal(sb1[:260], sb2[:260])
    # each trial is answered by its strategy, and every strategy is local (value <= L)
    a, b = one.sample(rng, 0.0, x, y)
    sa, sb = one.last_strategies
    assert np.array_equal(a, sa[np.arange(300), x]) and np.array_equal(b, sb[np.arange(300), y])
    values = f.coefficients[[0, 0, 1, 1], [0, 1, 0, 1]]  # (4, 2, 2)
    for s_a, s_b in zip(sa, sb):
        total = sum(values[i][s_a[i // 2], s_b[i % 2]] for i in range(4))
        assert total <= f.local_bound + 1e-12
    assert one.memory.sum() == 600


def test_adaptive_counts_push_the_naive_estimate_up() -> None:
    # The memory effect: with per-setting normalisation the running CHSH estimate of the
    # adaptive source ends above 2 on average although every trial is local.
    f = chsh()
    q = np.full((2, 2), 0.25)
    rng = np.random.default_rng(2)
    total = np.zeros((400, 2, 2, 2, 2))
    for counts in adaptive_local_counts(rng, f, q, [50] * 10, 400):
        assert counts.shape == (400, 2, 2, 2, 2)
        assert np.all(counts.sum(axis=(1, 2, 3, 4)) == 50)
        total += counts
    n = total.sum(axis=(3, 4))
    e = (total[..., 0, 0] + total[..., 1, 1] - total[..., 0, 1] - total[..., 1, 0]) / n
    s_hat = e[:, 0, 0] + e[:, 0, 1] + e[:, 1, 0] - e[:, 1, 1]
    # mean over 400 runs; the i.i.d. mixture at the bound gives 2 up to ~0.004 (sd/sqrt(400))
    assert s_hat.mean() > 2.02


def test_ensemble_helpers() -> None:
    rng = np.random.default_rng(3)
    p = np.full((2, 2, 2, 2), 0.25)
    batches = list(random_setting_counts(rng, p, np.full((2, 2), 0.25), [5, 7], 11))
    assert [b.sum() for b in batches] == [55, 77]
    block = block_counts(rng, p, [[10, 0], [0, 3]], 4)
    assert block.shape == (4, 2, 2, 2, 2)
    assert np.all(block.sum(axis=(3, 4))[:, 0, 0] == 10)
    assert np.all(block.sum(axis=(3, 4))[:, 0, 1] == 0)


def test_local_source_errors() -> None:
    with pytest.raises(LocalSourceError, match="rate"):
        LocalMixtureSource.at_bound(chsh(), rate=-1.0)
    with pytest.raises(LocalSourceError, match="outcomes"):
        LocalMixtureSource([[0, 2]], [[0, 1]], (2, 2))
    with pytest.raises(LocalSourceError, match="chunk"):
        AdaptiveLocalSource(chsh(), np.full((2, 2), 0.25), chunk=0)
    with pytest.raises(LocalSourceError, match="setting probabilities"):
        AdaptiveLocalSource(chsh(), np.full((2, 2), 0.3))
