"""Stopping-safe test of local realism: validity of every factor, predictability, API."""

from __future__ import annotations

import math
import zlib

import numpy as np
import pytest

from labwatch.bell import BellFunctional, cglmp, ch_eberhard, chsh, chsh_relabelings
from labwatch.stats import (
    BETTING_METHODS,
    LocalRealismEnsemble,
    LocalRealismTest,
    StatsError,
    choose_functional,
    kelly_growth,
    max_local_expectation,
)
from labwatch.strategies import vertex_values
from simulators.ensemble import random_setting_counts

SIGNS = np.array([[1.0, 1.0], [1.0, -1.0]])
PARITY = np.array([[1.0, -1.0], [-1.0, 1.0]])


def werner(visibility: float) -> np.ndarray:
    return (1 + PARITY[None, None] * (visibility * SIGNS / math.sqrt(2))[:, :, None, None]) / 4


def brute_force_bound(factor: np.ndarray, q: np.ndarray) -> float:
    """max over all deterministic strategy pairs of sum_xy q F, by full enumeration."""
    return float(vertex_values(q[:, :, None, None] * factor).max())


def random_functional(rng: np.random.Generator, shape: tuple[int, int, int, int]) -> BellFunctional:
    return BellFunctional(rng.normal(size=shape), name="random")


CASES = [
    ("chsh", lambda rng: chsh(), np.full((2, 2), 0.25)),
    ("chsh-biased-q", lambda rng: chsh(), np.array([[0.4, 0.2], [0.3, 0.1]])),
    ("cglmp3", lambda rng: cglmp(3), np.array([[0.3, 0.2], [0.2, 0.3]])),
    ("ch-eberhard", lambda rng: ch_eberhard(3, 3), np.full((2, 2), 0.25)),
    ("random-3x2x2x3", lambda rng: random_functional(rng, (3, 2, 2, 3)), np.full((3, 2), 1 / 6)),
]


@pytest.mark.parametrize("method", BETTING_METHODS)
@pytest.mark.parametrize("name,make,q", CASES, ids=[c[0] for c in CASES])
def test_every_factor_is_valid_exhaustively(method, name, make, q) -> None:
    # Zhang, Glancy & Knill, PRA 88, 052119 (2013): a factor F is valid against local realism
    # iff sum_xy q F(A_x, B_y, x, y) <= 1 for every deterministic strategy pair.  We check every
    # factor the test builds, before every batch, by full enumeration of the vertices
    # (vertex_values) and by the optimiser (max_local_expectation); tolerance 1e-12 is
    # round-off on sums of order one.
    rng = np.random.default_rng(zlib.crc32(f"{method}/{name}".encode()))  # stable seed
    f = make(rng)
    shape = f.coefficients.shape
    test = LocalRealismTest(f, q, method=method)
    # data: a nonlocal-looking behaviour for CHSH-type cases, random behaviours otherwise
    if shape == (2, 2, 2, 2):
        p = werner(0.95)
    else:
        p = rng.dirichlet(np.full(shape[2] * shape[3], 0.5), size=shape[:2]).reshape(shape)
    for counts in random_setting_counts(rng, p, q, [1, 3, 10, 30, 100, 300], 1):
        factor = test.next_factor()
        assert np.all(factor >= 0)
        assert brute_force_bound(factor, q) <= 1.0 + 1e-12
        assert max_local_expectation(factor, q) <= 1.0 + 1e-12
        result = test.update(counts[0])
        assert result.factor_bound <= 1.0 + 1e-12
    if method == "grid":  # every component of the mixture, not only the mixture
        engine = test._engine
        for log_t in engine._grid_log_t:
            assert brute_force_bound(np.exp(log_t).reshape(shape), q) <= 1.0 + 1e-12


@pytest.mark.parametrize("method", BETTING_METHODS)
def test_bet_is_predictable(method: str) -> None:
    # The factor applied to a batch is fixed before the batch: two tests with the same past
    # and different current batches apply the same factor, and the increment of ln M is
    # exactly sum_c N(c) ln F(c) with the factor shown before the update.
    rng = np.random.default_rng(1)
    q = np.full((2, 2), 0.25)
    past = list(random_setting_counts(rng, werner(0.9), q, [50, 50, 50], 1))
    a = LocalRealismTest(chsh(), q, method=method)
    b = LocalRealismTest(chsh(), q, method=method)
    for counts in past:
        a.update(counts[0])
        b.update(counts[0])
    fa, fb = a.next_factor(), b.next_factor()
    assert np.array_equal(fa, fb)
    batch_a = next(random_setting_counts(rng, werner(0.9), q, [40], 1))[0]
    batch_b = next(random_setting_counts(rng, np.full((2, 2, 2, 2), 0.25), q, [40], 1))[0]
    before = a.log_m
    a.update(batch_a)
    b.update(batch_b)
    if (
        method != "grid"
    ):  # grid: the mixture factor changes within a batch (exact per-trial mixture)
        assert a.log_m - before == pytest.approx(float(np.sum(batch_a * np.log(fa))), abs=1e-9)


def test_grid_mixture_is_independent_of_batching() -> None:
    rng = np.random.default_rng(2)
    q = np.full((2, 2), 0.25)
    trials = list(random_setting_counts(rng, werner(0.95), q, [1] * 400, 1))
    one = LocalRealismTest(chsh(), q)
    one.update(sum(t[0] for t in trials))
    many = LocalRealismTest(chsh(), q)
    for t in trials:
        many.update(t[0])
    assert one.log_m == pytest.approx(many.log_m, abs=1e-9)
    # the p-value uses the running maximum over batch ends, so more peeks can only help
    assert many.p_value <= one.p_value + 1e-15


