"""Delta-method error of the visibility, seeded bootstrap, visibility_from_counts."""

from __future__ import annotations

import numpy as np
import pytest

from labwatch.models import cglmp_bases, maximally_entangled, probabilities
from labwatch.polytope import NoSignallingProjector, VisibilitySolver
from labwatch.polytope.uncertainty import (
    bootstrap_visibilities,
    visibility_from_counts,
    visibility_stderr,
)
from labwatch.scenario import Scenario


def cglmp_point(d, visibility=1.0):
    a, b = cglmp_bases(d)
    p = probabilities(maximally_entangled(d), a, b)
    return visibility * p + (1 - visibility) * Scenario.from_shape(p.shape).uniform()


def sample(p, n, rng):
    m_a, m_b = p.shape[:2]
    return rng.multinomial(n, p.reshape(m_a, m_b, -1)).reshape(p.shape)


@pytest.mark.parametrize("d", [2, 3])
def test_delta_method_equals_numerical_gradient(d):
    """sigma_v from the certificate equals sqrt(g^T Sigma g) with g by finite differences."""
    p = cglmp_point(d, 0.9)
    sc = Scenario.from_shape(p.shape)
    trials = np.array([[1000, 2000], [1500, 500]])
    projector = NoSignallingProjector(sc, trials)
    solver = VisibilitySolver(sc, tolerance=1e-11)
    proj = projector.project_frequencies(p)
    res = solver.solve(proj.probabilities)
    sigma = visibility_stderr(res, proj, projector)
    h = 1e-5
    grad = np.zeros(sc.size)
    for i in range(sc.size):
        step = np.zeros(sc.size)
        step[i] = h
        up = solver.solve(projector.project_frequencies(p + step.reshape(sc.shape)).probabilities)
        dn = solver.solve(projector.project_frequencies(p - step.reshape(sc.shape)).probabilities)
        grad[i] = (up.visibility - dn.visibility) / (2 * h)
    grad = grad.reshape(sc.shape)
    var = 0.0
    for x in range(2):
        for y in range(2):
            g = grad[x, y].ravel()
            q = p[x, y].ravel()
            cov = (np.diag(q) - np.outer(q, q)) / trials[x, y]  # multinomial covariance
            var += g @ cov @ g
    # 1e-4 relative: central differences (h^2 ~ 1e-10) over LP/QP tolerances ~1e-11.
    assert sigma == pytest.approx(np.sqrt(var), rel=1e-4)


def test_bootstrap_is_seeded_and_reproducible():
    p = cglmp_point(3, 0.85)
    trials = np.full((2, 2), 3000)
    a = bootstrap_visibilities(p, trials, 30, np.random.default_rng(42))
    b = bootstrap_visibilities(p, trials, 30, np.random.default_rng(42))
    c = bootstrap_visibilities(p, trials, 30, np.random.default_rng(43))
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_bootstrap_spread_agrees_with_delta_method():
    rng = np.random.default_rng(7)
    p = cglmp_point(3, 0.85)
    counts = sample(p, 20000, rng)
    res = visibility_from_counts(counts, bootstrap=300, rng=np.random.default_rng(8))
    # Monte Carlo error of a standard deviation from 300 replicates is ~4 %; allow 20 % for
    # that and for the curvature of v(p) the delta method ignores.
    assert np.std(res.bootstrap, ddof=1) == pytest.approx(res.stderr, rel=0.2)
    true_v = 0.6961524227 / 0.85  # Kaszlikowski et al., PRL 85, 4418 (2000), rescaled
    assert res.interval.low < true_v < res.interval.high
    assert res.interval.low < res.visibility < res.interval.high


def test_visibility_from_counts_without_bootstrap():
    rng = np.random.default_rng(1)
    counts = sample(cglmp_point(2), 4000, rng)
    res = visibility_from_counts(counts)
    assert res.interval is None and res.bootstrap is None
    assert res.result.status == "Optimal"
    assert res.visibility == res.result.visibility
    # 4000 trials per pair: sigma ~ 0.01, so 1/sqrt(2) within 5 sigma.
    assert abs(res.visibility - 2**-0.5) < 5 * res.stderr
    assert 0.0 <= res.signalling.pvalue <= 1.0
    assert "fixed n" in res.assumptions


def test_bootstrap_needs_a_generator():
    counts = sample(cglmp_point(2), 100, np.random.default_rng(0))
    with pytest.raises(ValueError, match="rng"):
        visibility_from_counts(counts, bootstrap=10)
