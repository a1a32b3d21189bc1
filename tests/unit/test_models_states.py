"""States and noise models: normalisation, validation errors, white and coloured noise."""

from __future__ import annotations

import math

import numpy as np
import pytest

from labwatch.models import (
    StateError,
    as_density_matrix,
    density_matrix,
    dephased,
    infer_dims,
    is_density_matrix,
    maximally_entangled,
    schmidt_state,
    validate_density_matrix,
    with_white_noise,
)


def test_maximally_entangled_is_alice_major_and_normalised():
    psi = maximally_entangled(3)
    assert psi.shape == (9,)
    assert np.isclose(np.linalg.norm(psi), 1.0)
    # |j>_A |j>_B sits at index j * d + j, the numpy.kron ordering
    expected = sum(np.kron(np.eye(3)[j], np.eye(3)[j]) for j in range(3)) / math.sqrt(3)
    assert np.allclose(psi, expected)


def test_maximally_entangled_reduced_state_is_maximally_mixed():
    d = 4
    rho = density_matrix(maximally_entangled(d)).reshape(d, d, d, d)
    reduced = np.einsum("jkJk->jJ", rho)
    assert np.allclose(reduced, np.eye(d) / d)


def test_schmidt_state_normalises_and_keeps_phases():
    psi = schmidt_state([2.0, 1j])
    assert np.isclose(np.linalg.norm(psi), 1.0)
    assert np.allclose(psi, np.array([2.0, 0, 0, 1j]) / math.sqrt(5))


@pytest.mark.parametrize("bad", [[], [0.0, 0.0], [1.0, np.nan]])
def test_schmidt_state_rejects_bad_coefficients(bad):
    with pytest.raises(StateError):
        schmidt_state(bad)


def test_density_matrix_requires_unit_vector():
    with pytest.raises(StateError, match="norm 1"):
        density_matrix(np.array([1.0, 1.0, 0.0, 0.0]))


@pytest.mark.parametrize(
    ("rho", "message"),
    [
        (np.array([[0.5, 0.1], [0.2, 0.5]]), "Hermitian"),
        (np.diag([0.6, 0.6]), "trace 1"),
        (np.diag([1.2, -0.2]), "positive semidefinite"),
        (np.ones((2, 3)) / 2, "square"),
        (np.diag([np.nan, 1.0]), "non-finite"),
    ],
)
def test_validate_density_matrix_names_the_failed_check(rho, message):
    with pytest.raises(StateError, match=message):
        validate_density_matrix(rho)
    assert not is_density_matrix(rho)


def test_state_error_is_a_value_error():
    assert issubclass(StateError, ValueError)


def test_infer_dims():
    assert infer_dims(9) == (3, 3)
    assert infer_dims(6, (2, 3)) == (2, 3)
    with pytest.raises(StateError, match="perfect square"):
        infer_dims(6)
    with pytest.raises(StateError, match="do not match"):
        infer_dims(6, (2, 2))


def test_white_noise_mixture():
    v = 0.7
    rho = with_white_noise(maximally_entangled(2), v)
    assert is_density_matrix(rho)
    # Fidelity with Phi+ of the isotropic state: V + (1 - V)/d^2 (direct algebra)
    phi = maximally_entangled(2)
    assert np.isclose(np.vdot(phi, rho @ phi).real, v + (1 - v) / 4)
    assert np.allclose(with_white_noise(rho, 0.0), np.eye(4) / 4)


def test_white_noise_unequal_dims():
    psi = np.zeros(6)
    psi[0] = psi[4] = 1 / math.sqrt(2)  # (|0>|0> + |1>|1>)/sqrt(2) in C^2 (x) C^3
    rho = with_white_noise(psi, 0.5, dims=(2, 3))
    assert np.isclose(np.trace(rho).real, 1.0)
    assert np.isclose(rho[5, 5].real, 0.5 / 6)
    with pytest.raises(StateError, match="perfect square"):
        with_white_noise(psi, 0.5)


@pytest.mark.parametrize("bad", [-0.1, 1.5, np.nan])
def test_visibility_out_of_range(bad):
    with pytest.raises(StateError, match="visibility"):
        with_white_noise(maximally_entangled(2), bad)


def test_dephasing_scales_coherences_only():
    d, s = 3, 0.4
    rho = density_matrix(maximally_entangled(d))
    out = dephased(rho, s, dims=(d, d))
    assert is_density_matrix(out)
    jj = [j * (d + 1) for j in range(d)]
    for j in jj:
        assert np.isclose(out[j, j], rho[j, j])
        for k in jj:
            if k != j:
                assert np.isclose(out[j, k], (1 - s) * rho[j, k])
    assert np.allclose(dephased(rho, 1.0), np.diag(np.diag(rho)))


def test_as_density_matrix_accepts_vectors_and_matrices():
    psi = maximally_entangled(2)
    assert np.allclose(as_density_matrix(psi), np.outer(psi, psi.conj()))
    assert np.allclose(as_density_matrix(np.eye(4) / 4), np.eye(4) / 4)