def test_kelly_bet_approaches_the_chsh_formula() -> None:
    # For CHSH with uniform settings the Kelly-optimal bet is lam* = (S - 2) / 12 (derived in
    # the design notes: maximise p ln(1 + 2 lam) + (1 - p) ln(1 - 6 lam), p = 1/2 + S/8).
    # Tolerance: with 10^6 trials S is known to ~0.003, i.e. lam to ~2.5e-4.
    q = np.full((2, 2), 0.25)
    p = werner(0.9)
    s_true = chsh().evaluate(p).value
    test = LocalRealismTest(chsh(), q, method="kelly", prior_trials=0.0)
    joint = (q[:, :, None, None] * p).ravel()
    test.update(np.round(joint * 1e6).astype(int).reshape(2, 2, 2, 2))
    assert test.result().bet == pytest.approx((s_true - 2) / 12, abs=3e-4)


def test_p_value_is_ville_bound_and_monotone() -> None:
    rng = np.random.default_rng(3)
    q = np.full((2, 2), 0.25)
    test = LocalRealismTest(chsh(), q)
    assert test.p_value == 1.0
    last = 1.0
    for counts in random_setting_counts(rng, werner(1.0), q, [20] * 30, 1):
        r = test.update(counts[0])
        assert r.p_value <= last + 1e-15
        assert r.p_value == pytest.approx(min(1.0, math.exp(-r.log_m_max)))
        assert r.log10_evidence == pytest.approx(-math.log10(r.p_value))
        last = r.p_value
    assert last < 1e-6  # 600 trials at Tsirelson: about 19 nats expected
    history = test.log_m_history
    assert len(history) == 30 and history[-1][0] == 600
    assert len(test.batch_increments) == 30
    assert sum(i for _, i in test.batch_increments) == pytest.approx(test.log_m)


def test_labels_and_result_fields() -> None:
    q = np.full((2, 2), 0.25)
    test = LocalRealismTest(chsh(), q, method="kelly")
    r = test.result()
    assert r.assumptions == ("random settings", "stopping-safe", "fair sampling")
    no_fs = LocalRealismTest(ch_eberhard(3, 3), q, no_click_discarded=False).result()
    assert no_fs.assumptions == ("random settings", "stopping-safe")
    assert r.trials == 0 and r.p_value == 1.0 and math.isnan(r.realised_growth_per_trial)
    assert "kelly" in str(r)


def test_update_functional_between_batches() -> None:
    rng = np.random.default_rng(4)
    q = np.full((2, 2), 0.25)
    # data violating the CHSH facet with the minus sign on E00: betting on the default facet
    # loses, switching (a choice made from past data) lets the evidence grow
    p = werner(1.0)[::-1, ::-1]  # relabel settings so that E00 carries the minus sign
    test = LocalRealismTest(chsh(), q)
    gen = random_setting_counts(rng, p, q, [100] * 10, 1)
    first = next(gen)[0]
    test.update(first)
    before = test.log_m
    chosen = choose_functional(chsh_relabelings(), q, first)  # from past data only
    assert chosen.name == chsh(minus=(0, 0)).name
    lam, growth = kelly_growth(chosen, q, first)
    assert lam > 0 and growth > 0
    test.update_functional(chosen)
    for counts in gen:
        test.update(counts[0])
    assert test.log_m > before + 5
    assert test.result().functional.startswith("CHSH")
    with pytest.raises(StatsError, match="shape"):
        test.update_functional(cglmp(3))


def test_single_stream_matches_ensemble_row() -> None:
    rng = np.random.default_rng(5)
    q = np.array([[0.3, 0.2], [0.25, 0.25]])
    batches = list(random_setting_counts(rng, werner(0.95), q, [30] * 8, 3))
    for method in BETTING_METHODS:
        ens = LocalRealismEnsemble(chsh(), q, 3, method)
        singles = [LocalRealismTest(chsh(), q, method=method) for _ in range(3)]
        for counts in batches:
            ens.update(counts)
            for r, s in enumerate(singles):
                s.update(counts[r])
        for r, s in enumerate(singles):
            assert s.log_m == pytest.approx(ens.log_m[r], abs=1e-9)


def test_errors_quote_the_bad_value() -> None:
    q = np.full((2, 2), 0.25)
    with pytest.raises(StatsError, match="'martingale'"):
        LocalRealismTest(chsh(), q, method="martingale")
    with pytest.raises(StatsError, match="probability > 0"):
        LocalRealismTest(chsh(), np.array([[0.5, 0.5], [0.0, 0.0]]))
    with pytest.raises(StatsError, match="sum to 1"):
        LocalRealismTest(chsh(), np.full((2, 2), 0.3))
    with pytest.raises(StatsError, match="shape"):
        LocalRealismTest(chsh(), np.full((3, 2), 1 / 6))
    test = LocalRealismTest(chsh(), q)
    with pytest.raises(ValueError, match="shape"):
        test.update(np.ones((2, 2, 3, 3), dtype=int))
    with pytest.raises(ValueError, match="non-negative"):
        test.update(-np.ones((2, 2, 2, 2), dtype=int))
    with pytest.raises(StatsError, match="max_fraction"):
        LocalRealismTest(chsh(), q, max_fraction=1.0)
