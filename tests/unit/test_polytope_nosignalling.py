"""No-signalling projection and the G-test on the marginals."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.optimize import minimize

from labwatch.models import cglmp_bases, maximally_entangled, probabilities
from labwatch.polytope import (
    NoSignallingProjector,
    no_signalling_test,
    project_no_signalling,
)
from labwatch.polytope.nosignalling import _g_homogeneity, no_signalling_constraints
from labwatch.polytope.visibility import signalling_deviation
from labwatch.scenario import Scenario, ScenarioError


def sample(p, n, rng):
    m_a, m_b = p.shape[:2]
    return rng.multinomial(n, p.reshape(m_a, m_b, -1)).reshape(p.shape)


@pytest.fixture
def cglmp3():
    a, b = cglmp_bases(3)
    return probabilities(maximally_entangled(3), a, b)


def test_projection_is_no_signalling_normalised_and_non_negative(cglmp3):
    rng = np.random.default_rng(0)
    counts = sample(cglmp3, np.array([[800, 1200], [950, 400]]), rng)
    proj = project_no_signalling(counts)
    assert proj.status == "Optimal"
    assert signalling_deviation(proj.frequencies) > 1e-3  # finite data signal a little
    assert signalling_deviation(proj.probabilities) < 1e-8  # QP tolerance 1e-10, 9 outcomes
    assert proj.probabilities.min() >= 0.0
    np.testing.assert_allclose(proj.probabilities.sum(axis=(2, 3)), 1.0, atol=1e-12)
    np.testing.assert_array_equal(proj.trials, counts.sum(axis=(2, 3)))


def test_no_signalling_frequencies_are_left_alone():
    # Counts proportional to a product distribution with rational entries are exactly NS.
    pa = np.array([[0.25, 0.75], [0.5, 0.5]])
    pb = np.array([[0.5, 0.5], [0.125, 0.875]])
    counts = (800 * np.einsum("xa,yb->xyab", pa, pb)).astype(int)
    proj = project_no_signalling(counts)
    np.testing.assert_allclose(proj.probabilities, counts / 800, atol=1e-9)
    assert proj.weighted_distance < 1e-12


def test_projection_matches_scipy_slsqp_reference():
    """The same weighted least-squares problem solved by scipy's SLSQP (general NLP solver)."""
    rng = np.random.default_rng(3)
    p = rng.dirichlet(np.ones(4), size=(2, 2)).reshape(2, 2, 2, 2)  # signalling on purpose
    counts = sample(p, np.array([[300, 500], [700, 200]]), rng)
    proj = project_no_signalling(counts)
    sc = Scenario(2, 2, 2, 2)
    a_mat, b_vec = no_signalling_constraints(sc)
    f = proj.frequencies.ravel()
    w = np.broadcast_to(counts.sum(axis=(2, 3))[:, :, None, None], sc.shape).ravel()
    ref = minimize(
        lambda q: np.sum(w * (q - f) ** 2),
        x0=np.full(16, 0.25),
        jac=lambda q: 2 * w * (q - f),
        constraints=[{"type": "eq", "fun": lambda q: a_mat @ q - b_vec, "jac": lambda q: a_mat}],
        bounds=[(0, 1)] * 16,
        method="SLSQP",
        options={"ftol": 1e-14, "maxiter": 500},
    )
    assert ref.success
    # 1e-6: SLSQP's own convergence on this 16-variable problem.
    np.testing.assert_allclose(proj.probabilities.ravel(), ref.x, atol=1e-6)


def test_constraints_are_independent_and_complete():
    sc = Scenario(3, 2, 3, 4)
    a_mat, _ = no_signalling_constraints(sc)
    # Affine dimension of the no-signalling set: (1 + m_A(d_A-1))(1 + m_B(d_B-1)) - 1
    # (Collins & Gisin, J. Phys. A 37, 1775 (2004); citation from memory).
    ns_dim = (1 + 3 * 2) * (1 + 2 * 3) - 1
    assert np.linalg.matrix_rank(a_mat) == a_mat.shape[0] == sc.size - ns_dim


def test_projector_rejects_bad_trials():
    sc = Scenario(2, 2, 2, 2)
    with pytest.raises(ScenarioError, match=r"\(1, 0\)"):
        NoSignallingProjector(sc, [[10, 10], [0, 10]])
    proj = NoSignallingProjector(sc, [[10, 10], [10, 10]])
    with pytest.raises(ScenarioError, match="projector was built for"):
        proj.project(np.full((2, 2, 2, 2), 5))


def test_g_statistic_matches_scipy_contingency():
    rng = np.random.default_rng(5)
    for shape in [(3, 2), (4, 5), (2, 3)]:
        table = rng.integers(1, 60, size=shape)
        g, dof = _g_homogeneity(table[None])
        ref = stats.chi2_contingency(table, correction=False, lambda_="log-likelihood")
        assert g == pytest.approx(ref.statistic, rel=1e-12)
        assert dof == ref.dof


def test_degrees_of_freedom_of_the_marginal_test(cglmp3):
    rng = np.random.default_rng(1)
    res = no_signalling_test(sample(cglmp3, 2000, rng))
    # Alice: m_A tables of (m_B - 1)(d_A - 1) dof; Bob likewise.
    assert (res.dof_a, res.dof_b, res.dof) == (2 * 1 * 2, 2 * 1 * 2, 8)
    assert 0.0 <= res.pvalue <= 1.0


def test_pvalues_uniform_under_no_signalling_and_small_when_signalling(cglmp3):
    rng = np.random.default_rng(2024)
    pa = np.array([no_signalling_test(sample(cglmp3, 500, rng)).pvalue_a for _ in range(400)])
    # Uniform under H0 (asymptotic chi-square); KS at the 0.1 % level keeps false failures rare.
    assert stats.kstest(pa, "uniform").pvalue > 1e-3
    combined = np.array([no_signalling_test(sample(cglmp3, 500, rng)).pvalue for _ in range(400)])
    # Bonferroni combination is conservative: rate of p <= 0.05 at most 5 % (+3 sigma of MC).
    assert np.mean(combined <= 0.05) <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / 400)
    leaky = cglmp3.copy()
    # Alice's x=0 outcome 0 becomes likelier when Bob picks y=1: a signalling source.
    leaky[0, 1, 0] *= 1.3
    leaky[0, 1] /= leaky[0, 1].sum()
    small = [no_signalling_test(sample(leaky, 5000, rng)).pvalue for _ in range(20)]
    assert np.median(small) < 1e-6
