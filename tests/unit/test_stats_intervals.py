"""Fixed-n figures: Clopper-Pearson intervals and the labelled sigma figure."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binomtest
from statsmodels.stats.proportion import proportion_confint

from labwatch.bell import chsh
from labwatch.stats import (
    StatsError,
    clopper_pearson,
    clopper_pearson_array,
    clopper_pearson_counts,
    sigma_figure,
)


@pytest.mark.parametrize("level", [0.5, 0.9, 0.95, 0.99, 0.999999])
def test_clopper_pearson_matches_scipy_and_statsmodels(level: float) -> None:
    # References: scipy.stats.binomtest(...).proportion_ci(method="exact") and statsmodels
    # proportion_confint(method="beta"), both implementing Clopper & Pearson, Biometrika 26,
    # 404 (1934).  Tolerance 1e-9: all three invert the same regularised incomplete beta.
    rng = np.random.default_rng(11)
    cases = [(0, 1), (1, 1), (0, 10), (10, 10), (3, 7), (500, 1000), (1, 100000)]
    cases += [(int(k), int(n)) for n in rng.integers(1, 5000, 25) for k in [rng.integers(0, n + 1)]]
    for k, n in cases:
        ours = clopper_pearson(k, n, confidence_level=level)
        ref = binomtest(k, n).proportion_ci(confidence_level=level, method="exact")
        lo_sm, hi_sm = proportion_confint(k, n, alpha=1 - level, method="beta")
        assert ours.low == pytest.approx(ref.low, abs=1e-9)
        assert ours.high == pytest.approx(ref.high, abs=1e-9)
        assert ours.low == pytest.approx(lo_sm, abs=1e-9)
        assert ours.high == pytest.approx(hi_sm, abs=1e-9)
        assert ours.confidence_level == level
        assert "fixed n" in ours.assumptions


def test_clopper_pearson_edges_and_errors() -> None:
    assert (clopper_pearson(0, 0).low, clopper_pearson(0, 0).high) == (0.0, 1.0)
    assert clopper_pearson(0, 5).low == 0.0
    assert clopper_pearson(5, 5).high == 1.0
    for bad in [(-1, 5), (6, 5), (1.5, 5), (True, 5)]:
        with pytest.raises(StatsError):
            clopper_pearson(*bad)
    for level in [0.0, 1.0, -0.5, "x"]:
        with pytest.raises(StatsError, match="confidence_level"):
            clopper_pearson(1, 5, confidence_level=level)  # type: ignore[arg-type]
    with pytest.raises(StatsError, match="scalars"):
        clopper_pearson(np.array([1, 2]), 5)  # type: ignore[arg-type]


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 400), st.integers(0, 400), st.sampled_from([0.8, 0.95, 0.99]))
def test_interval_invariants(k: int, extra: int, level: float) -> None:
    n = k + extra
    ci = clopper_pearson(k, n, level)
    assert 0.0 <= ci.low <= ci.high <= 1.0
    if n > 0:
        assert ci.low <= k / n <= ci.high
    # more data with the same frequency never widens the interval
    wide = clopper_pearson(k, n, level)
    narrow = clopper_pearson(4 * k, 4 * n, level)
    assert narrow.high - narrow.low <= wide.high - wide.low + 1e-12


def test_counts_tensor_intervals_are_per_outcome_per_setting_pair() -> None:
    rng = np.random.default_rng(3)
    counts = rng.integers(0, 50, size=(2, 3, 2, 2))
    counts[1, 2] = 0  # a pair without trials gets [0, 1]
    out = clopper_pearson_counts(counts, 0.9)
    totals = counts.sum(axis=(2, 3))
    for x, y, a, b in np.ndindex(counts.shape):
        ref = clopper_pearson(int(counts[x, y, a, b]), int(totals[x, y]), 0.9)
        assert out.low[x, y, a, b] == pytest.approx(ref.low, abs=1e-12)
        assert out.high[x, y, a, b] == pytest.approx(ref.high, abs=1e-12)
    assert np.all(np.isnan(out.estimate[1, 2]))
    assert out.assumptions == ("fixed n", "i.i.d.")
    lo, hi = clopper_pearson_array([0, 1, 2], [2, 2, 2])
    assert lo.shape == hi.shape == (3,)


def test_sigma_figure_matches_correlator_formula() -> None:
    # var(E_xy) = (1 - E_xy^2) / N_xy for Poisson/multinomial counts: common practice, no source.
    counts = np.array(
        [[[[40, 10], [12, 38]], [[35, 15], [14, 36]]], [[[41, 9], [10, 40]], [[12, 38], [37, 13]]]]
    )
    fig = sigma_figure(chsh(), counts)
    n = counts.sum(axis=(2, 3))
    e = (counts[:, :, 0, 0] + counts[:, :, 1, 1] - counts[:, :, 0, 1] - counts[:, :, 1, 0]) / n
    s_val = e[0, 0] + e[0, 1] + e[1, 0] - e[1, 1]
    sigma = np.sqrt(np.sum((1 - e**2) / n))
    assert fig.value == pytest.approx(s_val, rel=1e-12)
    assert fig.stderr == pytest.approx(sigma, rel=1e-12)
    assert fig.sigmas == pytest.approx((s_val - 2) / sigma, rel=1e-12)
    assert fig.assumptions == ("fixed n", "Gaussian", "i.i.d.")
    assert fig.trials == counts.sum()
    assert 0 < fig.fixed_n_p_value < 0.5
