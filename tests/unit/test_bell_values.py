"""Bell functionals against published quantum values and brute-force local bounds."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labwatch.bell import BellFunctional, cglmp, ch_eberhard, chsh, chsh_relabelings
from labwatch.models import (
    cglmp_bases,
    chsh_bases,
    linear_polarization_basis,
    maximally_entangled,
    probabilities,
    schmidt_state,
)
from labwatch.strategies import party_strategies, vertex_tensor, vertex_values


def test_tsirelson_bound_from_chsh_bases():
    # Tsirelson: max quantum CHSH = 2 sqrt(2) (Cirel'son, Lett. Math. Phys. 4, 93 (1980)),
    # reached by |Phi+> with the analyzers of chsh_bases().  Tolerance: rounding only.
    p = probabilities(maximally_entangled(2), *chsh_bases())
    f = chsh()
    assert f.evaluate(p).value == pytest.approx(2 * math.sqrt(2), abs=1e-12)
    assert f.quantum_bound == pytest.approx(2 * math.sqrt(2))
    assert f.local_bound == 2.0


def test_all_chsh_facets_have_local_bound_two():
    # CHSH local bound 2 for every relabelling (Clauser, Horne, Shimony & Holt, PRL 23, 880
    # (1969)); checked against brute-force enumeration as well.
    for f in chsh_relabelings():
        assert f.local_bound == 2.0
        assert vertex_values(f.coefficients).max() == 2.0


@pytest.mark.parametrize("d", [2, 3, 4, 5, 6])
def test_cglmp_local_bound_is_two(d):
    # Collins, Gisin, Linden, Massar & Popescu, PRL 88, 040404 (2002): I_d <= 2 locally.
    f = cglmp(d)
    assert f.local_bound == pytest.approx(2.0, abs=1e-12)
    assert vertex_values(f.coefficients).max() == pytest.approx(2.0, abs=1e-12)


@pytest.mark.parametrize(("d", "published"), [(3, 2.8729), (4, 2.8962)])
def test_cglmp_maximally_entangled_values(d, published):
    # Collins et al., PRL 88, 040404 (2002): I_3 = 2.8729, I_4 = 2.8962 for the maximally
    # entangled state with their settings.  Tolerance 5e-5: the values are printed to 4 decimals.
    p = probabilities(maximally_entangled(d), *cglmp_bases(d))
    assert cglmp(d).evaluate(p).value == pytest.approx(published, abs=5e-5)


def test_cglmp_closed_form_for_maximally_entangled():
    # Closed form of Collins et al. (2002): with q_k = 1/(2 d^3 sin^2(pi (k + 1/4)/d)),
    # I_d = 4 d sum_{k < d/2} (1 - 2k/(d-1)) (q_k - q_{-(k+1)}) (formula from memory; it
    # reproduces the printed values above).  Checked for d = 2..8.
    for d in range(2, 9):

        def q(k, d=d):
            return 1.0 / (2 * d**3 * math.sin(math.pi * (k + 0.25) / d) ** 2)

        closed = 4 * d * sum((1 - 2 * k / (d - 1)) * (q(k) - q(-k - 1)) for k in range(d // 2))
        p = probabilities(maximally_entangled(d), *cglmp_bases(d))
        assert cglmp(d).evaluate(p).value == pytest.approx(closed, abs=1e-12)


def test_cglmp_optimal_non_maximally_entangled_qutrit():
    # Acin, Durt, Gisin & Latorre, PRA 65, 052325 (2002): (|00> + g|11> + |22>)/sqrt(2 + g^2)
    # with g = (sqrt(11) - sqrt(3))/2 reaches I_3 = 2.9149 with the CGLMP settings.
    # Tolerance 5e-5: 4 printed decimals.
    g = (math.sqrt(11) - math.sqrt(3)) / 2
    p = probabilities(schmidt_state([1.0, g, 1.0]), *cglmp_bases(3))
    value = cglmp(3).evaluate(p).value
    assert value == pytest.approx(2.9149, abs=5e-5)
    # ... and beats the maximally entangled state (the "anomaly" of that paper)
    assert value > cglmp(3).evaluate(probabilities(maximally_entangled(3), *cglmp_bases(3))).value


def test_cglmp_two_outcomes_is_a_chsh_form():
    # For d = 2 CGLMP is CHSH (Collins et al. 2002): same local bound, Tsirelson value reached.
    f = cglmp(2)
    p = probabilities(maximally_entangled(2), *cglmp_bases(2))
    assert f.evaluate(p).value == pytest.approx(2 * math.sqrt(2), abs=1e-12)


def test_ch_eberhard_local_bound_and_quantum_maximum():
    # Clauser & Horne, PRD 10, 526 (1974): CH <= 0 locally; with perfect detectors the quantum
    # maximum is (sqrt(2) - 1)/2, reached by |Phi+> at the CHSH angles (CH = (S - 2)/4 there).
    f = ch_eberhard()
    assert f.local_bound == 0.0
    ba = np.stack([linear_polarization_basis(a) for a in (0.0, 45.0)])
    bb = np.stack([linear_polarization_basis(a) for a in (22.5, -22.5)])
    p = probabilities(maximally_entangled(2), ba, bb)
    assert f.evaluate(p).value == pytest.approx((math.sqrt(2) - 1) / 2, abs=1e-12)
    assert f.quantum_bound == pytest.approx((math.sqrt(2) - 1) / 2)


def test_optimum_strategy_attains_the_bound():
    rng = np.random.default_rng(8)
    coeffs = rng.integers(-3, 4, size=(3, 2, 3, 2)).astype(float)
    f = BellFunctional(coeffs)
    opt = f.local_optimum
    vertex = vertex_tensor(opt.strategy_a, opt.strategy_b, 3, 2)
    assert np.sum(coeffs * vertex) == pytest.approx(opt.value)


shapes = st.tuples(st.integers(1, 4), st.integers(1, 4), st.integers(2, 3), st.integers(2, 3))


@settings(max_examples=80, deadline=None)
@given(shape=shapes, seed=st.integers(0, 2**32 - 1))
def test_local_bound_matches_brute_force(shape, seed):
    rng = np.random.default_rng(seed)
    coeffs = rng.integers(-5, 6, size=shape).astype(float)
    f = BellFunctional(coeffs)
    brute = vertex_values(coeffs)
    assert f.local_bound == brute.max()
    assert f.local_minimum == brute.min()


@settings(max_examples=60, deadline=None)
@given(shape=shapes, seed=st.integers(0, 2**32 - 1), n_vertices=st.integers(1, 6))
def test_local_mixtures_never_exceed_the_local_bound(shape, seed, n_vertices):
    rng = np.random.default_rng(seed)
    m_a, m_b, d_a, d_b = shape
    f = BellFunctional(rng.normal(size=shape))
    weights = rng.dirichlet(np.ones(n_vertices))
    point = sum(
        w * vertex_tensor(rng.integers(0, d_a, m_a), rng.integers(0, d_b, m_b), d_a, d_b)
        for w in weights
    )
    assert np.allclose(point.sum(axis=(2, 3)), 1.0)
    # tolerance: rounding of a weighted sum of O(10) terms
    assert f.evaluate(point).value <= f.local_bound + 1e-9


@pytest.mark.parametrize("shape", [(4, 4, 4, 4), (5, 5, 3, 3), (3, 1, 3, 2), (1, 4, 2, 3)])
def test_local_bound_of_larger_and_asymmetric_scenarios(shape):
    # (4,4,4,4) has 256 x 256 vertices and (5,5,3,3) 243 x 243: small enough to cross-check
    # the best-response enumeration by brute force.  The asymmetric shapes exercise the
    # branch that enumerates Bob's strategies instead of Alice's.
    rng = np.random.default_rng(sum(shape))
    coeffs = rng.integers(-4, 5, size=shape).astype(float)
    f = BellFunctional(coeffs)
    assert f.local_bound == vertex_values(coeffs).max()
    assert f.local_minimum == vertex_values(coeffs).min()


def test_party_strategies_enumeration_order():
    s = party_strategies(2, 3)
    assert s.shape == (9, 2)
    assert s[1].tolist() == [1, 0]  # setting 0 is the fastest digit
    assert len({tuple(r) for r in s}) == 9
