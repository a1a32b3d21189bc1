"""Visibility LP: published values, local points, certificates, warm re-solves, options."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

from labwatch.bell import cglmp
from labwatch.models import (
    cglmp_bases,
    haar_unitary,
    maximally_entangled,
    mutually_unbiased_bases,
    probabilities,
)
from labwatch.polytope import (
    NoiseError,
    SignallingError,
    VisibilitySolver,
    white_noise_visibility,
)
from labwatch.polytope.visibility import signalling_deviation
from labwatch.scenario import Scenario
from labwatch.strategies import party_strategies, vertex_tensor, vertex_values


def random_quantum(m_a, m_b, d, rng):
    """Maximally entangled state measured in Haar-random bases (usually nonlocal)."""
    ua = np.stack([haar_unitary(d, rng) for _ in range(m_a)])
    ub = np.stack([haar_unitary(d, rng) for _ in range(m_b)])
    return probabilities(maximally_entangled(d), ua, ub)


def nonlocal_point(m_a, m_b, d, rng):
    """CGLMP settings plus Haar-random extra settings, with 15 % of a random local point."""
    a, b = cglmp_bases(d)
    ua = np.stack(list(a) + [haar_unitary(d, rng) for _ in range(m_a - 2)])
    ub = np.stack(list(b) + [haar_unitary(d, rng) for _ in range(m_b - 2)])
    p = probabilities(maximally_entangled(d), ua, ub)
    return 0.85 * p + 0.15 * random_local(Scenario.from_shape(p.shape), rng)


def random_local(scenario, rng, terms=6):
    """A random mixture of deterministic strategies, with its ingredients."""
    m_a, m_b, d_a, d_b = scenario.shape
    w = rng.dirichlet(np.ones(terms))
    p = np.zeros(scenario.shape)
    for k in range(terms):
        sa = rng.integers(0, d_a, m_a)
        sb = rng.integers(0, d_b, m_b)
        p += w[k] * vertex_tensor(sa, sb, d_a, d_b)
    return p


def baseline_visibility(p, noise=None):
    """Independent formulation with scipy: max v, sum_l w_l D_l - v (p - n) = n, full tensor."""
    sc = Scenario.from_shape(p.shape)
    n = sc.uniform() if noise is None else noise
    sa = party_strategies(sc.settings_a, sc.outcomes_a)
    sb = party_strategies(sc.settings_b, sc.outcomes_b)
    cols = [vertex_tensor(a, b, sc.outcomes_a, sc.outcomes_b).ravel() for a in sa for b in sb]
    a_eq = np.column_stack(cols + [-(p - n).ravel()])
    cost = np.zeros(a_eq.shape[1])
    cost[-1] = -1.0
    res = linprog(cost, A_eq=a_eq, b_eq=n.ravel(), bounds=(0, None), method="highs")
    assert res.status == 0, res.message
    return -res.fun


# Kaszlikowski, Gnacinski, Zukowski, Miklaszewski & Zeilinger, PRL 85, 4418 (2000): critical
# visibilities of the maximally entangled state with the optimal two-setting measurements,
# printed to 4 decimals; equal to 2 / I_d with I_d of Collins, Gisin, Linden, Massar & Popescu,
# PRL 88, 040404 (2002).  d = 2 is 1/sqrt(2) (Tsirelson's CHSH value 2 sqrt 2).
PUBLISHED = {2: 1.0 / np.sqrt(2.0), 3: 0.6962, 4: 0.6905, 5: 0.6872}


@pytest.mark.parametrize("d", [2, 3, 4, 5])
def test_cglmp_settings_published_visibility(d):
    a, b = cglmp_bases(d)
    p = probabilities(maximally_entangled(d), a, b)
    res = white_noise_visibility(p)
    assert res.status == "Optimal"
    # Tolerance: the paper prints 4 decimals (half a unit of the last digit).
    assert res.visibility == pytest.approx(PUBLISHED[d], abs=5e-5)
    # CGLMP is the optimal inequality here, so v* = 2 / I_d to solver accuracy (1e-9).
    assert res.visibility == pytest.approx(2.0 / cglmp(d).evaluate(p).value, abs=1e-9)
    assert res.visibility < 1.0 and res.local_weights is None
    assert res.method == "enumeration"


def check_certificate(res, p, noise=None):
    cert = res.certificate
    sc = Scenario.from_shape(p.shape)
    n = sc.uniform() if noise is None else noise
    values = vertex_values(cert.coefficients)  # every deterministic strategy, exhaustively
    # 1e-9: the normalisation uses the exact maximum, so only rounding remains.
    assert values.max() <= 1.0 + 1e-9
    assert cert.local_bound == pytest.approx(1.0, abs=1e-8)
    assert np.sum(cert.coefficients * n) == pytest.approx(0.0, abs=1e-9)
    assert np.sum(cert.coefficients * p) == pytest.approx(1.0 / res.visibility, rel=1e-8)


@pytest.mark.parametrize("shape", [(2, 2, 3), (3, 2, 2), (2, 3, 3), (3, 3, 2)])
def test_certificate_violated_by_data_and_valid_for_every_strategy(shape):
    rng = np.random.default_rng(11)
    m_a, m_b, d = shape
    for _ in range(4):
        p = nonlocal_point(m_a, m_b, d, rng)
        res = white_noise_visibility(p)
        assert res.visibility < 1.0  # CGLMP visibility ~0.7 survives 15 % local admixture
        check_certificate(res, p)
        assert res.certificate_value > res.certificate.local_bound  # violated


@pytest.mark.parametrize("shape", [(2, 2, 2), (2, 2, 3), (3, 2, 2), (2, 3, 3)])
def test_agrees_with_independent_scipy_formulation(shape):
    rng = np.random.default_rng(5)
    m_a, m_b, d = shape
    for _ in range(3):
        p = random_quantum(m_a, m_b, d, rng)
        # 1e-7: both solvers at their default-or-tighter feasibility tolerances.
        assert white_noise_visibility(p).visibility == pytest.approx(
            baseline_visibility(p), abs=1e-7
        )


@settings(max_examples=25, deadline=None)
@given(
    m_a=st.integers(1, 3),
    m_b=st.integers(1, 3),
    d_a=st.integers(2, 3),
    d_b=st.integers(2, 3),
    seed=st.integers(0, 2**32 - 1),
)
def test_local_point_has_visibility_at_least_one(m_a, m_b, d_a, d_b, seed):
    sc = Scenario(m_a, m_b, d_a, d_b)
    rng = np.random.default_rng(seed)
    p = random_local(sc, rng, terms=int(rng.integers(1, 8)))
    res = white_noise_visibility(p)
    assert res.visibility >= 1.0 - 1e-9
    lw = res.local_weights
    assert lw is not None
    assert np.all(lw.weights >= 0) and lw.weights.sum() == pytest.approx(1.0, abs=1e-9)
    # The decomposition reproduces the data (LP feasibility tolerance 1e-9, a few terms).
    np.testing.assert_allclose(lw.tensor(d_a, d_b), p, atol=1e-8)


def test_warm_resolve_equals_cold_solve():
    rng = np.random.default_rng(2)
    sc = Scenario(3, 3, 3, 3)
    solver = VisibilitySolver(sc)
    base = random_quantum(3, 3, 3, rng)
    for k in range(6):
        mix = rng.uniform(0.6, 1.0)
        p = mix * base + (1 - mix) * random_local(sc, rng)
        if k == 3:
            base = random_quantum(3, 3, 3, rng)
        warm = solver.solve(p)
        cold = VisibilitySolver(sc).solve(p)
        assert warm.visibility == pytest.approx(cold.visibility, abs=1e-9)


def test_custom_noise_matches_baseline_and_certificate():
    rng = np.random.default_rng(8)
    p = random_quantum(2, 2, 3, rng)
    sc = Scenario.from_shape(p.shape)
    # Colored noise: product of the data's own marginals (local, interior for full support).
    pa = p.sum(axis=3).mean(axis=1)
    pb = p.sum(axis=2).mean(axis=0)
    noise = np.einsum("xa,yb->xyab", pa, pb)
    res = white_noise_visibility(p, noise=noise)
    assert res.visibility == pytest.approx(baseline_visibility(p, noise), abs=1e-7)
    if res.visibility < 1:
        check_certificate(res, p, noise)
    local = random_local(sc, rng)
    lw = white_noise_visibility(local, noise=noise).local_weights
    np.testing.assert_allclose(lw.tensor(3, 3), local, atol=1e-8)


def test_noise_on_the_boundary_is_refused():
    sc = Scenario(2, 2, 2, 2)
    vertex = vertex_tensor([0, 0], [0, 1], 2, 2)
    with pytest.raises(NoiseError, match="strictly inside"):
        VisibilitySolver(sc, noise=vertex)


def test_signalling_data_raise_unless_averaged():
    a, b = cglmp_bases(2)
    p = probabilities(maximally_entangled(2), a, b)
    q = p.copy()
    q[0, 0] = [[0.45, 0.05], [0.05, 0.45]]  # Alice's x=0 marginal still 1/2: NS kept here
    q[0, 1] = [[0.5, 0.1], [0.1, 0.3]]  # now it moves with y
    assert signalling_deviation(q) > 0.05
    with pytest.raises(SignallingError, match="project"):
        white_noise_visibility(q)
    assert 0 < white_noise_visibility(q, signalling="average").visibility


def test_noise_itself_is_capped_without_certificate():
    sc = Scenario(2, 2, 3, 3)
    res = white_noise_visibility(sc.uniform(), v_max=100.0)
    assert res.capped and res.visibility == pytest.approx(100.0)
    assert res.certificate is None and res.local_weights is not None


def test_enumeration_refuses_huge_scenarios():
    with pytest.raises(ValueError, match="column_generation"):
        VisibilitySolver(Scenario(6, 6, 5, 5), method="enumeration")


def test_is_nonlocal_flag():
    a, b = cglmp_bases(3)
    assert white_noise_visibility(probabilities(maximally_entangled(3), a, b)).is_nonlocal
    assert not white_noise_visibility(Scenario(2, 2, 3, 3).uniform()).is_nonlocal


def test_bad_options_are_quoted():
    p = Scenario(2, 2, 2, 2).uniform()
    with pytest.raises(ValueError, match="'simplex'"):
        white_noise_visibility(p, method="simplex")
    with pytest.raises(ValueError, match="'ignore'"):
        white_noise_visibility(p, signalling="ignore")


def test_same_mubs_on_both_sides_sit_on_the_local_boundary():
    # Worked argument (no source): with the same MUBs on both sides (Bob's conjugated) the
    # outcomes of equal settings are perfectly correlated and those of different settings
    # uniform, which the local model "one fresh uniform outcome per setting, shared" gives
    # exactly; perfect correlations put it on the boundary, so v* = 1.
    for m, d in [(2, 3), (3, 3), (3, 2)]:
        mub = np.asarray(mutually_unbiased_bases(d))[:m]
        p = probabilities(maximally_entangled(d), mub, mub.conj())
        v = white_noise_visibility(p).visibility
        assert v == pytest.approx(1.0, abs=1e-9)
        assert v == pytest.approx(baseline_visibility(p), abs=1e-7)
