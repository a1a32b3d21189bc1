"""Born-rule probabilities: reference checks against QuTiP, invariants, input validation."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labwatch.models import (
    StateError,
    computational_basis,
    density_matrix,
    fourier_basis,
    haar_unitary,
    maximally_entangled,
    mutually_unbiased_bases,
    probabilities,
    with_white_noise,
)


def random_state_vector(dim, rng):
    v = rng.standard_normal(dim) + 1j * rng.standard_normal(dim)
    return v / np.linalg.norm(v)


def random_density_matrix(dim, rng, rank=None):
    g = rng.standard_normal((dim, rank or dim)) + 1j * rng.standard_normal((dim, rank or dim))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def random_bases(m, d, rng):
    return np.stack([haar_unitary(d, rng) for _ in range(m)])


def test_against_qutip_expectation_values():
    # Reference: QuTiP (Johansson, Nation & Nori, Comput. Phys. Commun. 184, 1234 (2013)),
    # qutip.expect of tensor-product projectors on a random mixed state, unequal dims 3 x 2.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # qutip warns about missing matplotlib
        import qutip

    rng = np.random.default_rng(2024)
    d_a, d_b = 3, 2
    rho = random_density_matrix(d_a * d_b, rng, rank=3)
    ua, ub = random_bases(2, d_a, rng), random_bases(3, d_b, rng)
    ours = probabilities(rho, ua, ub, dims=(d_a, d_b))
    q_rho = qutip.Qobj(rho, dims=[[d_a, d_b], [d_a, d_b]])
    ref = np.empty_like(ours)
    for x in range(2):
        for y in range(3):
            for a in range(d_a):
                for b in range(d_b):
                    e = qutip.Qobj(ua[x][:, a].reshape(-1, 1))
                    f = qutip.Qobj(ub[y][:, b].reshape(-1, 1))
                    proj = qutip.tensor(e * e.dag(), f * f.dag())
                    ref[x, y, a, b] = qutip.expect(proj, q_rho)
    # tolerance: double-precision rounding of two independent contractions
    assert np.allclose(ours, ref, atol=1e-12)

    # the pure-state path agrees with QuTiP too (ket, dims 3 x 3)
    psi = random_state_vector(9, rng)
    ua3, ub3 = random_bases(2, 3, rng), random_bases(2, 3, rng)
    ket = qutip.Qobj(psi.reshape(-1, 1), dims=[[3, 3], [1, 1]])
    e = qutip.Qobj(ua3[1][:, 2].reshape(-1, 1))
    f = qutip.Qobj(ub3[0][:, 1].reshape(-1, 1))
    ref_val = qutip.expect(qutip.tensor(e * e.dag(), f * f.dag()), ket)
    assert np.isclose(probabilities(psi, ua3, ub3)[1, 0, 2, 1], ref_val, atol=1e-12)


def test_vector_and_density_matrix_paths_agree():
    rng = np.random.default_rng(5)
    psi = random_state_vector(12, rng)
    ua, ub = random_bases(3, 4, rng), random_bases(2, 3, rng)
    assert np.allclose(probabilities(psi, ua, ub), probabilities(density_matrix(psi), ua, ub))


def test_maximally_entangled_conjugate_bases_correlate_perfectly():
    # (U (x) conj(U)) |Phi_d> = |Phi_d> (direct algebra): equal outcomes with probability 1/d
    d = 5
    u = haar_unitary(d, 9)
    p = probabilities(maximally_entangled(d), u, u.conj())[0, 0]
    assert np.allclose(p, np.eye(d) / d)


def test_mub_marginals_of_unbiased_settings_are_uniform():
    d = 4
    bases = mutually_unbiased_bases(d)
    p = probabilities(maximally_entangled(d), bases[1], np.conj(bases[2]))[0, 0]
    assert np.allclose(p, 1.0 / d**2)


def test_white_noise_mixes_towards_uniform():
    v = 0.6
    f = fourier_basis(3)
    p = probabilities(with_white_noise(maximally_entangled(3), v), f, f.conj())[0, 0]
    assert np.allclose(p, v * np.eye(3) / 3 + (1 - v) / 9)


def test_dimension_mismatch_is_refused():
    with pytest.raises(StateError, match="does not fit"):
        probabilities(maximally_entangled(3), computational_basis(2), computational_basis(2))
    with pytest.raises(StateError, match="dims"):
        probabilities(maximally_entangled(2), np.eye(2), np.eye(2), dims=(1, 4))


def test_unphysical_state_is_refused():
    with pytest.raises(StateError):
        probabilities(np.diag([1.5, -0.5, 0.0, 0.0]), np.eye(2), np.eye(2))


@settings(max_examples=60, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    d_a=st.integers(2, 4),
    d_b=st.integers(2, 4),
    m_a=st.integers(1, 3),
    m_b=st.integers(1, 3),
    mixed=st.booleans(),
)
def test_probabilities_are_nonnegative_and_normalised(seed, d_a, d_b, m_a, m_b, mixed):
    rng = np.random.default_rng(seed)
    dim = d_a * d_b
    state = random_density_matrix(dim, rng, rank=1 + seed % dim) if mixed else None
    if state is None:
        state = random_state_vector(dim, rng)
    p = probabilities(state, random_bases(m_a, d_a, rng), random_bases(m_b, d_b, rng))
    assert p.shape == (m_a, m_b, d_a, d_b)
    assert np.all(p >= 0)
    assert np.allclose(p.sum(axis=(2, 3)), 1.0, atol=1e-12)
    # no-signalling: Alice's marginal does not depend on Bob's setting
    marg = p.sum(axis=3)
    assert np.allclose(marg, marg[:, :1], atol=1e-12)


def test_probability_of_a_product_state():
    # |+>|0> measured in (X, Z): deterministic outcomes (0, 0)
    plus = np.array([1, 1]) / math.sqrt(2)
    psi = np.kron(plus, np.array([1, 0]))
    hadamard = np.array([[1, 1], [1, -1]]) / math.sqrt(2)
    p = probabilities(psi, hadamard, np.eye(2))[0, 0]
    assert np.allclose(p, [[1, 0], [0, 0]])
