"""Monte-Carlo validation of the PBR betting method against local sources (peeked per batch).

Same protocol as ``test_stats_false_claims.py`` with fewer, larger batches (the PBR factor
needs one KL projection per run and batch): 2000 runs, 10 batches of 100 then 10 of 400,
peeked after each.  Claim rate at alpha = 0.01 must be at most 1.5% (Monte-Carlo margin as
there: about 1.3% chance to exceed it if the true rate were exactly 1%).  Every PBR factor the
code builds is checked exhaustively over deterministic strategies (``factor_bound <= 1``).
"""

from __future__ import annotations

import numpy as np
import pytest

from labwatch.bell import chsh
from labwatch.stats import LocalRealismEnsemble
from simulators.ensemble import random_setting_counts
from simulators.local import LocalMixtureSource, adaptive_local_counts

RUNS = 2000
BATCHES = [100] * 10 + [400] * 10


def claim_rate(batches) -> float:
    f = chsh()
    test = LocalRealismEnsemble(f, np.full((2, 2), 0.25), RUNS, "pbr")
    claims = np.zeros(RUNS, dtype=bool)
    for counts in batches:
        test.update(counts)
        claims |= test.p_value <= 0.01
        assert np.all(test._factor_bound <= 1.0)
    return float(claims.mean())


@pytest.mark.slow
def test_pbr_at_the_bound() -> None:
    rng = np.random.default_rng(99)
    p = LocalMixtureSource.at_bound(chsh()).probabilities(0.0)
    rate = claim_rate(random_setting_counts(rng, p, np.full((2, 2), 0.25), BATCHES, RUNS))
    print("PBR false-claim rate, mixture at the bound:", rate)
    assert rate <= 0.015


@pytest.mark.slow
def test_pbr_adaptive_local_source() -> None:
    rng = np.random.default_rng(98)
    rate = claim_rate(adaptive_local_counts(rng, chsh(), np.full((2, 2), 0.25), BATCHES, RUNS))
    print("PBR false-claim rate, adaptive local source:", rate)
    assert rate <= 0.015
