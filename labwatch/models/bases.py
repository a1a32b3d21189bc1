"""Measurement bases: computational, Fourier, complete sets of MUBs, waveplates, Bell settings.

Convention: a basis is a ``d x d`` unitary ``U`` whose columns are the basis vectors,
``|e_k> = U[:, k]``; outcome ``k`` of a measurement in ``U`` is the projector
``|e_k><e_k|``.  A list of bases (one per setting) is stacked as an array of shape
``(m, d, d)``.

Polarization qubits: ``|0> = |H>`` (horizontal), ``|1> = |V>``.  Waveplate angles are the fast
axis measured from horizontal, in degrees; Jones matrices are given up to a global phase.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labwatch.models.finite_field import GaloisField, NotPrimePowerError, prime_power

__all__ = [
    "BasisError",
    "CHSH_HWP_DEG",
    "NotPrimePowerError",
    "as_bases",
    "cglmp_bases",
    "chsh_bases",
    "computational_basis",
    "fourier_basis",
    "haar_unitary",
    "half_wave_plate",
    "linear_polarization_basis",
    "mutually_unbiased_bases",
    "polarization_analyzer_basis",
    "quarter_wave_plate",
    "rotate",
]

#: Tolerance of the unitarity check ``max|U^H U - I|``.
UNITARY_ATOL = 1e-8


class BasisError(ValueError):
    """A measurement basis is not a unitary matrix of the expected size."""


def _check_dimension(d: int) -> int:
    if isinstance(d, bool) or not isinstance(d, (int, np.integer)) or d < 2:
        raise BasisError(f"a basis dimension must be an integer >= 2, got {d!r}")
    return int(d)


def as_bases(
    bases: ArrayLike, d: int | None = None, atol: float = UNITARY_ATOL
) -> NDArray[np.complex128]:
    """Stack one basis or a list of bases into a checked array of shape ``(m, d, d)``.

    Raises
    ------
    BasisError
        Wrong shape, dimension other than ``d`` (when given) or a non-unitary matrix.
    """
    arr = np.asarray(bases, dtype=np.complex128)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[1] != arr.shape[2] or arr.shape[0] == 0:
        raise BasisError(f"bases must have shape (m, d, d) or (d, d), got {arr.shape}")
    if d is not None and arr.shape[1] != d:
        raise BasisError(f"bases have dimension {arr.shape[1]}, expected {d}")
    if not np.all(np.isfinite(arr)):
        raise BasisError("bases have non-finite entries")
    gram = np.einsum("mji,mjk->mik", arr.conj(), arr)
    worst = np.max(np.abs(gram - np.eye(arr.shape[1])), axis=(1, 2))
    if np.any(worst > atol):
        i = int(np.argmax(worst))
        raise BasisError(f"basis {i} is not unitary (max |U^H U - I| = {worst[i]:.3g})")
    return arr


def computational_basis(d: int) -> NDArray[np.complex128]:
    """The identity: ``|e_k> = |k>``."""
    return np.eye(_check_dimension(d), dtype=np.complex128)


def fourier_basis(d: int) -> NDArray[np.complex128]:
    """``U[j, k] = exp(2 pi i j k / d) / sqrt(d)`` (discrete Fourier basis)."""
    d = _check_dimension(d)
    j = np.arange(d)
    return np.exp(2j * np.pi * np.outer(j, j) / d) / math.sqrt(d)


def mutually_unbiased_bases(d: int) -> list[NDArray[np.complex128]]:
    """A complete set of ``d + 1`` mutually unbiased bases for a prime-power ``d``.

    Basis 0 is computational.  Basis ``1 + s`` for field element ``s`` in GF(d) (element
    numbering of :class:`~labwatch.models.finite_field.GaloisField`; ``s = 0`` gives the
    Fourier-type basis) has vectors labelled by ``c`` in GF(d), with components over the
    field elements ``x``:

    * odd characteristic ``p``: ``omega_p ** (Tr(s x^2) + Tr(c x)) / sqrt(d)``, the
      Wootters-Fields construction (Wootters & Fields, Ann. Phys. 191, 363 (1989));
    * characteristic 2: ``i ** (x^T M_s x) * (-1) ** (c . x) / sqrt(d)`` with the integer trace
      form ``M_s[i, j] = Tr(s alpha^i alpha^j)`` evaluated in the integers mod 4.  This is the
      Galois-ring (Z_4 lift) form of the trace construction (Klappenecker & Roetteler,
      LNCS 2948, 137 (2004)), written in coordinates; the quadratic Z_4 Gauss sums have
      modulus ``sqrt(d)`` because ``M_s - M_t`` is non-degenerate mod 2 for ``s != t``.

    Here ``x`` and ``c`` are coefficient vectors in the polynomial basis and the vector
    index is the element number (base-``p`` digits).  Mutual unbiasedness is verified in the
    unit tests for d = 2, 3, 4, 5, 7, 8, 9.

    Raises
    ------
    NotPrimePowerError
        ``d`` is not a prime power (no complete set is known then).

    Examples
    --------
    >>> import numpy as np
    >>> bases = mutually_unbiased_bases(4)
    >>> len(bases)
    5
    >>> bool(np.allclose(abs(bases[1].conj().T @ bases[3]) ** 2, 1 / 4))
    True
    """
    d = _check_dimension(d)
    try:
        p, k = prime_power(d)
    except NotPrimePowerError:
        raise NotPrimePowerError(
            f"mutually_unbiased_bases needs a prime-power dimension (2, 3, 4, 5, 7, 8, 9, ...), "
            f"got {d}"
        ) from None
    field = GaloisField(d)
    x = field.digits  # (d, k) coefficient vectors of the component index
    c = field.digits  # (d, k) coefficient vectors of the basis-vector label
    linear = (x @ c.T) % p  # c . x, the linear part (Tr(c x) in the dual coordinates)
    bases = [computational_basis(d)]
    for s in range(d):
        m = field.trace_form(s)
        quad = np.einsum("xi,ij,xj->x", x, m, x)  # integer quadratic form, not reduced yet
        if p == 2:
            phase = (np.pi / 2) * (quad % 4)[:, None] + np.pi * linear
        else:
            phase = (2 * np.pi / p) * ((quad[:, None] + linear) % p)
        bases.append(np.exp(1j * phase) / math.sqrt(d))
    return bases


def rotate(bases: ArrayLike, unitary: ArrayLike) -> NDArray[np.complex128]:
    """Apply a frame change ``V`` to every basis: ``U -> V U`` (vectors ``|e_k> -> V|e_k>``).

    Returns an array of shape ``(m, d, d)``.
    """
    arr = as_bases(bases)
    v = as_bases(unitary, arr.shape[1])[0]
    return np.einsum("ij,mjk->mik", v, arr)


def haar_unitary(d: int, rng: np.random.Generator | int | None = None) -> NDArray[np.complex128]:
    """A Haar-random ``d x d`` unitary (QR of a complex Ginibre matrix with the phase fix).

    Mezzadri, Notices AMS 54, 592 (2007): multiplying ``Q`` by the phases of ``diag(R)``
    makes the distribution exactly Haar.  ``rng`` is a Generator or a seed.
    """
    d = _check_dimension(d)
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    z = (gen.standard_normal((d, d)) + 1j * gen.standard_normal((d, d))) / math.sqrt(2.0)
    q, r = np.linalg.qr(z)
    diag = np.diag(r)
    return q * (diag / np.abs(diag))[None, :]


def half_wave_plate(angle_deg: float) -> NDArray[np.complex128]:
    """Jones matrix of a half-wave plate with fast axis at ``angle_deg`` from horizontal.

    ``[[cos 2t, sin 2t], [sin 2t, -cos 2t]]``: linear polarization at ``phi`` leaves at
    ``2 t - phi``.
    """
    t = math.radians(float(angle_deg))
    c, s = math.cos(2 * t), math.sin(2 * t)
    return np.array([[c, s], [s, -c]], dtype=np.complex128)


def quarter_wave_plate(angle_deg: float) -> NDArray[np.complex128]:
    """Jones matrix ``R(t) diag(1, i) R(-t)`` of a quarter-wave plate, fast axis at ``t``."""
    t = math.radians(float(angle_deg))
    c, s = math.cos(t), math.sin(t)
    rot = np.array([[c, -s], [s, c]], dtype=np.complex128)
    return rot @ np.diag([1.0, 1j]) @ rot.T


def polarization_analyzer_basis(
    hwp_deg: float, qwp_deg: float | None = None
) -> NDArray[np.complex128]:
    """Basis measured by (QWP, then) HWP, then a polarizing beam splitter.

    Light passes the quarter-wave plate (if any), the half-wave plate and the PBS; outcome 0 is
    the transmitted (H) port, outcome 1 the reflected (V) port.  With ``W = HWP @ QWP`` the
    detected projectors are ``W^H |H><H| W`` and ``W^H |V><V| W``, so the basis is ``W^H``.
    A lone HWP at ``t`` measures linear polarization at ``2 t`` (outcome 0).
    """
    w = half_wave_plate(hwp_deg)
    if qwp_deg is not None:
        w = w @ quarter_wave_plate(qwp_deg)
    return w.conj().T


def linear_polarization_basis(angle_deg: float) -> NDArray[np.complex128]:
    """Outcome 0 = linear polarization at ``angle_deg``, outcome 1 = the orthogonal one."""
    t = math.radians(float(angle_deg))
    c, s = math.cos(t), math.sin(t)
    return np.array([[c, -s], [s, c]], dtype=np.complex128)


#: Half-wave-plate angles (deg) of the CHSH analyzers: polarizers at 0, 45 (Alice) and
#: 22.5, -22.5 (Bob) -- common practice, no source.
CHSH_HWP_DEG: tuple[tuple[float, float], tuple[float, float]] = ((0.0, 22.5), (11.25, -11.25))


def chsh_bases(
    hwp_deg: Sequence[Sequence[float]] = CHSH_HWP_DEG,
) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
    """Analyzer bases ``(bases_a, bases_b)`` for CHSH on ``|Phi+> = (|HH> + |VV>)/sqrt(2)``.

    With the default half-wave-plate angles, ``S = E00 + E01 + E10 - E11 = 2 sqrt(2)``
    (:func:`labwatch.bell.chsh`), since ``E = cos 2(theta_A - theta_B)`` for ``|Phi+>``.
    Each array has shape ``(2, 2, 2)``.

    Examples
    --------
    >>> from labwatch.bell import chsh
    >>> from labwatch.models import maximally_entangled, probabilities
    >>> round(chsh().evaluate(probabilities(maximally_entangled(2), *chsh_bases())).value, 6)
    2.828427
    """
    (a0, a1), (b0, b1) = hwp_deg
    bases_a = np.stack([polarization_analyzer_basis(a0), polarization_analyzer_basis(a1)])
    bases_b = np.stack([polarization_analyzer_basis(b0), polarization_analyzer_basis(b1)])
    return bases_a, bases_b


def cglmp_bases(d: int) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
    """The CGLMP measurement settings ``(bases_a, bases_b)``, each of shape ``(2, d, d)``.

    Collins, Gisin, Linden, Massar & Popescu, PRL 88, 040404 (2002): Alice's setting ``x`` has
    vectors ``|k>_x = sum_j exp(2 pi i j (k + alpha_x) / d) |j> / sqrt(d)``, Bob's setting
    ``y`` has ``|l>_y = sum_j exp(-2 pi i j (l - beta_y) / d) |j> / sqrt(d)`` with
    ``alpha = (0, 1/2)`` and ``beta = (1/4, -1/4)``.  With :func:`labwatch.bell.cglmp` as
    written these give ``I_3 = 2.8729`` and ``I_4 = 2.8962`` on the maximally entangled
    state.
    """
    d = _check_dimension(d)
    j = np.arange(d)[:, None]
    k = np.arange(d)[None, :]
    alpha = (0.0, 0.5)
    beta = (0.25, -0.25)
    bases_a = np.stack([np.exp(2j * np.pi * j * (k + a) / d) for a in alpha]) / math.sqrt(d)
    bases_b = np.stack([np.exp(-2j * np.pi * j * (k - b) / d) for b in beta]) / math.sqrt(d)
    return bases_a, bases_b
