"""Column generation against full enumeration, the pricing oracle, and a (5, 4) instance."""

from __future__ import annotations

import numpy as np
import pytest

from labwatch.models import (
    haar_unitary,
    maximally_entangled,
    mutually_unbiased_bases,
    probabilities,
)
from labwatch.polytope import VisibilitySolver, white_noise_visibility
from labwatch.polytope.coordinates import (
    cg_dimension,
    from_cg,
    functional_from_cg,
    functional_to_cg,
    to_cg,
    vertex_columns,
)
from labwatch.polytope.pricing import best_vertices, best_vertices_both_sides
from labwatch.scenario import Scenario
from labwatch.strategies import maximize_over_strategies, party_strategies, vertex_tensor


def random_quantum(m_a, m_b, d, rng):
    ua = np.stack([haar_unitary(d, rng) for _ in range(m_a)])
    ub = np.stack([haar_unitary(d, rng) for _ in range(m_b)])
    return probabilities(maximally_entangled(d), ua, ub)


@pytest.mark.parametrize(
    "shape", [(3, 3, 2, 2), (3, 3, 3, 3), (2, 4, 3, 3), (4, 2, 2, 3), (4, 4, 2, 2), (3, 4, 3, 3)]
)
def test_column_generation_matches_enumeration(shape):
    rng = np.random.default_rng(sum(shape))
    m_a, m_b, d_a, d_b = shape
    sc = Scenario(*shape)
    enum = VisibilitySolver(sc, method="enumeration")
    colgen = VisibilitySolver(sc, method="column_generation")
    for _ in range(3):
        if d_a == d_b:
            p = random_quantum(m_a, m_b, d_a, rng)
        else:  # unequal outcome counts: CHSH >= 0.75 * 4 - 0.25 * 2 = 2.5 keeps it nonlocal
            p = 0.75 * embedded_pr_box(sc) + 0.25 * random_local(sc, rng)
        a, b = enum.solve(p), colgen.solve(p)
        # 1e-7: the accuracy goal; both at feasibility tolerance 1e-9.
        assert b.visibility == pytest.approx(a.visibility, abs=1e-7)
        assert b.visibility_upper - b.visibility <= 1e-7
        assert b.columns < sc.local_vertices or sc.local_vertices < 500


def embedded_pr_box(sc):
    """Popescu-Rohrlich box on settings/outcomes {0, 1}; extra settings answer 0 (no-signalling)."""
    m_a, m_b, d_a, d_b = sc.shape
    p = np.zeros(sc.shape)
    for x in range(m_a):
        for y in range(m_b):
            if x < 2 and y < 2:
                for a in (0, 1):
                    p[x, y, a, a ^ (x * y)] = 0.5
            elif x < 2:
                p[x, y, 0, 0] = p[x, y, 1, 0] = 0.5
            elif y < 2:
                p[x, y, 0, 0] = p[x, y, 0, 1] = 0.5
            else:
                p[x, y, 0, 0] = 1.0
    return p


def random_local(sc, rng, terms=5):
    m_a, m_b, d_a, d_b = sc.shape
    w = rng.dirichlet(np.ones(terms))
    return sum(
        w[k] * vertex_tensor(rng.integers(0, d_a, m_a), rng.integers(0, d_b, m_b), d_a, d_b)
        for k in range(terms)
    )


def test_column_generation_warm_refresh_equals_cold():
    rng = np.random.default_rng(4)
    sc = Scenario(4, 4, 3, 3)
    live = VisibilitySolver(sc, method="column_generation")
    base = random_quantum(4, 4, 3, rng)
    for _ in range(3):
        p = 0.95 * base + 0.05 * random_local(sc, rng)
        warm = live.solve(p)
        cold = VisibilitySolver(sc, method="column_generation").solve(p)
        assert warm.visibility == pytest.approx(cold.visibility, abs=1e-7)


@pytest.mark.parametrize("shape", [(3, 2, 3, 4), (2, 4, 3, 2), (2, 2, 5, 5), (4, 3, 2, 2)])
def test_pricing_oracle_is_exact(shape):
    rng = np.random.default_rng(1)
    sc = Scenario(*shape)
    for _ in range(5):
        y = rng.normal(size=cg_dimension(sc))
        priced = best_vertices(y, sc, k=7)
        exact = maximize_over_strategies(functional_from_cg(y, sc)).value
        assert priced.values[0] == pytest.approx(exact, abs=1e-12)
        assert np.all(np.diff(priced.values) <= 0)
        for sa, sb, v in zip(priced.strategies_a, priced.strategies_b, priced.values):
            d = vertex_tensor(sa, sb, sc.outcomes_a, sc.outcomes_b)
            assert np.sum(functional_from_cg(y, sc) * d) == pytest.approx(v, abs=1e-12)


