"""Bases: unitarity, complete MUB sets, waveplates and the standard Bell settings."""

from __future__ import annotations

import math

import numpy as np
import pytest

from labwatch.models import (
    BasisError,
    NotPrimePowerError,
    as_bases,
    cglmp_bases,
    chsh_bases,
    computational_basis,
    fourier_basis,
    haar_unitary,
    half_wave_plate,
    linear_polarization_basis,
    mutually_unbiased_bases,
    polarization_analyzer_basis,
    quarter_wave_plate,
    rotate,
)
from labwatch.models.finite_field import GaloisField, prime_power

H = np.array([1.0, 0.0])
V = np.array([0.0, 1.0])


def is_unitary(u, atol=1e-12):
    return np.allclose(u.conj().T @ u, np.eye(u.shape[0]), atol=atol)


@pytest.mark.parametrize("d", [2, 3, 4, 5, 7, 8, 9])
def test_complete_mub_sets(d):
    # A complete set has d + 1 bases and |<e|f>|^2 = 1/d for vectors of different bases
    # (Wootters & Fields, Ann. Phys. 191, 363 (1989)).  Tolerance: float rounding only.
    bases = mutually_unbiased_bases(d)
    assert len(bases) == d + 1
    for u in bases:
        assert u.shape == (d, d)
        assert is_unitary(u)
    for i, u in enumerate(bases):
        for j, w in enumerate(bases[:i]):
            overlaps = np.abs(u.conj().T @ w) ** 2
            assert np.allclose(overlaps, 1.0 / d, atol=1e-12), (d, i, j)


@pytest.mark.parametrize("d", [16, 25, 27])
def test_larger_prime_power_mubs(d):
    bases = np.stack(mutually_unbiased_bases(d))
    gram = np.abs(np.einsum("mji,njk->mnik", bases.conj(), bases)) ** 2
    expected = np.full_like(gram, 1.0 / d)
    expected[np.arange(d + 1), np.arange(d + 1)] = np.eye(d)
    assert np.allclose(gram, expected, atol=1e-12)


def test_prime_mubs_start_with_computational_and_fourier():
    bases = mutually_unbiased_bases(5)
    assert np.allclose(bases[0], computational_basis(5))
    assert np.allclose(bases[1], fourier_basis(5))


def test_qubit_mubs_are_z_x_y_eigenbases():
    z, x, y = mutually_unbiased_bases(2)
    pauli = {
        "x": np.array([[0, 1], [1, 0]]),
        "y": np.array([[0, -1j], [1j, 0]]),
        "z": np.diag([1, -1]),
    }
    for u, name in ((z, "z"), (x, "x"), (y, "y")):
        diag = u.conj().T @ pauli[name] @ u
        assert np.allclose(diag, np.diag(np.diag(diag)))  # u diagonalises that Pauli


@pytest.mark.parametrize("d", [6, 10, 12, 1, 0])
def test_non_prime_powers_are_refused(d):
    with pytest.raises(ValueError, match=str(d)):
        mutually_unbiased_bases(d)


def test_not_prime_power_error_is_value_error():
    with pytest.raises(NotPrimePowerError, match="prime-power"):
        mutually_unbiased_bases(6)
    assert prime_power(8) == (2, 3)
    assert prime_power(9) == (3, 2)


@pytest.mark.parametrize("q", [4, 8, 9, 16, 27])
def test_finite_field_axioms(q):
    f = GaloisField(q)
    mul, add = f.mul, f.add
    # multiplicative group: every non-zero element has an inverse, no zero divisors
    nonzero = mul[1:, 1:]
    assert np.all(nonzero != 0)
    assert all(1 in row for row in nonzero)
    # distributivity a (b + c) = ab + ac on all triples
    a, b, c = np.meshgrid(np.arange(q), np.arange(q), np.arange(q), indexing="ij")
    assert np.array_equal(mul[a, add[b, c]], add[mul[a, b], mul[a, c]])
    # the trace is additive, GF(p)-valued and onto
    assert np.array_equal(f.trace[add], (f.trace[:, None] + f.trace[None, :]) % f.p)
    assert set(f.trace.tolist()) == set(range(f.p))

    # Frobenius power-sum definition of the trace: Tr(x) = sum_i x^(p^i) (textbook algebra)
    def power(x, n):
        acc = 1
        for _ in range(n):
            acc = mul[acc, x]
        return acc

    for x in range(q):
        total = 0
        for i in range(f.k):
            total = add[total, power(x, f.p**i)]
        assert total == f.trace[x]


