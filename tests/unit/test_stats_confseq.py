"""Confidence sequences (Waudby-Smith & Ramdas, JRSS-B 86, 1 (2024)) for i.i.d. streams."""

from __future__ import annotations

import math

import numpy as np
import pytest

from labwatch.bell import cglmp, chsh
from labwatch.stats import StatsError
from labwatch.stats.confseq import BellValueSequence, BoundedMeanSequence
from labwatch.stats.intervals import clopper_pearson
from simulators.ensemble import block_counts


def test_eb_factor_is_a_supermartingale_increment() -> None:
    # The predictable plug-in empirical-Bernstein capital of Waudby-Smith & Ramdas (2024),
    # Eq. (13), multiplies exp(lam (X - m) - (X - mu)^2 (-ln(1 - lam) - lam)) per trial.  For it to
    # be a supermartingale the expectation must be <= 1 for every law of X on [0, 1] with mean m
    # and every predictable lam in [0, 1), mu in [0, 1].  The maximum over laws with a given
    # mean is attained on two-point laws, so a grid over pairs is a finite check (grid step 1/80;
    # tolerance 1e-12 for round-off).
    xs = np.linspace(0.0, 1.0, 81)
    worst = 0.0
    for lam in (0.01, 0.2, 0.5, 0.9, 0.99):
        psi = -math.log1p(-lam) - lam
        for mu in np.linspace(0.0, 1.0, 11):
            for m in np.linspace(0.05, 0.95, 19):
                g = np.exp(lam * (xs - m) - psi * (xs - mu) ** 2)
                lo, hi = xs[xs <= m], xs[xs >= m]
                w = np.where(
                    hi[None] > lo[:, None],
                    (m - lo[:, None]) / np.maximum(hi[None] - lo[:, None], 1e-300),
                    0.0,
                )
                e = (1 - w) * g[xs <= m][:, None] + w * g[xs >= m][None, :]
                worst = max(worst, float(e.max()))
    assert worst <= 1.0 + 1e-12


@pytest.mark.slow
@pytest.mark.parametrize("method", ["betting", "eb"])
def test_time_uniform_coverage_for_iid_data(method: str) -> None:
    # i.i.d. three-valued variable, peeked after each of 20 geometrically growing batches up to
    # ~17 000 trials.  The sequence must cover the true mean at all peeks at once in >= 90% of
    # runs at alpha = 0.1.  Monte-Carlo margin: 600 runs, if the true miss rate were exactly 0.1
    # an observed rate above 0.13 would have probability ~0.75% (binomial tail).
    rng = np.random.default_rng(20240101 + len(method))
    runs, alpha = 600, 0.1
    support = np.tile([0.0, 0.3, 1.0], (runs, 1))
    p = np.array([0.5, 0.2, 0.3])
    mean = float(p @ support[0])
    seq = BoundedMeanSequence(support, method, alpha=alpha)
    missed = np.zeros(runs, dtype=bool)
    for n in np.unique(np.geomspace(1, 5000, 20).astype(int)):
        seq.update(rng.multinomial(n, p, size=runs))
        lo, hi = seq.interval(alpha)
        missed |= (lo > mean) | (hi < mean)
        assert np.all(lo <= hi)
    assert missed.mean() <= 0.13
    # and it is informative: width well below 0.1 after ~17 000 trials
    assert float(np.mean(hi - lo)) < 0.05


def test_betting_bounds_depend_on_counts_only() -> None:
    rng = np.random.default_rng(4)
    sup = np.array([[0.0, 0.25, 1.0]])
    data = rng.multinomial(1, [0.2, 0.3, 0.5], size=300)
    one = BoundedMeanSequence(sup)
    one.update(data.sum(axis=0, keepdims=True))
    many = BoundedMeanSequence(sup)
    for row in data:
        many.update(row[None])
    for alpha in (0.01, 0.2):
        assert one.lower_bound(alpha) == pytest.approx(many.lower_bound(alpha), abs=1e-12)
        assert one.upper_bound(alpha) == pytest.approx(many.upper_bound(alpha), abs=1e-12)


def test_bounds_are_ordered_and_shrink() -> None:
    sup = np.array([[0.0, 1.0]])
    seq = BoundedMeanSequence(sup)
    lo0, hi0 = seq.interval(0.05)
    assert (lo0[0], hi0[0]) == (0.0, 1.0)  # no data, no information
    widths = []
    for _ in range(5):
        seq.update(np.array([[30, 70]]))
        lo, hi = seq.interval(0.05)
        assert lo[0] < 0.7 < hi[0]
        widths.append(hi[0] - lo[0])
    assert all(b < a for a, b in zip(widths, widths[1:]))
    # time-uniform bounds are wider than the fixed-n Clopper-Pearson interval at the same level
    ci = clopper_pearson(350, 500, 0.95)
    assert lo[0] < ci.low and hi[0] > ci.high


@pytest.mark.slow
def test_bell_value_sequence_covers_the_true_value_with_block_settings() -> None:
    # Werner-type correlations, settings in blocks of 200 trials of one pair, cycling through
    # the pairs, 200 runs, peeked after every full cycle.  The union-bounded lower and upper
    # bounds must cover S at all peeks in >= 95% of runs at alpha = 0.05 (margin: an observed
    # rate above 9% has probability ~0.6% if the true rate were 5%).
    f = chsh()
    signs = np.array([[1.0, 1.0], [1.0, -1.0]])
    parity = np.array([[1.0, -1.0], [-1.0, 1.0]])
    p = (1 + parity[None, None] * (0.9 * signs / math.sqrt(2))[:, :, None, None]) / 4
    s_true = f.evaluate(p).value
    rng = np.random.default_rng(77)
    runs = 200
    seqs = [BellValueSequence(f) for _ in range(runs)]
    missed = np.zeros(runs, dtype=bool)
    for block in range(28):
        x, y = divmod(block % 4, 2)
        n = np.zeros((2, 2), dtype=int)
        n[x, y] = 200
        counts = block_counts(rng, p, n, runs)
        for r, seq in enumerate(seqs):
            seq.update(counts[r])
            if block % 4 == 3:
                res = seq.result(0.05)
                missed[r] |= not (res.lower <= s_true <= res.upper)
    assert missed.mean() <= 0.09
    res = seqs[0].result(0.05)
    assert res.correlators is not None and res.correlators.shape == (2, 2, 3)
    assert "cannot test local realism (block settings)" in res.assumptions
    assert "i.i.d." in res.assumptions


def test_bell_sequence_errors_and_general_functional() -> None:
    seq = BellValueSequence(cglmp(3), method="eb", alpha=0.01)
    counts = np.ones((2, 2, 3, 3), dtype=int) * 5
    seq.update(counts)
    res = seq.result(0.01)
    assert res.correlators is None
    assert res.lower <= res.estimate <= res.upper
    with pytest.raises(StatsError, match="method"):
        BoundedMeanSequence([[0.0, 1.0]], method="hoeffding")
    with pytest.raises(StatsError, match=r"\[0, 1\]"):
        BoundedMeanSequence([[0.0, 2.0]])
    with pytest.raises(ValueError):
        seq.update(np.ones((2, 2, 2, 2), dtype=int))
    with pytest.raises(StatsError, match="alpha"):
        seq.result(1.5)