def test_coordinates_round_trip_and_vertex_columns():
    rng = np.random.default_rng(3)
    sc = Scenario(3, 2, 3, 4)
    sa = party_strategies(3, 3)[rng.integers(0, 27, 20)]
    sb = party_strategies(2, 4)[rng.integers(0, 16, 20)]
    starts, indices, _ = vertex_columns(sa, sb, 3, 4)
    beta = rng.normal(size=sc.shape)
    y = functional_to_cg(beta)
    for j in range(20):
        d = vertex_tensor(sa[j], sb[j], 3, 4)
        col = np.zeros(cg_dimension(sc))
        col[indices[starts[j] : starts[j + 1]]] = 1.0
        np.testing.assert_array_equal(col, to_cg(d))
        np.testing.assert_allclose(from_cg(to_cg(d), sc), d, atol=1e-15)
        assert y @ to_cg(d) == pytest.approx(np.sum(beta * d), abs=1e-12)


def test_five_mubs_d4_column_generation():
    """(m, d) = (5, 4): ~1e6 vertices, solved by column generation in about a second."""
    rng = np.random.default_rng(7)
    mub = np.asarray(mutually_unbiased_bases(4))
    assert mub.shape == (5, 4, 4)
    bob = np.einsum("ij,xjk->xik", haar_unitary(4, rng), mub)
    p = probabilities(maximally_entangled(4), mub, bob)
    res = white_noise_visibility(p)
    assert res.method == "column_generation" and res.vertices == 4**10
    assert res.visibility < 1.0
    assert res.visibility_upper - res.visibility <= 1e-7
    # The certificate is checked exactly by enumeration of one party + best response.
    assert res.certificate.local_bound <= 1.0 + 1e-8
    assert np.sum(res.certificate.coefficients * p) == pytest.approx(1 / res.visibility, rel=1e-8)
    # A different pricing path (no smoothing, fewer seeds) reaches the same optimum.
    other = white_noise_visibility(p, smoothing=0.0, seed_columns=64)
    assert other.visibility == pytest.approx(res.visibility, abs=1e-7)


def test_column_generation_with_custom_noise_and_local_model():
    rng = np.random.default_rng(12)
    sc = Scenario(3, 3, 3, 3)
    p = random_quantum(3, 3, 3, rng)
    # Colored noise: the product of the data's marginals (a local interior point).
    noise = np.einsum("xa,yb->xyab", p.sum(axis=3).mean(axis=1), p.sum(axis=2).mean(axis=0))
    enum = VisibilitySolver(sc, noise, method="enumeration").solve(p)
    colgen = VisibilitySolver(sc, noise, method="column_generation").solve(p)
    assert colgen.visibility == pytest.approx(enum.visibility, abs=1e-7)
    assert np.sum(colgen.certificate.coefficients * noise) == pytest.approx(0.0, abs=1e-9)
    local = random_local(sc, rng)
    res = VisibilitySolver(sc, noise, method="column_generation").solve(local)
    assert res.visibility >= 1 - 1e-9
    # The local model rebuilds the point (LP tolerance 1e-9 over a few dozen terms).
    np.testing.assert_allclose(res.local_weights.tensor(3, 3), local, atol=1e-8)


def test_results_are_frozen():
    res = white_noise_visibility(Scenario(2, 2, 2, 2).uniform())
    with pytest.raises(AttributeError):
        res.visibility = 0.5
    with pytest.raises(ValueError):
        res.local_weights.weights[0] = 1.0  # read-only array


def test_pruning_keeps_answers_and_bounds_the_master():
    rng = np.random.default_rng(21)
    sc = Scenario(4, 4, 3, 3)
    base = random_quantum(4, 4, 3, rng)
    small = VisibilitySolver(sc, method="column_generation", max_columns=400, seed_columns=50)
    for _ in range(8):
        p = 0.9 * base + 0.1 * random_local(sc, rng)
        res = small.solve(p)
        ref = VisibilitySolver(sc, method="column_generation").solve(p)
        assert res.visibility == pytest.approx(ref.visibility, abs=1e-7)
        base = random_quantum(4, 4, 3, rng)  # large moves: every solve adds columns
    # Pruning runs at the start of a solve; one solve adds at most a few rounds of columns.
    assert small.columns < 400 + 40 * small.columns_per_round


def test_both_sides_pricing_is_exact_and_duplicate_free():
    rng = np.random.default_rng(6)
    sc = Scenario(3, 3, 3, 3)
    for _ in range(5):
        y = rng.normal(size=cg_dimension(sc))
        both = best_vertices_both_sides(y, sc, 40)
        exact = maximize_over_strategies(functional_from_cg(y, sc)).value
        assert both.values[0] == pytest.approx(exact, abs=1e-12)
        keys = {tuple(a) + tuple(b) for a, b in zip(both.strategies_a, both.strategies_b)}
        assert len(keys) == len(both.values)
        assert np.all(np.diff(both.values) <= 0)
    with pytest.raises(ValueError, match="'c'"):
        best_vertices(y, sc, 3, side="c")