def test_as_bases_rejects_non_unitary():
    with pytest.raises(BasisError, match="not unitary"):
        as_bases(np.array([[1.0, 1.0], [0.0, 1.0]]))
    with pytest.raises(BasisError, match="shape"):
        as_bases(np.ones((2, 3)))
    assert as_bases(np.eye(3)).shape == (1, 3, 3)


def test_haar_unitary_seeded_and_unitary():
    u1 = haar_unitary(5, np.random.default_rng(3))
    u2 = haar_unitary(5, 3)
    assert is_unitary(u1)
    assert np.allclose(u1, u2)
    assert not np.allclose(u1, haar_unitary(5, 4))


def test_haar_unitary_moments():
    # For Haar U(d): E|U_00|^2 = 1/d and E|U_00|^4 = 2/(d(d+1)) (standard Weingarten moments,
    # from memory; e.g. Collins & Sniady, Commun. Math. Phys. 264, 773 (2006)).  The phase fix
    # matters: plain QR without it biases the diagonal.  Tolerance: ~5 standard errors for
    # n = 4000 samples.
    d, n = 3, 4000
    rng = np.random.default_rng(11)
    u00 = np.array([abs(haar_unitary(d, rng)[0, 0]) ** 2 for _ in range(n)])
    assert abs(u00.mean() - 1 / d) < 5 * u00.std() / math.sqrt(n)
    m4 = 2 / (d * (d + 1))
    assert abs((u00**2).mean() - m4) < 5 * (u00**2).std() / math.sqrt(n)


def test_rotate_keeps_unbiasedness():
    bases = mutually_unbiased_bases(3)
    rotated = rotate(bases, haar_unitary(3, 0))
    assert rotated.shape == (4, 3, 3)
    assert np.allclose(np.abs(rotated[1].conj().T @ rotated[2]) ** 2, 1 / 3)


def test_half_wave_plate_rotates_linear_polarization():
    # A HWP at t maps linear polarization phi to 2t - phi (common practice, no source).
    out = half_wave_plate(22.5) @ H
    assert np.allclose(out, np.array([1, 1]) / math.sqrt(2))
    assert is_unitary(half_wave_plate(17.0))


def test_quarter_wave_plate_makes_circular_light():
    out = quarter_wave_plate(45.0) @ H
    assert np.isclose(abs(out[0]) ** 2, 0.5)
    # fast axis at 45 deg: H -> (|H> - i|V>)/sqrt(2) with the diag(1, i) convention
    assert np.isclose(abs(np.vdot(np.array([1, -1j]) / math.sqrt(2), out)), 1.0)
    # two QWPs at the same angle make a HWP (up to global phase)
    q = quarter_wave_plate(30.0)
    hq = q @ q
    h = half_wave_plate(30.0)
    phase = hq[0, 0] / h[0, 0]
    assert np.allclose(hq, phase * h)


def test_analyzer_basis_outcome_zero_is_transmitted_port():
    u = polarization_analyzer_basis(22.5)
    # the light that the HWP sends into the H port is diagonal polarization
    assert np.allclose(half_wave_plate(22.5) @ u[:, 0], H)
    assert np.allclose(half_wave_plate(22.5) @ u[:, 1], -V) or np.allclose(
        half_wave_plate(22.5) @ u[:, 1], V
    )
    # a lone HWP at t measures linear polarization at 2t
    for t in (0.0, 10.0, 33.0):
        e0 = polarization_analyzer_basis(t)[:, 0]
        assert np.isclose(abs(np.vdot(linear_polarization_basis(2 * t)[:, 0], e0)), 1.0)


def test_analyzer_with_qwp_measures_circular():
    # QWP at 45 deg then HWP at 0: outcome 0 is a circular polarization
    e0 = polarization_analyzer_basis(0.0, 45.0)[:, 0]
    assert np.isclose(abs(e0[0]) ** 2, 0.5)
    assert np.isclose(abs(e0[1]) ** 2, 0.5)
    assert np.isclose(abs((e0[1] / e0[0]).imag), 1.0)


def test_chsh_and_cglmp_bases_shapes():
    a, b = chsh_bases()
    assert a.shape == b.shape == (2, 2, 2)
    for d in (2, 3, 5):
        a, b = cglmp_bases(d)
        assert a.shape == b.shape == (2, d, d)
        assert all(is_unitary(u) for u in np.concatenate([a, b]))
